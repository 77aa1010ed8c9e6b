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
import os
import signal
import threading
from typing import Callable, Optional

import numpy as np

_TASK = None          # the task model of a helper process

#: longest wait for a helper's piece, s (a local piece takes tens of ms): past it the
#: helpers are stopped and the caller finishes the piece
PIECE_TIMEOUT_S = 10.0


def _exit_with(parent) -> None:
    """End this helper once its parent process is gone (however it ended)."""
    from multiprocessing.connection import wait
    wait([parent.sentinel])
    os._exit(0)


def _start_helper(record, modules) -> None:
    global _TASK
    # Ctrl+C belongs to the node, which stops its helpers; a killed node takes them along
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    threading.Thread(target=_exit_with, args=(mp.parent_process(),), daemon=True).start()
    from .features import allow_feature_modules
    from .task import TaskModel
    allow_feature_modules(modules)
    _TASK = TaskModel.from_record(record)


def _finish(raw: np.ndarray):
    return _TASK.finish_rows(raw)


def _ready() -> bool:
    return _TASK is not None


class ChoiceHelpers:
    """``processes`` helper processes that finish choice-set pieces for one task record.

    The constructor keeps its arguments; :meth:`start` starts the processes
    (spawned: clean interpreters, one BLAS thread each, the user feature
    modules this process allows) and waits until they answer with their task
    model built; :meth:`close` stops them. A helper ends by itself when its
    parent process is gone.
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
        from .features import allowed_feature_modules
        from .study import WORKER_ENV, _environment
        if self._pool is not None:
            return self
        with _environment(WORKER_ENV):
            self._pool = cf.ProcessPoolExecutor(
                self.processes, mp_context=mp.get_context('spawn'),
                initializer=_start_helper,
                initargs=(self.record, tuple(sorted(allowed_feature_modules()))))
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
        """Return the helper's result, or ``local()`` if there is none or it failed.

        A helper that died, or took longer than :data:`PIECE_TIMEOUT_S`, stops
        the helpers (:attr:`error` says why); the piece's own error is met
        again by ``local()``.
        """
        if future is not None:
            try:
                return future.result(timeout=PIECE_TIMEOUT_S)
            except (cf.BrokenExecutor, cf.TimeoutError) as exc:
                self._fail(exc if str(exc) else type(exc)(
                    f'no answer within {PIECE_TIMEOUT_S:g} s'))
            except Exception:  # noqa: BLE001 -- the piece's own error: local() meets it again
                pass
        return local()

    def _fail(self, exc: BaseException) -> None:
        self.error = f'{type(exc).__name__}: {exc}'
        self.close()

    def close(self) -> None:
        """Stop the processes, busy or not (queued pieces are finished by their callers)."""
        pool, self._pool = self._pool, None
        if pool is not None:
            # a busy or hung helper does not end on shutdown alone; the executor keeps its
            # processes in ``_processes`` (pid -> Process)
            for p in list(getattr(pool, '_processes', {}).values()):
                p.terminate()
            pool.shutdown(wait=False, cancel_futures=True)
