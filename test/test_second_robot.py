# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The whole loop on a second robot (test/data/lift_arm6.urdf), over DDS on loopback.

The learner node starts from its parameters file; the simulated teacher and the
planner node take the task model from the learner's latched task record; then
``learn`` replays the recorded bag with the same parameters file, and ``compare``
and ``report`` read everything from the state directory.
"""

import json
from html import escape as html_escape
from pathlib import Path

import numpy as np
import rclpy
from rclpy.parameter import Parameter
from std_msgs.msg import String
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint
from visualization_msgs.msg import MarkerArray

from pref_learner.cli import main as cli_main
from pref_learner.posterior import ParticlePosterior
from pref_learner.ros.learner_node import LearnerNode
from pref_learner.ros.planner_node import PlannerNode
from pref_learner.ros.teacher_node import TeacherNode
from pref_learner.safety import CAUTION, SIMULATED_JOINT_STATES
from pref_learner.task import TaskRecord
from ros_util import LATCHED, ros_context, spin_until, spinning

DATA = Path(__file__).with_name('data')
N_DEMOS = 3


def _params(tmp_path) -> Path:
    p = tmp_path / 'lift_arm6_params.yaml'
    p.write_text(f"""pref_learner:
  ros__parameters:
    urdf: {DATA / 'lift_arm6.urdf'}
    features: {DATA / 'lift_arm6_features.yaml'}
    tool_frame: tcp
    model: less
    n_particles: 400
    n_alternatives: 80
    seed: 11
    state_dir: {tmp_path / 'state'}
    record_bag: {tmp_path / 'session'}
