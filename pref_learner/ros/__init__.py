# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The ROS 2 shell: nodes, their parameters and message conversions (the only rclpy users).

A node process uses one BLAS thread unless its environment says otherwise:
the learner's products are mid-sized and many, and on a few cores a
multi-threaded BLAS fights the executor's threads and the worker for them
(on two cores a fourth-order expansion of 200 stored sets took 18 ms on one
thread and up to 1.8 s on several under load). Set here, before the node
modules import numpy; a value already in the environment is kept.
"""

import os

for _name in ('OPENBLAS_NUM_THREADS', 'OMP_NUM_THREADS', 'MKL_NUM_THREADS'):
    os.environ.setdefault(_name, '1')
