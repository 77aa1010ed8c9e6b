# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The trajectory optimiser: gradients, closed forms, preferences honoured, regret."""

import json

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


def _kinked_features(L):
    """The shipped set plus a max aggregate: every kind of surrogate the planner uses."""
    doc = {'features': L.features.describe() + [
        {'name': 'peak_height', 'type': 'height', 'frame': 'tool_tip', 'aggregate': 'max',
         'params': {'point': [0.0, 0.0, 0.0], 'normal': [0.0, 0.0, 1.0]}},
        {'name': 'closest_heat_block', 'type': 'point_distance', 'frame': 'tool_tip',
         'aggregate': 'min', 'params': {'point': [0.45, 0.0, 0.05], 'horizontal': True}}]}
    fs = FeatureSet.from_yaml(doc, L.robot)
    return fs.with_scales(np.concatenate([L.features.scales, [0.08, 0.06]]))


def test_surrogate_objective_gradient_against_finite_differences(setup):
    # scipy.optimize.check_grad: analytic gradient of the smooth surrogate objective (soft
    # min/max, rounded distances and path length) vs finite differences, min and max included.
    L, tasks = setup
    fs = _kinked_features(L)
    p = TrajectoryPlanner(fs, PlannerConfig(n_waypoints=10, barrier_margin=0.5,
                                            soft_temperature=0.05))
    rng = np.random.default_rng(0)
    for k in range(3):
        _, s, g = tasks[k]
        w = rng.standard_normal(fs.d)
        x0 = (s + np.linspace(0, 1, 10)[:, None] * (g - s))[1:-1].ravel()
        x0 = x0 + 0.02 * rng.standard_normal(x0.shape)
        err = check_grad(lambda x: p.objective(x, s, g, w, None)[0],
                         lambda x: p.objective(x, s, g, w, None)[1], x0, epsilon=1e-7)
        assert err / np.linalg.norm(p.objective(x0, s, g, w, None)[1]) < 1e-5


def test_log_sum_exp_surrogate_bounds_and_limit():
    # Boyd & Vandenberghe, Convex Optimization (2004), section 3.1.5:
    # max g <= t log sum exp(g / t) <= max g + t log T, so the error vanishes as t -> 0;
    # the upper bound is attained when all T entries are equal. Reference values from
    # scipy.special.logsumexp.
    from scipy.special import logsumexp

    from pref_learner.features import soft_extreme
    rng = np.random.default_rng(1)
    g = rng.normal(0.3, 0.1, (5, 64))
    T = g.shape[1]
    errors = []
    for t in (0.1, 0.01, 1e-3, 1e-4):
        hi, w_hi = soft_extreme(g, t, largest=True)
        lo, w_lo = soft_extreme(g, t, largest=False)
        np.testing.assert_allclose(hi, t * logsumexp(g / t, axis=1), rtol=1e-12)
        np.testing.assert_allclose(lo, -t * logsumexp(-g / t, axis=1), rtol=1e-12)
        assert np.all(hi >= g.max(1)) and np.all(hi <= g.max(1) + t * np.log(T) + 1e-15)
        assert np.all(lo <= g.min(1)) and np.all(lo >= g.min(1) - t * np.log(T) - 1e-15)
        np.testing.assert_allclose(w_hi.sum(1), 1.0)          # gradient: softmax weights
        np.testing.assert_allclose(w_lo.sum(1), 1.0)
        errors.append(max(np.max(hi - g.max(1)), np.max(g.min(1) - lo)))
    assert errors[-1] < 1e-4 * np.log(T) and errors == sorted(errors, reverse=True)
    flat = np.full(8, 0.25)
    np.testing.assert_allclose(soft_extreme(flat, 0.5)[0], 0.25 + 0.5 * np.log(8))
    np.testing.assert_allclose(soft_extreme(flat, 0.5, largest=False)[0],
                               0.25 - 0.5 * np.log(8))


def test_surrogate_features_within_their_stated_bounds(setup):
    # The planner's surrogate features against the exact ones on random smooth paths: a
    # min/max aggregate moves by at most t log T (above), a rounded distance
    # sqrt(r^2 + t^2) by at most t (sqrt(r^2 + t^2) <= r + t, common knowledge), and the
    # two add for a soft minimum of a rounded distance; path length by at most t.
    L, tasks = setup
    fs = _kinked_features(L)
    _, s, g = tasks[0]
    q = AlternativeSampler(L.robot, 64, SamplerConfig(6)).sample(s, g,
                                                                 np.random.default_rng(2))[0]
    exact = fs.raw(q)
    kinds = {sp.name: (sp.type, sp.aggregate) for sp in fs.specs}
    for frac in (0.1, 0.01):
        t = frac * fs.scales
        soft = fs.values_and_gradients(q, t)[0]
        for j, name in enumerate(fs.names):
            typ, agg = kinds[name]
            dist = t[j] if typ in ('point_distance', 'capsule_distance', 'path_length') else 0
            ext = t[j] * np.log(64) if agg in ('min', 'max') else 0
            err = soft[:, j] - exact[:, j]
            if agg == 'min':
                assert np.all(err >= -ext - 1e-12) and np.all(err <= dist + 1e-12), name
            elif agg == 'max':
                assert np.all(err <= ext + dist + 1e-12) and np.all(err >= -1e-12), name
            else:
                assert np.all(np.abs(err) <= dist + 1e-12), name
        np.testing.assert_allclose(fs.values_and_gradients(q)[0], exact, rtol=1e-12)


