# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Option levels pooled by multiple importance sampling, against direct computations."""

import dataclasses
import math

import numpy as np
import pytest
from scipy.special import gammaincc, gammaln, logsumexp

from pref_learner import choice
from pref_learner.posterior import (ChoiceRecord, ParticlePosterior, PosteriorConfig,
                                    POOL_MIN_LOG_WEIGHT, StackedSets, SubsetScreen,
                                    expand_loglik, log_option_modes_density,
                                    log_option_modes_densities, pooled_log_similarity,
                                    pooled_log_weights)

N_JOINTS, N_MODES = 7, 3
SPREADS = (0.04, 0.08, 0.16)


def _modes(rng, counts, spreads=SPREADS):
    """Mode coefficients of smooth draws: isotropic per mode, variance ~ k^-4, amplitude U[0,1]."""
    sd_mode = 1.0 / np.arange(1, N_MODES + 1) ** 2
    u = np.zeros(N_JOINTS)
    u[:2] = 1.0 / math.sqrt(2.0)
    out, groups = [], []
    for g, (k, s) in enumerate(zip(counts, spreads)):
        z = rng.normal(size=(k, N_MODES, N_JOINTS)) * sd_mode[None, :, None]
        z -= np.sum(z * u, axis=2, keepdims=True) * u
        out.append(z * (s * rng.random(k))[:, None, None])
        groups.append(np.full(k, g))
    return np.concatenate(out), np.concatenate(groups)


def _log_law(own, x):
    """The modes law by the closed form (scipy): Gaussian modes times an amplitude U[0, 1].

    int_0^1 a^-D exp(-Q / (2 a^2)) da = 1/2 (2/Q)^((D-1)/2) Gamma((D-1)/2, Q/2)
    (substitute u = Q / (2 a^2); upper incomplete gamma from scipy.special), with each
    mode's variance matched to the level's own draws by moments (E a^2 = 1/3).
    """
    free = N_JOINTS - 1
    var = 3.0 * np.mean(np.sum(own ** 2, axis=2), axis=0) / free
    D = free * N_MODES
    Q = np.sum(np.sum(x ** 2, axis=2) / var, axis=1)
    s = 0.5 * (D - 1)
    with np.errstate(divide='ignore'):
        log_gamma = np.log(gammaincc(s, Q / 2)) + gammaln(s)
    return (-0.5 * D * math.log(2 * math.pi) - 0.5 * free * np.sum(np.log(var))
            + math.log(0.5) + s * np.log(2 / Q) + log_gamma)


def test_modes_densities_match_the_single_path_law():
    # Reference: log_option_modes_density, one path at a time (itself checked against
    # scipy quadrature and the incomplete gamma in test_posterior.py), and the closed form.
    rng = np.random.default_rng(5)
    own, _ = _modes(rng, [200], [0.08])
    x, _ = _modes(rng, [10, 10, 10])
    got = log_option_modes_densities(own, x)
    np.testing.assert_allclose(got, [log_option_modes_density(own, xi) for xi in x],
                               atol=1e-7)
    # one joint free, one mode (D = 1): the quadrature
    one = log_option_modes_densities(own[:, :1, :2], x[:, :1, :2])
    np.testing.assert_allclose(one, [log_option_modes_density(own[:, :1, :2], xi)
                                     for xi in x[:, :1, :2]], atol=1e-10)
    np.testing.assert_allclose(got, _log_law(own, x), atol=1e-6)


