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
box on the controls. Gradients are analytic: feature gradients through the
frame Jacobians, chained through each aggregate
(:meth:`pref_learner.features.FeatureSet.values_and_gradients`); no finite
differences.

Smooth surrogate. ``min``/``max`` aggregates and distances at zero have no
gradient at their kinks, which stalls a quasi-Newton method. The optimiser
therefore minimises ``J`` with smooth surrogates of the features, each with
temperature ``t_j = soft_temperature * scale_j`` in feature j's units
(:attr:`TrajectoryPlanner.temperatures`; 0.02 of the scale by default): a
min/max aggregate becomes the log-sum-exp soft min/max, within ``t_j log T``
of the exact one; the Euclidean distance of ``point_distance`` /
``capsule_distance`` and each segment of ``path_length`` are rounded off at
zero, within ``t_j`` of the exact value at each waypoint, at the same
``t_j``. A distance under a min/max aggregate gets both, within
``t_j (1 + log T)``; under a mean or integral the rounding of each waypoint
is weighed as the aggregate weighs it. The plan's reported cost, reward and
features are the exact ones.

Optimiser. The waypoints are the straight line plus a clamped cubic B-spline
(:func:`spline_basis`) whose controls live in a box that keeps every
waypoint within the limits. :func:`minimize_box`, a projected quasi-Newton
method with a dense damped-BFGS Hessian started at the smoothness term's
Hessian (its constant curvature), runs from the straight line and from
``restarts`` seeded smooth perturbations of it; the run with the lowest exact
cost is returned. A run has converged when the infinity norm of the
projected gradient (respecting the box) is at most ``pg_tol`` times
``max(1, its value at the start)``; every :class:`PlanResult` reports
``converged``, ``n_iter`` and ``pg_norm``.

Objective under uncertainty about the preference (``uncertainty_objective``;
this is uncertainty about what the person wants, not a hazard measure):
``mean`` optimises the expected reward over weighted particles (linear in
theta, so it equals the reward of the weighted mean vector); ``cvar``
optimises the mean reward over the worst ``alpha`` fraction of the posterior
mass (conditional value at risk, a lower-quantile criterion; which particles
form the tail changes with the plan, so this objective is only piecewise
smooth and its runs converge less often).

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
    max_iter: int = 500               # cap on optimiser iterations per run
    n_control: int = 16               # B-spline controls incl. the two fixed ends (<= T used)
    soft_temperature: float = 0.02    # surrogate temperature / feature scale (0: exact features)
    pg_tol: float = 1e-5              # stop: |projected gradient|_inf <= pg_tol * max(1, start's)

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
        if not self.soft_temperature >= 0:
            raise ValueError(f'soft_temperature must be >= 0, got {self.soft_temperature}')
        if not self.pg_tol > 0:
            raise ValueError(f'pg_tol must be > 0, got {self.pg_tol}')


@dataclass
class PlanResult:
    """One plan: waypoints, its exact features, cost and reward, and how the optimiser ended.

    ``cost``, ``reward`` and ``features`` are exact (true min/max aggregates)
    at ``q``; ``converged``, ``n_iter``, ``n_eval`` and ``pg_norm`` describe
    the run that produced ``q`` (on the smooth surrogate objective):
    ``pg_norm`` is the infinity norm of its projected gradient at the end and
    ``converged`` says that it met the stopping rule (:func:`minimize_box`).
    """

    q: np.ndarray            # (T, n)
    features: np.ndarray     # (d,) scaled
    cost: float
    reward: float
    converged: bool
    n_iter: int
    message: str
    time_s: float
    pg_norm: float = float('nan')
    n_eval: int = 0

    def summary(self) -> str:
        """One line for logs and status: convergence, iterations, projected gradient, cost."""
        state = 'converged' if self.converged else 'NOT converged'
        return (f'plan {state} after {self.n_iter} iterations ({self.n_eval} evaluations), '
                f'projected gradient {self.pg_norm:.2e}, cost {self.cost:.4g}, '
                f'{self.time_s * 1e3:.0f} ms')


@dataclass
class BoxResult:
    x: np.ndarray
    fun: float
    jac: np.ndarray
    n_iter: int
    n_eval: int
    pg_norm: float
    pg_limit: float
    converged: bool
    message: str


