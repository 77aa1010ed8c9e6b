# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Benchmarks behind ``pref-learner bench --json PATH`` (flat JSON of figures).

Defaults of the learner (LearnerConfig): shipped 7-DoF arm, T = 64, d = 6, M = 500, N = 4,000.
Node figures start a real learner node in a subprocess and talk to it over
DDS on this machine. Nothing here is a pass/fail test; the figures are for
people to read. With ``--json PATH`` the planner group also writes
``plan_convergence.png`` next to it (exact cost against wall time and
iterations, ours against L-BFGS-B on the raw waypoints).
"""

from __future__ import annotations

import os
import random
import subprocess
import sys
import time
from typing import Callable, Dict, List

import numpy as np


def _median_ms(fn: Callable, reps: int) -> float:
    ts = []
    for _ in range(reps):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return float(np.median(ts) * 1e3)


def _slope(xs, ys) -> float:
    return float(np.polyfit(np.log(xs), np.log(ys), 1)[0])


def core_benchmarks(quick: bool = False) -> Dict[str, float]:
    import pinocchio as pin

    from .demonstrations import Recorder, SegmentConfig
    from .features import load_scenario
    from .learner import Learner, LearnerConfig
    from .posterior import ParticlePosterior, PosteriorConfig
    from .sim import SimulatedTeacher, TeacherConfig
    out: Dict[str, float] = {}
    L = Learner(LearnerConfig(model='less'))
    # a person on the learner's waypoint count, so paths enter choice_set as they are
    teacher = SimulatedTeacher(L, load_scenario()['example_preference'],
                               TeacherConfig(n_waypoints=0))
    from .validate import scenario_correlation
    sc = scenario_correlation(L)
    out['feature_max_abs_correlation'] = sc['feature_max_abs_correlation']
    out['scenario_tasks'] = sc['n_tasks']
    n_sets = 8 if quick else 12
    sets, qs = [], []
    for k in range(n_sets):
        _, path = teacher.choose(k)
        allq, f, groups = L.choice_set(path, k)
        sets.append((f, 0, groups))
        qs.append(allq)

    # --- posterior updates (issue: inference core)
    for model in ('boltzmann', 'less'):
        upd, mov, acc, steps = [], [], [], []
        for seed in range(2 if quick else 4):
            rng = np.random.default_rng(seed)
            post = ParticlePosterior.create(L.config.posterior_config(model), 6, rng)
            for rec in sets:
                t = time.perf_counter()
                post, info = post.update(rec, rng, move=False)
                upd.append(time.perf_counter() - t)
                steps.append(info.tempering_steps)
                t = time.perf_counter()
                post, a = post.rejuvenate(rng)
                mov.append(time.perf_counter() - t)
                acc += [x for x in (info.acceptance, a) if np.isfinite(x)]
        tot = np.array(upd) + np.array(mov)
        out[f'posterior_move_acceptance_{model}'] = float(np.mean(acc)) if acc else float('nan')
        out[f'posterior_tempering_steps_mean_{model}'] = float(np.mean(steps))
        out[f'posterior_tempering_steps_first_{model}'] = float(steps[0])
        out[f'posterior_update_ms_p95_{model}'] = float(np.percentile(upd, 95) * 1e3)
        out[f'posterior_update_ms_median_{model}'] = float(np.median(upd) * 1e3)
        out[f'posterior_rejuvenation_ms_p95_{model}'] = float(np.percentile(mov, 95) * 1e3)
        out[f'posterior_update_with_moves_ms_p95_{model}'] = float(np.percentile(tot, 95) * 1e3)

    rng = np.random.default_rng(0)
    cfg = dict(model='less', ess_min_ratio=0.0)
    f0 = sets[0][0]
    reps = 5 if quick else 15

    def update_ms(n_particles, features):
        post = ParticlePosterior.create(PosteriorConfig(n_particles=n_particles, **cfg), 6, rng)
        rec = post.prepare(features, 0)
        return _median_ms(lambda: post.update(rec, rng), reps)
    ns = [1000, 2000, 4000, 8000]
    out['posterior_update_scaling_exponent_particles'] = _slope(
        ns, [update_ms(n, f0) for n in ns])
    ms = [125, 250, 500, 1000]
    out['posterior_update_scaling_exponent_alternatives'] = _slope(
        ms, [update_ms(4000, rng.normal(size=(m + 1, 6))) for m in ms])

    # --- features and kinematics (issue: robot model and features)
    q = qs[0][1:]
    out['features_ms'] = _median_ms(lambda: L.features.raw(q), reps)
    robot = L.robot
    qp = robot.to_pinocchio(q[0, 10])
    n_fk = 20000
    t = time.perf_counter()
    for _ in range(n_fk):
        pin.forwardKinematics(robot.model, robot.data, qp)
    fk_us = (time.perf_counter() - t) / n_fk * 1e6
    out['pinocchio_fk_us'] = fk_us
    per_wp_us = out['features_ms'] * 1e3 / (q.shape[0] * q.shape[1])
    out['features_us_per_waypoint'] = per_wp_us
    out['features_fk_ratio'] = per_wp_us / fk_us

    # --- alternatives (issue: demonstrations and alternative sets)
    _, path = teacher.choose(0)
    out['alternatives_ms'] = _median_ms(lambda: L.choice_set(path, 0), reps)
    # the opt-in option levels: four spreads plus a near-optimal level of 20 %
    Ln = Learner(LearnerConfig(model='less', spreads=(0.02, 0.04, 0.08, 0.16),
                               mix_smooth=0.8, mix_near_optimal=0.2))
    out['alternatives_ms_option_levels'] = _median_ms(lambda: Ln.choice_set(path, 0), reps)
    rec = Recorder(robot.joint_names, SegmentConfig(mode='motion'))
    names = list(robot.joint_names) + ['finger_left_joint', 'finger_right_joint']
    n = 20000 if quick else 100000
    data = np.random.default_rng(1).normal(0, 1e-3, (n, 9))
    t = time.perf_counter()
    for i in range(n):
        rec.feed(i * 1_000_000, names, data[i])
    out['segmentation_us_per_sample'] = (time.perf_counter() - t) / n * 1e6
    return out


def guidance_benchmarks(quick: bool = False) -> Dict[str, float]:
    """Time to score 20 candidate tasks (N 4,000, M 500) and the guided-teaching study.

    ``next_task_ms``: median over repetitions of scoring 20 tasks (the
    scenario's and random in-limit ones) after two demonstrations, with
    every task's option set already built (the node builds each once and
    reuses it); ``next_task_first_ms`` includes building the 20 sets.
    The study runs at the smaller sizes of ``validate.GUIDANCE_SIZES``.
    """
    from .features import load_scenario
    from .guidance import TaskGuide
    from .learner import Learner, LearnerConfig
    from .sim import SimulatedTeacher, TeacherConfig
    from .validate import GUIDANCE_SIZES, study_guidance
    out: Dict[str, float] = {}
    L = Learner(LearnerConfig(model='less'))
    SimulatedTeacher(L, load_scenario()['example_preference'],
                     TeacherConfig()).feed_session(L, 2)
    tasks = list(L.tasks())[:20]
    qs = L.robot.random_configurations(2 * (20 - len(tasks)), np.random.default_rng(5),
                                       margin=0.2)
    tasks += [(f'random_{i}', qs[2 * i], qs[2 * i + 1]) for i in range(20 - len(tasks))]
    guide = TaskGuide(L)
    t = time.perf_counter()
    guide.score(tasks)
    out['next_task_first_ms'] = (time.perf_counter() - t) * 1e3
    out['next_task_ms'] = _median_ms(lambda: guide.score(tasks), 3 if quick else 9)
    t = time.perf_counter()
    r = study_guidance(n_truths=8 if quick else 24, n_demos=10,
                       n_jobs=min(2, os.cpu_count() or 1), **GUIDANCE_SIZES)
    out.update(r['figures'])
    out['guidance_study_wall_s'] = time.perf_counter() - t
    return out


def demo_benchmark(quick: bool = False) -> Dict[str, float]:
    import tempfile
    t = time.perf_counter()
    with tempfile.TemporaryDirectory() as d:
        args = [sys.executable, '-m', 'pref_learner.cli', 'demo', '--out', d]
        if quick:
            args += ['--demonstrations', '3']
        r = subprocess.run(args, capture_output=True, text=True)
    return {'demo_wall_s': time.perf_counter() - t, 'demo_exit_code': r.returncode}


def simulated_study_folder(folder, n_per_kind: int = 8, n_demonstrations: int = 6,
                           seed: int = 17) -> List[np.ndarray]:
    """Write a study of two kinds of person (truths +v and -v) into ``folder``.

    Participant i is ``p<i>``: a state directory, every fourth one a bag; returns
    the true weights in participant order. ``v`` is a random unit vector of the
    learner's feature count (any scenario).
    """
    from pathlib import Path

    from .learner import Learner, LearnerConfig
    from .sim import TeacherConfig, write_simulated_session
    folder = Path(folder)
    base = Learner(LearnerConfig(model='less', n_particles=1, n_alternatives=1))
    v = np.random.default_rng(seed).standard_normal(base.features.d)
    v /= np.linalg.norm(v)
    truths = []
    for i in range(2 * n_per_kind):
        truth = v if i % 2 == 0 else -v
        kind = 'bag' if i % 4 == 3 else 'state_dir'
        write_simulated_session(folder / f'p{i:02d}', truth, n_demonstrations,
                                TeacherConfig(seed=100 + i, beta=10.0), kind=kind,
                                learner=base)
        truths.append(truth)
    return truths


def study_benchmark(quick: bool = False) -> Dict[str, float]:
    """Wall time of ``pref-learner study`` on 16 simulated participants, 1 and 2 workers.

    Also runs the same study on a Dask LocalCluster of two worker processes
    (loopback, no dashboard) and checks that its tables equal the local ones.
    """
    import tempfile
    from pathlib import Path

    from .study import run_study
    out: Dict[str, float] = {}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        simulated_study_folder(tmp / 'sessions', n_demonstrations=4 if quick else 8)
        params = tmp / 'params.yaml'
        params.write_text('n_particles: %d\nn_alternatives: %d\n'
                          % ((500, 100) if quick else (1000, 150)))
        runs = {}
        for workers in (1, 2):
            t = time.perf_counter()
            runs[workers] = run_study(tmp / 'sessions', params, tmp / f'out{workers}',
                                      workers=workers)
            out[f'study_wall_s_{workers}_worker{"s" if workers > 1 else ""}'] = \
                time.perf_counter() - t
        out['study_speedup_2_workers'] = out['study_wall_s_1_worker'] / \
            out['study_wall_s_2_workers']
        from distributed import LocalCluster
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host='127.0.0.1',
                          dashboard_address=None) as cluster:
            t = time.perf_counter()
            dask = run_study(tmp / 'sessions', params, tmp / 'outdask',
                             scheduler=cluster.scheduler_address)
            out['study_wall_s_dask_2_workers'] = time.perf_counter() - t
        same = all(runs[w][k].equals(dask[k]) for w in (1, 2)
                   for k in ('participants_table', 'demonstrations_table'))
        out['study_identical_across_backends'] = int(same)
        out['study_participants'] = runs[1]['n_participants']
        out['study_participants_analysed'] = runs[1]['n_ok']
    return out


def run_benchmarks(quick: bool = False, parts: List[str] = None,
                   out_dir=None) -> Dict[str, float]:
    """Run the benchmark groups in ``parts``; figures (PNG) go to ``out_dir`` when given."""
    os.environ.setdefault('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
    os.environ.setdefault('ROS_DOMAIN_ID', str(random.SystemRandom().randint(1, 101)))
    parts = parts or ['core', 'planner', 'node', 'demo', 'validate', 'calibration', 'guidance',
                      'study']
    res: Dict[str, float] = {'quick': bool(quick), 'cpu_count': os.cpu_count()}
    if 'core' in parts:
        res.update(core_benchmarks(quick))
    if 'planner' in parts:
        from .planner import plan_benchmark
        res.update(plan_benchmark(quick, out_dir))
    if 'node' in parts:
        from .ros.bench_node import node_benchmarks
        res.update(node_benchmarks(quick))
    if 'demo' in parts:
        res.update(demo_benchmark(quick))
    if 'validate' in parts:
        from .validate import run_studies
        figs = run_studies(quick=True, out_dir=None, guidance=False)['figures']
        res.update({k: v for k, v in figs.items() if not k.startswith(('calib_', 'sbc_'))})
    if 'calibration' in parts:
        from .validate import calibration_figures, study_calibration, study_sbc
        t = time.perf_counter()
        calib = study_calibration(n_truths=8 if quick else 24, n_demos=10,
                                  n_jobs=min(2, os.cpu_count() or 1))
        res.update(calibration_figures(calib, study_sbc(n_runs=60 if quick else 200)))
        res['calibration_wall_s'] = time.perf_counter() - t
    if 'guidance' in parts:
        res.update(guidance_benchmarks(quick))
    if 'study' in parts:
        res.update(study_benchmark(quick))
    return res
