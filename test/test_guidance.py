# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Expected information gain of a task and the words for what is still unknown."""

import math

import numpy as np
import pytest
from scipy.special import logsumexp, xlogy
from scipy.stats import entropy

from pref_learner import guidance
from pref_learner.guidance import (TaskOptions, describe_direction, information_gain,
                                   option_records, unknown_lines, weakest_directions)
from pref_learner.posterior import ParticlePosterior, PosteriorConfig


def _posterior(theta, log_w, model='boltzmann', beta=2.0, log_beta=None, level=None,
               n_levels=1, beta_range=None):
    theta = np.asarray(theta, dtype=np.float64)
    cfg = PosteriorConfig(n_particles=len(theta), model=model, beta=beta,
                          beta_range=beta_range, n_levels=n_levels)
    lw = np.asarray(log_w, dtype=np.float64)
    lw = lw - logsumexp(lw)
    return ParticlePosterior(cfg, theta, lw, np.zeros(len(theta)), log_beta, (), level=level)


def _options(features, groups=None, n_levels=1):
    x = np.asarray(features, dtype=np.float64)
    g = np.zeros(len(x), dtype=np.int64) if groups is None else np.asarray(groups)
    return TaskOptions('t', np.zeros(1), np.zeros(1), x, g, option_records(x, g, n_levels))


def _reference_probs(x, theta, beta, model):
    """P(c | theta_g) (G, K) straight from the published formulas, not the package.

    Boltzmann (Luce 1959, exponential strengths): softmax of beta theta.phi.
    LESS (Bobu et al. 2020): the same with each option's strength divided by its
    kernel similarity sum over the set, Gaussian kernel on features standardised
    per column (ddof 1) with Scott's factor n^(-1/(d+4)) as bandwidth.
    """
    u = beta[:, None] * (theta @ x.T)
    if model == 'less':
        z = (x - x.mean(0)) / x.std(0, ddof=1)
        h = len(x) ** (-1.0 / (x.shape[1] + 4))
        d2 = ((z[:, None, :] - z[None, :, :]) ** 2).sum(-1)
        u = u - np.log(np.exp(-d2 / (2 * h * h)).sum(1))[None, :]
    p = np.exp(u - u.max(1, keepdims=True))
    return p / p.sum(1, keepdims=True)


def _enumerated_mi(prior, probs):
    """Mutual information of the joint p(g, c) = prior_g P(c | g) by enumeration.

    Lindley (1956): the expected information of an experiment is the mutual
    information sum_{g,c} p(g,c) log p(g,c) / (p(g) p(c)); computed with
    scipy.special.xlogy over the joint table.
    """
    joint = prior[:, None] * probs
    pc = joint.sum(0)
    return float(np.sum(xlogy(joint, joint)) - np.sum(xlogy(pc, pc))
                 - np.sum(xlogy(prior, prior)))


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_gain_equals_mutual_information_by_enumeration_on_a_grid(model):
    # Discrete grid of weights on the circle, a few alternatives: the particle estimate is
    # exact there (each grid point is a particle with its prior mass as weight), so it must
    # equal the enumerated mutual information (Lindley 1956) and the BALD form
    # H[E p] - E H[p] (Houlsby et al. 2011) computed with scipy.stats.entropy.
    rng = np.random.default_rng(4)
    ang = np.linspace(0, 2 * math.pi, 24, endpoint=False)
    theta = np.stack([np.cos(ang), np.sin(ang)], 1)
    log_w = rng.normal(0, 1.0, len(theta))
    prior = np.exp(log_w - logsumexp(log_w))
    x = rng.normal(0, 1, (5, 2))
    post = _posterior(theta, log_w, model=model, beta=3.0)
    got = information_gain(post, _options(x))
    probs = _reference_probs(x, theta, np.full(len(theta), 3.0), model)
    exact = _enumerated_mi(prior, probs)
    bald = entropy(prior @ probs) - prior @ np.array([entropy(p) for p in probs])
    assert exact > 0.05                       # a problem where the gain is not trivial
    assert got == pytest.approx(exact, rel=1e-10, abs=1e-12)
    assert got == pytest.approx(bald, rel=1e-10, abs=1e-12)


