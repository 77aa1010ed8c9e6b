# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Packaging checks: launch file, parameter YAML, manifest, lint (ament_flake8 settings)."""

import ast
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

from launch_util import (launch_nodes, launch_yaml_names, parameter_mismatches, settings,
                         yaml_parameters)

ROOT = Path(__file__).resolve().parents[1]


def _entry_points():
    text = (ROOT / 'setup.py').read_text()
    return dict(re.findall(r"'([a-z_\-]+) = (pref_learner[\w.]+:\w+)'", text))


def test_launch_file_names_existing_executables_and_files():
    # the launch packages are not on PyPI: check the file statically (the installed
    # executables and parameters: test_workspace.py)
    launch = ROOT / 'launch' / 'pref_learner_launch.py'
    eps = _entry_points()
    execs = [n['executable'].value for n in launch_nodes(launch)]
    assert set(execs) == {'learner_node', 'teacher_node', 'planner_node'}
    for e in execs:
        mod, func = eps[e].split(':')
        path = ROOT / (mod.replace('.', '/') + '.py')
        assert path.exists() and f'def {func}(' in path.read_text()
    strings = launch_yaml_names(launch)
    assert strings and all((ROOT / 'launch' / s).exists() for s in strings)
    assert "glob('launch/*.yaml')" in (ROOT / 'setup.py').read_text()


def test_launch_feeds_the_learner_from_the_teacher_private_topic():
    # statically, as above: with the teacher, the learner's joint_states is remapped to
    # the teacher's private topic; without it, the learner reads the robot's joint_states
    from pref_learner.safety import SIMULATED_JOINT_STATES
    source = (ROOT / 'launch' / 'pref_learner_launch.py').read_text()
    tree = ast.parse(source)
    consts = {t.id: n.value.value for n in tree.body if isinstance(n, ast.Assign)
              for t in n.targets if isinstance(n.value, ast.Constant)}
    assert consts['SIMULATED_JOINT_STATES'] == SIMULATED_JOINT_STATES
    nodes = launch_nodes(ROOT / 'launch' / 'pref_learner_launch.py')
    learners = [n for n in nodes if n['executable'].value == 'learner_node']
    conds = sorted(n['condition'].func.id for n in learners)
    assert conds == ['IfCondition', 'UnlessCondition']
    for n in learners:
        remap = ast.unparse(n['remappings']) if 'remappings' in n else ''
        if n['condition'].func.id == 'IfCondition':
            assert remap == "[('joint_states', SIMULATED_JOINT_STATES)]"
        else:
            assert remap == ''
    teacher = next(n for n in nodes if n['executable'].value == 'teacher_node')
    assert "'allow_network'" in ast.unparse(teacher['parameters'])


def test_params_yaml_lists_exactly_the_declared_parameters_with_their_defaults():
    # ROS 2 silently ignores unknown parameter keys, and a missing key hides a setting:
    # check both directions against a real learner node started with its defaults, and
    # that every value has the declared type (a double written as an int stops the node).
    import rclpy
    from rclpy.context import Context

    from pref_learner.ros.learner_node import _PARAMS, LearnerNode
    values = yaml_parameters(ROOT / 'launch' / 'pref_learner_params.yaml')
    ctx = Context()
    rclpy.init(context=ctx)
    try:
        node = LearnerNode(context=ctx)
        declared = settings({k: p.value for k, p in node._parameters.items()})
        node.destroy_node()
    finally:
        rclpy.shutdown(context=ctx)
    assert set(_PARAMS) <= set(declared)
    assert parameter_mismatches(values, declared) == []


def test_package_xml_dependencies_and_version():
    root = ET.parse(ROOT / 'package.xml').getroot()
    assert root.get('format') == '3'
    deps = {e.text for e in root if e.tag in ('depend', 'exec_depend')}
    for d in ('rclpy', 'sensor_msgs', 'std_msgs', 'std_srvs', 'trajectory_msgs',
              'visualization_msgs', 'diagnostic_msgs', 'geometry_msgs', 'builtin_interfaces',
              'rcl_interfaces', 'pinocchio', 'python3-numpy', 'python3-scipy', 'python3-yaml'):
        assert d in deps, d
    assert root.find('export/build_type').text == 'ament_python'
    version = root.find('version').text
    assert f"version='{version}'" in (ROOT / 'setup.py').read_text()
    import pref_learner
    assert pref_learner.__version__ == version
    assert (ROOT / 'resource' / 'pref_learner').exists()


