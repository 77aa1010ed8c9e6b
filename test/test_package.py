# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Packaging checks: launch file, parameter YAML, manifest, lint (ament_flake8 settings)."""

import ast
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]


def _entry_points():
    text = (ROOT / 'setup.py').read_text()
    return dict(re.findall(r"'([a-z_\-]+) = (pref_learner[\w.]+:\w+)'", text))


def test_launch_file_names_existing_executables_and_files():
    # the launch packages are not on PyPI: check the file statically
    tree = ast.parse((ROOT / 'launch' / 'pref_learner_launch.py').read_text())
    eps = _entry_points()
    execs = [kw.value.value for node in ast.walk(tree) if isinstance(node, ast.Call)
             for kw in node.keywords if kw.arg == 'executable']
    assert set(execs) == {'learner_node', 'teacher_node', 'planner_node'}
    for e in execs:
        mod, func = eps[e].split(':')
        path = ROOT / (mod.replace('.', '/') + '.py')
        assert path.exists() and f'def {func}(' in path.read_text()
    strings = [n.value for n in ast.walk(tree) if isinstance(n, ast.Constant)
               and isinstance(n.value, str) and n.value.endswith('.yaml')]
    assert strings and all((ROOT / 'launch' / s).exists() for s in strings)
    assert "glob('launch/*.yaml')" in (ROOT / 'setup.py').read_text()


def test_every_param_yaml_key_is_declared():
    # ROS 2 silently ignores unknown parameter keys, so check them here
    from pref_learner.ros.learner_node import _PARAMS
    doc = yaml.safe_load((ROOT / 'launch' / 'pref_learner_params.yaml').read_text())
    keys = set(doc['/**']['ros__parameters'])
    assert keys <= set(_PARAMS), keys - set(_PARAMS)
    for k, v in doc['/**']['ros__parameters'].items():
        from pref_learner.learner import LearnerConfig
        default = getattr(LearnerConfig(), k, None)
        if isinstance(default, float):
            assert isinstance(v, float), f'{k}: write {v} as a double (e.g. {float(v)})'


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
    # REP 2004 quality level 3: a licence and copyright notice in every source file
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
