"""Codeblock path: CADU -> de-randomize -> Reed-Solomon decode (or a soft-decoded code: turbo, LDPC) -> transfer
frame with its status."""

from __future__ import annotations

from collections import deque
from dataclasses import asdict, dataclass

import numpy as np

from pipeline.fec import pn_sequence, rs_decode, rs_decode_blocks
from pipeline.profile import LinkProfile
from pipeline.sync._args import check_int
from pipeline.sync._codes import soft_block_code
from pipeline.sync._esn0 import Esn0Estimate, MarkerEsn0Estimator
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
    decoder_failed: int = 0  # soft-decoded codewords whose check failed (turbo_failed / ldpc_failed)
    decoder_iterations: int = 0  # iterations summed over the soft-decoded codewords
    decoder_syndrome_weight: int = 0  # LDPC: final syndrome weights summed (nonzero only on failed codewords)

    def as_dict(self) -> dict:
        return asdict(self)


class CodeblockDecoder:
    """Turn CADUs into transfer frames: de-randomize, then Reed-Solomon or soft (turbo, LDPC) decoding (CCSDS 131.0-B).

    Parameters
    ----------
    profile : LinkProfile
        Uses ``coding.randomizer``, ``coding.reed_solomon`` (E), ``coding.interleave`` (I) and
        ``frames.length``; the codeblock is ``profile.codeblock_bytes`` octets.  With a soft-decoded
        code (``coding.turbo``, ``coding.ldpc``) the code itself (:func:`~pipeline.sync.soft_block_code`).
    batch_cadus : int or None
        Soft-decoded codes: CADUs gathered before the decoder runs (1 .. 4096; None = the code's
        ``batch_cadus``, 32 for turbo and LDPC).  Any value gives the same frames.
    esn0_window_cadus : int
        Soft-decoded codes: markers pooled by the Es/N0 estimate (:class:`MarkerEsn0Estimator`).
    esn0_lookahead_cadus : int
        Soft-decoded codes: a CADU is scaled with the estimate after the marker this many CADUs
        later (0 .. 4096; fewer at the end of the stream), so that the first codewords of a lock are
        not scaled by one or two markers alone.

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
    4. Soft-decoded codes (turbo, LDPC): the CADU's soft codeword is de-randomized by sign flips (the
       same sequence restarted at the marker, CCSDS 131.0-B-2 sec. 9; for C2 it covers the two
       extension bits too), scaled into channel LLRs ``L = 2 A y / sigma^2`` with the estimate of
       :class:`MarkerEsn0Estimator` after the marker ``esn0_lookahead_cadus`` (8) CADUs later
       (pooled over the last ``esn0_window_cadus`` markers, so the window runs from 23 CADUs before
       to 8 after; at the end of the stream the last estimate), and decoded in batches of
       ``batch_cadus`` by the code.  The look-ahead matters at the start of a lock: the frame
       synchronizer's look-back delivers the first CADUs together, the first of them often cut
       while the receiver's gain and loops were still settling, and a median of one or two
       markers scaled the next codewords by a third of their LLRs (simulated onsets,
       ``bench/bench_sync_onset.py``; the decoders quantise small LLRs coarsely).  A
       codeword whose check fails gets the code's ``failure_status`` (``turbo_failed``,
       ``ldpc_failed``: never ``ok``); the iterations, the Es/N0 estimate and (LDPC) the final
       syndrome weight travel in the :class:`DecodedFrame`.  The scale depends only on the sequence
       of CADUs and the decoder keeps no state between codewords, so the frames do not depend on the batching;
       :meth:`process_cadus` returns them in CADU order once a batch is complete (and its last CADU's
       look-ahead has arrived), :meth:`flush` the rest.  :meth:`process` decodes at once, with the
       estimate after its own marker.

    Cost: one XOR pass plus the RS decoder (syndromes only on clean codewords); for turbo codes the
    iterative decoder (about 20 Mbit/s of information on one core at k = 8920, rate 1/2; LDPC C2
    above 100 Mbit/s at Eb/N0 4 dB).

    References
    ----------
    CCSDS 131.0-B-2 sec. 4 (RS code, interleaving, virtual fill), sec. 6 (turbo codes), sec. 7 (LDPC
    codes), sec. 9 (pseudo-randomizer).

    Examples
    --------
    >>> from pipeline.profile import demo_profile_path, load_profile
    >>> dec = CodeblockDecoder(profile=load_profile(demo_profile_path()))
    >>> dec.soft_code is None, dec.codeblock_bytes
    (True, 1275)
    """

    def __init__(self, *, profile: LinkProfile, batch_cadus: int | None = None, esn0_window_cadus: int = 32,
                 esn0_lookahead_cadus: int = 8) -> None:
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
        self.soft_code = soft_block_code(profile)
        self.batch_cadus = None
        if self.soft_code is not None:
            code = self.soft_code
            self.batch_cadus = check_int("batch_cadus", code.batch_cadus if batch_cadus is None else batch_cadus,
                                         1, 4096)
            n = code.codeword_bits
            pn_bits = np.unpackbits(self._pn)[:n] if self._pn is not None else np.zeros(n, np.uint8)
            self._pn_signs = (1.0 - 2.0 * pn_bits.astype(np.float32)).astype(np.float32)
            self._marker_signs = 1.0 - 2.0 * np.unpackbits(np.frombuffer(code.marker, np.uint8)).astype(np.float64)
            self.esn0 = MarkerEsn0Estimator(window_cadus=esn0_window_cadus)
        self.esn0_lookahead_cadus = check_int("esn0_lookahead_cadus", esn0_lookahead_cadus, 0, 4096)
        self._waiting: deque[Cadu] = deque()  # marker in the estimate, scale waiting for the look-ahead
        self._pending: list[tuple[Cadu, np.ndarray, float]] = []
        self.stats = CodeblockStats()

    def reset(self) -> None:
        """Zero the statistics, drop pending CADUs and forget the Es/N0 estimate."""
        self.stats = CodeblockStats()
        self._pending = []
        self._waiting = deque()
        if self.soft_code is not None:
            self.esn0.reset()

    @property
    def pending(self) -> int:
        """CADUs waiting for their look-ahead markers or their batch (soft-decoded codes)."""
        return len(self._waiting) + len(self._pending)

    def process_cadus(self, cadus) -> list[DecodedFrame]:
        """Take CADUs in stream order; return the frames completed, in CADU order.

        RS / uncoded links decode every CADU at once; soft-decoded codes gather CADUs and decode a
        batch when ``batch_cadus`` are waiting (:meth:`flush` decodes the rest).
        """
        if self.soft_code is None:
            cadus = list(cadus)
            if self.reed_solomon and len(cadus) > 1 and all(
                    isinstance(c, Cadu) and len(c.data) == self.codeblock_bytes for c in cadus):
                return self._rs_batch(cadus)
            return [self.process(c) for c in cadus]  # (one at a time: a bad CADU raises where process() would)
        out: list[DecodedFrame] = []
        for cadu in cadus:
            self._queue(cadu, self.esn0_lookahead_cadus)
            if len(self._pending) >= self.batch_cadus:
                out += self._decode_pending()
        return out

    def flush(self) -> list[DecodedFrame]:
        """Decode the CADUs still waiting (end of stream: those still waiting for look-ahead markers take the
        estimate after the last marker); the decoder stays usable."""
        if self._waiting:
            est = self.esn0.estimate()
            while self._waiting:
                self._scale(self._waiting.popleft(), est)
        return self._decode_pending() if self._pending else []

    def process(self, cadu: Cadu) -> DecodedFrame:
        """Decode one CADU into a :class:`DecodedFrame` now (see the class Notes for the status rules).

        With a soft-decoded code no CADU may be waiting in :meth:`process_cadus` (flush first).
        """
        if not isinstance(cadu, Cadu):
            raise TypeError(f"Argument 'cadu' must be a Cadu, not {type(cadu).__name__}.")
        if self.soft_code is not None:
            if self.pending:
                raise ValueError(f"Argument 'cadu' cannot be decoded alone while {self.pending} CADUs wait "
                                 "in process_cadus(); call flush() first.")
            self._queue(cadu, 0)
            return self._decode_pending()[0]
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
        return self._rs_frame(cadu, block, data, corrected)

    def _rs_batch(self, cadus: list) -> list[DecodedFrame]:
        """:meth:`process` for several valid CADUs of a Reed-Solomon link: one decoder call for all of them
        (:func:`pipeline.fec.rs_decode_blocks`, the same kernel) and the statistics of the batch at once, then
        each frame as :meth:`process` makes it (a frame with a failed codeword through :meth:`_rs_frame`)."""
        blocks = np.frombuffer(b"".join(c.data for c in cadus), dtype=np.uint8).reshape(len(cadus), -1)
        if self._pn is not None:
            blocks = blocks ^ self._pn
        data, corrected = rs_decode_blocks(blocks, e=self.reed_solomon, interleave=self.interleave)
        failed = (corrected < 0).any(axis=1)
        st = self.stats
        st.codeblocks += len(cadus)
        st.flywheel_codeblocks += sum(1 for c in cadus if c.flywheel)
        frames = data[:, : self.frame_bytes]
        good = corrected[~failed]
        st.codewords += good.size
        st.codewords_corrected += int(np.count_nonzero(good > 0))
        st.symbols_corrected += int(good.sum())
        st.ok += len(good)
        out = []
        for j, (cadu, row, bad) in enumerate(zip(cadus, corrected.tolist(), failed.tolist())):
            if bad:
                out.append(self._rs_frame(cadu, blocks[j], data[j], row))
            else:
                out.append(DecodedFrame(frame=frames[j].tobytes(), status="ok", rs_corrected=tuple(row), cadu=cadu))
        return out

    def _rs_frame(self, cadu: Cadu, block: np.ndarray, data: np.ndarray, corrected) -> DecodedFrame:
        """The frame of one de-randomized codeblock from its decoder output, with the statistics."""
        st = self.stats
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

    # ---- soft-decoded codes -----------------------------------------------------------------
    def _queue(self, cadu: Cadu, lookahead: int) -> None:
        """Add the CADU's marker to the estimate; scale the CADU ``lookahead`` markers back with it."""
        if not isinstance(cadu, Cadu):
            raise TypeError(f"Argument 'cadu' must be a Cadu, not {type(cadu).__name__}.")
        n, m = self.soft_code.codeword_bits, self._marker_signs.size
        if cadu.soft is None or cadu.marker_soft is None or cadu.soft.shape != (n,) or cadu.marker_soft.shape != (m,):
            raise ValueError(f"Argument 'cadu' must carry the soft codeword ({n} values) and marker ({m} values) of "
                             f"{self.soft_code.name} (FrameSync keep_soft=True).")
        est = self.esn0.update(cadu.marker_soft, self._marker_signs)
        self._waiting.append(cadu)
        if len(self._waiting) > lookahead:
            self._scale(self._waiting.popleft(), est)

    def _scale(self, cadu: Cadu, est: Esn0Estimate) -> None:
        """De-randomize the CADU's soft codeword, scale it into LLRs with ``est`` and add it to the batch."""
        llr = np.asarray(cadu.soft, dtype=np.float32) * self._pn_signs
        llr *= np.float32(est.llr_scale)
        self._pending.append((cadu, llr, est.esn0_db))

    def _decode_pending(self) -> list[DecodedFrame]:
        pending, self._pending = self._pending, []
        res = self.soft_code.decode(np.stack([llr for _, llr, _ in pending]))
        st = self.stats
        out = []
        for j, (cadu, _, esn0_db) in enumerate(pending):
            passed = bool(res.passed[j])
            iterations = int(res.iterations[j])
            syndrome = None if res.syndrome_weight is None else int(res.syndrome_weight[j])
            st.codeblocks += 1
            st.flywheel_codeblocks += int(cadu.flywheel)
            st.decoder_iterations += iterations
            st.decoder_syndrome_weight += syndrome or 0
            if passed:
                st.ok += 1
            else:
                st.decoder_failed += 1
            out.append(DecodedFrame(frame=res.frames[j].tobytes(), status="ok" if passed else
                                    self.soft_code.failure_status, rs_corrected=(), cadu=cadu,
                                    decoder_iterations=iterations, decoder_esn0_db=round(float(esn0_db), 3),
                                    fec_verified=passed, decoder_syndrome_weight=syndrome))
        return out
