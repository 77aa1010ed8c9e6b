# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Pieces shared by the nodes and their clients: spinning a node, message builders."""

import collections
import itertools
import os
import threading
import time

import rclpy
from rcl_interfaces.msg import ParameterDescriptor
from sensor_msgs.msg import JointState

from ..safety import default_local


def run_node(factory, args=None, name='pref_learner', done=None) -> None:
    """Run a node as ``main``: loopback DDS unless told otherwise, spin until interrupted.

    A ``ValueError`` from the constructor (bad parameters) is one line and exit code 2.
    ``done(node) -> bool``: stop spinning once it is true (checked every 0.1 s).
    """
    default_local(os.environ)
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
                if done is None:
                    ex.spin()
                while done is not None and rclpy.ok() and not done(node):
                    ex.spin_once(timeout_sec=0.1)
            finally:
                node.destroy_node()
    except (KeyboardInterrupt, ExternalShutdownException):
        pass


def declare_read_only(node, params) -> None:
    """Declare read-only parameters from ``{name: (default, description)}``."""
    for name, (default, description) in params.items():
        node.declare_parameter(name, default, ParameterDescriptor(description=description,
                                                                  read_only=True))


def declare_feature_modules(node) -> None:
    """Declare ``feature_modules`` and trust the modules it names for user feature types.

    The only way a node lets a feature YAML's ``module:function`` type load
    (besides installed entry points): the operator lists the module here.
    """
    from ..features import allow_feature_modules
    node.declare_parameter('feature_modules', [''], ParameterDescriptor(
        description='modules user feature types may load from (module:function types)',
        read_only=True))
    allow_feature_modules([m for m in node.get_parameter('feature_modules').value if m])


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


#: longest sleep of an idle :class:`QueueWorker` between checks of its stop flag
IDLE_WAIT_S = 0.05


class QueueWorker:
    """A plain thread that handles queued items in arrival order.

    Callbacks only :meth:`put` (samples: a bounded queue; when full the oldest
    item is dropped and counted in :attr:`dropped`) or :meth:`put_control`
    (requests that must never be dropped: an unbounded queue). Items of both
    queues are handled in the order they were put. ``handle(item)`` runs on the
    thread and any exception it raises goes to ``on_error(exc)``, so one bad
    input never stops the node; ``on_idle()`` runs whenever both queues are empty
    and may return the seconds until it wants to run again (the thread then
    sleeps no longer than that; otherwise up to ``IDLE_WAIT_S`` or the next item).
    """

    def __init__(self, handle, on_error, maxlen: int, name: str, alive=lambda: True,
                 on_idle=None):
        self._handle, self._on_error, self._alive = handle, on_error, alive
        self._on_idle = on_idle
        self._queue = collections.deque(maxlen=maxlen)     # (sequence, item)
        self._control = collections.deque()
        self._seq = itertools.count()
        self._wake = threading.Event()
        self._stop = threading.Event()
        self.dropped = 0
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)

    def start(self) -> None:
        self._thread.start()

    def put(self, item) -> None:
        if len(self._queue) == self._queue.maxlen:
            self.dropped += 1
        self._queue.append((next(self._seq), item))
        self._wake.set()

    def put_control(self, item) -> None:
        self._control.append((next(self._seq), item))
        self._wake.set()

    def __len__(self) -> int:
        return len(self._queue) + len(self._control)

    def _next(self):
        q, c = self._queue, self._control
        if c and (not q or c[0][0] < q[0][0]):
            return c.popleft()[1]
        return q.popleft()[1]

    def _run(self) -> None:
        while not self._stop.is_set() and self._alive():
            self._wake.clear()
            if not self._queue and not self._control:
                due = self._call(self._on_idle) if self._on_idle is not None else None
                self._wake.wait(IDLE_WAIT_S if due is None else
                                min(IDLE_WAIT_S, max(0.0, float(due))))
                continue
            self._call(self._handle, self._next())

    def _call(self, fn, *args):
        try:
            return fn(*args)
        except Exception as exc:  # noqa: BLE001 -- reported, the worker goes on
            self._on_error(exc)
            return None

    def stop(self, timeout: float = 10.0) -> None:
        self._stop.set()
        self._wake.set()
        if self._thread.is_alive():
            self._thread.join(timeout=timeout)
