# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The learning session: samples -> demonstration -> choice set -> posterior.

:class:`Learner` is the session that the ROS node, the offline ``learn``
command, the simulated studies and the benchmarks all drive: the recorder,
one posterior per model, the state store, replay and editing. What a
demonstration is compared with and how it is scored (robot, features with
their fixed scales, conditioning, alternatives) is its
:class:`~pref_learner.task.TaskModel`, built from a
:class:`~pref_learner.task.TaskRecord` that the state directory stores.

Determinism: demonstration i uses generators derived from
``SeedSequence([seed, i, ...])``, so replaying the stored (or bagged)
demonstrations reproduces the posterior exactly, whatever the timing of
their arrival.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from dataclasses import asdict, dataclass, fields, replace
from pathlib import Path
from typing import Dict, List, Optional, Tuple

import numpy as np

from . import __version__
from .alternatives import N_OPTION_MODES, N_POOL_MODES, SamplerConfig, set_diagnostics
from .choice import BOTH, MODEL_CHOICES, MODEL_NAMES
from .demonstrations import (Demonstration, DemonstrationError, PrepareConfig, Recorder,
                             Rejection, SegmentConfig, prepare)
from .features import FeatureSet, default_features_path
from .guidance import TaskOptions, information_gain, option_records
from .posterior import (ParticlePosterior, PosteriorConfig, Summary, log_normalise,
                        set_log_similarity)
from .robot import RobotModel
from .store import StateStore, diagnostics_by_index
from .task import TaskModel, TaskRecord, draft_record, learning_hash, scaled_record

log = logging.getLogger('pref_learner')

#: a demonstration whose one-step-ahead predictive p-value is below this is flagged
ATYPICAL_PVALUE = 0.05


