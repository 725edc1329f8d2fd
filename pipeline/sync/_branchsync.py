"""Branch synchronization: Viterbi decoding with the convolutional branch alignment and the QPSK 90-degree
ambiguity resolved by the decoder's metric growth."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from pipeline.fec import (
    ASM,
    ViterbiDecoder,
    conv_bit_symbol_index,
    conv_encode,
    puncture_pattern,
    viterbi_decode,
)
from pipeline.profile import CONV_RATES, Modulation
from pipeline.sync import _kernels
from pipeline.sync._args import as_soft_and_position, check_int
from pipeline.sync._framesync import soft_search_threshold
from pipeline.sync._types import SyncEvent

__all__ = ["BranchSync", "BranchSyncStats", "branch_metric"]

_MODULATIONS = ("bpsk", "qpsk", "oqpsk", "pcm-pm", "pcm-psk-pm")
# Channel-bit transforms tried per modulation: 0 none, 1 (a, b) -> (b, -a), 2 (a, b) -> (a, -b),
# 3 (a, b) -> (b, a), on pairs (I bit, Q bit).  A 90-degree carrier rotation swaps I and Q with one
# inverted (1).  With OQPSK the symbol timing then re-pairs each Q with the next I, which is a one-bit
# shift (a branch offset) with every other bit inverted (2).  The 180- and 270-degree cases are these
# complemented.  A spectrally inverted recording (I and Q swapped, or the conjugate) mirrors the
# constellation: Q inverted (2) or I and Q swapped (3), times the same rotations (DEVELOPERS.md).
_ROTATIONS = {"qpsk": (0, 1), "oqpsk": (0, 1, 2)}
_MIRRORED = {"qpsk": (2, 3), "oqpsk": (3,)}
#: Soft markers (uncoded QPSK/OQPSK, turbo and LDPC links): markers a rotation decision is judged on, and the
#: bits either side of each where every rotation's best score is taken.
_SOFT_MARKERS = 8
_NEAR = 3

_ROTATION_TEXT = {
    "qpsk": {0: "none", 1: "90 deg (I/Q swapped)", 2: "mirrored: Q inverted (spectrum inverted)",
             3: "mirrored: I/Q swapped (spectrum inverted)"},
    "oqpsk": {0: "none", 1: "90 deg (I/Q swapped)", 2: "Q inverted (OQPSK 90 deg, or mirrored)",
              3: "I/Q swapped (mirrored OQPSK 90 deg)"},
}
# CCSDS 131.0-B-2 sec. 3.3.1: G1 = 1111001 (171 octal), G2 = 1011011 (133 octal), the leftmost bit tapping
# the input.  The re-encoding register keeps the input in bit 0, so the printed vectors are bit-reversed.
_G1_MASK = int(f"{0o171:07b}"[::-1], 2)
_G2_MASK = int(f"{0o133:07b}"[::-1], 2)
_PARITY = np.array([bin(v).count("1") & 1 for v in range(128)], dtype=np.uint8)
# Smallest winning margin of the normalized metric that counts as a decision, per rate.  Measured here
# on Gaussian noise with acquire_bits = 4096, BPSK and QPSK hypotheses: the largest margin seen in 30
# trials was 0.0046 (1/2), 0.0030 (2/3), 0.0016 (3/4), 0.0012 (5/6), 0.0011 (7/8); these are about
# twice that.  Real signals give 0.03 (1/2, Eb/N0 0 dB) to 0.008 (7/8, 3 dB).  No published source.
_MIN_MARGIN = {"1/2": 0.009, "2/3": 0.006, "3/4": 0.0035, "5/6": 0.0025, "7/8": 0.0025}
_MAX_TWINS = 4  # hypotheses within the margin told apart by their markers (more: noise, left undecided)
_GUARD_PERIODS = 16  # decoded periods ignored at each end of an evaluation window (no prior state, short traceback)
# Signal-presence gate of an evaluation while undecided: S / M2 of the window's soft values by the real M2M4
# estimator (Pauluzzi and Beaulieu 2000).  Measured here over 8192 values: Gaussian noise alone 0.07 +- 0.08
# (largest of 2000 windows 0.28); antipodal values at Es/N0 = -3 dB 0.50 (smallest of 200 windows 0.44).
_PRESENCE_MIN = 0.35
_HOLD_BLOCKS = 8  # decoded blocks held back at most while no hypothesis stands out


@dataclass
class BranchSyncStats:
    """Counters of one :class:`BranchSync` run."""

    channel_bits_in: int = 0
    bits_out: int = 0
    evaluations: int = 0  # times all hypotheses were decoded and compared
    switches: int = 0  # evaluations that changed the hypothesis (the first choice included)
    undecided_evaluations: int = 0  # evaluations where no hypothesis stood out (see BranchSync Notes)
    quiet_evaluations: int = 0  # evaluations skipped: the window held no signal (presence gate)
    redecoded_bits: int = 0  # channel bits decoded again under a new hypothesis after being held back
    monitor_triggers: int = 0  # re-evaluations asked by the metric monitor
    lost_lock_notices: int = 0  # re-evaluations asked through notify_lost_lock()
    blocks: int = 0  # monitored blocks of decoded bits
    blocks_below_threshold: int = 0
    channel_bits_discarded: int = 0  # channel bits never decoded (before a switch, or too few at the end)
    marker_decisions: int = 0  # evaluations the metric could not decide, decided by the markers (see Twins)
    last_metric: float = float("nan")  # normalized metric of the last monitored block

    def as_dict(self) -> dict:
        """The counters as a dict for JSON (a metric not yet measured is None, not NaN)."""
        d = asdict(self)
        if not math.isfinite(d["last_metric"]):
            d["last_metric"] = None
        return d


def branch_metric(soft: np.ndarray, codeword_bits: np.ndarray) -> float:
    """Normalized correlation ``sum(soft * (1 - 2 c)) / sum(|soft|)`` of soft symbols with code bits ``c``.

    1.0 when every symbol agrees with the codeword; for the Viterbi decision re-encoded this is the
    survivor's correlation path metric per unit of soft magnitude, i.e. the decoder's metric growth.
    Returns 0.0 when all soft values are zero (erasures).
    """
    mag = float(np.sum(np.abs(soft), dtype=np.float64))
    if mag == 0.0:
        return 0.0
    return float(np.dot(soft.astype(np.float64), 1.0 - 2.0 * codeword_bits.astype(np.float64)) / mag)


class BranchSync:
    """Viterbi decoding of soft channel bits with the branch alignment and QPSK rotation found and followed.

    Parameters
    ----------
    rate : {"none", "1/2", "2/3", "3/4", "5/6", "7/8"}
        Convolutional code rate of the link.  "none": BPSK-like links pass the soft channel bits
        through; uncoded QPSK/OQPSK resolve the 90-degree rotation by finding markers (see Notes).
    modulation : {"bpsk", "qpsk", "oqpsk", "pcm-pm", "pcm-psk-pm"}
        With QPSK/OQPSK the 90-degree rotation is also resolved: channel bits are taken in pairs
        (I bit, Q bit) from the first bit of the stream.
    acquire_bits : int
        Decoded bits per hypothesis used to choose a hypothesis (256 .. 65536).
    block_bits : int
        Decoded bits per monitored block (256 .. 65536).
    patience : int
        Consecutive monitored blocks below the threshold that trigger a re-evaluation (1 .. 16).
    traceback_depth : int, optional
        Passed to :class:`pipeline.fec.ViterbiDecoder`.
    asm : bytes
        Marker looked for on uncoded QPSK/OQPSK links (default the 32-bit ASM 1ACFFC1D; a turbo
        link's own 64 to 192-bit marker).
    correlation : {"hard", "soft"}
        How the marker is found on uncoded QPSK/OQPSK links: "hard", within 2 bit errors of the
        hard decisions; "soft", a normalised soft correlation
        (:func:`~pipeline.sync._kernels.marker_score`) of at least ``marker_threshold``, for the
        soft-decoded codes (turbo, LDPC), whose channel bits run at Es/N0 below 0 dB where a 64-bit
        turbo marker is rarely within 2 errors.
    marker_threshold : float or None
        The soft correlation's threshold; None: :func:`~pipeline.sync.soft_search_threshold` of the
        marker (4.5 for the 32-bit ASM, 4.98 for 64 bits, 5.34 for 192), the frame synchronizer's own.
    marker_period_bits : int or None
        Coded links: decoded bits from one marker (``asm``) to the next (the CADU).  When given, hypotheses
        the metric cannot separate are told apart by the markers in their decoded bits (see Notes).
        Uncoded QPSK/OQPSK: channel bits from one marker to the next; when given, a rotation change inside a
        block is found and switched at the first marker of the new rotation (see Notes).
    nrz_m : bool
        The decoded bits are NRZ-M: the marker is looked for after differential decoding.
    marker_block_bits : int
        Uncoded QPSK/OQPSK: channel bits per rotation decision (1024 .. 2**22); it should hold
        at least one CADU.
    g2_inverted : bool or None
        Whether the transmitter inverts the G2 output; None follows CCSDS 131.0-B: at rate 1/2
        only (sec. 3.3; the punctured codes of sec. 3.4 have none, 130.1-G sec. 4.3 Fig. 4-2).
    mirror : bool
        QPSK/OQPSK: also try the mirror images of the constellation (a spectrally inverted
        recording; ``[receiver] spectrum_inverted = "auto"``).  False when the profile says the
        spectrum is upright (or the demodulator already conjugated it).

    Attributes
    ----------
    hypothesis : tuple of (int, int) or None
        ``(offset, rotation)``: branches start at channel-bit indices ``= offset (mod P)``, P the
        channel bits per puncturing period (2 at rate 1/2, 3, 4, 6, 8 at 2/3 .. 7/8); ``rotation``
        1 means every pair (a, b) of channel bits was replaced by (b, -a) before decoding (undoing
        a 90-degree carrier phase rotation), 2 by (a, -b) (OQPSK's re-paired 90-degree case, or a
        mirrored QPSK constellation), 3 by (b, a) (mirrored).
    mirrored : bool or None
        QPSK: whether the current hypothesis is a mirror image (the recording is spectrally
        inverted, so its Doppler has the wrong sign); None when it cannot be told (BPSK and
        residual carrier are their own mirror image; OQPSK's mirror equals its re-paired rotation).
    threshold : float
        Current monitor threshold on the normalized metric.

    Notes
    -----
    Hypotheses: ``P`` branch offsets, times 2 rotations for QPSK and 3 for OQPSK (whose 90-degree
    case, once the symbol timing has re-paired I and Q, is a one-bit shift with the Q bits
    inverted), and with ``mirror`` also the mirror images (4 transforms in all for QPSK and for
    OQPSK).  The 180-degree rotation (and the BPSK inversion) needs none: the CCSDS code's
    generators both have odd weight, so the complement of a codeword is the codeword of the
    complemented bits, and the inverted decoded stream is resolved by the frame synchronizer's
    inverted ASM.

    Evaluation at channel index ``t``: for each hypothesis, ``acquire_bits`` bits' worth of
    channel bits from the first index ``>= t`` of its alignment are decoded
    (:func:`pipeline.fec.viterbi_decode`), re-encoded (:func:`pipeline.fec.conv_encode`) and
    correlated with the soft input (:func:`branch_metric`, ends excluded).  For the right
    hypothesis the metric is the channel's own agreement (0.87 at Eb/N0 = 0 dB, 0.95 at 3 dB for
    rate 1/2); for a wrong one the decoder only finds the nearest codeword to a non-codeword
    (about 0.84 at rate 1/2, 0.98 at rate 7/8), so the largest metric wins.  The monitor
    threshold is then set midway between the winner and the best loser.  When the winner leads
    by less than a rate-dependent margin (measured on noise: no signal yet, a fade, or too weak),
    the choice is undecided: the running decoder (or, at the start, the best hypothesis) goes on,
    but its output is *held back* (up to 8 blocks; older blocks are released as they age), and
    the hypotheses are evaluated again at the end of every block.  An evaluation whose window
    holds no signal (the real M2M4 estimate ``S / M2`` of its soft values below 0.2: noise alone
    stays under 0.13) is skipped as undecided without decoding.  When a hypothesis stands out
    again, the held blocks are released if it is the running one; otherwise decoding restarts
    under it from the first held channel bit, so at a signal's onset (or after a fade with a phase
    slip) nothing received since up to 8 blocks before the decision is lost.

    Twins: at rate 5/6 a QPSK constellation and its mirror image give the same metric (the punctured
    code is its own image under the I/Q swap, at another branch offset), so an evaluation there can never
    decide between them from the metric alone, and the first of the two was decoded whether or not it
    was right (the wrong one decodes nothing).  With ``marker_period_bits``, the hypotheses within the
    margin of the best (at most four, and only while a signal is present) are each decoded over two marker
    periods, and the one whose decoded bits hold the most markers (either polarity, at most 2 bit errors)
    is taken, decided, when it holds at least one and strictly more than the others.

    Tracking: the chosen hypothesis is decoded by one :class:`pipeline.fec.ViterbiDecoder`; the
    output is cut into blocks of ``block_bits`` (counted from the segment start), each re-encoded
    with a running encoder and scored the same way (kernel ``reencode_metrics``).  ``patience``
    blocks in a row below the threshold (a symbol slip, a 90-degree phase jump) start a
    re-evaluation at the end of the last block; when another hypothesis wins, decoding restarts
    at its first aligned index there (the bits of the old hypothesis after that point are
    dropped); otherwise the running decoder simply continues.  Decisions depend only on the data,
    so the output is the same for any chunking.  :meth:`notify_lost_lock` asks for a
    re-evaluation at the next block boundary not yet output (this one depends on when it is
    called).

    Uncoded QPSK/OQPSK: the stream is cut into blocks of ``marker_block_bits`` channel bits.  A
    block is output under the current rotation if the marker (either polarity, at most 2 bit
    errors: a false match per offset of 2.5e-7, REFERENCES.md sec. 1.7; or, with
    ``correlation="soft"``, a soft score of at least the threshold: 3.2e-8 per offset on noise)
    occurs in it; if it does not, and it does under another rotation, the rotation switches for
    this block on.  With ``marker_period_bits`` the markers on the CADU grid decide first
    (:meth:`_grid_plan`): at the places one marker period apart from the last marker seen, the rotation
    scoring highest (at or over the threshold) is each place's; when two or more agree the block takes
    theirs, and when a run of two or more of another rotation ends the block after places of the current
    one, the output switches at the run's first marker (a slip of the carrier loop, samples dropped), so a
    change costs the CADU it falls in rather than the rest of the block, which is what a 90-degree jump cost
    before on an AR4JA k = 1024 QPSK link at 240 ksym/s: 29 CADUs, 130 ms, with blocks of 65536 bits.
    Without a verdict the rule above applies.  The output lags the input by one block.  A
    65536-bit block holds 18 CADUs of
    the k = 1784 rate-1/2 turbo code, each of whose 64-bit markers scores above 4.98 about half the
    time at Es/N0 -1.4 dB per channel bit, so a block without one is rare (about 4e-6).

    Cost: about (1 + H acquire_bits / interval) Viterbi decodes per bit, H hypotheses, plus one
    re-encoding; memory: the decoder's block (16384 steps) plus one monitored block.

    References
    ----------
    CCSDS 131.0-B-2 sec. 3 (code, puncturing); CCSDS 130.1-G-1 sec. 8.3 (node synchronization);
    metric-growth node synchronization: common practice, no published source.
    """

    def __init__(
        self,
        *,
        rate: str,
        modulation: Modulation,
        acquire_bits: int = 4096,
        block_bits: int = 2048,
        patience: int = 2,
        traceback_depth: int | None = None,
        asm: bytes = ASM,
        marker_block_bits: int = 65536,
        g2_inverted: bool | None = None,
        mirror: bool = True,
        correlation: str = "hard",
        marker_threshold: float | None = None,
        marker_period_bits: int | None = None,
        nrz_m: bool = False,
    ) -> None:
        if rate not in CONV_RATES:
            raise ValueError(f"Argument 'rate' must be one of {' | '.join(CONV_RATES)}, not {rate!r}.")
        if modulation not in _MODULATIONS:
            raise ValueError(f"Argument 'modulation' must be one of {' | '.join(_MODULATIONS)}, not {modulation!r}.")
        check_int("acquire_bits", acquire_bits, 256, 65536)
        check_int("block_bits", block_bits, 256, 65536)
        check_int("patience", patience, 1, 16)
        check_int("marker_block_bits", marker_block_bits, 1024, 1 << 22)
        if not isinstance(asm, (bytes, bytearray)) or not 2 <= len(asm) <= 32:
            raise ValueError("Argument 'asm' must be 2..32 octets of bytes.")
        self.rate = rate
        self.modulation = modulation
        self.patience = int(patience)
        self.traceback_depth = traceback_depth
        self.coded = rate != "none"
        # uncoded QPSK/OQPSK: the 90-degree rotation is resolved by finding markers (no decoder metric)
        self.marker_rotation = not self.coded and modulation in ("qpsk", "oqpsk")
        if not isinstance(mirror, bool):
            raise TypeError(f"Argument 'mirror' must be True or False, not {mirror!r}.")
        self.mirror = mirror
        self.rotations = _ROTATIONS.get(modulation, (0,)) + (_MIRRORED.get(modulation, ()) if mirror else ())
        self.marker_block_bits = int(marker_block_bits) + int(marker_block_bits) % 2
        self._marker = np.unpackbits(np.frombuffer(bytes(asm), dtype=np.uint8))
        if correlation not in ("hard", "soft"):
            raise ValueError(f"Argument 'correlation' must be 'hard' or 'soft', not {correlation!r}.")
        self.correlation = correlation
        if marker_period_bits is not None:
            check_int("marker_period_bits", marker_period_bits, 64, 1 << 20)
        self.marker_period_bits = marker_period_bits
        if not isinstance(nrz_m, bool):
            raise TypeError(f"Argument 'nrz_m' must be True or False, not {nrz_m!r}.")
        self.nrz_m = nrz_m
        if marker_threshold is None:
            marker_threshold = soft_search_threshold(int(self._marker.size))
        marker_threshold = float(marker_threshold)
        if not (math.isfinite(marker_threshold) and 0.0 < marker_threshold <= math.sqrt(self._marker.size)):
            raise ValueError(f"Argument 'marker_threshold' must be in (0, {math.sqrt(self._marker.size):.3g}], "
                             f"not {marker_threshold!r}.")
        self.marker_threshold = marker_threshold
        # +1.0 for a marker bit 0, -1.0 for a bit 1 (positive soft value = bit 0), for marker_score
        self._marker_sign = 1.0 - 2.0 * self._marker.astype(np.float64)
        self.stats = BranchSyncStats()
        self.events: list[SyncEvent] = []
        if self.coded:
            pat = puncture_pattern(rate)
            self.period_bits = int(pat.shape[1])  # information bits per puncturing period
            self.period_symbols = int(pat.sum())  # channel bits per puncturing period
            kp, P = self.period_bits, self.period_symbols
            self.block_bits = -(-int(block_bits) // kp) * kp
            self.acquire_bits = -(-int(acquire_bits) // kp) * kp
            self._block_symbols = self.block_bits // kp * P
            self._acquire_periods = self.acquire_bits // kp
            # first channel bit of each branch within one puncturing period
            self._period_index = conv_bit_symbol_index(kp, rate)
            if modulation == "oqpsk" and P % 2 == 0:
                # a branch starting on the Q rail is timed by the I pulse of its symbol, the channel bit
                # before it (a puncturing period starts on the I rail; DEVELOPERS.md, OQPSK time reference)
                self._period_index = self._period_index - self._period_index % 2
            self._period_index = np.ascontiguousarray(self._period_index, dtype=np.int64)
            self._keep1 = np.ascontiguousarray(pat[0], dtype=np.uint8)
            # channel bits sent for the first r information bits of a puncturing period, r = 0 .. kp
            self._symbols_before = [0] + np.cumsum(pat.sum(axis=0)).astype(int).tolist()
            self._keep2 = np.ascontiguousarray(pat[1], dtype=np.uint8)
            self.hypotheses = tuple((off, rot) for rot in self.rotations for off in range(P))
            # validates traceback_depth and g2_inverted once, here, and resolves the G2 convention
            self.g2_inverted = ViterbiDecoder(rate=rate, traceback_depth=traceback_depth,
                                              g2_inverted=g2_inverted).g2_inverted
        else:
            self.period_bits = self.period_symbols = 1
            self.block_bits = self.acquire_bits = 0
            self.hypotheses = tuple((0, rot) for rot in self.rotations)
        self._clear_stream()

    # ---- public -----------------------------------------------------------------------------
    @property
    def hypothesis(self) -> tuple[int, int] | None:
        return self._hyp

    @property
    def mirrored(self) -> bool | None:
        if self.modulation != "qpsk" or self._hyp is None:
            return None
        return self._hyp[1] in (2, 3)

    def reset(self) -> None:
        """Forget the stream, statistics and events."""
        self.stats = BranchSyncStats()
        self.events = []
        self._clear_stream()

    def notify_lost_lock(self) -> None:
        """The frame synchronizer lost lock: re-evaluate the hypotheses at the next block not yet output."""
        if not self.coded:
            return
        self.stats.lost_lock_notices += 1
        if self._pending is None and self._hyp is not None:
            self._pending = self._frontier()

    def process(self, soft: np.ndarray, position: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Take soft channel bits (float, + = 0) and their sample positions; return decoded bits so far.

        Returns
        -------
        bits : numpy.ndarray of float32
            +1.0 for bit 0, -1.0 for bit 1 (uncoded links: the input soft values unchanged).
        position : numpy.ndarray of float64
            For each bit, the position of the first channel bit of its branch.
        """
        soft, position = as_soft_and_position(soft, position)
        self.stats.channel_bits_in += soft.size
        if not self.coded and not self.marker_rotation:
            self.stats.bits_out += soft.size
            return soft.copy(), position.copy()
        if soft.size:
            self._append_raw(soft, position)
            self._n_in += soft.size
        if self.marker_rotation:
            self._marker_blocks(final=False)
        else:
            self._run(final=False)
        return self._take_output()

    def flush(self) -> tuple[np.ndarray, np.ndarray]:
        """End of stream: decode everything received and return the remaining bits; then start afresh.

        Statistics and events are kept.
        """
        if not self.coded and not self.marker_rotation:
            return np.zeros(0, np.float32), np.zeros(0, np.float64)
        if self.marker_rotation:
            self._marker_blocks(final=True)
        else:
            self._run(final=True)
        out = self._take_output()
        self._clear_stream()
        return out

    # ---- internals --------------------------------------------------------------------------------
    def _clear_stream(self) -> None:
        # the channel bits still needed, [_raw_base, _n_in), are two pieces: _soft_kept / _pos_kept (owned) from
        # _raw_base on, then _soft_new / _pos_new, the current call's input arrays, which are read during the call
        # only: at its end the part still needed is copied into the kept arrays (O(held), not O(input): most of
        # the input is decoded and output within the call)
        self._soft_kept = np.zeros(0, np.float32)
        self._soft_new = self._soft_kept
        self._pos_kept = np.zeros(0, np.float64)
        self._pos_new = self._pos_kept
        self._raw_base = 0  # absolute channel index of the first kept channel bit
        self._n_in = 0
        self._hyp: tuple[int, int] | None = (0, 0) if self.marker_rotation else None
        self._grid: int | None = None  # uncoded QPSK/OQPSK: a marker's channel-bit index under the output rotation
        self._pending: int | None = 0 if self.coded else None  # channel index of the next evaluation
        self._scores_at: tuple[int, list] | None = None  # (t, scores) of an evaluation waiting for input
        self._seg_start = 0
        self._dec: ViterbiDecoder | None = None
        self._fed = 0
        self._flushed = False
        self._seg_bits = np.zeros(0, np.uint8)  # decoded bits of the segment from _seg_done on
        self._seg_done = 0  # segment bits already output
        self._bad = 0
        self._holding = False  # no hypothesis stands out: decoded blocks are held back (see Notes)
        self._scored = 0  # segment bits already scored (>= _seg_done while holding)
        self._score_state = 0  # re-encoder memory at _scored
        self.threshold = float("nan")
        self._out_bits: list[np.ndarray] = []
        self._out_pos: list[np.ndarray] = []

    def _take_output(self) -> tuple[np.ndarray, np.ndarray]:
        if len(self._out_bits) == 1:  # the usual case: one piece, handed on as it is
            bits, pos = self._out_bits[0], self._out_pos[0]
        elif self._out_bits:
            bits = np.concatenate(self._out_bits)
            pos = np.concatenate(self._out_pos)
        else:
            bits, pos = np.zeros(0, np.float32), np.zeros(0, np.float64)
        self._out_bits, self._out_pos = [], []
        self._trim()
        self._keep_raw()
        return bits, pos

    def _frontier(self) -> int:
        """Channel index of the first channel bit whose decoded bits have not been output."""
        return self._seg_start + (self._seg_done // self.block_bits) * self._block_symbols

    def _trim(self) -> None:
        if self.marker_rotation:
            keep = self._fed
        elif self._dec is None:
            keep = self._pending if self._pending is not None else self._n_in
        else:
            keep = min(self._frontier(), self._fed)
            if self._pending is not None:
                keep = min(keep, self._pending)
        keep -= keep % 2  # keep rotation pairs whole
        drop = keep - self._raw_base
        if drop > 0:
            self._raw_base += drop
            k = self._soft_kept.size
            if drop <= k:
                self._soft_kept, self._pos_kept = self._soft_kept[drop:], self._pos_kept[drop:]
            else:
                self._soft_new, self._pos_new = self._soft_new[drop - k :], self._pos_new[drop - k :]
                self._soft_kept, self._pos_kept = self._soft_kept[:0], self._pos_kept[:0]

    def _keep_raw(self) -> None:
        """End of a call: the channel bits still needed become owned arrays (the caller's input is let go)."""
        self._soft_kept = np.concatenate((self._soft_kept, self._soft_new))
        self._pos_kept = np.concatenate((self._pos_kept, self._pos_new))
        self._soft_new, self._pos_new = self._soft_kept[:0], self._pos_kept[:0]

    def _soft_pieces(self, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        """Soft channel bits [a, b) (absolute, held) as two views: the kept part, then the current input's."""
        r0, r1, k = a - self._raw_base, b - self._raw_base, self._soft_kept.size
        return self._soft_kept[min(r0, k) : min(r1, k)], self._soft_new[max(r0 - k, 0) : max(r1 - k, 0)]

    def _soft_range(self, a: int, b: int) -> np.ndarray:
        """Soft channel bits [a, b) (absolute, held): a view when they lie in one piece, else joined."""
        head, rest = self._soft_pieces(a, b)
        if not rest.size:
            return head
        return rest if not head.size else np.concatenate((head, rest))

    def _pos_at(self, i: int) -> float:
        """Position of absolute channel bit ``i`` (held)."""
        r, k = i - self._raw_base, self._pos_kept.size
        return float(self._pos_kept[r] if r < k else self._pos_new[r - k])

    def _pos_range(self, a: int, b: int) -> np.ndarray:
        """Positions of absolute channel bits [a, b) (held), as an array of their own."""
        r0, r1, k = a - self._raw_base, b - self._raw_base, self._pos_kept.size
        return np.concatenate((self._pos_kept[min(r0, k) : min(r1, k)], self._pos_new[max(r0 - k, 0) : max(r1 - k, 0)]))

    def _append_raw(self, soft: np.ndarray, position: np.ndarray) -> None:
        """Take the call's input as the second piece of the live window, read in place until the end of the call
        (:meth:`_keep_raw`); memory held between calls is what is still needed."""
        if self._soft_new.size:  # (each call ends with _keep_raw: not reached)
            self._keep_raw()
        self._soft_new, self._pos_new = soft, position

    def _view(self, a: int, b: int, rotation: int) -> np.ndarray:
        """Soft channel bits [a, b) (absolute) with the rotation hypothesis applied."""
        if not rotation:
            return self._soft_range(a, b)
        # rotation 1: (a, b) -> (b, -a), undoes I + jQ -> j (I + jQ); 2: (a, b) -> (a, -b), OQPSK re-paired after
        # 90 degrees, or a mirror image; 3: (a, b) -> (b, a), a mirror image (one pass over both pieces)
        lo, hi = a - a % 2, b + b % 2
        head, rest = self._soft_pieces(lo, hi)
        out = np.empty(head.size + rest.size, dtype=np.float32)
        _kernels.rotated_pairs(head, rest, int(rotation), out)
        return out[a - lo : b - lo]

    def _views(self, a: int, b: int):
        """``view(r)``: soft channel bits [a, b) under rotation ``r`` as a contiguous float32 array, each
        rotation made once however often it is asked for."""
        views: dict[int, np.ndarray] = {}

        def view(r: int) -> np.ndarray:
            if r not in views:
                views[r] = np.ascontiguousarray(self._view(a, b, r), dtype=np.float32)
            return views[r]

        return view

    def _available(self, rotation: int) -> int:
        """One past the last channel index usable under a rotation (pairs must be complete)."""
        return self._n_in - (self._n_in % 2 if rotation else 0)

    def _count_markers(self, soft: np.ndarray, first_only: bool = False) -> int:
        """Markers (either polarity) within 2 bit errors in a block of hard-decided soft bits; with
        ``first_only`` 1 as soon as one is found."""
        m = self._marker.size
        hard = np.empty(soft.size, np.uint8)
        _kernels.hard_decisions(np.ascontiguousarray(soft), hard)
        stop = hard.size - m + 1
        res = np.zeros(2, np.int64)
        count, i = 0, 0
        while i < stop:
            k = _kernels.find_marker(hard, i, stop, self._marker, 2, res)
            if k < 0:
                break
            count += 1
            if first_only:
                break
            i = k + m
        return count

    def _soft_hits(self, soft: np.ndarray, most: int) -> list[int]:
        """Offsets of the first ``most`` markers (either polarity) scoring at least ``marker_threshold``."""
        m = self._marker.size
        stop = soft.size - m + 1
        res = np.zeros(1, np.float64)
        hits: list[int] = []
        i = 0
        while i < stop and len(hits) < most:
            k = _kernels.find_marker_soft(soft, i, stop, self._marker_sign, self.marker_threshold, res)
            if k < 0:
                break
            hits.append(k)
            i = k + m
        return hits

    def _score_near(self, soft: np.ndarray, hits: list[int]) -> float:
        """Sum over ``hits`` of the largest ``|marker score|`` within ``_NEAR`` bits of each."""
        m = self._marker.size
        total = 0.0
        out = np.empty(2 * _NEAR + 1, np.float64)
        for h in hits:
            lo = max(h - _NEAR, 0)
            hi = min(h + _NEAR, soft.size - m)
            if hi < lo:
                continue
            _kernels.marker_scores(soft, lo, hi - lo + 1, self._marker_sign, out)
            total += float(np.max(np.abs(out[: hi - lo + 1])))
        return total

    def _soft_rotation(self, a: int, b: int, rot: int) -> tuple[int, np.ndarray, int]:
        """Soft markers: the rotation for block ``[a, b)``, its rotated soft bits and the markers it was judged on.

        The first :data:`_SOFT_MARKERS` markers under the current rotation (or, with none, the first of
        those every other rotation shows) are scored under every rotation within ``_NEAR`` bits of where they
        were found, and the rotation with the largest sum wins (the current one on a tie).  Found markers
        alone cannot decide: rotated by 90 degrees, the turbo markers correlate with themselves one bit
        off at up to 0.64 of their own score (5.1 of 8.0 for the 64-bit marker, above its threshold of
        4.98 when the signal is strong), so the rotation is chosen by how well it explains the markers.
        """
        view = self._views(a, b)

        hits = self._soft_hits(view(rot), _SOFT_MARKERS)
        if not hits:  # none under the current rotation: the markers every other rotation shows
            found = sorted({h for other in self.rotations if other != rot
                            for h in self._soft_hits(view(other), _SOFT_MARKERS)})
            hits = found[:_SOFT_MARKERS]
        if not hits:
            return rot, view(rot), 0
        best, best_score = rot, self._score_near(view(rot), hits)
        for other in self.rotations:
            if other != rot:
                sc = self._score_near(view(other), hits)
                if sc > best_score:
                    best, best_score = other, sc
        return best, view(best), len(hits)

    def _marker_blocks(self, final: bool) -> None:
        """Uncoded QPSK/OQPSK: per block of ``marker_block_bits`` channel bits, keep the rotation while
        it shows markers; when it shows none and another one does, switch for this block (soft markers:
        :meth:`_soft_rotation`)."""
        Bm = self.marker_block_bits
        while True:
            a = self._fed
            b = min(a + Bm, self._n_in - self._n_in % 2)
            if b - a < Bm and not (final and b > a):
                if final and self._n_in > self._fed:  # a last odd channel bit cannot be rotated: pass it
                    self._out_bits.append(self._soft_range(self._fed, self._n_in).copy())
                    self._out_pos.append(self._pos_range(self._fed, self._n_in))
                    self.stats.bits_out += self._n_in - self._fed
                    self._fed = self._n_in
                return
            rot = self._hyp[1]
            self.stats.blocks += 1
            plan = self._grid_plan(a, b, rot)
            if plan is not None:  # the markers on the CADU grid decide (and find a change inside the block)
                ends = [start for start, _, _ in plan[1:]] + [b - a]
                for (start, r, rotated), end in zip(plan, ends):
                    if r != self._hyp[1]:
                        self._switch(a + start, r, "markers on the CADU grid" + (" from here" if start else ""))
                    piece = rotated[start:end]
                    self._out_bits.append(piece.copy() if r == 0 else piece)
                    self._out_pos.append(self._pos_range(a + start, a + end))
                    self.stats.bits_out += end - start
                self._fed = b
                continue
            if self.correlation == "soft":
                new_rot, block, hits = self._soft_rotation(a, b, rot)
                self.stats.evaluations += 1
                if new_rot != rot:
                    self._switch(a, new_rot, f"soft: judged on {hits} markers")
            else:
                block = self._view(a, b, rot)
                if self._count_markers(block, first_only=True) == 0:
                    self.stats.evaluations += 1
                    for other in self.rotations:
                        if other == rot:
                            continue
                        candidate = self._view(a, b, other)
                        other_hits = self._count_markers(candidate)
                        if other_hits > 0:
                            block = candidate
                            self._switch(a, other, f"uncoded: {other_hits} markers against 0")
                            break
            # unrotated, the block is a view into the input buffer, which is reused: copied then; a rotated one
            # is an array of its own
            self._out_bits.append(block.copy() if self._hyp[1] == 0 else block)
            self._out_pos.append(self._pos_range(a, b))
            self.stats.bits_out += b - a
            self._fed = b

    def _near_scores(self, soft: np.ndarray, places: list[int]) -> list[tuple[float, int]]:
        """At each place, the largest ``|marker score|`` within ``_NEAR`` bits and its offset (one kernel call:
        :func:`~pipeline.sync._kernels.near_marker_scores`)."""
        at = np.asarray(places, dtype=np.int64)
        scores = np.empty(at.size, np.float64)
        offsets = np.empty(at.size, np.int64)
        _kernels.near_marker_scores(soft, at, _NEAR, self._marker_sign, scores, offsets)
        return list(zip(scores.tolist(), offsets.tolist()))

    def _grid_plan(self, a: int, b: int, rot: int) -> list[tuple[int, int, np.ndarray]] | None:
        """The rotations of block ``[a, b)`` from its markers on the CADU grid (class Notes), or None (no verdict).

        Returns ``[(start, rotation, the block under it), ...]`` (``start`` even, relative to ``a``; one or two
        pieces).  The places looked at are one marker period apart on the grid of the last marker seen
        (``_grid``, absolute): a hit off the grid (noise, or a rotated marker resembling itself one bit off)
        cannot move them.  Where the grid shows no marker at two places or more to the block's end (channel
        bits lost or gained, as samples dropped do; at the start, no grid yet), the first hit under any
        rotation after its last marker starts a new grid there.  At each place the rotation scoring highest,
        when at or over the threshold, is that place's; the block is one rotation when its places (two or more)
        agree, two when the ones before a run of at least two places of another rotation at its end are all
        ``rot``'s (the output switches at the run's first marker); else no verdict.  Updates ``_grid``.
        """
        P = self.marker_period_bits
        m = self._marker.size
        n = b - a
        if P is None or n < 3 * P:
            return None
        view = self._views(a, b)

        grids: list[dict] = []  # each grid's scores per rotation at its places

        def marks_from(anchor: int) -> tuple[list[tuple[int, int, int, int]], int]:
            """(rotation, offset, grid, place) of the places from ``anchor`` with a marker, and the first place
            after the last of them."""
            places = list(range(anchor, n - m + 1, P))
            scores = {r: self._near_scores(view(r), places) for r in self.rotations}
            grids.append(scores)
            marks, after = [], anchor
            for i, p in enumerate(places):
                r = max(self.rotations, key=lambda q: scores[q][i][0])  # (the first of equals: the list's order)
                if scores[r][i][0] >= thr:
                    marks.append((r, scores[r][i][1], len(grids) - 1, i))
                    after = p + P
            return marks, after

        def first_hit(start: int) -> int | None:
            # within three periods: a new grid that is to show two markers shows its first there (the search costs
            # a marker's length per offset, and the rest of a block under four rotations took 1.3 ms)
            stop = start + 3 * P + m
            firsts = [start + h for r in self.rotations for h in self._soft_hits(view(r)[start:stop], 1)]
            return min(firsts) if firsts else None

        thr = self.marker_threshold
        marks: list[tuple[int, int, int, int]] = []
        after = 0
        if self._grid is not None:
            marks, after = marks_from((self._grid - a) % P)
        if n - m + 1 - after > P:  # two places or more without a marker to the end: look for a new grid
            anchor = first_hit(max(after - P + m, 0) if marks else 0)
            if anchor is not None:
                more, _ = marks_from(anchor)
                more = [mk for mk in more if not marks or mk[1] > marks[-1][1]]
                if len(more) >= 2:  # (one hit off the grid is noise, or a rotated marker one bit off)
                    marks += more
        if len(marks) < 2:
            return None
        self._grid = a + marks[-1][1]
        last = marks[-1][0]
        j = len(marks) - 1
        while j > 0 and marks[j - 1][0] == last:
            j -= 1
        if len(marks) - j < 2:
            return None
        if j == 0:
            return [(0, last, view(last))]
        if last != rot and all(mk[0] == rot for mk in marks[:j]):
            # the change lies between the last marker of the old rotation and the first of the new one; places
            # between them (markers missed under both, at low Es/N0) go to the new one from the first where it
            # scores higher, below the threshold as they are
            cut = marks[j][1]
            if marks[j - 1][2] == marks[j][2]:
                scores = grids[marks[j][2]]
                for q in range(marks[j - 1][3] + 1, marks[j][3]):
                    if scores[last][q][0] > scores[rot][q][0]:
                        cut = scores[last][q][1]
                        break
            cut -= cut % 2  # rotations act on pairs (a is even)
            return [(0, rot, view(rot)), (cut, last, view(last))] if cut > 0 else [(0, last, view(last))]
        return None

    def _switch(self, a: int, rot: int, why: str) -> None:
        """Take rotation ``rot`` from channel bit ``a`` on (uncoded QPSK/OQPSK), with its event."""
        self._hyp = (0, rot)
        self.stats.switches += 1
        self.events.append(SyncEvent(kind="branch_selected", bit_index=self.stats.bits_out,
                                     position=self._pos_at(a),
                                     detail=f"rotation {self._rotation_text(rot)} ({why})"))

    def _run(self, final: bool) -> None:
        while True:
            if self._pending is not None:
                if not self._evaluate(self._pending, final):
                    return
                continue
            if not self._track(final):
                return

    def _rotation_text(self, rot: int) -> str:
        return _ROTATION_TEXT.get(self.modulation, {0: "none"})[rot]

    def _signal_present(self, a: int, b: int) -> bool:
        """The presence gate: real M2M4 ``S / M2`` of the soft channel bits [a, b) at least 0.35."""
        x = self._soft_range(a, b).astype(np.float64)
        if x.size < 64:
            return True
        x2 = x * x
        m2 = float(x2.sum()) / x.size
        if m2 <= 0.0:
            return False
        m4 = float(np.dot(x2, x2)) / x.size
        s = math.sqrt(max(0.0, 0.5 * (3.0 * m2 * m2 - m4)))
        return s >= _PRESENCE_MIN * m2

    def _evaluate(self, t: int, final: bool) -> bool:
        """Score every hypothesis on the window starting at channel index t; False if it needs more input."""
        P = self.period_symbols
        need = t + (self._acquire_periods + 1) * P + 1
        if need > self._n_in and not final:
            return False
        self._pending = None
        present = None  # the signal-presence gate, computed at most once
        if self._holding:
            present = self._signal_present(t, min(need, self._n_in))
            if not present:
                self.stats.quiet_evaluations += 1
                return True  # still nothing to decide on: the held blocks go on aging
        if self._scores_at is not None and self._scores_at[0] == t:
            scores = self._scores_at[1]  # the same window, scored while waiting for the markers' input
        else:
            scores = self._score_hypotheses(t)
        if not np.isfinite(max(scores)):
            # only at the end of the stream: too little left to judge.  Keep the current hypothesis;
            # without one, the remaining channel bits cannot be decoded.
            if self._dec is None:
                self.stats.channel_bits_discarded += max(0, self._n_in - t)
            self._holding = False
            return True
        self.stats.evaluations += 1
        order = np.argsort(-np.asarray(scores), kind="stable")
        best = int(order[0])
        runner_up = float(scores[order[1]]) if len(scores) > 1 else float(scores[best]) - 0.1
        if not np.isfinite(runner_up):
            runner_up = float(scores[best]) - 0.1
        hyp = self.hypotheses[best]
        decided = float(scores[best]) - runner_up >= _MIN_MARGIN[self.rate]
        by_markers = False
        if not decided and self.marker_period_bits is not None:
            twins = [int(i) for i in order if scores[int(i)] > float(scores[best]) - _MIN_MARGIN[self.rate]]
            if 2 <= len(twins) <= _MAX_TWINS:
                if present is None:
                    present = self._signal_present(t, min(need, self._n_in))
            if 2 <= len(twins) <= _MAX_TWINS and present:
                verdict = self._markers_decide(t, twins, final)
                if verdict is None:
                    self._pending = t  # more input is needed to decode two marker periods
                    self._scores_at = (t, scores)
                    return False
                if verdict >= 0:
                    best, decided, by_markers = verdict, True, True
                    hyp = self.hypotheses[best]
                    self.stats.marker_decisions += 1
                    runner_up = max(float(scores[i]) for i in twins if i != best)
        if not decided:
            # no hypothesis stands out (noise, a fade): the running decoder (at the start the best
            # hypothesis) goes on, its output held back; the hypotheses are evaluated again every block
            self.threshold = float("inf")
            self.stats.undecided_evaluations += 1
            self._holding = True
            if self._dec is not None:
                return True
        else:
            self.threshold = 0.5 * (float(scores[best]) + runner_up)
            self._holding = False
        if hyp == self._hyp and self._dec is not None:
            return True  # same hypothesis: the running decoder continues without a break (held blocks go out)
        # a new segment starts at the first channel bit not yet output (t, unless blocks were held back:
        # they are decoded again under the new hypothesis); the old segment's bits from there are dropped
        start = t if self._dec is None else min(t, self._frontier())
        if start < t:
            self.stats.redecoded_bits += t - start
        off, rot = hyp
        self._hyp = hyp
        self._seg_start = start + (off - start) % P
        self.stats.channel_bits_discarded += self._seg_start - start
        self._dec = ViterbiDecoder(rate=self.rate, traceback_depth=self.traceback_depth,
                                   g2_inverted=self.g2_inverted)
        self._score_state = 0
        self._fed = self._seg_start
        self._flushed = False
        self._seg_bits = np.zeros(0, np.uint8)
        self._seg_done = 0
        self._scored = 0
        self._bad = 0
        self.stats.switches += 1
        # (at the very end of a stream the segment may start after the last bit: use the last position)
        pos = self._pos_at(min(self._seg_start, self._n_in - 1))
        self.events.append(
            SyncEvent(
                kind="branch_selected",
                bit_index=self.stats.bits_out,
                position=pos,
                detail=(f"offset {off}, rotation {self._rotation_text(rot)}, metric {scores[best]:.4f} vs "
                        f"{runner_up:.4f}" + (" (undecided)" if not decided else
                                              " (decided by the markers in the decoded bits)" if by_markers else "")),
            )
        )
        return True

    def _score_hypotheses(self, t: int) -> list[float]:
        """Every hypothesis's metric on the window from channel index ``t`` (-inf where too little is left)."""
        P = self.period_symbols
        min_periods = 4 * _GUARD_PERIODS
        scores = []
        for off, rot in self.hypotheses:
            s0 = t + (off - t) % P
            periods = min(self._acquire_periods, (self._available(rot) - s0) // P)
            if periods < min_periods:
                scores.append(-np.inf)
                continue
            soft = self._view(s0, s0 + periods * P, rot)
            inv = self.g2_inverted
            code = conv_encode(viterbi_decode(soft, self.rate, traceback_depth=self.traceback_depth, g2_inverted=inv),
                               self.rate, g2_inverted=inv)
            g = _GUARD_PERIODS * P
            scores.append(branch_metric(soft[g : periods * P - g], code[g : periods * P - g]))
        return scores

    def _markers_decide(self, t: int, twins: list[int], final: bool) -> int | None:
        """Index of the hypothesis among ``twins`` whose decoded bits hold the most markers, -1 when none
        stands out, None when the input does not yet hold two marker periods past ``t``."""
        P, kp = self.period_symbols, self.period_bits
        periods = -(-(2 * self.marker_period_bits + len(self._marker)) // kp) + 2 * _GUARD_PERIODS
        starts = []
        for i in twins:
            off, rot = self.hypotheses[i]
            s0 = t + (off - t) % P
            have = (self._available(rot) - s0) // P
            if have < periods and not final:
                return None  # (before any decoding: the call is made again with more input)
            starts.append((s0, rot, min(periods, have)))
        counts = []
        for s0, rot, n in starts:
            if n < 4 * _GUARD_PERIODS:
                return -1
            bits = viterbi_decode(self._view(s0, s0 + n * P, rot), self.rate, traceback_depth=self.traceback_depth,
                                  g2_inverted=self.g2_inverted)
            if self.nrz_m:
                bits = bits[1:] ^ bits[:-1]
            counts.append(self._count_markers(1.0 - 2.0 * bits.astype(np.float32)))
        top = max(counts)
        if top == 0 or counts.count(top) > 1:
            return -1
        return twins[counts.index(top)]

    def _track(self, final: bool) -> bool:
        """Decode, score and output; False when nothing more can be done with the input at hand."""
        if self._dec is None:
            return False
        rot = self._hyp[1]
        end = self._available(rot)
        if end > self._fed:
            new = self._dec.process(self._view(self._fed, end, rot))
            self._fed = end
            if new.size:
                self._seg_bits = np.concatenate((self._seg_bits, new)) if self._seg_bits.size else new
        if final and not self._flushed:
            tail = self._dec.flush()
            self._flushed = True
            self.stats.channel_bits_discarded += self._n_in - self._fed
            if tail.size:
                self._seg_bits = np.concatenate((self._seg_bits, tail))
        B, Bs = self.block_bits, self._block_symbols
        have = self._seg_done + self._seg_bits.size  # segment bits decoded so far
        # score the complete blocks not scored yet (at the end of the stream, the partial last block too)
        n_blocks = (have - self._scored) // B
        partial = final and self._flushed and (have - self._scored) % B
        if partial:
            n_blocks += 1
        evaluate_at = None
        if n_blocks:
            n_bits = min(n_blocks * B, have - self._scored)
            a = self._seg_start + (self._scored // B) * Bs
            n_sym = (n_bits // self.period_bits) * self.period_symbols + self._symbols_before[n_bits % self.period_bits]
            if rot:
                head, rest = np.ascontiguousarray(self._view(a, a + n_sym, rot)), self._soft_kept[:0]
            else:  # in place, in the two pieces they are held in
                head, rest = self._soft_pieces(a, a + n_sym)
            metrics = np.empty(n_blocks, np.float64)
            states = np.empty(n_blocks, np.int64)
            r = self._scored - self._seg_done
            _kernels.reencode_metrics(self._seg_bits[r : r + n_bits], self._score_state, _G1_MASK, _G2_MASK,
                                      int(self.g2_inverted), self._keep1, self._keep2, _PARITY, head, rest, B,
                                      metrics, states)
            used = n_blocks
            values = metrics.tolist()  # (Python floats: no numpy scalar per block)
            judged = n_blocks - 1 if partial else n_blocks  # the last, partial block at the end: output, not judged
            for j in range(judged):
                self.stats.blocks += 1
                self.stats.last_metric = values[j]
                if self._holding:
                    used = j + 1  # while undecided, the hypotheses are evaluated again after every block
                    evaluate_at = a + used * Bs
                    break
                if values[j] < self.threshold:
                    self.stats.blocks_below_threshold += 1
                    self._bad += 1
                else:
                    self._bad = 0
                if self._bad >= self.patience:
                    self._bad = 0
                    self.stats.monitor_triggers += 1
                    used = j + 1
                    evaluate_at = a + used * Bs
                    break
            self._scored += min(used * B, n_bits)
            self._score_state = int(states[used - 1])
        # output: everything scored, except while holding (then only what is older than the hold allows)
        out_to = self._scored
        if self._holding:
            out_to = max(self._seg_done, self._scored - _HOLD_BLOCKS * B)
            out_to -= (out_to - self._seg_done) % B
        if final and self._flushed and evaluate_at is None:
            out_to = have  # the end of the stream: whatever was held goes out (the best guess there is)
        n_out = out_to - self._seg_done
        if n_out > 0:
            a = self._frontier()
            signs, pos = np.empty(n_out, np.float32), np.empty(n_out, np.float64)
            _kernels.branch_output(self._seg_bits[:n_out], self._pos_kept, self._pos_new, a - self._raw_base,
                                   self._period_index, self.period_symbols, signs, pos)
            self._out_bits.append(signs)
            self._out_pos.append(pos)
            self.stats.bits_out += n_out
            self._seg_bits = self._seg_bits[n_out:]
            self._seg_done += n_out
        if evaluate_at is not None:
            self._pending = evaluate_at
            return True
        return False
