# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Storage faults: quarantine, OS errors on the state directory, torn JSON lines.

OS errors are injected in-process by replacing ``os.fsync`` or
``tempfile.mkstemp`` (the calls store.py makes for every durable write) with
functions that raise ``OSError(ENOSPC)`` / ``PermissionError(EACCES)``; the
tests run as root here, so a read-only directory would not refuse writes.
The errno values and texts are the C library's (``errno``, ``os.strerror``).
"""

import errno
import os
import tempfile

import numpy as np
import pytest

from pref_learner import store as store_mod
from pref_learner.demonstrations import Demonstration, prepare
from pref_learner.learner import Learner, LearnerConfig
from pref_learner.sim import SimulatedTeacher, TeacherConfig
from pref_learner.features import load_scenario

TRUE = load_scenario()['example_preference']  # the demo's person (shipped scenario)
SMALL = dict(n_particles=600, n_alternatives=120)


def _files(root):
    return sorted(str(p.relative_to(root)) for p in root.rglob('*') if p.is_file())


class Disk:
    """Makes the state directory's writes fail with an OS error while ``full``."""

    def __init__(self, monkeypatch, err=errno.ENOSPC):
        self.full = False
        real_fsync, real_mkstemp = os.fsync, tempfile.mkstemp

        def fsync(fd):
            if self.full and err == errno.ENOSPC:
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            return real_fsync(fd)

        def mkstemp(*a, **k):
            if self.full and err == errno.EACCES:
                raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), k.get('dir'))
            return real_mkstemp(*a, **k)
        monkeypatch.setattr(store_mod.os, 'fsync', fsync)
        monkeypatch.setattr(store_mod.tempfile, 'mkstemp', mkstemp)


def _session(tmp_path, n, seed=4, **kw):
    L = Learner(LearnerConfig(state_dir=str(tmp_path), **SMALL, **kw))
    SimulatedTeacher(L, TRUE, TeacherConfig(seed=seed)).feed_session(L, n)
    return L


def test_unreplayable_demonstration_is_quarantined_and_seeds_kept(tmp_path):
    L = _session(tmp_path, 4)
    demos = list(L._demos)
    # demonstration 1 becomes unusable: a joint far outside its limits
    p = tmp_path / 'demos' / 'demo_000001.npz'
    arrays = store_mod.read_npz(p)
    arrays['q'] = arrays['q'] + 50.0
    p.write_bytes(store_mod.npz_bytes(arrays))
    L2 = Learner(LearnerConfig(state_dir=str(tmp_path), model='both', **SMALL))  # replays
    assert L2.n_demonstrations == 3
    assert len(L2.quarantined) == 1 and 'cannot be replayed' in L2.quarantined[0]
    assert 'demonstration 1 ' in L2.quarantined[0] and 'outside its limits' in L2.quarantined[0]
    q = sorted((tmp_path / 'quarantine').iterdir())
    assert [f.suffix for f in q] == ['.npz', '.txt'] and 'outside' in q[1].read_text()
    assert not p.exists()
    # demonstration 2 still uses seed index 2 (its alternatives are those of index 2)
    rec = L2.posteriors['less'].records[1]
    q2 = prepare(demos[2], L2.prepare_config, L2.robot)
    np.testing.assert_array_equal(rec.features, L2.choice_set(q2, 2)[1])
    assert not np.array_equal(rec.features, L2.choice_set(q2, 1)[1])
    # the same posterior as replaying 0, 2, 3 at seed indices 0, 2, 3
    ref = Learner(LearnerConfig(model='both', **SMALL))
    ref._rebuild([demos[0], None, demos[2], demos[3]])
    for m in ('less', 'boltzmann'):
        np.testing.assert_array_equal(L2.posteriors[m].theta, ref.posteriors[m].theta)
    # a restart loads it as it is (no replay, nothing more quarantined); a new
    # demonstration gets the next free index, 4
    L3 = Learner(LearnerConfig(state_dir=str(tmp_path), model='both', **SMALL))
    assert any('loaded state' in m for m in L3.messages) and not L3.quarantined
    np.testing.assert_array_equal(L3.posteriors['less'].theta, L2.posteriors['less'].theta)
    L3.process(demos[0])
    assert (tmp_path / 'demos' / 'demo_000004.npz').exists()
    assert L3.discard_last() and L3.n_demonstrations == 3


def test_unreadable_demonstration_file_is_quarantined(tmp_path):
    _session(tmp_path, 2)
    (tmp_path / 'demos' / 'demo_000000.npz').write_bytes(b'PK\x03\x04 not a zip')
    L = Learner(LearnerConfig(state_dir=str(tmp_path), **SMALL))
    assert L.n_demonstrations == 1 and 'unreadable' in L.quarantined[0]
    assert L._demos[0] is None and L.posteriors['less'].records[0].features.shape[0] > 1


