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
        type: height                 # see TYPES below, or "package.module:function"
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
=================  ====================================================  ==========

Trajectory types (no aggregate), time normalised to [0, 1]:

``path_length`` Cartesian length of the frame's path (m);
``effort`` integral of the squared joint speeds, ``sum |dq/ds|^2 ds``;
``jerk`` integral of the squared third derivative of the joint path.

A user type is ``type: "my_pkg.my_module:my_feature"`` naming a callable
``f(q, positions, rotations, params) -> (M,)`` with ``q (M, T, n)``,
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
from typing import Callable, Dict, List, Optional, Sequence, Tuple

import numpy as np
import yaml
from scipy.special import expit

from .robot import RobotModel

WAYPOINT_TYPES = ('height', 'point_distance', 'capsule_distance', 'tilt', 'in_box',
                  'in_cylinder')
TRAJECTORY_TYPES = ('path_length', 'effort', 'jerk', 'approach_offset')
#: Types computed from joint positions alone (no frame).
JOINT_TYPES = ('effort', 'jerk')
#: Types computed from the whole path of a frame.
PATH_TYPES = ('path_length', 'approach_offset')
AGGREGATES = ('mean', 'min', 'max', 'integral')
_PARAMS = {
    'height': {'point': [0.0, 0.0, 0.0], 'normal': [0.0, 0.0, 1.0]},
    'point_distance': {'point': None, 'horizontal': False},
    'capsule_distance': {'a': None, 'b': None, 'radius': None},
    'tilt': {'axis': 'z'},
    'in_box': {'min': None, 'max': None, 'softness': 0.005},
    'in_cylinder': {'base': None, 'axis': [0.0, 0.0, 1.0], 'radius': None, 'height': None,
                    'softness': 0.005},
    'path_length': {}, 'effort': {}, 'jerk': {},
    'approach_offset': {'axis': [0.0, 0.0, 1.0], 'fraction': 0.2, 'ends': 'both'},
}
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
    name: str
    type: str
    frame: Optional[str]
    aggregate: Optional[str]
    params: Dict[str, object] = field(default_factory=dict)
    func: Optional[Callable] = None


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
    if not callable(func):
        raise FeatureConfigError(f'{where}: type {ftype!r} is not callable')
    return func


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
                                 f'{list(WAYPOINT_TYPES + TRAJECTORY_TYPES)} or "module:function"')
    params = raw.get('params') or {}
    if not isinstance(params, dict):
        raise FeatureConfigError(f'{where}: params must be a mapping, got {params!r}')
    func = None
    if ':' in ftype:
        func = _load_user_type(ftype, where)
    elif ftype not in _PARAMS:
        raise FeatureConfigError(f'{where}: type {ftype!r} is unknown; allowed: '
                                 f'{list(WAYPOINT_TYPES + TRAJECTORY_TYPES)} or "module:function"')
    else:
        allowed = _PARAMS[ftype]
        extra = sorted(set(params) - set(allowed))
        if extra:
            raise FeatureConfigError(f'{where}: unknown params {extra}; allowed for {ftype}: '
                                     f'{sorted(allowed)}')
        merged = dict(allowed)
        merged.update(params)
        params = merged
        _check_params(ftype, params, where)
    frame = raw.get('frame', robot.tool_frame)
    if ftype not in JOINT_TYPES:
        if not isinstance(frame, str) or not robot.model.existFrame(frame):
            raise FeatureConfigError(
                f'{where}: frame {frame!r} is not a frame of {robot.source}; frames: '
                f'{sorted(set(robot.frame_names) - {"universe"})}')
    agg = raw.get('aggregate')
    if ftype in WAYPOINT_TYPES:
        agg = agg or 'mean'
        if agg not in AGGREGATES:
            raise FeatureConfigError(f'{where}: aggregate {agg!r} is unknown; allowed: '
                                     f'{list(AGGREGATES)}')
    elif agg is not None and func is None:
        raise FeatureConfigError(f'{where}: type {ftype} takes no aggregate')
    return FeatureSpec(name, ftype, frame, agg, params, func)


