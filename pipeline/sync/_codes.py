"""Codes decoded from soft codewords found by their marker (turbo, LDPC): what the chain asks of them.

A link whose codewords are decoded from soft values (CCSDS 131.0-B sec. 6 turbo codes, sec. 7 LDPC
codes) differs from the RS/convolutional links in four facts, which a :class:`SoftBlockCode`
tells: its sync marker, its codeword length in bits, the transfer frame it carries, and how a
batch of channel LLRs becomes frames with a pass/fail status and per-codeword decoder figures.
:func:`soft_block_code` picks the code of a profile; :func:`frame_sync_for` builds the frame
synchronizer for any profile.  Nothing else in the chain needs to know which code it is.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np

from pipeline.fec import ASM, TurboCode, TurboDecoder
from pipeline.fec.ldpc import LdpcDecoder, ldpc_code
from pipeline.profile import LinkProfile
from pipeline.sync._framesync import FrameSync

__all__ = ["CodewordBatch", "SoftBlockCode", "TurboBlockCode", "LdpcBlockCode", "soft_block_code", "link_marker",
           "frame_sync_for"]


@dataclass(frozen=True)
class CodewordBatch:
    """Frames decoded from a batch of codewords, one row per codeword.

    Attributes
    ----------
    frames : numpy.ndarray of uint8, shape (B, frame_octets)
        The decoded transfer frames (also for failed codewords: the decoder's last decisions).
    passed : numpy.ndarray of bool, shape (B,)
        The decoder's own check held (turbo: FECF; LDPC: zero syndrome).
    iterations : numpy.ndarray of int32, shape (B,)
        Decoder iterations run per codeword.
    syndrome_weight : numpy.ndarray of int32, shape (B,), or None
        LDPC: unsatisfied parity checks of the code after the last iteration (0 where ``passed``);
        None for codes without a syndrome (turbo).
    """

    frames: np.ndarray
    passed: np.ndarray
    iterations: np.ndarray
    syndrome_weight: np.ndarray | None = None


class SoftBlockCode(Protocol):
    """What the chain needs from a code decoded from soft codewords (see the module docstring).

    Attributes
    ----------
    name : str
        For reports, e.g. ``"turbo r=1/2 k=8920"``.
    marker : bytes
        The attached sync marker in front of every codeword (MSB first).
    codeword_bits : int
        Channel bits of one codeword (the bits between two markers).
    frame_octets : int
        Octets of the transfer frame one codeword carries.
    failure_status : str
        The :class:`~pipeline.sync.DecodedFrame` status of a codeword whose check failed.
    batch_cadus : int
        Codewords worth decoding together (the decoder's lanes).
    """

    name: str
    marker: bytes
    codeword_bits: int
    frame_octets: int
    failure_status: str
    batch_cadus: int

    def decode(self, llr: np.ndarray) -> CodewordBatch:
        """Decode float32 channel LLRs (nats, positive = bit 0), shape (B, codeword_bits), de-randomized."""
        ...


class TurboBlockCode:
    """The CCSDS turbo code of a profile as a :class:`SoftBlockCode` (``pipeline.fec.turbo``).

    Parameters
    ----------
    rate : {"1/2", "1/3", "1/4", "1/6"}
    k : {1784, 3568, 7136, 8920}
    max_iterations : int
        The profile's ``turbo_max_iterations``.

    Notes
    -----
    :class:`pipeline.fec.TurboDecoder` with the FECF stopping check (CCSDS 131.0-B sec. 6.2.2 makes
    the FECF mandatory with turbo codes): a frame whose FECF still fails after the last iteration
    is ``turbo_failed``.  The decoder keeps no state between calls and runs 32 codewords side by
    side, hence ``batch_cadus = 32``.

    Examples
    --------
    >>> code = TurboBlockCode(rate="1/2", k=1784, max_iterations=10)
    >>> code.codeword_bits, code.frame_octets, len(code.marker) * 8, code.failure_status
    (3576, 223, 64, 'turbo_failed')
    """

    failure_status = "turbo_failed"
    batch_cadus = 32

    def __init__(self, *, rate: str, k: int, max_iterations: int = 10) -> None:
        self.code = TurboCode(rate=rate, k=k)
        self.decoder = TurboDecoder(rate=rate, k=k, max_iterations=max_iterations, check="fecf")
        self.name = f"turbo r={rate} k={k}"
        self.marker = self.code.marker
        self.codeword_bits = self.code.n
        self.frame_octets = self.code.frame_octets

    def decode(self, llr: np.ndarray) -> CodewordBatch:
        """Decode a batch (see :class:`SoftBlockCode`)."""
        res = self.decoder.process(np.ascontiguousarray(llr, dtype=np.float32).reshape(-1, self.codeword_bits))
        return CodewordBatch(frames=res.data, passed=res.passed, iterations=res.iterations)


class LdpcBlockCode:
    """A CCSDS LDPC code of a profile as a :class:`SoftBlockCode` (``pipeline.fec.ldpc``).

    Parameters
    ----------
    family : {"c2", "ar4ja"}
    rate : {"1/2", "2/3", "4/5"} or None
        AR4JA only (the profile's ``ldpc_rate``).
    k : {1024, 4096, 16384} or None
        AR4JA only (the profile's ``ldpc_k``).
    max_iterations : int
        The profile's ``ldpc_max_iterations``.

    Notes
    -----
    The 32-bit ASM ``1ACFFC1D`` precedes every codeword (CCSDS 131.0-B-2 sec. 8.4.1 says an ASM
    precedes each LDPC codeword; the pattern is from memory, not confirmed: ../shared/REFERENCES.md
    sec. 13.4).  :class:`pipeline.fec.ldpc.LdpcDecoder` (layered normalized min-sum, 32 codewords in
    SIMD lanes, hence ``batch_cadus = 32``) stops when the syndrome is zero; a codeword whose final
    syndrome is not zero, or (C2) whose word fails the subcode's two expurgation checks, is
    ``ldpc_failed`` and never passed on (131.0-B-2 sec. 7.2.3: the decoder validates the frame by
    itself, the FECF being optional).  The codeword is the ``code.n`` bits after the marker, C2's two
    extension bits included (their soft values are not used).

    Examples
    --------
    >>> code = LdpcBlockCode(family="ar4ja", rate="1/2", k=1024, max_iterations=50)
    >>> code.codeword_bits, code.frame_octets, code.marker.hex().upper(), code.failure_status
    (2048, 128, '1ACFFC1D', 'ldpc_failed')
    >>> LdpcBlockCode(family="c2").name
    'LDPC C2 (8160,7136)'
    """

    failure_status = "ldpc_failed"
    batch_cadus = 32

    def __init__(self, *, family: str, rate: str | None = None, k: int | None = None,
                 max_iterations: int = 50) -> None:
        self.code = ldpc_code(family) if family == "c2" else ldpc_code(family, rate=rate, k=k)
        self.decoder = LdpcDecoder(code=self.code, max_iterations=max_iterations)
        self.name = f"LDPC {self.code.name}"
        self.marker = bytes(ASM)
        self.codeword_bits = self.code.n
        self.frame_octets = self.code.frame_octets

    def decode(self, llr: np.ndarray) -> CodewordBatch:
        """Decode a batch (see :class:`SoftBlockCode`)."""
        res = self.decoder.decode(np.ascontiguousarray(llr, dtype=np.float32).reshape(-1, self.codeword_bits))
        return CodewordBatch(frames=res.frames, passed=res.ok, iterations=res.iterations,
                             syndrome_weight=res.syndrome_weight)


def soft_block_code(profile: LinkProfile) -> SoftBlockCode | None:
    """The profile's soft-decoded block code (turbo or LDPC), or None for RS / convolutional / uncoded links.

    Raises
    ------
    ValueError
        If the code's sizes disagree with the profile's derived sizes (a defect, not bad input).
    """
    c = profile.coding
    if c.turbo != "none":
        code = TurboBlockCode(rate=c.turbo, k=c.turbo_k, max_iterations=c.turbo_max_iterations)
    elif c.ldpc != "none":
        code = LdpcBlockCode(family=c.ldpc, rate=c.ldpc_rate, k=c.ldpc_k, max_iterations=c.ldpc_max_iterations)
    else:
        return None
    if (code.codeword_bits, 8 * len(code.marker), code.frame_octets) != (
            profile.codeblock_bits, profile.marker_bits, profile.frames.length):
        raise ValueError(f"profile '{profile.name}': {code.name} has {code.codeword_bits} bits, a "
                         f"{8 * len(code.marker)}-bit marker and {code.frame_octets}-octet frames; the profile "
                         f"says {profile.codeblock_bits}, {profile.marker_bits} and {profile.frames.length}.")
    return code


def link_marker(profile: LinkProfile) -> bytes:
    """The sync marker in front of every codeblock of the profile's link (the turbo rate's own, else the ASM:
    also in front of LDPC codewords)."""
    code = soft_block_code(profile)
    return bytes(ASM) if code is None else code.marker


def frame_sync_for(profile: LinkProfile) -> FrameSync:
    """The frame synchronizer of a profile's link.

    RS / convolutional / uncoded links: the 32-bit ASM on hard decisions with ``[receiver]
    asm_max_errors``.  Soft-decoded codes (turbo, LDPC): the code's marker by soft correlation
    (``correlation="soft"``, default thresholds) and the soft codeword kept for the decoder.  Both
    flywheel ``[receiver] flywheel_frames`` CADUs.
    """
    rx = profile.receiver
    code = soft_block_code(profile)
    if code is None:
        return FrameSync(frame_bits=profile.codeblock_bits, max_errors=rx.asm_max_errors, flywheel=rx.flywheel_frames)
    return FrameSync(frame_bits=code.codeword_bits, asm=code.marker, flywheel=rx.flywheel_frames,
                     correlation="soft", keep_soft=True)
