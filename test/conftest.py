# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Test-session setup: DDS confined to this machine before any rclpy.init()."""

import os
import random

# Network rule: discovery on loopback only, and a random domain per session.
os.environ['ROS_AUTOMATIC_DISCOVERY_RANGE'] = 'LOCALHOST'
os.environ.setdefault('ROS_DOMAIN_ID', str(random.SystemRandom().randint(1, 101)))
os.environ.setdefault('MPLBACKEND', 'Agg')
