# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Durable state: atomic files, kill -9 of a live node, replay on configuration change."""

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import rclpy
from std_msgs.msg import Bool

from pref_learner import store as store_mod
from pref_learner.learner import Learner, LearnerConfig
from pref_learner.posterior import ParticlePosterior
from pref_learner.sim import SimulatedTeacher, TeacherConfig
from pref_learner.ros.common import publish_paced
from pref_learner.features import load_scenario
from ros_util import (LATCHED, follow_status, publish_stream, ros_context, spin_until,
                      teaching_publishers)

TRUE = load_scenario()['example_preference']  # the demo's person (shipped scenario)
SMALL = dict(n_particles=800, n_alternatives=150)


def test_atomic_write_keeps_old_file_on_failure(tmp_path, monkeypatch):
    p = tmp_path / 'x.bin'
    store_mod.atomic_write_bytes(p, b'old')

    def boom(fd):
        raise OSError('disk gone')
    monkeypatch.setattr(store_mod.os, 'fsync', boom)
    with pytest.raises(OSError):
        store_mod.atomic_write_bytes(p, b'new contents')
    monkeypatch.undo()
    assert p.read_bytes() == b'old'
    assert [f.name for f in tmp_path.iterdir()] == ['x.bin']


def test_stray_temp_files_are_not_read_as_demonstrations(tmp_path):
    cfg = LearnerConfig(state_dir=str(tmp_path), **SMALL)
    L = Learner(cfg)
    SimulatedTeacher(L, TRUE, TeacherConfig(seed=2)).feed_session(L, 2)
    (tmp_path / 'demos' / '.demo_000002.npz.123.tmp').write_bytes(b'PK\x03\x04half')
    L2 = Learner(cfg)
    assert L2.n_demonstrations == 2
    np.testing.assert_array_equal(L2.posteriors['less'].theta, L.posteriors['less'].theta)


def test_configuration_change_rebuilds_by_replay(tmp_path):
    L = Learner(LearnerConfig(state_dir=str(tmp_path), model='less', **SMALL))
    SimulatedTeacher(L, TRUE, TeacherConfig(seed=4)).feed_session(L, 3)
    L2 = Learner(LearnerConfig(state_dir=str(tmp_path), model='both', **SMALL))
    assert any('rebuilding' in m for m in L2.messages)
    assert L2.n_demonstrations == 3
    fresh = Learner(LearnerConfig(model='both', **SMALL))
    for d in L._demos:
        fresh.process(d)
    for m in ('less', 'boltzmann'):
        np.testing.assert_array_equal(L2.posteriors[m].theta, fresh.posteriors[m].theta)
    # discard_last rebuilds from the first two; reset archives
    assert L2.discard_last() and L2.n_demonstrations == 2
    assert len(list((tmp_path / 'demos').glob('demo_*.npz'))) == 2
    where = L2.reset()
    assert where is not None and (where / 'demos').exists()
    assert Learner(LearnerConfig(state_dir=str(tmp_path), model='both', **SMALL)) \
        .n_demonstrations == 0


def _start_node(state, env, sizes=SMALL, jobs=2):
    cmd = [sys.executable, '-m', 'pref_learner.ros.learner_node', '--ros-args',
           '-p', f'state_dir:={state}', '-p', f'n_particles:={sizes["n_particles"]}',
           '-p', f'n_alternatives:={sizes["n_alternatives"]}', '-p', f'choice_jobs:={jobs}',
           '--log-level', 'warn']
    return subprocess.Popen(cmd, env=env)


def _saved_records(path) -> int:
    """Return the number of demonstrations in the stored posterior (-1: none readable yet)."""
    try:
        return len(ParticlePosterior.load(path).records)
    except (OSError, ValueError, KeyError):
        return -1


