# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Choice models: how likely a person is to pick one option from a finite set.

A choice set is a feature matrix ``features : (K, d)`` (the demonstration and
its alternatives, K = M + 1) and the index ``chosen`` of the demonstrated row.
Reward weights are particles ``theta : (N, d)``; the rationality ``beta`` is a
scalar or ``(N,)``. Every model returns ``(N,)`` log-likelihoods, float64.

Two models, picked by name from :data:`MODELS`:

``boltzmann``
    Luce's choice axiom with exponential strengths (Boltzmann rationality,
    the conditional logit of discrete-choice econometrics)::

        log P = beta theta.phi_c - logsumexp_j beta theta.phi_j

``less``
    Limiting Errors due to Similar Selections: each option's exponentiated
    reward is divided by its total similarity S to the set, so a crowd of
    near-identical options counts as one::

        log P = beta theta.phi_c - log S_c - logsumexp_j (beta theta.phi_j - log S_j)

The similarity is a Gaussian kernel ``exp(-|z_i - z_k|^2 / (2 h^2))`` on
features standardised *within the set* (similarity only; the reward uses the
session's fixed scale). ``S`` is therefore a kernel density estimate of the set
up to a constant. ``log S`` depends only on the set, so it is computed once
(:func:`log_similarity_sums`) and reused for every particle and update.
"""

from __future__ import annotations

import math
from typing import Callable, Mapping, Union

import numpy as np
from scipy.special import logsumexp

BandwidthSpec = Union[str, float]

#: Memory budget for one block of pairwise distances (bytes).
_CHUNK_BYTES = 64 * 2**20


# ---------------------------------------------------------------- validation
def _check_matrix(features: np.ndarray, name: str = 'features') -> np.ndarray:
    arr = np.asarray(features, dtype=np.float64)
    if arr.ndim != 2:
        raise ValueError(f'{name} must be a (K, d) matrix, got shape {arr.shape}')
    if arr.shape[0] < 1:
        raise ValueError(f'{name} is an empty choice set (K = 0)')
    if arr.shape[1] < 1:
        raise ValueError(f'{name} has no feature columns (d = 0)')
    if not np.all(np.isfinite(arr)):
        bad = np.argwhere(~np.isfinite(arr))[0]
        raise ValueError(
            f'{name} contains a non-finite value {arr[tuple(bad)]!r} at row {bad[0]}, '
            f'column {bad[1]}')
    return arr


def _check_theta(theta: np.ndarray, d: int) -> np.ndarray:
    th = np.asarray(theta, dtype=np.float64)
    if th.ndim == 1:
        th = th[None, :]
    if th.ndim != 2 or th.shape[0] < 1:
        raise ValueError(f'theta must be (N, d) with N >= 1, got shape {np.shape(theta)}')
    if th.shape[1] != d:
        raise ValueError(f'theta has {th.shape[1]} columns but features have d = {d}')
    if not np.all(np.isfinite(th)):
        raise ValueError('theta contains non-finite values')
    return th


def _check_beta(beta, n: int) -> np.ndarray:
    b = np.asarray(beta, dtype=np.float64)
    if b.ndim == 0:
        b = np.full(n, float(b))
    if b.shape != (n,):
        raise ValueError(f'beta must be a scalar or shape ({n},), got shape {b.shape}')
    if not np.all(np.isfinite(b)) or np.any(b <= 0.0):
        bad = b[~(np.isfinite(b) & (b > 0))][0]
        raise ValueError(f'beta must be finite and > 0, got {bad!r}')
    return b


def _check_chosen(chosen, k: int) -> int:
    if isinstance(chosen, (bool, np.bool_)) or not isinstance(chosen, (int, np.integer)):
        raise ValueError(f'chosen must be an integer row index, got {chosen!r}')
    if not 0 <= int(chosen) < k:
        raise ValueError(f'chosen index {int(chosen)} is out of range for a set of {k} options')
    return int(chosen)


# ---------------------------------------------------------------- bandwidth
def scott_factor(n: int, d: int) -> float:
    """Scott's rule, ``n ** (-1 / (d + 4))`` (Scott 1992, as in scipy's gaussian_kde)."""
    return float(n) ** (-1.0 / (d + 4))


def silverman_factor(n: int, d: int) -> float:
    """Silverman's rule, ``(n (d + 2) / 4) ** (-1 / (d + 4))`` (Silverman 1986)."""
    return (n * (d + 2) / 4.0) ** (-1.0 / (d + 4))


BANDWIDTH_RULES: Mapping[str, Callable[[int, int], float]] = {
    'scott': scott_factor,
    'silverman': silverman_factor,
}


def resolve_bandwidth(spec: BandwidthSpec, n: int, d: int) -> float:
    """Return the kernel bandwidth in standardised units for a set of n points in d dims."""
    if isinstance(spec, str):
        try:
            return BANDWIDTH_RULES[spec](n, d)
        except KeyError:
            raise ValueError(
                f'bandwidth rule {spec!r} is unknown; allowed: {sorted(BANDWIDTH_RULES)} '
                'or a positive number') from None
    h = float(spec)
    if not math.isfinite(h) or h <= 0.0:
        raise ValueError(f'bandwidth must be > 0, got {spec!r}')
    return h


