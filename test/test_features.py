# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Task features: hand-computable cases, geometry, minimum-jerk closed forms."""

import numpy as np
import pytest
from scipy.optimize import check_grad

from pref_learner.features import (FEATURE_TYPES, FeatureConfigError, FeatureSet,
                                   WaypointType, allow_feature_modules,
                                   allowed_feature_modules, builtin_feature_types,
                                   default_features_path)
from pref_learner.robot import RobotModel

GANTRY = """<?xml version="1.0"?>
<robot name="gantry">
  <link name="base_link"/><link name="lx"/><link name="ly"/><link name="carriage"/>
  <joint name="x" type="prismatic"><parent link="base_link"/><child link="lx"/>
    <axis xyz="1 0 0"/><limit lower="-5" upper="5" velocity="1" effort="1"/></joint>
  <joint name="y" type="prismatic"><parent link="lx"/><child link="ly"/>
    <axis xyz="0 1 0"/><limit lower="-5" upper="5" velocity="1" effort="1"/></joint>
  <joint name="z" type="prismatic"><parent link="ly"/><child link="carriage"/>
    <axis xyz="0 0 1"/><limit lower="-5" upper="5" velocity="1" effort="1"/></joint>
</robot>"""

TURNTABLE = """<?xml version="1.0"?>
<robot name="turntable">
  <link name="base_link"/><link name="plate"/><link name="pin"/>
  <joint name="spin" type="revolute"><parent link="base_link"/><child link="plate"/>
    <axis xyz="0 0 1"/><limit lower="-3.1" upper="3.1" velocity="1" effort="1"/></joint>
  <joint name="pin_joint" type="fixed"><parent link="plate"/><child link="pin"/>
    <origin xyz="0.5 0 0"/></joint>
</robot>"""


@pytest.fixture(scope='module')
def gantry():
    return RobotModel(GANTRY, tool_frame='carriage')


def _one(robot, ftype, params=None, aggregate=None, frame=None):
    spec = {'name': 'f', 'type': ftype, 'params': params or {}}
    if aggregate:
        spec['aggregate'] = aggregate
    if frame:
        spec['frame'] = frame
    return FeatureSet.from_yaml({'features': [spec]}, robot)


def test_height_point_capsule_box_by_hand(gantry):
    # Hand-computed geometry (common practice): the gantry's carriage is at q.
    q = np.array([[0.5, 0.0, 0.5], [0.0, 0.0, 2.0], [0.3, 0.4, 0.25]])
    cap = {'a': [0, 0, 0], 'b': [0, 0, 1], 'radius': 0.1}
    f = _one(gantry, 'capsule_distance', cap, 'max')
    assert f.raw(q[:2])[0] == pytest.approx(0.9)          # beyond the end: 1.0 - 0.1
    assert f.raw(q[[0, 0]])[0] == pytest.approx(0.4)      # beside the middle: 0.5 - 0.1
    f = _one(gantry, 'capsule_distance', cap, 'min')
    assert f.raw(q[:2])[0] == pytest.approx(0.4)
    h = _one(gantry, 'height', {'point': [0, 0, 0.2], 'normal': [0, 0, 2]}, 'mean')
    assert h.raw(q)[0] == pytest.approx(np.mean([0.3, 1.8, 0.05]))
    d = _one(gantry, 'point_distance', {'point': [0, 0, 0.25]}, 'max')
    assert d.raw(q)[0] == pytest.approx(1.75)
    dh = _one(gantry, 'point_distance', {'point': [0, 0, 9.0], 'horizontal': True}, 'mean')
    assert dh.raw(q)[0] == pytest.approx(np.mean([0.5, 0.0, 0.5]))
    box = _one(gantry, 'in_box', {'min': [-1, -1, 0], 'max': [1, 1, 1], 'softness': 1e-4})
    assert box.raw(q)[0] == pytest.approx(2.0 / 3.0, abs=1e-6)


