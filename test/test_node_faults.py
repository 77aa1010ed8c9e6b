# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The node under faults: slow or failing service handlers, a failing state directory."""

import collections
import threading
import time

import numpy as np
import pytest
import rclpy
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus
from rclpy.parameter import Parameter
from std_msgs.msg import Bool
from std_srvs.srv import Trigger

from pref_learner.learner import Learner, LearnerConfig
from pref_learner.ros.common import publish_paced
from pref_learner.ros.learner_node import LearnerNode
from pref_learner.sim import SimulatedTeacher, TeacherConfig
from pref_learner.features import load_scenario
from ros_util import publish_stream, ros_context, spin_until, spinning, teaching_publishers
from test_storage_faults import Disk

TRUE = load_scenario()['example_preference']  # the demo's person (shipped scenario)
SMALL = dict(n_particles=400, n_alternatives=80)


def _node(ctx, **params):
    return LearnerNode(context=ctx, parameter_overrides=[Parameter(k, value=v)
                                                         for k, v in params.items()])


def _teacher():
    return SimulatedTeacher(Learner(LearnerConfig(n_particles=1, n_alternatives=1)), TRUE,
                            TeacherConfig(seed=11))


def _srv(node, kind):
    """Ask the node's worker for service ``kind`` as the service thread does; its answer."""
    done, box = threading.Event(), {}
    node._worker.put_control(('srv', node._now(), kind, done, box))
    assert done.wait(10)
    return box


def _call(ex, client, timeout=30):
    fut = client.call_async(Trigger.Request())
    assert spin_until(ex, fut.done, timeout)
    return fut.result()


def test_services_never_block_intake_are_never_dropped_and_report_errors(tmp_path):
    with ros_context() as (ctx, ex):
        node = _node(ctx, state_dir=str(tmp_path), **SMALL)
        client = rclpy.create_node('service_client', context=ctx)
        ex.add_node(client)
        with spinning(node, ctx):
            pub, teach = teaching_publishers(client, ex)
            names = list(node.learner.robot.joint_names)
            teacher = _teacher()
            stamps, q = teacher.stream(0, time.time_ns())
            publish_stream(ex, pub, teach, stamps, q, names)
            assert spin_until(ex, lambda: node.learner.n_demonstrations == 1, 30)
            # discard_last replays the session; make it take as long as a long session's
            # replay would (the worker waits on a gate before the real rebuild)
            gate = threading.Event()
            rebuild = node.learner._rebuild

            def slow_rebuild(demos):
                gate.wait(20)
                rebuild(demos)
            node.learner._rebuild = slow_rebuild
            discard = client.create_client(Trigger, '/pref_learner/discard_last')
            assert discard.wait_for_service(timeout_sec=10)
            pending = discard.call_async(Trigger.Request())
            assert spin_until(ex, lambda: not gate.is_set() and len(node._worker) == 0
                              and node.learner._rebuild is slow_rebuild, 5)
            time.sleep(0.3)                      # the worker is inside the rebuild now
            # joint states keep coming in while the worker is busy (old design: the
            # service callback held the executor and intake stopped)
            rest = np.repeat(q[-1:], 500, axis=0)
            st = time.time_ns() + np.arange(500) * 2_000_000
            publish_paced(pub, st, rest, names, 500.0, every=lambda i: ex.spin_once(0))
            assert spin_until(ex, lambda: len(node._worker) >= 450, 5), len(node._worker)
            # many requests at once: every one is answered, in order, none dropped
            saves = [client.create_client(Trigger, '/pref_learner/save') for _ in range(3)]
            futs = [s.call_async(Trigger.Request()) for s in saves for _ in range(10)]
            time.sleep(0.5)
            assert not pending.done() and not any(f.done() for f in futs)
            gate.set()
            assert spin_until(ex, lambda: pending.done() and all(f.done() for f in futs), 30)
            assert pending.result().success and '0 demonstrations remain' in \
                pending.result().message
            assert all(f.result().success for f in futs), [f.result() for f in futs]
            assert node.learner.recorder.counters['samples'] >= 450 + len(stamps) - 10
            # an exception in a handler comes back as a failure with its reason
            node.learner._rebuild = rebuild

            def broken():
                raise ZeroDivisionError('float division by zero')
            node.learner.discard_last = broken
            r = _call(ex, discard)
            assert not r.success and r.message == 'ZeroDivisionError: float division by zero'
            assert node.counters['internal_error'] == 1
            assert _call(ex, saves[0]).success         # and the node goes on
            # a held teaching signal that fails to apply before a service: the service is
            # still answered, with the reason, and the next one succeeds
            node._last_js = time.monotonic() + 60     # the idle handler leaves it held
            set_teaching = node.learner.set_teaching

            def failing(on):
                raise RuntimeError('teaching failed')
            node.learner.set_teaching = failing
            t = time.time_ns()
            node._worker.put_control(('teach', t, t, True))
            r = _call(ex, saves[0], timeout=10)
            assert not r.success and r.message == 'RuntimeError: teaching failed'
            node.learner.set_teaching = set_teaching
            assert _call(ex, saves[0]).success
        node.destroy_node()
        client.destroy_node()