def test_programming_errors_are_not_recorded_as_bad_demonstrations(tmp_path, monkeypatch):
    L = _session(tmp_path, 1)
    theta = L.posteriors['less'].theta.copy()

    def broken(self, q, index):
        raise ValueError('operands could not be broadcast together with shapes (3,) (4,)')
    monkeypatch.setattr(Learner, 'choice_set', broken)
    with pytest.raises(ValueError, match='broadcast'):
        SimulatedTeacher(L, TRUE, TeacherConfig(seed=7)).feed_session(L, 1, 2 * 10**18)
    assert L.rejections == [] and L.n_demonstrations == 1
    assert _files(tmp_path / 'demos') == ['demo_000000.npz']
    # the recording is not lost: kept aside with the fault that stopped it
    kept = _files(tmp_path / 'quarantine')
    assert [f.split('_')[:2] for f in kept] == [['demo', '000001']] * 2
    assert 'internal error ValueError: operands could not be broadcast' in \
        (tmp_path / 'quarantine' / kept[1]).read_text()
    assert L.quarantined[-1].startswith('demonstration 1 was not learned: internal error')
    np.testing.assert_array_equal(L.posteriors['less'].theta, theta)
    monkeypatch.undo()
    # a data problem still is a recorded rejection
    bad = L._demos[0]
    out = L.add_demonstration(Demonstration(bad.t, bad.q + 50.0, bad.joint_names))
    assert out[0].reason == 'invalid' and 'outside its limits' in out[0].detail
    assert L.store.read_rejections()[-1]['reason'] == 'invalid'


@pytest.mark.parametrize('err', [errno.ENOSPC, errno.EACCES])
def test_os_errors_keep_learning_write_nothing_partial_and_recover(tmp_path, monkeypatch, err):
    L = _session(tmp_path, 1)
    before = _files(tmp_path)
    on_disk = (tmp_path / 'posterior_less.npz').read_bytes()
    disk = Disk(monkeypatch, err)
    disk.full = True
    teacher = SimulatedTeacher(L, TRUE, TeacherConfig(seed=8))
    stamps, q = teacher.stream(0, 2 * 10**18)
    L.set_teaching(True)
    for st, row in zip(stamps, q):
        L.feed(int(st), L.robot.joint_names, row)
    out = L.set_teaching(False)
    out += L.add_demonstration(Demonstration(np.zeros(50), q[:50], L.robot.joint_names))
    assert L.n_demonstrations == 2                     # learned in memory
    assert out[-1].reason == 'invalid'                 # its rejection line is pending
    name = errno.errorcode[err]
    assert L.storage_error.startswith(name), L.storage_error
    assert _files(tmp_path) == before                  # nothing new, nothing partial
    assert (tmp_path / 'posterior_less.npz').read_bytes() == on_disk
    assert not L.flush_storage()                       # still failing
    disk.full = False                                  # space returns
    assert L.flush_storage() and L.storage_error == ''
    assert 'demos/demo_000001.npz' in _files(tmp_path)
    assert not [f for f in _files(tmp_path) if f.endswith('.tmp')]
    assert [r['reason'] for r in L.store.read_rejections()] == ['invalid']
    assert [h['index'] for h in L.store.read_history()] == [0, 1]
    L2 = Learner(LearnerConfig(state_dir=str(tmp_path), **SMALL))
    assert any('loaded state' in m for m in L2.messages)
    np.testing.assert_array_equal(L2.posteriors['less'].theta, L.posteriors['less'].theta)


def test_reset_with_writes_pending_is_refused_and_loses_nothing(tmp_path, monkeypatch):
    # a reset archives the state directory; writes still pending (disk full) would be
    # lost with it, so it is refused, naming them, until they are on disk
    L = _session(tmp_path, 1)
    disk = Disk(monkeypatch)
    disk.full = True
    SimulatedTeacher(L, TRUE, TeacherConfig(seed=8)).feed_session(L, 1, 2 * 10**18)
    assert L.n_demonstrations == 2 and L.storage_error.startswith('ENOSPC')
    with pytest.raises(ValueError, match=r'reset refused: \d+ writes of this session are not '
                       r'on disk yet \(ENOSPC'):
        L.reset()
    assert L.n_demonstrations == 2 and not (tmp_path / 'archive').exists()
    disk.full = False
    where = L.reset()
    assert 'demos/demo_000001.npz' in _files(where) and L.n_demonstrations == 0
    assert L.history_diagnostics() == [] and L.quarantined == []


def test_failed_append_is_cut_back(tmp_path, monkeypatch):
    p = tmp_path / 'log.jsonl'
    store_mod.append_line(p, '{"a": 1}')
    disk = Disk(monkeypatch)
    disk.full = True
    with pytest.raises(OSError):
        store_mod.append_line(p, '{"b": 2}')
    assert p.read_text() == '{"a": 1}\n'


def test_only_a_torn_last_json_line_is_tolerated(tmp_path):
    s = store_mod.StateStore(tmp_path)
    s.append_rejection({'reason': 'too_short'})
    with open(tmp_path / 'rejections.jsonl', 'a') as f:
        f.write('{"reason": "too_lo')                  # a kill during an append
    assert [r['reason'] for r in s.read_rejections()] == ['too_short']
    s.append_rejection({'reason': 'too_long'})        # the torn tail is cut first
    assert [r['reason'] for r in s.read_rejections()] == ['too_short', 'too_long']
    (tmp_path / 'rejections.jsonl').write_text('{"reason": "a"}\nnot json\n{"reason": "b"}\n')
    with pytest.raises(ValueError, match=r'rejections.jsonl:2: undecodable'):
        s.read_rejections()
