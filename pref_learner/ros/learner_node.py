# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""ROS 2 learner node: a thin adapter around :class:`pref_learner.learner.Learner`.

Threads and who owns what:

- the executor that spins this node: subscription callbacks only copy each
  message with its receive time (the middleware's reception time, immune to
  executor backlog; this node's clock when simulated time is active) into
  the worker's bounded sample queue; the timer republishes the cached
  estimates and the latest status snapshot;
- a private service node with its own executor thread serves ``~/...``
  Trigger services: a request goes into the worker's unbounded control queue
  (never dropped) and the service thread, not the sample intake, waits for
  the answer; an exception in the handler comes back as ``success: false``
  with ``TypeName: message``;
- the worker thread owns the :class:`Learner`, handles both queues in arrival
  order, publishes, and after changing anything builds an immutable
  :class:`StatusSnapshot` that the timer only reads. After each estimate is
  published it scores the candidate tasks (the scenario's and those given on
  ``~/candidate_tasks``) and publishes the most informative one latched
  (:mod:`pref_learner.guidance`); the estimate never waits for it.
"""

from __future__ import annotations

import collections
import json
import threading
import time
from dataclasses import dataclass, fields
from typing import Optional, Tuple

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from rcl_interfaces.msg import (FloatingPointRange, IntegerRange, ParameterDescriptor,
                                SetParametersResult)
from rclpy.executors import ExternalShutdownException, SingleThreadedExecutor
from rclpy.node import Node
from rclpy.qos import (DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy)
from rclpy.qos_overriding_options import QoSOverridingOptions
from rclpy.serialization import deserialize_message
from sensor_msgs.msg import JointState
from std_msgs.msg import Bool, Float64, Float64MultiArray, MultiArrayDimension
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint
from visualization_msgs.msg import Marker, MarkerArray

from ..safety import CAUTION
from ..bags import estimate_arrays
from ..choice import MODEL_CHOICES
from ..guidance import TaskGuide, unknown_lines
from ..helpers import ChoiceHelpers
from ..task import CHOICE_CHUNK
from ..learner import Learner, LearnerConfig, StepResult
from ..report import estimate_status_values
from .common import QueueWorker

ESTIMATE_QOS = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                          durability=DurabilityPolicy.TRANSIENT_LOCAL,
                          history=HistoryPolicy.KEEP_LAST)
# the task record and robot_description: latched, the last one only
TASK_RECORD_QOS = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                             durability=DurabilityPolicy.TRANSIENT_LOCAL,
                             history=HistoryPolicy.KEEP_LAST)
# A deep keep-last history (1 s at 1 kHz) absorbs the moments when the worker thread
# holds the interpreter; with 100 the 1 kHz ingest benchmark lost ~1e-4 of samples.
SENSOR_QOS = QoSProfile(depth=1000, reliability=ReliabilityPolicy.BEST_EFFORT,
                        durability=DurabilityPolicy.VOLATILE, history=HistoryPolicy.KEEP_LAST)
# requests wait in the service's reader while the worker answers earlier ones: keep all
SERVICE_QOS = QoSProfile(depth=100, reliability=ReliabilityPolicy.RELIABLE,
                         durability=DurabilityPolicy.VOLATILE, history=HistoryPolicy.KEEP_ALL)
# a held teaching signal is applied once no joint state came in for this long (no backlog)
TEACH_QUIET_S = 0.02
# while joint states stream in, the status snapshot is rebuilt at most this often
STATUS_MIN_S = 0.1
_SERVICES = (('start_demonstration', 'start'), ('stop_demonstration', 'stop'),
             ('reset', 'reset'), ('save', 'save'), ('discard_last', 'discard'))
_SAMPLE_COUNTERS = ('missing_joint', 'repeated_joint_name', 'duplicate', 'out_of_order', 'invalid',
                    'mismatched_lengths', 'zero_stamp', 'stamp_ahead', 'stamp_out_of_range',
                    'unconfirmed', 'recovered', 'timeline_changes')

# name -> (description, range or None, read_only)
_PARAMS = {
    'urdf': ('URDF text (as robot_description) or a file path; empty: robot_description_topic '
             'if set, else the shipped bench arm', None, True),
    'robot_description_topic': ('when urdf is empty, read the URDF from this latched '
                                'std_msgs/String topic (e.g. /robot_description); empty: off',
                                None, True),
    'robot_description_timeout': ('longest wait for robot_description_topic at start-up, s',
                                  (0.1, 3600.0), True),
    'joint_names': ('chain joints in order; empty: root to tool_frame', None, True),
    'tool_frame': ('frame the features read by default', None, True),
    'features': ('feature-set YAML path; empty: shipped bench scenario', None, True),
    'model': ('choice model: boltzmann, less or both', None, True),
    'beta': ('rationality (inverse temperature) when not inferred', (1e-3, 1e3), True),
    'beta_min': ('lower end of the inferred beta range, log-uniform prior (both 0: beta fixed)',
                 (0.0, 1e3), True),
    'beta_max': ('upper end of the inferred beta range (both 0: beta fixed)', (0.0, 1e4), True),
    'n_particles': ('particles of the posterior', (1, 200000), True),
    'n_alternatives': ('alternatives per demonstration', (1, 20000), True),
    'mix_smooth': ('share of smooth random alternatives', (0.0, 1.0), True),
    'mix_near_optimal': ('share of near-optimal alternatives (their own option level)',
                         (0.0, 1.0), True),
    'mix_perturb': ('share of noisy copies of the demonstration (biased: opt-in)', (0.0, 1.0),
                    True),
    'mix_planner': ('share of alternatives optimised under random weights (slow)', (0.0, 1.0),
                    True),
    'planner_jobs': ('processes for planner alternatives (1: in the node process)', (1, 64),
                     True),
    'choice_jobs': ('processes that finish each demonstration\'s choice set (retiming, '
                    'kinematics, features): the worker thread and choice_jobs - 1 helpers',
                    (1, 64), True),
    'clamp': ('clamp configurations outside the joint limits instead of refusing them', None,
              True),
    'spreads': ('option-spread levels, fractions of each joint range (inferred among them)',
                None, True),
    'ascent_steps': ('reward-ascent steps of a near-optimal alternative', (0, 200), True),
    'ascent_step': ('largest waypoint move per ascent step, x the spread', (1e-3, 10.0), True),
    'option_density': ('evidence of an option level: modes (lowest sine modes of the path\'s '
                       'deviation from the straight line, under the level\'s own law), '
                       'deviation (its RMS), or gaussian or kde (of the features)', None, True),
    'pool_levels': ('every option level\'s draws serve every level, weighted by multiple '
                    'importance sampling (smooth alternatives, option_density modes)', None,
                    True),
    'provisional_ess': ('while tempering, publish an importance-weighted estimate first as '
                        'soon as its ESS is at least this (0: never)', (0.0, 1e6), True),
    'n_waypoints': ('waypoints per trajectory', (4, 1000), True),
    'resample': ('demonstration resampling: time or arc_length', None, True),
    'lowpass_hz': ('low-pass cutoff before resampling (0: off)', (0.0, 500.0), True),
    'smooth': ('weight of the shared endpoint-preserving smoother', (0.0, 1.0), True),
    'bandwidth': ('LESS kernel bandwidth: scott, silverman or a number', None, True),
    'segmentation': ('manual (services), signal (~/teaching) or motion', None, False),
    'speed_start': ('motion segmentation: start speed, rad/s', (1e-4, 10.0), False),
    'speed_stop': ('motion segmentation: stop speed, rad/s', (1e-4, 10.0), False),
    'dwell': ('motion segmentation: quiet time that ends a demonstration, s', (0.01, 10.0),
              False),
    'min_duration': ('shortest accepted demonstration, s', (0.01, 60.0), False),
    'min_motion': ('smallest accepted joint excursion, rad', (0.0, 10.0), False),
    'max_gap': ('largest accepted gap between samples, s', (0.001, 10.0), False),
    'state_dir': ('state directory (demonstrations, posterior); empty: none', None, True),
    'seed': ('seed of every random draw', (0, 2**31 - 1), True),
    'calibration_seed': ('seed of the feature-scale calibration', (0, 2**31 - 1), True),
    'record_bag': ('write inputs and estimates into this new bag (MCAP); empty: off', None,
                   True),
    'publish_period': ('republish estimates and diagnostics every this many s', (0.05, 60.0),
                       True),
    'max_stamp_skew': ('reject samples stamped further than this from now, s (0: off)',
                       (0.0, 1e9), False),
}
_RUNTIME = {k for k, v in _PARAMS.items() if not v[2]}
#: user-supplied candidate tasks kept at most (the oldest goes first)
MAX_USER_TASKS = 32


@dataclass(frozen=True)
class StatusSnapshot:
    """What ``~/status`` says, as plain immutable values (built by the worker thread).

    ``models``: per model, the status name and its key/value pairs, in order.
    """

    level: bytes
    message: str
    models: Tuple[Tuple[str, Tuple[Tuple[str, str], ...]], ...]
    storage_error: str


def _helpers_state(helpers) -> str:
    """Say how many choice-set helper processes run, or why they stopped."""
    if helpers is None:
        return 'none'
    if helpers.running:
        return f'{helpers.processes} running'
    return f'stopped: {helpers.error}' if helpers.error else 'stopped'


def _array_msg(data, dims) -> Float64MultiArray:
    m = Float64MultiArray()
    m.layout.dim = [MultiArrayDimension(label=lab, size=int(s), stride=int(st))
                    for lab, s, st in dims]
    m.data = np.asarray(data, dtype=np.float64).ravel().tolist()
    return m


class LearnerNode(Node):
    """Subscribes to joint states, learns on a worker thread, publishes estimates."""

    def __init__(self, **kwargs):
        super().__init__('pref_learner', **kwargs)
        self._worker = QueueWorker(self._handle_item, self._on_worker_error, 200_000,
                                   'pref_learner_worker', alive=lambda: self.context.ok(),
                                   on_idle=self._on_idle)
        self._lock = threading.Lock()
        self.counters = collections.Counter()      # written by the worker thread only
        self.last_warning = ''
        self._pending_config = None
        self._summaries = {}
        # what the last published estimate is: provisional (importance weights before
        # tempering ends), updated (the update's, before the moves) or settled (after them, or
        # the learner's own); anything but settled is for a demonstration in progress
        self._estimate_kind = 'settled'
        self._helpers_warned = False
        self._status = None
        self._status_t = 0.0
        self._status_dirty = False
        self._storage_error = ''
        self._flush_queued = False
        self._closing = threading.Event()
        self._held_teaching = collections.deque()      # (arrival, receive time, on)
        self._last_log = 0
        self._last_js = 0.0                            # monotonic time of the last sample
        self._declare_parameters()
        self.config = self._config_from_parameters()
        self.learner = Learner(self.config, on_estimate=self._on_estimate)
        self._start_helpers()
        self._guide = TaskGuide(self.learner)
        self._scenario_tasks = []
        for name, start, goal in self.learner.tasks():
            try:
                for q in (start, goal):
                    self.learner.robot.check_configurations(q, f'scenario task {name}')
                self._scenario_tasks.append((name, start, goal))
            except ValueError as exc:
                self.get_logger().warning(f'{exc}; not proposed')
        self._user_tasks = collections.OrderedDict()   # name -> (start, goal), worker only
        self._proposal = None
        self._proposal_ms = float('nan')
        self.learner.recorder.set_max_skew(self.get_parameter('max_stamp_skew').value)
        for m in self.learner.messages:
            if m in getattr(self.learner, 'quarantined', ()):
                self._warn('quarantined', m)
            else:
                self.get_logger().info(m)
        self.declare_parameter('feature_names', list(self.learner.names), ParameterDescriptor(
            description='order of every published weight vector', read_only=True))
        self._bag = None
        bag = self.get_parameter('record_bag').value
        if bag:
            from ..bags import BagWriter
            self._bag = BagWriter(bag)
            # the session's task model first, so `learn` of the bag needs nothing else
            record = self.learner.record.to_json()
            self._record(lambda b: b.write(self.resolve_topic_name('~/task_record'),
                                           b.string(record), self._now()))
        self._make_interfaces()
        self._js_topic = self.resolve_topic_name('joint_states')
        self._teach_topic = self.resolve_topic_name('~/teaching')
        self._traj_topic = self.resolve_topic_name('~/demonstration')
        self._event_topic = self.resolve_topic_name('~/session_events')
        if self.learner.n_demonstrations:     # learned before this run: not in its bag
            self._event('resumed ' + json.dumps({'demonstrations':
                                                 self.learner.n_demonstrations}))
        self._cache = {}
        self._latency = float('nan')
        self._publish_estimates()
        self._note_storage()
        self._worker.start()
        self._worker.put_control(('propose',))         # what to teach first, at the prior
        self._start_services()
        period = self.get_parameter('publish_period').value
        self.create_timer(period, self._republish)
        self.get_logger().info(
            f'learning {list(self.learner.names)} with model {self.config.model}; '
            f'{self.learner.n_demonstrations} demonstrations loaded')
        self.get_logger().warning(CAUTION)

    # ------------------------------------------------------------ parameters
    def _declare_parameters(self):
        self.add_on_set_parameters_callback(self._on_set)
        self.add_post_set_parameters_callback(self._after_set)
        defaults = LearnerConfig()
        extra = {'record_bag': '', 'publish_period': 1.0, 'max_stamp_skew': 0.0,
                 'robot_description_topic': '', 'robot_description_timeout': 30.0,
                 'choice_jobs': 1}
        for name, (desc, rng, ro) in _PARAMS.items():
            default = extra[name] if name in extra else getattr(defaults, name)
            if name == 'joint_names':
                default = list(default) or ['']
            elif name == 'spreads':
                default = [float(x) for x in default]
            d = ParameterDescriptor(description=desc, read_only=ro)
            if rng is not None:
                if isinstance(default, bool):
                    pass
                elif isinstance(default, int):
                    d.integer_range = [IntegerRange(from_value=int(rng[0]), to_value=int(rng[1]),
                                                    step=0)]
                else:
                    d.floating_point_range = [FloatingPointRange(
                        from_value=float(rng[0]), to_value=float(rng[1]), step=0.0)]
            self.declare_parameter(name, default, d)

    def _config_from_parameters(self) -> LearnerConfig:
        vals = {}
        for f in fields(LearnerConfig):
            if self.has_parameter(f.name):
                v = self.get_parameter(f.name).value
                if f.name == 'joint_names':
                    v = tuple(x for x in v if x)
                elif f.name == 'spreads':
                    v = tuple(float(x) for x in v)
                vals[f.name] = v
        if not vals.get('urdf'):
            vals['urdf'] = self._robot_description()
        return LearnerConfig(**vals)

    def _robot_description(self) -> str:
        """Return the URDF of ``robot_description_topic`` ('' when the parameter is empty).

        The topic is latched (transient local), as robot_state_publisher offers it.
        """
        topic = self.get_parameter('robot_description_topic').value
        if not topic:
            return ''
        from rclpy.wait_for_message import wait_for_message
        from std_msgs.msg import String
        wait = self.get_parameter('robot_description_timeout').value
        self.get_logger().info(f'waiting up to {wait:g} s for the URDF on {topic}')
        ok, msg = wait_for_message(String, self, topic, qos_profile=TASK_RECORD_QOS,
                                   time_to_wait=wait)
        if not ok or not msg.data.strip():
            raise ValueError(f'no URDF on {topic} within {wait:g} s (robot_description_topic); '
                             'set urdf, or start the publisher of the robot description')
        return msg.data

    def _on_set(self, params):
        if not hasattr(self, 'config'):
            # declaration time: check the value's own constraints only
            for p in params:
                if p.name == 'model' and p.value not in MODEL_CHOICES:
                    return SetParametersResult(successful=False, reason=(
                        f'model {p.value!r} is unknown; allowed: {", ".join(MODEL_CHOICES)}'))
                if p.name == 'segmentation' and p.value not in ('manual', 'signal', 'motion'):
                    return SetParametersResult(successful=False, reason=(
                        f'segmentation {p.value!r} is unknown; allowed: manual, signal, motion'))
            return SetParametersResult(successful=True)
        changes = {p.name: p.value for p in params if p.name in _RUNTIME}
        if not changes:
            return SetParametersResult(successful=True)
        try:
            self._runtime_config(changes)
        except (ValueError, TypeError) as exc:
            return SetParametersResult(successful=False, reason=str(exc))
        return SetParametersResult(successful=True)

    def _runtime_config(self, changes) -> LearnerConfig:
        """Return the config of every run-time parameter's current value with ``changes``.

        Built on the parameters, not on ``self.config``: rclpy calls the set
        callbacks once per parameter, and a change a recording holds back
        (``_pending_config``) is not in ``self.config`` yet, so each change
        keeps, and is checked against, those accepted before it.
        """
        d = {f.name: getattr(self.config, f.name) for f in fields(LearnerConfig)}
        d.update({k: self.get_parameter(k).value for k in _RUNTIME if k in d})
        d.update({k: v for k, v in changes.items() if k in d})
        return LearnerConfig(**d)

    def _after_set(self, params):
        """Hand accepted run-time changes to the worker (checked in ``_on_set``)."""
        for p in params:
            if p.name == 'max_stamp_skew':
                self._worker.put_control(('skew', float(p.value)))
        changes = {p.name: p.value for p in params if p.name in _RUNTIME}
        if changes and hasattr(self, 'config'):
            self._worker.put_control(('config', self._runtime_config(changes)))

    # ------------------------------------------------------------ interfaces
    def _make_interfaces(self):
        self.create_subscription(
            JointState, 'joint_states', self._on_joint_states, SENSOR_QOS, raw=True,
            qos_overriding_options=QoSOverridingOptions.with_default_policies())
        self.create_subscription(Bool, '~/teaching', self._on_teaching, 10)
        # raw, as joint_states: the bag keeps the bytes as they came (rclpy's
        # serialize_message pads its buffer, which other CDR readers refuse)
        self.create_subscription(JointTrajectory, '~/demonstration', self._on_trajectory, 10,
                                 raw=True)
        self.create_subscription(JointTrajectory, '~/candidate_tasks', self._on_candidate, 10)
        self._pubs = {}
        prefixes = [''] if len(self.config.models) == 1 else [f'{m}/' for m in self.config.models]
        for m, pre in zip(self.config.models, prefixes):
            for topic in ('weights', 'weights_covariance', 'particles'):
                self._pubs[(m, topic)] = self.create_publisher(
                    Float64MultiArray, f'~/{pre}{topic}', ESTIMATE_QOS)
        self._status_pub = self.create_publisher(DiagnosticArray, '~/status', ESTIMATE_QOS)
        self._diag_pub = self.create_publisher(DiagnosticArray, '/diagnostics', 10)
        self._marker_pub = self.create_publisher(MarkerArray, '~/markers', ESTIMATE_QOS)
        self._next_pub = self.create_publisher(JointTrajectory, '~/next_task', ESTIMATE_QOS)
        self._gain_pub = self.create_publisher(Float64, '~/next_task_gain', ESTIMATE_QOS)
        self._next_markers_pub = self.create_publisher(MarkerArray, '~/next_task_markers',
                                                       ESTIMATE_QOS)
        # the task model of this session (robot, features, scales): the planner node and
        # the simulated teacher build theirs from it
        from std_msgs.msg import String
        self._record_pub = self.create_publisher(String, '~/task_record', TASK_RECORD_QOS)
        self._record_pub.publish(String(data=self.learner.record.to_json()))

    def _start_services(self):
        """Serve the Trigger services from a private node spun on its own thread.

        rclpy answers a request when its callback returns, so the wait for the
        worker happens there and never in the executor that takes joint_states.
        The private node ignores global remappings; the service names are this
        node's resolved ``~/`` names.
        """
        names = {kind: self.resolve_service_name(f'~/{name}') for name, kind in _SERVICES}
        self._srv_node = Node(f'{self.get_name()}_services', namespace=self.get_namespace(),
                              context=self.context, use_global_arguments=False,
                              start_parameter_services=False, enable_rosout=False)
        for kind, name in names.items():
            self._srv_node.create_service(Trigger, name,
                                          lambda req, resp, k=kind: self._on_service(k, resp),
                                          qos_profile=SERVICE_QOS)
        self._srv_exec = SingleThreadedExecutor(context=self.context)
        self._srv_exec.add_node(self._srv_node)

        def spin():
            while not self._closing.is_set() and self.context.ok():
                try:
                    self._srv_exec.spin_once(timeout_sec=0.1)
                except ExternalShutdownException:
                    return
                except Exception as exc:  # noqa: BLE001 -- the services keep answering
                    self._warn('internal_error', f'service thread: {type(exc).__name__}: {exc}')
        self._srv_thread = threading.Thread(target=spin, name='pref_learner_services',
                                            daemon=True)
        self._srv_thread.start()

    def _now(self) -> int:
        return self.get_clock().now().nanoseconds

    def _received(self, info) -> Tuple[int, int]:
        """Return when a message reached this process: ``(arrival, receive time)`` (ns).

        ``arrival`` is the middleware's reception time (system clock; immune to
        executor backlog) and orders teaching signals among samples; the
        receive time that samples are judged against is the same, or this
        node's clock at the callback when simulated time is active.
        """
        t = int(info.get('received_timestamp', 0)) if info else 0
        arrival = t if t > 0 else time.time_ns()
        clock = self.get_clock()
        return arrival, (clock.now().nanoseconds if clock.ros_time_is_active else arrival)

    def _enqueue(self, item):
        self._worker.put(item)

    def _on_joint_states(self, raw: bytes, info):
        self._last_js = time.monotonic()        # before the worker can see the sample
        self._enqueue(('js', *self._received(info), raw))

    def _on_teaching(self, msg: Bool, info):
        # an edge is never dropped (the control queue; the order with samples is kept)
        self._worker.put_control(('teach', *self._received(info), bool(msg.data)))

    def _on_trajectory(self, msg: bytes):
        # a whole demonstration is never dropped for a full sample queue
        self._worker.put_control(('traj', self._now(), msg))

    def _on_candidate(self, msg: JointTrajectory):
        self._worker.put_control(('task', msg))

    def _on_service(self, kind, resp):
        """Queue the request and wait for the worker's answer (on the service thread)."""
        done = threading.Event()
        box = {}
        self._worker.put_control(('srv', self._now(), kind, done, box))
        while not done.wait(0.2):
            if self._closing.is_set() or not self.context.ok():
                resp.success = False
                resp.message = 'the node is shutting down'
                return resp
        resp.success = bool(box.get('ok', False))
        resp.message = str(box.get('message', 'the request was not handled'))
        return resp

    def _warn(self, key, text):
        self.counters[key] += 1
        self.last_warning = f'{key}: {text}'
        self.get_logger().warning(text, throttle_duration_sec=1.0)

    # ------------------------------------------------------------ worker
    def _handle_item(self, item):
        try:
            self._handle(item)
        finally:
            self._settle()
        if self._pending_config is not None and not self.learner.recorder.recording:
            self._apply_runtime(self._pending_config)
        self._status_dirty = True
        if item[0] != 'js' or time.monotonic() - self._status_t > STATUS_MIN_S:
            self._update_status()

    def _on_idle(self):
        """Release held teaching signals once the stream is quiet; return when to look again."""
        due = None
        if self._held_teaching:
            due = TEACH_QUIET_S - (time.monotonic() - self._last_js)
            if due <= 0:
                try:
                    self._release_teaching(float('inf'))
                finally:
                    self._settle()
                due = None
        if self._status_dirty:      # as after a sample: not more often than STATUS_MIN_S
            wait = STATUS_MIN_S - (time.monotonic() - self._status_t)
            if wait <= 0:
                self._update_status()
            else:
                due = wait if due is None else min(due, wait)
        return due

    def _on_worker_error(self, exc):
        if self.context.ok():  # after shutdown there is nothing left to publish to
            self._warn('internal_error', f'{type(exc).__name__}: {exc}')
            self._status_dirty = True

    def _log_time(self, recv: int) -> int:
        """Strictly increasing receive times: the bag replays in the order handled here.

        Under simulated time a reset moves the clock back; those times are kept.
        """
        if self.get_clock().ros_time_is_active:
            return int(recv)
        self._last_log = max(int(recv), self._last_log + 1)
        return self._last_log

    def _release_teaching(self, upto) -> None:
        """Apply held teaching signals that arrived at or before ``upto``.

        The executor may call the teaching callback before joint states that
        arrived earlier; holding the signal until a sample received after it is
        handled puts it at its place in the stream (or, once the stream is quiet
        for ``TEACH_QUIET_S``, at its end).
        """
        held = self._held_teaching
        while held and held[0][0] <= upto:
            _, recv, on = held.popleft()
            t = self._log_time(recv)
            self._record(lambda bag: bag.write(self._teach_topic, bag.boolean(on), t))
            self._results(self.learner.set_teaching(on))

    def _handle_service(self, recv, what, done, box):
        """Apply the held teaching signals, then the service ``what``; always answer."""
        try:
            self._release_teaching(float('inf'))
            box['ok'], box['message'] = self._service(what, recv)
        except Exception as exc:  # noqa: BLE001 -- the caller gets the reason
            box['ok'], box['message'] = False, f'{type(exc).__name__}: {exc}'
            self._warn('internal_error', f'service {what}: {box["message"]}')
        finally:
            done.set()

    def _handle(self, item):
        kind = item[0]
        if kind == 'teach':
            self._held_teaching.append(item[1:])
            return
        if kind == 'srv':           # answered whatever happens, so the caller never waits on
            self._handle_service(*item[1:])
            return
        self._release_teaching(item[1] if kind == 'js' else float('inf'))
        if kind == 'js':
            _, _, recv, raw = item
            self.counters['joint_states'] += 1          # every message taken in (and recorded)
            t = self._log_time(recv)
            msg = deserialize_message(raw, JointState)
            self._record(lambda bag: bag.write_raw(self._js_topic, 'sensor_msgs/msg/JointState',
                                                   t, raw))
            stamp = msg.header.stamp.sec * 10**9 + msg.header.stamp.nanosec
            if len(msg.name) != len(msg.position):
                self._warn('mismatched_lengths', f'joint_states has {len(msg.name)} names but '
                           f'{len(msg.position)} positions')
                return
            self._results(self.learner.feed(stamp, msg.name, msg.position, t))
        elif kind == 'traj':
            self._handle_trajectory(item[2], item[1])
        elif kind == 'task':
            if self._add_user_task(item[1]):
                self._propose()
        elif kind == 'propose':
            self._propose()
        elif kind == 'config':
            self._apply_runtime(item[1])
        elif kind == 'skew':
            if item[1] != self.learner.recorder.stamp_config.max_skew:
                self._event(f'max_stamp_skew {json.dumps(item[1])}')
            self.learner.recorder.set_max_skew(item[1])
        elif kind == 'flush':
            self._flush_queued = False
            self.learner.flush_storage()
        self._note_storage()

    def _record(self, write) -> None:
        """Write into the session bag; if that fails, stop recording and keep learning."""
        if self._bag is None:
            return
        try:
            write(self._bag)
        except OSError as exc:
            bag, self._bag = self._bag, None
            self._warn('bag_error', f'recording stopped, the bag cannot be written: '
                       f'{type(exc).__name__}: {exc}')
            try:
                bag.close()
            except Exception:  # noqa: BLE001 -- the bag is given up either way
                pass

    def _note_storage(self):
        """Log once when the state directory starts or stops failing."""
        err = self.learner.storage_error
        if err == self._storage_error:
            return
        if err:
            self.get_logger().error(f'state directory {self.learner.store.root}: {err}; '
                                    'learning goes on in memory, writes are retried')
        else:
            self.get_logger().info('state directory writable again; pending writes done')
        self._storage_error = err

    def _event(self, text: str, recv: Optional[int] = None) -> None:
        """Record a session event (``SESSION_EVENTS``) that changes what is learned."""
        t = self._log_time(self._now() if recv is None else recv)
        self._record(lambda bag: bag.write(self._event_topic, bag.string(text), t))

    def _service(self, what, recv=None):
        L = self.learner
        if what == 'start':
            if L.recorder.recording:
                self._warn('start_while_recording', 'already recording a demonstration')
                return False, 'already recording a demonstration'
            self._event('start', recv)
            L.start()
            return True, 'recording'
        if what == 'stop':
            if not L.recorder.recording:
                self._warn('stop_without_start', 'not recording: call start_demonstration first')
                return False, 'not recording: call start_demonstration first'
            self._event('stop', recv)
            out = L.stop()
            self._results(out)
            r = out[-1] if out else None
            if isinstance(r, StepResult):
                return True, f'stopped; demonstration {r.index + 1} learned'
            return True, f'stopped; rejected: {r.reason}: {r.detail}' if r else 'stopped'
        if what == 'reset':
            dropped = L.recorder.recording
            try:
                where = L.reset()
            except ValueError as exc:        # writes still pending: refused, nothing lost
                return False, str(exc)
            self._event('reset', recv)
            self._publish_estimates()
            self._after_change()
            text = f'reset; previous state archived in {where}' if where else 'reset'
            return True, text + ('; the demonstration being recorded was dropped'
                                 if dropped else '')
        if what == 'save':
            if L.store is None:
                return False, 'no state_dir configured'
            if not L.flush_storage():
                return False, f'state directory not writable: {L.storage_error}'
            L.save()
            return True, f'saved to {L.store.root}'
        if what == 'discard':
            if not L.discard_last():
                return False, 'no demonstration to discard'
            self._event('discard_last', recv)
            self._publish_estimates()
            self._after_change()
            return True, f'discarded; {L.n_demonstrations} demonstrations remain'
        return False, f'unknown request {what}'

    def _handle_trajectory(self, raw: bytes, recv: int):
        from ..demonstrations import DemonstrationError, trajectory_demonstration
        t = self._log_time(recv)
        self._record(lambda bag: bag.write_raw(self._traj_topic,
                                               'trajectory_msgs/msg/JointTrajectory', t, raw))
        msg = deserialize_message(raw, JointTrajectory)
        pts = msg.points
        try:
            demo = trajectory_demonstration(
                msg.joint_names, [p.positions for p in pts],
                [p.time_from_start.sec + p.time_from_start.nanosec * 1e-9 for p in pts],
                self.learner.robot.joint_names, self.learner.recorder.config)
        except DemonstrationError as exc:
            self._warn('bad_trajectory', f'~/demonstration {exc}')
            return
        self._results(self.learner.add_demonstration(demo))

    def _apply_runtime(self, cfg: LearnerConfig):
        """Apply new segmentation settings; during a demonstration, after it ends."""
        if self.learner.recorder.recording:
            self._pending_config = cfg
            return
        self._pending_config = None
        changed = {f.name: getattr(cfg, f.name) for f in fields(LearnerConfig)
                   if f.name in _RUNTIME and getattr(cfg, f.name) != getattr(self.config, f.name)}
        if not changed:          # reconfiguring would still restart the motion detector
            return
        self._event(f'segmentation {json.dumps(changed)}')
        self.learner.reconfigure_segmentation(cfg)
        self.config = cfg
        self.get_logger().info('segmentation settings updated')

    def _on_estimate(self, r: StepResult):
        """Publish as soon as the demonstration is weighed in (before rejuvenation).

        A provisional estimate (importance weights before tempering ends) is published
        from the posteriors it carries; the tempered one follows.
        """
        self._latency = r.latency_s
        self._estimate_kind = 'provisional' if r.provisional else 'updated'
        self._publish_estimates(r.posteriors if r.provisional else None, r.summaries)

    def _settle(self):
        """Replace an estimate whose demonstration was rolled back (after each handling).

        An estimate published for a demonstration that never came back as a
        result went with it; publish the estimate the learner holds.
        """
        if self._estimate_kind != 'settled':
            self._estimate_kind = 'settled'
            self._publish_estimates()

    def _results(self, results):
        learned = False
        for r in results:
            if isinstance(r, StepResult):
                learned = True
                self._estimate_kind = 'settled'
                self._latency = r.latency_s
                self.counters['accepted'] += 1
                self._publish_estimates(summaries=r.summaries)
                self._publish_markers(r)
                s = next(iter(r.summaries.values()))
                self.get_logger().info(
                    f'demonstration {r.index + 1}: weights {np.round(s.mean, 3).tolist()} '
                    f'(ESS {s.ess:.0f}, {r.latency_s * 1e3:.0f} ms)')
            else:
                self.counters['rejected'] += 1
                self.last_warning = f'{r.reason}: {r.detail}'
        self._warn_helpers()
        if learned:              # after the estimates are out: they never wait for this
            self._propose()

    # ------------------------------------------------------------ what to teach next
    def _add_user_task(self, msg: JointTrajectory) -> bool:
        """Take a candidate task (two points: start, goal); no points clears the user's tasks.

        The message has no name field: ``header.frame_id`` names the task
        (``user_<k>`` when empty); a name given again replaces its task.
        """
        if not msg.points:
            self._user_tasks.clear()
            return True
        try:
            if len(msg.points) != 2:
                raise ValueError(f'needs exactly 2 points (start, goal), got {len(msg.points)}')
            names = list(msg.joint_names)
            missing = [j for j in self.learner.robot.joint_names if j not in names]
            if missing:
                raise ValueError(f'lacks joints {missing}')
            idx = [names.index(j) for j in self.learner.robot.joint_names]
            ends = []
            for p in msg.points:
                if len(p.positions) != len(names):
                    raise ValueError(f'a point has {len(p.positions)} positions for '
                                     f'{len(names)} joint names')
                q = np.array([p.positions[i] for i in idx], dtype=np.float64)
                ends.append(self.learner.robot.check_configurations(q, 'task'))
        except ValueError as exc:
            self._warn('bad_task', f'~/candidate_tasks refused: {exc}')
            return False
        name = msg.header.frame_id.strip() or f'user_{self.counters["user_tasks"] + 1}'
        self.counters['user_tasks'] += 1
        self._user_tasks.pop(name, None)
        self._user_tasks[name] = (ends[0], ends[1])
        while len(self._user_tasks) > MAX_USER_TASKS:
            self._user_tasks.popitem(last=False)
        return True

    def _candidates(self):
        return self._scenario_tasks + [(n, s, g) for n, (s, g) in self._user_tasks.items()]

    def _after_change(self):
        """Propose the next task after a reset or discard; a failure is warned, not returned.

        The change itself was made: the service reports it as done.
        """
        try:
            self._propose()
        except Exception as exc:  # noqa: BLE001 -- the change stands; the reason is warned
            self._warn('internal_error', f'next task not proposed: {type(exc).__name__}: {exc}')

    def _propose(self):
        """Score the candidate tasks and publish the most informative one (worker thread)."""
        t = time.perf_counter()
        best = self._guide.propose(self._candidates())
        self._proposal_ms = (time.perf_counter() - t) * 1e3
        self._proposal = best
        if best is None:
            return
        robot = self.learner.robot
        msg = JointTrajectory()
        msg.header.stamp = self.get_clock().now().to_msg()
        msg.header.frame_id = best.name
        msg.joint_names = list(robot.joint_names)
        for k, q in enumerate((best.start, best.goal)):
            pt = JointTrajectoryPoint()
            pt.positions = [float(x) for x in q]
            pt.time_from_start.sec = 3 * k
            msg.points.append(pt)
        self._next_pub.publish(msg)
        self._gain_pub.publish(Float64(data=float(best.gain)))
        tool = robot.frame_poses(np.stack([best.start, best.goal]),
                                 [robot.tool_frame]).positions[:, 0]
        self._next_markers_pub.publish(self._task_markers(best, tool))
        self._status_dirty = True

    def _task_markers(self, best, tool) -> MarkerArray:
        """Spheres at the tool's start (green) and goal (red), an arrow and a label."""
        from geometry_msgs.msg import Point
        arr = MarkerArray()
        pts = [Point(x=float(p[0]), y=float(p[1]), z=float(p[2])) for p in tool]
        for i, (kind, colour) in enumerate(((Marker.SPHERE, (0.1, 0.8, 0.2)),
                                            (Marker.SPHERE, (0.9, 0.2, 0.1)),
                                            (Marker.ARROW, (0.2, 0.4, 0.9)),
                                            (Marker.TEXT_VIEW_FACING, (1.0, 1.0, 1.0)))):
            mk = Marker()
            mk.header.frame_id = self.learner.robot.root_link
            mk.ns = 'next_task'
            mk.id = i
            mk.type = kind
            mk.action = Marker.ADD
            mk.pose.orientation.w = 1.0
            mk.color.r, mk.color.g, mk.color.b = colour
            mk.color.a = 1.0
            if kind == Marker.SPHERE:
                mk.pose.position = pts[i]
                mk.scale.x = mk.scale.y = mk.scale.z = 0.05
            elif kind == Marker.ARROW:
                mk.points = pts
                mk.scale.x, mk.scale.y, mk.scale.z = 0.01, 0.025, 0.03
            else:
                mk.pose.position = Point(x=pts[0].x, y=pts[0].y, z=pts[0].z + 0.08)
                mk.scale.z = 0.04
                mk.text = f'next: {best.name} ({best.gain:.2f} nats)'
            arr.markers.append(mk)
        return arr

    # ------------------------------------------------------------ publishing
    def _publish_estimates(self, posteriors=None, summaries=None):
        """Publish the learner's estimates (or ``posteriors``: a provisional estimate's).

        ``summaries``: theirs, when already made (a step result's).
        """
        L = self.learner
        msgs, sums = {}, {}
        for m, post in (posteriors or L.posteriors).items():
            sums[m] = summaries[m] if summaries is not None else post.summary()
            for topic, (data, dims) in estimate_arrays(sums[m], post).items():
                msgs[(m, topic)] = _array_msg(data, dims)
        with self._lock:
            self._cache = msgs
            self._summaries = sums
        # logged with the last input handled, which it follows from: a later time would
        # raise the next samples' log times to it (ties that a replay may reorder)
        stamp = self._last_log or self._now()
        for key, msg in msgs.items():
            try:
                self._pubs[key].publish(msg)
            except Exception:  # noqa: BLE001 -- re-raised unless shut down
                if self.context.ok():
                    raise
                # shut down (SIGINT) while a demonstration is learned: nothing is left to
                # publish to, and the learning goes on to its end and is stored
                return
            dims = [(d.label, d.size, d.stride) for d in msg.layout.dim]
            self._record(lambda bag: bag.write(self._pubs[key].topic_name,
                                               bag.float_array(msg.data, dims), stamp))
        self._update_status()
        self._publish_status()

    def _update_status(self):
        """Build the immutable status snapshot (worker thread only)."""
        L = self.learner
        rc = L.recorder.counters
        err = L.storage_error
        quarantined = getattr(L, 'quarantined', ())
        if err:
            level, text = DiagnosticStatus.ERROR, f'state directory: {err}'
        elif self.last_warning:
            level, text = DiagnosticStatus.WARN, f'last warning {self.last_warning}'
        else:
            level, text = DiagnosticStatus.OK, ''
        last_rej = (L.rejections[-1]['reason'] + ': ' + L.rejections[-1]['detail']
                    if L.rejections else '')
        common = [
            ('accepted', str(L.n_demonstrations)), ('rejected', str(len(L.rejections))),
            ('last_rejection', last_rej),
            ('last_update_latency_ms', f'{self._latency * 1e3:.1f}'),
            ('estimate', self._estimate_kind),
            ('choice_helpers', _helpers_state(L.helpers)),
            ('recording', str(L.recorder.recording).lower()),
            ('samples', str(rc.get('samples', 0))),
            ('storage_error', err),
            ('pending_writes', str(len(L.store.pending) if L.store else 0)),
            ('quarantined', str(len(quarantined))),
            ('feature_names', json.dumps(list(L.names)))]
        best = self._proposal
        common += [('next_task', best.name if best else ''),
                   ('next_task_gain', f'{best.gain:.4f}' if best else 'nan'),
                   ('next_task_start', json.dumps(np.round(best.start, 4).tolist())
                    if best else '[]'),
                   ('next_task_goal', json.dumps(np.round(best.goal, 4).tolist())
                    if best else '[]'),
                   ('next_task_ms', f'{self._proposal_ms:.1f}'),
                   ('candidate_tasks', json.dumps([t[0] for t in self._candidates()]))]
        common += [(f'samples_{k}', str(rc.get(k, 0))) for k in _SAMPLE_COUNTERS]
        common += [('caution', CAUTION)]          # every screen of learned weights shows it
        common += [(f'node_{k}', str(v)) for k, v in sorted(self.counters.items())]
        models = []
        diagnostics = L.history_diagnostics()
        for m, s in self._summaries.items():
            values = [('model', m), ('ess', f'{s.ess:.1f}'),
                      ('concentration', f'{s.concentration:.4f}'),
                      ('demonstrations', str(s.n_demonstrations)),
                      ('weights', json.dumps(np.round(s.mean, 6).tolist())),
                      ('weights_ci90_low', json.dumps(np.round(s.ci_low, 4).tolist())),
                      ('weights_ci90_high', json.dumps(np.round(s.ci_high, 4).tolist())),
                      ('weights_std', json.dumps(np.round(s.std, 4).tolist())),
                      ('unknown', json.dumps(unknown_lines(s, L.names)))]
            values += list(estimate_status_values(s, L.option_labels(), diagnostics).items())
            models.append((m, tuple(values + common)))
        msg = f'{L.n_demonstrations} demonstrations' + (f'; {text}' if text else '')
        self._status = StatusSnapshot(level, msg, tuple(models), err)
        self._status_t = time.monotonic()
        self._status_dirty = False

    def _status_msg(self) -> DiagnosticArray:
        """Return the latest snapshot as a DiagnosticArray (any thread)."""
        snap = self._status
        arr = DiagnosticArray()
        arr.header.stamp = self.get_clock().now().to_msg()
        live = (('buffer_fill', str(len(self._worker))),
                ('node_dropped_queue_full', str(self._worker.dropped)))
        for m, values in snap.models:
            st = DiagnosticStatus()
            st.level = snap.level
            st.name = f'{self.get_name()}: {m}'
            st.hardware_id = self.get_name()
            st.message = snap.message
            st.values = [KeyValue(key=k, value=v) for k, v in values + live]
            arr.status.append(st)
        return arr

    def _publish_status(self):
        if self._status is None:
            return
        msg = self._status_msg()
        self._status_pub.publish(msg)
        self._diag_pub.publish(msg)

    def _publish_markers(self, r: StepResult):
        arr = MarkerArray()
        for i, path in enumerate(r.tool_paths):
            mk = Marker()
            mk.header.frame_id = self.learner.robot.root_link
            mk.ns = 'demonstration' if i == 0 else 'alternatives'
            mk.id = i
            mk.type = Marker.LINE_STRIP
            mk.action = Marker.ADD
            mk.scale.x = 0.01 if i == 0 else 0.004
            mk.color.a = 1.0 if i == 0 else 0.5
            mk.color.g = 0.8 if i == 0 else 0.3
            mk.color.b = 0.2 if i == 0 else 0.9
            mk.pose.orientation.w = 1.0
            from geometry_msgs.msg import Point
            mk.points = [Point(x=float(p[0]), y=float(p[1]), z=float(p[2])) for p in path]
            arr.markers.append(mk)
        self._marker_pub.publish(arr)

    def _republish(self):
        with self._lock:
            msgs = dict(self._cache)
        for key, msg in msgs.items():
            self._pubs[key].publish(msg)
        self._publish_status()
        snap = self._status
        if snap is not None and snap.storage_error and not self._flush_queued:
            self._flush_queued = True             # retry the held-back writes
            self._worker.put_control(('flush',))

    def _start_helpers(self):
        """Start the choice set's helper processes (``choice_jobs`` - 1; none below 2)."""
        n = int(self.get_parameter('choice_jobs').value) - 1
        if n < 1 or self.config.n_alternatives < CHOICE_CHUNK:    # one piece: nothing to share
            return
        helpers = ChoiceHelpers(self.learner.record, n)
        try:
            helpers.start()
        except Exception as exc:  # noqa: BLE001 -- the node learns without them
            helpers.error = f'{type(exc).__name__}: {exc}'
        self.learner.helpers = helpers
        self._warn_helpers()

    def _warn_helpers(self):
        """Warn once when the choice-set helpers did not start or stopped."""
        helpers = self.learner.helpers
        if helpers is not None and helpers.error and not self._helpers_warned:
            self._helpers_warned = True
            self.get_logger().warning(f'choice-set helper processes stopped ({helpers.error}); '
                                      'the worker thread builds every choice set alone')

    def destroy_node(self):
        self._closing.set()
        if getattr(self, '_srv_thread', None) is not None:
            self._srv_thread.join(timeout=5.0)
            self._srv_exec.shutdown()
            self._srv_node.destroy_node()
            self._srv_thread = None
        if getattr(self, '_worker', None) is not None:
            self._worker.stop()
        if getattr(self, 'learner', None) is not None and self.learner.helpers is not None:
            self.learner.helpers.close()       # after the worker: it may be using them
        if getattr(self, '_bag', None) is not None:
            self._bag.close()
            self._bag = None
        super().destroy_node()


def main(args=None):
    from .common import run_node
    run_node(LearnerNode, args, 'pref_learner')


if __name__ == '__main__':
    main()
