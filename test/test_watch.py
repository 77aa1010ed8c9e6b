# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""``pref-learner watch`` follows a learner node over DDS (loopback) and only subscribes."""

import os
import signal
import subprocess
import sys
import time

import rclpy
from rclpy.parameter import Parameter
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from pref_learner.learner import Learner, LearnerConfig
from pref_learner.ros.learner_node import LearnerNode
from pref_learner.ros.watch import events, render
from pref_learner.safety import CAUTION
from pref_learner.sim import SimulatedTeacher, TeacherConfig
from pref_learner.features import load_scenario
from ros_util import ros_context, spin_until, spinning

TRUE = load_scenario()['example_preference']  # the demo's person (shipped scenario)


def _call(ex, client, name):
    cli = client.create_client(Trigger, name)
    assert cli.wait_for_service(timeout_sec=10.0)
    fut = cli.call_async(Trigger.Request())
    assert spin_until(ex, fut.done, 20)
    return fut.result()


def test_watch_follows_a_learner_and_never_publishes():
    with ros_context() as (ctx, ex):
        node = LearnerNode(context=ctx, parameter_overrides=[
            Parameter('n_particles', value=400), Parameter('n_alternatives', value=60),
            Parameter('segmentation', value='manual')])
        client = rclpy.create_node('watch_test_client', context=ctx)
        bg = spinning(node, ctx)
        bg.__enter__()
        ex.add_node(client)
        proc = subprocess.Popen([sys.executable, '-m', 'pref_learner.cli', 'watch',
                                 '--duration', '60'], stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True, env=dict(os.environ))
        try:
            assert spin_until(ex, lambda: node._status_pub.get_subscription_count() >= 1, 30)
            assert spin_until(ex, lambda: ('pref_learner_watch', '/') in
                              client.get_node_names_and_namespaces(), 10)
            # graph introspection (rclpy): the watch has no publisher at all, one subscription
            # (a node's name can be discovered before its endpoints: wait for them)
            assert spin_until(ex, lambda: client.get_subscriber_names_and_types_by_node(
                'pref_learner_watch', '/'), 10)
            assert client.get_publisher_names_and_types_by_node('pref_learner_watch', '/') == []
            subs = client.get_subscriber_names_and_types_by_node('pref_learner_watch', '/')
            assert [t for t, _ in subs] == ['/pref_learner/status']
            # one accepted demonstration, then one refused (stopped with no samples)
            teacher = SimulatedTeacher(Learner(LearnerConfig(n_particles=1, n_alternatives=1)),
                                       TRUE, TeacherConfig(seed=3))
            stamps, q = teacher.stream(0)
            msg = JointTrajectory()
            msg.joint_names = list(node.learner.robot.joint_names)
            for st, qi in zip(stamps[::5], q[::5]):
                p = JointTrajectoryPoint()
                p.positions = [float(x) for x in qi]
                t = int(st - stamps[0])
                p.time_from_start.sec, p.time_from_start.nanosec = t // 10**9, t % 10**9
                msg.points.append(p)
            pub = client.create_publisher(JointTrajectory, '/pref_learner/demonstration', 10)
            assert spin_until(ex, lambda: pub.get_subscription_count() > 0, 10)
            pub.publish(msg)
            assert spin_until(ex, lambda: node.learner.n_demonstrations == 1, 30)
            assert spin_until(ex, lambda: node._proposal is not None
                              and node.counters['accepted'] == 1, 30)
            time.sleep(2.5)                 # the status goes out every publish_period (1 s)
            _call(ex, client, '/pref_learner/start_demonstration')
            _call(ex, client, '/pref_learner/stop_demonstration')
            assert spin_until(ex, lambda: len(node.learner.rejections) == 1, 10)
            reason = node.learner.rejections[0]['reason']
            time.sleep(2.5)
        finally:
            proc.send_signal(signal.SIGINT)
            out, err = proc.communicate(timeout=30)
        assert proc.returncode == 0, err[-2000:]
        assert out.startswith(CAUTION)
        assert 'demonstration 1 accepted' in out
        assert f'demonstration refused (1): {reason}' in out
        last = out[out.rindex(CAUTION):]        # the last screen: caution, weights, task
        for n in node.learner.names:
            assert n in last
        assert 'rationality (beta)' in last and 'still unknown: ' in last
        assert f'next task to teach: {node._proposal.name}' in last
        s = node.learner.summaries()['less']
        assert f'{s.mean[0]:+8.2f}' in last
        bg.__exit__(None, None, None)
        node.destroy_node()
        client.destroy_node()


def test_render_and_events_from_status_values():
    # A hand-written status (the node's keys): every part of the screen comes from it.
    vals = {'model': 'less', 'feature_names': '["a", "b"]', 'accepted': '2', 'rejected': '1',
            'weights': '[0.6, -0.8]', 'weights_ci90_low': '[0.4, -0.9]',
            'weights_ci90_high': '[0.7, -0.5]', 'beta_mean': '4.0', 'beta_ci90': '[2.0, 8.0]',
            'beta_inferred': 'true', 'unknown': '["cannot yet tell how much a matters against b'
            ' (spread 0.30)"]', 'next_task': 'rack_to_front', 'next_task_gain': '0.5',
            'last_rejection': 'too_short: 0.1 s'}
    screen = render('/pref_learner', {'less': vals})
    assert screen[0] == CAUTION
    assert '  a                                  +0.60   [+0.40, +0.70]' in screen
    assert 'still unknown: cannot yet tell how much a matters against b (spread 0.30)' in \
        '\n'.join(screen)
    assert 'next task to teach: rack_to_front (expected gain 0.500 nats)' in screen
    before = dict(vals, accepted='0', rejected='0')
    assert events(before, vals) == ['demonstration 1 accepted', 'demonstration 2 accepted',
                                    'demonstration refused (1): too_short: 0.1 s']
    assert events(None, vals) == []
