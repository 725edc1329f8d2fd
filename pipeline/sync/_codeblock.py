"""Codeblock path: CADU -> de-randomize -> Reed-Solomon decode -> transfer frame with its status."""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from pipeline.fec import pn_sequence, rs_decode
from pipeline.profile import LinkProfile
from pipeline.sync._types import Cadu, DecodedFrame

__all__ = ["CodeblockDecoder", "CodeblockStats"]


@dataclass
class CodeblockStats:
    """Counters of one :class:`CodeblockDecoder` run."""

    codeblocks: int = 0
    ok: int = 0
    rs_uncorrectable: int = 0
    flywheel_codeblocks: int = 0  # codeblocks cut by the flywheel (counted in ok / rs_uncorrectable too)
    codewords: int = 0
    codewords_corrected: int = 0  # codewords with at least one symbol corrected
    codewords_uncorrectable: int = 0
    symbols_corrected: int = 0

    def as_dict(self) -> dict:
        return asdict(self)


class CodeblockDecoder:
    """Turn CADUs into transfer frames: de-randomize, then Reed-Solomon decode (CCSDS 131.0-B).

    Parameters
    ----------
    profile : LinkProfile
        Uses ``coding.randomizer``, ``coding.reed_solomon`` (E), ``coding.interleave`` (I) and
        ``frames.length``; the codeblock is ``profile.codeblock_bytes`` octets.

    Notes
    -----
    1. De-randomizing: the codeblock (everything after the ASM) is XORed with the TM
       pseudo-random sequence restarted at the ASM (``pipeline.fec.pn_sequence``; CCSDS 131.0-B-2
       sec. 9: on the receiving end after synchronization and before RS decoding).
    2. RS: ``pipeline.fec.rs_decode`` with E and I; the virtual fill is implied by the length
       (``k I - frame length`` octets, CCSDS 131.0-B-2 sec. 4.3.7).  The frame is the first
       ``frames.length`` octets of the corrected codeblock.
    3. Status: ``"rs_uncorrectable"`` as soon as one of the I codewords fails; the octets of the
       failing codewords are then left exactly as received (de-randomized but uncorrected), those
       of the others are corrected.  Without RS the status is always ``"ok"`` here: the frame's
       FECF, when present, is checked by the frame parser.

    Cost: one XOR pass plus the RS decoder (syndromes only on clean codewords).

    References
    ----------
    CCSDS 131.0-B-2 sec. 4 (RS code, interleaving, virtual fill), sec. 9 (pseudo-randomizer).
    """

    def __init__(self, *, profile: LinkProfile) -> None:
        if not isinstance(profile, LinkProfile):
            raise TypeError(f"Argument 'profile' must be a LinkProfile, not {type(profile).__name__}.")
        self.profile = profile
        c = profile.coding
        self.codeblock_bytes = profile.codeblock_bytes
        self.frame_bytes = profile.frames.length
        self.reed_solomon = int(c.reed_solomon)
        self.interleave = int(c.interleave)
        self.randomizer = bool(c.randomizer)
        self._pn = np.asarray(pn_sequence(self.codeblock_bytes), dtype=np.uint8) if self.randomizer else None
        self.stats = CodeblockStats()

    def reset(self) -> None:
        """Zero the statistics (the decoder keeps no other state between codeblocks)."""
        self.stats = CodeblockStats()

    def process(self, cadu: Cadu) -> DecodedFrame:
        """Decode one CADU into a :class:`DecodedFrame` (see the class Notes for the status rules)."""
        if not isinstance(cadu, Cadu):
            raise TypeError(f"Argument 'cadu' must be a Cadu, not {type(cadu).__name__}.")
        if len(cadu.data) != self.codeblock_bytes:
            raise ValueError(
                f"Argument 'cadu' must carry {self.codeblock_bytes} octets (the profile's codeblock), "
                f"not {len(cadu.data)}."
            )
        block = np.frombuffer(cadu.data, dtype=np.uint8)
        if self._pn is not None:
            block = block ^ self._pn
        st = self.stats
        st.codeblocks += 1
        if cadu.flywheel:
            st.flywheel_codeblocks += 1
        if not self.reed_solomon:
            st.ok += 1
            return DecodedFrame(frame=block.tobytes(), status="ok", rs_corrected=(), cadu=cadu)
        data, corrected = rs_decode(block, e=self.reed_solomon, interleave=self.interleave)
        frame = np.array(data[: self.frame_bytes], dtype=np.uint8)
        corrected = tuple(int(v) for v in corrected)
        failed = [j for j, v in enumerate(corrected) if v < 0]
        for j in failed:
            # rs_decode leaves a failed codeword as received; restoring it here keeps this stage's
            # promise whatever the decoder did.  Codeword j holds octets j, j + I, j + 2I, ...
            # (symbol interleaving, CCSDS 131.0-B-2 sec. 4.4.1).
            frame[j :: self.interleave] = block[: self.frame_bytes][j :: self.interleave]
        st.codewords += len(corrected)
        st.codewords_uncorrectable += len(failed)
        st.codewords_corrected += sum(1 for v in corrected if v > 0)
        st.symbols_corrected += sum(v for v in corrected if v > 0)
        if failed:
            st.rs_uncorrectable += 1
            status = "rs_uncorrectable"
        else:
            st.ok += 1
            status = "ok"
        return DecodedFrame(frame=frame.tobytes(), status=status, rs_corrected=corrected, cadu=cadu)
