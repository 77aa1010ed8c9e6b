# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The learner node proposes what to teach next, over DDS on loopback."""

import json

import numpy as np
import rclpy
import yaml
from rclpy.parameter import Parameter
from std_msgs.msg import Float64
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint
from visualization_msgs.msg import MarkerArray

from pref_learner.features import default_features_path, load_scenario
from pref_learner.guidance import TaskGuide
from pref_learner.learner import Learner, LearnerConfig
from pref_learner.ros.learner_node import LearnerNode
from pref_learner.safety import CAUTION
from pref_learner.sim import SimulatedTeacher, TeacherConfig
from ros_util import LATCHED, follow_status, ros_context, spin_until, spinning

TRUE = load_scenario()['example_preference']  # the demo's person (shipped scenario)


def _trajectory(names, q, t=None, frame_id=''):
    msg = JointTrajectory()
    msg.header.frame_id = frame_id
    msg.joint_names = list(names)
    t = np.arange(len(q)) if t is None else t
    for ti, qi in zip(t, q):
        p = JointTrajectoryPoint()
        p.positions = [float(x) for x in qi]
        p.time_from_start.sec = int(ti)
        p.time_from_start.nanosec = int(round((ti - int(ti)) * 1e9))
        msg.points.append(p)
    return msg


def _places():
    """Return the shipped scenario's places (joint positions) by name."""
    out = {}
    for name, start, goal in load_scenario()['tasks']:
        a, b = name.split('_to_')
        out[a], out[b] = start, goal
    return out


def test_node_proposes_a_task_after_a_demonstration_and_a_user_task_can_win(tmp_path):
    # The node runs a copy of the shipped scenario reduced to three short tasks, so
    # that a task the user offers between the bench's other places can beat them all.
    doc = yaml.safe_load(default_features_path().read_text())
    keep = ('rack_a_to_rack_c', 'block_side_to_analyser', 'tray_right_to_analyser')
    doc['scenario']['tasks'] = [t for t in doc['scenario']['tasks'] if t['name'] in keep]
    feats = tmp_path / 'three_tasks.yaml'
    feats.write_text(yaml.safe_dump(doc))
    with ros_context() as (ctx, ex):
        node = LearnerNode(context=ctx, parameter_overrides=[
            Parameter('n_particles', value=400), Parameter('n_alternatives', value=60),
            Parameter('segmentation', value='manual'), Parameter('features', value=str(feats))])
        client = rclpy.create_node('guidance_client', context=ctx)
        bg = spinning(node, ctx)
        bg.__enter__()
        ex.add_node(client)
        got = []
        gains, markers = [], []
        client.create_subscription(JointTrajectory, '/pref_learner/next_task', got.append,
                                   LATCHED)
        client.create_subscription(Float64, '/pref_learner/next_task_gain',
                                   lambda m: gains.append(m.data), LATCHED)
        client.create_subscription(MarkerArray, '/pref_learner/next_task_markers',
                                   markers.append, LATCHED)
        status = follow_status(client)
        robot = node.learner.robot
        scenario = [t[0] for t in node.learner.tasks()]
        # a proposal at the prior, before any demonstration (latched: a late subscriber has it)
        assert spin_until(ex, lambda: got and gains and markers, 30)
        assert got[-1].header.frame_id in scenario
        # one whole demonstration on ~/demonstration
        teacher = SimulatedTeacher(Learner(LearnerConfig(n_particles=1, n_alternatives=1)),
                                   TRUE, TeacherConfig(seed=3))
        stamps, q = teacher.stream(0)
        demo_pub = client.create_publisher(JointTrajectory, '/pref_learner/demonstration', 10)
        assert spin_until(ex, lambda: demo_pub.get_subscription_count() > 0, 10)
        n_before = len(got)
        t = (stamps - stamps[0]) * 1e-9
        demo_pub.publish(_trajectory(robot.joint_names, q[::5], t[::5]))
        assert spin_until(ex, lambda: node.learner.n_demonstrations == 1, 30)
        assert spin_until(ex, lambda: len(got) > n_before and status.get('accepted') == '1'
                          and status.get('next_task') == got[-1].header.frame_id, 30)
        msg = got[-1]
        assert list(msg.joint_names) == list(robot.joint_names) and len(msg.points) == 2
        best = [t_ for t_ in node.learner.tasks() if t_[0] == msg.header.frame_id][0]
        np.testing.assert_allclose(msg.points[0].positions, best[1])
        np.testing.assert_allclose(msg.points[1].positions, best[2])
        assert float(status['next_task_gain']) == np.round(gains[-1], 4)
        assert json.loads(status['unknown'])                   # words on what is unknown
        assert status['caution'] == CAUTION                    # beside the learned weights
        # markers: tool at start and goal, in the URDF's root frame (FK from the robot model)
        mk = markers[-1].markers
        tool = robot.frame_poses(np.stack([best[1], best[2]]), [robot.tool_frame]).positions
        assert all(m.header.frame_id == robot.root_link for m in mk)
        np.testing.assert_allclose([mk[0].pose.position.x, mk[0].pose.position.y,
                                    mk[0].pose.position.z], tool[0, 0])
        np.testing.assert_allclose([mk[1].pose.position.x, mk[1].pose.position.y,
                                    mk[1].pose.position.z], tool[1, 0])
        # a user task that is more informative than every scenario task wins. Which one is
        # found offline with the same learner state (the node's worker is idle now) and the
        # same seeded sets: the node must agree with that computation.
        guide = TaskGuide(node.learner)
        top = guide.score(node.learner.tasks())[0].gain
        places = _places()
        cands = [(f'{a}_to_{b}', places[a], places[b]) for a in places for b in places
                 if a != b and f'{a}_to_{b}' not in keep]
        win = guide.score(cands)[0]
        assert win.gain > top, (win.gain, top)
        task_pub = client.create_publisher(JointTrajectory, '/pref_learner/candidate_tasks', 10)
        assert spin_until(ex, lambda: task_pub.get_subscription_count() > 0, 10)
        task_pub.publish(_trajectory(list(robot.joint_names)[::-1],
                                     [win.start[::-1], win.goal[::-1]], frame_id='far_reach'))
        assert spin_until(ex, lambda: got[-1].header.frame_id == 'far_reach', 30)
        np.testing.assert_allclose(got[-1].points[0].positions, win.start)
        assert spin_until(ex, lambda: 'far_reach' in json.loads(status['candidate_tasks']), 10)
        assert np.round(gains[-1], 6) == np.round(win.gain, 6)
        # a malformed task is refused with a reason and changes nothing
        task_pub.publish(_trajectory(['nope'], [[0.0], [1.0]], frame_id='bad'))
        assert spin_until(ex, lambda: node.counters['bad_task'] == 1, 10)
        assert got[-1].header.frame_id == 'far_reach'
        bg.__exit__(None, None, None)
        node.destroy_node()
        client.destroy_node()
