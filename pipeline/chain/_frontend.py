"""The front end of the decode chain: samples or channel symbols in, decoded frames out.

::

    samples -> demodulator -> BranchSync (Viterbi) -> LineDecoder (NRZ-M) -> FrameSync -> CodeblockDecoder
    channel symbols (--input soft|bits) enter at BranchSync

Every stage streams with explicit state, so the front end holds constant memory whatever the length of
the input, and its output does not depend on how the input is cut into chunks.  What it hands on is a
:class:`FrontOutput`: the decoded frames (each with the sample position of its ASM) and the receiver
track points completed by the call.  Its counters, statistics and events are summed up in a
:class:`FrontSummary`, which a segmented decode merges over segments.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pipeline.chain._backend import sample_keys
from pipeline.chain._kernels import owned_counts
from pipeline.errors import ProfileError
from pipeline.profile import LinkProfile

__all__ = ["CONSTELLATION_POINTS", "FrontCounts", "FrontEnd", "FrontOutput", "FrontSummary"]

#: Symbols kept for the report's constellation plot (the most recent locked stretch).
CONSTELLATION_POINTS = 2000
#: Track points held at most while the branch synchronizer has not told whether a QPSK recording is a mirror image
MIRROR_HOLD_POINTS = 4096

InputKind = str  # "iq" | "soft" | "bits"
_NO_MASK = np.zeros(0, dtype=np.bool_)  # owned_counts without a mask
#: Samples at the start of each chunk looked at for clipped rails (:func:`pipeline.demod.rail_values`; about 17 us,
#: 0.25 % of the 2 Msym/s QPSK link's decode at 5 Msample/s in chunks of 2^18).
CLIP_CHECK_SAMPLES = 4096


@dataclass
class FrontCounts:
    """Counts of the front end over the input it owns.

    ``samples`` and ``nonfinite`` count IQ samples (NaN/Inf replaced by 0), ``channel_symbols`` the
    channel bits out of the demodulator (or read from a symbol file), ``locked_symbols`` those
    received with carrier lock; ``clip_checked`` the IQ samples looked at for clipping (the first
    :data:`CLIP_CHECK_SAMPLES` of each chunk) and ``clipped_values`` their real and imaginary parts found at
    clipped rails (:func:`pipeline.demod.rail_values`).
    """

    samples: int = 0
    nonfinite: int = 0
    clip_checked: int = 0
    clipped_values: int = 0
    channel_symbols: int = 0
    locked_symbols: int = 0

    def add(self, other: FrontCounts) -> None:
        for f in dataclasses.fields(self):
            setattr(self, f.name, getattr(self, f.name) + getattr(other, f.name))


@dataclass
class FrontOutput:
    """What one call of the front end produced: decoded frames and completed track points."""

    frames: list = field(default_factory=list)
    track: list = field(default_factory=list)


@dataclass
class FrontSummary:
    """The front end's counters, stage statistics and events, for the report.

    ``stats`` maps ``"branch" | "frame_sync" | "codeblock"`` to the stage's statistics object;
    ``events`` are the synchronizer events as dicts; ``constellation`` the last locked stretch of
    normalised symbols (None without a demodulator); ``waterfall`` the recording's
    :class:`~pipeline.report.Waterfall` (None unless asked for); ``demod`` the demodulator's
    :class:`~pipeline.demod.DemodStats` (None for symbol input), whose ``no_lock_message()`` says why
    nothing locked.
    """

    counts: FrontCounts = field(default_factory=FrontCounts)
    stats: dict = field(default_factory=dict)
    events: list = field(default_factory=list)
    constellation: np.ndarray | None = None
    waterfall: Any = None
    demod: Any = None

    def merge(self, other: FrontSummary) -> None:
        """Add a later segment's summary: counts and numeric statistics summed, events appended."""
        self.counts.add(other.counts)
        for name, st in other.stats.items():
            self.stats[name] = _add_stats(self.stats.get(name), st)
        self.events.extend(other.events)
        if other.constellation is not None:
            self.constellation = other.constellation
        if other.waterfall is not None:
            if self.waterfall is None:
                self.waterfall = other.waterfall
            else:
                self.waterfall.add(other.waterfall)
        if other.demod is not None:  # DemodStats merge by their own rule (the strongest line, one search span)
            if self.demod is None:
                self.demod = dataclasses.replace(other.demod)
            else:
                self.demod.merge(other.demod)


