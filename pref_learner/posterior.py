# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Particle posterior over reward weights on the unit sphere.

The state is N weighted particles ``theta : (N, d)`` on S^{d-1}, optionally
with a rationality coordinate ``log_beta : (N,)`` (log-uniform prior on a
range) and an option-level coordinate ``level : (N,)`` (which of L option
models the person chose from; uniform prior), their log-weights
``log_weights : (N,)`` (normalised, log scale) and the per-particle sum of
log-likelihoods of every demonstration so far ``log_lik : (N,)``.

One update (:meth:`ParticlePosterior.update`) adds one demonstration by
adaptive tempering (Del Moral, Doucet & Jasra 2006): its log-likelihood
enters in steps ``phi_1 < ... < 1`` chosen by bisection so that the
effective sample size ``ESS = 1 / sum w_i^2`` stays at least ``ess_target`` x N
in every step; between steps the particles are resampled systematically and
moved by Metropolis-Hastings under the tempered target (prior x every
stored likelihood x the new one to the power phi). Moves run until a stated
share of the particles has moved, with a step that follows the cloud's
spread and a factor tuned toward 15-40 % acceptance; the real acceptance is
reported. Each choice set is kept (a few kB), so the full likelihood is
re-evaluated without kinematics. Once the cloud is narrow, the moves use a
fourth-order expansion of the stored sets' summed log-likelihood, checked
against the exact one before each use (:class:`MoveTarget`), so a round of
moves costs the same whatever the number of stored sets.

Registries: the choice models are :mod:`pref_learner.choice`'s
(``PosteriorConfig.model``); the moves' proposals are :data:`MOVES` and the
moves' likelihood providers :data:`MOVE_LIKELIHOODS`
(``PosteriorConfig.move_likelihood``).

The object is immutable: ``update`` returns a new posterior and an
:class:`UpdateInfo`; a rejected update raises ``ValueError`` and leaves the
original untouched. Randomness comes only from the ``numpy.random.Generator``
passed in.
"""

from __future__ import annotations

import functools
import json
import math
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Callable, Dict, NamedTuple, Optional, Sequence, Tuple

import numpy as np
from scipy.special import gammaincc, gammaln, logsumexp
from scipy.stats import vonmises_fisher

from . import choice
from .alternatives import N_OPTION_MODES

SCHEMA_VERSION = 2


def log_normalise(log_w: np.ndarray) -> np.ndarray:
    """Log-weights shifted so that ``sum(exp(log_w)) == 1``."""
    m = np.max(log_w)
    return log_w - (m + np.log(np.sum(np.exp(log_w - m))))


def ess_from_log_weights(log_w: np.ndarray) -> float:
    """Effective sample size ``1 / sum w_i^2`` of normalised weights (Kong 1992)."""
    lw = log_normalise(np.asarray(log_w, dtype=np.float64))
    return float(1.0 / np.sum(np.exp(2.0 * lw)))


def systematic_resample(log_w: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Draw indices ``(N,)`` by systematic resampling from log-weights ``(N,)``."""
    w = np.exp(log_normalise(np.asarray(log_w, dtype=np.float64)))
    n = w.shape[0]
    cdf = np.cumsum(w)
    cdf[-1] = 1.0
    u = (rng.random() + np.arange(n)) / n
    return np.searchsorted(cdf, u, side='left')


def sample_uniform_sphere(n: int, d: int, rng: np.random.Generator) -> np.ndarray:
    """Draw n points uniform on S^{d-1}, ``(n, d)`` (normalised Gaussians)."""
    x = rng.standard_normal((n, d))
    return x / np.linalg.norm(x, axis=1, keepdims=True)


#: how an option level's density of the demonstration is estimated (several levels)
OPTION_DENSITIES = ('modes', 'deviation', 'gaussian', 'kde')

#: points (odd) of the quadrature of the amplitude integral (:func:`log_uniform_scale_mixture`)
_AMPLITUDE_POINTS = 4001


def log_uniform_scale_mixture(x: np.ndarray, var: np.ndarray) -> float:
    """Log density at ``x (D,)`` of ``a z sqrt(var)``, ``a ~ U[0, 1]``, ``z ~ N(0, I_D)``.

    The law of a smooth alternative's coordinates (:mod:`pref_learner.alternatives`:
    Gaussian noise times an amplitude uniform in [0, 1]). With
    ``Q = sum x^2 / var`` the density is
    ``(2 pi)^(-D/2) prod(var)^(-1/2) int_0^1 a^-D exp(-Q / (2 a^2)) da``; the
    integral (``1/2 (2/Q)^((D-1)/2) Gamma((D-1)/2, Q/2)`` for D > 1) is
    evaluated in log space by Simpson's rule in ``t = log a`` around the
    integrand's peak, so it neither underflows far beyond the support
    (``Q >> D``) nor overflows near the origin. ``Q`` is floored at 1e-300.
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    v = np.asarray(var, dtype=np.float64).ravel()
    if x.shape != v.shape or not np.all(v > 0):
        raise ValueError('x and var must have the same size, var > 0')
    D = x.size
    Q = max(float(np.sum(x * x / v)), 1e-300)
    s = max(D - 1, 1)
    peak = 0.5 * math.log(Q / s)             # where the integrand in t = log a peaks
    width = 1.0 / math.sqrt(2.0 * s)          # its standard deviation there (Laplace)
    slope = Q - (D - 1)                       # the integrand's log-slope at a = 1
    if slope > 0:                             # increasing up to a = 1: the mass is near it
        lo = -min(40.0 * width + 1.0, 60.0 / slope)
    else:
        lo = peak - 40.0 * width - 1.0
    t = np.linspace(lo, 0.0, _AMPLITUDE_POINTS)
    f = (1.0 - D) * t - 0.5 * Q * np.exp(-2.0 * t)
    top = float(f.max())
    e = np.exp(f - top)
    simpson = np.ones(_AMPLITUDE_POINTS)
    simpson[1:-1:2], simpson[2:-1:2] = 4.0, 2.0
    log_int = top + math.log(float(simpson @ e) * (t[1] - t[0]) / 3.0)
    return float(-0.5 * D * math.log(2.0 * math.pi) - 0.5 * np.sum(np.log(v)) + log_int)


def _modes_law(alternatives, x: np.ndarray) -> Tuple[np.ndarray, int]:
    """Fit a level's modes law: each mode's unit-amplitude variance ``(m,)`` and ``n - 1``.

    Matched by moments to the level's ``alternatives (M, m, n)`` (``E a^2 =
    1/3``, so 3 x their mean square per dimension); ``x (k, m, n)`` are the
    paths to score, checked against them.
    """
    a = np.asarray(alternatives, dtype=np.float64)
    if a.ndim != 3 or x.ndim != 3 or x.shape[1:] != a.shape[1:] or a.shape[2] < 2:
        raise ValueError('option modes must be (M, m, n) and (m, n) or (k, m, n) with n >= 2 '
                         'joints')
    free = a.shape[2] - 1
    return np.maximum(3.0 * np.mean(np.sum(a * a, axis=2), axis=0) / free, 1e-300), free


def log_option_modes_density(alternatives: np.ndarray, x: np.ndarray) -> float:
    """Log density of a path's deviation modes ``x (m, n)`` under one option level.

    ``alternatives (M, m, n)``: the level's own paths' coefficients
    (:func:`pref_learner.alternatives.path_modes`). Each mode's coefficient
    vector lies in the ``n - 1`` dimensions perpendicular to the start-goal
    line and, for the smooth sampler, is isotropic there (the noise is the
    same in every joint's scaled coordinate) with a variance that falls
    with the mode. The level is modelled as the sampler draws it: Gaussian
    modes times one amplitude uniform in [0, 1] per path
    (:func:`log_uniform_scale_mixture`), with each mode's unit-amplitude
    variance matched to the level's paths by moments (``E a^2 = 1/3``, so 3 x
    their mean square per dimension). Unlike a Gaussian of the same
    variance, the law is flat in the amplitude up to the level's edge: a
    demonstration that the choice tilted outward stays likely under its own
    level (density about 1 / spread inside it) and is unlikely beyond it.
    """
    x = np.asarray(x, dtype=np.float64)
    var, free = _modes_law(alternatives, x[None])
    q = np.sum(x * x, axis=1)                                          # (m,)
    # the isotropic law on the (n - 1)-dimensional subspace: per mode, a squared norm
    # q_k over ``free`` dimensions of variance var_k (one coordinate of q_k each)
    coords = np.repeat(np.sqrt(q / free), free)
    return log_uniform_scale_mixture(coords, np.repeat(var, free))


def _log_scale_integrals(Q: np.ndarray, D: int) -> np.ndarray:
    """Return ``log int_0^1 a^-D exp(-Q / (2 a^2)) da`` for many ``Q (n,)``, ``(n,)``.

    For D > 1 by the closed form ``1/2 (2/Q)^((D-1)/2) Gamma((D-1)/2, Q/2)``
    (the upper incomplete gamma, ``scipy.special``; ``-inf`` where it
    underflows, hundreds of nats beyond the support), else by the quadrature
    of :func:`log_uniform_scale_mixture`, row by row.
    """
    Q = np.maximum(np.asarray(Q, dtype=np.float64), 1e-300)
    if D > 1:
        s = 0.5 * (D - 1)
        with np.errstate(divide='ignore'):
            return (math.log(0.5) + s * np.log(2.0 / Q) + gammaln(s)
                    + np.log(gammaincc(s, 0.5 * Q)))
    return np.array([log_uniform_scale_mixture([math.sqrt(q)], [1.0])
                     + 0.5 * math.log(2.0 * math.pi) for q in Q])


def log_option_modes_densities(alternatives: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Log density of many paths' deviation modes ``x (k, m, n)`` under one option level, ``(k,)``.

    The law of :func:`log_option_modes_density` (whose value it gives for
    each row), fitted once to the level's ``alternatives (M, m, n)``.
    """
    x = np.asarray(x, dtype=np.float64)
    var, free = _modes_law(alternatives, x)
    D = free * len(var)
    Q = np.sum(np.sum(x * x, axis=2) / var, axis=1)                                 # (k,)
    const = -0.5 * D * math.log(2.0 * math.pi) - 0.5 * free * float(np.sum(np.log(var)))
    return const + _log_scale_integrals(Q, D)


#: a pooled row whose normalised weight at a level is below exp(this) leaves that level's set
POOL_MIN_LOG_WEIGHT = -60.0


def pooled_log_weights(modes: np.ndarray, groups: np.ndarray, n_levels: int) -> np.ndarray:
    """Log importance weights ``(L, M)`` of every level's draws as draws of each level.

    ``modes (M, m, n)``: the alternatives' deviation modes
    (:func:`pref_learner.alternatives.path_modes`), ``groups (M,)`` the level
    that drew each. Level ``g``'s law ``p_g`` is the modes law fitted to its
    own draws (:func:`log_option_modes_densities`); the draws of all levels
    together are a sample of the mixture ``sum_h (M_h / M) p_h``, so the
    balance heuristic of multiple importance sampling (Veach & Guibas 1995)
    weighs draw ``j`` for level ``g`` by ``w_gj = p_g(x_j) / sum_h (M_h / M)
    p_h(x_j)``; the weights are then scaled to total the level's own count
    ``M_g`` (self-normalised), so a level's pooled set stands for as many
    options as its own draws. Weights below ``exp(POOL_MIN_LOG_WEIGHT)`` (a
    draw beyond the level's reach) are ``-inf``. One level: all 0.
    """
    m = np.asarray(modes, dtype=np.float64)
    g = np.asarray(groups, dtype=np.int64)
    L = int(n_levels)
    counts = np.array([np.sum(g == h) for h in range(L)])
    if m.shape[0] != g.shape[0] or np.any(counts == 0) or np.any((g < 0) | (g >= L)):
        raise ValueError('every draw needs its level in [0, L) and every level a draw')
    if L == 1:
        return np.zeros((1, g.shape[0]))
    logp = np.stack([log_option_modes_densities(m[g == h], m) for h in range(L)])  # (L, M)
    mix = logsumexp(logp + np.log(counts / g.shape[0])[:, None], axis=0)
    lw = logp - mix[None, :]
    lw += (np.log(counts) - logsumexp(lw, axis=1))[:, None]
    return np.where(lw >= POOL_MIN_LOG_WEIGHT, lw, -np.inf)


