# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The trajectory optimiser: gradients, closed forms, preferences honoured, regret."""

import numpy as np
import pytest
from scipy.optimize import check_grad

from pref_learner.alternatives import AlternativeSampler, SamplerConfig
from pref_learner.demonstrations import condition
from pref_learner.features import FeatureSet
from pref_learner.learner import Learner, LearnerConfig
from pref_learner.planner import (PlannerConfig, TrajectoryPlanner, planner_alternatives,
                                  time_parametrize)


@pytest.fixture(scope='module')
def setup():
    L = Learner(LearnerConfig(n_particles=1, n_alternatives=1))
    return L, L.tasks()


def test_objective_gradient_against_finite_differences(setup):
    # scipy.optimize.check_grad: analytic objective gradient vs finite differences.
    L, tasks = setup
    fs = FeatureSet(L.robot, [s for s in L.features.specs if s.aggregate not in ('min', 'max')],
                    L.features.scales[[i for i, s in enumerate(L.features.specs)
                                       if s.aggregate not in ('min', 'max')]])
    p = TrajectoryPlanner(fs, PlannerConfig(n_waypoints=10, barrier_margin=0.5))
    rng = np.random.default_rng(0)
    _, s, g = tasks[0]
    w = rng.standard_normal(fs.d)
    x0 = (s + np.linspace(0, 1, 10)[:, None] * (g - s))[1:-1].ravel()
    x0 = x0 + 0.02 * rng.standard_normal(x0.shape)
    err = check_grad(lambda x: p.objective(x, s, g, w, None)[0],
                     lambda x: p.objective(x, s, g, w, None)[1], x0, epsilon=1e-7)
    assert err / np.linalg.norm(p.objective(x0, s, g, w, None)[1]) < 1e-5


def test_smoothness_only_gives_the_closed_form_line(setup):
    # Closed form of min sum |second difference|^2 with fixed ends: solve the linear
    # system D_ii^T D_ii x_i = -D_ii^T D_ie x_e (common practice), i.e. the straight
    # joint-space line with uniform spacing.
    L, tasks = setup
    _, s, g = tasks[1]
    T = 16
    p = TrajectoryPlanner(L.features, PlannerConfig(n_waypoints=T, restarts=0, max_iter=500,
                                                    barrier=0.0))
    # tiny reward so the smoothness term dominates; a zero vector is refused
    w = np.full(L.features.d, 1e-12)
    r = p.plan(w, s, g)
    D = np.diff(np.eye(T), n=2, axis=0)
    Di, De = D[:, 1:-1], D[:, [0, T - 1]]
    xi = np.linalg.solve(Di.T @ Di, -Di.T @ De @ np.vstack([s, g]))
    np.testing.assert_allclose(r.q[1:-1], xi, atol=1e-5)


def _tool(L, q):
    return L.robot.frame_poses(q, ['tool_tip']).positions[:, 0]


def test_heat_zone_and_elbow_preferences_are_honoured(setup):
    # Common practice: a plan under a single weight must do better on that feature
    # than the straight line between the same end points.
    L, tasks = setup
    p = TrajectoryPlanner(L.features, PlannerConfig(restarts=0))
    names = L.features.names
    name, s, g = next(t for t in tasks if t[0] == 'block_back_to_tray_left')
    line = s + np.linspace(0, 1, 64)[:, None] * (g - s)
    base = L.features.raw(line)
    w = np.zeros(L.features.d)
    w[names.index('heat_zone_travel')] = -1.0
    cool = L.features.raw(p.plan(w, s, g).q)
    j = names.index('heat_zone_travel')
    assert base[j] > 0.1 and cool[j] < 0.5 * base[j]
    # the elbow's lowest point: the straight line keeps it at the end points, and a plan
    # that values clearance keeps it there too
    k = names.index('elbow_clearance')
    w = np.zeros(L.features.d)
    w[k] = 1.0
    assert L.features.raw(p.plan(w, s, g).q)[k] >= base[k] - 1e-6