@dataclass(frozen=True)
class LearnerConfig:
    """Every setting of the pipeline, checked on construction (SI units)."""

    urdf: str = ''                      # path or URDF text; '' = the shipped bench arm
    joint_names: Tuple[str, ...] = ()   # chain joints in order; () = root to tool frame
    tool_frame: str = 'tool_tip'
    features: str = ''                  # feature YAML path; '' = the shipped scenario
    model: str = 'less'                 # boltzmann | less | both
    beta: float = 5.0                   # used when beta is not inferred
    beta_min: float = 0.5               # log-uniform prior range of the inferred beta;
    beta_max: float = 50.0              # both 0: beta fixed at ``beta``
    n_particles: int = 4000
    n_alternatives: int = 500
    mix_smooth: float = 1.0             # smooth random draws between start and goal
    mix_near_optimal: float = 0.0       # draws moved up the reward of sampled weights (opt-in)
    mix_perturb: float = 0.0            # noisy copies of the demonstration (biased; opt-in)
    mix_planner: float = 0.0            # share of alternatives optimised under random weights
    planner_jobs: int = 1               # worker processes for planner alternatives
    spreads: Tuple[float, ...] = (0.04, 0.08, 0.16)   # option spreads, inferred among them
    ascent_steps: int = 8
    ascent_step: float = 0.25
    option_density: str = 'modes'       # level evidence: modes | deviation | gaussian | kde
    pool_levels: bool = False           # every level's draws serve every level (weighted)
    n_waypoints: int = 64
    resample: str = 'arc_length'
    lowpass_hz: float = 10.0
    smooth: float = 1e-4
    bandwidth: str = 'scott'
    segmentation: str = 'signal'        # manual | signal | motion
    speed_start: float = 0.15
    speed_stop: float = 0.05
    dwell: float = 0.4
    min_duration: float = 0.3
    min_motion: float = 0.05
    max_gap: float = 0.1
    state_dir: str = ''
    seed: int = 0
    calibration_seed: int = 0
    n_calibration: int = 200
    clamp: bool = False
    # while a demonstration is tempered in, publish an importance-weighted estimate first,
    # as soon as weighing in the rest of it at once keeps an ESS of at least this (before
    # the first step or after a step's moves); 0: never. For independent draws ESS 400 puts
    # the Monte Carlo error of the mean near 5 % of the posterior spread (common practice:
    # ESS > 400, Vehtari et al. 2021); copies left by resampling count here one by one, so
    # the error is larger: the calibration study measures it (calib_provisional_deviation)
    provisional_ess: float = 400.0

    def __post_init__(self):
        if self.model not in MODEL_CHOICES:
            raise ValueError(f'model {self.model!r} is unknown; allowed: {list(MODEL_CHOICES)}')
        if self.n_particles < 1:
            raise ValueError(f'n_particles must be >= 1, got {self.n_particles}')
        if self.n_alternatives < 1:
            raise ValueError(f'n_alternatives must be >= 1, got {self.n_alternatives}')
        if (self.beta_min > 0) != (self.beta_max > 0):
            raise ValueError('set both beta_min and beta_max (> 0) to infer beta, or neither')
        if self.beta_min > 0 and not self.beta_min < self.beta_max:
            raise ValueError(f'beta_min ({self.beta_min}) must be below beta_max '
                             f'({self.beta_max})')
        object.__setattr__(self, 'spreads', tuple(float(v) for v in self.spreads))
        if self.resample not in ('time', 'arc_length'):
            raise ValueError(f'resample {self.resample!r} is unknown; allowed: time, arc_length')
        if self.seed < 0:
            raise ValueError(f'seed must be >= 0, got {self.seed}')
        if not self.provisional_ess >= 0:
            raise ValueError(f'provisional_ess must be >= 0, got {self.provisional_ess}')
        # the component configs check the rest
        self.segment_config()
        self.prepare_config()
        sc = self.sampler_config()
        if self.pool_levels and len(sc.option_models()) > 1 and set(sc.mix) != {'smooth'}:
            raise ValueError('pool_levels weighs draws by the smooth sampler\'s law of each '
                             f'level; the mix {sorted(sc.mix)} has other kinds (set their '
                             'shares to 0 or pool_levels false)')
        for m in self.models:
            self.posterior_config(m)

    @property
    def models(self) -> Tuple[str, ...]:
        return MODEL_NAMES if self.model == BOTH else (self.model,)

    def segment_config(self) -> SegmentConfig:
        return SegmentConfig(mode=self.segmentation, speed_start=self.speed_start,
                             speed_stop=self.speed_stop, dwell=self.dwell,
                             min_duration=self.min_duration, min_motion=self.min_motion,
                             max_gap=self.max_gap)

    def prepare_config(self) -> PrepareConfig:
        return PrepareConfig(self.n_waypoints, self.resample, self.lowpass_hz, self.smooth)

    def sampler_config(self) -> SamplerConfig:
        mix = {'smooth': self.mix_smooth, 'near_optimal': self.mix_near_optimal,
               'perturb': self.mix_perturb, 'planner': self.mix_planner}
        return SamplerConfig(self.n_alternatives, {k: v for k, v in mix.items() if v > 0},
                             self.spreads, ascent_steps=self.ascent_steps,
                             ascent_step=self.ascent_step)

    def posterior_config(self, model: str) -> PosteriorConfig:
        br = (self.beta_min, self.beta_max) if self.beta_min > 0 else None
        bw = self.bandwidth
        try:
            bw = float(bw)
        except ValueError:
            pass
        return PosteriorConfig(n_particles=self.n_particles, model=model, beta=self.beta,
                               beta_range=br, bandwidth=bw,
                               n_levels=len(self.sampler_config().option_models()),
                               option_density=self.option_density,
                               pool_levels=self.pool_levels)

    def learning_hash(self) -> str:
        """Hash of every setting that changes what is learned (not state_dir)."""
        d = asdict(self)
        d.pop('state_dir')
        urdf = d.pop('urdf')
        d['urdf_sha'] = hashlib.sha256(urdf.encode()).hexdigest()
        feats = Path(self.features) if self.features else default_features_path()
        try:
            d['features_sha'] = hashlib.sha256(feats.read_bytes()).hexdigest()
        except OSError:
            d['features_sha'] = ''
        return hashlib.sha256(json.dumps(d, sort_keys=True).encode()).hexdigest()[:16]


def _information(before: Dict[str, ParticlePosterior], records, features, groups) -> dict:
    """Return what a demonstration was expected to tell and what it told (nats, per model).

    ``expected_gain``: the expected information gain of its task's set under
    the posterior before it (:func:`pref_learner.guidance.information_gain`);
    ``information_gain``: the information it gave, the Kullback-Leibler
    divergence of the reweighted from the previous particles,
    ``sum_i w'_i log(w'_i / w_i)`` with ``w' ~ w x likelihood`` (whose
    expectation over the predictive choice is the expected gain).
    """
    exp_gain, got = {}, {}
    for m, post in before.items():
        recs = option_records(features, groups, post.config.n_levels, post.config.bandwidth)
        opts = TaskOptions('', np.zeros(0), np.zeros(0), features, groups, recs)
        exp_gain[m] = information_gain(post, opts)
        ll = post.record_loglik(records[m], post.theta, post.beta, post.level)
        lw = log_normalise(post.log_weights)
        new = log_normalise(lw + ll)
        got[m] = float(np.exp(new) @ (new - lw))
    return {'expected_gain': exp_gain, 'information_gain': got}


@dataclass
class StepResult:
    """What processing one demonstration produced."""

    index: int
    summaries: Dict[str, Summary]
    infos: Dict[str, object]
    latency_s: float
    diagnostics: dict
    tool_paths: np.ndarray            # (1 + k, T, 3): demonstration then a few alternatives
    #: the estimate before tempering ends (``LearnerConfig.provisional_ess``): ``posteriors``
    #: holds the posteriors it summarises (importance-weighted; with both models, a model
    #: whose update was already done gives that update); the learner's own follow
    provisional: bool = False
    posteriors: Optional[Dict[str, ParticlePosterior]] = None