def pooled_log_similarity(features: np.ndarray, log_weight: np.ndarray,
                          bandwidth='scott') -> np.ndarray:
    """Return the LESS log-similarity sums ``(L, K)`` of a set pooled over its levels.

    ``log_weight (L, K)``: each row's log weight at each level (the chosen
    row 0, ``-inf`` rows absent from that level). At level ``g`` the rows
    count with frequency weights ``f_k = exp(log_weight[g, k])``: the
    features are standardised by the weighted mean and standard deviation
    (denominator ``sum f - 1``, so unit weights give the sample's, as
    :func:`pref_learner.choice.standardise`), the bandwidth is the rule's for
    ``round(sum f)`` points, and row ``j``'s sum is
    ``1 + sum_{k != j} f_k exp(-|z_j - z_k|^2 / (2 h^2))``: an importance
    estimate of the similarity sum it would have within a set of the level's
    own draws. With unit weights it is :func:`pref_learner.choice.log_similarity_sums`.
    Absent rows get ``-inf``.
    """
    x = choice._check_matrix(features)
    lw = np.asarray(log_weight, dtype=np.float64)
    d = x.shape[1]
    out = np.full(lw.shape, -np.inf)
    for g in range(lw.shape[0]):
        rows = np.flatnonzero(np.isfinite(lw[g]))
        f = np.exp(lw[g, rows])
        xr = x[rows]
        W = float(f.sum())
        mean = f @ xr / W
        xc = xr - mean
        if W > 1.0:
            sd = np.sqrt(f @ (xc * xc) / (W - 1.0))
        else:
            sd = np.ones(d)
        z = xc / np.where(sd > 0.0, sd, 1.0)
        h = choice.resolve_bandwidth(bandwidth, max(int(round(W)), 1), d)
        sq = np.einsum('ij,ij->i', z, z)
        d2 = np.maximum(sq[:, None] + sq[None, :] - 2.0 * (z @ z.T), 0.0)
        kern = np.exp(-0.5 / (h * h) * d2)
        out[g, rows] = np.log(kern @ f + (1.0 - f))
    return out


def log_option_density(points: np.ndarray, x: np.ndarray, kind: str = 'gaussian') -> float:
    """Log density at ``x (d,)`` of the distribution of ``points (M, d)``.

    ``gaussian``: a normal distribution with the points' mean and covariance
    (as ``scipy.stats.multivariate_normal``); ``kde``: a Gaussian kernel
    density estimate with the full covariance times Scott's factor squared
    (as ``scipy.stats.gaussian_kde``, Scott 1992). A tiny ridge keeps a
    degenerate set's covariance invertible.
    """
    pts = np.asarray(points, dtype=np.float64)
    m, d = pts.shape
    if m < 2:
        return 0.0
    cov = np.atleast_2d(np.cov(pts, rowvar=False))
    if kind == 'kde':
        cov = cov * choice.scott_factor(m, d) ** 2
        centres = pts
    elif kind == 'gaussian':
        centres = pts.mean(axis=0, keepdims=True)
    else:
        raise ValueError(f'option density {kind!r} is unknown; allowed: gaussian, kde')
    cov = cov + np.eye(d) * (1e-12 + 1e-9 * np.trace(cov) / d)
    chol = np.linalg.cholesky(cov)
    z = np.linalg.solve(chol, (x[None, :] - centres).T)          # (d, centres)
    log_det = 2.0 * float(np.sum(np.log(np.diag(chol))))
    return float(logsumexp(-0.5 * np.sum(z * z, axis=0)) - math.log(len(centres))
                 - 0.5 * (d * math.log(2 * math.pi) + log_det))


@dataclass(frozen=True)
class ChoiceRecord:
    """One demonstration as the posterior needs it.

    features : (K, d) scaled features of the demonstration and its alternatives.
    chosen : row index of the demonstration.
    groups : (K,) option-spread level of each alternative (``-1`` on the chosen row).
    n_levels : number of spread levels L; a particle at level g compares the
        demonstration with the alternatives of group g only.
    log_sim : (K,) LESS log-similarity sums of each alternative within its level's
        set (demonstration included); ``None`` for the Boltzmann model.
    log_sim_chosen : (L,) the demonstration's log-similarity sum within each level's set.
    log_density : (L,) log density of the demonstration under each level's
        alternatives: of the lowest sine modes of its deviation from the straight
        line under the sampler's own law of a level (``modes``,
        :func:`log_option_modes_density`; give ``deviation (K, modes, n)`` to
        :meth:`build`, see :func:`pref_learner.alternatives.path_modes`), of its
        features (``gaussian``, ``kde``, :func:`log_option_density`) or of the log
        of its RMS deviation from the straight line (``deviation``, a
        one-dimensional kernel estimate; give ``deviation (K,)``, see
        :func:`pref_learner.alternatives.path_deviation`).
        It makes levels comparable: with it the likelihood is that of the
        demonstration, not only of the choice among a given set (0 with one level,
        where it is a constant).
    pool_log_weight : (L, K) with pooled levels (``pool=True``): each row's log
        importance weight as a draw of each level (:func:`pooled_log_weights`;
        0 on the chosen row, ``-inf`` where a row is beyond a level's reach), so
        level g compares the demonstration with every level's draws, each
        standing for ``w_gj`` of level g's options; ``None``: each level its own
        draws.
    pool_log_sim : (L, K) with pooled levels and LESS: every row's
        log-similarity sum within each level's pooled set
        (:func:`pooled_log_similarity`); ``log_sim`` is then unused.
    """

    features: np.ndarray
    chosen: int
    groups: np.ndarray
    n_levels: int = 1
    log_sim: Optional[np.ndarray] = None
    log_sim_chosen: Optional[np.ndarray] = None
    log_density: Optional[np.ndarray] = None
    pool_log_weight: Optional[np.ndarray] = None
    pool_log_sim: Optional[np.ndarray] = None

    @classmethod
    def build(cls, features, chosen, bandwidth='scott', with_similarity=True, groups=None,
              n_levels: Optional[int] = None, density: str = 'gaussian', deviation=None,
              pool: bool = False):
        """Validate a set and precompute its similarity terms and level densities.

        ``pool``: every level's set holds every level's draws with importance
        weights (:func:`pooled_log_weights`; needs ``density='modes'`` and the
        rows' mode coefficients as ``deviation`` with several levels).
        """
        x = choice._check_matrix(features)
        c = choice._check_chosen(chosen, x.shape[0])
        k = x.shape[0]
        if deviation is not None and density == 'modes':
            deviation = np.asarray(deviation, dtype=np.float64)
            if deviation.ndim != 3 or deviation.shape[0] != k \
                    or not np.all(np.isfinite(deviation)):
                raise ValueError(f'deviation must be the finite mode coefficients (K = {k}, '
                                 'modes, joints) of every row (option density "modes")')
        elif deviation is not None:
            deviation = np.asarray(deviation, dtype=np.float64)
            if deviation.shape != (k,) or not np.all(np.isfinite(deviation)) \
                    or np.any(deviation < 0):
                raise ValueError(f'deviation must be {k} finite values >= 0, one per row')
        if groups is None:
            g = np.zeros(k, dtype=np.int64)
        else:
            g = np.asarray(groups, dtype=np.int64).copy()
            if g.shape != (k,):
                raise ValueError(f'groups must have shape ({k},), got {g.shape}')
        g[c] = -1
        L = int(n_levels) if n_levels is not None else int(max(g.max(), 0)) + 1
        if L < 1 or np.any(g[np.arange(k) != c] < 0) or np.any(g >= L):
            raise ValueError(f'groups must lie in [0, {L}) on every alternative')
        for lev in range(L):
            if not np.any(g == lev) and k > 1:
                raise ValueError(f'spread level {lev} has no alternatives in this set')
        ls = lsc = None
        if with_similarity:
            ls = np.zeros(k)
            lsc = np.zeros(L)
        dens = np.zeros(L)
        if L > 1 and density in ('deviation', 'modes') and deviation is None:
            raise ValueError(f'option density "{density}" needs the deviation of every '
                             'row from the straight line (several spread levels)')
        if L > 1 and density == 'deviation':
            # log scale: the levels' spreads are multiples of each other, so one
            # bandwidth rule fits them all; the log's Jacobian is the same for every level
            logdev = np.log(np.maximum(deviation, 1e-12))[:, None]
        for lev in range(L):
            cols = np.concatenate([[c], np.flatnonzero(g == lev)])
            if with_similarity:
                s = choice.log_similarity_sums(x[cols], bandwidth)
                ls[cols[1:]] = s[1:]
                lsc[lev] = s[0]
            if L > 1 and density == 'modes':
                dm = deviation[:, :N_OPTION_MODES]
                dens[lev] = log_option_modes_density(dm[cols[1:]], dm[c])
            elif L > 1 and density == 'deviation':
                dens[lev] = log_option_density(logdev[cols[1:]], logdev[c], 'kde')
            elif L > 1:
                dens[lev] = log_option_density(x[cols[1:]], x[c], density)
        plw = pls = None
        if pool:
            if L > 1 and density != 'modes':     # (modes without deviation raised above)
                raise ValueError('pooled levels need the "modes" option density and the '
                                 'mode coefficients (deviation) of every row')
            alt = np.flatnonzero(np.arange(k) != c)
            plw = np.zeros((L, k))
            if L > 1:
                plw[:, alt] = pooled_log_weights(deviation[alt], g[alt], L)
            if with_similarity:
                pls = pooled_log_similarity(x, plw, bandwidth)
        return cls(x, c, g, L, ls, lsc, dens, plw, pls)

    @property
    def pooled(self) -> bool:
        """Whether every level's set holds every level's draws (importance-weighted)."""
        return self.pool_log_weight is not None

    def columns(self, level: int) -> np.ndarray:
        """Row indices compared at ``level``: the chosen row first, then that level's.

        Pooled: the chosen row, then every row with a weight at ``level``.
        """
        if self.pool_log_weight is not None:
            keep = np.isfinite(self.pool_log_weight[level])
            keep[self.chosen] = False
            return np.concatenate([[self.chosen], np.flatnonzero(keep)])
        return np.concatenate([[self.chosen], np.flatnonzero(self.groups == level)])

    def log_similarity(self, level: int, cols: Optional[np.ndarray] = None) -> np.ndarray:
        """Return the set's similarity term at ``level``, ordered as :meth:`columns` (a copy).

        The LESS log-similarity sums of the chosen row and that level's
        alternatives within their set, computed once when the record was
        built; ``cols``: :meth:`columns` of ``level`` when already at hand.
        """
        cols = self.columns(level) if cols is None else cols
        if self.pool_log_weight is not None and self.pool_log_sim is not None:
            return self.pool_log_sim[level, cols]
        if self.log_sim is None or self.pool_log_weight is not None:
            raise ValueError('this choice record holds no similarity term (built without it)')
        ls = self.log_sim[cols]
        ls[0] = self.log_sim_chosen[level]
        return ls

    @functools.cached_property
    def utility_bounds(self) -> Tuple[float, float, float]:
        """Return ``max_j |phi_j|`` and the largest finite ``|offset|`` with and without LESS.

        With them ``|beta theta.phi_j - o_j| <= beta |theta| max|phi| + max|o|``
        on every row a level compares (a row beyond a pooled level's reach,
        offset ``+inf``, gives utility ``-inf``, which ``exp`` takes exactly), so
        :func:`choice.logsumexp_rows` may skip the row maximum. Computed once
        per record.
        """
        fmax = float(np.sqrt(np.max(np.einsum('ij,ij->i', self.features, self.features))))

        def largest(less):
            try:
                vals = [self.offsets(g, None, less) for g in range(self.n_levels)]
            except ValueError:                 # no similarity term: never asked with LESS
                return math.inf
            vals = [np.abs(v[np.isfinite(v)]) for v in vals if v is not None]
            return float(max((v.max() for v in vals if v.size), default=0.0))
        return fmax, largest(True), largest(False)

    def offsets(self, level: int, cols: Optional[np.ndarray] = None,
                less: bool = True) -> Optional[np.ndarray]:
        """Return what the utilities at ``level`` subtract per row, ordered as :meth:`columns`.

        The similarity term (``less``) minus, pooled, each row's log weight
        (:attr:`pool_log_weight`, 0 on the chosen row): a row standing for
        ``w`` options enters the log-partition as ``w exp(utility)``. ``None``
        when there is nothing to subtract (not ``less``, not pooled).
        """
        cols = self.columns(level) if cols is None else cols
        o = self.log_similarity(level, cols) if less else None
        if self.pool_log_weight is not None:
            lw = self.pool_log_weight[level, cols]
            o = -lw if o is None else o - lw
        return o


