# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Bags and the pref-learner command line."""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from pref_learner.bags import BagWriter, read_messages, read_stream
from pref_learner.posterior import ParticlePosterior
from pref_learner.safety import CAUTION

CLI = [sys.executable, '-m', 'pref_learner.cli']


@pytest.mark.parametrize('storage', ['mcap', 'sqlite3'])
def test_bag_round_trip_read_back_with_rosbags(tmp_path, storage):
    # Reference: the rosbags library's own Reader and typestore deserialisation.
    from rosbags.rosbag2 import Reader
    from rosbags.typesys import Stores, get_typestore
    path = tmp_path / 'b'
    rng = np.random.default_rng(0)
    rows = rng.normal(size=(20, 7))
    with BagWriter(path, storage) as w:
        w.write('/pref_learner/teaching', w.boolean(True), 5)
        for i, r in enumerate(rows):
            w.write('/joint_states', w.joint_state(10**9 + i * 2_000_000,
                                                   [f'j{k}' for k in range(7)], r), 10 + i)
        w.write('/pref_learner/weights', w.float_array([0.1, -0.2], [('feature', 2, 2)]), 40)
        w.write('/pref_learner/teaching', w.boolean(False), 41)
    ext = {'mcap': '.mcap', 'sqlite3': '.db3'}[storage]
    assert [p.suffix for p in path.iterdir() if p.suffix != '.yaml'] == [ext]
    assert (path / 'metadata.yaml').exists()
    ts = get_typestore(Stores.ROS2_KILTED)
    with Reader(path) as r:
        msgs = [(c.topic, c.msgtype, t, ts.deserialize_cdr(raw, c.msgtype))
                for c, t, raw in r.messages()]
    js = [m for m in msgs if m[0] == '/joint_states']
    assert len(js) == 20
    for i, (_, typ, t, m) in enumerate(js):
        assert typ == 'sensor_msgs/msg/JointState' and t == 10 + i
        np.testing.assert_array_equal(m.position, rows[i])
        assert m.header.stamp.sec == 1 and m.header.stamp.nanosec == i * 2_000_000
    w = [m for m in msgs if m[0] == '/pref_learner/weights'][0][3]
    assert list(w.data) == [0.1, -0.2] and w.layout.dim[0].label == 'feature'
    ev = list(read_stream(path))
    assert [e.kind for e in ev][:2] == ['teaching', 'joint_states'] and ev[-1].value is False
    assert read_messages(path)[0][1] == 'std_msgs/msg/Bool'


def run(args, **kw):
    env = dict(os.environ)
    return subprocess.run(CLI + args, capture_output=True, text=True, env=env, timeout=600, **kw)


@pytest.fixture(scope='module')
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp('demo')
    r = run(['demo', '--out', str(out), '--particles', '1500', '--alternatives', '300',
             '--demonstrations', '8'])
    return out, r


def test_demo_learns_and_records(demo_run):
    out, r = demo_run
    assert r.returncode == 0, r.stderr[-2000:]
    res = json.loads((out / 'demo_result.json').read_text())
    assert res['n_demonstrations'] == 8
    # measured 0.97 (the simulated person has other options than the learner and a beta it
    # does not know); quality over many people is the calibration study's (bench calib_*)
    assert res['cosine']['less'] >= 0.8
    assert 'rationality (beta), less' in r.stdout and 'posterior predictive check' in r.stdout
    assert 'heat_zone_travel' in r.stdout and 'session bag' in r.stdout
    # the caution on the screen with the weights table, and at the learner node's start
    table = r.stdout.index('heat_zone_travel')
    assert 0 <= r.stdout.rfind(CAUTION, 0, table)
    assert f'[pref_learner]: {CAUTION}' in r.stderr