def projected_gradient(x: np.ndarray, g: np.ndarray, lo: np.ndarray,
                       hi: np.ndarray) -> np.ndarray:
    """Projected gradient ``x - P(x - g)`` of a box ``lo <= x <= hi`` (entries may be infinite).

    Zero exactly at the box's first-order stationary points: a component
    vanishes where the gradient is zero or where it pushes into an active bound.
    """
    return x - np.clip(x - g, lo, hi)


def _damped_bfgs_update(H: np.ndarray, s: np.ndarray, y: np.ndarray) -> bool:
    """Update the Hessian approximation ``H`` in place with step ``s`` and gradient change ``y``.

    Powell's damping (Nocedal & Wright, Numerical Optimization, 2nd ed.,
    Procedure 18.2) keeps ``H`` positive definite where the objective is not
    convex. Returns False (no update) for a step too small to carry information.
    """
    Hs = H @ s
    sHs = float(s @ Hs)
    if not sHs > 1e-300:
        return False
    sy = float(s @ y)
    theta = 1.0 if sy >= 0.2 * sHs else 0.8 * sHs / (sHs - sy)
    r = theta * y + (1.0 - theta) * Hs
    sr = float(s @ r)
    if not sr > 1e-12 * sHs:
        return False
    H += np.outer(r, r) / sr - np.outer(Hs, Hs) / sHs
    return True


