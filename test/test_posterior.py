# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Particle posterior against exact quadrature, an MCMC reference and properties."""

import math
from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import integrate

from pref_learner import choice
from pref_learner.posterior import (ParticlePosterior, PosteriorConfig, ess_from_log_weights,
                                    systematic_resample)


def _demo_sets(rng, n, k, d, theta, beta, model='boltzmann'):
    out = []
    for _ in range(n):
        x = rng.standard_normal((k, d))
        p = choice.choice_probabilities(x, theta, beta, model)
        out.append((x, int(rng.choice(k, p=p))))
    return out


def _run(config, sets, d, seed):
    rng = np.random.default_rng(seed)
    post = ParticlePosterior.create(config, d, rng)
    infos = []
    for x, c in sets:
        post, info = post.update((x, c), rng)
        infos.append(info)
    return post, infos


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_circle_posterior_matches_quadrature(model):
    # Reference: exact posterior over the angle by numerical integration
    # (scipy.integrate.cumulative_trapezoid on a fine grid), uniform prior on the circle.
    rng = np.random.default_rng(10)
    true = np.array([np.cos(0.7), np.sin(0.7)])
    sets = _demo_sets(rng, 3, 12, 2, true, 2.0, model)
    cfg = PosteriorConfig(n_particles=20000, model=model, beta=2.0)
    post, infos = _run(cfg, sets, 2, 11)
    grid = np.linspace(-np.pi, np.pi, 20001)
    th = np.stack([np.cos(grid), np.sin(grid)], axis=1)
    ll = sum(choice.get_model(model)(x, c, th, 2.0) for x, c in sets)
    dens = np.exp(ll - ll.max())
    mode = grid[np.argmax(dens)]
    # measure angles from the antipode of the mode so no mass sits on the cut
    rel_grid = np.mod(grid - mode + np.pi, 2 * np.pi)
    order = np.argsort(rel_grid)
    cdf = integrate.cumulative_trapezoid(dens[order], rel_grid[order], initial=0.0)
    cdf /= cdf[-1]
    ang = np.mod(np.arctan2(post.theta[:, 1], post.theta[:, 0]) - mode + np.pi, 2 * np.pi)
    w = post.weights
    o = np.argsort(ang)
    pcdf = np.cumsum(w[o])
    exact_at = np.interp(ang[o], rel_grid[order], cdf)
    ks = np.max(np.maximum(np.abs(pcdf - exact_at), np.abs(pcdf - w[o] - exact_at)))
    assert ks < 0.02


def test_d4_mean_direction_agrees_with_emcee():
    # Reference: emcee (Foreman-Mackey et al. 2013) long ensemble chain on R^4 with
    # target L(x/|x|) N(x; 0, I), whose direction x/|x| has the uniform-prior posterior.
    import emcee
    rng = np.random.default_rng(20)
    true = np.array([0.5, -0.5, 0.5, 0.5])
    sets = _demo_sets(rng, 4, 15, 4, true, 3.0)

    def logp(x):
        r = np.linalg.norm(x)
        if r == 0:
            return -np.inf
        ll = sum(choice.boltzmann_loglik(f, c, x / r, 3.0)[0] for f, c in sets)
        return ll - 0.5 * r * r

    nw = 16
    sampler = emcee.EnsembleSampler(nw, 4, logp)
    sampler.random_state = np.random.RandomState(21).get_state()
    p0 = np.random.RandomState(22).standard_normal((nw, 4))
    sampler.run_mcmc(p0, 4000, progress=False)
    chain = sampler.get_chain(discard=1000, flat=True)
    dirs = chain / np.linalg.norm(chain, axis=1, keepdims=True)
    ref = dirs.mean(axis=0)
    ref /= np.linalg.norm(ref)
    post, _ = _run(PosteriorConfig(n_particles=8000, model='boltzmann', beta=3.0), sets, 4, 23)
    assert float(post.mean_direction() @ ref) >= 0.99


def test_concentrates_on_true_weights_both_models():
    rng = np.random.default_rng(30)
    true = np.array([0.8, -0.2, 0.4, 0.0, -0.4])
    true /= np.linalg.norm(true)
    for model in ('boltzmann', 'less'):
        sets = _demo_sets(rng, 25, 40, 5, true, 8.0, model)
        post, infos = _run(PosteriorConfig(n_particles=3000, model=model, beta=8.0),
                           sets, 5, 31)
        s = post.summary()
        assert float(s.mean @ true) > 0.95
        assert any(i.resampled for i in infos)
        assert s.n_demonstrations == 25
        assert np.all(s.ci_low <= s.ci_high)
        assert 0.0 < s.concentration <= 1.0
        assert abs(np.linalg.norm(s.map) - 1.0) < 1e-12


