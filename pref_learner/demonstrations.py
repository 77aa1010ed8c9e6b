# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""From a joint-state stream to clean, resampled demonstrations.

A :class:`Recorder` takes samples one at a time as a ``joint_states`` topic
delivers them (``feed(stamp_ns, names, positions, receive_ns)``: any joint
order, extra joints, duplicates, out-of-order or wrong stamps, gaps, NaN) and
segments them into demonstrations by one of three modes:

``manual``  :meth:`Recorder.start` / :meth:`Recorder.stop` calls (services);
``signal``  a boolean teaching signal, :meth:`Recorder.set_teaching`;
``motion``  automatic: a windowed joint speed above ``speed_start`` starts a
            segment, below ``speed_stop`` for ``dwell`` seconds ends it
            (hysteresis); the onset and end are then refined by extrapolating
            the speed profile to zero, assuming a motion that starts and ends
            with zero velocity and acceleration (speed ~ (t - t0)^2 near the
            ends, as in minimum-jerk motion).

Each finished segment becomes a :class:`Demonstration` or a
:class:`Rejection` with a reason; nothing is dropped silently. While idle the
recorder keeps only a short pre-roll ring, so memory is bounded however long
the stream runs.

Sample ordering (:class:`StampConfig`). With a receive time (the node's clock
when the message arrived, or a bag's log time) every sample is judged against
the stream's consensus, not against one earlier stamp: its offset
``stamp - receive`` may exceed the largest offset of the samples accepted in
the last ``window`` seconds by at most ``tolerance`` (transport latency only
ever lowers the offset), and its stamp must follow the last *accepted* one.
Refused samples are counted (``stamp_ahead``, ``out_of_order``) and kept
aside in a few candidate tracks of mutually consistent samples (a track that
pauses for ``quiet`` seconds starts again). A track of at least ``confirm``
samples becomes the new timeline, and its samples are then used, so nothing of
the new timeline is lost:

- a track that began after the timeline's last sample (a bag played again,
  a driver restarted with another clock) once the timeline has been silent
  for ``quiet`` seconds;