def set_log_similarity(records, bandwidth='scott') -> np.ndarray:
    """Return the LESS log-similarity sums ``(K,)`` of a whole set, in the records' row order.

    ``records``: choice records of one set (one per model, say). The term a
    record stored when it was built is reused when it covers the whole set
    (one option level); otherwise it is computed once here with
    ``bandwidth``, the configured one. For diagnostics of the set (its
    density around the demonstration), so they use the same term as the
    likelihood.
    """
    records = list(records)
    for rec in records:
        if rec.log_sim is not None and rec.n_levels == 1:
            cols = rec.columns(0)
            out = np.empty(len(cols))
            out[cols] = rec.log_similarity(0, cols)
            return out
    return choice.log_similarity_sums(records[0].features, bandwidth)


# ---------------------------------------------------------------- likelihood expansion
#: particles at which the expansion is checked against the exact log-likelihood: evenly
#: spaced ranks of their radius, and the outermost few (where the error is largest)
N_CHECK = 48
N_OUTER = 8
#: the largest error at the checked particles may be this many times ``expansion_tol``
MAX_ERROR_FACTOR = 20.0
#: fewer sets than this are not worth expanding (the moves are then exact)
MIN_EXPANDED = 4
#: proposals beyond this factor times the outermost particle's radius are rejected
TRUST_REACH = 1.5
#: particles per block when a set's log-likelihood is evaluated
_PARTICLE_BLOCK = 1024
#: most tempering steps of one update; the last one weighs in whatever is left
MAX_TEMPERING_STEPS = 200
#: exponents are clipped here (e^-700 is far below any sum's rounding, above subnormals)
_LOG_TINY = -700.0
#: records expanded per block (bounds the temporary (rows, d^2) arrays to a few MB)
_EXPANSION_BLOCK = 16


class LikelihoodExpansion(NamedTuple):
    """Fourth-order expansion of the summed log-likelihood of stored sets at one level.

    Every choice model here depends on the weights and the rationality only
    through ``u = beta theta (d,)``; a stored set's log-likelihood is
    ``u.phi_c - s_c + log_density - A(u)`` with the log-partition
    ``A(u) = log sum_j exp(u.phi_j - s_j)`` (``s`` the LESS log-similarity,
    0 for Boltzmann). The chosen-row terms are linear and kept exactly; ``A``
    is expanded around ``anchor`` by its cumulants: the derivatives of ``A``
    at ``u0`` are the cumulants of the features under the tilted weights
    ``p_j ~ exp(u0.phi_j - s_j)`` (mean, covariance, third central moment,
    fourth cumulant ``E(c.delta)^4 - 3 (delta' Cov delta)^2``). Sums over sets
    of these tensors are one tensor each, so evaluating the expansion costs
    O(d^4) per particle whatever the number of stored sets. At ``anchor`` it
    is exact. Products ``delta_a delta_b`` are kept for ``a <= b`` only
    (``d (d + 1) / 2`` of them); the coefficients carry the multiplicities.
    """

    anchor: np.ndarray      # (d,)
    value: float            # exact summed log-likelihood at the anchor
    grad: np.ndarray        # (d,)
    hess: np.ndarray        # (d, d)
    cubic: np.ndarray       # (d, P), P = d (d + 1) / 2: the third-order coefficients
    quartic: np.ndarray     # (P, P): the fourth-order coefficients

    def __call__(self, u: np.ndarray) -> np.ndarray:
        """Evaluate the expanded log-likelihood at ``u (n, d)``, ``(n,)``."""
        delta = np.atleast_2d(u) - self.anchor
        a, b = np.triu_indices(delta.shape[1])
        z = delta[:, a] * delta[:, b]
        return (self.value + delta @ self.grad
                + np.einsum('ij,ij->i', delta @ self.hess, delta) * 0.5
                + np.einsum('ij,ij->i', delta @ self.cubic, z)
                + np.einsum('ij,ij->i', z @ self.quartic, z))


def expand_loglik(records: Sequence[ChoiceRecord], level: int, anchor: np.ndarray,
                  less: bool) -> LikelihoodExpansion:
    """Expand the summed log-likelihood of ``records`` at spread ``level`` around ``anchor``.

    ``anchor (d,)`` is a point ``u = beta theta``; ``less`` subtracts the
    stored log-similarities (a model that ``uses_similarity``, LESS). The
    cost is O(records x M x d^4) once, in blocks of records (see
    :class:`LikelihoodExpansion`).
    """
    u0 = np.asarray(anchor, dtype=np.float64)
    d = u0.shape[0]
    ia, ib = np.triu_indices(d)
    n_pairs = len(ia)
    mult = np.where(ia == ib, 1.0, 2.0)
    value, grad = 0.0, np.zeros(d)
    k2 = np.zeros(n_pairs)
    k3 = np.zeros((d, n_pairs))
    m4 = np.zeros((n_pairs, n_pairs))
    g4 = np.zeros((n_pairs, n_pairs))
    for a in range(0, len(records), _EXPANSION_BLOCK):
        xs, ss, sizes = [], [], []
        for rec in records[a:a + _EXPANSION_BLOCK]:
            cols = rec.columns(level)
            xs.append(rec.features[cols])
            s = rec.offsets(level, cols, less)
            s = np.zeros(len(cols)) if s is None else s
            ss.append(s)
            sizes.append(len(cols))
            value += float(u0 @ rec.features[rec.chosen] - s[0] + rec.log_density[level])
            grad += rec.features[rec.chosen]
        x = np.concatenate(xs)
        starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
        seg = np.repeat(np.arange(len(sizes)), sizes)
        e = x @ u0 - np.concatenate(ss)
        top = np.maximum.reduceat(e, starts)
        e = np.exp(np.maximum(e - top[seg], _LOG_TINY))
        tot = np.add.reduceat(e, starts)
        value -= float(np.sum(top + np.log(tot)))
        p = e / tot[seg]
        mu = np.add.reduceat(p[:, None] * x, starts, axis=0)
        grad -= mu.sum(axis=0)
        c = x - mu[seg]
        # rows below 1e-30 of their set's tilted mass change no cumulant visibly; dropping
        # them also keeps the products below out of subnormal numbers (slow)
        keep = p > 1e-30
        p, c, seg = p[keep], c[keep], seg[keep]
        starts = np.searchsorted(seg, np.arange(len(sizes)))
        cc = c[:, ia] * c[:, ib]
        pcc = cc * p[:, None]
        per_set = np.add.reduceat(pcc, starts, axis=0)        # (sets, P): covariances
        k2 += per_set.sum(axis=0)
        k3 += c.T @ pcc
        m4 += cc.T @ pcc
        g4 += per_set.T @ per_set
    cov = np.zeros((d, d))
    cov[ia, ib] = k2
    cov[ib, ia] = k2
    return LikelihoodExpansion(u0.copy(), value, grad, -cov, -k3 * mult / 6.0,
                               -(m4 - 3.0 * g4) * np.outer(mult, mult) / 24.0)


class StackedSets:
    """Exact summed log-likelihood of stored sets at one level, for a few points at a time.

    The rows of :data:`_EXPANSION_BLOCK` sets at a time are stacked into one
    matrix, so ``n`` points cost one ``(n, rows)`` product and segmented
    log-sum-exps per block instead of a loop over the sets; no copy of the
    sets is kept between calls. Equal to :meth:`ParticlePosterior.total_loglik`
    up to rounding.
    """

    #: points per block (bounds the (points, rows) temporaries)
    BLOCK = 8

    def __init__(self, records: Sequence[ChoiceRecord], level: int, less: bool):
        self.records = tuple(records)
        self.level = level
        self.less = less

    def _blocks(self):
        g = self.level
        for a in range(0, len(self.records), _EXPANSION_BLOCK):
            xs, ss, sizes = [], [], []
            chosen, constant = 0.0, 0.0
            for rec in self.records[a:a + _EXPANSION_BLOCK]:
                cols = rec.columns(g)
                xs.append(rec.features[cols])
                s = rec.offsets(g, cols, self.less)
                s = np.zeros(len(cols)) if s is None else s
                ss.append(s)
                sizes.append(len(cols))
                chosen = chosen + rec.features[rec.chosen]
                constant += float(rec.log_density[g] - s[0])
            sizes = np.asarray(sizes)
            yield (np.concatenate(xs), np.concatenate(ss), sizes,
                   np.concatenate([[0], np.cumsum(sizes)[:-1]]), chosen, constant)

    def __call__(self, u: np.ndarray) -> np.ndarray:
        """Sum the log-likelihoods at ``u = beta theta (n, d)``, ``(n,)``."""
        out = np.zeros(u.shape[0])
        for x, s, sizes, starts, chosen, constant in self._blocks():
            for a in range(0, u.shape[0], self.BLOCK):
                ub = u[a:a + self.BLOCK]
                e = ub @ x.T
                e -= s
                top = np.maximum.reduceat(e, starts, axis=1)
                e -= np.repeat(top, sizes, axis=1)
                np.maximum(e, _LOG_TINY, out=e)
                np.exp(e, out=e)
                part = np.log(np.add.reduceat(e, starts, axis=1)) + top
                out[a:a + self.BLOCK] += ub @ chosen + constant - part.sum(axis=1)
        return out


#: alternatives per stored set and level that the moves' screen compares the demonstration with
SCREEN_OPTIONS = 24


