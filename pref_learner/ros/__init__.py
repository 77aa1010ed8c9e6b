# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
