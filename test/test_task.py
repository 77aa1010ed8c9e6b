# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The task record and task model, apart from the session; the second test robot."""

import argparse
import json
import xml.etree.ElementTree as ET
from dataclasses import fields, replace
from pathlib import Path

import numpy as np
import pytest
import yaml

from pref_learner.learner import (Learner, LearnerConfig, read_parameters_file,
                                  stored_session)
from pref_learner.task import TaskModel, TaskRecord, learning_hash, task_record

DATA = Path(__file__).with_name('data')
ARM6 = DATA / 'lift_arm6.urdf'
ARM6_FEATURES = DATA / 'lift_arm6_features.yaml'
ARM6_CFG = dict(urdf=str(ARM6), features=str(ARM6_FEATURES), tool_frame='tcp')


@pytest.fixture(scope='module')
def arm6_record():
    return task_record(LearnerConfig(n_alternatives=40, **ARM6_CFG))


def test_second_robot_is_what_its_urdf_says(arm6_record):
    # The reference is the URDF text itself, read with the standard library's XML parser:
    # the chain from the root to tcp, its joint types and the root link's name.
    root = ET.parse(ARM6).getroot()
    joints = {j.get('name'): j for j in root.findall('joint')}
    children = {j.find('child').get('link'): j for j in joints.values()}
    chain, link = [], 'tcp'
    while link in children:
        j = children[link]
        if j.get('type') != 'fixed':
            chain.append(j.get('name'))
        link = j.find('parent').get('link')
    chain.reverse()
    task = TaskModel.from_record(arm6_record)
    assert task.robot.joint_names == tuple(chain) == arm6_record.joint_names
    assert len(chain) == 6 and link == 'bench_plate' == task.robot.root_link
    assert task.robot.joint_types == tuple(joints[j].get('type') for j in chain)
    assert set(task.robot.joint_types) == {'prismatic', 'revolute', 'continuous'}
    assert not set(chain) & {f'joint_{i}' for i in range(1, 8)}       # not the bench arm's
    assert joints['jaw_b_slide'].find('mimic').get('joint') == 'jaw_a_slide'
    # the lift column moves the tool straight up by its travel (prismatic along z)
    q = np.zeros((1, 1, 6))
    q2 = q.copy()
    q2[..., 0] = 0.1
    p = [task.robot.frame_poses(x, ['tcp']).positions[0, 0, 0] for x in (q, q2)]
    np.testing.assert_allclose(p[1] - p[0], [0.0, 0.0, 0.1], atol=1e-12)
    # stretched straight up: plate 0.12 + carriage 0.08 + turret 0.06 + upper arm 0.25 +
    # forearm 0.22 + wrist 0.07 + tcp 0.12 = 0.92 m (sum of the URDF's joint origins)
    np.testing.assert_allclose(p[0], [0.0, 0.0, 0.92], atol=1e-12)


def test_record_round_trips_through_json_and_rejects_what_it_does_not_know(arm6_record):
    text = arm6_record.to_json()
    back = TaskRecord.from_json(text)
    assert back == arm6_record and back.to_json() == text
    d = json.loads(text)
    assert d['format'] == 1 and d['urdf'] == ARM6.read_text()
    assert d['features'] == ARM6_FEATURES.read_text() and len(d['scales']) == 3
    with pytest.raises(ValueError, match="unknown key"):
        TaskRecord.from_json(json.dumps(dict(d, colour='red')))
    with pytest.raises(ValueError, match="lacks"):
        TaskRecord.from_json(json.dumps({k: v for k, v in d.items() if k != 'scales'}))
    with pytest.raises(ValueError, match='format'):
        TaskRecord.from_json(json.dumps(dict(d, format=99)))
    with pytest.raises(ValueError, match='positive'):
        TaskRecord.from_json(json.dumps(dict(d, scales=[1.0, -1.0, 1.0])))
    with pytest.raises(ValueError, match='not JSON'):
        TaskRecord.from_json('{')