def test_beta_inference_recovers_rationality_order():
    rng = np.random.default_rng(40)
    true = np.array([1.0, 0.0, 0.0])
    means = []
    for beta in (1.0, 10.0):
        sets = _demo_sets(rng, 30, 30, 3, true, beta)
        cfg = PosteriorConfig(n_particles=3000, model='boltzmann', beta_range=(0.1, 50.0))
        post, _ = _run(cfg, sets, 3, 41)
        s = post.summary()
        assert s.beta_ci[0] <= s.beta_mean <= s.beta_ci[1]
        means.append(s.beta_mean)
    assert means[1] > 2 * means[0]


def test_ess_and_systematic_resampling():
    # Kong (1992): ESS of uniform weights is N; Douc & Cappe (2005), from memory:
    # systematic resampling keeps each count within 1 of N w_i (unbiased).
    n = 1000
    assert ess_from_log_weights(np.zeros(n)) == pytest.approx(n)
    lw = np.full(n, -np.inf)
    lw[7] = 0.0
    assert ess_from_log_weights(lw) == pytest.approx(1.0)
    rng = np.random.default_rng(50)
    w = rng.dirichlet(np.ones(n))
    idx = systematic_resample(np.log(w), rng)
    counts = np.bincount(idx, minlength=n)
    assert np.all(np.abs(counts - n * w) < 1.0 + 1e-9)
    mean_counts = np.mean([np.bincount(systematic_resample(np.log(w), rng), minlength=n)
                           for _ in range(400)], axis=0)
    np.testing.assert_allclose(mean_counts, n * w, atol=0.15)


def test_one_surviving_particle_and_ties():
    rng = np.random.default_rng(60)
    post = ParticlePosterior.create(PosteriorConfig(n_particles=50, model='boltzmann',
                                                    beta=500.0), 2, rng)
    x = np.array([[1.0, 0.0], [-1.0, 0.0], [1.0, 0.0]])  # a tie: options 0 and 2 equal
    post2, info = post.update((x, 0), rng)
    assert info.resampled
    assert np.all(np.isfinite(post2.log_weights))
    assert post2.summary().mean[0] > 0.9
    assert np.isclose(post2.weights.sum(), 1.0)


def test_deterministic_given_generator():
    rng = np.random.default_rng(70)
    sets = _demo_sets(rng, 6, 10, 3, np.array([0, 1.0, 0]), 4.0)
    cfg = PosteriorConfig(n_particles=500, model='less', beta=4.0)
    a, _ = _run(cfg, sets, 3, 5)
    b, _ = _run(cfg, sets, 3, 5)
    np.testing.assert_array_equal(a.theta, b.theta)
    np.testing.assert_array_equal(a.log_weights, b.log_weights)


def test_rejected_update_leaves_posterior_unchanged():
    rng = np.random.default_rng(80)
    post = ParticlePosterior.create(PosteriorConfig(n_particles=100), 3, rng)
    before = (post.theta.copy(), post.log_weights.copy(), len(post.records))
    good = np.eye(3)
    bad_cases = [
        (np.array([[np.nan, 0, 0], [0, 1, 0]]), 0, 'non-finite'),
        (np.zeros((0, 3)), 0, 'empty'),
        (good, 3, 'out of range'),
        (np.ones((3, 2)), 0, 'd = 2'),
    ]
    for x, c, word in bad_cases:
        with pytest.raises(ValueError, match=word):
            post.update((x, c), rng)
    np.testing.assert_array_equal(post.theta, before[0])
    np.testing.assert_array_equal(post.log_weights, before[1])
    assert len(post.records) == before[2]


@pytest.mark.parametrize('kwargs, word', [
    (dict(n_particles=0), 'n_particles'), (dict(beta=0.0), 'beta'),
    (dict(beta=-1.0), 'beta'), (dict(model='logit'), 'model'),
    (dict(beta_range=(2.0, 1.0)), 'beta_range'), (dict(prior='vmf'), 'prior_mean'),
    (dict(bandwidth=-0.1), 'bandwidth'),
])
def test_bad_config(kwargs, word):
    with pytest.raises(ValueError, match=word):
        PosteriorConfig(**kwargs)


def test_vmf_prior_mean_and_save_load(tmp_path):
    # Reference: scipy.stats.vonmises_fisher (Wood 1994 sampler); mean resultant
    # length of the prior particles matches the distribution's own mean length.
    from scipy.stats import vonmises_fisher
    mu = np.array([0.0, 0.0, 1.0])
    cfg = PosteriorConfig(n_particles=20000, prior='vmf', prior_mean=tuple(mu),
                          prior_kappa=5.0, beta_range=(0.5, 20.0))
    rng = np.random.default_rng(90)
    post = ParticlePosterior.create(cfg, 3, rng)
    ref_len = np.linalg.norm(vonmises_fisher(mu, 5.0).rvs(200000, random_state=1).mean(0))
    assert post.summary().concentration == pytest.approx(ref_len, abs=0.01)
    post, _ = post.update((np.eye(3), 2), rng)
    post.save(tmp_path / 'p')
    back = ParticlePosterior.load(tmp_path / 'p')
    np.testing.assert_array_equal(back.theta, post.theta)
    np.testing.assert_array_equal(back.log_beta, post.log_beta)
    np.testing.assert_array_equal(back.records[0].features, post.records[0].features)
    assert back.config == post.config


