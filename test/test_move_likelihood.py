# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The moves' likelihood expansion against the exact likelihood, quadrature and itself."""

from dataclasses import replace

import numpy as np
import pytest
from scipy import integrate, stats

from pref_learner import choice
from pref_learner.posterior import (MAX_ERROR_FACTOR, MOVE_LIKELIHOODS, MoveLikelihood,
                                    MoveTarget, ParticlePosterior, PosteriorConfig,
                                    StackedSets, SubsetScreen, expand_loglik)


def _records(post, rng, n_sets, k, true_u, model):
    """Choice sets of ``k`` random options with choices drawn from the model at ``true_u``."""
    recs = []
    beta = float(np.linalg.norm(true_u))
    for _ in range(n_sets):
        x = rng.standard_normal((k, post.d))
        p = choice.choice_probabilities(x, true_u / beta, beta, model)
        recs.append(post.prepare(x, int(rng.choice(k, p=p))))
    return tuple(recs)


def _with_particles(post, records, theta, log_beta=None):
    n = len(theta)
    beta = post.config.beta if log_beta is None else np.exp(log_beta)
    base = replace(post, theta=theta, log_beta=log_beta, records=records,
                   log_weights=np.full(n, -np.log(n)), log_lik=np.zeros(n))
    return replace(base, log_lik=base.total_loglik(theta, np.broadcast_to(beta, (n,)), None))


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_expansion_is_exact_at_the_anchor_and_its_remainder_is_fifth_order(model):
    # Taylor's theorem: an expansion with the right derivatives up to order four leaves a
    # remainder O(|delta|^5), so halving delta divides the error by about 2^5 = 32; one
    # wrong coefficient of order k would leave O(|delta|^k). Exact value: StackedSets, itself
    # checked against the per-set loop (total_loglik) here.
    rng = np.random.default_rng(1)
    post = ParticlePosterior.create(PosteriorConfig(n_particles=10, model=model), 4, rng)
    u0 = np.array([2.0, -1.0, 0.5, 1.0])
    recs = _records(post, rng, 12, 30, u0, model)
    ex = expand_loglik(recs, 0, u0, model == 'less')
    exact = StackedSets(recs, 0, model == 'less')
    th = rng.standard_normal((5, 4))
    th /= np.linalg.norm(th, axis=1, keepdims=True)
    b = rng.uniform(0.5, 3.0, 5)
    ref = sum(post.record_loglik(r, th, b) for r in recs)
    np.testing.assert_allclose(exact(b[:, None] * th), ref, rtol=1e-12, atol=1e-9)
    assert ex(u0[None])[0] == pytest.approx(exact(u0[None])[0], rel=1e-12)
    dirs = rng.standard_normal((8, 4))
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    scales = np.array([0.08, 0.02])
    err = np.array([np.abs(ex(u0 + s * dirs) - exact(u0 + s * dirs)) for s in scales])
    slopes = np.log(err[0] / err[1]) / np.log(scales[0] / scales[1])
    assert abs(np.median(slopes) - 5.0) < 0.2 and np.all(slopes > 4.4), slopes


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_checked_expansion_error_bound_holds_on_the_whole_cloud(model):
    # The stated bound: when the moves use the expansion, its mean absolute error over the
    # cloud is at most expansion_tol and its largest at most MAX_ERROR_FACTOR times that.
    # The check sees only N_CHECK particles; here every particle is compared with the exact
    # log-likelihood (summed over the sets one by one, total_loglik) on random sets and
    # clouds of several widths, beta inferred. Where the check refuses, the moves are exact.
    rng = np.random.default_rng(2)
    used = 0
    for trial in range(6):
        cfg = PosteriorConfig(n_particles=2000, model=model, beta_range=(0.5, 20.0),
                              expansion_tol=0.05)
        post = ParticlePosterior.create(cfg, 4, rng)
        true_u = rng.standard_normal(4) * 1.5
        recs = _records(post, rng, 40, 25, true_u, model)
        width = [0.03, 0.06, 0.1, 0.2, 0.3, 0.5][trial]
        u = true_u + width * rng.standard_normal((2000, 4)) @ np.diag([1.0, 0.7, 0.5, 1.3])
        b = np.linalg.norm(u, axis=1)
        p = _with_particles(post, recs, u / b[:, None], np.log(b))
        target = p.move_target(p.theta, p.beta, None)
        if not target.approximate:
            continue
        used += 1
        err = np.abs(target(p.theta, p.beta, None) - p.log_lik)
        assert err.mean() <= cfg.expansion_tol
        assert err.max() <= MAX_ERROR_FACTOR * cfg.expansion_tol
    assert used >= 2


