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
re-evaluated without kinematics.

The object is immutable: ``update`` returns a new posterior and an
:class:`UpdateInfo`; a rejected update raises ``ValueError`` and leaves the
original untouched. Randomness comes only from the ``numpy.random.Generator``
passed in.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import NamedTuple, Optional, Sequence, Tuple

import numpy as np
from scipy.special import logsumexp
from scipy.stats import vonmises_fisher

from . import choice

SCHEMA_VERSION = 2


def _logsumexp_rows(r: np.ndarray) -> np.ndarray:
    """Row-wise logsumexp of an (N, K) matrix, overwriting it (saves a copy)."""
    m = r.max(axis=1)
    r -= m[:, None]
    np.exp(r, out=r)
    return np.log(r.sum(axis=1)) + m


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
    log_density : (L,) log density of the demonstration's features under each level's
        alternatives (:func:`log_option_density`). It makes levels comparable: with it the
        likelihood is that of the demonstration's features, not only of the
        choice among a given set (0 with one level, where it is a constant).
    """

    features: np.ndarray
    chosen: int
    groups: np.ndarray
    n_levels: int = 1
    log_sim: Optional[np.ndarray] = None
    log_sim_chosen: Optional[np.ndarray] = None
    log_density: Optional[np.ndarray] = None

    @classmethod
    def build(cls, features, chosen, bandwidth='scott', with_similarity=True, groups=None,
              n_levels: Optional[int] = None, density: str = 'gaussian'):
        x = choice._check_matrix(features)
        c = choice._check_chosen(chosen, x.shape[0])
        k = x.shape[0]
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
        for lev in range(L):
            cols = np.concatenate([[c], np.flatnonzero(g == lev)])
            if with_similarity:
                s = choice.log_similarity_sums(x[cols], bandwidth)
                ls[cols[1:]] = s[1:]
                lsc[lev] = s[0]
            if L > 1:
                dens[lev] = log_option_density(x[cols[1:]], x[c], density)
        return cls(x, c, g, L, ls, lsc, dens)

    def columns(self, level: int) -> np.ndarray:
        """Row indices compared at ``level``: the chosen row first, then that level's."""
        return np.concatenate([[self.chosen], np.flatnonzero(self.groups == level)])


