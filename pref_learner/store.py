# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Durable state directory: demonstrations are the record, the posterior is derived.

Layout of a state directory::

    manifest.json                 schema version, configuration hash, model(s), seeds
    task.json                     the task record: URDF and feature texts, joints, tool
                                  frame, fixed scales, settings (pref_learner.task)
    demos/demo_000001.npz         one file per accepted demonstration (t, q, names, seed);
                                  the number is the demonstration's seed index
    posterior_<model>.npz/.json   the latest posterior per model
    rejections.jsonl              one line per rejected demonstration (time, reason)
    history.jsonl                 one line per learned demonstration (summaries)
    quarantine/                   stored demonstrations that could not be replayed, each
                                  with a .txt saying why (the others keep their numbers)
    discarded/                    demonstrations removed by discard_last
    archive/<stamp>/              earlier sessions moved aside by a reset

Every file is written atomically (temporary file, fsync, rename, fsync of the
directory), so a kill -9 at any instant leaves either the old or the new
file, never a half-written one; an append that fails is cut back to where it
began. Only a torn last line of a JSON-lines file (no final newline: a kill
during the append) is skipped when reading; any other undecodable line is an
error naming the file and line. Nothing is pickled: arrays go through
``numpy.savez`` and are read with ``allow_pickle=False``.

OS errors while writing (no space, no permission) do not lose data: the
write is kept in memory in order (:attr:`StateStore.pending`), :attr:`error`
says what failed, and every later write first retries the pending ones, in
order, so the directory never holds a posterior ahead of its demonstrations.
"""

from __future__ import annotations

import errno
import io
import json
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import List, Optional, Tuple

import numpy as np

SCHEMA_VERSION = 1


def _fsync_dir(path: Path) -> None:
    fd = os.open(str(path), os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def atomic_write_bytes(path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers see the old or the new file only."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix='.' + path.name + '.', suffix='.tmp', dir=path.parent)
    try:
        with os.fdopen(fd, 'wb') as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    _fsync_dir(path.parent)


def describe_os_error(exc: OSError) -> str:
    """Describe the error in one line: ``ENOSPC: No space left on device: <path>``."""
    name = errno.errorcode.get(exc.errno, type(exc).__name__) if exc.errno else \
        type(exc).__name__
    where = f': {exc.filename}' if exc.filename else ''
    return f'{name}: {exc.strerror or exc}{where}'


def append_line(path, line: str) -> None:
    """Append one line durably; a torn tail is cut first, a failed append is cut back."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, 'ab+') as f:
        f.seek(0, os.SEEK_END)
        end = f.tell()
        if end:
            f.seek(end - 1)
            if f.read(1) != b'\n':             # a torn line from a kill: cut it
                f.seek(0)
                data = f.read()
                end = data.rfind(b'\n') + 1
                f.truncate(end)
        try:
            f.seek(end)
            f.write(line.encode() + b'\n')
            f.flush()
            os.fsync(f.fileno())
        except BaseException:
            f.truncate(end)
            raise


def read_jsonl(path) -> List[dict]:
    """Read a JSON-lines file; only a torn last line (no final newline) is skipped."""
    path = Path(path)
    if not path.exists():
        return []
    text = path.read_text()
    lines = text.split('\n')
    lines.pop()      # '' after the final newline, or a torn line from a kill during an append
    out = []
    for i, line in enumerate(lines, 1):
        try:
            out.append(json.loads(line))
        except json.JSONDecodeError as exc:
            raise ValueError(f'{path}:{i}: undecodable line ({exc.msg}); only a torn last '
                             'line is tolerated') from None
    return out


def npz_bytes(arrays: dict) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **{k: np.asarray(v) for k, v in arrays.items()})
    return buf.getvalue()


