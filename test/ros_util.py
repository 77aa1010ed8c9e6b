# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Helpers for tests that run real rclpy nodes over DDS (loopback only, see conftest)."""

import contextlib
import time

import rclpy
from rclpy.context import Context
from rclpy.executors import SingleThreadedExecutor
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy

LATCHED = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                     durability=DurabilityPolicy.TRANSIENT_LOCAL)


@contextlib.contextmanager
def ros_context():
    ctx = Context()
    rclpy.init(context=ctx)
    ex = SingleThreadedExecutor(context=ctx)
    try:
        yield ctx, ex
    finally:
        ex.shutdown()
        rclpy.shutdown(context=ctx)


@contextlib.contextmanager
def spinning(node, ctx):
    """Spin ``node`` in its own executor thread (as it would in its own process)."""
    import threading
    ex = SingleThreadedExecutor(context=ctx)
    ex.add_node(node)
    stop = threading.Event()

    def run():
        while not stop.is_set() and ctx.ok():
            ex.spin_once(timeout_sec=0.02)
    th = threading.Thread(target=run, daemon=True)
    th.start()
    try:
        yield ex
    finally:
        stop.set()
        th.join(timeout=5.0)
        ex.remove_node(node)
        ex.shutdown()


def spin_until(ex, pred, timeout=30.0):
    deadline = time.time() + timeout
    while time.time() < deadline:
        if pred():
            return True
        ex.spin_once(timeout_sec=0.02)
    return pred()


def publish_stream(ex, pub, teach_pub, stamps, q, names, rate_hz=1000.0):
    """Publish one demonstration: teaching on, samples, teaching off."""
    from std_msgs.msg import Bool

    from pref_learner.ros.common import publish_paced
    teach_pub.publish(Bool(data=True))
    ex.spin_once(timeout_sec=0.01)
    publish_paced(pub, stamps, q, names, rate_hz)
    time.sleep(0.05)
    teach_pub.publish(Bool(data=False))


def teaching_publishers(node, ex, depth=100, timeout=30.0, ready=lambda: True):
    """Publishers of joint_states and the learner's teaching signal, once both are matched."""
    from sensor_msgs.msg import JointState
    from std_msgs.msg import Bool
    pub = node.create_publisher(JointState, 'joint_states',
                                QoSProfile(depth=depth, reliability=ReliabilityPolicy.RELIABLE))
    teach = node.create_publisher(Bool, '/pref_learner/teaching', 10)
    assert spin_until(ex, lambda: pub.get_subscription_count() > 0
                      and teach.get_subscription_count() > 0 and ready(), timeout)
    return pub, teach


def follow_status(node, topic='/pref_learner/status'):
    """A dict kept up to date with the learner node's latest status values."""
    from diagnostic_msgs.msg import DiagnosticArray
    status = {}

    def on_status(msg):
        for st in msg.status:
            status.update({kv.key: kv.value for kv in st.values})
    node.create_subscription(DiagnosticArray, topic, on_status, LATCHED)
    return status
