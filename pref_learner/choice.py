# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Choice models: how likely a person is to pick one option from a finite set.

A choice set is a feature matrix ``features : (K, d)`` (the demonstration and
its alternatives, K = M + 1) and the index ``chosen`` of the demonstrated row.
Reward weights are particles ``theta : (N, d)``; the rationality ``beta`` is a
scalar or ``(N,)``. Every model returns ``(N,)`` log-likelihoods, float64.

Two models, registered by name in :data:`MODELS` (the one list of model names,
:data:`MODEL_NAMES`; :class:`ChoiceModel` and :func:`register_model` add one):

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
(:meth:`ChoiceModel.set_offsets`, :func:`log_similarity_sums`) with the
configured bandwidth and reused for every particle, update and diagnostic.
"""

from __future__ import annotations

import math
from typing import Callable, Dict, Mapping, Tuple, Union

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
def _utilities(features: np.ndarray, theta: np.ndarray, beta: np.ndarray,
               offsets: np.ndarray | None) -> np.ndarray:
    """Return ``beta_n theta_n . phi_j - o_j`` : (N, K) as one matrix product.

    ``[beta theta, 1] . [phi, -o]``: the scaling and the offsets go into the
    (N, d + 1) and (K, d + 1) factors, so the (N, K) result is written once
    (an offset of ``+inf``, a row a level excludes, gives ``-inf``).
    """
    n, d = theta.shape
    extra = offsets is not None
    u = np.empty((n, d + extra))
    np.multiply(theta, np.broadcast_to(np.asarray(beta, dtype=np.float64), (n,))[:, None],
                out=u[:, :d])
    if not extra:
        return u @ features.T
    u[:, d] = 1.0
    x = np.empty((features.shape[0], d + 1))
    x[:, :d] = features
    np.negative(offsets, out=x[:, d])
    return u @ x.T


#: below this bound on ``|r|`` :func:`logsumexp_rows` takes ``exp`` directly: ``exp(600)``
#: times 10^6 options stays below the largest float64 (about ``exp(709.8)``) and
#: ``exp(-600)`` far above the smallest normal one (about ``exp(-708.4)``)
DIRECT_LSE_BOUND = 600.0


def logsumexp_rows(r: np.ndarray, bound: float = math.inf) -> np.ndarray:
    """Row-wise logsumexp of an (N, K) matrix, overwriting it (saves a copy).

    ``bound``: a bound on ``|r|`` known to the caller (for utilities,
    ``max_n beta_n |theta_n| max_j |phi_j|`` plus the largest offset). Below
    :data:`DIRECT_LSE_BOUND` no term can overflow or every term underflow,
    so the row maximum is not subtracted (two passes over the matrix fewer);
    the result then differs from the shifted one by rounding alone.
    """
    if bound < DIRECT_LSE_BOUND:
        np.exp(r, out=r)
        return np.log(r.sum(axis=1))
    m = r.max(axis=1)
    r -= m[:, None]
    np.exp(r, out=r)
    return np.log(r.sum(axis=1)) + m


def softmax_rows(r: np.ndarray) -> np.ndarray:
    """Row-wise softmax of an (N, K) matrix of utilities, in place; returns it."""
    r -= r.max(axis=1, keepdims=True)
    np.exp(r, out=r)
    r /= r.sum(axis=1, keepdims=True)
    return r


class ChoiceModel:
    """A choice model: options' utilities for many particles, choice log-likelihoods.

    Every model here is a logit on utilities ``beta theta.phi_j - o_j`` with a
    per-set offset ``o`` (none for Boltzmann, the log similarity sums for
    LESS); the offsets depend only on the set, so :meth:`set_offsets` computes
    them once per set and every particle and update reuses them. To add a
    model, subclass and :func:`register_model` an instance: its name is then
    accepted everywhere a model is named (:data:`MODEL_NAMES`).

    Two levels: :meth:`loglik` (``__call__``) and :meth:`probabilities` check
    their inputs; :meth:`utilities` with :func:`logsumexp_rows` /
    :func:`softmax_rows` are the unchecked, in-place kernels the posterior
    runs over blocks of particles.
    """

    #: the registry key
    name = ''
    #: whether the model needs the set's similarity term (``set_offsets`` is not None)
    uses_similarity = False

    def set_offsets(self, features: np.ndarray, bandwidth: BandwidthSpec = 'scott'):
        """Per-option offsets ``(K,)`` of a set, computed once per set; None: no offsets."""
        return None

    def utilities(self, features: np.ndarray, theta: np.ndarray, beta: np.ndarray,
                  offsets: np.ndarray | None = None) -> np.ndarray:
        """Utilities ``beta_n theta_n . phi_j - o_j`` : (N, K), unchecked (a new array)."""
        return _utilities(features, theta, beta, offsets)

    def _checked_offsets(self, x, log_sim, bandwidth):
        """Return the set's offsets: the given similarity term (checked) or :meth:`set_offsets`."""
        if not self.uses_similarity:
            return self.set_offsets(x, bandwidth)
        if log_sim is None:
            log_sim = self.set_offsets(x, bandwidth)
        log_sim = np.asarray(log_sim, dtype=np.float64)
        if log_sim.shape != (x.shape[0],):
            raise ValueError(f'log_sim must have shape ({x.shape[0]},), got {log_sim.shape}')
        return log_sim

    def loglik(self, features: np.ndarray, chosen: int, theta: np.ndarray, beta=1.0, *,
               log_sim: np.ndarray | None = None,
               bandwidth: BandwidthSpec = 'scott') -> np.ndarray:
        """Log-likelihood of ``chosen`` for each particle, ``(N,)`` (inputs checked)."""
        x = _check_matrix(features)
        c = _check_chosen(chosen, x.shape[0])
        th = _check_theta(theta, x.shape[1])
        b = _check_beta(beta, th.shape[0])
        o = self._checked_offsets(x, log_sim, bandwidth)
        r = self.utilities(x, th, b, o)
        return r[:, c] - logsumexp(r, axis=1)

    __call__ = loglik

    def probabilities(self, features: np.ndarray, theta: np.ndarray, beta=1.0, *,
                      log_sim: np.ndarray | None = None,
                      bandwidth: BandwidthSpec = 'scott') -> np.ndarray:
        """Probability of each option, ``(N, K)``, or ``(K,)`` for one ``theta (d,)``."""
        x = _check_matrix(features)
        single = np.ndim(theta) == 1
        th = _check_theta(theta, x.shape[1])
        b = _check_beta(beta, th.shape[0])
        r = self.utilities(x, th, b, self._checked_offsets(x, log_sim, bandwidth))
        if single:
            r = r[0]
            return np.exp(r - logsumexp(r))
        return np.exp(r - logsumexp(r, axis=1, keepdims=True))

    def __repr__(self) -> str:
        return f'<choice model {self.name!r}>'