def test_scales_come_from_the_file_else_the_calibration(tmp_path, arm6_record):
    # A feature file with scales: they are used as written (no calibration).
    spec = ARM6_FEATURES.read_text() + '\nscales: [0.5, 0.25, 2.0]\n'
    f = tmp_path / 'scaled.yaml'
    f.write_text(spec)
    rec = task_record(LearnerConfig(**dict(ARM6_CFG, features=str(f))))
    assert rec.scales == (0.5, 0.25, 2.0)
    # Calibrated: the standard deviation of each raw feature over smooth paths of the
    # tasks at the middle option spread (numpy's std over the same rows, computed here
    # from the sampler's draws).
    task = TaskModel.from_record(arm6_record)
    from pref_learner.alternatives import AlternativeSampler, SamplerConfig
    r = arm6_record
    sampler = AlternativeSampler(task.robot, r.n_waypoints,
                                 SamplerConfig(r.n_calibration, {'smooth': 1.0},
                                               (task.sampler_config.noise_scale,)))
    rng = np.random.default_rng(r.calibration_seed)
    rows = np.concatenate([task.features.raw(task.condition(task.retime(
        sampler.sample(s, g, rng, m=r.n_calibration)[0]))) for _, s, g in task.tasks()])
    np.testing.assert_allclose(r.scales, rows.std(axis=0), rtol=1e-12)
    # explicit scales win
    assert task_record(LearnerConfig(**ARM6_CFG), scales=[1, 2, 3]).scales == (1.0, 2.0, 3.0)


def test_task_model_scores_as_the_learner_does(arm6_record):
    cfg = LearnerConfig(n_particles=50, n_alternatives=40, **ARM6_CFG)
    L = Learner(cfg)
    task = TaskModel.from_record(TaskRecord.from_json(L.record.to_json()))
    assert L.record == arm6_record
    rng = np.random.default_rng(0)
    q = task.robot.random_configurations(2 * 64, rng, margin=0.2).reshape(2, 64, 6)
    np.testing.assert_array_equal(task.features(q), L.features(q))
    # the same choice set, bit for bit, from the same seed
    a = L.task.choice_set(q[0], np.random.default_rng(5))
    b = task.choice_set(q[0], np.random.default_rng(5))
    for x, y in zip(a, b):
        np.testing.assert_array_equal(x, y)
    # a session started from a task model has the learning hash of one built from config
    L2 = Learner(LearnerConfig(n_particles=50), task=task)
    assert L2.hash == L.hash == learning_hash(L.config, L.record)
    assert L2.config.n_alternatives == 40                  # the record's settings apply


def test_level_evidence_follows_the_records_option_density(arm6_record):
    # The default evidence (modes) gets each row's three lowest sine-mode coefficients of
    # its deviation, ``deviation`` their RMS (alternatives.path_modes / path_deviation).
    # On the orthonormal sine basis the modes hold part of the deviation's energy, never
    # more (Bessel's inequality, common practice): sum of squares <= T x RMS^2.
    from pref_learner.alternatives import path_deviation, path_modes
    task = TaskModel.from_record(arm6_record)
    assert arm6_record.option_density == 'modes'
    rng = np.random.default_rng(6)
    q = task.robot.random_configurations(2 * 64, rng, margin=0.2).reshape(2, 64, 6)
    allq, _, _ = task.choice_set(q[0], np.random.default_rng(5))
    modes = task.path_deviation(allq)
    np.testing.assert_array_equal(modes, path_modes(allq, task.sampler.span))
    assert modes.shape == (len(allq), 3, 6)
    rms = TaskModel.from_record(arm6_record.with_settings(option_density='deviation')
                                ).path_deviation(allq)
    np.testing.assert_array_equal(rms, path_deviation(allq, task.sampler.span))
    assert np.all(np.sum(modes ** 2, axis=(1, 2)) <= 64 * rms ** 2 * (1 + 1e-12))


