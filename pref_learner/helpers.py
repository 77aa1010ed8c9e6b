# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Helper processes that finish choice-set rows alongside the learner's own thread.

A choice set's rows are retimed, conditioned and featurised in fixed pieces
(:data:`~pref_learner.task.CHOICE_CHUNK` rows, see
:meth:`~pref_learner.task.TaskModel.choice_set`); the kinematics of those
pieces is most of a demonstration's time before its estimate. The
interpreter lock keeps threads from running them side by side, so
:class:`ChoiceHelpers` runs some pieces in processes of their own, each with
the session's task model built once from its record. The pieces are the same
whichever process finishes them, so the values are too. A helper that fails
is closed and its pieces are finished in the caller's thread: a choice set
never fails because a helper did.

The helpers import only the functional core (never ``rclpy``): they take no
part in any ROS graph.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing as mp
from typing import Callable, Optional

import numpy as np

_TASK = None          # the task model of a helper process


def _start_helper(record) -> None:
    global _TASK
    from .task import TaskModel
    _TASK = TaskModel.from_record(record)


def _finish(raw: np.ndarray):
    return _TASK.finish_rows(raw)


def _ready() -> bool:
    return _TASK is not None


class ChoiceHelpers:
    """``processes`` helper processes that finish choice-set pieces for one task record.

    The constructor keeps its arguments; :meth:`start` starts the processes
    (spawned: clean interpreters, one BLAS thread each) and waits until each
    has built its task model; :meth:`close` stops them.
    """

    def __init__(self, record, processes: int = 1):
        if int(processes) < 1:
            raise ValueError(f'processes must be >= 1, got {processes}')
        self.record = record
        self.processes = int(processes)
        self.error = ''               # why the helpers were closed, if they failed
        self._pool: Optional[cf.ProcessPoolExecutor] = None

    @property
    def running(self) -> bool:
        return self._pool is not None

    def start(self, timeout: float = 120.0) -> 'ChoiceHelpers':
        """Start the processes and wait (at most ``timeout`` s) until they are ready."""
        from .study import WORKER_ENV, _environment
        if self._pool is not None:
            return self
        with _environment(WORKER_ENV):
            self._pool = cf.ProcessPoolExecutor(self.processes,
                                                mp_context=mp.get_context('spawn'),
                                                initializer=_start_helper,
                                                initargs=(self.record,))
        try:
            for f in [self._pool.submit(_ready) for _ in range(self.processes)]:
                if not f.result(timeout=timeout):
                    raise RuntimeError('a helper process has no task model')
        except BaseException:
            self.close()
            raise
        return self

    def submit(self, raw: np.ndarray) -> Optional[cf.Future]:
        """Hand one piece of raw alternatives ``(k, T, n)`` to a helper; None when closed."""
        if self._pool is None:
            return None
        try:
            return self._pool.submit(_finish, raw)
        except Exception as exc:  # noqa: BLE001 -- a broken pool: finish in the caller
            self._fail(exc)
            return None

    def result(self, future: Optional[cf.Future], local: Callable):
        """Return the helper's result, or ``local()`` if there is none or it failed."""
        if future is not None:
            try:
                return future.result()
            except cf.process.BrokenProcessPool as exc:
                self._fail(exc)
            except Exception:  # noqa: BLE001 -- the piece's own error: local() meets it again
                pass
        return local()

    def _fail(self, exc: BaseException) -> None:
        self.error = f'{type(exc).__name__}: {exc}'
        self.close()

    def close(self) -> None:
        """Stop the processes (pieces still queued are finished by their callers)."""
        pool, self._pool = self._pool, None
        if pool is not None:
            pool.shutdown(wait=False, cancel_futures=True)
