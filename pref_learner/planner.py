# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Trajectory optimiser that plans with learned weights.

Minimises over the interior waypoints of ``q : (T, n)`` (endpoints fixed)::

    J(q) = - R(q) + smoothness * A(q) + barrier * B(q)

``R`` is the reward ``theta . phi(q)`` with the session's scaled features
(or, under uncertainty, the posterior expectation of the reward or its lower
tail, below); ``A = sum_t |q_{t+1} - 2 q_t + q_{t-1}|^2 (T-1)^3`` is the
integral of the squared joint acceleration in normalised time; ``B`` is a
quadratic penalty inside a margin from each joint limit, on top of the hard
bounds of L-BFGS-B. Gradients are analytic: feature gradients through the
frame Jacobians, chained through each aggregate
(:meth:`pref_learner.features.FeatureSet.gradient`); no finite differences.
scipy ``minimize(method='L-BFGS-B')`` runs from the straight line and from a
few seeded smooth perturbations of it; the best result is returned.

Objective under uncertainty about the preference (``uncertainty_objective``;
this is uncertainty about what the person wants, not a hazard measure):
``mean`` optimises the expected reward over weighted particles (linear in
theta, so it equals the reward of the weighted mean vector); ``cvar``
optimises the mean reward over the worst ``alpha`` fraction of the posterior
mass (conditional value at risk, a smooth lower-quantile criterion).

Plans are proposals: the bounds keep waypoints within the URDF joint limits
and :func:`time_parametrize` times them to given speed and acceleration
limits; nothing here checks collisions or collaborative speed limits.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Optional, Tuple

import numpy as np
from scipy.optimize import minimize

from .features import FeatureSet


@dataclass(frozen=True)
class PlannerConfig:
    n_waypoints: int = 64
    smoothness: float = 0.01
    barrier: float = 10.0
    barrier_margin: float = 0.05      # rad (or m) from each limit
    restarts: int = 2
    restart_scale: float = 0.05       # fraction of joint range, smooth noise
    uncertainty_objective: str = 'mean'   # mean | cvar (over the preference posterior)
    alpha: float = 0.1                # tail fraction for cvar
    max_iter: int = 200
    n_control: int = 16               # B-spline controls incl. the two fixed ends (<= T used)

    def __post_init__(self):
        if self.n_waypoints < 4:
            raise ValueError(f'n_waypoints must be >= 4, got {self.n_waypoints}')
        if self.smoothness < 0 or self.barrier < 0:
            raise ValueError('smoothness and barrier must be >= 0')
        if self.uncertainty_objective not in ('mean', 'cvar'):
            raise ValueError(f'uncertainty_objective {self.uncertainty_objective!r} is unknown; '
                             'allowed: mean, cvar')
        if not 0 < self.alpha <= 1:
            raise ValueError(f'alpha must be in (0, 1], got {self.alpha}')
        if self.restarts < 0 or self.max_iter < 1:
            raise ValueError('restarts must be >= 0 and max_iter >= 1')
        if self.n_control < 4:
            raise ValueError(f'n_control must be >= 4, got {self.n_control}')


@dataclass
class PlanResult:
    q: np.ndarray            # (T, n)
    features: np.ndarray     # (d,) scaled
    cost: float
    reward: float
    converged: bool
    n_iter: int
    message: str
    time_s: float


def spline_basis(n_waypoints: int, n_control: int) -> np.ndarray:
    """Clamped cubic B-spline basis at equally spaced waypoints, interior controls only.

    Returns ``(T, K - 2)``: the deviation from the straight line is
    ``B @ c``; the two end controls are fixed at zero, so the endpoints stay
    exact, and every waypoint is a convex combination of at most four
    controls (rows sum to at most 1, entries >= 0).
    """
    from scipy.interpolate import BSpline
    k = 3
    inner = np.linspace(0.0, 1.0, n_control - k + 1)
    knots = np.concatenate([[0.0] * k, inner, [1.0] * k])
    tau = np.linspace(0.0, 1.0, n_waypoints)
    B = BSpline.design_matrix(tau, knots, k).toarray()
    return B[:, 1:-1]


def check_weights(weights, d: int, name: str = 'weights') -> np.ndarray:
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (d,):
        raise ValueError(f'{name} must have {d} entries (one per feature), got shape {w.shape}')
    if not np.all(np.isfinite(w)):
        raise ValueError(f'{name} contain a non-finite value: {w.tolist()}')
    if not np.linalg.norm(w) > 0:
        raise ValueError(f'{name} are all zero: nothing to plan for')
    return w