def standardise(features: np.ndarray, metric: str = 'diagonal') -> np.ndarray:
    """Standardise a set's features for the similarity kernel.

    ``metric='diagonal'`` divides each column by its standard deviation (a
    constant column is left as is); ``metric='full'`` whitens with the set's
    covariance (the convention of ``scipy.stats.gaussian_kde``), which needs a
    non-singular covariance.
    """
    x = np.asarray(features, dtype=np.float64)
    xc = x - x.mean(axis=0)
    if metric == 'diagonal':
        sd = xc.std(axis=0, ddof=1) if x.shape[0] > 1 else np.ones(x.shape[1])
        sd = np.where(sd > 0.0, sd, 1.0)
        return xc / sd
    if metric == 'full':
        cov = np.atleast_2d(np.cov(xc, rowvar=False))
        try:
            chol = np.linalg.cholesky(cov)
        except np.linalg.LinAlgError:
            raise ValueError('metric "full" needs a non-singular feature covariance; '
                             'use metric "diagonal" for degenerate sets') from None
        return np.linalg.solve(chol, xc.T).T
    raise ValueError(f'metric {metric!r} is unknown; allowed: diagonal, full')


def log_similarity_sums(features: np.ndarray, bandwidth: BandwidthSpec = 'scott',
                        metric: str = 'diagonal') -> np.ndarray:
    """Log of each option's total similarity to the whole set, ``log S : (K,)``.

    ``S_i = sum_k exp(-|z_i - z_k|^2 / (2 h^2))`` with ``z`` the standardised
    features and ``h`` the bandwidth (a rule name or a number). ``S_i >= 1``
    since every option is identical to itself. Computed in row blocks so that
    K = 10,000 needs well under 1 GB.
    """
    x = _check_matrix(features)
    k, d = x.shape
    h = resolve_bandwidth(bandwidth, k, d)
    z = standardise(x, metric)
    sq = np.einsum('ij,ij->i', z, z)
    out = np.empty(k)
    rows = max(1, _CHUNK_BYTES // (8 * k * 2))
    inv = -0.5 / (h * h)
    for a in range(0, k, rows):
        b = min(k, a + rows)
        d2 = sq[a:b, None] + sq[None, :] - 2.0 * (z[a:b] @ z.T)
        np.maximum(d2, 0.0, out=d2)
        out[a:b] = logsumexp(d2 * inv, axis=1)
    return out


# ---------------------------------------------------------------- models
def _rewards(features: np.ndarray, theta: np.ndarray, beta: np.ndarray) -> np.ndarray:
    """Scaled rewards ``beta_n theta_n . phi_j`` : (N, K)."""
    r = theta @ features.T
    r *= beta[:, None]
    return r


def boltzmann_loglik(features: np.ndarray, chosen: int, theta: np.ndarray, beta=1.0,
                     *, log_sim: np.ndarray | None = None) -> np.ndarray:
    """Boltzmann-rational log-likelihood of ``chosen`` for each particle, ``(N,)``.

    ``log_sim`` is accepted and ignored so both models share one signature.
    """
    x = _check_matrix(features)
    c = _check_chosen(chosen, x.shape[0])
    th = _check_theta(theta, x.shape[1])
    b = _check_beta(beta, th.shape[0])
    r = _rewards(x, th, b)
    return r[:, c] - logsumexp(r, axis=1)


def less_loglik(features: np.ndarray, chosen: int, theta: np.ndarray, beta=1.0,
                *, log_sim: np.ndarray | None = None,
                bandwidth: BandwidthSpec = 'scott') -> np.ndarray:
    """LESS log-likelihood of ``chosen`` for each particle, ``(N,)``.

    Pass the set's precomputed ``log_sim`` (from :func:`log_similarity_sums`)
    to avoid recomputing the O(K^2) similarity term.
    """
    x = _check_matrix(features)
    c = _check_chosen(chosen, x.shape[0])
    th = _check_theta(theta, x.shape[1])
    b = _check_beta(beta, th.shape[0])
    if log_sim is None:
        log_sim = log_similarity_sums(x, bandwidth)
    log_sim = np.asarray(log_sim, dtype=np.float64)
    if log_sim.shape != (x.shape[0],):
        raise ValueError(f'log_sim must have shape ({x.shape[0]},), got {log_sim.shape}')
    r = _rewards(x, th, b)
    r -= log_sim[None, :]
    return r[:, c] - logsumexp(r, axis=1)


MODELS: Mapping[str, Callable[..., np.ndarray]] = {
    'boltzmann': boltzmann_loglik,
    'less': less_loglik,
}


def get_model(name: str) -> Callable[..., np.ndarray]:
    """Look a choice model up by name."""
    try:
        return MODELS[name]
    except KeyError:
        raise ValueError(f'model {name!r} is unknown; allowed: {sorted(MODELS)}') from None


def choice_probabilities(features: np.ndarray, theta: np.ndarray, beta: float = 1.0,
                         model: str = 'boltzmann', *, log_sim: np.ndarray | None = None,
                         bandwidth: BandwidthSpec = 'scott') -> np.ndarray:
    """Probability of each option of one set under one weight vector, ``(K,)``."""
    x = _check_matrix(features)
    th = _check_theta(theta, x.shape[1])
    if th.shape[0] != 1:
        raise ValueError('choice_probabilities takes one weight vector theta (d,)')
    b = _check_beta(beta, 1)
    r = _rewards(x, th, b)[0]
    get_model(model)
    if model == 'less':
        if log_sim is None:
            log_sim = log_similarity_sums(x, bandwidth)
        r = r - np.asarray(log_sim, dtype=np.float64)
    return np.exp(r - logsumexp(r))