class SubsetScreen:
    """A cheap stand-in for the summed log-likelihood of stored sets at one level.

    Each set's demonstration is compared with the first ``k`` of the level's
    ``m`` alternatives (independent draws, so a random subset of them; pooled
    sets, ordered by the level that drew them: ``k`` evenly spaced, each with
    its importance weight), each
    standing for ``m / k`` of them in the log-partition; the demonstration's
    own terms (linear in ``u``, the level's density, its similarity term) are
    the target's. Deterministic and O(sets x k) per point, so the moves can
    screen proposals with it before computing the exact value (delayed
    acceptance, see :meth:`MoveTarget.screen`); with ``k >= m`` it is exact.
    """

    #: points per block (bounds the (points, sets, k) temporaries to a few MB)
    BLOCK = 128

    def __init__(self, records: Sequence[ChoiceRecord], level: int, less: bool,
                 k: int = SCREEN_OPTIONS):
        cols = [rec.columns(level) for rec in records]
        kk = max(1, min([k] + [len(c) - 1 for c in cols]))
        x, off = [], []
        chosen, constant = 0.0, 0.0
        for rec, c in zip(records, cols):
            if rec.pooled:            # pooled rows are ordered by level: take them evenly spaced
                pick = np.concatenate([[0], 1 + np.linspace(0, len(c) - 2, kk).round()
                                       .astype(np.int64)])
            else:
                pick = np.arange(1 + kk)
            sub = c[pick]
            o = rec.offsets(level, c, less)
            s = np.zeros(1 + kk) if o is None else o[pick]
            weight = np.full(1 + kk, math.log((len(c) - 1) / kk))
            weight[0] = 0.0
            x.append(rec.features[sub])
            off.append(weight - s)
            chosen = chosen + rec.features[rec.chosen]
            constant += float(rec.log_density[level] - s[0])
        self.n_sets = len(records)
        self.x = np.concatenate(x).T.copy()                  # (d, sets (1 + k))
        self.offsets = np.concatenate(off).reshape(self.n_sets, 1 + kk)
        self.chosen = np.asarray(chosen, dtype=np.float64)
        self.constant = constant
        # |u.x_j + offset_j| <= |u| max|x| + max|offset|: below choice.DIRECT_LSE_BOUND the
        # log-sum-exps need no shift (as in ParticlePosterior.record_loglik)
        finite = np.abs(self.offsets[np.isfinite(self.offsets)])
        self.bound_terms = (float(np.sqrt(np.max(np.einsum('ij,ij->j', self.x, self.x)))),
                            float(finite.max()) if finite.size else 0.0)

    def __call__(self, u: np.ndarray) -> np.ndarray:
        """Return the screen's summed log-likelihood at ``u = beta theta (n, d)``, ``(n,)``."""
        out = u @ self.chosen + self.constant
        xmax, omax = self.bound_terms
        norms = np.sqrt(np.einsum('ij,ij->i', u, u))
        for a in range(0, u.shape[0], self.BLOCK):
            e = (u[a:a + self.BLOCK] @ self.x).reshape(-1, self.n_sets, self.offsets.shape[1])
            e += self.offsets
            if float(norms[a:a + self.BLOCK].max()) * xmax + omax < choice.DIRECT_LSE_BOUND:
                np.exp(e, out=e)
                out[a:a + self.BLOCK] -= np.log(e.sum(axis=2)).sum(axis=1)
                continue
            top = e.max(axis=2, keepdims=True)
            e -= top
            np.exp(e, out=e)
            out[a:a + self.BLOCK] -= (np.log(e.sum(axis=2)) + top[..., 0]).sum(axis=1)
        return out


class _Sum:
    """The sum of several functions of ``u`` (an expansion of older sets, a screen of newer)."""

    def __init__(self, parts):
        self.parts = tuple(parts)

    def __call__(self, u: np.ndarray) -> np.ndarray:
        return sum(p(u) for p in self.parts)


def _rows(a: Optional[np.ndarray], rows: np.ndarray) -> Optional[np.ndarray]:
    """``a[rows]``, or None for None (a posterior without that coordinate)."""
    return None if a is None else a[rows]


def _by_level(screens, theta: np.ndarray, beta: np.ndarray,
              level: Optional[np.ndarray]) -> np.ndarray:
    """Evaluate per-level functions of ``u = beta theta`` at points ``(n,)`` of their levels."""
    u = beta[:, None] * theta
    if level is None:
        return screens[0](u)
    out = np.empty(len(u))
    for g, sc in enumerate(screens):
        sel = np.flatnonzero(level == g)
        if sel.size:
            out[sel] = sc(u[sel])
    return out


class MoveTarget:
    """The log-likelihood of the stored sets as the moves evaluate it.

    Exact (``expansions is None``: every stored set, as :meth:`ParticlePosterior.total_loglik`),
    or, per level ``g``, the fourth-order :class:`LikelihoodExpansion` of
    its oldest ``split[g]`` sets (the newer sets exact; ``expansions[g] is
    None``: that level failed its check and is exact; beyond the radius
    ``inner[g]`` its points are scored exactly too) inside the
    ellipsoid of Mahalanobis radius ``radius`` around ``anchor`` (metric
    ``precision``) and ``-inf`` beyond it, so that proposals there are
    rejected (the region reaches :data:`TRUST_REACH` times beyond the
    outermost particle). ``error``: mean absolute difference between the
    expansion and the exact log-likelihood over particles at evenly spaced
    ranks of their radius (an estimate of the posterior mean error);
    ``error_max`` the largest of those and of the outermost particles' (NaN
    when exact). Within one call of
    the moves it is one fixed function, so Metropolis-Hastings leaves
    ``prior x exp(target)`` invariant.
    """

    def __init__(self, posterior, expansions=None, anchor=None, precision=None,
                 radius=0.0, error=float('nan'), error_max=float('nan'), split=None,
                 inner=None, screens=None, screen_exact=None):
        self.posterior = posterior
        self.split = split
        self.inner = inner
        self.screens = screens
        self.screen_exact = screen_exact
        self.expansions = expansions
        self.anchor = anchor
        self.precision = precision
        self.radius = radius
        self.error = error
        self.error_max = error_max

    @property
    def approximate(self) -> bool:
        return self.expansions is not None

    @property
    def screened(self) -> bool:
        """Whether the moves may screen proposals with :meth:`screen` (delayed acceptance)."""
        return self.screens is not None

    def screen(self, theta: np.ndarray, beta: np.ndarray,
               level: Optional[np.ndarray]) -> Tuple[np.ndarray, np.ndarray]:
        """Return a cheap stand-in for the target and where the target differs from it.

        ``(s (n,), differs (n,) bool)``: ``s`` is each level's screen
        (``screens[g]``): its checked expansion where the target is that
        expansion, else the expansion of the sets it covers plus a
        :class:`SubsetScreen` of the sets scored exactly; ``-inf`` beyond the
        trust region as the target. ``differs`` marks the points whose target
        is not ``s``: their level scores some sets exactly
        (``screen_exact[g]``; every level when the target is exact), or they
        lie beyond the level's checked radius. The moves evaluate the target at those points only
        when the screen accepts them (delayed acceptance, Christen & Fox 2005).
        """
        s = _by_level(self.screens, theta, beta, level)
        if not self.approximate:
            return s, np.ones(len(s), dtype=bool)
        lev = np.zeros(len(s), dtype=np.int64) if level is None else level
        r = self.radii(beta[:, None] * theta)
        differs = np.asarray(self.screen_exact)[lev] | (r > np.asarray(self.inner)[lev])
        outside = r > self.radius
        s[outside] = -np.inf
        differs[outside] = False
        return s, differs

    def radii(self, u: np.ndarray) -> np.ndarray:
        """Mahalanobis radius of each ``u (n, d)`` around the anchor, ``(n,)``."""
        delta = u - self.anchor
        return np.sqrt(np.maximum(np.einsum('ij,ij->i', delta @ self.precision, delta), 0.0))

    def __call__(self, theta: np.ndarray, beta: np.ndarray,
                 level: Optional[np.ndarray]) -> np.ndarray:
        if self.expansions is None:
            return self.posterior.total_loglik(theta, beta, level)
        u = beta[:, None] * theta
        lev = np.zeros(len(u), dtype=np.int64) if level is None else level
        out = np.empty(len(u))
        post = self.posterior
        for g, ex in enumerate(self.expansions):
            sel = np.flatnonzero(lev == g)
            if not sel.size:
                continue
            lv = None if level is None else level[sel]
            if ex is None:
                part = np.zeros(sel.size)
            else:
                part = ex(u[sel])
                reach = np.inf if self.inner is None else self.inner[g]
                far = np.flatnonzero(self.radii(u[sel]) > reach)
                if far.size:                  # beyond the checked radius: exact
                    rows = sel[far]
                    lf = None if level is None else level[rows]
                    part[far] = 0.0
                    for rec in post.records[:self.split[g]]:
                        part[far] += post.record_loglik(rec, theta[rows], beta[rows], lf)
            for rec in post.records[self.split[g]:]:
                part += post.record_loglik(rec, theta[sel], beta[sel], lv)
            out[sel] = part
        out[self.radii(u) > self.radius] = -np.inf
        return out


# ---------------------------------------------------------------- moves
class CoordinateMove:
    """A symmetric Metropolis-Hastings proposal for one coordinate of the particles.

    ``coordinate`` names the posterior's attribute it moves; where that is
    None (beta fixed, one option level) the move is off. ``dims`` is the
    number of continuous dimensions it adds to the step's scaling (the
    shared ``2.38 / sqrt(dims)`` base), ``setup`` the constants of one call
    of the moves (taken from the cloud before it, fixed during the call) and
    ``propose`` a proposal given ``scale`` (the tuned step factor times that
    base). Every move of a round is accepted or rejected together; the
    registry's order (:data:`MOVES`) is the order of the random draws.
    """

    name = ''
    coordinate = ''

    def dims(self, post: 'ParticlePosterior') -> int:
        return 0

    def setup(self, post: 'ParticlePosterior'):
        return None

    def propose(self, value: np.ndarray, scale: float, const, rng: np.random.Generator):
        raise NotImplementedError


class SphereMove(CoordinateMove):
    """``theta' = normalise(theta + s eps)``, eps ~ N(0, I): symmetric (depends on theta.theta').

    ``s``: the cloud's angular spread times the scale, within [1e-5, 1.5].
    """

    name = 'sphere'
    coordinate = 'theta'

    def dims(self, post):
        return post.d - 1

    def setup(self, post):
        r_len = float(np.linalg.norm(post.theta.mean(axis=0)))
        return math.sqrt(max(2.0 * (1.0 - min(r_len, 1.0)) / max(post.d - 1, 1), 1e-10))

    def propose(self, theta, scale, spread, rng):
        step = float(np.clip(scale * spread, 1e-5, 1.5))
        prop = theta + step * rng.standard_normal(theta.shape)
        prop /= np.linalg.norm(prop, axis=1, keepdims=True)
        return prop


class LogBetaMove(CoordinateMove):
    """Gaussian random walk of log beta, step proportional to its spread (at least 0.02)."""

    name = 'log_beta'
    coordinate = 'log_beta'

    def dims(self, post):
        return 1

    def setup(self, post):
        return float(np.std(post.log_beta))

    def propose(self, log_beta, scale, sd, rng):
        return log_beta + scale * max(sd, 0.02) * rng.standard_normal(log_beta.shape[0])


