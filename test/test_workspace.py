# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""A real ROS 2 workspace: colcon builds the package, the installed node learns over DDS.

colcon-core and colcon-ros (pinned in requirements.txt) build a copy of the
repository as an ament_python package in a temporary workspace, as a user's
``colcon build`` does. Everything after the build uses the install space only,
in the environment of its setup script: the executables and the parameters file
the launch file names (the launch packages are not on PyPI, so the launch file is
read as data), the shipped parameters against those the installed
``learner_node`` declares, and the installed ``learner_node`` taught one
demonstration over DDS (loopback and a random domain, see conftest.py), whose
published estimate must equal the one an offline learner computes from the
node's own bag. Without colcon the tests fail; they never skip.
"""

import importlib.util
import json
import os
import shutil
import signal
import subprocess
import sys
from dataclasses import fields, replace
from pathlib import Path

import numpy as np
import pytest
import rclpy

from pref_learner.bags import read_stream
from pref_learner.features import load_scenario
from pref_learner.learner import Learner, LearnerConfig
from pref_learner.sim import SimulatedTeacher, TeacherConfig
from launch_util import (launch_nodes, launch_yaml_names, parameter_mismatches, settings,
                         yaml_parameters)
from ros_util import LATCHED, follow_status, publish_stream, ros_context, spin_until, \
    teaching_publishers

ROOT = Path(__file__).resolve().parents[1]
PKG = 'pref_learner'
TRUE = load_scenario()['example_preference']  # the demo's person (shipped scenario)
SMALL = {'n_particles': 800, 'n_alternatives': 150}
# a clone's own files only: no virtual environment, build products or caches
NOT_SOURCE = shutil.ignore_patterns('.git', '.venv', 'build', 'install', 'log', 'out',
                                    '__pycache__', '*.egg-info', '.pytest_cache',
                                    '.hypothesis', '.coverage', '.coverage.*')
# colcon runs with the interpreter of the tests (the one `make venv` installed it into)
COLCON = [sys.executable, '-c',
          'import sys; from colcon_core.command import main; sys.exit(main(argv=sys.argv[1:]))']
# run in the sourced workspace: where the package, its index entry and entry points resolve
PROBE = '''
import json, sys
from importlib.metadata import distribution
from ament_index_python.packages import get_package_prefix, get_package_share_directory
import pref_learner
scripts = {e.name: e for e in distribution('pref_learner').entry_points
           if e.group == 'console_scripts'}
modules = {name: sys.modules[scripts[name].load().__module__].__file__ for name in sys.argv[1:]}
print(json.dumps({'package': pref_learner.__file__, 'prefix': get_package_prefix('pref_learner'),
                  'share': get_package_share_directory('pref_learner'), 'modules': modules}))
'''


def _tail_text(text, n=40):
    return '\n'.join(text.splitlines()[-n:])


def _tail(path, n=40):
    path = Path(path)
    return _tail_text(path.read_text(errors='replace'), n) if path.exists() else ''


@pytest.fixture(scope='module')
def workspace(tmp_path_factory):
    """Build the package with colcon; return the workspace and its sourced environment."""
    missing = [m for m in ('colcon_core', 'colcon_ros') if importlib.util.find_spec(m) is None]
    assert not missing, (f'{missing} not installed for {sys.executable}: `make venv` installs '
                         'colcon-core and colcon-ros from requirements.txt')
    ws = tmp_path_factory.mktemp('ws')
    shutil.copytree(ROOT, ws / 'src' / PKG, ignore=NOT_SOURCE)
    # the build is not measured (coverage of the package comes from the processes below);
    # an empty COLCON_HOME keeps a user's colcon defaults (say, symlink-install) out
    env = {k: v for k, v in os.environ.items() if not k.startswith('COVERAGE_PROCESS_')}
    env['COLCON_HOME'] = str(ws / 'colcon_home')
    (ws / 'colcon_home').mkdir()
    r = subprocess.run(COLCON + ['build', '--packages-select', PKG, '--executor', 'sequential',
                                 '--event-handlers', 'console_direct+'],
                       cwd=ws, env=env, capture_output=True, text=True, timeout=600)
    log = ws / 'log' / 'latest_build' / 'logger_all.log'
    assert r.returncode == 0, \
        f'colcon build failed:\n{_tail(log)}\n{r.stderr}\n{_tail_text(r.stdout)}'
    # the user's next step: source the workspace's setup script
    r = subprocess.run(['sh', '-c', f'. "{ws}/install/setup.sh" && env -0'],
                       env=dict(os.environ), capture_output=True, timeout=60)
    assert r.returncode == 0, r.stderr
    sourced = dict(kv.split('=', 1) for kv in r.stdout.decode().split('\0') if '=' in kv)
    return ws, sourced


def _probe(ws, env, *scripts):
    # run outside the checkout: `python -c` puts the working directory first on sys.path
    r = subprocess.run([sys.executable, '-c', PROBE, *scripts], cwd=ws, env=env,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout.strip().splitlines()[-1])


def test_colcon_installs_an_ament_python_package_the_launch_file_can_start(workspace):
    ws, env = workspace
    install = ws / 'install' / PKG
    # built as ament_python (colcon-ros): registered in the ament index and on
    # AMENT_PREFIX_PATH, as `ros2 run` and `ros2 launch` look packages up
    assert (install / 'share' / 'ament_index' / 'resource_index' / 'packages' / PKG).is_file()
    assert (install / 'share' / PKG / 'package.xml').is_file()
    assert str(install) in env['AMENT_PREFIX_PATH'].split(os.pathsep)
    launch = install / 'share' / PKG / 'launch' / 'pref_learner_launch.py'
    nodes = launch_nodes(launch)
    execs = sorted({n['executable'].value for n in nodes})
    assert execs == ['learner_node', 'planner_node', 'teacher_node']
    assert {n['package'].value for n in nodes} == {PKG}
    found = _probe(ws, env, *execs)
    # the package, its share directory (as the launch file finds it) and every entry point
    # the launch file starts come from the install space, not from this checkout
    assert Path(found['prefix']).resolve() == install.resolve()
    assert Path(found['share']).resolve() == (install / 'share' / PKG).resolve()
    assert Path(found['package']).resolve().is_relative_to(install.resolve())
    for e in execs:
        assert Path(found['modules'][e]).resolve().is_relative_to(install.resolve()), \
            (e, found['modules'][e])
        # where launch_ros and `ros2 run` look for an executable: lib/<package>/<executable>
        # (from memory: the ament_python convention, setup.cfg's install_scripts)
        script = install / 'lib' / PKG / e
        assert script.is_file() and os.access(script, os.X_OK), script
        shebang = script.read_text().splitlines()[0]
        assert shebang.startswith('#!') and \
            Path(shebang[2:].split()[0]).resolve() == Path(sys.executable).resolve(), shebang
    # the parameters file the launch file passes, installed where the launch file joins it
    names = launch_yaml_names(launch)
    assert names and all((Path(found['share']) / 'launch' / n).is_file() for n in names)


def _declared_parameters(client, ex, node_name):
    """Every parameter a running node declares, read through its parameter services."""
    from rcl_interfaces.srv import GetParameters, ListParameters
    from rclpy.parameter import parameter_value_to_python

    def call(srv_type, service, request):
        cli = client.create_client(srv_type, f'{node_name}/{service}')
        # generous waits: the machine is shared, and they end as soon as the answer is in
        assert cli.wait_for_service(timeout_sec=120.0), f'{service}: no such service'
        fut = cli.call_async(request)
        assert spin_until(ex, fut.done, 120.0), f'{service}: no answer'
        return fut.result()
    names = list(call(ListParameters, 'list_parameters', ListParameters.Request()).result.names)
    values = call(GetParameters, 'get_parameters', GetParameters.Request(names=names)).values
    return {name: parameter_value_to_python(v) for name, v in zip(names, values)}


def _config(declared):
    """Return the learner configuration a node with these parameters runs (state in memory)."""
    vals = {f.name: declared[f.name] for f in fields(LearnerConfig) if f.name in declared}
    vals['joint_names'] = tuple(x for x in vals['joint_names'] if x)
    vals['spreads'] = tuple(float(x) for x in vals['spreads'])
    return replace(LearnerConfig(**vals), state_dir='')


def test_installed_learner_node_reads_shipped_params_and_publishes_estimate(workspace, tmp_path):
    ws, env = workspace
    # network rule: the installed node inherits loopback discovery and this session's domain
    assert env['ROS_AUTOMATIC_DISCOVERY_RANGE'] == 'LOCALHOST'
    assert env['ROS_DOMAIN_ID'] == os.environ['ROS_DOMAIN_ID']
    install = ws / 'install' / PKG
    params = install / 'share' / PKG / 'launch' / 'pref_learner_params.yaml'
    bag = tmp_path / 'session'
    overrides = dict(SMALL, state_dir=str(tmp_path / 'state'), record_bag=str(bag))
    # as the launch file starts it: the installed executable with the installed parameters
    # file, here with smaller particle and alternative counts and a bag of its input
    cmd = [str(install / 'lib' / PKG / 'learner_node'), '--ros-args', '--params-file',
           str(params), '--log-level', 'warn']
    for k, v in overrides.items():
        cmd += ['-p', f'{k}:={v}']
    log = tmp_path / 'learner_node.log'
    with open(log, 'w') as out:
        proc = subprocess.Popen(cmd, cwd=tmp_path, env=env, stdout=out, stderr=subprocess.STDOUT)
    try:
        with ros_context() as (ctx, ex):
            client = rclpy.create_node('workspace_client', context=ctx)
            ex.add_node(client)
            from std_msgs.msg import Float64MultiArray
            published = []
            client.create_subscription(Float64MultiArray, '/pref_learner/weights',
                                       lambda m: published.append(np.array(m.data)), LATCHED)
            status = follow_status(client)
            spin_until(ex, lambda: proc.poll() is not None or (status and published), 120)
            assert proc.poll() is None, f'learner_node exited:\n{_tail(log)}'
            pub, teach = teaching_publishers(client, ex, timeout=120,
                                             ready=lambda: bool(status) and bool(published))
            # every key of the shipped file is a parameter the installed node declares, with
            # the declared type, and the node runs with the file's values (from memory: ROS 2
            # silently ignores an unknown key of a parameters file)
            declared = settings(_declared_parameters(client, ex, '/pref_learner'))
            expected = dict(yaml_parameters(params), **overrides)
            assert parameter_mismatches(expected, declared) == []
            config = _config(declared)
            teacher = SimulatedTeacher(Learner(replace(config, n_particles=1, n_alternatives=1)),
                                       TRUE, TeacherConfig(seed=5))
            names = list(teacher.learner.robot.joint_names)
            stamps, q = teacher.stream(0, 1_700_000_000 * 10**9)
            publish_stream(ex, pub, teach, stamps, q, names)
            assert spin_until(ex, lambda: status.get('demonstrations') == '1', 120), status
            n_before = len(published)
            # the estimates go out before the status and again every publish_period: the
            # second message after the status is certainly the updated estimate
            assert spin_until(ex, lambda: len(published) >= n_before + 2, 60)
            client.destroy_node()
        proc.send_signal(signal.SIGINT)              # closes the bag; coverage data written
        assert proc.wait(timeout=60) == 0, _tail(log)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    # reference (common practice, a replay): the source tree's learner, same parameters,
    # fed the node's own bag (what `pref-learner learn` does), so the check does not depend
    # on DDS delivering every sample
    offline = Learner(config)
    (model,) = offline.posteriors
    prior = offline.summaries()[model].mean
    for e in read_stream(bag):
        if e.kind == 'joint_states':
            offline.feed(e.stamp_ns, e.names, e.positions, e.log_ns)
        else:
            offline.set_teaching(e.value)
    assert offline.n_demonstrations == 1 and offline.rejections == []
    after = offline.summaries()[model].mean
    assert not np.allclose(prior, after)
    np.testing.assert_allclose(published[0], prior, rtol=0, atol=1e-12)
    np.testing.assert_allclose(published[-1], after, rtol=0, atol=1e-12)