class TrajectoryPlanner:
    """Plans trajectories for a feature set with fixed scales."""

    def __init__(self, features: FeatureSet, config: PlannerConfig = PlannerConfig()):
        if features.scales is None:
            raise ValueError('the planner needs a feature set with scales')
        self.features = features
        self.robot = features.robot
        self.config = config
        T = config.n_waypoints
        self.T = T
        self._D2 = np.diff(np.eye(T), n=2, axis=0)
        self._acc_w = (T - 1) ** 3
        self._basis = spline_basis(T, min(config.n_control, T))

    # ------------------------------------------------------------ objective parts
    def smoothness(self, q: np.ndarray) -> Tuple[float, np.ndarray]:
        a = self._D2 @ q
        val = self._acc_w * float(np.sum(a * a))
        return val, 2.0 * self._acc_w * (self._D2.T @ a)

    def barrier(self, q: np.ndarray) -> Tuple[float, np.ndarray]:
        lo = self.robot.lower + self.config.barrier_margin
        hi = self.robot.upper - self.config.barrier_margin
        below = np.where(np.isfinite(lo), np.minimum(q - lo, 0.0), 0.0)
        above = np.where(np.isfinite(hi), np.maximum(q - hi, 0.0), 0.0)
        val = float(np.sum(below ** 2) + np.sum(above ** 2))
        return val, 2.0 * (below + above)

    def _reward_direction(self, phi: np.ndarray, theta: np.ndarray,
                          pw: Optional[np.ndarray]) -> np.ndarray:
        """Return the weight vector whose gradient the reward has at these features."""
        if theta.ndim == 1:
            return theta
        if self.config.uncertainty_objective == 'mean':
            return pw @ theta
        r = theta @ phi
        order = np.argsort(r)
        cum = np.cumsum(pw[order])
        k = int(np.searchsorted(cum, self.config.alpha)) + 1
        idx = order[:k]
        w = pw[idx] / pw[idx].sum()
        return w @ theta[idx]

    def objective(self, x: np.ndarray, start, goal, theta, pw) -> Tuple[float, np.ndarray]:
        n = self.robot.n
        q = np.vstack([start, x.reshape(self.T - 2, n), goal])
        raw, g_raw = self.features.value_and_gradient(q)          # (d,), (d, T, n)
        phi = raw / self.features.scales
        direction = self._reward_direction(phi, theta, pw)
        reward = float(direction @ phi)
        g_reward = np.einsum('d,dtn->tn', direction / self.features.scales, g_raw)
        s_val, s_grad = self.smoothness(q)
        b_val, b_grad = self.barrier(q)
        c = self.config
        val = -reward + c.smoothness * s_val + c.barrier * b_val
        grad = -g_reward + c.smoothness * s_grad + c.barrier * b_grad
        return val, grad[1:-1].ravel()

    # ------------------------------------------------------------ planning
    def plan(self, weights, start, goal, rng: Optional[np.random.Generator] = None,
             particle_weights=None) -> PlanResult:
        """Plan from ``start`` to ``goal``.

        For ``weights (d,)``, or particles ``(P, d)`` with
        ``particle_weights (P,)``.
        """
        t0 = time.perf_counter()
        d = self.features.d
        w = np.asarray(weights, dtype=np.float64)
        pw = None
        if w.ndim == 2:
            if w.shape[1] != d or not np.all(np.isfinite(w)):
                raise ValueError(f'particles must be (P, {d}) and finite, got {w.shape}')
            pw = (np.full(len(w), 1.0 / len(w)) if particle_weights is None
                  else np.asarray(particle_weights, dtype=np.float64))
            if pw.shape != (len(w),) or np.any(pw < 0) or not pw.sum() > 0:
                raise ValueError('particle_weights must be (P,) non-negative, not all zero')
            pw = pw / pw.sum()
        else:
            w = check_weights(w, d)
        start = self.robot.check_configurations(start, 'start')
        goal = self.robot.check_configurations(goal, 'goal')
        if start.shape != (self.robot.n,) or goal.shape != (self.robot.n,):
            raise ValueError(f'start and goal must each be one configuration of '
                             f'{self.robot.n} joints')
        rng = rng if rng is not None else np.random.default_rng(0)
        n = self.robot.n
        line = start + np.linspace(0, 1, self.T)[:, None] * (goal - start)
        B = self._basis                                   # (T, K - 2) interior controls
        kc = B.shape[1]
        # box bounds on each control that keep line + B c inside the limits at every
        # waypoint of its support (B-spline convex-hull property)
        # continuous joints stay within half a turn of the straight line: a reward that
        # grows with motion (effort, path length) would otherwise be unbounded
        lo_t = np.where(np.isfinite(self.robot.lower), self.robot.lower - line, -math.pi)
        hi_t = np.where(np.isfinite(self.robot.upper), self.robot.upper - line, math.pi)
        support = B > 0
        c_lo = np.array([lo_t[support[:, k]].max(axis=0) for k in range(kc)])   # (K-2, n)
        c_hi = np.array([hi_t[support[:, k]].min(axis=0) for k in range(kc)])
        bounds = [(None if not np.isfinite(a) else a, None if not np.isfinite(b) else b)
                  for a, b in zip(c_lo.ravel(), c_hi.ravel())]
        span = np.where(np.isfinite(self.robot.upper - self.robot.lower),
                        self.robot.upper - self.robot.lower, 2 * math.pi)
        inits = [np.zeros((kc, n))]
        for _ in range(self.config.restarts):
            c0 = rng.standard_normal((kc, n)) * self.config.restart_scale * span
            inits.append(np.clip(c0, np.nan_to_num(c_lo, neginf=-1e9),
                                 np.nan_to_num(c_hi, posinf=1e9)))

        def fun(c):
            x = line[1:-1] + B[1:-1] @ c.reshape(kc, n)
            val, g = self.objective(x.ravel(), start, goal, w, pw)
            return val, (B[1:-1].T @ g.reshape(self.T - 2, n)).ravel()
        best = None
        for init in inits:
            res = minimize(fun, init.ravel(), jac=True, method='L-BFGS-B', bounds=bounds,
                           options={'maxiter': self.config.max_iter})
            if best is None or res.fun < best.fun:
                best = res
        q = line + B @ best.x.reshape(kc, n)
        q[0], q[-1] = start, goal
        phi = self.features(q)
        direction = self._reward_direction(phi, w, pw)
        return PlanResult(q, phi, float(best.fun), float(direction @ phi), bool(best.success),
                          int(best.nit), str(best.message), time.perf_counter() - t0)


