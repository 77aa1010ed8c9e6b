# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Kinematics against pinocchio itself, yourdfpy and a textbook closed form."""

import numpy as np
import pytest

from pref_learner.robot import RobotModel, default_urdf_path

TWO_LINK = """<?xml version="1.0"?>
<robot name="planar_two_link">
  <link name="base_link"/>
  <link name="upper"/>
  <link name="fore"/>
  <link name="tip"/>
  <joint name="shoulder" type="revolute">
    <parent link="base_link"/><child link="upper"/>
    <origin xyz="0 0 0"/><axis xyz="0 0 1"/>
    <limit lower="-3.1" upper="3.1" velocity="1" effort="1"/>
  </joint>
  <joint name="elbow" type="revolute">
    <parent link="upper"/><child link="fore"/>
    <origin xyz="{l1} 0 0"/><axis xyz="0 0 1"/>
    <limit lower="-3.1" upper="3.1" velocity="1" effort="1"/>
  </joint>
  <joint name="tip_joint" type="fixed">
    <parent link="fore"/><child link="tip"/><origin xyz="{l2} 0 0"/>
  </joint>
</robot>"""


@pytest.fixture(scope='module')
def arm():
    return RobotModel.default()


def test_shipped_arm_chain(arm):
    assert arm.n == 7
    assert arm.joint_names == tuple(f'joint_{i}' for i in range(1, 8))
    assert arm.joint_types[-1] == 'continuous'
    assert np.isinf(arm.upper[-1])
    assert np.all(arm.lower[:6] < 0) and np.all(arm.upper[:6] > 0)


def test_fk_matches_yourdfpy_at_1000_configurations(arm):
    # Reference: yourdfpy, an independent URDF implementation (PyPI).
    import yourdfpy
    u = yourdfpy.URDF.load(str(default_urdf_path()), load_meshes=False)
    rng = np.random.default_rng(0)
    q = arm.random_configurations(1000, rng)
    poses = arm.frame_poses(q, ['tool_tip', 'link_4'])
    for i in range(1000):
        u.update_cfg(np.concatenate([q[i], [0.0, 0.0]]))
        for k, name in enumerate(['tool_tip', 'link_4']):
            tf = u.get_transform(name, 'base_link')
            np.testing.assert_allclose(poses.positions[i, k], tf[:3, 3], atol=1e-9)
            np.testing.assert_allclose(poses.rotations[i, k], tf[:3, :3], atol=1e-9)


def test_batched_fk_and_jacobian_match_pinocchio(arm):
    # Reference: pinocchio framesForwardKinematics and getFrameJacobian
    # (LOCAL_WORLD_ALIGNED) one configuration at a time.
    rng = np.random.default_rng(1)
    q = arm.random_configurations(50, rng)
    poses, (jp, jr) = arm.frame_poses(q, ['tool_tip'], with_jacobian=True)
    for i in range(50):
        p, r = arm.pin_frame_pose(q[i], 'tool_tip')
        np.testing.assert_allclose(poses.positions[i, 0], p, atol=1e-12)
        np.testing.assert_allclose(poses.rotations[i, 0], r, atol=1e-12)
        jac = arm.pin_frame_jacobian(q[i], 'tool_tip')
        np.testing.assert_allclose(jp[i, 0], jac[:3], atol=1e-12)
        np.testing.assert_allclose(jr[i, 0], jac[3:], atol=1e-12)


def test_fk_in_blocks_matches_pinocchio_across_block_boundaries(arm):
    # frame_poses works through blocks of configurations (robot._FK_BLOCK); configurations
    # on either side of each boundary, and the batch's shape, must come out as pinocchio
    # computes them one at a time (reference), and equal to an unblocked computation.
    from pref_learner import robot as robot_mod
    rng = np.random.default_rng(2)
    blk = robot_mod._FK_BLOCK
    q = arm.random_configurations(2 * blk + 7, rng).reshape(1, 2 * blk + 7, -1)
    poses, (jp, _) = arm.frame_poses(q, ['tool_tip', 'link_4'], with_jacobian=True)
    assert poses.positions.shape == (1, 2 * blk + 7, 2, 3)
    for i in (0, blk - 1, blk, 2 * blk - 1, 2 * blk, 2 * blk + 6):
        p, r = arm.pin_frame_pose(q[0, i], 'tool_tip')
        np.testing.assert_allclose(poses.positions[0, i, 0], p, atol=1e-12)
        np.testing.assert_allclose(poses.rotations[0, i, 0], r, atol=1e-12)
        np.testing.assert_allclose(jp[0, i, 0], arm.pin_frame_jacobian(q[0, i], 'tool_tip')[:3],
                                   atol=1e-12)
    one = arm.frame_poses(q[0, blk - 3:blk + 3], ['tool_tip', 'link_4'])
    np.testing.assert_array_equal(one.positions, poses.positions[0, blk - 3:blk + 3])