def _dense_case():
    """A set where many alternatives crowd around one point and the demo is elsewhere."""
    rng = np.random.default_rng(100)
    alts = np.vstack([rng.normal([1.0, 0.0], 0.05, (6, 2)), rng.normal(0, 1.0, (14, 2))])
    demo = np.array([[0.2, 1.0]])
    return np.vstack([demo, alts])


def _grid_mean(sets, model, bandwidth='scott'):
    """Posterior mean angle under a uniform prior by quadrature on a fine grid."""
    a = np.linspace(-np.pi, np.pi, 4001)[:-1]
    th = np.stack([np.cos(a), np.sin(a)], 1)
    ll = sum(choice.get_model(model)(x, 0, th, 3.0, log_sim=choice.log_similarity_sums(
        x, bandwidth)) for x in sets)
    w = np.exp(ll - ll.max())
    m = (w[:, None] * th).sum(0)
    return np.arctan2(m[1], m[0])


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), frac=st.floats(0.1, 0.6))
def test_duplicating_alternatives_barely_moves_less(seed, frac):
    # Property from the definition of LESS (a kernel-density normaliser makes the
    # model insensitive to how often an option was sampled): duplicating a random
    # subset of alternatives x5 moves the LESS posterior mean by < 0.05 rad. The
    # invariance holds while distinct options do not overlap under the kernel, so the
    # set is a jittered grid and h = 0.05 (standardised units); with overlapping
    # kernels a duplicated option also takes mass from its neighbours, as LESS intends.
    rng = np.random.default_rng(seed)
    # distinct options: a jittered 5 x 5 grid (spacing 1, jitter < 0.2), shuffled
    g = np.stack(np.meshgrid(np.arange(5.0), np.arange(5.0)), -1).reshape(25, 2)
    x = rng.permutation(g + rng.uniform(-0.2, 0.2, g.shape))
    pick = rng.random(24) < frac
    dup = x[1:][pick]
    x2 = np.vstack([x] + [dup] * 4)
    a = _grid_mean([x], 'less', 0.05)
    b = _grid_mean([x2], 'less', 0.05)
    assert abs(np.angle(np.exp(1j * (a - b)))) < 0.05


def test_duplicating_dense_alternatives_moves_boltzmann():
    x = _dense_case()
    x2 = np.vstack([x] + [x[1:7]] * 4)
    db = abs(np.angle(np.exp(1j * (_grid_mean([x], 'boltzmann')
                                   - _grid_mean([x2], 'boltzmann')))))
    dl = abs(np.angle(np.exp(1j * (_grid_mean([x], 'less') - _grid_mean([x2], 'less')))))
    assert db > 0.1
    assert dl < 0.05
    assert db > 3 * dl


def test_option_densities_match_scipy():
    # References: scipy.stats.gaussian_kde with Scott's factor (Scott 1992) and
    # scipy.stats.multivariate_normal with the sample mean and covariance (to 1e-6: the
    # tiny ridge that keeps degenerate sets invertible).
    from scipy.stats import gaussian_kde, multivariate_normal
    from pref_learner.posterior import log_option_density
    rng = np.random.default_rng(80)
    pts = rng.normal(size=(150, 4)) @ rng.normal(size=(4, 4))
    mvn = multivariate_normal(pts.mean(0), np.cov(pts, rowvar=False))
    for x in rng.normal(size=(5, 4)):
        assert log_option_density(pts, x, 'kde') == pytest.approx(
            float(gaussian_kde(pts.T).logpdf(x)[0]), rel=1e-6)
        assert log_option_density(pts, x, 'gaussian') == pytest.approx(
            float(mvn.logpdf(x)), rel=1e-6)


def test_deviation_evidence_of_option_levels_matches_scipy_kde():
    # Reference: scipy.stats.gaussian_kde (Scott's factor, Scott 1992) of the log
    # deviations of each level's own options, evaluated at the demonstration's log
    # deviation; with one level the term is a constant (0).
    from scipy.stats import gaussian_kde
    from pref_learner.posterior import ChoiceRecord
    rng = np.random.default_rng(81)
    k = 1 + 3 * 60
    x = rng.normal(size=(k, 3))
    groups = np.concatenate([[-1], np.repeat(np.arange(3), 60)])
    spreads = np.array([0.04, 0.08, 0.16])
    dev = np.concatenate([[0.05], spreads[groups[1:]] * rng.uniform(0.05, 1.0, k - 1)])
    rec = ChoiceRecord.build(x, 0, groups=groups, n_levels=3, density='deviation',
                             deviation=dev)
    for lev in range(3):
        ref = gaussian_kde(np.log(dev[1:][groups[1:] == lev])).logpdf(np.log(0.05))[0]
        assert rec.log_density[lev] == pytest.approx(float(ref), rel=1e-9)
    # the demonstration's deviation lies inside the middle level's range, beyond the
    # narrow one's: the middle level has the larger density
    assert rec.log_density[1] > rec.log_density[0]
    with pytest.raises(ValueError, match='deviation'):
        ChoiceRecord.build(x, 0, groups=groups, n_levels=3, density='deviation')
    with pytest.raises(ValueError, match='deviation must be'):
        ChoiceRecord.build(x, 0, groups=groups, n_levels=3, density='deviation',
                           deviation=-dev)
    one = ChoiceRecord.build(x, 0, density='deviation', deviation=dev)
    assert one.log_density.tolist() == [0.0]


