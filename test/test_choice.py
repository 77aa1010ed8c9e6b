# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Choice models against outside references (sources named beside each check)."""

import numpy as np
import pytest
from scipy import optimize, stats

from pref_learner import choice


def _sets(rng, n_sets=60, k=6, d=3, true_b=(1.5, -1.0, 0.5)):
    """Synthetic discrete-choice data drawn from a conditional logit with coefficients b."""
    b = np.asarray(true_b)
    feats, chosen = [], []
    for _ in range(n_sets):
        x = rng.standard_normal((k, d))
        u = x @ b
        p = np.exp(u - u.max())
        p /= p.sum()
        feats.append(x)
        chosen.append(int(rng.choice(k, p=p)))
    return feats, chosen


def test_boltzmann_mle_equals_conditional_logit():
    # Reference: McFadden (1974) conditional logit, as implemented by statsmodels
    # ConditionalLogit; the Boltzmann model over a finite set is the same likelihood.
    from statsmodels.discrete.conditional_models import ConditionalLogit
    rng = np.random.default_rng(1)
    feats, chosen = _sets(rng)

    def nll(b):
        nrm = np.linalg.norm(b)
        return -sum(choice.boltzmann_loglik(x, c, b / nrm, beta=nrm)[0]
                    for x, c in zip(feats, chosen))

    ours = optimize.minimize(nll, np.array([0.3, 0.3, 0.3]), method='BFGS',
                             options={'gtol': 1e-9}).x
    endog = np.concatenate([np.eye(len(x))[c] for x, c in zip(feats, chosen)])
    exog = np.concatenate(feats)
    groups = np.repeat(np.arange(len(feats)), [len(x) for x in feats])
    ref = ConditionalLogit(endog, exog, groups=groups).fit(disp=False).params
    np.testing.assert_allclose(ours, ref, atol=1e-3)


def test_probabilities_match_choix_luce():
    # Reference: Luce (1959) choice axiom, choix.probabilities (strengths exp(params)).
    import choix
    rng = np.random.default_rng(2)
    params = rng.normal(size=7)
    items = [0, 2, 3, 6]
    ref = choix.probabilities(items, params)
    x = np.eye(7)[items]  # one-hot features: reward of item i = params[i]
    nrm = np.linalg.norm(params)
    ours = choice.choice_probabilities(x, params / nrm, beta=nrm, model='boltzmann')
    np.testing.assert_allclose(ours, ref, rtol=1e-12)


@pytest.mark.parametrize('n_copies', list(range(1, 21)))
def test_duplicates_lone_option_share(n_copies):
    # Reference: Debreu (1960) review of Luce, the duplicated-option example (from
    # memory): Luce/Boltzmann gives the lone option 1/(N+1); a similarity-discounted
    # model gives 1/2 when the copies are identical and far from the lone option.
    x = np.vstack([[1.0, 0.0], np.tile([0.0, 1.0], (n_copies, 1))])
    theta = np.array([1.0, 1.0]) / np.sqrt(2.0)  # equal rewards
    pb = choice.choice_probabilities(x, theta, 1.0, 'boltzmann')
    pl = choice.choice_probabilities(x, theta, 1.0, 'less', bandwidth=0.05)
    assert pb[0] == pytest.approx(1.0 / (n_copies + 1), abs=1e-12)
    assert pl[0] == pytest.approx(0.5, abs=1e-9)


def test_similarity_sum_is_proportional_to_gaussian_kde():
    # Reference: scipy.stats.gaussian_kde (Scott 1992 / Silverman 1986 rules); with the
    # full-covariance metric our similarity sum is the KDE at the set's points up to a
    # constant factor.
    rng = np.random.default_rng(3)
    x = rng.standard_normal((80, 3)) @ np.array([[1, 0.3, 0], [0, 2, 0.5], [0, 0, 0.7]])
    for rule in ('scott', 'silverman'):
        kde = stats.gaussian_kde(x.T, bw_method=rule)
        assert choice.resolve_bandwidth(rule, 80, 3) == pytest.approx(kde.factor, rel=1e-12)
        ours = np.exp(choice.log_similarity_sums(x, rule, metric='full'))
        ratio = ours / kde(x.T)
        np.testing.assert_allclose(ratio, ratio[0], rtol=1e-10)


def test_similarity_sum_diagonal_metric_matches_normal_mixture():
    # Reference: sum of scipy.stats.multivariate_normal densities with a diagonal
    # covariance h^2 diag(s^2) (a product-kernel KDE), proportional to ours.
    rng = np.random.default_rng(4)
    x = rng.standard_normal((40, 2)) * [1.0, 5.0]
    h = 0.4
    sd = x.std(axis=0, ddof=1)
    cov = np.diag((h * sd) ** 2)
    ref = np.array([stats.multivariate_normal(xi, cov).pdf(x).sum() for xi in x])
    ours = np.exp(choice.log_similarity_sums(x, h))
    ratio = ours / ref
    np.testing.assert_allclose(ratio, ratio[0], rtol=1e-10)
    assert np.all(ours >= 1.0)  # s(x, x) = 1