def test_state_directory_faults_report_error_keep_learning_and_recover(tmp_path, monkeypatch):
    # a state directory whose first demonstration cannot be read any more
    L = Learner(LearnerConfig(state_dir=str(tmp_path), **SMALL))
    _teacher().feed_session(L, 2)
    (tmp_path / 'demos' / 'demo_000000.npz').write_bytes(b'PK\x03\x04 torn')
    with ros_context() as (ctx, ex):
        node = _node(ctx, state_dir=str(tmp_path), publish_period=0.2, **SMALL)
        client = rclpy.create_node('diagnostics_client', context=ctx)
        ex.add_node(client)
        diag = {}

        def on_diag(msg):
            for st in msg.status:
                if st.hardware_id == 'pref_learner':
                    diag.update(level=st.level, message=st.message,
                                values={kv.key: kv.value for kv in st.values})
        client.create_subscription(DiagnosticArray, '/diagnostics', on_diag, 10)
        with spinning(node, ctx):
            assert spin_until(ex, lambda: diag.get('values', {}).get('quarantined') == '1', 10)
            assert diag['level'] == DiagnosticStatus.WARN
            assert 'cannot be replayed' in diag['message'] and node.learner.n_demonstrations == 1
            assert len(list((tmp_path / 'quarantine').glob('*.npz'))) == 1
            before = sorted(p.name for p in (tmp_path / 'demos').iterdir())
            disk = Disk(monkeypatch)
            disk.full = True                          # the disk fills up
            pub, teach = teaching_publishers(client, ex)
            stamps, q = _teacher().stream(3, time.time_ns())
            publish_stream(ex, pub, teach, stamps, q, list(node.learner.robot.joint_names))
            assert spin_until(ex, lambda: node.learner.n_demonstrations == 2, 30)
            assert spin_until(ex, lambda: diag['level'] == DiagnosticStatus.ERROR, 10), diag
            assert 'ENOSPC' in diag['message'] and diag['values']['storage_error']
            assert sorted(p.name for p in (tmp_path / 'demos').iterdir()
                          if not p.name.endswith('.tmp')) == before
            # no temporary file is left behind (a retry may hold one for a moment)
            assert spin_until(ex, lambda: not list(tmp_path.rglob('*.tmp')), 5)
            time.sleep(0.6)                           # retries keep failing, the node runs
            assert diag['level'] == DiagnosticStatus.ERROR and node.context.ok()
            disk.full = False                         # space returns
            assert spin_until(ex, lambda: diag['level'] != DiagnosticStatus.ERROR, 10), diag
            assert diag['values']['storage_error'] == ''
            assert diag['values']['pending_writes'] == '0'
        node.destroy_node()
        client.destroy_node()
    assert (tmp_path / 'demos' / 'demo_000002.npz').exists()
    L2 = Learner(LearnerConfig(state_dir=str(tmp_path), **SMALL))
    assert L2.n_demonstrations == 2 and any('loaded state' in m for m in L2.messages)


