# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""ROS 2 planner node: turns the learner's current estimate into proposed trajectories.

The robot, the features and their scales come from the learner's latched task
record (``task_record_topic``, :mod:`pref_learner.task`), so a plan scores
trajectories exactly as the weights were learned; until one arrives, requests
are refused.

``~/trajectory`` is an unchecked proposal timed to the URDF velocity limits: never
wire it to a controller without the controller stack's own checks. Every plan is
logged with its convergence (iterations, projected-gradient norm, cost, time); a
plan that did not meet the stopping rule is logged as a warning and counted
(``plans_not_converged``).
"""

from __future__ import annotations

import collections

import numpy as np
from builtin_interfaces.msg import Duration
from geometry_msgs.msg import Point
from rclpy.node import Node
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
from std_msgs.msg import Float64MultiArray, String
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint
from visualization_msgs.msg import Marker, MarkerArray

from ..planner import PlannerConfig, TrajectoryPlanner, cap_tool_speed, time_parametrize
from ..safety import CAUTION, PLANNER_WARNING
from .common import QueueWorker, declare_feature_modules, declare_read_only

LATCHED = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                     durability=DurabilityPolicy.TRANSIENT_LOCAL)


class PlannerNode(Node):
    """Plan on ``~/request`` with the learner's weights; publish ``~/trajectory``."""

    def __init__(self, **kwargs):
        super().__init__('pref_planner', **kwargs)
        params = {
            'weights_topic': ('/pref_learner/weights', 'the learner\'s mean weights'),
            'particles_topic': ('/pref_learner/particles', 'the learner\'s particles'),
            'uncertainty_objective': ('mean', 'objective over the preference posterior: mean '
                                      '(expected reward) or cvar (mean of the worst alpha '
                                      'tail); not a hazard measure'),
            'alpha': (0.1, 'tail fraction for uncertainty_objective cvar'),
            'smoothness': (0.01, 'weight of the acceleration term'),
            'restarts': (1, 'seeded restarts besides the straight line'),
            'n_waypoints': (0, 'waypoints per plan; 0: the task record\'s, as the learner '
                            'scores trajectories (another value is warned about)'),
            'max_acceleration': (2.0, 'joint acceleration limit for timing, rad/s^2'),
            'velocity_scale': (0.5, 'fraction of the URDF velocity limits used for timing'),
            'max_tool_speed': (0.25, 'cap on the tool frame\'s Cartesian speed for timing, m/s '
                               '(0: no cap); shapes proposals only, not a safety function'),
            'task_record_topic': ('/pref_learner/task_record', 'the learner\'s latched task '
                                  'record: robot, features and their scales'),
            'seed': (0, 'seed of the restarts'),
        }
        declare_read_only(self, params)
        declare_feature_modules(self)
        self.get_logger().warning(CAUTION)
        self.get_logger().warning(PLANNER_WARNING)
        g = lambda k: self.get_parameter(k).value  # noqa: E731
        checks = (('velocity_scale', 0.0 < g('velocity_scale') <= 1.0, 'in (0, 1]'),
                  ('max_acceleration', g('max_acceleration') > 0.0, '> 0'),
                  ('max_tool_speed', g('max_tool_speed') >= 0.0, '>= 0'),
                  ('n_waypoints', g('n_waypoints') == 0 or g('n_waypoints') >= 4,
                   '0 (the task record\'s) or >= 4'))
        for key, ok, what in checks:
            if not ok:
                raise ValueError(f'parameter {key} must be {what}, got {g(key)!r}')
        self.planner_config = PlannerConfig(
            n_waypoints=g('n_waypoints') or 64, smoothness=g('smoothness'),
            restarts=g('restarts'), uncertainty_objective=g('uncertainty_objective'),
            alpha=g('alpha'))
        # (TaskModel of the learner's record, its robot, the planner), set at once
        self._model = (None, None, None)
        self.rng = np.random.default_rng(g('seed'))
        self.weights = None
        self.particles = None
        self.counters = collections.Counter()
        self.last_warning = ''
        self.last_plan = None          # PlanResult of the last published trajectory
        self.create_subscription(String, g('task_record_topic'), self._on_record, LATCHED)
        self.create_subscription(Float64MultiArray, g('weights_topic'), self._on_weights, LATCHED)
        self.create_subscription(Float64MultiArray, g('particles_topic'), self._on_particles,
                                 LATCHED)
        self.create_subscription(JointTrajectory, '~/request', self._on_request, 10)
        self.traj_pub = self.create_publisher(JointTrajectory, '~/trajectory', 10)
        self.marker_pub = self.create_publisher(MarkerArray, '~/markers', LATCHED)
        self._worker = QueueWorker(self._plan, self._on_error, 16, 'pref_planner_worker')
        self._worker.start()

    def _warn(self, key, text):
        self.counters[key] += 1
        self.last_warning = text
        self.get_logger().warning(text)

    def _on_record(self, msg):
        from dataclasses import replace

        from ..task import TaskModel, TaskRecord
        try:
            task = TaskModel.from_record(TaskRecord.from_json(msg.data))
        except Exception as exc:  # noqa: BLE001 -- any malformed record: named, node goes on
            self._warn('bad_task_record', f'task record refused: {type(exc).__name__}: {exc}')
            return
        n = self.get_parameter('n_waypoints').value or task.n_waypoints
        if n != task.n_waypoints:
            self._warn('waypoints_differ', f'planning with {n} waypoints where the learner '
                       f'scores trajectories at {task.n_waypoints}: the planned features are '
                       'not those the weights were learned on')
        planner = TrajectoryPlanner(task.features, replace(self.planner_config, n_waypoints=n))
        # (the estimates are kept: latched topics arrive in any order at start-up)
        self._model = (task, task.robot, planner)
        self.get_logger().info(f'task model received: {len(task.robot.joint_names)} joints, '
                               f'features {list(task.names)}')

    @property
    def task(self):
        """The task model of the learner's record (None before it arrives)."""
        return self._model[0]

    @property
    def robot(self):
        return self._model[1]

    @property
    def planner(self):
        return self._model[2]

    def _on_weights(self, msg):
        w = np.array(msg.data, dtype=np.float64)
        if w.size == 0 or not np.all(np.isfinite(w)):
            self._warn('bad_weights', f'weights refused: {w.size} values, finite: '
                       f'{bool(np.all(np.isfinite(w)))}; the previous ones are kept')
            return
        self.weights = w

    def _on_particles(self, msg):
        dims = msg.layout.dim
        data = np.array(msg.data, dtype=np.float64)
        shape = tuple(int(x.size) for x in dims)
        d = None if self._model[2] is None else self._model[2].features.d
        why = ('the layout is not (particles, columns)' if len(shape) != 2 else
               f'{data.size} values for a layout of {shape[0]} x {shape[1]}'
               if data.size != shape[0] * shape[1] or data.size == 0 else
               f'{shape[1]} columns for {d} weights and a log-weight'
               if d is not None and shape[1] < d + 1 else
               'non-finite values' if not np.all(np.isfinite(data)) else '')
        if why:
            self._warn('bad_particles', f'particles refused: {why}; the previous ones are kept')
            return
        self.particles = data.reshape(shape)

    def _on_request(self, msg):
        self._worker.put(msg)

    def _on_error(self, exc):
        if isinstance(exc, ValueError):
            self._warn('bad_request', f'planning request refused: {exc}')
        else:
            self._warn('internal_error', f'{type(exc).__name__}: {exc}')

    def _plan(self, msg: JointTrajectory):
        task, robot, planner = self._model
        if task is None:
            raise ValueError('no task record received yet on '
                             f'{self.get_parameter("task_record_topic").value}')
        if len(msg.points) != 2:
            raise ValueError(f'a request needs exactly 2 points (start, goal), got '
                             f'{len(msg.points)}')
        names = list(msg.joint_names)
        missing = [j for j in robot.joint_names if j not in names]
        if missing:
            raise ValueError(f'request lacks joints {missing}')
        idx = [names.index(j) for j in robot.joint_names]
        ends = []
        for p in msg.points:
            if len(p.positions) != len(names):
                raise ValueError(f'a request point has {len(p.positions)} positions for '
                                 f'{len(names)} joint names')
            ends.append(np.array([p.positions[i] for i in idx], dtype=np.float64))
        if self.weights is None:
            topic = self.get_parameter('weights_topic').value
            raise ValueError(f'no weights received yet on {topic} (a learner with model both '
                             'publishes ~/boltzmann/weights and '
                             '~/less/weights: set weights_topic and particles_topic to one)')
        d = planner.features.d
        if len(self.weights) != d:
            raise ValueError(f'{len(self.weights)} weights for the task record\'s {d} features')
        cvar = planner.config.uncertainty_objective == 'cvar'
        if cvar and self.particles is None:
            self._warn('cvar_without_particles', 'uncertainty_objective cvar, but no particles '
                       f'received yet on {self.get_parameter("particles_topic").value}: planned '
                       'on the mean weights')
        if cvar and self.particles is not None:
            parts = self.particles
            theta = parts[:, :d]
            lw = parts[:, -1]
            pw = np.exp(lw - lw.max())
            res = planner.plan(theta, ends[0], ends[1], self.rng, particle_weights=pw)
        else:
            res = planner.plan(self.weights, ends[0], ends[1], self.rng)
        vmax = robot.velocity_limit * self.get_parameter('velocity_scale').value
        amax = np.full(robot.n, self.get_parameter('max_acceleration').value)
        t = time_parametrize(res.q, vmax, amax)
        tool = robot.frame_poses(res.q, [robot.tool_frame]).positions[:, 0]
        if self.get_parameter('max_tool_speed').value > 0:
            t = cap_tool_speed(t, tool, self.get_parameter('max_tool_speed').value)
        out = JointTrajectory()
        out.header.stamp = self.get_clock().now().to_msg()
        out.joint_names = list(robot.joint_names)
        for ti, qi in zip(t, res.q):
            p = JointTrajectoryPoint()
            p.positions = qi.tolist()
            p.time_from_start = Duration(sec=int(ti), nanosec=int((ti % 1.0) * 1e9))
            out.points.append(p)
        self.traj_pub.publish(out)
        self.last_plan = res
        if res.converged:
            self.get_logger().info(res.summary())
        else:
            self._warn('plans_not_converged', f'{res.summary()} ({res.message}); published '
                       'anyway: the proposal is feasible but not locally optimal')
        mk = Marker()
        mk.header.frame_id = robot.root_link
        mk.ns = 'plan'
        mk.type = Marker.LINE_STRIP
        mk.scale.x = 0.01
        mk.color.a, mk.color.r, mk.color.g = 1.0, 0.9, 0.5
        mk.pose.orientation.w = 1.0
        mk.points = [Point(x=float(a), y=float(b), z=float(c)) for a, b, c in tool]
        note = Marker()                    # the caution goes wherever the plan is shown
        note.header.frame_id = robot.root_link
        note.ns, note.id = 'plan_caution', 0
        note.type = Marker.TEXT_VIEW_FACING
        note.scale.z = 0.03
        note.color.a, note.color.r, note.color.g, note.color.b = 1.0, 1.0, 0.3, 0.2
        note.pose.orientation.w = 1.0
        note.pose.position = Point(x=float(tool[-1, 0]), y=float(tool[-1, 1]),
                                   z=float(tool[-1, 2]) + 0.1)
        note.text = CAUTION
        self.marker_pub.publish(MarkerArray(markers=[mk, note]))
        self.counters['plans'] += 1

    def destroy_node(self):
        if getattr(self, '_worker', None) is not None:
            self._worker.stop()
        super().destroy_node()


def main(args=None):
    from .common import run_node
    run_node(PlannerNode, args, 'pref_planner')


if __name__ == '__main__':
    main()