- a rival, a track that ran alongside the timeline (a machine with a wrong
  clock), only once the timeline has been silent for ``rival_quiet``
  seconds: a stream that pauses (a starved publisher, a driver's hiccup) has
  not stopped;
- at once, a stream that comes back: a track at the offset the timeline had
  while healthy, after samples stamped further behind continued it in the
  stream's absence, or at the offset of the timeline left at the last
  change, when it is stamped nearer the receive clock than the current one.

The first timeline also needs ``confirm`` consistent samples, so no single
sample sets a reference: at the start (or after the receive clock went back)
the recorder watches for ``quiet`` seconds and then follows the confirmed
track stamped closest to its receive clock. Without receive times
(simulations feeding a learner directly) stamps are trusted and only their
order is checked.

:func:`prepare` cleans a segment and resamples it to T waypoints (by time,
or by arc length of the tool path; linear interpolation between samples;
the first and last samples are kept exactly). :func:`smooth_batch` is the
endpoint-preserving smoother applied identically to a demonstration and to
its alternatives, so sensor noise cannot tell them apart.
"""

from __future__ import annotations

import collections
import math
from dataclasses import dataclass, replace
from typing import Deque, Dict, List, Optional, Sequence, Tuple, Union

import numpy as np
# imported with the module, not on first use: a lazy import here cost the session's
# first demonstration about 170 ms of latency
from scipy.signal import butter, sosfiltfilt


class DemonstrationError(ValueError):
    """A demonstration's data cannot be learned from (not a fault of the program)."""


@dataclass(frozen=True)
class Demonstration:
    """A demonstration in the model's joint order.

    t : (T,) seconds since the first sample.
    q : (T, n) joint positions.
    stamp_ns : absolute time of the first sample (ns).
    """

    t: np.ndarray
    q: np.ndarray
    joint_names: Tuple[str, ...]
    stamp_ns: int = 0

    @property
    def duration(self) -> float:
        return float(self.t[-1] - self.t[0])

    def to_arrays(self, seed: int) -> dict:
        """Arrays of the stored demonstration format (``seed``: the session's)."""
        return {'t': self.t, 'q': self.q, 'joint_names': np.array(self.joint_names),
                'stamp_ns': np.int64(self.stamp_ns), 'seed': np.int64(seed)}

    @classmethod
    def from_arrays(cls, arrays: dict) -> 'Demonstration':
        """Decode the stored format of :meth:`to_arrays` (``KeyError`` if a key is missing)."""
        return cls(arrays['t'], arrays['q'], tuple(str(x) for x in arrays['joint_names']),
                   int(arrays['stamp_ns']))


def trajectory_demonstration(joint_names, rows, times, chain: Sequence[str],
                             config: Optional['SegmentConfig'] = None) -> Demonstration:
    """Return a demonstration given whole, as a ``trajectory_msgs/JointTrajectory`` has it.

    ``joint_names`` and ``rows`` (one position list per point) in the
    message's order, ``times`` the points' ``time_from_start`` in seconds;
    the chain's joints are taken in its order. With ``config``, the
    acceptance checks of a recorded segment apply too (``min_duration``,
    ``min_motion``, ``max_duration``; not ``max_gap``: a trajectory's points
    may be sparse).
    Raises :class:`DemonstrationError` naming what is wrong and where (the
    text follows the topic's name in a warning).
    """
    if len(rows) < 2:
        raise DemonstrationError(f'has {len(rows)} points; needs >= 2')
    names = list(joint_names)
    twice = sorted({j for j in names if names.count(j) > 1})
    if twice:
        raise DemonstrationError(f'names joint {twice[0]} more than once')
    missing = [j for j in chain if j not in names]
    if missing:
        raise DemonstrationError(f'lacks joint {missing[0]}')
    for k, row in enumerate(rows):
        if len(row) != len(names):
            raise DemonstrationError(f'point {k} has {len(row)} positions for '
                                     f'{len(names)} joint_names')
    idx = [names.index(j) for j in chain]
    q = np.array([[row[i] for i in idx] for row in rows], dtype=np.float64)
    t = np.asarray(times, dtype=np.float64)
    bad = np.flatnonzero(~np.all(np.isfinite(q), axis=1))
    if bad.size:
        raise DemonstrationError(f'point {bad[0]} has a NaN or infinite position')
    back = np.flatnonzero(~(np.diff(t) > 0))
    if back.size:
        raise DemonstrationError(f'time_from_start does not increase at point {back[0] + 1} '
                                 f'({t[back[0]]:g} s, then {t[back[0] + 1]:g} s)')
    if config is not None:
        if t[-1] - t[0] > config.max_duration:
            raise DemonstrationError(f'is refused: too_long: {t[-1] - t[0]:.3f} s > '
                                     f'max_duration {config.max_duration} s')
        rej = check_segment(np.round((t - t[0]) * 1e9).astype(np.int64), q, 0,
                            replace(config, max_gap=math.inf))
        if rej is not None:
            raise DemonstrationError(f'is refused: {rej.reason}: {rej.detail}')
    return Demonstration(t - t[0], q, tuple(chain))


@dataclass(frozen=True)
class Rejection:
    reason: str
    detail: str
    stamp_ns: int = 0


@dataclass(frozen=True)
class SegmentConfig:
    """Segmentation and acceptance thresholds (SI units)."""

    mode: str = 'signal'                 # manual | signal | motion
    speed_start: float = 0.15            # rad/s, windowed max joint speed that starts
    speed_stop: float = 0.05             # rad/s, below this for `dwell` ends
    dwell: float = 0.4                   # s
    speed_window: float = 0.05           # s, window of the speed estimate
    pre_roll: float = 1.0                # s kept while idle
    min_duration: float = 0.3            # s
    max_duration: float = 120.0          # s
    min_motion: float = 0.05             # rad, largest joint excursion
    max_gap: float = 0.1                 # s between consecutive samples
    max_invalid_fraction: float = 0.2    # of samples in the segment
    refine: bool = True                  # refine motion-mode bounds
    max_abs_position: float = 1e3        # rad or m; larger values count as invalid

    def __post_init__(self):
        if self.mode not in ('manual', 'signal', 'motion'):
            raise ValueError(f'segmentation mode {self.mode!r} is unknown; allowed: manual, '
                             'signal, motion')
        for k in ('speed_start', 'speed_stop', 'dwell', 'speed_window', 'min_duration',
                  'max_duration', 'max_gap'):
            if not getattr(self, k) > 0:
                raise ValueError(f'{k} must be > 0, got {getattr(self, k)!r}')
        if self.speed_stop > self.speed_start:
            raise ValueError('speed_stop must not exceed speed_start (hysteresis)')
        if not 0 <= self.max_invalid_fraction <= 1:
            raise ValueError('max_invalid_fraction must be in [0, 1]')


@dataclass(frozen=True)
class StampConfig:
    """How samples with receive times are judged against the stream (SI units)."""

    tolerance: float = 0.05     # s an offset may exceed the stream's recent largest offset
    window: float = 2.0         # s of accepted samples whose largest offset is the reference
    confirm: int = 5            # consistent samples that establish a timeline
    quiet: float = 1.0          # s without accepted samples before a new timeline is adopted
    rival_quiet: float = 10.0   # the same for a track that ran alongside the timeline
    track_length: int = 4096    # samples kept per candidate track (a new timeline's start)
    n_tracks: int = 8           # candidate tracks (least recently extended one goes first)
    max_skew: float = 0.0       # s; refuse |stamp - receive| beyond this (0: off)

    def __post_init__(self):
        for k in ('tolerance', 'window', 'quiet', 'rival_quiet'):
            if not getattr(self, k) > 0:
                raise ValueError(f'{k} must be > 0, got {getattr(self, k)!r}')
        for k in ('confirm', 'track_length', 'n_tracks'):
            if getattr(self, k) < 1:
                raise ValueError(f'{k} must be >= 1, got {getattr(self, k)!r}')
        if self.track_length < self.confirm:
            raise ValueError('track_length must be >= confirm')
        if not self.max_skew >= 0:
            raise ValueError(f'max_skew must be >= 0, got {self.max_skew!r}')


class _Track:
    """Refused samples that agree with each other: a candidate timeline.

    ``first`` is the receive time of its first sample, ``touched`` of its last.
    """

    __slots__ = ('offset', 'last_stamp', 'first', 'touched', 'samples')

    def __init__(self, offset: int, recv: int, maxlen: int):
        self.offset = offset
        self.last_stamp = -1
        self.first = self.touched = recv
        self.samples: Deque[Tuple[int, int, np.ndarray]] = collections.deque(maxlen=maxlen)


#: the counters of samples the recorder refuses (a rejection names those of its segment)
REFUSED_SAMPLES = ('mismatched_lengths', 'missing_joint', 'repeated_joint_name', 'zero_stamp',
                   'stamp_out_of_range', 'invalid', 'duplicate', 'out_of_order', 'stamp_ahead',
                   'unconfirmed')


class Recorder:
    """Segments a joint-state stream into demonstrations (see module docstring)."""

    def __init__(self, joint_names: Sequence[str], config: SegmentConfig = SegmentConfig(),
                 stamps: StampConfig = StampConfig()):
        self.joint_names = tuple(joint_names)
        self.n = len(self.joint_names)
        self.config = config
        self.stamp_config = stamps
        self.counters: Dict[str, int] = collections.Counter()
        self._index_cache: Dict[Tuple[str, ...], Optional[np.ndarray]] = {}
        self._last_stamp: Optional[int] = None
        self._last_recv: Optional[int] = None
        self._timeline = False                       # a confirmed timeline exists
        self._ref: Deque[Tuple[int, int]] = collections.deque()   # (receive, offset), max first
        self._tracks: List[_Track] = []
        self._first_candidate: Optional[int] = None
        self._best: Optional[int] = None             # the timeline's offset while healthy
        self._previous: Optional[Tuple[int, int]] = None   # (best, last stamp) before a change
        self._ring: Deque[Tuple[int, np.ndarray]] = collections.deque()
        self._seg: Optional[List[Tuple[int, np.ndarray]]] = None
        self._seg_invalid = 0
        self._seg_counts: Dict[str, int] = {}       # the refusal counters when it began
        self._quiet_since: Optional[int] = None
        self._win: Deque[Tuple[int, np.ndarray]] = collections.deque()
        self._ema: Optional[np.ndarray] = None
        self._ema_t = 0
        self.last_reason: str = ''

    # ------------------------------------------------------------ state
    @property
    def recording(self) -> bool:
        return self._seg is not None

    @property
    def buffered(self) -> int:
        return len(self._ring) + (len(self._seg) if self._seg is not None else 0)

    def _map(self, names: Sequence[str]) -> Union[np.ndarray, str]:
        """Return the chain's columns in a message's names, or why there are none."""
        key = tuple(names)
        idx = self._index_cache.get(key, False)
        if idx is False:
            pos = {n: i for i, n in enumerate(key)}
            if len(pos) < len(key):           # which of the two values is meant is unknown
                idx = 'repeated_joint_name'
            elif all(j in pos for j in self.joint_names):
                idx = np.array([pos[j] for j in self.joint_names])
            else:
                idx = 'missing_joint'
            if len(self._index_cache) > 64:
                self._index_cache.clear()
            self._index_cache[key] = idx
        return idx

    # ------------------------------------------------------------ input
    def set_max_skew(self, seconds: float) -> None:
        """Refuse samples stamped further than ``seconds`` from their receive time (0: off)."""
        self.stamp_config = replace(self.stamp_config, max_skew=float(seconds))

    def feed(self, stamp_ns: int, names: Sequence[str], positions: Sequence[float],
             receive_ns: Optional[int] = None) -> list:
        """Add one sample; returns finished demonstrations / rejections (usually []).

        ``receive_ns``: when the sample arrived, on the clock the stream is judged
        against (the node's clock, or a bag's log time); None trusts the stamps.
        """
        if len(names) != len(positions):
            self.counters['mismatched_lengths'] += 1
            return []
        idx = self._map(names)
        if isinstance(idx, str):
            self.counters[idx] += 1
            return []
        stamp = int(stamp_ns)
        if stamp <= 0:
            self.counters['zero_stamp'] += 1
            return []
        sc = self.stamp_config
        if (receive_ns is not None and sc.max_skew > 0
                and abs(stamp - receive_ns) > sc.max_skew * 1e9):
            self.counters['stamp_out_of_range'] += 1
            return []
        q = np.asarray(positions, dtype=np.float64)[idx]
        if not (np.all(np.isfinite(q)) and np.all(np.abs(q) <= self.config.max_abs_position)):
            self.counters['invalid'] += 1
            if self._seg is not None and self._judge(stamp, receive_ns) is None:
                self._seg_invalid += 1
            return []
        if receive_ns is None:
            if self._last_stamp is not None and stamp <= self._last_stamp:
                self.counters['duplicate' if stamp == self._last_stamp else 'out_of_order'] += 1
                return []
            return self._accept(stamp, stamp, q)
        recv = int(receive_ns)
        if self._last_recv is not None and recv < self._last_recv - sc.tolerance * 1e9:
            self._timeline = False        # the receive clock went back (simulation reset)
            self._previous = None
        reason = self._judge(stamp, recv) if self._timeline else 'unconfirmed'
        if reason is None:
            return self._accept(stamp, recv, q)
        if reason == 'duplicate':
            self.counters[reason] += 1
            return []
        self.counters[reason] += 1
        return self._candidate(stamp, recv, q)

    def _judge(self, stamp: int, recv: Optional[int]) -> Optional[str]:
        """Why a sample does not continue the current timeline, or None if it does."""
        if self._last_stamp is not None and stamp <= self._last_stamp:
            return 'duplicate' if stamp == self._last_stamp else 'out_of_order'
        if recv is not None and self._ref and \
                stamp - recv > self._ref[0][1] + self.stamp_config.tolerance * 1e9:
            return 'stamp_ahead'
        return None

    def _candidate(self, stamp: int, recv: int, q: np.ndarray) -> list:
        """Keep a refused sample in the track it agrees with; adopt a confirmed track."""
        sc = self.stamp_config
        off = stamp - recv
        tol = sc.tolerance * 1e9
        track = next((t for t in self._tracks
                      if abs(off - t.offset) <= tol and stamp > t.last_stamp), None)
        if track is not None and recv - track.touched > sc.quiet * 1e9:
            track.samples.clear()                   # after a pause the track starts again
            track.first = recv
        if track is None:
            track = _Track(off, recv, sc.track_length)
            if len(self._tracks) >= sc.n_tracks:    # unconfirmed, least recently extended first
                weak = [t for t in self._tracks if len(t.samples) < sc.confirm] or self._tracks
                self._tracks.remove(min(weak, key=lambda t: t.touched))
            self._tracks.append(track)
        track.samples.append((stamp, recv, q))
        track.offset, track.last_stamp, track.touched = off, stamp, recv
        if not self._timeline:
            # no timeline yet (start, or the receive clock went back): watch for `quiet`
            # seconds, then follow the confirmed track stamped closest to the receive clock
            if self._first_candidate is not None and recv < self._first_candidate - tol:
                # the receive clock went back before a timeline was confirmed (a simulation
                # reset at start-up): watch afresh from now, with this sample's track alone
                self._tracks = [track]
                self._first_candidate = None
            if self._first_candidate is None:
                self._first_candidate = recv
            if recv - self._first_candidate < sc.quiet * 1e9:
                return []
            ready = [t for t in self._tracks if len(t.samples) >= sc.confirm]
            return self._adopt(min(ready, key=lambda t: abs(t.offset))) if ready else []
        if len(track.samples) < sc.confirm:
            return []
        if self._returns(track, tol):
            return self._adopt(track)
        if track.first > self._last_recv:            # began after the timeline fell silent
            wait = sc.quiet
        else:                                        # a rival: pausing is not stopping
            wait = sc.rival_quiet
        return self._adopt(track) if recv - self._last_recv >= wait * 1e9 else []

    def _returns(self, track: _Track, tol: float) -> bool:
        """Whether ``track`` is a followed stream back (see the module docstring)."""
        off, ref = track.offset, self._ref[0][1]
        if abs(off - self._best) <= tol and off > ref + tol:
            return True         # this timeline's stream, after one stamped further back filled in
        prev = self._previous   # the timeline left at the last change, nearer the clock
        return (prev is not None and abs(off - prev[0]) <= tol and track.samples[0][0] > prev[1]
                and abs(off) + tol < abs(ref))

    def _adopt(self, track: _Track) -> list:
        out = []
        self._previous = (self._best, self._last_stamp) if self._timeline else None
        self._best = None
        if self._last_stamp is not None:             # a timeline existed: it changed
            self.counters['timeline_changes'] += 1
            if self._seg:
                out.append(self._reject('timeline_change', 'the stream\'s clock changed during '
                                        'the demonstration; the part before was dropped',
                                        self._seg[0][0]))
                self._seg = []
                self._seg_invalid = 0
                self._mark()
        self._tracks = []
        self._timeline = True
        self._first_candidate = None
        self._ref.clear()
        self._last_stamp = self._last_recv = None
        self._ring.clear()
        self._win.clear()
        self._ema = None
        self._quiet_since = None
        self.counters['recovered'] += len(track.samples)
        for stamp, recv, q in track.samples:
            out.extend(self._accept(stamp, recv, q))
        return out

    def _accept(self, stamp: int, recv: int, q: np.ndarray) -> list:
        self._last_stamp, self._last_recv = stamp, recv
        off = stamp - recv
        ref = self._ref
        while ref and ref[-1][1] <= off:
            ref.pop()
        ref.append((recv, off))
        sc = self.stamp_config
        horizon = recv - sc.window * 1e9
        while ref[0][0] < horizon:
            ref.popleft()
        if self._best is None or ref[0][1] > self._best - sc.tolerance * 1e9:
            self._best = ref[0][1]      # follows the offset unless it drops at once (a gap)
        self.counters['samples'] += 1
        sample = (stamp, q)
        out = []
        if self._seg is not None:
            if self._seg and (stamp - self._seg[0][0]) * 1e-9 > self.config.max_duration:
                out.append(self._reject('too_long', f'longer than {self.config.max_duration} s',
                                        self._seg[0][0]))
                self._seg = None
            else:
                self._seg.append(sample)
        else:
            self._ring.append(sample)
            while self._ring and (stamp - self._ring[0][0]) * 1e-9 > self.config.pre_roll:
                self._ring.popleft()
        if self.config.mode == 'motion':
            out.extend(self._motion_step(sample))
        return out

    def _speed(self, sample) -> Optional[float]:
        # exponential moving average (time constant speed_window / 2) suppresses
        # sensor noise; the speed is its displacement over speed_window
        tau = 0.5 * self.config.speed_window
        if self._ema is None:
            self._ema = sample[1].copy()
        else:
            dt = (sample[0] - self._ema_t) * 1e-9
            a = 1.0 - np.exp(-dt / tau)
            self._ema += a * (sample[1] - self._ema)
        self._ema_t = sample[0]
        sample = (sample[0], self._ema.copy())
        w = self._win
        w.append(sample)
        horizon = self.config.speed_window
        while len(w) > 2 and (sample[0] - w[1][0]) * 1e-9 >= horizon:
            w.popleft()
        dt = (sample[0] - w[0][0]) * 1e-9
        if dt < 0.5 * horizon:
            return None
        return float(np.max(np.abs(sample[1] - w[0][1])) / dt)

    def _motion_step(self, sample) -> list:
        v = self._speed(sample)
        if v is None:
            return []
        c = self.config
        if self._seg is None:
            if v > c.speed_start:
                self._seg = list(self._ring)
                self._ring.clear()
                self._seg_invalid = 0
                self._mark()
                self._quiet_since = None
            return []
        if v < c.speed_stop:
            if self._quiet_since is None:
                self._quiet_since = sample[0]
            elif (sample[0] - self._quiet_since) * 1e-9 >= c.dwell:
                return self._finish()
        else:
            self._quiet_since = None
        return []

    def start(self) -> list:
        """Begin a segment now (manual mode or a teaching signal)."""
        if self._seg is not None:
            self.counters['start_while_recording'] += 1
            self.last_reason = 'start_while_recording'
            return []
        self._seg = []
        if self._ring:
            self._seg.append(self._ring[-1])  # the last sample before the start
        self._ring.clear()
        self._seg_invalid = 0
        self._mark()
        return []

    def stop(self) -> list:
        """End the current segment; returns [Demonstration] or [Rejection]."""
        if self._seg is None:
            self.counters['stop_without_start'] += 1
            self.last_reason = 'stop_without_start'
            return [Rejection('stop_without_start', 'stop requested while not recording',
                              self._last_stamp or 0)]
        return self._finish()

    def set_teaching(self, on: bool) -> list:
        if on and self._seg is None:
            return self.start()
        if not on and self._seg is not None:
            return self.stop()
        return []

    def reconfigure(self, config: SegmentConfig) -> None:
        """Use new segmentation settings from the next sample on (counters are kept)."""
        if self.recording:
            raise ValueError('cannot change segmentation settings during a demonstration')
        self.config = config
        self._win.clear()
        self._ema = None
        self._quiet_since = None

    def cancel(self) -> None:
        self._seg = None
        self._ring.clear()

    # ------------------------------------------------------------ finishing
    def _mark(self) -> None:
        """Note the refusal counters as a segment begins (:meth:`_refused`)."""
        self._seg_counts = {k: self.counters[k] for k in REFUSED_SAMPLES}

    def _refused(self) -> str:
        """Return what the recorder refused since the segment began ('' when nothing)."""
        got = [(k, self.counters[k] - self._seg_counts.get(k, 0)) for k in REFUSED_SAMPLES]
        got = [(k, n) for k, n in got if n > 0]
        if not got:
            return ''
        return (f'; {sum(n for _, n in got)} samples refused meanwhile ('
                + ', '.join(f'{k} {n}' for k, n in got) + ')')

    def _reject(self, reason, detail, stamp):
        detail = detail + self._refused()
        self.counters['rejected'] += 1
        self.counters['rejected_' + reason] += 1
        self.last_reason = f'{reason}: {detail}'
        return Rejection(reason, detail, int(stamp))

    def _finish(self) -> list:
        seg, invalid = self._seg, self._seg_invalid
        self._seg = None
        self._quiet_since = None
        if not seg:
            return [self._reject('too_short', 'no samples', self._last_stamp or 0)]
        stamps = np.array([s[0] for s in seg], dtype=np.int64)
        q = np.stack([s[1] for s in seg])
        if self.config.mode == 'motion' and self.config.refine and len(stamps) > 8:
            a, b = refine_bounds((stamps - stamps[0]) * 1e-9, q)
            stamps, q = stamps[a:b + 1], q[a:b + 1]
        result = check_segment(stamps, q, invalid, self.config)
        if isinstance(result, Rejection):
            return [self._reject(result.reason, result.detail, result.stamp_ns)]
        self.counters['accepted'] += 1
        t = (stamps - stamps[0]) * 1e-9
        return [Demonstration(t, q, self.joint_names, int(stamps[0]))]


def check_segment(stamps: np.ndarray, q: np.ndarray, n_invalid: int,
                  config: SegmentConfig) -> Union[Rejection, None]:
    """Check a raw segment for acceptance; return a :class:`Rejection` or None."""
    s0 = int(stamps[0])
    n = len(stamps)
    if n < 2:
        return Rejection('too_short', f'{n} valid sample(s)', s0)
    dur = (stamps[-1] - stamps[0]) * 1e-9
    if dur < config.min_duration:
        return Rejection('too_short', f'{dur:.3f} s < min_duration {config.min_duration} s', s0)
    frac = n_invalid / (n + n_invalid)
    if frac > config.max_invalid_fraction:
        return Rejection('too_many_invalid', f'{frac:.0%} of samples invalid (NaN/inf) > '
                         f'{config.max_invalid_fraction:.0%}', s0)
    gaps = np.diff(stamps) * 1e-9
    if gaps.max() > config.max_gap:
        return Rejection('too_many_gaps', f'gap of {gaps.max():.3f} s > max_gap '
                         f'{config.max_gap} s', s0)
    motion = float(np.max(q.max(axis=0) - q.min(axis=0)))
    if motion < config.min_motion:
        return Rejection('too_little_motion', f'largest joint excursion {motion:.4f} rad < '
                         f'min_motion {config.min_motion} rad', s0)
    return None


def refine_bounds(t: np.ndarray, q: np.ndarray) -> Tuple[int, int]:
    """Find the indices of the refined onset and end of a point-to-point motion.

    The progress along the start->end direction is low-passed (zero-phase,
    8 Hz) and differentiated; at each end the times where the speed first
    reaches 3% and 12% of its peak are found. A speed that grows as
    (t - t0)^2 from rest (zero velocity and acceleration at the onset)
    reaches 4x the speed at twice the time from t0, so
    t0 = 2 t(3%) - t(12%), and symmetrically at the end.
    """
    d = q[-1] - q[0]
    nrm = np.linalg.norm(d)
    if nrm == 0 or len(t) < 16:
        return 0, len(t) - 1
    s = lowpass(t, ((q - q[0]) @ (d / nrm))[:, None], 8.0)[:, 0]
    v = np.gradient(s, t)
    peak_i = int(np.argmax(v))
    vp = v[peak_i]
    if vp <= 0:
        return 0, len(t) - 1
    up = v[:peak_i + 1]
    i1 = int(np.argmax(up >= 0.03 * vp))
    i2 = int(np.argmax(up >= 0.12 * vp))
    t0 = 2 * t[i1] - t[i2]
    down = v[peak_i:][::-1]
    j1 = len(v) - 1 - int(np.argmax(down >= 0.03 * vp))
    j2 = len(v) - 1 - int(np.argmax(down >= 0.12 * vp))
    t1 = 2 * t[j1] - t[j2]
    a = int(np.clip(np.searchsorted(t, t0), 0, len(t) - 1))
    b = int(np.clip(np.searchsorted(t, t1), a, len(t) - 1))
    return a, b


# ---------------------------------------------------------------- preparation
@dataclass(frozen=True)
class PrepareConfig:
    """How a raw segment becomes T waypoints (shared by the demonstration and alternatives)."""

    n_waypoints: int = 64
    resample: str = 'time'        # time | arc_length
    lowpass_hz: float = 0.0       # 0 = off; zero-phase Butterworth (scipy.signal) before
    smooth: float = 1e-4          # weight of the endpoint-preserving smoother (0 = off)

    def __post_init__(self):
        if self.n_waypoints < 4:
            raise ValueError(f'n_waypoints must be >= 4, got {self.n_waypoints}')
        if self.resample not in ('time', 'arc_length'):
            raise ValueError(f'resample {self.resample!r} is unknown; allowed: time, arc_length')
        if self.lowpass_hz < 0 or self.smooth < 0:
            raise ValueError('lowpass_hz and smooth must be >= 0')


def _interp_rows(x_new: np.ndarray, x: np.ndarray, q: np.ndarray) -> np.ndarray:
    out = np.empty((len(x_new), q.shape[1]))
    for j in range(q.shape[1]):
        out[:, j] = np.interp(x_new, x, q[:, j])
    out[0], out[-1] = q[0], q[-1]
    return out


def resample(t: np.ndarray, q: np.ndarray, n_waypoints: int, method: str = 'time',
             tool_positions: Optional[np.ndarray] = None) -> np.ndarray:
    """Resample ``q : (S, n)`` at times ``t : (S,)`` to ``(n_waypoints, n)``.

    ``time``: equally spaced in time; ``arc_length``: equally spaced along the
    tool path ``tool_positions : (S, 3)`` (by time when the tool never moves).
    Linear interpolation between samples; the first and last samples are
    kept exactly (motion that moves no tool point at the end, e.g. a wrist
    turn about an axis through it, lies between the last two waypoints).
    """
    if method == 'time':
        return _interp_rows(np.linspace(t[0], t[-1], n_waypoints), t, q)
    if tool_positions is None:
        raise ValueError('arc_length resampling needs tool positions')
    s = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(tool_positions, axis=0),
                                                        axis=1))])
    if not s[-1] > 1e-9:      # the tool never moves: by time (the alternatives keep theirs)
        return _interp_rows(np.linspace(t[0], t[-1], n_waypoints), t, q)
    keep = np.concatenate([[True], np.diff(s) > 0])
    out = _interp_rows(np.linspace(0.0, s[-1], n_waypoints), s[keep], q[keep])
    out[-1] = q[-1]           # also when the tool stood still through the last samples
    return out