def test_gain_with_inferred_beta_is_about_weights_and_beta_jointly():
    # Grid over (angle, beta): the enumerated joint is over both parameters (Lindley 1956).
    rng = np.random.default_rng(5)
    ang = np.linspace(0, 2 * math.pi, 12, endpoint=False)
    betas = np.array([0.5, 2.0, 8.0])
    A, B = np.meshgrid(ang, betas, indexing='ij')
    theta = np.stack([np.cos(A.ravel()), np.sin(A.ravel())], 1)
    beta = B.ravel()
    log_w = rng.normal(0, 0.5, len(theta))
    prior = np.exp(log_w - logsumexp(log_w))
    x = rng.normal(0, 1, (4, 2))
    post = _posterior(theta, log_w, log_beta=np.log(beta), beta_range=(0.4, 10.0))
    got = information_gain(post, _options(x))
    assert got == pytest.approx(_enumerated_mi(prior, _reference_probs(x, theta, beta,
                                                                       'boltzmann')), rel=1e-10)


def test_gain_with_option_levels_is_the_level_weighted_conditional_information():
    # Two option levels with disjoint option sets: the reported gain is
    # sum_g P(g) I(c; theta | g), each term enumerated as above (Lindley 1956).
    rng = np.random.default_rng(6)
    ang = np.linspace(0, 2 * math.pi, 16, endpoint=False)
    th1 = np.stack([np.cos(ang), np.sin(ang)], 1)
    theta = np.vstack([th1, th1])
    level = np.repeat([0, 1], len(th1))
    log_w = rng.normal(0, 1.0, len(theta))
    w = np.exp(log_w - logsumexp(log_w))
    x = rng.normal(0, 1, (7, 2))
    groups = np.array([0, 0, 0, 1, 1, 1, 1])
    post = _posterior(theta, log_w, level=level, n_levels=2)
    got = information_gain(post, _options(x, groups, 2))
    want = 0.0
    for g in (0, 1):
        wg = w[level == g]
        probs = _reference_probs(x[groups == g], th1, np.full(len(th1), 2.0), 'boltzmann')
        want += wg.sum() * _enumerated_mi(wg / wg.sum(), probs)
    assert got == pytest.approx(want, rel=1e-10)


def test_blocks_of_particles_give_the_same_gain(monkeypatch):
    # The particle blocks only split a sum (common practice): any block size, same value.
    rng = np.random.default_rng(7)
    theta = rng.normal(size=(3000, 3))
    theta /= np.linalg.norm(theta, axis=1, keepdims=True)
    post = _posterior(theta, rng.normal(size=3000), model='less')
    opts = _options(rng.normal(size=(40, 3)))
    whole = information_gain(post, opts)
    monkeypatch.setattr(guidance, 'BLOCK', 7)
    assert information_gain(post, opts) == pytest.approx(whole, rel=1e-12)


@pytest.mark.parametrize('model', ['boltzmann', 'less'])
def test_gain_is_zero_when_every_option_looks_the_same(model):
    # Identical features: every particle predicts the uniform choice, so the choice says
    # nothing about the parameters; mutual information 0 (Cover & Thomas, ch. 2).
    rng = np.random.default_rng(8)
    theta = rng.normal(size=(500, 4))
    theta /= np.linalg.norm(theta, axis=1, keepdims=True)
    post = _posterior(theta, rng.normal(size=500), model=model, beta=20.0)
    x = np.tile(rng.normal(size=4), (30, 1))
    assert information_gain(post, _options(x)) == pytest.approx(0.0, abs=1e-12)


def test_gain_is_at_most_log_m():
    # I(c; theta) <= H(c) <= log M for a choice among M options (Cover & Thomas, ch. 2).
    rng = np.random.default_rng(9)
    for m in (2, 5, 40):
        theta = rng.normal(size=(2000, 3))
        theta /= np.linalg.norm(theta, axis=1, keepdims=True)
        post = _posterior(theta, np.zeros(2000), beta=200.0)
        got = information_gain(post, _options(rng.normal(size=(m, 3)) * 3))
        assert 0.0 < got <= math.log(m) + 1e-12
    # near the bound: two options that split a two-cluster posterior cleanly
    post = _posterior([[1.0, 0.0], [0.0, 1.0]], [0.0, 0.0], beta=200.0)
    got = information_gain(post, _options([[1.0, 0.0], [0.0, 1.0]]))
    assert got == pytest.approx(math.log(2), abs=1e-6)


