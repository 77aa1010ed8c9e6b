# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Safety: the caution text, simulated data kept off robot topics, no code run from files."""

import json
import os
import subprocess
import sys
import textwrap
import uuid
from pathlib import Path

import numpy as np
import pytest

from pref_learner.cli import _ros_env, build_parser, demo_commands
from pref_learner.features import (FeatureConfigError, FeatureSet, allow_feature_modules,
                                   allowed_feature_modules)
from pref_learner.robot import RobotModel
from pref_learner.safety import (CAUTION, PLANNER_WARNING, SIMULATED_JOINT_STATES,
                                 allow_network_requested, network_exposure,
                                 refuse_network_reason)

ROOT = Path(__file__).resolve().parents[1]


def test_caution_is_one_line_naming_the_standards():
    # The standards an operator of a collaborative cell defers to (ISO 10218-1/-2 in their
    # 2025 editions, ISO/TS 15066, ISO 12100 risk assessment; from the ISO catalogue).
    assert '\n' not in CAUTION and len(CAUTION) < 240
    for word in ('not a safety function', 'ISO 10218-1:2025', 'ISO 10218-2:2025',
                 'ISO/TS 15066', 'ISO 12100', 'local regulations'):
        assert word in CAUTION, word
    assert 'unchecked' in PLANNER_WARNING and 'controller' in PLANNER_WARNING


@pytest.mark.parametrize('env, exposed', [
    # ROS 2 discovery settings (ROS 2 documentation, "Improved dynamic discovery", from
    # memory): unset means SUBNET; LOCALHOST and OFF stay on this machine; any static
    # peer is another host.
    ({}, True),
    ({'ROS_AUTOMATIC_DISCOVERY_RANGE': 'SUBNET'}, True),
    ({'ROS_AUTOMATIC_DISCOVERY_RANGE': 'SYSTEM_DEFAULT'}, True),
    ({'ROS_AUTOMATIC_DISCOVERY_RANGE': 'LOCALHOST'}, False),
    ({'ROS_AUTOMATIC_DISCOVERY_RANGE': 'localhost'}, False),
    ({'ROS_AUTOMATIC_DISCOVERY_RANGE': 'OFF'}, False),
    ({'ROS_AUTOMATIC_DISCOVERY_RANGE': 'LOCALHOST', 'ROS_STATIC_PEERS': '192.168.1.7'}, True),
    # Humble has no discovery range, only ROS_LOCALHOST_ONLY (ROS 2 Humble and Iron
    # documentation, from memory: the range arrived with Iron)
    ({'ROS_DISTRO': 'humble', 'ROS_AUTOMATIC_DISCOVERY_RANGE': 'LOCALHOST'}, True),
    ({'ROS_DISTRO': 'humble', 'ROS_LOCALHOST_ONLY': '0'}, True),
    ({'ROS_DISTRO': 'humble', 'ROS_LOCALHOST_ONLY': '1'}, False),
    ({'ROS_DISTRO': 'jazzy', 'ROS_AUTOMATIC_DISCOVERY_RANGE': 'LOCALHOST'}, False),
    # a middleware profile can list peers on other hosts (Fast DDS XML profiles,
    # Cyclone DDS configuration; common practice)
    ({'ROS_AUTOMATIC_DISCOVERY_RANGE': 'LOCALHOST',
      'FASTRTPS_DEFAULT_PROFILES_FILE': '/etc/dds/peers.xml'}, True),
    ({'ROS_AUTOMATIC_DISCOVERY_RANGE': 'LOCALHOST', 'CYCLONEDDS_URI': 'file:///c.xml'}, True),
])
def test_network_exposure_and_refusal(env, exposed):
    assert bool(network_exposure(env)) == exposed
    refusal = refuse_network_reason(False, env)
    assert bool(refusal) == exposed
    assert '\n' not in refusal
    assert refuse_network_reason(True, env) == ''