def lowpass(t: np.ndarray, q: np.ndarray, cutoff_hz: float) -> np.ndarray:
    """Zero-phase 2nd-order Butterworth low-pass; endpoints kept exactly."""
    fs = 1.0 / np.median(np.diff(t))
    if cutoff_hz <= 0 or cutoff_hz >= 0.45 * fs or len(t) < 16:
        return q
    sos = butter(2, cutoff_hz, fs=fs, output='sos')
    out = sosfiltfilt(sos, q, axis=0, padtype='odd', padlen=min(len(t) - 1, 3 * 6))
    out[0], out[-1] = q[0], q[-1]
    return out


_SMOOTHERS: Dict[Tuple[int, float], np.ndarray] = {}


def smoother_matrix(T: int, weight: float) -> np.ndarray:
    """(T, T) linear smoother: argmin |x - y|^2 + w |D2 x|^2 with x_0, x_T-1 fixed.

    A Whittaker smoother in normalised time (w in units of the squared second
    difference per waypoint spacing^-4); rows 0 and T-1 are the identity.
    """
    key = (T, float(weight))
    if key not in _SMOOTHERS:
        h = 1.0 / (T - 1)
        D = np.diff(np.eye(T), n=2, axis=0) / h ** 2
        A = np.eye(T) + weight * h * (D.T @ D)
        S = np.zeros((T, T))
        inner = slice(1, T - 1)
        # solve for the interior with endpoints pinned
        Aii = A[inner, inner]
        rhs = np.eye(T)[inner] - A[inner][:, [0, T - 1]] @ np.eye(T)[[0, T - 1]]
        S[inner] = np.linalg.solve(Aii, rhs)
        S[0, 0] = S[-1, -1] = 1.0
        _SMOOTHERS[key] = S
    return _SMOOTHERS[key]