def test_less_equals_boltzmann_when_options_are_far_apart():
    # Worked example (from the definitions): if no two options are similar, every
    # S_i = 1 and the two models coincide.
    x = np.array([[0.0, 0.0], [10.0, 0.0], [0.0, 10.0], [10.0, 10.0]])
    th = np.array([[0.6, 0.8], [-1.0, 0.0]])
    a = choice.boltzmann_loglik(x, 2, th, 0.3)
    b = choice.less_loglik(x, 2, th, 0.3, bandwidth=0.01)
    np.testing.assert_allclose(a, b, atol=1e-12)


def test_large_set_chunked_similarity_matches_direct():
    rng = np.random.default_rng(5)
    x = rng.standard_normal((3000, 6))
    ours = choice.log_similarity_sums(x, 0.5)
    z = choice.standardise(x)
    idx = rng.choice(3000, 5, replace=False)
    for i in idx:
        direct = np.log(np.exp(-np.sum((z - z[i]) ** 2, axis=1) / (2 * 0.25)).sum())
        assert ours[i] == pytest.approx(direct, rel=1e-12)


def test_loglik_vectorised_and_normalised():
    rng = np.random.default_rng(6)
    x = rng.standard_normal((30, 4))
    th = rng.standard_normal((50, 4))
    th /= np.linalg.norm(th, axis=1, keepdims=True)
    for name, fn in choice.MODELS.items():
        total = np.logaddexp.reduce([fn(x, j, th, 2.0) for j in range(30)], axis=0)
        np.testing.assert_allclose(total, 0.0, atol=1e-10, err_msg=name)
        beta = rng.uniform(0.5, 3, 50)
        ll = fn(x, 3, th, beta)
        single = np.array([fn(x, 3, th[i], beta[i])[0] for i in range(50)])
        np.testing.assert_allclose(ll, single, rtol=1e-12)


def test_single_option_set_has_probability_one():
    x = np.array([[0.3, -0.2]])
    for fn in choice.MODELS.values():
        np.testing.assert_allclose(fn(x, 0, np.array([[1.0, 0.0]]), 1.0), 0.0, atol=1e-15)


@pytest.mark.parametrize('kwargs, word', [
    (dict(features=np.array([[np.nan, 1.0], [0, 0]])), 'non-finite'),
    (dict(features=np.array([[np.inf, 1.0], [0, 0]])), 'non-finite'),
    (dict(features=np.zeros((0, 2))), 'empty'),
    (dict(chosen=5), 'out of range'),
    (dict(chosen=-1), 'out of range'),
    (dict(theta=np.ones((3, 3))), 'columns'),
    (dict(beta=0.0), 'beta'),
    (dict(beta=-2.0), 'beta'),
    (dict(theta=np.zeros((0, 2))), 'theta'),
])
def test_bad_input_names_the_argument(kwargs, word):
    args = dict(features=np.array([[1.0, 0.0], [0.0, 1.0]]), chosen=0,
                theta=np.array([[1.0, 0.0]]), beta=1.0)
    args.update(kwargs)
    for fn in choice.MODELS.values():
        with pytest.raises(ValueError, match=word):
            fn(args['features'], args['chosen'], args['theta'], args['beta'])


def test_bad_bandwidth():
    x = np.eye(3)
    for bad in (0.0, -1.0, float('nan'), 'wide'):
        with pytest.raises(ValueError, match='bandwidth'):
            choice.log_similarity_sums(x, bad)
    with pytest.raises(ValueError, match='model'):
        choice.get_model('softmax')


def test_model_names_come_from_the_registry():
    # One list of model names: every place that names the models reads the registry.
    from pref_learner import compare, learner, study, validate
    assert choice.MODEL_NAMES == tuple(choice.MODELS) == ('boltzmann', 'less')
    assert choice.MODEL_CHOICES == choice.MODEL_NAMES + ('both',)
    assert learner.MODEL_CHOICES == choice.MODEL_CHOICES
    assert compare.MODELS == study.MODELS == validate.MODELS == choice.MODEL_NAMES
    assert learner.LearnerConfig(model='both').models == choice.MODEL_NAMES
    with pytest.raises(ValueError, match='taken'):
        choice.register_model(choice.Boltzmann())


def test_model_probabilities_are_the_exponentiated_log_likelihoods():
    # Definition (common practice): P(j) = exp(log P(chosen = j)) for every particle; each
    # row sums to one; one weight vector gives choice_probabilities' vector.
    rng = np.random.default_rng(8)
    x = rng.standard_normal((12, 3))
    th = rng.standard_normal((7, 3))
    beta = rng.uniform(0.5, 4.0, 7)
    for name, model in choice.MODELS.items():
        p = model.probabilities(x, th, beta, bandwidth=0.7)
        ref = np.exp(np.stack([model.loglik(x, j, th, beta, bandwidth=0.7)
                               for j in range(12)], axis=1))
        np.testing.assert_allclose(p, ref, rtol=1e-12, err_msg=name)
        np.testing.assert_allclose(p.sum(axis=1), 1.0, rtol=1e-13)
        np.testing.assert_allclose(
            choice.choice_probabilities(x, th[2], beta[2], name, bandwidth=0.7), p[2],
            rtol=1e-12)
    ls = choice.log_similarity_sums(x, 0.7)
    np.testing.assert_array_equal(choice.MODELS['less'].set_offsets(x, 0.7), ls)
    assert choice.MODELS['boltzmann'].set_offsets(x, 0.7) is None