def test_state_dir_stores_the_record_and_reopens_without_calibrating(tmp_path, monkeypatch):
    from pref_learner.sim import SimulatedTeacher, TeacherConfig
    state = tmp_path / 'state'
    cfg = LearnerConfig(n_particles=200, n_alternatives=40, state_dir=str(state), seed=3,
                        **ARM6_CFG)
    L = Learner(cfg)
    SimulatedTeacher(L, [-0.6, 0.5, -0.6], TeacherConfig(seed=2, duration=1.0,
                                                         n_candidates=40)).feed_session(L, 2)
    assert L.n_demonstrations == 2
    stored = TaskRecord.from_json((state / 'task.json').read_text())
    assert stored == L.record
    manifest = json.loads((state / 'manifest.json').read_text())
    assert manifest['task_record'] == 'task.json' and manifest['learning_hash'] == L.hash

    def no_calibration(self):
        raise AssertionError('a stored session must not recalibrate')
    monkeypatch.setattr(TaskModel, 'calibrate', no_calibration)
    again = Learner(cfg)
    assert again.record == L.record and any('loaded state' in m for m in again.messages)
    np.testing.assert_array_equal(again.summaries()['less'].mean, L.summaries()['less'].mean)
    # opened from the directory alone: its record gives robot, features and scales
    opened = Learner.open(state)
    assert opened.robot.joint_names == L.robot.joint_names and opened.record == L.record
    np.testing.assert_array_equal(opened.summaries()['less'].mean, L.summaries()['less'].mean)
    cfg2, rec2 = stored_session(state, n_particles=7)
    assert rec2 == L.record and cfg2.n_particles == 7 and cfg2.seed == 3
    # replaying from the stored record under another seed-free setting reproduces it
    replayed = Learner(replace(cfg, state_dir=''), task=opened.task)
    for d in L.demonstrations:
        replayed.process(d)
    np.testing.assert_array_equal(replayed.summaries()['less'].mean, L.summaries()['less'].mean)


def test_parameters_file_of_the_node(tmp_path):
    # The ROS 2 parameters file layout (node name, ros__parameters; '/**' for every node),
    # as in launch/pref_learner_params.yaml; the node's own section wins over '/**'.
    (tmp_path / 'arm.urdf').write_text(ARM6.read_text())
    p = tmp_path / 'params.yaml'
    p.write_text(f"""
/**:
  ros__parameters:
    n_particles: 100
    seed: 9
pref_learner:
  ros__parameters:
    urdf: arm.urdf
    features: {ARM6_FEATURES}
    tool_frame: tcp
    joint_names: ['']
    n_particles: 300
    record_bag: /tmp/x
    max_stamp_skew: 2.0
    robot_description_topic: ''
""")
    settings, node_only = read_parameters_file(p)
    assert settings['n_particles'] == 300 and settings['seed'] == 9
    assert settings['urdf'] == str((tmp_path / 'arm.urdf').resolve())   # relative to the file
    assert settings['joint_names'] == () and settings['tool_frame'] == 'tcp'
    assert node_only == {'record_bag': '/tmp/x', 'max_stamp_skew': 2.0,
                         'robot_description_topic': ''}
    from pref_learner.cli import session_config
    args = argparse.Namespace(params_file=str(p), model=None, particles=None,
                              alternatives=50, seed=None, beta=None, urdf=None,
                              features=None, tool_frame=None, joints=None)
    cfg, _ = session_config(args, 'out')
    assert (cfg.n_particles, cfg.n_alternatives, cfg.seed, cfg.model) == (300, 50, 9, 'less')
    assert cfg.state_dir == 'out' and cfg.tool_frame == 'tcp'
    # without a parameters file the command's own defaults (both models)
    args = argparse.Namespace(params_file=None, model=None, particles=None, alternatives=None,
                              seed=None, beta=2.0, urdf=str(ARM6), features=None,
                              tool_frame='tcp', joints=['column_lift', 'turret_yaw'])
    cfg, _ = session_config(args)
    assert cfg.model == 'both' and cfg.beta_min == 0.0 and cfg.beta == 2.0
    assert cfg.joint_names == ('column_lift', 'turret_yaw') and cfg.urdf == str(ARM6)
    p.write_text('pref_learner:\n  ros__parameters:\n    colour: red\n')
    with pytest.raises(ValueError, match="'colour' is not a parameter"):
        read_parameters_file(p)