def test_allow_network_read_from_ros_arguments(tmp_path):
    assert not allow_network_requested(['teacher', '--ros-args', '-p', 'seed:=3'])
    assert allow_network_requested(['--ros-args', '-p', 'allow_network:=true'])
    assert allow_network_requested(['--ros-args', '-p', 'simulated_teacher:allow_network:=True'])
    assert not allow_network_requested(['--ros-args', '-p', 'allow_network:=false'])
    # ros2 launch passes node parameters as a params file
    f = tmp_path / 'p.yaml'
    f.write_text('/simulated_teacher:\n  ros__parameters:\n    allow_network: true\n')
    assert allow_network_requested(['--ros-args', '--params-file', str(f)])
    f.write_text('/**:\n  ros__parameters:\n    allow_network: false\n')
    assert not allow_network_requested(['--ros-args', '--params-file', str(f)])


@pytest.mark.parametrize('env', [{'ROS_AUTOMATIC_DISCOVERY_RANGE': 'SUBNET'},
                                 {'ROS_AUTOMATIC_DISCOVERY_RANGE': 'LOCALHOST',
                                  'ROS_STATIC_PEERS': '10.0.0.9'}])
def test_teacher_node_refuses_a_network_before_any_dds(env):
    # refused before rclpy.init, so this test never opens a DDS participant
    full = dict(os.environ, **env)
    r = subprocess.run([sys.executable, '-m', 'pref_learner.ros.teacher_node'], env=full,
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2, (r.stdout, r.stderr)
    assert r.stdout.count('\n') == 1 and 'refusing to publish simulated joint states' in r.stdout
    assert 'allow_network' in r.stdout and 'Traceback' not in r.stderr


def test_teacher_publishes_only_on_its_private_topic():
    import rclpy
    from rclpy.parameter import Parameter
    from sensor_msgs.msg import JointState

    from pref_learner.ros.teacher_node import TeacherNode
    from ros_util import ros_context, spin_until
    got = {'private': 0, 'global': 0}
    with ros_context() as (ctx, ex):
        listener = rclpy.create_node('listener', context=ctx)
        for topic, key in ((SIMULATED_JOINT_STATES, 'private'), ('/joint_states', 'global')):
            listener.create_subscription(
                JointState, topic, lambda m, k=key: got.__setitem__(k, got[k] + 1), 100)
        ex.add_node(listener)
        # standalone (no learner to take the task record from): the shipped arm
        params = {'n_demonstrations': 1, 'duration': 0.5, 'rate': 100.0, 'pause': 0.1,
                  'start_delay': 1.0, 'task_record_topic': ''}
        node = TeacherNode(context=ctx, parameter_overrides=[
            Parameter(k, value=v) for k, v in params.items()])
        ex.add_node(node)
        assert node.js_pub.topic_name == SIMULATED_JOINT_STATES
        assert spin_until(ex, node.finished.is_set, 60)
        spin_until(ex, lambda: got['private'] >= 50, 5)
        topics = {t for t, _ in node.get_publisher_names_and_types_by_node(
            'simulated_teacher', '/')}
        node.destroy_node()
        listener.destroy_node()
    assert got['private'] >= 50 and got['global'] == 0, got
    assert '/joint_states' not in topics and SIMULATED_JOINT_STATES in topics


def test_demo_forces_loopback_and_remaps_the_learner(monkeypatch, tmp_path):
    monkeypatch.setenv('ROS_AUTOMATIC_DISCOVERY_RANGE', 'SUBNET')
    monkeypatch.setenv('ROS_STATIC_PEERS', '10.0.0.9')
    monkeypatch.setenv('ROS_DOMAIN_ID', '0')
    env = _ros_env(allow_network=False)
    assert env['ROS_AUTOMATIC_DISCOVERY_RANGE'] == 'LOCALHOST'
    assert 'ROS_STATIC_PEERS' not in env and network_exposure(env) == ''
    assert 1 <= int(env['ROS_DOMAIN_ID']) <= 101          # a fresh domain, not the robot's 0
    assert os.environ['ROS_DOMAIN_ID'] == env['ROS_DOMAIN_ID']   # the demo's own rclpy too
    monkeypatch.setenv('ROS_DISTRO', 'humble')                 # a Humble install
    monkeypatch.setenv('CYCLONEDDS_URI', 'file:///etc/dds/peers.xml')
    env = _ros_env(allow_network=False)
    assert env['ROS_LOCALHOST_ONLY'] == '1' and 'CYCLONEDDS_URI' not in env
    assert network_exposure(env) == ''
    args = build_parser().parse_args(['demo'])
    learner, teacher = demo_commands(args, tmp_path / 's', tmp_path / 'b', np.ones(6))
    assert learner[learner.index('-r') + 1] == f'joint_states:={SIMULATED_JOINT_STATES}'
    assert 'allow_network:=false' in teacher
    monkeypatch.setenv('ROS_AUTOMATIC_DISCOVERY_RANGE', 'SUBNET')
    monkeypatch.setenv('ROS_DOMAIN_ID', '0')
    env = _ros_env(allow_network=True)
    assert env['ROS_AUTOMATIC_DISCOVERY_RANGE'] == 'SUBNET' and env['ROS_DOMAIN_ID'] == '0'
    args = build_parser().parse_args(['demo', '--allow-network'])
    assert 'allow_network:=true' in demo_commands(args, tmp_path, tmp_path, np.ones(6))[1]


def _hostile_module(tmp_path):
    """Write a module that leaves a file behind when imported; returns (name, marker)."""
    name = f'pl_hostile_{uuid.uuid4().hex[:8]}'
    marker = tmp_path / f'{name}.ran'
    (tmp_path / f'{name}.py').write_text(textwrap.dedent(f'''
        from pathlib import Path
        Path({str(marker)!r}).write_text('imported')

        def feature(q, positions, rotations, params):
            return positions[..., 2].mean(axis=1)
        '''))
    return name, marker


def test_benchmarks_never_share_the_users_domain_or_network():
    # the bench's simulated demonstrations use the learner's topic names: a workstation's
    # own domain (0 here) and subnet discovery are replaced, whatever was set
    from pref_learner.safety import network_exposure, private_session
    env = {'ROS_DOMAIN_ID': '0', 'ROS_AUTOMATIC_DISCOVERY_RANGE': 'SUBNET',
           'ROS_STATIC_PEERS': '10.0.0.9'}
    private_session(env)
    assert 1 <= int(env['ROS_DOMAIN_ID']) <= 101 and network_exposure(env) == ''
    assert env['ROS_AUTOMATIC_DISCOVERY_RANGE'] == 'LOCALHOST' and 'ROS_STATIC_PEERS' not in env


def test_feature_yaml_imports_only_allowed_modules(tmp_path, monkeypatch):
    monkeypatch.syspath_prepend(str(tmp_path))
    name, marker = _hostile_module(tmp_path)
    robot = RobotModel.default()
    doc = {'features': [{'name': 'z', 'type': f'{name}:feature'}]}
    with pytest.raises(FeatureConfigError, match=f"module '{name}', which is not allowed"):
        FeatureSet.from_yaml(doc, robot)
    assert not marker.exists() and name not in sys.modules
    # the same file loads once the user allows the module: the refusal above is the policy,
    # not an import failure
    allow_feature_modules([name])
    fs = FeatureSet.from_yaml(doc, robot)
    assert marker.exists() and fs.names == ('z',)
    with pytest.raises(FeatureConfigError, match='dotted Python module name'):
        allow_feature_modules(['os; rm'])


@pytest.fixture(scope='module')
def hostile_state(tmp_path_factory):
    """A real state directory whose stored settings name a feature file with a hostile type."""
    from pref_learner.learner import Learner, LearnerConfig
    from pref_learner.sim import SimulatedTeacher, TeacherConfig
    tmp = tmp_path_factory.mktemp('hostile')
    name, marker = _hostile_module(tmp)
    state = tmp / 'state'
    L = Learner(LearnerConfig(state_dir=str(state), n_particles=200, n_alternatives=40))
    SimulatedTeacher(L, np.ones(6) / 6 ** 0.5, TeacherConfig(seed=2)).feed_session(L, 2)
    feats = tmp / 'features.yaml'
    feats.write_text(f'features:\n  - name: z\n    type: "{name}:feature"\n')
    manifest = json.loads((state / 'manifest.json').read_text())
    manifest['config']['features'] = str(feats)
    (state / 'manifest.json').write_text(json.dumps(manifest))
    # the task record, which compare builds its features from, names it too
    record = json.loads((state / 'task.json').read_text())
    record['features'] = feats.read_text()
    (state / 'task.json').write_text(json.dumps(record))
    return tmp, state, name, marker


@pytest.mark.parametrize('command', [['compare'], ['report', '--out', 'REPORT']])
def test_opening_a_state_directory_runs_no_code_it_names(hostile_state, command, tmp_path):
    tmp, state, name, marker = hostile_state
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(
        [str(tmp), str(ROOT)] + [p for p in [os.environ.get('PYTHONPATH')] if p]))
    args = [a.replace('REPORT', str(tmp_path / 'rep')) for a in command]
    r = subprocess.run([sys.executable, '-m', 'pref_learner.cli', args[0], str(state)]
                       + args[1:], env=env, capture_output=True, text=True, timeout=300)
    assert not marker.exists(), 'a module named by the state directory was imported'
    if command[0] == 'compare':   # compare builds the task model from the stored record
        assert r.returncode == 2 and r.stderr.count('\n') == 1, r.stderr
        assert f"module '{name}', which is not allowed" in r.stderr
        assert f'--feature-module {name}' in r.stderr
    else:                         # the report reads stored numbers only
        assert r.returncode == 0, r.stderr


