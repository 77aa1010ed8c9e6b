# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""``pref-learner watch``: follow a running learner node in the terminal.

Subscribes to the node's latched ``~/status`` and prints, whenever it
changes, each weight with its 90 % interval, the rationality, what is still
unknown, the proposed next task with its expected gain, and a line for each
demonstration accepted or refused (with the reason). It only subscribes:
it declares no parameters, serves nothing, logs nothing to ``/rosout`` and
drops the ``/parameter_events`` publisher that every rclpy node creates.
"""

from __future__ import annotations

import json
import os
import sys
import time
from typing import Dict, List, Optional

from ..safety import CAUTION


def _floats(text: str) -> List[float]:
    try:
        return [float(x) for x in json.loads(text)]
    except (TypeError, ValueError):
        return []


def render(namespace: str, models: Dict[str, dict]) -> List[str]:
    """Return the screen for the latest status values of each model."""
    lines = [CAUTION, f'learner {namespace}']
    first = next(iter(models.values()))
    names = json.loads(first.get('feature_names', '[]'))
    lines.append(f'demonstrations accepted {first.get("accepted", "?")}, refused '
                 f'{first.get("rejected", "?")}')
    for m, v in models.items():
        mean, lo, hi = (_floats(v.get(k, '[]')) for k in
                        ('weights', 'weights_ci90_low', 'weights_ci90_high'))
        lines.append(f'model {m}: rationality (beta) {float(v.get("beta_mean", "nan")):.2f}, '
                     f'90% interval {v.get("beta_ci90", "?")}'
                     + (' (inferred)' if v.get('beta_inferred') == 'true' else ' (fixed)'))
        if v.get('beta_warning'):
            lines.append(f'  WARNING: {v["beta_warning"]}')
        lines.append(f'  {"weight":<32}{"mean":>8}   90% interval')
        for j, n in enumerate(names):
            if j < len(mean):
                band = f'[{lo[j]:+.2f}, {hi[j]:+.2f}]' if j < len(lo) and j < len(hi) else ''
                lines.append(f'  {n:<32}{mean[j]:+8.2f}   {band}')
        for u in json.loads(v.get('unknown', '[]') or '[]'):
            lines.append(f'  still unknown: {u}')
    task = first.get('next_task', '')
    if task:
        lines.append(f'next task to teach: {task} (expected gain '
                     f'{float(first.get("next_task_gain", "nan")):.3f} nats)')
        lines.append(f'  start {first.get("next_task_start", "")}')
        lines.append(f'  goal  {first.get("next_task_goal", "")}')
    return lines


def events(before: Optional[dict], now: dict) -> List[str]:
    """Return lines for demonstrations accepted or refused between two status values."""
    if before is None:
        return []
    out = []
    a0, a1 = int(before.get('accepted', 0)), int(now.get('accepted', 0))
    r0, r1 = int(before.get('rejected', 0)), int(now.get('rejected', 0))
    for k in range(a0 + 1, a1 + 1):
        out.append(f'demonstration {k} accepted')
    if a1 < a0:
        out.append(f'demonstrations discarded or reset: {a1} remain')
    if r1 > r0:
        out.append(f'demonstration refused ({r1 - r0}): {now.get("last_rejection", "")}')
    return out


_KEYS = ('accepted', 'rejected', 'weights', 'weights_ci90_low', 'weights_ci90_high',
         'beta_mean', 'unknown', 'next_task', 'next_task_gain')


def watch(namespace: str = '/pref_learner', duration: Optional[float] = None,
          out=sys.stdout) -> int:
    """Follow the learner at ``namespace`` until interrupted or ``duration`` seconds."""
    import rclpy
    from rclpy.executors import ExternalShutdownException
    from diagnostic_msgs.msg import DiagnosticArray
    from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
    os.environ.setdefault('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
    ns = '/' + namespace.strip('/')
    qos = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                     durability=DurabilityPolicy.TRANSIENT_LOCAL)
    clear = getattr(out, 'isatty', lambda: False)()
    state = {'models': None, 'sig': None, 'common': None}
    log: List[str] = []
    print(CAUTION, file=out, flush=True)
    print(f'following {ns}/status (only subscribing; Ctrl-C to stop)', file=out, flush=True)

    def on_status(msg):
        models = {}
        for st in msg.status:
            vals = {kv.key: kv.value for kv in st.values}
            models[vals.get('model', st.name)] = vals
        if models:
            state['models'] = models

    with rclpy.init():
        node = rclpy.create_node('pref_learner_watch', enable_rosout=False,
                                 start_parameter_services=False)
        # every rclpy node creates a /parameter_events publisher: this one publishes nothing
        pub = getattr(node, '_parameter_event_publisher', None)
        if pub is not None:
            node.destroy_publisher(pub)
            node._parameter_event_publisher = None
        node.create_subscription(DiagnosticArray, f'{ns}/status', on_status, qos)
        deadline = None if duration is None else time.monotonic() + duration
        try:
            while rclpy.ok() and (deadline is None or time.monotonic() < deadline):
                rclpy.spin_once(node, timeout_sec=0.1)
                models = state['models']
                if models is None:
                    continue
                first = next(iter(models.values()))
                sig = json.dumps({m: [v.get(k) for k in _KEYS] for m, v in models.items()})
                if sig == state['sig']:
                    continue
                new = [f'[{time.strftime("%H:%M:%S")}] {line}'
                       for line in events(state['common'], first)]
                log = (log + new)[-10:]
                state['sig'], state['common'] = sig, first
                if clear:           # a terminal: redraw the screen, recent events below
                    print('\x1b[2J\x1b[H' + '\n'.join(render(ns, models) + log), file=out,
                          flush=True)
                else:               # a pipe or a file: new events, then the screen
                    print('\n'.join(new + render(ns, models)) + '\n', file=out, flush=True)
        except (KeyboardInterrupt, ExternalShutdownException):
            pass        # Ctrl-C: during spin_once rclpy's handler shuts the context down first
        finally:
            node.destroy_node()
    return 0