def test_projected_gradient_rule_on_a_box_quadratic():
    # Hand-computed: f(x) = 1/2 (x - a)' A (x - a), A = [[2, 1], [1, 2]], a = (1, 1), box
    # x1 in [-1, 0], x2 in [-1, 2]. The unconstrained minimum a violates x1 <= 0; with x1 = 0
    # the x2-derivative 1 (0 - 1) + 2 (x2 - 1) vanishes at x2 = 1.5, and the x1-derivative
    # 2 (0 - 1) + 1 (1.5 - 1) = -1.5 < 0 pushes into the upper bound (KKT): x* = (0, 1.5).
    from pref_learner.planner import minimize_box, projected_gradient
    A = np.array([[2.0, 1.0], [1.0, 2.0]])
    a = np.array([1.0, 1.0])
    lo, hi = np.array([-1.0, -1.0]), np.array([0.0, 2.0])

    def fun(x):
        return 0.5 * (x - a) @ A @ (x - a), A @ (x - a)
    # at x0 = (-1, -1): g = A (x0 - a) = (-6, -6); x0 - P(x0 - g) = (-1, -1) - (0, 2) = (-1, -3)
    x0 = np.array([-1.0, -1.0])
    np.testing.assert_allclose(projected_gradient(x0, fun(x0)[1], lo, hi), [-1.0, -3.0])
    xs = np.array([0.0, 1.5])
    np.testing.assert_allclose(projected_gradient(xs, fun(xs)[1], lo, hi), [0.0, 0.0])
    res = minimize_box(fun, x0, lo, hi, pg_tol=1e-9, max_iter=100)
    assert res.converged and res.pg_norm <= res.pg_limit
    np.testing.assert_allclose(res.pg_limit, 3e-9)            # pg_tol * max(1, |pg(x0)|_inf)
    np.testing.assert_allclose(res.x, xs, atol=1e-8)
    # the reported norm is the one at the returned point, and a capped run says so
    np.testing.assert_allclose(res.pg_norm,
                               np.abs(projected_gradient(res.x, fun(res.x)[1], lo, hi)).max())
    short = minimize_box(fun, x0, lo, hi, pg_tol=1e-9, max_iter=1)
    assert not short.converged and short.n_iter == 1 and short.pg_norm > short.pg_limit
    assert 'cap' in short.message


def test_planner_converges_on_the_shipped_problem(setup):
    # For seeded weights on the shipped tasks every plan meets the projected-gradient rule,
    # and what it reports holds when recomputed from the returned waypoints: the controls
    # are recovered by least squares (q = line + B c exactly), the projected gradient of the
    # surrogate objective there is the reported one, and cost and features are the exact ones.
    from pref_learner.planner import projected_gradient
    L, tasks = setup
    p = TrajectoryPlanner(L.features, PlannerConfig(restarts=0))
    rng = np.random.default_rng(11)
    for k in range(4):
        w = rng.standard_normal(L.features.d)
        _, s, g = tasks[k % len(tasks)]
        r = p.plan(w, s, g, rng)
        assert r.converged, (k, r.summary(), r.message)
        assert 0 < r.n_iter < p.config.max_iter and r.n_eval >= r.n_iter
        line, B, c_lo, c_hi = p.control_problem(s, g)
        c = np.linalg.lstsq(B, r.q - line, rcond=None)[0]
        np.testing.assert_allclose(line + B @ c, r.q, atol=1e-12)
        x = r.q[1:-1].ravel()
        grad_c = B[1:-1].T @ p.objective(x, s, g, w, None)[1].reshape(62, 7)
        pg = projected_gradient(c.ravel(), grad_c.ravel(), c_lo.ravel(), c_hi.ravel())
        np.testing.assert_allclose(np.abs(pg).max(), r.pg_norm, rtol=1e-3, atol=1e-9)
        np.testing.assert_allclose(r.cost, p.objective(x, s, g, w, None, exact=True)[0])
        np.testing.assert_allclose(r.features, L.features(r.q))
        assert 'converged after' in r.summary()


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
    # the elbow's lowest point: the straight line keeps it at the end points; a plan that
    # values clearance keeps it there, one that values the opposite lowers it in between
    # (the soft minimum gives the planner a gradient through the interior waypoints)
    k = names.index('elbow_clearance')
    name, s, g = next(t for t in tasks if t[0] == 'rack_b_to_tray_right')
    base = L.features.raw(s + np.linspace(0, 1, 64)[:, None] * (g - s))
    w = np.zeros(L.features.d)
    w[k] = 1.0
    assert L.features.raw(p.plan(w, s, g).q)[k] >= base[k] - 1e-6
    w[k] = -1.0
    assert L.features.raw(p.plan(w, s, g).q)[k] < base[k] - 0.02


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
    # finite-difference accelerations (common practice), the robot at rest before the
    # first waypoint and after the last (the waypoints padded with copies of the ends)
    rest = np.concatenate([q[:1], q, q[-1:]])
    assert np.all(np.abs(np.diff(rest, n=2, axis=0)) / dt[0] ** 2 <= a + 1e-12)
    # a straight line at constant speed: the start from rest bounds the step
    line = np.linspace(0.0, 1.0, 64)[:, None]
    step = time_parametrize(line, np.array([1.0]), np.array([2.0]))[1]
    assert step == pytest.approx(np.sqrt((1.0 / 63) / 2.0), rel=1e-12)
    for bad in (np.array([-0.5]), np.array([0.0]), np.array([np.nan])):
        with pytest.raises(ValueError, match='limits must be finite and > 0'):
            time_parametrize(line, bad, np.array([2.0]))