def test_simulated_time_and_a_simulation_reset():
    # use_sim_time: samples are judged against the node's simulated clock; a simulation
    # reset (clock and stamps jump back) is a new timeline, adopted without losing samples
    from rosgraph_msgs.msg import Clock

    from pref_learner.ros.common import joint_state
    with ros_context() as (ctx, ex):
        node = _node(ctx, use_sim_time=True, **SMALL)
        client = rclpy.create_node('simulator', context=ctx)
        ex.add_node(client)
        clock = client.create_publisher(Clock, '/clock', 10)
        names = list(node.learner.robot.joint_names)
        teacher = _teacher()
        with spinning(node, ctx):
            pub, teach = teaching_publishers(client, ex,
                                             ready=lambda: clock.get_subscription_count() > 0)

            def play(k, t0_ns):
                stamps, q = teacher.stream(k, t0_ns)     # 500 Hz of simulated time
                teach.publish(Bool(data=True))
                for i, (st, row) in enumerate(zip(stamps, q)):
                    c = Clock()
                    c.clock.sec, c.clock.nanosec = int(st // 10**9), int(st % 10**9)
                    clock.publish(c)
                    pub.publish(joint_state(int(st), names, row))
                    if i % 4 == 0:
                        time.sleep(0.004)                # twice faster than real time
                teach.publish(Bool(data=False))
            play(0, 100 * 10**9)
            assert spin_until(ex, lambda: node.learner.n_demonstrations == 1, 30), \
                (node.learner.rejections, dict(node.learner.recorder.counters))
            play(1, 5 * 10**9)                           # the simulation was reset
            assert spin_until(ex, lambda: node.learner.n_demonstrations == 2, 30), \
                (node.learner.rejections, dict(node.learner.recorder.counters))
            c = node.learner.recorder.counters
            assert c['timeline_changes'] == 1 and node.learner.rejections == []
        node.destroy_node()
        client.destroy_node()


def test_queue_worker_never_drops_requests_and_keeps_arrival_order():
    from pref_learner.ros.common import QueueWorker
    seen, errors = [], []
    gate = threading.Event()

    def handle(item):
        gate.wait(5)
        if item == 'bad':
            raise KeyError(item)
        seen.append(item)
    w = QueueWorker(handle, errors.append, 10, 'test_worker')
    w.put('s0')
    w.start()
    time.sleep(0.1)                                      # the worker is busy with s0
    for i in range(1, 101):
        w.put(f's{i}')                                   # the bounded sample queue overflows
        if i in (50, 100):
            w.put_control(f'c{i}')                       # a request is never dropped
    w.put_control('bad')
    w.put_control('after')
    gate.set()
    deadline = time.time() + 5
    while len(w) and time.time() < deadline:
        time.sleep(0.01)
    w.stop()
    assert seen == ['s0', 'c50'] + [f's{i}' for i in range(91, 101)] + ['c100', 'after']
    assert w.dropped == 90 and len(errors) == 1 and isinstance(errors[0], KeyError)


def test_an_idle_worker_sleeps_no_longer_than_its_idle_handler_asks():
    # a teaching signal held for the stream to go quiet is due within TEACH_QUIET_S; the
    # idle worker slept a fixed 50 ms before looking again, which every demonstration's
    # estimate waited for
    from pref_learner.ros.common import IDLE_WAIT_S, QueueWorker
    waits, asked = [], iter([0.007, None, -1.0])
    done = threading.Event()

    class Wake(threading.Event):
        def wait(self, timeout=None):
            waits.append(timeout)
            if len(waits) == 3:
                done.set()
            return super().wait(0.001)

    def on_idle():
        return next(asked, None)
    w = QueueWorker(lambda item: None, lambda exc: None, 10, 'test_idle', on_idle=on_idle)
    w._wake = Wake()
    w.start()
    assert done.wait(5)
    w.stop()
    assert waits[:3] == [0.007, IDLE_WAIT_S, 0.0]


def test_a_lagging_worker_keeps_the_bag_in_the_order_it_handled(tmp_path):
    # the worker handles samples after they were received (it lags while it learns);
    # an estimate published meanwhile must not move the bag's log times of the samples
    # after it up to its publication time: equal log times may be replayed in another
    # order than the node handled (MCAP orders messages by log time only, from the
    # MCAP specification), and `learn` would then judge other receive times
    from pref_learner.bags import read_stream

    bag = tmp_path / 'session'
    with ros_context() as (ctx, _):
        node = _node(ctx, record_bag=str(bag), **SMALL)
        names = list(node.learner.robot.joint_names)
        t0 = time.time_ns()
        recv = [t0 + i * 2_000_000 for i in range(6)]
        time.sleep(0.1)                               # all received; handled from now on
        w = node._bag                                 # CDR as the middleware delivers it
        for t in recv:
            raw = bytes(w.ts.serialize_cdr(w.joint_state(t, names, np.zeros(len(names))),
                                           'sensor_msgs/msg/JointState'))
            node._handle(('js', t, t, raw))
            node._publish_estimates()
        node.destroy_node()                           # closes the bag
    assert [e.log_ns for e in read_stream(bag)] == recv


def test_a_held_teaching_signal_is_due_when_the_stream_has_been_quiet(monkeypatch):
    # the node's idle handler says when the held signal is due (TEACH_QUIET_S after the
    # last joint state), so the worker wakes for it; once due it is applied
    from types import SimpleNamespace

    from pref_learner.ros import learner_node
    from pref_learner.ros.learner_node import TEACH_QUIET_S, LearnerNode
    monkeypatch.setattr(learner_node.time, 'monotonic', lambda: 100.0)
    released = []
    stub = SimpleNamespace(_held_teaching=collections.deque([(0, 0, False)]),
                           _last_js=100.0 - 0.25 * TEACH_QUIET_S, _status_dirty=False,
                           _release_teaching=released.append, _settle=lambda: None)
    assert LearnerNode._on_idle(stub) == pytest.approx(0.75 * TEACH_QUIET_S)
    assert released == []
    stub._last_js = 100.0 - 2 * TEACH_QUIET_S
    assert LearnerNode._on_idle(stub) is None and released == [float('inf')]
    stub._held_teaching.clear()
    assert LearnerNode._on_idle(stub) is None and len(released) == 1


def test_run_time_settings_changed_one_by_one_all_apply():
    # rclpy calls the parameter callbacks once per set_parameters; each change is checked
    # and built on the ones accepted before it, also while a recording holds them back
    with ros_context() as (ctx, ex):
        node = _node(ctx, segmentation='manual', **SMALL)

        def srv(kind):
            return _srv(node, kind)
        assert srv('start')['ok']
        for name, value in (('speed_start', 0.5), ('speed_stop', 0.3), ('dwell', 1.0),
                            ('min_duration', 1.0)):
            res = node.set_parameters([Parameter(name, value=value)])
            assert res[0].successful, (name, res[0].reason)
        refused = node.set_parameters([Parameter('speed_stop', value=0.6)])
        assert not refused[0].successful and 'speed_stop' in refused[0].reason
        srv('stop')
        want = dict(speed_start=0.5, speed_stop=0.3, dwell=1.0, min_duration=1.0)
        end = time.time() + 10
        while time.time() < end and any(getattr(node.config, k) != v for k, v in want.items()):
            time.sleep(0.05)
        assert {k: getattr(node.config, k) for k in want} == want
        node.destroy_node()


def test_reset_and_discard_say_what_they_did():
    # a reset during a recording says the recording was dropped; a failure to propose the
    # next task afterwards is warned, and the change is still reported as done
    with ros_context() as (ctx, ex):
        node = _node(ctx, segmentation='manual', **SMALL)
        assert _srv(node, 'start')['ok']
        box = _srv(node, 'reset')
        assert box['ok'] and box['message'] == \
            'reset; the demonstration being recorded was dropped', box
        assert not node.learner.recorder.recording

        def broken():
            raise RuntimeError('no candidates')
        node._propose = broken
        box = _srv(node, 'reset')
        assert box['ok'] and box['message'] == 'reset', box
        assert node.last_warning == ('internal_error: next task not proposed: RuntimeError: '
                                     'no candidates')
        node.destroy_node()