def smooth_batch(q: np.ndarray, weight: float) -> np.ndarray:
    """Apply the endpoint-preserving smoother to ``q : (..., T, n)``."""
    if weight <= 0:
        return np.asarray(q, dtype=np.float64)
    q = np.asarray(q, dtype=np.float64)
    S = smoother_matrix(q.shape[-2], weight)
    # one BLAS product over every trajectory (einsum's own loop was ~10x slower)
    return np.ascontiguousarray(np.moveaxis(np.tensordot(S, q, axes=([1], [-2])), 0, -2))


def prepare(demo: Demonstration, config: PrepareConfig, robot=None) -> np.ndarray:
    """Clean, filter and resample a demonstration to ``(T, n)``.

    No smoothing yet: :func:`smooth_batch` is applied together with the
    alternatives.
    """
    t, q = demo.t, demo.q
    q = lowpass(t, q, config.lowpass_hz)
    if robot is not None:
        # the filter overshoots where a person moves along a joint limit; the
        # demonstration itself was inside the limits
        q = np.clip(q, robot.lower, robot.upper)
    tool = None
    if config.resample == 'arc_length':
        if robot is None:
            raise ValueError('arc_length resampling needs the robot model')
        tool = robot.frame_poses(q, [robot.tool_frame]).positions[:, 0]
    return resample(t, q, config.n_waypoints, config.resample, tool)


