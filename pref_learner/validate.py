# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Validation studies: the two choice models' known behaviours on our own scenarios.

``pref-learner validate`` regenerates the evidence on the user's machine; each
study writes JSON and a PNG. ``quick`` runs small sizes (the test suite runs
smaller ones still). The studies:

1. duplicates -- one option and k near-duplicates of an equally good other;
2. dense vs sparse -- a two-feature choice space with a skewed density
   (independent exponentials, dense at the origin corner, thinning away from
   it), demonstrations by a LESS person preferring the dense corner or the
   sparse tail; exact posteriors on the circle by quadrature;
3. simulated people on the shipped arm -- cosine to the truth and planner
   regret under the true weights, for LESS and Boltzmann people;
4. robustness to the alternative set -- the spread of each model's estimate
   when the same demonstrations are compared with 10 independently drawn sets;
5. calibration -- coverage and cosine for people who are not the learner's twin,
   and a simulation-based calibration of the sampler;
6. guidance -- teaching the proposed task (the least taught, then the largest
   expected information gain) against teaching the tasks in turn, paired people
   and seeds.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path
from typing import Dict, Optional, Tuple

import numpy as np

from . import choice
from .posterior import weighted_quantile
from .progress import progress

MODELS = choice.MODEL_NAMES


def _plt():
    import matplotlib
    matplotlib.use('Agg')
    import matplotlib.pyplot as plt
    return plt


# ---------------------------------------------------------------- study 1
def scenario_correlation(learner, m: int = 300, seed: int = 0) -> dict:
    """How well the scenario's choice sets separate the features.

    Draws a choice set of ``m`` alternatives for every task of the learner's
    scenario, exactly as a demonstration of that task would get (sampler,
    re-timing, conditioning, fixed scales), and returns the pooled within-set
    correlation matrix, its largest absolute off-diagonal entry
    (``feature_max_abs_correlation``) and that pair of features.
    """
    from .alternatives import pooled_within_set_correlation, strongest_pair
    rng = np.random.default_rng(seed)
    sets = []
    for _, start, goal in learner.tasks():
        alts, _ = learner.sampler.sample(start, goal, rng, m=m)
        sets.append(learner.features(learner.condition(learner.retime(alts))))
    corr = pooled_within_set_correlation(sets)
    r, a, b = strongest_pair(corr, learner.names)
    return {'names': list(learner.names), 'correlation': corr.tolist(), 'n_tasks': len(sets),
            'feature_max_abs_correlation': r, 'pair': [a, b]}


def study_duplicates(k_max: int = 8, jitter: float = 1e-3, seed: int = 0) -> dict:
    rng = np.random.default_rng(seed)
    theta = np.array([1.0, 1.0]) / math.sqrt(2.0)
    shares = {m: [] for m in MODELS}
    for k in range(k_max + 1):
        b = np.array([0.0, 1.0]) + rng.normal(0, jitter, (k + 1, 2))
        x = np.vstack([[1.0, 0.0], b])
        for m in MODELS:
            shares[m].append(float(choice.choice_probabilities(x, theta, 1.0, m)[0]))
    return {'k': list(range(k_max + 1)), 'share_lone': shares,
            'expected_boltzmann': [1.0 / (k + 2) for k in range(k_max + 1)]}


# ---------------------------------------------------------------- study 2
def _skewed_set(rng, m):
    """Features of m alternatives: independent Exp(1) truncated at 4 (dense at 0)."""
    u = rng.random((m, 2)) * (1 - math.exp(-4.0))
    return -np.log1p(-u)


def _circle_posterior(sets, chosen, model, beta, n_grid=720):
    a = np.linspace(-math.pi, math.pi, n_grid, endpoint=False)
    th = np.stack([np.cos(a), np.sin(a)], 1)
    ll = np.zeros(n_grid)
    for x, c in zip(sets, chosen):
        ll += choice.get_model(model)(x, c, th, beta)
    p = np.exp(ll - ll.max())
    p /= p.sum()
    return a, th, p


