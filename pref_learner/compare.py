# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Which choice model explains a person's demonstrations better.

Two pieces of evidence, from a state directory's stored demonstrations:

* leave-one-out predictive log-likelihood: for each demonstration, the
  posterior from all the others (same pipeline, same seeds), then
  ``log sum_p w_p P(held-out choice | theta_p)`` under each model;
* robustness: the spread (mean angle to their common direction) of each
  model's estimate when the alternative sets are redrawn with other seeds.
"""

from __future__ import annotations

from dataclasses import fields

import numpy as np
from scipy.special import logsumexp

from .demonstrations import Demonstration, prepare
from .learner import Learner, LearnerConfig
from .posterior import ParticlePosterior
from .progress import progress
from .store import StateStore

MODELS = ('boltzmann', 'less')


def _config_from_manifest(manifest: dict, **over) -> LearnerConfig:
    known = {f.name for f in fields(LearnerConfig)}
    cfg = {k: v for k, v in (manifest.get('config') or {}).items() if k in known}
    cfg.pop('state_dir', None)
    cfg.update(over)
    if 'joint_names' in cfg:
        cfg['joint_names'] = tuple(cfg['joint_names'])
    return LearnerConfig(**cfg)


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
    cfg = _config_from_manifest(manifest, **over)
    L = Learner(cfg)
    demos = [Demonstration(d['t'], d['q'], tuple(str(x) for x in d['joint_names']),
                           int(d['stamp_ns'])) for d in raw]
    sets = []
    for i, d in enumerate(demos):
        q = prepare(d, L.prepare_config, L.robot)
        sets.append(L.choice_set(q, i)[1])
    k = len(sets)
    loo = {m: [] for m in MODELS}
    for m in MODELS:
        pcfg = cfg.posterior_config(m)
        for i in progress(range(k), f'leave-one-out ({m})'):
            rng = np.random.default_rng([cfg.seed, i, 99])
            post = ParticlePosterior.create(pcfg, L.features.d, rng)
            for j in range(k):
                if j != i:
                    post, _ = post.update((sets[j], 0), rng)
            rec = post.prepare(sets[i], 0)
            ll = post.record_loglik(rec, post.theta, post.beta)
            loo[m].append(float(logsumexp(post.log_weights + ll)))
    spreads = {}
    means = {m: [] for m in MODELS}
    for s in progress(range(n_sets), 'redrawn alternative sets'):
        Ls = Learner(_config_from_manifest(manifest, **dict(over, seed=cfg.seed + 1000 + s)))
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
    better = max(tot, key=tot.get)
    other = min(tot, key=tot.get)
    diff = tot[better] - tot[other]
    per = np.asarray(loo[better]) - np.asarray(loo[other])
    lines = [f'demonstrations: {k}; alternatives per set: {cfg.n_alternatives}',
             'leave-one-out predictive log-likelihood (higher explains better):']
    for m in MODELS:
        lines.append(f'  {m:9s} total {tot[m]:10.3f}   per demonstration '
                     f'{np.mean(loo[m]):8.3f}')
    lines.append('spread of the estimate over redrawn alternative sets (lower is steadier):')
    for m in MODELS:
        lines.append(f'  {m:9s} {spreads[m]:.4f} rad over {n_sets} sets')
    strength = ('clearly' if diff > 2.0 and np.mean(per > 0) >= 0.7 else 'slightly')
    lines.append(f'verdict: {better} {strength} better explains these demonstrations '
                 f'(log-likelihood +{diff:.2f}, better on {int(np.sum(per > 0))} of {k})'
                 f'; steadier estimate: {min(spreads, key=spreads.get)}')
    return {'loo': loo, 'loo_total': tot, 'spread_rad': spreads, 'better': better,
            'text': '\n'.join(lines)}
