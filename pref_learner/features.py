# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Task features of trajectories, from forward kinematics.

A trajectory is ``q : (T, n)``; a batch is ``(M, T, n)``. A feature set maps a
batch to ``(M, d)``, one column per feature, in the order of the YAML list (the
order of every published weight vector). Kinematics run once per batch for all
frames the set reads.

Feature YAML (our format)::

    features:
      - name: tube_height            # unique, [a-z][a-z0-9_]*
        type: height                 # a type below, or "package.module:attribute"
        frame: tool_tip              # frame (link) of the URDF
        aggregate: mean              # mean | min | max | integral   (waypoint types)
        params: {point: [0, 0, 0], normal: [0, 0, 1]}
    scales: [0.1, ...]               # optional fixed scale per feature (else calibrated)

Waypoint types give one value per waypoint, then the aggregate reduces them:
``mean`` over waypoints, ``min``/``max``, or ``integral`` along the frame's path
(trapezoid rule in arc length, metres x value).

=================  ====================================================  ==========
type               value                                                 params
=================  ====================================================  ==========
height             signed distance of the frame above a plane (m)        point, normal
point_distance     distance to a point (m); ``horizontal`` ignores z     point, horizontal
capsule_distance   distance to a capsule surface (m), < 0 inside it      a, b, radius
tilt               sin^2 of the angle of a frame axis from vertical      axis (x|y|z)
in_box             1 inside an axis-aligned box, 0 outside (smoothed)    min, max, softness
in_cylinder        1 inside a cylinder on ``base`` along ``axis``        base, axis, radius,
                   (smoothed)                                            height, softness
=================  ====================================================  ==========

Trajectory types (no aggregate), time normalised to [0, 1]:

``path_length`` Cartesian length of the frame's path (m);
``effort`` integral of the squared joint speeds, ``sum |dq/ds|^2 ds``;
``jerk`` integral of the squared third derivative of the joint path;
``approach_offset`` mean squared distance of the frame from the line along
``axis`` through the start and/or goal, over the ``fraction`` of waypoints
next to it.

Every type is a registered :class:`FeatureType` (:data:`FEATURE_TYPES`) that
carries its parameter schema, checks, value and gradient; one implementation
serves the batched and the single-trajectory evaluation and the planner's
gradients. A user type is ``type: "my_pkg.my_module:my_feature"`` naming a
:class:`FeatureType` subclass (registered the same way as the built-ins) or a
callable ``f(q, positions, rotations, params) -> (M,)`` with ``q (M, T, n)``,
``positions (M, T, 3)`` and ``rotations (M, T, 3, 3)`` of the feature's frame.
Reading a file never runs code on its own: the module must be one the user
allowed in this process (:func:`allow_feature_modules`, from the command
line's ``--feature-module`` or a node's ``feature_modules`` parameter) or one
an installed package declares under the entry-point group
``pref_learner.feature_types``; otherwise the type is refused before any import.

Smooth surrogates (for the planner only; :meth:`FeatureSet.values_and_gradients`
with ``temperatures``): soft min/max by log-sum-exp, distances and path-length
segments rounded off at zero; every other evaluation is exact.