def _circle_posterior(model, beta, n_sets, k, seed):
    rng = np.random.default_rng(seed)
    post = ParticlePosterior.create(PosteriorConfig(n_particles=4000, model=model, beta=beta,
                                                    expansion_tol=0.02), 2, rng)
    true_u = beta * np.array([np.cos(1.0), np.sin(1.0)])
    recs = _records(post, rng, n_sets, k, true_u, model)
    grid = np.linspace(-np.pi, np.pi, 40001)
    th = np.stack([np.cos(grid), np.sin(grid)], axis=1)
    ll = sum(post.record_loglik(r, th, np.full(len(grid), beta)) for r in recs)
    dens = np.exp(ll - ll.max())
    cdf = integrate.cumulative_trapezoid(dens, grid, initial=0.0)
    cdf /= cdf[-1]
    return post, recs, rng, grid, cdf


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_expansion_moves_leave_the_exact_posterior_invariant(model):
    # Invariance: particles drawn exactly from the posterior on the circle (inverse CDF of a
    # quadrature on a fine grid, scipy.integrate) and moved by the expansion's
    # Metropolis-Hastings rounds are still distributed as that posterior: one-sample KS test
    # (scipy.stats.kstest) against the quadrature CDF at significance 0.01, seeded.
    post, recs, rng, grid, cdf = _circle_posterior(model, 3.0, 60, 20, 3)
    ang = np.interp(rng.random(4000), cdf, grid)
    p = _with_particles(post, recs, np.stack([np.cos(ang), np.sin(ang)], 1))
    moved, acc = replace(p, moves_pending=True).rejuvenate(rng)
    assert moved.log_lik_approximate and np.isfinite(moved.likelihood_error)
    assert 0.1 < acc < 0.6
    assert np.mean(np.any(moved.theta != p.theta, axis=1)) > 0.5

    def exact_cdf(a):
        return np.interp(a, grid, cdf)
    out = np.arctan2(moved.theta[:, 1], moved.theta[:, 0])
    assert stats.kstest(out, exact_cdf).pvalue > 0.01


def test_expansion_posterior_matches_quadrature_after_updates():
    # The whole sequence (tempered updates, resampling, moves that switch to the expansion
    # once the cloud is narrow) against the exact posterior mean and spread on the circle.
    post, recs, rng, grid, cdf = _circle_posterior('less', 3.0, 60, 20, 4)
    used = []
    for r in recs:
        post, info = post.update(r, rng)
        used.append(np.isfinite(info.likelihood_error))
    assert any(used)
    pdf = np.gradient(cdf, grid)
    th = np.stack([np.cos(grid), np.sin(grid)], 1)
    mean = integrate.trapezoid(pdf[:, None] * th, grid, axis=0)
    np.testing.assert_allclose(post.weights @ post.theta, mean, atol=0.01)


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_subset_screen_is_exact_with_every_option_and_weighted_with_fewer(model):
    # With k >= the level's alternatives the screen is the exact summed log-likelihood
    # (reference: total_loglik, set by set). With k fewer it is, per set, the chosen term
    # minus scipy.special.logsumexp over the demonstration and the first k alternatives,
    # these weighted m / k (the documented form), plus the level's density.
    from scipy.special import logsumexp
    cfg, p = _two_level_cloud(12, model, 1.5, 0.1)
    less = model == 'less'
    u = p.beta[:200, None] * p.theta[:200]
    for g in (0, 1):
        lev = np.full(200, g)
        full = SubsetScreen(p.records, g, less, k=1000)(u)
        np.testing.assert_allclose(full, p.total_loglik(p.theta[:200], p.beta[:200], lev),
                                   rtol=1e-12, atol=1e-9)
        got = SubsetScreen(p.records, g, less, k=5)(u)
        ref = np.zeros(200)
        for rec in p.records:
            cols = rec.columns(g)
            sub = cols[:6]
            s = rec.log_similarity(g, cols)[:6] if less else np.zeros(6)
            b = np.array([1.0] + [(len(cols) - 1) / 5.0] * 5)
            e = u @ rec.features[sub].T - s
            ref += e[:, 0] + rec.log_density[g] - logsumexp(e, axis=1, b=b)
        np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-9)


class _CountingTarget(MoveTarget):
    """The exact target, screened by an expansion around a wrong point; counts exact points."""

    points = 0

    def __call__(self, theta, beta, level):
        _CountingTarget.points += len(theta)
        return super().__call__(theta, beta, level)