def test_a_registered_model_is_used_by_the_posterior(monkeypatch):
    # A model registered under a new name is accepted wherever a model is named and is the
    # one the posterior evaluates: a copy of Boltzmann gives Boltzmann's posterior bit for
    # bit, and an offset model's stored term enters the likelihood.
    from pref_learner.posterior import ParticlePosterior, PosteriorConfig
    monkeypatch.setattr(choice, 'MODELS', dict(choice.MODELS))
    monkeypatch.setattr(choice, 'MODEL_NAMES', choice.MODEL_NAMES)
    monkeypatch.setattr(choice, 'MODEL_CHOICES', choice.MODEL_CHOICES)

    class Copy(choice.Boltzmann):
        name = 'boltzmann_copy'

    choice.register_model(Copy())
    assert 'boltzmann_copy' in choice.MODEL_NAMES and 'boltzmann_copy' in choice.MODEL_CHOICES
    rng = np.random.default_rng(2)
    sets = [(rng.standard_normal((15, 3)), int(rng.integers(15))) for _ in range(6)]
    posts = {}
    for name in ('boltzmann', 'boltzmann_copy'):
        g = np.random.default_rng(3)
        post = ParticlePosterior.create(PosteriorConfig(n_particles=300, model=name), 3, g)
        for x, c in sets:
            post, _ = post.update((x, c), g)
        posts[name] = post
    np.testing.assert_array_equal(posts['boltzmann'].theta, posts['boltzmann_copy'].theta)
    np.testing.assert_array_equal(posts['boltzmann'].log_lik,
                                  posts['boltzmann_copy'].log_lik)


@pytest.mark.parametrize('scale', [1.0, 150.0, 599.0, 2000.0])
def test_row_logsumexp_with_a_known_bound_matches_scipy(scale):
    # Reference: scipy.special.logsumexp (shifted by the row maximum). Given a bound on
    # |r| below choice.DIRECT_LSE_BOUND the kernel skips the shift; the results agree to
    # rounding, also at the bound, with rows excluded (-inf) and a row whose every term is
    # near -bound; at and beyond the threshold it shifts as scipy does.
    from scipy.special import logsumexp
    rng = np.random.default_rng(5)
    r = rng.uniform(-scale, scale, size=(64, 1000))
    r[3, 1:] = -np.inf                              # one row left
    r[4] = -scale + rng.uniform(0.0, 1e-3, 1000)    # every term near the bottom
    r[5] = scale - rng.uniform(0.0, 1e-3, 1000)     # every term near the top
    ref = logsumexp(r, axis=1)
    got = choice.logsumexp_rows(r.copy(), bound=scale)
    np.testing.assert_allclose(got, ref, rtol=1e-13, atol=1e-12 * scale)
    assert np.all(np.isfinite(got))
    np.testing.assert_allclose(choice.logsumexp_rows(r.copy()), ref, rtol=1e-13,
                               atol=1e-12 * scale)


def test_record_loglik_takes_the_direct_kernel_within_its_bound(monkeypatch):
    # The posterior's likelihood with the shift skipped equals, to rounding, the same
    # likelihood with the shift (the kernel's threshold patched to 0), for both models and
    # particles of any rationality; the Boltzmann one also the checked choice model's
    # (scipy's logsumexp).
    from pref_learner.posterior import ParticlePosterior, PosteriorConfig
    rng = np.random.default_rng(8)
    x = rng.normal(size=(300, 4)) * 3.0
    th = rng.normal(size=(500, 4))
    th /= np.linalg.norm(th, axis=1, keepdims=True)
    beta = np.exp(rng.uniform(np.log(0.5), np.log(50.0), 500))
    for model in ('boltzmann', 'less'):
        post = ParticlePosterior.create(PosteriorConfig(n_particles=10, model=model), 4, rng)
        rec = post.prepare(x, 7)
        fmax, _, _ = rec.utility_bounds
        assert fmax == pytest.approx(np.linalg.norm(x, axis=1).max(), rel=1e-15)
        got = post.record_loglik(rec, th, beta)
        with monkeypatch.context() as m:
            m.setattr(choice, 'DIRECT_LSE_BOUND', 0.0)
            shifted = post.record_loglik(rec, th, beta)
        np.testing.assert_allclose(got, shifted, rtol=1e-12, atol=1e-10)
        assert not np.array_equal(got, shifted)        # the other path was taken
        if model == 'boltzmann':
            np.testing.assert_allclose(post.record_loglik(rec, th, beta, with_density=False),
                                       choice.get_model(model)(x, 7, th, beta),
                                       rtol=1e-12, atol=1e-10)
