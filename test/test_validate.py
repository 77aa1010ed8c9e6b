# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Small versions of the validation studies; margins come from measured variability
(seeded runs of the full studies, recorded in DEVELOPERS.md)."""

import numpy as np
import pytest

from pref_learner import validate


def test_duplicates_study():
    # Debreu (1960) / Luce (1959), from memory: the lone option's share under Luce's rule
    # falls as 1/(copies + 1); LESS keeps it at the k = 0 share.
    r = validate.study_duplicates(k_max=8)
    for k, (b, l_) in enumerate(zip(r['share_lone']['boltzmann'], r['share_lone']['less'])):
        assert b == pytest.approx(1.0 / (k + 2), abs=0.01)
        assert abs(l_ - r['share_lone']['less'][0]) < 0.05


def test_dense_and_sparse_study():
    # Measured over 10 seeds: dense case, Boltzmann entropy exceeds LESS's by 0.15-0.24 nats
    # in every seed; sparse case, Boltzmann's is lower by 0.01-0.10 nats in every seed.
    r = validate.study_dense_sparse(n_seeds=3)
    d_b = np.array(r['dense']['per_seed']['boltzmann']['entropy'])
    d_l = np.array(r['dense']['per_seed']['less']['entropy'])
    assert np.all(d_b - d_l > 0.1)
    assert r['dense']['boltzmann']['error_rad'] > r['dense']['less']['error_rad']
    s_b = np.array(r['sparse']['per_seed']['boltzmann']['entropy'])
    s_l = np.array(r['sparse']['per_seed']['less']['entropy'])
    assert np.all(s_b < s_l)


def test_simulation_based_calibration_of_the_sampler():
    # Talts, Betancourt, Simpson, Vehtari & Gelman (2018): with truths drawn from the prior
    # and data from the model itself, the rank of each true coordinate among posterior draws
    # is uniform; chi-square test from scipy.stats on 10 bins (measured p 0.31 at 100 runs).
    r = validate.study_sbc(n_runs=60, n_particles=600, n_draws=49)
    assert r['pvalue'] > 0.01, r
    assert sum(r['counts']) == 60 * 7


def test_calibration_study_reports_every_condition():
    r = validate.study_calibration(n_truths=3, n_demos=3, n_particles=300, n_alternatives=60)
    assert [x['variant'] for x in r['mismatched']['runs']] == list(validate.MISMATCHED)
    figs = validate.calibration_figures(r, {'pvalue': 0.5})
    cos = [x['cosine'] for c in r.values() for x in c['runs']]
    assert figs['calib_cosine_mean'] == pytest.approx(np.mean(cos[:3]))
    assert all(-1.0 <= c <= 1.0 for c in cos)


def test_credible_region_against_a_von_mises_fisher_cap():
    # von Mises-Fisher on S^2 (Wood 1994; scipy.stats.vonmises_fisher): the 90 % cap around
    # the mean direction holds 90 % of draws, so a truth drawn from the same law lies inside
    # it about 90 % of the time.
    from scipy.stats import vonmises_fisher
    rng = np.random.default_rng(3)
    mu = np.array([0.0, 0.0, 1.0])
    draws = vonmises_fisher(mu, 20.0).rvs(4000, random_state=rng)
    w = np.full(4000, 1 / 4000)
    truths = vonmises_fisher(mu, 20.0).rvs(400, random_state=rng)
    inside = [validate.credible_region_contains(draws, w, mu, t) for t in truths]
    assert np.mean(inside) == pytest.approx(0.9, abs=0.04)


def test_set_robustness_spreads_are_small_and_comparable():
    # Measured: 10 sets x 8 demonstrations, LESS 0.095 rad vs Boltzmann 0.109 rad; at
    # 5 sets x 6 demonstrations the order flipped (0.117 vs 0.070), so the small version
    # asserts only a bounded difference (the full study carries the comparison).
    r = validate.study_set_robustness(n_sets=4, n_demos=5, n_particles=1000,
                                      n_alternatives=200)
    assert r['less']['spread_rad'] < 0.3 and r['boltzmann']['spread_rad'] < 0.3
    assert r['less']['spread_rad'] < r['boltzmann']['spread_rad'] + 0.08


def test_guidance_study_runs_paired_and_gives_finite_figures():
    # Small and fast: checks the machinery, not the figures (those are the bench's keys
    # guided_demos_to_cos90_ratio and guided_cosine_after5_gain at full size).
    import math
    r = validate.study_guidance(n_truths=2, n_demos=3, n_particles=200, n_alternatives=40)
    rr, gd = r['round_robin']['runs'], r['guided']['runs']
    assert len(rr) == len(gd) == 2
    for a, b in zip(rr, gd):                 # paired: the same person in both arms
        assert (a['variant'], a['person_beta']) == (b['variant'], b['person_beta'])
        assert 1 <= a['demos_to_cos90'] <= 3 and 1 <= b['demos_to_cos90'] <= 3
        assert all(-1.0 <= c <= 1.0 for c in a['cosine'] + b['cosine'])
    from pref_learner.learner import Learner, LearnerConfig
    names = [t[0] for t in validate.study_tasks(Learner(LearnerConfig(n_particles=1,
                                                                      n_alternatives=1)))]
    assert rr[0]['tasks'] == names[:3]       # round-robin takes the tasks in turn
    # every guided choice is a study task, with a gain within [0, log M] (Cover & Thomas)
    assert all(t in names for t in gd[0]['tasks'])
    assert all(0.0 <= g <= math.log(40) for x in gd for g in x['expected_gain'])
    assert [x['variant'] for x in rr] == ['matched', validate.MISMATCHED[0]]
    assert all(math.isfinite(v) for v in r['figures'].values())
