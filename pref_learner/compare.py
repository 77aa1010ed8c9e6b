# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Which choice model explains a person's demonstrations better.

Two pieces of evidence, from a state directory's stored demonstrations:

* leave-one-out predictive log-probability: for each demonstration, the
  posterior from all the others, then ``log sum_p w_p P(held-out choice |
  theta_p)`` under each model, on a set that depends only on the task (not on
  the held-out path); the verdict needs a paired t statistic of the
  per-demonstration differences beyond Student's t critical value (95 %,
  two-sided, k - 1 degrees of freedom), else it says the data cannot tell;
* robustness: the spread (mean angle to their common direction) of each
  model's estimate when the alternative sets are redrawn with other seeds.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Dict, List, Sequence

import numpy as np
from scipy.special import logsumexp

from .demonstrations import Demonstration, prepare
from .learner import Learner, stored_session
from .posterior import ChoiceRecord, ParticlePosterior
from .progress import progress
from .store import StateStore

from .choice import MODEL_NAMES as MODELS  # the registry's models, in one place


def stored_learner(state_dir, **over) -> Learner:
    """Return a learner (no state directory of its own) with a session's settings.

    Its task model is the state directory's stored record (robot, features,
    scales: nothing is rebuilt from the shipped defaults), with the task
    settings in ``over`` changed; a directory without a record is rebuilt
    from its settings with its stored scales.
    """
    cfg, record = stored_session(state_dir, **over)
    if record is not None:
        from .task import TaskModel
        task_over = {k: v for k, v in over.items() if k in record.settings()}
        task = TaskModel.from_record(record.with_settings(**task_over), cfg.planner_jobs)
        return Learner(cfg, task=task)
    scales = StateStore(state_dir).read_manifest().get('scales')
    return Learner(cfg, scales=scales or None)


def _record(post: ParticlePosterior, r) -> ChoiceRecord:
    return r if isinstance(r, ChoiceRecord) else post.prepare(r[0], 0, *r[1:])


def loo_scores(records: Sequence, configs: dict,
               d: int, seed: int = 0) -> Dict[str, List[float]]:
    """Leave-one-out predictive log-probability of each held-out choice, per model.

    ``records``: a posterior's stored :class:`ChoiceRecord` or ``(features (K, d),
    groups (K,)[, deviation (K,)])`` (row 0 chosen) per demonstration;
    ``configs``: model -> :class:`PosteriorConfig`. For held-out
    demonstration i the posterior is built from all the others, then scored
    on ``log sum_p w_p P(row 0 | theta_p, beta_p, level_p)`` with the choice
    probability alone: the set only depends on the task's start and goal (and
    on the other demonstrations), never on the held-out path.
    """
    k = len(records)
    out = {m: [] for m in configs}
    for m, pcfg in configs.items():
        for i in progress(range(k), f'leave-one-out ({m})'):
            rng = np.random.default_rng([seed, i, 99])
            post = ParticlePosterior.create(pcfg, d, rng)
            for j in range(k):
                if j != i:
                    post, _ = post.update(_record(post, records[j]), rng)
            rec = _record(post, records[i])
            ll = post.record_loglik(rec, post.theta, post.beta, post.level, with_density=False)
            out[m].append(float(logsumexp(post.log_weights + ll)))
    return out


def verdict(loo: Dict[str, List[float]], level: float = 0.95) -> dict:
    """Which model predicts the held-out choices better, or that the data cannot tell.

    A paired t-test (Student 1908) on the per-demonstration differences of the
    two models' scores: ``t = sum / (sqrt(k) sd)``; a model is named only when
    ``|t|`` exceeds the two-sided ``level`` quantile of Student's t with k - 1
    degrees of freedom (2.05 at 30 demonstrations, 12.7 at 2), else the
    verdict is that the data cannot tell.
    """
    from scipy import stats
    a, b = MODELS
    diff = np.asarray(loo[b]) - np.asarray(loo[a])
    k = len(diff)
    total = float(diff.sum())
    sd = float(diff.std(ddof=1)) if k > 1 else float('nan')
    t = total / (math.sqrt(k) * sd) if k > 1 and sd > 0 else float('nan')
    crit = float(stats.t.ppf(0.5 + level / 2, k - 1)) if k > 1 else float('inf')
    better = (b if total > 0 else a) if abs(t) >= crit else None
    return {'better': better, 'z': float(t), 'critical': crit, 'difference': total,
            'wins': {b: int(np.sum(diff > 0)), a: int(np.sum(diff < 0))}}


