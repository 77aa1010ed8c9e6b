# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""What to teach next, and what is still unknown.

**Next task.** The expected information gain of demonstrating a task is the
mutual information between the person's choice within the task's choice set
and the parameters (weights, beta when inferred), under the current
weighted particles (Lindley 1956; the form of Houlsby et al. 2011, "BALD")::

    I = H[ sum_i w_i P(c | theta_i) ] - sum_i w_i H[ P(c | theta_i) ]

in nats, ``c`` the index of the option chosen among the task's alternatives.
``P(c | theta_i)`` comes from the posterior's own utilities
(:meth:`ParticlePosterior._level_utilities`, the one place where each choice
model's utilities are formed), so the gain is computed with exactly the
model the learner updates with. It is at most ``log M`` and 0 when every
option has the same features.

A task's choice set is random: every demonstration of it is compared with a
fresh draw of the learner's alternatives, and the person's own options differ
each time. The gain of a task is therefore the mean of the gain over
``n_draws`` independent sets, each built by the learner's own sampler
(:meth:`Learner.task_alternatives`, the construction of every demonstration's
set, without a demonstration: drawn, conditioned and featurised) from a seed
derived from the task's start and goal, once, and cached until the learner's
configuration or feature scales change (:class:`TaskGuide`). One draw is a
noisy estimate: on the shipped scenario at N = 1,000, M = 200 the gain of one
task changes from draw to draw (standard deviation 0.04-0.12 nats) about as
much as it differs between tasks (0.05-0.18), so with one draw the ranking
partly ranks the draws. Sampling and kinematics cost about 60 ms per set at
M = 500, the scoring itself a few tens of ms per set at N = 4,000. The
default is one draw: four draws (``n_draws=4``) did not change the
guided-teaching study beyond its noise, and their scoring takes four times
as long (about 0.25 s per update, 4.4 s for the first proposal) on the
node's worker thread, which shares the interpreter with the executor taking
in the joint states.

**Not the same task again.** With ``fresh_first`` (the default) a task
taught before (either direction: the scenario's features do not depend on
the direction of travel) comes after every task taught fewer times; among
equally often taught tasks the larger gain comes first. By the gain alone
the guide asked for the same few tasks again and again (on the shipped
scenario 4 to 6 of 10 demonstrations were repeats; 5.9 with four draws),
which a person teaching does not expect and which trusts the model more
than is safe: the gain counts a repeat as a fresh, independent choice, but
where the person's options for a task differ from the learner's
alternatives they differ in the same way at every repeat. Measured on the
guided-teaching study, the rule neither helps nor hurts beyond the noise
(``DEVELOPERS.md``). A demonstration counts as one of a task when its first
and last joint positions are within ``tolerance`` (rad, every joint) of the
task's start and goal, or goal and start.

The default option levels (``LearnerConfig.spreads``, three) make a particle
at level g choose among level g's options, as in the learner's likelihood.
The levels' sets are disjoint, so the index alone would tell the level: that
share (the entropy of the level posterior, the same for every task) is left
out, and the gain reported is ``sum_g P(g) I(c; theta, beta | g)``; what a
demonstration says about the level through its feature density is not
scored.

**What is still unknown.** The weakest directions of the posterior are the
eigenvectors of the weighted particle covariance with the largest
eigenvalues; each is put in feature terms by the two features with the
largest loadings of opposite sign ("cannot yet tell how much X matters
against Y").
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass, replace
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np

from .posterior import ChoiceRecord, ParticlePosterior, systematic_resample

#: the posterior counts as tight when no direction's standard deviation exceeds this
TIGHT_STD = 0.1
#: a loading counts as opposite when it is at least this share of the largest one
OPPOSITE_SHARE = 0.25
#: independent choice sets per task whose gains are averaged (the default; see above)
N_DRAWS = 1
#: a demonstration is one of a task when its ends are this close to the task's (rad)
MATCH_TOLERANCE = 0.1


# ---------------------------------------------------------------- information gain
#: particles per block: blocks of (block x M) utilities stay in cache, and the small
#: products stay below the size where OpenBLAS starts threads, which on two shared
#: cores made a 4,000-particle product several times slower than four small ones
BLOCK = 1024


def _choice_terms(r: np.ndarray, w: np.ndarray) -> Tuple[np.ndarray, float]:
    """Return ``(sum_i w_i p_i (K,), sum_i w_i H[p_i])`` from utilities ``r (n, K)`` (overwritten).

    Row-wise softmax without forming it: with ``r`` shifted by its row
    maximum and ``e = exp(r)``, ``Z_i = sum_c e_ic``,
    ``H_i = log Z_i - (sum_c e_ic r_ic) / Z_i`` and the mixture is
    ``sum_i (w_i / Z_i) e_i``, so one exponential pass serves both terms.
    """
    r -= r.max(axis=1, keepdims=True)
    e = np.exp(r)
    z = e.sum(axis=1)
    h_each = np.log(z) - np.einsum('ij,ij->i', e, r) / z
    return (w / z) @ e, float(w @ h_each)


def _entropy(p: np.ndarray) -> float:
    pos = p > 0
    return -float(np.sum(p[pos] * np.log(p[pos])))


@dataclass(frozen=True)
class TaskOptions:
    """A task's options as the posterior scores them.

    ``features (M, d)`` scaled features of the alternatives, ``groups (M,)``
    their option levels, ``records``: per level a :class:`ChoiceRecord` of
    that level's alternatives alone (row 0 stands first only by position:
    its similarity is taken within the level's whole set, like every row's).
    """

    name: str
    start: np.ndarray
    goal: np.ndarray
    features: np.ndarray
    groups: np.ndarray
    records: Tuple[ChoiceRecord, ...]


def option_records(features: np.ndarray, groups: np.ndarray, n_levels: int,
                   bandwidth='scott') -> Tuple[ChoiceRecord, ...]:
    """Build one choice record per option level from a set's features ``(M, d)``."""
    x = np.asarray(features, dtype=np.float64)
    g = np.asarray(groups, dtype=np.int64)
    out = []
    for lev in range(n_levels):
        rows = x[g == lev]
        if len(rows) == 0:
            raise ValueError(f'option level {lev} has no alternatives in this set')
        out.append(ChoiceRecord.build(rows, 0, bandwidth, with_similarity=True))
    return tuple(out)


def _particles(posterior: ParticlePosterior, max_particles: Optional[int],
               rng: Optional[np.random.Generator]):
    """Particles, betas, levels and weights; thinned by systematic resampling if asked."""
    th, b, lev, w = posterior.theta, posterior.beta, posterior.levels, posterior.weights
    if max_particles is not None and posterior.n_particles > max_particles:
        if rng is None:
            raise ValueError('thinning the particles needs a numpy Generator')
        idx = systematic_resample(posterior.log_weights, rng)[
            np.linspace(0, posterior.n_particles - 1, max_particles).astype(int)]
        th, b, lev = th[idx], b[idx], lev[idx]
        w = np.full(max_particles, 1.0 / max_particles)
    return th, b, lev, w


def information_gain(posterior: ParticlePosterior, options: TaskOptions,
                     max_particles: Optional[int] = None,
                     rng: Optional[np.random.Generator] = None) -> float:
    """Return the expected information gain (nats) of demonstrating the task of ``options``.

    ``sum_g P(g) I(c; theta, beta | g)`` over option levels g (one level: the
    mutual information of the module docstring). ``max_particles`` thins the
    particles by systematic resampling (needs ``rng``); default all.
    """
    if len(options.records) != posterior.config.n_levels:
        raise ValueError(f'the options have {len(options.records)} levels, the posterior '
                         f'{posterior.config.n_levels}')
    th, b, lev, w = _particles(posterior, max_particles, rng)
    total = 0.0
    for g, rec in enumerate(options.records):
        sel = np.flatnonzero(lev == g)
        mass = float(w[sel].sum()) if sel.size else 0.0
        if mass <= 0:
            continue
        mix = np.zeros(rec.features.shape[0])
        h_cond = 0.0
        for a in range(0, sel.size, BLOCK):
            blk = sel[a:a + BLOCK]
            (_, _, _, r), = posterior._level_utilities(rec, th[blk], b[blk], None)
            m, h = _choice_terms(r, w[blk] / mass)
            mix += m
            h_cond += h
        total += mass * max(_entropy(mix) - h_cond, 0.0)
    return total


# ---------------------------------------------------------------- candidate tasks
@dataclass(frozen=True)
class TaskScore:
    """One candidate task, its expected information gain and how often it was taught.

    ``gain`` (nats) is the mean over models of ``gains``, each the mean over
    the task's choice-set draws; ``times_taught`` counts the demonstrations
    of the task (either direction) that the ranking took into account.
    """

    name: str
    start: np.ndarray
    goal: np.ndarray
    gain: float
    gains: Dict[str, float]
    times_taught: int = 0


def _task_seed(start: np.ndarray, goal: np.ndarray) -> int:
    data = np.concatenate([np.asarray(start, np.float64), np.asarray(goal, np.float64)])
    return zlib.crc32(data.tobytes())


def times_taught(start: np.ndarray, goal: np.ndarray, taught: Sequence[tuple],
                 tolerance: float = MATCH_TOLERANCE) -> int:
    """Count the ``(first, last)`` joint positions in ``taught`` that demonstrate the task.

    A pair counts when it lies within ``tolerance`` (every joint) of
    ``(start, goal)`` or of ``(goal, start)``.
    """
    if not len(taught):
        return 0
    ends = np.asarray(taught, np.float64)                     # (k, 2, n): first, last
    s = np.asarray(start, np.float64)
    g = np.asarray(goal, np.float64)

    def near(x, y):
        return np.max(np.abs(x - y), axis=-1) <= tolerance
    fwd = near(ends[:, 0], s) & near(ends[:, 1], g)
    rev = near(ends[:, 0], g) & near(ends[:, 1], s)
    return int(np.count_nonzero(fwd | rev))


class TaskGuide:
    """Scores candidate tasks for a :class:`~pref_learner.learner.Learner`.

    Each task's ``n_draws`` option sets (alternatives, conditioning,
    features, similarity sums) are built once, from seeds derived from the
    learner's seed and the task's start and goal, and reused until the
    learner's configuration or feature scales change. ``n_alternatives``
    (default: the learner's) sets the size of the scoring sets;
    ``max_particles`` thins the particles; a demonstration is of a task when
    its ends are within :data:`MATCH_TOLERANCE` of the task's; ``fresh_first``:
    tasks taught fewer times are proposed first (else by the gain alone).
    Nothing is computed on construction.
    """

    def __init__(self, learner, n_alternatives: Optional[int] = None,
                 max_particles: Optional[int] = None, n_draws: int = N_DRAWS,
                 fresh_first: bool = True):
        if n_draws < 1:
            raise ValueError(f'n_draws must be >= 1, got {n_draws}')
        self.learner = learner
        self.n_alternatives = n_alternatives
        self.max_particles = max_particles
        self.n_draws = int(n_draws)
        self.fresh_first = bool(fresh_first)
        self._cache: Dict[tuple, Tuple[TaskOptions, ...]] = {}
        self._key = None

    def _session_key(self):
        L = self.learner
        return (L.hash, L.features.scales.tobytes())

    def option_draws(self, name: str, start, goal) -> Tuple[TaskOptions, ...]:
        """Return the task's (cached) ``n_draws`` independent option sets."""
        L = self.learner
        start = L.robot.check_configurations(np.asarray(start, np.float64), 'start')
        goal = L.robot.check_configurations(np.asarray(goal, np.float64), 'goal')
        key = self._session_key()
        if key != self._key:
            self._cache.clear()
            self._key = key
        ck = (start.tobytes(), goal.tobytes())
        hit = self._cache.get(ck)
        if hit is not None:
            return hit if hit[0].name == name else tuple(replace(h, name=name) for h in hit)
        post = next(iter(L.posteriors.values()))
        seed = _task_seed(start, goal)
        draws = []
        for k in range(self.n_draws):
            # draw 0 keeps the seed that a single cached set always had
            words = [L.config.seed, 7, seed] + ([k] if k else [])
            rng = np.random.default_rng(np.random.SeedSequence(words))
            _, feats, groups = L.task_alternatives(start, goal, rng, m=self.n_alternatives)
            recs = option_records(feats, groups, post.config.n_levels, post.config.bandwidth)
            draws.append(TaskOptions(name, start, goal, feats, np.asarray(groups), recs))
        self._cache[ck] = tuple(draws)
        return self._cache[ck]

    def options(self, name: str, start, goal) -> TaskOptions:
        """Return the task's first (cached) option set."""
        return self.option_draws(name, start, goal)[0]

    def taught(self) -> List[tuple]:
        """Return ``(first, last)`` joint positions of the learner's demonstrations."""
        return [(d.q[0], d.q[-1]) for d in self.learner.demonstrations if d is not None]

    def score(self, tasks: Sequence[tuple], rng: Optional[np.random.Generator] = None,
              taught: Optional[Sequence[tuple]] = None) -> List[TaskScore]:
        """Score ``(name, start, goal)`` tasks; the proposal first.

        Fewest times taught first (with ``fresh_first``), then largest gain
        (ties keep the given order). ``taught``: ``(first, last)`` joint positions of the
        demonstrations so far (default: the learner's, :meth:`taught`).
        """
        L = self.learner
        done = self.taught() if taught is None else list(taught)
        out = []
        for name, start, goal in tasks:
            draws = self.option_draws(name, start, goal)
            gains = {m: float(np.mean([information_gain(p, o, self.max_particles, rng)
                                       for o in draws]))
                     for m, p in L.posteriors.items()}
            out.append(TaskScore(name, draws[0].start, draws[0].goal,
                                 float(np.mean(list(gains.values()))), gains,
                                 times_taught(draws[0].start, draws[0].goal, done)))
        order = sorted(range(len(out)), key=lambda i: (
            out[i].times_taught if self.fresh_first else 0, -out[i].gain, i))
        return [out[i] for i in order]

    def propose(self, tasks: Sequence[tuple],
                rng: Optional[np.random.Generator] = None) -> Optional[TaskScore]:
        """Return the proposal among ``tasks`` (None when there is none); see :meth:`score`."""
        scores = self.score(tasks, rng)
        return scores[0] if scores else None


# ---------------------------------------------------------------- what is unknown
@dataclass(frozen=True)
class WeakDirection:
    """A direction of the weights the demonstrations have not pinned down."""

    std: float               # standard deviation of the posterior along it
    vector: np.ndarray       # (d,) unit eigenvector of the covariance
    text: str


def describe_direction(vector: np.ndarray, names: Sequence[str]) -> str:
    """Put one direction of the weights in feature terms.

    The feature with the largest loading against the one with the largest
    loading of the opposite sign ("how much X matters against Y"); a
    direction with no opposite loading of at least ``OPPOSITE_SHARE`` of the
    largest is about one feature against the rest.
    """
    v = np.asarray(vector, dtype=np.float64)
    a = int(np.argmax(np.abs(v)))
    if v[a] < 0:
        v = -v
    b = int(np.argmin(v))
    if v[b] < -OPPOSITE_SHARE * v[a]:
        return f'cannot yet tell how much {names[a]} matters against {names[b]}'
    return f'cannot yet tell how much {names[a]} matters against the other features'


def weakest_directions(covariance: np.ndarray, names: Sequence[str], k: int = 2,
                       tight_std: float = TIGHT_STD) -> List[WeakDirection]:
    """Return up to ``k`` eigen-directions of ``covariance`` whose std exceeds ``tight_std``.

    Largest variance first (``numpy.linalg.eigh`` of the symmetric matrix).
    """
    c = np.asarray(covariance, dtype=np.float64)
    vals, vecs = np.linalg.eigh(0.5 * (c + c.T))
    out = []
    for j in np.argsort(vals)[::-1][:k]:
        sd = math.sqrt(max(float(vals[j]), 0.0))
        if sd <= tight_std:
            break
        out.append(WeakDirection(sd, vecs[:, j], describe_direction(vecs[:, j], names)))
    return out


def unknown_lines(summary, names: Sequence[str], k: int = 2,
                  tight_std: float = TIGHT_STD) -> List[str]:
    """Plain sentences on what a posterior summary has not yet settled.

    The weakest directions in feature terms (with their standard deviation),
    then the feature whose weight is least certain; or one sentence saying
    the estimate is already tight.
    """
    dirs = weakest_directions(summary.covariance, names, k, tight_std)
    if not dirs:
        return [f'the estimate is already tight: no direction of the weights has a '
                f'posterior spread above {tight_std:.2f} (std)']
    lines = [f'{d.text} (spread {d.std:.2f})' for d in dirs]
    j = int(np.argmax(summary.ci_high - summary.ci_low))
    lines.append(f'least certain weight: {names[j]}, 90% interval '
                 f'[{summary.ci_low[j]:.2f}, {summary.ci_high[j]:.2f}]')
    return lines


def uncertainty(summary, names: Sequence[str], k: int = 2) -> dict:
    """Per-feature spread and the weakest directions, JSON-able."""
    dirs = weakest_directions(summary.covariance, names, k)
    return {'spread': {n: float(s) for n, s in zip(names, summary.std)},
            'weak_directions': [{'std': d.std, 'text': d.text,
                                 'loadings': {n: float(x) for n, x in zip(names, d.vector)}}
                                for d in dirs],
            'tight': not dirs, 'lines': unknown_lines(summary, names, k)}
