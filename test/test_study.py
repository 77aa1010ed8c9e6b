# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""A user study of simulated participants: local processes and a Dask cluster, bad sessions.

Two kinds of person (true weights +v and -v, v a random unit vector of the
learner's feature count, so any scenario works; the bench's generator) teach a
few demonstrations each; their sessions are state directories and a bag, one
person twice (as a bag and as a state directory), next to a corrupt bag, a
session without an accepted demonstration, a bag of another robot and a
folder that is no session. The study runs through the command line once on
one local worker and once on a dask.distributed LocalCluster of two worker
processes on 127.0.0.1.
"""

import json
import math
import shutil
import subprocess
import sys

import numpy as np
import pytest

from pref_learner.learner import Learner, LearnerConfig
from pref_learner.safety import CAUTION
from pref_learner.sim import SimulatedTeacher, TeacherConfig, write_simulated_session

pq = pytest.importorskip('pyarrow.parquet')
distributed = pytest.importorskip('distributed')

CLI = [sys.executable, '-m', 'pref_learner.cli']
N_DEMOS = 4
# small sessions: one fixed option spread, since 60 alternatives in three inferred levels
# leave 20 per level (too few for the level evidence's density estimate)
PARAMS = ('n_particles: 300\nn_alternatives: 60\nspreads: [0.08]\nseed: 3\nstudy:\n'
          '  group_angle: 60\n')


@pytest.fixture(scope='module')
def folder(tmp_path_factory):
    """Return (root, people): participant -> (truth, kind of person 'A' or 'B')."""
    from pref_learner.bench import simulated_study_folder
    root = tmp_path_factory.mktemp('study')
    sessions = root / 'sessions'
    # p00..p05, kinds A (+v) and B (-v) alternating; p03 is a bag, the others state dirs
    truths = simulated_study_folder(sessions, n_per_kind=3, n_demonstrations=N_DEMOS)
    v = truths[0]
    people = {f'p{i:02d}': (t, 'A' if t @ v > 0 else 'B') for i, t in enumerate(truths)}
    # the same person as p03's bag, stored as a state directory
    base = Learner(LearnerConfig(model='less', n_particles=1, n_alternatives=1))
    write_simulated_session(sessions / 'p03_state', truths[3], N_DEMOS,
                            TeacherConfig(seed=103, beta=10.0), kind='state_dir', learner=base)
    people['p03_state'] = (truths[3], people['p03'][1])
    # a bag whose data were damaged on disk
    shutil.copytree(sessions / 'p03', sessions / 'z_corrupt_bag')
    for f in (sessions / 'z_corrupt_bag').glob('*.mcap'):
        data = f.read_bytes()
        f.write_bytes(data[:64] + b'\x00' * 4096 + data[len(data) // 2:])
    # a session where the only demonstration was rejected (one sample)
    e = Learner(LearnerConfig(model='less', n_particles=1, n_alternatives=1,
                              state_dir=str(sessions / 'z_empty')), scales=base.features.scales)
    e.set_teaching(True)
    e.feed(1, e.robot.joint_names, np.zeros(e.robot.n))
    e.set_teaching(False)
    e.save()
    # another robot's joint names
    SimulatedTeacher(base, v, TeacherConfig(seed=5)).write_bag(
        sessions / 'z_other_robot', 2, joint_names=[f'other_{j}' for j in range(e.robot.n)])
    # a state directory whose stored demonstrations name another robot's joints
    from pref_learner.store import npz_bytes, read_npz
    shutil.copytree(sessions / 'p00', sessions / 'z_other_robot_state')
    for f in (sessions / 'z_other_robot_state' / 'demos').glob('*.npz'):
        arrays = read_npz(f)
        arrays['joint_names'] = np.array([f'other_{j}' for j in range(e.robot.n)])
        f.write_bytes(npz_bytes(arrays))
    (sessions / 'z_not_a_session').mkdir()
    (root / 'params.yaml').write_text(PARAMS)
    return root, people


def _study(root, out, *extra):
    return subprocess.run(CLI + ['study', str(root / 'sessions'), '--params',
                                 str(root / 'params.yaml'), '--out', str(out), *extra],
                          capture_output=True, text=True, timeout=600)


@pytest.fixture(scope='module')
def cluster():
    from distributed import LocalCluster
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host='127.0.0.1',
                      dashboard_address=None) as c:
        yield c


@pytest.fixture(scope='module')
def runs(folder, cluster):
    root, people = folder
    local = _study(root, root / 'out_local', '--workers', '1')
    dask = _study(root, root / 'out_dask', '--scheduler', cluster.scheduler_address)
    return root, people, local, dask


def test_tables_identical_locally_and_on_dask(runs):
    # Bit for bit: pyarrow's Table.equals, then every column through pandas with the
    # float64 values compared as their 64-bit patterns (NaN-safe).
    root, _, local, dask = runs
    assert local.returncode == 0, local.stderr[-3000:]
    assert dask.returncode == 0, dask.stderr[-3000:]
    assert 'Dask scheduler tcp://127.0.0.1:' in dask.stdout
    for name in ('participants', 'demonstrations'):
        a = pq.read_table(root / 'out_local' / f'{name}.parquet')
        b = pq.read_table(root / 'out_dask' / f'{name}.parquet')
        assert a.schema == b.schema and a.num_rows == b.num_rows > 0
        assert a.equals(b), name
        da, db = a.to_pandas(), b.to_pandas()
        for col in da.columns:
            x, y = da[col].to_numpy(), db[col].to_numpy()
            if x.dtype == np.float64:
                np.testing.assert_array_equal(x.view(np.int64), y.view(np.int64), err_msg=col)
            else:
                assert list(x) == list(y), col


def test_population_recovers_the_two_kinds_of_person(runs):
    # Reference: the simulation's own truth (which kind each participant is), and plain
    # numpy for the directional statistics (mean direction = normalised sum of unit
    # vectors, mean resultant length = |sum| / n; Mardia & Jupp 2000, from memory).
    root, people, local, _ = runs
    summary = json.loads((root / 'out_local' / 'summary.json').read_text())
    table = pq.read_table(root / 'out_local' / 'participants.parquet').to_pandas()
    ok = table[table.status == 'ok'].set_index('participant')
    assert sorted(ok.index) == sorted(people)
    kind = {p: people[p][1] for p in people}
    names = summary['feature_names']
    v = people['p00'][0]
    for m in ('boltzmann', 'less'):
        pop = summary['population'][m]
        groups = {frozenset(g['members']) for g in pop['groups']}
        truth = {frozenset(p for p in kind if kind[p] == k) for k in 'AB'}
        assert groups == truth, (m, groups)
        assert pop['stands_apart'] == []
        for g in pop['groups']:
            k = kind[g['members'][0]]
            gm = np.array([g['mean_direction'][f] for f in names])
            # each group's mean direction lies nearer its own truth than the other's (measured
            # cosines to their own truth 0.47-0.85 on the shipped scenario)
            own = v if k == 'A' else -v
            assert gm @ own > 0.25 and gm @ own > gm @ -own, (m, k, gm @ own)
        u = ok[[f'{m}_mean__{f}' for f in names]].to_numpy()
        u = u / np.linalg.norm(u, axis=1, keepdims=True)
        s = u.sum(axis=0)
        np.testing.assert_allclose([pop['mean_direction'][f] for f in names],
                                   s / np.linalg.norm(s), atol=1e-12)
        assert pop['mean_resultant_length'] == pytest.approx(np.linalg.norm(s) / len(u),
                                                             abs=1e-12)
        q = np.quantile(u, [0.05, 0.5, 0.95], axis=0)      # numpy's default (linear) rule
        for k, key in enumerate(('0.05', '0.5', '0.95')):
            np.testing.assert_allclose([pop['quantiles'][key][f] for f in names], q[k],
                                       atol=1e-12)
        np.testing.assert_allclose(ok[f'{m}_cosine_to_population'].to_numpy(),
                                   u @ (s / np.linalg.norm(s)), atol=1e-12)
        assert not ok[f'{m}_stands_apart'].any()
    assert sum(summary['verdict_counts'].values()) == len(ok)


def test_bad_sessions_are_reported_per_participant(runs):
    root, people, local, _ = runs
    table = pq.read_table(root / 'out_local' / 'participants.parquet').to_pandas()
    rows = table.set_index('participant')
    assert rows.loc['z_corrupt_bag', 'status'] == 'failed'
    assert rows.loc['z_corrupt_bag', 'reason'].startswith('corrupt')
    assert rows.loc['z_empty', 'reason'] == 'no accepted demonstration (1 rejected: too_short)'
    wrong = rows.loc['z_other_robot', 'reason']
    assert wrong.startswith("wrong robot: the bag's joint states name ['other_0'"), wrong
    wrong = rows.loc['z_other_robot_state', 'reason']
    assert wrong.startswith("wrong robot: the stored demonstrations name the joints "
                            "['other_0'"), wrong
    assert rows.loc['z_other_robot_state', 'n_rejected'] == N_DEMOS
    assert rows.loc['z_not_a_session', 'reason'].startswith('not a session')
    good = rows[~rows.index.str.startswith('z_')]
    assert (good.status == 'ok').all() and (good.n_accepted == N_DEMOS).all()
    assert (good.n_rejected == 0).all()
    # every failure on the terminal and in the report, with its reason
    html = (root / 'out_local' / 'report.html').read_text()
    for p in ('z_corrupt_bag', 'z_empty', 'z_other_robot', 'z_other_robot_state',
              'z_not_a_session'):
        assert p in local.stdout and p in html
    demos = pq.read_table(root / 'out_local' / 'demonstrations.parquet').to_pandas()
    rej = demos[demos.participant == 'z_empty']
    assert list(rej.status) == ['rejected'] and list(rej.origin) == ['session']
    assert len(demos[demos.status == 'accepted']) == N_DEMOS * len(good)


def test_a_bag_and_a_state_directory_of_one_session_agree(folder):
    # The bag path (segmentation of the recorded stream) must give the demonstrations the
    # simulated teacher fed straight to a learner: with one seed, the same results.
    from pref_learner.study import ParticipantTask, analyse_participant
    root, _ = folder
    res = [analyse_participant(ParticipantTask(name, str(root / 'sessions' / name),
                                               {'n_particles': 200, 'n_alternatives': 40},
                                               seed=11))
           for name in ('p03', 'p03_state')]
    assert [r['kind'] for r in res] == ['bag', 'state_dir']
    assert res[0]['estimates'] == res[1]['estimates'] and res[0]['estimates']
    assert res[0]['comparison'] == res[1]['comparison']
    assert [d['duration_s'] for d in res[0]['demonstrations']] == \
        [d['duration_s'] for d in res[1]['demonstrations']]


def test_each_participant_has_a_seed_of_their_own(runs):
    # Reference: hashlib's SHA-256 of "<study seed>/<name>", first 4 bytes little-endian.
    import hashlib
    root, *_ = runs
    t = pq.read_table(root / 'out_local' / 'participants.parquet').to_pandas()
    for name, seed in zip(t.participant, t.seed):
        h = hashlib.sha256(f'3/{name}'.encode()).digest()
        assert seed == int.from_bytes(h[:4], 'little')
    assert t.seed.nunique() == len(t)


def test_verdicts_follow_a_paired_t_test_on_the_leave_one_out_scores(runs):
    # Reference: scipy.stats.ttest_rel (Student's paired t) on the per-demonstration
    # leave-one-out scores of the two models; a model is named only past the 95 % quantile.
    from scipy import stats
    root, *_ = runs
    parts = pq.read_table(root / 'out_local' / 'participants.parquet').to_pandas()
    demos = pq.read_table(root / 'out_local' / 'demonstrations.parquet').to_pandas()
    for _, p in parts[parts.status == 'ok'].iterrows():
        d = demos[(demos.participant == p.participant) & (demos.status == 'accepted')]
        res = stats.ttest_rel(d.loo_less, d.loo_boltzmann)
        assert p.verdict_t == pytest.approx(res.statistic, rel=1e-9)
        crit = stats.t.ppf(0.975, len(d) - 1)
        want = 'cannot tell' if abs(res.statistic) < crit else \
            ('less' if res.statistic > 0 else 'boltzmann')
        assert p.verdict == want
        for m in ('less', 'boltzmann'):
            assert p[f'{m}_loo_total'] == pytest.approx(d[f'loo_{m}'].sum(), rel=1e-12)


def test_the_report_carries_the_caution(runs):
    from PIL import Image
    root, _, local, _ = runs
    out = root / 'out_local'
    html = (out / 'report.html').read_text()
    import html as h
    assert html.index('id="caution"') < html.index('<h1>') and h.escape(CAUTION) in html
    pngs = sorted(out.glob('*.png'))
    assert {p.name for p in pngs} == {'population_weights.png', 'directions.png',
                                      'verdicts.png'}
    for p in pngs:
        assert Image.open(p).text['Description'] == CAUTION
        assert f'src="{p.name}"' in html
    assert local.stdout.startswith(CAUTION)
    summary = json.loads((out / 'summary.json').read_text())
    assert summary['caution'] == CAUTION
    assert any(n.startswith('URDF: the shipped bench arm') for n in summary['notes'])


def test_calibration_study_gives_the_same_runs_on_dask(cluster):
    from pref_learner import validate
    kw = dict(n_truths=2, n_demos=2, n_particles=200, n_alternatives=40,
              conditions=('matched',))
    local = validate.study_calibration(n_jobs=1, **kw)
    dask = validate.study_calibration(scheduler=cluster.scheduler_address, **kw)
    assert local == dask


def test_local_executor_keeps_input_order_and_reports_a_lost_worker():
    import os

    from pref_learner.study import TaskFailure, run_tasks
    xs = [9.0, 1.0, 4.0, 16.0, 0.25]
    assert run_tasks(math.sqrt, xs, workers=2) == [math.sqrt(x) for x in xs]
    out = run_tasks(os._exit, [3], workers=1)          # the worker dies mid-task
    assert len(out) == 1 and isinstance(out[0], TaskFailure)


def test_parameters_files(tmp_path):
    from pathlib import Path

    from pref_learner.study import load_settings
    launch = Path(__file__).resolve().parents[1] / 'launch' / 'pref_learner_params.yaml'
    s = load_settings(launch)                        # the node's own parameters file
    assert s.learner['n_particles'] == 4000 and s.learner['joint_names'] == ()
    assert any('record_bag' in n for n in s.notes)
    from pref_learner.features import default_features_path
    (tmp_path / 'sub').mkdir()
    shutil.copy(default_features_path(), tmp_path / 'sub' / 'scenario.yaml')
    (tmp_path / 'sub' / 'p.yaml').write_text('features: scenario.yaml\nmodel: less\n')
    s = load_settings(tmp_path / 'sub' / 'p.yaml')    # relative to the parameters file
    assert s.learner['features'] == str((tmp_path / 'sub' / 'scenario.yaml').resolve())
    assert any(n.startswith('features: from the parameters file') for n in s.notes)
    assert any(n.startswith('model: both choice models') for n in s.notes)
    bad = tmp_path / 'bad.yaml'
    bad.write_text('n_particle: 10\n')
    with pytest.raises(ValueError, match="'n_particle' is not a learner setting"):
        load_settings(bad)
    bad.write_text('study:\n  group_angel: 30\n')
    with pytest.raises(ValueError, match='study.group_angel is unknown'):
        load_settings(bad)
    r = subprocess.run(CLI + ['study', str(tmp_path), '--params', str(bad), '--out',
                              str(tmp_path / 'o')], capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and r.stderr.count('\n') == 1, r.stderr


def test_a_folder_name_that_is_not_utf8_is_a_participant_like_any_other(tmp_path):
    # Linux file names are bytes: an old system's Latin-1 name must not stop the study
    import os

    from pref_learner.study import find_sessions, participant_seed
    os.mkdir(os.path.join(os.fsencode(tmp_path), b'm\xfcller'))
    (tmp_path / 'ok').mkdir()
    found = dict(find_sessions(tmp_path))
    assert set(found) == {'m\\xfcller', 'ok'}               # shown with the byte escaped
    assert found['m\\xfcller'].is_dir()                      # and still read from disk
    assert participant_seed(0, 'm\\xfcller') != participant_seed(0, 'ok')
    assert participant_seed(0, "ok") == 1886515590            # UTF-8 names keep their seeds
