# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Sample ordering: judged against the stream's consensus, never a single stamp.

Reference for the expectations: causality (common practice in sensor
time-stamping) -- a message is stamped before it is sent and received, so
with a fixed clock offset transport latency can only lower ``stamp -
receive time``; a stamp ahead of the stream's offset is not a sample of it.
"""

import numpy as np

from pref_learner.demonstrations import Demonstration, Recorder, Rejection, SegmentConfig

NAMES = tuple(f'joint_{i}' for i in range(1, 8))
RATE = 500.0
YEAR_NS = 365 * 24 * 3600 * 10**9


def _motion(n_rest=100, n_move=800, seed=0):
    """A rest, a smooth move of 0.5 rad on every joint, a rest: (S, 7)."""
    rng = np.random.default_rng(seed)
    s = np.linspace(0.0, 1.0, n_move)
    p = 10 * s ** 3 - 15 * s ** 4 + 6 * s ** 5   # minimum jerk (from memory)
    q = np.concatenate([np.zeros(n_rest), p * 0.5, np.full(n_rest, 0.5)])
    return np.repeat(q[:, None], 7, axis=1) + rng.normal(0, 1e-4, (len(q), 7))


class Clock:
    """Receive clock of a node: the stream's stamps arrive after a latency."""

    def __init__(self, t0_ns, offset_ns=0, latency_ns=2_000_000):
        self.t = t0_ns
        self.offset = offset_ns        # stamp clock minus receive clock
        self.latency = latency_ns

    def demo(self, rec, q, rng=None, garbage=None):
        """Teach one demonstration; ``garbage(i)`` may inject samples after sample i."""
        out = rec.set_teaching(True)
        for i, row in enumerate(q):
            self.t += int(1e9 / RATE)
            jitter = 0 if rng is None else int(rng.uniform(0, 1.5e6))   # arrival order kept
            out += rec.feed(self.t + self.offset, NAMES, row,
                            receive_ns=self.t + self.latency + jitter)
            if garbage is not None:
                out += garbage(i, self.t)
        out += rec.set_teaching(False)
        return out


def _accepted(out):
    return [o for o in out if isinstance(o, Demonstration)]


def test_one_future_stamp_does_not_deafen_the_recorder():
    # the reported fault: after one accepted demonstration, a single sample stamped
    # 7 years ahead made every later demonstration 'too_short'
    rec = Recorder(NAMES, SegmentConfig(mode='signal'))
    clk = Clock(1_800_000_000 * 10**9)
    assert len(_accepted(clk.demo(rec, _motion()))) == 1
    clk.t += 10**9
    out = rec.feed(clk.t + 7 * YEAR_NS, NAMES, np.zeros(7), receive_ns=clk.t)
    assert out == [] and rec.counters['stamp_ahead'] == 1
    clk.t += 60 * 10**9                               # a minute later, too
    second = clk.demo(rec, _motion(seed=1))
    assert len(_accepted(second)) == 1, (second, dict(rec.counters))


def test_garbage_stamps_leave_the_demonstrations_bit_identical():
    clean, messy = (Recorder(NAMES, SegmentConfig(mode='signal')) for _ in range(2))
    rng = np.random.default_rng(4)
    t0 = 1_800_000_000 * 10**9

    def garbage(i, now):
        out = []
        for s in (now + 7 * YEAR_NS, now + 10**9, now - 2 * 10**9, 0, now - YEAR_NS,
                  now + int(rng.uniform(0.2, 3600) * 1e9)):
            out += messy.feed(s, NAMES, rng.uniform(-1, 1, 7), receive_ns=now + 1)
        # a machine with its clock 7 years ahead, stamping consistently
        out += messy.feed(now + 7 * YEAR_NS + 5, NAMES, np.zeros(7), receive_ns=now + 2)
        return out

    got = {}
    for name, rec, g in (('clean', clean, None), ('messy', messy, garbage)):
        clk = Clock(t0)
        got[name] = []
        for k in range(3):
            got[name] += _accepted(clk.demo(rec, _motion(seed=k), np.random.default_rng(k), g))
            clk.t += 10**8
    assert len(got['clean']) == len(got['messy']) == 3
    for a, b in zip(got['clean'], got['messy']):
        np.testing.assert_array_equal(a.t, b.t)
        np.testing.assert_array_equal(a.q, b.q)
        assert a.stamp_ns == b.stamp_ns
    c = messy.counters
    assert c['stamp_ahead'] > 0 and c['out_of_order'] > 0 and c['zero_stamp'] > 0
    assert c['timeline_changes'] == 0