@pytest.mark.parametrize('counts', [(100, 100, 100), (60, 100, 140)])
def test_pooled_weights_are_the_balance_heuristic(counts):
    # Reference: the balance heuristic (Veach & Guibas 1995) by hand with the closed-form
    # laws: w_gj = p_g(x_j) / sum_h (M_h / M) p_h(x_j), scaled to total M_g per level.
    rng = np.random.default_rng(6)
    x, g = _modes(rng, counts)
    M = len(g)
    lp = np.stack([_log_law(x[g == h], x) for h in range(3)])
    w = np.exp(lp) / (np.array(counts)[:, None] / M * np.exp(lp)).sum(axis=0)
    w *= (np.array(counts) / w.sum(axis=1))[:, None]
    got = pooled_log_weights(x, g, 3)
    assert got.shape == (3, M)
    with np.errstate(divide='ignore'):
        ref = np.log(w)
    live = ref >= POOL_MIN_LOG_WEIGHT + 1.0
    np.testing.assert_allclose(got[live], ref[live], atol=1e-6)
    assert np.all(np.isneginf(got[ref < POOL_MIN_LOG_WEIGHT - 1.0]))
    np.testing.assert_allclose(np.exp(got).sum(axis=1), counts, rtol=1e-12)
    # the narrow level cannot reach the wide level's outer draws; every level keeps its own
    assert np.isneginf(got[0, g == 2]).any()
    assert np.all(np.isfinite(got[g[None, :] == np.arange(3)[:, None]].reshape(-1)) |
                  (ref[g[None, :] == np.arange(3)[:, None]] < POOL_MIN_LOG_WEIGHT))


def test_pooled_weights_estimate_each_levels_own_moments():
    # Multiple importance sampling is consistent: the pooled, weighted draws of all levels
    # estimate level g's mean squared deviation as its own draws do (large samples;
    # the law is the sampler's, so the estimates agree to sampling error, a few percent).
    rng = np.random.default_rng(7)
    x, g = _modes(rng, [4000, 4000, 4000])
    w = np.exp(pooled_log_weights(x, g, 3))
    sq = np.sum(x ** 2, axis=(1, 2))
    for h in range(3):
        own = sq[g == h].mean()
        pooled = (w[h] @ sq) / w[h].sum()
        assert pooled == pytest.approx(own, rel=0.05)
    assert np.all(pooled_log_weights(x[:5], np.zeros(5, dtype=int), 1) == 0.0)


def test_pooled_similarity_with_unit_or_integer_weights():
    # References: unit weights give the unweighted LESS similarity sums
    # (choice.log_similarity_sums); integer frequency weights are duplicated rows (the
    # definition of frequency weights; the standardisation as numpy's cov with fweights),
    # so every row that is not duplicated gets the sum it has in the duplicated set.
    rng = np.random.default_rng(8)
    x = rng.normal(size=(9, 3))
    got = pooled_log_similarity(x, np.zeros((1, 9)))
    np.testing.assert_allclose(got[0], choice.log_similarity_sums(x), atol=1e-12)
    f = np.array([1, 1, 3, 1, 2, 1, 1, 1, 1])
    lw = np.log(f.astype(float))[None, :]
    lw = np.concatenate([lw, np.where(np.arange(9) == 5, -np.inf, 0.0)[None, :]])
    got = pooled_log_similarity(x, lw)
    dup = np.repeat(x, f, axis=0)
    ref = choice.log_similarity_sums(dup)
    first = np.concatenate([[0], np.cumsum(f)[:-1]])
    single = f == 1
    np.testing.assert_allclose(got[0, single], ref[first[single]], atol=1e-12)
    sd = np.sqrt(np.diag(np.cov(x, rowvar=False, fweights=f)))
    np.testing.assert_allclose(sd, dup.std(axis=0, ddof=1), rtol=1e-12)
    # a row absent from a level: -inf there, and the others' sums are of the rest alone
    keep = np.arange(9) != 5
    assert np.isneginf(got[1, 5])
    np.testing.assert_allclose(got[1, keep], choice.log_similarity_sums(x[keep]), atol=1e-12)


