# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Segmentation, cleaning, resampling and alternative sets."""

import re

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from pref_learner.alternatives import AlternativeSampler, SamplerConfig, set_diagnostics
from pref_learner.demonstrations import (Demonstration, PrepareConfig, Recorder, SegmentConfig,
                                         condition, prepare, reparametrize_arc_length,
                                         resample)
from pref_learner.features import FeatureSet, default_features_path, load_scenario
from pref_learner.robot import RobotModel

NAMES = tuple(f'joint_{i}' for i in range(1, 8))


@pytest.fixture(scope='module')
def arm():
    return RobotModel.default()


def min_jerk(start, goal, s):
    # Flash & Hogan (1985) minimum-jerk position profile (from memory).
    p = 10 * s ** 3 - 15 * s ** 4 + 6 * s ** 5
    return start + (goal - start) * p[:, None]


def stream(rng, rate=500.0, rest=1.0, dur=3.0, noise=1e-3):
    task = load_scenario()['tasks'][0]
    t_move = np.arange(0, dur, 1 / rate)
    q = np.vstack([np.repeat(task[1][None], int(rest * rate), 0),
                   min_jerk(task[1], task[2], t_move / dur),
                   np.repeat(task[2][None], int(rest * rate), 0)])
    t = np.arange(len(q)) / rate
    return t, q + rng.normal(0, noise, q.shape), rest, rest + dur


def test_motion_segmentation_finds_bounds_within_50ms():
    rng = np.random.default_rng(0)
    t, q, t0, t1 = stream(rng)
    rec = Recorder(NAMES, SegmentConfig(mode='motion'))
    out = []
    for ti, qi in zip(t, q):
        out += rec.feed(int(ti * 1e9), NAMES, qi)
    demos = [o for o in out if isinstance(o, Demonstration)]
    assert len(demos) == 1, (out, dict(rec.counters))
    d = demos[0]
    start = d.stamp_ns * 1e-9
    assert abs(start - t0) < 0.05
    assert abs(start + d.duration - t1) < 0.05


def test_messy_stream_recovers_same_demonstration():
    rng = np.random.default_rng(1)
    t, q, _, _ = stream(rng, rest=0.2)
    clean = Recorder(NAMES, SegmentConfig(mode='manual'))
    clean.start()
    for ti, qi in zip(t, q):
        clean.feed(int(ti * 1e9), NAMES, qi)
    ref = clean.stop()[0]
    messy = Recorder(NAMES, SegmentConfig(mode='manual'))
    names = ('finger_left_joint',) + NAMES[::-1] + ('camera_pan',)
    messy.start()
    for i, (ti, qi) in enumerate(zip(t, q)):
        row = np.concatenate([[0.01], qi[::-1], [0.3]])
        stamp = int(ti * 1e9)
        messy.feed(stamp, names, row)
        if i % 50 == 0:
            messy.feed(stamp, names, row)                # duplicate
            messy.feed(stamp - 10_000_000, names, row)   # out of order
            messy.feed(stamp + 1, names[:3], row[:3])    # missing chain joints
        if i % 300 == 5:
            bad = row.copy()
            bad[3] = np.nan
            messy.feed(stamp + 2, names, bad)            # NaN burst sample
    got = messy.stop()[0]
    assert isinstance(got, Demonstration)
    np.testing.assert_array_equal(got.q, ref.q)
    c = messy.counters
    assert c['duplicate'] > 0 and c['out_of_order'] > 0
    assert c['missing_joint'] > 0 and c['invalid'] > 0


@pytest.mark.parametrize('kind', ['too_short', 'too_little_motion', 'too_many_gaps',
                                  'too_many_invalid'])
def test_rejections_are_reported(kind):
    rec = Recorder(NAMES, SegmentConfig(mode='signal'))
    rec.set_teaching(True)
    n = {'too_short': 50}.get(kind, 500)
    for i in range(n):
        q = np.full(7, 0.0 if kind == 'too_little_motion' else i * 1e-3)
        stamp = int(i * 2e6) + (int(1e9) if kind == 'too_many_gaps' and i > 250 else 0)
        if kind == 'too_many_invalid' and i % 2:
            q[0] = np.nan
        rec.feed(stamp, NAMES, q)
    out = rec.set_teaching(False)
    assert out[0].reason == kind
    assert rec.counters['rejected_' + kind] == 1
    assert rec.last_reason.startswith(kind)