class LevelMove(CoordinateMove):
    """The option level moves to a neighbour with probability 0.3 (the prior rejects outside)."""

    name = 'level'
    coordinate = 'level'

    def propose(self, level, scale, const, rng):
        n = level.shape[0]
        jump = np.where(rng.random(n) < 0.3, rng.choice([-1, 1], n), 0)
        return level + jump


class MoveLikelihood:
    """Provides the stored sets' log-likelihood that one call of the moves evaluates.

    ``target(post, theta, beta, level)`` returns a :class:`MoveTarget`, one
    fixed function for the whole call; selected by ``PosteriorConfig.move_likelihood``.
    """

    name = ''

    def target(self, post: 'ParticlePosterior', theta: np.ndarray, beta: np.ndarray,
               level: Optional[np.ndarray]) -> MoveTarget:
        raise NotImplementedError


class ExactMoveLikelihood(MoveLikelihood):
    """Every stored set, exactly, at every move."""

    name = 'exact'

    def target(self, post, theta, beta, level):
        return MoveTarget(post)


class ExpansionMoveLikelihood(MoveLikelihood):
    """The checked fourth-order expansion (see :meth:`ParticlePosterior.move_target`)."""

    name = 'expansion'

    def target(self, post, theta, beta, level):
        cfg = post.config
        if not post.records:
            return MoveTarget(post)
        less = cfg.choice_model.uses_similarity
        u = beta[:, None] * theta
        w = post.weights
        anchor = w @ u
        delta = u - anchor
        cov = (delta * w[:, None]).T @ delta
        cov += np.eye(post.d) * (1e-12 + 1e-9 * np.trace(cov) / post.d)
        precision = np.linalg.inv(cov)
        probe = MoveTarget(post, None, anchor, precision)
        r = probe.radii(u)
        n = len(r)
        if not r.max() > 0:                # one point: no spread to fit a trust region to
            return MoveTarget(post)
        order = np.argsort(r, kind='stable')
        spread = N_CHECK - N_OUTER
        picks = np.concatenate([order[((np.arange(spread) + 0.5) * n / spread).astype(np.int64)],
                                order[-N_OUTER:]])
        tol, cap = cfg.expansion_tol, MAX_ERROR_FACTOR * cfg.expansion_tol
        # each level on its own (its sets' spread sets its error): every level is checked at
        # every checked point, since particles jump levels
        expansions, splits, means, worsts, inner, screens = [], [], [], [], [], []
        r_picks = r[picks]
        for g in range(cfg.n_levels):
            # the checks reach the outermost particle: beyond it (out to the trust
            # region's edge) points are scored exactly
            split, found, reach = len(post.records), None, float(r_picks.max())
            for _ in range(3):
                prefix = post.records[:split]
                ex = expand_loglik(prefix, g, anchor, less)
                err = np.abs(ex(u[picks]) - StackedSets(prefix, g, less)(u[picks]))
                mean, worst = float(err[:spread].mean()), float(err.max())
                if mean <= tol and worst <= cap:
                    found = ex
                    break
                # only the cloud's edge fails: expand inside the largest checked radius
                # below the first failure (holding at least half of the evenly spaced
                # checks), score exactly beyond it
                if worst > cap:
                    good = (err <= cap) & (r_picks < r_picks[err > cap].min())
                    inside = good[:spread]
                    if good.any() and inside.sum() >= spread // 2:
                        m_in = float(err[:spread][inside].mean())
                        if m_in <= tol:
                            found, reach = ex, float(r_picks[good].max())
                            mean, worst = m_in, float(err[good].max())
                            break
                # the error grows about in proportion to the number of expanded sets
                split = int(0.8 * split * min(tol / mean, cap / worst))
                if split < MIN_EXPANDED:
                    break
            expansions.append(found)
            splits.append(split if found is not None else 0)
            rest = post.records[splits[-1]:]
            if found is None:
                screens.append(SubsetScreen(rest, g, less))
            elif rest:
                screens.append(_Sum([found, SubsetScreen(rest, g, less)]))
            else:
                screens.append(found)
            inner.append(reach)
            means.append(mean)
            worsts.append(worst)
        n_sets = len(post.records)
        screen_exact = [ex is None or splits[i] < n_sets for i, ex in enumerate(expansions)]
        if all(ex is None for ex in expansions):
            return MoveTarget(post, error=float(np.mean(means)), error_max=float(max(worsts)),
                              screens=screens, screen_exact=screen_exact)
        used = [i for i, ex in enumerate(expansions) if ex is not None]
        return MoveTarget(post, expansions, anchor, precision, TRUST_REACH * float(r.max()),
                          float(np.mean([means[i] for i in used])),
                          float(max(worsts[i] for i in used)), splits, inner, screens,
                          screen_exact)


#: The registry of moves, in the order of their random draws (changing it changes results).
MOVES: Dict[str, CoordinateMove] = {}
#: The registry of the moves' likelihood providers (``PosteriorConfig.move_likelihood``).
MOVE_LIKELIHOODS: Dict[str, MoveLikelihood] = {}


def register_move(move: CoordinateMove) -> CoordinateMove:
    """Add a coordinate move (an instance) to :data:`MOVES`, after the others."""
    if not isinstance(move, CoordinateMove) or not move.name or move.name in MOVES:
        raise ValueError(f'{move!r} is not a CoordinateMove with a new name')
    MOVES[move.name] = move
    return move


def register_move_likelihood(provider: MoveLikelihood) -> MoveLikelihood:
    """Add a likelihood provider (an instance) to :data:`MOVE_LIKELIHOODS`."""
    if not isinstance(provider, MoveLikelihood) or not provider.name \
            or provider.name in MOVE_LIKELIHOODS:
        raise ValueError(f'{provider!r} is not a MoveLikelihood with a new name')
    MOVE_LIKELIHOODS[provider.name] = provider
    return provider


for _m in (SphereMove(), LogBetaMove(), LevelMove()):
    register_move(_m)
for _p in (ExactMoveLikelihood(), ExpansionMoveLikelihood()):
    register_move_likelihood(_p)
del _m, _p


@dataclass(frozen=True)
class PosteriorConfig:
    """Hyperparameters of the particle posterior (stored unchanged).

    ``beta_range`` (low, high): infer the rationality with a log-uniform prior
    on it; ``None`` keeps ``beta`` fixed. ``n_levels``: number of option-spread
    levels (uniform prior over them) carried as a discrete coordinate.
    Tempering keeps the effective sample size at least ``ess_target`` x N in
    every step; between tempering steps the moves run
    ``tempering_move_rounds`` rounds (0: only reweighting and resampling
    until the demonstration is fully weighed in, every move after it);
    after the last step (once resampled) at least ``n_moves`` rounds and
    until ``diversity_target`` of the particles have moved (at most
    ``max_move_rounds``). ``move_likelihood``: ``exact`` evaluates
    every stored set in every move; ``expansion`` (default) uses a
    fourth-order expansion of the stored sets' summed log-likelihood whenever
    its mean absolute error, checked against the exact one on particles
    spread over the cloud, is at most ``expansion_tol`` nats
    (:class:`MoveTarget`), and the exact one otherwise.
    """

    n_particles: int = 4000
    model: str = 'less'
    beta: float = 5.0
    beta_range: Optional[Tuple[float, float]] = None
    prior: str = 'uniform'
    prior_mean: Optional[Tuple[float, ...]] = None
    prior_kappa: float = 1.0
    ess_min_ratio: float = 0.5
    n_moves: int = 2
    bandwidth: object = 'scott'
    n_levels: int = 1
    ess_target: float = 0.5
    diversity_target: float = 0.8
    max_move_rounds: int = 8
    option_density: str = 'gaussian'
    pool_levels: bool = False
    move_likelihood: str = 'expansion'
    expansion_tol: float = 0.05
    tempering_move_rounds: int = 2

    def __post_init__(self):
        if not isinstance(self.n_particles, (int, np.integer)) or self.n_particles < 1:
            raise ValueError(f'n_particles must be an integer >= 1, got {self.n_particles!r}')
        choice.get_model(self.model)          # a registered choice model
        if not (math.isfinite(self.beta) and self.beta > 0):
            raise ValueError(f'beta must be > 0, got {self.beta!r}')
        if self.beta_range is not None:
            lo, hi = self.beta_range
            if not (0 < lo < hi and math.isfinite(hi)):
                raise ValueError(f'beta_range must be 0 < low < high, got {self.beta_range!r}')
        if self.prior not in ('uniform', 'vmf'):
            raise ValueError(f'prior {self.prior!r} is unknown; allowed: uniform, vmf')
        if self.prior == 'vmf':
            if self.prior_mean is None:
                raise ValueError('prior "vmf" needs prior_mean')
            if not (self.prior_kappa > 0):
                raise ValueError(f'prior_kappa must be > 0, got {self.prior_kappa!r}')
        if not 0.0 <= self.ess_min_ratio <= 1.0:
            raise ValueError(f'ess_min_ratio must be in [0, 1], got {self.ess_min_ratio!r}')
        if not 0.0 < self.ess_target < 1.0:
            raise ValueError(f'ess_target must be in (0, 1), got {self.ess_target!r}')
        if self.n_moves < 0 or self.max_move_rounds < self.n_moves:
            raise ValueError(f'need 0 <= n_moves <= max_move_rounds, got {self.n_moves!r}, '
                             f'{self.max_move_rounds!r}')
        if not 0.0 <= self.diversity_target <= 1.0:
            raise ValueError(f'diversity_target must be in [0, 1], got '
                             f'{self.diversity_target!r}')
        if self.option_density not in OPTION_DENSITIES:
            raise ValueError(f'option_density {self.option_density!r} is unknown; allowed: '
                             f'{", ".join(OPTION_DENSITIES)}')
        if self.pool_levels and self.n_levels > 1 and self.option_density != 'modes':
            raise ValueError('pool_levels needs option_density "modes" (the levels\' own '
                             f'laws), got {self.option_density!r}')
        if not 0 <= self.tempering_move_rounds <= self.max_move_rounds:
            raise ValueError(f'tempering_move_rounds must be in [0, max_move_rounds], got '
                             f'{self.tempering_move_rounds!r}')
        if self.move_likelihood not in MOVE_LIKELIHOODS:
            raise ValueError(f'move_likelihood {self.move_likelihood!r} is unknown; allowed: '
                             f'{", ".join(MOVE_LIKELIHOODS)}')
        if not (math.isfinite(self.expansion_tol) and self.expansion_tol > 0):
            raise ValueError(f'expansion_tol must be > 0, got {self.expansion_tol!r}')
        if not isinstance(self.n_levels, (int, np.integer)) or self.n_levels < 1:
            raise ValueError(f'n_levels must be an integer >= 1, got {self.n_levels!r}')
        if isinstance(self.bandwidth, str):
            choice.resolve_bandwidth(self.bandwidth, 2, 1)
        else:
            choice.resolve_bandwidth(float(self.bandwidth), 2, 1)

    @property
    def infer_beta(self) -> bool:
        return self.beta_range is not None

    @property
    def choice_model(self) -> choice.ChoiceModel:
        """The registered :class:`choice.ChoiceModel` named by ``model``."""
        return choice.get_model(self.model)


class UpdateInfo(NamedTuple):
    """What one update did.

    ``acceptance``: mean Metropolis-Hastings acceptance of its moves;
    ``likelihood_error``: the largest of its moves' checked mean absolute
    errors of the likelihood expansion (NaN when every move was exact).
    """

    ess: float
    ess_before_resampling: float
    resampled: bool
    acceptance: float
    n_demonstrations: int
    tempering_steps: int = 1
    move_rounds: int = 0
    moved_fraction: float = float('nan')
    likelihood_error: float = float('nan')


