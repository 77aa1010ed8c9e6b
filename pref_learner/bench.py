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

import math
import os
import subprocess
import sys
import time
from typing import TYPE_CHECKING, Callable, Dict, List, Tuple

import numpy as np

if TYPE_CHECKING:
    from .planner import TrajectoryPlanner


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
    from .posterior import ParticlePosterior
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
        sets.append((f, 0, groups, L.path_deviation(allq)))
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

    reps = 5 if quick else 15

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


def _p95_ms(ts) -> float:
    return float(np.percentile(ts, 95) * 1e3)


def _session_sets(n: int):
    """``n`` choice sets of the shipped scenario's example person: ``(features, groups)``."""
    from .features import load_scenario
    from .learner import Learner, LearnerConfig
    from .sim import SimulatedTeacher, TeacherConfig
    L = Learner(LearnerConfig(model='less'))
    teacher = SimulatedTeacher(L, load_scenario()['example_preference'],
                               TeacherConfig(n_waypoints=0))
    sets = []
    for k in range(n):
        _, path = teacher.choose(k)
        allq, f, groups = L.choice_set(path, k)
        sets.append((f, groups, L.path_deviation(allq)))
    return L, teacher, sets


def _session_updates(L, sets, n_session: int, out: Dict[str, float]) -> dict:
    """Time updates at ``n_session`` stored demonstrations, both models (defaults of the learner).

    The session is learned as the learner does (tempered updates, moves after
    each resampling). Each of the next sets is then added to that same
    session state, and its final moves are forced even when the update did not
    resample (the worst case: every update pays for its moves). Returns each
    model's session states at half and at the full length.
    """
    from dataclasses import replace

    from .posterior import ParticlePosterior
    states = {}
    for model in ('boltzmann', 'less'):
        cfg = L.config.posterior_config(model)
        rng = np.random.default_rng([17, len(model)])
        post = ParticlePosterior.create(cfg, L.features.d, rng)
        t = time.perf_counter()
        for k, (f, groups, dev) in enumerate(sets[:n_session]):
            post, _ = post.update(post.prepare(f, 0, groups, dev), rng)
            if k + 1 == n_session // 2:
                half = post
        out[f'session_{n_session}_learn_s_{model}'] = time.perf_counter() - t
        states[model] = (half, post)
        gate, full, errs = [], [], []
        for k, (f, groups, dev) in enumerate(sets[n_session:]):
            rec = post.prepare(f, 0, groups, dev)
            g = np.random.default_rng([18, k])
            t = time.perf_counter()
            new, info = post.update(rec, g, move=False)
            t1 = time.perf_counter()
            new, _ = replace(new, moves_pending=True).rejuvenate(g)
            t2 = time.perf_counter()
            gate.append(t1 - t)
            full.append(t2 - t)
            errs.append(new.likelihood_error)
        out[f'posterior_update_ms_p95_at{n_session}_{model}'] = _p95_ms(gate)
        out[f'update_with_moves_ms_p95_at{n_session}_{model}'] = _p95_ms(full)
        out[f'update_with_moves_ms_median_at{n_session}_{model}'] = float(np.median(full) * 1e3)
        out[f'move_likelihood_error_at{n_session}_{model}'] = float(np.nanmax(errs)) \
            if np.any(np.isfinite(errs)) else float('nan')
    out[f'update_with_moves_ms_p95_at{n_session}'] = max(
        out[f'update_with_moves_ms_p95_at{n_session}_{m}'] for m in ('boltzmann', 'less'))
    return states


#: accuracy both samplers must reach: largest error of any coordinate's posterior mean and
#: standard deviation of theta against the importance-sampling reference
PEER_ACCURACY = 0.02