def test_first_sample_alone_sets_no_reference():
    # a future-stamped sample arriving first is not taken as the stream's clock
    rec = Recorder(NAMES, SegmentConfig(mode='signal'))
    clk = Clock(1_800_000_000 * 10**9)
    rec.feed(clk.t + 7 * YEAR_NS, NAMES, np.zeros(7), receive_ns=clk.t)
    out = clk.demo(rec, _motion())
    assert len(_accepted(out)) == 1, (out, dict(rec.counters))


def test_timeline_change_is_adopted_after_confirmation_without_losing_samples():
    # a bag played again or a simulation reset: stamps jump back and stay consistent;
    # the new timeline is adopted once the old one is silent and the samples kept
    rec = Recorder(NAMES, SegmentConfig(mode='signal'))
    clk = Clock(1_800_000_000 * 10**9)
    first = _accepted(clk.demo(rec, _motion()))
    clk.t += 2 * 10**9
    clk.offset = -3600 * 10**9                        # stamps now an hour behind
    second = clk.demo(rec, _motion(seed=2))
    assert len(first) == 1 and len(_accepted(second)) == 1, (second, dict(rec.counters))
    assert len(_accepted(second)[0].t) == len(first[0].t)   # no sample lost
    assert rec.counters['timeline_changes'] == 1
    # the simulated clock itself is reset: stamps and receive times both go back
    clk.t -= 3 * 10**9
    third = clk.demo(rec, _motion(seed=3))
    assert len(_accepted(third)) == 1, (third, dict(rec.counters))


def test_live_stream_keeps_its_timeline_against_a_consistent_wrong_clock():
    rec = Recorder(NAMES, SegmentConfig(mode='signal'))
    clk = Clock(1_800_000_000 * 10**9)

    def wrong_clock(i, now):
        return rec.feed(now + 7 * YEAR_NS, NAMES, np.zeros(7), receive_ns=now + 1)

    for k in range(2):
        out = clk.demo(rec, _motion(seed=k), garbage=wrong_clock)
        assert len(_accepted(out)) == 1, (out, dict(rec.counters))
    assert rec.counters['timeline_changes'] == 0


def test_stamp_zero_and_far_from_receive_clock_are_refused_with_reasons():
    rec = Recorder(NAMES, SegmentConfig(mode='signal'))
    rec.set_max_skew(10.0)
    now = 1_800_000_000 * 10**9
    assert rec.feed(0, NAMES, np.zeros(7), receive_ns=now) == []
    assert rec.feed(now - 11 * 10**9, NAMES, np.zeros(7), receive_ns=now) == []
    assert rec.counters['zero_stamp'] == 1 and rec.counters['stamp_out_of_range'] == 1
    assert rec.counters['samples'] == 0


def test_timeline_change_during_a_demonstration_rejects_the_old_part():
    rec = Recorder(NAMES, SegmentConfig(mode='signal'))
    clk = Clock(1_800_000_000 * 10**9)
    q = _motion()
    out = rec.set_teaching(True)
    for row in q[:300]:
        clk.t += 2_000_000
        out += rec.feed(clk.t, NAMES, row, receive_ns=clk.t)
    clk.t += 2 * 10**9
    for row in q[300:]:
        clk.t += 2_000_000
        out += rec.feed(clk.t - 3600 * 10**9, NAMES, row, receive_ns=clk.t)
    out += rec.set_teaching(False)
    assert [o.reason for o in out if isinstance(o, Rejection)] == ['timeline_change']


WRONG_CLOCKS = (7 * YEAR_NS, -5 * 10**9)         # stamp minus true time of two other machines


def _session(demos, stalls, wrong=WRONG_CLOCKS, latency=2_000_000):
    """Events ``(receive, order, kind, stamp, value)`` of a driver and two wrong clocks.

    The driver streams at ``RATE``: 2 s at rest (the recorder's start-up watch),
    then rests of 0.5 s around each demonstration in ``demos``; ``stalls`` maps a
    sample index to ``(seconds, catch_up[, jump])``: nothing is received for that
    long; with ``catch_up`` the driver keeps its schedule and delivers the backlog
    in a burst (a starved publisher), without it its stamps skip the pause (a
    driver hiccup) and move by ``jump`` ns (a bag played again). Machines with the
    ``wrong`` clock offsets publish consistently at 100 Hz throughout.
    """
    t = 1_800_000_000 * 10**9
    rest = np.zeros(7)
    rows, teach = [rest] * int(1.5 * RATE), []
    for q in demos:
        rows += [rest] * int(RATE / 2)
        teach.append((len(rows), len(rows) + len(q) - 1))
        rows += list(q)
        rest = q[-1]
    rows += [rest] * int(RATE / 2)
    events, recv, n, shift = [], 0, 0, 0
    for i, row in enumerate(rows):
        t += int(1e9 / RATE)
        seconds, catch_up, *jump = stalls.get(i, (0.0, True))
        if seconds and not catch_up:
            t += int(seconds * 1e9)
            shift += sum(jump)
        stall_end = t + latency + int(seconds * 1e9)
        recv = max(t + latency, recv + 20_000, stall_end if seconds and catch_up else 0)
        for a, b in teach:
            if i in (a, b):
                events.append((recv + (-1 if i == a else 1), n, 'teach', 0, i == a))
                n += 1
        events.append((recv, n, 'js', t + shift, row))
        n += 1
    first, last = events[0][0], events[-1][0]
    for k, now in enumerate(range(first, last, 10**7)):
        for j, offset in enumerate(wrong):
            events.append((now + j + 1, n, 'wrong', now + offset, np.full(7, 0.1 * k % 1)))
            n += 1
    return sorted(events, key=lambda e: e[:2])


