# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Robot model: URDF -> pinocchio model -> batched forward kinematics of named frames.

Pinocchio parses the URDF and is the reference for kinematics. The actuated
chain is a selection of its joints, in a given order; every other joint
(gripper fingers, a second arm) is locked at its neutral position through
``pinocchio.buildReducedModel``. Configurations ``q : (..., n)`` hold one
value per chain joint, in chain order: radians for revolute and continuous
joints (pinocchio stores a continuous joint as (cos, sin); the conversion
happens only at the pinocchio boundary, :meth:`RobotModel.to_pinocchio`),
metres for prismatic ones.

Batched kinematics over thousands of configurations
(:meth:`RobotModel.frame_poses`) runs the same joint recursion as pinocchio,
vectorised in numpy over the leading axes, with the joint placements read
from the pinocchio model; the test suite checks it against pinocchio itself
and against an independent URDF implementation (yourdfpy).
"""

from __future__ import annotations

import functools

from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Optional, Sequence, Tuple

import numpy as np

DEFAULT_URDF = 'bench_arm7.urdf'
DEFAULT_TOOL_FRAME = 'tool_tip'


def data_path(name: str) -> Path:
    """Path of a file shipped in ``pref_learner/data`` (pip or colcon install)."""
    return Path(str(resources.files('pref_learner') / 'data' / name))


def default_urdf_path() -> Path:
    return data_path(DEFAULT_URDF)


_AXES = {'X': np.array([1.0, 0, 0]), 'Y': np.array([0, 1.0, 0]), 'Z': np.array([0, 0, 1.0])}


def _joint_kind(jmodel) -> Tuple[str, np.ndarray]:
    """('revolute' | 'continuous' | 'prismatic', unit axis) of a 1-DoF pinocchio joint."""
    name = jmodel.shortname()
    short = name.replace('JointModel', '')
    if short in ('RX', 'RY', 'RZ'):
        return 'revolute', _AXES[short[1]]
    if short in ('RUBX', 'RUBY', 'RUBZ'):
        return 'continuous', _AXES[short[3]]
    if short in ('PX', 'PY', 'PZ'):
        return 'prismatic', _AXES[short[1]]
    if short == 'RevoluteUnaligned':
        return 'revolute', np.asarray(jmodel.extract().axis, dtype=np.float64)
    if short == 'RevoluteUnboundedUnaligned':
        return 'continuous', np.asarray(jmodel.extract().axis, dtype=np.float64)
    if short == 'PrismaticUnaligned':
        return 'prismatic', np.asarray(jmodel.extract().axis, dtype=np.float64)
    raise ValueError(f'joint type {name} is not supported in a chain; supported: revolute, '
                     'continuous and prismatic joints')


#: configurations per block of :meth:`RobotModel.frame_poses`
_FK_BLOCK = 2048


def _rotate(r: np.ndarray, v: np.ndarray, nz: Optional[np.ndarray] = None) -> np.ndarray:
    """``r v`` for rotations ``r (3, 3, b)`` (component-major) and ``v (3,)``: ``(3, b)``.

    ``nz``: the indices of ``v``'s non-zero entries, when known.
    """
    if nz is None:
        nz = np.flatnonzero(v)
    if nz.size == 0:
        return np.zeros(r.shape[::2])
    out = r[:, nz[0]] * v[nz[0]]
    for i in nz[1:]:
        out = out + r[:, i] * v[i]
    return out


def _times(r: np.ndarray, m: np.ndarray) -> np.ndarray:
    """``r m`` for ``r (3, 3, b)`` (component-major) and one fixed ``m (3, 3)``."""
    return np.stack([_rotate(r, m[:, k]) for k in range(3)], axis=1)


def _cross(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Cross product of component-major vectors ``(3, b)``."""
    return np.stack([a[1] * b[2] - a[2] * b[1],
                     a[2] * b[0] - a[0] * b[2],
                     a[0] * b[1] - a[1] * b[0]])