def stored_choice_sets(store: StateStore, learner: Learner):
    """Return the stored demonstrations and their ``(features, groups, deviation)`` sets.

    Each set is drawn with the seed index its file carries, as the live
    learner drew it (a quarantined demonstration leaves a gap in the indices).
    """
    demos, records = [], []
    for path in store.demo_paths():
        demo = Demonstration.from_arrays(store.read_demo(path))
        q = prepare(demo, learner.prepare_config, learner.robot)
        allq, feats, groups = learner.choice_set(q, store.demo_index(path))
        demos.append(demo)
        records.append((feats, groups, learner.path_deviation(allq)))
    return demos, records


def compare_models(state_dir, n_sets: int = 10, n_particles: int = 2000,
                   n_alternatives: int = 0) -> dict:
    store = StateStore(state_dir)
    manifest = store.read_manifest()
    if manifest is None:
        raise ValueError(f'{state_dir} has no manifest.json')
    raw = store.read_demos()
    if len(raw) < 2:
        raise ValueError(f'{state_dir} holds {len(raw)} demonstration(s); compare needs >= 2')
    over = {'model': 'both', 'n_particles': n_particles}
    if n_alternatives:
        over['n_alternatives'] = n_alternatives
    L = stored_learner(state_dir, **over)
    cfg = L.config
    demos, records = stored_choice_sets(store, L)
    k = len(records)
    loo = loo_scores(records, {m: cfg.posterior_config(m) for m in MODELS}, L.features.d,
                     cfg.seed)
    spreads = {}
    means = {m: [] for m in MODELS}
    for s in progress(range(n_sets), 'redrawn alternative sets'):
        Ls = Learner(replace(cfg, seed=cfg.seed + 1000 + s), task=L.task)
        for d in demos:
            Ls.process(d)
        for m, sm in Ls.summaries().items():
            means[m].append(sm.mean)
    for m in MODELS:
        arr = np.asarray(means[m])
        c = arr.mean(0)
        c /= np.linalg.norm(c)
        spreads[m] = float(np.mean(np.arccos(np.clip(arr @ c, -1, 1))))
    tot = {m: float(np.sum(v)) for m, v in loo.items()}
    v = verdict(loo)
    lines = [f'demonstrations: {k}; alternatives per set: {cfg.n_alternatives}',
             'leave-one-out predictive log-probability of the held-out choices '
             '(higher predicts better):']
    for m in MODELS:
        lines.append(f'  {m:9s} total {tot[m]:10.3f}   per demonstration '
                     f'{np.mean(loo[m]):8.3f}')
    lines.append('spread of the estimate over redrawn alternative sets (lower is steadier):')
    for m in MODELS:
        lines.append(f'  {m:9s} {spreads[m]:.4f} rad over {n_sets} sets')
    steady = min(spreads, key=spreads.get)
    if v['better'] is None:
        lines.append(f'verdict: cannot tell which model explains these demonstrations better '
                     f'(difference {v["difference"]:+.2f}, paired t = {v["z"]:.2f}; needs '
                     f'|t| >= {v["critical"]:.2f}); steadier estimate: {steady}')
    else:
        lines.append(f'verdict: {v["better"]} explains these demonstrations better '
                     f'(paired t = {abs(v["z"]):.2f}, better on {v["wins"][v["better"]]} of {k})'
                     f'; steadier estimate: {steady}')
    return {'loo': loo, 'loo_total': tot, 'spread_rad': spreads, 'better': v['better'],
            'z': v['z'], 'text': '\n'.join(lines)}
