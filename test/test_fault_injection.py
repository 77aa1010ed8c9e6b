# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Fault injection: a separate process floods joint_states with bad messages.

While a person teaches (a valid 500 Hz stream stamped by the receive clock, as
a robot driver stamps it), test/garbage_publisher.py publishes malformed and
mis-stamped JointStates at >= 1 kHz for >= 20 s. Every valid demonstration
must be accepted, also the one after the flood, and the final estimate must
equal, bit for bit, the estimate an offline learner computes from the valid
messages alone (taken from the node's own bag, so the comparison does not
depend on DDS delivering every sample).
"""

import dataclasses
import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import rclpy
from std_msgs.msg import Bool

from pref_learner.bags import read_stream
from pref_learner.learner import Learner, LearnerConfig
from pref_learner.ros.common import joint_state
from pref_learner.ros.learner_node import LearnerNode
from pref_learner.sim import SimulatedTeacher, TeacherConfig
from pref_learner.features import load_scenario
from ros_util import ros_context, spin_until, spinning, teaching_publishers

TRUE = load_scenario()['example_preference']  # the demo's person (shipped scenario)
SMALL = dict(n_particles=800, n_alternatives=150)
GARBAGE_S, GARBAGE_HZ = 21.0, 1200.0
N_DURING = 5                       # demonstrations taught during the flood


class ValidStream:
    """Publishes one continuous 500 Hz joint-state stream; stamps follow the wall clock."""

    def __init__(self, pub, teach, names, rate, pose):
        self.pub, self.teach, self.names, self.dt = pub, teach, names, 1.0 / rate
        self.t0 = time.perf_counter()
        self.stamp0 = time.time_ns()
        self.i = 0
        self.sent = {}                              # stamp -> positions
        self.last = pose

    def _one(self, q):
        due = self.t0 + self.i * self.dt
        d = due - time.perf_counter()
        if d > 0:
            time.sleep(d)
        stamp = self.stamp0 + int(round(self.i * self.dt * 1e9))
        self.pub.publish(joint_state(stamp, self.names, q))
        self.sent[stamp] = np.asarray(q, dtype=np.float64)
        self.last = q
        self.i += 1

    def demo(self, q):
        self.teach.publish(Bool(data=True))
        for row in q:
            self._one(row)
        self.teach.publish(Bool(data=False))

    def rest(self, seconds):
        for _ in range(int(seconds / self.dt)):
            self._one(self.last)

    def rest_until(self, pred, timeout):
        """Keep streaming at rest until ``pred()`` (a robot does not stop while we wait).

        Waiting without publishing would make the stream stall and then send its
        backlog in one burst, which the node's best-effort subscription may drop.
        """
        deadline = time.monotonic() + timeout
        while not pred() and time.monotonic() < deadline:
            self.rest(0.02)
        return pred()


def test_flood_of_bad_messages_changes_nothing(tmp_path):
    bag = tmp_path / 'session'
    with ros_context() as (ctx, ex):
        node = LearnerNode(context=ctx, parameter_overrides=[
            rclpy.parameter.Parameter(k, value=v) for k, v in
            # max_gap 0.5 s: best-effort delivery on two loaded cores loses runs of samples
            # (one full run lost 0.114 s of the valid stream and refused that demonstration
            # under the default 0.1 s); refusing gaps is tested elsewhere, not the point here
            dict(SMALL, record_bag=str(bag), segmentation='signal', max_gap=0.5).items()])
        names = list(node.learner.robot.joint_names)
        client = rclpy.create_node('valid_teacher', context=ctx)
        ex.add_node(client)
        bg = spinning(node, ctx)
        bg.__enter__()
        pub, teach = teaching_publishers(client, ex, depth=1000)
        teacher = SimulatedTeacher(Learner(LearnerConfig(n_particles=1, n_alternatives=1)),
                                   TRUE, TeacherConfig(seed=6))
        rate = teacher.config.rate
        paths = [teacher.stream(k)[1] for k in range(N_DURING + 2)]
        valid = ValidStream(pub, teach, names, rate, paths[0][0])
        valid.rest(1.5)                           # the robot streams before teaching starts
        valid.demo(paths[0])
        valid.rest(0.5)
        assert valid.rest_until(lambda: node.learner.n_demonstrations == 1, 20)
        garbage = subprocess.Popen(
            [sys.executable, str(Path(__file__).with_name('garbage_publisher.py')),
             str(GARBAGE_S), str(GARBAGE_HZ), '3', *names],
            stdout=subprocess.PIPE, text=True)
        try:
            valid.rest_until(lambda: node.learner.recorder.counters['zero_stamp'] > 0, 15)
            for k in range(1, N_DURING + 1):
                valid.demo(paths[k])
                valid.rest(0.3)
            while garbage.poll() is None:         # the robot keeps streaming
                valid.rest(0.2)
            out, _ = garbage.communicate(timeout=30)
        finally:
            if garbage.poll() is None:
                garbage.kill()
        flood = json.loads(out.strip().splitlines()[-1])
        valid.rest(0.5)
        valid.demo(paths[N_DURING + 1])           # the next demonstration after the flood
        valid.rest(0.5)
        n = N_DURING + 2
        assert spin_until(ex, lambda: node.learner.n_demonstrations == n
                          and len(node._worker) == 0, 60), (
            node.learner.rejections, dict(node.learner.recorder.counters))
        counters = dict(node.learner.recorder.counters)
        node_counters = dict(node.counters)
        rejections = list(node.learner.rejections)
        live = {m: p for m, p in node.learner.posteriors.items()}
        config = dataclasses.replace(node.config, state_dir='')
        bg.__exit__(None, None, None)
        node.destroy_node()                       # closes the bag
        received = node.counters['joint_states']  # every message the worker took in
        client.destroy_node()
    # figures for the report
    print(json.dumps({'flood': flood, 'valid_samples': len(valid.sent), 'counters': counters,
                      'node_counters': node_counters}))
    assert flood['messages'] >= 20 * 1000 and flood['seconds'] >= 20.0
    assert flood['messages'] / flood['seconds'] >= 1000.0
    assert rejections == []                       # every valid demonstration accepted
    assert counters['accepted'] == n and counters.get('timeline_changes', 0) == 0
    for k in ('zero_stamp', 'stamp_ahead', 'out_of_order', 'missing_joint', 'invalid'):
        assert counters[k] > 0, k
    assert node_counters.get('internal_error', 0) == 0
    events = list(read_stream(bag))
    js = [e for e in events if e.kind == 'joint_states']
    # the bag holds every joint_states message the node took in, good or bad; what DDS
    # delivers of a 2 kHz stream of best-effort samples on two loaded cores (coverage
    # tracing every line) is the transport's: in full clean runs 84-87 % arrived, once
    # 49 % (a clean CI run, every other check met), alone about 100 %. The bound only
    # says that most of the flood reached the node; the counters above show each kind did
    assert len(js) == received
    assert len(js) >= 0.3 * (len(valid.sent) + flood['messages'])

    def is_valid(e):
        q = valid.sent.get(e.stamp_ns)
        return (q is not None and len(e.names) == len(names)
                and tuple(e.names) == tuple(names) and np.array_equal(e.positions, q))

    def replay(evs):
        L = Learner(config)
        for e in evs:
            if e.kind == 'joint_states':
                L.feed(e.stamp_ns, e.names, e.positions, e.log_ns)
            else:
                L.set_teaching(e.value)
        return L

    clean = replay([e for e in events if e.kind != 'joint_states' or is_valid(e)])
    assert clean.n_demonstrations == n and clean.rejections == []
    everything = replay(events)                  # what `pref-learner learn` does with the bag
    for m, post in live.items():
        for ref in (clean, everything):
            np.testing.assert_array_equal(ref.posteriors[m].theta, post.theta)
            np.testing.assert_array_equal(ref.posteriors[m].log_weights, post.log_weights)