def test_learn_reproduces_the_live_estimate(demo_run, tmp_path):
    out, r = demo_run
    res = json.loads((out / 'demo_result.json').read_text())
    r2 = run(['learn', res['bag'], '--out', str(tmp_path / 'offline'), '--particles', '1500',
              '--alternatives', '300'])
    assert r2.returncode == 0, r2.stderr
    assert CAUTION in r2.stderr and json.loads(r2.stdout)['weights']   # stdout stays JSON
    for m in ('less', 'boltzmann'):
        live = ParticlePosterior.load(Path(res['state_dir']) / f'posterior_{m}').summary()
        off = ParticlePosterior.load(tmp_path / 'offline' / 'state' / f'posterior_{m}').summary()
        np.testing.assert_allclose(off.mean, live.mean, atol=1e-9)
    topics = {t for t, *_ in read_messages(tmp_path / 'offline' / 'estimates')}
    assert '/pref_learner/less/weights' in topics and '/pref_learner/boltzmann/particles' in topics


def test_bad_input_one_line_exit_2(tmp_path):
    r = run(['learn', str(tmp_path / 'nope'), '--out', str(tmp_path / 'o')])
    assert r.returncode == 2 and r.stderr.count('\n') == 1 and 'does not exist' in r.stderr
    empty = tmp_path / 'nojs'
    with BagWriter(empty) as w:
        w.write('/x', w.boolean(True), 1)
    r = run(['learn', str(empty), '--out', str(tmp_path / 'o2')])
    assert r.returncode == 2 and 'no sensor_msgs/JointState' in r.stderr
    assert not (tmp_path / 'o2').exists()
    bag = tmp_path / 'ok'
    with BagWriter(bag) as w:
        w.write('/joint_states', w.joint_state(1, ['j'], [0.0]), 1)
    r = run(['learn', str(bag), '--out', str(tmp_path / 'o3'), '--model', 'softmax'])
    assert r.returncode == 2 and "model 'softmax' is unknown" in r.stderr
    assert 'Traceback' not in r.stderr


def _teacher_bag(path, n, **kw):
    """A bag as a robot's own recorder writes it: joint states and teaching, no task record."""
    from pref_learner.features import load_scenario
    from pref_learner.learner import LearnerConfig
    from pref_learner.sim import SimulatedTeacher, TeacherConfig
    from pref_learner.task import TaskModel
    task = TaskModel.from_config(LearnerConfig(n_alternatives=1))
    return SimulatedTeacher(task, load_scenario()['example_preference'],
                            TeacherConfig(seed=4)).write_bag(path, n, **kw)


def test_learn_a_bag_from_a_robots_own_recorder(tmp_path):
    # no task record in the bag (only a learner node records one): the robot options or
    # the shipped arm; a damaged bag is named in one line and leaves no output
    bag = _teacher_bag(tmp_path / 'own', 2)
    small = ['--particles', '300', '--alternatives', '40']
    r = run(['learn', str(bag), '--out', str(tmp_path / 'o'), *small])
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)['demonstrations'] == 2
    mcap = next(bag.glob('*.mcap'))
    data = mcap.read_bytes()
    cut = int(len(data) * 0.75)                  # a damaged chunk (the reader checks them all)
    mcap.write_bytes(data[:cut] + b'\xff' * 4096 + data[cut + 4096:])
    r = run(['learn', str(bag), '--out', str(tmp_path / 'o2'), *small])
    assert r.returncode == 2 and r.stderr.count('\n') == 1, r.stderr
    assert f'bag {bag} cannot be read' in r.stderr and not (tmp_path / 'o2').exists()


def test_learn_chooses_among_several_joint_state_topics(tmp_path):
    # `ros2 bag record -a` on a robot often holds more than one JointState topic
    bag = _teacher_bag(tmp_path / 'two', 1, joint_topic='/arm/joint_states',
                       teaching_topic='/bench/teach_mode')
    with BagWriter(tmp_path / 'grip') as w:     # a second topic, merged into a copy
        w.write('/gripper/joint_states', w.joint_state(1, ['finger'], [0.0]), 1)
    from rosbags.rosbag2 import Reader, Writer
    both = tmp_path / 'both'
    with Writer(both, version=9) as out:
        for src in (bag, tmp_path / 'grip'):
            with Reader(src) as rd:
                conns = {c.id: out.add_connection(c.topic, c.msgtype, typestore=None,
                                                  msgdef=c.msgdef.data, rihs01=c.digest)
                         for c in rd.connections}
                for c, t, raw in rd.messages():
                    out.write(conns[c.id], t, raw)
    small = ['--particles', '300', '--alternatives', '40']
    r = run(['learn', str(both), '--out', str(tmp_path / 'o'), *small])
    assert r.returncode == 2 and 'several joint-state topics' in r.stderr
    assert '--joint-topic' in r.stderr
    r = run(['learn', str(both), '--out', str(tmp_path / 'o2'), *small,
             '--joint-topic', '/arm/joint_states', '--teaching-topic', '/bench/teach_mode'])
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)['demonstrations'] == 1
    # a study names them in its study: block
    from pref_learner.study import ParticipantTask, analyse_participant, load_settings
    params = tmp_path / 'study.yaml'
    params.write_text('n_particles: 300\nn_alternatives: 40\nstudy:\n'
                      '  joint_topic: /arm/joint_states\n  teaching_topic: /bench/teach_mode\n')
    st = load_settings(params)
    res = analyse_participant(ParticipantTask('p', str(both), st.learner, 1, False,
                                              joint_topic=st.joint_topic,
                                              teaching_topic=st.teaching_topic))
    assert res['status'] == 'ok' and res['n_accepted'] == 1, res.get('reason')