def test_path_deviation_by_hand():
    # Worked by hand: joint 0 moves 0 -> 1 (span 2); joint 1 bulges by 0.3 (span 1.5)
    # at the middle waypoint only, perpendicular to the line. Normalised, the middle
    # waypoint is 0.2 from the line, the others 0, so the RMS over 5 waypoints is
    # sqrt(0.2^2 / 5). A path retimed along its own line deviates by 0.
    from pref_learner.alternatives import path_deviation
    q = np.zeros((2, 5, 2))
    q[:, :, 0] = np.linspace(0.0, 1.0, 5)
    q[0, 2, 1] = 0.3
    q[1, :, 0] = np.array([0.0, 0.1, 0.15, 0.9, 1.0])
    span = np.array([2.0, 1.5])
    np.testing.assert_allclose(path_deviation(q, span), [np.sqrt(0.04 / 5), 0.0], atol=1e-15)


def _sharp_circle_demonstration():
    """One very informative demonstration on the circle: ``(x (40, 2), chosen)``."""
    rng = np.random.default_rng(90)
    x = rng.standard_normal((40, 2))
    true = np.array([np.cos(2.0), np.sin(2.0)])
    return x, int(np.argmax(x @ true)), rng


def _exact_circle_mean(model, x, c, beta):
    """Posterior mean of theta on the circle, uniform prior (scipy.integrate quadrature)."""
    grid = np.linspace(-np.pi, np.pi, 20001)
    th = np.stack([np.cos(grid), np.sin(grid)], axis=1)
    ll = choice.get_model(model)(x, c, th, beta)
    dens = np.exp(ll - ll.max())
    dens /= integrate.trapezoid(dens, grid)
    return integrate.trapezoid(dens[:, None] * th, grid, axis=0)


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_tempered_update_of_a_sharp_demonstration_matches_quadrature(model):
    # One very informative demonstration (beta 40): tempering takes several steps with
    # moves between them; the result still matches the exact posterior on the circle
    # (scipy.integrate quadrature, as above).
    x, c, rng = _sharp_circle_demonstration()
    post = ParticlePosterior.create(PosteriorConfig(n_particles=8000, model=model, beta=40.0),
                                    2, rng)
    post, info = post.update((x, c), rng)
    assert info.tempering_steps > 1 and 0.0 < info.acceptance < 1.0
    np.testing.assert_allclose(post.weights @ post.theta, _exact_circle_mean(model, x, c, 40.0),
                               atol=0.02)
    assert np.all(np.isfinite(post.theta))


def test_the_last_tempering_step_allowed_weighs_in_the_rest(monkeypatch):
    # Were the step cap reached with part of the demonstration still out, the posterior
    # would store its record but miss that part: the last step allowed takes the rest
    # (quadrature on the circle, as above, is the reference)
    import pref_learner.posterior as posterior_module
    monkeypatch.setattr(posterior_module, 'MAX_TEMPERING_STEPS', 2)
    x, c, rng = _sharp_circle_demonstration()
    post = ParticlePosterior.create(PosteriorConfig(n_particles=8000, model='boltzmann',
                                                    beta=40.0), 2, rng)
    post, info = post.update((x, c), rng)
    assert info.tempering_steps == 2
    np.testing.assert_allclose(post.weights @ post.theta,
                               _exact_circle_mean('boltzmann', x, c, 40.0), atol=0.02)


def test_moves_left_pending_are_not_dropped_by_the_next_update():
    # update(move=False) leaves duplicated particles for rejuvenate(); an update that
    # comes first and does not resample must keep them pending (or run them), never
    # clear the flag with the copies unmoved (common practice: SMC rejuvenation)
    x, c, rng = _sharp_circle_demonstration()
    cfg = PosteriorConfig(n_particles=2000, model='boltzmann', beta=40.0)
    post = ParticlePosterior.create(cfg, 2, rng)
    pending, info = post.update((x, c), rng, move=False)
    assert info.resampled and pending.moves_pending
    distinct = len(np.unique(pending.theta, axis=0))
    mild = (np.array([[0.0, 0.0], [1e-3, 0.0]]), 0)         # almost no information
    later, info = pending.update(mild, rng, move=False)
    assert not info.resampled and later.moves_pending
    moved, info = pending.update(mild, rng)
    assert not moved.moves_pending and len(np.unique(moved.theta, axis=0)) > distinct