def read_npz(path) -> dict:
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def diagnostics_by_index(history: List[dict]) -> List[dict]:
    """Each history entry's diagnostics at its demonstration's seed index (``{}`` in gaps).

    A quarantined demonstration keeps its index and has no history entry, so
    the others keep their numbers (``index + 1``) on every screen.
    """
    n = 1 + max((int(h['index']) for h in history), default=-1)
    out: List[dict] = [{} for _ in range(n)]
    for h in history:
        out[int(h['index'])] = h.get('diagnostics') or {}
    return out


class StateStore:
    """A state directory on disk."""

    def __init__(self, root):
        self.root = Path(root)
        self.error = ''                # the last OS error while writing; '' when healthy
        self.pending: List[Tuple] = []   # writes that failed, retried in order
        self.posterior_dirty = False     # the posterior on disk is behind the one in memory

    # ------------------------------------------------------------ write journal
    def _journal(self, entry: Tuple) -> None:
        """Write ``entry`` now, or keep it (after any earlier pending write) on OS errors."""
        if self.pending and not self.flush():
            self.pending.append(entry)
            return
        try:
            self._write(entry)
        except OSError as exc:
            self.error = describe_os_error(exc)
            self.pending.append(entry)

    def _write(self, entry: Tuple) -> None:
        kind = entry[0]
        if kind == 'demo':
            atomic_write_bytes(self.demo_dir / f'demo_{entry[1]:06d}.npz', npz_bytes(entry[2]))
        elif kind == 'line':
            append_line(self.root / entry[1], json.dumps(entry[2]))
        elif kind == 'rewrite':
            data = ''.join(json.dumps(e) + '\n' for e in entry[2])
            atomic_write_bytes(self.root / entry[1], data.encode())

    def flush(self) -> bool:
        """Retry the pending writes in order; True when none is left (``error`` cleared)."""
        while self.pending:
            try:
                self._write(self.pending[0])
            except OSError as exc:
                self.error = describe_os_error(exc)
                return False
            self.pending.pop(0)
        if not self.posterior_dirty:
            self.error = ''
        return True

    def fail(self, exc: OSError) -> None:
        """Note an OS error of a write made elsewhere (the posterior files)."""
        self.error = describe_os_error(exc)

    def forget_demo(self, index: int) -> None:
        """Drop demonstration ``index``: its pending write and its file."""
        self.pending = [e for e in self.pending if not (e[0] == 'demo' and e[1] == index)]
        (self.demo_dir / f'demo_{index:06d}.npz').unlink(missing_ok=True)

    # ------------------------------------------------------------ manifest
    @property
    def manifest_path(self) -> Path:
        return self.root / 'manifest.json'

    def read_manifest(self) -> Optional[dict]:
        if not self.manifest_path.exists():
            return None
        try:
            m = json.loads(self.manifest_path.read_text())
        except (OSError, json.JSONDecodeError) as exc:
            raise ValueError(f'state manifest {self.manifest_path} is unreadable: {exc}') from None
        if m.get('schema_version') != SCHEMA_VERSION:
            raise ValueError(f'state directory {self.root} has schema version '
                             f'{m.get("schema_version")!r}; this version reads {SCHEMA_VERSION}')
        return m

    def write_manifest(self, manifest: dict) -> None:
        m = dict(manifest)
        m['schema_version'] = SCHEMA_VERSION
        m['written_at'] = time.time()
        atomic_write_bytes(self.manifest_path, json.dumps(m, indent=1, sort_keys=True).encode())

    # ------------------------------------------------------------ task record
    @property
    def task_record_path(self) -> Path:
        return self.root / 'task.json'

    def read_task_record(self) -> Optional[str]:
        """Return the stored task record's JSON text (None when there is none)."""
        try:
            return self.task_record_path.read_text()
        except FileNotFoundError:
            return None

    def write_task_record(self, text: str) -> None:
        """Store the task record's JSON text (atomically)."""
        atomic_write_bytes(self.task_record_path, text.encode())

    # ------------------------------------------------------------ demonstrations
    @property
    def demo_dir(self) -> Path:
        return self.root / 'demos'

    def demo_paths(self) -> List[Path]:
        if not self.demo_dir.exists():
            return []
        return sorted(p for p in self.demo_dir.glob('demo_*.npz') if p.stem[5:].isdigit())

    def demo_index(self, path: Path) -> int:
        """Return the seed index a stored demonstration's file name carries."""
        try:
            return int(path.stem.split('_', 1)[1])
        except (IndexError, ValueError):
            raise ValueError(f'{path} is not named demo_<index>.npz') from None

    def write_demo(self, index: int, arrays: dict) -> None:
        """Store demonstration ``index`` (kept pending on OS errors, see :meth:`flush`)."""
        self._journal(('demo', index, dict(arrays)))

    def read_demo(self, path: Path) -> dict:
        """Read one stored demonstration; a file that does not load is a ``ValueError``."""
        try:
            return read_npz(path)
        except Exception as exc:  # noqa: BLE001 -- zipfile/numpy errors vary
            raise ValueError(f'stored demonstration {path} is unreadable: '
                             f'{type(exc).__name__}: {exc}') from None

    def read_demos(self) -> List[dict]:
        """Every stored demonstration, in order; a file that does not load is an error."""
        return [self.read_demo(p) for p in self.demo_paths()]

    def quarantine_demo(self, path: Path, reason: str) -> Path:
        """Move a stored demonstration that cannot be replayed to ``quarantine/``."""
        qdir = self.root / 'quarantine'
        qdir.mkdir(parents=True, exist_ok=True)
        dest = qdir / f'{path.stem}_{int(time.time() * 1e3)}.npz'
        os.replace(path, dest)
        _fsync_dir(path.parent)
        atomic_write_bytes(dest.with_suffix('.txt'), (reason + '\n').encode())
        return dest

    def remove_last_demo(self) -> Optional[Path]:
        paths = self.demo_paths()
        if not paths:
            return None
        trash = self.root / 'discarded'
        trash.mkdir(parents=True, exist_ok=True)
        dest = trash / f'{paths[-1].stem}_{int(time.time() * 1e3)}.npz'
        os.replace(paths[-1], dest)
        _fsync_dir(self.demo_dir)
        return dest

    # ------------------------------------------------------------ posterior
    def posterior_path(self, model: str) -> Path:
        return self.root / f'posterior_{model}'

    # ------------------------------------------------------------ rejections
    def append_rejection(self, entry: dict) -> None:
        self._journal(('line', 'rejections.jsonl', entry))

    def read_rejections(self) -> List[dict]:
        return read_jsonl(self.root / 'rejections.jsonl')

    # ------------------------------------------------------------ history
    def append_history(self, entry: dict) -> None:
        self._journal(('line', 'history.jsonl', entry))

    def read_history(self) -> List[dict]:
        return read_jsonl(self.root / 'history.jsonl')

    def rewrite_history(self, entries: List[dict]) -> None:
        # a rewrite supersedes every pending history line
        self.pending = [e for e in self.pending if e[1] != 'history.jsonl']
        self._journal(('rewrite', 'history.jsonl', list(entries)))

    # ------------------------------------------------------------ reset
    def archive(self) -> Optional[Path]:
        """Move the whole state aside to ``archive/<stamp>``; return where it went."""
        if not self.root.exists():
            return None
        entries = [p for p in self.root.iterdir() if p.name != 'archive']
        if not entries:
            return None
        dest = self.root / 'archive' / time.strftime('%Y%m%d-%H%M%S') / ''
        dest = Path(str(dest))
        n = 0
        while dest.exists():
            n += 1
            dest = Path(f'{dest}_{n}')
        dest.mkdir(parents=True)
        for p in entries:
            shutil.move(str(p), str(dest / p.name))
        _fsync_dir(self.root)
        self.pending, self.posterior_dirty, self.error = [], False, ''   # that session's
        return dest