""")
    return p


def test_whole_loop_on_a_second_robot(tmp_path, capsys):
    params = _params(tmp_path)
    state, bag = tmp_path / 'state', tmp_path / 'session'
    with ros_context() as (ctx, ex):
        learner = LearnerNode(context=ctx, cli_args=[
            '--ros-args', '--params-file', str(params),
            '-r', f'joint_states:={SIMULATED_JOINT_STATES}'])
        L = learner.learner
        assert L.robot.root_link == 'bench_plate' and L.robot.n == 6
        client = rclpy.create_node('loop_client', context=ctx)
        ex.add_node(client)
        got = {}
        client.create_subscription(String, '/pref_learner/task_record',
                                   lambda m: got.__setitem__('record', m.data), LATCHED)
        client.create_subscription(MarkerArray, '/pref_learner/markers',
                                   lambda m: got.__setitem__('markers', m), LATCHED)
        teacher = TeacherNode(context=ctx, parameter_overrides=[
            Parameter(k, value=v) for k, v in dict(
                n_demonstrations=N_DEMOS, duration=1.5, rate=200.0, pause=0.3,
                start_delay=2.0, seed=5, model='less', beta=10.0).items()])
        planner = PlannerNode(context=ctx)
        with spinning(learner, ctx), spinning(teacher, ctx), spinning(planner, ctx):
            assert spin_until(ex, lambda: 'record' in got, 10)
            # the latched record is the session's task model, URDF text and scales included
            record = TaskRecord.from_json(got['record'])
            assert record == L.record and record.urdf == (DATA / 'lift_arm6.urdf').read_text()
            assert spin_until(ex, teacher.finished.is_set, 90), teacher.failure
            assert teacher.failure == ''
            assert spin_until(ex, lambda: L.n_demonstrations == N_DEMOS
                              and len(learner._worker) == 0, 60), (
                L.rejections, dict(L.recorder.counters))
            # the teacher demonstrated on the session's robot with the session's scales
            assert teacher.task.record == L.record
            np.testing.assert_array_equal(teacher.task.features.scales, L.features.scales)
            # RViz markers in the URDF's root frame
            assert spin_until(ex, lambda: 'markers' in got, 10)
            assert {m.header.frame_id for m in got['markers'].markers} == {'bench_plate'}
            # the planner scores with exactly the learner's scales and robot
            assert spin_until(ex, lambda: planner.task is not None
                              and planner.weights is not None, 20)
            np.testing.assert_array_equal(planner.planner.features.scales, L.features.scales)
            assert planner.robot.joint_names == L.robot.joint_names
            live = L.summaries()['less'].mean
            assert spin_until(ex, lambda: np.array_equal(planner.weights, live), 10)
            plans, pmarks = [], []
            client.create_subscription(JointTrajectory, '/pref_planner/trajectory',
                                       plans.append, 10)
            client.create_subscription(MarkerArray, '/pref_planner/markers', pmarks.append,
                                       LATCHED)
            req = client.create_publisher(JointTrajectory, '/pref_planner/request', 10)
            assert spin_until(ex, lambda: req.get_subscription_count() > 0, 10)
            _, start, goal = L.tasks()[0]
            m = JointTrajectory(joint_names=list(L.robot.joint_names))
            m.points = [JointTrajectoryPoint(positions=[float(x) for x in p])
                        for p in (start, goal)]
            req.publish(m)
            assert spin_until(ex, lambda: plans and pmarks, 60), planner.last_warning
        plan = plans[0]
        assert tuple(plan.joint_names) == L.robot.joint_names
        q = np.array([p.positions for p in plan.points])
        np.testing.assert_allclose(q[0], start)
        np.testing.assert_allclose(q[-1], goal)
        assert np.all(q >= L.robot.lower - 1e-9) and np.all(q <= L.robot.upper + 1e-9)
        assert pmarks[-1].markers[0].header.frame_id == 'bench_plate'
        for n in (planner, teacher, learner, client):
            n.destroy_node()                 # the learner closes its bag
    # offline: the recorded bag with the same parameters file gives the live estimate
    capsys.readouterr()
    out = tmp_path / 'offline'
    assert cli_main(['learn', str(bag), '--out', str(out), '--params-file', str(params)]) == 0
    res = json.loads(capsys.readouterr().out)
    assert res['demonstrations'] == N_DEMOS
    off = ParticlePosterior.load(out / 'state' / 'posterior_less').summary()
    np.testing.assert_allclose(off.mean, live, atol=1e-9)
    assert TaskRecord.from_json((out / 'state' / 'task.json').read_text()) == L.record
    # the bag carries the task record: with the session settings alone it learns the same
    out2 = tmp_path / 'offline_from_record'
    assert cli_main(['learn', str(bag), '--out', str(out2), '--particles', '400',
                     '--seed', '11']) == 0
    capsys.readouterr()
    off2 = ParticlePosterior.load(out2 / 'state' / 'posterior_less').summary()
    np.testing.assert_allclose(off2.mean, live, atol=1e-9)
    # compare and report read robot, features and scales from the state directory
    cmp_json = tmp_path / 'compare.json'
    assert cli_main(['compare', str(state), '--sets', '2', '--particles', '300',
                     '--json', str(cmp_json)]) == 0
    cmp = json.loads(cmp_json.read_text())
    assert set(cmp['loo']) == {'boltzmann', 'less'}
    assert all(len(v) == N_DEMOS and np.all(np.isfinite(v)) for v in cmp['loo'].values())
    assert CAUTION in capsys.readouterr().out
    assert cli_main(['report', str(state), '--out', str(tmp_path / 'report')]) == 0
    text = (tmp_path / 'report' / 'report.html').read_text()
    assert html_escape(CAUTION) in text and 'peak_tube_tilt' in text and 'tcp_travel' in text


def test_learner_node_reads_the_robot_from_robot_description():
    # The ROS convention: the URDF text latched (transient local) on /robot_description,
    # as robot_state_publisher offers it; the node waits for it when urdf is empty.
    import pytest
    text = (DATA / 'lift_arm6.urdf').read_text()
    params = dict(robot_description_topic='/robot_description', robot_description_timeout=20.0,
                  features=str(DATA / 'lift_arm6_features.yaml'), tool_frame='tcp',
                  n_particles=50, n_alternatives=20)
    with ros_context() as (ctx, ex):
        pub_node = rclpy.create_node('robot_state_stand_in', context=ctx)
        pub = pub_node.create_publisher(String, '/robot_description', LATCHED)
        pub.publish(String(data=text))
        node = LearnerNode(context=ctx, parameter_overrides=[
            Parameter(k, value=v) for k, v in params.items()])
        assert node.learner.robot.root_link == 'bench_plate'
        assert node.learner.record.urdf == text and node.learner.robot.n == 6
        node.destroy_node()
        # nobody publishes on this topic: the node refuses to start, saying why
        with pytest.raises(ValueError, match='no URDF on /nobody_here'):
            LearnerNode(context=ctx, parameter_overrides=[Parameter(k, value=v) for k, v in dict(
                params, robot_description_topic='/nobody_here',
                robot_description_timeout=0.5).items()])
        pub_node.destroy_node()
