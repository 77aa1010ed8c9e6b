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
``perturb``
    the demonstration itself plus the same noise.
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
from typing import Callable, Dict, Optional

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
        out[:, 1:-1] = np.einsum('ij,mjn->min', self.op, z)
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


@dataclass(frozen=True)
class SamplerConfig:
    """Mixture of samplers and their scales."""

    n_alternatives: int = 500
    mix: Dict[str, float] = field(default_factory=lambda: {'smooth': 0.8, 'perturb': 0.2})
    noise_scale: float = 0.08          # fraction of each joint's range (pi if continuous)
    max_redraws: int = 8

    def __post_init__(self):
        if self.n_alternatives < 1:
            raise ValueError(f'n_alternatives must be >= 1, got {self.n_alternatives}')
        bad = sorted(set(self.mix) - {'smooth', 'perturb', 'planner'})
        if bad:
            raise ValueError(f'sampler mix has unknown kinds {bad}; allowed: smooth, perturb, '
                             'planner')
        if any(v < 0 for v in self.mix.values()) or sum(self.mix.values()) <= 0:
            raise ValueError(f'sampler mix proportions must be >= 0 and not all 0: {self.mix}')
        if not self.noise_scale > 0:
            raise ValueError(f'noise_scale must be > 0, got {self.noise_scale}')

    def counts(self) -> Dict[str, int]:
        """Count each kind (largest remainder, so they sum to n_alternatives)."""
        tot = sum(self.mix.values())
        kinds = sorted(self.mix)
        raw = np.array([self.mix[k] / tot * self.n_alternatives for k in kinds])
        c = np.floor(raw).astype(int)
        for i in np.argsort(-(raw - c))[: self.n_alternatives - c.sum()]:
            c[i] += 1
        return {k: int(v) for k, v in zip(kinds, c)}


class AlternativeSampler:
    """Draws alternative trajectories for one start/goal pair."""

    def __init__(self, robot: RobotModel, n_waypoints: int,
                 config: SamplerConfig = SamplerConfig(),
                 planner: Optional[Callable] = None, n_features: Optional[int] = None):
        self.robot = robot
        self.T = n_waypoints
        self.config = config
        self.noise = SmoothNoise(n_waypoints)
        rng_ = np.where(np.isfinite(robot.upper - robot.lower), robot.upper - robot.lower,
                        2 * np.pi)
        self.scale = config.noise_scale * rng_
        self.planner = planner
        self.n_features = n_features
        if config.mix.get('planner', 0) > 0 and planner is None:
            raise ValueError('sampler mix asks for planner alternatives but no planner is set')

    def straight(self, start: np.ndarray, goal: np.ndarray) -> np.ndarray:
        s = np.linspace(0.0, 1.0, self.T)[:, None]
        out = start + s * (goal - start)
        out[0], out[-1] = start, goal
        return out

    def _within(self, q: np.ndarray) -> np.ndarray:
        lo, hi = self.robot.lower, self.robot.upper
        return np.all((q >= lo) & (q <= hi), axis=(1, 2))

    def _draw(self, k: int, n: int, rng: np.random.Generator) -> np.ndarray:
        amp = rng.random(k)[:, None, None]     # amplitude uniform in [0, 1] x scale
        return self.noise.draw((k, n), rng) * self.scale * amp

    def _noisy(self, base: np.ndarray, m: int, rng: np.random.Generator) -> np.ndarray:
        n = base.shape[-1]
        out = base[None] + self._draw(m, n, rng)
        for _ in range(self.config.max_redraws):
            bad = ~self._within(out)
            if not bad.any():
                break
            k = int(bad.sum())
            out[bad] = base[None] + self._draw(k, n, rng)
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

    def sample(self, start, goal, rng: np.random.Generator, demo: Optional[np.ndarray] = None,
               m: Optional[int] = None) -> np.ndarray:
        """``m`` alternatives ``(m, T, n)`` from the configured mixture."""
        start = self.robot.check_configurations(start, 'start')
        goal = self.robot.check_configurations(goal, 'goal')
        cfg = self.config
        if m is not None and m != cfg.n_alternatives:
            cfg = SamplerConfig(m, cfg.mix, cfg.noise_scale, cfg.max_redraws)
        counts = cfg.counts()
        parts = []
        line = self.straight(start, goal)
        for kind in sorted(counts):
            k = counts[kind]
            if k == 0:
                continue
            if kind == 'smooth':
                parts.append(self._noisy(line, k, rng))
            elif kind == 'perturb':
                base = line if demo is None else np.asarray(demo, dtype=np.float64)
                if base.shape != line.shape:
                    raise ValueError(f'demo must be {line.shape}, got {base.shape}')
                parts.append(self._noisy(base, k, rng))
            else:
                d = self.n_features
                w = rng.standard_normal((k, d))
                w /= np.linalg.norm(w, axis=1, keepdims=True)
                parts.append(np.asarray(self.planner(start, goal, w, rng)))
        return np.concatenate(parts, axis=0)


def set_diagnostics(features: np.ndarray, chosen: int, log_sim: Optional[np.ndarray] = None,
                    sparse_ratio: float = 0.2) -> dict:
    """Where a demonstration sits within its set's feature distribution.

    Returns per-feature percentiles (0-100) of the chosen row among the set,
    its kernel density relative to the set's median density (from the LESS
    similarity sums), and flags: ``outside`` (outside the set's range in
    some feature), ``sparse`` (relative density below ``sparse_ratio``),
    ``dense`` (relative density above 1 / sparse_ratio).
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
        log_sim = log_similarity_sums(x)
    rel = float(np.exp(log_sim[chosen] - np.median(log_sim)))
    return {'percentiles': pct.tolist(), 'relative_density': rel, 'outside': outside,
            'sparse': bool(rel < sparse_ratio or outside), 'dense': bool(rel > 1.0 / sparse_ratio)}