def _two_learners_bag(path):
    """`ros2 bag record -a` on a bench with two learner nodes: each one's own topics."""
    with BagWriter(path) as w:
        for i, node in enumerate(('/bench_a/pref_learner', '/bench_b/pref_learner')):
            w.write(f'{node}/task_record', w.string(f'{{"node": {i}}}'), 1 + 100 * i)
            w.write(f'{node}/session_events', w.string('discard_last'), 10 + 100 * i)
            w.write(f'{node}/teaching', w.boolean(bool(i)), 20 + 100 * i)
        w.write('/joint_states', w.joint_state(130, ['j0'], [0.0]), 130)
    return path


def test_a_bag_of_two_learner_nodes_is_not_mixed(tmp_path):
    # one learner's session events, whole demonstrations, task record and teaching
    # signal, never a mix of two: an ambiguous bag is refused, naming the nodes
    from pref_learner.bags import read_task_record
    bag = _two_learners_bag(tmp_path / 'two')
    for read in (lambda: list(read_stream(bag)), lambda: read_task_record(bag)):
        with pytest.raises(ValueError, match=r"several learner nodes \['/bench_a/pref_learner', "
                           r"'/bench_b/pref_learner'\]; choose one \(learn and report: "
                           r'--learner-node; study: learner_node'):
            read()
    ev = list(read_stream(bag, learner_node='/bench_b/pref_learner'))
    assert [(e.kind, e.log_ns) for e in ev] == [('event', 110), ('teaching', 120),
                                                ('joint_states', 130)]
    assert ev[1].value is True          # bench_b's own teaching signal, not bench_a's
    assert read_task_record(bag, 'bench_a/pref_learner/') == '{"node": 0}'
    with pytest.raises(ValueError, match=r"no learner node /bench_c in it \(its learner "
                       r"nodes: \['/bench_a/pref_learner', '/bench_b/pref_learner'\]\)"):
        list(read_stream(bag, learner_node='/bench_c'))
    # a study names the node in its study: block
    from pref_learner.study import ParticipantTask, analyse_participant, load_settings
    params = tmp_path / 'study.yaml'
    params.write_text('n_particles: 300\nn_alternatives: 40\nstudy:\n'
                      '  learner_node: /bench_b/pref_learner\n')
    st = load_settings(params)
    reasons = [analyse_participant(ParticipantTask('p', str(bag), st.learner, 1, False,
                                                   learner_node=node))['reason']
               for node in ('', st.learner_node)]
    assert 'several learner nodes' in reasons[0] and 'corrupt' not in reasons[0], reasons
    assert reasons[1].startswith("wrong robot: the bag's joint states name ['j0']"), reasons