class _PoorScreen(MoveLikelihood):
    name = 'poor_screen'

    def target(self, post, theta, beta, level):
        # the screen: every set expanded around the point opposite the posterior's mode, a
        # poor stand-in far from it; the target itself is exact (no set expanded)
        far = -post.config.beta * (post.weights @ theta)
        screen = expand_loglik(post.records, 0, far, post.config.model == 'less')
        return _CountingTarget(post, [None], np.zeros(post.d), np.eye(post.d), np.inf,
                               split=[0], inner=[np.inf], screens=[screen],
                               screen_exact=[True])


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_screened_moves_leave_the_exact_posterior_invariant_even_with_a_poor_screen(
        model, monkeypatch):
    # Delayed acceptance (Christen & Fox 2005, "Markov chain Monte Carlo using an
    # approximation"): a proposal first passes a test on a cheap screen, then a second test
    # on the exact target divided by the screen; the chain keeps the exact posterior
    # invariant whatever the screen. Here the screen is poor on purpose; particles drawn
    # exactly from the posterior on the circle (quadrature, scipy.integrate) and moved stay
    # distributed as that posterior (one-sample KS test, scipy.stats.kstest, at 0.01), and
    # the exact target is evaluated only at the proposals the screen let through.
    monkeypatch.setitem(MOVE_LIKELIHOODS, 'poor_screen', _PoorScreen())
    post, recs, rng, grid, cdf = _circle_posterior(model, 3.0, 60, 20, 3)
    post = replace(post, config=replace(post.config, move_likelihood='poor_screen'))
    ang = np.interp(rng.random(4000), cdf, grid)
    p = _with_particles(post, recs, np.stack([np.cos(ang), np.sin(ang)], 1))
    _CountingTarget.points = 0
    moved, acc = replace(p, moves_pending=True).rejuvenate(rng)
    rounds = post.config.max_move_rounds
    assert 0.05 < acc < 0.6
    assert 0 < _CountingTarget.points < 0.8 * (rounds + 1) * 4000
    out = np.arctan2(moved.theta[:, 1], moved.theta[:, 0])
    assert stats.kstest(out, lambda a: np.interp(a, grid, cdf)).pvalue > 0.01


def test_the_screen_equals_the_target_wherever_it_says_so():
    # The real provider on two levels, level 1 failing its check: the screen of level 0 is
    # its checked expansion (equal to the target to rounding wherever ``differs`` is false);
    # every level-1 point differs (its target is exact, the reference total_loglik).
    cfg, p = _two_level_cloud(9, 'boltzmann', 4.0, 0.2)
    target = p.move_target(p.theta, p.beta, p.level)
    assert target.screened and target.screen_exact == [False, True]
    s, differs = target.screen(p.theta, p.beta, p.level)
    got = target(p.theta, p.beta, p.level)
    np.testing.assert_allclose(s[~differs], got[~differs], rtol=1e-12, atol=1e-9)
    assert np.all(differs[p.level == 1]) and not np.any(differs[p.level == 0])


def test_same_seed_same_posterior_bit_for_bit_with_the_expansion(tmp_path):
    rng = np.random.default_rng(5)
    base = ParticlePosterior.create(PosteriorConfig(n_particles=1500, model='less',
                                                    beta_range=(0.5, 20.0)), 3, rng)
    recs = _records(base, rng, 60, 30, np.array([3.0, 1.5, -1.5]), 'less')

    def run():
        g = np.random.default_rng(6)
        p = ParticlePosterior.create(base.config, 3, g)
        errs = []
        for r in recs:
            p, info = p.update(r, g)
            errs.append(info.likelihood_error)
        return p, errs
    a, ea = run()
    b, eb = run()
    assert any(np.isfinite(ea))
    np.testing.assert_array_equal(ea, eb)
    for f in ('theta', 'log_weights', 'log_lik', 'log_beta'):
        np.testing.assert_array_equal(getattr(a, f), getattr(b, f))
    a.save(tmp_path / 'p')
    back = ParticlePosterior.load(tmp_path / 'p')
    assert back.log_lik_approximate == a.log_lik_approximate


