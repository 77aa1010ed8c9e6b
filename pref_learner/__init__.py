# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""pref_learner: learn what a person teaching a robot arm cares about.

The core (everything outside :mod:`pref_learner.ros`) is plain numpy, scipy
and pinocchio and imports without ROS 2.
"""

__version__ = '0.1.0'