@dataclass(frozen=True)
class PosteriorConfig:
    """Hyperparameters of the particle posterior (stored unchanged).

    ``beta_range`` (low, high): infer the rationality with a log-uniform prior
    on it; ``None`` keeps ``beta`` fixed. ``n_levels``: number of option-spread
    levels (uniform prior over them) carried as a discrete coordinate.
    Tempering keeps the effective sample size at least ``ess_target`` x N in
    every step; after each resampling the moves run at least ``n_moves``
    rounds and until ``diversity_target`` of the particles have moved (at
    most ``max_move_rounds``).
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

    def __post_init__(self):
        if not isinstance(self.n_particles, (int, np.integer)) or self.n_particles < 1:
            raise ValueError(f'n_particles must be an integer >= 1, got {self.n_particles!r}')
        choice.get_model(self.model)
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
        if self.option_density not in ('gaussian', 'kde'):
            raise ValueError(f'option_density {self.option_density!r} is unknown; allowed: '
                             'gaussian, kde')
        if not isinstance(self.n_levels, (int, np.integer)) or self.n_levels < 1:
            raise ValueError(f'n_levels must be an integer >= 1, got {self.n_levels!r}')
        if isinstance(self.bandwidth, str):
            choice.resolve_bandwidth(self.bandwidth, 2, 1)
        else:
            choice.resolve_bandwidth(float(self.bandwidth), 2, 1)

    @property
    def infer_beta(self) -> bool:
        return self.beta_range is not None


class UpdateInfo(NamedTuple):
    """What one update did (acceptance: mean Metropolis-Hastings acceptance of its moves)."""

    ess: float
    ess_before_resampling: float
    resampled: bool
    acceptance: float
    n_demonstrations: int
    tempering_steps: int = 1
    move_rounds: int = 0
    moved_fraction: float = float('nan')


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
    """Immutable particle approximation of p(theta[, beta][, level] | demonstrations)."""

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
        return ess_from_log_weights(self.log_weights)

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
        ``beta theta.phi`` (minus the LESS log-similarity), the one place the
        models' utilities are formed.
        """
        x = record.features
        lev = np.zeros(theta.shape[0], dtype=np.int64) if level is None else level
        for g in range(record.n_levels):
            sel = np.flatnonzero(lev == g)
            if sel.size == 0:
                continue
            if sel.size == theta.shape[0]:
                sel = slice(None)
            cols = record.columns(g)
            r = theta[sel] @ x[cols].T
            r *= beta[sel, None]
            if self.config.model == 'less':
                ls = record.log_sim[cols]
                ls[0] = record.log_sim_chosen[g]
                r -= ls[None, :]
            yield g, sel, cols, r

    def record_loglik(self, record: ChoiceRecord, theta: np.ndarray, beta: np.ndarray,
                      level: Optional[np.ndarray] = None,
                      with_density: bool = True) -> np.ndarray:
        """Log-likelihood of one stored demonstration for particles ``theta (N, d)``.

        ``level (N,)``: each particle's spread level (all 0 when ``None``).
        ``with_density=False`` gives the choice probability alone (the
        demonstration given its set).
        """
        out = np.full(theta.shape[0], -np.inf)
        for g, sel, _, r in self._level_utilities(record, theta, beta, level):
            chosen = r[:, 0].copy()
            out[sel] = chosen - _logsumexp_rows(r) + (record.log_density[g] if with_density
                                                      else 0.0)
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
            r -= r.max(axis=1, keepdims=True)
            np.exp(r, out=r)
            r /= r.sum(axis=1, keepdims=True)
            out[cols] += w[sel] @ r
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
    def prepare(self, features, chosen, groups=None) -> ChoiceRecord:
        """Validate one choice set and precompute what this model needs.

        ``groups (K,)``: the spread level of each alternative (needed with
        more than one level).
        """
        x = choice._check_matrix(features)
        if x.shape[1] != self.d:
            raise ValueError(f'features have d = {x.shape[1]} columns but the posterior has '
                             f'd = {self.d}')
        if groups is None and self.config.n_levels > 1:
            raise ValueError(f'the posterior has {self.config.n_levels} spread levels; give '
                             'the spread level (groups) of every alternative')
        return ChoiceRecord.build(x, chosen, self.config.bandwidth,
                                  with_similarity=self.config.model == 'less', groups=groups,
                                  n_levels=self.config.n_levels,
                                  density=self.config.option_density)

    def update(self, record, rng: np.random.Generator, move: bool = True):
        """Add one demonstration by adaptive tempering; returns ``(new_posterior, UpdateInfo)``.

        ``record`` is a :class:`ChoiceRecord`, a ``(features (K, d), chosen)``
        pair or a ``(features, chosen, groups)`` triple. The new likelihood
        enters in steps ``0 < phi_1 < ... < 1`` chosen by bisection so the ESS
        stays at least ``ess_target`` x N in each (Del Moral, Doucet & Jasra
        2006); between steps the particles are resampled and moved under the
        tempered target. With ``move=False`` the moves after the last step are
        left pending (``moves_pending``) so that the caller can publish the
        estimate first and run :meth:`rejuvenate` next.
        """
        if not isinstance(record, ChoiceRecord):
            record = self.prepare(*record)
        elif record.features.shape[1] != self.d:
            raise ValueError(f'record has d = {record.features.shape[1]}, posterior d = {self.d}')
        elif record.n_levels != self.config.n_levels:
            raise ValueError(f'record has {record.n_levels} spread levels, the posterior '
                             f'{self.config.n_levels}')
        elif self.config.model == 'less' and record.log_sim is None:
            record = ChoiceRecord.build(record.features, record.chosen, self.config.bandwidth,
                                        True, record.groups, record.n_levels,
                                        self.config.option_density)
        ll = self.record_loglik(record, self.theta, self.beta, self.level)
        if not np.all(np.isfinite(ll)):
            raise ValueError('the demonstration has a non-finite log-likelihood for some '
                             'particles; features are out of range')
        n = self.n_particles
        cur = self
        phi, steps, rounds = 0.0, 0, 0
        accs, moved = [], float('nan')
        ess0 = float('nan')
        resampled = False
        while phi < 1.0 and steps < 200:
            delta = _next_temperature(cur.log_weights, ll, 1.0 - phi,
                                      self.config.ess_target * n)
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
                    rounds += r_
        new = replace(cur, log_lik=cur.log_lik + ll, records=self.records + (record,),
                      moves_pending=False)
        if resampled:
            if move:
                new, _, acc, r_, moved = new._move(rng, None, 0.0, None)
                accs.append(acc)
                rounds += r_
            else:
                new = replace(new, moves_pending=True)
        acc = float(np.mean(accs)) if accs else float('nan')
        if accs:
            new = replace(new, acceptance=acc)
        info = UpdateInfo(new.ess, ess0, resampled, acc, len(new.records), steps, rounds,
                          moved)
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

    def _move(self, rng, extra: Optional[ChoiceRecord], phi: float, ll_extra):
        """Metropolis-Hastings moves on equally weighted particles.

        Target: prior x all stored likelihoods (x the likelihood of ``extra``
        raised to ``phi`` while tempering). Proposal: ``theta' =
        normalise(theta + s eps)``, eps ~ N(0, I), whose density depends only
        on theta.theta', hence symmetric; ``s`` follows the cloud's angular
        spread times a factor tuned toward 15-40 % acceptance; log beta moves
        by a Gaussian step proportional to its spread; the spread level moves
        to a neighbour with probability 0.3 (rejected outside the range).
        Rounds run until ``diversity_target`` of the particles have moved at
        least once (at least ``n_moves``, at most ``max_move_rounds``).
        Returns ``(posterior, ll_extra, acceptance, rounds, moved_fraction)``.
        """
        cfg = self.config
        theta, log_beta, level, log_lik = self.theta, self.log_beta, self.level, self.log_lik
        n, d = theta.shape
        if cfg.max_move_rounds == 0 or (not self.records and extra is None):
            return self, ll_extra, float('nan'), 0, 0.0
        r_len = float(np.linalg.norm(theta.mean(axis=0)))
        spread = math.sqrt(max(2.0 * (1.0 - min(r_len, 1.0)) / max(d - 1, 1), 1e-10))
        base = 2.38 / math.sqrt(max(d - 1 + (log_beta is not None), 1))
        factor = float(self.step_size)
        sd_lb = float(np.std(log_beta)) if log_beta is not None else 0.0
        lp = self.log_prior(theta, log_beta, level)
        moved = np.zeros(n, dtype=bool)
        rates = []
        for rnd in range(cfg.max_move_rounds):
            if rnd >= cfg.n_moves and moved.mean() >= cfg.diversity_target:
                break
            step = float(np.clip(factor * base * spread, 1e-5, 1.5))
            prop = theta + step * rng.standard_normal((n, d))
            prop /= np.linalg.norm(prop, axis=1, keepdims=True)
            prop_lb = None
            if log_beta is not None:
                prop_lb = log_beta + factor * base * max(sd_lb, 0.02) * rng.standard_normal(n)
            prop_lv = None
            if level is not None:
                jump = np.where(rng.random(n) < 0.3, rng.choice([-1, 1], n), 0)
                prop_lv = level + jump
            lp_new = self.log_prior(prop, prop_lb, prop_lv)
            beta_new = self.beta if prop_lb is None else np.exp(prop_lb)
            ok = np.isfinite(lp_new)
            lv_eval = None if prop_lv is None else np.clip(prop_lv, 0, cfg.n_levels - 1)
            ll_new = self.total_loglik(prop, beta_new, lv_eval)
            cur_extra = 0.0
            new_extra = 0.0
            if extra is not None:
                ex = self.record_loglik(extra, prop, beta_new, lv_eval)
                new_extra = phi * ex
                cur_extra = phi * ll_extra
            log_a = np.where(ok, (lp_new + ll_new + new_extra) - (lp + log_lik + cur_extra),
                             -np.inf)
            accept = np.log(rng.random(n)) < log_a
            theta = np.where(accept[:, None], prop, theta)
            log_lik = np.where(accept, ll_new, log_lik)
            lp = np.where(accept, lp_new, lp)
            if extra is not None:
                ll_extra = np.where(accept, ex, ll_extra)
            if log_beta is not None:
                log_beta = np.where(accept, prop_lb, log_beta)
            if level is not None:
                level = np.where(accept, prop_lv, level)
            rate = float(accept.mean())
            rates.append(rate)
            moved |= accept
            if rate < 0.15:
                factor *= 0.6
            elif rate > 0.4:
                factor = min(factor * 1.5, 10.0)
        new = replace(self, theta=theta, log_beta=log_beta, level=level, log_lik=log_lik,
                      step_size=factor)
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
        return Summary(mean, map_, cov, std, lo, hi, self.ess, r_len, len(self.records),
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
        cfg = asdict(self.config)
        manifest = {'schema_version': SCHEMA_VERSION, 'kind': 'pref_learner.posterior',
                    'config': cfg, 'step_size': self.step_size,
                    'acceptance': None if math.isnan(self.acceptance) else self.acceptance,
                    'moves_pending': self.moves_pending,
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
        recs = []
        for i, c in enumerate(arrays['record_chosen']):
            a, b = offs[i], offs[i + 1]
            recs.append(ChoiceRecord(np.array(feats[a:b]), int(c), np.array(groups[a:b]), L,
                                     None if ls is None else np.array(ls[a:b]),
                                     None if lsc is None else np.array(lsc[i]),
                                     np.array(dens[i])))
        acc = manifest.get('acceptance')
        post = cls(config, np.array(arrays['theta']), np.array(arrays['log_weights']),
                   np.array(arrays['log_lik']),
                   np.array(arrays['log_beta']) if 'log_beta' in arrays else None,
                   tuple(recs), float(manifest.get('step_size', 1.0)),
                   bool(manifest.get('moves_pending', False)),
                   np.array(arrays['level']) if 'level' in arrays else None,
                   float('nan') if acc is None else float(acc))
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