def study_dense_sparse(n_demos: int = 10, m: int = 100, beta: float = 3.0,
                       n_seeds: int = 5, seed: int = 0) -> dict:
    truths = {'dense': -np.ones(2) / math.sqrt(2), 'sparse': np.ones(2) / math.sqrt(2)}
    out = {}
    for case, truth in truths.items():
        rows = {mo: {'entropy': [], 'error_rad': [], 'concentration': []} for mo in MODELS}
        for s in range(n_seeds):
            rng = np.random.default_rng([seed, s, 0 if case == 'dense' else 1])
            sets, chosen = [], []
            for _ in range(n_demos):
                x = _skewed_set(rng, m)
                p = choice.choice_probabilities(x, truth, beta, 'less')
                sets.append(x)
                chosen.append(int(rng.choice(m, p=p)))
            for mo in MODELS:
                a, th, p = _circle_posterior(sets, chosen, mo, beta)
                mean = p @ th
                r = float(np.linalg.norm(mean))
                err = float(np.arccos(np.clip(mean @ truth / max(r, 1e-300), -1, 1)))
                ent = float(-np.sum(p[p > 0] * np.log(p[p > 0])))
                rows[mo]['entropy'].append(ent)
                rows[mo]['error_rad'].append(err)
                rows[mo]['concentration'].append(r)
        out[case] = {mo: {k: float(np.mean(v)) for k, v in r_.items()}
                     for mo, r_ in rows.items()}
        out[case]['per_seed'] = rows
    return out


# ---------------------------------------------------------------- study 3 and 4
def _arm_session(truth, person, n_demos, seed, n_particles, n_alternatives, planner=None):
    from .learner import Learner, LearnerConfig
    from .sim import SimulatedTeacher, TeacherConfig
    L = Learner(LearnerConfig(model='both', seed=seed, n_particles=n_particles,
                              n_alternatives=n_alternatives))
    teacher = SimulatedTeacher(L, truth, TeacherConfig(model=person, seed=seed + 1000))
    teacher.feed_session(L, n_demos)
    res = {}
    t = np.asarray(truth) / np.linalg.norm(truth)
    for m, s in L.summaries().items():
        res[m] = {'cosine': float(s.mean @ t)}
        if planner is not None:
            _, start, goal = L.tasks()[0]
            best = planner.plan(t, start, goal, np.random.default_rng(seed))
            mine = planner.plan(s.mean, start, goal, np.random.default_rng(seed))
            res[m]['regret'] = float(best.features @ t - mine.features @ t)
    return res, L


def _random_truths(n, d, seed):
    rng = np.random.default_rng(seed)
    w = rng.standard_normal((n, d))
    return w / np.linalg.norm(w, axis=1, keepdims=True)


def study_arm_people(n_truths=8, n_demos=10, n_seeds=3, n_particles=2000, n_alternatives=300,
                     with_regret=True, seed=0) -> dict:
    from .learner import LearnerConfig
    from .planner import PlannerConfig, TrajectoryPlanner
    from .task import TaskModel
    base = TaskModel.from_config(LearnerConfig(n_alternatives=1))
    planner = TrajectoryPlanner(base.features, PlannerConfig(restarts=0, max_iter=100)) \
        if with_regret else None
    truths = _random_truths(n_truths, base.features.d, seed)
    out = {}
    for person in MODELS:
        vals = {m: {'cosine': [], 'regret': []} for m in MODELS}
        for i, t in progress(list(enumerate(truths)), f'arm study ({person} people)'):
            for s in range(n_seeds):
                r, _ = _arm_session(t, person, n_demos, 100 * i + s, n_particles,
                                    n_alternatives, planner)
                for m in MODELS:
                    vals[m]['cosine'].append(r[m]['cosine'])
                    if 'regret' in r[m]:
                        vals[m]['regret'].append(r[m]['regret'])
        out[person] = {}
        for m in MODELS:
            entry = {}
            for key, v in vals[m].items():
                if not v:
                    continue
                v = np.asarray(v)
                half = 1.96 * v.std(ddof=1) / math.sqrt(len(v)) if len(v) > 1 else float('nan')
                entry[key] = {'mean': float(v.mean()), 'ci95': [float(v.mean() - half),
                                                                float(v.mean() + half)],
                              'values': v.tolist()}
            out[person][m] = entry
    return out