def test_a_task_that_separates_two_clusters_gains_more():
    # Hand-built: half the mass near theta_A = (1, 0), half near theta_B = (0, 1).
    # Task "split": options (1, 0) and (0, 1). Under A the first is worth 1 and the second
    # 0, under B the reverse, so the two clusters predict opposite choices and the choice
    # tells which is right. Task "blind": options (1, 1) and (0, 0). Under both clusters
    # the first is worth 1 and the second 0, so both predict the same choice and it tells
    # nothing (common practice: information comes from disagreement between hypotheses).
    rng = np.random.default_rng(10)
    a = np.array([1.0, 0.0]) + rng.normal(0, 0.05, (200, 2))
    b = np.array([0.0, 1.0]) + rng.normal(0, 0.05, (200, 2))
    theta = np.vstack([a, b])
    theta /= np.linalg.norm(theta, axis=1, keepdims=True)
    post = _posterior(theta, np.zeros(400), beta=5.0)
    split = information_gain(post, _options([[1.0, 0.0], [0.0, 1.0]]))
    blind = information_gain(post, _options([[1.0, 1.0], [0.0, 0.0]]))
    assert split > 0.3 and blind < 0.02 and split > 10 * blind


def test_weakest_direction_words_on_a_hand_built_covariance():
    names = ['tube_height', 'heat_block_clearance', 'tool_path_length']
    # one wide direction trading heat-block clearance against path length, the rest tight
    v = np.array([0.1, 0.6, -0.8])
    v /= np.linalg.norm(v)
    cov = 0.3 ** 2 * np.outer(v, v) + 0.02 ** 2 * np.eye(3)
    dirs = weakest_directions(cov, names)
    assert len(dirs) == 1                       # the others are below the tight threshold
    assert dirs[0].std == pytest.approx(math.sqrt(0.09 + 0.0004), rel=1e-9)
    assert dirs[0].text == ('cannot yet tell how much tool_path_length matters against '
                            'heat_block_clearance')
    # the sign of an eigenvector is arbitrary: the words are the same either way
    assert describe_direction(-v, names) == dirs[0].text
    # a direction along one feature alone
    assert describe_direction(np.array([0.05, 0.99, 0.1]), names) == (
        'cannot yet tell how much heat_block_clearance matters against the other features')


def test_tight_posterior_says_so():
    class S:
        covariance = 0.03 ** 2 * np.eye(3)
        ci_low = np.array([0.1, 0.2, 0.3])
        ci_high = np.array([0.2, 0.25, 0.35])
    lines = unknown_lines(S, ['a', 'b', 'c'])
    assert len(lines) == 1 and lines[0].startswith('the estimate is already tight')
    S.covariance = np.diag([0.01, 0.2 ** 2, 0.01])
    S.ci_high = np.array([0.2, 0.9, 0.35])
    lines = unknown_lines(S, ['a', 'b', 'c'])
    assert lines[0] == 'cannot yet tell how much b matters against the other features ' \
        '(spread 0.20)'
    assert lines[-1].startswith('least certain weight: b')


def test_task_guide_scores_the_scenario_tasks_with_cached_sets():
    from pref_learner.guidance import TaskGuide
    from pref_learner.learner import Learner, LearnerConfig
    L = Learner(LearnerConfig(n_particles=300, n_alternatives=40))
    tasks = L.tasks()
    guide = TaskGuide(L)
    scores = guide.score(tasks)
    assert sorted(s.name for s in scores) == sorted(t[0] for t in tasks)
    gains = [s.gain for s in scores]
    assert gains == sorted(gains, reverse=True)
    assert all(0.0 < g <= math.log(40) for g in gains)       # Cover & Thomas, ch. 2
    first = guide.options(*tasks[0])
    assert guide.options(*tasks[0]) is first                  # cached, not redrawn
    assert first.features.shape == (40, L.features.d)
    # the same seed gives the same sets in a new guide (seeded from the task, not the clock)
    np.testing.assert_array_equal(TaskGuide(L).options(*tasks[0]).features, first.features)
    # a user task under another name reuses the set of the same start and goal
    assert guide.options('mine', tasks[0][1], tasks[0][2]).name == 'mine'


