# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""rosbag2 bags through the pure-Python ``rosbags`` library (no ROS install needed).

Reading: :func:`read_stream` yields the learner's inputs from a bag (joint
states, teaching signals and what a learner node records besides: its
session events and whole demonstrations; sqlite3 or MCAP storage) in the
order they were logged, and :func:`replay_bag` feeds them to a learner.
Writing: :class:`BagWriter` writes MCAP by default, with standard message
types, CDR encoding and offered-QoS metadata, so any rosbag2 tool reads it;
:func:`read_task_record` returns the task record a learner node recorded;
:func:`estimate_messages` builds the estimate topics the node publishes (the
same types, names and layouts).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Iterator, List, Optional, Sequence, Tuple, Union

import numpy as np

STORE = 'ros2_kilted'


def typestore():
    from rosbags.typesys import Stores, get_typestore
    return get_typestore(Stores(STORE))


#: a learner node's session events (std_msgs/String on ``~/session_events``, only in its
#: bags): a service that changed what is learned, or a run-time setting
SESSION_EVENTS = ('start', 'stop', 'discard_last', 'reset', 'segmentation', 'max_stamp_skew',
                  'resumed')


@dataclass(frozen=True)
class StreamEvent:
    """One input of the learner: kind 'joint_states', 'teaching', 'event' or 'trajectory'.

    ``event``: ``text`` is a :data:`SESSION_EVENTS` word, then JSON for the
    settings ones; ``trajectory`` (a whole demonstration on ``~/demonstration``):
    ``names``, ``positions`` (a list of one array per point, in ``names``'
    order) and ``times`` (time_from_start, s).
    """

    kind: str
    log_ns: int
    stamp_ns: int = 0
    names: Tuple[str, ...] = ()
    positions: Optional[Union[np.ndarray, List[np.ndarray]]] = None
    value: bool = False
    text: str = ''
    times: Optional[np.ndarray] = None

    @property
    def removes_demonstrations(self) -> bool:
        """Tell whether this is a ``discard_last`` or ``reset`` session event."""
        return self.kind == 'event' and self.text in ('discard_last', 'reset')