def test_exact_moves_option_and_bad_settings():
    with pytest.raises(ValueError, match='move_likelihood'):
        PosteriorConfig(move_likelihood='cheap')
    with pytest.raises(ValueError, match='expansion_tol'):
        PosteriorConfig(expansion_tol=0.0)
    rng = np.random.default_rng(7)
    post = ParticlePosterior.create(PosteriorConfig(n_particles=500, move_likelihood='exact'),
                                    3, rng)
    for r in _records(post, rng, 10, 15, np.array([1.0, 2.0, 0.0]), 'less'):
        post, info = post.update(r, rng)
        assert np.isnan(info.likelihood_error)
    assert not post.log_lik_approximate


def _two_level_cloud(seed, model, wide, width):
    """60 sets of 12 + 12 options (level 1 ``wide`` times level 0's spread), a person at
    level 0, and a cloud of 2,000 particles of Gaussian ``width`` around the true u, at
    random levels."""
    rng = np.random.default_rng(seed)
    cfg = PosteriorConfig(n_particles=2000, model=model, beta_range=(0.5, 20.0), n_levels=2)
    post = ParticlePosterior.create(cfg, 3, rng)
    true_u = np.array([2.0, -1.0, 1.5])
    recs = []
    for _ in range(60):
        x = np.vstack([rng.standard_normal((13, 3)), wide * rng.standard_normal((12, 3))])
        groups = np.array([-1] + [0] * 12 + [1] * 12)
        p = choice.choice_probabilities(x[:13], true_u / 2.693, 2.693, model)
        c = int(rng.choice(13, p=p))
        x[[0, c]] = x[[c, 0]]
        recs.append(post.prepare(x, 0, groups))
    u = true_u + width * rng.standard_normal((2000, 3))
    b = np.linalg.norm(u, axis=1)
    level = rng.integers(0, 2, 2000)
    return cfg, replace(post, theta=u / b[:, None], log_beta=np.log(b), level=level,
                        records=tuple(recs))


def test_expansion_with_option_levels_matches_each_levels_likelihood():
    # Two option levels: a particle at level g compares the demonstration with level g's
    # alternatives and adds that level's log density. The moves' likelihood for particles at
    # either level is checked against the exact per-set sum (total_loglik), as above.
    cfg, p = _two_level_cloud(8, 'less', 1.5, 0.03)
    target = p.move_target(p.theta, p.beta, p.level)
    assert target.approximate
    err = np.abs(target(p.theta, p.beta, p.level) - p.total_loglik(p.theta, p.beta, p.level))
    assert err.mean() <= cfg.expansion_tol
    assert err.max() <= MAX_ERROR_FACTOR * cfg.expansion_tol


def test_a_level_whose_expansion_fails_its_check_stays_exact_alone():
    # Level 1's options spread 4 times wider than level 0's, so its expansion's remainder
    # (growing with the spread's fifth power, Taylor) fails the check while level 0's
    # passes (the cloud still wide): level 0 is expanded, level 1 exact. Reference: the
    # exact per-set sum (total_loglik); particles at level 1 must match it to rounding.
    cfg, p = _two_level_cloud(9, 'boltzmann', 4.0, 0.2)
    target = p.move_target(p.theta, p.beta, p.level)
    assert target.approximate
    assert target.expansions[0] is not None and target.expansions[1] is None
    exact = p.total_loglik(p.theta, p.beta, p.level)
    got = target(p.theta, p.beta, p.level)
    at1 = p.level == 1
    np.testing.assert_allclose(got[at1], exact[at1], rtol=1e-12, atol=1e-9)
    err = np.abs(got[~at1] - exact[~at1])
    assert err.mean() <= cfg.expansion_tol
    assert err.max() <= MAX_ERROR_FACTOR * cfg.expansion_tol


def test_only_the_clouds_edge_failing_keeps_the_expansion_inside_and_exact_beyond():
    # A narrow cloud with a few far particles: the expansion passes the check at the
    # evenly spaced radii but fails at the outermost, so it is used inside the largest
    # checked radius below the failure and every point beyond is scored exactly.
    # Reference: the exact per-set sum (total_loglik).
    cfg, p = _two_level_cloud(10, 'boltzmann', 1.0, 0.05)
    rng = np.random.default_rng(11)
    u = p.beta[:, None] * p.theta
    u[:12] += rng.normal(0.0, 2.0, (12, 3))                   # the far edge
    b = np.linalg.norm(u, axis=1)
    p = replace(p, theta=u / b[:, None], log_beta=np.log(b))
    target = p.move_target(p.theta, p.beta, p.level)
    assert target.approximate
    assert all(ex is not None for ex in target.expansions)
    reach = np.array(target.inner)
    assert np.all(np.isfinite(reach))
    exact = p.total_loglik(p.theta, p.beta, p.level)
    got = target(p.theta, p.beta, p.level)
    far = target.radii(u) > reach[p.level]
    assert 0 < far.sum() < 100
    np.testing.assert_allclose(got[far], exact[far], rtol=1e-12, atol=1e-9)
    err = np.abs(got[~far] - exact[~far])
    # the stated bound: the mean over the cloud, and the checked points (not every far
    # particle the 48 checks did not visit) within MAX_ERROR_FACTOR x tol
    assert err.mean() <= cfg.expansion_tol
    assert target.error <= cfg.expansion_tol
    assert target.error_max <= MAX_ERROR_FACTOR * cfg.expansion_tol