def _pooled_posterior(model, pool=True, n_levels=3, seed=9):
    rng = np.random.default_rng(seed)
    counts = [40] * n_levels
    modes, groups = _modes(rng, counts, SPREADS[:n_levels])
    demo, _ = _modes(rng, [1], [0.08])
    d = 4
    feats = rng.normal(size=(1 + len(groups), d))
    cfg = PosteriorConfig(n_particles=64, model=model, n_levels=n_levels,
                          option_density='modes', pool_levels=pool, beta_range=(0.5, 50.0))
    post = ParticlePosterior.create(cfg, d, rng)
    rec = post.prepare(feats, 0, np.concatenate([[-1], groups]),
                       np.concatenate([demo, modes]))
    return post, rec, rng


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_pooled_loglik_matches_a_direct_computation(model):
    # Reference: the logit by hand (scipy logsumexp): at level g every row j with a weight
    # has utility beta theta.phi_j - s_gj + log w_gj (s the pooled similarity for LESS, 0
    # for Boltzmann), the chosen row beta theta.phi_c - s_gc, plus the level's density.
    post, rec, rng = _pooled_posterior(model)
    less = model == 'less'
    n = 30
    th = rng.normal(size=(n, 4))
    th /= np.linalg.norm(th, axis=1, keepdims=True)
    beta = rng.uniform(0.5, 20.0, n)
    lev = rng.integers(0, 3, n)
    got = post.record_loglik(rec, th, beta, lev)
    for i in range(n):
        g = lev[i]
        lw = rec.pool_log_weight[g]
        rows = np.flatnonzero(np.isfinite(lw))
        s = rec.pool_log_sim[g] if less else np.zeros(len(lw))
        r = beta[i] * rec.features[rows] @ th[i] - s[rows] + lw[rows]
        c = beta[i] * rec.features[0] @ th[i] - s[0]
        assert rows[0] == 0 and lw[0] == 0.0
        assert got[i] == pytest.approx(c - logsumexp(r) + rec.log_density[g], abs=1e-10)
    # the moves' stacked, screened and expanded forms of the same sets agree with it
    post2 = dataclasses.replace(post, records=(rec, rec))
    u = beta[:, None] * th
    for g in range(3):
        sel = lev == g
        exact = post2.total_loglik(th[sel], beta[sel], lev[sel])
        np.testing.assert_allclose(StackedSets(post2.records, g, less)(u[sel]), exact,
                                   atol=1e-9)
        np.testing.assert_allclose(SubsetScreen(post2.records, g, less, k=1000)(u[sel]),
                                   exact, atol=1e-9)
        ex = expand_loglik(post2.records, g, u[sel][0], less)
        assert ex(u[sel][:1])[0] == pytest.approx(exact[0], abs=1e-9)


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_one_level_pooled_or_pooling_off_leaves_the_likelihood_unchanged(model):
    # With one level every weight is 1 (p / p), so pooling must give the unpooled
    # likelihood up to rounding; with pooling off the records carry no weights and the
    # utilities' offsets are exactly the similarity term of each level's own draws.
    less = model == 'less'
    on, rec_on, rng = _pooled_posterior(model, True, 1)
    off, rec_off, _ = _pooled_posterior(model, False, 1)
    assert rec_on.pooled and not rec_off.pooled
    np.testing.assert_array_equal(rec_on.pool_log_weight, 0.0)
    th = rng.normal(size=(50, 4))
    th /= np.linalg.norm(th, axis=1, keepdims=True)
    beta = rng.uniform(0.5, 20.0, 50)
    np.testing.assert_allclose(on.record_loglik(rec_on, th, beta, np.zeros(50, int)),
                               off.record_loglik(rec_off, th, beta, np.zeros(50, int)),
                               atol=1e-10)
    off3, rec3, _ = _pooled_posterior(model, False, 3)
    assert rec3.pool_log_weight is None and rec3.pool_log_sim is None
    for g in range(3):
        cols = rec3.columns(g)
        np.testing.assert_array_equal(cols[1:], np.flatnonzero(rec3.groups == g))
        o = rec3.offsets(g, cols, less)
        if less:
            np.testing.assert_array_equal(o, rec3.log_similarity(g, cols))
        else:
            assert o is None


