# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""``pref-learner``: the command line (demo, watch, learn, report, compare, study, ...).

Errors are one line on stderr and exit code 2 (``--debug`` shows the traceback).
The demo keeps DDS discovery on this machine (ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST,
no static peers) whatever the environment says, unless ``--allow-network``; its
simulated person publishes only on its own namespaced topic. Every screen that
shows learned weights carries the one-line caution of :mod:`pref_learner.safety`.
"""

from __future__ import annotations

import argparse
import itertools
import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from .safety import CAUTION, SIMULATED_JOINT_STATES, network_exposure, private_session


class CliError(Exception):
    """A user-facing error: printed as one line, exit code 2."""


def _ros_env(allow_network: bool) -> dict:
    """Set this process's DDS environment for the demo and return it for the children.

    Loopback only (forced, static peers dropped) and a fresh random domain, so the
    simulated session meets no other node on this machine either, unless
    ``allow_network`` (then the user's settings stay, loopback if none).
    """
    if allow_network:
        os.environ.setdefault('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
        os.environ.setdefault('ROS_DOMAIN_ID', str(random.SystemRandom().randint(1, 101)))
        return dict(os.environ)
    was = network_exposure()
    private_session(os.environ)
    if was:
        print(f'pref-learner demo: discovery forced to this machine (was: {was}); '
              '--allow-network keeps yours', file=sys.stderr)
    return dict(os.environ)


# ---------------------------------------------------------------- demo
def demo_commands(args, state: Path, bag: Path, truth: np.ndarray):
    """Return the learner's and the simulated teacher's command lines for the demo.

    The learner reads the teacher's private joint states, never ``/joint_states``.
    """
    py = sys.executable
    learner_cmd = [py, '-m', 'pref_learner.ros.learner_node', '--ros-args',
                   '-p', f'model:={args.model}', '-p', f'state_dir:={state}',
                   '-p', f'record_bag:={bag}', '-p', f'n_particles:={args.particles}',
                   '-p', f'n_alternatives:={args.alternatives}', '-p', f'seed:={args.seed}',
                   *_beta_params(args),
                   '-r', f'joint_states:={SIMULATED_JOINT_STATES}', '--log-level', 'warn']
    teacher_cmd = [py, '-m', 'pref_learner.ros.teacher_node', '--ros-args',
                   '-p', f'true_weights:={list(map(float, truth))}',
                   '-p', f'model:={args.person}', '-p', f'beta:={float(args.person_beta)}',
                   '-p', f'n_demonstrations:={args.demonstrations}',
                   '-p', f'seed:={args.seed + 1}', '-p', 'start_delay:=4.0',
                   '-p', f'allow_network:={str(args.allow_network).lower()}',
                   '-p', f'follow_proposals:={str(args.guided).lower()}',
                   '--log-level', 'warn']
    return learner_cmd, teacher_cmd


def _demo_truth(args) -> np.ndarray:
    """Return the simulated person's unit weights: given, or the scenario's example."""
    from .features import FeatureConfigError, load_scenario
    if args.true_weights is not None:
        truth = np.asarray(args.true_weights, dtype=np.float64)
    else:
        try:
            truth = load_scenario()['example_preference']
        except (OSError, FeatureConfigError) as exc:
            raise CliError(f'--true-weights not given and the scenario cannot give them: {exc}')
        if truth is None:
            raise CliError('--true-weights not given and the feature file has no '
                           'scenario.example_preference')
    if not np.all(np.isfinite(truth)) or not np.linalg.norm(truth) > 0:
        raise CliError(f'--true-weights must be finite and not all zero, got {truth.tolist()}')
    return truth / np.linalg.norm(truth)


def cmd_demo(args) -> int:
    env = _ros_env(args.allow_network)
    out = Path(args.out).resolve()
    stamp = time.strftime('%Y%m%d-%H%M%S')
    state = out / f'state-{stamp}'
    bag = out / f'session-{stamp}'
    out.mkdir(parents=True, exist_ok=True)
    truth = _demo_truth(args)
    learner_cmd, teacher_cmd = demo_commands(args, state, bag, truth)
    print(f'pref-learner demo: a simulated person ({args.person} chooser, beta '
          f'{args.person_beta}) '
          f'teaches {args.demonstrations} tube transfers on the bench arm'
          f'{" (the task the learner proposes each time)" if args.guided else ""}; '
          f'ROS_DOMAIN_ID={env["ROS_DOMAIN_ID"]}, '
          f'discovery {env["ROS_AUTOMATIC_DISCOVERY_RANGE"]}')
    t0 = time.time()
    learner = subprocess.Popen(learner_cmd, env=env)
    teacher = subprocess.Popen(teacher_cmd, env=env)
    try:
        from .ros.demo_watch import watch_session
        watch_session(args.demonstrations, truth, learner)
    finally:
        for p in (teacher, learner):
            if p.poll() is None:
                p.send_signal(signal.SIGINT)
        for p in (teacher, learner):
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()
    from .learner import Learner, LearnerConfig
    final = Learner(LearnerConfig(model=args.model, state_dir=str(state),
                                  n_particles=args.particles, n_alternatives=args.alternatives,
                                  seed=args.seed, **_beta_config(args)))
    names = final.names
    print()
    print(CAUTION)
    print('feature'.ljust(30) + 'true'.rjust(7) + ''.join(
        f'{m + " mean":>16}{"90% interval":>18}' for m in final.config.models))
    sums = final.summaries()
    for j, n in enumerate(names):
        row = n.ljust(30) + f'{truth[j]:7.2f}'
        for m in final.config.models:
            s = sums[m]
            row += f'{s.mean[j]:16.2f}{"[" + f"{s.ci_low[j]:.2f}, {s.ci_high[j]:.2f}" + "]":>18}'
        print(row)
    hist = final.history_diagnostics()
    result = {'wall_s': time.time() - t0, 'n_demonstrations': final.n_demonstrations,
              'guided': bool(args.guided),
              'information_gain': [h.get('information_gain', {}) for h in hist],
              'true_weights': truth.tolist(), 'feature_names': list(names),
              'cosine': {m: float(sums[m].mean @ truth) for m in final.config.models},
              'state_dir': str(state), 'bag': str(bag)}
    print()
    from .guidance import unknown_lines
    for m in final.config.models:
        for line in unknown_lines(sums[m], names):
            print(f'still unknown, {m}: {line}')
    for line in estimate_notes(final):
        print(line)
    for m in final.config.models:
        got = [h.get('information_gain', {}).get(m) for h in hist]
        if got and None not in got:
            print(f'information gained per demonstration, {m} (nats): '
                  + ', '.join(f'{x:.2f}' for x in got))
    for m, c in result['cosine'].items():
        print(f'cosine(estimate, truth) {m}: {c:.3f}')
    print(f'demonstrations accepted: {final.n_demonstrations}; '
          f'rejected: {len(final.rejections)}')
    from .report import write_report
    report = write_report(state, out / f'report-{stamp}')
    result['report'] = str(report)
    print(f'state directory: {state}')
    print(f'session bag:     {bag}')
    print(f'report:          {report}')
    (out / 'demo_result.json').write_text(json.dumps(result, indent=1))
    if final.n_demonstrations < args.demonstrations:
        raise CliError(f'only {final.n_demonstrations} of {args.demonstrations} demonstrations '
                       'reached the learner')
    return 0


# ---------------------------------------------------------------- watch
def cmd_watch(args) -> int:
    from .ros.watch import watch
    return watch(args.namespace, args.duration)


# ---------------------------------------------------------------- learn
def cmd_learn(args) -> int:
    from .bags import BagDamaged, BagWriter, estimate_arrays, read_stream, replay_bag
    from .learner import Learner, StepResult
    bag = Path(args.bag)
    if not bag.exists():
        raise CliError(f'bag {bag} does not exist')
    out = Path(args.out)
    if out.exists() and any(out.iterdir()):
        raise CliError(f'output directory {out} is not empty')
    try:
        cfg, node_only = session_config(args, state_dir=str(out / 'state'))
    except ValueError as exc:
        raise CliError(str(exc)) from None
    # streamed (an hour of 1 kHz joint states is gigabytes as a list); the first event is
    # read before anything is written, so a bag that cannot be read leaves no output
    events = read_stream(bag, args.joint_topic, args.teaching_topic, args.learner_node)
    try:
        first = next(events, None)
    except Exception as exc:  # noqa: BLE001 -- storage and CDR errors vary
        if isinstance(exc, ValueError):        # read_stream's own, naming what is wrong
            raise
        raise CliError(f'bag {bag} cannot be read: {type(exc).__name__}: {exc}') from None
    if first is None:
        raise CliError(f'bag {bag} has no joint states')
    from .progress import progress
    L = Learner(cfg, task=_bag_task(args, bag))
    L.recorder.set_max_skew(float(node_only.get('max_stamp_skew', 0.0)))
    w = BagWriter(out / 'estimates')
    n_ok = 0
    notes = []

    def write_estimates(outputs, event):
        # after each learned demonstration, and after a discard or reset (as the node)
        nonlocal n_ok
        learned = sum(isinstance(r, StepResult) for r in outputs)
        n_ok += learned
        if learned or event.removes_demonstrations:
            for m, post in L.posteriors.items():
                pre = '' if len(L.posteriors) == 1 else f'{m}/'
                for topic, (data, dims) in estimate_arrays(post.summary(), post).items():
                    w.write(f'/pref_learner/{pre}{topic}', w.float_array(data, dims),
                            event.log_ns)
    try:
        notes = replay_bag(L, progress(itertools.chain([first], events), 'learning'),
                           write_estimates).notes
    except BagDamaged as exc:          # what came before the damage is learned
        notes = [str(exc)]
    finally:
        w.close()
    if L.n_demonstrations == 0:
        why = sorted({r['reason'] for r in L.rejections})
        raise CliError(f'learned no demonstration from bag {bag}'
                       + (f' ({n_ok} learned, then discarded or reset)' if n_ok else '')
                       + (f' ({len(L.rejections)} rejected: {", ".join(why)})' if why else '')
                       + ''.join(f'; {n}' for n in notes))
    for note in notes:
        print(f'note: {note}', file=sys.stderr)
    sums = L.summaries()
    print(CAUTION, file=sys.stderr)
    print(json.dumps({'demonstrations': L.n_demonstrations, 'rejected': len(L.rejections),
                      'feature_names': list(L.names), 'notes': notes,
                      'weights': {m: s.mean.tolist() for m, s in sums.items()}}, indent=1))
    return 0


# ---------------------------------------------------------------- bench
def cmd_bench(args) -> int:
    from .bench import run_benchmarks
    res = run_benchmarks(quick=args.quick, parts=args.only or None,
                         out_dir=Path(args.json).parent if args.json else None)
    text = json.dumps(res, indent=1, sort_keys=True)
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(text)
    print(text)
    return 0


# ---------------------------------------------------------------- validate
def cmd_validate(args) -> int:
    from .validate import run_studies
    if args.workers < 1:
        raise CliError(f'--workers must be >= 1, got {args.workers}')
    res = run_studies(quick=args.quick, out_dir=args.out, n_jobs=args.workers,
                      scheduler=args.scheduler)
    text = json.dumps(res['figures'], indent=1, sort_keys=True)
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(text)
    print(text)
    print(f'studies written to {args.out}')
    return 0


# ---------------------------------------------------------------- study
def cmd_study(args) -> int:
    from .study import run_study, summary_lines
    folder = Path(args.folder)
    if not folder.is_dir():
        raise CliError(f'study folder {folder} is not a directory')
    if args.workers < 1:
        raise CliError(f'--workers must be >= 1, got {args.workers}')
    res = run_study(folder, args.params, args.out, workers=args.workers,
                    scheduler=args.scheduler, feature_modules=args.feature_module)
    print(CAUTION)
    print(f'{res["n_ok"]} of {res["n_participants"]} participants analysed on '
          f'{res["backend"]} in {res["wall_s"]:.1f} s')
    for line in summary_lines(res):
        print(line)
    print(f'report: {res["report"]}')
    print(f'tables: {Path(args.out) / "participants.parquet"}, '
          f'{Path(args.out) / "demonstrations.parquet"}; summary: '
          f'{Path(args.out) / "summary.json"}')
    return 0


# ---------------------------------------------------------------- report
def _state_from(src: Path, tmp: Path, args) -> Path:
    """Return a state directory: ``src`` itself, or learned offline from a bag."""
    if (src / 'manifest.json').exists():
        return src
    if (src / 'metadata.yaml').exists():
        ns = argparse.Namespace(**vars(args))
        ns.bag, ns.out = str(src), str(tmp)
        cmd_learn(ns)
        return tmp / 'state'
    raise CliError(f'{src} is neither a state directory (manifest.json) nor a rosbag2 bag '
                   '(metadata.yaml)')


def cmd_report(args) -> int:
    import tempfile
    from .report import write_report
    src = Path(args.source)
    if not src.exists():
        raise CliError(f'{src} does not exist')
    if (src / 'manifest.json').exists():
        given = [f'--{k.replace("_", "-")}' for k in _SESSION_OPTIONS
                 if getattr(args, k, None) not in (None, [], '')]
        if given:
            print(f'note: a state directory is reported as it was learned; ignored: '
                  f'{", ".join(given)}', file=sys.stderr)
    with tempfile.TemporaryDirectory() as tmp:
        state = _state_from(src, Path(tmp) / 'learned', args)
        path = write_report(state, Path(args.out))
    print(f'report written to {path}')
    return 0


def cmd_compare(args) -> int:
    from .compare import compare_models
    src = Path(args.state)
    if not (src / 'manifest.json').exists():
        raise CliError(f'{src} is not a state directory (no manifest.json)')
    res = compare_models(src, n_sets=args.sets, n_particles=args.particles,
                         n_alternatives=args.alternatives)
    if args.json:
        Path(args.json).write_text(json.dumps(res, indent=1))
    print(res['text'])
    print(CAUTION)
    return 0


class _Parser(argparse.ArgumentParser):
    """Argument errors as one line (and exit code 2), like every other error."""

    def error(self, message):
        self.exit(2, f'{self.prog}: {message} (see --help)\n')


#: the options of ``learn`` that decide what is learned (a state directory has its own)
_SESSION_OPTIONS = ('model', 'particles', 'alternatives', 'beta', 'seed', 'params_file', 'urdf',
                    'features', 'joints', 'tool_frame', 'joint_topic', 'teaching_topic',
                    'learner_node')


def _learning_options(p, choices=None, session: bool = False) -> None:
    """Add the settings that decide what is learned (demo, learn and report).

    ``session``: also the node's parameters file and the robot options, and no
    defaults here (:func:`session_config` fills them).
    """
    d = (lambda v: None) if session else (lambda v: v)    # noqa: E731
    p.add_argument('--model', default=d('both'), choices=choices,
                   help='boltzmann, less or both (default both; with --params-file the '
                   "file's, else the node's default less)")
    p.add_argument('--particles', type=int, default=d(4000), help='(default 4000)')
    p.add_argument('--alternatives', type=int, default=d(500), help='(default 500)')
    p.add_argument('--beta', type=float, default=None,
                   help='fix the rationality at this value (default: inferred, log-uniform '
                   'prior on 0.5-50)')
    p.add_argument('--seed', type=int, default=d(0), help='(default 0)')
    if session:
        p.add_argument('--params-file', metavar='PARAMS.yaml',
                       help="the learner node's ROS 2 parameters file (pref_learner: "
                       'ros__parameters:); its settings apply, options given here win')
        p.add_argument('--urdf', help='URDF file of the robot (default: the shipped bench arm)')
        p.add_argument('--features', help='feature YAML (default: the shipped scenario)')
        p.add_argument('--joints', nargs='+', metavar='JOINT',
                       help='chain joints in order (default: root to the tool frame)')
        p.add_argument('--tool-frame', help='frame the features read by default (tool_tip)')
        p.add_argument('--joint-topic', help='the bag\'s sensor_msgs/JointState topic '
                       '(default: its only one)')
        p.add_argument('--teaching-topic', help='the bag\'s std_msgs/Bool teaching signal '
                       '(default: the learner node\'s, else the only Bool topic whose name '
                       'ends in "teaching")')
        p.add_argument('--learner-node', metavar='NAME',
                       help='the learner node whose session topics the bag is read with, '
                       'by full name (e.g. /pref_learner; default: the only one in the bag)')


def _bag_task(args, bag: Path):
    """Return the task model a learner node recorded in ``bag`` (None: make one).

    Used unless a parameters file or a robot option (``--urdf``, ``--features``,
    ``--joints``, ``--tool-frame``) says otherwise; ``--model``,
    ``--alternatives`` and ``--beta`` change its settings.
    """
    from .bags import read_task_record
    from .task import TaskModel, TaskRecord
    if any(getattr(args, k, None) for k in ('params_file', 'urdf', 'features', 'joints',
                                            'tool_frame')):
        return None
    text = read_task_record(bag, args.learner_node)
    if text is None:
        return None
    over = {k: v for k, v in (('model', args.model), ('n_alternatives', args.alternatives))
            if v is not None}
    over.update(_beta_config(args))
    return TaskModel.from_record(TaskRecord.from_json(text).with_settings(**over))


def session_config(args, state_dir: str = ''):
    """Return the LearnerConfig of ``learn``'s options and the node-only parameters.

    With ``--params-file`` the node's parameters file gives every setting it
    names and the node's defaults the rest (so a live session is learned
    again as the node learned it); without it, the command's defaults apply.
    Options given on the command line come last.
    """
    from .learner import LearnerConfig, read_parameters_file
    settings, node_only = {}, {}
    if getattr(args, 'params_file', None):
        settings, node_only = read_parameters_file(args.params_file)
    else:
        settings = {'model': 'both'}
    given = {'model': args.model, 'n_particles': args.particles,
             'n_alternatives': args.alternatives, 'seed': args.seed,
             'urdf': getattr(args, 'urdf', None), 'features': getattr(args, 'features', None),
             'tool_frame': getattr(args, 'tool_frame', None)}
    settings.update({k: v for k, v in given.items() if v is not None})
    if getattr(args, 'joints', None):
        settings['joint_names'] = tuple(args.joints)
    settings.update(_beta_config(args))
    settings['state_dir'] = state_dir
    return LearnerConfig(**settings), node_only


def _beta_config(args) -> dict:
    """Return the learner settings for ``--beta`` (fixed) or its absence (inferred)."""
    if args.beta is None:
        return {}
    return {'beta': float(args.beta), 'beta_min': 0.0, 'beta_max': 0.0}


def _beta_params(args) -> list:
    """Return the learner node's ``--ros-args`` for the same choice."""
    out = []
    for k, v in _beta_config(args).items():
        out += ['-p', f'{k}:={float(v)}']
    return out