def test_a_set_without_alternatives_is_refused():
    # a set of the demonstration alone carries no choice (its likelihood is 1 for every
    # weight) and broke the moves' screen once stored
    post = ParticlePosterior.create(PosteriorConfig(n_particles=50), 3,
                                    np.random.default_rng(0))
    with pytest.raises(ValueError, match='at least one alternative'):
        post.update((np.ones((1, 3)), 0), np.random.default_rng(1))


def test_a_given_loglik_is_checked_as_a_weighed_one():
    x, c, rng = _sharp_circle_demonstration()
    post = ParticlePosterior.create(PosteriorConfig(n_particles=200, model='boltzmann'), 2, rng)
    rec, ll = post.weigh((x, c))
    ll[3] = np.nan
    with pytest.raises(ValueError, match='non-finite log-likelihood'):
        post.update(rec, rng, loglik=ll)


def test_option_levels_and_near_optimal_alternatives():
    # Near-optimal draws climb the reward of their weights (each ascent step is along a
    # smoothed gradient), and every alternative carries its option level. The weight is on
    # a smooth feature (the quadratic slot approach offset), so fixed steps climb it.
    from pref_learner.alternatives import AlternativeSampler, SamplerConfig
    from pref_learner.learner import Learner, LearnerConfig
    L = Learner(LearnerConfig(n_particles=10, n_alternatives=50))
    _, start, goal = L.tasks()[0]
    w = np.zeros((20, L.features.d))
    w[:, L.features.names.index('slot_approach_offset')] = -1.0
    cfg = SamplerConfig(20, {'near_optimal': 1.0}, (0.08,), ascent_steps=0)
    flat = AlternativeSampler(L.robot, 64, cfg, n_features=6, ascent=L.reward_gradient)
    steep = AlternativeSampler(L.robot, 64, SamplerConfig(20, {'near_optimal': 1.0}, (0.08,)),
                               n_features=6, ascent=L.reward_gradient)
    q0, _ = flat.sample(start, goal, np.random.default_rng(1), weights=lambda k, r: w)
    q1, g = steep.sample(start, goal, np.random.default_rng(1), weights=lambda k, r: w)
    assert np.all(L.reward_gradient(q1, w)[0] > L.reward_gradient(q0, w)[0])
    assert np.all(q1 >= L.robot.lower) and np.all(q1 <= L.robot.upper)
    np.testing.assert_array_equal(q1[:, 0], np.broadcast_to(start, (20, 7)))
    _, feats, groups = L.choice_set(q1[0], 0)
    assert groups[0] == -1 and set(groups[1:]) == set(range(len(L.option_labels())))


def _kernel_log_sums(x, h):
    """log S_i = log sum_k exp(-|z_i - z_k|^2 / (2 h^2)), z standardised per column (ddof 1).

    Straight from the definition of the similarity term (choice.py's docstring), with numpy.
    """
    z = (x - x.mean(axis=0)) / x.std(axis=0, ddof=1)
    d2 = ((z[:, None, :] - z[None, :, :]) ** 2).sum(axis=2)
    return np.log(np.exp(-d2 / (2.0 * h * h)).sum(axis=1))


def test_set_log_similarity_reuses_the_records_term_at_the_configured_bandwidth():
    # The diagnostics' similarity term is the likelihood's: the record's stored term (built
    # with the configured bandwidth) where it covers the set, else computed with it. The
    # stored term keeps the chosen row's value apart (log_sim_chosen) and holds 0 in its
    # row, which the report's density plot used to read as the demonstration's.
    from pref_learner.alternatives import set_diagnostics
    from pref_learner.posterior import ChoiceRecord, set_log_similarity
    rng = np.random.default_rng(12)
    x = rng.standard_normal((30, 3))
    ref = _kernel_log_sums(x, 0.6)
    rec = ChoiceRecord.build(x, 4, 0.6)
    assert rec.log_sim[4] == 0.0 and ref[4] > 0.1
    np.testing.assert_allclose(set_log_similarity([rec], 'scott'), ref, rtol=1e-12)
    two = ChoiceRecord.build(x, 4, 0.6, groups=np.arange(30) % 2, n_levels=2)
    np.testing.assert_allclose(set_log_similarity([two], 0.6), ref, rtol=1e-12)
    bolt = ChoiceRecord.build(x, 4, 0.6, with_similarity=False)
    np.testing.assert_allclose(set_log_similarity([bolt, rec], 0.9), ref, rtol=1e-12)
    np.testing.assert_allclose(set_log_similarity([bolt], 0.6), ref, rtol=1e-12)
    diag = set_diagnostics(x, 4, bandwidth=0.6)
    assert diag['relative_density'] == pytest.approx(np.exp(ref[4] - np.median(ref)),
                                                     rel=1e-12)


