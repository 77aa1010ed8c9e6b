# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""HTML report with PNG plots, from a state directory's stored files only.

Plots: each weight's mean direction and 90% band after each demonstration;
final marginals per feature; for each demonstration its place in its
alternative set's feature density (the dense/sparse diagnostic); Boltzmann
and LESS side by side when both ran. Tables: final estimates, what is still
unknown (the posterior's weakest directions in words), each demonstration's
expected and realised information, and rejected demonstrations with their
reasons.
"""

from __future__ import annotations

import html
import json
import math
from pathlib import Path
from typing import Dict

import numpy as np

from .posterior import ParticlePosterior, set_log_similarity
from .safety import CAUTION
from .store import StateStore, diagnostics_by_index

COLOURS = {'boltzmann': '#1f77b4', 'less': '#d62728'}


#: Largest pooled within-set |correlation| at which two features' weights are
#: taken as separable (the shipped scenario is designed to stay below it).
SEPARABLE_R = 0.6


def _plt():
    import matplotlib
    matplotlib.use('Agg')
    import matplotlib.pyplot as plt
    return plt


def load_state(state_dir) -> dict:
    store = StateStore(state_dir)
    try:
        manifest = store.read_manifest()
    except ValueError as exc:
        raise ValueError(f'state directory {state_dir} is unreadable: {exc}') from None
    if manifest is None:
        raise ValueError(f'state directory {state_dir} has no manifest.json')
    posts = {}
    for m in manifest['models']:
        try:
            posts[m] = ParticlePosterior.load(store.posterior_path(m))
        except (OSError, ValueError, KeyError) as exc:
            raise ValueError(f'posterior of model {m} in {state_dir} is unreadable: {exc}') \
                from None
    return {'manifest': manifest, 'posteriors': posts, 'history': store.read_history(),
            'rejections': store.read_rejections()}


def _panels(n, cols, size, draw, title, path, legend=False):
    """Draw ``n`` panels on a grid with ``draw(i, ax)``, then save the figure."""
    plt = _plt()
    n = max(n, 1)
    cols = min(cols, n)
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(size[0] * cols, size[1] * rows),
                             squeeze=False)
    for i in range(rows * cols):
        ax = axes[i // cols][i % cols]
        if i < n:
            draw(i, ax)
        else:
            ax.axis('off')
    if legend:
        axes[0][0].legend(fontsize=8)
    fig.suptitle(title)
    fig.tight_layout()
    fig.savefig(path, dpi=80)
    plt.close(fig)


def _plot_history(names, history, models, path):
    def draw(j, ax):
        for m in models:
            hs = [h for h in history if m in h['summaries']]
            xs = [h['index'] + 1 for h in hs]
            s = [h['summaries'][m] for h in hs]
            ax.plot(xs, [x['mean'][j] for x in s], 'o-', color=COLOURS.get(m), label=m, ms=3)
            ax.fill_between(xs, [x['ci_low'][j] for x in s], [x['ci_high'][j] for x in s],
                            color=COLOURS.get(m), alpha=0.15)
        ax.axhline(0, color='k', lw=0.5)
        ax.set_title(names[j], fontsize=9)
        ax.set_xlabel('demonstrations', fontsize=8)
        ax.set_ylim(-1.05, 1.05)
    _panels(len(names), 3, (4, 2.6), draw,
            'mean direction (normalised posterior mean) and 90% interval of each weight',
            path, legend=True)


def _plot_marginals(names, posts, path):
    def draw(j, ax):
        for m, p in posts.items():
            ax.hist(p.theta[:, j], bins=40, range=(-1, 1), weights=p.weights, alpha=0.5,
                    color=COLOURS.get(m), label=m)
        ax.set_title(names[j], fontsize=9)
    _panels(len(names), 3, (4, 2.4), draw, 'final posterior marginals', path, legend=True)


def _plot_density(post, path, numbers):
    def draw(i, ax):
        r = post.records[i]
        ls = set_log_similarity([r], post.config.bandwidth)
        rel = ls - np.median(ls)
        ax.hist(rel, bins=30, color='0.6')
        ax.axvline(rel[r.chosen], color='k', lw=2)
        ax.set_title(f'demonstration {numbers[i]}', fontsize=9)
        ax.set_xlabel('log density rel. to median', fontsize=8)
    _panels(len(post.records), 4, (3.2, 2.4), draw,
            'each demonstration (black) within its set\'s feature density', path)


def plot_set(features, chosen: int, names, path) -> None:
    """Plot histograms of each feature over a choice set.

    ``features (K, d)``; the demonstration (row ``chosen``) is marked.
    """
    x = np.asarray(features)

    def draw(j, ax):
        ax.hist(np.delete(x[:, j], chosen), bins=30, color='0.6')
        ax.axvline(x[chosen, j], color='k', lw=2)
        ax.set_title(names[j], fontsize=9)
    _panels(x.shape[1], 3, (3.6, 2.4), draw,
            'alternatives (grey) and the demonstration (black)', path)


def estimate_note_lines(summaries, option_labels, diagnostics) -> list:
    """Plain-text lines on rationality, option model, posterior checks and moves.

    ``summaries``: model -> :class:`~pref_learner.posterior.Summary`;
    ``option_labels``: the option levels' names; ``diagnostics``: one dict
    per demonstration (``predictive_pvalue``, ``atypical``, ...).
    """
    lines = []
    for m, s in summaries.items():
        kind = 'inferred' if s.beta_inferred else 'fixed'
        lines.append(f'rationality (beta), {m}: mean {s.beta_mean:.2f}, 90% interval '
                     f'[{s.beta_ci[0]:.2f}, {s.beta_ci[1]:.2f}] ({kind})')
        if s.beta_at_low_end:
            lines.append(f'WARNING ({m}): {s.beta_low_mass:.0%} of the rationality\'s mass is '
                         'at the low end of its range: no weights explain these '
                         'demonstrations well; the features or the alternatives may be wrong')
        if len(s.level_probs) > 1 and len(option_labels) == len(s.level_probs):
            best = int(np.argmax(s.level_probs))
            lines.append(f'option model, {m}: ' + ', '.join(
                f'{lab} {p:.2f}' for lab, p in zip(option_labels, s.level_probs))
                + f' (most probable: {option_labels[best]})')
        if not math.isnan(s.acceptance):
            lines.append(f'moves, {m}: acceptance {s.acceptance:.2f}')
    flagged = [i + 1 for i, dg in enumerate(diagnostics) if dg.get('atypical')]
    checked = sum(1 for dg in diagnostics if dg)       # (a quarantined slot is empty)
    if checked:
        lines.append(f'posterior predictive check: {len(flagged)} of {checked} '
                     'demonstrations do not look like choices from the assumed options'
                     + (f' (#{", #".join(map(str, flagged))})' if flagged else ''))
    return lines


def estimate_status_values(summary, option_labels, diagnostics) -> Dict[str, str]:
    """Key/values for a status message: rationality, option model, checks, moves."""
    s = summary
    out = {'beta_mean': f'{s.beta_mean:.3f}',
           'beta_ci90': json.dumps([round(s.beta_ci[0], 3), round(s.beta_ci[1], 3)]),
           'beta_inferred': str(s.beta_inferred).lower(),
           'beta_low_end_mass': f'{s.beta_low_mass:.3f}',
           'beta_warning': ('rationality piles at the low end of its range: the features or '
                            'the alternatives may be wrong') if s.beta_at_low_end else '',
           'move_acceptance': 'nan' if math.isnan(s.acceptance) else f'{s.acceptance:.3f}',
           'option_levels': json.dumps(list(option_labels)),
           'option_level_probs': json.dumps([round(p, 4) for p in s.level_probs])}
    flagged = [i + 1 for i, dg in enumerate(diagnostics) if dg.get('atypical')]
    last = diagnostics[-1].get('predictive_pvalue', {}) if diagnostics else {}
    out['last_predictive_pvalue'] = json.dumps({m: round(v, 4) for m, v in last.items()})
    out['atypical_demonstrations'] = json.dumps(flagged)
    return out


def separation_note(names, sets) -> str:
    """One sentence on how well a session's choice sets separate the features."""
    from .alternatives import pooled_within_set_correlation, strongest_pair
    if not sets:
        return 'No choice sets yet: nothing to say about how well features are told apart.'
    r, a, b = strongest_pair(pooled_within_set_correlation(sets), names)
    verdict = ('every pair can be told apart' if r <= SEPARABLE_R else
               f'the weights of {a} and {b} are hard to tell apart: demonstrate tasks where '
               'they differ')
    return (f'Feature separation in this session\'s choice sets: largest within-set |r| '
            f'{r:.2f} ({a}, {b}); {verdict} (|r| <= {SEPARABLE_R}).')


def _table(names, summaries: Dict[str, dict]) -> str:
    head = '<tr><th>feature</th>' + ''.join(
        f'<th>{m} mean</th><th>{m} std</th><th>{m} 5%</th><th>{m} 95%</th>'
        for m in summaries) + '</tr>'
    rows = []
    for j, n in enumerate(names):
        cells = ''.join(
            f'<td>{s["mean"][j]:.4f}</td><td>{s["std"][j]:.4f}</td>'
            f'<td>{s["ci_low"][j]:.4f}</td><td>{s["ci_high"][j]:.4f}</td>'
            for s in summaries.values())
        rows.append(f'<tr><td>{html.escape(n)}</td>{cells}</tr>')
    return '<table id="final">' + head + ''.join(rows) + '</table>'


def write_report(state_dir, out_dir) -> Path:
    """Write ``report.html`` and its PNGs into ``out_dir``; returns the HTML path."""
    st = load_state(state_dir)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    names = st['manifest']['feature_names']
    posts = st['posteriors']
    models = list(posts)
    pngs = []
    _plot_history(names, st['history'], models, out / 'weights_history.png')
    pngs.append(('Weights after each demonstration', 'weights_history.png'))
    _plot_marginals(names, posts, out / 'marginals.png')
    pngs.append(('Final marginals', 'marginals.png'))
    first = posts[models[0]]
    if first.records:
        numbers = [h['index'] + 1 for h in st['history']]      # seed indices, as the tables
        if len(numbers) != len(first.records):
            numbers = list(range(1, len(first.records) + 1))
        _plot_density(first, out / 'set_density.png', numbers)
        pngs.append(('Demonstrations within their alternative sets', 'set_density.png'))
        plot_set(first.records[-1].features, first.records[-1].chosen, names,
                 out / 'last_set_features.png')
        pngs.append(('Last demonstration among its alternatives, per feature',
                     'last_set_features.png'))
    sums = {m: p.summary().to_dict() for m, p in posts.items()}
    rej = st['rejections']
    rej_rows = ''.join(f'<tr><td>{i + 1}</td><td>{html.escape(r["reason"])}</td>'
                       f'<td>{html.escape(r.get("detail", ""))}</td></tr>'
                       for i, r in enumerate(rej)) or '<tr><td colspan="3">none</td></tr>'

    def region(dg):
        return 'sparse' if dg['sparse'] else ('dense' if dg['dense'] else 'typical')

    def gained(dg):
        e, g = dg.get('expected_gain') or {}, dg.get('information_gain') or {}
        return '; '.join(f'{m} {e[m]:.3f} / {g[m]:.3f}' for m in e if m in g) or 'n/a'

    def check(dg):
        p = dg.get('predictive_pvalue') or {}
        vals = ', '.join(f'{m} {v:.3f}' for m, v in p.items())
        return f'{vals}{" (atypical)" if dg.get("atypical") else ""}'
    diag_rows = ''.join(
        f'<tr><td>{h["index"] + 1}</td><td>{h["diagnostics"]["relative_density"]:.3g}</td>'
        f'<td>{region(h["diagnostics"])}</td><td>{html.escape(check(h["diagnostics"]))}</td>'
        f'<td>{html.escape(gained(h["diagnostics"]))}</td></tr>' for h in st['history'])
    notes = estimate_note_lines({m: p.summary() for m, p in posts.items()},
                                st['manifest'].get('option_models') or [],
                                diagnostics_by_index(st['history']))
    notes_html = ''.join(f'<li>{html.escape(x)}</li>' for x in notes)
    sep_html = separation_note(names, [r.features for r in first.records])
    from .guidance import unknown_lines
    unknown_html = ''.join(f'<li>{html.escape(m)}: {html.escape(x)}</li>'
                           for m, p in posts.items() for x in unknown_lines(p.summary(), names))
    meta = {m: {'ess': f'{s["ess"]:.0f}', 'concentration': f'{s["concentration"]:.4f}',
                'demonstrations': s['n_demonstrations']} for m, s in sums.items()}
    imgs = ''.join(f'<h2>{html.escape(t)}</h2><img src="{f}" alt="{html.escape(t)}">'
                   for t, f in pngs)
    doc = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>pref_learner report</title>
<style>body{{font-family:sans-serif;margin:2em;max-width:1100px}}
table{{border-collapse:collapse;margin:1em 0}}td,th{{border:1px solid #bbb;padding:3px 8px;
text-align:right}}img{{max-width:100%}}</style></head><body>
<p id="caution" style="border:2px solid #c00;padding:0.5em 1em;text-align:left">
<strong>{html.escape(CAUTION)}</strong> Plans made from these weights are proposals for
the controller stack to check (README, Safety).</p>
<h1>pref_learner report</h1>
<p>State directory: <code>{html.escape(str(state_dir))}</code>. Models: {', '.join(models)}.
Demonstrations: {first.summary().n_demonstrations}; rejected: {len(rej)}.</p>
<p>Per model: {html.escape(json.dumps(meta))}</p>
<h2>Final estimate (unit-norm weights; 90% interval = 5% to 95%)</h2>
{_table(names, sums)}
<h2>Rationality, option model and checks</h2>
<ul id="notes">{notes_html}</ul>
<p id="separation">{html.escape(sep_html)}</p>
<h2>What is still unknown</h2>
<ul id="unknown">{unknown_html}</ul>
{imgs}
<h2>Demonstrations in their sets</h2>
<table id="density"><tr><th>demonstration</th><th>density / median</th><th>region</th>
<th>predictive p-value</th><th>information, nats: expected / gained</th></tr>
{diag_rows}</table>
<h2>Rejected demonstrations</h2>
<table id="rejected"><tr><th>#</th><th>reason</th><th>detail</th></tr>{rej_rows}</table>
</body></html>
"""
    path = out / 'report.html'
    path.write_text(doc)
    return path
