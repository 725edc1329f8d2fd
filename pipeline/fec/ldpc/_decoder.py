"""Layered min-sum decoding of the CCSDS LDPC codes in fixed point (int16 posteriors, int8 messages)."""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np

from pipeline.fec._args import check_choice
from pipeline.fec.ldpc._codes import LdpcCode, expurgation_failures, parity_check
from pipeline.fec.ldpc._kernels import (
    LDPC_LANES,
    LDPC_MAX_ROW_WEIGHT,
    ldpc_decode_scalar_kernel,
    ldpc_decode_vector_kernel,
)

__all__ = ["LdpcDecoder", "LdpcResult", "ldpc_decode", "MinSumVariant", "MIN_SUM_VARIANTS"]

MinSumVariant = Literal["normalized", "offset"]
MIN_SUM_VARIANTS: tuple[str, ...] = get_args(MinSumVariant)
Kernel = Literal["vector", "scalar"]

#: Default magnitude correction per variant: normalized min-sum scales by 12/16 = 0.75, offset
#: min-sum subtracts 0.5 (in LLR units).  Chosen by the measurements in bench/sweep_ldpc.py.
DEFAULT_CORRECTION = {"normalized": 0.75, "offset": 0.5}
#: Quantisation steps per LLR unit: int8 messages then saturate at 127 / 4 = 31.75.
DEFAULT_LLR_SCALE = 4.0
#: Channel values are clipped to +-this many steps before decoding (leaves the posteriors room to grow).
DEFAULT_LLR_CLIP = 63
#: Busy lanes at or below which the vector kernel hands the last codewords to the scalar kernel (a
#: scalar iteration costs about as much as a vector one on all lanes: 150 against 190 us for C2).
DEFAULT_TAIL_LANES = 1


@dataclass(frozen=True, eq=False)
class LdpcResult:
    """What :class:`LdpcDecoder` returns for a batch of codewords (one row per codeword).

    Attributes
    ----------
    frames : numpy.ndarray of uint8, shape (codewords, k / 8)
        The decoded information bits packed MSB first: one transfer frame per codeword.  For a
        failed codeword these are the decoder's last hard decisions (not a valid codeword).
    ok : numpy.ndarray of bool, shape (codewords,)
        True where the final syndrome is zero; False = failed (frame status ``ldpc_failed``).
    iterations : numpy.ndarray of int32
        Iterations run (1..max_iterations; the syndrome is checked after each).
    syndrome_weight : numpy.ndarray of int32
        Unsatisfied parity checks of the code after the last iteration (0 where ``ok``): the rows of H,
        and for C2 also the two expurgation checks of the (8176,7154) subcode
        (:func:`~pipeline.fec.ldpc.expurgation_failures`), which H alone does not hold.
    corrected_bits : numpy.ndarray of int32
        Sent bits whose decoded value differs from the sign of the soft input (an estimate of the
        channel bit errors where ``ok``).
    codewords : numpy.ndarray of uint8, shape (codewords, n / 8)
        The decided sent bits packed MSB first (``frames`` is its first k / 8 octets; C2's two
        extension bits are 0).
    """

    frames: np.ndarray
    ok: np.ndarray
    iterations: np.ndarray
    syndrome_weight: np.ndarray
    corrected_bits: np.ndarray
    codewords: np.ndarray | None = None

    def __len__(self) -> int:
        return int(self.ok.shape[0])

    @property
    def failed(self) -> int:
        """Number of failed codewords."""
        return int(np.count_nonzero(~self.ok))


def _check_number(name, value, rule, ok):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"Argument '{name}' must be a number {rule}, not {value!r}.")
    if not (np.isfinite(value) and ok(value)):
        raise ValueError(f"Argument '{name}' must be {rule}, not {value!r}.")
    return value


@functools.cache
def _lane_columns(code: LdpcCode, lanes: int) -> np.ndarray:
    cols = (parity_check(code).cols.astype(np.int64) * lanes).astype(np.int32)
    cols.flags.writeable = False
    return cols