def test_in_cylinder_by_hand(gantry):
    # Geometry by hand (common practice): a cylinder of radius 0.5 and height 1 standing
    # on the origin; with a tiny softness the value is the plain indicator.
    cyl = {'base': [0, 0, 0], 'radius': 0.5, 'height': 1.0, 'softness': 1e-5}
    f = _one(gantry, 'in_cylinder', cyl, 'mean')
    assert f.raw(np.array([[0.3, 0.0, 0.5], [0.6, 0.0, 0.5]]))[0] == pytest.approx(0.5)
    assert f.raw(np.array([[0.0, 0.0, 1.2], [0.0, 0.3, -0.1]]))[0] == pytest.approx(0.0)
    assert f.raw(np.array([[0.2, -0.2, 0.9], [0.0, 0.0, 0.01]]))[0] == pytest.approx(1.0)
    # a lying cylinder (axis x, from x = 0 to 1): inside at x 0.5 and 0.1 off axis
    lying = dict(cyl, axis=[2, 0, 0], radius=0.2)
    f = _one(gantry, 'in_cylinder', lying, 'mean')
    q = np.array([[0.5, 0.1, 0.0], [0.5, 0.0, 0.3], [-0.1, 0.0, 0.0], [0.9, 0.0, -0.15]])
    assert f.raw(q)[0] == pytest.approx(0.5)
    # metres travelled inside: a straight pass through the middle crosses one diameter
    line = np.stack([np.linspace(-1, 1, 2001), np.zeros(2001), np.full(2001, 0.5)], 1)
    f = _one(gantry, 'in_cylinder', cyl, 'integral')
    assert f.raw(line)[0] == pytest.approx(1.0, abs=2e-3)


def test_approach_offset_by_hand(gantry):
    # Hand computation (common practice geometry): a straight horizontal move along x
    # with 0.1 m steps, T = 11, fraction 0.2 -> 2 waypoints beside each end, lying
    # 0.1 and 0.2 m off the vertical through the end: mean of 0.01 and 0.04 = 0.025.
    x = np.linspace(0, 1, 11)
    flat = np.stack([x, np.zeros(11), np.zeros(11)], 1)
    f = _one(gantry, 'approach_offset', {'fraction': 0.2})
    assert f.raw(flat)[0] == pytest.approx(0.025)
    # lifting straight up out of the start and lowering straight into the goal: 0
    z = np.concatenate([[0, 0.1, 0.2], np.full(5, 0.3), [0.2, 0.1, 0]])
    xs = np.concatenate([[0, 0, 0], np.linspace(0.1, 0.9, 5), [1, 1, 1]])
    lift = np.stack([xs, np.zeros(11), z], 1)
    assert f.raw(lift)[0] == pytest.approx(0.0, abs=1e-15)
    # only the goal end: the flat path's goal side alone, with the offset measured
    # square to a horizontal axis (y): the x offsets count in full, z none
    g = _one(gantry, 'approach_offset', {'fraction': 0.2, 'ends': 'goal', 'axis': [0, 1, 0]})
    assert g.raw(flat)[0] == pytest.approx(0.025)
    assert g.raw(flat[:, [1, 0, 2]])[0] == pytest.approx(0.0, abs=1e-15)


def test_integral_aggregate_by_hand(gantry):
    # A straight 2 m path at constant height 0.5 above the plane: integral = 1.0 m^2.
    q = np.stack([np.linspace(0, 2, 11), np.zeros(11), np.full(11, 0.5)], 1)
    f = _one(gantry, 'height', {}, 'integral')
    assert f.raw(q)[0] == pytest.approx(1.0)


def test_path_length_segment_and_arc(gantry):
    # Geometry: a straight segment's length; a circular arc of radius r and angle a
    # traced with T waypoints has polygon length 2 r (T-1) sin(a / (2 (T-1))) -> r a.
    q = np.linspace([0.1, -0.2, 0.3], [1.1, 0.8, -0.7], 40)
    f = _one(gantry, 'path_length')
    assert f.raw(q)[0] == pytest.approx(np.sqrt(3.0), rel=1e-12)
    table = RobotModel(TURNTABLE, tool_frame='pin')
    T, a = 200, 2.5
    qa = np.linspace(-1.25, 1.25, T)[:, None]
    g = _one(table, 'path_length').raw(qa)[0]
    assert g == pytest.approx(2 * 0.5 * (T - 1) * np.sin(a / (2 * (T - 1))), rel=1e-12)
    assert g == pytest.approx(0.5 * a, rel=1e-4)


def test_tilt_by_hand():
    # A frame tipped by angle a from vertical has tilt sin^2(a) (geometry).
    table = RobotModel(TURNTABLE.replace('axis xyz="0 0 1"', 'axis xyz="1 0 0"'),
                       tool_frame='pin')
    a = np.array([[0.0], [np.pi / 6], [np.pi / 3]])
    f = _one(table, 'tilt', {'axis': 'z'}, 'max')
    assert f.raw(a)[0] == pytest.approx(np.sin(np.pi / 3) ** 2)
    f = _one(table, 'tilt', {'axis': 'z'}, 'min')
    assert f.raw(a)[0] == pytest.approx(0.0, abs=1e-15)


