# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Particle posterior over reward weights on the unit sphere.

The state is N weighted particles ``theta : (N, d)`` on S^{d-1}, optionally
with a rationality coordinate ``log_beta : (N,)``, their log-weights
``log_weights : (N,)`` (normalised, log scale) and the per-particle sum of
log-likelihoods of every demonstration so far ``log_lik : (N,)``.

One update (:meth:`ParticlePosterior.update`) adds one demonstration:

1. reweight: ``log_weights += log P(D | theta, beta)`` under the chosen model;
2. when the effective sample size ``ESS = 1 / sum w_i^2`` falls below
   ``ess_min_ratio * N``: systematic resampling (:func:`systematic_resample`),
   then Metropolis-Hastings moves on the sphere (:func:`_rejuvenate`) whose
   target is the posterior given *all* stored demonstrations (each choice set
   is kept, a few kB, so the full likelihood is re-evaluated without
   kinematics).

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
from scipy.stats import vonmises_fisher

from . import choice

SCHEMA_VERSION = 1


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


@dataclass(frozen=True)
class ChoiceRecord:
    """One demonstration as the posterior needs it.

    features : (K, d) scaled features of the demonstration and its alternatives.
    chosen : row index of the demonstration.
    log_sim : (K,) LESS log-similarity sums of the set (``None`` until needed).
    """

    features: np.ndarray
    chosen: int
    log_sim: Optional[np.ndarray] = None

    @classmethod
    def build(cls, features, chosen, bandwidth='scott', with_similarity=True):
        x = choice._check_matrix(features)
        c = choice._check_chosen(chosen, x.shape[0])
        ls = choice.log_similarity_sums(x, bandwidth) if with_similarity else None
        return cls(x, c, ls)


@dataclass(frozen=True)
class PosteriorConfig:
    """Hyperparameters of the particle posterior (stored unchanged)."""

    n_particles: int = 4000
    model: str = 'less'
    beta: float = 5.0
    beta_range: Optional[Tuple[float, float]] = None
    prior: str = 'uniform'
    prior_mean: Optional[Tuple[float, ...]] = None
    prior_kappa: float = 1.0
    ess_min_ratio: float = 0.5
    n_moves: int = 3
    bandwidth: object = 'scott'

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
        if self.n_moves < 0:
            raise ValueError(f'n_moves must be >= 0, got {self.n_moves!r}')
        if isinstance(self.bandwidth, str):
            choice.resolve_bandwidth(self.bandwidth, 2, 1)
        else:
            choice.resolve_bandwidth(float(self.bandwidth), 2, 1)

    @property
    def infer_beta(self) -> bool:
        return self.beta_range is not None


class UpdateInfo(NamedTuple):
    """What one update did."""

    ess: float
    ess_before_resampling: float
    resampled: bool
    acceptance: float
    n_demonstrations: int


@dataclass(frozen=True)
class Summary:
    """Summary of a posterior; vectors are in feature order."""

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

    def to_dict(self) -> dict:
        out = {}
        for k, v in asdict(self).items():
            out[k] = v.tolist() if isinstance(v, np.ndarray) else v
        out['beta_ci'] = list(self.beta_ci)
        return out


def weighted_quantile(x: np.ndarray, w: np.ndarray, q: Sequence[float]) -> np.ndarray:
    """Quantiles of samples x (N,) with normalised weights w (N,) (inverse of the CDF)."""
    order = np.argsort(x)
    cdf = np.cumsum(w[order])
    idx = np.searchsorted(cdf, np.asarray(q) * cdf[-1], side='left')
    return x[order][np.minimum(idx, x.shape[0] - 1)]