def _peer(sets, quick: bool, out: Dict[str, float]) -> None:
    """Particle updates against emcee on one posterior: time to ``PEER_ACCURACY``.

    Posterior: the first four demonstrations of the session, LESS, beta fixed
    at 5, uniform prior on the sphere, d = 6, M = 500. Reference: importance
    sampling from the prior (10^6 draws, in chunks). Particles: the
    demonstrations added one by one (``update``, default settings) with N
    doubling from 500 until three seeded runs are all within the accuracy;
    the time is their mean. emcee (affine-invariant ensemble, 32 walkers,
    vectorised log density, the same likelihood code) on R^6 with target
    ``L(x / |x|) N(x; 0, I)``, whose direction has the posterior above;
    estimates from the chain after a third is discarded, checked every 100
    steps; a run's time is the first of two successive checks within the
    accuracy; the mean over three seeded runs.
    ``smc_vs_emcee_speedup_per_demonstration`` divides by the particles' last
    update alone (what a session pays per demonstration; emcee restarts).
    ``smc_vs_warm_emcee_speedup_per_demonstration`` gives emcee the same head
    start as that update: its walkers begin at 32 of the particles holding
    the first three demonstrations (drawn by weight from each seeded run at
    the particle count above, radius ``|x| ~ chi(6)``, the target's radial
    law), and the same rule times it on the four-demonstration posterior.
    """
    from dataclasses import replace

    import emcee

    from .posterior import ParticlePosterior, PosteriorConfig, sample_uniform_sphere
    d = sets[0][0].shape[1]
    cfg = PosteriorConfig(n_particles=4000, model='less', beta=5.0)
    base = ParticlePosterior.create(cfg, d, np.random.default_rng(0))
    recs = [base.prepare(f, 0) for f, *_ in sets[:4]]
    n_ref, chunk = (200_000 if quick else 1_000_000), 50_000
    g = np.random.default_rng(11)
    top, s0, s1, s2 = -np.inf, 0.0, np.zeros(d), np.zeros(d)
    for _ in range(n_ref // chunk):
        th = sample_uniform_sphere(chunk, d, g)
        lw = sum(base.record_loglik(r, th, np.full(chunk, 5.0)) for r in recs)
        m = max(top, float(lw.max()))
        scale = np.exp(top - m) if np.isfinite(top) else 0.0
        w = np.exp(lw - m)
        s0, s1, s2 = s0 * scale + w.sum(), s1 * scale + w @ th, s2 * scale + w @ th ** 2
        top = m
    ref_mean = s1 / s0
    ref_std = np.sqrt(np.maximum(s2 / s0 - ref_mean ** 2, 0.0))

    def error(mean, std):
        return float(max(np.abs(mean - ref_mean).max(), np.abs(std - ref_std).max()))
    out['peer_reference_draws'] = n_ref
    seeds = 3
    smc_s, smc_err, smc_n, smc_last = float('nan'), float('nan'), 0, float('nan')
    for n in (500, 1000, 2000, 4000, 8000, 16000):
        runs = []
        for seed in range(seeds):
            g = np.random.default_rng([12, n, seed])
            t = time.perf_counter()
            post = ParticlePosterior.create(replace(cfg, n_particles=n), d, g)
            for r in recs:
                t_last, prev = time.perf_counter(), post
                post, _ = post.update(r, g)
            now = time.perf_counter()
            w = post.weights
            mean = w @ post.theta
            runs.append((now - t, now - t_last,
                         error(mean, np.sqrt(w @ (post.theta - mean) ** 2)), prev))
        smc_s, smc_last = (float(np.mean([x[i] for x in runs])) for i in (0, 1))
        smc_err, smc_n = max(x[2] for x in runs), n
        if smc_err <= PEER_ACCURACY:
            break

    def log_prob(x):
        r = np.linalg.norm(x, axis=1)
        th = x / np.maximum(r, 1e-300)[:, None]
        return sum(base.record_loglik(rec, th, np.full(len(x), 5.0)) for rec in recs) \
            - 0.5 * r * r
    walkers = 32
    cap = 30.0 if quick else 120.0

    def emcee_runs(start):
        """Run emcee from ``start(seed)``: mean time, mean steps, worst error, reached."""
        times, n_steps, errs, reached = [], [], [], True
        for seed in range(seeds):
            sampler = emcee.EnsembleSampler(walkers, d, log_prob, vectorize=True)
            sampler.random_state = np.random.RandomState(13 + seed).get_state()
            state = start(seed)
            t = time.perf_counter()
            steps, hits, em_err = 0, 0, float('nan')
            while time.perf_counter() - t < cap:
                state = sampler.run_mcmc(state, 100, progress=False)
                steps += 100
                chain = sampler.get_chain(discard=steps // 3, flat=True)
                dirs = chain / np.linalg.norm(chain, axis=1, keepdims=True)
                em_err = error(dirs.mean(axis=0), dirs.std(axis=0))
                hits = hits + 1 if em_err <= PEER_ACCURACY else 0
                if hits >= 2:
                    break
            times.append(time.perf_counter() - t)
            n_steps.append(steps)
            errs.append(em_err)
            reached = reached and hits >= 2
        return float(np.mean(times)), float(np.mean(n_steps)), max(errs), reached

    def warm(seed):
        prev = runs[seed][3]
        g = np.random.RandomState(23 + seed)
        pick = g.choice(prev.n_particles, walkers, p=prev.weights)
        radius = np.sqrt(g.chisquare(d, walkers))
        return prev.theta[pick] * radius[:, None]
    em_s, steps, em_err, reached = emcee_runs(
        lambda seed: np.random.RandomState(23 + seed).standard_normal((walkers, d)))
    warm_s, warm_steps, warm_err, warm_reached = emcee_runs(warm)
    out['smc_time_to_accuracy_s'] = smc_s
    out['smc_particles_at_accuracy'] = smc_n
    out['smc_error_at_accuracy'] = smc_err
    out['emcee_time_to_accuracy_s'] = em_s
    out['emcee_steps_at_accuracy'] = steps
    out['emcee_error_at_accuracy'] = em_err
    out['emcee_reached_accuracy'] = int(reached)
    out['smc_vs_emcee_speedup'] = em_s / smc_s
    # a session's view: the particles take in the fourth demonstration in one update,
    # emcee starts again from scratch
    out['smc_last_update_s'] = smc_last
    out['smc_vs_emcee_speedup_per_demonstration'] = em_s / smc_last
    # the same, emcee starting where the particles start: the first three demonstrations
    out['emcee_warm_time_to_accuracy_s'] = warm_s
    out['emcee_warm_steps_at_accuracy'] = warm_steps
    out['emcee_warm_error_at_accuracy'] = warm_err
    out['emcee_warm_reached_accuracy'] = int(warm_reached)
    out['smc_vs_warm_emcee_speedup_per_demonstration'] = warm_s / smc_last


def _scaling(sets, quick: bool, out: Dict[str, float]) -> None:
    """One update from the prior (tempering and moves) against N up to 50,000 and M up to 5,000."""
    from .posterior import ParticlePosterior, PosteriorConfig
    rng = np.random.default_rng(0)
    cfg = dict(model='less', ess_min_ratio=0.0)
    reps = 2 if quick else 3
    f0 = sets[0][0]

    def update_ms(n_particles, features):
        post = ParticlePosterior.create(PosteriorConfig(n_particles=n_particles, **cfg), 6, rng)
        rec = post.prepare(features, 0)
        return _median_ms(lambda: post.update(rec, rng), reps)
    ns = [2000, 4000, 12500, 25000, 50000]
    t_n = [update_ms(n, f0) for n in ns]
    for n, v in zip(ns, t_n):
        out[f'posterior_update_ms_particles_{n}'] = v
    out['posterior_update_scaling_exponent_particles'] = _slope(ns, t_n)
    ms = [125, 500, 1000, 2500, 5000]
    t_m = [update_ms(4000, rng.normal(size=(m + 1, 6))) for m in ms]
    for m, v in zip(ms, t_m):
        out[f'posterior_update_ms_alternatives_{m}'] = v
    out['posterior_update_scaling_exponent_alternatives'] = _slope(ms, t_m)


def _rss_bytes() -> float:
    with open('/proc/self/status') as f:
        for line in f:
            if line.startswith('VmRSS:'):
                return int(line.split()[1]) * 1024.0
    return float('nan')


def _memory(teacher, sets, states, rss0: float, out: Dict[str, float]) -> None:
    """Bytes per stored demonstration and per particle; the largest session in 1 GB.

    Peak traced allocations (tracemalloc, which numpy reports to) of adding
    one demonstration with forced moves and saving the posterior, from the
    LESS session's states at half and full length and from the full state
    with every particle doubled: the differences give the bytes per stored
    demonstration (its choice set as the posterior keeps it, plus the
    moves' and the save's temporaries) and per particle. The learner also
    keeps each demonstration's recorded samples (the simulated teacher's
    500 Hz stream). ``rss0``, the process's resident size before any
    session, is the fixed part.
    """
    import tempfile
    import tracemalloc
    from dataclasses import replace
    half, full = states['less']

    def peak(post):
        rng = np.random.default_rng(1)
        f, groups, dev = sets[len(full.records)]
        rec = post.prepare(f, 0, groups, dev)
        with tempfile.TemporaryDirectory() as tmp:
            tracemalloc.start()
            base = tracemalloc.get_traced_memory()[0]
            new, _ = post.update(rec, rng, move=False)
            new, _ = replace(new, moves_pending=True).rejuvenate(rng)
            new.save(os.path.join(tmp, 'p'))
            top = tracemalloc.get_traced_memory()[1] - base
            tracemalloc.stop()
        return top
    n = full.n_particles
    doubled = full._take(np.repeat(np.arange(n), 2))
    doubled = replace(doubled, config=replace(full.config, n_particles=2 * n))
    p_half, p_full, p_doubled = peak(half), peak(full), peak(doubled)
    per_record = (p_full - p_half) / (len(full.records) - len(half.records))
    per_particle = (p_doubled - p_full) / n
    r = full.records[0]
    kept = sum(a.nbytes for a in (r.features, r.groups, r.log_sim, r.log_sim_chosen,
                                  r.log_density))
    _, q = teacher.stream(0, 0)
    samples = q.nbytes + q.shape[0] * 8            # joint positions and times
    per_demo = per_record + samples
    fixed = rss0 + per_particle * n
    out['memory_bytes_per_record_kept'] = float(kept)
    out['memory_bytes_per_record_peak'] = per_record
    out['memory_bytes_per_demonstration_samples'] = float(samples)
    out['memory_bytes_per_demonstration'] = per_demo
    out['memory_bytes_per_particle_peak'] = per_particle
    out['memory_process_base_mb'] = rss0 / 2 ** 20
    out['memory_largest_session_1gb'] = int(max(0.0, (2 ** 30 - fixed) / per_demo))


def speed_benchmarks(quick: bool = False) -> Dict[str, float]:
    """Posterior speed at session scale: 200 demonstrations, a peer, scaling, memory.

    Defaults of the learner (N 4,000, M 500, d 6, beta inferred). See
    :func:`_session_updates`, :func:`_peer`, :func:`_scaling` and :func:`_memory`.
    """
    out: Dict[str, float] = {}
    n_session, n_measured = 200, (4 if quick else 10)
    t = time.perf_counter()
    L, teacher, sets = _session_sets(n_session + n_measured)
    out['speed_sets_s'] = time.perf_counter() - t
    rss0 = _rss_bytes()
    states = _session_updates(L, sets, n_session, out)
    _memory(teacher, sets, states, rss0, out)
    _peer(sets, quick, out)
    _scaling(sets, quick, out)
    return out


def guidance_benchmarks(quick: bool = False) -> Dict[str, float]:
    """Time to score 20 candidate tasks (N 4,000, M 500) and the guided-teaching study.

    ``next_task_ms``: median over repetitions of scoring 20 tasks (the
    scenario's and random in-limit ones) after two demonstrations, with
    every task's option sets (``TaskGuide.n_draws`` each) already built (the
    node builds them once and reuses them); ``next_task_first_ms`` includes
    building them.
    The study runs the learner at its shipped sizes (N 4,000, M 500; 1,000 and 200
    when ``quick``).
    """
    from .features import load_scenario
    from .guidance import TaskGuide
    from .learner import Learner, LearnerConfig
    from .sim import SimulatedTeacher, TeacherConfig
    from .validate import QUICK_SIZES, study_guidance
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
                       n_jobs=min(2, os.cpu_count() or 1),
                       **(QUICK_SIZES if quick else {}))
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

    from .learner import LearnerConfig
    from .task import TaskModel
    from .sim import TeacherConfig, write_simulated_session
    folder = Path(folder)
    base = TaskModel.from_config(LearnerConfig(model='less', n_alternatives=1))
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


# ---------------------------------------------------------------- planner
def _traced_plan(planner: 'TrajectoryPlanner', w, start, goal) -> Tuple[object, np.ndarray]:
    """Plan once; trace ``(wall s, iteration, exact cost)`` per iteration (tracing not timed)."""
    trace, excluded = [], [0.0]
    t0 = time.perf_counter()

    def record(q):
        t = time.perf_counter()
        cost = planner.objective(q[1:-1].ravel(), start, goal, w, None, exact=True)[0]
        trace.append((t - t0 - excluded[0], len(trace), cost))
        excluded[0] += time.perf_counter() - t
    q0 = start + np.linspace(0, 1, planner.T)[:, None] * (goal - start)
    trace.append((0.0, 0, planner.objective(q0[1:-1].ravel(), start, goal, w, None,
                                            exact=True)[0]))
    excluded[0] += time.perf_counter() - t0
    res = planner.plan(w, start, goal, callback=record)
    return res, np.array(trace)


def raw_waypoint_lbfgsb(planner: 'TrajectoryPlanner', w, start, goal, target: float,
                        max_iter: int) -> np.ndarray:
    """Run the peer: scipy L-BFGS-B on the raw interior waypoints, exact objective, to ``target``.

    Starts from the straight line with the joint limits as bounds (continuous
    joints within half a turn of the line) and scipy's own stopping tests off,
    so it runs until its exact cost is at most ``target``, ``max_iter``
    iterations or a failed line search. Returns the trace
    ``(wall s, iteration, exact cost)``, one row per iteration.
    """
    from scipy.optimize import Bounds, minimize
    line = start + np.linspace(0, 1, planner.T)[:, None] * (goal - start)
    lo = np.where(np.isfinite(planner.robot.lower), planner.robot.lower, line - math.pi)
    hi = np.where(np.isfinite(planner.robot.upper), planner.robot.upper, line + math.pi)
    x0 = line[1:-1].ravel()
    trace = [(0.0, 0, planner.objective(x0, start, goal, w, None, exact=True)[0])]
    t0 = time.perf_counter()

    def stop(intermediate_result):
        trace.append((time.perf_counter() - t0, len(trace), float(intermediate_result.fun)))
        if intermediate_result.fun <= target:
            raise StopIteration
    minimize(lambda x: planner.objective(x, start, goal, w, None, exact=True), x0, jac=True,
             method='L-BFGS-B', bounds=Bounds(lo[1:-1].ravel(), hi[1:-1].ravel()),
             callback=stop, options={'maxiter': max_iter, 'maxfun': 20 * max_iter,
                                     'ftol': 0.0, 'gtol': 0.0})
    return np.array(trace)


def _convergence_figure(ours: np.ndarray, peer: np.ndarray, path) -> None:
    import matplotlib
    matplotlib.use('Agg')
    import matplotlib.pyplot as plt
    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    for ax, col, label in ((axes[0], 0, 'wall time (ms)'), (axes[1], 1, 'iteration')):
        scale = 1e3 if col == 0 else 1.0
        ax.plot(ours[:, col] * scale, ours[:, 2], label='B-spline controls, smooth surrogate, '
                'projected quasi-Newton')
        ax.plot(peer[:, col] * scale, peer[:, 2], label='L-BFGS-B on raw waypoints, exact')
        ax.axhline(ours[-1, 2], color='grey', lw=0.8, ls='--')
        ax.set_xscale('symlog', linthresh=1.0)
        ax.set_xlim(left=0.0)
        ax.set_xlabel(label)
        ax.set_ylabel('exact cost J')
        lo = min(ours[:, 2].min(), peer[:, 2].min())
        ax.set_ylim(lo - 0.05 * abs(lo) - 0.1, max(ours[0, 2], peer[0, 2]) + 0.1)
    axes[0].legend(fontsize=8)
    fig.suptitle('one 64-waypoint plan, shipped arm; dashed: final cost of ours')
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def plan_benchmark(quick: bool = False, out_dir=None) -> dict:
    """Plan figures: one 64-waypoint plan, shipped arm and features, no restart.

    ``plan_ms_median``, ``plan_converged_fraction`` (projected-gradient rule
    met), iterations and evaluations over seeded random weights and the
    scenario's tasks; then, on the first few of the same problems, the peer
    (:func:`raw_waypoint_lbfgsb`) run until it reaches our final exact cost:
    its time and iterations to get there, the fraction that did, and the
    median ratio of its time to ours (its whole run's time where it never
    got there: a lower bound). With ``out_dir``, ``plan_convergence.png``
    there shows exact cost against wall time and iterations for both on the
    first problem.
    """
    from pathlib import Path

    from .learner import LearnerConfig
    from .planner import PlannerConfig, TrajectoryPlanner
    from .task import TaskModel
    L = TaskModel.from_config(LearnerConfig(n_alternatives=1))
    planner = TrajectoryPlanner(L.features, PlannerConfig(restarts=0))
    tasks = L.tasks()
    rng = np.random.default_rng(0)
    problems, times, iters, evals, conv = [], [], [], [], []
    for k in range(4 if quick else 10):
        w = rng.standard_normal(L.features.d)
        _, s, g = tasks[k % len(tasks)]
        r = planner.plan(w, s, g, rng)
        problems.append((w, s, g))
        times.append(r.time_s)
        iters.append(r.n_iter)
        evals.append(r.n_eval)
        conv.append(r.converged)
    out = {'plan_ms_median': float(np.median(times) * 1e3),
           'plan_converged_fraction': float(np.mean(conv)),
           'plan_iterations_median': float(np.median(iters)),
           'plan_evaluations_median': float(np.median(evals))}
    peer_ms, peer_it, reached, ratio = [], [], [], []
    for i, (w, s, g) in enumerate(problems[:1 if quick else 3]):
        res, ours = _traced_plan(planner, w, s, g)
        peer = raw_waypoint_lbfgsb(planner, w, s, g, res.cost, 1000 if quick else 3000)
        ok = bool(peer[-1, 2] <= res.cost)
        reached.append(ok)
        if ok:
            peer_ms.append(peer[-1, 0] * 1e3)
            peer_it.append(peer[-1, 1])
        ratio.append(peer[-1, 0] / ours[-1, 0])
        if i == 0 and out_dir is not None:
            Path(out_dir).mkdir(parents=True, exist_ok=True)
            _convergence_figure(ours, peer, Path(out_dir) / 'plan_convergence.png')
    nan = float('nan')
    out.update({
        'plan_raw_lbfgsb_reached_fraction': float(np.mean(reached)),
        'plan_raw_lbfgsb_ms_to_equal_cost_median': float(np.median(peer_ms)) if peer_ms else nan,
        'plan_raw_lbfgsb_iterations_to_equal_cost_median':
            float(np.median(peer_it)) if peer_it else nan,
        'plan_speedup_vs_raw_lbfgsb': float(np.median(ratio))})
    return out


def run_benchmarks(quick: bool = False, parts: List[str] = None,
                   out_dir=None) -> Dict[str, float]:
    """Run the benchmark groups in ``parts``; figures (PNG) go to ``out_dir`` when given."""
    from .safety import private_session
    private_session(os.environ)        # simulated demonstrations: never beyond this run
    parts = parts or ['core', 'speed', 'planner', 'node', 'demo', 'validate', 'calibration',
                      'guidance', 'study']
    res: Dict[str, float] = {'quick': bool(quick), 'cpu_count': os.cpu_count()}
    if 'core' in parts:
        res.update(core_benchmarks(quick))
    if 'speed' in parts:
        res.update(speed_benchmarks(quick))
    if 'planner' in parts:
        res.update(plan_benchmark(quick, out_dir))
    if 'node' in parts:
        from .ros.bench_node import node_benchmarks
        res.update(node_benchmarks(quick))
    if 'demo' in parts:
        res.update(demo_benchmark(quick))
    if 'validate' in parts:
        from .validate import run_studies
        # the calibration studies are the part below, at their own sizes
        res.update(run_studies(quick=True, out_dir=None, guidance=False,
                               calibration=False)['figures'])
    if 'calibration' in parts:
        from .validate import QUICK_SIZES, calibration_figures, study_calibration, study_sbc
        t = time.perf_counter()
        # the learner's shipped sizes; smaller when quick
        calib = study_calibration(n_truths=8 if quick else 24, n_demos=10,
                                  n_jobs=min(2, os.cpu_count() or 1),
                                  **(QUICK_SIZES if quick else {}))
        res.update(calibration_figures(calib, study_sbc(n_runs=60 if quick else 200)))
        res['calibration_wall_s'] = time.perf_counter() - t
    if 'guidance' in parts:
        res.update(guidance_benchmarks(quick))
    if 'study' in parts:
        res.update(study_benchmark(quick))
    return res
