# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Node benchmarks: a real learner node in a subprocess, driven over DDS (loopback)."""

import os
import signal
import subprocess
import sys
import time
from typing import Dict

import numpy as np


def _rss_mb(pid: int) -> float:
    with open(f'/proc/{pid}/status') as f:
        for line in f:
            if line.startswith('VmRSS:'):
                return int(line.split()[1]) / 1024.0
    return float('nan')


def _live(teacher, k: int):
    """Demonstration k as a live 1 kHz stream stamped from now: ``(stamps (S,), q (S, n))``.

    Every second sample of the 500 Hz playback, stamped 1 ms apart, so stamps
    advance with the clock the samples are published on (the node refuses
    samples stamped ahead of their stream).
    """
    _, q = teacher.stream(k, 0)
    q = q[::2]
    return time.time_ns() + np.arange(len(q), dtype=np.int64) * 1_000_000, q


def node_benchmarks(quick: bool = False) -> Dict[str, float]:
    import rclpy
    from diagnostic_msgs.msg import DiagnosticArray
    from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
    from sensor_msgs.msg import JointState
    from std_msgs.msg import Bool, Float64MultiArray
    from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

    from ..features import load_scenario
    from ..learner import LearnerConfig
    from ..safety import keep_local
    from ..task import TaskModel
    from .common import publish_paced
    from ..sim import SimulatedTeacher, TeacherConfig
    out: Dict[str, float] = {}
    # simulated joint states: loopback only, on this benchmark's own topic
    keep_local(os.environ)
    env = dict(os.environ)
    proc = subprocess.Popen([sys.executable, '-m', 'pref_learner.ros.learner_node',
                             '--ros-args', '-p', 'model:=less', '--log-level', 'error',
                             '-r', 'joint_states:=/pref_learner_bench/joint_states'],
                            env=env)
    latched = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                         durability=DurabilityPolicy.TRANSIENT_LOCAL)
    teacher = SimulatedTeacher(TaskModel.from_config(LearnerConfig(n_alternatives=1)),
                               load_scenario()['example_preference'],
                               TeacherConfig())
    names = list(teacher.learner.robot.joint_names)
    try:
        with rclpy.init():
            node = rclpy.create_node('pref_learner_bench')
            state = {'w': None, 'w_t': 0.0, 'status': {}, 'kinds': {}}

            def on_w(m):
                # the node also republishes its cached estimate every second: only a
                # changed estimate is a new one
                w = np.array(m.data)
                if state['w'] is None or not np.array_equal(w, state['w']):
                    state['w_t'] = time.perf_counter()
                state['w'] = w

            def on_status(m):
                for st in m.status:
                    state['status'] = {kv.key: kv.value for kv in st.values}
                kind = state['status'].get('estimate')
                if kind in ('provisional', 'updated') and kind not in state['kinds']:
                    state['kinds'][kind] = time.perf_counter()   # the first of each kind
            node.create_subscription(Float64MultiArray, '/pref_learner/weights', on_w, latched)
            node.create_subscription(DiagnosticArray, '/pref_learner/status', on_status, latched)
            pub = node.create_publisher(JointState, '~/joint_states',
                                        QoSProfile(depth=100,
                                                   reliability=ReliabilityPolicy.RELIABLE))
            teach = node.create_publisher(Bool, '/pref_learner/teaching', 10)
            traj = node.create_publisher(JointTrajectory, '/pref_learner/demonstration', 10)

            def spin_until(pred, timeout):
                end = time.time() + timeout
                while time.time() < end and not pred():
                    rclpy.spin_once(node, timeout_sec=0.01)
                return pred()
            spin_until(lambda: pub.get_subscription_count() and teach.get_subscription_count()
                       and state['status'], 60)

            def n_demos():
                return int(state['status'].get('demonstrations', 0))

            def n_handled():
                # demonstrations learned or refused, counted once the node is done with
                # each (after the estimate that follows its moves is out)
                st = state['status']
                return int(st.get('node_accepted', 0)) + int(st.get('node_rejected', 0))

            # -- latency from teaching=false to new weights, 1 kHz samples: the first new
            # weights (``node_update_latency``: the provisional estimate where there is
            # one, else the update's) and the update's own (``node_updated_latency``, timed
            # by the status that says so, published right after its weights); the first
            # demonstration is not timed: its samples may meet a subscription that has
            # not yet matched the publisher (then it is refused, never learned)
            lat, upd, prov = [], [], []
            n_lat = 5 if quick else 12
            for k in range(n_lat + 1):
                warm = k == 0
                stamps, q = _live(teacher, k)
                teach.publish(Bool(data=True))
                publish_paced(pub, stamps, q, names, 1000.0)
                spin_until(lambda: False, 0.05)      # take in whatever is still queued
                before = n_handled()
                t0 = time.perf_counter()
                state['w_t'] = 0.0
                state['kinds'] = {}
                teach.publish(Bool(data=False))
                learned = spin_until(lambda: state['w_t'] > t0, 10 if warm else 30)
                first = state['w_t'] - t0         # the estimate; the one after its moves follows
                spin_until(lambda: n_handled() > before, 30)
                if not warm and learned:
                    lat.append(first)
                    # the update's own estimate (after tempering), and whether a
                    # provisional one went first
                    upd.append(state['kinds'].get('updated', float('nan')) - t0)
                    prov.append('provisional' in state['kinds'])
            if not lat:
                raise RuntimeError('the learner node learned none of the timed demonstrations')
            out['node_update_latency_ms_p95'] = float(np.percentile(lat, 95) * 1e3)
            out['node_update_latency_ms_median'] = float(np.median(lat) * 1e3)
            out['node_updated_latency_ms_p95'] = float(np.nanpercentile(upd, 95) * 1e3)
            out['node_updated_latency_ms_median'] = float(np.nanmedian(upd) * 1e3)
            out['node_provisional_fraction'] = float(np.mean(prov))
            # how many of the n_lat the figures rest on (a demonstration the node refused,
            # e.g. for samples the best-effort transport lost, is not timed)
            out['node_latency_demonstrations'] = float(len(lat))

            # -- ingest at 1 kHz while updates run
            dur = 10.0 if quick else 60.0
            spin_until(lambda: False, 1.0)
            before = int(state['status'].get('samples', 0))
            sent = 0
            t_start = time.perf_counter()
            k = 100
            while time.perf_counter() - t_start < dur:
                stamps, q = _live(teacher, k)
                k += 1
                teach.publish(Bool(data=True))
                sent += publish_paced(
                    pub, stamps, q, names, 1000.0,
                    lambda i: rclpy.spin_once(node, timeout_sec=0.0) if i % 200 == 0 else None)
                teach.publish(Bool(data=False))
            spin_until(lambda: int(state['status'].get('samples', 0)) - before >= sent, 20)
            got = int(state['status'].get('samples', 0)) - before
            out['node_ingest_samples_sent'] = sent
            out['node_ingest_drop_fraction_1khz'] = max(0.0, 1.0 - got / sent)

            # -- memory over many demonstrations fed back to back
            n_rss = 40 if quick else 200
            warm = 10
            rss0 = None
            start = n_demos()
            for i in range(n_rss):
                _, path = teacher.choose(1000 + i)
                msg = JointTrajectory()
                msg.joint_names = names
                for j, row in enumerate(path):
                    p = JointTrajectoryPoint()
                    p.positions = row.tolist()
                    tt = 3.0 * j / (len(path) - 1)
                    p.time_from_start.sec, p.time_from_start.nanosec = int(tt), \
                        int((tt % 1) * 1e9)
                    msg.points.append(p)
                traj.publish(msg)
                spin_until(lambda: n_demos() >= start + i + 1, 120)
                if i + 1 == warm:
                    rss0 = _rss_mb(proc.pid)
            out['node_rss_growth_mb'] = _rss_mb(proc.pid) - rss0
            out['node_rss_demonstrations'] = n_rss
            node.destroy_node()
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
    return out
