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