class Learner:
    """The learning session (see module docstring)."""

    def __init__(self, config: LearnerConfig = LearnerConfig(), on_estimate=None,
                 scales=None, task: Optional[TaskModel] = None):
        """Start or resume a session.

        ``on_estimate(StepResult)`` is called as soon as a demonstration has been
        weighed in, before the (slower) rejuvenation moves; the node publishes there.
        Its ``diagnostics`` are still empty then: the demonstration's checks fill the
        same dict right after the call (read it once :meth:`process` returns).
        Where tempering is needed and the one-step importance weights keep an ESS
        of at least ``config.provisional_ess``, it is called once before, with
        ``provisional`` set and those posteriors (:attr:`StepResult.posteriors`).
        ``task``: the task model to learn with; its record's settings replace
        ``config``'s (:meth:`TaskRecord.apply_to`). Without it the task model is
        the state directory's stored record when the configuration is the
        stored one, else made from ``config`` (:func:`~pref_learner.task.task_record`:
        this calibrates the scales unless ``scales`` (d,) or the feature file gives them).
        """
        self.store = StateStore(config.state_dir) if config.state_dir else None
        if task is None:
            task = self._stored_task(config, scales)
        else:
            config = task.record.apply_to(config)
        self.config = config
        self.on_estimate = on_estimate
        self.task = task
        # helper processes that finish part of each choice set (ChoiceHelpers; the node
        # starts them): the same values either way
        self.helpers = None
        self._record_stored = False
        self.recorder = Recorder(self.robot.joint_names, config.segment_config())
        self.hash = learning_hash(config, task.record)
        self.rejections: List[dict] = []
        self._demos: List[Demonstration] = []
        self._diagnostics: List[dict] = []
        self._reset_posteriors()
        self.messages: List[str] = []
        if self.store is not None:
            self._load_state()

    @classmethod
    def open(cls, state_dir, on_estimate=None, **over) -> 'Learner':
        """Resume the session of a state directory with its stored settings and task model.

        ``over``: settings to change (session settings such as ``n_particles``
        or ``seed``, and task settings, which rebuild the choice sets).
        """
        config, record = stored_session(state_dir, **over)
        task = None
        if record is not None:
            task = TaskModel.from_record(record.with_settings(
                **{k: v for k, v in over.items() if k in record.settings()}),
                config.planner_jobs)
        return cls(replace(config, state_dir=str(state_dir)), on_estimate, task=task)

    # ------------------------------------------------------------ setup
    def _stored_task(self, config: LearnerConfig, scales) -> TaskModel:
        """Return the task model of ``config`` with the session's fixed scales.

        The state directory's stored record gives them when its learning hash is
        this configuration's; else ``scales``, the feature file's or a calibration.
        """
        draft, robot, fs = draft_record(config)
        if self.store is not None:
            try:
                manifest = self.store.read_manifest()
            except ValueError:
                manifest = None              # _load_state reports it
            text = self.store.read_task_record()
            if (manifest is not None and text is not None
                    and manifest.get('learning_hash') == learning_hash(config, draft)):
                try:
                    stored = TaskRecord.from_json(text)
                    if replace(stored, scales=()) == draft:
                        scales = stored.scales
                except ValueError as exc:
                    log.warning('stored task record unusable (%s); making it anew', exc)
        record = scaled_record(draft, robot, fs, scales)
        return TaskModel(record, robot, fs.with_scales(record.scales), config.planner_jobs)

    @property
    def record(self) -> TaskRecord:
        """The task record of this session (what the state directory stores)."""
        return self.task.record

    @property
    def robot(self) -> RobotModel:
        return self.task.robot

    @property
    def features(self) -> FeatureSet:
        return self.task.features

    @property
    def sampler(self):
        return self.task.sampler

    @property
    def prepare_config(self) -> PrepareConfig:
        return self.task.prepare_config

    def tasks(self):
        """Return the scenario's (name, start, goal) tasks, as the task model gives them."""
        return self.task.tasks()

    def _reset_posteriors(self):
        self.posteriors: Dict[str, ParticlePosterior] = {}
        for k, m in enumerate(self.config.models):
            rng = np.random.default_rng(np.random.SeedSequence([self.config.seed, 0, k]))
            self.posteriors[m] = ParticlePosterior.create(self.config.posterior_config(m),
                                                          self.features.d, rng)

    def option_labels(self) -> Tuple[str, ...]:
        """Names of the option levels (the posterior's level coordinate), in order."""
        return self.task.option_labels()

    def history_diagnostics(self) -> List[dict]:
        """Per-demonstration set diagnostics and posterior checks, in order."""
        if len(self._diagnostics) != len(self._demos) and self.store is not None:
            # a state loaded without replay: read the stored history once, not per status
            n = len(self._demos)
            stored = diagnostics_by_index(self.store.read_history())[:n]
            self._diagnostics = stored + [{}] * (n - len(stored))
        return list(self._diagnostics)

    @property
    def names(self) -> Tuple[str, ...]:
        return self.features.names

    @property
    def n_demonstrations(self) -> int:
        # quarantined slots are None: they keep the seed indices of the others
        return sum(d is not None for d in self._demos)

    def _load_state(self):
        store = self.store
        try:
            manifest = store.read_manifest()
        except ValueError as exc:
            raise ValueError(f'state directory {store.root}: {exc}') from None
        self.quarantined: List[str] = []
        stored = []                                   # (seed index, path, demo or error)
        for path in store.demo_paths():
            try:
                stored.append((store.demo_index(path), path, self._stored_demonstration(path)))
            except DemonstrationError as exc:
                stored.append((store.demo_index(path), path, exc))
        if not stored and manifest is None:
            return
        same = manifest is not None and manifest.get('learning_hash') == self.hash
        loaded = False
        # the session's reward scale is the stored one (_stored_task), whatever a
        # recalibration would give now (it changes only with a reset)
        intact = all(isinstance(d, Demonstration) for _, _, d in stored)
        if same and intact:
            try:
                posts = {m: ParticlePosterior.load(store.posterior_path(m))
                         for m in self.config.models}
                if all(len(p.records) == len(stored) for p in posts.values()):
                    self.posteriors = posts
                    for index, _, demo in stored:
                        self._demos.extend([None] * (index - len(self._demos)))
                        self._demos.append(demo)
                    loaded = True
                    self.messages.append(f'loaded state: {len(stored)} demonstrations from '
                                         f'{store.root}')
            except (OSError, ValueError, KeyError) as exc:
                self.messages.append(f'stored posterior unusable ({exc}); rebuilding')
        if not loaded:
            why = 'configuration changed' if manifest is not None and not same \
                else 'posterior behind the stored demonstrations'
            self.messages.append(f'{why}: rebuilding the posterior by replaying '
                                 f'{len(stored)} stored demonstrations')
            history = []
            for index, path, demo in stored:
                self._demos.extend([None] * (index - len(self._demos)))
                try:
                    if isinstance(demo, Exception):
                        raise demo
                    history.append(self._history_entry(self._learn(demo, persist=False)))
                except DemonstrationError as exc:
                    self._quarantine(index, path, exc)
            self._persist_rebuilt(history)
        self.rejections = store.read_rejections()

    def _stored_demonstration(self, path) -> Demonstration:
        try:
            demo = Demonstration.from_arrays(self.store.read_demo(path))
        except (ValueError, KeyError) as exc:
            raise DemonstrationError(f'{path.name}: {exc}') from None
        self._check_demonstration(demo)
        return demo

    def _quarantine(self, index: int, path, exc: Exception) -> None:
        """Set a stored demonstration that cannot be replayed aside; its slot stays empty."""
        self._demos.append(None)
        reason = f'{type(exc).__name__}: {exc}'
        try:
            where = f'moved to {self.store.quarantine_demo(path, reason)}'
        except OSError as err:
            where = f'could not be moved ({err})'
        text = (f'stored demonstration {index} cannot be replayed ({reason}); {where}; the '
                'others keep their seed indices')
        self.quarantined.append(text)
        self.messages.append(text)
        log.warning(text)

    def _persist_rebuilt(self, history: List[dict]) -> None:
        """Write a rebuilt posterior and history (after any pending demonstration writes)."""
        store = self.store
        if store is None:
            return
        store.rewrite_history(history)
        store.posterior_dirty = True
        self.flush_storage()

    def flush_storage(self) -> bool:
        """Retry writes an OS error held back; True when the state directory is current."""
        store = self.store
        if store is None:
            return True
        if not store.flush():
            return False
        if store.posterior_dirty:
            try:
                self._save_posteriors()
            except OSError as exc:
                store.fail(exc)
                return False
            store.posterior_dirty = False
            store.error = ''
        return True

    @property
    def storage_error(self) -> str:
        """Return the state directory's last write error ('' when all is on disk)."""
        return self.store.error if self.store is not None else ''

    def _check_demonstration(self, demo: Demonstration) -> None:
        """Raise :class:`DemonstrationError` naming what is wrong with ``demo``'s data."""
        if tuple(demo.joint_names) != self.robot.joint_names:
            raise DemonstrationError(f'demonstration joints {tuple(demo.joint_names)} differ '
                                     f'from the chain {self.robot.joint_names}')
        t, q = np.asarray(demo.t), np.asarray(demo.q)
        if t.ndim != 1 or q.shape != (len(t), self.robot.n):
            raise DemonstrationError(f'demonstration has t {t.shape} and q {q.shape}; expected '
                                     f'(S,) and (S, {self.robot.n})')
        if len(t) < 2 or not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
            raise DemonstrationError('demonstration times must be finite and increasing, '
                                     'with at least 2 samples')
        try:
            self.robot.check_configurations(q, 'demonstration')
        except ValueError as exc:
            raise DemonstrationError(str(exc)) from None

    # ------------------------------------------------------------ stream input
    def feed(self, stamp_ns: int, names, positions, receive_ns=None) -> List[object]:
        """Add one joint-state sample (``receive_ns``: see :meth:`Recorder.feed`)."""
        return self._handle(self.recorder.feed(stamp_ns, names, positions, receive_ns))

    def start(self) -> List[object]:
        return self._handle(self.recorder.start())

    def stop(self) -> List[object]:
        return self._handle(self.recorder.stop())

    def set_teaching(self, on: bool) -> List[object]:
        return self._handle(self.recorder.set_teaching(on))

    def reconfigure_segmentation(self, config: LearnerConfig) -> None:
        """Adopt ``config``'s segmentation settings (the only run-time changes)."""
        self.recorder.reconfigure(config.segment_config())
        self.config = config

    def add_demonstration(self, demo: Demonstration,
                          index: Optional[int] = None) -> List[object]:
        """Learn from a whole demonstration; returns [StepResult] or [Rejection].

        ``index``: the seed index to learn it with (a stored file's number, which
        skips the slots of quarantined demonstrations); default the next one.
        """
        if index is not None:
            if index < len(self._demos):
                raise ValueError(f'seed index {index} is already taken (next free: '
                                 f'{len(self._demos)})')
            self._demos.extend([None] * (index - len(self._demos)))
        return self._handle([demo])

    @property
    def demonstrations(self) -> Tuple[Optional[Demonstration], ...]:
        """Return the learned demonstrations by seed index (None in skipped slots)."""
        return tuple(self._demos)

    def save(self) -> None:
        """Write the posterior(s) and manifest now (they are also written after each update)."""
        if self.store is None:
            raise ValueError('no state_dir configured')
        self._save_posteriors()

    def _handle(self, events) -> List[object]:
        out = []
        for ev in events:
            if isinstance(ev, Demonstration):
                try:
                    out.append(self.process(ev))
                except DemonstrationError as exc:     # a data problem, not a program fault
                    out.append(self._record_rejection(Rejection('invalid', str(exc),
                                                                ev.stamp_ns)))
            else:
                out.append(self._record_rejection(ev))
        return out

    def _record_rejection(self, rej: Rejection) -> Rejection:
        entry = {'time': time.time(), 'stamp_ns': rej.stamp_ns, 'reason': rej.reason,
                 'detail': rej.detail}
        self.rejections.append(entry)
        if self.store is not None:
            self.store.append_rejection(entry)
        log.warning('demonstration rejected: %s (%s)', rej.reason, rej.detail)
        return rej

    # ------------------------------------------------------------ learning
    def retime(self, q: np.ndarray) -> np.ndarray:
        """Re-time trajectories as demonstrations are resampled (:meth:`TaskModel.retime`)."""
        return self.task.retime(q)

    def condition(self, q: np.ndarray) -> np.ndarray:
        """Smooth (and clip to limits) as every row of a choice set is."""
        return self.task.condition(q)

    def reward_gradient(self, q: np.ndarray, weights: np.ndarray):
        """Scaled rewards ``(k,)`` and their gradients ``(k, T, n)`` for ``weights (k, d)``."""
        return self.task.reward_gradient(q, weights)

    def _weight_source(self, k: int, rng: np.random.Generator) -> np.ndarray:
        """Weights for near-optimal alternatives: half from the prior, half from the posterior."""
        d = self.features.d
        w = rng.standard_normal((k, d))
        w /= np.linalg.norm(w, axis=1, keepdims=True)
        post = next(iter(self.posteriors.values()))
        if post.records:
            half = k // 2
            idx = rng.choice(post.n_particles, half, p=post.weights)
            w[:half] = post.theta[idx]
        return w

    def choice_set(self, q_demo: np.ndarray, index: int):
        """Build a demonstration's conditioned choice set and its scaled features.

        Returns ``(1 + M, T, n)`` trajectories, ``(1 + M, d)`` features and
        ``(1 + M,)`` spread levels (``-1`` on row 0, the demonstration). Only
        the start and goal of the demonstration are used (and its path only
        with the opt-in ``perturb`` kind); near-optimal draws use weights from
        the posterior as it stands before this demonstration.
        """
        rng = np.random.default_rng(np.random.SeedSequence([self.config.seed, index + 1]))
        return self.task.choice_set(q_demo, rng, weights=self._weight_source,
                                    helpers=self.helpers)

    def path_deviation(self, allq: np.ndarray) -> np.ndarray:
        """Each row's deviation from its straight line (:meth:`TaskModel.path_deviation`)."""
        pooled = min(N_POOL_MODES, self.config.n_waypoints - 2)
        return self.task.path_deviation(allq, pooled if self.config.pool_levels
                                        else N_OPTION_MODES)

    def task_alternatives(self, start: np.ndarray, goal: np.ndarray, rng: np.random.Generator,
                          m: Optional[int] = None):
        """Draw and finish the alternatives a demonstration from ``start`` to ``goal`` meets.

        The sets that score a task before it is demonstrated
        (:mod:`pref_learner.guidance`), built as every choice set is
        (:meth:`TaskModel.task_alternatives`): conditioned trajectories
        ``(M, T, n)``, scaled features ``(M, d)``, option levels ``(M,)``;
        ``m`` overrides the number of alternatives.
        """
        return self.task.task_alternatives(start, goal, rng, m=m, weights=self._weight_source,
                                           helpers=self.helpers)

    def process(self, demo: Demonstration) -> StepResult:
        """Learn from one accepted demonstration (stored first, then the posterior).

        Raises :class:`DemonstrationError` for data that cannot be learned from; any
        other exception is a fault of the program and leaves the learner as it was,
        the stored demonstration moved to ``quarantine/`` with the reason.
        """
        self._check_demonstration(demo)
        index = len(self._demos)
        store = self.store
        if store is not None:
            store.write_demo(index, demo.to_arrays(self.config.seed))
        posteriors = dict(self.posteriors)
        try:
            return self._learn_stored(demo)
        except BaseException as exc:
            del self._demos[index:]             # as it was: not learned
            del self._diagnostics[index:]
            self.posteriors = posteriors
            if store is not None:
                try:
                    path = store.demo_dir / f'demo_{index:06d}.npz'
                    if isinstance(exc, Exception) and path.exists():
                        # a fault of the program, not of the data: the recording is kept
                        # aside with the reason (not a rejection of the demonstration)
                        why = (f'demonstration {index} was not learned: internal error '
                               f'{type(exc).__name__}: {exc}')
                        store.quarantine_demo(path, why)
                        self.quarantined.append(why)
                    store.forget_demo(index)
                except OSError as err:
                    store.fail(err)
            raise

    def _learn_stored(self, demo: Demonstration) -> StepResult:
        """``_learn`` with persistence that survives OS errors of the state directory."""
        store = self.store
        if store is None:
            return self._learn(demo, persist=True)
        if store.pending and not store.flush():
            # the directory is failing: learn now, write everything once it recovers
            self.store = None
            try:
                res = self._learn(demo, persist=True)
            finally:
                self.store = store
            store.posterior_dirty = True
            store.append_history(self._history_entry(res))
            return res
        early, publish = [], self.on_estimate

        def keep(r):
            if not r.provisional:
                early.append(r)
            if publish is not None:
                publish(r)
        self.on_estimate = keep
        try:
            # a provisional estimate only where somebody takes estimates
            res = self._learn(demo, persist=True, provisional=publish is not None)
            if not store.pending:              # everything, the posterior too, is on disk
                store.posterior_dirty, store.error = False, ''
            return res
        except OSError as exc:            # writing the posterior failed; the update stands
            if not early or self._demos[-1] is not demo:
                raise
            store.fail(exc)
            store.posterior_dirty = True
            r = early[0]
            res = StepResult(r.index, self.summaries(), r.infos, r.latency_s, r.diagnostics,
                             r.tool_paths)
            store.append_history(self._history_entry(res))
            return res
        finally:
            self.on_estimate = publish

    def _learn(self, demo: Demonstration, persist: bool,
               provisional: bool = True) -> StepResult:
        t0 = time.perf_counter()
        index = len(self._demos)
        q = prepare(demo, self.prepare_config, self.robot)
        allq, feats, groups = self.choice_set(q, index)
        dev = self.path_deviation(allq)
        new, infos, rngs, recs, lls = {}, {}, {}, {}, {}
        before = dict(self.posteriors)
        for m, post in self.posteriors.items():
            recs[m], lls[m] = post.weigh(post.prepare(feats, 0, groups, dev))
        pick = np.linspace(1, len(allq) - 1, min(5, len(allq) - 1)).astype(int)
        paths = self.robot.frame_poses(allq[np.concatenate([[0], pick])],
                                       [self.robot.tool_frame]).positions[:, :, 0]
        floor = self.config.provisional_ess
        wanted = (floor > 0 and self.on_estimate is not None and persist and provisional)
        handed = []
        for k, (m, post) in enumerate(self.posteriors.items()):
            rngs[m] = np.random.default_rng(np.random.SeedSequence([self.config.seed,
                                                                    index + 1, k + 1]))
            hand = None
            if wanted and not handed:
                hand = self._provisional_hand(m, floor, index, t0, paths, before, new, recs,
                                              lls, handed)
            new[m], infos[m] = post.update(recs[m], rngs[m], move=False, loglik=lls[m],
                                           on_provisional=hand, provisional_ess=floor)
        self.posteriors.update(new)  # only after every model accepted the update
        self._demos.append(demo)
        # the checks of the demonstration fill ``diag`` once the estimate is out: the
        # estimate never waits for them (the result handed out early holds this dict)
        diag: dict = {}
        self._diagnostics = (self._diagnostics + [{}] * index)[:index] + [diag]
        res = StepResult(index, {m: p.summary() for m, p in self.posteriors.items()}, infos,
                         time.perf_counter() - t0, diag, paths)
        if self.on_estimate is not None and persist:
            self.on_estimate(res)
        ppc = {m: before[m].predictive_pvalue(rec) for m, rec in recs.items()}
        diag.update(set_diagnostics(feats, 0, set_log_similarity(recs.values(),
                                                                 post.config.bandwidth)))
        diag['predictive_pvalue'] = ppc
        diag['atypical'] = bool(diag['outside'] or min(ppc.values()) < ATYPICAL_PVALUE)
        diag.update(_information(before, recs, feats[1:], groups[1:]))
        for m, post in self.posteriors.items():   # pending rejuvenation moves, same rng
            self.posteriors[m], _ = post.rejuvenate(rngs[m])
        res = StepResult(index, {m: p.summary() for m, p in self.posteriors.items()}, infos,
                         res.latency_s, diag, paths)
        if persist and self.store is not None:
            self._save_posteriors()
            self.store.append_history(self._history_entry(res))
        return res

    def _provisional_hand(self, m, floor, index, t0, paths, before, new, recs, lls, handed):
        """Return model ``m``'s ``on_provisional`` for :meth:`ParticlePosterior.update`.

        It hands out a provisional estimate (once; ``handed`` records it) when
        every model has one: those updated before ``m`` their update
        (``new``), ``m`` the one it is called with, those after it their
        one-step reweighting, if its ESS (copies merged,
        :meth:`ParticlePosterior.distinct_ess`) is at least ``floor``.
        """
        def hand(rest: ParticlePosterior):
            quick = dict(new)
            quick[m] = rest
            for j, p in before.items():
                if j not in quick:
                    quick[j] = p.reweighted(recs[j], lls[j])
                    if quick[j].distinct_ess() < floor:
                        return
            handed.append(True)
            self.on_estimate(StepResult(index, {j: quick[j].summary() for j in before}, {},
                                        time.perf_counter() - t0, {}, paths, True, quick))
        return hand

    def _history_entry(self, res: StepResult) -> dict:
        return {'index': res.index, 'latency_s': res.latency_s, 'diagnostics': res.diagnostics,
                'summaries': {m: s.to_dict() for m, s in res.summaries.items()}}

    def _save_posteriors(self):
        if not self._record_stored:
            self.store.write_task_record(self.record.to_json())
            self._record_stored = True
        for m, p in self.posteriors.items():
            p.save(self.store.posterior_path(m))
        self.store.write_manifest({
            'learning_hash': self.hash, 'models': list(self.config.models),
            'seed': self.config.seed, 'calibration_seed': self.config.calibration_seed,
            'feature_names': list(self.names), 'scales': self.features.scales.tolist(),
            'option_models': list(self.option_labels()),
            'n_demonstrations': len(self._demos), 'version': __version__,
            'config': {k: v for k, v in asdict(self.config).items() if k != 'urdf'},
            'task_record': self.store.task_record_path.name,
            'features': self.features.describe()})

    # ------------------------------------------------------------ editing
    def discard_last(self) -> bool:
        """Remove the last demonstration and rebuild the posterior by replay."""
        kept = [i for i, d in enumerate(self._demos) if d is not None]
        if not kept:
            return False
        last = kept[-1]
        store = self.store
        if store is not None:
            if any(e[0] == 'demo' and e[1] == last for e in store.pending):
                store.forget_demo(last)          # never reached the disk
            else:
                store.remove_last_demo()
        self._rebuild(self._demos[:last])
        return True

    def _rebuild(self, demos):
        self._demos = []
        self._reset_posteriors()
        history = []
        for d in demos:
            if d is None:                       # a quarantined slot keeps its index
                self._demos.append(None)
                continue
            history.append(self._history_entry(self._learn(d, persist=False)))
        self._persist_rebuilt(history)

    def reset(self) -> Optional[Path]:
        """Forget everything learned; the state directory is archived, not deleted.

        Refused (ValueError, nothing changed) while writes of this session are
        still pending (:meth:`flush_storage` fails): the archive would lack them.
        """
        if self.store is not None and self.store.pending and not self.store.flush():
            raise ValueError(f'reset refused: {len(self.store.pending)} writes of this '
                             f'session are not on disk yet ({self.store.error}); they are '
                             'retried with every write: free the state directory\'s disk and '
                             'reset again')
        where = self.store.archive() if self.store is not None else None
        self._record_stored = False
        self._demos = []
        self._diagnostics = []
        self.rejections = []
        self.quarantined = []
        self.recorder.cancel()
        self._reset_posteriors()
        return where

    def summaries(self) -> Dict[str, Summary]:
        return {m: p.summary() for m, p in self.posteriors.items()}


