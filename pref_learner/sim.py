# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Simulated teacher: a person model that demonstrates by a choice model.

For each task (start/goal pair of the scenario) the person considers a set
of candidate trajectories from their own option generator (another spread,
waypoint count or kind than the learner's alternatives), picks one
with probability given by the Boltzmann or the LESS model under true weights
and rationality, and moves the arm along it with minimum-jerk timing (Flash &
Hogan 1985) plus Gaussian sensor noise, with short rests before and after.
Same seed, same session.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import List, Sequence, Tuple

import numpy as np

from .alternatives import AlternativeSampler, SamplerConfig
from .choice import choice_probabilities


OPTION_KINDS = ('smooth', 'optimised')


@dataclass(frozen=True)
class TeacherConfig:
    """A simulated person: how they choose and what options they consider.

    The person's options come from their own generator, not the learner's:
    ``options`` ``smooth`` (random smooth paths of spread ``spread``, a
    fraction of each joint's range) or ``optimised`` (smooth paths pushed
    ``ascent_steps`` steps up the reward of random weights), on
    ``n_waypoints`` waypoints (0: the learner's count). Their rationality
    ``beta`` is theirs; the learner does not know it.
    """

    model: str = 'less'
    beta: float = 5.0
    n_candidates: int = 200
    duration: float = 3.0
    rate: float = 500.0
    noise: float = 5e-4
    rest: float = 0.3
    seed: int = 1
    options: str = 'smooth'
    spread: float = 0.05
    n_waypoints: int = 48
    ascent_steps: int = 20

    def __post_init__(self):
        if self.options not in OPTION_KINDS:
            raise ValueError(f'options {self.options!r} is unknown; allowed: '
                             f'{list(OPTION_KINDS)}')
        if self.n_waypoints and self.n_waypoints < 4:
            raise ValueError(f'n_waypoints must be 0 or >= 4, got {self.n_waypoints}')


def min_jerk(s: np.ndarray) -> np.ndarray:
    """Minimum-jerk progress 10 s^3 - 15 s^4 + 6 s^5 on s in [0, 1]."""
    return 10 * s ** 3 - 15 * s ** 4 + 6 * s ** 5


class SimulatedTeacher:
    """Produces joint-state streams of demonstrations for a task model's robot and features.

    ``task``: a :class:`~pref_learner.task.TaskModel` (or a learner, whose
    task model is used): the person chooses by its features and scales, on
    its robot, whatever robot that is.
    """

    def __init__(self, task, true_weights: Sequence[float], config: TeacherConfig,
                 tasks=None):
        task = getattr(task, 'task', task)
        w = np.asarray(true_weights, dtype=np.float64)
        if w.shape != (task.features.d,) or not np.linalg.norm(w) > 0:
            raise ValueError(f'true weights must be {task.features.d} numbers, not all 0')
        self.theta = w / np.linalg.norm(w)
        self.task = task
        self.learner = task                 # the name earlier callers used
        self.config = config
        self.tasks = tasks if tasks is not None else task.tasks()
        mix = {'smooth': 1.0} if config.options == 'smooth' else {'near_optimal': 1.0}
        T = config.n_waypoints or task.n_waypoints
        self.sampler = AlternativeSampler(
            task.robot, T, SamplerConfig(config.n_candidates, mix, (config.spread,),
                                         ascent_steps=config.ascent_steps),
            n_features=task.features.d, ascent=task.reward_gradient)

    def choose(self, index: int, task=None) -> Tuple[str, np.ndarray]:
        """Pick the path (T, n) the person demonstrates as number ``index``.

        ``task`` ``(name, start, goal)``: the task to demonstrate (a proposed
        one); default the person's tasks in turn.
        """
        c = self.config
        rng = np.random.default_rng(np.random.SeedSequence([c.seed, index]))
        name, start, goal = self.tasks[index % len(self.tasks)] if task is None else task
        cand, _ = self.sampler.sample(start, goal, rng)
        cand = self.task.retime(np.concatenate([self.sampler.straight(start, goal)[None],
                                                cand]))
        # the person moves along a raw candidate; they choose by its features as the
        # learner perceives them (after the shared conditioning)
        feats = self.task.features(self.task.condition(cand))
        p = choice_probabilities(feats, self.theta, c.beta, c.model)
        return name, cand[int(rng.choice(len(cand), p=p))]

    def stream(self, index: int, t0_ns: int = 0, task=None):
        """Play demonstration ``index`` (of ``task``, see :meth:`choose`) as samples.

        Returns stamps_ns (S,) and q (S, n), rests included.
        """
        c = self.config
        _, path = self.choose(index, task)
        rng = np.random.default_rng(np.random.SeedSequence([c.seed, index, 7]))
        dt = 1.0 / c.rate
        n_rest = int(round(c.rest * c.rate))
        n_move = int(round(c.duration * c.rate)) + 1
        s = min_jerk(np.linspace(0.0, 1.0, n_move)) * (len(path) - 1)
        i = np.clip(np.floor(s).astype(int), 0, len(path) - 2)
        f = (s - i)[:, None]
        move = path[i] * (1 - f) + path[i + 1] * f
        q = np.vstack([np.repeat(path[:1], n_rest, 0), move, np.repeat(path[-1:], n_rest, 0)])
        q = q + rng.normal(0.0, c.noise, q.shape)
        q = np.clip(q, self.task.robot.lower, self.task.robot.upper)
        stamps = t0_ns + (np.arange(len(q)) * dt * 1e9).astype(np.int64)
        return stamps, q

    def feed_session(self, learner, n: int, t0_ns: int = 10**18) -> List[object]:
        """Teach ``learner`` n demonstrations directly (no ROS), via the teaching signal."""
        out = []
        t = t0_ns
        for k in range(n):
            res, t = self.feed_one(learner, k, t)
            out += res
        return out

    def feed_one(self, learner, index: int, t0_ns: int, task=None):
        """Teach demonstration ``index`` (of ``task``) directly; returns (results, next t0)."""
        names = learner.robot.joint_names
        stamps, q = self.stream(index, t0_ns, task)
        out = learner.set_teaching(True)
        for st, qi in zip(stamps, q):
            out += learner.feed(int(st), names, qi)
        out += learner.set_teaching(False)
        return out, int(stamps[-1]) + 10**9

    def write_bag(self, path, n: int, t0_ns: int = 10**18, joint_names=None,
                  joint_topic: str = '/joint_states',
                  teaching_topic: str = '/pref_learner/teaching') -> Path:
        """Record n demonstrations into a new MCAP bag, as :meth:`feed_session` teaches them.

        Each message's log time is its stamp (a teaching signal 1 ms before the
        first and after the last sample of a demonstration), so ``pref-learner
        learn`` of the bag learns what :meth:`feed_session` does. ``joint_names``
        renames the joints (a bag of another robot).
        """
        from .bags import BagWriter
        names = list(joint_names or self.task.robot.joint_names)
        t = t0_ns
        with BagWriter(path) as w:
            for k in range(n):
                stamps, q = self.stream(k, t)
                w.write(teaching_topic, w.boolean(True), int(stamps[0]) - 10**6)
                for st, qi in zip(stamps, q):
                    w.write(joint_topic, w.joint_state(int(st), names, qi), int(st))
                w.write(teaching_topic, w.boolean(False), int(stamps[-1]) + 10**6)
                t = int(stamps[-1]) + 10**9
        return Path(path)


def write_simulated_session(path, truth: Sequence[float], n_demonstrations: int,
                            person: TeacherConfig, kind: str = 'state_dir',
                            learner=None) -> Path:
    """Write a simulated participant's session: a state directory or an MCAP bag.

    ``kind`` ``state_dir``: the demonstrations are taught to a learner that only
    records them (one particle, one alternative: the stored posterior is not
    meant to be used); ``bag``: the joint states and teaching signals, as a node
    records them. ``learner``: a task model (or a learner) giving robot,
    features and their scales (the person chooses by them; default: the
    shipped arm and scenario).
    """
    from .learner import Learner, LearnerConfig
    from .task import TaskModel
    rec_set = dict(model='less', n_alternatives=1, spreads=(0.08,))
    if learner is None:
        task = TaskModel.from_config(LearnerConfig(**rec_set))
    else:
        base = getattr(learner, 'task', learner)
        task = TaskModel(base.record.with_settings(**rec_set), base.robot, base.features)
    if kind == 'state_dir':
        rec = Learner(LearnerConfig(state_dir=str(path), n_particles=1), task=task)
        SimulatedTeacher(task, truth, person).feed_session(rec, n_demonstrations)
        rec.save()
        return Path(path)
    if kind == 'bag':
        return SimulatedTeacher(task, truth, person).write_bag(path, n_demonstrations)
    raise ValueError(f'kind {kind!r} is unknown; allowed: state_dir, bag')