def test_stop_without_start_and_bounded_memory():
    rec = Recorder(NAMES, SegmentConfig(mode='manual', pre_roll=0.5))
    assert rec.stop()[0].reason == 'stop_without_start'
    for i in range(200_000):  # 200 s at 1 kHz while idle
        rec.feed(i * 1_000_000, NAMES, np.zeros(7))
    assert rec.buffered <= 501


def test_resampling_keeps_endpoints_and_arc_length_spacing(arm):
    rng = np.random.default_rng(2)
    task = load_scenario()['tasks'][1]
    s = np.sort(rng.random(3000))
    s[0], s[-1] = 0, 1
    q = min_jerk(task[1], task[2], s)
    t = s * 3.0
    for method in ('time', 'arc_length'):
        d = prepare(Demonstration(t, q, NAMES), PrepareConfig(64, method), arm)
        np.testing.assert_array_equal(d[0], q[0])
        np.testing.assert_array_equal(d[-1], q[-1])
    d = prepare(Demonstration(t, q, NAMES), PrepareConfig(64, 'arc_length'), arm)
    tool = arm.frame_poses(d, ['tool_tip']).positions[:, 0]
    seg = np.linalg.norm(np.diff(tool, axis=0), axis=1)
    assert seg.max() / seg.mean() - 1 < 0.02 and 1 - seg.min() / seg.mean() < 0.02


def test_arc_length_resampling_keeps_the_last_sample_when_the_tool_stands_still():
    # a final turn of the wrist about an axis through the tool point moves no tool: the
    # last waypoint is still the last sample; a demonstration whose tool never moves is
    # resampled by time (numpy.interp), as the alternatives' retiming leaves such rows
    t = np.linspace(0.0, 2.0, 300)
    q = np.zeros((300, 2))
    q[:200, 0] = np.linspace(0.0, 1.0, 200)
    q[200:, 0] = 1.0
    q[200:, 1] = np.linspace(0.0, 0.5, 100)              # the wrist alone
    tool = np.zeros((300, 3))
    tool[:200, 0] = np.linspace(0.0, 0.3, 200)
    tool[200:, 0] = 0.3
    out = resample(t, q, 16, 'arc_length', tool)
    np.testing.assert_array_equal(out[-1], q[-1])
    np.testing.assert_array_equal(out[0], q[0])
    still = resample(t, q, 16, 'arc_length', np.zeros((300, 3)))
    ref = np.stack([np.interp(np.linspace(0.0, 2.0, 16), t, q[:, j]) for j in range(2)], 1)
    np.testing.assert_allclose(still, ref, rtol=0, atol=1e-12)


def test_batch_arc_length_retiming_matches_numpy_interp_row_by_row():
    # Reference: numpy.interp (linear interpolation) of each joint at equal steps of the
    # row's normalised tool-path length; a row whose tool does not move stays as it was.
    rng = np.random.default_rng(5)
    M, T, n = 40, 33, 7
    q = rng.standard_normal((M, T, n))
    tool = np.cumsum(0.01 + rng.random((M, T, 3)), axis=1)
    tool[3] = tool[3, :1]
    out = reparametrize_arc_length(q, tool)
    g = np.linspace(0.0, 1.0, T)
    for i in range(M):
        if i == 3:
            np.testing.assert_array_equal(out[i], q[i])
            continue
        s = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(tool[i], axis=0), axis=1))])
        ref = np.stack([np.interp(g, s / s[-1], q[i, :, j]) for j in range(n)], axis=1)
        np.testing.assert_allclose(out[i], ref, rtol=0, atol=1e-12)
        np.testing.assert_array_equal(out[i, [0, -1]], q[i, [0, -1]])