class BagWriter:
    """Write messages into a new rosbag2 bag directory (MCAP unless told sqlite3)."""

    def __init__(self, path, storage: str = 'mcap'):
        from rosbags.rosbag2 import StoragePlugin, Writer
        path = Path(path)
        if path.exists():
            raise ValueError(f'bag {path} already exists; choose a new path')
        plugin = {'mcap': StoragePlugin.MCAP, 'sqlite3': StoragePlugin.SQLITE3}.get(storage)
        if plugin is None:
            raise ValueError(f'storage {storage!r} is unknown; allowed: mcap, sqlite3')
        self.path = path
        self.ts = typestore()
        self._w = Writer(path, version=9, storage_plugin=plugin)
        self._w.open()
        self._conns = {}
        self._last = 0

    def _conn(self, topic: str, msgtype: str):
        c = self._conns.get(topic)
        if c is None:
            c = self._w.add_connection(topic, msgtype, typestore=self.ts)
            self._conns[topic] = c
        return c

    def write_raw(self, topic: str, msgtype: str, log_ns: int, data: bytes) -> None:
        log_ns = max(int(log_ns), self._last)
        self._last = log_ns
        self._w.write(self._conn(topic, msgtype), log_ns, bytes(data))

    def write(self, topic: str, msg, log_ns: int) -> None:
        self.write_raw(topic, msg.__msgtype__, log_ns,
                       self.ts.serialize_cdr(msg, msg.__msgtype__))

    # builders for the message types we use ------------------------------------
    def joint_state(self, stamp_ns: int, names, positions, frame_id=''):
        T = self.ts.types
        stamp = T['builtin_interfaces/msg/Time'](sec=int(stamp_ns // 10**9),
                                                 nanosec=int(stamp_ns % 10**9))
        header = T['std_msgs/msg/Header'](stamp=stamp, frame_id=frame_id)
        return T['sensor_msgs/msg/JointState'](
            header=header, name=list(names), position=np.asarray(positions, dtype=np.float64),
            velocity=np.zeros(0), effort=np.zeros(0))

    def string(self, text: str):
        return self.ts.types['std_msgs/msg/String'](data=str(text))

    def boolean(self, value: bool):
        return self.ts.types['std_msgs/msg/Bool'](data=bool(value))

    def float_array(self, data, dims: Sequence[Tuple[str, int, int]] = ()):
        T = self.ts.types
        layout = T['std_msgs/msg/MultiArrayLayout'](
            dim=[T['std_msgs/msg/MultiArrayDimension'](label=lab, size=s, stride=st)
                 for lab, s, st in dims], data_offset=0)
        return T['std_msgs/msg/Float64MultiArray'](
            layout=layout, data=np.asarray(data, dtype=np.float64).ravel())

    def close(self) -> None:
        self._w.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


#: a learner node's own topics in its bags (``~/<name>``) and their types
LEARNER_TOPICS = {'session_events': 'std_msgs/msg/String',
                  'demonstration': 'trajectory_msgs/msg/JointTrajectory',
                  'task_record': 'std_msgs/msg/String',
                  'teaching': 'std_msgs/msg/Bool'}


class AmbiguousBag(ValueError):
    """A bag whose learner inputs could come from several topics or learner nodes.

    The message names them and the option that chooses one; it is the bag's
    content, not damage, so the replay passes it on as it is.
    """


def _learner_node(path, conns, learner_node: Optional[str]):
    """Return ``(node, nodes)``: the learner node a bag's inputs come from, and all of them.

    The nodes are the namespaces of the bag's :data:`LEARNER_TOPICS` other than
    ``teaching`` (a robot's own teaching signal may end the same way); ``''``
    is a node at the root. ``node`` is ``learner_node`` (full name, slashes
    optional) when the bag has its topics, its teaching signal included;
    None when the bag holds no learner node's topics; the only node when
    none is named. Several, or a named one the bag lacks among others, raise
    :class:`AmbiguousBag`, so two learners' sessions are never mixed.
    """
    nodes = sorted({c.topic.rsplit('/', 1)[0] for c in conns
                    for name, typ in LEARNER_TOPICS.items()
                    if name != 'teaching' and c.msgtype == typ
                    and c.topic.endswith('/' + name)})
    shown = [n or '/' for n in nodes]
    if learner_node:
        node = learner_node.strip('/')
        node = '/' + node if node else ''
        if node in nodes or _own(conns, node, 'teaching'):
            return node, nodes
        if not nodes:
            return None, nodes
        raise AmbiguousBag(f'bag {path} has no learner node {node or "/"} in it '
                           f'(its learner nodes: {shown})')
    if len(nodes) > 1:
        raise AmbiguousBag(f'bag {path} holds the topics of several learner nodes {shown}; '
                           'choose one (learn and report: --learner-node; study: learner_node '
                           'in the study: block)')
    return (nodes[0] if nodes else None), nodes


def _own(conns, node: Optional[str], name: str) -> list:
    """Return the connections of ``node``'s own topic ``name`` (none without a node)."""
    return [c for c in conns if node is not None and c.topic == f'{node}/{name}'
            and c.msgtype == LEARNER_TOPICS[name]]


def read_stream(path, joint_topic: Optional[str] = None,
                teaching_topic: Optional[str] = None,
                learner_node: Optional[str] = None) -> Iterator[StreamEvent]:
    """Yield a bag's learner inputs (:class:`StreamEvent`) in log-time order.

    Without explicit topics, the joint-state topic is the one of type
    ``sensor_msgs/msg/JointState`` (there must be exactly one, unless the bag
    holds a learner node's whole demonstrations or session events only).
    A learner node's own ``session_events`` (std_msgs/String) and
    ``demonstration`` (trajectory_msgs/JointTrajectory) topics come too: of
    ``learner_node`` (its full name, e.g. ``/pref_learner``), or of the only
    learner node in the bag (several are refused, see :func:`_learner_node`).
    The teaching signal is ``teaching_topic``, else that node's
    ``teaching``, else the only ``std_msgs/msg/Bool`` topic whose name ends
    in ``teaching`` (several are refused, naming them).
    """
    from rosbags.rosbag2 import Reader
    path = Path(path)
    if not path.exists():
        raise ValueError(f'bag {path} does not exist')
    ts = typestore()
    try:
        reader = Reader(path)
        reader.open()
    except Exception as exc:
        raise ValueError(f'bag {path} cannot be opened: {exc}') from None
    try:
        conns = reader.connections
        js = [c for c in conns if c.msgtype == 'sensor_msgs/msg/JointState'
              and (joint_topic is None or c.topic == joint_topic)]
        # what a learner node records besides: its session events and whole demonstrations
        node, nodes = _learner_node(path, conns, learner_node)
        ev, tr = _own(conns, node, 'session_events'), _own(conns, node, 'demonstration')
        if not js and (joint_topic or not (ev or tr)):
            raise ValueError(f'bag {path} has no sensor_msgs/JointState topic'
                             + (f' named {joint_topic}' if joint_topic else ''))
        if len({c.topic for c in js}) > 1:
            raise AmbiguousBag(f'bag {path} has several joint-state topics '
                               f'{sorted({c.topic for c in js})}; choose one (learn and '
                               'report: --joint-topic; study: joint_topic in the study: block)')
        bools = [c for c in conns if c.msgtype == 'std_msgs/msg/Bool']
        others = {f'{n}/teaching' for n in nodes if n != node}   # other learners' own
        tc = ([c for c in bools if c.topic == teaching_topic] if teaching_topic else
              _own(conns, node, 'teaching')
              or [c for c in bools if c.topic.endswith('teaching') and c.topic not in others])
        if len({c.topic for c in tc}) > 1:
            raise AmbiguousBag(f'bag {path} has several teaching topics '
                               f'{sorted({c.topic for c in tc})}; choose one (learn and '
                               'report: --teaching-topic; study: teaching_topic in the study: '
                               'block)')
        js_ids, ev_ids = {c.id for c in js}, {c.id for c in ev}
        tc_ids = {c.id for c in tc}
        for conn, log_ns, raw in reader.messages(connections=js + tc + ev + tr):
            msg = ts.deserialize_cdr(raw, conn.msgtype)
            if conn.id in js_ids:
                st = msg.header.stamp
                yield StreamEvent('joint_states', int(log_ns), st.sec * 10**9 + st.nanosec,
                                  tuple(msg.name), np.asarray(msg.position, dtype=np.float64))
            elif conn.id in tc_ids:
                yield StreamEvent('teaching', int(log_ns), value=bool(msg.data))
            elif conn.id in ev_ids:
                yield StreamEvent('event', int(log_ns), text=str(msg.data))
            else:
                pts = msg.points
                yield StreamEvent(
                    'trajectory', int(log_ns), names=tuple(msg.joint_names),
                    positions=[np.asarray(p.positions, dtype=np.float64) for p in pts],
                    times=np.array([p.time_from_start.sec + p.time_from_start.nanosec * 1e-9
                                    for p in pts]))
    finally:
        reader.close()


class BagUnreadable(ValueError):
    """A bag whose learner inputs cannot be read (what is wrong with it in the message)."""


class BagDamaged(BagUnreadable):
    """A bag that could not be read to its end; what came before was read (and fed)."""

    def __init__(self, messages: int, exc: BaseException):
        super().__init__(f'the bag is damaged after {messages} messages '
                         f'({type(exc).__name__}: {exc}); the rest is not read')


class WrongRobot(ValueError):
    """A bag whose joint states name none of the learner's chain (nothing learned)."""


@dataclass
class Replay:
    """What :func:`replay_bag` fed: message counts and notes for the user."""

    messages: int = 0
    teaching_signals: int = 0
    session_inputs: int = 0
    notes: List[str] = field(default_factory=list)


def replay_bag(learner, events: Iterable[StreamEvent], on_output=None) -> Replay:
    """Feed a bag's events (:func:`read_stream`) to ``learner`` as a live node takes them.

    Joint states, teaching signals and what a learner node records besides
    (its session events and whole demonstrations, :data:`SESSION_EVENTS`):
    a segmentation change that arrives during a demonstration applies once
    it ends, as in the node; an event this version cannot apply is skipped
    with a note. ``on_output(outputs, event)`` receives what each event gave
    (results and rejections; ``[]`` for the other events). Raises
    :class:`BagUnreadable` when the bag cannot be read from the start,
    :class:`BagDamaged` when reading fails part-way (after feeding what came
    before) and :class:`WrongRobot` when its joints are not the learner's
    robot's. The notes say when the bag ends during a demonstration and
    when nothing was learned without a teaching signal under
    ``segmentation: signal``.
    """
    rep = Replay()
    first_names = None
    pending: list = []                         # segmentation changes held during a recording
    it = iter(events)
    while True:
        try:
            e = next(it)
        except StopIteration:
            break
        except AmbiguousBag:                    # the bag's content: the user chooses
            raise
        except Exception as exc:  # noqa: BLE001 -- storage and CDR errors vary
            if rep.messages == 0:
                raise BagUnreadable(str(exc) if isinstance(exc, ValueError) else
                                    f'{type(exc).__name__}: {exc}') from None
            raise BagDamaged(rep.messages, exc) from None
        rep.messages += 1
        if e.kind == 'joint_states':
            if first_names is None:
                first_names = e.names
            out = learner.feed(e.stamp_ns, e.names, e.positions, e.log_ns)
        elif e.kind == 'teaching':
            rep.teaching_signals += 1
            out = learner.set_teaching(e.value)
        else:
            rep.session_inputs += 1
            out = _session_input(learner, e, rep, pending)
        while pending and not learner.recorder.recording:
            _reconfigure(learner, pending.pop(0), rep)
        if on_output is not None:
            on_output(out, e)
    counters = learner.recorder.counters
    if learner.n_demonstrations == 0 and counters['missing_joint'] and not counters['samples']:
        raise WrongRobot(f'wrong robot: the bag\'s joint states name {list(first_names or ())}, '
                         f'the chain needs {list(learner.robot.joint_names)}')
    if learner.recorder.recording:
        rep.notes.append('the bag ends during a demonstration; that part is not learned')
    if (learner.n_demonstrations == 0 and learner.config.segmentation == 'signal'
            and rep.teaching_signals == 0 and rep.session_inputs == 0):
        rep.notes.append('the bag has no teaching signal (a std_msgs/Bool topic ending in '
                         '"teaching"); set segmentation: motion in a parameters file')
    return rep


def _reconfigure(learner, e: StreamEvent, rep: Replay) -> None:
    """Apply a recorded segmentation change (skipped with a note if it cannot be)."""
    from dataclasses import replace as _replace
    try:
        learner.reconfigure_segmentation(
            _replace(learner.config, **json.loads(e.text.partition(' ')[2])))
    except (ValueError, TypeError) as exc:
        rep.notes.append(f'session event {e.text!r} at log time {e.log_ns} ns cannot be '
                         f'applied ({exc}); skipped')


def _session_input(learner, e: StreamEvent, rep: Replay, pending: list) -> list:
    """Apply a recorded session event or whole demonstration, as the node did."""
    from .demonstrations import DemonstrationError, trajectory_demonstration
    if e.kind == 'trajectory':
        try:
            demo = trajectory_demonstration(e.names, e.positions, e.times,
                                            learner.robot.joint_names, learner.recorder.config)
        except DemonstrationError as exc:     # the node refused it too (bad_trajectory)
            rep.notes.append(f'a ~/demonstration at log time {e.log_ns} ns {exc}; not learned')
            return []
        return learner.add_demonstration(demo)
    word, _, arg = e.text.partition(' ')
    if word == 'start':
        return learner.start()
    if word == 'stop':
        return learner.stop()
    if word == 'discard_last':
        learner.discard_last()
    elif word == 'reset':
        learner.reset()
    elif word == 'segmentation':
        pending.append(e)
    elif word == 'resumed':
        try:
            n = int(json.loads(arg)['demonstrations'])
        except (ValueError, TypeError, KeyError):
            n = '?'
        rep.notes.append(f'the node resumed a session of {n} demonstrations learned before '
                         'this bag; they are not in it (learn the state directory for the '
                         'whole session), and a discard_last of one of them replays as a '
                         'discard of the last one here')
    elif word == 'max_stamp_skew':
        try:
            learner.recorder.set_max_skew(float(json.loads(arg)))
        except (ValueError, TypeError) as exc:
            rep.notes.append(f'session event {e.text!r} cannot be applied ({exc}); skipped')
    else:
        rep.notes.append(f'session event {e.text!r} at log time {e.log_ns} ns is unknown '
                         f'(known: {", ".join(SESSION_EVENTS)}); skipped')
    return []


def read_task_record(path, learner_node: Optional[str] = None) -> Optional[str]:
    """Return the JSON text of the first task record in a bag (None when it has none).

    The learner node records its ``~/task_record`` (std_msgs/String) when it
    records a bag: ``learner_node``'s, or the only learner node's in the bag
    (several raise :class:`AmbiguousBag`, as in :func:`read_stream`).
    """
    from rosbags.rosbag2 import Reader
    try:
        reader = Reader(Path(path))
        reader.open()
    except Exception as exc:  # noqa: BLE001 -- rosbags raises several types
        raise ValueError(f'bag {path} cannot be read: {exc}') from None
    try:
        node, _ = _learner_node(path, reader.connections, learner_node)
        conns = _own(reader.connections, node, 'task_record')
        if not conns:                  # (no connections would read every message)
            return None
        try:
            for conn, _, raw in reader.messages(connections=conns):
                return typestore().deserialize_cdr(raw, conn.msgtype).data
        except Exception as exc:  # noqa: BLE001 -- rosbags raises several types
            raise ValueError(f'bag {path} cannot be read: {exc}') from None
    finally:
        reader.close()
    return None


def read_messages(path) -> List[Tuple[str, str, int, object]]:
    """Every message of a bag as (topic, msgtype, log_ns, message) (for tests and reports)."""
    from rosbags.rosbag2 import Reader
    ts = typestore()
    out = []
    with Reader(Path(path)) as reader:
        for conn, log_ns, raw in reader.messages():
            out.append((conn.topic, conn.msgtype, int(log_ns),
                        ts.deserialize_cdr(raw, conn.msgtype)))
    return out


def estimate_arrays(summary, posterior) -> dict:
    """Build the arrays the node publishes for one model: name -> (data, dims)."""
    d = summary.mean.shape[0]
    parts = [posterior.theta]
    if posterior.log_beta is not None:
        parts.append(posterior.log_beta[:, None])
    parts.append(posterior.log_weights[:, None])
    parts = np.concatenate(parts, axis=1)
    return {
        'weights': (summary.mean, [('feature', d, d)]),
        'weights_covariance': (summary.covariance, [('row', d, d * d), ('col', d, d)]),
        'particles': (parts, [('particle', parts.shape[0], parts.size),
                              ('column', parts.shape[1], parts.shape[1])]),
    }
