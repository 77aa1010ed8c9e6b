# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Follows a demo session from the learner node's status topic (used by ``pref-learner demo``)."""

import json
import sys
import time

import numpy as np


def watch_session(n_demonstrations, truth, learner):
    """Follow the learner node's status until n demonstrations are in; print progress."""
    import rclpy
    from diagnostic_msgs.msg import DiagnosticArray
    from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
    from std_msgs.msg import Bool
    qos = QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                     durability=DurabilityPolicy.TRANSIENT_LOCAL)
    state = {'n': 0, 'status': {}, 'demo_on': None, 'proposal': None}
    deadline = time.time() + 60 + n_demonstrations * 20
    with rclpy.init():
        node = rclpy.create_node('pref_learner_demo_watch')

        def on_status(msg):
            for st in msg.status:
                vals = {kv.key: kv.value for kv in st.values}
                state['status'][vals.get('model')] = vals

        def on_demo(msg):
            state['demo_on'] = time.time() if msg.data else None

        node.create_subscription(DiagnosticArray, '/pref_learner/status', on_status, qos)
        node.create_subscription(Bool, '/simulated_teacher/demonstrating', on_demo, 10)
        try:
            from tqdm import tqdm
        except ImportError:  # pragma: no cover
            tqdm = None
        bar = None
        while time.time() < deadline:
            rclpy.spin_once(node, timeout_sec=0.1)
            if learner.poll() is not None:
                raise RuntimeError(f'the learner node exited with code {learner.returncode}')
            # a demonstration is done once its settled estimate is out (learned and
            # stored); the provisional and updated ones come earlier, while it is learned
            settled = [int(v.get('demonstrations', 0)) for v in state['status'].values()
                       if v.get('estimate', 'settled') == 'settled']
            done = min(settled, default=0) if len(settled) == len(state['status']) \
                else state['n']
            if state['demo_on'] is not None and bar is None and tqdm is not None \
                    and sys.stdout.isatty():
                bar = tqdm(total=30, desc=f'demonstration {done + 1}', leave=False,
                           bar_format='{desc}: {bar} {elapsed}')
            if bar is not None:
                if state['demo_on'] is None:
                    bar.close()
                    bar = None
                else:
                    bar.n = min(30, int((time.time() - state['demo_on']) * 30 / 3.6))
                    bar.refresh()
            if done > state['n']:
                state['n'] = done
                parts = []
                for m, v in sorted(state['status'].items()):
                    w = np.array(json.loads(v['weights']))
                    parts.append(f'{m}: cos {w @ truth:+.2f}, concentration '
                                 f'{float(v["concentration"]):.3f}, ESS {float(v["ess"]):.0f}')
                print(f'after demonstration {done}: ' + '; '.join(parts), flush=True)
            first = next(iter(state['status'].values()), {})
            proposal = (first.get('next_task', ''), first.get('next_task_gain', ''))
            if proposal[0] and proposal != state['proposal'] and done < n_demonstrations:
                state['proposal'] = proposal
                if bar is not None:
                    bar.clear()
                print(f'next task proposed: {proposal[0]} (expected information gain '
                      f'{float(proposal[1]):.3f} nats)', flush=True)
            if done >= n_demonstrations:
                break
        if bar is not None:
            bar.close()
        node.destroy_node()
