# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Durable state directory: demonstrations are the record, the posterior is derived.

Layout of a state directory::

    manifest.json                 schema version, configuration hash, model(s), seeds
    demos/demo_000001.npz         one file per accepted demonstration (t, q, names, seed)
    posterior_<model>.npz/.json   the latest posterior per model
    rejections.jsonl              one line per rejected demonstration (time, reason)
    archive/<stamp>/              earlier sessions moved aside by a reset

Every file is written atomically (temporary file, fsync, rename, fsync of the
directory), so a kill -9 at any instant leaves either the old or the new
file, never a half-written one. Nothing is pickled: arrays go through
``numpy.savez`` and are read with ``allow_pickle=False``.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import List, Optional

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


def npz_bytes(arrays: dict) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **{k: np.asarray(v) for k, v in arrays.items()})
    return buf.getvalue()


def read_npz(path) -> dict:
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


class StateStore:
    """A state directory on disk."""

    def __init__(self, root):
        self.root = Path(root)

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

    # ------------------------------------------------------------ demonstrations
    @property
    def demo_dir(self) -> Path:
        return self.root / 'demos'

    def demo_paths(self) -> List[Path]:
        if not self.demo_dir.exists():
            return []
        return sorted(p for p in self.demo_dir.glob('demo_*.npz'))

    def write_demo(self, index: int, arrays: dict) -> Path:
        path = self.demo_dir / f'demo_{index:06d}.npz'
        atomic_write_bytes(path, npz_bytes(arrays))
        return path

    def read_demos(self) -> List[dict]:
        """Every stored demonstration, in order; a file that does not load is an error."""
        out = []
        for p in self.demo_paths():
            try:
                out.append(read_npz(p))
            except Exception as exc:  # zipfile/np errors vary
                raise ValueError(f'stored demonstration {p} is unreadable: {exc}') from None
        return out

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
        self.root.mkdir(parents=True, exist_ok=True)
        with open(self.root / 'rejections.jsonl', 'a') as f:
            f.write(json.dumps(entry) + '\n')
            f.flush()
            os.fsync(f.fileno())

    def read_rejections(self) -> List[dict]:
        p = self.root / 'rejections.jsonl'
        if not p.exists():
            return []
        out = []
        for line in p.read_text().splitlines():
            try:
                out.append(json.loads(line))
            except json.JSONDecodeError:
                continue  # a torn last line after a kill
        return out

    # ------------------------------------------------------------ history
    def append_history(self, entry: dict) -> None:
        self.root.mkdir(parents=True, exist_ok=True)
        with open(self.root / 'history.jsonl', 'a') as f:
            f.write(json.dumps(entry) + '\n')
            f.flush()
            os.fsync(f.fileno())

    def read_history(self) -> List[dict]:
        p = self.root / 'history.jsonl'
        if not p.exists():
            return []
        out = []
        for line in p.read_text().splitlines():
            try:
                out.append(json.loads(line))
            except json.JSONDecodeError:
                continue
        return out

    def rewrite_history(self, entries: List[dict]) -> None:
        data = ''.join(json.dumps(e) + '\n' for e in entries)
        atomic_write_bytes(self.root / 'history.jsonl', data.encode())

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
        return dest