Scaling: the reward uses features divided by one fixed positive scale per
feature for the whole session (given, or calibrated once from smooth
trajectories over the scenario's tasks and stored with the state), never
re-standardised per choice set.
"""

from __future__ import annotations

import importlib
import importlib.metadata
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Dict, List, NamedTuple, Optional, Sequence, Tuple

import numpy as np
import yaml
from scipy.special import expit

from .robot import RobotModel

AGGREGATES = ('mean', 'min', 'max', 'integral')
_SPEC_KEYS = ('name', 'type', 'frame', 'aggregate', 'params')
_NAME_RE = re.compile(r'^[a-z][a-z0-9_]*$')
_MODULE_RE = re.compile(r'^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*$')
#: Installed packages declare their feature modules here (setup.py entry_points).
ENTRY_POINT_GROUP = 'pref_learner.feature_types'
_ALLOWED_MODULES: set = set()


class FeatureConfigError(ValueError):
    """A feature YAML that cannot be used; the message names file, key and allowed values."""


@dataclass(frozen=True)
class FeatureSpec:
    """One feature of a set: its name, type, frame, aggregate and checked parameters.

    ``func``: the user function of a function type; ``kind``: the
    :class:`FeatureType` that evaluates it (looked up by ``type`` when None).
    """

    name: str
    type: str
    frame: Optional[str]
    aggregate: Optional[str]
    params: Dict[str, object] = field(default_factory=dict)
    func: Optional[Callable] = None
    kind: Optional['FeatureType'] = field(default=None, compare=False, repr=False)

    @property
    def feature_type(self) -> 'FeatureType':
        """The :class:`FeatureType` evaluating this feature."""
        if self.kind is not None:
            return self.kind
        if self.func is not None:
            return FunctionType(self.type, self.func)
        try:
            return FEATURE_TYPES[self.type]
        except KeyError:
            raise FeatureConfigError(f'feature {self.name!r}: type {self.type!r} is not '
                                     'registered') from None


def allow_feature_modules(modules) -> None:
    """Let user feature types load from these modules in this process.

    Only the user's explicit choice calls this (command-line option, node
    parameter); nothing read from a file does. Submodules are not implied.
    """
    for m in modules:
        if not isinstance(m, str) or not _MODULE_RE.match(m):
            raise FeatureConfigError(f'feature module {m!r} is not a dotted Python module name')
        _ALLOWED_MODULES.add(m)


def allowed_feature_modules() -> frozenset:
    """Modules user feature types may load from: allowed explicitly or installed entry points.

    Entry points are read from package metadata; nothing is imported here.
    """
    installed = {ep.value.partition(':')[0].strip()
                 for ep in importlib.metadata.entry_points(group=ENTRY_POINT_GROUP)}
    return frozenset(_ALLOWED_MODULES | installed)


def _load_user_type(ftype: str, where: str):
    """Import a user type from an allowed module and register it under ``ftype``.

    The attribute may be a :class:`FeatureType` subclass or instance (its
    schema and checks apply) or a plain function (:class:`FunctionType`).
    Returns ``(feature type, function or None)``.
    """
    mod, _, attr = ftype.partition(':')
    if mod not in allowed_feature_modules():
        raise FeatureConfigError(
            f'{where}: type {ftype!r} names module {mod!r}, which is not allowed to load '
            f'(a feature file never runs code on its own); allow it with --feature-module '
            f'{mod} (pref-learner), the feature_modules parameter (nodes) or an installed '
            f'{ENTRY_POINT_GROUP} entry point')
    try:
        func = getattr(importlib.import_module(mod), attr)
    except (ImportError, AttributeError) as exc:
        raise FeatureConfigError(f'{where}: type {ftype!r} cannot be imported: {exc}') from None
    if isinstance(func, type) and issubclass(func, FeatureType):
        kind, func = func(), None
    elif isinstance(func, FeatureType):
        kind, func = func, None
    elif callable(func):
        kind = FunctionType(ftype, func)
    else:
        raise FeatureConfigError(f'{where}: type {ftype!r} is not callable')
    register_feature_type(kind, ftype)
    return kind, func


def _vec3(v, where, key):
    try:
        a = np.asarray(v, dtype=np.float64) if v is not None else None
    except (TypeError, ValueError):
        a = None
    if a is None or a.shape != (3,) or not np.all(np.isfinite(a)):
        raise FeatureConfigError(f'{where}: params.{key} must be a list of 3 numbers, got {v!r}')
    return a


def _parse_spec(raw, i: int, source: str, robot: RobotModel) -> FeatureSpec:
    where = f'{source}: features[{i}]'
    if not isinstance(raw, dict):
        raise FeatureConfigError(f'{where} must be a mapping with keys {list(_SPEC_KEYS)}')
    unknown = sorted(set(raw) - set(_SPEC_KEYS))
    if unknown:
        raise FeatureConfigError(f'{where}: unknown key(s) {unknown}; allowed: {list(_SPEC_KEYS)}')
    name = raw.get('name')
    if not isinstance(name, str) or not _NAME_RE.match(name):
        raise FeatureConfigError(f'{where}: name must match [a-z][a-z0-9_]*, got {name!r}')
    where = f'{source}: feature {name!r}'
    ftype = raw.get('type')
    if not isinstance(ftype, str):
        raise FeatureConfigError(f'{where}: type is required; allowed: '
                                 f'{builtin_feature_types()} or "module:function"')
    params = raw.get('params') or {}
    if not isinstance(params, dict):
        raise FeatureConfigError(f'{where}: params must be a mapping, got {params!r}')
    func = None
    if ':' in ftype:
        kind, func = _load_user_type(ftype, where)
    elif ftype not in FEATURE_TYPES:
        raise FeatureConfigError(f'{where}: type {ftype!r} is unknown; allowed: '
                                 f'{builtin_feature_types()} or "module:function"')
    else:
        kind = FEATURE_TYPES[ftype]
    if func is None:                     # a function type takes its parameters as given
        allowed = kind.params
        extra = sorted(set(params) - set(allowed))
        if extra:
            raise FeatureConfigError(f'{where}: unknown params {extra}; allowed for {ftype}: '
                                     f'{sorted(allowed)}')
        merged = dict(allowed)
        merged.update(params)
        params = merged
        kind.check(params, where)
    frame = raw.get('frame', robot.tool_frame)
    if kind.uses_frame:
        if not isinstance(frame, str) or not robot.model.existFrame(frame):
            raise FeatureConfigError(
                f'{where}: frame {frame!r} is not a frame of {robot.source}; frames: '
                f'{sorted(set(robot.frame_names) - {"universe"})}')
    agg = raw.get('aggregate')
    if kind.aggregated:
        agg = agg or 'mean'
        if agg not in AGGREGATES:
            raise FeatureConfigError(f'{where}: aggregate {agg!r} is unknown; allowed: '
                                     f'{list(AGGREGATES)}')
    elif agg is not None and func is None:
        raise FeatureConfigError(f'{where}: type {ftype} takes no aggregate')
    return FeatureSpec(name, ftype, frame, agg, params, func, kind)


def _positive(v, where, key) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not v > 0:
        raise FeatureConfigError(f'{where}: params.{key} must be a number > 0, got {v!r}')
    return float(v)


def _unit(v, where, key) -> np.ndarray:
    a = _vec3(v, where, key)
    n = np.linalg.norm(a)
    if n == 0:
        raise FeatureConfigError(f'{where}: params.{key} must be non-zero')
    return a / n


# ---------------------------------------------------------------- waypoint values
def _norm(d: np.ndarray, temperature: float = 0.0):
    """Euclidean norm of ``d (..., 3)`` and its unit direction.

    ``temperature t > 0`` gives the smooth ``sqrt(|d|^2 + t^2)`` instead, within
    ``t`` of ``|d|``, so that a distance has no cone point at zero.
    """
    r = np.sqrt(np.sum(d * d, axis=-1) + temperature * temperature)
    return r, d / np.maximum(r, 1e-12)[..., None]


def _soft_box(pos: np.ndarray, lo: np.ndarray, hi: np.ndarray, s: float):
    """Smoothed indicator of an axis-aligned box (..., T) and its gradient (..., T, 3).

    The product over axes of ``sigmoid((x - lo)/s) * sigmoid((hi - x)/s)``.
    """
    a = expit((pos - lo) / s)
    b = expit((hi - pos) / s)
    g = np.prod(a * b, axis=-1)
    # d log(a_i b_i) / d x_i = ((1 - a_i) - (1 - b_i)) / s
    return g, g[..., None] * (((1.0 - a) - (1.0 - b)) / s)


def soft_extreme(g: np.ndarray, temperature: float, largest: bool = True):
    """Log-sum-exp soft maximum (or soft minimum) of ``g (..., T)`` over its last axis.

    Returns the value ``(...,)`` and its gradient ``(..., T)`` (softmax
    weights: non-negative, summing to one). With temperature ``t > 0`` in
    the units of ``g``, the soft maximum ``t log sum_i exp(g_i / t)`` lies in
    ``[max g, max g + t log T]`` and the soft minimum
    ``-t log sum_i exp(-g_i / t)`` in ``[min g - t log T, min g]``; both are
    smooth and tend to the exact extreme as ``t -> 0``.
    """
    s = g if largest else -g
    m = s.max(axis=-1, keepdims=True)
    e = np.exp((s - m) / temperature)
    z = e.sum(axis=-1, keepdims=True)
    val = m[..., 0] + temperature * np.log(z[..., 0])
    return (val if largest else -val), e / z


def _aggregate(agg: str, g: np.ndarray, pos: np.ndarray, temperature: float = 0.0,
               grad: bool = True):
    """Aggregate g (..., T) -> (...,) with weights dA/dg (..., T).

    For ``integral`` also the derivative with respect to positions (..., T, 3).
    ``temperature > 0`` replaces ``min``/``max`` by their smooth log-sum-exp
    surrogates (:func:`soft_extreme`); 0 keeps the exact extreme. With
    ``grad=False`` the value alone: ``(value, None, None)``, the same value.
    """
    T = g.shape[-1]
    if agg == 'mean':
        return g.mean(axis=-1), np.full(g.shape, 1.0 / T) if grad else None, None
    if agg in ('min', 'max') and temperature > 0:
        val, w = soft_extreme(g, temperature, agg == 'max')
        return val, w, None
    if agg in ('min', 'max'):
        if not grad:
            return (np.min(g, axis=-1) if agg == 'min' else np.max(g, axis=-1)), None, None
        idx = np.argmin(g, axis=-1) if agg == 'min' else np.argmax(g, axis=-1)
        val = np.take_along_axis(g, idx[..., None], axis=-1)[..., 0]
        w = np.zeros(g.shape)
        np.put_along_axis(w, idx[..., None], 1.0, axis=-1)
        return val, w, None
    if agg == 'integral':
        seg = np.diff(pos, axis=-2)                         # (..., T-1, 3)
        ln = np.linalg.norm(seg, axis=-1)                   # (..., T-1)
        mid = 0.5 * (g[..., 1:] + g[..., :-1])
        val = np.sum(mid * ln, axis=-1)
        if not grad:
            return val, None, None
        w = np.zeros(g.shape)
        w[..., 1:] += 0.5 * ln
        w[..., :-1] += 0.5 * ln
        u = seg / np.maximum(ln, 1e-12)[..., None]
        dpos = np.zeros(pos.shape)
        dpos[..., 1:, :] += mid[..., None] * u
        dpos[..., :-1, :] -= mid[..., None] * u
        return val, w, dpos
    raise AssertionError(agg)


_DIFF: Dict[Tuple[int, int], np.ndarray] = {}


def _diff_matrix(T: int, order: int) -> np.ndarray:
    key = (T, order)
    if key not in _DIFF:
        _DIFF[key] = np.diff(np.eye(T), n=order, axis=0)
    return _DIFF[key]


# ---------------------------------------------------------------- feature types
class FrameBatch(NamedTuple):
    """What a feature type reads of a batch of ``B`` trajectories ``q (B, T, n)``.

    ``positions (B, T, 3)`` and ``rotations (B, T, 3, 3)`` of the feature's
    frame (None for a type that reads no frame); ``jp``, ``jr (B, T, 3, n)``
    its translational and rotational Jacobians (None unless gradients are
    asked for).
    """

    q: np.ndarray
    positions: Optional[np.ndarray] = None
    rotations: Optional[np.ndarray] = None
    jp: Optional[np.ndarray] = None
    jr: Optional[np.ndarray] = None


class FeatureType:
    """A kind of feature: its parameter schema, checks, value and gradient.

    ``name``: what a feature file's ``type`` says; ``params``: the schema,
    each parameter's default (None: required; unknown parameters are
    refused); ``uses_frame``: reads a frame's path (False: joint positions
    only); ``aggregated``: one value per waypoint, reduced by the feature's
    ``aggregate``. :meth:`check` checks and normalises the parameters (the
    defaults merged in) in place. :meth:`evaluate` gives the raw values
    ``(B,)`` of a batch and, with ``grad``, their gradients ``(B, T, n)``:
    one implementation serves feature evaluation (a batch or one
    trajectory) and the planner's gradients. Built-in types and types a
    user module defines register the same way (:func:`register_feature_type`).
    """

    name = ''
    params: Dict[str, object] = {}
    uses_frame = True
    aggregated = False

    def check(self, p: dict, where: str) -> None:
        """Check and normalise the merged parameters ``p`` in place."""

    def evaluate(self, spec: 'FeatureSpec', batch: FrameBatch, grad: bool = False,
                 temperature: float = 0.0):
        """Return raw values ``(B,)`` and gradients ``(B, T, n)`` (None unless ``grad``).

        ``temperature > 0`` (in the feature's units) asks for the smooth
        surrogate where the type has one; 0 is exact.
        """
        raise NotImplementedError


class WaypointType(FeatureType):
    """A value per waypoint of the frame, reduced by the feature's aggregate.

    Subclasses give :meth:`waypoint`: values ``g (..., T)``, their gradient
    with respect to the frame position ``(..., T, 3)`` and with respect to
    the frame axis :meth:`frame_axis` ``(..., T, 3)`` (each None when the
    value does not depend on it).
    """

    aggregated = True

    def frame_axis(self, p: dict) -> int:
        """Column (0, 1, 2 for x, y, z) of the frame axis the value reads."""
        raise NotImplementedError

    def waypoint(self, p: dict, pos: np.ndarray, rot: np.ndarray, temperature: float = 0.0):
        raise NotImplementedError

    def evaluate(self, spec, batch, grad=False, temperature=0.0):
        pos, rot = batch.positions, batch.rotations
        g, dg_dpos, dg_daxis = self.waypoint(spec.params, pos, rot, temperature)
        val, w, dpos_agg = _aggregate(spec.aggregate, g, pos, temperature, grad)
        if not grad:
            return val, None
        Jp, Jr = batch.jp, batch.jr                        # (B, T, 3, n)
        total = np.zeros(batch.q.shape)
        if dg_dpos is not None:
            total += w[..., None] * np.einsum('bti,btin->btn', dg_dpos, Jp)
        if dg_daxis is not None:
            axis = rot[..., :, self.frame_axis(spec.params)]   # (B, T, 3)
            # d axis / d q_j = omega_j x axis
            dax = np.cross(np.moveaxis(Jr, -1, -2), axis[:, :, None, :])  # (B, T, n, 3)
            total += w[..., None] * np.einsum('bti,btni->btn', dg_daxis, dax)
        if dpos_agg is not None:
            total += np.einsum('bti,btin->btn', dpos_agg, Jp)
        return val, total


class PathType(FeatureType):
    """A quantity of the frame's whole path: :meth:`path` gives it and d/dpositions."""

    def path(self, p: dict, pos: np.ndarray, grad: bool, temperature: float = 0.0):
        """Value ``(B,)`` of positions ``pos (B, T, 3)``, its gradient (None unless ``grad``)."""
        raise NotImplementedError

    def evaluate(self, spec, batch, grad=False, temperature=0.0):
        val, dpos = self.path(spec.params, batch.positions, grad, temperature)
        if not grad:
            return val, None
        return val, np.einsum('bti,btin->btn', dpos, batch.jp)


class JointType(FeatureType):
    """``h sum_s |D^order q|^2`` over the joint path, time normalised to [0, 1]."""

    uses_frame = False
    order = 1

    def evaluate(self, spec, batch, grad=False, temperature=0.0):
        q = batch.q
        T = q.shape[1]
        order = self.order
        if T <= order:
            raise ValueError(f'feature {spec.name}: needs T > {order} waypoints')
        h = 1.0 / (T - 1)
        if not grad:
            dq = np.diff(q, n=order, axis=1) / h ** order
            return np.sum(dq * dq, axis=(1, 2)) * h, None
        # the same sum as a product with the difference matrix, which also gives its gradient
        D = _diff_matrix(T, order) / h ** order
        Dq = np.einsum('st,btn->bsn', D, q)
        return h * np.sum(Dq * Dq, axis=(1, 2)), 2.0 * h * np.einsum('st,bsn->btn', D, Dq)


class FunctionType(FeatureType):
    """A user function ``f(q, positions, rotations, params) -> (M,)`` as a feature type.

    Its parameters are passed as given (no schema); a ``.gradient(q (T, n),
    params) -> (T, n)`` attribute gives the planner its gradient.
    """

    def __init__(self, name: str, func: Callable):
        self.name = name
        self.func = func

    def evaluate(self, spec, batch, grad=False, temperature=0.0):
        q = batch.q
        gfun = getattr(self.func, 'gradient', None)
        if grad and gfun is None:
            raise ValueError(f'feature {spec.name}: user type has no .gradient; the '
                             'planner needs one')
        v = np.asarray(self.func(q, batch.positions, batch.rotations, spec.params),
                       dtype=np.float64)
        if v.shape != (q.shape[0],):
            raise ValueError(f'feature {spec.name}: user function returned shape {v.shape}, '
                             f'expected ({q.shape[0]},)')
        if not grad:
            return v, None
        grads = np.zeros(q.shape)
        for b in range(q.shape[0]):
            grads[b] = gfun(q[b], spec.params)
        return v, grads


#: The registry of feature types by name: the built-ins, then user types as they load.
FEATURE_TYPES: Dict[str, FeatureType] = {}


def register_feature_type(cls_or_obj, name: Optional[str] = None):
    """Register a feature type (a :class:`FeatureType` subclass or instance); usable as decorator.

    ``name`` defaults to the type's own ``name``. Returns its argument.
    """
    obj = cls_or_obj() if isinstance(cls_or_obj, type) else cls_or_obj
    if not isinstance(obj, FeatureType):
        raise FeatureConfigError(f'{cls_or_obj!r} is not a FeatureType')
    key = name or obj.name
    if not key:
        raise FeatureConfigError(f'feature type {cls_or_obj!r} has no name')
    FEATURE_TYPES[key] = obj
    return cls_or_obj


def builtin_feature_types() -> List[str]:
    """Names of the registered types a file may name without a module."""
    return [k for k in FEATURE_TYPES if ':' not in k]


@register_feature_type
class Height(WaypointType):
    """Signed distance of the frame above a plane (m)."""

    name = 'height'
    params = {'point': [0.0, 0.0, 0.0], 'normal': [0.0, 0.0, 1.0]}

    def check(self, p, where):
        p['point'] = _vec3(p['point'], where, 'point')
        n = _vec3(p['normal'], where, 'normal')
        if np.linalg.norm(n) == 0:
            raise FeatureConfigError(f'{where}: params.normal must be non-zero')
        p['normal'] = n / np.linalg.norm(n)

    def waypoint(self, p, pos, rot, temperature=0.0):
        g = (pos - p['point']) @ p['normal']
        return g, np.broadcast_to(p['normal'], pos.shape), None


@register_feature_type
class PointDistance(WaypointType):
    """Distance to a point (m); ``horizontal`` ignores z; smoothed at 0 with a temperature."""

    name = 'point_distance'
    params = {'point': None, 'horizontal': False}

    def check(self, p, where):
        p['point'] = _vec3(p['point'], where, 'point')
        if not isinstance(p['horizontal'], bool):
            raise FeatureConfigError(f'{where}: params.horizontal must be true or false')

    def waypoint(self, p, pos, rot, temperature=0.0):
        d = pos - p['point']
        if p['horizontal']:
            d = d * np.array([1.0, 1.0, 0.0])
        g, u = _norm(d, temperature)
        return g, u, None


@register_feature_type
class CapsuleDistance(WaypointType):
    """Distance to a capsule surface (m), < 0 inside it; smoothed at 0 with a temperature."""

    name = 'capsule_distance'
    params = {'a': None, 'b': None, 'radius': None}

    def check(self, p, where):
        p['a'] = _vec3(p['a'], where, 'a')
        p['b'] = _vec3(p['b'], where, 'b')
        r = p['radius']
        if isinstance(r, bool) or not isinstance(r, (int, float)) or not r >= 0:
            raise FeatureConfigError(f'{where}: params.radius must be a number >= 0, got {r!r}')
        p['radius'] = float(r)

    def waypoint(self, p, pos, rot, temperature=0.0):
        a, b = p['a'], p['b']
        ab = b - a
        L2 = float(ab @ ab)
        s = np.clip(((pos - a) @ ab) / L2, 0.0, 1.0) if L2 > 0 else np.zeros(pos.shape[:-1])
        d = pos - (a + s[..., None] * ab)
        r, u = _norm(d, temperature)
        return r - p['radius'], u, None


@register_feature_type
class Tilt(WaypointType):
    """sin^2 of the angle of a frame axis from vertical."""

    name = 'tilt'
    params = {'axis': 'z'}

    def check(self, p, where):
        if p['axis'] not in ('x', 'y', 'z'):
            raise FeatureConfigError(f'{where}: params.axis must be x, y or z, got {p["axis"]!r}')

    def frame_axis(self, p):
        return 'xyz'.index(p['axis'])

    def waypoint(self, p, pos, rot, temperature=0.0):
        axis = rot[..., :, self.frame_axis(p)]
        g = 1.0 - axis[..., 2] ** 2
        ga = np.zeros(axis.shape)
        ga[..., 2] = -2.0 * axis[..., 2]
        return g, None, ga


@register_feature_type
class InBox(WaypointType):
    """1 inside an axis-aligned box, 0 outside (smoothed by ``softness``)."""

    name = 'in_box'
    params = {'min': None, 'max': None, 'softness': 0.005}

    def check(self, p, where):
        lo = _vec3(p['min'], where, 'min')
        hi = _vec3(p['max'], where, 'max')
        if np.any(hi <= lo):
            raise FeatureConfigError(f'{where}: params.max must exceed params.min on every axis')
        p['min'], p['max'] = lo, hi
        p['softness'] = _positive(p['softness'], where, 'softness')

    def waypoint(self, p, pos, rot, temperature=0.0):
        g, dg = _soft_box(pos, p['min'], p['max'], p['softness'])
        return g, dg, None


@register_feature_type
class InCylinder(WaypointType):
    """1 inside an upright (or tilted) cylinder, 0 outside (smoothed by ``softness``)."""

    name = 'in_cylinder'
    params = {'base': None, 'axis': [0.0, 0.0, 1.0], 'radius': None, 'height': None,
              'softness': 0.005}

    def check(self, p, where):
        p['base'] = _vec3(p['base'], where, 'base')
        p['axis'] = _unit(p['axis'], where, 'axis')
        for key in ('radius', 'height', 'softness'):
            p[key] = _positive(p[key], where, key)

    def waypoint(self, p, pos, rot, temperature=0.0):
        s, ax = p['softness'], p['axis']
        r = pos - p['base']
        z = r @ ax
        radial = r - z[..., None] * ax
        rho = np.linalg.norm(radial, axis=-1)
        a1 = expit((p['radius'] - rho) / s)
        a2 = expit(z / s)
        a3 = expit((p['height'] - z) / s)
        g = a1 * a2 * a3
        # d log g = -(1 - a1)/s d rho + ((1 - a2) - (1 - a3))/s dz
        dg = g[..., None] * (-((1.0 - a1) / s)[..., None] * radial
                             / np.maximum(rho, 1e-12)[..., None]
                             + (((1.0 - a2) - (1.0 - a3)) / s)[..., None] * ax)
        return g, dg, None


@register_feature_type
class PathLength(PathType):
    """Cartesian length of the frame's path (m); segments smoothed at 0 with a temperature.

    ``temperature > 0`` smooths each of the ``T - 1`` segments to
    ``sqrt(l^2 + (t / (T - 1))^2)``.
    """

    name = 'path_length'
    params = {}

    def path(self, p, pos, grad, temperature=0.0):
        T = pos.shape[-2]
        dpos = np.zeros(pos.shape) if grad else None
        ln, u = _norm(np.diff(pos, axis=-2), temperature / (T - 1))
        if grad:
            dpos[..., 1:, :] += u
            dpos[..., :-1, :] -= u
        return ln.sum(axis=-1), dpos


@register_feature_type
class Effort(JointType):
    """Integral of the squared joint speeds, ``sum |dq/ds|^2 ds``."""

    name = 'effort'
    params = {}
    order = 1


@register_feature_type
class Jerk(JointType):
    """Integral of the squared third derivative of the joint path."""

    name = 'jerk'
    params = {}
    order = 3


@register_feature_type
class ApproachOffset(PathType):
    """Mean squared distance of the waypoints near an end from the line along ``axis`` there.

    Over the ``fraction`` of waypoints next to each chosen end (``ends``);
    smooth already.
    """

    name = 'approach_offset'
    params = {'axis': [0.0, 0.0, 1.0], 'fraction': 0.2, 'ends': 'both'}

    def check(self, p, where):
        p['axis'] = _unit(p['axis'], where, 'axis')
        f = p['fraction']
        if isinstance(f, bool) or not isinstance(f, (int, float)) or not 0 < f <= 0.5:
            raise FeatureConfigError(f'{where}: params.fraction must be a number in (0, 0.5], '
                                     f'got {f!r}')
        p['fraction'] = float(f)
        if p['ends'] not in ('start', 'goal', 'both'):
            raise FeatureConfigError(f'{where}: params.ends must be start, goal or both, '
                                     f'got {p["ends"]!r}')

    def path(self, p, pos, grad, temperature=0.0):
        # mean squared distance from the line through the end point along the axis, over
        # the K waypoints next to each chosen end
        T = pos.shape[-2]
        dpos = np.zeros(pos.shape) if grad else None
        a = p['axis']
        k = max(1, int(round(p['fraction'] * (T - 1))))
        ends = {'start': (0,), 'goal': (T - 1,), 'both': (0, T - 1)}[p['ends']]
        val = np.zeros(pos.shape[:-2])
        for e in ends:
            idx = slice(1, 1 + k) if e == 0 else slice(T - 1 - k, T - 1)
            r = pos[..., idx, :] - pos[..., e:e + 1, :]
            off = r - (r @ a)[..., None] * a
            val += np.sum(off * off, axis=(-2, -1))
            if grad:
                dpos[..., idx, :] += 2.0 * off
                dpos[..., e, :] -= 2.0 * off.sum(axis=-2)
        n = k * len(ends)
        if grad:
            dpos /= n
        return val / n, dpos


# the built-in names by kind, as lists (kept for callers of the earlier module)
WAYPOINT_TYPES = tuple(k for k, v in FEATURE_TYPES.items() if v.aggregated)
TRAJECTORY_TYPES = tuple(k for k, v in FEATURE_TYPES.items() if not v.aggregated)
#: Types computed from joint positions alone (no frame).
JOINT_TYPES = tuple(k for k, v in FEATURE_TYPES.items() if not v.uses_frame)
#: Types computed from the whole path of a frame.
PATH_TYPES = tuple(k for k, v in FEATURE_TYPES.items() if isinstance(v, PathType))


class FeatureSet:
    """An ordered set of features evaluated over batches of trajectories.

    names : tuple of str -- column order of every feature matrix and weight vector.
    scales : (d,) positive scale per feature; :meth:`__call__` returns raw / scales.
    """

    def __init__(self, robot: RobotModel, specs: Sequence[FeatureSpec],
                 scales: Optional[Sequence[float]] = None, source: str = '<features>'):
        if not specs:
            raise FeatureConfigError(f'{source}: the feature list is empty')
        names = [s.name for s in specs]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise FeatureConfigError(f'{source}: duplicate feature names {dup}')
        self.robot = robot
        self.specs = tuple(specs)
        self.names = tuple(names)
        self.source = source
        #: the FeatureType of each feature, in column order
        self.types = tuple(s.feature_type for s in self.specs)
        self.frames = tuple(dict.fromkeys(s.frame for s, t in zip(self.specs, self.types)
                                          if t.uses_frame))
        self.scales = None
        if scales is not None:
            self.scales = self._check_scales(scales)

    @property
    def d(self) -> int:
        return len(self.specs)

    def _check_scales(self, scales) -> np.ndarray:
        s = np.asarray(scales, dtype=np.float64)
        if s.shape != (self.d,) or not np.all(np.isfinite(s)) or np.any(s <= 0):
            raise FeatureConfigError(f'{self.source}: scales must be {self.d} positive numbers '
                                     f'(one per feature {list(self.names)}), got {scales!r}')
        return s

    def with_scales(self, scales) -> 'FeatureSet':
        return FeatureSet(self.robot, self.specs, scales, self.source)

    # ------------------------------------------------------------ construction
    @classmethod
    def from_yaml(cls, path_or_dict, robot: RobotModel) -> 'FeatureSet':
        if isinstance(path_or_dict, dict):
            doc, source = path_or_dict, '<features>'
        else:
            source = str(path_or_dict)
            try:
                doc = yaml.safe_load(Path(path_or_dict).read_text())
            except OSError as exc:
                raise FeatureConfigError(f'feature file {source} cannot be read: '
                                         f'{exc.strerror}') from None
            except yaml.YAMLError as exc:
                raise FeatureConfigError(f'feature file {source} is not valid YAML: {exc}') \
                    from None
        if not isinstance(doc, dict):
            raise FeatureConfigError(f'{source}: top level must be a mapping with key features')
        extra = sorted(set(doc) - {'features', 'scales', 'scenario'})
        if extra:
            raise FeatureConfigError(f'{source}: unknown key(s) {extra}; allowed: '
                                     "['features', 'scales', 'scenario']")
        raw = doc.get('features')
        if not isinstance(raw, list) or not raw:
            raise FeatureConfigError(f'{source}: features must be a non-empty list')
        specs = [_parse_spec(r, i, source, robot) for i, r in enumerate(raw)]
        return cls(robot, specs, doc.get('scales'), source)

    # ------------------------------------------------------------ evaluation
    def raw(self, q: np.ndarray) -> np.ndarray:
        """Unscaled features of trajectories ``q : (M, T, n)`` or ``(T, n)`` -> (M, d) / (d,)."""
        q = np.asarray(q, dtype=np.float64)
        single = q.ndim == 2
        if single:
            q = q[None]
        if q.ndim != 3 or q.shape[1] < 2:
            raise ValueError(f'trajectories must be (M, T, n) with T >= 2, got {q.shape}')
        poses = self.robot.frame_poses(q, self.frames) if self.frames else None
        out = np.empty((q.shape[0], self.d))
        for j, (s, kind) in enumerate(zip(self.specs, self.types)):
            out[:, j] = kind.evaluate(s, self._batch(q, kind, s, poses))[0]
        if not np.all(np.isfinite(out)):
            raise ValueError('features are not finite for some trajectories')
        return out[0] if single else out

    def __call__(self, q: np.ndarray) -> np.ndarray:
        """Scaled features (raw / scales)."""
        if self.scales is None:
            raise ValueError('the feature set has no scales yet; calibrate or give scales')
        return self.raw(q) / self.scales

    # ------------------------------------------------------------ gradients
    def gradient(self, q: np.ndarray) -> np.ndarray:
        """Gradient of every raw feature for one trajectory ``q : (T, n)`` -> (d, T, n).

        Analytic: waypoint values through the frame Jacobians, chained
        through each aggregate. Min and max use the subgradient at the
        extreme waypoint.
        """
        return self.value_and_gradient(q)[1]

    def value_and_gradient(self, q: np.ndarray, temperatures=None):
        """Compute raw features ``(d,)`` and gradients ``(d, T, n)`` of one trajectory.

        One kinematics pass serves both (see :meth:`values_and_gradients`).
        """
        q = np.asarray(q, dtype=np.float64)
        vals, grads = self.values_and_gradients(q[None], temperatures)
        return vals[0], grads[0]

    def values_and_gradients(self, q: np.ndarray, temperatures=None):
        """Raw features ``(B, d)`` and gradients ``(B, d, T, n)`` of trajectories ``(B, T, n)``.

        Analytic: waypoint values through the frame Jacobians, chained through
        each aggregate (min and max use the subgradient at the extreme
        waypoint); one batched kinematics pass serves every trajectory.
        ``temperatures (d,)``, each in its feature's units, give smooth
        surrogates where an entry is > 0, values and gradients alike: a
        ``min``/``max`` aggregate becomes the log-sum-exp soft extreme
        (:func:`soft_extreme`), the distance of ``point_distance`` and
        ``capsule_distance`` becomes ``sqrt(r^2 + t^2)`` and each of the
        ``T - 1`` segments of ``path_length`` ``sqrt(l^2 + (t / (T - 1))^2)``
        (no cone point at zero; within ``t`` of the exact value); other
        features ignore their entry. None: exact features.
        """
        q = np.asarray(q, dtype=np.float64)
        B, T, n = q.shape
        grads = np.zeros((B, self.d, T, n))
        vals = np.empty((B, self.d))
        poses, jac = self.robot.frame_poses(q, self.frames, with_jacobian=True) \
            if self.frames else (None, (None, None))
        for j, (s, kind) in enumerate(zip(self.specs, self.types)):
            temp = 0.0 if temperatures is None else float(temperatures[j])
            vals[:, j], grads[:, j] = kind.evaluate(s, self._batch(q, kind, s, poses, jac),
                                                    True, temp)
        return vals, grads

    @staticmethod
    def _batch(q, kind, spec, poses, jacobians=None) -> FrameBatch:
        """Select what ``kind`` reads of the batch: the spec's frame and Jacobians, if any."""
        if not kind.uses_frame:
            return FrameBatch(q)
        k = poses.index(spec.frame)
        if jacobians is None:
            return FrameBatch(q, poses.positions[:, :, k], poses.rotations[:, :, k])
        jp, jr = jacobians
        return FrameBatch(q, poses.positions[:, :, k], poses.rotations[:, :, k],
                          jp[:, :, k], jr[:, :, k])

    def describe(self) -> List[dict]:
        out = []
        for s in self.specs:
            params = {k: (v.tolist() if isinstance(v, np.ndarray) else v)
                      for k, v in s.params.items()}
            out.append({'name': s.name, 'type': s.type, 'frame': s.frame,
                        'aggregate': s.aggregate, 'params': params})
        return out


def default_features_path() -> Path:
    from .robot import data_path
    return data_path('bench_scenario.yaml')


def load_scenario(path=None, text: Optional[str] = None) -> dict:
    """Read the ``scenario`` block of a feature YAML (a file, or its ``text``).

    Returns ``tasks`` (name, start, goal) pairs, ``duration`` of a simulated
    demonstration, and ``example_preference``: the simulated person's weights
    in feature order, or None when the file gives none. The example preference
    is a mapping from feature name to weight and must name every feature.
    """
    if text is not None:
        path = '<feature specification>'
    else:
        path = Path(path) if path else default_features_path()
        text = path.read_text()
    doc = yaml.safe_load(text)
    sc = doc.get('scenario') or {}
    tasks = sc.get('tasks') or []
    out = []
    for i, t in enumerate(tasks):
        try:
            out.append((t['name'], np.asarray(t['start'], float), np.asarray(t['goal'], float)))
        except (KeyError, TypeError):
            raise FeatureConfigError(f'{path}: scenario.tasks[{i}] needs name, start and goal') \
                from None
    pref = sc.get('example_preference')
    weights = None
    if pref is not None:
        names = [f.get('name') for f in doc.get('features') or [] if isinstance(f, dict)]
        if not isinstance(pref, dict) or set(pref) != set(names):
            raise FeatureConfigError(
                f'{path}: scenario.example_preference must map every feature {names} to a '
                f'weight, got {pref!r}')
        try:
            weights = np.array([float(pref[n]) for n in names])
        except (TypeError, ValueError):
            raise FeatureConfigError(f'{path}: scenario.example_preference weights must be '
                                     f'numbers, got {pref!r}') from None
        if not np.all(np.isfinite(weights)) or not np.any(weights):
            raise FeatureConfigError(f'{path}: scenario.example_preference must be finite '
                                     'and not all zero')
    return {'tasks': out, 'duration': float(sc.get('duration', 3.0)),
            'example_preference': weights}