@dataclass(frozen=True)
class Summary:
    """Summary of a posterior; vectors are in feature order.

    ``level_probs`` is the posterior over the option-spread levels;
    ``beta_low_mass`` the posterior mass of beta in the lowest tenth of its
    log range (high when no weights explain the demonstrations well);
    ``acceptance`` the last moves' acceptance rate (NaN before any move).
    """

    mean: np.ndarray
    map: np.ndarray
    covariance: np.ndarray
    std: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    ess: float
    concentration: float
    n_demonstrations: int
    beta_mean: float
    beta_ci: Tuple[float, float]
    level_probs: Tuple[float, ...] = (1.0,)
    beta_low_mass: float = 0.0
    acceptance: float = float('nan')
    beta_inferred: bool = False

    #: warn when this much of beta's posterior mass sits in the lowest tenth of its range
    BETA_LOW_WARNING = 0.5

    @property
    def beta_at_low_end(self) -> bool:
        return self.beta_inferred and self.beta_low_mass >= self.BETA_LOW_WARNING

    def to_dict(self) -> dict:
        out = {}
        for k, v in asdict(self).items():
            out[k] = v.tolist() if isinstance(v, np.ndarray) else v
        out['beta_ci'] = list(self.beta_ci)
        out['level_probs'] = list(self.level_probs)
        return out


def weighted_quantile(x: np.ndarray, w: np.ndarray, q: Sequence[float]) -> np.ndarray:
    """Quantiles of samples x (N,) with normalised weights w (N,) (inverse of the CDF)."""
    order = np.argsort(x)
    cdf = np.cumsum(w[order])
    idx = np.searchsorted(cdf, np.asarray(q) * cdf[-1], side='left')
    return x[order][np.minimum(idx, x.shape[0] - 1)]


def _next_temperature(log_w: np.ndarray, ll: np.ndarray, remaining: float,
                      target: float) -> float:
    """Largest increment ``delta <= remaining`` keeping ESS(log_w + delta ll) >= target."""
    if ess_from_log_weights(log_w + remaining * ll) >= target:
        return remaining
    lo, hi = 0.0, remaining
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        if ess_from_log_weights(log_w + mid * ll) >= target:
            lo = mid
        else:
            hi = mid
    return max(lo, remaining * 1e-6)