def _is_count(v: Any) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, bool)


def _combine_stats(newer: Any, other: Any, sign: int) -> Any:
    """Field-wise ``newer + sign * other`` of two statistics dataclasses for the counts; anything else (such as
    a last metric) from ``newer``."""
    kw = {}
    for f in dataclasses.fields(newer):
        a, b = getattr(newer, f.name), getattr(other, f.name)
        kw[f.name] = a + sign * b if _is_count(a) and _is_count(b) else a
    return dataclasses.replace(newer, **kw)


def _add_stats(total: Any, part: Any) -> Any:
    """Sum of a later segment's statistics ``part`` and the ``total`` so far (None: none yet)."""
    return dataclasses.replace(part) if total is None else _combine_stats(part, total, 1)


def owned_stats(after_owned: dict, before_owned: dict | None) -> dict:
    """The stage statistics a segment counted over its owned range: the snapshot taken once its owned samples
    were fed (or at its end, for the last segment) less the one taken when its lead-in had been fed.

    A stage counts a bit, a marker or a codeblock some samples after it was fed (its own latency), the same at
    both snapshots, so over a decode the owned parts add up to what one unbroken chain would count: the work
    the lead-ins repeat is not counted twice.
    """
    if before_owned is None:
        return {k: dataclasses.replace(v) for k, v in after_owned.items()}
    return {k: _combine_stats(v, before_owned[k], -1) for k, v in after_owned.items()}