def test_noisy_demo_is_not_a_jerk_outlier_after_shared_conditioning(arm):
    rng = np.random.default_rng(3)
    task = load_scenario()['tasks'][0]
    s = np.linspace(0, 1, 1500)
    clean = min_jerk(task[1], task[2], s)
    noisy = clean + rng.normal(0, 1e-3, clean.shape)
    fs = FeatureSet.from_yaml(default_features_path(), arm)
    jerk = FeatureSet.from_yaml({'features': [{'name': 'j', 'type': 'jerk'}]}, arm)
    w = PrepareConfig().smooth
    raw_c, raw_n = resample(s, clean, 64), resample(s, noisy, 64)
    assert jerk.raw(raw_n)[0] > 100 * jerk.raw(raw_c)[0]   # noise dominates unconditioned
    cond_c = condition(raw_c, w, arm.lower, arm.upper)
    cond_n = condition(raw_n, w, arm.lower, arm.upper)
    assert jerk.raw(cond_n)[0] == pytest.approx(jerk.raw(cond_c)[0], rel=0.15)
    alts = condition(AlternativeSampler(arm, 64).sample(task[1], task[2], rng)[0], w,
                     arm.lower, arm.upper)
    ja, jd = jerk.raw(alts), jerk.raw(cond_n)[0]
    # after the shared conditioning the noisy demonstration's jerk lies among the set's
    # (its minimum-jerk timing has some jerk of its own; the unconditioned one was 100x off)
    rank = float(np.mean(ja[:, 0] < jd))
    assert 0.0 < rank < 0.5, rank
    # and every feature of the conditioned demonstration stays well inside the set's span
    # above its top (the straight line's approach offset may lie below every random
    # path's: that is what a straight approach looks like)
    fa, fd = fs.raw(alts), fs.raw(cond_n)
    assert np.all(fd <= fa.max(0) + 0.05 * (fa.max(0) - fa.min(0)))


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**31), scale=st.floats(0.02, 0.6))
def test_alternatives_limits_endpoints_and_jerk(seed, scale):
    arm = RobotModel.default()
    rng = np.random.default_rng(seed)
    a, b = arm.random_configurations(2, rng)
    smp = AlternativeSampler(arm, 32, SamplerConfig(40, spreads=(scale,)))
    alts, groups = smp.sample(a, b, rng, demo=smp.straight(a, b))
    assert np.all(groups == 0)
    assert alts.shape == (40, 32, 7)
    assert np.all(alts >= arm.lower) and np.all(alts <= arm.upper)
    np.testing.assert_array_equal(alts[:, 0], np.broadcast_to(a, (40, 7)))
    np.testing.assert_array_equal(alts[:, -1], np.broadcast_to(b, (40, 7)))
    jerk = FeatureSet.from_yaml({'features': [{'name': 'j', 'type': 'jerk'}]}, arm)
    dev = alts - smp.straight(a, b)
    assert np.all(jerk.raw(dev)[:, 0] <= smp.noise.jerk_bound(scale * smp.span) * (1 + 1e-9))


def test_alternatives_reproducible_from_seed(arm):
    task = load_scenario()['tasks'][2]
    smp = AlternativeSampler(arm, 64)
    a, _ = smp.sample(task[1], task[2], np.random.default_rng(9))
    b, _ = smp.sample(task[1], task[2], np.random.default_rng(9))
    np.testing.assert_array_equal(a, b)
    assert SamplerConfig(7, {'smooth': 1, 'perturb': 1}).counts() == {'perturb': 4, 'smooth': 3}


def test_diagnostic_flags_tail_not_mode():
    rng = np.random.default_rng(4)
    x = rng.normal(0, 1, (300, 2))
    x[0] = [0.0, 0.0]           # at the mode
    tail = x.copy()
    tail[0] = [3.5, 3.0]        # in the tail
    assert not set_diagnostics(x, 0)['sparse']
    dt = set_diagnostics(tail, 0)
    assert dt['sparse'] and dt['percentiles'][0] > 99


def test_reconfigure_keeps_counters_and_refuses_mid_demonstration():
    rec = Recorder(NAMES, SegmentConfig(mode='manual'))
    rec.feed(1, NAMES, np.zeros(7))
    rec.feed(1, NAMES, np.zeros(7))                      # duplicate
    rec.reconfigure(SegmentConfig(mode='motion', dwell=0.8))
    assert rec.config.dwell == 0.8 and rec.counters['duplicate'] == 1
    rec.start()
    with pytest.raises(ValueError, match='during a demonstration'):
        rec.reconfigure(SegmentConfig(mode='manual'))


