# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The one safety caution every screen shows, and the network checks of simulated sources.

No ROS imports: the command line, the report and the nodes all take their text from here.
"""

from __future__ import annotations

import os
from typing import Mapping, Optional

#: One line, for terminals and logs, on every screen that shows learned weights or plans.
CAUTION = ('CAUTION: a learned preference is not a safety function; the robot\'s certified '
           'safety functions stay in force; local regulations, ISO 10218-1:2025 / '
           'ISO 10218-2:2025, ISO/TS 15066 and an ISO 12100 risk assessment come first.')

#: The planner node's start-up warning about what it publishes.
PLANNER_WARNING = ('~/trajectory carries unchecked proposals, timed to the URDF velocity '
                   'limits and max_tool_speed (not to the limits your risk assessment sets): '
                   'never wire it to a controller without the controller stack\'s own '
                   'limit, collision and speed checks.')

#: The simulated teacher's private joint-state topic (its node's ``~/joint_states``);
#: the demo and the launch file remap the learner's ``joint_states`` to it.
SIMULATED_JOINT_STATES = '/simulated_teacher/joint_states'

#: Discovery ranges that keep DDS traffic on this machine.
LOCAL_RANGES = ('LOCALHOST', 'OFF')


def network_exposure(env: Optional[Mapping[str, str]] = None) -> str:
    """Say why DDS discovery could reach other machines, or return '' if it cannot.

    Reads ``ROS_AUTOMATIC_DISCOVERY_RANGE`` (unset counts as the ROS 2
    default, SUBNET) and ``ROS_STATIC_PEERS`` (any peer is another host).
    """
    env = os.environ if env is None else env
    rng = env.get('ROS_AUTOMATIC_DISCOVERY_RANGE', '').strip().upper()
    peers = env.get('ROS_STATIC_PEERS', '').strip()
    reasons = []
    if rng not in LOCAL_RANGES:
        reasons.append(f'ROS_AUTOMATIC_DISCOVERY_RANGE={rng or "(unset: SUBNET)"}')
    if peers:
        reasons.append(f'ROS_STATIC_PEERS={peers}')
    return ', '.join(reasons)


def refuse_network_reason(allow_network: bool,
                          env: Optional[Mapping[str, str]] = None) -> str:
    """Return a one-line refusal for a simulated source on a network, or '' when it may run."""
    why = network_exposure(env)
    if not why or allow_network:
        return ''
    return (f'refusing to publish simulated joint states: {why} would let them reach other '
            'machines; use ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST, or allow_network:=true '
            '(--allow-network) if you mean it')


def allow_network_requested(argv, param: str = 'allow_network') -> bool:
    """Tell whether ROS command-line arguments set ``param`` true, before ``rclpy.init``.

    Reads ``-p [node:]param:=value`` and the ``ros__parameters`` of every
    ``--params-file`` (as ``ros2 launch`` passes them), so a node can refuse
    before it creates any DDS participant.
    """
    import yaml
    argv = list(argv or [])
    found = False
    for flag, value in zip(argv, argv[1:]):
        if flag in ('-p', '--param'):
            name, _, v = value.partition(':=')
            if name.rpartition(':')[2] == param:
                found = v.strip().lower() == 'true'
        elif flag == '--params-file':
            try:
                doc = yaml.safe_load(open(value).read()) or {}
            except (OSError, yaml.YAMLError):
                continue
            for section in (doc.values() if isinstance(doc, dict) else ()):
                params = section.get('ros__parameters', {}) if isinstance(section, dict) else {}
                if param in params:
                    found = params[param] is True or str(params[param]).lower() == 'true'
    return found