def test_moves_and_their_likelihoods_come_from_registries(monkeypatch):
    # The moves draw in registry order (sphere, log beta, level: the order results were
    # stored with); the likelihood a move evaluates comes from the provider that
    # move_likelihood names: a registered copy of the exact provider gives the exact
    # provider's posterior bit for bit, and an unknown name lists the registry.
    from pref_learner import posterior as pm
    assert list(pm.MOVES) == ['sphere', 'log_beta', 'level']
    assert list(pm.MOVE_LIKELIHOODS) == ['exact', 'expansion']
    monkeypatch.setattr(pm, 'MOVE_LIKELIHOODS', dict(pm.MOVE_LIKELIHOODS))
    calls = []

    class Counted(pm.ExactMoveLikelihood):
        name = 'exact_counted'

        def target(self, post, theta, beta, level):
            calls.append(len(post.records))
            return super().target(post, theta, beta, level)

    pm.register_move_likelihood(Counted())
    rng = np.random.default_rng(4)
    sets = _demo_sets(rng, 8, 12, 3, np.array([0.6, 0.8, 0.0]), 3.0)
    posts = {}
    for ml in ('exact', 'exact_counted'):
        cfg = PosteriorConfig(n_particles=400, model='less', beta_range=(0.5, 20.0),
                              move_likelihood=ml)
        posts[ml] = _run(cfg, sets, 3, 5)[0]
    assert calls and max(calls) <= len(sets)
    for key in ('theta', 'log_beta', 'log_lik', 'log_weights'):
        np.testing.assert_array_equal(getattr(posts['exact'], key),
                                      getattr(posts['exact_counted'], key))
    with pytest.raises(ValueError, match='exact, expansion, exact_counted'):
        PosteriorConfig(move_likelihood='quadratic')


def test_uniform_scale_mixture_matches_scipy_and_the_incomplete_gamma():
    # References: (1) scipy.integrate.quad over the amplitude a in [0, 1] of the normal
    # density scipy.stats.multivariate_normal(0, a^2 diag(var)); (2) the closed form
    # int_0^1 a^-D exp(-Q / (2 a^2)) da = 1/2 (2/Q)^((D-1)/2) Gamma((D-1)/2, Q/2)
    # (substitute u = Q / (2 a^2); Gamma the upper incomplete gamma, scipy.special);
    # (3) far beyond the support, where the incomplete gamma underflows, its asymptotic
    # series Gamma(s, x) ~ x^(s-1) e^-x sum_k (s-1)...(s-k) / x^k (Abramowitz & Stegun
    # 6.5.32).
    from scipy.special import gammaincc, gammaln
    from scipy.stats import multivariate_normal
    from pref_learner.posterior import log_uniform_scale_mixture
    rng = np.random.default_rng(82)
    for D in (1, 3):
        var = rng.uniform(0.5, 2.0, D)
        for x in (rng.normal(size=D) * 0.3, rng.normal(size=D) * 1.5):
            def pdf(a):
                return multivariate_normal(np.zeros(D), np.diag(a * a * var)).pdf(x) \
                    if a > 0 else 0.0
            ref, _ = integrate.quad(pdf, 0.0, 1.0, epsabs=0, epsrel=1e-11, limit=200)
            assert log_uniform_scale_mixture(x, var) == pytest.approx(math.log(ref), abs=1e-7)

    def closed(Q, D, var):
        s = 0.5 * (D - 1)
        return (-0.5 * D * math.log(2 * math.pi) - 0.5 * np.sum(np.log(var)) + math.log(0.5)
                + s * math.log(2 / Q) + gammaln(s) + math.log(gammaincc(s, Q / 2)))
    D = 18
    var = rng.uniform(0.5, 2.0, D)
    z = rng.normal(size=D) * np.sqrt(var)
    for amp in (0.05, 0.5, 1.0, 2.0):          # inside the support, at its edge, beyond
        x = amp * z
        Q = float(np.sum(x * x / var))
        assert log_uniform_scale_mixture(x, var) == pytest.approx(closed(Q, D, var),
                                                                  abs=1e-7)
    x = 30.0 * z
    Q = float(np.sum(x * x / var))
    s, h = 0.5 * (D - 1), Q / 2
    terms, t = [], 1.0
    for k in range(8):
        terms.append(t)
        t *= (s - 1 - k) / h
    log_gamma_upper = (s - 1) * math.log(h) - h + math.log(sum(terms))
    far = (-0.5 * D * math.log(2 * math.pi) - 0.5 * np.sum(np.log(var)) + math.log(0.5)
           + s * math.log(2 / Q) + log_gamma_upper)
    assert log_uniform_scale_mixture(x, var) == pytest.approx(far, abs=1e-6)
    # inside both supports the density is about 1 / spread (a point much nearer the
    # origin than either edge): doubling the spread (var x 4) costs log 2
    x = 0.02 * z
    assert (log_uniform_scale_mixture(x, var) - log_uniform_scale_mixture(x, 4 * var)
            == pytest.approx(math.log(2.0), abs=1e-6))
    with pytest.raises(ValueError, match='var > 0'):
        log_uniform_scale_mixture(x, -var)