def _check_params(ftype, p, where):
    if ftype == 'height':
        p['point'] = _vec3(p['point'], where, 'point')
        n = _vec3(p['normal'], where, 'normal')
        if np.linalg.norm(n) == 0:
            raise FeatureConfigError(f'{where}: params.normal must be non-zero')
        p['normal'] = n / np.linalg.norm(n)
    elif ftype == 'point_distance':
        p['point'] = _vec3(p['point'], where, 'point')
        if not isinstance(p['horizontal'], bool):
            raise FeatureConfigError(f'{where}: params.horizontal must be true or false')
    elif ftype == 'capsule_distance':
        p['a'] = _vec3(p['a'], where, 'a')
        p['b'] = _vec3(p['b'], where, 'b')
        r = p['radius']
        if isinstance(r, bool) or not isinstance(r, (int, float)) or not r >= 0:
            raise FeatureConfigError(f'{where}: params.radius must be a number >= 0, got {r!r}')
        p['radius'] = float(r)
    elif ftype == 'tilt':
        if p['axis'] not in ('x', 'y', 'z'):
            raise FeatureConfigError(f'{where}: params.axis must be x, y or z, got {p["axis"]!r}')
    elif ftype == 'in_box':
        lo = _vec3(p['min'], where, 'min')
        hi = _vec3(p['max'], where, 'max')
        if np.any(hi <= lo):
            raise FeatureConfigError(f'{where}: params.max must exceed params.min on every axis')
        p['min'], p['max'] = lo, hi
        p['softness'] = _positive(p['softness'], where, 'softness')
    elif ftype == 'in_cylinder':
        p['base'] = _vec3(p['base'], where, 'base')
        p['axis'] = _unit(p['axis'], where, 'axis')
        for key in ('radius', 'height', 'softness'):
            p[key] = _positive(p[key], where, key)
    elif ftype == 'approach_offset':
        p['axis'] = _unit(p['axis'], where, 'axis')
        f = p['fraction']
        if isinstance(f, bool) or not isinstance(f, (int, float)) or not 0 < f <= 0.5:
            raise FeatureConfigError(f'{where}: params.fraction must be a number in (0, 0.5], '
                                     f'got {f!r}')
        p['fraction'] = float(f)
        if p['ends'] not in ('start', 'goal', 'both'):
            raise FeatureConfigError(f'{where}: params.ends must be start, goal or both, '
                                     f'got {p["ends"]!r}')


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


def _waypoint_value(spec: FeatureSpec, pos: np.ndarray, rot: np.ndarray,
                    temperature: float = 0.0):
    """Values g (..., T) and gradients dg/dpos (..., T, 3), dg/daxis (..., T, 3) or None.

    ``temperature > 0`` smooths the distance types at zero distance (:func:`_norm`).
    """
    p = spec.params
    t = spec.type
    if t == 'height':
        g = (pos - p['point']) @ p['normal']
        return g, np.broadcast_to(p['normal'], pos.shape), None
    if t == 'point_distance':
        d = pos - p['point']
        if p['horizontal']:
            d = d * np.array([1.0, 1.0, 0.0])
        g, u = _norm(d, temperature)
        return g, u, None
    if t == 'capsule_distance':
        a, b = p['a'], p['b']
        ab = b - a
        L2 = float(ab @ ab)
        s = np.clip(((pos - a) @ ab) / L2, 0.0, 1.0) if L2 > 0 else np.zeros(pos.shape[:-1])
        d = pos - (a + s[..., None] * ab)
        r, u = _norm(d, temperature)
        return r - p['radius'], u, None
    if t == 'tilt':
        k = 'xyz'.index(p['axis'])
        axis = rot[..., :, k]
        g = 1.0 - axis[..., 2] ** 2
        ga = np.zeros(axis.shape)
        ga[..., 2] = -2.0 * axis[..., 2]
        return g, None, ga
    if t == 'in_box':
        g, dg = _soft_box(pos, p['min'], p['max'], p['softness'])
        return g, dg, None
    if t == 'in_cylinder':
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
    raise AssertionError(t)


def _soft_box(pos: np.ndarray, lo: np.ndarray, hi: np.ndarray, s: float):
    """Smoothed indicator of an axis-aligned box (..., T) and its gradient (..., T, 3).

    The product over axes of ``sigmoid((x - lo)/s) * sigmoid((hi - x)/s)``.
    """
    a = expit((pos - lo) / s)
    b = expit((hi - pos) / s)
    g = np.prod(a * b, axis=-1)
    # d log(a_i b_i) / d x_i = ((1 - a_i) - (1 - b_i)) / s
    return g, g[..., None] * (((1.0 - a) - (1.0 - b)) / s)


def _path_value(spec: FeatureSpec, pos: np.ndarray, grad: bool, temperature: float = 0.0):
    """Value (B,) of a path type of the frame positions ``pos (B, T, 3)``, and dvalue/dpos.

    The gradient (B, T, 3) is None unless ``grad``. One implementation serves
    feature evaluation and the planner's gradients. ``temperature > 0`` smooths
    each of the ``T - 1`` segments of ``path_length`` to
    ``sqrt(l^2 + (t / (T - 1))^2)``; ``approach_offset`` is smooth already.
    """
    p, t = spec.params, spec.type
    T = pos.shape[-2]
    dpos = np.zeros(pos.shape) if grad else None
    if t == 'path_length':
        ln, u = _norm(np.diff(pos, axis=-2), temperature / (T - 1))
        if grad:
            dpos[..., 1:, :] += u
            dpos[..., :-1, :] -= u
        return ln.sum(axis=-1), dpos
    if t == 'approach_offset':
        # mean squared distance from the line through the end point along the axis, over
        # the K waypoints next to each chosen end
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
    raise AssertionError(t)


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


