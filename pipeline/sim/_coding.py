"""Channel coder: transfer frames -> channel bits (CCSDS 131.0-B).

Per frame: Reed-Solomon codeblock (dual basis, interleave I, virtual fill when the frame is shorter
than k I) -> pseudo-randomizer over the codeblock -> ASM 1ACFFC1D in front.  The resulting CADU
stream is then line-coded and convolutionally encoded as one continuous stream (the encoder state
carries across CADUs).  Turbo links (``[coding] turbo``): each frame is turbo encoded
(``pipeline.fec.turbo_encode``), the codeword randomized with the sequence restarted at all ones,
and the rate's own marker put in front (CCSDS 131.0-B-2 sec. 6, 8.3 and 9; no other code follows).  LDPC
links (``[coding] ldpc``): each frame is LDPC encoded (``pipeline.fec.ldpc.ldpc_encode``: C2 with its two
extension zeros, AR4JA with the punctured bits left out), the codeword randomized with the sequence restarted at
all ones (over C2's extension bits too), and the ASM 1ACFFC1D put in front (sec. 7, 8.4 and 9).

NRZ-M placement: CCSDS 131.0-B-2 sec. 3.3.3 says that when NRZ-L -> NRZ-M conversion is used with
the convolutional code it is done at the *input* of the encoder (and NRZ-M -> NRZ-L at the output
of the decoder); the code is transparent, so a 180-degree inversion of the channel symbols decodes
to inverted bits, which the differential decoding then removes.  That is the default here
(``nrzm_at="encoder_input"``).  ``nrzm_at="channel"`` differentially encodes the channel symbols
after the encoder instead (not what the standard says; kept for receivers that expect it).  For
uncoded links the two are the same.

G2 inversion: the rate-1/2 code inverts the G2 output (131.0-B sec. 3.3), the punctured codes of
sec. 3.4 do not (CCSDS 130.1-G sec. 4.3, Fig. 4-2 has no inverter); the profile's
``[coding] convolutional_g2_inverted`` overrides that (``CodingSection.conv_g2_inverted``).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Literal

import numpy as np

from pipeline.profile import LinkProfile
from pipeline.sim._kernels import nrzm_encode_kernel

__all__ = ["NrzmPosition", "CoderOutput", "ChannelCoder"]

NrzmPosition = Literal["encoder_input", "channel"]


@dataclass(frozen=True)
class CoderOutput:
    """Channel bits of one :meth:`ChannelCoder.process` call.

    Attributes
    ----------
    bits : uint8 array
        Channel bits (0/1) in transmission order, after coding and line coding.
    first_bit : int
        Absolute index of ``bits[0]`` in the channel bit stream.
    asm_bits : int64 array
        For each frame of the call, the absolute channel-bit index of the first channel symbol of its
        ASM (for convolutional codes: the first transmitted symbol of the branch of the ASM's first
        bit).
    cadu_input_bits : int64 array
        For each frame, the absolute index of its ASM's first bit in the (uncoded) CADU stream.
    """

    bits: np.ndarray
    first_bit: int
    asm_bits: np.ndarray
    cadu_input_bits: np.ndarray


class ChannelCoder:
    """Frames -> channel bits for a link profile.

    Parameters
    ----------
    profile :
        The link profile: ``[coding]`` (convolutional rate and G2 convention, RS E, interleave, randomizer, turbo,
        LDPC),
        ``[frames]`` length, ``[link]`` line code.
    nrzm_at :
        Where NRZ-M is applied when ``line_code = "nrz-m"`` (see the module docstring).

    Notes
    -----
    Cost per frame: RS encoding (``pipeline.fec.rs_encode``), one XOR with
    ``pipeline.fec.pn_sequence``, the streaming ``pipeline.fec.ConvEncoder`` and an O(n) NRZ-M pass.

    References
    ----------
    CCSDS 131.0-B-2 sec. 3 (convolutional code, NRZ-M sec. 3.3.3), 4 (RS, virtual fill sec. 4.3.7),
    6 (turbo codes), 7 (LDPC codes), 8 (ASM, turbo markers), 9 (randomizer).
    """

    def __init__(self, profile: LinkProfile, *, nrzm_at: NrzmPosition = "encoder_input"):
        if not isinstance(profile, LinkProfile):
            raise TypeError(f"Argument 'profile' must be a LinkProfile, not {type(profile).__name__}.")
        if nrzm_at not in ("encoder_input", "channel"):
            raise ValueError(f"Argument 'nrzm_at' must be 'encoder_input' or 'channel', not {nrzm_at!r}.")
        if profile.link.line_code not in ("nrz-l", "nrz-m"):
            raise ValueError(f"Argument 'profile' line_code must be nrz-l or nrz-m for the simulator, "
                             f"not {profile.link.line_code!r}.")
        from pipeline.fec import ASM, TURBO_ASMS, ConvEncoder, puncture_pattern

        self.profile = profile
        self.nrzm_at = nrzm_at
        self.frame_bytes = profile.frames.length
        self.rs_e = profile.coding.reed_solomon
        self.interleave = profile.coding.interleave
        self.randomize = profile.coding.randomizer
        self.rate = profile.coding.convolutional
        self.coded = self.rate != "none"
        self.nrzm = profile.link.line_code == "nrz-m"
        self.turbo = profile.coding.turbo if profile.coding.turbo != "none" else None
        self.asm = TURBO_ASMS[self.turbo] if self.turbo else bytes(ASM)
        self.ldpc = None
        if profile.coding.ldpc != "none":
            from pipeline.fec.ldpc import ldpc_code

            c = profile.coding
            self.ldpc = ldpc_code(c.ldpc) if c.ldpc == "c2" else ldpc_code(c.ldpc, rate=c.ldpc_rate, k=c.ldpc_k)
        self.codeblock_bytes = profile.codeblock_bytes
        self.codeblock_bits = profile.codeblock_bits
        self.cadu_bits = 8 * len(self.asm) + self.codeblock_bits
        self._asm_bits = np.unpackbits(np.frombuffer(self.asm, dtype=np.uint8))
        if self.coded:
            pat = puncture_pattern(self.rate)
            per_col = pat.sum(axis=0).astype(np.int64)
            self._period = int(pat.shape[1])
            self._per_period = int(per_col.sum())
            self._col_offset = np.concatenate([[0], np.cumsum(per_col)[:-1]]).astype(np.int64)
            self._encoder = ConvEncoder(rate=self.rate, g2_inverted=profile.coding.conv_g2_inverted)
        else:
            self._period, self._per_period, self._col_offset = 1, 1, np.zeros(1, np.int64)
            self._encoder = None
        from pipeline.fec import pn_sequence

        self._pn = np.asarray(pn_sequence(self.codeblock_bytes), dtype=np.uint8) if self.randomize else None
        self._pn_bits = np.unpackbits(self._pn)[: self.codeblock_bits] if self.randomize else None
        self.reset()

    def reset(self) -> None:
        """Zero encoder state, NRZ-M level 0, back to bit 0."""
        if self._encoder is not None:
            self._encoder.reset()
        self.level_in = 0  # NRZ-M level before the encoder
        self.level_out = 0  # NRZ-M level on the channel (nrzm_at="channel")
        self.input_bits_done = 0
        self.channel_bits_done = 0
        self.frames_done = 0

    def channel_symbol_of_input_bit(self, j):
        """Absolute channel-bit index of the first symbol of the branch of CADU-stream bit ``j``."""
        j = np.asarray(j, dtype=np.int64)
        out = (j // self._period) * self._per_period + self._col_offset[j % self._period]
        return int(out) if out.ndim == 0 else out

    def codeblock(self, frame: bytes) -> bytes:
        """The (randomized) codeblock of one frame: frame + RS parity (or its LDPC codeword), XOR the PN sequence
        (not for turbo links: see :meth:`cadu_bit_rows`)."""
        from pipeline.fec import rs_encode

        if self.turbo:
            raise ValueError("Argument 'frame': a turbo codeword is not whole octets; use cadu_bit_rows().")
        if len(frame) != self.frame_bytes:
            raise ValueError(f"Argument 'frames' items must be {self.frame_bytes} octets, not {len(frame)}.")
        if self.ldpc is not None:
            from pipeline.fec.ldpc import ldpc_encode

            block = ldpc_encode(self.ldpc, bytes(frame)).tobytes()
        elif self.rs_e:
            block = rs_encode(bytes(frame), self.rs_e, self.interleave)
        else:
            block = bytes(frame)
        if self._pn is not None:
            block = (np.frombuffer(block, dtype=np.uint8) ^ self._pn).tobytes()
        return block

    def cadu(self, frame: bytes) -> bytes:
        """ASM + codeblock of one frame (the uncoded CADU)."""
        return self.asm + self.codeblock(frame)

    def cadu_bit_rows(self, frames: list[bytes]) -> np.ndarray:
        """The uncoded CADUs of ``frames`` as bits, one row each (uint8, shape (len(frames), cadu_bits))."""
        for f in frames:
            if len(f) != self.frame_bytes:
                raise ValueError(f"Argument 'frames' items must be {self.frame_bytes} octets, not {len(f)}.")
        if self.ldpc is not None and frames:  # one batch through the quasi-cyclic encoder
            from pipeline.fec.ldpc import ldpc_encode

            info = np.frombuffer(b"".join(bytes(f) for f in frames), dtype=np.uint8).reshape(len(frames), -1)
            words = ldpc_encode(self.ldpc, info).reshape(len(frames), -1)
            if self._pn is not None:
                words = words ^ self._pn[None, :]
            asm = np.broadcast_to(np.frombuffer(self.asm, np.uint8), (len(frames), len(self.asm)))
            return np.unpackbits(np.concatenate([asm, words], axis=1), axis=1)
        if not self.turbo:
            cadus = np.frombuffer(b"".join(self.cadu(bytes(f)) for f in frames), dtype=np.uint8)
            return np.unpackbits(cadus).reshape(len(frames), self.cadu_bits)
        from pipeline.fec import turbo_encode

        info = np.frombuffer(b"".join(bytes(f) for f in frames), dtype=np.uint8).reshape(len(frames), -1)
        code = turbo_encode(info, rate=self.turbo).reshape(len(frames), self.codeblock_bits)
        if self._pn_bits is not None:
            code = code ^ self._pn_bits[None, :]
        return np.concatenate([np.broadcast_to(self._asm_bits, (len(frames), self._asm_bits.size)), code], axis=1)

    def process(self, frames: Iterable[bytes]) -> CoderOutput:
        """Encode frames into channel bits."""
        frames = list(frames)
        first_bit = self.channel_bits_done
        if not frames:
            return CoderOutput(np.zeros(0, np.uint8), first_bit, np.zeros(0, np.int64), np.zeros(0, np.int64))
        bits = self.cadu_bit_rows([bytes(f) for f in frames]).reshape(-1)
        starts = self.input_bits_done + self.cadu_bits * np.arange(len(frames), dtype=np.int64)
        if self.nrzm and (self.nrzm_at == "encoder_input" or not self.coded):
            coded_in = np.empty_like(bits)
            self.level_in = int(nrzm_encode_kernel(bits, np.uint8(self.level_in), coded_in))
            bits = coded_in
        if self.coded:
            asm_bits = self.channel_symbol_of_input_bit(starts)
            out = self._encoder.process(bits)
            if self.nrzm and self.nrzm_at == "channel":
                line = np.empty_like(out)
                self.level_out = int(nrzm_encode_kernel(out, np.uint8(self.level_out), line))
                out = line
        else:
            asm_bits = starts.copy()
            out = bits
        self.input_bits_done += bits.size
        self.channel_bits_done += out.size
        self.frames_done += len(frames)
        return CoderOutput(np.ascontiguousarray(out, dtype=np.uint8), first_bit, np.asarray(asm_bits, np.int64),
                           starts)