def test_realised_information_is_the_kl_divergence_and_averages_to_the_gain():
    # Lindley (1956): the information a result c gives is KL(p(theta | c) || p(theta)), and
    # its expectation over the predictive p(c) is the mutual information. Reference KL:
    # scipy.stats.entropy(posterior, prior) on the enumerated grid.
    from pref_learner.learner import _information
    from pref_learner.posterior import ChoiceRecord
    rng = np.random.default_rng(12)
    ang = np.linspace(0, 2 * math.pi, 20, endpoint=False)
    theta = np.stack([np.cos(ang), np.sin(ang)], 1)
    log_w = rng.normal(0, 1.0, len(theta))
    prior = np.exp(log_w - logsumexp(log_w))
    x = rng.normal(0, 1, (4, 2))
    post = _posterior(theta, log_w, beta=2.5)
    probs = _reference_probs(x, theta, np.full(len(theta), 2.5), 'boltzmann')
    pc = prior @ probs
    avg = 0.0
    for c in range(len(x)):
        got = _information({'boltzmann': post}, {'boltzmann': ChoiceRecord.build(x, c)}, x,
                           np.zeros(len(x), dtype=np.int64))
        after = prior * probs[:, c] / pc[c]
        assert got['information_gain']['boltzmann'] == pytest.approx(entropy(after, prior),
                                                                     rel=1e-10)
        assert got['expected_gain']['boltzmann'] == pytest.approx(
            _enumerated_mi(prior, probs), rel=1e-10)
        avg += pc[c] * got['information_gain']['boltzmann']
    assert avg == pytest.approx(_enumerated_mi(prior, probs), rel=1e-10)


def test_times_taught_counts_demonstrations_of_the_task_in_either_direction():
    # definition of the module docstring: both ends within the tolerance (max-norm over
    # joints) of start and goal, or of goal and start; values checked by hand
    from pref_learner.guidance import times_taught
    s, g = np.array([0.0, 1.0]), np.array([1.0, 0.0])
    taught = [(s + 0.05, g - 0.05),            # forward, inside 0.1
              (g, s),                          # reversed
              (s + [0.0, 0.15], g),            # start 0.15 off on one joint: another task
              (s, s)]                          # from the start back to it: another task
    assert times_taught(s, g, taught, 0.1) == 2
    assert times_taught(s, g, taught, 0.2) == 3
    assert times_taught(s, g, taught, 0.0) == 1
    assert times_taught(s, g, [], 0.1) == 0


def test_gain_of_a_task_is_the_mean_over_its_independent_set_draws():
    # the gain of each draw is information_gain on that draw (checked against enumeration
    # above); the task's gain is their arithmetic mean (numpy reference)
    from pref_learner.guidance import TaskGuide
    from pref_learner.learner import Learner, LearnerConfig
    L = Learner(LearnerConfig(n_particles=300, n_alternatives=40))
    task = L.tasks()[0]
    guide = TaskGuide(L, n_draws=3)
    draws = guide.option_draws(*task)
    assert len(draws) == 3
    # independent draws, not copies; the first is the set a one-draw guide scores
    assert not np.allclose(draws[0].features, draws[1].features)
    np.testing.assert_array_equal(TaskGuide(L, n_draws=1).options(*task).features,
                                  draws[0].features)
    each = [information_gain(L.posteriors['less'], o) for o in draws]
    got = guide.score([task])[0]
    assert got.gain == pytest.approx(np.mean(each), rel=1e-12)
    assert got.gains['less'] == pytest.approx(np.mean(each), rel=1e-12)
    with pytest.raises(ValueError):
        TaskGuide(L, n_draws=0)


def test_a_task_taught_before_is_proposed_after_the_untaught_ones():
    from pref_learner.guidance import TaskGuide
    from pref_learner.learner import Learner, LearnerConfig
    L = Learner(LearnerConfig(n_particles=300, n_alternatives=40))
    tasks = L.tasks()
    guide = TaskGuide(L, n_draws=1)
    fresh = guide.score(tasks, taught=[])
    best = fresh[0]
    assert best.times_taught == 0
    # the most informative task, demonstrated once in reverse, goes behind every other
    again = guide.score(tasks, taught=[(best.goal, best.start)])
    assert [s.name for s in again] == [s.name for s in fresh[1:]] + [best.name]
    assert again[-1].times_taught == 1 and again[-1].gain == best.gain
    # without fresh_first the gain alone ranks: the taught task stays first
    greedy = TaskGuide(L, n_draws=1, fresh_first=False)
    assert [s.name for s in greedy.score(tasks, taught=[(best.goal, best.start)])] == \
        [s.name for s in fresh]
    # by default the learner's own demonstrations count: teach one of task 2
    from pref_learner.sim import SimulatedTeacher, TeacherConfig
    person = SimulatedTeacher(L, np.ones(L.features.d), TeacherConfig(seed=5))
    person.feed_one(L, 0, 10**18, tasks[2])
    assert L.n_demonstrations == 1
    counts = {s.name: s.times_taught for s in guide.score(tasks)}
    assert counts == {t[0]: int(t[0] == tasks[2][0]) for t in tasks}
