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
   when the same demonstrations are compared with 10 independently drawn sets.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path
from typing import Dict, Optional

import numpy as np

from . import choice
from .progress import progress

MODELS = ('boltzmann', 'less')


def _plt():
    import matplotlib
    matplotlib.use('Agg')
    import matplotlib.pyplot as plt
    return plt


# ---------------------------------------------------------------- study 1
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
    from .learner import Learner, LearnerConfig
    from .planner import PlannerConfig, TrajectoryPlanner
    base = Learner(LearnerConfig(n_particles=1, n_alternatives=1))
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
    from .learner import Learner, LearnerConfig
    from .sim import SimulatedTeacher, TeacherConfig
    truth = np.array([0.3, 0.5, 0.3, -0.6, -0.2, -0.4])
    rec = Learner(LearnerConfig(model='less', n_particles=1, n_alternatives=1))
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


def run_studies(quick: bool = False, out_dir: Optional[str] = None) -> Dict[str, object]:
    t0 = time.time()
    sizes = dict(n_truths=2, n_seeds=1, n_demos=6, n_particles=1000, n_alternatives=200) \
        if quick else dict(n_truths=8, n_seeds=3, n_demos=10, n_particles=2000,
                           n_alternatives=300)
    dup = study_duplicates()
    ds = study_dense_sparse(n_seeds=3 if quick else 10)
    arm = study_arm_people(**sizes)
    rob = study_set_robustness(n_sets=5 if quick else 10, n_demos=6 if quick else 8,
                               n_particles=sizes['n_particles'],
                               n_alternatives=sizes['n_alternatives'])
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
    figures['validate_wall_s'] = time.time() - t0
    result = {'quick': quick, 'figures': figures, 'duplicates': dup, 'dense_sparse': ds,
              'arm_people': arm, 'set_robustness': rob}
    if out_dir:
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        (out / 'validation.json').write_text(json.dumps(result, indent=1))
        for name, part in (('duplicates', dup), ('dense_sparse', ds), ('arm_people', arm),
                           ('set_robustness', rob)):
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