def test_the_shipped_parameters_file_is_read_whole_by_learn():
    # `learn --params-file` takes the node's shipped parameters file as it is (README; the
    # study's reading of it: test_study); every parameter the node declares is a learner
    # setting or node-only
    from pref_learner.learner import NODE_ONLY
    from pref_learner.ros.learner_node import _PARAMS
    shipped = Path(__file__).resolve().parents[1] / 'launch' / 'pref_learner_params.yaml'
    settings, node_only = read_parameters_file(shipped)
    keys = set(yaml.safe_load(shipped.read_text())['/**']['ros__parameters'])
    assert keys == set(settings) | set(node_only)
    assert node_only['choice_jobs'] == 1 and settings['n_particles'] == 4000
    learner_fields = {f.name for f in fields(LearnerConfig)}
    assert set(_PARAMS) <= learner_fields | set(NODE_ONLY)


def test_simulated_teacher_holds_the_other_joints_of_any_robot(arm6_record):
    from pref_learner.ros.teacher_node import other_joints
    task = TaskModel.from_record(arm6_record)
    # the mimic jaw follows its leader and is not published; the leader is held at 0.01 m
    assert other_joints(task.robot) == [('jaw_a_slide', 0.01)]
    bench = TaskModel.from_config(LearnerConfig(n_alternatives=1))
    assert other_joints(bench.robot) == [('finger_left_joint', 0.01),
                                         ('finger_right_joint', 0.01)]


def test_random_configurations_keep_a_margin_on_short_axes(arm6_record):
    # A 0.2 m lift column is shorter than twice the 0.2 margin the tasks of a user robot
    # use: the margin shrinks to a quarter of such a range instead of inverting it
    # (common practice: keep samples off the limits, never outside them).
    task = TaskModel.from_record(arm6_record)
    q = task.robot.random_configurations(500, np.random.default_rng(1), margin=0.2)
    assert q.shape == (500, 6)
    assert np.all(q[:, 0] >= 0.05) and np.all(q[:, 0] <= 0.15)
    lo, hi = task.robot.lower[1:5], task.robot.upper[1:5]
    assert np.all(q[:, 1:5] >= lo + 0.2) and np.all(q[:, 1:5] <= hi - 0.2)
    assert np.all(np.abs(q[:, 5]) <= np.pi)                 # the continuous wrist
    assert len(task.tasks()) == 4 and all(t[0].startswith('random_') for t in task.tasks())


def test_choice_sets_are_the_same_in_pieces_with_helper_processes_and_after_one_dies():
    # Reference: the whole set finished at once (retimed, conditioned with the
    # demonstration's row, featurised), as before the pieces. The pieces are the same
    # whoever finishes them; a helper process that dies is stopped, its pieces are
    # finished in the caller's thread, nothing is lost.
    import os
    import signal
    from pref_learner.helpers import ChoiceHelpers
    from pref_learner.task import CHOICE_CHUNK
    base = Learner(LearnerConfig(n_alternatives=8)).task
    _, start, goal = base.tasks()[0]
    q = base.retime(base.sampler.straight(start, goal)[None])[0]
    sizes = (100, 2 * CHOICE_CHUNK - 1, 2 * CHOICE_CHUNK + 40)   # one piece, exact, three
    tasks = [TaskModel.from_record(replace(base.record, n_alternatives=m)) for m in sizes]
    alone = []
    for task, m in zip(tasks, sizes):
        got = task.choice_set(q, np.random.default_rng(m))
        raw, groups = task.sampler.sample(q[0], q[-1], np.random.default_rng(m), demo=q)
        whole = task.condition(np.concatenate([q[None], task.retime(raw)]))
        np.testing.assert_allclose(got[0], whole, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(got[1], task.features(whole), rtol=1e-12, atol=1e-12)
        np.testing.assert_array_equal(got[2], np.concatenate([[-1], groups]))
        assert got[0].shape[0] == got[1].shape[0] == m + 1
        alone.append(got)
    task = tasks[-1]
    helpers = ChoiceHelpers(task.record, 2).start()
    try:
        for a, b in zip(alone[-1], task.choice_set(q, np.random.default_rng(sizes[-1]),
                                                   helpers=helpers)):
            np.testing.assert_array_equal(a, b)
        for pid in list(helpers._pool._processes):
            os.kill(pid, signal.SIGKILL)
        after = task.choice_set(q, np.random.default_rng(sizes[-1]), helpers=helpers)
        for a, b in zip(alone[-1], after):
            np.testing.assert_array_equal(a, b)
        assert not helpers.running and 'BrokenProcessPool' in helpers.error
    finally:
        helpers.close()