def _children(pid: int):
    """Return the live processes whose parent is ``pid`` (from /proc)."""
    out = []
    for d in os.listdir('/proc'):
        if d.isdigit():
            try:
                with open(f'/proc/{d}/stat') as f:
                    ppid = int(f.read().rsplit(')', 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                continue
            if ppid == pid:
                out.append(int(d))
    return out


def _client(ctx, ex, name):
    """A client of the node under test: ``(node, status, pub, teach, teacher, names)``.

    ``status``: its latest status values; ``pub``, ``teach``: joint states and the
    teaching signal, once the node listens; ``teacher``: the simulated person.
    """
    node = rclpy.create_node(name, context=ctx)
    ex.add_node(node)
    status = follow_status(node)
    pub, teach = teaching_publishers(node, ex, timeout=60, ready=lambda: bool(status))
    teacher = SimulatedTeacher(Learner(LearnerConfig(n_particles=1, n_alternatives=1)),
                               TRUE, TeacherConfig(seed=5))
    return node, status, pub, teach, teacher, [f'joint_{i}' for i in range(1, 8)]


def test_kill_9_loses_only_the_demonstration_in_progress(tmp_path):
    state = tmp_path / 'state'
    env = dict(os.environ)
    proc = _start_node(state, env)
    try:
        with ros_context() as (ctx, ex):
            node, status, pub, teach, teacher, names = _client(ctx, ex, 'persistence_client')
            t0 = 1_700_000_000 * 10**9
            streams = []
            for k in range(4):
                st, q = teacher.stream(k, t0)
                streams.append((st, q))
                t0 = int(st[-1]) + 10**9
            for k in range(3):
                publish_stream(ex, pub, teach, *streams[k], names)
                assert spin_until(ex, lambda: status.get('demonstrations') == str(k + 1), 60)
            # the count goes out with the estimate, before the rejuvenation moves and the
            # write of the posterior: the 3rd must be on disk before the 4th is interrupted
            assert spin_until(ex, lambda: _saved_records(state / 'posterior_less') == 3, 60)
            # the 4th: half of it, then kill -9
            st, q = streams[3]
            teach.publish(Bool(data=True))
            half = len(st) // 2
            publish_paced(pub, st[:half], q[:half], names, 1000.0)
            helpers = _children(proc.pid)          # the choice set's helper processes
            assert helpers
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=10)
            node.destroy_node()
        # a killed node takes its helpers along
        end = time.monotonic() + 10
        while time.monotonic() < end and any(os.path.exists(f'/proc/{p}') for p in helpers):
            time.sleep(0.1)
        assert not any(os.path.exists(f'/proc/{p}') for p in helpers)
        saved = ParticlePosterior.load(state / 'posterior_less')
        assert len(saved.records) == 3
        assert len(list((state / 'demos').glob('demo_*.npz'))) == 3
        # restart: 3 loaded, same posterior; then the 4th completes
        proc = _start_node(state, env)
        with ros_context() as (ctx, ex):
            node = rclpy.create_node('persistence_client2', context=ctx)
            ex.add_node(node)
            got = {}
            from std_msgs.msg import Float64MultiArray
            node.create_subscription(Float64MultiArray, '/pref_learner/weights',
                                     lambda m: got.__setitem__('w', np.array(m.data)), LATCHED)
            status = follow_status(node)
            assert spin_until(ex, lambda: 'w' in got and status, 60)
            assert status['demonstrations'] == '3'
            np.testing.assert_allclose(got['w'], saved.summary().mean, atol=1e-12)
            pub, teach = teaching_publishers(node, ex)
            publish_stream(ex, pub, teach, *streams[3], names)
            assert spin_until(ex, lambda: status.get('demonstrations') == '4', 60)
            node.destroy_node()
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGINT)
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                proc.kill()