def test_path_modes_by_hand():
    # Worked by hand (orthonormal discrete sine basis sqrt(2/(T-1)) sin(pi k i/(T-1)),
    # DST-I; common practice): joint 0 moves 0 -> 1 along the line, joint 1 (span 2)
    # bulges by 0.4 sin(pi i / (T - 1)), perpendicular to the line; scaled, that is
    # 0.2 sin(...), whose first coefficient is 0.2 sqrt((T - 1) / 2) and the others 0.
    # A path retimed along its own line has no deviation at all.
    from pref_learner.alternatives import path_modes
    T = 9
    i = np.arange(T)
    q = np.zeros((2, T, 2))
    q[:, :, 0] = i / (T - 1)
    q[0, :, 1] = 0.4 * np.sin(np.pi * i / (T - 1))
    q[1, :, 0] = (i / (T - 1)) ** 2
    c = path_modes(q, np.array([1.0, 2.0]), 3)
    assert c.shape == (2, 3, 2)
    ref = np.zeros((3, 2))
    ref[0, 1] = 0.2 * math.sqrt((T - 1) / 2)
    np.testing.assert_allclose(c[0], ref, atol=1e-14)
    np.testing.assert_allclose(c[1], 0.0, atol=1e-14)
    with pytest.raises(ValueError, match='n_modes'):
        path_modes(q, np.array([1.0, 2.0]), T - 1)


def test_modes_evidence_tells_the_spread_of_a_demonstration():
    # Reference: the law of a smooth level (isotropic Gaussian modes perpendicular to
    # the line, mode variances falling as k^-4, amplitude uniform in [0, 1]) integrated
    # over the amplitude by scipy.integrate.quad with the level's true variances. With
    # many draws per level the moment-matched variances come within a few percent, so
    # the evidence agrees to ~0.1 nat a dimension. A demonstration drawn from the middle
    # level at amplitude 0.8 (a choice tilted outward) is most likely under the middle
    # level, next the wide one (about log 2 less: inside a level's reach the density is
    # about 1 / spread), and far less under the narrow one, whose paths cannot reach it.
    from scipy.stats import norm
    from pref_learner.posterior import ChoiceRecord
    rng = np.random.default_rng(83)
    n, m, per = 7, 3, 4000
    spreads = np.array([0.04, 0.08, 0.16])
    sd_mode = 1.0 / np.arange(1, m + 1) ** 2
    u = np.array([1.0, 1.0, 0, 0, 0, 0, 0]) / math.sqrt(2.0)

    def draw(k, spread, amp=None):
        z = rng.normal(size=(k, m, n)) * sd_mode[None, :, None]
        z -= np.sum(z * u, axis=2, keepdims=True) * u         # into the perpendicular space
        a = rng.random(k) if amp is None else np.full(k, amp)
        return z * (spread * a)[:, None, None]
    demo = draw(1, spreads[1], 1.0)
    # a typical direction and size of the unit-amplitude draw (its whitened squared norm
    # at its mean, D = m (n - 1)), then amplitude 0.8
    whitened = np.sum(demo[0] ** 2 / (spreads[1] * sd_mode[:, None]) ** 2)
    demo *= 0.8 * math.sqrt(m * (n - 1) / whitened)
    coeffs = np.concatenate([demo] + [draw(per, s) for s in spreads])
    groups = np.concatenate([[-1], np.repeat(np.arange(3), per)])
    x = rng.normal(size=(len(groups), 2))
    rec = ChoiceRecord.build(x, 0, groups=groups, n_levels=3, density='modes',
                             deviation=coeffs)
    q = np.sum(demo[0] ** 2, axis=1)
    ref = []
    for s in spreads:
        def f(a):
            sd = a * s * sd_mode
            # per mode, n - 1 free coordinates of squared norm q_k
            return float(np.prod(norm.pdf(np.sqrt(q / (n - 1)), scale=sd) ** (n - 1)))
        val, _ = integrate.quad(f, 0.0, 1.0, epsabs=0, epsrel=1e-10, limit=200,
                                points=[0.8])
        ref.append(math.log(val))
    np.testing.assert_allclose(rec.log_density, ref, atol=0.1 * m * (n - 1))
    assert rec.log_density[1] > rec.log_density[2] > rec.log_density[0] + 5.0
    assert rec.log_density[1] - rec.log_density[2] == pytest.approx(math.log(2.0), abs=0.5)
    with pytest.raises(ValueError, match='modes'):
        ChoiceRecord.build(x, 0, groups=groups, n_levels=3, density='modes',
                           deviation=coeffs[:, 0])
    with pytest.raises(ValueError, match='needs the deviation'):
        ChoiceRecord.build(x, 0, groups=groups, n_levels=3, density='modes')


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_provisional_estimate_after_a_tempering_step_matches_quadrature(model):
    # A demonstration too sharp for one importance step (its ESS below the floor) hands
    # out its provisional estimate after a tempering step and its moves: the particles
    # at phi weighted by the rest of the likelihood (self-normalised importance sampling,
    # common practice). Its mean matches the exact posterior (scipy.integrate quadrature on
    # the circle, as above), its ESS is at least the floor, and learning is the same with
    # or without it.
    x, c, _ = _sharp_circle_demonstration()
    cfg = PosteriorConfig(n_particles=8000, model=model, beta=40.0)
    prior = ParticlePosterior.create(cfg, 2, np.random.default_rng(91))
    rec, ll = prior.weigh((x, c))
    one_step = prior.reweighted(rec, ll).ess
    floor = 2.0 * one_step
    assert floor < cfg.ess_target * cfg.n_particles      # the case this test is about
    got = []
    post, info = prior.update(rec, np.random.default_rng(92), loglik=ll,
                              on_provisional=got.append, provisional_ess=floor)
    ref, _ = prior.update(rec, np.random.default_rng(92), loglik=ll)
    np.testing.assert_array_equal(post.theta, ref.theta)
    np.testing.assert_array_equal(post.log_weights, ref.log_weights)
    assert len(got) == 1 and info.tempering_steps > 1
    early = got[0]
    # the floor holds with copies of a particle counted once
    assert early.distinct_ess() >= floor and not np.array_equal(early.theta, prior.theta)
    # after a step the particles are equally weighted, so the log-weights are the rest of
    # the likelihood, (1 - phi) ll + const, with 0 < 1 - phi < 1 (a least-squares fit)
    ll_early = early.record_loglik(rec, early.theta, early.beta, early.level)
    slope, const = np.polyfit(ll_early, early.log_weights, 1)
    assert 0.0 < slope < 1.0 - 1e-9
    np.testing.assert_allclose(early.log_weights, slope * ll_early + const, rtol=0, atol=1e-9)
    np.testing.assert_allclose(early.weights @ early.theta,
                               _exact_circle_mean(model, x, c, 40.0), atol=0.005)
    # a floor no step reaches hands out nothing
    none = []
    prior.update(rec, np.random.default_rng(92), loglik=ll, on_provisional=none.append,
                 provisional_ess=float(cfg.n_particles))
    assert none == []