def study_set_robustness(n_sets=10, n_demos=8, n_particles=2000, n_alternatives=300,
                         seed=0) -> dict:
    from .features import load_scenario
    from .learner import Learner, LearnerConfig
    from .sim import SimulatedTeacher, TeacherConfig
    truth = load_scenario()['example_preference']
    # only records the demonstrations (one alternative, one option level)
    rec = Learner(LearnerConfig(model='less', n_particles=1, n_alternatives=1, spreads=(0.08,)))
    teacher = SimulatedTeacher(rec, truth, TeacherConfig(model='less', seed=seed + 7))
    teacher.feed_session(rec, n_demos)
    demos = list(rec._demos)
    means = {m: [] for m in MODELS}
    for s in progress(range(n_sets), 'redrawn alternative sets'):
        L = Learner(LearnerConfig(model='both', seed=1000 + s, n_particles=n_particles,
                                  n_alternatives=n_alternatives))
        for d in demos:
            L.process(d)
        for m, sm in L.summaries().items():
            means[m].append(sm.mean)
    out = {}
    for m, ms in means.items():
        ms = np.asarray(ms)
        c = ms.mean(0)
        c /= np.linalg.norm(c)
        ang = np.arccos(np.clip(ms @ c, -1, 1))
        out[m] = {'spread_rad': float(ang.mean()), 'angles_rad': ang.tolist()}
    return out


# ---------------------------------------------------------------- study 5: calibration
#: how the simulated people of the calibration study differ from the learner
PERSON_VARIANTS = {
    'matched': dict(options='smooth', spread=0.08, n_waypoints=0),
    'tighter_options': dict(options='smooth', spread=0.04, n_waypoints=48),
    'wider_options': dict(options='smooth', spread=0.16, n_waypoints=80),
    'optimised_options': dict(options='optimised', spread=0.06, n_waypoints=48),
}
MISMATCHED = ('tighter_options', 'wider_options', 'optimised_options')
PERSON_BETAS = (2.0, 5.0, 20.0)


def credible_region_contains(theta: np.ndarray, weights: np.ndarray, mean: np.ndarray,
                             truth: np.ndarray, level: float = 0.9) -> bool:
    """Whether ``truth`` lies in the ``level`` credible cap around the posterior mean direction.

    The cap is the smallest angle around ``mean`` holding ``level`` of the
    posterior mass (particles ``theta (N, d)``, normalised ``weights (N,)``).
    """
    ang = np.arccos(np.clip(theta @ mean, -1.0, 1.0))
    radius = float(weighted_quantile(ang, weights, [level])[0])
    return bool(np.arccos(np.clip(truth @ mean, -1.0, 1.0)) <= radius)


def _calib_session(job) -> dict:
    from .learner import Learner, LearnerConfig
    from .sim import SimulatedTeacher, TeacherConfig
    truth, variant, beta, seed, n_demos, n_particles, n_alternatives, over = job
    L = Learner(LearnerConfig(model='less', seed=seed, n_particles=n_particles,
                              n_alternatives=n_alternatives, **over))
    person = TeacherConfig(model='less', beta=beta, seed=seed + 1000,
                           **PERSON_VARIANTS[variant])
    early = {}
    L.on_estimate = lambda r: early.setdefault(r.index, []).append(r)
    results = SimulatedTeacher(L, truth, person).feed_session(L, n_demos)
    post = L.posteriors['less']
    s = post.summary()
    cos = float(s.mean @ truth)
    return {'variant': variant, 'person_beta': beta, 'cosine': cos,
            'concentration': s.concentration, 'beta_mean': s.beta_mean,
            'inside90': credible_region_contains(post.theta, post.weights, s.mean, truth),
            'confidently_wrong': bool(cos < 0.5 and s.concentration > 0.95),
            'demonstrations': L.n_demonstrations, 'level_probs': list(s.level_probs),
            **_provisional_deviations(early, results)}