def test_minimum_jerk_profile(gantry):
    # Flash & Hogan (1985), minimum-jerk model (from memory): x = D (10 s^3 - 15 s^4 + 6 s^5),
    # peak speed = 1.875 x mean speed, zero velocity and acceleration at both ends,
    # and integral of squared jerk over normalised time = 720 D^2.
    # Checked on the simulated teacher's profile (pref_learner.sim.min_jerk).
    from pref_learner.sim import min_jerk
    T = 2001
    s = np.linspace(0, 1, T)
    D = np.array([0.4, -0.3, 0.2])
    prof = min_jerk(s)
    np.testing.assert_allclose(prof, 10 * s ** 3 - 15 * s ** 4 + 6 * s ** 5, atol=1e-15)
    q = prof[:, None] * D
    v = np.gradient(prof, s)
    assert v.max() / 1.0 == pytest.approx(1.875, rel=1e-5)
    assert abs(v[0]) < 1e-5 and abs(v[-1]) < 1e-5
    f = FeatureSet.from_yaml({'features': [{'name': 'j', 'type': 'jerk'},
                                           {'name': 'e', 'type': 'effort'}]}, gantry)
    jerk, effort = f.raw(q)
    assert jerk == pytest.approx(720 * np.sum(D ** 2), rel=1e-2)
    # effort of the same profile: integral of (30 s^2 (1 - s)^2)^2 ds = 10/7 (closed form)
    assert effort == pytest.approx(10 / 7 * np.sum(D ** 2), rel=1e-3)


def test_batch_equals_single_and_shipped_set():
    robot = RobotModel.default()
    fs = FeatureSet.from_yaml(default_features_path(), robot)
    assert fs.d == 6 and fs.names[0] == 'heat_zone_travel'
    rng = np.random.default_rng(3)
    qs = robot.random_configurations(5 * 16, rng, margin=0.1).reshape(5, 16, 7)
    batch = fs.raw(qs)
    for i in range(5):
        np.testing.assert_allclose(fs.raw(qs[i]), batch[i], rtol=1e-13)
    with pytest.raises(ValueError, match='no scales'):
        fs(qs)
    np.testing.assert_allclose(fs.with_scales(np.full(6, 2.0))(qs), batch / 2.0)


def test_feature_gradients_against_finite_differences():
    # scipy.optimize.check_grad (central reference by finite differences): every
    # feature of the shipped set, random smooth trajectories, relative error < 1e-5.
    robot = RobotModel.default()
    fs = FeatureSet.from_yaml(default_features_path(), robot)
    fs = FeatureSet(robot, [s if s.aggregate not in ('min', 'max') else
                            type(s)(s.name, s.type, s.frame, 'mean', s.params)
                            for s in fs.specs])  # min/max have subgradients only
    extra = FeatureSet.from_yaml({'features': [
        {'name': 'jerk', 'type': 'jerk'},
        {'name': 'effort', 'type': 'effort'},
        {'name': 'length', 'type': 'path_length'},
        {'name': 'box', 'type': 'in_box', 'params': {'min': [0, -1, 0], 'max': [1, 1, 1],
                                                     'softness': 0.2}},
        {'name': 'cyl', 'type': 'in_cylinder', 'aggregate': 'integral',
         'params': {'base': [0.2, 0.1, 0.0], 'axis': [0.3, 0.0, 1.0], 'radius': 0.3,
                    'height': 0.8, 'softness': 0.1}},
        {'name': 'goal_offset', 'type': 'approach_offset', 'frame': 'link_5',
         'params': {'axis': [1, 1, 0], 'fraction': 0.4, 'ends': 'goal'}},
        {'name': 'h_int', 'type': 'height', 'aggregate': 'integral'}]}, robot)
    rng = np.random.default_rng(4)
    T = 8
    for fset in (fs, extra):
        for trial in range(3):
            a, b = robot.random_configurations(2, rng, margin=0.5)
            base = np.linspace(a, b, T) + 0.05 * rng.standard_normal((T, 7))
            for j in range(fset.d):
                def f(x):
                    return fset.raw(x.reshape(T, 7))[j]

                def g(x):
                    return fset.gradient(x.reshape(T, 7))[j].ravel()
                err = check_grad(f, g, base.ravel(), epsilon=1e-7)
                scale = max(np.linalg.norm(g(base.ravel())), 1e-8)
                assert err / scale < 1e-5, (fset.names[j], err, scale)