def test_a_learner_nodes_bag_takes_no_other_nodes_teaching_signal(tmp_path):
    # bench a segments by motion (no teaching topic of its own), bench b by a pedal: a's
    # replay never takes b's pedal; a node at the root keeps its events; a node whose only
    # own topic is its teaching signal can be named; a named node is not required of a bag
    # that holds no learner node's topics (one study setting for every participant)
    with BagWriter(tmp_path / 'ab') as w:
        w.write('/a/pref_learner/session_events', w.string('start'), 1)
        w.write('/b/pref_learner/session_events', w.string('start'), 2)
        w.write('/b/pref_learner/teaching', w.boolean(True), 3)
        w.write('/joint_states', w.joint_state(4, ['j0'], [0.0]), 4)
    assert [e.kind for e in read_stream(tmp_path / 'ab', learner_node='/a/pref_learner')] \
        == ['event', 'joint_states']
    with BagWriter(tmp_path / 'root') as w:
        w.write('/session_events', w.string('discard_last'), 1)
        w.write('/joint_states', w.joint_state(2, ['j0'], [0.0]), 2)
    for node in (None, '/'):
        assert [e.kind for e in read_stream(tmp_path / 'root', learner_node=node)] \
            == ['event', 'joint_states']
    with BagWriter(tmp_path / 'pedal') as w:
        w.write('/pref_learner/teaching', w.boolean(True), 1)
        w.write('/joint_states', w.joint_state(2, ['j0'], [0.0]), 2)
    for node in ('/pref_learner', '/other'):
        assert [e.kind for e in read_stream(tmp_path / 'pedal', learner_node=node)] \
            == ['teaching', 'joint_states']


def test_a_task_record_that_cannot_be_decoded_names_the_bag(tmp_path):
    # a CDR string (encapsulation header, length, bytes, NUL; the OMG DDS-XTypes CDR
    # layout) whose bytes are not UTF-8
    import struct
    with BagWriter(tmp_path / 'b') as w:
        w.write_raw('/pref_learner/task_record', 'std_msgs/msg/String', 1,
                    b'\x00\x01\x00\x00' + struct.pack('<I', 3) + b'\xff\xfe\x00')
    from pref_learner.bags import read_task_record
    with pytest.raises(ValueError, match=rf"bag {tmp_path / 'b'} cannot be read: "):
        read_task_record(tmp_path / 'b')


def test_a_bag_of_two_teaching_signals_is_not_mixed(tmp_path):
    # two Bool topics ending in "teaching" and no learner node's own: refused, naming them
    with BagWriter(tmp_path / 'b') as w:
        w.write('/arm/teaching', w.boolean(True), 1)
        w.write('/ui/teaching', w.boolean(False), 2)
        w.write('/joint_states', w.joint_state(3, ['j0'], [0.0]), 3)
    with pytest.raises(ValueError, match=r"several teaching topics \['/arm/teaching', "
                       r"'/ui/teaching'\]; choose one \(learn and report: --teaching-topic"):
        list(read_stream(tmp_path / 'b'))
    ev = list(read_stream(tmp_path / 'b', teaching_topic='/ui/teaching'))
    assert [(e.kind, e.value) for e in ev] == [('teaching', False), ('joint_states', False)]


def test_learn_takes_the_learner_node_option(tmp_path):
    bag = _two_learners_bag(tmp_path / 'two')
    r = run(['learn', str(bag), '--out', str(tmp_path / 'o'), '--particles', '300',
             '--alternatives', '40'])
    assert r.returncode == 2 and 'several learner nodes' in r.stderr, r.stderr
    r = run(['learn', str(bag), '--out', str(tmp_path / 'o'), '--particles', '300',
             '--alternatives', '40', '--learner-node', '/bench_a/pref_learner'])
    # the node's task record is read ({"node": 0} is not one): the error names it
    assert r.returncode == 2 and 'several learner nodes' not in r.stderr, r.stderr
    assert 'task record' in r.stderr, r.stderr


def test_replay_keeps_what_came_before_a_read_error(tmp_path):
    # a storage error part-way (a disk, a truncated copy): the demonstrations before it are
    # learned, and the error says how far the bag was read
    from pref_learner.bags import BagDamaged, replay_bag
    from pref_learner.learner import Learner, LearnerConfig
    events = list(read_stream(_teacher_bag(tmp_path / 'own', 2)))
    half = next(i for i, e in enumerate(events) if i and e.kind == 'teaching' and e.value)

    def failing():
        yield from events[:half + 10]
        raise OSError(5, 'Input/output error')
    L = Learner(LearnerConfig(n_particles=200, n_alternatives=30))
    with pytest.raises(BagDamaged, match=rf'damaged after {half + 10} messages \(OSError'):
        replay_bag(L, failing())
    assert L.n_demonstrations == 1 and L.recorder.recording