def _provisional_deviations(early: dict, results) -> dict:
    """How far each provisional estimate and the update's own lay from the settled one.

    Per demonstration that had a provisional estimate, the largest over
    coordinates of ``|mean - settled mean| / settled sd`` for the provisional
    (importance weights before tempering ends) and for the update's estimate
    (after tempering, before the moves): the second is the Monte Carlo
    noise the first is to be judged against.
    """
    from .learner import StepResult
    prov, upd = [], []
    for res in results:
        got = early.get(res.index, ())
        if not isinstance(res, StepResult) or len(got) < 2 or not got[0].provisional:
            continue
        first, second = got[:2]
        settled = next(iter(res.summaries.values()))
        sd = np.maximum(settled.std, 1e-12)
        for r, into in ((first, prov), (second, upd)):
            m = next(iter(r.summaries.values())).mean
            into.append(float(np.max(np.abs(m - settled.mean) / sd)))
    n = sum(isinstance(r, StepResult) for r in results)
    return {'provisional_deviation': prov, 'updated_deviation': upd, 'updates': n}


def _run_jobs(fn, jobs, n_jobs: int, label: str, scheduler: Optional[str] = None):
    """Run ``fn`` over ``jobs`` as the study's tasks (results in job order).

    ``n_jobs`` local worker processes, or the Dask scheduler at ``scheduler``
    (:func:`pref_learner.study.run_tasks`); the results do not depend on which.
    """
    from .study import TaskFailure, run_tasks
    out = run_tasks(fn, jobs, workers=max(1, n_jobs), scheduler=scheduler, label=label)
    lost = [r.text for r in out if isinstance(r, TaskFailure)]
    if lost:
        raise RuntimeError(f'{label}: {len(lost)} of {len(out)} tasks were lost ({lost[0]})')
    return out


#: the learner's sizes in the studies' ``quick`` runs (full runs use the shipped ones)
QUICK_SIZES = dict(n_particles=1000, n_alternatives=200)


def learner_sizes(n_particles: Optional[int], n_alternatives: Optional[int]) -> Tuple[int, int]:
    """Return the given learner sizes, the shipped defaults where ``None``."""
    from .learner import LearnerConfig
    return (LearnerConfig.n_particles if n_particles is None else n_particles,
            LearnerConfig.n_alternatives if n_alternatives is None else n_alternatives)