@pytest.mark.parametrize('l1, l2', [(0.3, 0.25), (0.4, 0.1)])
def test_planar_two_link_closed_form(l1, l2):
    # Reference: Spong, Hutchinson & Vidyasagar, Robot Modeling and Control (2006),
    # ch. 3 (from memory): x = l1 c1 + l2 c12, y = l1 s1 + l2 s12.
    robot = RobotModel(TWO_LINK.format(l1=l1, l2=l2), tool_frame='tip')
    rng = np.random.default_rng(2)
    q = robot.random_configurations(200, rng)
    p = robot.frame_poses(q, ['tip']).positions[:, 0]
    x = l1 * np.cos(q[:, 0]) + l2 * np.cos(q.sum(1))
    y = l1 * np.sin(q[:, 0]) + l2 * np.sin(q.sum(1))
    np.testing.assert_allclose(p, np.stack([x, y, np.zeros_like(x)], 1), atol=1e-12)


def test_urdf_from_string_and_explicit_joint_order(arm):
    text = default_urdf_path().read_text()
    order = ['joint_3', 'joint_1', 'joint_2', 'joint_4', 'joint_5', 'joint_6', 'joint_7']
    r2 = RobotModel(text, joint_names=order)
    q = np.array([0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7])
    q2 = q[[2, 0, 1, 3, 4, 5, 6]]
    np.testing.assert_allclose(r2.frame_poses(q2, ['tool_tip']).positions,
                               arm.frame_poses(q, ['tool_tip']).positions, atol=1e-14)


def test_bad_urdf_and_joints(tmp_path):
    with pytest.raises(ValueError, match='does not parse'):
        RobotModel('<robot name="x"><link name="a"></robot>')
    with pytest.raises(ValueError, match='cannot be read'):
        RobotModel(tmp_path / 'missing.urdf')
    with pytest.raises(ValueError, match=r"joint_9.*movable joints"):
        RobotModel.default(joint_names=['joint_1', 'joint_9'])
    with pytest.raises(ValueError, match='tool frame'):
        RobotModel.default(tool_frame='wrist_camera')


def test_limits_refused_unless_clamped(arm):
    q = np.zeros(7)
    q[1] = 2.5
    with pytest.raises(ValueError, match=r'joint_2 = 2\.5 is outside its limits'):
        arm.frame_poses(q, ['tool_tip'])
    clamped = RobotModel.default(clamp=True)
    assert clamped.check_configurations(q)[1] == pytest.approx(1.9)
    with pytest.raises(ValueError, match='6 joint values'):
        arm.check_configurations(np.zeros(6))


def test_rep103_right_handed_frames_z_up_metres(arm):
    # REP 103 (SI units, right-handed frames, z up): rotations are proper (det = +1,
    # orthonormal); at the zero configuration the straight arm points up the +z axis by
    # the sum of its link offsets in metres (0.15 + 0.18 + 0.20 + 0.20 + 0.18 + 0.17 +
    # 0.10 + 0.05 + 0.10 = 1.33 m, from the URDF).
    rng = np.random.default_rng(8)
    r = arm.frame_poses(arm.random_configurations(100, rng), ['tool_tip']).rotations[:, 0]
    np.testing.assert_allclose(np.linalg.det(r), 1.0, atol=1e-12)
    np.testing.assert_allclose(r @ np.swapaxes(r, 1, 2), np.broadcast_to(np.eye(3), r.shape),
                               atol=1e-12)
    p = arm.frame_poses(np.zeros(7), ['tool_tip']).positions[0]
    np.testing.assert_allclose(p, [0.0, 0.0, 1.33], atol=1e-12)


def test_root_link_against_yourdfpy(arm, tmp_path):
    # Reference: yourdfpy's URDF.base_link (the link that is no joint's child).
    import yourdfpy
    u = yourdfpy.URDF.load(str(default_urdf_path()), load_meshes=False)
    assert arm.root_link == u.base_link
    # a root not called base_link, links listed child-first
    text = TWO_LINK.format(l1=0.3, l2=0.2).replace('base_link', 'bench_plate')
    text = text.replace('<link name="bench_plate"/>', '').replace(
        '<link name="tip"/>', '<link name="tip"/>\n  <link name="bench_plate"/>')
    (tmp_path / 'r.urdf').write_text(text)
    u = yourdfpy.URDF.load(str(tmp_path / 'r.urdf'), load_meshes=False)
    assert RobotModel(text, tool_frame='tip').root_link == u.base_link == 'bench_plate'