def _play(rec, events):
    out = []
    for recv, _, kind, stamp, value in events:
        if kind == 'teach':
            out += rec.set_teaching(value)
        else:
            out += rec.feed(stamp, NAMES, value, receive_ns=recv)
    return out


def _compare(stalls, n_demos, timeline_changes, wrong=WRONG_CLOCKS):
    """Demonstrations with and without the wrong clocks: the same, none rejected."""
    events = _session([_motion(seed=k) for k in range(n_demos)], stalls, wrong)
    clean, messy = (Recorder(NAMES, SegmentConfig(mode='signal')) for _ in range(2))
    want = _accepted(_play(clean, [e for e in events if e[2] != 'wrong']))
    out = _play(messy, events)
    assert [o for o in out if isinstance(o, Rejection)] == [], dict(messy.counters)
    got = _accepted(out)
    assert len(want) == len(got) == n_demos
    for a, b in zip(want, got):
        np.testing.assert_array_equal(a.t, b.t)
        np.testing.assert_array_equal(a.q, b.q)
    assert messy.counters['timeline_changes'] == timeline_changes, dict(messy.counters)
    return clean, messy


def test_a_paused_driver_is_not_replaced_by_a_consistent_wrong_clock():
    # the reported fault: under CPU starvation the driver's stream stalled for >= 1 s
    # while a machine with a wrong clock kept publishing; its consistent track was
    # adopted as the new timeline and the demonstration in progress was dropped.
    # Reference: the same recorder fed the driver's samples alone (causality, as above)
    start = [1000 + 1250 * k for k in range(3)]    # index of each demonstration's first sample
    stalls = {start[1] + 400: (1.5, True),         # starved mid-demonstration, then a burst
              start[2] - 125: (1.5, False)}         # a hiccup while idle
    clean, messy = _compare(stalls, 3, timeline_changes=0)
    c = messy.counters
    assert c['samples'] == clean.counters['samples']   # every sample of the driver kept
    assert c['stamp_ahead'] > 0 and c['out_of_order'] > 0


def test_a_driver_back_after_a_long_silence_wins_back_its_timeline():
    # the driver is silent for 12 s, longer than rival_quiet: the clock 7 years ahead
    # that ran alongside is followed, but the driver (stamped nearest the receive
    # clock) takes its timeline back once it returns; its next demonstration is kept
    _compare({1000 + 1250 - 125: (12.0, False)}, 2, 2, wrong=WRONG_CLOCKS[:1])
    # with the clock 5 s behind as well, that one continues the timeline 5 s into the
    # silence (its stamps then follow the last accepted one and are not ahead); the
    # driver, back at the offset the timeline had, takes it back all the same
    _compare({1000 + 1250 - 125: (12.0, False)}, 2, 1)


def test_a_new_timeline_among_wrong_clocks_is_adopted_after_quiet():
    # a bag played again (stamps an hour back) while two wrong clocks publish: the
    # new timeline began after the old one fell silent, so 1 s of quiet adopts it
    clean, messy = _compare({1000 + 1250 - 125: (1.5, False, -3600 * 10**9)}, 2,
                            timeline_changes=1)
    assert clean.counters['timeline_changes'] == 1
    assert messy.counters['samples'] == clean.counters['samples']   # none of it lost


def test_a_clock_reset_before_any_timeline_is_followed_at_once():
    # simulated time reset at start-up (stamps and receive times both back to 0) before the
    # recorder confirmed a timeline: the new clock is followed after the usual quiet
    # period, not only once it passes the old time (1,000 s later)
    rec = Recorder(NAMES, SegmentConfig(mode='manual'))
    old = 1000 * 10**9
    for k in range(50):
        rec.feed(old + k * 10**7, NAMES, np.zeros(7), receive_ns=old + k * 10**7)
    for k in range(1, 500):                      # 5 s of the new clock
        rec.feed(k * 10**7, NAMES, np.zeros(7), receive_ns=k * 10**7)
    assert rec.counters['samples'] > 0, dict(rec.counters)
