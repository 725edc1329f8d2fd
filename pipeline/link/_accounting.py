"""Master and virtual channel frame-count continuity: gaps, duplicates, replays and restarts.

A frame count is a counter modulo ``M`` (TM: 256 for both counts; AOS: 2**24, or 2**28 with the
cycle extension).  Against the last count ``c`` of a stream a new count ``g`` is classified by
``d = (g - c) mod M``:

* ``d == 1``: the next frame;
* ``d == 0``: a duplicate of the last frame;
* ``d > M // 2``: behind the last (a replay, or a restart of the counter);
* otherwise: a gap of ``d - 1`` missing frames.

When frame positions are known, a running estimate of the frame period (:class:`FramePeriod`)
tells how many frames passed on the physical channel.  If that is at least ``M / 2`` the counts
alone are ambiguous (a long outage): a late or repeated frame is then implausible, so ``d == 1``
is taken as the next frame and anything else as a gap; for the master channel, where every frame
counts, the number missing is taken from the elapsed time (``d - 1`` plus the whole multiple of
``M`` nearest to it).  Conversely a forward jump of more frames than the elapsed time holds is no
gap: the counter restarted (classified with "behind").  Without positions, losses of a whole
multiple of ``M`` frames (256 TM frames) cannot be seen: a limit of the counters themselves.

A counter that goes behind (or repeats) is a fact about the data, never a reason to drop a frame:
:class:`CountTracker` follows such a channel as several *tracks* (the running stream, a replay of
older frames, the stream after a restart), so that frames continuing any track are in sequence
with it, and only a frame that continues none of them is an anomaly ("duplicate" or "backward").
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import asdict, dataclass
from typing import Any, Literal

__all__ = ["Gap", "ChannelAccounting", "FramePeriod", "count_step", "master_missing", "CountStep",
           "CountTrack", "CountTracker", "TrackStep"]

CountStep = Literal["next", "duplicate", "behind", "gap"]


def count_step(last: int, got: int, modulus: int, elapsed_frames: float | None = None) -> tuple[CountStep, int]:
    """Classify frame count ``got`` after ``last`` (see the module notes); returns (step, missing).

    Parameters
    ----------
    last, got : int
        The last accepted count and the new one.
    modulus : int
        Count modulus (256 TM, 2**24 or 2**28 AOS, 2**14 packet sequence counts).
    elapsed_frames : float, optional
        Frame periods on the physical channel since the frame that gave ``last``, when known.

    Returns
    -------
    step : {"next", "duplicate", "behind", "gap"}
    missing : int
        Frames skipped counted modulo ``modulus`` (> 0 only for ``"gap"``).
    """
    d = (got - last) % modulus
    if d == 1:
        return "next", 0
    if elapsed_frames is not None and elapsed_frames >= modulus / 2:
        return "gap", (d - 1) % modulus
    if d == 0:
        return "duplicate", 0
    if d > modulus // 2:
        return "behind", 0
    return "gap", d - 1


def master_missing(missing_mod: int, modulus: int, elapsed_frames: float | None) -> int:
    """Frames missing on a master channel: ``missing_mod`` plus the multiple of ``modulus`` nearest the time.

    ``elapsed_frames`` (frame periods between the two frames, from their positions) is exact
    up to timing jitter on the master channel, where every frame carries the next count.
    """
    if elapsed_frames is None or elapsed_frames < modulus / 2:
        return missing_mod
    k = round((elapsed_frames - 1 - missing_mod) / modulus)
    return missing_mod + modulus * max(k, 0)


class FramePeriod:
    """Running frame period in samples: the median of the last 15 positive position steps.

    Fed with the position of every frame in arrival order (any status); consecutive frames on a
    physical channel are one frame period apart, and the median ignores the steps that span lost
    frames.  Needs 3 steps before it gives an estimate.  O(1) memory.
    """

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        self._steps: deque[float] = deque(maxlen=15)
        self._last: float | None = None
        self._median: float | None = None

    def update(self, position: float) -> None:
        """Record the position of the next frame to arrive (NaN positions are ignored)."""
        if not math.isfinite(position):
            return
        if self._last is not None and position > self._last:
            self._steps.append(position - self._last)
            if len(self._steps) >= 3:  # kept here: read once per count track and frame, changed once per frame
                self._median = sorted(self._steps)[len(self._steps) // 2]
        self._last = position

    @property
    def samples(self) -> float | None:
        """The estimated period (the median of the last 15 steps), None until 3 steps are known."""
        return self._median

    def frames_between(self, earlier: float | None, later: float) -> float | None:
        """Frame periods from position ``earlier`` to ``later`` (None when unknown)."""
        period = self.samples
        if period is None or earlier is None or not math.isfinite(earlier) or not math.isfinite(later):
            return None
        return (later - earlier) / period


@dataclass(frozen=True)
class Gap:
    """A discontinuity of a master (``kind="mc"``) or virtual (``kind="vc"``) channel frame count.

    Attributes
    ----------
    kind : {"mc", "vc"}
    scid : int
    vcid : int or None
        None for a master channel gap.
    expected, got : int
        The count that should have come and the one that came.
    missing : int
        Frames skipped: ``(got - expected) mod M``.
    position : float
        Sample position of the frame that revealed the gap (the first frame after it).
    after_position : float or None
        Sample position of the last good frame before the gap (None if unknown).
    unusable_between : int
        Frames received between the two that could not be used (failed RS, FECF or header):
        part of ``missing`` was received but corrupt.
    ambiguous : bool
        True for a virtual channel gap longer than half the count range in time: ``missing`` is
        then only known modulo the count modulus (whole wraps may be missing too).
    """

    kind: str
    scid: int
    vcid: int | None
    expected: int
    got: int
    missing: int
    position: float
    after_position: float | None = None
    unusable_between: int = 0
    ambiguous: bool = False

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(eq=False)
class CountTrack:
    """One stream of consecutive counts on a channel (see :class:`CountTracker`).

    Attributes
    ----------
    last : int
        The last count of the stream.
    last_position : float or None
        Position of the frame that carried it.
    payload : object
        Free for the owner (the packet extractor keeps its reassembly state here).
    """

    last: int
    last_position: float | None
    payload: Any = None


@dataclass(frozen=True)
class TrackStep:
    """What :meth:`CountTracker.step` found for one count.

    Attributes
    ----------
    kind : {"first", "next", "gap", "duplicate", "backward"}
        ``first``: the channel's first count; ``next`` / ``gap``: the count continues a track
        (``gap``: ``missing`` counts skipped); ``duplicate``: the same count as the last of a
        track (which the frame then stands for: what came after the original continues from
        it); ``backward``: behind every track (a replay or a restart), which starts a new track.
    track : CountTrack
        The track the count now belongs to (already updated).
    missing : int
        Counts skipped (``gap`` only).
    expected : int or None
        The count the track expected (``gap`` only).
    after_position : float or None
        Position of the track's previous frame (``gap`` only).
    ambiguous : bool
        A gap longer than half the count range in time: ``missing`` is known only modulo ``M``.
    dropped : tuple of CountTrack
        Tracks given up at this step (the oldest beyond ``max_tracks``, or ones silent for more
        than half the count range): their payloads end here.
    """

    kind: str
    track: CountTrack
    missing: int = 0
    expected: int | None = None
    after_position: float | None = None
    ambiguous: bool = False
    dropped: tuple = ()

    @property
    def anomaly(self) -> str | None:
        """``"duplicate"`` or ``"backward"`` for a count that continues no track, else None."""
        return self.kind if self.kind in ("duplicate", "backward") else None


class CountTracker:
    """Follow a wrapping counter that may repeat, restart or replay older counts.

    Parameters
    ----------
    modulus : int
        Count modulus (256 TM, 2**24 / 2**28 AOS, 2**14 packet sequence counts).
    max_tracks : int
        Streams followed at once (1..64); the least recently continued one is given up first.
    master : bool
        A master channel (every frame carries the next count): after a long outage the number
        missing is taken from the elapsed time (:func:`master_missing`).

    Notes
    -----
    Each count is classified against every track with :func:`count_step` (elapsed time from the
    track's last position when a :class:`FramePeriod` is given).  It continues the most recently
    used track it is ``next`` for; else the track it is the smallest ``gap`` for; else it is a
    ``duplicate`` of a track's last count (that track continues from it), or ``backward`` of all
    of them, and starts a new track.
    A forward jump larger than the elapsed time allows (``missing + 1 > 1.02 elapsed + 2``) is
    not a gap but a restart, and counts as behind.  Tracks other than the newest that have been
    silent for half the count range in time are given up (their counts are ambiguous by then).
    Cost O(max_tracks) per count.  Same counts and positions in, same steps out: chunking-invariant.
    """

    def __init__(self, *, modulus: int, max_tracks: int = 4, master: bool = False) -> None:
        if isinstance(modulus, bool) or not isinstance(modulus, int) or modulus < 2:
            raise ValueError(f"Argument 'modulus' must be an integer >= 2, not {modulus!r}.")
        if isinstance(max_tracks, bool) or not isinstance(max_tracks, int) or not 1 <= max_tracks <= 64:
            raise ValueError(f"Argument 'max_tracks' must be 1..64, not {max_tracks!r}.")
        self.modulus = modulus
        self.max_tracks = max_tracks
        self.master = bool(master)
        self.reset()

    def reset(self) -> None:
        """Forget every track."""
        self.tracks: list[CountTrack] = []  # least recently continued first
        self._next_step: TrackStep | None = None  # the last plain "next" step handed out

    @property
    def newest(self) -> CountTrack | None:
        """The track continued last."""
        return self.tracks[-1] if self.tracks else None

    def step(self, count: int, position: float | None = None, period: FramePeriod | None = None) -> TrackStep:
        """Classify ``count`` (at ``position``) and advance the track it belongs to."""
        M = self.modulus
        count = int(count) % M
        pos = None if position is None or not math.isfinite(float(position)) else float(position)
        if not self.tracks:
            track = CountTrack(count, pos)
            self.tracks.append(track)
            return TrackStep("first", track)
        if len(self.tracks) == 1 and (count - self.tracks[0].last) % M == 1:
            # the usual case, decided as the loop below decides it: one track, the next count (which a
            # master channel turns into a gap only after half the count range in time)
            t = self.tracks[0]
            elapsed = (None if not self.master or period is None or pos is None else
                       period.frames_between(t.last_position, pos))
            if not (elapsed is not None and elapsed >= M / 2):
                t.last, t.last_position = count, pos
                step = self._next_step  # (a TrackStep is immutable: the one of this track is handed out again)
                if step is None or step.track is not t:
                    step = self._next_step = TrackStep("next", t)
                return step
        dropped = []
        best_next = best_gap = best_dup = None
        newest = self.tracks[-1]
        for t in reversed(self.tracks):
            elapsed = None if period is None or pos is None else period.frames_between(t.last_position, pos)
            if t is not newest and elapsed is not None and elapsed >= M / 2:
                dropped.append(t)
                continue
            kind, missing = count_step(t.last, count, M, elapsed)
            ambiguous = elapsed is not None and elapsed >= M / 2
            if self.master and ambiguous:
                missing = master_missing((count - t.last - 1) % M, M, elapsed)
                kind, ambiguous = ("gap" if missing else "next"), False
            elif kind == "gap" and elapsed is not None and not ambiguous and missing + 1 > 1.02 * elapsed + 2:
                kind = "behind"  # more counts than time: the counter restarted
            if kind == "next" and best_next is None:
                best_next = (t, 0, False)
            elif kind == "gap" and (best_gap is None or missing < best_gap[1]):
                best_gap = (t, missing, ambiguous)
            elif kind == "duplicate" and best_dup is None:
                best_dup = t
        for t in dropped:
            self.tracks.remove(t)
        if best_next is not None or best_gap is not None:
            track, missing, ambiguous = best_next if best_next is not None else best_gap
            kind = "next" if best_next is not None else "gap"
            expected, after = (track.last + 1) % M, track.last_position
            track.last, track.last_position = count, pos
            self.tracks.remove(track)
            self.tracks.append(track)
            if kind == "next":
                return TrackStep("next", track, dropped=tuple(dropped))
            return TrackStep("gap", track, missing=missing, expected=expected, after_position=after,
                             ambiguous=ambiguous, dropped=tuple(dropped))
        if best_dup is not None:
            best_dup.last_position = pos
            self.tracks.remove(best_dup)
            self.tracks.append(best_dup)
            return TrackStep("duplicate", best_dup, dropped=tuple(dropped))
        track = CountTrack(count, pos)
        self.tracks.append(track)
        while len(self.tracks) > self.max_tracks:
            dropped.append(self.tracks.pop(0))
        return TrackStep("backward", track, dropped=tuple(dropped))


@dataclass
class _Counter:
    """Statistics of one master or virtual channel, with its count tracks."""

    tracker: CountTracker
    frames: int = 0
    idle_frames: int = 0
    gaps: int = 0
    missing: int = 0
    duplicates: int = 0
    backward: int = 0
    first_count: int | None = None
    unusable_since: int = 0

    @property
    def modulus(self) -> int:
        return self.tracker.modulus

    @property
    def last(self) -> int | None:
        t = self.tracker.newest
        return None if t is None else t.last


class ChannelAccounting:
    """Frame-count continuity per master channel (TM only) and per virtual channel.

    Parameters
    ----------
    spacecraft_id : int, optional
        Count only frames of this spacecraft (default: every spacecraft whose frames are
        ``ok`` or ``idle``; the frame parser already marks other spacecraft ``foreign_scid``).
    max_tracks : int
        Count streams followed per channel (see :class:`CountTracker`).

    Notes
    -----
    Frames with status ``ok`` or ``idle`` take part (idle frames carry real counts); every
    frame's position feeds the frame-period estimate used for long outages (module notes).  Frames
    with another status are counted by status only: their headers cannot be trusted, so they
    show up as the gap that follows them, with ``unusable_between`` telling how many of the
    missing frames were in fact received corrupt.  ``foreign_scid`` frames are counted per
    spacecraft id.

    Each frame's ``count_anomaly`` is set here: ``"duplicate"`` or ``"backward"`` when its
    virtual channel count (else, TM, its master channel count) continues no track of its channel
    (:class:`CountTracker`), None otherwise.  Such a frame is counted (``duplicates``,
    ``backward``), never withheld.  O(tracks) per frame; state is one
    small tracker per channel.

    References
    ----------
    CCSDS 132.0-B sec. 4.1.2.4-4.1.2.5 (TM master / virtual channel frame counts, modulo 256);
    CCSDS 732.0-B sec. 4.1.2.4 and 4.1.2.5.3 (AOS VC frame count and its cycle extension).
    Clause numbers from memory, not confirmed.
    """

    def __init__(self, *, spacecraft_id: int | None = None, max_tracks: int = 4) -> None:
        if spacecraft_id is not None and (isinstance(spacecraft_id, bool) or not isinstance(spacecraft_id, int)
                                          or not 0 <= spacecraft_id <= 0x3FF):
            raise ValueError(f"Argument 'spacecraft_id' must be 0..1023 or None, not {spacecraft_id!r}.")
        CountTracker(modulus=256, max_tracks=max_tracks)  # validates max_tracks
        self.spacecraft_id = spacecraft_id
        self.max_tracks = max_tracks
        self.reset()

    def reset(self) -> None:
        """Forget every count and counter."""
        self.status_counts: dict[str, int] = {}
        self.foreign: dict[int, int] = {}
        self.foreign_unverified = 0
        self.period = FramePeriod()
        self.master: dict[int, _Counter] = {}
        self.virtual: dict[tuple[int, int], _Counter] = {}
        self.frames = 0

    def process(self, record) -> list[Gap]:
        """Account for one :class:`FrameRecord`; set its ``count_anomaly``; return the gaps it reveals (MC first)."""
        self.frames += 1
        self.period.update(float(record.position))
        status = record.status
        self.status_counts[status] = self.status_counts.get(status, 0) + 1
        if status == "foreign_scid":
            if record.scid is None:  # its header is not verified (FrameRecord.unverified)
                self.foreign_unverified += 1
            else:
                self.foreign[int(record.scid)] = self.foreign.get(int(record.scid), 0) + 1
            return []
        if status not in ("ok", "idle") or (self.spacecraft_id is not None and record.scid != self.spacecraft_id):
            for c in self.master.values():
                c.unusable_since += 1
            for c in self.virtual.values():
                c.unusable_since += 1
            return []
        gaps: list[Gap] = []
        scid, vcid, pos = int(record.scid), int(record.vcid), float(record.position)
        mc_anomaly = None
        if record.mcfc is not None:
            mc = self._counter(self.master, scid, 256, master=True)
            g, mc_anomaly = self._step(mc, int(record.mcfc), pos, status, "mc", scid, None)
            if g is not None:
                gaps.append(g)
        vc = self._counter(self.virtual, (scid, vcid), int(record.vcfc_modulus), master=False)
        g, vc_anomaly = self._step(vc, int(record.vcfc), pos, status, "vc", scid, vcid)
        if g is not None:
            gaps.append(g)
        record.count_anomaly = vc_anomaly or mc_anomaly
        return gaps

    def _counter(self, table: dict, key, modulus: int, *, master: bool) -> _Counter:
        c = table.get(key)
        if c is None or c.modulus != modulus:  # (AOS: the cycle extension switched on or off)
            fresh = _Counter(tracker=CountTracker(modulus=modulus, max_tracks=self.max_tracks, master=master))
            if c is not None:
                fresh.frames, fresh.idle_frames, fresh.first_count = c.frames, c.idle_frames, c.first_count
                fresh.gaps, fresh.missing, fresh.duplicates, fresh.backward = c.gaps, c.missing, c.duplicates, \
                    c.backward
            c = table[key] = fresh
        return c

    def _step(self, c: _Counter, got: int, pos: float, status: str, kind: str, scid: int, vcid: int | None):
        """Advance one counter; returns (a Gap or None, the count anomaly or None)."""
        c.frames += 1
        if status == "idle":
            c.idle_frames += 1
        if c.first_count is None:
            c.first_count = got
        res = c.tracker.step(got, pos, self.period)
        gap = None
        if res.kind == "gap":
            c.gaps += 1
            c.missing += res.missing
            gap = Gap(kind=kind, scid=scid, vcid=vcid, expected=res.expected, got=got, missing=res.missing,
                      position=pos, after_position=res.after_position,
                      unusable_between=min(c.unusable_since, res.missing), ambiguous=res.ambiguous)
        elif res.kind == "duplicate":
            c.duplicates += 1
        elif res.kind == "backward":
            c.backward += 1
        c.unusable_since = 0
        return gap, res.anomaly

    def as_dict(self) -> dict[str, Any]:
        """Run statistics: status counts, master channel totals, and a list of virtual channels."""
        mc_list = [
            {"scid": scid, "frames": c.frames, "idle_frames": c.idle_frames, "gaps": c.gaps, "missing": c.missing,
             "duplicates": c.duplicates, "backward": c.backward}
            for scid, c in sorted(self.master.items())
        ]
        vc_list = [
            {"scid": scid, "vcid": vcid, "frames": c.frames, "idle_frames": c.idle_frames, "gaps": c.gaps,
             "missing": c.missing, "duplicates": c.duplicates, "backward": c.backward,
             "first_count": c.first_count, "last_count": c.last}
            for (scid, vcid), c in sorted(self.virtual.items())
        ]
        return {
            "frames": self.frames,
            "status_counts": dict(self.status_counts),
            "mc_gaps": sum(c.gaps for c in self.master.values()),
            "mc_missing": sum(c.missing for c in self.master.values()),
            "mc_duplicates": sum(c.duplicates for c in self.master.values()),
            "mc_backward": sum(c.backward for c in self.master.values()),
            "vc_duplicates": sum(c.duplicates for c in self.virtual.values()),
            "vc_backward": sum(c.backward for c in self.virtual.values()),
            "master_channels": mc_list,
            "foreign_scids": {str(k): v for k, v in sorted(self.foreign.items())},
            "foreign_unverified": self.foreign_unverified,
            "virtual_channels": vc_list,
        }