def test_plans_beat_random_alternatives_for_their_weights(setup):
    L, tasks = setup
    p = TrajectoryPlanner(L.features, PlannerConfig(restarts=1, smoothness=1e-4))
    smp = AlternativeSampler(L.robot, 64, SamplerConfig(200))
    rng = np.random.default_rng(5)
    for k in range(8):
        w = rng.standard_normal(L.features.d)
        w /= np.linalg.norm(w)
        _, s, g = tasks[k % len(tasks)]
        plan = p.plan(w, s, g, rng)
        alts = condition(smp.sample(s, g, rng)[0], 0.0, L.robot.lower, L.robot.upper)
        best = np.max(L.features(alts) @ w)
        assert plan.reward >= best, (k, plan.reward, best)


def test_uncertainty_aware_planning_and_parallel_alternatives(setup):
    L, tasks = setup
    _, s, g = tasks[2]
    rng = np.random.default_rng(6)
    parts = rng.standard_normal((50, L.features.d))
    parts /= np.linalg.norm(parts, axis=1, keepdims=True)
    pw = rng.random(50)
    mean_plan = TrajectoryPlanner(L.features, PlannerConfig(restarts=0)).plan(
        parts, s, g, rng, particle_weights=pw)
    direct = TrajectoryPlanner(L.features, PlannerConfig(restarts=0)).plan(
        (pw / pw.sum()) @ parts, s, g, rng)
    np.testing.assert_allclose(mean_plan.q, direct.q, atol=1e-6)   # expectation is linear
    cvar = TrajectoryPlanner(L.features, PlannerConfig(restarts=0, uncertainty_objective='cvar',
                                                       alpha=0.2))
    worst = lambda q: np.sort(parts @ L.features(q))[:10].mean()  # noqa: E731
    assert worst(cvar.plan(parts, s, g, rng, particle_weights=np.ones(50)).q) >= \
        worst(mean_plan.q) - 1e-9
    small = TrajectoryPlanner(L.features, PlannerConfig(n_waypoints=64, restarts=0,
                                                        max_iter=15))
    alts = planner_alternatives(small, s, g, parts[:4], rng, n_jobs=2)
    assert alts.shape == (4, 64, 7)
    np.testing.assert_array_equal(alts[:, 0], np.broadcast_to(s, (4, 7)))


def test_bad_requests_are_refused_with_the_value(setup):
    L, tasks = setup
    p = TrajectoryPlanner(L.features, PlannerConfig(restarts=0, max_iter=5))
    _, s, g = tasks[0]
    with pytest.raises(ValueError, match='all zero'):
        p.plan(np.zeros(6), s, g)
    with pytest.raises(ValueError, match='non-finite'):
        p.plan(np.array([np.nan, 1, 0, 0, 0, 0]), s, g)
    with pytest.raises(ValueError, match='6 entries'):
        p.plan(np.ones(5), s, g)
    bad = s.copy()
    bad[1] = 3.0
    with pytest.raises(ValueError, match=r'start: joint joint_2 = 3'):
        p.plan(np.ones(6), bad, g)
    with pytest.raises(ValueError, match='joint values'):
        p.plan(np.ones(6), s[:5], g)


def test_time_parametrization_respects_limits():
    q = np.cumsum(np.random.default_rng(7).normal(0, 0.05, (40, 3)), axis=0)
    v, a = np.array([1.0, 0.5, 2.0]), np.array([2.0, 1.0, 4.0])
    t = time_parametrize(q, v, a)
    dt = np.diff(t)
    assert np.all(np.abs(np.diff(q, axis=0)) / dt[:, None] <= v + 1e-12)
    assert np.all(np.abs(np.diff(q, n=2, axis=0)) / dt[0] ** 2 <= a + 1e-12)


