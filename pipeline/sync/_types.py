"""Items passed between the synchronizer stages: CADUs, decoded frames and synchronizer events."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Literal

import numpy as np

__all__ = ["Cadu", "DecodedFrame", "SyncEvent", "SyncEventKind", "FrameStatus"]

SyncEventKind = Literal["lock_acquired", "lock_lost", "bit_slip", "polarity_change", "branch_selected"]
FrameStatus = Literal["ok", "rs_uncorrectable", "turbo_failed", "ldpc_failed"]


@dataclass(frozen=True)
class Cadu:
    """One channel access data unit found by :class:`~pipeline.sync.FrameSync`.

    Attributes
    ----------
    data : bytes
        The codeblock (or frame) after the ASM, inversion already removed, MSB first.  When the
        codeblock length in bits is not a multiple of 8 the last octet is padded with zero bits.
    position : float
        Sample position in the recording of the first channel symbol of the ASM's first bit.
    asm_errors : int
        Bits of the ASM that differed from the marker (in the polarity found).  For a flywheel
        CADU this is the count at the expected position, and may exceed the threshold.
    inverted : bool
        The ASM (and so the codeblock) arrived complemented; ``data`` has been re-inverted.
    flywheel : bool
        No acceptable marker was at the expected position; the CADU was cut there because the
        synchronizer was locked and still within its flywheel allowance.
    bit_index : int
        Index of the ASM's first bit in the decoded bit stream (counted from the start of the
        stream or the last :meth:`~pipeline.sync.FrameSync.reset`).
    soft : numpy.ndarray or None
        The soft values of the codeblock (float32, inversion removed), only when the synchronizer
        was built with ``keep_soft=True`` (for soft-input decoders).  Not compared by ``==``.
    marker_soft : numpy.ndarray or None
        The soft values of the marker itself (float32, inversion removed), with ``keep_soft=True``:
        known bits, from which a decoder can estimate Es/N0.  Not compared by ``==``.
    """

    data: bytes
    position: float
    asm_errors: int
    inverted: bool
    flywheel: bool
    bit_index: int
    soft: np.ndarray | None = field(default=None, compare=False, repr=False)
    marker_soft: np.ndarray | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class DecodedFrame:
    """A transfer frame recovered from one CADU by :class:`~pipeline.sync.CodeblockDecoder`.

    Attributes
    ----------
    frame : bytes
        The transfer frame (codeblock without RS parity, de-randomized; a turbo or LDPC code's
        decoded information block).  For an uncorrectable codeblock these are the received,
        uncorrected octets of the failing codewords; for a failed turbo or LDPC codeword the
        decoder's last decisions.
    status : {"ok", "rs_uncorrectable", "turbo_failed", "ldpc_failed"}
        ``"rs_uncorrectable"`` when any RS codeword of the codeblock failed, ``"turbo_failed"``
        when the turbo decoder's FECF check still failed after its last iteration,
        ``"ldpc_failed"`` when an LDPC codeword's final syndrome is not zero (C2: or the word
        fails the subcode's expurgation checks); never ``"ok"`` then.
    rs_corrected : tuple of int
        Symbols corrected per RS codeword (interleave order), -1 for an uncorrectable one; empty
        without Reed-Solomon coding.
    cadu : Cadu
        The CADU it came from (position, ASM errors, flywheel flag...).
    decoder_iterations : int or None
        Iterations the iterative (turbo, LDPC) decoder ran for this codeword; None for other codes.
    decoder_esn0_db : float or None
        The Es/N0 estimate (dB per channel bit) the soft codeword was scaled with into LLRs; None
        for hard-decision codes.
    fec_verified : bool
        The iterative decoder's own check held (turbo: the FECF of the decoded frame; LDPC: a zero
        syndrome).  False for other codes (their frames are verified by RS or by the frame parser).
    decoder_syndrome_weight : int or None
        LDPC: unsatisfied parity checks of the code after the decoder's last iteration (0 on
        success); None for other codes.
    """

    frame: bytes
    status: FrameStatus
    rs_corrected: tuple[int, ...]
    cadu: Cadu
    decoder_iterations: int | None = None
    decoder_esn0_db: float | None = None
    fec_verified: bool = False
    decoder_syndrome_weight: int | None = None

    @property
    def position(self) -> float:
        """Sample position of the first channel symbol of the frame's ASM."""
        return self.cadu.position

    @property
    def ok(self) -> bool:
        return self.status == "ok"


@dataclass(frozen=True)
class SyncEvent:
    """A change of synchronizer state, for the run report.

    Attributes
    ----------
    kind : str
        ``lock_acquired`` / ``lock_lost`` (frame lock), ``bit_slip`` (marker found ``offset_bits``
        away from where expected), ``polarity_change`` (marker complemented relative to the one
        before), ``branch_selected`` (:class:`~pipeline.sync.BranchSync` chose a hypothesis).
    bit_index : int
        Index in the stage's output bit stream where it happened.
    position : float
        Sample position of the same place.
    offset_bits : int
        Slip size in bits for ``bit_slip`` (positive: the marker came late); otherwise 0.
    detail : str
        Free text, e.g. the hypothesis chosen by :class:`~pipeline.sync.BranchSync`.
    """

    kind: SyncEventKind
    bit_index: int
    position: float
    offset_bits: int = 0
    detail: str = ""

    def as_dict(self) -> dict:
        return asdict(self)
