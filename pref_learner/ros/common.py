# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Pieces shared by the nodes and their clients: spinning a node, message builders."""

import os
import time

import rclpy
from sensor_msgs.msg import JointState


def run_node(factory, args=None, name='pref_learner') -> None:
    """Run a node as ``main``: loopback DDS unless told otherwise, spin until interrupted.

    A ``ValueError`` from the constructor (bad parameters) is one line and exit code 2.
    """
    os.environ.setdefault('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
    from rclpy.executors import ExternalShutdownException, SingleThreadedExecutor
    try:
        with rclpy.init(args=args):
            try:
                node = factory()
            except ValueError as exc:
                print(f'{name}: {exc}', flush=True)
                raise SystemExit(2)
            ex = SingleThreadedExecutor()
            ex.add_node(node)
            try:
                ex.spin()
            finally:
                node.destroy_node()
    except (KeyboardInterrupt, ExternalShutdownException):
        pass


def joint_state(stamp_ns: int, names, positions) -> JointState:
    m = JointState()
    m.header.stamp.sec = int(stamp_ns // 10**9)
    m.header.stamp.nanosec = int(stamp_ns % 10**9)
    m.name = list(names)
    m.position = [float(x) for x in positions]
    return m


def publish_paced(pub, stamps, q, names, rate_hz: float, every=None) -> int:
    """Publish samples as JointState at ``rate_hz``; ``every(i)`` is called after each."""
    period = 1.0 / rate_hz
    t_next = time.perf_counter()
    for i, (st, row) in enumerate(zip(stamps, q)):
        pub.publish(joint_state(int(st), names, row))
        if every is not None:
            every(i)
        t_next += period
        d = t_next - time.perf_counter()
        if d > 0:
            time.sleep(d)
    return len(stamps)
