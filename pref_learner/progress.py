# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Progress bars for long work (tqdm on a terminal, silent otherwise)."""

import sys


def progress(iterable, desc: str, total=None):
    """Wrap ``iterable`` in a tqdm bar on stderr when stderr is a terminal."""
    try:
        from tqdm import tqdm
    except ImportError:  # pragma: no cover
        return iterable
    return tqdm(iterable, desc=desc, total=total, leave=False, disable=not sys.stderr.isatty())