class LdpcDecoder:
    """Layered (row-serial) min-sum decoder of one CCSDS LDPC code in fixed point.

    Parameters
    ----------
    code : LdpcCode
        From :func:`pipeline.fec.ldpc.ldpc_code` (a profile's ``ldpc``, ``ldpc_rate``, ``ldpc_k``).
    max_iterations : int
        Iterations at most per codeword, 1..1000 (profile ``ldpc_max_iterations``).
    variant : {"normalized", "offset"}
        Check-node magnitude correction: multiply by ``correction`` (a multiple of 1/16 in
        (0, 1]) or subtract ``correction`` (LLR units, a multiple of ``1 / llr_scale``, >= 0).
    correction : float, optional
        Default 0.75 (normalized) or 0.5 (offset).
    llr_scale : float
        Quantisation steps per LLR unit, 0.25..64.
    llr_clip : int
        Channel values are clipped to +-``llr_clip`` steps, 1..127.
    kernel : {"vector", "scalar"}
        "vector": 32 or 64 codewords side by side in SIMD lanes (LLVM vector code);
        "scalar": the one-codeword-at-a-time reference kernel.  Both give identical results.
    lanes : {32, 64}
        Codewords side by side in the vector kernel.

    Notes
    -----
    Soft input: one float32 log-likelihood ratio per sent bit, ``ln P(0)/P(1)`` (positive = bit
    0; for BPSK on AWGN ``2 y / sigma^2`` with unit amplitude), 0 = erasure.  The decoder maps
    it onto the variables of H: C2's 18 shortened bits enter as certain zeros (+32767), its two
    extension bits (sent bits 8158, 8159) are not in H and are ignored; AR4JA's M punctured
    variables enter as 0 (erasures).  Values are quantised to ``round(llr x llr_scale)``,
    clipped to +-``llr_clip``; posteriors are int16 (they never saturate: channel value plus at most
    6 messages), check-to-variable messages int8 (magnitudes from ``min(|Q|, 127)``).

    Each iteration updates the rows of H in order (layered belief propagation, min-sum
    check-node rule with the correction above); after every iteration the syndrome of the hard
    decisions is computed and the codeword stops when it is zero (early termination) or after
    ``max_iterations``.  A codeword whose final syndrome is not zero is reported failed in
    :class:`LdpcResult` (never raised).  C2: H holds the basic (8176,7156) code, so a decoded word
    is also checked against the two expurgation checks of the sent subcode (a per-block parity
    test, :func:`~pipeline.fec.ldpc.expurgation_failures`); one that fails them counts in the
    syndrome weight and is a failed codeword.  Normalized is the default: it is invariant to the scale
    of the soft input (up to quantisation), so an Es/N0 estimate that is off by a factor costs
    little, whereas the offset variant's subtraction assumes calibrated LLRs; bench/sweep_ldpc.py
    measures both.  Cost: about 3 passes over the edges of H per iteration (32704 edges for C2);
    the vector kernel does them for W codewords at once.

    State: counters only (``codewords``, ``failed``, ``iterations_total``); codewords are
    independent, so any split of a batch gives the same results.  The work space (1-2 MB, made on
    the first call) belongs to the instance: use one decoder per thread.  Batches of many codewords
    keep the lanes full; a single codeword goes to the scalar kernel (about 15x slower per bit).

    References
    ----------
    M. P. C. Fossorier, M. Mihaljevic, H. Imai, "Reduced complexity iterative decoding of
    low-density parity check codes based on belief propagation", IEEE Trans. Commun. 47(5), 1999
    (min-sum); J. Chen, M. P. C. Fossorier, "Near optimum universal belief propagation based
    decoding of low-density parity check codes", IEEE Trans. Commun. 50(3), 2002 (normalized
    and offset corrections); D. E. Hocevar, "A reduced complexity decoder architecture via
    layered decoding of LDPC codes", IEEE SiPS 2004 (layered schedule); all from memory, not
    confirmed.  CCSDS 130.1-G-2 sec. 8 (stopping rule: all checks satisfied or a maximum count).

    Examples
    --------
    >>> from pipeline.fec.ldpc import ldpc_code, ldpc_encode
    >>> code = ldpc_code("ar4ja", rate="1/2", k=1024)
    >>> word = np.unpackbits(ldpc_encode(code, bytes(range(128))))
    >>> llr = np.where(word == 0, 4.0, -4.0).astype(np.float32)
    >>> llr[:100] *= -1                       # 100 bit errors
    >>> res = LdpcDecoder(code=code).decode(llr)
    >>> bool(res.ok[0]), res.frames[0].tobytes() == bytes(range(128)), int(res.corrected_bits[0])
    (True, True, 100)
    """

    def __init__(self, *, code: LdpcCode, max_iterations: int = 50, variant: MinSumVariant = "normalized",
                 correction: float | None = None, llr_scale: float = DEFAULT_LLR_SCALE,
                 llr_clip: int = DEFAULT_LLR_CLIP, kernel: Kernel = "vector", lanes: int = 32):
        if not isinstance(code, LdpcCode):
            raise TypeError(f"Argument 'code' must be an LdpcCode (see ldpc_code), not {type(code).__name__}.")
        if isinstance(max_iterations, (bool, np.bool_)) or not isinstance(max_iterations, (int, np.integer)) \
                or not 1 <= max_iterations <= 1000:
            raise ValueError(f"Argument 'max_iterations' must be an integer 1..1000, not {max_iterations!r}.")
        variant = check_choice("variant", variant, MIN_SUM_VARIANTS)
        kernel = check_choice("kernel", kernel, get_args(Kernel))
        if lanes not in LDPC_LANES or isinstance(lanes, bool):
            raise ValueError(f"Argument 'lanes' must be one of {', '.join(map(str, LDPC_LANES))}, not {lanes!r}.")
        llr_scale = float(_check_number("llr_scale", llr_scale, "in 0.25..64", lambda v: 0.25 <= v <= 64))
        if isinstance(llr_clip, (bool, np.bool_)) or not isinstance(llr_clip, (int, np.integer)) \
                or not 1 <= llr_clip <= 127:
            raise ValueError(f"Argument 'llr_clip' must be an integer 1..127, not {llr_clip!r}.")
        correction = DEFAULT_CORRECTION[variant] if correction is None else correction
        if variant == "normalized":
            _check_number("correction", correction, "a multiple of 1/16 in (0, 1]",
                          lambda v: 0 < v <= 1 and float(v * 16).is_integer())
            alpha16, beta = int(round(correction * 16)), 0
        else:
            _check_number("correction", correction, f"a multiple of 1/llr_scale (1/{llr_scale:g}), >= 0",
                          lambda v: v >= 0 and float(v * llr_scale).is_integer() and v * llr_scale <= 127)
            alpha16, beta = 16, int(round(correction * llr_scale))
        h = parity_check(code)
        width = int(np.diff(h.row_start).max())
        if width > LDPC_MAX_ROW_WEIGHT:  # pragma: no cover - no CCSDS code comes near
            raise ValueError(f"{code.name}: rows of weight {width} exceed {LDPC_MAX_ROW_WEIGHT}")
        self.code = code
        self.max_iterations = int(max_iterations)
        self.variant = variant
        self.correction = float(correction)
        self.llr_scale = llr_scale
        self.llr_clip = int(llr_clip)
        self.kernel = kernel
        self.lanes = int(lanes)
        self._alpha16 = alpha16
        self._beta = beta
        self._h = h
        self._cols_w = _lane_columns(code, self.lanes)
        self._work = None
        self.reset()

    def reset(self) -> None:
        """Zero the counters (the decoder keeps nothing else between calls)."""
        self.codewords = 0
        self.failed = 0
        self.iterations_total = 0

    def _buffers(self):
        if self._work is None:  # allocated on first decode: 1-2 MB for the vector kernel
            h, lanes = self._h, self.lanes
            vec = self.kernel == "vector"
            self._work = dict(
                post=np.zeros(h.n_cols * lanes if vec else 0, np.int16),
                msg=np.zeros(h.n_edges * lanes if vec else 0, np.int8),
                fresh=np.zeros(lanes, np.int8), weight=np.zeros(lanes, np.int32),
                lane_cw=np.zeros(lanes, np.int64), lane_it=np.zeros(lanes, np.int64),
                p1=np.zeros(h.n_cols, np.int16), m1=np.zeros(h.n_edges, np.int8),
                qbuf=np.zeros(LDPC_MAX_ROW_WEIGHT, np.int64), qtmp=np.zeros(h.n_cols, np.int8))
        return self._work

    def _as_llr(self, llr) -> np.ndarray:
        arr = np.asarray(llr)
        if arr.ndim not in (1, 2) or arr.shape[-1] != self.code.n:
            raise ValueError(f"Argument 'llr' must hold {self.code.n} values per codeword ({self.code.name}), "
                             f"not shape {arr.shape}.")
        if not np.issubdtype(arr.dtype, np.floating):
            raise TypeError(f"Argument 'llr' must be a float array (float32, + = bit 0), not dtype {arr.dtype}.")
        arr = np.ascontiguousarray(np.atleast_2d(arr), dtype=np.float32)
        # min and max propagate NaN and reach +-Inf: both finite exactly when every value is
        if arr.size and not (np.isfinite(arr.min()) and np.isfinite(arr.max())):
            raise ValueError("Argument 'llr' must hold finite values, not NaN or Inf.")
        return arr

    def decode(self, llr) -> LdpcResult:
        """Decode one codeword (shape (n,)) or many (shape (codewords, n)).

        Parameters
        ----------
        llr : array_like of float
            Log-likelihood ratios of the ``code.n`` sent bits per codeword (de-randomized, in
            transmission order), positive = bit 0.

        Returns
        -------
        LdpcResult
            Always 2-D: one row per codeword.
        """
        llr = self._as_llr(llr)
        n_cw = llr.shape[0]
        code, h, w = self.code, self._h, self._buffers()
        words = np.zeros((n_cw, (code.n + 7) // 8), np.uint8)
        iters = np.zeros(n_cw, np.int32)
        weight = np.zeros(n_cw, np.int32)
        flips = np.zeros(n_cw, np.int32)
        common = (llr, code.sent_vars, self.llr_scale, self.llr_clip, code.head_zeros, h.row_start, h.cols)
        if self.kernel == "vector":
            ldpc_decode_vector_kernel(*common, self._cols_w, self.max_iterations, self._alpha16, self._beta,
                                      DEFAULT_TAIL_LANES, w["post"], w["msg"], w["fresh"], w["weight"], w["lane_cw"],
                                      w["lane_it"], w["p1"], w["m1"], w["qbuf"], w["qtmp"], words, iters, weight,
                                      flips)
        else:
            ldpc_decode_scalar_kernel(*common, self.max_iterations, self._alpha16, self._beta, w["p1"], w["m1"],
                                      w["qbuf"], w["qtmp"], words, iters, weight, flips)
        weight += expurgation_failures(code, words)
        ok = weight == 0
        self.codewords += n_cw
        self.failed += int(np.count_nonzero(~ok))
        self.iterations_total += int(iters.sum())
        return LdpcResult(frames=np.ascontiguousarray(words[:, :code.frame_octets]), ok=ok, iterations=iters,
                          syndrome_weight=weight, corrected_bits=flips, codewords=words)

    process = decode


def ldpc_decode(code: LdpcCode, llr, *, max_iterations: int = 50, variant: MinSumVariant = "normalized",
                correction: float | None = None, kernel: Kernel = "vector") -> LdpcResult:
    """Decode LDPC codewords: the function form of :class:`LdpcDecoder` (same arguments and result).

    Examples
    --------
    >>> from pipeline.fec.ldpc import ldpc_code, ldpc_encode
    >>> code = ldpc_code("c2")
    >>> word = np.unpackbits(ldpc_encode(code, bytes(892)))
    >>> res = ldpc_decode(code, np.where(word == 0, 3.0, -3.0).astype(np.float32))
    >>> bool(res.ok[0]), int(res.iterations[0])
    (True, 1)
    """
    return LdpcDecoder(code=code, max_iterations=max_iterations, variant=variant, correction=correction,
                       kernel=kernel).decode(llr)