def condition(q: np.ndarray, weight: float, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Condition trajectories as a demonstration and its alternatives all are.

    :func:`smooth_batch`, then clipping to the joint limits (the smoother may
    overshoot a limit by a hair where a trajectory runs along it).
    """
    return np.clip(smooth_batch(q, weight), lower, upper)


def reparametrize_arc_length(q: np.ndarray, tool: np.ndarray) -> np.ndarray:
    """Re-time trajectories to equal spacing along their tool paths.

    ``q : (M, T, n)``, ``tool : (M, T, 3)``; linear interpolation, endpoints
    kept; a trajectory whose tool does not move is returned unchanged.
    """
    M, T, n = q.shape
    step = np.diff(tool, axis=1)
    seg = np.sqrt(step[..., 0] ** 2 + step[..., 1] ** 2 + step[..., 2] ** 2)
    s = np.concatenate([np.zeros((M, 1)), np.cumsum(seg, axis=1)], axis=1)
    total = s[:, -1:]
    ok = total[:, 0] > 1e-9
    u = np.where(ok[:, None], s / np.where(ok[:, None], total, 1.0), np.linspace(0, 1, T))
    g = np.linspace(0.0, 1.0, T)
    # count of u[i] <= g[k] for every row and k, exactly: u[i, j] <= g[k] holds from the
    # first k with g[k] >= u[i, j] on (one binary search over the shared g for all
    # entries), so the counts are a cumulative histogram of those first k per row
    first = np.searchsorted(g, u.ravel(), side='left').reshape(M, T)
    hist = np.bincount((first + (T + 1) * np.arange(M)[:, None]).ravel(),
                       minlength=M * (T + 1)).reshape(M, T + 1)
    idx = np.clip(np.cumsum(hist[:, :T], axis=1) - 1, 0, T - 2)             # (M, T)
    u0 = np.take_along_axis(u, idx, 1)
    u1 = np.take_along_axis(u, idx + 1, 1)
    w = np.where(u1 > u0, (g[None] - u0) / np.where(u1 > u0, u1 - u0, 1.0), 0.0)
    at = (idx + T * np.arange(M)[:, None]).ravel()              # rows of q as (M T, n)
    flat = q.reshape(M * T, n)
    q0 = np.take(flat, at, axis=0).reshape(M, T, n)
    q1 = np.take(flat, at + 1, axis=0).reshape(M, T, n)
    out = q0 + w[..., None] * (q1 - q0)
    out[:, 0], out[:, -1] = q[:, 0], q[:, -1]
    return np.where(ok[:, None, None], out, q)
