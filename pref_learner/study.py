# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""A user study: many participants' sessions analysed together, locally or on a Dask cluster.

``pref-learner study FOLDER --params PARAMS.yaml --out OUT``: every directory
in FOLDER is one participant's session, a state directory or a rosbag2 bag.

Tasks. Each participant is one task, :func:`analyse_participant`, a pure
function of (session, settings, seed): it re-learns the session from its
demonstrations with the study's settings (both choice models, the stored
posterior is not used), then runs :mod:`compare`'s leave-one-out comparison
and verdict. A participant's seed derives from the study's seed and their
name (:func:`participant_seed`), so different participants' alternative sets
are drawn independently. Nothing in a task depends on the process, the backend or the
worker count, so the tables are identical bit for bit however they were run.
A bad session (corrupt bag, wrong robot, no accepted demonstration) becomes a
failed participant with a reason; it never stops the study.

Executors. :class:`LocalProcesses` (default) runs tasks in fresh local worker
processes (``spawn``; one BLAS thread each: ``OPENBLAS_NUM_THREADS=1``, also
with one worker, so that a result never depends on the parent's threads);
:class:`DaskScheduler` sends them to an existing Dask distributed scheduler
(its nannies set one BLAS thread by default). Results come back in input
order; a bar on the terminal counts finished tasks. The calibration and
guided-teaching studies of :mod:`validate` run through the same :func:`run_tasks`.

Population (per model, over the participants that were analysed): the mean
direction of the unit weight vectors, its mean resultant length (Mardia &
Jupp, Directional Statistics, 2000), the mean angle to it, per-feature
quantiles, and groups: average-linkage clustering of the directions by
cosine distance (scipy), two groups staying apart while the average cosine
between their members is below ``cos(group_angle)``. A participant *stands
apart* when their group has fewer than ``min_group`` members: on average
their preference is further than ``group_angle`` from every group of others.

No rclpy here; heavy imports (pyarrow, distributed, matplotlib) happen in the
functions that need them.
"""

from __future__ import annotations

import functools
import html
import json
import logging
import math
import os
import time
from contextlib import contextmanager
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Callable, Dict, List, Optional, Sequence, Tuple

import numpy as np

from . import __version__
from .progress import progress, quiet
from .safety import CAUTION

from .choice import MODEL_NAMES as MODELS  # the registry's models, in one place
QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
#: one BLAS thread per worker process (set before the worker imports numpy)
WORKER_ENV = {'OPENBLAS_NUM_THREADS': '1', 'OMP_NUM_THREADS': '1', 'MKL_NUM_THREADS': '1'}
#: the parameters file's ``study:`` block and its defaults
STUDY_DEFAULTS = {'group_angle': 60.0, 'min_group': 2, 'n_groups': 0, 'leave_one_out': True,
                  'joint_topic': '', 'teaching_topic': '', 'learner_node': ''}


# ================================================================ executors
class TaskFailure:
    """A task that returned nothing: its worker died or could not run it."""

    def __init__(self, text: str):
        self.text = text

    def __repr__(self):
        return f'TaskFailure({self.text!r})'


def _call_in_worker(fn: Callable, item):
    """Run ``fn(item)`` without bars or the library's warnings (the caller reports)."""
    lg = logging.getLogger('pref_learner')
    level = lg.level
    lg.setLevel(logging.ERROR)
    try:
        with quiet():
            return fn(item)
    finally:
        lg.setLevel(level)


@contextmanager
def _environment(values: Dict[str, str]):
    """Set environment variables for processes started inside; restore them after."""
    old = {k: os.environ.get(k) for k in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


class LocalProcesses:
    """Run tasks in ``workers`` new local processes (``spawn`` or ``fork`` context).

    ``spawn`` (default) starts clean interpreters that import numpy after
    :data:`WORKER_ENV` is set; ``fork`` copies this process (its BLAS keeps the
    thread count it started with).
    """

    def __init__(self, workers: int = 1, context: str = 'spawn'):
        if int(workers) < 1:
            raise ValueError(f'workers must be >= 1, got {workers}')
        if context not in ('spawn', 'fork', 'forkserver'):
            raise ValueError(f'context {context!r} is unknown; allowed: spawn, fork, '
                             'forkserver')
        self.workers = int(workers)
        self.context = context

    def describe(self) -> str:
        return f'{self.workers} local worker process(es) ({self.context})'

    def map(self, fn: Callable, items: Sequence, label: str = 'tasks') -> list:
        """Return ``fn(item)`` for every item, in input order (a :class:`TaskFailure` if lost)."""
        import concurrent.futures as cf
        import multiprocessing as mp
        items = list(items)
        if not items:
            return []
        out: list = [None] * len(items)
        call = functools.partial(_call_in_worker, fn)
        with _environment(WORKER_ENV):
            ex = cf.ProcessPoolExecutor(min(self.workers, len(items)),
                                        mp_context=mp.get_context(self.context))
            try:
                futs = {ex.submit(call, it): i for i, it in enumerate(items)}
                for f in progress(cf.as_completed(futs), label, total=len(items)):
                    try:
                        out[futs[f]] = f.result()
                    except Exception as exc:  # noqa: BLE001 -- a dead worker, reported per task
                        out[futs[f]] = TaskFailure(f'{type(exc).__name__}: {exc}')
            finally:
                ex.shutdown(wait=True, cancel_futures=True)
        return out


class DaskScheduler:
    """Run tasks on an existing Dask distributed scheduler (``tcp://host:port``).

    The workers need this package (same version) and read the sessions by
    path: the study folder must be visible at the same path on every worker.
    """

    def __init__(self, address: str, timeout: float = 30.0):
        if '://' not in address:
            raise ValueError(f'scheduler address {address!r} needs a protocol, e.g. '
                             'tcp://127.0.0.1:8786')
        self.address = address
        self.timeout = float(timeout)

    def describe(self) -> str:
        return f'Dask scheduler {self.address}'

    def map(self, fn: Callable, items: Sequence, label: str = 'tasks') -> list:
        """Return ``fn(item)`` for every item, in input order (a :class:`TaskFailure` if lost)."""
        from distributed import Client, as_completed
        items = list(items)
        if not items:
            return []
        call = functools.partial(_call_in_worker, fn)
        with Client(self.address, timeout=self.timeout, set_as_default=False) as client:
            futs = client.map(call, items, pure=False)
            for _ in progress(as_completed(futs, loop=client.loop), label, total=len(futs)):
                pass
            out = []
            for f in futs:
                if f.status == 'finished':
                    out.append(f.result())
                else:
                    exc = f.exception()
                    out.append(TaskFailure(f'{type(exc).__name__}: {exc}'))
        return out


def make_executor(workers: int = 1, scheduler: Optional[str] = None, context: str = 'spawn'):
    """Return the Dask executor when a scheduler address is given, else local processes."""
    if scheduler:
        return DaskScheduler(scheduler)
    return LocalProcesses(workers, context)


def run_tasks(fn: Callable, items: Sequence, workers: int = 1,
              scheduler: Optional[str] = None, label: str = 'tasks') -> list:
    """Run ``fn`` over ``items`` as independent tasks; results in input order.

    ``fn`` must be a module-level function (it is pickled by reference). A
    task whose worker was lost comes back as a :class:`TaskFailure`.
    """
    return make_executor(workers, scheduler).map(fn, items, label)


# ================================================================ settings
@dataclass(frozen=True)
class StudySettings:
    """What a study runs with: learner settings (both models) and the study block."""

    learner: Dict[str, object] = field(default_factory=dict)
    seed: int = 0
    group_angle: float = 60.0
    min_group: int = 2
    n_groups: int = 0
    leave_one_out: bool = True
    max_stamp_skew: float = 0.0
    joint_topic: str = ''
    teaching_topic: str = ''
    learner_node: str = ''
    notes: Tuple[str, ...] = ()
    source: str = ''


def _learner_section(doc: dict) -> Tuple[dict, str]:
    """Return the learner settings of a parameters file: a ROS params section or flat keys."""
    for key, val in doc.items():
        if isinstance(val, dict) and isinstance(val.get('ros__parameters'), dict):
            return dict(val['ros__parameters']), f'the ros__parameters of {key!r}'
    return {k: v for k, v in doc.items() if k != 'study'}, 'top-level keys'


def load_settings(path) -> StudySettings:
    """Read a parameters file: learner settings (flat, or a ROS 2 params file) and ``study:``.

    Raises ``ValueError`` naming the file and the key for anything unknown or invalid.
    """
    from .learner import NODE_ONLY, LearnerConfig, read_parameters_mapping
    path = Path(path)
    doc = read_parameters_mapping(path)
    params, where = _learner_section(doc)
    known = {f.name for f in fields(LearnerConfig)}
    notes = []
    learner: Dict[str, object] = {}
    ignored = []
    max_skew = 0.0
    for k, v in params.items():
        if k == 'max_stamp_skew':
            max_skew = float(v)
        elif k in NODE_ONLY:         # settings of the node that mean nothing offline
            ignored.append(k)
        elif k not in known:
            raise ValueError(f'parameters file {path}: {k!r} is not a learner setting; allowed: '
                             f'{sorted(known - {"state_dir"})}, max_stamp_skew and a study: '
                             'block')
        else:
            learner[k] = v
    if ignored:
        notes.append(f'ignored node-only parameters: {", ".join(sorted(ignored))}')
    jn = [str(j) for j in (learner.get('joint_names') or []) if str(j)]
    learner['joint_names'] = tuple(jn)
    if 'spreads' in learner:
        learner['spreads'] = tuple(float(s) for s in learner['spreads'])
    for key in ('urdf', 'features'):   # relative paths: to the parameters file, else here
        v = str(learner.get(key) or '')
        if v and not v.lstrip().startswith('<') and not Path(v).is_absolute():
            for base in (path.parent, Path.cwd()):
                if (base / v).exists():
                    learner[key] = str((base / v).resolve())   # workers may run elsewhere
                    break
    model = learner.pop('model', 'both')
    if model != 'both':
        notes.append(f'model: both choice models are estimated for every participant (the '
                     f'parameters file says {model!r})')
    seed = int(learner.pop('seed', 0))
    learner.pop('state_dir', None)
    urdf = str(learner.get('urdf') or '')
    notes.append('URDF: ' + ('from the parameters file' if urdf else
                             'the shipped bench arm (the parameters file names none)')
                 + '; the study does not use a state directory\'s task record')
    feats = str(learner.get('features') or '')
    notes.append('features: ' + (f'from the parameters file ({feats})' if feats else
                                 'the shipped scenario (the parameters file names none)')
                 + '; one feature set and one set of scales for every participant, so that '
                 'their weights compare')
    study = doc.get('study') or {}
    if not isinstance(study, dict):
        raise ValueError(f'parameters file {path}: study must be a mapping')
    unknown = set(study) - set(STUDY_DEFAULTS)
    if unknown:
        raise ValueError(f'parameters file {path}: study.{sorted(unknown)[0]} is unknown; '
                         f'allowed: {sorted(STUDY_DEFAULTS)}')
    s = dict(STUDY_DEFAULTS, **study)
    out = StudySettings(learner=learner, seed=seed, group_angle=float(s['group_angle']),
                        min_group=int(s['min_group']), n_groups=int(s['n_groups']),
                        leave_one_out=bool(s['leave_one_out']), max_stamp_skew=max_skew,
                        joint_topic=str(s['joint_topic'] or ''),
                        teaching_topic=str(s['teaching_topic'] or ''),
                        learner_node=str(s['learner_node'] or ''),
                        notes=tuple(notes), source=f'{path} ({where})')
    if not 0.0 < out.group_angle < 180.0:
        raise ValueError(f'parameters file {path}: study.group_angle must be in (0, 180) '
                         f'degrees, got {out.group_angle}')
    if out.min_group < 1 or out.n_groups < 0:
        raise ValueError(f'parameters file {path}: study.min_group must be >= 1 and '
                         'study.n_groups >= 0')
    LearnerConfig(model='both', seed=seed, **learner)    # every learner setting checked now
    return out


# ================================================================ one participant
@dataclass(frozen=True)
class ParticipantTask:
    """The input of one participant's task (all it depends on)."""

    participant: str
    path: str
    learner: Dict[str, object]
    seed: int = 0
    leave_one_out: bool = True
    max_stamp_skew: float = 0.0
    feature_modules: Tuple[str, ...] = ()
    joint_topic: str = ''
    teaching_topic: str = ''
    learner_node: str = ''


def participant_seed(study_seed: int, participant: str) -> int:
    """Return a participant's seed: from the study's seed and the participant's name.

    The first 4 bytes of SHA-256 of ``"<study_seed>/<participant>"``, so every
    participant's alternative sets are drawn independently of the others',
    whatever the order, number or backend of the tasks.
    """
    import hashlib
    digest = hashlib.sha256(f'{int(study_seed)}/{participant}'.encode()).digest()
    return int.from_bytes(digest[:4], 'little')


def session_kind(path) -> str:
    """Return ``state_dir``, ``bag`` or ``unknown`` for a participant's directory."""
    p = Path(path)
    if (p / 'manifest.json').exists() or (p / 'demos').is_dir():
        return 'state_dir'
    if (p / 'metadata.yaml').exists() or any(p.glob('*.mcap')) or any(p.glob('*.db3')):
        return 'bag'
    return 'unknown'


def find_sessions(folder) -> List[Tuple[str, Path]]:
    """Every participant of a study folder: its sub-directories, by name (hidden ones skipped)."""
    folder = Path(folder)
    if not folder.is_dir():
        raise ValueError(f'study folder {folder} is not a directory')
    # a name that is not UTF-8 (bytes of an older system) is shown with those bytes escaped,
    # so that reports, tables and seeds can take it; the path is the file system's own
    return [(os.fsencode(p.name).decode('utf-8', 'backslashreplace'), p)
            for p in sorted(folder.iterdir()) if p.is_dir() and not p.name.startswith('.')]


class _Failed(Exception):
    """A bad session: reported for its participant, never raised past the task."""


def _nan_to_none(x):
    x = float(x)
    return None if math.isnan(x) else x


def _region(dg: dict) -> str:
    return 'sparse' if dg.get('sparse') else ('dense' if dg.get('dense') else 'typical')


def _accepted_row(demo, index: int, diag: dict) -> dict:
    p = diag.get('predictive_pvalue') or {}
    row = {'seed_index': index, 'status': 'accepted', 'origin': 'study', 'reason': '',
           'detail': '', 'stamp_ns': int(demo.stamp_ns), 'duration_s': float(demo.duration),
           'n_samples': int(len(demo.t)), 'relative_density': float(diag['relative_density']),
           'region': _region(diag), 'atypical': bool(diag.get('atypical'))}
    for m in MODELS:
        row[f'predictive_pvalue_{m}'] = _nan_to_none(p.get(m, float('nan')))
    return row


def _rejected_row(reason: str, detail: str, stamp_ns: int = 0, origin: str = 'study',
                  index: Optional[int] = None) -> dict:
    return {'seed_index': index, 'status': 'rejected', 'origin': origin, 'reason': reason,
            'detail': detail, 'stamp_ns': int(stamp_ns)}


def _collect(outputs, learner, rows: list) -> None:
    """Turn a learner's outputs (StepResult or Rejection) into demonstration rows."""
    from .learner import StepResult
    for r in outputs:
        if isinstance(r, StepResult):
            rows.append(_accepted_row(learner.demonstrations[r.index], r.index, r.diagnostics))
        else:
            rows.append(_rejected_row(r.reason, r.detail, r.stamp_ns))


def _replay_state_dir(path: Path, L, notes: list, rows: list) -> None:
    """Learn a state directory's stored demonstrations (read only) with their seed indices.

    Appends one row per demonstration to ``rows`` (kept when the session fails).
    """
    from .demonstrations import Demonstration
    from .store import StateStore
    store = StateStore(path)
    try:
        manifest = store.read_manifest()
    except ValueError as exc:
        raise _Failed(f'unreadable state directory: {exc}') from None
    if manifest is None:
        notes.append('no manifest.json: the stored demonstrations are learned as they are')
    else:
        stored = list(manifest.get('feature_names') or [])
        if stored and stored != list(L.names):
            notes.append(f'the session was learned with features {stored}; the study uses '
                         f'{list(L.names)}')
        elif manifest.get('scales') and not np.array_equal(
                np.asarray(manifest['scales'], dtype=np.float64), L.features.scales):
            notes.append('the session\'s stored feature scales differ from the study\'s; the '
                         'study\'s are used so that weights compare across participants')
        jn = tuple((manifest.get('config') or {}).get('joint_names') or ())
        if jn and jn != L.robot.joint_names:
            notes.append(f'the session\'s chain {list(jn)} differs from the study\'s '
                         f'{list(L.robot.joint_names)}')
    wrong_joints = []
    for p in store.demo_paths():
        index = store.demo_index(p)
        try:
            demo = Demonstration.from_arrays(store.read_demo(p))
        except (ValueError, KeyError) as exc:
            rows.append(_rejected_row('unreadable', f'{p.name}: {exc}', index=index))
            continue
        if tuple(demo.joint_names) != L.robot.joint_names:
            wrong_joints.append(tuple(demo.joint_names))
        _collect(L.add_demonstration(demo, index=index), L, rows)
        if rows[-1]['status'] == 'rejected':
            rows[-1]['seed_index'] = index
    if wrong_joints and L.n_demonstrations == 0:
        raise _Failed(f'wrong robot: the stored demonstrations name the joints '
                      f'{list(wrong_joints[0])}, the study\'s chain is '
                      f'{list(L.robot.joint_names)}')
    try:
        for r in store.read_rejections():
            rows.append(_rejected_row(str(r.get('reason', '')), str(r.get('detail', '')),
                                      int(r.get('stamp_ns') or 0), origin='session'))
    except ValueError as exc:
        notes.append(f'rejections.jsonl unreadable: {exc}')
    qdir = path / 'quarantine'
    if qdir.is_dir():
        for q in sorted(qdir.glob('*.npz')):
            txt = q.with_suffix('.txt')
            why = txt.read_text().strip() if txt.exists() else ''
            rows.append(_rejected_row('quarantined', f'{q.name}: {why}', origin='session'))


def _replay_bag(path: Path, L, task: 'ParticipantTask', notes: list, rows: list) -> None:
    """Feed a bag's inputs to the learner, as ``learn`` does (:func:`bags.replay_bag`).

    Appends one row per demonstration to ``rows`` (kept when the session fails);
    a demonstration the session discarded later (``discard_last``, ``reset``)
    keeps its row with status ``discarded``; a bag that cannot be read to its
    end fails the session.
    """
    from .bags import (AmbiguousBag, BagDamaged, BagUnreadable, WrongRobot, read_stream,
                       replay_bag)
    if task.max_stamp_skew > 0:
        L.recorder.set_max_skew(task.max_stamp_skew)

    def on_output(out, event):
        _collect(out, L, rows)
        if event.removes_demonstrations:
            kept = [r for r in rows if r['status'] == 'accepted']
            for r in (kept[-1:] if event.text == 'discard_last' else kept):
                r.update(status='discarded', reason=event.text)
    events = read_stream(path, task.joint_topic or None, task.teaching_topic or None,
                         task.learner_node or None)
    try:
        rep = replay_bag(L, events, on_output)
    except AmbiguousBag as exc:
        raise _Failed(str(exc)) from None
    except BagDamaged as exc:
        raise _Failed(f'corrupt bag: {exc}') from None
    except BagUnreadable as exc:
        raise _Failed(f'corrupt or unreadable bag: {exc}') from None
    except WrongRobot as exc:
        raise _Failed(str(exc)) from None
    notes.extend(rep.notes)


def _estimates(L) -> dict:
    out = {}
    for m, s in L.summaries().items():
        out[m] = {'mean': s.mean.tolist(), 'std': s.std.tolist(), 'ci_low': s.ci_low.tolist(),
                  'ci_high': s.ci_high.tolist(), 'beta_mean': float(s.beta_mean),
                  'beta_ci_low': float(s.beta_ci[0]), 'beta_ci_high': float(s.beta_ci[1]),
                  'beta_inferred': bool(s.beta_inferred),
                  'beta_low_end': bool(s.beta_at_low_end),
                  'concentration': float(s.concentration), 'ess': float(s.ess),
                  'level_probs': [float(p) for p in s.level_probs]}
    return out


def _comparison(L, seed: int, rows: list) -> dict:
    """Leave-one-out scores of every accepted demonstration and the verdict (compare.py)."""
    from .compare import loo_scores, verdict
    recs = list(L.posteriors[MODELS[1]].records)
    cfgs = {m: L.config.posterior_config(m) for m in MODELS}
    loo = loo_scores(recs, cfgs, L.features.d, seed)
    v = verdict(loo)
    accepted = [r for r in rows if r['status'] == 'accepted']
    for i, r in enumerate(accepted):
        for m in MODELS:
            r[f'loo_{m}'] = loo[m][i]
    return {'verdict': v['better'] or 'cannot tell', 't': _nan_to_none(v['z']),
            'critical': _nan_to_none(v['critical']), 'difference': float(v['difference']),
            'loo_total': {m: float(np.sum(loo[m])) for m in MODELS}}


def _failed(task: ParticipantTask, kind: str, reason: str, notes=(), rows=()) -> dict:
    return {'participant': task.participant, 'path': task.path, 'kind': kind,
            'seed': task.seed, 'status': 'failed', 'reason': reason, 'notes': list(notes),
            'n_accepted': 0, 'n_rejected': sum(r['status'] == 'rejected' for r in rows),
            'demonstrations': list(rows), 'estimates': {}, 'comparison': None,
            'feature_names': [], 'worker': _worker_info()}


def _worker_info() -> dict:
    return {'blas_threads': os.environ.get('OPENBLAS_NUM_THREADS', ''),
            'version': __version__}


#: this process's feature scales per learner settings: a calibration is deterministic, so
#: reusing it saves time and changes no result
_SCALES: Dict[str, np.ndarray] = {}


def analyse_participant(task: ParticipantTask) -> dict:
    """Analyse one participant's session: estimates, comparison, demonstrations.

    A pure function of ``task``; never raises for a bad session (the result's
    ``status`` is ``failed`` and ``reason`` says why).
    """
    kind = session_kind(task.path) if Path(task.path).is_dir() else 'unknown'
    notes: list = []
    rows: list = []
    try:
        from .features import allow_feature_modules
        from .learner import Learner, LearnerConfig
        allow_feature_modules(task.feature_modules)
        if kind == 'unknown':
            raise _Failed('not a session: neither a state directory (manifest.json) nor a '
                          'rosbag2 bag (metadata.yaml)')
        cfg = LearnerConfig(model='both', seed=task.seed, **task.learner)
        key = replace(cfg, seed=0).learning_hash()
        L = Learner(cfg, scales=_SCALES.get(key))
        _SCALES.setdefault(key, L.features.scales)
        if kind == 'state_dir':
            _replay_state_dir(Path(task.path), L, notes, rows)
        else:
            _replay_bag(Path(task.path), L, task, notes, rows)
        if L.n_demonstrations == 0:
            why = sorted({r['reason'] for r in rows})
            raise _Failed('no accepted demonstration' + (
                f' ({len(rows)} rejected: {", ".join(why)})' if rows else ''))
        est = _estimates(L)
        comp = None
        if task.leave_one_out and L.n_demonstrations >= 2:
            comp = _comparison(L, task.seed, rows)
        elif task.leave_one_out:
            comp = {'verdict': 'too few demonstrations', 't': None, 'critical': None,
                    'difference': None, 'loo_total': {}}
        return {'participant': task.participant, 'path': task.path, 'kind': kind,
                'seed': task.seed, 'status': 'ok', 'reason': '', 'notes': notes,
                'n_accepted': L.n_demonstrations,
                'n_rejected': sum(r['status'] == 'rejected' for r in rows),
                'demonstrations': rows, 'estimates': est, 'comparison': comp,
                'feature_names': list(L.names), 'worker': _worker_info()}
    except _Failed as exc:
        return _failed(task, kind, str(exc), notes, rows)
    except Exception as exc:  # noqa: BLE001 -- any fault stays with its participant
        return _failed(task, kind, f'internal error: {type(exc).__name__}: {exc}', notes, rows)


# ================================================================ population
def _unit_rows(x: np.ndarray) -> np.ndarray:
    n = np.linalg.norm(x, axis=1, keepdims=True)
    return x / np.where(n > 0, n, 1.0)


def direction_groups(u: np.ndarray, group_angle: float = 60.0, n_groups: int = 0) -> np.ndarray:
    """Group unit directions ``u (n, d)``; returns labels 1.. (largest group first).

    Average-linkage clustering on cosine distance (scipy.cluster.hierarchy), cut
    where the average cosine between two groups' members falls below
    ``cos(group_angle)`` degrees, or into ``n_groups`` groups when that is > 0.
    """
    n = u.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    if n == 1:
        return np.ones(1, dtype=np.int64)
    from scipy.cluster.hierarchy import fcluster, linkage
    z = linkage(u, method='average', metric='cosine')
    if n_groups > 0:
        raw = fcluster(z, t=n_groups, criterion='maxclust')
    else:
        raw = fcluster(z, t=1.0 - math.cos(math.radians(group_angle)), criterion='distance')
    # relabel: by size (largest first), ties by the first member
    order = sorted(set(raw.tolist()), key=lambda g: (-int(np.sum(raw == g)),
                                                     int(np.flatnonzero(raw == g)[0])))
    relabel = {g: i + 1 for i, g in enumerate(order)}
    return np.array([relabel[g] for g in raw], dtype=np.int64)


def population_summary(directions: np.ndarray, participants: Sequence[str],
                       names: Sequence[str], group_angle: float = 60.0, min_group: int = 2,
                       n_groups: int = 0) -> dict:
    """Describe the participants' weight directions ``(n, d)`` (see the module docstring)."""
    u = _unit_rows(np.asarray(directions, dtype=np.float64))
    n = u.shape[0]
    if n == 0:
        return {'n': 0}
    total = u.sum(axis=0)
    r = float(np.linalg.norm(total))
    mean = total / r if r > 0 else np.full(u.shape[1], np.nan)
    cos = u @ mean
    labels = direction_groups(u, group_angle, n_groups)
    groups = []
    for g in range(1, int(labels.max()) + 1):
        sel = labels == g
        gs = u[sel].sum(axis=0)
        gm = gs / np.linalg.norm(gs) if np.linalg.norm(gs) > 0 else np.full(u.shape[1], np.nan)
        ang = np.degrees(np.arccos(np.clip(u[sel] @ gm, -1.0, 1.0)))
        groups.append({'group': g, 'members': [participants[i] for i in np.flatnonzero(sel)],
                       'size': int(sel.sum()),
                       'mean_direction': dict(zip(names, gm.tolist())),
                       'mean_angle_deg': float(ang.mean()),
                       'cosine_to_population': float(gm @ mean)})
    gdirs = np.array([list(g['mean_direction'].values()) for g in groups])
    sizes = {g['group']: g['size'] for g in groups}
    apart = [participants[i] for i in range(n) if sizes[int(labels[i])] < min_group]
    q = np.quantile(u, QUANTILES, axis=0)
    return {'n': n, 'mean_direction': dict(zip(names, mean.tolist())),
            'mean_resultant_length': r / n,
            'mean_angle_deg': float(np.degrees(np.arccos(np.clip(cos, -1.0, 1.0))).mean()),
            'quantiles': {f'{p:g}': dict(zip(names, q[k].tolist()))
                          for k, p in enumerate(QUANTILES)},
            'groups': groups, 'group_cosines': (gdirs @ gdirs.T).tolist(),
            'stands_apart': apart,
            'participants': {participants[i]: {'group': int(labels[i]),
                                               'cosine_to_population': float(cos[i]),
                                               'stands_apart': participants[i] in apart}
                             for i in range(n)},
            'definition': (f'groups: average-linkage clustering of the unit weight vectors by '
                           f'cosine distance, cut where the average cosine between two groups '
                           f'falls below cos({group_angle:g} deg)' if n_groups == 0 else
                           f'groups: average-linkage clustering into {n_groups} groups')
            + f'; stands apart: in a group of fewer than {min_group} participants'}


# ================================================================ tables
def _column_types(names: Sequence[str]):
    import pyarrow as pa
    cols = [('participant', pa.string()), ('kind', pa.string()), ('seed', pa.int64()),
            ('status', pa.string()),
            ('reason', pa.string()), ('n_accepted', pa.int64()), ('n_rejected', pa.int64()),
            ('n_atypical', pa.int64()), ('verdict', pa.string()), ('verdict_t', pa.float64()),
            ('verdict_critical', pa.float64()), ('loo_difference', pa.float64())]
    for m in MODELS:
        cols += [(f'{m}_loo_total', pa.float64()), (f'{m}_beta_mean', pa.float64()),
                 (f'{m}_beta_ci_low', pa.float64()), (f'{m}_beta_ci_high', pa.float64()),
                 (f'{m}_beta_low_end', pa.bool_()), (f'{m}_concentration', pa.float64()),
                 (f'{m}_ess', pa.float64()), (f'{m}_group', pa.int64()),
                 (f'{m}_stands_apart', pa.bool_()),
                 (f'{m}_cosine_to_population', pa.float64())]
        for stat in ('mean', 'std', 'ci_low', 'ci_high'):
            cols += [(f'{m}_{stat}__{f}', pa.float64()) for f in names]
    cols.append(('notes', pa.string()))
    return cols


def participant_table(results: Sequence[dict], names: Sequence[str], population: dict):
    """One row per participant (pyarrow Table); missing values are nulls."""
    import pyarrow as pa
    types = _column_types(names)
    data = {k: [] for k, _ in types}
    for r in results:
        row = {'participant': r['participant'], 'kind': r['kind'], 'seed': r['seed'],
               'status': r['status'],
               'reason': r['reason'], 'n_accepted': r['n_accepted'],
               'n_rejected': r['n_rejected'],
               'n_atypical': sum(bool(d.get('atypical')) for d in r['demonstrations']),
               'notes': '; '.join(r['notes'])}
        comp = r.get('comparison')
        if comp:
            row.update(verdict=comp['verdict'], verdict_t=comp['t'],
                       verdict_critical=comp['critical'], loo_difference=comp['difference'])
            for m, v in comp['loo_total'].items():
                row[f'{m}_loo_total'] = v
        for m, e in r['estimates'].items():
            for k in ('beta_mean', 'beta_ci_low', 'beta_ci_high', 'beta_low_end',
                      'concentration', 'ess'):
                row[f'{m}_{k}'] = e[k]
            for stat in ('mean', 'std', 'ci_low', 'ci_high'):
                for f, v in zip(names, e[stat]):
                    row[f'{m}_{stat}__{f}'] = v
            pp = (population.get(m) or {}).get('participants', {}).get(r['participant'])
            if pp:
                row[f'{m}_group'] = pp['group']
                row[f'{m}_stands_apart'] = pp['stands_apart']
                row[f'{m}_cosine_to_population'] = pp['cosine_to_population']
        for k, _ in types:
            v = row.get(k)
            data[k].append(None if isinstance(v, float) and math.isnan(v) else v)
    return pa.table({k: pa.array(data[k], type=t) for k, t in types})


def demonstration_table(results: Sequence[dict]):
    """One row per demonstration of every participant (pyarrow Table)."""
    import pyarrow as pa
    types = [('participant', pa.string()), ('row', pa.int64()), ('seed_index', pa.int64()),
             ('status', pa.string()), ('origin', pa.string()), ('reason', pa.string()),
             ('detail', pa.string()), ('stamp_ns', pa.int64()), ('duration_s', pa.float64()),
             ('n_samples', pa.int64()), ('relative_density', pa.float64()),
             ('region', pa.string()), ('atypical', pa.bool_())]
    types += [(f'predictive_pvalue_{m}', pa.float64()) for m in MODELS]
    types += [(f'loo_{m}', pa.float64()) for m in MODELS]
    data = {k: [] for k, _ in types}
    for r in results:
        for i, d in enumerate(r['demonstrations']):
            row = dict(d, participant=r['participant'], row=i)
            for k, _ in types:
                v = row.get(k)
                data[k].append(None if isinstance(v, float) and math.isnan(v) else v)
    return pa.table({k: pa.array(data[k], type=t) for k, t in types})


# ================================================================ report
def _plt():
    import matplotlib
    matplotlib.use('Agg')
    import matplotlib.pyplot as plt
    return plt


def _save(fig, path) -> None:
    """Lay out and save a figure with the caution line under it and in the PNG's Description."""
    import textwrap
    width, height = fig.get_size_inches()
    lines = textwrap.wrap(CAUTION, int(width * 17))
    fig.text(0.01, 0.005, '\n'.join(lines), fontsize=6.5, va='bottom', color='#a00')
    fig.tight_layout(rect=(0, (0.13 * len(lines) + 0.05) / height, 1, 1))
    fig.savefig(path, dpi=80, metadata={'Description': CAUTION})
    _plt().close(fig)


def _plot_weights(names, dirs: Dict[str, np.ndarray], path) -> None:
    from .report import COLOURS
    plt = _plt()
    d = len(names)
    fig, ax = plt.subplots(figsize=(max(6.0, 1.3 * d), 4.2))
    for k, m in enumerate(MODELS):
        u = dirs.get(m)
        if u is None or not len(u):
            continue
        x0 = np.arange(d) + (k - 0.5) * 0.36
        for j in range(d):
            jitter = np.linspace(-0.08, 0.08, len(u)) if len(u) > 1 else np.zeros(1)
            ax.plot(x0[j] + jitter, u[:, j], 'o', ms=3, alpha=0.6, color=COLOURS.get(m),
                    label=m if j == 0 else None)
            q = np.quantile(u[:, j], [0.05, 0.25, 0.5, 0.75, 0.95])
            ax.plot([x0[j]] * 2, [q[0], q[4]], color=COLOURS.get(m), lw=0.8)
            ax.plot([x0[j]] * 2, [q[1], q[3]], color=COLOURS.get(m), lw=4, alpha=0.5)
            ax.plot(x0[j], q[2], '_', color='k', ms=10)
    ax.axhline(0, color='k', lw=0.5)
    ax.set_xticks(np.arange(d))
    ax.set_xticklabels(names, rotation=20, ha='right', fontsize=8)
    ax.set_ylabel('weight (unit-norm estimate)')
    ax.set_ylim(-1.05, 1.05)
    ax.set_title('participants\' estimated weights: 5-95 % (line), 25-75 % (bar), median')
    ax.legend(fontsize=8)
    _save(fig, path)


def _plot_directions(dirs: Dict[str, np.ndarray], pops: dict, path) -> None:
    plt = _plt()
    fig, axes = plt.subplots(1, len(MODELS), figsize=(5.2 * len(MODELS), 4.6), squeeze=False)
    for ax, m in zip(axes[0], MODELS):
        u = dirs.get(m)
        pop = pops.get(m) or {}
        ax.set_title(f'{m}: directions on their first two principal axes', fontsize=9)
        if u is None or len(u) < 2:
            ax.text(0.5, 0.5, 'fewer than two participants', ha='center', transform=ax.transAxes)
            continue
        c = u - u.mean(axis=0)
        _, _, vt = np.linalg.svd(c, full_matrices=False)
        axes2 = vt[:2] * np.sign(vt[:2, [0]] + (vt[:2, [0]] == 0))
        xy = c @ axes2.T
        parts = list(pop['participants'])
        labels = [pop['participants'][p]['group'] for p in parts]
        apart = [pop['participants'][p]['stands_apart'] for p in parts]
        sc = ax.scatter(xy[:, 0], xy[:, 1], c=labels, cmap='tab10', vmin=1, vmax=10, s=40,
                        edgecolors=['k' if a else 'none' for a in apart])
        for (x, y), p in zip(xy, parts):
            ax.annotate(p, (x, y), fontsize=6, xytext=(3, 3), textcoords='offset points')
        ax.set_xlabel('axis 1')
        ax.set_ylabel('axis 2')
        handles = [plt.Line2D([], [], marker='o', ls='', color=sc.cmap(sc.norm(g)),
                              label=f'group {g}') for g in sorted(set(labels))]
        ax.legend(handles=handles, fontsize=7)
    _save(fig, path)


def _plot_verdicts(counts: Dict[str, int], path) -> None:
    plt = _plt()
    fig, ax = plt.subplots(figsize=(7, 3.6))
    keys = list(counts)
    ax.bar(range(len(keys)), [counts[k] for k in keys], color='0.5')
    ax.set_xticks(range(len(keys)))
    ax.set_xticklabels(keys, fontsize=8)
    ax.set_ylabel('participants')
    ax.set_title('verdicts: which model predicts each participant\'s held-out choices better',
                 fontsize=10)
    _save(fig, path)


def _html_table(head: Sequence[str], rows: Sequence[Sequence], table_id: str) -> str:
    h = ''.join(f'<th>{html.escape(str(x))}</th>' for x in head)
    body = ''.join('<tr>' + ''.join(f'<td>{html.escape(_fmt(x))}</td>' for x in r) + '</tr>'
                   for r in rows)
    return f'<table id="{table_id}"><tr>{h}</tr>{body}</table>'


def _fmt(x) -> str:
    if x is None:
        return ''
    if isinstance(x, float):
        return f'{x:.3f}'
    return str(x)


def write_study_report(out: Path, summary: dict, results: Sequence[dict],
                       dirs: Dict[str, np.ndarray]) -> Path:
    """Write ``report.html`` and its PNGs into ``out``; returns the HTML path."""
    names = summary['feature_names']
    pops = summary['population']
    pngs = []
    if any(len(v) for v in dirs.values()):
        _plot_weights(names, dirs, out / 'population_weights.png')
        pngs.append(('Weights of every participant, per feature', 'population_weights.png'))
        _plot_directions(dirs, pops, out / 'directions.png')
        pngs.append(('Groups of preferences', 'directions.png'))
    if summary['verdict_counts']:
        _plot_verdicts(summary['verdict_counts'], out / 'verdicts.png')
        pngs.append(('Model comparison verdicts', 'verdicts.png'))
    parts = []
    for r in results:
        comp = r.get('comparison') or {}
        e = r['estimates'].get('less') or {}
        pl = (pops.get('less') or {}).get('participants', {}).get(r['participant'], {})
        parts.append([r['participant'], r['kind'], r['status'], r['reason'] or
                      comp.get('verdict', ''), r['n_accepted'], r['n_rejected'],
                      e.get('beta_mean'), e.get('concentration'),
                      pl.get('cosine_to_population'), pl.get('group'),
                      'yes' if pl.get('stands_apart') else ''])
    sections = [_html_table(['participant', 'session', 'status', 'verdict or reason',
                             'accepted', 'rejected', 'less beta mean', 'less concentration',
                             'less cosine to population', 'less group', 'stands apart'],
                            parts, 'participants')]
    for m in MODELS:
        pop = pops.get(m) or {}
        if not pop.get('n'):
            continue
        q = pop['quantiles']
        rows = [[f, pop['mean_direction'][f]] + [q[k][f] for k in q] for f in names]
        sections.append(f'<h2>Population, {m} model ({pop["n"]} participants)</h2>'
                        f'<p>Mean resultant length {pop["mean_resultant_length"]:.3f} (1: all '
                        f'alike, 0: no common direction); mean angle to the mean direction '
                        f'{pop["mean_angle_deg"]:.1f} deg.</p>'
                        + _html_table(['feature', 'mean direction'] +
                                      [f'q{float(k) * 100:g}' for k in q], rows,
                                      f'population_{m}'))
        grows = [[g['group'], g['size'], ', '.join(g['members']), g['mean_angle_deg']]
                 + [g['mean_direction'][f] for f in names] for g in pop['groups']]
        sections.append(f'<p>{html.escape(pop["definition"])}. Stand apart: '
                        f'{html.escape(", ".join(pop["stands_apart"]) or "nobody")}.</p>'
                        + _html_table(['group', 'size', 'members', 'mean angle (deg)'] + names,
                                      grows, f'groups_{m}'))
    rej = [[r['participant'], d['origin'], d['reason'], d['detail']]
           for r in results for d in r['demonstrations'] if d['status'] == 'rejected']
    sections.append('<h2>Rejected demonstrations</h2>' + _html_table(
        ['participant', 'judged by', 'reason', 'detail'], rej, 'rejected'))
    notes = [f'{r["participant"]}: {n}' for r in results for n in r['notes']]
    imgs = ''.join(f'<h2>{html.escape(t)}</h2><img src="{f}" alt="{html.escape(t)}">'
                   for t, f in pngs)
    failed = [r for r in results if r['status'] != 'ok']
    doc = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>pref_learner study</title>
<style>body{{font-family:sans-serif;margin:2em;max-width:1200px}}
table{{border-collapse:collapse;margin:1em 0}}td,th{{border:1px solid #bbb;padding:3px 8px;
text-align:right}}img{{max-width:100%}}</style></head><body>
<p id="caution" style="border:2px solid #c00;padding:0.5em 1em;text-align:left">
<strong>{html.escape(CAUTION)}</strong> Plans made from these weights are proposals for
the controller stack to check (README, Safety).</p>
<h1>pref_learner study</h1>
<p>Folder: <code>{html.escape(summary['folder'])}</code>. Participants:
{summary['n_participants']}; analysed: {summary['n_ok']}; failed: {len(failed)}.
Ran on {html.escape(summary['backend'])} in {summary['wall_s']:.1f} s.</p>
<h2>Settings and sources</h2>
<ul id="sources">{''.join(f'<li>{html.escape(x)}</li>' for x in summary['notes'])}</ul>
<h2>Participants</h2>
{sections[0]}
<h2>Sessions that could not be analysed</h2>
{_html_table(['participant', 'reason'], [[r['participant'], r['reason']] for r in failed],
             'failed')}
<h2>Model comparison</h2>
<p>Verdict counts: {html.escape(json.dumps(summary['verdict_counts']))}</p>
{''.join(sections[1:])}
<h2>Notes per participant</h2>
<ul id="notes">{''.join(f'<li>{html.escape(x)}</li>' for x in notes) or '<li>none</li>'}</ul>
{imgs}
</body></html>
"""
    path = out / 'report.html'
    path.write_text(doc)
    return path


# ================================================================ the study
def run_study(folder, params, out, workers: int = 1, scheduler: Optional[str] = None,
              feature_modules: Sequence[str] = ()) -> dict:
    """Analyse every session in ``folder``; write report, tables and summary into ``out``.

    Returns the summary (also ``out/summary.json``), with the two tables under
    ``participants`` and ``demonstrations`` (pyarrow Tables, not in the JSON).
    """
    import pyarrow.parquet as pq

    from .features import FeatureSet, allow_feature_modules, default_features_path
    from .learner import LearnerConfig
    from .robot import RobotModel, default_urdf_path
    t0 = time.perf_counter()
    settings = load_settings(params)
    out = Path(out)
    if out.exists() and any(out.iterdir()):
        raise ValueError(f'output directory {out} is not empty')
    sessions = [(p, path) for p, path in find_sessions(folder)
                if path.resolve() != out.resolve()]      # an --out inside the folder
    allow_feature_modules(feature_modules)
    cfg = LearnerConfig(model='both', seed=settings.seed, **settings.learner)
    robot = RobotModel(cfg.urdf or str(default_urdf_path()), joint_names=cfg.joint_names or None,
                       tool_frame=cfg.tool_frame, clamp=cfg.clamp)      # checks URDF and
    names = list(FeatureSet.from_yaml(cfg.features or str(default_features_path()),
                                      robot).names)                     # features up front
    tasks = [ParticipantTask(p, str(path.resolve()), dict(settings.learner),
                             participant_seed(settings.seed, p),
                             settings.leave_one_out, settings.max_stamp_skew,
                             tuple(feature_modules), settings.joint_topic,
                             settings.teaching_topic, settings.learner_node)
             for p, path in sessions]
    executor = make_executor(workers, scheduler)
    raw = executor.map(analyse_participant, tasks, 'participants')
    results = []
    for task, r in zip(tasks, raw):
        if isinstance(r, TaskFailure):
            r = _failed(task, session_kind(task.path), f'worker lost: {r.text}')
        results.append(r)
    ok = [r for r in results if r['status'] == 'ok']
    dirs, pops = {}, {}
    for m in MODELS:
        dirs[m] = _unit_rows(np.array([r['estimates'][m]['mean'] for r in ok])
                             .reshape(len(ok), len(names)))
        pops[m] = population_summary(dirs[m], [r['participant'] for r in ok], names,
                                     settings.group_angle, settings.min_group,
                                     settings.n_groups)
    counts: Dict[str, int] = {}
    for r in ok:
        v = (r.get('comparison') or {}).get('verdict', 'not run')
        counts[v] = counts.get(v, 0) + 1
    notes = [f'parameters: {settings.source}'] + list(settings.notes) + [
        'every session is re-learned from its demonstrations with these settings (a state '
        'directory\'s stored posterior is not used); each participant\'s seed is derived '
        f'from the study seed {settings.seed} and their name (column seed), so their '
        'alternative sets are drawn independently']
    blas = sorted({r['worker']['blas_threads'] for r in results} - {'1'})
    if blas:
        notes.append(f'some workers ran with OPENBLAS_NUM_THREADS={blas}: results may differ '
                     'in the last bits from a run with one BLAS thread per worker')
    versions = sorted({r['worker']['version'] for r in results} - {__version__})
    if versions:
        notes.append(f'some workers ran pref_learner {versions}, this is {__version__}')
    out.mkdir(parents=True, exist_ok=True)
    ptable = participant_table(results, names, pops)
    dtable = demonstration_table(results)
    pq.write_table(ptable, out / 'participants.parquet')
    pq.write_table(dtable, out / 'demonstrations.parquet')
    summary = {
        'caution': CAUTION, 'folder': str(folder), 'parameters': str(params),
        'backend': executor.describe(), 'feature_names': names,
        'n_participants': len(results), 'n_ok': len(ok),
        'failed': [{'participant': r['participant'], 'reason': r['reason']}
                   for r in results if r['status'] != 'ok'],
        'verdict_counts': dict(sorted(counts.items())), 'population': pops,
        'settings': {'learner': {k: (list(v) if isinstance(v, tuple) else v)
                                 for k, v in settings.learner.items()},
                     'seed': settings.seed, 'group_angle': settings.group_angle,
                     'min_group': settings.min_group, 'n_groups': settings.n_groups,
                     'leave_one_out': settings.leave_one_out},
        'notes': notes,
        'participants': [{k: v for k, v in r.items() if k not in ('demonstrations', 'worker')}
                         for r in results],
        'files': ['report.html', 'participants.parquet', 'demonstrations.parquet',
                  'summary.json'],
    }
    summary['wall_s'] = time.perf_counter() - t0
    report = write_study_report(out, summary, results, dirs)
    summary['files'] += sorted(p.name for p in out.glob('*.png'))
    (out / 'summary.json').write_text(json.dumps(summary, indent=1))
    summary['report'] = str(report)
    summary['participants_table'] = ptable
    summary['demonstrations_table'] = dtable
    return summary


def summary_lines(summary: dict) -> List[str]:
    """Plain-text lines for the terminal: each participant, verdicts, population."""
    lines = []
    for p in summary['participants']:
        comp = p.get('comparison') or {}
        state = p['reason'] if p['status'] != 'ok' else \
            f'{p["n_accepted"]} demonstrations, verdict: {comp.get("verdict", "not run")}'
        lines.append(f'  {p["participant"]:24s} {p["status"]:7s} {state}')
    lines.append(f'verdicts: {json.dumps(summary["verdict_counts"])}')
    for m in MODELS:
        pop = summary['population'][m]
        if not pop.get('n'):
            continue
        md = ', '.join(f'{f} {v:+.2f}' for f, v in pop['mean_direction'].items())
        lines.append(f'{m}: mean direction {md}; mean resultant length '
                     f'{pop["mean_resultant_length"]:.2f}; groups '
                     + '; '.join(f'{g["group"]}: {", ".join(g["members"])}'
                                 for g in pop['groups'])
                     + f'; stand apart: {", ".join(pop["stands_apart"]) or "nobody"}')
    return lines