def test_prepare_keeps_a_demonstration_along_a_joint_limit_within_it(arm):
    # A person may move along a joint limit; the zero-phase low-pass filter overshoots a
    # step (Gibbs, common practice), which must not turn a valid demonstration into one
    # outside the limits (it used to raise in the kinematics).
    t = np.linspace(0.0, 2.0, 1001)
    q = np.zeros((len(t), arm.n))
    q[:, 1] = np.where(t < 0.5, 0.0, arm.upper[1])
    q[:, 0] = np.linspace(-0.5, 0.5, len(t))
    demo = Demonstration(t, q, arm.joint_names)
    out = prepare(demo, PrepareConfig(64, 'arc_length', 10.0, 1e-4), arm)   # the node's
    assert np.all(out >= arm.lower) and np.all(out <= arm.upper)
    assert out[-1, 1] == pytest.approx(arm.upper[1])


def test_a_whole_trajectory_is_checked_as_a_recorded_one_and_faults_are_named():
    # ~/demonstration: each fault named with its point; the recorded segments' acceptance
    # checks (min_duration, min_motion, max_duration) apply, max_gap not (sparse points)
    from pref_learner.demonstrations import (DemonstrationError, SegmentConfig,
                                             trajectory_demonstration)
    names = ['a', 'b']
    cfg = SegmentConfig(min_duration=0.5, min_motion=0.05, max_duration=30.0, max_gap=0.1)
    rows = [[0.0, 0.0], [0.2, 0.1], [0.4, 0.3]]
    demo = trajectory_demonstration(names, rows, [1.0, 2.0, 3.0], names, cfg)
    np.testing.assert_array_equal(demo.t, [0.0, 1.0, 2.0])     # 1 s gaps pass
    cases = [
        ((['a', 'a'], rows, [0, 1, 2]), 'names joint a more than once'),
        ((names, [[0.0, 0.0], [0.1], [0.2, 0.2]], [0, 1, 2]), 'point 1 has 1 positions for 2'),
        ((names, [[0.0, 0.0], [0.1, 0.1], [0.2, 0.2, 9.0]], [0, 1, 2]), 'point 2 has 3'),
        ((names, [[0.0, 0.0], [np.nan, 0.1], [0.2, 0.2]], [0, 1, 2]),
         'point 1 has a NaN or infinite position'),
        ((names, rows, [0.0, 1.0, 1.0]), 'time_from_start does not increase at point 2'),
        ((names, rows, [0.0, 0.1, 0.2]), 'too_short: 0.200 s < min_duration 0.5 s'),
        ((names, [[0.0, 0.0], [0.01, 0.0], [0.02, 0.01]], [0, 1, 2]), 'too_little_motion'),
        ((names, rows, [0.0, 20.0, 40.0]), 'too_long: 40.000 s > max_duration 30.0 s'),
    ]
    for args, words in cases:
        with pytest.raises(DemonstrationError, match=re.escape(words)):
            trajectory_demonstration(*args, names, cfg)


def test_a_rejection_names_the_samples_refused_during_its_segment():
    # a driver that never stamps its messages: the demonstration has no samples, and the
    # rejection says why (the counters of this segment alone, not the earlier ones)
    rec = Recorder(NAMES, SegmentConfig(mode='manual'))
    rec.feed(0, NAMES, np.zeros(7))                       # before the segment
    rec.start()
    for k in range(200):
        rec.feed(0, NAMES, np.zeros(7))
    rec.feed(10**9, NAMES[:3], np.zeros(3))               # a message lacking joints
    out = rec.stop()
    assert out[0].reason == 'too_short'
    assert out[0].detail == ('no samples; 201 samples refused meanwhile (missing_joint 1, '
                             'zero_stamp 200)')
    rec.start()                                           # the next segment starts afresh
    for k in range(30):
        rec.feed(10**9 + k * 10**7, NAMES, np.full(7, 0.01 * k))
    assert 'refused' not in rec.stop()[0].detail


def test_a_message_naming_a_joint_twice_is_refused_by_name():
    # which of the two positions is meant cannot be known: the sample is refused and counted
    rec = Recorder(NAMES, SegmentConfig(mode='manual'))
    rec.start()
    names = list(NAMES) + [NAMES[0]]
    for k in range(10):
        rec.feed(10**9 + k * 10**7, names, np.zeros(8))
    assert rec.counters['repeated_joint_name'] == 10 and rec.counters['samples'] == 0
    assert rec.stop()[0].detail == ('no samples; 10 samples refused meanwhile '
                                    '(repeated_joint_name 10)')