def stored_session(state_dir, **over) -> Tuple[LearnerConfig, Optional[TaskRecord]]:
    """Return a state directory's settings (changed by ``over``) and its task record.

    The record is None for a directory written before records were stored;
    its settings then name the files as the session did, and its stored
    scales are the manifest's.
    """
    store = StateStore(state_dir)
    manifest = store.read_manifest()
    if manifest is None:
        raise ValueError(f'{state_dir} has no manifest.json')
    known = {f.name for f in fields(LearnerConfig)}
    cfg = {k: v for k, v in (manifest.get('config') or {}).items() if k in known}
    cfg.pop('state_dir', None)
    text = store.read_task_record()
    record = TaskRecord.from_json(text) if text is not None else None
    if record is not None:
        cfg['urdf'] = record.urdf
    cfg.update(over)
    for k in ('joint_names', 'spreads'):
        if k in cfg:
            cfg[k] = tuple(cfg[k])
    return LearnerConfig(**cfg), record


#: parameters of the learner node that are not learner settings (the offline commands
#: take ``max_stamp_skew`` for their recorder and ignore the rest)
NODE_ONLY = ('record_bag', 'publish_period', 'state_dir', 'feature_names', 'feature_modules',
             'use_sim_time', 'qos_overrides', 'start_type_description_service',
             'robot_description_topic', 'robot_description_timeout', 'max_stamp_skew',
             'choice_jobs')