def _skew(a: np.ndarray) -> np.ndarray:
    return np.array([[0, -a[2], a[1]], [a[2], 0, -a[0]], [-a[1], a[0], 0]])


@dataclass(frozen=True)
class FramePoses:
    """Batched poses of named frames.

    positions : (..., F, 3) origin of each frame in the root frame (metres).
    rotations : (..., F, 3, 3) orientation of each frame (columns = frame axes).
    """

    names: Tuple[str, ...]
    positions: np.ndarray
    rotations: np.ndarray

    def index(self, name: str) -> int:
        return self.names.index(name)


class RobotModel:
    """A URDF's actuated chain, its limits and batched kinematics.

    Parameters
    ----------
    urdf : str or Path
        A URDF file path, or the URDF text itself (as published on
        ``robot_description``).
    joint_names : sequence of str, optional
        The chain joints, in the order configurations use. Default: the
        movable joints from the root to ``tool_frame``.
    tool_frame : str
        Frame (link) read by default by the features.
    clamp : bool
        Clamp configurations outside the limits instead of refusing them.
    """

    def __init__(self, urdf, joint_names: Optional[Sequence[str]] = None,
                 tool_frame: str = DEFAULT_TOOL_FRAME, clamp: bool = False):
        import pinocchio as pin
        self._pin = pin
        text, source = self._read(urdf)
        try:
            full = pin.buildModelFromXML(text)
        except Exception as exc:  # pinocchio raises several types
            raise ValueError(f'URDF {source} does not parse: {exc}') from None
        self.source = source
        self.urdf_text = text
        self.clamp = bool(clamp)
        if not full.existFrame(tool_frame):
            raise ValueError(f'URDF {source}: tool frame {tool_frame!r} not found; frames: '
                             f'{sorted(f.name for f in full.frames if f.name != "universe")}')
        self.tool_frame = tool_frame
        movable = [n for n in list(full.names)[1:]]
        if joint_names is None:
            fid = full.getFrameId(tool_frame)
            jid = full.frames[fid].parentJoint
            chain = []
            while jid > 0:
                chain.append(full.names[jid])
                jid = full.parents[jid]
            joint_names = list(reversed(chain))
            if not joint_names:
                raise ValueError(f'URDF {source}: no movable joint between the root and '
                                 f'{tool_frame!r}')
        joint_names = list(joint_names)
        if len(set(joint_names)) != len(joint_names):
            raise ValueError(f'joint_names has duplicates: {joint_names}')
        unknown = [j for j in joint_names if j not in movable]
        if unknown:
            raise ValueError(f'URDF {source}: joints {unknown} are not movable joints of the '
                             f'model; movable joints: {movable}')
        lock = [full.getJointId(n) for n in movable if n not in joint_names]
        q0 = pin.neutral(full)
        self.model = pin.buildReducedModel(full, lock, q0) if lock else full
        self.data = self.model.createData()
        self.joint_names = tuple(joint_names)
        self.n = len(joint_names)
        # chain order -> pinocchio joint ids (pinocchio orders topologically)
        self._jid = [self.model.getJointId(n) for n in joint_names]
        kinds, axes = {}, {}
        for jid in range(1, self.model.njoints):
            kinds[jid], axes[jid] = _joint_kind(self.model.joints[jid])
        self._kinds, self._axes = kinds, axes
        self.joint_types = tuple(kinds[j] for j in self._jid)
        lo = np.empty(self.n)
        hi = np.empty(self.n)
        for i, jid in enumerate(self._jid):
            iq = self.model.joints[jid].idx_q
            if kinds[jid] == 'continuous':
                lo[i], hi[i] = -np.inf, np.inf
            else:
                lo[i] = self.model.lowerPositionLimit[iq]
                hi[i] = self.model.upperPositionLimit[iq]
        self.lower, self.upper = lo, hi
        self.velocity_limit = np.array([self.model.velocityLimit[self.model.joints[j].idx_v]
                                        for j in self._jid])
        # position in our q vector of each pinocchio joint
        self._q_of_jid = {jid: i for i, jid in enumerate(self._jid)}
        self._placements = {j: (np.array(self.model.jointPlacements[j].rotation),
                                np.array(self.model.jointPlacements[j].translation))
                            for j in range(1, self.model.njoints)}
        self._identity = {j: bool(np.array_equal(r, np.eye(3)))
                          for j, (r, _) in self._placements.items()}
        # looked up once here, not per block of configurations
        self._offset_nz = {j: np.flatnonzero(t) for j, (_, t) in self._placements.items()}
        self._axis_name = {j: next((k for k in 'ZYX' if np.array_equal(a, _AXES[k])), '')
                           for j, a in axes.items()}

    @staticmethod
    def _read(urdf) -> Tuple[str, str]:
        if isinstance(urdf, Path) or (isinstance(urdf, str) and '<robot' not in urdf):
            p = Path(urdf)
            try:
                return p.read_text(), str(p)
            except OSError as exc:
                raise ValueError(f'URDF file {p} cannot be read: {exc.strerror}') from None
        if not isinstance(urdf, str):
            raise ValueError(f'urdf must be a path or URDF text, got {type(urdf).__name__}')
        return urdf, '<robot_description string>'

    @classmethod
    def default(cls, **kwargs) -> 'RobotModel':
        """Load the shipped 7-DoF bench arm."""
        return cls(default_urdf_path(), **kwargs)

    @functools.cached_property
    def root_link(self) -> str:
        """Name of the URDF's root link: the frame of every position the package reports."""
        import xml.etree.ElementTree as ET
        root = ET.fromstring(self.urdf_text)
        children = {c.get('link') for c in root.iter('child')}
        links = [lk.get('name') for lk in root.findall('link')]
        return next(n for n in links if n not in children)

    # ------------------------------------------------------------ configurations
    @property
    def frame_names(self) -> Tuple[str, ...]:
        return tuple(f.name for f in self.model.frames)

    def check_configurations(self, q: np.ndarray, name: str = 'q') -> np.ndarray:
        """Validate ``q : (..., n)``; outside the limits is an error unless ``clamp``."""
        q = np.asarray(q, dtype=np.float64)
        if q.shape[-1:] != (self.n,):
            raise ValueError(f'{name} has {q.shape[-1] if q.ndim else 0} joint values per '
                             f'configuration; the chain {list(self.joint_names)} has {self.n}')
        if not np.all(np.isfinite(q)):
            raise ValueError(f'{name} contains non-finite joint values')
        tol = 1e-9
        bad = (q < self.lower - tol) | (q > self.upper + tol)
        if np.any(bad):
            if self.clamp:
                return np.clip(q, self.lower, self.upper)
            j = int(np.argwhere(bad)[0][-1])
            v = q[..., j][bad[..., j]].ravel()[0]
            raise ValueError(f'{name}: joint {self.joint_names[j]} = {v:.6g} is outside its '
                             f'limits [{self.lower[j]:.6g}, {self.upper[j]:.6g}]')
        return q

    def to_pinocchio(self, q: np.ndarray) -> np.ndarray:
        """One chain configuration ``(n,)`` -> pinocchio ``q`` ``(nq,)``."""
        out = self._pin.neutral(self.model)
        for i, jid in enumerate(self._jid):
            iq = self.model.joints[jid].idx_q
            if self._kinds[jid] == 'continuous':
                out[iq], out[iq + 1] = np.cos(q[i]), np.sin(q[i])
            else:
                out[iq] = q[i]
        return out

    def random_configurations(self, n: int, rng: np.random.Generator,
                              margin: float = 0.0) -> np.ndarray:
        """Draw ``n`` configurations uniformly, ``margin`` inside the limits.

        On a joint shorter than four margins (a short prismatic axis) the margin
        is a quarter of its range; continuous joints draw from [-pi, pi].
        """
        finite = np.isfinite(self.lower) & np.isfinite(self.upper)
        span = np.where(finite, self.upper - self.lower, np.inf)
        m = np.minimum(margin, 0.25 * span)
        lo = np.where(finite, self.lower + m, -np.pi)
        hi = np.where(finite, self.upper - m, np.pi)
        return rng.uniform(lo, hi, (n, self.n))

    def frame_id(self, name: str) -> int:
        if not self.model.existFrame(name):
            raise ValueError(f'frame {name!r} not found in {self.source}; frames: '
                             f'{sorted(set(self.frame_names) - {"universe"})}')
        return self.model.getFrameId(name)

    # ------------------------------------------------------------ kinematics
    def pin_frame_pose(self, q: np.ndarray, frame: str) -> Tuple[np.ndarray, np.ndarray]:
        """Pose of one frame at one configuration by pinocchio (reference path)."""
        pin = self._pin
        fid = self.frame_id(frame)
        pin.framesForwardKinematics(self.model, self.data, self.to_pinocchio(q))
        oMf = self.data.oMf[fid]
        return np.array(oMf.translation), np.array(oMf.rotation)

    def frame_poses(self, q: np.ndarray, frames: Sequence[str],
                    with_jacobian: bool = False):
        """Poses of ``frames`` for configurations ``q : (..., n)``.

        Returns :class:`FramePoses` with ``positions (..., F, 3)`` and
        ``rotations (..., F, 3, 3)``. With ``with_jacobian`` also returns
        ``(jac_pos, jac_rot)``: ``jac_pos (..., F, 3, n)`` is d position / d q
        and ``jac_rot (..., F, 3, n)`` the world angular velocity per unit
        joint velocity (the rows of pinocchio's LOCAL_WORLD_ALIGNED frame
        Jacobian), so that d R / d q_j = skew(jac_rot[..., j]) R.
        """
        q = self.check_configurations(q)
        lead = q.shape[:-1]
        qf = q.reshape(-1, self.n)
        b = qf.shape[0]
        names = tuple(frames)
        fpos = np.empty((b, len(names), 3))
        frot = np.empty((b, len(names), 3, 3))
        jp = jr = None
        if with_jacobian:
            jp = np.zeros((b, len(names), 3, self.n))
            jr = np.zeros((b, len(names), 3, self.n))
        targets = []
        for name in names:
            fr = self.model.frames[self.frame_id(name)]
            rf = np.array(fr.placement.rotation)
            tf = np.array(fr.placement.translation)
            targets.append((fr.parentJoint, rf, bool(np.array_equal(rf, np.eye(3))), tf,
                            np.flatnonzero(tf)))
        # blocks of configurations: a block's (3, 3, block) rotations stay in cache (one
        # 64-waypoint set of 500 paths at once took about 1.5 times as long); every value
        # is computed element by element, so the blocks do not change a bit of the result
        for a in range(0, b, _FK_BLOCK):
            e = min(b, a + _FK_BLOCK)
            self._frame_block(qf[a:e], targets, fpos[a:e], frot[a:e],
                              None if jp is None else jp[a:e], None if jr is None else jr[a:e])
        out = FramePoses(names, fpos.reshape(lead + (len(names), 3)),
                         frot.reshape(lead + (len(names), 3, 3)))
        if with_jacobian:
            return out, (jp.reshape(lead + (len(names), 3, self.n)),
                         jr.reshape(lead + (len(names), 3, self.n)))
        return out

    def _frame_block(self, qf, targets, fpos, frot, jp, jr) -> None:
        """Fill one block's ``fpos, frot`` (and ``jp, jr`` when given) for ``qf (b, n)``.

        ``targets``: per frame, its parent joint, placement rotation, whether
        that is the identity, placement translation and its non-zero entries.
        """
        with_jacobian = jp is not None
        b = qf.shape[0]
        model = self.model
        # Component-major layout: a rotation is (3, 3, b) and a position (3, b),
        # so every operation runs on contiguous rows of b values (the
        # batch-major layout's strided columns took about twice as long).
        eye = np.zeros((3, 3, b))
        eye[0, 0] = eye[1, 1] = eye[2, 2] = 1.0
        rot = {0: eye}
        pos = {0: np.zeros((3, b))}
        axis_w, origin_w = {}, {}
        for jid in range(1, model.njoints):
            parent = model.parents[jid]
            rp, tp = self._placements[jid]
            rpar = rot[parent]
            r0 = rpar if self._identity[jid] else _times(rpar, rp)
            p0 = pos[parent] + _rotate(rpar, tp, self._offset_nz[jid])
            kind, a = self._kinds[jid], self._axes[jid]
            iq = self._q_of_jid.get(jid)
            qj = qf[:, iq] if iq is not None else np.zeros(b)
            if kind == 'prismatic':
                r = r0
                p = p0 + _rotate(r0, a) * qj
            else:
                c, s = np.cos(qj), np.sin(qj)
                r = np.empty_like(r0)
                axis = self._axis_name[jid]
                if axis == 'Z':
                    r[:, 0] = r0[:, 0] * c + r0[:, 1] * s
                    r[:, 1] = r0[:, 1] * c - r0[:, 0] * s
                    r[:, 2] = r0[:, 2]
                elif axis == 'Y':
                    r[:, 0] = r0[:, 0] * c - r0[:, 2] * s
                    r[:, 2] = r0[:, 2] * c + r0[:, 0] * s
                    r[:, 1] = r0[:, 1]
                elif axis == 'X':
                    r[:, 1] = r0[:, 1] * c + r0[:, 2] * s
                    r[:, 2] = r0[:, 2] * c - r0[:, 1] * s
                    r[:, 0] = r0[:, 0]
                else:   # Rodrigues: R(q) = I + sin q K + (1 - cos q) K^2
                    k = _skew(a)
                    k2 = k @ k
                    for col in range(3):
                        rq = (np.eye(3)[:, col][:, None] + np.outer(k[:, col], s)
                              + np.outer(k2[:, col], 1.0 - c))          # (3, b)
                        r[:, col] = sum(r0[:, m] * rq[m] for m in range(3))
                p = p0
            rot[jid], pos[jid] = r, p
            if with_jacobian and iq is not None:
                axis_w[jid] = _rotate(r0, a)
                origin_w[jid] = p
        for k, (j, rf, rf_identity, tf, tf_nz) in enumerate(targets):
            pk = pos[j] + _rotate(rot[j], tf, tf_nz)
            fpos[:, k] = pk.T
            frot[:, k] = (rot[j] if rf_identity else _times(rot[j], rf)).transpose(2, 0, 1)
            if with_jacobian:
                anc = j
                while anc > 0:
                    iq = self._q_of_jid.get(anc)
                    if iq is not None:
                        w = axis_w[anc]
                        if self._kinds[anc] == 'prismatic':
                            jp[:, k, :, iq] = w.T
                        else:
                            jp[:, k, :, iq] = _cross(w, pk - origin_w[anc]).T
                            jr[:, k, :, iq] = w.T
                    anc = model.parents[anc]

    def pin_frame_jacobian(self, q: np.ndarray, frame: str) -> np.ndarray:
        """6 x n frame Jacobian (LOCAL_WORLD_ALIGNED) by pinocchio, chain columns only."""
        pin = self._pin
        fid = self.frame_id(frame)
        qp = self.to_pinocchio(q)
        pin.computeJointJacobians(self.model, self.data, qp)
        pin.framesForwardKinematics(self.model, self.data, qp)
        jac = pin.getFrameJacobian(self.model, self.data, fid, pin.LOCAL_WORLD_ALIGNED)
        cols = [self.model.joints[j].idx_v for j in self._jid]
        return np.array(jac[:, cols])