def time_parametrize(q: np.ndarray, v_max: np.ndarray, a_max: np.ndarray) -> np.ndarray:
    """Time waypoints ``q : (T, n)`` with one uniform step; returns ``(T,)``.

    The step keeps finite-difference joint speeds below ``v_max`` and
    accelerations below ``a_max`` (both ``(n,)``, > 0).
    """
    dq = np.abs(np.diff(q, axis=0))
    ddq = np.abs(np.diff(q, n=2, axis=0)) if len(q) > 2 else np.zeros((1, q.shape[1]))
    dt_v = float(np.max(dq / v_max)) if dq.size else 0.0
    dt_a = float(np.sqrt(np.max(ddq / a_max))) if ddq.size else 0.0
    dt = max(dt_v, dt_a, 1e-3)
    return np.arange(len(q)) * dt


def cap_tool_speed(t: np.ndarray, tool: np.ndarray, max_speed: float) -> np.ndarray:
    """Stretch uniform times ``t (T,)`` so the tool path ``tool (T, 3)`` stays under a speed.

    Returns new times (the same uniform step, made longer where needed) so that no
    segment's average Cartesian speed exceeds ``max_speed`` (m/s, > 0). This only
    shapes a proposal; it is not a safety function.
    """
    if len(t) < 2:
        return t
    seg = np.linalg.norm(np.diff(tool, axis=0), axis=1)
    dt = max(float(t[1] - t[0]), float(seg.max()) / max_speed)
    return np.arange(len(t)) * dt


_WORKER_PLANNER: Optional[TrajectoryPlanner] = None


def _plan_one(args):
    start, goal, w, seed = args
    return _WORKER_PLANNER.plan(w, start, goal, np.random.default_rng(seed)).q


def planner_alternatives(planner: TrajectoryPlanner, start, goal, weights: np.ndarray,
                         rng: np.random.Generator, n_jobs: int = 0) -> np.ndarray:
    """Optimise one trajectory per row of ``weights (m, d)``; returns ``(m, T, n)``.

    With ``n_jobs`` > 1 (0: one per core) in forked worker processes.
    """
    import os
    global _WORKER_PLANNER
    _WORKER_PLANNER = planner          # inherited by forked workers (not pickled)
    seeds = rng.integers(0, 2**31 - 1, len(weights))
    jobs = [(start, goal, w, int(s)) for w, s in zip(weights, seeds)]
    n_jobs = n_jobs or (os.cpu_count() or 1)
    if n_jobs > 1 and len(jobs) > 1:
        import multiprocessing as mp
        with mp.get_context('fork').Pool(min(n_jobs, len(jobs))) as pool:
            return np.stack(pool.map(_plan_one, jobs))
    return np.stack([_plan_one(j) for j in jobs])


def plan_benchmark(quick: bool = False) -> dict:
    """``plan_ms_median``: one 64-waypoint plan, shipped arm, demo features, one restart."""
    from .learner import Learner, LearnerConfig
    L = Learner(LearnerConfig(n_particles=1, n_alternatives=1))
    planner = TrajectoryPlanner(L.features, PlannerConfig(restarts=0))
    tasks = L.tasks()
    rng = np.random.default_rng(0)
    times, iters = [], []
    for k in range(4 if quick else 10):
        w = rng.standard_normal(L.features.d)
        _, s, g = tasks[k % len(tasks)]
        r = planner.plan(w, s, g, rng)
        times.append(r.time_s)
        iters.append(r.n_iter)
    return {'plan_ms_median': float(np.median(times) * 1e3),
            'plan_iterations_median': float(np.median(iters))}