@dataclass(frozen=True)
class ParticlePosterior:
    """Immutable particle approximation of p(theta[, beta][, level] | demonstrations).

    ``log_lik`` holds each particle's summed log-likelihood as the last moves
    evaluated it: exact, or within the expansion's error when
    ``log_lik_approximate`` (see :class:`MoveTarget`); the weights never use it.
    ``likelihood_error``: the last moves' measured expansion error (NaN: exact).
    """

    config: PosteriorConfig
    theta: np.ndarray
    log_weights: np.ndarray
    log_lik: np.ndarray
    log_beta: Optional[np.ndarray] = None
    records: Tuple[ChoiceRecord, ...] = field(default_factory=tuple)
    step_size: float = 1.0
    moves_pending: bool = False
    level: Optional[np.ndarray] = None
    acceptance: float = float('nan')
    log_lik_approximate: bool = False
    likelihood_error: float = float('nan')

    # ------------------------------------------------------------ creation
    @classmethod
    def create(cls, config: PosteriorConfig, d: int, rng: np.random.Generator):
        """Draw N particles from the prior."""
        if d < 1:
            raise ValueError(f'd must be >= 1, got {d}')
        n = int(config.n_particles)
        if config.prior == 'vmf':
            mu = np.asarray(config.prior_mean, dtype=np.float64)
            if mu.shape != (d,) or not np.linalg.norm(mu) > 0:
                raise ValueError(f'prior_mean must be a non-zero vector of length {d}')
            mu = mu / np.linalg.norm(mu)
            if d == 1:
                theta = np.tile(mu, (n, 1))
            else:
                theta = vonmises_fisher(mu, config.prior_kappa).rvs(n, random_state=rng)
                theta = np.atleast_2d(theta)
        else:
            theta = sample_uniform_sphere(n, d, rng)
        log_beta = None
        if config.infer_beta:
            lo, hi = np.log(config.beta_range)
            log_beta = rng.uniform(lo, hi, n)
        level = None
        if config.n_levels > 1:
            level = rng.integers(0, config.n_levels, n)
        lw = np.full(n, -np.log(n))
        return cls(config, theta, lw, np.zeros(n), log_beta, (), level=level)

    # ------------------------------------------------------------ basics
    @property
    def n_particles(self) -> int:
        return self.theta.shape[0]

    @property
    def d(self) -> int:
        return self.theta.shape[1]

    @property
    def weights(self) -> np.ndarray:
        return np.exp(log_normalise(self.log_weights))

    @property
    def beta(self) -> np.ndarray:
        if self.log_beta is None:
            return np.full(self.n_particles, self.config.beta)
        return np.exp(self.log_beta)

    @property
    def levels(self) -> np.ndarray:
        """Spread level of each particle ``(N,)`` (all 0 with one level)."""
        if self.level is None:
            return np.zeros(self.n_particles, dtype=np.int64)
        return self.level

    @property
    def ess(self) -> float:
        """Return the ESS of the weights (Kong 1992): copies of a particle count one by one."""
        return ess_from_log_weights(self.log_weights)

    def distinct_ess(self, log_w: Optional[np.ndarray] = None) -> float:
        """Return the ESS with identical particles merged: what a published estimate rests on.

        Kish's ``(sum w)^2 / sum w^2`` over the distinct particles (the same
        direction, rationality and level), each weighing the sum of its
        copies' weights (``log_w``, default the posterior's). Resampling makes
        copies and a move round leaves some unmoved, so this is at most
        :attr:`ess`, and it is the one a user sees (:class:`Summary`) and the
        provisional estimate's floor. Tempering keeps :attr:`ess`.
        """
        lw = log_normalise(np.asarray(self.log_weights if log_w is None else log_w,
                                      dtype=np.float64))
        cols = [self.theta] + [np.asarray(a, dtype=np.float64)[:, None]
                               for a in (self.log_beta, self.level) if a is not None]
        rows = np.ascontiguousarray(np.hstack(cols))
        # each row's bytes as one item: copies are bit-identical rows (exact, any d)
        items = rows.view(np.dtype((np.void, rows.dtype.itemsize * rows.shape[1]))).ravel()
        _, inverse = np.unique(items, return_inverse=True)
        merged = np.bincount(inverse.ravel(), weights=np.exp(lw))
        return float(1.0 / np.sum(merged * merged))

    def log_prior(self, theta: np.ndarray, log_beta: Optional[np.ndarray],
                  level: Optional[np.ndarray] = None) -> np.ndarray:
        """Unnormalised log prior density on the sphere (and log beta, level), ``(N,)``."""
        lp = np.zeros(theta.shape[0])
        if self.config.prior == 'vmf':
            mu = np.asarray(self.config.prior_mean, dtype=np.float64)
            lp = lp + self.config.prior_kappa * theta @ (mu / np.linalg.norm(mu))
        if log_beta is not None:
            lo, hi = np.log(self.config.beta_range)
            lp = np.where((log_beta >= lo) & (log_beta <= hi), lp, -np.inf)
        if level is not None:
            lp = np.where((level >= 0) & (level < self.config.n_levels), lp, -np.inf)
        return lp

    def _level_utilities(self, record: ChoiceRecord, theta: np.ndarray, beta: np.ndarray,
                         level: Optional[np.ndarray]):
        """Yield ``(sel, cols, r)`` per spread level present among the particles.

        ``sel``: the particles at that level (a slice when it is all of them),
        ``cols``: the rows they compare (chosen first), ``r : (len(sel), len(cols))``:
        the choice model's utilities (:meth:`choice.ChoiceModel.utilities`,
        ``beta theta.phi`` minus the set's stored offsets).
        """
        x = record.features
        model = self.config.choice_model
        lev = np.zeros(theta.shape[0], dtype=np.int64) if level is None else level
        for g in range(record.n_levels):
            sel = np.flatnonzero(lev == g)
            if sel.size == 0:
                continue
            if sel.size == theta.shape[0]:
                sel = slice(None)
            cols = record.columns(g)
            offsets = record.offsets(g, cols, model.uses_similarity)
            yield g, sel, cols, model.utilities(x[cols], theta[sel], beta[sel], offsets)

    def record_loglik(self, record: ChoiceRecord, theta: np.ndarray, beta: np.ndarray,
                      level: Optional[np.ndarray] = None,
                      with_density: bool = True) -> np.ndarray:
        """Log-likelihood of one stored demonstration for particles ``theta (N, d)``.

        ``level (N,)``: each particle's spread level (all 0 when ``None``).
        ``with_density=False`` gives the choice probability alone (the
        demonstration given its set).
        """
        n = theta.shape[0]
        out = np.full(n, -np.inf)
        model = self.config.choice_model
        fmax, o_less, o_plain = record.utility_bounds
        # the bound holds for the linear utilities beta theta.phi - o (a model that
        # overrides them takes the shifted log-sum-exp)
        omax = ((o_less if model.uses_similarity else o_plain)
                if type(model).utilities is choice.ChoiceModel.utilities else math.inf)
        scale = np.asarray(beta, dtype=np.float64) * np.sqrt(np.einsum('ij,ij->i', theta, theta))
        for a in range(0, n, _PARTICLE_BLOCK):     # blocks keep the (rows, K) utilities in cache
            b = min(n, a + _PARTICLE_BLOCK)
            part = out[a:b]
            bound = float(scale[a:b].max()) * fmax + omax
            for g, sel, _, r in self._level_utilities(record, theta[a:b], beta[a:b],
                                                      None if level is None else level[a:b]):
                chosen = r[:, 0].copy()
                part[sel] = chosen - choice.logsumexp_rows(r, bound) + (
                    record.log_density[g] if with_density else 0.0)
        return out

    def total_loglik(self, theta: np.ndarray, beta: np.ndarray,
                     level: Optional[np.ndarray] = None) -> np.ndarray:
        """Sum of log-likelihoods of every stored demonstration, ``(N,)``."""
        out = np.zeros(theta.shape[0])
        for rec in self.records:
            out += self.record_loglik(rec, theta, beta, level)
        return out

    def predictive_choice(self, record: ChoiceRecord) -> np.ndarray:
        """Posterior predictive probability of each row of ``record``'s set, ``(K,)``.

        ``sum_p w_p P(row | theta_p, beta_p, level_p)``; rows outside a
        particle's spread level have probability 0 for it.
        """
        w = self.weights
        out = np.zeros(record.features.shape[0])
        for _, sel, cols, r in self._level_utilities(record, self.theta, self.beta,
                                                     self.level):
            out[cols] += w[sel] @ choice.softmax_rows(r)
        return out

    def predictive_pvalue(self, record: ChoiceRecord) -> float:
        """Posterior predictive p-value of the demonstration within its set.

        The predictive probability of all rows no more probable than the
        chosen one (a discrete posterior predictive check, Gelman et al.,
        Bayesian Data Analysis, ch. 6, from memory). Small values mean the
        demonstration does not look like a choice from the assumed options
        under what the posterior believes.
        """
        p = self.predictive_choice(record)
        return float(np.sum(p[p <= p[record.chosen] * (1.0 + 1e-12)]))

    # ------------------------------------------------------------ update
    def prepare(self, features, chosen, groups=None, deviation=None) -> ChoiceRecord:
        """Validate one choice set and precompute what this model needs.

        ``groups (K,)``: the spread level of each alternative (needed with
        more than one level); ``deviation``: each row's deviation from the
        straight line (needed with several levels and ``option_density``
        ``modes``, ``(K, modes, n)``, or ``deviation``, ``(K,)``).
        """
        x = choice._check_matrix(features)
        if x.shape[1] != self.d:
            raise ValueError(f'features have d = {x.shape[1]} columns but the posterior has '
                             f'd = {self.d}')
        if groups is None and self.config.n_levels > 1:
            raise ValueError(f'the posterior has {self.config.n_levels} spread levels; give '
                             'the spread level (groups) of every alternative')
        return ChoiceRecord.build(x, chosen, self.config.bandwidth,
                                  with_similarity=self.config.choice_model.uses_similarity,
                                  groups=groups,
                                  n_levels=self.config.n_levels,
                                  density=self.config.option_density, deviation=deviation,
                                  pool=self.config.pool_levels)

    def weigh(self, record) -> Tuple[ChoiceRecord, np.ndarray]:
        """Check a new demonstration's record; return it and its log-likelihood per particle.

        ``record`` as :meth:`update` takes it; the log-likelihood ``(N,)`` is
        what :meth:`update` (``loglik``) and :meth:`reweighted` weigh the
        particles by. Raises ``ValueError`` for a record this posterior cannot take.
        """
        if not isinstance(record, ChoiceRecord):
            record = self.prepare(*record)
        elif record.features.shape[1] != self.d:
            raise ValueError(f'record has d = {record.features.shape[1]}, posterior d = {self.d}')
        elif record.n_levels != self.config.n_levels:
            raise ValueError(f'record has {record.n_levels} spread levels, the posterior '
                             f'{self.config.n_levels}')
        elif self.config.choice_model.uses_similarity and record.log_sim is None:
            sim = ChoiceRecord.build(record.features, record.chosen, self.config.bandwidth,
                                     True, record.groups, record.n_levels, 'gaussian')
            record = replace(sim, log_density=record.log_density)
        if record.features.shape[0] < 2:     # no choice; once stored it broke the screen
            raise ValueError('a demonstration needs at least one alternative to be chosen '
                             f'over (K >= 2), got K = {record.features.shape[0]}')
        ll = self.record_loglik(record, self.theta, self.beta, self.level)
        if not np.all(np.isfinite(ll)):
            raise ValueError('the demonstration has a non-finite log-likelihood for some '
                             'particles; features are out of range')
        return record, ll

    def reweighted(self, record: ChoiceRecord, ll: np.ndarray,
                   share: float = 1.0) -> 'ParticlePosterior':
        """Return the new demonstration weighed in by importance weights alone, in one step.

        The same particles with weights times the new likelihood ``ll``
        (:meth:`weigh`) raised to ``share``, the part of it not yet in the
        weights (1 for a posterior before the demonstration; ``1 - phi`` for
        particles tempered to ``phi``): a self-normalised importance-sampling
        estimate of the new posterior, whose accuracy its ESS states.
        :meth:`update` returns this when its first step takes the whole
        likelihood without resampling (an ESS of at least ``ess_target`` and
        ``ess_min_ratio`` x N); below ``ess_target`` x N it tempers and moves
        the particles.
        """
        return replace(self, log_weights=log_normalise(self.log_weights + share * ll),
                       log_lik=self.log_lik + ll, records=self.records + (record,),
                       moves_pending=False)

    def update(self, record, rng: np.random.Generator, move: bool = True,
               loglik: Optional[np.ndarray] = None,
               on_provisional: Optional[Callable[['ParticlePosterior'], None]] = None,
               provisional_ess: float = 0.0):
        """Add one demonstration by adaptive tempering; returns ``(new_posterior, UpdateInfo)``.

        ``record`` is a :class:`ChoiceRecord` or the arguments of :meth:`prepare`
        as a tuple: ``(features (K, d), chosen[, groups[, deviation]])``. The new likelihood
        enters in steps ``0 < phi_1 < ... < 1`` chosen by bisection so the ESS
        stays at least ``ess_target`` x N in each (Del Moral, Doucet & Jasra
        2006); between steps the particles are resampled and moved under the
        tempered target. With ``move=False`` the moves after the last step are
        left pending (``moves_pending``) so that the caller can publish the
        estimate first and run :meth:`rejuvenate` next. ``loglik``: the record's
        log-likelihood as :meth:`weigh` returned it for this ``record`` (not
        computed again).

        ``on_provisional``: called at most once, with the estimate a caller may
        hand out before tempering ends: at the first point (before any step, or
        after a step's moves) where the particles would still temper and the
        rest of the likelihood weighed in at once (:meth:`reweighted` with
        ``share = 1 - phi``) keeps a :meth:`distinct_ess` of at least
        ``provisional_ess``.
        Learning does not depend on it (it draws no random numbers; an
        exception it raises propagates).
        """
        if loglik is None:
            record, ll = self.weigh(record)
        else:
            ll = np.asarray(loglik, dtype=np.float64)
            if not isinstance(record, ChoiceRecord) or ll.shape != (self.n_particles,):
                raise ValueError('loglik needs the ChoiceRecord it was weighed from and one '
                                 f'value per particle ({self.n_particles})')
            if not np.all(np.isfinite(ll)):
                raise ValueError('the demonstration has a non-finite log-likelihood for some '
                                 'particles (loglik)')
        n = self.n_particles
        cur = self
        phi, steps, rounds = 0.0, 0, 0
        accs, errs, moved = [], [], float('nan')
        ess0 = float('nan')
        resampled = False
        while phi < 1.0:
            if on_provisional is not None:
                rest = cur.log_weights + (1.0 - phi) * ll
                if (ess_from_log_weights(rest) < self.config.ess_target * n
                        and cur.distinct_ess(rest) >= provisional_ess):
                    on_provisional(cur.reweighted(record, ll, 1.0 - phi))
                    on_provisional = None
            delta = _next_temperature(cur.log_weights, ll, 1.0 - phi,
                                      self.config.ess_target * n)
            if steps == MAX_TEMPERING_STEPS - 1:     # the last step allowed takes the rest
                delta = 1.0 - phi
            phi = 1.0 if phi + delta >= 1.0 - 1e-12 else phi + delta
            steps += 1
            log_w = log_normalise(cur.log_weights + delta * ll)
            ess0 = ess_from_log_weights(log_w)
            cur = replace(cur, log_weights=log_w)
            if phi < 1.0 or ess0 < self.config.ess_min_ratio * n:
                idx = systematic_resample(log_w, rng)
                cur = cur._take(idx)
                ll = ll[idx]
                resampled = True
                if phi < 1.0:
                    cur, ll, acc, r_, moved = cur._move(rng, record, phi, ll)
                    accs.append(acc)
                    errs.append(cur.likelihood_error)
                    rounds += r_
        new = replace(cur, log_lik=cur.log_lik + ll, records=self.records + (record,),
                      moves_pending=False)
        if resampled or self.moves_pending:     # copies this or an earlier update left
            if move:
                new, _, acc, r_, moved = new._move(rng, None, 0.0, None)
                accs.append(acc)
                errs.append(new.likelihood_error)
                rounds += r_
            else:
                new = replace(new, moves_pending=True)
        accs = [a for a in accs if not math.isnan(a)]
        acc = float(np.mean(accs)) if accs else float('nan')
        if accs:
            new = replace(new, acceptance=acc)
        errs = [e for e in errs if not math.isnan(e)]
        info = UpdateInfo(new.ess, ess0, resampled, acc, len(new.records), steps, rounds,
                          moved, max(errs) if errs else float('nan'))
        return new, info

    def rejuvenate(self, rng: np.random.Generator) -> Tuple['ParticlePosterior', float]:
        """Run the moves left pending by ``update(move=False)``; (posterior, acceptance)."""
        if not self.moves_pending:
            return self, float('nan')
        new, _, acc, _, _ = self._move(rng, None, 0.0, None)
        return replace(new, moves_pending=False, acceptance=acc), acc

    def _take(self, idx: np.ndarray) -> 'ParticlePosterior':
        n = len(idx)
        return replace(self, theta=self.theta[idx], log_lik=self.log_lik[idx],
                       log_beta=None if self.log_beta is None else self.log_beta[idx],
                       level=None if self.level is None else self.level[idx],
                       log_weights=np.full(n, -np.log(n)))

    def move_target(self, theta: np.ndarray, beta: np.ndarray,
                    level: Optional[np.ndarray]) -> MoveTarget:
        """Return the stored sets' log-likelihood for moves starting from these particles.

        With ``move_likelihood: expansion``: each level's
        :class:`LikelihoodExpansion` around the weighted mean of
        ``u = beta theta``, in the metric of its weighted covariance. It is
        checked against the exact log-likelihood (:class:`StackedSets`) at
        :data:`N_CHECK` particles, at evenly spaced ranks of their radius and
        the :data:`N_OUTER` outermost, level by level (every level at every
        checked particle: particles jump levels); a level's expansion is used
        when the mean absolute error there is at most ``expansion_tol`` and the
        largest at most :data:`MAX_ERROR_FACTOR` times that. When only the
        cloud's edge fails, it is used inside the largest checked radius below
        the first failure (``inner[g]``) and points beyond are scored exactly;
        when every check passes, ``inner[g]`` is the outermost particle's
        radius, so nothing the checks did not reach is expanded.
        Otherwise (the cloud still wide, or the level's options spread wide) that level's
        oldest sets alone are expanded, as many as the errors suggest (they
        grow about in proportion), and checked again, at most three times; the
        newer sets stay exact; below :data:`MIN_EXPANDED` sets the level is
        exact. Deterministic: no random numbers are drawn.
        """
        provider = MOVE_LIKELIHOODS[self.config.move_likelihood]
        return provider.target(self, theta, beta, level)

    def _move(self, rng, extra: Optional[ChoiceRecord], phi: float, ll_extra):
        """Metropolis-Hastings moves on equally weighted particles.

        Target: prior x all stored likelihoods (x the likelihood of ``extra``
        raised to ``phi`` while tempering). Proposals: the registered moves
        (:data:`MOVES`, in that order) of the coordinates the posterior has:
        ``theta' = normalise(theta + s eps)``, eps ~ N(0, I), whose density
        depends only on theta.theta', hence symmetric; ``s`` follows the
        cloud's angular spread times a factor tuned toward 15-40 % acceptance;
        log beta moves by a Gaussian step proportional to its spread; the
        spread level moves to a neighbour with probability 0.3 (rejected
        outside the range).
        Rounds run until ``diversity_target`` of the particles have moved at
        least once (at least ``n_moves``, at most ``max_move_rounds``); while
        tempering (``extra`` given) exactly ``tempering_move_rounds`` rounds.
        The stored sets' likelihood is :meth:`move_target`'s, fixed for the
        whole call; where it scores some points exactly, proposals are first
        screened with each level's expansion of all its sets and the exact
        value is computed only for those the screen accepts (delayed
        acceptance, Christen & Fox 2005: a second test corrects by the
        difference, so the invariant distribution is unchanged). Returns
        ``(posterior, ll_extra, acceptance, rounds, moved_fraction)``.
        """
        cfg = self.config
        log_lik = self.log_lik
        n = self.n_particles
        if (cfg.max_move_rounds == 0 or (not self.records and extra is None)
                or (extra is not None and cfg.tempering_move_rounds == 0)):
            return self, ll_extra, float('nan'), 0, 0.0
        moves = [m for m in MOVES.values() if getattr(self, m.coordinate) is not None]
        state = {m.coordinate: getattr(self, m.coordinate) for m in moves}
        target = self.move_target(self.theta, self.beta, self.level)
        if target.approximate or self.log_lik_approximate:
            log_lik = target(self.theta, self.beta, self.level)
        screened = target.screened
        if screened:
            screen_now, _ = target.screen(self.theta, self.beta, self.level)
            if extra is not None:       # the demonstration being weighed in, screened too
                less = cfg.choice_model.uses_similarity
                extra_screen = [SubsetScreen([extra], g, less) for g in range(cfg.n_levels)]
                screen_now = screen_now + phi * _by_level(extra_screen, self.theta, self.beta,
                                                          self.level)
        consts = [m.setup(self) for m in moves]
        base = 2.38 / math.sqrt(max(sum(m.dims(self) for m in moves), 1))
        factor = float(self.step_size)
        lp = self.log_prior(self.theta, self.log_beta, self.level)
        moved = np.zeros(n, dtype=bool)
        rates = []
        # between tempering steps (``extra`` given) a fixed number of rounds: publication
        # waits for them; the moves after the last step run to the diversity target
        limit = cfg.tempering_move_rounds if extra is not None else cfg.max_move_rounds
        for rnd in range(limit):
            if rnd >= cfg.n_moves and moved.mean() >= cfg.diversity_target:
                break
            scale = factor * base
            prop = {m.coordinate: m.propose(state[m.coordinate], scale, c, rng)
                    for m, c in zip(moves, consts)}
            prop_lb, prop_lv = prop.get('log_beta'), prop.get('level')
            lp_new = self.log_prior(prop['theta'], prop_lb, prop_lv)
            beta_new = self.beta if prop_lb is None else np.exp(prop_lb)
            ok = np.isfinite(lp_new)
            lv_eval = None if prop_lv is None else np.clip(prop_lv, 0, cfg.n_levels - 1)
            if screened:
                # delayed acceptance (Christen & Fox 2005): the screen decides first; the
                # target is evaluated only where it differs from the screen and the screen
                # accepted, and a second test corrects by the difference, so the chain
                # still leaves prior x exp(target) x (extra's likelihood)^phi invariant
                ll_new, differs = target.screen(prop['theta'], beta_new, lv_eval)
                s_new = ll_new.copy()
                if extra is not None:
                    s_new += phi * _by_level(extra_screen, prop['theta'], beta_new, lv_eval)
                log_a = np.where(ok, (lp_new + s_new) - (lp + screen_now), -np.inf)
                accept = np.log(rng.random(n)) < log_a
                second = np.log(rng.random(n))
                acc = np.flatnonzero(accept)
                rows = acc[differs[acc]]
                if rows.size:
                    ll_new[rows] = target(prop['theta'][rows], beta_new[rows],
                                          _rows(lv_eval, rows))
                exact_new, exact_now = ll_new[acc], log_lik[acc]
                if extra is not None:
                    ex = ll_extra.copy()
                    ex[acc] = self.record_loglik(extra, prop['theta'][acc], beta_new[acc],
                                                 _rows(lv_eval, acc))
                    exact_new = exact_new + phi * ex[acc]
                    exact_now = exact_now + phi * ll_extra[acc]
                accept[acc] = second[acc] < ((exact_new - s_new[acc])
                                             - (exact_now - screen_now[acc]))
                screen_now = np.where(accept, s_new, screen_now)
            else:
                cur_extra = 0.0
                new_extra = 0.0
                if extra is not None:
                    ex = self.record_loglik(extra, prop['theta'], beta_new, lv_eval)
                    new_extra = phi * ex
                    cur_extra = phi * ll_extra
                ll_new = target(prop['theta'], beta_new, lv_eval)
                log_a = np.where(ok, (lp_new + ll_new + new_extra)
                                 - (lp + log_lik + cur_extra), -np.inf)
                accept = np.log(rng.random(n)) < log_a
            for key, value in prop.items():
                state[key] = np.where(accept.reshape((n,) + (1,) * (value.ndim - 1)), value,
                                      state[key])
            log_lik = np.where(accept, ll_new, log_lik)
            lp = np.where(accept, lp_new, lp)
            if extra is not None:
                ll_extra = np.where(accept, ex, ll_extra)
            rate = float(accept.mean())
            rates.append(rate)
            moved |= accept
            if rate < 0.15:
                factor *= 0.6
            elif rate > 0.4:
                factor = min(factor * 1.5, 10.0)
        new = replace(self, **state, log_lik=log_lik, step_size=factor,
                      log_lik_approximate=target.approximate,
                      likelihood_error=target.error if target.approximate else float('nan'))
        acc = float(np.mean(rates)) if rates else float('nan')
        return new, ll_extra, acc, len(rates), float(moved.mean())

    # ------------------------------------------------------------ summaries
    def mean_direction(self) -> np.ndarray:
        m = self.weights @ self.theta
        nrm = np.linalg.norm(m)
        return m / nrm if nrm > 0 else m

    def summary(self) -> Summary:
        w = self.weights
        th = self.theta
        m = w @ th
        r_len = float(np.linalg.norm(m))
        mean = m / r_len if r_len > 0 else m
        lp = self.log_prior(th, self.log_beta, self.level) + self.log_lik
        map_ = th[int(np.argmax(lp))].copy()
        xc = th - m
        cov = (xc * w[:, None]).T @ xc
        std = np.sqrt(np.maximum(np.diag(cov), 0.0))
        lo = np.empty(self.d)
        hi = np.empty(self.d)
        for j in range(self.d):
            lo[j], hi[j] = weighted_quantile(th[:, j], w, [0.05, 0.95])
        b = self.beta
        low_mass = 0.0
        if self.log_beta is not None:
            bl, bh = weighted_quantile(b, w, [0.05, 0.95])
            bci = (float(bl), float(bh))
            bmean = float(w @ b)
            a, z = np.log(self.config.beta_range)
            low_mass = float(w @ (self.log_beta < a + 0.1 * (z - a)))
        else:
            bci = (self.config.beta, self.config.beta)
            bmean = self.config.beta
        counts = np.bincount(self.levels, weights=w, minlength=self.config.n_levels)
        levels = tuple(float(v) for v in counts)
        return Summary(mean, map_, cov, std, lo, hi, self.distinct_ess(), r_len,
                       len(self.records),
                       bmean, bci, levels, low_mass, float(self.acceptance),
                       self.log_beta is not None)

    # ------------------------------------------------------------ persistence
    def to_arrays(self) -> Tuple[dict, dict]:
        """Arrays (for npz) and a JSON-able manifest describing them."""
        recs = self.records
        k = [r.features.shape[0] for r in recs]
        arrays = {
            'theta': self.theta, 'log_weights': self.log_weights, 'log_lik': self.log_lik,
            'record_sizes': np.asarray(k, dtype=np.int64),
            'record_chosen': np.asarray([r.chosen for r in recs], dtype=np.int64),
            'record_features': (np.concatenate([r.features for r in recs])
                                if recs else np.zeros((0, self.d))),
            'record_groups': (np.concatenate([r.groups for r in recs])
                              if recs else np.zeros(0, dtype=np.int64)),
            'record_log_density': np.asarray([r.log_density for r in recs]).reshape(
                len(recs), self.config.n_levels),
        }
        if self.log_beta is not None:
            arrays['log_beta'] = self.log_beta
        if self.level is not None:
            arrays['level'] = self.level
        if recs and all(r.log_sim is not None for r in recs):
            arrays['record_log_sim'] = np.concatenate([r.log_sim for r in recs])
            arrays['record_log_sim_chosen'] = np.asarray([r.log_sim_chosen for r in recs])
        if recs and all(r.pooled for r in recs):      # (rows, L): the records' rows stacked
            arrays['record_pool_log_weight'] = np.concatenate([r.pool_log_weight.T
                                                               for r in recs])
            if all(r.pool_log_sim is not None for r in recs):
                arrays['record_pool_log_sim'] = np.concatenate([r.pool_log_sim.T
                                                                for r in recs])
        cfg = asdict(self.config)
        manifest = {'schema_version': SCHEMA_VERSION, 'kind': 'pref_learner.posterior',
                    'config': cfg, 'step_size': self.step_size,
                    'acceptance': None if math.isnan(self.acceptance) else self.acceptance,
                    'moves_pending': self.moves_pending,
                    'log_lik_approximate': self.log_lik_approximate,
                    'n_particles': self.n_particles, 'd': self.d,
                    'n_demonstrations': len(recs)}
        return arrays, manifest

    def save(self, path) -> None:
        """Write ``path`` (.npz) and ``path`` with .json beside it."""
        from .store import atomic_write_bytes, npz_bytes
        path = Path(path)
        arrays, manifest = self.to_arrays()
        atomic_write_bytes(path.with_suffix('.npz'), npz_bytes(arrays))
        atomic_write_bytes(path.with_suffix('.json'),
                           json.dumps(manifest, indent=1).encode())

    @classmethod
    def from_arrays(cls, arrays: dict, manifest: dict) -> 'ParticlePosterior':
        if manifest.get('schema_version') != SCHEMA_VERSION:
            raise ValueError(f'posterior schema version {manifest.get("schema_version")!r} '
                             f'is not supported (expected {SCHEMA_VERSION})')
        cfg = dict(manifest['config'])
        for key in ('beta_range', 'prior_mean'):
            if cfg.get(key) is not None:
                cfg[key] = tuple(cfg[key])
        config = PosteriorConfig(**cfg)
        L = config.n_levels
        sizes = arrays['record_sizes']
        offs = np.concatenate([[0], np.cumsum(sizes)])
        feats = arrays['record_features']
        groups = arrays['record_groups']
        dens = arrays['record_log_density']
        ls = arrays.get('record_log_sim')
        lsc = arrays.get('record_log_sim_chosen')
        plw = arrays.get('record_pool_log_weight')
        pls = arrays.get('record_pool_log_sim')
        recs = []
        for i, c in enumerate(arrays['record_chosen']):
            a, b = offs[i], offs[i + 1]
            recs.append(ChoiceRecord(np.array(feats[a:b]), int(c), np.array(groups[a:b]), L,
                                     None if ls is None else np.array(ls[a:b]),
                                     None if lsc is None else np.array(lsc[i]),
                                     np.array(dens[i]),
                                     None if plw is None else np.array(plw[a:b].T),
                                     None if pls is None else np.array(pls[a:b].T)))
        acc = manifest.get('acceptance')
        post = cls(config, np.array(arrays['theta']), np.array(arrays['log_weights']),
                   np.array(arrays['log_lik']),
                   np.array(arrays['log_beta']) if 'log_beta' in arrays else None,
                   tuple(recs), float(manifest.get('step_size', 1.0)),
                   bool(manifest.get('moves_pending', False)),
                   np.array(arrays['level']) if 'level' in arrays else None,
                   float('nan') if acc is None else float(acc),
                   bool(manifest.get('log_lik_approximate', False)))
        if post.theta.shape != (manifest['n_particles'], manifest['d']):
            raise ValueError('posterior arrays do not match their manifest')
        return post

    @classmethod
    def load(cls, path) -> 'ParticlePosterior':
        path = Path(path)
        manifest = json.loads(path.with_suffix('.json').read_text())
        with np.load(path.with_suffix('.npz'), allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
        return cls.from_arrays(arrays, manifest)