def test_planner_node_over_dds(capfd):
    import rclpy
    from std_msgs.msg import Float64MultiArray, String
    from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint
    from visualization_msgs.msg import MarkerArray

    from pref_learner.ros.planner_node import LATCHED, PlannerNode
    from pref_learner.safety import CAUTION, PLANNER_WARNING
    from ros_util import ros_context, spin_until, spinning
    # the session's waypoint count comes from its task record (48 here, the node's own
    # default is 0: the record's)
    L = Learner(LearnerConfig(n_particles=1, n_alternatives=1, n_waypoints=48))
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
            request([s, g])            # no task record yet: refused, node keeps running
            assert spin_until(ex, lambda: node.counters['bad_request'] == 1, 10)
            assert 'no task record' in node.last_warning
            # the session's task model, latched as the learner node publishes it
            rpub = client.create_publisher(String, '/pref_learner/task_record', LATCHED)
            rpub.publish(String(data=L.record.to_json()))
            assert spin_until(ex, lambda: node.task is not None, 10)
            np.testing.assert_array_equal(node.planner.features.scales, L.features.scales)
            request([s, g])            # no weights yet: refused
            assert spin_until(ex, lambda: node.counters['bad_request'] == 2, 10)
            wpub.publish(Float64MultiArray(data=[1.0, 0.0, 0.0, 0.0, 0.0, 0.0]))
            assert spin_until(ex, lambda: node.weights is not None, 10)
            # malformed inputs are refused by name and the node keeps what it had
            from std_msgs.msg import MultiArrayDimension, MultiArrayLayout
            ppub = client.create_publisher(Float64MultiArray, '/pref_learner/particles',
                                           LATCHED)
            ppub.publish(Float64MultiArray(layout=MultiArrayLayout(dim=[
                MultiArrayDimension(size=3), MultiArrayDimension(size=7)]), data=[1.0]))
            assert spin_until(ex, lambda: node.counters['bad_particles'] == 1, 10)
            assert 'particles refused: 1 values for a layout of 3 x 7' in node.last_warning
            wpub.publish(Float64MultiArray(data=[float('nan')] * 6))
            assert spin_until(ex, lambda: node.counters['bad_weights'] == 1, 10)
            assert node.weights[0] == 1.0 and node.particles is None
            broken = json.loads(L.record.to_json())
            broken['joint_names'] = None
            rpub.publish(String(data=json.dumps(broken)))
            assert spin_until(ex, lambda: node.counters['bad_task_record'] == 1, 10)
            assert node.task is not None and 'task record refused' in node.last_warning
            wpub.publish(Float64MultiArray(data=[1.0, 0.0, 0.0, 0.0, 0.0, 0.0]))
            request([s])               # one point
            bad = s.copy()
            bad[1] = 3.0
            request([bad, g])          # outside limits
            assert spin_until(ex, lambda: node.counters['bad_request'] == 4, 10)
            assert 'joint_2 = 3' in node.last_warning
            request([s, g])
            assert spin_until(ex, lambda: len(got) == 1 and markers, 30)
        # the plan's convergence is logged where the plan is announced
        assert node.last_plan.converged and node.counters['plans_not_converged'] == 0
        assert 'plan converged after' in capfd.readouterr().err
        # markers are expressed in the URDF's root link, not a fixed name
        assert markers[-1].markers[0].header.frame_id == node.robot.root_link
        assert markers[-1].markers[1].text == CAUTION       # where the plan is shown
        traj = got[0]
        assert len(traj.points) == 48
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