def study_calibration(n_truths=24, n_demos=10, n_particles: Optional[int] = None,
                      n_alternatives: Optional[int] = None,
                      conditions=('matched', 'mismatched'), seed=0, n_jobs=1,
                      learner: Optional[dict] = None, scheduler: Optional[str] = None) -> dict:
    """Cosine, 90 % coverage and confidently wrong runs for people who are not the learner.

    ``n_particles``, ``n_alternatives``: the learner's sizes; by default its
    shipped defaults (:class:`~pref_learner.learner.LearnerConfig`), the learner
    a user runs.

    Truths are drawn uniformly on the sphere from ``seed``. ``matched``: the
    person's options are smooth draws of the learner's middle spread, beta 5.
    ``mismatched``: truth i meets the variant ``MISMATCHED[i % 3]`` and the beta
    ``PERSON_BETAS[(i // 3) % 3]`` (unknown to the learner, which infers beta).
    ``learner``: settings of the learner other than its defaults (LearnerConfig fields).
    Sessions run as independent tasks in ``n_jobs`` local processes or on the Dask
    scheduler at ``scheduler`` (:func:`pref_learner.study.run_tasks`), with equal results.
    """
    from .learner import LearnerConfig
    from .task import TaskModel
    d = TaskModel.from_config(LearnerConfig(n_alternatives=1)).d
    truths = _random_truths(n_truths, d, 7919 + seed)
    n_particles, n_alternatives = learner_sizes(n_particles, n_alternatives)
    out = {}
    for cond in conditions:
        jobs = []
        for i, t in enumerate(truths):
            if cond == 'matched':
                variant, beta = 'matched', 5.0
            else:
                variant, beta = MISMATCHED[i % 3], PERSON_BETAS[(i // 3) % 3]
            jobs.append((t, variant, beta, 100 * i + seed, n_demos, n_particles,
                         n_alternatives, dict(learner or {})))
        runs = _run_jobs(_calib_session, jobs, n_jobs, f'calibration ({cond})', scheduler)
        cos = np.array([r['cosine'] for r in runs])
        out[cond] = {'n_particles': n_particles, 'n_alternatives': n_alternatives,
                     'cosine_mean': float(cos.mean()),
                     'cosine_p10': float(np.percentile(cos, 10)),
                     'coverage90': float(np.mean([r['inside90'] for r in runs])),
                     'confidently_wrong': int(sum(r['confidently_wrong'] for r in runs)),
                     'runs': runs}
    return out


def study_sbc(n_runs=200, n_demos=3, n_particles=1000, n_draws=99, seed=0) -> dict:
    """Simulation-based calibration of the particle posterior (Talts et al. 2018).

    Matched case: theta uniform on the sphere and beta log-uniform on the
    prior range, one option level, choices drawn by the LESS model itself from
    the shipped arm's smooth alternative sets. The rank of each true
    coordinate (and of log beta) among ``n_draws`` posterior draws is uniform
    on 0..n_draws when the posterior is right; a chi-square test (scipy) on
    the pooled ranks in 10 bins gives the p-value. Also counted: the updates
    that moved particles and those whose moves used the likelihood expansion
    (longer runs, ``n_demos``, narrow the posterior enough for it).
    """
    from scipy import stats

    from .learner import LearnerConfig
    from .posterior import ParticlePosterior, PosteriorConfig, sample_uniform_sphere
    from .task import TaskModel
    L = TaskModel.from_config(LearnerConfig(n_alternatives=60, spreads=(0.08,),
                                            mix_near_optimal=0.0, mix_smooth=1.0))
    rng = np.random.default_rng([seed, 31])
    sets = []
    for k, (_, start, goal) in enumerate(L.tasks()):
        allq, _ = L.sampler.sample(start, goal, rng, m=61)
        sets.append(L.features(L.condition(L.retime(allq))))
    cfg = PosteriorConfig(n_particles=n_particles, model='less', beta_range=(0.5, 50.0))
    d = L.features.d
    ranks = []
    moved = expanded = 0
    for r in progress(range(n_runs), 'simulation-based calibration'):
        g = np.random.default_rng([seed, r])
        theta = sample_uniform_sphere(1, d, g)[0]
        log_beta = g.uniform(*np.log(cfg.beta_range))
        post = ParticlePosterior.create(cfg, d, g)
        for k in range(n_demos):
            x = sets[(r + k) % len(sets)]
            p = choice.choice_probabilities(x, theta, float(np.exp(log_beta)), 'less')
            post, info = post.update((x, int(g.choice(len(x), p=p))), g)
            if info.resampled:
                moved += 1
                expanded += bool(np.isfinite(info.likelihood_error))
        idx = g.choice(post.n_particles, n_draws, p=post.weights)
        draws = np.column_stack([post.theta[idx], post.log_beta[idx]])
        truth = np.concatenate([theta, [log_beta]])
        ranks.append(np.sum(draws < truth[None, :], axis=0))
    ranks = np.asarray(ranks)                     # (runs, d + 1), each in 0..n_draws
    counts = np.histogram(ranks.ravel(), bins=10, range=(0, n_draws + 1))[0]
    pvalue = float(stats.chisquare(counts).pvalue)
    per = [float(stats.chisquare(np.histogram(ranks[:, j], bins=10,
                                              range=(0, n_draws + 1))[0]).pvalue)
           for j in range(ranks.shape[1])]
    return {'pvalue': pvalue, 'pvalue_per_coordinate': per, 'counts': counts.tolist(),
            'n_runs': n_runs, 'n_draws': n_draws, 'updates_with_moves': moved,
            'updates_with_expanded_moves': expanded}


# ---------------------------------------------------------------- study 6: guided teaching


def study_tasks(learner) -> list:
    """Return the tasks of the guidance study: the scenario's tasks, each in both directions."""
    tasks = list(learner.tasks())
    return tasks + [(f'{n} (reversed)', g, s) for n, s, g in tasks]


def _cos90(cosines, cap: int) -> int:
    """Return the demonstrations needed to reach cosine 0.9 (``cap`` when never reached)."""
    for k, c in enumerate(cosines):
        if c >= 0.9:
            return k + 1
    return cap


def _guided_session(job) -> dict:
    """One person taught round-robin or guided (paired: same truth, person and seeds)."""
    from .guidance import TaskGuide
    from .learner import Learner, LearnerConfig, StepResult
    from .sim import SimulatedTeacher, TeacherConfig
    truth, variant, beta, seed, n_demos, n_particles, n_alternatives, guided = job
    L = Learner(LearnerConfig(model='less', seed=seed, n_particles=n_particles,
                              n_alternatives=n_alternatives))
    person = SimulatedTeacher(L, truth, TeacherConfig(model='less', beta=beta, seed=seed + 1000,
                                                      **PERSON_VARIANTS[variant]))
    tasks = study_tasks(L)
    guide = TaskGuide(L)
    cos, chosen, gains = [], [], []
    t = 10**18
    for k in range(n_demos):
        if guided:
            best = guide.propose(tasks)
            task = (best.name, best.start, best.goal)
            gains.append(best.gain)
        else:
            task = tasks[k % len(tasks)]
        res, t = person.feed_one(L, k, t, task)
        if not any(isinstance(r, StepResult) for r in res):
            raise RuntimeError(f'demonstration {k} of {task[0]} was not learned: {res}')
        chosen.append(task[0])
        cos.append(float(L.posteriors['less'].mean_direction() @ truth))
    return {'variant': variant, 'person_beta': beta, 'guided': guided, 'cosine': cos,
            'tasks': chosen, 'expected_gain': gains, 'demos_to_cos90': _cos90(cos, n_demos)}


def study_guidance(n_truths=24, n_demos=10, n_particles: Optional[int] = None,
                   n_alternatives: Optional[int] = None, seed=0,
                   n_jobs=1, scheduler: Optional[str] = None) -> dict:
    """Guided against round-robin teaching, paired: the same people, truths and seeds.

    Truths uniform on the sphere (as the calibration study); truth i meets the
    person ``matched`` (beta 5) when i is even, else ``MISMATCHED[(i // 2) % 3]``
    with beta ``PERSON_BETAS[(i // 6) % 3]``, so the person is not the learner's
    twin. Round-robin demonstrates :func:`study_tasks` in turn; guided, the
    task :meth:`TaskGuide.propose` proposes among the same tasks (a task taught
    fewer times first, in either direction; then the largest expected information
    gain, the mean over the guide's set draws). Figures:
    demonstrations to reach cosine 0.9 (median; never reached counts as
    ``n_demos``), cosine after 5 and after ``n_demos``. ``n_particles``,
    ``n_alternatives``: the learner's (and so the guide's) sizes, by default
    the shipped ones.
    """
    from .learner import LearnerConfig
    from .task import TaskModel
    d = TaskModel.from_config(LearnerConfig(n_alternatives=1)).d
    truths = _random_truths(n_truths, d, 7919 + seed)
    n_particles, n_alternatives = learner_sizes(n_particles, n_alternatives)
    jobs = []
    for i, t in enumerate(truths):
        if i % 2 == 0:
            variant, beta = 'matched', 5.0
        else:
            variant, beta = MISMATCHED[(i // 2) % 3], PERSON_BETAS[(i // 6) % 3]
        for guided in (False, True):
            jobs.append((t, variant, beta, 100 * i + seed, n_demos, n_particles,
                         n_alternatives, guided))
    runs = _run_jobs(_guided_session, jobs, n_jobs, 'guided against round-robin', scheduler)
    out = {'n_demos': n_demos, 'n_truths': n_truths, 'n_particles': n_particles,
           'n_alternatives': n_alternatives}
    for arm, flag in (('round_robin', False), ('guided', True)):
        rs = [r for r in runs if r['guided'] is flag]
        cos = np.array([r['cosine'] for r in rs])
        k5 = min(5, n_demos) - 1
        need = [r['demos_to_cos90'] for r in rs]
        out[arm] = {'demos_to_cos90_median': float(np.median(need)),
                    'cosine_after5_mean': float(cos[:, k5].mean()),
                    'cosine_final_mean': float(cos[:, -1].mean()),
                    'cosine_mean_by_demo': cos.mean(0).tolist(), 'runs': rs}
    rr, gd = out['round_robin'], out['guided']
    out['figures'] = {
        'guided_demos_to_cos90_ratio': gd['demos_to_cos90_median']
        / rr['demos_to_cos90_median'],
        'guided_cosine_after5_gain': gd['cosine_after5_mean'] - rr['cosine_after5_mean'],
        'guided_cosine_final_gain': gd['cosine_final_mean'] - rr['cosine_final_mean'],
        'guided_demos_to_cos90_median': gd['demos_to_cos90_median'],
        'round_robin_demos_to_cos90_median': rr['demos_to_cos90_median'],
        'guided_cosine_after5_mean': gd['cosine_after5_mean'],
        'round_robin_cosine_after5_mean': rr['cosine_after5_mean'],
        f'guided_cosine_after{n_demos}_mean': gd['cosine_final_mean'],
        f'round_robin_cosine_after{n_demos}_mean': rr['cosine_final_mean'],
        'guidance_n_particles': n_particles, 'guidance_n_alternatives': n_alternatives}
    return out


# ---------------------------------------------------------------- plots and runner
def _plot_duplicates(r, path):
    plt = _plt()
    fig, ax = plt.subplots(figsize=(5, 3.5))
    for m in MODELS:
        ax.plot(r['k'], r['share_lone'][m], 'o-', label=m)
    ax.plot(r['k'], r['expected_boltzmann'], 'k:', label='1/(k+2) (Luce)')
    ax.set_xlabel('near-duplicates of the other option (k)')
    ax.set_ylabel('share of the lone option')
    ax.legend()
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def _plot_bars(data, keys, title, path):
    plt = _plt()
    fig, ax = plt.subplots(figsize=(6, 3.5))
    xs = np.arange(len(keys))
    for j, m in enumerate(MODELS):
        ax.bar(xs + 0.4 * j, [data[k][m] for k in keys], 0.4, label=m)
    ax.set_xticks(xs + 0.2)
    ax.set_xticklabels(keys)
    ax.set_title(title)
    ax.legend()
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def calibration_figures(calib: dict, sbc: dict) -> Dict[str, float]:
    """Return the calibration study's headline figures (benchmark keys)."""
    runs = [r for c in calib.values() for r in c['runs']]
    out = {'calib_cosine_mean': calib['matched']['cosine_mean'],
           'calib_cosine_p10': calib['matched']['cosine_p10'],
           'calib_coverage90': calib['matched']['coverage90'],
           'calib_coverage90_all': float(np.mean([r['inside90'] for r in runs])),
           'calib_confidently_wrong': int(sum(r['confidently_wrong'] for r in runs)),
           'sbc_uniformity_pvalue': sbc['pvalue'],
           'calib_n_particles': calib['matched']['n_particles'],
           'calib_n_alternatives': calib['matched']['n_alternatives']}
    prov = [v for r in runs for v in r.get('provisional_deviation', ())]
    upd = [v for r in runs for v in r.get('updated_deviation', ())]
    n = sum(r.get('updates', 0) for r in runs)
    out['calib_provisional_fraction'] = len(prov) / n if n else float('nan')
    for key, vals in (('provisional', prov), ('updated', upd)):
        out[f'calib_{key}_deviation_sd_median'] = float(np.median(vals)) if vals \
            else float('nan')
        out[f'calib_{key}_deviation_sd_p90'] = float(np.percentile(vals, 90)) if vals \
            else float('nan')
    if 'mismatched' in calib:
        out['calib_cosine_mean_mismatched'] = calib['mismatched']['cosine_mean']
        out['calib_cosine_p10_mismatched'] = calib['mismatched']['cosine_p10']
        out['calib_coverage90_mismatched'] = calib['mismatched']['coverage90']
    return out


def run_studies(quick: bool = False, out_dir: Optional[str] = None,
                n_jobs: int = 1, guidance: bool = True,
                scheduler: Optional[str] = None, calibration: bool = True) -> Dict[str, object]:
    """Run the validation studies; ``guidance``, ``calibration``: include those studies."""
    t0 = time.time()
    sizes = dict(n_truths=2, n_seeds=1, n_demos=6, **QUICK_SIZES) \
        if quick else dict(n_truths=8, n_seeds=3, n_demos=10, n_particles=2000,
                           n_alternatives=300)
    dup = study_duplicates()
    ds = study_dense_sparse(n_seeds=3 if quick else 10)
    arm = study_arm_people(**sizes)
    rob = study_set_robustness(n_sets=5 if quick else 10, n_demos=6 if quick else 8,
                               n_particles=sizes['n_particles'],
                               n_alternatives=sizes['n_alternatives'])
    # the learner's own sizes in the full studies (what users run); reduced when quick
    small = QUICK_SIZES if quick else {}
    calib = study_calibration(n_truths=6 if quick else 24, n_demos=6 if quick else 10,
                              n_jobs=n_jobs, scheduler=scheduler, **small) \
        if calibration else {}
    sbc = study_sbc(n_runs=60 if quick else 200) if calibration else {}
    guide = study_guidance(n_truths=4 if quick else 24, n_demos=10, n_jobs=n_jobs,
                           scheduler=scheduler, **small) \
        if guidance else {'figures': {}}
    figures = {
        'dup_share_less_k8': dup['share_lone']['less'][-1],
        'dup_share_boltzmann_k8': dup['share_lone']['boltzmann'][-1],
        'dense_entropy_ratio_boltzmann_over_less':
            ds['dense']['boltzmann']['entropy'] / ds['dense']['less']['entropy'],
        'sparse_entropy_ratio_boltzmann_over_less':
            ds['sparse']['boltzmann']['entropy'] / ds['sparse']['less']['entropy'],
        'dense_error_boltzmann': ds['dense']['boltzmann']['error_rad'],
        'dense_error_less': ds['dense']['less']['error_rad'],
        'sparse_error_boltzmann': ds['sparse']['boltzmann']['error_rad'],
        'sparse_error_less': ds['sparse']['less']['error_rad'],
        'arm_cosine_less_on_less_people': arm['less']['less']['cosine']['mean'],
        'arm_cosine_boltzmann_on_less_people': arm['less']['boltzmann']['cosine']['mean'],
        'arm_cosine_less_on_boltzmann_people': arm['boltzmann']['less']['cosine']['mean'],
        'arm_cosine_boltzmann_on_boltzmann_people':
            arm['boltzmann']['boltzmann']['cosine']['mean'],
        'set_spread_rad_less': rob['less']['spread_rad'],
        'set_spread_rad_boltzmann': rob['boltzmann']['spread_rad'],
    }
    for person in MODELS:
        for m in MODELS:
            if 'regret' in arm[person][m]:
                figures[f'arm_regret_{m}_on_{person}_people'] = arm[person][m]['regret']['mean']
    if calibration:
        figures.update(calibration_figures(calib, sbc))
    figures.update(guide['figures'])
    figures['validate_wall_s'] = time.time() - t0
    result = {'quick': quick, 'figures': figures, 'duplicates': dup, 'dense_sparse': ds,
              'arm_people': arm, 'set_robustness': rob, 'calibration': calib, 'sbc': sbc,
              'guidance': guide}
    if out_dir:
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        (out / 'validation.json').write_text(json.dumps(result, indent=1))
        for name, part in (('duplicates', dup), ('dense_sparse', ds), ('arm_people', arm),
                           ('set_robustness', rob), ('calibration', calib), ('sbc', sbc),
                           ('guidance', guide)):
            (out / f'{name}.json').write_text(json.dumps(part, indent=1))
        _plot_duplicates(dup, out / 'duplicates.png')
        _plot_bars({'dense entropy': {m: ds['dense'][m]['entropy'] for m in MODELS},
                    'sparse entropy': {m: ds['sparse'][m]['entropy'] for m in MODELS},
                    'dense error': {m: ds['dense'][m]['error_rad'] for m in MODELS},
                    'sparse error': {m: ds['sparse'][m]['error_rad'] for m in MODELS}},
                   ['dense entropy', 'sparse entropy', 'dense error', 'sparse error'],
                   'posterior entropy (nats) and error (rad)', out / 'dense_sparse.png')
        _plot_bars({f'{p} people': {m: arm[p][m]['cosine']['mean'] for m in MODELS}
                    for p in MODELS}, [f'{p} people' for p in MODELS],
                   'cosine of the estimate to the truth', out / 'arm_people.png')
        _plot_bars({'spread': {m: rob[m]['spread_rad'] for m in MODELS}}, ['spread'],
                   'spread across alternative sets (rad)', out / 'set_robustness.png')
    return result