def test_installed_entry_point_allows_its_module(tmp_path, monkeypatch):
    # An installed package declares its feature module in its metadata (entry_points.txt,
    # the packaging specification's format); nothing is imported to find it.
    name, marker = _hostile_module(tmp_path)
    dist = tmp_path / 'pl_feature_pack-1.0.dist-info'
    dist.mkdir()
    (dist / 'METADATA').write_text('Metadata-Version: 2.1\nName: pl-feature-pack\nVersion: 1.0\n')
    (dist / 'entry_points.txt').write_text(
        f'[pref_learner.feature_types]\nheight_mean = {name}:feature\n')
    assert name not in allowed_feature_modules()
    monkeypatch.syspath_prepend(str(tmp_path))
    assert name in allowed_feature_modules() and not marker.exists()
    fs = FeatureSet.from_yaml({'features': [{'name': 'z', 'type': f'{name}:feature'}]},
                              RobotModel.default())
    assert fs.names == ('z',) and marker.exists()


def test_no_reader_can_run_code_from_a_file():
    # Static guard (common practice: pickle, yaml.load with a full loader, numpy.load with
    # pickles allowed, eval and exec can all run code a file supplies). The one dynamic
    # import is features._load_user_type, behind the allow list tested above.
    import re
    risky = re.compile(r'\bpickle\.loads?\(|allow_pickle\s*=\s*True|yaml\.(unsafe_)?load\(|'
                       r'yaml\.full_load|\beval\(|\bexec\(|__import__\(|import_module\(')
    hits = []
    for p in sorted((ROOT / 'pref_learner').rglob('*.py')):
        for line in p.read_text().splitlines():
            if risky.search(line):
                hits.append((str(p.relative_to(ROOT)), line.strip()))
    assert hits == [('pref_learner/features.py',
                     'func = getattr(importlib.import_module(mod), attr)')], hits
