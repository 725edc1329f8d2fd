"""Master and virtual channel frame-count continuity: gaps, duplicates, out-of-order frames.

A frame count is a counter modulo ``M`` (TM: 256 for both counts; AOS: 2**24, or 2**28 with the
cycle extension).  Against the last accepted count ``c`` a new count ``g`` is classified by
``d = (g - c) mod M``:

* ``d == 1``: the next frame;
* ``d == 0``: a duplicate of the last frame;
* ``d > M // 2``: a frame from the past (reordered or replayed), not accepted;
* otherwise: a gap of ``d - 1`` missing frames, after which ``g`` is accepted.

When frame positions are known, a running estimate of the frame period (:class:`FramePeriod`)
tells how many frames passed on the physical channel.  If that is at least ``M / 2`` the counts
alone are ambiguous (a long outage): a late or repeated frame is then implausible, so ``d == 1``
is taken as the next frame and anything else as a gap; for the master channel, where every frame
counts, the number missing is taken from the elapsed time (``d - 1`` plus the whole multiple of
``M`` nearest to it).  Without positions, losses of a whole multiple of ``M`` frames (256 TM
frames) cannot be seen: a limit of the counters themselves.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import asdict, dataclass
from typing import Any, Literal

__all__ = ["Gap", "ChannelAccounting", "FramePeriod", "count_step", "master_missing", "CountStep"]

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

    def update(self, position: float) -> None:
        """Record the position of the next frame to arrive (NaN positions are ignored)."""
        if not math.isfinite(position):
            return
        if self._last is not None and position > self._last:
            self._steps.append(position - self._last)
        self._last = position

    @property
    def samples(self) -> float | None:
        """The estimated period, None until 3 steps are known."""
        if len(self._steps) < 3:
            return None
        return sorted(self._steps)[len(self._steps) // 2]

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


@dataclass
class _Counter:
    last: int | None = None
    modulus: int = 256
    last_position: float | None = None
    frames: int = 0
    idle_frames: int = 0
    gaps: int = 0
    missing: int = 0
    duplicates: int = 0
    out_of_order: int = 0
    first_count: int | None = None
    unusable_since: int = 0


class ChannelAccounting:
    """Frame-count continuity per master channel (TM only) and per virtual channel.

    Parameters
    ----------
    spacecraft_id : int, optional
        Count only frames of this spacecraft (default: every spacecraft whose frames are
        ``ok`` or ``idle``; the frame parser already marks other spacecraft ``foreign_scid``).

    Notes
    -----
    Frames with status ``ok`` or ``idle`` take part (idle frames carry real counts); every
    frame's position feeds the frame-period estimate used for long outages (module notes).  Frames
    with another status are counted by status only: their headers cannot be trusted, so they
    show up as the gap that follows them, with ``unusable_between`` telling how many of the
    missing frames were in fact received corrupt.  ``foreign_scid`` frames are counted per
    spacecraft id.  O(1) per frame; state is one small counter per channel.

    References
    ----------
    CCSDS 132.0-B sec. 4.1.2.4-4.1.2.5 (TM master / virtual channel frame counts, modulo 256);
    CCSDS 732.0-B sec. 4.1.2.4 and 4.1.2.5.3 (AOS VC frame count and its cycle extension).
    Clause numbers from memory, not confirmed.
    """

    def __init__(self, *, spacecraft_id: int | None = None) -> None:
        if spacecraft_id is not None and (isinstance(spacecraft_id, bool) or not isinstance(spacecraft_id, int)
                                          or not 0 <= spacecraft_id <= 0x3FF):
            raise ValueError(f"Argument 'spacecraft_id' must be 0..1023 or None, not {spacecraft_id!r}.")
        self.spacecraft_id = spacecraft_id
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
        """Account for one :class:`FrameRecord`; returns the gaps it reveals (MC first, then VC)."""
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
        if record.mcfc is not None:
            mc = self.master.setdefault(scid, _Counter(modulus=256))
            g = self._step(mc, int(record.mcfc), 256, pos, status, "mc", scid, None)
            if g is False:
                return []  # a duplicated / late frame: its VC count is not looked at
            if g is not None:
                gaps.append(g)
        vc = self.virtual.setdefault((scid, vcid), _Counter(modulus=int(record.vcfc_modulus)))
        g = self._step(vc, int(record.vcfc), int(record.vcfc_modulus), pos, status, "vc", scid, vcid)
        if isinstance(g, Gap):
            gaps.append(g)
        return gaps

    def _step(self, c: _Counter, got: int, modulus: int, pos: float, status: str, kind: str, scid: int,
              vcid: int | None):
        """Advance one counter; a Gap, None (in sequence / first) or False (duplicate / behind)."""
        c.frames += 1
        if status == "idle":
            c.idle_frames += 1
        if c.last is None or modulus != c.modulus:
            c.last, c.modulus, c.last_position, c.unusable_since = got, modulus, pos, 0
            if c.first_count is None:
                c.first_count = got
            return None
        elapsed = self.period.frames_between(c.last_position, pos)
        step, missing = count_step(c.last, got, modulus, elapsed)
        ambiguous = elapsed is not None and elapsed >= modulus / 2
        if kind == "mc" and ambiguous:
            missing = master_missing((got - c.last - 1) % modulus, modulus, elapsed)
            step = "gap" if missing else "next"
            ambiguous = False
        if step == "duplicate":
            c.duplicates += 1
            return False
        if step == "behind":
            c.out_of_order += 1
            return False
        gap = None
        if step == "gap":
            c.gaps += 1
            c.missing += missing
            gap = Gap(kind=kind, scid=scid, vcid=vcid, expected=(c.last + 1) % modulus, got=got, missing=missing,
                      position=pos, after_position=c.last_position, unusable_between=min(c.unusable_since, missing),
                      ambiguous=ambiguous)
        c.last, c.last_position, c.unusable_since = got, pos, 0
        return gap

    def as_dict(self) -> dict[str, Any]:
        """Run statistics: status counts, master channel totals, and a list of virtual channels."""
        mc_list = [
            {"scid": scid, "frames": c.frames, "idle_frames": c.idle_frames, "gaps": c.gaps, "missing": c.missing,
             "duplicates": c.duplicates, "out_of_order": c.out_of_order}
            for scid, c in sorted(self.master.items())
        ]
        vc_list = [
            {"scid": scid, "vcid": vcid, "frames": c.frames, "idle_frames": c.idle_frames, "gaps": c.gaps,
             "missing": c.missing, "duplicates": c.duplicates, "out_of_order": c.out_of_order,
             "first_count": c.first_count, "last_count": c.last}
            for (scid, vcid), c in sorted(self.virtual.items())
        ]
        return {
            "frames": self.frames,
            "status_counts": dict(self.status_counts),
            "mc_gaps": sum(c.gaps for c in self.master.values()),
            "mc_missing": sum(c.missing for c in self.master.values()),
            "mc_duplicates": sum(c.duplicates for c in self.master.values()),
            "mc_out_of_order": sum(c.out_of_order for c in self.master.values()),
            "master_channels": mc_list,
            "foreign_scids": {str(k): v for k, v in sorted(self.foreign.items())},
            "foreign_unverified": self.foreign_unverified,
            "virtual_channels": vc_list,
        }