@pytest.mark.parametrize('spec, word', [
    ({'name': 'a', 'type': 'height', 'colour': 1}, "unknown key.*colour"),
    ({'name': 'a', 'type': 'warp'}, "type 'warp' is unknown"),
    ({'name': 'a', 'type': 'height', 'frame': 'camera'}, "frame 'camera'"),
    ({'name': 'a', 'type': 'capsule_distance',
      'params': {'a': [0, 0, 0], 'b': [0, 0, 1], 'radius': -1}}, 'radius must be'),
    ({'name': 'a', 'type': 'height', 'aggregate': 'median'}, "aggregate 'median'"),
    ({'name': 'a', 'type': 'height', 'params': {'normal': 'up'}}, 'normal'),
    ({'name': 'A b', 'type': 'height'}, 'name must match'),
    ({'name': 'a', 'type': 'tilt', 'params': {'axis': 'w'}}, 'axis'),
    ({'name': 'a', 'type': 'in_cylinder', 'params': {'base': [0, 0, 0], 'radius': 0.1}},
     'height must be a number > 0'),
    ({'name': 'a', 'type': 'in_cylinder',
      'params': {'base': [0, 0, 0], 'radius': 0.1, 'height': 1, 'axis': [0, 0, 0]}},
     'axis must be non-zero'),
    ({'name': 'a', 'type': 'approach_offset', 'params': {'fraction': 0.7}}, r'\(0, 0.5\]'),
    ({'name': 'a', 'type': 'approach_offset', 'params': {'ends': 'middle'}},
     'start, goal or both'),
    ({'name': 'a', 'type': 'approach_offset', 'aggregate': 'mean'}, 'takes no aggregate'),
    ({'name': 'a', 'type': 'nosuchmodule_xyz:f'}, "module 'nosuchmodule_xyz', which is not "
     'allowed'),
    ({'name': 'a', 'type': 'allowed_but_missing_xyz:f'}, 'cannot be imported'),
    ({'name': 'a', 'type': 'json:no_such_function'}, 'cannot be imported'),
])
def test_bad_feature_yaml(spec, word):
    robot = RobotModel.default()
    allow_feature_modules(['allowed_but_missing_xyz', 'json'])
    with pytest.raises(FeatureConfigError, match=word):
        FeatureSet.from_yaml({'features': [spec]}, robot)


def test_bad_feature_file(tmp_path):
    robot = RobotModel.default()
    with pytest.raises(FeatureConfigError, match='empty'):
        FeatureSet.from_yaml({'features': []}, robot)
    p = tmp_path / 'f.yaml'
    p.write_text('features: [')
    with pytest.raises(FeatureConfigError, match=str(p)):
        FeatureSet.from_yaml(p, robot)
    with pytest.raises(FeatureConfigError, match='cannot be read'):
        FeatureSet.from_yaml(tmp_path / 'none.yaml', robot)


def user_height(q, positions, rotations, params):
    """A user feature type: mean z plus an offset (used by the test below)."""
    return positions[..., 2].mean(axis=1) + params.get('offset', 0.0)


def test_user_feature_type(gantry):
    doc = {'features': [{'name': 'u', 'type': 'test_features:user_height',
                         'params': {'offset': 1.0}}]}
    if 'test_features' not in allowed_feature_modules():
        with pytest.raises(FeatureConfigError, match='not allowed'):
            FeatureSet.from_yaml(doc, gantry)
    allow_feature_modules(['test_features'])      # the user's explicit choice
    fs = FeatureSet.from_yaml(doc, gantry)
    q = np.zeros((4, 3))
    q[:, 2] = [0, 1, 2, 3]
    assert fs.raw(q)[0] == pytest.approx(2.5)