def test_learn_says_why_it_learned_nothing(tmp_path):
    # another robot's joints, or no teaching signal: exit 2 with the reason, never the
    # prior's mean printed as if it were learned
    other = _teacher_bag(tmp_path / 'other', 1, joint_names=[f'other_{i}' for i in range(7)])
    r = run(['learn', str(other), '--out', str(tmp_path / 'o'), '--particles', '300',
             '--alternatives', '40'])
    last = r.stderr.strip().splitlines()[-1]       # after the rejections' log lines
    assert r.returncode == 2 and 'Traceback' not in r.stderr, r.stderr
    assert last.startswith("pref-learner learn: wrong robot: the bag's joint states name "
                           "['other_0'"), last
    silent = _teacher_bag(tmp_path / 'silent', 1, teaching_topic='/elsewhere')
    r = run(['learn', str(silent), '--out', str(tmp_path / 'o2'), '--particles', '300',
             '--alternatives', '40'])
    last = r.stderr.strip().splitlines()[-1]
    assert r.returncode == 2 and 'Traceback' not in r.stderr, r.stderr
    assert last.startswith('pref-learner learn: learned no demonstration') and \
        'no teaching signal' in last, last
    assert r.stdout == ''


def test_argument_errors_are_one_line():
    for args in (['demo', '--model', 'softmax'], ['validate', '--bogus'], []):
        r = run(args)
        assert r.returncode == 2 and r.stderr.count('\n') == 1, (args, r.stderr)


def test_report_from_a_bag(demo_run, tmp_path):
    out, _ = demo_run
    res = json.loads((out / 'demo_result.json').read_text())
    assert Path(res['report']).exists()
    r = run(['report', res['bag'], '--out', str(tmp_path / 'rep'), '--particles', '1500',
             '--alternatives', '300'])
    assert r.returncode == 0, r.stderr
    html = (tmp_path / 'rep' / 'report.html').read_text()
    assert 'boltzmann mean' in html and 'less mean' in html
    # a state directory is reported as it was learned: options that would change it are
    # named as ignored
    r = run(['report', res['state_dir'], '--out', str(tmp_path / 'rep2'), '--particles', '10',
             '--model', 'less'])
    assert r.returncode == 0 and 'ignored: --model, --particles' in r.stderr, r.stderr


def test_guided_demo_demonstrates_the_proposed_tasks(tmp_path):
    from pref_learner.demonstrations import Demonstration
    from pref_learner.learner import Learner, LearnerConfig
    from pref_learner.store import StateStore
    r = run(['demo', '--guided', '--out', str(tmp_path), '--model', 'less', '--particles',
             '500', '--alternatives', '80', '--demonstrations', '3'])
    assert r.returncode == 0, r.stderr[-2000:]
    lines = r.stdout.splitlines()
    scenario = Learner(LearnerConfig(n_particles=1, n_alternatives=1)).tasks()
    tasks = {n: (s, g) for n, s, g in scenario}
    # the proposal in force when each demonstration began: the last one printed before
    # the line that reports that demonstration
    used, last = [], None
    for line in lines:
        if line.startswith('next task proposed: '):
            last = line[len('next task proposed: '):].split(' (')[0]
        elif line.startswith('after demonstration '):
            used.append(last)
    assert len(used) == 3 and all(u in tasks for u in used), r.stdout
    res = json.loads((tmp_path / 'demo_result.json').read_text())
    assert res['guided'] and len(res['information_gain']) == 3
    store = StateStore(res['state_dir'])
    for name, path in zip(used, store.demo_paths()):
        q = Demonstration.from_arrays(store.read_demo(path)).q
        # the person held still at the proposed start and goal (sensor noise 5e-4 rad)
        np.testing.assert_allclose(q[0], tasks[name][0], atol=0.01)
        np.testing.assert_allclose(q[-1], tasks[name][1], atol=0.01)
    assert 'information gained per demonstration, less (nats): ' in r.stdout
    assert 'still unknown, less: ' in r.stdout
    assert r.stdout.rfind(CAUTION, 0, r.stdout.index('still unknown')) >= 0
