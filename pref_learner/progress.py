# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Progress bars for long work (tqdm on a terminal, silent otherwise)."""

import contextlib
import sys

_quiet = False


def progress(iterable, desc: str, total=None):
    """Wrap ``iterable`` in a tqdm bar on stderr when stderr is a terminal."""
    try:
        from tqdm import tqdm
    except ImportError:  # pragma: no cover
        return iterable
    return tqdm(iterable, desc=desc, total=total, leave=False,
                disable=_quiet or not sys.stderr.isatty())


@contextlib.contextmanager
def quiet():
    """Show no bars while inside (a worker process: the caller shows one bar for all)."""
    global _quiet
    was, _quiet = _quiet, True
    try:
        yield
    finally:
        _quiet = was