def test_planner_node_over_dds(capfd):
    import rclpy
    from std_msgs.msg import Float64MultiArray
    from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint
    from visualization_msgs.msg import MarkerArray

    from pref_learner.ros.planner_node import LATCHED, PlannerNode
    from pref_learner.safety import CAUTION, PLANNER_WARNING
    from ros_util import ros_context, spin_until, spinning
    L = Learner(LearnerConfig(n_particles=1, n_alternatives=1))
    _, s, g = L.tasks()[0]
    with ros_context() as (ctx, ex):
        node = PlannerNode(context=ctx)
        logged = capfd.readouterr().err
        assert CAUTION in logged and PLANNER_WARNING in logged   # at start-up, as warnings
        client = rclpy.create_node('plan_client', context=ctx)
        ex.add_node(client)
        with spinning(node, ctx):
            wpub = client.create_publisher(Float64MultiArray, '/pref_learner/weights', LATCHED)
            req = client.create_publisher(JointTrajectory, '/pref_planner/request', 10)
            got, markers = [], []
            client.create_subscription(JointTrajectory, '/pref_planner/trajectory',
                                       got.append, 10)
            client.create_subscription(MarkerArray, '/pref_planner/markers', markers.append,
                                       LATCHED)
            spin_until(ex, lambda: req.get_subscription_count() > 0, 10)

            def request(points, names=list(L.robot.joint_names)):
                m = JointTrajectory()
                m.joint_names = names
                for p in points:
                    m.points.append(JointTrajectoryPoint(positions=[float(x) for x in p]))
                req.publish(m)
            request([s, g])            # no weights yet: refused, node keeps running
            assert spin_until(ex, lambda: node.counters['bad_request'] == 1, 10)
            wpub.publish(Float64MultiArray(data=[1.0, 0.0, 0.0, 0.0, 0.0, 0.0]))
            assert spin_until(ex, lambda: node.weights is not None, 10)
            request([s])               # one point
            bad = s.copy()
            bad[1] = 3.0
            request([bad, g])          # outside limits
            assert spin_until(ex, lambda: node.counters['bad_request'] == 3, 10)
            assert 'joint_2 = 3' in node.last_warning
            request([s, g])
            assert spin_until(ex, lambda: len(got) == 1 and markers, 30)
        # markers are expressed in the URDF's root link, not a fixed name
        assert markers[-1].markers[0].header.frame_id == node.robot.root_link
        traj = got[0]
        q = np.array([p.positions for p in traj.points])
        t = np.array([p.time_from_start.sec + p.time_from_start.nanosec * 1e-9
                      for p in traj.points])
        np.testing.assert_allclose(q[0], s)
        np.testing.assert_allclose(q[-1], g)
        v = np.abs(np.diff(q, axis=0)) / np.diff(t)[:, None]
        assert np.all(v <= 0.5 * L.robot.velocity_limit + 1e-3)
        # the tool stays under max_tool_speed (default 0.25 m/s, the common reduced speed of
        # manual mode; from memory), measured on the published points by forward kinematics
        tool = L.robot.frame_poses(q, ['tool_tip']).positions[:, 0]
        speed = np.linalg.norm(np.diff(tool, axis=0), axis=1) / np.diff(t)
        assert speed.max() <= 0.25 * (1 + 1e-6) and speed.max() >= 0.2
        node.destroy_node()
        client.destroy_node()


def test_spline_basis_and_plans_stay_within_limits(setup):
    # de Boor (1978), from memory: clamped B-spline bases are non-negative, sum to one and
    # interpolate the end controls; so interior-only rows vanish at both ends.
    from pref_learner.planner import spline_basis
    B = spline_basis(64, 16)
    assert B.shape == (64, 14) and np.all(B >= 0)
    assert np.all(B.sum(axis=1) <= 1 + 1e-12)
    np.testing.assert_allclose(B[[0, -1]], 0.0, atol=1e-15)
    L, tasks = setup
    p = TrajectoryPlanner(L.features, PlannerConfig(restarts=1, barrier=0.0))
    rng = np.random.default_rng(9)
    for k in range(5):
        w = rng.standard_normal(L.features.d) * 10.0      # strong pulls toward the limits
        _, s, g = tasks[k % len(tasks)]
        q = p.plan(w, s, g, rng).q
        assert np.all(q >= L.robot.lower - 1e-12) and np.all(q <= L.robot.upper + 1e-12)
        np.testing.assert_array_equal(q[0], s)
        np.testing.assert_array_equal(q[-1], g)
