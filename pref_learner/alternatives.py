# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Alternative trajectories sharing a demonstration's start and goal.

Samplers return ``(m, T, n)`` joint trajectories whose first and last
waypoints equal the given start and goal exactly and which stay inside the
joint limits.

``smooth``
    joint-space straight line plus correlated Gaussian noise with covariance
    ``(A^T A)^{-1}``, ``A`` the finite-difference acceleration operator on
    the interior waypoints (zero at the endpoints, smooth in between),
    normalised to unit peak standard deviation and scaled per joint by
    ``noise_scale`` (a fraction of each joint's range, or 2 pi for continuous
    joints) times an amplitude drawn uniformly in [0, 1] per alternative, so
    the set spans from near the straight line to far from it. The standard
    normal draws are truncated at 3 sigma, so the noise, and with it the
    jerk, is bounded (:meth:`SmoothNoise.jerk_bound`).
``near_optimal``
    smooth draws moved a few steps up the reward of weights drawn from the
    current posterior (half) and the prior (half), along the reward gradient
    smoothed by the noise covariance (batched analytic gradients): options a
    person who optimises would consider. With several spread levels they
    form an option level of their own.
``perturb``
    the demonstration itself plus the same noise. Opt-in only: noise makes
    every convex cost (effort, path length) worse on average, so a set with
    such copies teaches the learner that the person dislikes noise.
``planner``
    trajectories optimised under random weights on the sphere, from a
    callable ``planner(start, goal, weights (m, d), rng) -> (m, T, n)``
    (see :mod:`pref_learner.planner`).

Joint limits: a sample that leaves them is redrawn up to ``max_redraws``
times; if it still does not fit, its noise is halved until it does (the
straight line between two in-limit configurations is inside the box of
limits, so this terminates). Every draw comes from the ``Generator`` passed in;
the learner derives it from a seed stored with each demonstration.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Dict, Optional, Sequence, Tuple

import numpy as np

from .robot import RobotModel


class SmoothNoise:
    """Correlated noise on T waypoints, zero at both ends, unit peak std."""

    def __init__(self, n_waypoints: int):
        T = n_waypoints
        if T < 4:
            raise ValueError(f'n_waypoints must be >= 4, got {T}')
        self.T = T
        A = np.diff(np.eye(T), n=2, axis=0)[:, 1:-1]       # (T-2, T-2) acceleration
        prec = A.T @ A
        L = np.linalg.cholesky(prec)
        # x = L^{-T} z has covariance prec^{-1}
        self._Linv_T = np.linalg.inv(L).T
        std = np.sqrt(np.sum(self._Linv_T ** 2, axis=1))
        self._norm = 1.0 / std.max()
        self.op = self._Linv_T * self._norm                   # (T-2, T-2)

    def draw(self, shape, rng: np.random.Generator) -> np.ndarray:
        """Noise ``shape + (T, n)`` for ``shape = (m, n)``; truncated normal at 3 sigma."""
        m, n = shape
        z = np.clip(rng.standard_normal((m, self.T - 2, n)), -3.0, 3.0)
        out = np.zeros((m, self.T, n))
        # one BLAS product over every draw (einsum's own loop was ~10x slower)
        out[:, 1:-1] = np.tensordot(z, self.op, axes=([1], [1])).transpose(0, 2, 1)
        return out

    def jerk_bound(self, scale: np.ndarray) -> float:
        """Upper bound of the jerk feature (normalised time) of noise scaled by ``scale (n,)``.

        |D3 op z|^2 <= ||D3 op||_2^2 |z|^2 and |z|^2 <= 9 (T - 2) per joint.
        """
        T = self.T
        h = 1.0 / (T - 1)
        D3 = np.diff(np.eye(T), n=3, axis=0)[:, 1:-1] / h ** 3
        nrm = np.linalg.norm(D3 @ self.op, 2)
        return float(h * nrm ** 2 * 9.0 * (T - 2) * np.sum(np.asarray(scale) ** 2))