def _aggregate(agg: str, g: np.ndarray, pos: np.ndarray, temperature: float = 0.0):
    """Aggregate g (..., T) -> (...,) with weights dA/dg (..., T).

    For ``integral`` also the derivative with respect to positions (..., T, 3).
    ``temperature > 0`` replaces ``min``/``max`` by their smooth log-sum-exp
    surrogates (:func:`soft_extreme`); 0 keeps the exact extreme.
    """
    T = g.shape[-1]
    if agg == 'mean':
        return g.mean(axis=-1), np.full(g.shape, 1.0 / T), None
    if agg in ('min', 'max') and temperature > 0:
        val, w = soft_extreme(g, temperature, agg == 'max')
        return val, w, None
    if agg in ('min', 'max'):
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
        self.frames = tuple(dict.fromkeys(s.frame for s in specs
                                          if s.type not in JOINT_TYPES))
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
        T = q.shape[1]
        for j, s in enumerate(self.specs):
            if s.type in JOINT_TYPES:
                order = 1 if s.type == 'effort' else 3
                if T <= order:
                    raise ValueError(f'feature {s.name}: needs T > {order} waypoints')
                h = 1.0 / (T - 1)
                dq = np.diff(q, n=order, axis=1) / h ** order
                out[:, j] = np.sum(dq * dq, axis=(1, 2)) * h
                continue
            k = poses.index(s.frame)
            pos = poses.positions[:, :, k]
            rot = poses.rotations[:, :, k]
            if s.func is not None:
                v = np.asarray(s.func(q, pos, rot, s.params), dtype=np.float64)
                if v.shape != (q.shape[0],):
                    raise ValueError(f'feature {s.name}: user function returned shape {v.shape}, '
                                     f'expected ({q.shape[0]},)')
                out[:, j] = v
            elif s.type in PATH_TYPES:
                out[:, j] = _path_value(s, pos, grad=False)[0]
            else:
                g, _, _ = _waypoint_value(s, pos, rot)
                out[:, j] = _aggregate(s.aggregate, g, pos)[0]
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
        poses, (jp, jr) = self.robot.frame_poses(q, self.frames, with_jacobian=True) \
            if self.frames else (None, (None, None))
        for j, s in enumerate(self.specs):
            if s.func is not None:
                gfun = getattr(s.func, 'gradient', None)
                if gfun is None:
                    raise ValueError(f'feature {s.name}: user type has no .gradient; the '
                                     'planner needs one')
                k = poses.index(s.frame)
                vals[:, j] = np.asarray(s.func(q, poses.positions[:, :, k],
                                               poses.rotations[:, :, k], s.params),
                                        dtype=np.float64)
                for b in range(B):
                    grads[b, j] = gfun(q[b], s.params)
                continue
            if s.type in JOINT_TYPES:
                order = 1 if s.type == 'effort' else 3
                h = 1.0 / (T - 1)
                D = _diff_matrix(T, order) / h ** order
                Dq = np.einsum('st,btn->bsn', D, q)
                vals[:, j] = h * np.sum(Dq * Dq, axis=(1, 2))
                grads[:, j] = 2.0 * h * np.einsum('st,bsn->btn', D, Dq)
                continue
            k = poses.index(s.frame)
            pos, rot = poses.positions[:, :, k], poses.rotations[:, :, k]
            Jp, Jr = jp[:, :, k], jr[:, :, k]                 # (B, T, 3, n)
            temp = 0.0 if temperatures is None else float(temperatures[j])
            if s.type in PATH_TYPES:
                vals[:, j], dpos = _path_value(s, pos, grad=True, temperature=temp)
                grads[:, j] = np.einsum('bti,btin->btn', dpos, Jp)
                continue
            g, dg_dpos, dg_daxis = _waypoint_value(s, pos, rot, temp)
            vals[:, j], w, dpos_agg = _aggregate(s.aggregate, g, pos, temp)
            total = np.zeros((B, T, n))
            if dg_dpos is not None:
                total += w[..., None] * np.einsum('bti,btin->btn', dg_dpos, Jp)
            if dg_daxis is not None:
                kx = 'xyz'.index(s.params['axis'])
                axis = rot[..., :, kx]                         # (B, T, 3)
                # d axis / d q_j = omega_j x axis
                dax = np.cross(np.moveaxis(Jr, -1, -2), axis[:, :, None, :])  # (B, T, n, 3)
                total += w[..., None] * np.einsum('bti,btni->btn', dg_daxis, dax)
            if dpos_agg is not None:
                total += np.einsum('bti,btin->btn', dpos_agg, Jp)
            grads[:, j] = total
        return vals, grads

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
