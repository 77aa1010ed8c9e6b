# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""ROS 2 simulated teacher: plays demonstrations of a person model as joint states.

Simulated joint states must never reach a real robot's topics: the node publishes
only on its private ``~/joint_states`` (``/simulated_teacher/joint_states``; remap the
learner's ``joint_states`` to it) and refuses to start when DDS discovery could reach
other machines, unless ``allow_network`` is true.

The person demonstrates on the learner's robot with the learner's features
and scales: the task model comes from the learner's latched task record
(``task_record_topic``), whatever robot that is. With ``task_record_topic``
empty the node stands alone on the shipped arm (``features``,
``calibration_seed``).
"""

from __future__ import annotations

import os
import threading
import time

import numpy as np
from rclpy.node import Node
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
from sensor_msgs.msg import JointState
from std_msgs.msg import Bool, String

from ..learner import LearnerConfig
from ..safety import allow_network_requested, default_local, refuse_network_reason
from ..sim import SimulatedTeacher, TeacherConfig
from ..task import TaskModel, TaskRecord
from .common import declare_feature_modules, declare_read_only, joint_state, run_node

LATCHED = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                     durability=DurabilityPolicy.TRANSIENT_LOCAL)


def other_joints(robot):
    """Return the URDF's movable joints outside the chain (no mimic joints), each at a value.

    The value is 0.01 clipped into the joint's limits: a gripper held still.
    """
    import xml.etree.ElementTree as ET
    out = []
    for j in ET.fromstring(robot.urdf_text).findall('joint'):
        name = j.get('name')
        if j.get('type') in ('fixed', 'floating', 'planar', None) or name in robot.joint_names \
                or j.find('mimic') is not None:
            continue
        lim = j.find('limit')
        lo = float(lim.get('lower', '-inf')) if lim is not None else -np.inf
        hi = float(lim.get('upper', 'inf')) if lim is not None else np.inf
        if j.get('type') == 'continuous':
            lo, hi = -np.inf, np.inf
        out.append((name, float(np.clip(0.01, lo, hi))))
    return out


class TeacherNode(Node):
    """Publishes ``~/joint_states`` at ``rate`` Hz and toggles the learner's teaching signal."""

    def __init__(self, **kwargs):
        super().__init__('simulated_teacher', **kwargs)
        p = {
            'true_weights': ([0.0], 'the person\'s true weights in feature order; all zero: '
                             'the feature file\'s scenario.example_preference'),
            'model': ('less', 'how the person chooses: boltzmann or less'),
            'beta': (5.0, 'the person\'s rationality'),
            'n_demonstrations': (8, 'demonstrations to give'),
            'seed': (1, 'seed of the session'),
            'rate': (500.0, 'joint_states rate, Hz'),
            'duration': (3.0, 'duration of one motion, s'),
            'pause': (1.0, 'pause between demonstrations, s'),
            'start_delay': (2.0, 'wait before the first demonstration, s'),
            'release_delay': (0.3, 'wait after the last sample before the teaching signal '
                              'goes off, s (lets the learner take in the last samples first)'),
            'teaching_topic': ('/pref_learner/teaching', 'the learner\'s teaching topic'),
            'task_record_topic': ('/pref_learner/task_record', 'the learner\'s latched task '
                                  'record (robot, features, scales); empty: stand alone on '
                                  'the shipped arm with features and calibration_seed'),
            'task_record_timeout': (60.0, 'longest wait for the task record, s'),
            'features': ('', 'feature YAML when task_record_topic is empty'),
            'calibration_seed': (0, 'seed of the feature-scale calibration when '
                                 'task_record_topic is empty'),
            'allow_network': (False, 'publish even when DDS discovery reaches other machines'),
            'follow_proposals': (False, 'demonstrate the task the learner proposes on '
                                 'proposal_topic (waits up to proposal_timeout for a new one '
                                 'after each demonstration)'),
            'proposal_topic': ('/pref_learner/next_task', 'the learner\'s proposed next task'),
            'proposal_timeout': (30.0, 'longest wait for a new proposal, s'),
        }
        declare_read_only(self, p)
        declare_feature_modules(self)
        g = lambda k: self.get_parameter(k).value  # noqa: E731
        refusal = refuse_network_reason(g('allow_network'))
        if refusal:
            raise ValueError(refusal)
        self.person = TeacherConfig(model=g('model'), beta=g('beta'), seed=g('seed'),
                                    rate=g('rate'), duration=g('duration'))
        self.task = None                      # TaskModel, from the record or the parameters
        self.teacher = None
        self.failure = ''
        self._record = threading.Event()
        if g('task_record_topic'):
            self.create_subscription(String, g('task_record_topic'), self._on_record, LATCHED)
        else:
            self._use(TaskModel.from_config(LearnerConfig(
                features=g('features'), n_alternatives=1,
                calibration_seed=g('calibration_seed'))))
        self.js_pub = self.create_publisher(
            JointState, '~/joint_states',
            QoSProfile(depth=100, reliability=ReliabilityPolicy.RELIABLE))
        self.teach_pub = self.create_publisher(Bool, g('teaching_topic'), 10)
        self.progress_pub = self.create_publisher(Bool, '~/demonstrating', 10)
        self.finished = threading.Event()
        self._proposals = []                  # (name, start, goal), appended by the executor
        self._proposal_seen = threading.Condition()
        if g('follow_proposals'):
            from rclpy.qos import DurabilityPolicy
            from trajectory_msgs.msg import JointTrajectory
            self.create_subscription(JointTrajectory, g('proposal_topic'), self._on_proposal,
                                     QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                                                durability=DurabilityPolicy.TRANSIENT_LOCAL))
        self.get_logger().info(f'simulated joint states on {self.js_pub.topic_name} only')
        self._thread = threading.Thread(target=self._play, daemon=True)
        self._thread.start()

    def _use(self, task: TaskModel) -> None:
        """Make the simulated person for ``task`` (raises ValueError for bad weights)."""
        truth = np.asarray(self.get_parameter('true_weights').value, dtype=np.float64)
        if not np.any(truth):
            truth = task.example_preference()
            if truth is None:
                raise ValueError('true_weights not given and the feature specification has no '
                                 'scenario.example_preference')
        self.teacher = SimulatedTeacher(task, truth, self.person)
        self.task = task
        self._record.set()

    def _on_record(self, msg):
        if self._record.is_set():
            return
        try:
            self._use(TaskModel.from_record(TaskRecord.from_json(msg.data)))
        except ValueError as exc:
            self.failure = f'task record refused: {exc}'
            self.get_logger().error(self.failure)
            self._record.set()

    @property
    def learner(self):
        """The task model the person demonstrates on (None before the record)."""
        return self.task

    def _on_proposal(self, msg):
        if self.task is None:
            return
        names = list(msg.joint_names)
        chain = self.task.robot.joint_names
        if len(msg.points) != 2 or any(j not in names for j in chain):
            return
        idx = [names.index(j) for j in chain]
        ends = [np.array([p.positions[i] for i in idx]) for p in msg.points]
        with self._proposal_seen:
            self._proposals.append((msg.header.frame_id, ends[0], ends[1]))
            self._proposal_seen.notify_all()

    def _next_task(self, seen: int, timeout: float):
        """Wait for a proposal after the first ``seen`` ones (or take the latest one)."""
        with self._proposal_seen:
            self._proposal_seen.wait_for(lambda: len(self._proposals) > seen, timeout)
            return (self._proposals[-1] if self._proposals else None), len(self._proposals)

    def _play(self):
        g = lambda k: self.get_parameter(k).value  # noqa: E731
        t_start = time.monotonic()
        if not self._record.wait(g('task_record_timeout')) or self.task is None:
            self.failure = self.failure or (f'no task record on {g("task_record_topic")} '
                                            f'within {g("task_record_timeout"):g} s')
            self.get_logger().error(f'{self.failure}; no demonstration given')
            self.finished.set()
            return
        time.sleep(max(0.0, g('start_delay') - (time.monotonic() - t_start)))
        seen = 0
        extra = other_joints(self.task.robot)
        names = list(self.task.robot.joint_names) + [n for n, _ in extra]
        held = np.array([v for _, v in extra])
        period = 1.0 / g('rate')
        for k in range(g('n_demonstrations')):
            if not self.context.ok():
                return
            # stamped at the simulated person's sample times, so a stall of this process
            # under load delays samples but never opens a gap between their stamps
            task = None
            if g('follow_proposals'):
                task, seen = self._next_task(seen, g('proposal_timeout'))
            stamps, q = self.teacher.stream(k, self.get_clock().now().nanoseconds, task)
            self.teach_pub.publish(Bool(data=True))
            self.progress_pub.publish(Bool(data=True))
            t_next = time.perf_counter()
            for stamp, row in zip(stamps, q):
                msg = joint_state(int(stamp), names, np.concatenate([row, held]))
                self.js_pub.publish(msg)
                t_next += period
                delay = t_next - time.perf_counter()
                if delay > 0:
                    time.sleep(delay)
            time.sleep(g('release_delay'))
            self.teach_pub.publish(Bool(data=False))
            self.progress_pub.publish(Bool(data=False))
            self.get_logger().info(f'demonstration {k + 1} given'
                                   + (f' ({task[0]}, as proposed)' if task else ''))
            time.sleep(g('pause'))
        self.finished.set()


def main(args=None):
    import sys
    default_local(os.environ)
    # refuse before rclpy.init: not even discovery traffic leaves the machine
    refusal = refuse_network_reason(allow_network_requested(sys.argv if args is None else args))
    if refusal:
        print(f'simulated_teacher: {refusal}', flush=True)
        raise SystemExit(2)
    run_node(TeacherNode, args, 'simulated_teacher', done=lambda n: n.finished.is_set())


if __name__ == '__main__':
    main()