class Boltzmann(ChoiceModel):
    """Luce's choice axiom with exponential strengths (Boltzmann rationality)."""

    name = 'boltzmann'


class Less(ChoiceModel):
    """Limiting Errors due to Similar Selections: offsets are the log similarity sums."""

    name = 'less'
    uses_similarity = True

    def set_offsets(self, features, bandwidth='scott'):
        return log_similarity_sums(features, bandwidth)


#: The registry of choice models, by name; the one list of model names.
MODELS: Dict[str, ChoiceModel] = {}


def register_model(model: ChoiceModel) -> ChoiceModel:
    """Add a choice model (an instance) to :data:`MODELS` under ``model.name``."""
    if not isinstance(model, ChoiceModel) or not model.name:
        raise ValueError(f'{model!r} is not a named ChoiceModel')
    if model.name == BOTH or model.name in MODELS:
        raise ValueError(f'model name {model.name!r} is taken')
    MODELS[model.name] = model
    global MODEL_NAMES, MODEL_CHOICES
    MODEL_NAMES = tuple(MODELS)
    MODEL_CHOICES = MODEL_NAMES + (BOTH,)
    return model


#: Where a setting may name every model at once (learn them side by side).
BOTH = 'both'
MODEL_NAMES: Tuple[str, ...] = ()
MODEL_CHOICES: Tuple[str, ...] = (BOTH,)
register_model(Boltzmann())
register_model(Less())


def model_names(model: str) -> Tuple[str, ...]:
    """Return the models a setting names: one, or every registered model for ``both``."""
    if model == BOTH:
        return MODEL_NAMES
    get_model(model)
    return (model,)


def get_model(name: str) -> ChoiceModel:
    """Look a choice model up by name."""
    try:
        return MODELS[name]
    except (KeyError, TypeError):
        raise ValueError(f'model {name!r} is unknown; allowed: {sorted(MODELS)}') from None


def boltzmann_loglik(features: np.ndarray, chosen: int, theta: np.ndarray, beta=1.0,
                     *, log_sim: np.ndarray | None = None) -> np.ndarray:
    """Boltzmann-rational log-likelihood of ``chosen`` for each particle, ``(N,)``.

    ``log_sim`` is accepted and ignored so both models share one signature.
    """
    return MODELS['boltzmann'].loglik(features, chosen, theta, beta)


def less_loglik(features: np.ndarray, chosen: int, theta: np.ndarray, beta=1.0,
                *, log_sim: np.ndarray | None = None,
                bandwidth: BandwidthSpec = 'scott') -> np.ndarray:
    """LESS log-likelihood of ``chosen`` for each particle, ``(N,)``.

    Pass the set's precomputed ``log_sim`` (from :func:`log_similarity_sums`)
    to avoid recomputing the O(K^2) similarity term.
    """
    return MODELS['less'].loglik(features, chosen, theta, beta, log_sim=log_sim,
                                 bandwidth=bandwidth)


def choice_probabilities(features: np.ndarray, theta: np.ndarray, beta: float = 1.0,
                         model: str = 'boltzmann', *, log_sim: np.ndarray | None = None,
                         bandwidth: BandwidthSpec = 'scott') -> np.ndarray:
    """Probability of each option of one set under one weight vector, ``(K,)``."""
    x = _check_matrix(features)
    th = _check_theta(theta, x.shape[1])
    if th.shape[0] != 1:
        raise ValueError('choice_probabilities takes one weight vector theta (d,)')
    return get_model(model).probabilities(x, th[0], beta, log_sim=log_sim, bandwidth=bandwidth)
