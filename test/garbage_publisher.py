# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Publish malformed and mis-stamped JointStates on joint_states (a fault injector).

Run as its own process by test/test_fault_injection.py::

    python test/garbage_publisher.py DURATION_S RATE_HZ SEED JOINT [JOINT ...]

Every message is wrong in one way the learner node must refuse (content that
cannot be a sample of the chain, or a stamp far from the stream's consensus);
a few carry NaN / inf / absurd positions at a current stamp (sensor faults the
node counts against the demonstration's invalid fraction). Prints one JSON
line with the number of messages and the seconds taken.
"""

import json
import os
import sys
import time

import numpy as np
import rclpy
from rclpy.qos import QoSProfile, ReliabilityPolicy
from sensor_msgs.msg import JointState

from pref_learner.ros.common import joint_state

YEAR_NS = 365 * 24 * 3600 * 10**9


def garbage(i, now, names, rng):
    """The i-th bad message at wall time ``now`` (ns)."""
    n = len(names)
    ok = rng.uniform(-0.5, 0.5, n)
    k = i % 40
    if k == 0:
        return joint_state(now, names, np.full(n, np.nan))                # NaN, stamped now
    if k == 20 and i % 80 == 20:
        return joint_state(now, names, np.full(n, 1e300))                 # absurd, stamped now
    if k == 1 and i % 1000 == 1:                                   # 10,000 unknown joints
        return joint_state(now, [f'x{j}' for j in range(10_000)], rng.uniform(-1, 1, 10_000))
    kinds = [
        lambda: JointState(),                                      # empty
        lambda: joint_state(now, names, ok[:3]),                          # short position array
        lambda: joint_state(now, ['a', 'b'], [0.0, 1.0]),                 # unknown joints
        lambda: joint_state(now, names[:3], ok[:3]),                      # missing joints
        lambda: joint_state(now - 5 * 10**9, list(names) * 2, rng.uniform(-1, 1, 2 * n)),
        lambda: joint_state(now + 3600 * 10**9, names, np.full(n, np.inf)),
        lambda: joint_state(0, names, ok),                                # stamp 0
        lambda: joint_state(now + 7 * YEAR_NS, names, ok),                # a machine 7 years ahead
        lambda: joint_state(7 * YEAR_NS + 1_800_000_000 * 10**9, names, ok),   # one fixed stamp
        lambda: joint_state(now - 3 * YEAR_NS, names, ok),                # far past
        lambda: joint_state(now + int(rng.uniform(0.2, 5.0) * 1e9), names, ok),  # ahead 0.2-5 s
        lambda: joint_state(now - int(rng.uniform(1.0, 60.0) * 1e9), names, ok),  # behind 1-60 s
    ]
    return kinds[i % len(kinds)]()


def main(argv):
    duration, rate, seed = float(argv[1]), float(argv[2]), int(argv[3])
    names = argv[4:]
    os.environ.setdefault('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
    rclpy.init()
    node = rclpy.create_node('garbage_publisher')
    pub = node.create_publisher(JointState, 'joint_states',
                                QoSProfile(depth=1000, reliability=ReliabilityPolicy.RELIABLE))
    deadline = time.time() + 10
    while pub.get_subscription_count() == 0 and time.time() < deadline:
        time.sleep(0.01)
    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    period = 1.0 / rate
    i = 0
    while True:
        elapsed = time.perf_counter() - t0
        if elapsed >= duration:
            break
        while i < elapsed / period:                # catch up after a stall
            pub.publish(garbage(i, time.time_ns(), names, rng))
            i += 1
        time.sleep(max(0.0, (i * period) - (time.perf_counter() - t0)))
    took = time.perf_counter() - t0
    print(json.dumps({'messages': i, 'seconds': took}), flush=True)
    node.destroy_node()
    rclpy.shutdown()


if __name__ == '__main__':
    main(sys.argv)