class FrontEnd:
    """Samples (or channel symbols) -> decoded frames, with the receiver's track.

    Parameters
    ----------
    profile : LinkProfile
    input_kind : {"iq", "soft", "bits"}, keyword-only
        "iq" starts at the demodulator; "soft" and "bits" feed channel symbols to
        :meth:`process_symbols`.
    sample_rate_hz : float, keyword-only
        Sample rate of an IQ recording (required for "iq").
    owned : (float, float) or None, keyword-only
        Sample range ``[start, stop)`` whose counts, track points and events this front end reports
        (a segment of a segmented decode); None reports everything.  Frames are never filtered: the
        merge decides which to take.
    waterfall_row_samples : int or None, keyword-only
        Accumulate the recording's waterfall on rows of this many samples (IQ input only).
    carrier_prediction : CarrierPrediction or None, keyword-only
        The carrier's predicted offset over the recording (``--tle``/``--oem``), handed to the demodulator,
        whose acquisitions then search around it (IQ input only).

    Notes
    -----
    The frame synchronizer's lost-lock notice goes back to the branch synchronizer (so it
    re-decides the branch); nothing else flows backwards.
    """

    def __init__(self, profile: LinkProfile, *, input_kind: InputKind = "iq", sample_rate_hz: float | None = None,
                 owned: tuple[float, float] | None = None, waterfall_row_samples: int | None = None,
                 carrier_prediction=None):
        from pipeline.demod import LineDecoder, rail_values
        from pipeline.sync import BranchSync, CodeblockDecoder, frame_sync_for, soft_block_code

        if input_kind not in ("iq", "soft", "bits"):
            raise ValueError(f"Argument 'input_kind' must be iq | soft | bits, not {input_kind!r}.")
        self.profile = profile
        self.input_kind = input_kind
        self.owned = owned
        rx = profile.receiver
        self.demod = None
        if input_kind == "iq":
            from pipeline.demod.residual import make_demodulator

            if sample_rate_hz is None:
                raise ValueError("Argument 'sample_rate_hz' is required for input_kind 'iq'.")
            try:
                self.demod = make_demodulator(link=profile.link, receiver=rx, sample_rate_hz=float(sample_rate_hz),
                                              carrier_prediction=carrier_prediction)
            except ValueError as exc:  # a link the demodulators cannot serve at this sample rate
                raise ProfileError(f"{profile.source}: {exc}") from None
        # Bi-phase-L is removed inside the demodulator (half-symbol integration); what is left is NRZ-L.
        line_code = "nrz-l" if profile.link.line_code == "bi-phase-l" else profile.link.line_code
        self.line = LineDecoder(line_code=line_code)
        soft_code = soft_block_code(profile)  # turbo and LDPC: their own marker, found by soft correlation
        marker = ({"asm": soft_code.marker, "correlation": "soft",
                   "marker_period_bits": int(round(profile.cadu_channel_bits))} if soft_code is not None else
                  {"marker_period_bits": profile.codeblock_bits + 32,  # the ASM tells the metric's twins apart
                   "nrz_m": profile.link.line_code == "nrz-m"})
        self.branch = BranchSync(rate=profile.coding.convolutional, modulation=profile.link.modulation,
                                 g2_inverted=profile.coding.conv_g2_inverted,
                                 mirror=rx.spectrum_inverted == "auto", **marker)
        self.fsync = frame_sync_for(profile)  # the link's marker: the ASM on hard bits, a turbo marker soft
        self.codeblock = CodeblockDecoder(profile=profile)
        self.counts = FrontCounts()
        self._rail_values = rail_values
        self.constellation: np.ndarray | None = None
        self.waterfall = None
        if waterfall_row_samples and self.demod is not None:
            from pipeline.report import Waterfall

            own = None if owned is None else (int(owned[0]), int(owned[1]))
            self.waterfall = Waterfall(row_samples=int(waterfall_row_samples), owned=own)
        self._out = FrontOutput()
        # QPSK with spectrum_inverted = "auto": the branch synchronizer finds out whether the recording is a
        # mirror image (spectrally inverted), whose carrier offsets have the wrong sign; track points wait for
        # its answer (or until MIRROR_HOLD_POINTS are held) and are then given with the true sign
        self._mirror_held: list | None = ([] if self.demod is not None and profile.link.modulation == "qpsk"
                                          and rx.spectrum_inverted == "auto" else None)

    @property
    def sample_rate_hz(self) -> float | None:
        """Sample rate of the demodulator (None for channel-symbol input)."""
        return None if self.demod is None else float(self.demod.sample_rate_hz)

    @property
    def block_samples(self) -> int:
        """The demodulator's processing block (a segment's reads start on this grid); 1 without one."""
        block = getattr(self.demod, "block_samples", 1)
        return block if isinstance(block, int) and block >= 1 else 1

    # ---- feeding --------------------------------------------------------------------------
    def process_chunk(self, chunk) -> FrontOutput:
        """Feed one recording chunk (``samples``, ``start``, ``nonfinite``)."""
        if self._owns(chunk.start):
            self.counts.samples += len(chunk.samples)
            self.counts.nonfinite += int(chunk.nonfinite)
            head = chunk.samples[:CLIP_CHECK_SAMPLES]
            self.counts.clip_checked += len(head)
            self.counts.clipped_values += self._rail_values(head)
        if self.waterfall is not None:
            self.waterfall.feed(chunk.samples, chunk.start)
        self._symbols(self.demod.process(chunk))
        return self._take()

    def process_symbols(self, soft: np.ndarray, position: np.ndarray) -> FrontOutput:
        """Feed channel symbols (``--input soft|bits``): soft float32 and their positions."""
        soft = np.asarray(soft, dtype=np.float32)
        position = np.asarray(position, dtype=np.float64)
        self.counts.channel_symbols += self._owned_counts(position)[0]
        self._channel(soft, position)
        return self._take()

    def finish(self) -> FrontOutput:
        """Flush every stage in order; the front end is then spent."""
        if self.demod is not None:
            self._symbols(self.demod.flush())
        bits, pos = self.branch.flush()
        self._bits(bits, pos)
        self._release_track(final=True)  # after the branch synchronizer's last word on the mirror image
        self._out.frames.extend(self.codeblock.process_cadus(self.fsync.flush()))
        self._out.frames.extend(self.codeblock.flush())  # codewords still waiting for a full decoder batch
        return self._take()

    def stats_snapshot(self) -> dict:
        """Copies of the stages' statistics as they stand (see :func:`owned_stats`)."""
        return {"branch": dataclasses.replace(self.branch.stats), "frame_sync": dataclasses.replace(self.fsync.stats),
                "codeblock": dataclasses.replace(self.codeblock.stats)}

    def summary(self) -> FrontSummary:
        """Counters, stage statistics and events (owned range only) so far."""
        events = []
        for stage in (self.branch, self.fsync):
            for ev in stage.events:
                if self._owns(ev.position):
                    events.append(sample_keys(ev.as_dict()))
        stats = self.stats_snapshot()
        constellation = self.constellation
        if constellation is not None and self._mirror_held is not None and self.branch.mirrored:
            constellation = np.conj(constellation)  # the mirror image's constellation, seen upright
        return FrontSummary(counts=dataclasses.replace(self.counts), stats=stats, events=events,
                            constellation=constellation, waterfall=self.waterfall,
                            demod=None if self.demod is None else dataclasses.replace(self.demod.stats))

    # ---- internals ------------------------------------------------------------------------
    def _owns(self, position: float) -> bool:
        return self.owned is None or self.owned[0] <= position < self.owned[1]

    def _owned_counts(self, position: np.ndarray, mask: np.ndarray | None = None) -> tuple[int, int]:
        """Positions in the owned range, and those of them with ``mask`` set (0 without a mask).

        With an owned range, one pass of :func:`~pipeline.chain._kernels.owned_counts` over the positions (and
        the mask) counts both.
        """
        n = len(position)
        if n == 0:
            return 0, 0
        if self.owned is None:
            return n, (0 if mask is None else int(np.count_nonzero(mask)))
        counts = np.empty(2, np.int64)
        owned_counts(np.ascontiguousarray(position, dtype=np.float64),
                     _NO_MASK if mask is None else np.ascontiguousarray(mask, dtype=np.bool_),
                     float(self.owned[0]), float(self.owned[1]), counts)
        return int(counts[0]), int(counts[1])

    def _take(self) -> FrontOutput:
        out, self._out = self._out, FrontOutput()
        return out

    def _symbols(self, block) -> None:
        points = [tp for tp in block.track if self._owns(tp.position)]
        if self._mirror_held is None:
            self._out.track.extend(points)
        else:
            self._mirror_held.extend(points)
        if len(block.soft):
            owned, locked = self._owned_counts(block.position, block.locked)
            self.counts.channel_symbols += owned
            self.counts.locked_symbols += locked
        syms = block.symbols
        if len(syms) >= 256 and len(block.locked) and bool(block.locked[-1]):
            # the most recent locked stretch: a snapshot of the constellation as the pass went on
            self.constellation = np.array(syms[-CONSTELLATION_POINTS:], dtype=np.complex64)
        self._channel(block.soft, block.position)
        self._release_track()

    def _release_track(self, final: bool = False) -> None:
        """Pass on the track points held for the mirror decision once it is made (or at the end, or when too
        many are held): negated carrier offset and phase when the branch synchronizer found a mirror image."""
        held = self._mirror_held
        if not held:
            return
        mirrored = self.branch.mirrored
        if mirrored is None and not final and len(held) < MIRROR_HOLD_POINTS:
            return
        if mirrored:
            held = [dataclasses.replace(tp, carrier_offset_hz=-tp.carrier_offset_hz,
                                        carrier_phase_rad=-tp.carrier_phase_rad) for tp in held]
        self._out.track.extend(held)
        self._mirror_held = []

    def _channel(self, soft: np.ndarray, position: np.ndarray) -> None:
        bits, pos = self.branch.process(soft, position)
        self._bits(bits, pos)

    def _bits(self, bits: np.ndarray, pos: np.ndarray) -> None:
        if len(bits) == 0:
            return
        # CCSDS 131.0-B-2 sec. 3.3.3: NRZ-M conversion is done at the convolutional encoder input,
        # so it is undone at the decoder output (uncoded links: the same place, on channel bits).
        if self.line.line_code != "nrz-l":  # (NRZ-L is the identity: no copy of the bits)
            bits = self.line.process(bits)
        was = self.fsync.locked
        self._out.frames.extend(self.codeblock.process_cadus(self.fsync.process(bits, pos)))
        if was and not self.fsync.locked:
            self.branch.notify_lost_lock()