def test_pooled_records_survive_save_and_load(tmp_path):
    post, rec, rng = _pooled_posterior('less')
    post, _ = post.update(rec, rng)
    post.save(tmp_path / 'p')
    back = ParticlePosterior.load(tmp_path / 'p')
    r2 = back.records[0]
    np.testing.assert_array_equal(r2.pool_log_weight, rec.pool_log_weight)
    np.testing.assert_array_equal(r2.pool_log_sim, rec.pool_log_sim)
    np.testing.assert_array_equal(back.total_loglik(post.theta, post.beta, post.level),
                                  post.total_loglik(post.theta, post.beta, post.level))


def test_level_evidence_reads_the_lowest_modes_whatever_the_pooled_weights_read():
    # The demonstration's density under each level uses the lowest N_OPTION_MODES modes
    # (test_posterior.py checks it against scipy); giving more modes for the pooled
    # weights must not change it.
    from pref_learner.alternatives import N_OPTION_MODES
    rng = np.random.default_rng(10)
    many = np.concatenate([rng.normal(size=(1, 12, N_JOINTS)) * 0.03,
                           rng.normal(size=(90, 12, N_JOINTS))
                           * np.repeat(SPREADS, 30)[:, None, None]])
    groups = np.concatenate([[-1], np.repeat(np.arange(3), 30)])
    x = rng.normal(size=(91, 3))
    a = ChoiceRecord.build(x, 0, groups=groups, n_levels=3, density='modes', deviation=many,
                           pool=True)
    b = ChoiceRecord.build(x, 0, groups=groups, n_levels=3, density='modes',
                           deviation=many[:, :N_OPTION_MODES])
    np.testing.assert_array_equal(a.log_density, b.log_density)
    alt = np.arange(1, 91)
    np.testing.assert_allclose(a.pool_log_weight[:, alt],
                               pooled_log_weights(many[alt], groups[alt], 3), atol=1e-12)


def test_pooling_needs_the_levels_laws():
    with pytest.raises(ValueError, match='pool_levels'):
        PosteriorConfig(n_levels=3, option_density='gaussian', pool_levels=True)
    from pref_learner.learner import LearnerConfig
    with pytest.raises(ValueError, match='pool_levels'):
        LearnerConfig(pool_levels=True, mix_near_optimal=0.3)
    LearnerConfig(pool_levels=True, spreads=(0.08,), mix_near_optimal=0.3)


def test_a_pooled_session_weighs_every_levels_draws_for_every_level():
    # End to end on the shipped arm: the learner's records are pooled, each level's weights
    # total its own count (the scaling of the balance heuristic, Veach & Guibas 1995), each
    # level keeps its own draws, and the narrow level cannot use all of the wide one's.
    from pref_learner.learner import Learner, LearnerConfig
    from pref_learner.sim import SimulatedTeacher, TeacherConfig
    L = Learner(LearnerConfig(model='less', seed=3, n_particles=200, n_alternatives=60,
                              pool_levels=True))
    truth = np.ones(L.posteriors['less'].d) / math.sqrt(L.posteriors['less'].d)
    SimulatedTeacher(L, truth, TeacherConfig(model='less', beta=5.0, seed=4)).feed_session(L, 2)
    post = L.posteriors['less']
    assert post.config.pool_levels and len(post.records) == 2
    for rec in post.records:
        assert rec.pooled
        alt = rec.groups >= 0
        counts = np.bincount(rec.groups[alt], minlength=3)
        np.testing.assert_allclose(np.exp(rec.pool_log_weight[:, alt]).sum(axis=1), counts,
                                   rtol=1e-12)
        for g in range(3):
            assert np.all(np.isfinite(rec.pool_log_weight[g, rec.groups == g]))
        assert len(rec.columns(0)) < len(rec.columns(1)) <= rec.features.shape[0]