def test_beyond_the_outermost_checked_particle_the_likelihood_is_exact():
    # The check visits radii up to the outermost particle's; the trust region reaches
    # TRUST_REACH times further. A fourth-order remainder grows with the fifth power of
    # the radius (Taylor), unchecked out there: points beyond the checked radius are
    # scored exactly. Reference: the exact per-set sum (total_loglik).
    from pref_learner.posterior import TRUST_REACH
    cfg, p = _two_level_cloud(9, 'boltzmann', 4.0, 0.2)
    target = p.move_target(p.theta, p.beta, p.level)
    assert target.expansions[0] is not None                  # level 0 passed its check
    at0 = np.flatnonzero(p.level == 0)
    u = p.beta[at0, None] * p.theta[at0]
    r = target.radii(u)
    out = at0[np.argsort(r)[-5:]]                            # the outermost of level 0
    uo = p.beta[out, None] * p.theta[out]
    far = target.anchor + 0.5 * (1.0 + TRUST_REACH) * (uo - target.anchor)
    assert np.all(target.radii(far) > r.max()) and np.all(target.radii(far) < target.radius)
    b = np.linalg.norm(far, axis=1)
    lev = np.zeros(len(far), dtype=np.int64)
    np.testing.assert_allclose(target(far / b[:, None], b, lev),
                               p.total_loglik(far / b[:, None], b, lev), rtol=1e-12, atol=1e-9)


def test_tempering_without_moves_between_steps_matches_quadrature():
    # tempering_move_rounds = 0: the steps only reweight and resample, every move comes
    # after the demonstration is weighed in. One sharp demonstration (beta 40, several
    # steps) on the circle against the exact posterior mean (scipy.integrate), as in
    # test_posterior's tempered-update check; the steps are the same with moves between.
    rng = np.random.default_rng(90)
    x = rng.standard_normal((40, 2))
    c = int(np.argmax(x @ np.array([np.cos(2.0), np.sin(2.0)])))
    grid = np.linspace(-np.pi, np.pi, 20001)
    th = np.stack([np.cos(grid), np.sin(grid)], axis=1)
    dens = np.exp(choice.less_loglik(x, c, th, 40.0) - choice.less_loglik(x, c, th, 40.0).max())
    exact_mean = integrate.trapezoid(dens[:, None] * th, grid, axis=0) / integrate.trapezoid(
        dens, grid)
    for rounds in (0, 2):
        cfg = PosteriorConfig(n_particles=8000, model='less', beta=40.0,
                              tempering_move_rounds=rounds)
        g = np.random.default_rng(91)
        post, info = ParticlePosterior.create(cfg, 2, g).update((x, c), g, move=False)
        assert info.tempering_steps > 1 and post.moves_pending
        if rounds == 0:
            assert np.isnan(info.acceptance)
        post, acc = post.rejuvenate(g)
        assert 0.0 < acc < 1.0
        np.testing.assert_allclose(post.weights @ post.theta, exact_mean, atol=0.02)
    with pytest.raises(ValueError, match='tempering_move_rounds'):
        PosteriorConfig(tempering_move_rounds=9)


def test_an_exact_target_is_screened_by_subsets_and_scored_exactly_everywhere():
    # A wide cloud (no expansion passes its check): the target is the exact sum (reference
    # total_loglik) and every point differs from its screen, so every screened proposal the
    # screen lets through is scored exactly.
    cfg, p = _two_level_cloud(13, 'less', 1.5, 3.0)
    p = replace(p, records=p.records[:3])
    target = p.move_target(p.theta, p.beta, p.level)
    assert target.screened and not target.approximate
    s, differs = target.screen(p.theta, p.beta, p.level)
    assert differs.all() and np.all(np.isfinite(s))
    np.testing.assert_allclose(target(p.theta, p.beta, p.level),
                               p.total_loglik(p.theta, p.beta, p.level), rtol=1e-12)