def read_parameters_mapping(path) -> dict:
    """Return the YAML mapping of a parameters file; ``ValueError`` naming the file if not one."""
    import yaml
    path = Path(path)
    try:
        doc = yaml.safe_load(path.read_text()) or {}
    except OSError as exc:
        raise ValueError(f'parameters file {path} cannot be read: {exc.strerror}') from None
    except yaml.YAMLError as exc:
        raise ValueError(f'parameters file {path} is not valid YAML: {exc}') from None
    if not isinstance(doc, dict):
        raise ValueError(f'parameters file {path} must hold a mapping')
    return doc


def read_parameters_file(path, node: str = 'pref_learner') -> Tuple[dict, dict]:
    """Read the learner settings of a ROS 2 parameters file (``node: ros__parameters:``).

    Sections for ``/**`` and for the node (``node``, ``/node`` or a namespaced
    ``/ns/node``) apply in that order. Returns ``(settings, node_only)``:
    LearnerConfig fields (relative ``urdf`` and ``features`` paths resolved
    against the file's directory, else the current one) and the node-only
    values (``NODE_ONLY``). Unknown keys are errors naming the file.
    """
    path = Path(path)
    doc = read_parameters_mapping(path)
    sections = [(k, v['ros__parameters']) for k, v in doc.items()
                if isinstance(v, dict) and isinstance(v.get('ros__parameters'), dict)]
    if not sections:
        raise ValueError(f'parameters file {path} has no "<node>: ros__parameters:" section')
    mine = [p for k, p in sections if str(k).rstrip('/').split('/')[-1] == node]
    params = {}
    for p in [p for k, p in sections if k == '/**'] + (mine or [sections[0][1]]):
        params.update(p)
    known = {f.name for f in fields(LearnerConfig)}
    settings, node_only = {}, {}
    for k, v in params.items():
        if k in NODE_ONLY:
            node_only[k] = v
        elif k in known:
            settings[k] = v
        else:
            raise ValueError(f'parameters file {path}: {k!r} is not a parameter of the learner '
                             f'node; allowed: {sorted(known | set(NODE_ONLY))}')
    settings.pop('state_dir', None)
    for k in ('joint_names', 'spreads'):
        if k in settings:
            settings[k] = tuple(x for x in settings[k] if x != '')
    for key in ('urdf', 'features'):
        v = str(settings.get(key) or '')
        if v and '<robot' not in v and not Path(v).is_absolute():
            for base in (path.parent, Path.cwd()):
                if (base / v).exists():
                    settings[key] = str((base / v).resolve())
                    break
    return settings, node_only