def path_deviation(q: np.ndarray, span: np.ndarray) -> np.ndarray:
    """Root-mean-square distance of each path from the straight line between its ends.

    ``q (K, T, n)`` joint paths, ``span (n,)`` the joint ranges that scale the
    coordinates (as the option spreads do); returns ``(K,)``. Only the part of
    each waypoint perpendicular to the start-goal line counts, so a path's
    timing along the line does not. This is the statistic whose distribution
    tells option spreads apart: the spread scales it, whatever the preference.
    """
    r = _perpendicular(q, span)
    return np.sqrt(np.mean(np.sum(r * r, axis=-1), axis=-1))


def _perpendicular(q: np.ndarray, span: np.ndarray) -> np.ndarray:
    """Each waypoint's offset ``(K, T, n)`` from its start, perpendicular to the start-goal line.

    In joint coordinates divided by ``span``; the part along the line (the
    path's timing) is removed.
    """
    x = np.asarray(q, dtype=np.float64) / np.asarray(span, dtype=np.float64)
    start = x[:, :1]
    u = x[:, -1:] - start
    u = u / np.maximum(np.linalg.norm(u, axis=-1, keepdims=True), 1e-12)
    r = x - start
    return r - np.sum(r * u, axis=-1, keepdims=True) * u


#: sine modes of the perpendicular deviation that the ``modes`` option density uses
N_OPTION_MODES = 3


#: sine modes whose law weighs one level's draws as another's (``pool_levels``). A draw is
#: its level's noise times one amplitude, which shows in every mode: on the lowest 3 alone
#: a wide draw with small low modes passes for a narrow one though its higher modes (its
#: jerk) are the wide level's; 12 modes (72 coordinates for 7 joints) fix the amplitude to
#: about 8 % and stay well above the waypoint resampling's scale (64 waypoints).
N_POOL_MODES = 12


def path_modes(q: np.ndarray, span: np.ndarray, n_modes: int = N_OPTION_MODES) -> np.ndarray:
    """Coefficients of each path's deviation from its straight line on its lowest sine modes.

    ``q (K, T, n)`` joint paths, ``span (n,)`` the joint ranges that scale the
    coordinates (as the option spreads do); returns ``(K, n_modes, n)``: the
    part of every waypoint perpendicular to the start-goal line (as
    :func:`path_deviation`), projected on the orthonormal discrete sine basis
    ``sqrt(2 / (T - 1)) sin(pi k i / (T - 1))``, ``k = 1..n_modes``, ``i`` the
    waypoint (the eigenvectors of the second-difference operator with fixed
    ends, so the smooth noise's modes are independent). Each coefficient
    vector lies in the ``n - 1`` dimensions perpendicular to the line. The
    lowest modes carry the shape of an option; the higher ones mostly its
    resampling and smoothing, which differ between a demonstration and a draw.
    """
    T = np.shape(q)[1]
    if not 1 <= n_modes <= T - 2:
        raise ValueError(f'n_modes must be in [1, {T - 2}] for {T} waypoints, got {n_modes}')
    r = _perpendicular(q, span)
    i = np.arange(T)
    basis = np.sqrt(2.0 / (T - 1)) * np.sin(np.pi * np.arange(1, n_modes + 1)[:, None]
                                            * i[None, :] / (T - 1))
    return np.einsum('kt,mtn->mkn', basis, r)


KINDS = ('smooth', 'near_optimal', 'perturb', 'planner')