def test_core_modules_do_not_import_ros():
    for p in (ROOT / 'pref_learner').glob('*.py'):
        text = p.read_text()
        assert not re.search(r'^\s*(import|from) (rclpy|sensor_msgs|std_msgs)', text, re.M), p
        if p.name != 'bags.py':
            assert 'rosbags' not in text or p.name == 'cli.py', p


def test_flake8_clean():
    # ament_flake8 settings (99 columns), flake8 from PyPI
    r = subprocess.run([sys.executable, '-m', 'flake8', '--max-line-length', '99',
                        'pref_learner', 'test', 'launch', 'setup.py'], cwd=ROOT,
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stdout


def test_copyright_headers():
    # REP 2004, every quality level from 4 up: a licence and a copyright notice in every
    # source file
    for p in list((ROOT / 'pref_learner').rglob('*.py')) + list((ROOT / 'test').glob('*.py')) \
            + list((ROOT / 'launch').glob('*.py')) + [ROOT / 'setup.py']:
        head = p.read_text().splitlines()[:2]
        assert head and head[0].startswith('# Copyright') and 'Apache-2.0' in head[1], p
    assert 'Apache' in (ROOT / 'LICENSE').read_text()


def test_pep257_clean():
    # ament_pep257 settings: pep257 convention without D100-D107, D203, D212, D404
    r = subprocess.run([sys.executable, '-m', 'pydocstyle', '--convention=pep257',
                        '--add-ignore=D100,D101,D102,D103,D104,D105,D106,D107,D404',
                        'pref_learner'], cwd=ROOT, capture_output=True, text=True)
    assert r.returncode == 0, r.stdout


def test_make_help_lists_every_target():
    text = (ROOT / 'Makefile').read_text()
    phony = set(re.search(r'^\.PHONY:(.*)$', text, re.M).group(1).split())
    rules = set(re.findall(r'^([a-z]+):', text, re.M))
    assert rules == phony
    r = subprocess.run(['make', '-s', 'help'], cwd=ROOT, capture_output=True, text=True)
    listed = {line.split()[1] for line in r.stdout.splitlines() if line.startswith('make ')}
    assert listed == phony, (listed, phony)


def _repository_text_files():
    skip = {'.venv', '.git', 'out', 'build', 'install', 'log', '.pytest_cache', '.hypothesis'}
    for p in ROOT.rglob('*'):
        rel = p.relative_to(ROOT)
        if p.is_file() and not (set(rel.parts) & skip) and '__pycache__' not in rel.parts \
                and p.suffix in ('.py', '.md', '.yaml', '.txt', '.cfg', '.xml', '') \
                and not p.name.startswith('.coverage.'):
            yield rel, p.read_text(errors='replace')


def test_repository_refers_only_to_files_it_contains():
    # every Markdown document named anywhere, and every repository path quoted in the
    # documents, exists in the repository
    names = {p.name for p in ROOT.rglob('*') if '.venv' not in p.parts}
    for rel, text in _repository_text_files():
        for md in re.findall(r'\b([\w-]+\.md)\b', text):
            assert md in names, f'{rel} refers to {md}, which is not in the repository'
    for doc in ('README.md', 'DEVELOPERS.md', 'QUALITY_DECLARATION.md'):
        text = (ROOT / doc).read_text()
        for token in re.findall(r'`([\w.-]+/[\w./-]+)`', text):
            if token.split('/')[0] in ('pref_learner', 'test', 'launch', 'resource', '.ci') \
                    or token in ('requirements.txt', 'setup.py'):
                assert (ROOT / token).exists(), f'{doc} quotes {token}, which does not exist'


def test_node_processes_default_to_one_blas_thread_and_keep_a_users_setting():
    # The ROS shell sets OPENBLAS/OMP/MKL_NUM_THREADS to 1 before a node module imports
    # numpy, unless the environment already has a value (common practice for many
    # mid-sized products on few cores).
    import os
    code = ('import pref_learner.ros, os; '
            'print(os.environ["OPENBLAS_NUM_THREADS"], os.environ["OMP_NUM_THREADS"])')
    env = {k: v for k, v in os.environ.items()
           if k not in ('OPENBLAS_NUM_THREADS', 'OMP_NUM_THREADS', 'MKL_NUM_THREADS')}
    out = subprocess.run([sys.executable, '-c', code], env=env, capture_output=True,
                         text=True, check=True).stdout.split()
    assert out == ['1', '1']
    env['OPENBLAS_NUM_THREADS'] = '2'
    out = subprocess.run([sys.executable, '-c', code], env=env, capture_output=True,
                         text=True, check=True).stdout.split()
    assert out == ['2', '1']
