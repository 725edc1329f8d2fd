"""Frame synchronizer: find the attached sync marker, lock on the frame period, flywheel, re-acquire."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Literal

import numpy as np
from scipy import special

from pipeline.fec import ASM
from pipeline.sync import _kernels
from pipeline.sync._args import as_soft_and_position, check_int
from pipeline.sync._types import Cadu, SyncEvent

__all__ = ["FrameSync", "FrameSyncStats", "DEFAULT_ASM", "DEFAULT_LOOKBACK_FRAMES", "DEFAULT_LOOKBACK_BITS",
           "ASM_SEARCH_THRESHOLD", "soft_search_threshold", "Correlation"]

#: The 32-bit attached sync marker 1ACFFC1D (CCSDS 131.0-B sec. 8.2), first transmitted bit = MSB.
DEFAULT_ASM = ASM

#: A soft-correlation synchronizer looks back at least this many frame periods when it locks
#: (``lookback_frames=None``) ...
DEFAULT_LOOKBACK_FRAMES = 8
#: ... and at least this many bits: short codewords behind the 32-bit ASM are where the search misses most.
DEFAULT_LOOKBACK_BITS = 1 << 16

_SEARCH, _CHECK, _LOCK = "search", "check", "lock"

#: Soft search threshold of the 32-bit ASM; other markers get the one with its false-candidate rate on noise.
ASM_SEARCH_THRESHOLD = 4.5


def soft_search_threshold(marker_bits: int) -> float:
    """The soft search threshold of an ``m``-bit marker: as rare a false candidate on noise as the ASM's at 4.5.

    Parameters
    ----------
    marker_bits : int
        Length of the marker, 16 .. 256 bits.

    Returns
    -------
    float
        ``T(m) = sqrt(m x)`` with ``x`` the upper ``p`` quantile of Beta(1/2, (m - 1)/2), ``p = I_c(20.25 /
        32; 1/2, 31/2) = 3.17e-8``: the probability per bit that the score of the 32-bit ASM reaches 4.5 on
        noise.

    Notes
    -----
    On Gaussian noise the window of m soft values points in a direction uniform on the sphere, so
    ``z^2 / m`` (the squared cosine of its angle with the marker) is Beta(1/2, (m - 1)/2) whatever the
    noise power; the tail is far lighter than the Gaussian ``2 Q(T)`` for short markers (3.2e-8 against
    6.8e-6 at 4.5 for m = 32) and approaches it as m grows (4.1e-6 for m = 192).  One threshold for
    every marker would thus give the 192-bit turbo marker 130 times the false candidates (and false
    locks) per bit of the ASM.  ``T(m)``: 4.5 (32 bits), 4.98 (64), 5.15 (96), 5.24 (128), 5.34 (192).
    At the Es/N0 where each code works (ASM at -1.2 dB for AR4JA rate 1/2; 64 bits at -3 dB, 192 bits
    at -8 dB) a marker then misses the search threshold with probability 0.58, 0.07 and 0.03, and the
    look-back recovers the frames the search passed over (``bench/bench_sync_onset.py``).  Cost: one
    inverse incomplete beta function.

    References
    ----------
    The distribution of the squared cosine of a uniform direction: standard result (common practice, no
    published source named here); ``scipy.special.betainccinv``.

    Examples
    --------
    >>> [round(soft_search_threshold(m), 2) for m in (32, 64, 96, 128, 192)]
    [4.5, 4.98, 5.15, 5.24, 5.34]
    """
    m = check_int("marker_bits", marker_bits, 16, 256)
    p = special.betaincc(0.5, 15.5, ASM_SEARCH_THRESHOLD**2 / 32.0)
    return float(math.sqrt(m * special.betainccinv(0.5, (m - 1) / 2.0, p)))


#: Smallest capacity of the bit buffer (bits); it doubles as needed.
_MIN_BUFFER_BITS = 1 << 14

#: How the marker is compared: hard decisions against ``max_errors``, or the normalised soft correlation.
Correlation = Literal["hard", "soft"]


@dataclass
class FrameSyncStats:
    """Counters of one :class:`FrameSync` run."""

    bits_in: int = 0
    candidates: int = 0  # markers found while searching (true or false)
    false_candidates: int = 0  # candidates rejected by the check at the next expected position
    locks: int = 0
    losses: int = 0
    cadus: int = 0  # all CADUs emitted, flywheel ones included
    flywheel_cadus: int = 0
    inverted_cadus: int = 0
    bit_slips: int = 0
    polarity_changes: int = 0
    asm_errors: int = 0  # marker bit errors summed over the CADUs whose marker was found
    flywheel_dropped: int = 0  # flywheel CADUs withdrawn: after the loss of lock a marker was found inside them
    lookback_cadus: int = 0  # CADUs before the marker a lock started on, recovered by the look-back (in cadus too)
    bits_discarded: int = 0  # bits received after the last CADU when the stream was flushed

    def as_dict(self) -> dict:
        return asdict(self)


class FrameSync:
    """Search / check / lock / flywheel frame synchronizer on the 32-bit ASM (or any marker).

    Parameters
    ----------
    frame_bits : int
        Bits after the marker up to the next marker (the codeblock: RS codeblock, transfer frame or
        codeword), 8 .. 2**22.
    asm : bytes
        The marker, MSB first transmitted (default 1ACFFC1D, CCSDS 131.0-B sec. 8.2).
    max_errors : int
        Marker bits allowed to differ for a match, 0 .. len(marker bits)/2 - 1 (so that a marker
        can never match both upright and complemented).
    check_frames : int
        Markers that must follow a search candidate at exactly one period's distance before the
        synchronizer locks (0 locks on the first marker found).
    flywheel : int
        Consecutive missing markers tolerated while locked; the CADUs cut at those expected
        positions are emitted with ``flywheel=True``.  One more miss drops back to search.
    slip_bits : int
        While locked, when the marker is not at the expected position, positions up to this many
        bits either side are tried before the marker is counted as missing: a slip of the bit clock
        of up to ``slip_bits`` bits is followed within the same frame.
    keep_soft : bool
        Attach the codeblock's soft values (and the marker's) to each CADU (for soft-input decoders).
    correlation : {"hard", "soft"}
        "hard": the marker is compared with hard decisions and matches with at most ``max_errors``
        mismatches.  "soft": it matches where the normalised soft correlation
        (:func:`~pipeline.sync._kernels.marker_score`) reaches ``search_threshold`` when searching (and
        for a slip) or ``lock_threshold`` at an expected position (check and lock); ``max_errors`` is
        then not used.  For the low Es/N0 of turbo and LDPC codes.
    search_threshold, lock_threshold : float
        Soft correlation thresholds (the score on noise has unit variance), ``0 < lock_threshold <=
        search_threshold``.  ``search_threshold=None``: :func:`soft_search_threshold` of the marker
        (4.5 for the 32-bit ASM, up to 5.34 for the 192-bit turbo marker).
    lookback_frames : int or None
        When a lock is confirmed, the expected marker positions up to this many frame periods before
        the marker it started on are checked as in lock, and the CADUs found there are emitted first
        (0 .. 1000; 0 = no look-back).  None: with soft correlation ``DEFAULT_LOOKBACK_FRAMES`` (8)
        periods or ``DEFAULT_LOOKBACK_BITS`` (65536) bits, whichever is more (32 periods of AR4JA
        k = 1024 behind the ASM, 19 of turbo k = 1784 rate 1/2, 8 of anything longer than 8192
        bits); 0 with hard correlation (whose search and lock tests are the same).  The soft values
        of that many periods are held while searching.

    Notes
    -----
    Input is soft bits (float32, positive = bit 0) with the sample position of each bit.  With
    ``correlation="hard"`` the marker is correlated on hard decisions.  The state machine, with
    ``L = marker + frame_bits``:

    * search: the first offset ``c`` (scanning forward) where the marker or its complement
      matches with at most ``max_errors`` mismatches is a candidate; every offset is examined
      exactly once, so the number of candidates in random data is binomial, with per-offset
      probability ``2 sum_{i<=e} C(m, i) / 2^m`` (REFERENCES.md sec. 1.7, both polarities).
    * check: the marker must match (either polarity) at ``c + L, ..., c + check_frames L``; the
      first failure rejects the candidate and the search resumes at ``c + 1``.
    * lock: at each expected position ``p`` the marker is compared; if it fails, the offsets
      ``p - slip_bits .. p + slip_bits`` are tried (best match, nearest first); if one matches,
      the lock moves there (a ``bit_slip`` event).  Otherwise the CADU at ``p`` is emitted as a
      flywheel CADU, up to ``flywheel`` in a row; the next miss is a loss of lock and the search
      resumes one bit after the start of the last CADU whose marker was found (not after the
      flywheel CADUs), so neither a marker displaced by a large slip nor the first frames of a new
      frame grid (two recordings joined, a recorder restart) are skipped.
    * Flywheel CADUs are held back until their fate is known: a marker found again in lock
      delivers them (in order, before the CADU found); after a loss of lock, those that end at or
      before the position where the synchronizer locks again (or that the search has passed
      without a candidate) are delivered, and those overlapping the newly found frame were cut on
      a grid that no longer holds: they are withdrawn (``flywheel_dropped``).  So CADUs always
      come out in stream order and never overlap a CADU whose marker was found after them.
    * Look-back (``lookback_frames = K > 0``): when the check confirms a candidate ``c``, the frame
      grid is walked back from it, newest first, down to ``max(f, c - K L)``, where ``f`` is one bit
      after the last marker found (the stream's start before any; the search after a loss of lock
      starts there too, so a marker displaced by a slip may overlap that CADU).  The marker is
      expected ``L`` bits before the CADU after it and tested as in lock: at the lock threshold
      while nothing has been missed since ``c``, at the search threshold after a miss (a gap is
      bridged only by a marker the search itself would have taken), then in the slip window
      (``slip_bits`` either side, search threshold, best score first); the walk stops after
      ``flywheel + 1`` misses in a row.  From the oldest marker found on, the CADUs are emitted
      before ``c``'s, in stream order: the markers found, and the misses between them as flywheel
      CADUs (polarity of the marker before).  So markers that the search passed over for want of
      the search threshold (at Es/N0 -1.2 dB, AR4JA rate 1/2 near its threshold, the 32-bit ASM
      reaches 4.5 only four times in ten) or left behind with a rejected candidate are recovered
      once the lock shows where the frame grid is; the lower threshold is used only behind a
      confirmed lock, which is what keeps false markers on noise as rare as before (a false lock
      on noise gains a look-back CADU with probability about ``P_fa(3.0)``, 1.5e-3).  Held flywheel
      CADUs (below) count the oldest CADU emitted as the position of the new lock, and while
      searching only those ending ``K L`` bits before the search position are delivered.
    * A complemented marker means the codeblock is complemented (180-degree phase ambiguity); the
      data are re-inverted and ``inverted`` is set.  The polarity is followed marker by marker.

    With ``correlation="soft"`` a match is a score ``|z| >= T``, ``z = sum(s_j y_j) / sqrt(sum(y_j^2))``
    over the m soft values ``y`` at the offset and the marker's signs ``s`` (the sign of ``z`` is the
    polarity); a search takes the best score among the m offsets from the first one that crosses the
    threshold.  On noise ``z`` has unit variance and ``z^2 / m`` is Beta(1/2, (m - 1)/2), so a false
    match has probability 3.2e-8 per offset searching the ASM at 4.5 (the same for every marker at
    its default threshold, :func:`soft_search_threshold`) and 1.5e-3 (32 bits) to 2.5e-3 (192 bits)
    checking at 3.0; on the marker at Es/N0
    ``rho`` per bit ``z`` is about ``sqrt(m) sqrt(2 rho / (1 + 2 rho))`` with standard deviation
    ``1 / sqrt(1 + 2 rho)``: 5.7 for the 64-bit marker at -3 dB, 6.8 for the 192-bit one at -8 dB.
    In lock, a marker not at the expected position is looked for in the slip window with the
    search threshold (a slip is a stronger claim than a confirmation), best score first.  Search
    cost O(m) per offset (:func:`~pipeline.sync._kernels.find_marker_soft`).

    Every decision needs only bits already received and is taken as soon as they are, so the
    output does not depend on how the input is cut into chunks.  Memory is bounded by about
    ``(max(check_frames, flywheel, lookback_frames) + 2) L`` bits plus one input chunk (13 octets a
    bit: soft value, hard decision, position), in a buffer that grows by doubling and is compacted in
    place, so a chunk costs O(chunk) and not O(buffer).  Search cost: the kernel
    :func:`~pipeline.sync._kernels.find_marker`, O(max_errors) per offset on random data; the
    look-back O(K m) per lock.

    References
    ----------
    CCSDS 131.0-B-2 sec. 8 (ASM placement, pattern); CCSDS 130.1-G-1 sec. 8.3 (marker search);
    search/check/lock/flywheel thresholds: common practice, no published source.  Soft correlation:
    J. L. Massey, "Optimum frame synchronization", IEEE Trans. Commun. 20(2), 1972 (the correlation
    term of the optimum metric; the normalisation by the window's energy is ours).
    """

    def __init__(
        self,
        *,
        frame_bits: int,
        asm: bytes = DEFAULT_ASM,
        max_errors: int = 4,
        check_frames: int = 1,
        flywheel: int = 3,
        slip_bits: int = 2,
        keep_soft: bool = False,
        correlation: Correlation = "hard",
        search_threshold: float | None = None,
        lock_threshold: float = 3.0,
        lookback_frames: int | None = None,
    ) -> None:
        if isinstance(asm, (bytearray, memoryview)):
            asm = bytes(asm)
        if not isinstance(asm, bytes):
            raise TypeError(f"Argument 'asm' must be bytes, not {type(asm).__name__}.")
        if not 2 <= len(asm) <= 32:
            raise ValueError(f"Argument 'asm' must be 2..32 octets long, not {len(asm)}.")
        m = 8 * len(asm)
        check_int("frame_bits", frame_bits, 8, 1 << 22)
        check_int("max_errors", max_errors, 0, m // 2 - 1)
        check_int("check_frames", check_frames, 0, 100)
        check_int("flywheel", flywheel, 0, 1000)
        check_int("slip_bits", slip_bits, 0, min(64, frame_bits // 2))
        if correlation not in ("hard", "soft"):
            raise ValueError(f"Argument 'correlation' must be hard | soft, not {correlation!r}.")
        if search_threshold is None:
            search_threshold = soft_search_threshold(m)
        for name, value in (("search_threshold", search_threshold), ("lock_threshold", lock_threshold)):
            if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
                raise TypeError(f"Argument '{name}' must be a number, not {type(value).__name__}.")
            if not 0.0 < float(value) < math.sqrt(m):
                raise ValueError(f"Argument '{name}' must be in (0, {math.sqrt(m):g}) for a {m}-bit marker, "
                                 f"not {value}.")
        if float(lock_threshold) > float(search_threshold):
            raise ValueError(f"Argument 'lock_threshold' must be at most search_threshold ({search_threshold}), "
                             f"not {lock_threshold}.")
        if lookback_frames is None:
            lookback_frames = 0 if correlation == "hard" else min(1000, max(
                DEFAULT_LOOKBACK_FRAMES, -(-DEFAULT_LOOKBACK_BITS // (m + int(frame_bits)))))
        self.lookback_frames = check_int("lookback_frames", lookback_frames, 0, 1000, or_none=True)
        self.correlation = correlation
        self.search_threshold = float(search_threshold)
        self.lock_threshold = float(lock_threshold)
        self.frame_bits = int(frame_bits)
        self.asm = asm
        self.max_errors = int(max_errors)
        self.check_frames = int(check_frames)
        self.flywheel = int(flywheel)
        self.slip_bits = int(slip_bits)
        self.keep_soft = bool(keep_soft)
        # hard correlation reads only the hard decisions: the soft bits are kept only when a CADU carries them
        self._store_soft = self.keep_soft or self.correlation == "soft"
        self.marker_bits = m
        self.cadu_bits = m + self.frame_bits
        self._marker = np.unpackbits(np.frombuffer(asm, dtype=np.uint8)).astype(np.uint8)
        self._sign = 1.0 - 2.0 * self._marker.astype(np.float64)
        self._result = np.zeros(2, dtype=np.int64)
        self._score = np.zeros(1, dtype=np.float64)
        self._window_errors = np.zeros(2 * self.slip_bits + 1, dtype=np.int64)
        self._window_scores = np.zeros(2 * self.slip_bits + 1, dtype=np.float64)
        self._search_scores = np.zeros(m, dtype=np.float64)
        self.stats = FrameSyncStats()
        self.events: list[SyncEvent] = []
        self._clear_stream(0)

    # ---- public -----------------------------------------------------------------------------
    @property
    def locked(self) -> bool:
        """True while in lock (including flywheel)."""
        return self._state == _LOCK

    @property
    def state(self) -> str:
        """``"search"``, ``"check"`` or ``"lock"``."""
        return self._state

    @property
    def bits_received(self) -> int:
        """Bits received since the start of the stream (the next input bit's ``bit_index``)."""
        return self._end

    def reset(self) -> None:
        """Forget the stream, the statistics and the events; bit indices restart at 0."""
        self.stats = FrameSyncStats()
        self.events = []
        self._clear_stream(0)

    def process(self, soft: np.ndarray, position: np.ndarray) -> list[Cadu]:
        """Take the next soft bits and their sample positions; return the CADUs completed.

        Parameters
        ----------
        soft : array_like of float
            Soft bits, positive = bit 0 (any scale; with hard correlation only the sign is used for
            the marker).
        position : array_like of float
            Sample position of each bit (for decoded bits: of the first channel symbol of its branch).

        Returns
        -------
        list of Cadu
            In stream order; a CADU is returned as soon as its last bit has arrived and the marker
            decision for it is final.
        """
        soft, position = as_soft_and_position(soft, position)
        if soft.size:
            self._append(soft, position)
            self._end += soft.size
            self.stats.bits_in += soft.size
        out: list[Cadu] = []
        self._advance(out, final=False)
        self._trim()
        self._keep_positions()
        return out

    def flush(self) -> list[Cadu]:
        """End of stream: decide with the bits at hand, return the last complete CADUs.

        Afterwards the synchronizer searches again (a new stream may follow); statistics, events
        and the bit count are kept.
        """
        out: list[Cadu] = []
        self._advance(out, final=True)
        self._release(out, None)  # no marker can follow: the held flywheel CADUs stand
        self.stats.bits_discarded += max(0, self._end - self._last_cadu_end)
        self._clear_stream(self._end)
        return out

    # ---- the bit buffer -------------------------------------------------------------------------
    # ``_hard`` and ``_soft`` are views of the bits held, ``_hard[0]`` being absolute bit ``_base``; they live
    # at ``_off`` in arrays of capacity ``_cap`` that double when full and are compacted in place.  ``_soft`` is
    # empty when the soft bits are not stored (hard correlation without ``keep_soft``).  The positions are two
    # pieces: ``_pos_kept`` (owned) from ``_base`` on, then ``_pos_new``, the current call's input array, read
    # during the call only: at its end the part still held is copied into ``_pos_kept`` (O(held), not O(input)).
    def _views(self) -> None:
        a, b = self._off, self._off + self._held_bits
        self._hard, self._soft = self._hard_buf[a:b], self._soft_buf[a:b]

    def _buffers(self) -> tuple:
        """The arrays that hold bits: hard decisions and (when stored) soft bits."""
        if self._store_soft:
            return self._hard_buf, self._soft_buf
        return (self._hard_buf,)

    def _keep_positions(self) -> None:
        """End of a call: the positions still held become one owned array (the caller's input is let go)."""
        self._pos_kept = np.concatenate((self._pos_kept, self._pos_new))
        self._pos_new = self._pos_kept[:0]

    def _pos_at(self, at: int) -> float:
        """Position of absolute bit ``at``; NaN when it is not held."""
        r, k = at - self._base, self._pos_kept.size
        if not 0 <= r < self._held_bits:
            return float("nan")
        return float(self._pos_kept[r] if r < k else self._pos_new[r - k])

    def _new_buffer(self, capacity: int) -> None:
        self._cap = capacity
        self._hard_buf = np.zeros(capacity, dtype=np.uint8)
        self._soft_buf = np.zeros(capacity if self._store_soft else 0, dtype=np.float32)
        self._off = 0

    def _append(self, soft: np.ndarray, position: np.ndarray) -> None:
        n, held = soft.size, self._held_bits
        self._last_chunk = n
        if self._off + held + n > self._cap:
            old = [buf[self._off : self._off + held] for buf in self._buffers()]
            if held + n > self._cap // 2:  # grow: the copy costs at most as much as the appends since the last
                self._new_buffer(max(2 * self._cap, 2 * (held + n)))
            else:  # compact in place: the live part (at most half) moves to the front
                self._off = 0
            for buf, src in zip(self._buffers(), old):
                buf[:held] = src
        a = self._off + held
        if self._store_soft:
            self._soft_buf[a : a + n] = soft
        if self._pos_new.size:  # (each call ends with _keep_positions: not reached)
            self._keep_positions()
        self._pos_new = position
        _kernels.hard_decisions(soft, self._hard_buf[a : a + n])
        self._held_bits = held + n
        self._views()

    def _drop(self, count: int) -> None:
        k = self._pos_kept.size
        if count <= k:
            self._pos_kept = self._pos_kept[count:]
        else:
            self._pos_new = self._pos_new[count - k :]
            self._pos_kept = self._pos_kept[:0]
        self._off += count
        self._held_bits -= count
        self._base += count
        if self._held_bits == 0:
            self._off = 0
        self._views()
        held = self._held_bits
        if self._cap > 4 * max(_MIN_BUFFER_BITS, held + self._last_chunk):  # after a large chunk or a long search
            old = [buf[self._off : self._off + held] for buf in self._buffers()]
            self._new_buffer(max(_MIN_BUFFER_BITS, 2 * (held + self._last_chunk)))
            for buf, src in zip(self._buffers(), old):
                buf[:held] = src
        self._views()

    # ---- state machine ------------------------------------------------------------------------
    def _clear_stream(self, end: int) -> None:
        self._new_buffer(_MIN_BUFFER_BITS)
        self._held_bits = 0
        self._last_chunk = 0
        self._pos_kept = np.zeros(0, np.float64)
        self._pos_new = self._pos_kept
        self._views()
        self._base = end  # absolute bit index of self._hard[0]
        self._end = end  # absolute index one past the last bit received
        self._state = _SEARCH
        self._search_at = end
        self._candidate = 0
        self._checks_passed = 0
        self._expected = 0
        self._misses = 0
        self._inverted = False
        self._last_cadu_start = end - 1
        self._last_cadu_end = end
        self._last_found = end - 1  # start of the last CADU whose marker was found (the search restarts after it)
        self._held: list[Cadu] = []  # flywheel CADUs not yet delivered

    def _reach(self, at: int) -> int:
        """The oldest bit a lock confirmed at ``at`` or later can look back to (``at`` without look-back)."""
        return min(at, max(self._last_found + 1, at - self.lookback_frames * self.cadu_bits))

    def _trim(self) -> None:
        if self._state == _SEARCH:
            keep = self._reach(self._search_at)
        elif self._state == _CHECK:
            keep = self._reach(self._candidate)
        else:  # a loss re-searches from one bit after the last marker found; the slip window looks back
            keep = min(self._last_found + 1, self._expected - self.slip_bits)
        drop = min(keep, self._end) - self._base
        if drop > 0:
            self._drop(drop)

    def _mismatches(self, at: int) -> tuple[int, bool]:
        """(mismatches, inverted) of the better polarity of the marker at absolute bit ``at``."""
        r = at - self._base
        err = int(np.count_nonzero(self._hard[r : r + self.marker_bits] != self._marker))
        inv_err = self.marker_bits - err
        return (inv_err, True) if inv_err < err else (err, False)

    def _errors(self, at: int, inverted: bool) -> int:
        """Hard mismatches of the marker (complemented when ``inverted``) at absolute bit ``at``."""
        r = at - self._base
        err = int(np.count_nonzero(self._hard[r : r + self.marker_bits] != self._marker))
        return self.marker_bits - err if inverted else err

    def _confirm(self, at: int, strict: bool = False) -> tuple[bool, int, bool]:
        """(matches, hard mismatches, inverted) of the marker at ``at``: at the check/lock threshold, or
        with ``strict`` at the search threshold (the same test with hard correlation)."""
        if self.correlation == "hard":
            err, inv = self._mismatches(at)
            return err <= self.max_errors, err, inv
        score = _kernels.marker_score(self._soft, at - self._base, self._sign)
        inv = score < 0.0
        threshold = self.search_threshold if strict else self.lock_threshold
        return abs(score) >= threshold, self._errors(at, inv), inv

    def _search(self, stop: int, final: bool) -> int:
        """Next candidate offset from ``search_at`` (absolute); -1: none before ``stop``; -2: more bits needed.

        Sets ``_inverted``.  Soft correlation: the candidate is the best score among the ``m`` offsets
        from the first one that crosses the threshold (the CCSDS turbo markers of rates 1/4 and 1/6 are a
        half followed by its complement, so half a marker away a half-size score appears first).
        """
        a, b = self._search_at - self._base, stop - self._base
        if self.correlation == "hard":
            rel = _kernels.find_marker(self._hard, a, b, self._marker, self.max_errors, self._result)
            self._inverted = bool(self._result[1])
            return -1 if rel < 0 else self._base + int(rel)
        rel = _kernels.find_marker_soft(self._soft, a, b, self._sign, self.search_threshold, self._score)
        if rel < 0:
            return -1
        last = rel + self.marker_bits - 1
        if last >= b and not final:
            self._search_at = self._base + int(rel)  # decided once the whole window has arrived
            return -2
        count = min(last, b - 1) - rel + 1
        scores = self._search_scores[:count]
        _kernels.marker_scores(self._soft, rel, count, self._sign, scores)
        j = int(np.argmax(np.abs(scores)))
        self._inverted = bool(scores[j] < 0.0)
        return self._base + int(rel) + j

    def _slip(self, p: int, lo: int, hi: int) -> tuple[int, int, bool] | None:
        """Best marker in ``[lo, hi]`` other than ``p``: (offset, hard mismatches, inverted), or None."""
        count = hi - lo + 1
        best = None
        m, e = self.marker_bits, self.max_errors
        if self.correlation == "hard":
            errs = self._window_errors[:count]
            _kernels.marker_mismatches(self._hard, lo - self._base, count, self._marker, errs)
            for k in range(count):
                q = lo + k
                if q == p:
                    continue
                ek = int(min(errs[k], m - errs[k]))
                key = (ek, abs(q - p), q)
                if ek <= e and (best is None or key < best[0]):
                    best = (key, q, bool(errs[k] > m - errs[k]))
            return None if best is None else (best[1], best[0][0], best[2])
        scores = self._window_scores[:count]
        _kernels.marker_scores(self._soft, lo - self._base, count, self._sign, scores)
        for k in range(count):
            q = lo + k
            z = float(scores[k])
            key = (-abs(z), abs(q - p), q)
            if q != p and abs(z) >= self.search_threshold and (best is None or key < best[0]):
                best = (key, q, z < 0.0)
        return None if best is None else (best[1], self._errors(best[1], best[2]), best[2])

    def _advance(self, out: list[Cadu], final: bool) -> None:
        self._step(out, final)
        # no lock (nor its look-back) can reach back before these: the held CADUs ending there stand
        if self._state == _SEARCH:
            self._release(out, self._reach(self._search_at))
        elif self._state == _CHECK:
            self._release(out, self._reach(self._candidate))

    def _release(self, out: list[Cadu], limit: int | None, *, drop_rest: bool = False) -> None:
        """Deliver the held flywheel CADUs that end at or before bit ``limit`` (all for None); with
        ``drop_rest`` withdraw the others (they overlap a frame found at ``limit``)."""
        if not self._held:
            return
        L = self.cadu_bits
        keep = [c for c in self._held if limit is not None and c.bit_index + L > limit]
        for c in self._held[: len(self._held) - len(keep)]:
            self._deliver(out, c)
        if drop_rest:
            self.stats.flywheel_dropped += len(keep)
            keep = []
        self._held = keep

    def _step(self, out: list[Cadu], final: bool) -> None:
        m, L, e, w = self.marker_bits, self.cadu_bits, self.max_errors, self.slip_bits
        while True:
            end = self._end
            if self._state == _SEARCH:
                stop = end - m + 1  # one past the last offset holding a whole marker
                if self._search_at >= stop:
                    return
                c = self._search(stop, final)
                if c == -2:
                    return
                if c < 0:
                    self._search_at = stop
                    return
                self.stats.candidates += 1
                self._candidate = c
                self._checks_passed = 0
                self._state = _CHECK
            elif self._state == _CHECK:
                if self._checks_passed == self.check_frames:
                    c = self._candidate
                    self._state = _LOCK
                    self._expected = c
                    self._misses = 0
                    self.stats.locks += 1
                    walk = self._look_back(c)
                    self._event("lock_acquired", c, detail="" if not walk else
                                f"look-back: {len(walk)} CADUs before it, from bit {walk[0][0]}")
                    self._emit_look_back(out, c, walk)
                    self._last_cadu_start = c - 1
                    self._last_found = c - 1
                    continue
                q = self._candidate + (self._checks_passed + 1) * L
                if q + m > end:
                    return
                if self._confirm(q)[0]:
                    self._checks_passed += 1
                else:
                    self.stats.false_candidates += 1
                    self._state = _SEARCH
                    self._search_at = self._candidate + 1
            else:
                if not self._lock_step(out, final, m, L, e, w):
                    return

    def _look_back(self, c: int) -> list[tuple[int, int, bool, bool, int]]:
        """The CADUs the look-back finds behind a lock confirmed at ``c`` (class Notes), oldest first:
        (position, hard mismatches, inverted, marker found, slip in bits before the next CADU)."""
        L, w = self.cadu_bits, self.slip_bits
        lo = self._reach(c)
        walk: list[tuple[int, int, bool, bool, int]] = []  # newest first
        misses = 0
        newer = c  # start of the CADU after the position examined
        p = newer - L
        while p >= lo:
            ok, err, inv = self._confirm(p, strict=misses > 0)
            q = p if ok else -1
            if not ok and w > 0:
                hi = min(p + w, newer - 1)
                best = self._slip(p, max(p - w, lo), hi) if hi >= max(p - w, lo) else None
                if best is not None:
                    q, err, inv = best
            if q >= 0:
                walk.append((q, err, inv, True, newer - L - q))
                misses = 0
                newer = q
            else:
                walk.append((p, 0, False, False, 0))
                misses += 1
                if misses > self.flywheel:
                    break
                newer = p
            p = newer - L
        while walk and not walk[-1][3]:  # nothing before the oldest marker found
            walk.pop()
        return walk[::-1]

    def _emit_look_back(self, out: list[Cadu], c: int, walk: list[tuple[int, int, bool, bool, int]]) -> None:
        """Deliver the held flywheel CADUs before the lock's first CADU (withdraw the others), then the
        look-back's CADUs (oldest first; the misses between markers as flywheel CADUs)."""
        if not walk:
            self._release(out, c, drop_rest=True)
            return
        self._release(out, walk[0][0], drop_rest=True)
        L = self.cadu_bits
        for k, (q, err, inv, found, slip) in enumerate(walk):
            if found:
                if k and inv != self._inverted:
                    self.stats.polarity_changes += 1
                    self._event("polarity_change", q)
                self._inverted = inv
                self.stats.asm_errors += err
                cadu = self._cut(q, err, flywheel=False)
            else:
                cadu = self._cut(q, self._errors(q, self._inverted), flywheel=True)
            if slip:  # the next CADU's marker came ``slip`` bits off this one's grid
                after = walk[k + 1][0] if k + 1 < len(walk) else c
                self.stats.bit_slips += 1
                self._event("bit_slip", after, offset_bits=after - (q + L))
            self._deliver(out, cadu)
            self.stats.lookback_cadus += 1

    def _lock_step(self, out: list[Cadu], final: bool, m: int, L: int, e: int, w: int) -> bool:
        """One marker decision while locked; False when more bits are needed first."""
        p = self._expected
        end = self._end
        if p + w + L > end and not final:
            return False
        if p + m > end:
            return False
        ok, err, inv = self._confirm(p)
        found = p if ok else -1
        if found < 0 and w > 0:
            lo = max(p - w, self._base, self._last_cadu_start + 1)
            hi = min(p + w, end - m)  # clipped only at the end of the stream
            if hi >= lo:
                best = self._slip(p, lo, hi)
                if best is not None:
                    found, err, inv = best
        if found >= 0:
            if found + L > end:
                return False  # only at the end of the stream: the last CADU is incomplete
            if found != p:
                self.stats.bit_slips += 1
                self._event("bit_slip", found, offset_bits=found - p)
            if inv != self._inverted:
                self.stats.polarity_changes += 1
                self._event("polarity_change", found)
            self._inverted = inv
            self._misses = 0
            self.stats.asm_errors += err
            self._release(out, None)  # the flywheel CADUs before it were on the grid
            self._deliver(out, self._cut(found, err, flywheel=False))
            self._last_found = found
            self._expected = found + L
            return True
        self._misses += 1
        if self._misses <= self.flywheel:
            if p + L > end:
                return False
            self._held.append(self._cut(p, self._errors(p, self._inverted), flywheel=True))
            self._expected = p + L
            return True
        self.stats.losses += 1
        self._event("lock_lost", p)
        self._state = _SEARCH
        self._search_at = self._last_found + 1
        return True

    def _deliver(self, out: list[Cadu], cadu: Cadu) -> None:
        out.append(cadu)
        self.stats.cadus += 1
        if cadu.flywheel:
            self.stats.flywheel_cadus += 1
        if cadu.inverted:
            self.stats.inverted_cadus += 1

    def _cut(self, at: int, asm_errors: int, *, flywheel: bool) -> Cadu:
        m, L = self.marker_bits, self.cadu_bits
        r = at - self._base
        bits = self._hard[r + m : r + L]
        if self._inverted:
            bits = bits ^ np.uint8(1)
        soft = marker_soft = None
        if self.keep_soft:
            soft = self._soft[r + m : r + L].copy()
            marker_soft = self._soft[r : r + m].copy()
            if self._inverted:
                soft = -soft
                marker_soft = -marker_soft
        self._last_cadu_start = at
        self._last_cadu_end = at + L
        return Cadu(
            data=np.packbits(bits).tobytes(),
            position=self._pos_at(at),
            asm_errors=int(asm_errors),
            inverted=self._inverted,
            flywheel=flywheel,
            bit_index=at,
            soft=soft,
            marker_soft=marker_soft,
        )

    def _event(self, kind: str, at: int, offset_bits: int = 0, detail: str = "") -> None:
        pos = self._pos_at(at)
        self.events.append(SyncEvent(kind=kind, bit_index=at, position=pos, offset_bits=offset_bits, detail=detail))
