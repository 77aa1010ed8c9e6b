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
#: Distributions without the discovery range: only ``ROS_LOCALHOST_ONLY=1`` keeps them local.
LOCALHOST_ONLY_DISTROS = ('foxy', 'galactic', 'humble')
#: Middleware configuration that can name peers on other machines.
PROFILE_VARIABLES = ('FASTRTPS_DEFAULT_PROFILES_FILE', 'FASTDDS_DEFAULT_PROFILES_FILE',
                     'CYCLONEDDS_URI', 'ROS_DISCOVERY_SERVER')


def _localhost_only(env: Mapping[str, str]) -> bool:
    """Tell whether ``env`` names a distribution that reads ``ROS_LOCALHOST_ONLY`` only."""
    return env.get('ROS_DISTRO', '').strip().lower() in LOCALHOST_ONLY_DISTROS


def network_exposure(env: Optional[Mapping[str, str]] = None) -> str:
    """Say why DDS discovery could reach other machines, or return '' if it cannot.

    Reads ``ROS_AUTOMATIC_DISCOVERY_RANGE`` (unset counts as the ROS 2
    default, SUBNET) and ``ROS_STATIC_PEERS`` (any peer is another host); on
    a distribution without the range (``ROS_DISTRO`` Humble or older)
    ``ROS_LOCALHOST_ONLY`` instead. A middleware profile
    (:data:`PROFILE_VARIABLES`) counts too: it can list other hosts.
    """
    env = os.environ if env is None else env
    reasons = []
    if _localhost_only(env):
        only = env.get('ROS_LOCALHOST_ONLY', '').strip()
        if only != '1':
            reasons.append(f'ROS_DISTRO={env["ROS_DISTRO"].strip().lower()} reads '
                           'ROS_LOCALHOST_ONLY, which is '
                           f'{only or "unset (0)"}')
    else:
        rng = env.get('ROS_AUTOMATIC_DISCOVERY_RANGE', '').strip().upper()
        peers = env.get('ROS_STATIC_PEERS', '').strip()
        if rng not in LOCAL_RANGES:
            reasons.append(f'ROS_AUTOMATIC_DISCOVERY_RANGE={rng or "(unset: SUBNET)"}')
        if peers:
            reasons.append(f'ROS_STATIC_PEERS={peers}')
    reasons += [f'{v}={env[v]} (middleware configuration can name other hosts)'
                for v in PROFILE_VARIABLES if env.get(v, '').strip()]
    return ', '.join(reasons)


def default_local(env) -> None:
    """Make loopback discovery the default of ``env`` (a mutable mapping); set values stay."""
    env.setdefault('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
    if _localhost_only(env):
        env.setdefault('ROS_LOCALHOST_ONLY', '1')          # Humble has no range


def keep_local(env) -> None:
    """Set ``env`` (a mutable mapping) to loopback discovery: range, Humble's flag, no peers."""
    env['ROS_AUTOMATIC_DISCOVERY_RANGE'] = 'LOCALHOST'
    if _localhost_only(env):
        env['ROS_LOCALHOST_ONLY'] = '1'
    for v in ('ROS_STATIC_PEERS',) + PROFILE_VARIABLES:
        env.pop(v, None)


def private_session(env) -> str:
    """Confine ``env`` (a mutable mapping) to loopback and a fresh random domain; return it.

    For the simulated sessions (the demo, the benchmarks): they publish on the
    learner's own topic names, so they share neither the network nor the
    user's domain (a learner of a real robot on this host would take them).
    """
    import random
    keep_local(env)
    env['ROS_DOMAIN_ID'] = str(random.SystemRandom().randint(1, 101))
    return env['ROS_DOMAIN_ID']


def refuse_network_reason(allow_network: bool,
                          env: Optional[Mapping[str, str]] = None) -> str:
    """Return a one-line refusal for a simulated source on a network, or '' when it may run."""
    why = network_exposure(env)
    if not why or allow_network:
        return ''
    return (f'refusing to publish simulated joint states: {why} would let them reach other '
            'machines; use ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST (ROS_LOCALHOST_ONLY=1 on '
            'Humble) and no middleware profile, or allow_network:=true (--allow-network) if '
            'you mean it')


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