def test_value_and_gradient_of_the_shipped_set_against_finite_differences():
    # Values against the batched path; gradients of every shipped feature, including the
    # min aggregate the check_grad test above replaces (differentiable wherever the
    # extreme waypoint is unique), against central finite differences (common practice).
    robot = RobotModel.default()
    fs = FeatureSet.from_yaml(default_features_path(), robot)
    rng = np.random.default_rng(11)
    a, b = robot.random_configurations(2, rng, margin=0.5)
    q = np.linspace(a, b, 12) + 0.05 * rng.standard_normal((12, 7))
    vals, grads = fs.value_and_gradient(q)
    np.testing.assert_allclose(vals, fs.raw(q), rtol=1e-12, atol=1e-14)
    assert 'min' in [s.aggregate for s in fs.specs]
    h = 1e-6
    fd = np.empty_like(grads)
    for t in range(q.shape[0]):
        for i in range(q.shape[1]):
            e = np.zeros_like(q)
            e[t, i] = h
            fd[:, t, i] = (fs.raw(q + e) - fs.raw(q - e)) / (2 * h)
    for j in range(fs.d):
        scale = max(np.abs(fd[j]).max(), 1e-8)
        np.testing.assert_allclose(grads[j], fd[j], atol=1e-6 * scale, err_msg=fs.names[j])


class UserClearance(WaypointType):
    """A user type with a schema: the frame's height above ``level`` in units of ``unit``."""

    params = {'level': 0.0, 'unit': 1.0}

    def check(self, p, where):
        u = p['unit']
        if isinstance(u, bool) or not isinstance(u, (int, float)) or not u > 0:
            raise FeatureConfigError(f'{where}: params.unit must be a number > 0, got {u!r}')
        p['level'], p['unit'] = float(p['level']), float(u)

    def waypoint(self, p, pos, rot, temperature=0.0):
        g = (pos[..., 2] - p['level']) / p['unit']
        d = np.zeros(pos.shape)
        d[..., 2] = 1.0 / p['unit']
        return g, d, None


def test_user_feature_class_registers_like_a_built_in(gantry):
    # A FeatureType subclass from an allowed module carries its schema, checks, value and
    # gradient, and gets the built-ins' aggregates: values by hand on the gantry (tool z =
    # q_z), gradients against central finite differences (scipy check_grad).
    allow_feature_modules(['test_features'])
    doc = {'features': [
        {'name': 'c_max', 'type': 'test_features:UserClearance', 'aggregate': 'max',
         'params': {'level': 0.5, 'unit': 2}},
        {'name': 'c_int', 'type': 'test_features:UserClearance', 'aggregate': 'integral'}]}
    fs = FeatureSet.from_yaml(doc, gantry)
    assert isinstance(FEATURE_TYPES['test_features:UserClearance'], UserClearance)
    q = np.zeros((4, 3))
    q[:, 2] = [0, 1, 2, 3]
    # max of (z - 0.5) / 2 = 1.25; integral of z over a 3 m straight climb = 4.5
    np.testing.assert_allclose(fs.raw(q), [1.25, 4.5], rtol=1e-13)
    rng = np.random.default_rng(6)
    base = rng.standard_normal((6, 3))
    for j in range(fs.d):
        err = check_grad(lambda x: fs.raw(x.reshape(6, 3))[j],
                         lambda x: fs.gradient(x.reshape(6, 3))[j].ravel(), base.ravel(),
                         epsilon=1e-7)
        assert err < 1e-5 * max(np.linalg.norm(fs.gradient(base)[j]), 1e-8)
    with pytest.raises(FeatureConfigError, match='unit must be a number > 0'):
        FeatureSet.from_yaml({'features': [{'name': 'a', 'type': 'test_features:UserClearance',
                                            'params': {'unit': -1}}]}, gantry)
    with pytest.raises(FeatureConfigError, match=r"unknown params \['colour'\]"):
        FeatureSet.from_yaml({'features': [{'name': 'a', 'type': 'test_features:UserClearance',
                                            'params': {'colour': 1}}]}, gantry)


def test_built_in_types_are_registered_with_their_schema(gantry):
    # Every built-in type is one registered object; a feature's parameters are its schema's
    # defaults overridden by the file's (the in_box default softness, 5 mm, from the docs).
    assert builtin_feature_types() == ['height', 'point_distance', 'capsule_distance', 'tilt',
                                       'in_box', 'in_cylinder', 'path_length', 'effort',
                                       'jerk', 'approach_offset']
    fs = _one(gantry, 'in_box', {'min': [0, 0, 0], 'max': [1, 1, 1]})
    assert fs.specs[0].params['softness'] == FEATURE_TYPES['in_box'].params['softness'] == 0.005
    assert fs.types[0] is FEATURE_TYPES['in_box']
    assert [t.uses_frame for t in (FEATURE_TYPES['effort'], FEATURE_TYPES['height'])] == \
        [False, True]