def test_published_ess_counts_copies_of_a_particle_once():
    # Kish's effective sample size (sum w)^2 / sum w^2 (Kish 1965, Survey Sampling), with
    # identical particles (the copies resampling makes) merged before counting, worked by
    # hand. The tempering rule keeps the ESS of the weights themselves (Kong 1992).
    cfg = PosteriorConfig(n_particles=4, model='less', beta_range=(0.5, 50.0), n_levels=2)
    post = ParticlePosterior.create(cfg, 3, np.random.default_rng(0))
    post = replace(post, log_beta=np.zeros(4), level=np.zeros(4, dtype=np.int64))
    copies = post._take(np.array([0, 0, 1, 2]))          # equal weights 1/4
    assert copies.ess == pytest.approx(4.0)
    # merged weights 1/2, 1/4, 1/4: 1 / (1/4 + 1/16 + 1/16) = 8/3
    assert copies.distinct_ess() == pytest.approx(8.0 / 3.0)
    assert copies.summary().ess == pytest.approx(8.0 / 3.0)
    # weights 0.1, 0.2, 0.3, 0.4 on particles 0, 0, 1, 2: merged 0.3, 0.3, 0.4,
    # 1 / (0.09 + 0.09 + 0.16) = 1 / 0.34
    lw = np.log([0.1, 0.2, 0.3, 0.4])
    assert copies.distinct_ess(lw) == pytest.approx(1.0 / 0.34)
    # the same direction with another rationality or level is another particle
    other = replace(copies, log_beta=copies.log_beta + np.array([0.0, 0.5, 0.0, 0.0]))
    assert other.distinct_ess() == pytest.approx(4.0)
    lev = replace(copies, level=np.array([0, 1, 0, 0]))
    assert lev.distinct_ess() == pytest.approx(4.0)


def test_distinct_ess_in_many_dimensions_and_odd_particle_counts():
    # the merge compares whole rows: any number of features, any particle count (copies
    # of one particle are one however the linear algebra rounds); Kish's ESS by hand
    for d, n in ((17, 1003), (40, 301)):
        cfg = PosteriorConfig(n_particles=n, model='less')
        post = ParticlePosterior.create(cfg, d, np.random.default_rng(d))
        one = post._take(np.zeros(n, dtype=np.int64))
        assert one.distinct_ess() == pytest.approx(1.0)
        two = post._take(np.arange(n) % 2)                  # two particles, near-equal shares
        share = np.bincount(np.arange(n) % 2) / n
        assert two.distinct_ess() == pytest.approx(1.0 / np.sum(share ** 2))
        assert np.isfinite(post.summary().ess)