def minimize_box(fun, x0: np.ndarray, lo: np.ndarray, hi: np.ndarray, pg_tol: float,
                 max_iter: int, hessian0: Optional[np.ndarray] = None,
                 callback=None) -> BoxResult:
    """Minimise ``fun(x) -> (value, gradient)`` over the box ``lo <= x <= hi``.

    Projected quasi-Newton method (Bertsekas, "Projected Newton methods for
    optimization problems with simple constraints", SIAM J. Control Optim.
    20(2), 1982): variables at a bound whose gradient pushes outward
    (within ``eps = min(1e-3, |pg|_2)`` of it) take a scaled gradient step,
    the others a quasi-Newton step with a dense BFGS approximation of the
    Hessian (damped, so it stays positive definite) started at ``hessian0``
    (the known constant part of the Hessian makes a good preconditioner;
    default identity); an Armijo backtracking search runs along the
    projection ``P(x + a d)`` onto the box, so every iterate is inside it.

    Stopping rule: converged when the projected gradient
    (:func:`projected_gradient`) satisfies
    ``|pg(x)|_inf <= pg_tol * max(1, |pg(x0)|_inf)`` (relative to the start,
    absolute once that is below one). Otherwise the run ends at ``max_iter``
    iterations or when the line search can make no further progress, with
    ``converged = False``. ``callback(x, f)`` is called after every iteration.
    """
    lo = np.asarray(lo, dtype=np.float64)
    hi = np.asarray(hi, dtype=np.float64)
    x = np.clip(np.asarray(x0, dtype=np.float64), lo, hi)
    H0 = np.eye(x.size) if hessian0 is None else np.array(hessian0, dtype=np.float64)
    H = H0.copy()
    f, g = fun(x)
    n_eval = 1
    pg = projected_gradient(x, g, lo, hi)
    pgn = float(np.max(np.abs(pg), initial=0.0))
    limit = pg_tol * max(1.0, pgn)
    it, message, fresh = 0, '', True
    while True:
        if pgn <= limit:
            message = 'projected gradient within tolerance'
            break
        if it >= max_iter or n_eval >= 4 * max_iter:
            message = f'iteration cap {max_iter} reached' if it >= max_iter else \
                f'evaluation cap {4 * max_iter} reached'
            break
        eps = min(1e-3, float(np.linalg.norm(pg)))
        active = ((x <= lo + eps) & (g > 0)) | ((x >= hi - eps) & (g < 0))
        free = ~active
        d = np.empty_like(x)
        d[active] = -g[active] / np.maximum(np.diag(H)[active], 1e-12)
        if free.any():
            try:
                d[free] = -np.linalg.solve(H[np.ix_(free, free)], g[free])
            except np.linalg.LinAlgError:      # numerically singular: start afresh
                H[:] = H0
                d[free] = -np.linalg.solve(H[np.ix_(free, free)], g[free])
        step = 1.0
        for _ in range(30):
            xn = np.clip(x + step * d, lo, hi)
            dec = float(g @ (xn - x))
            if dec < 0:
                fn, gn = fun(xn)
                n_eval += 1
                if fn <= f + 1e-4 * dec:
                    break
                # minimiser of the quadratic through f, the slope and fn, kept in [0.1, 0.5]
                curv = fn - f - dec
                step *= min(0.5, max(0.1, -dec / (2.0 * curv))) if curv > 0 else 0.5
            else:
                step *= 0.5
        else:
            if fresh:
                message = 'line search found no decrease'
                break
            H[:] = H0              # the curvature pairs misled the direction: start afresh
            fresh = True
            continue
        _damped_bfgs_update(H, xn - x, gn - g)
        x, f, g = xn, fn, gn
        fresh = False
        it += 1
        pg = projected_gradient(x, g, lo, hi)
        pgn = float(np.max(np.abs(pg), initial=0.0))
        if callback is not None:
            callback(x, f)
    return BoxResult(x, float(f), g, it, n_eval, pgn, limit, pgn <= limit, message)


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
        #: (d,) surrogate temperature of each min/max feature, in the feature's units
        self.temperatures = config.soft_temperature * features.scales
        # Hessian of the smoothness term over the interior controls (one block per joint):
        # the constant part of the objective's curvature, the optimiser's preconditioner
        Bi = self._basis[1:-1]
        D2i = self._D2[:, 1:-1]
        S = 2.0 * config.smoothness * self._acc_w * (D2i @ Bi).T @ (D2i @ Bi)
        S += 1e-6 * max(float(np.max(np.diag(S))), 1.0) * np.eye(len(S))
        self._hessian0 = np.kron(S, np.eye(self.robot.n))

    # ------------------------------------------------------------ objective parts
    def smoothness(self, q: np.ndarray) -> Tuple[float, np.ndarray]:
        a = q[2:] - 2.0 * q[1:-1] + q[:-2]                    # self._D2 @ q
        val = self._acc_w * float(np.sum(a * a))
        g = np.zeros(q.shape)                                 # self._D2.T @ a
        g[2:] += a
        g[1:-1] -= 2.0 * a
        g[:-2] += a
        return val, 2.0 * self._acc_w * g

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

    def objective(self, x: np.ndarray, start, goal, theta, pw,
                  exact: bool = False) -> Tuple[float, np.ndarray]:
        """Objective ``J`` and its gradient over the interior waypoints ``x ((T-2) n,)``.

        By default on the smooth surrogate (min/max aggregates replaced by
        log-sum-exp at :attr:`temperatures`); ``exact`` uses the true
        aggregates (subgradient at the extreme waypoint).
        """
        n = self.robot.n
        q = np.empty((self.T, n))
        q[0], q[-1] = start, goal
        q[1:-1] = x.reshape(self.T - 2, n)
        raw, g_raw = self.features.value_and_gradient(
            q, None if exact else self.temperatures)            # (d,), (d, T, n)
        phi = raw / self.features.scales
        direction = self._reward_direction(phi, theta, pw)
        reward = float(direction @ phi)
        g_reward = np.tensordot(direction / self.features.scales, g_raw, axes=1)
        s_val, s_grad = self.smoothness(q)
        b_val, b_grad = self.barrier(q)
        c = self.config
        val = -reward + c.smoothness * s_val + c.barrier * b_val
        grad = -g_reward + c.smoothness * s_grad + c.barrier * b_grad
        return val, grad[1:-1].ravel()

    # ------------------------------------------------------------ planning
    def _check_request(self, weights, start, goal, particle_weights):
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
        return w, pw, start, goal

    def control_problem(self, start, goal):
        """Straight line ``(T, n)``, interior basis ``(T, K-2)`` and control box ``(K-2, n)`` x 2.

        The box on each control keeps line + B c inside the limits at every
        waypoint of its support (B-spline convex-hull property); continuous
        joints stay within half a turn of the straight line (a reward that
        grows with motion, effort or path length, would otherwise be unbounded).
        """
        line = start + np.linspace(0, 1, self.T)[:, None] * (goal - start)
        B = self._basis
        lo_t = np.where(np.isfinite(self.robot.lower), self.robot.lower - line, -math.pi)
        hi_t = np.where(np.isfinite(self.robot.upper), self.robot.upper - line, math.pi)
        support = B > 0
        c_lo = np.array([lo_t[support[:, k]].max(axis=0) for k in range(B.shape[1])])
        c_hi = np.array([hi_t[support[:, k]].min(axis=0) for k in range(B.shape[1])])
        return line, B, c_lo, c_hi

    def plan(self, weights, start, goal, rng: Optional[np.random.Generator] = None,
             particle_weights=None, callback=None) -> PlanResult:
        """Plan from ``start`` to ``goal``.

        For ``weights (d,)``, or particles ``(P, d)`` with
        ``particle_weights (P,)``. Each run (the straight line, then
        ``restarts`` seeded perturbations) minimises the surrogate objective
        until the projected-gradient rule holds (:func:`minimize_box`); the
        run with the lowest exact cost is returned, with its convergence.
        ``callback(q)`` receives the waypoints after every iteration.
        """
        t0 = time.perf_counter()
        w, pw, start, goal = self._check_request(weights, start, goal, particle_weights)
        rng = rng if rng is not None else np.random.default_rng(0)
        n = self.robot.n
        line, B, c_lo, c_hi = self.control_problem(start, goal)
        kc = B.shape[1]
        span = np.where(np.isfinite(self.robot.upper - self.robot.lower),
                        self.robot.upper - self.robot.lower, 2 * math.pi)
        inits = [np.zeros((kc, n))]
        for _ in range(self.config.restarts):
            inits.append(rng.standard_normal((kc, n)) * self.config.restart_scale * span)
        Bi = B[1:-1]

        def fun(c):
            x = line[1:-1] + Bi @ c.reshape(kc, n)
            val, g = self.objective(x.ravel(), start, goal, w, pw)
            return val, (Bi.T @ g.reshape(self.T - 2, n)).ravel()
        cb = None if callback is None else \
            (lambda c, f: callback(line + B @ c.reshape(kc, n)))
        best = None
        for init in inits:
            res = minimize_box(fun, init.ravel(), c_lo.ravel(), c_hi.ravel(),
                               self.config.pg_tol, self.config.max_iter, self._hessian0, cb)
            q = line + B @ res.x.reshape(kc, n)
            q[0], q[-1] = start, goal
            cost = self.objective(q[1:-1].ravel(), start, goal, w, pw, exact=True)[0]
            if best is None or cost < best[0]:
                best = (cost, q, res)
        cost, q, res = best
        phi = self.features(q)
        direction = self._reward_direction(phi, w, pw)
        return PlanResult(q, phi, float(cost), float(direction @ phi), res.converged,
                          res.n_iter, res.message, time.perf_counter() - t0, res.pg_norm,
                          res.n_eval)


def time_parametrize(q: np.ndarray, v_max: np.ndarray, a_max: np.ndarray) -> np.ndarray:
    """Time waypoints ``q : (T, n)`` with one uniform step; returns ``(T,)``.

    The step keeps finite-difference joint speeds below ``v_max`` and
    accelerations below ``a_max`` (both ``(n,)``, finite and > 0), the
    robot at rest before the first waypoint and after the last (so the
    first and last steps count as accelerations from and to rest).
    """
    v_max, a_max = np.asarray(v_max, dtype=np.float64), np.asarray(a_max, dtype=np.float64)
    for name, lim in (('velocity', v_max), ('acceleration', a_max)):
        if not np.all(np.isfinite(lim) & (lim > 0)):
            raise ValueError(f'joint {name} limits must be finite and > 0, got {lim.tolist()}')
    dq = np.abs(np.diff(q, axis=0))
    inner = np.abs(np.diff(q, n=2, axis=0)) if len(q) > 2 else np.zeros((0, q.shape[1]))
    ddq = np.concatenate([dq[:1], inner, dq[-1:]]) if dq.size else inner
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