@dataclass(frozen=True)
class SamplerConfig:
    """Mixture of samplers, their spread levels and the near-optimal ascent.

    ``spreads`` are the option spreads the learner considers, each a fraction
    of every joint's range (2 pi for continuous joints). The alternatives are
    split evenly between the levels (group ``g`` of a row is its level), and
    within a level by ``mix``. One level is a fixed spread.
    """

    n_alternatives: int = 500
    mix: Dict[str, float] = field(default_factory=lambda: {'smooth': 1.0})
    spreads: Tuple[float, ...] = (0.08,)
    max_redraws: int = 8
    ascent_steps: int = 8
    ascent_step: float = 0.25          # largest waypoint move per step, x the level's spread

    def __post_init__(self):
        if self.n_alternatives < 1:
            raise ValueError(f'n_alternatives must be >= 1, got {self.n_alternatives}')
        bad = sorted(set(self.mix) - set(KINDS))
        if bad:
            raise ValueError(f'sampler mix has unknown kinds {bad}; allowed: {list(KINDS)}')
        if any(v < 0 for v in self.mix.values()) or sum(self.mix.values()) <= 0:
            raise ValueError(f'sampler mix proportions must be >= 0 and not all 0: {self.mix}')
        sp = tuple(self.spreads)
        if not sp or any(not (0 < float(v) <= 1.0) for v in sp):
            raise ValueError(f'spreads must be one or more fractions in (0, 1], got {sp!r}')
        if len(set(sp)) != len(sp):
            raise ValueError(f'spreads must be distinct, got {sp!r}')
        if self.ascent_steps < 0 or not self.ascent_step > 0:
            raise ValueError('ascent_steps must be >= 0 and ascent_step > 0')

    @property
    def noise_scale(self) -> float:
        """The middle spread level (what calibration and one-level sets use)."""
        return float(sorted(self.spreads)[len(self.spreads) // 2])

    def counts(self, m: Optional[int] = None, mix: Optional[Dict[str, float]] = None
               ) -> Dict[str, int]:
        """Count each kind among ``m`` (default n_alternatives) by largest remainder."""
        return _split(self.n_alternatives if m is None else m, mix or self.mix)

    def option_models(self) -> Tuple[Tuple[str, float, Dict[str, float]], ...]:
        """Return the option models (levels) of a set: ``(label, spread, mix)`` each.

        One spread: one level holding every kind of the mix. Several spreads:
        one level per spread of smooth draws (with any perturb or planner
        share), and near-optimal draws form a level of their own at the
        middle spread, so the posterior's level coordinate says which option
        model explains the person's demonstrations.
        """
        if len(self.spreads) == 1:
            return (('mixed %g' % self.spreads[0], float(self.spreads[0]), dict(self.mix)),)
        rest = {k: v for k, v in self.mix.items() if k != 'near_optimal' and v > 0}
        out = [('smooth %g' % s, float(s), rest) for s in self.spreads] if rest else []
        if self.mix.get('near_optimal', 0) > 0:
            out.append(('near-optimal %g' % self.noise_scale, self.noise_scale,
                        {'near_optimal': 1.0}))
        return tuple(out)

    def level_counts(self, m: Optional[int] = None) -> np.ndarray:
        """Alternatives per level ``(L,)``: near-optimal its mix share, the rest evenly."""
        m = self.n_alternatives if m is None else m
        models = self.option_models()
        L = len(models)
        if L == 1:
            return np.array([m])
        tot = sum(self.mix.values())
        share = self.mix.get('near_optimal', 0) / tot
        no = int(round(m * share)) if models[-1][2] == {'near_optimal': 1.0} else 0
        if no:
            no = min(max(no, 1), m - (L - 1))
            L -= 1
        rest = m - no
        counts = [rest // L + (1 if i < rest % L else 0) for i in range(L)]
        return np.array(counts + ([no] if no else []))


def _split(m: int, mix: Dict[str, float]) -> Dict[str, int]:
    tot = sum(mix.values())
    kinds = sorted(k for k, v in mix.items() if v > 0)
    raw = np.array([mix[k] / tot * m for k in kinds])
    c = np.floor(raw).astype(int)
    for i in np.argsort(-(raw - c))[: m - c.sum()]:
        c[i] += 1
    return {k: int(v) for k, v in zip(kinds, c)}


class AlternativeSampler:
    """Draws alternative trajectories for one start/goal pair.

    ``ascent(q (k, T, n), weights (k, d)) -> (rewards (k,), gradients (k, T, n))``
    serves the near-optimal kind (the task model gives it: scaled reward and
    its gradient); ``planner`` the slow ``planner`` kind.
    """

    def __init__(self, robot: RobotModel, n_waypoints: int,
                 config: SamplerConfig = SamplerConfig(),
                 planner: Optional[Callable] = None, n_features: Optional[int] = None,
                 ascent: Optional[Callable] = None):
        self.robot = robot
        self.T = n_waypoints
        self.config = config
        self.noise = SmoothNoise(n_waypoints)
        rng_ = np.where(np.isfinite(robot.upper - robot.lower), robot.upper - robot.lower,
                        2 * np.pi)
        self.span = rng_
        self.planner = planner
        self.ascent = ascent
        self.n_features = n_features
        if config.mix.get('planner', 0) > 0 and planner is None:
            raise ValueError('sampler mix asks for planner alternatives but no planner is set')
        if config.mix.get('near_optimal', 0) > 0 and (ascent is None or n_features is None):
            raise ValueError('sampler mix asks for near-optimal alternatives but no reward '
                             'gradient (ascent) is set')

    def straight(self, start: np.ndarray, goal: np.ndarray) -> np.ndarray:
        s = np.linspace(0.0, 1.0, self.T)[:, None]
        out = start + s * (goal - start)
        out[0], out[-1] = start, goal
        return out

    def _within(self, q: np.ndarray) -> np.ndarray:
        lo, hi = self.robot.lower, self.robot.upper
        return np.all((q >= lo) & (q <= hi), axis=(1, 2))

    def _draw(self, k: int, n: int, scale: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        amp = rng.random(k)[:, None, None]     # amplitude uniform in [0, 1] x scale
        return self.noise.draw((k, n), rng) * scale * amp

    def _noisy(self, base: np.ndarray, m: int, spread: float,
               rng: np.random.Generator) -> np.ndarray:
        n = base.shape[-1]
        scale = spread * self.span
        out = base[None] + self._draw(m, n, scale, rng)
        for _ in range(self.config.max_redraws):
            bad = ~self._within(out)
            if not bad.any():
                break
            k = int(bad.sum())
            out[bad] = base[None] + self._draw(k, n, scale, rng)
        bad = ~self._within(out)
        factor = 0.5
        while bad.any():
            out[bad] = base[None] + (out[bad] - base[None]) * factor
            bad = ~self._within(out)
            if factor < 1e-6:
                out[bad] = np.clip(out[bad], self.robot.lower, self.robot.upper)
                break
        out[:, 0], out[:, -1] = base[0], base[-1]
        return out

    def _near_optimal(self, line: np.ndarray, k: int, spread: float, weights: np.ndarray,
                      rng: np.random.Generator) -> np.ndarray:
        """Smooth draws moved up the reward of ``weights (k, d)`` by preconditioned ascent.

        Each step moves along the reward gradient smoothed by the noise
        covariance (so paths stay smooth, endpoints fixed), normalised so no
        waypoint moves more than ``ascent_step`` x the level's spread of its
        joint's range; joint limits are kept by clipping.
        """
        q = self._noisy(line, k, spread, rng)
        op = self.noise.op
        scale = spread * self.span
        lo, hi = self.robot.lower, self.robot.upper
        for _ in range(self.config.ascent_steps):
            _, g = self.ascent(q, weights)                                # (k, T, n)
            pg = np.einsum('ij,kj...->ki...', op, np.einsum('ji,kj...->ki...', op,
                                                            g[:, 1:-1]))
            pg *= scale ** 2
            peak = np.max(np.abs(pg) / scale, axis=(1, 2))
            ok = peak > 0
            pg[ok] *= (self.config.ascent_step / peak[ok])[:, None, None]
            q[:, 1:-1] = np.clip(q[:, 1:-1] + pg, lo, hi)
        return q

    def sample(self, start, goal, rng: np.random.Generator, demo: Optional[np.ndarray] = None,
               m: Optional[int] = None, weights: Optional[Callable] = None):
        """Draw ``m`` alternatives from the configured mixture and spread levels.

        ``weights(k, rng) -> (k, d)`` gives reward weights for the near-optimal
        kind (drawn from the current posterior; uniform on the sphere when not
        given). Returns ``(alternatives (m, T, n), groups (m,))``, ``groups``
        the spread level of each row.
        """
        start = self.robot.check_configurations(start, 'start')
        goal = self.robot.check_configurations(goal, 'goal')
        cfg = self.config
        m = cfg.n_alternatives if m is None else int(m)
        if m < len(cfg.option_models()):
            raise ValueError(f'{m} alternatives cannot fill {len(cfg.option_models())} option '
                             'levels; use more alternatives or fewer spreads')
        line = self.straight(start, goal)
        parts, groups = [], []
        for g, ((_, spread, mix), m_level) in enumerate(zip(cfg.option_models(),
                                                            cfg.level_counts(m))):
            for kind, k in sorted(cfg.counts(int(m_level), mix).items()):
                if k == 0:
                    continue
                if kind == 'smooth':
                    part = self._noisy(line, k, spread, rng)
                elif kind == 'perturb':
                    base = line if demo is None else np.asarray(demo, dtype=np.float64)
                    if base.shape != line.shape:
                        raise ValueError(f'demo must be {line.shape}, got {base.shape}')
                    part = self._noisy(base, k, spread, rng)
                else:
                    d = self.n_features
                    if weights is not None:
                        w = np.asarray(weights(k, rng), dtype=np.float64)
                    else:
                        w = rng.standard_normal((k, d))
                        w /= np.linalg.norm(w, axis=1, keepdims=True)
                    if kind == 'near_optimal':
                        part = self._near_optimal(line, k, spread, w, rng)
                    else:
                        part = np.asarray(self.planner(start, goal, w, rng))
                parts.append(part)
                groups.append(np.full(k, g, dtype=np.int64))
        return np.concatenate(parts, axis=0), np.concatenate(groups)


def set_diagnostics(features: np.ndarray, chosen: int, log_sim: Optional[np.ndarray] = None,
                    sparse_ratio: float = 0.2, bandwidth='scott') -> dict:
    """Where a demonstration sits within its set's feature distribution.

    Returns per-feature percentiles (0-100) of the chosen row among the set,
    its kernel density relative to the set's median density (from the LESS
    similarity sums), and flags: ``outside`` (outside the set's range in
    some feature), ``sparse`` (relative density below ``sparse_ratio``),
    ``dense`` (relative density above 1 / sparse_ratio). ``log_sim``: the
    set's similarity term when already computed (as the posterior's
    records hold it, :func:`pref_learner.posterior.set_log_similarity`),
    else computed with ``bandwidth``.
    """
    from .choice import log_similarity_sums
    x = np.asarray(features, dtype=np.float64)
    others = np.delete(x, chosen, axis=0)
    c = x[chosen]
    pct = 100.0 * (np.sum(others < c, axis=0) + 0.5 * np.sum(others == c, axis=0)) \
        / max(len(others), 1)
    outside = bool(np.any(c < others.min(axis=0)) or np.any(c > others.max(axis=0))) \
        if len(others) else True
    if log_sim is None:
        log_sim = log_similarity_sums(x, bandwidth)
    rel = float(np.exp(log_sim[chosen] - np.median(log_sim)))
    return {'percentiles': pct.tolist(), 'relative_density': rel, 'outside': outside,
            'sparse': bool(rel < sparse_ratio or outside), 'dense': bool(rel > 1.0 / sparse_ratio)}


def pooled_within_set_correlation(sets: Sequence[np.ndarray]) -> np.ndarray:
    """Correlation ``(d, d)`` between features, pooled within choice sets.

    Each set ``(M_k, d)`` is centred on its own mean, the centred rows are
    pooled and their Pearson correlation is returned: how strongly two features
    move together among the options of one task, which is what decides whether
    their weights can be told apart (differences across tasks do not count). A
    feature that never varies within a set gets correlation 0 with the others.
    """
    x = np.concatenate([np.asarray(f, dtype=np.float64) - np.mean(f, axis=0) for f in sets])
    cov = x.T @ x
    sd = np.sqrt(np.diag(cov))
    ok = sd > 1e-12 * max(float(sd.max()), 1e-300)
    c = np.zeros_like(cov)
    c[np.ix_(ok, ok)] = cov[np.ix_(ok, ok)] / np.outer(sd[ok], sd[ok])
    np.fill_diagonal(c, 1.0)
    return c


def strongest_pair(corr: np.ndarray, names: Sequence[str]) -> Tuple[float, str, str]:
    """Return the largest absolute off-diagonal correlation and its two feature names."""
    off = np.abs(np.asarray(corr)) - np.eye(len(corr))
    i, j = np.unravel_index(int(np.argmax(off)), off.shape)
    return float(off[i, j]), names[min(i, j)], names[max(i, j)]