def estimate_notes(learner) -> list:
    """Lines on rationality, option model, checks and moves of a learner's estimates."""
    from .report import estimate_note_lines
    return estimate_note_lines(learner.summaries(), learner.option_labels(),
                               learner.history_diagnostics())


def _feature_module_option(p) -> None:
    p.add_argument('--feature-module', action='append', default=[], metavar='MODULE',
                   help='let user feature types (module:function) load from MODULE; repeat '
                   'for several. Without it a feature file, state directory or bag never '
                   'imports code')


def _executor_options(p, what: str) -> None:
    p.add_argument('--workers', type=int, default=1,
                   help=f'local worker processes for {what} (default 1)')
    p.add_argument('--scheduler', metavar='ADDR',
                   help='run on this Dask distributed scheduler instead (tcp://host:port); '
                   'its workers must see the same files at the same paths')


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog='pref-learner', description=(
        'Learn what a person teaching a robot arm cares about (weights over task features).'))
    p.add_argument('--debug', action='store_true', help='show tracebacks on errors')
    sub = p.add_subparsers(dest='command', required=True, parser_class=_Parser)

    d = sub.add_parser('demo', help='simulated teaching session over ROS 2 on this machine')
    d.add_argument('--out', default='out/demo', help='output directory (default out/demo)')
    from .choice import MODEL_CHOICES, MODEL_NAMES
    _learning_options(d, choices=list(MODEL_CHOICES))
    d.add_argument('--person', default='less', choices=list(MODEL_NAMES),
                   help='how the simulated person chooses')
    d.add_argument('--person-beta', type=float, default=5.0,
                   help="the simulated person's rationality (the learner does not know it)")
    d.add_argument('--demonstrations', type=int, default=8)
    d.add_argument('--true-weights', type=float, nargs='+', default=None,
                   help="the simulated person's weights in feature order (default: the "
                   "scenario's example_preference)")
    d.add_argument('--guided', action='store_true',
                   help='the simulated person demonstrates the task the learner proposes '
                   '(most informative next) instead of the scenario\'s tasks in turn')
    d.add_argument('--allow-network', action='store_true',
                   help='keep your ROS_AUTOMATIC_DISCOVERY_RANGE / ROS_STATIC_PEERS instead of '
                   'forcing loopback (the simulated person then publishes onto that network)')
    d.set_defaults(func=cmd_demo)

    w = sub.add_parser('watch', help='follow a running learner node in the terminal (only '
                       'subscribes)')
    w.add_argument('--namespace', default='/pref_learner',
                   help="the learner node's namespace and name (default /pref_learner)")
    w.add_argument('--duration', type=float, default=None,
                   help='stop after this many seconds (default: until Ctrl-C)')
    w.set_defaults(func=cmd_watch)

    lrn = sub.add_parser('learn', help='learn offline from the joint states of a rosbag2 bag')
    lrn.add_argument('bag')
    lrn.add_argument('--out', required=True, help='new directory for state and estimates bag')
    _learning_options(lrn, session=True)
    _feature_module_option(lrn)
    lrn.set_defaults(func=cmd_learn)

    v = sub.add_parser('validate', help='the validation studies of the two choice models')
    v.add_argument('--out', default='out/validate', help='directory for JSON and PNG files')
    v.add_argument('--json', help='also write the summary figures to this file')
    v.add_argument('--quick', action='store_true', help='small sizes')
    _executor_options(v, 'the calibration study\'s simulated sessions')
    v.set_defaults(func=cmd_validate)

    st = sub.add_parser('study', help='analyse a folder of sessions (one per participant) '
                        'together: estimates, model comparison, population')
    st.add_argument('folder', help='one state directory or rosbag2 bag per participant')
    st.add_argument('--params', required=True, metavar='PARAMS.yaml',
                    help='learner settings (flat keys or a ROS 2 params file) and an optional '
                    'study: block (group_angle, min_group, n_groups, leave_one_out, joint_topic, '
                    'teaching_topic, learner_node)')
    st.add_argument('--out', required=True, help='new directory for report, tables, summary')
    _executor_options(st, 'participants')
    _feature_module_option(st)
    st.set_defaults(func=cmd_study)

    r = sub.add_parser('report', help='HTML report of a state directory or a bag')
    r.add_argument('source', help='state directory, or a bag to learn from first')
    r.add_argument('--out', required=True, help='directory for report.html and PNGs')
    _learning_options(r, session=True)
    _feature_module_option(r)
    r.set_defaults(func=cmd_report)

    c = sub.add_parser('compare', help='which choice model explains these demonstrations')
    c.add_argument('state', help='state directory')
    c.add_argument('--sets', type=int, default=10, help='redrawn alternative sets')
    c.add_argument('--particles', type=int, default=2000)
    c.add_argument('--alternatives', type=int, default=0,
                   help='alternatives per demonstration (0: as stored)')
    c.add_argument('--json', help='write the numbers to this file')
    _feature_module_option(c)
    c.set_defaults(func=cmd_compare)

    b = sub.add_parser('bench', help='benchmark figures as JSON')
    b.add_argument('--json', help='write the figures to this file')
    b.add_argument('--quick', action='store_true', help='fewer repetitions, shorter runs')
    b.add_argument('--only', nargs='+',
                   choices=['core', 'speed', 'planner', 'node', 'demo', 'validate',
                            'calibration', 'guidance', 'study'],
                   help='run only these groups')
    b.set_defaults(func=cmd_bench)
    return p


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        from .features import allow_feature_modules
        allow_feature_modules(getattr(args, 'feature_module', []))
        return args.func(args)
    except (CliError, ValueError, OSError, RuntimeError) as exc:
        if args.debug:
            raise
        print(f'pref-learner {args.command}: {exc}', file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == '__main__':
    sys.exit(main())