def test_sigint_while_a_demonstration_is_learned_keeps_it(tmp_path):
    # Ctrl-C (SIGINT) right after a demonstration's provisional estimate, while the node
    # still learns it: the context is shut down, so the estimates that follow cannot be
    # published. The demonstration was learned and is kept (it was rolled back and lost
    # when the failed publication raised into the learner). The shipped sizes leave
    # about 0.3 s between the provisional estimate and the end of the learning.
    state = tmp_path / 'state'
    shipped = dict(n_particles=4000, n_alternatives=500)
    proc = _start_node(state, dict(os.environ), sizes=shipped, jobs=1)
    sent = 0
    try:
        with ros_context() as (ctx, ex):
            node, status, pub, teach, teacher, names = _client(ctx, ex, 'sigint_client')
            t0 = 1_700_000_000 * 10**9
            caught = False
            for k in range(4):
                st, q = teacher.stream(k, t0)
                t0 = int(st[-1]) + 10**9
                publish_stream(ex, pub, teach, st, q, names)
                sent += 1
                if spin_until(ex, lambda: status.get('estimate') == 'provisional'
                              and status.get('demonstrations') == str(k + 1), 20):
                    proc.send_signal(signal.SIGINT)
                    caught = True
                    break
                assert spin_until(ex, lambda: status.get('estimate') == 'settled'
                                  and status.get('demonstrations') == str(k + 1), 60)
            node.destroy_node()
        assert caught, 'no demonstration had a provisional estimate'
        assert proc.wait(timeout=30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
    assert len(list((state / 'demos').glob('demo_*.npz'))) == sent
    assert len(ParticlePosterior.load(state / 'posterior_less').records) == sent


def test_stored_scales_are_kept_across_restarts(tmp_path):
    import json
    cfg = LearnerConfig(state_dir=str(tmp_path), **SMALL)
    L = Learner(cfg)
    SimulatedTeacher(L, TRUE, TeacherConfig(seed=9)).feed_session(L, 1)
    m = json.loads((tmp_path / 'manifest.json').read_text())
    np.testing.assert_allclose(m['scales'], L.features.scales)
    # the session's scales live in its task record (task.json)
    r = json.loads((tmp_path / 'task.json').read_text())
    np.testing.assert_array_equal(r['scales'], L.features.scales)
    r['scales'] = [s * 2.0 for s in r['scales']]     # as if calibrated by another version
    (tmp_path / 'task.json').write_text(json.dumps(r))
    L2 = Learner(cfg)
    np.testing.assert_allclose(L2.features.scales, 2.0 * L.features.scales)


def test_the_estimate_is_handed_out_before_the_checks_and_the_moves():
    # the node publishes from on_estimate: the demonstration's checks (predictive p-value,
    # where it sits in its set, expected information) and the pending moves follow it
    seen = []

    def on_estimate(r):
        post = L.posteriors['less']
        seen.append((r.index, dict(r.diagnostics), post.moves_pending, r.diagnostics))
    L = Learner(LearnerConfig(model='less', **SMALL), on_estimate=on_estimate)
    teacher = SimulatedTeacher(L, load_scenario()['example_preference'], TeacherConfig())
    results = [r for r in teacher.feed_session(L, 2) if hasattr(r, 'summaries')]
    assert [s[0] for s in seen] == [0, 1] and len(results) == 2
    assert all(s[1] == {} for s in seen)                    # nothing checked yet
    assert any(s[2] for s in seen)                          # moves still pending
    for (_, _, _, diag), r in zip(seen, results):
        assert diag is r.diagnostics                        # the same record, now filled
        assert {'predictive_pvalue', 'atypical', 'percentiles'} <= set(diag)
    assert not L.posteriors['less'].moves_pending


@pytest.mark.parametrize('floor', [1.0, 0.0])
def test_provisional_estimate_is_the_self_normalised_importance_estimate(floor):
    # Reference: self-normalised importance sampling (common practice; e.g. Owen, Monte
    # Carlo theory, methods and examples, ch. 9): weights w_i ~ w_i(before) L_i, the
    # mean sum w_i theta_i, Kish's ESS 1 / sum w_i^2 (of the distinct particles), worked
    # here with scipy's logsumexp.
    # A demonstration that tempers (ESS below ess_target N) hands out that estimate first
    # (floor 1: always then; floor 0: never); learning itself is the same either way.
    from scipy.special import logsumexp
    calls = []
    L = Learner(LearnerConfig(model='less', provisional_ess=floor, **SMALL),
                on_estimate=calls.append)
    teacher = SimulatedTeacher(L, load_scenario()['example_preference'], TeacherConfig())
    n = SMALL['n_particles']
    tempered, t = 0, 10**18
    for k in range(10):
        before = L.posteriors['less']
        res, t = teacher.feed_one(L, k, t)
        assert [r.index for r in res if hasattr(r, 'summaries')] == [k]
        got = [c for c in calls if c.index == k]
        rec = L.posteriors['less'].records[k]
        ll = before.record_loglik(rec, before.theta, before.beta, before.level)
        lw = before.log_weights + ll
        w = np.exp(lw - logsumexp(lw))
        ess = 1.0 / np.sum(w ** 2)
        tempers = ess < before.config.ess_target * n
        tempered += tempers
        kinds = [c.provisional for c in got]
        assert kinds == ([True, False] if tempers and floor > 0 else [False])
        if kinds[0]:
            s = got[0].summaries['less']
            m = w @ before.theta
            np.testing.assert_allclose(s.mean, m / np.linalg.norm(m), rtol=0, atol=1e-12)
            # the published ESS merges the copies resampling made (the same rows of
            # theta, log beta and level; numpy's unique over rows) before counting
            cols = [before.theta] + [np.asarray(a, dtype=np.float64)[:, None]
                                     for a in (before.log_beta, before.level) if a is not None]
            _, inv = np.unique(np.hstack(cols), axis=0, return_inverse=True)
            merged = np.bincount(inv.ravel(), weights=w)
            np.testing.assert_allclose(s.ess, 1.0 / np.sum(merged ** 2), rtol=1e-9)
            assert s.ess <= ess * (1 + 1e-12)
            np.testing.assert_array_equal(got[0].posteriors['less'].theta, before.theta)
    assert 1 <= tempered < 10                               # both cases met
    ref = Learner(LearnerConfig(model='less', provisional_ess=0.0, **SMALL))
    teacher.feed_session(ref, 10)
    np.testing.assert_array_equal(ref.posteriors['less'].theta, L.posteriors['less'].theta)
    np.testing.assert_array_equal(ref.posteriors['less'].log_weights,
                                  L.posteriors['less'].log_weights)


def test_provisional_estimates_of_both_models_weigh_the_demonstration_in():
    # With both choice models one provisional estimate covers both, each with the
    # demonstration weighed in (its record added) and an ESS of at least the floor. The
    # models update in turn: handed out during the first one's update, the second gives
    # its one-step reweighting (its particles as they were); during the second one's, the
    # first gives its update (the estimate the update's own result then shows). Learning
    # is the same without provisional estimates.
    calls = []
    floor = 100.0
    L = Learner(LearnerConfig(model='both', provisional_ess=floor, **SMALL),
                on_estimate=calls.append)
    first, second = list(L.posteriors)
    teacher = SimulatedTeacher(L, load_scenario()['example_preference'], TeacherConfig())
    t, seen = 10**18, 0
    for k in range(6):
        before = dict(L.posteriors)
        t = teacher.feed_one(L, k, t)[1]
        got = [c for c in calls if c.index == k]
        early = [c for c in got if c.provisional]
        assert len(early) <= 1 and not got[-1].provisional
        if not early:
            continue
        seen += 1
        c, upd = early[0], got[got.index(early[0]) + 1]
        assert set(c.summaries) == set(c.posteriors) == {first, second}
        for m, p in c.posteriors.items():
            assert len(p.records) == k + 1 and p.distinct_ess() >= floor
            np.testing.assert_array_equal(c.summaries[m].mean, p.summary().mean)
        during_first = np.array_equal(c.posteriors[second].theta, before[second].theta)
        gave_update = np.array_equal(c.summaries[first].mean, upd.summaries[first].mean)
        assert during_first or gave_update
    assert seen, 'no demonstration handed out a provisional estimate'
    ref = Learner(LearnerConfig(model='both', provisional_ess=0.0, **SMALL))
    teacher.feed_session(ref, 6)
    for m in (first, second):
        np.testing.assert_array_equal(ref.posteriors[m].theta, L.posteriors[m].theta)
        np.testing.assert_array_equal(ref.posteriors[m].log_weights,
                                      L.posteriors[m].log_weights)


def test_the_first_demonstration_imports_nothing():
    # A module imported on first use made the session's first demonstration the slowest
    # one (scipy.signal: about 170 ms); a fresh interpreter shows what the first
    # demonstration imports.
    script = (
        'import sys\n'
        'from pref_learner.features import load_scenario\n'
        'from pref_learner.learner import Learner, LearnerConfig\n'
        'from pref_learner.sim import SimulatedTeacher, TeacherConfig\n'
        'L = Learner(LearnerConfig(model="less", n_particles=300, n_alternatives=60),\n'
        '            on_estimate=lambda r: None)\n'
        'teacher = SimulatedTeacher(L, load_scenario()["example_preference"], TeacherConfig())\n'
        'L.summaries()\n'
        'before = set(sys.modules)\n'
        'teacher.feed_session(L, 1)\n'
        'assert L.n_demonstrations == 1\n'
        'print(sorted(set(sys.modules) - before))\n')
    out = subprocess.run([sys.executable, '-c', script], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == '[]'


def test_a_failure_after_the_estimate_leaves_the_learner_as_it_was(monkeypatch):
    # a fault in the demonstration's checks (after the estimate was handed out) rolls the
    # demonstration back entirely: posterior, demonstrations and their diagnostics
    from pref_learner import learner as learner_mod
    L = Learner(LearnerConfig(model='less', **SMALL))
    teacher = SimulatedTeacher(L, load_scenario()['example_preference'], TeacherConfig())
    t = teacher.feed_one(L, 0, 10**18)[1]
    before = L.posteriors['less']

    def broken(*args):
        raise RuntimeError('broken check')
    monkeypatch.setattr(learner_mod, '_information', broken)
    with pytest.raises(RuntimeError, match='broken check'):
        teacher.feed_one(L, 1, t)
    assert L.n_demonstrations == 1 and L.posteriors['less'] is before
    assert len(L.history_diagnostics()) == 1