@dataclass(frozen=True)
class ParticlePosterior:
    """Immutable particle approximation of p(theta[, beta] | demonstrations)."""

    config: PosteriorConfig
    theta: np.ndarray
    log_weights: np.ndarray
    log_lik: np.ndarray
    log_beta: Optional[np.ndarray] = None
    records: Tuple[ChoiceRecord, ...] = field(default_factory=tuple)
    step_size: float = 0.5
    moves_pending: bool = False

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
        lw = np.full(n, -np.log(n))
        return cls(config, theta, lw, np.zeros(n), log_beta, ())

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
    def ess(self) -> float:
        return ess_from_log_weights(self.log_weights)

    def log_prior(self, theta: np.ndarray, log_beta: Optional[np.ndarray]) -> np.ndarray:
        """Unnormalised log prior density on the sphere (and log beta), ``(N,)``."""
        lp = np.zeros(theta.shape[0])
        if self.config.prior == 'vmf':
            mu = np.asarray(self.config.prior_mean, dtype=np.float64)
            lp = lp + self.config.prior_kappa * theta @ (mu / np.linalg.norm(mu))
        if log_beta is not None:
            lo, hi = np.log(self.config.beta_range)
            lp = np.where((log_beta >= lo) & (log_beta <= hi), lp, -np.inf)
        return lp

    def record_loglik(self, record: ChoiceRecord, theta: np.ndarray,
                      beta: np.ndarray) -> np.ndarray:
        """Log-likelihood of one stored demonstration for particles ``theta (N, d)``."""
        x = record.features
        r = theta @ x.T
        r *= beta[:, None]
        if self.config.model == 'less':
            r -= record.log_sim[None, :]
        chosen = r[:, record.chosen].copy()
        return chosen - _logsumexp_rows(r)

    def total_loglik(self, theta: np.ndarray, beta: np.ndarray) -> np.ndarray:
        """Sum of log-likelihoods of every stored demonstration, ``(N,)``."""
        out = np.zeros(theta.shape[0])
        for rec in self.records:
            out += self.record_loglik(rec, theta, beta)
        return out

    # ------------------------------------------------------------ update
    def prepare(self, features, chosen) -> ChoiceRecord:
        """Validate one choice set and precompute what this model needs."""
        x = choice._check_matrix(features)
        if x.shape[1] != self.d:
            raise ValueError(f'features have d = {x.shape[1]} columns but the posterior has '
                             f'd = {self.d}')
        return ChoiceRecord.build(x, chosen, self.config.bandwidth,
                                  with_similarity=self.config.model == 'less')

    def update(self, record, rng: np.random.Generator, move: bool = True):
        """Add one demonstration; returns ``(new_posterior, UpdateInfo)``.

        ``record`` is a :class:`ChoiceRecord` or a ``(features (K, d), chosen)`` pair.
        With ``move=False`` the Metropolis-Hastings moves that follow a
        resampling are left pending (``moves_pending``) so that the caller can
        publish the reweighted estimate first and run :meth:`rejuvenate` next.
        """
        if not isinstance(record, ChoiceRecord):
            features, chosen = record
            record = self.prepare(features, chosen)
        elif record.features.shape[1] != self.d:
            raise ValueError(f'record has d = {record.features.shape[1]}, posterior d = {self.d}')
        elif self.config.model == 'less' and record.log_sim is None:
            record = replace(record, log_sim=choice.log_similarity_sums(
                record.features, self.config.bandwidth))
        ll = self.record_loglik(record, self.theta, self.beta)
        if not np.all(np.isfinite(ll)):
            raise ValueError('the demonstration has a non-finite log-likelihood for some '
                             'particles; features are out of range')
        log_w = log_normalise(self.log_weights + ll)
        new = replace(self, log_weights=log_w, log_lik=self.log_lik + ll,
                      records=self.records + (record,))
        ess0 = ess_from_log_weights(log_w)
        n = self.n_particles
        resampled = False
        acc = float('nan')
        if ess0 < self.config.ess_min_ratio * n:
            new = new._resample(rng)
            resampled = True
            if move:
                new, acc = new._rejuvenate(rng)
            else:
                new = replace(new, moves_pending=True)
        info = UpdateInfo(new.ess, ess0, resampled, acc, len(new.records))
        return new, info

    def rejuvenate(self, rng: np.random.Generator) -> Tuple['ParticlePosterior', float]:
        """Run the moves left pending by ``update(move=False)``; (posterior, acceptance)."""
        if not self.moves_pending:
            return self, float('nan')
        new, acc = self._rejuvenate(rng)
        return replace(new, moves_pending=False), acc

    def _resample(self, rng):
        idx = systematic_resample(self.log_weights, rng)
        n = self.n_particles
        return replace(self, theta=self.theta[idx], log_lik=self.log_lik[idx],
                       log_beta=None if self.log_beta is None else self.log_beta[idx],
                       log_weights=np.full(n, -np.log(n)))

    def _rejuvenate(self, rng) -> Tuple['ParticlePosterior', float]:
        """Metropolis-Hastings moves targeting prior x all stored likelihoods.

        Proposal: ``theta' = normalise(theta + s * eps)``, eps ~ N(0, I), whose
        density depends only on theta.theta', hence symmetric; log beta moves
        by a Gaussian random walk (uniform prior on log beta, reflected by
        rejection outside the range). The step shrinks or grows with the
        acceptance rate.
        """
        theta, log_beta, log_lik = self.theta, self.log_beta, self.log_lik
        n, d = theta.shape
        w = self.weights
        r_len = float(np.linalg.norm(w @ theta))
        spread = math.sqrt(max(2.0 * (1.0 - min(r_len, 1.0)) / max(d - 1, 1), 1e-8))
        step = float(np.clip(spread * 1.0, 1e-4, 1.0))
        lp = self.log_prior(theta, log_beta)
        acc_total = 0.0
        for _ in range(self.config.n_moves):
            prop = theta + step * rng.standard_normal((n, d))
            prop /= np.linalg.norm(prop, axis=1, keepdims=True)
            prop_lb = None
            if log_beta is not None:
                prop_lb = log_beta + 0.2 * rng.standard_normal(n)
            lp_new = self.log_prior(prop, prop_lb)
            beta_new = self.beta if prop_lb is None else np.exp(prop_lb)
            ll_new = self.total_loglik(prop, beta_new)
            log_a = (lp_new + ll_new) - (lp + log_lik)
            accept = np.log(rng.random(n)) < log_a
            theta = np.where(accept[:, None], prop, theta)
            log_lik = np.where(accept, ll_new, log_lik)
            lp = np.where(accept, lp_new, lp)
            if log_beta is not None:
                log_beta = np.where(accept, prop_lb, log_beta)
            rate = float(accept.mean())
            acc_total += rate
            if rate < 0.15:
                step *= 0.5
            elif rate > 0.5:
                step = min(step * 1.5, 1.0)
        acc = acc_total / max(self.config.n_moves, 1)
        return replace(self, theta=theta, log_beta=log_beta, log_lik=log_lik,
                       step_size=step), acc

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
        lp = self.log_prior(th, self.log_beta) + self.log_lik
        map_ = th[int(np.argmax(lp))].copy()
        xc = th - m
        cov = (xc * w[:, None]).T @ xc
        std = np.sqrt(np.maximum(np.diag(cov), 0.0))
        lo = np.empty(self.d)
        hi = np.empty(self.d)
        for j in range(self.d):
            lo[j], hi[j] = weighted_quantile(th[:, j], w, [0.05, 0.95])
        b = self.beta
        if self.log_beta is not None:
            bl, bh = weighted_quantile(b, w, [0.05, 0.95])
            bci = (float(bl), float(bh))
            bmean = float(w @ b)
        else:
            bci = (self.config.beta, self.config.beta)
            bmean = self.config.beta
        return Summary(mean, map_, cov, std, lo, hi, self.ess, r_len, len(self.records),
                       bmean, bci)

    # ------------------------------------------------------------ persistence
    def to_arrays(self) -> Tuple[dict, dict]:
        """Arrays (for npz) and a JSON-able manifest describing them."""
        k = [r.features.shape[0] for r in self.records]
        arrays = {
            'theta': self.theta, 'log_weights': self.log_weights, 'log_lik': self.log_lik,
            'record_sizes': np.asarray(k, dtype=np.int64),
            'record_chosen': np.asarray([r.chosen for r in self.records], dtype=np.int64),
            'record_features': (np.concatenate([r.features for r in self.records])
                                if self.records else np.zeros((0, self.d))),
        }
        if self.log_beta is not None:
            arrays['log_beta'] = self.log_beta
        if self.records and all(r.log_sim is not None for r in self.records):
            arrays['record_log_sim'] = np.concatenate([r.log_sim for r in self.records])
        cfg = asdict(self.config)
        manifest = {'schema_version': SCHEMA_VERSION, 'kind': 'pref_learner.posterior',
                    'config': cfg, 'step_size': self.step_size,
                    'n_particles': self.n_particles, 'd': self.d,
                    'n_demonstrations': len(self.records)}
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
        sizes = arrays['record_sizes']
        offs = np.concatenate([[0], np.cumsum(sizes)])
        feats = arrays['record_features']
        ls = arrays.get('record_log_sim')
        recs = []
        for i, c in enumerate(arrays['record_chosen']):
            a, b = offs[i], offs[i + 1]
            recs.append(ChoiceRecord(np.array(feats[a:b]), int(c),
                                     None if ls is None else np.array(ls[a:b])))
        post = cls(config, np.array(arrays['theta']), np.array(arrays['log_weights']),
                   np.array(arrays['log_lik']),
                   np.array(arrays['log_beta']) if 'log_beta' in arrays else None,
                   tuple(recs), float(manifest.get('step_size', 0.5)))
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
