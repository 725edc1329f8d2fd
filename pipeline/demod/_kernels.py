"""Numba kernels of the demodulator.  Wrappers in ``_demodulator.py`` validate, cast and allocate.

Every function here is a module-level ``@njit(cache=True)`` with all parameters as arguments, and
gives the same answer with ``NUMBA_DISABLE_JIT=1``, but for the symbol tracker's rounding: its kernels
(``track_symbols`` and what it calls) let the compiler fuse a multiply and an add into one operation
(``_TRACK_FASTMATH``), which plain Python does not, so compiled and uncompiled tracking agree to within a
few units in the last place per operation, not bit for bit.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = [
    "cancel_tones",
    "iq_sums",
    "remove_image",
    "mirror_sums",
    "condition_block",
    "phasor_table",
    "derotate",
    "fir_interleaved",
    "dechirped_sum",
    "power_block_sums",
    "track_symbols",
    "track_each",
    "track_locked",
    "batch_strobes",
    "BATCH_CELLS",
    "BATCH_MAX",
    "soft_costas_error",
    "hard_costas_slope",
    "costas_slope",
    "hard_costas_squaring_loss",
    "nrzm_decode",
    "moments_m2m4",
    "mean_power_nonzero",
    "moment_sums",
    "moment_means",
    "remove_dc",
    "block_summary",
    "BLOCK_SUMMARY",
    "TRACK_PARAMS",
    "TRACK_STATE",
]

#: LLVM fast-math flags of the symbol tracker's kernels: contraction of a multiply and an add into one fused
#: multiply-add only (no reassociation, no assumption about NaN or Inf).  With the cubic's weights in single
#: precision: 1.11x (QPSK link) and 1.15x (demo) on bench/bench_track_replay.py's calls; rounding changed,
#: implementation loss unchanged (DEVELOPERS.md).
_TRACK_FASTMATH = {"contract"}

#: Parameters of :func:`track_symbols` (one record; meanings in its docstring).
TRACK_PARAMS = np.dtype([
    ("sps", np.float64), ("kp_t", np.float64), ("ki_t", np.float64), ("kp_c", np.float64), ("ki_c", np.float64),
    ("kr_c", np.float64), ("kp_c_wide", np.float64), ("stat_symbols", np.float64), ("l_amp", np.float64),
    ("l_lock_c", np.float64), ("l_lock_s", np.float64), ("c_on", np.float64), ("c_off", np.float64),
    ("c_min", np.float64), ("s_on", np.float64), ("s_off", np.float64), ("s_min", np.float64), ("r0", np.float64),
    ("kd", np.float64), ("warmup", np.float64), ("hbox", np.float64), ("v_max", np.float64), ("dd_gain", np.float64),
    ("t_ref_esn0", np.float64), ("t_min_scale", np.float64), ("c_bn", np.float64), ("c_loop_snr", np.float64),
    ("gear_symbols", np.float64), ("c_hold", np.float64), ("pull_symbols", np.float64), ("l_lock_slow", np.float64),
    ("c_on_slow", np.float64), ("c_min_slow", np.float64), ("c_hold_slow", np.float64), ("slow_esn0", np.float64),
    ("soft_below", np.float64), ("c_min_scale", np.float64), ("ct_db0", np.float64), ("ct_step", np.float64),
    ("c_mag", np.float64), ("batch", np.float64),
])

#: Loop state of :func:`track_symbols` (one record, updated in place; meanings in its docstring).
TRACK_STATE = np.dtype([
    ("t", np.float64), ("v_int", np.float64), ("theta", np.float64), ("w_int", np.float64), ("w_rate", np.float64),
    ("p1r", np.float64), ("p1i", np.float64), ("p2r", np.float64), ("p2i", np.float64), ("p3r", np.float64),
    ("p3i", np.float64), ("q1r", np.float64), ("q1i", np.float64), ("q3r", np.float64), ("q3i", np.float64),
    ("t_on", np.float64), ("parity", np.int64), ("pend_ec", np.float64), ("pend_et", np.float64),
    ("m2s", np.float64), ("m4s", np.float64), ("wsum", np.float64), ("cnum", np.float64), ("cden", np.float64),
    ("m2f", np.float64), ("m4f", np.float64), ("wf", np.float64), ("cnum_i", np.float64), ("eon", np.float64),
    ("emid", np.float64),
    ("amp", np.float64), ("inv_amp", np.float64), ("kdc", np.float64), ("t_scale", np.float64),
    ("c_scale", np.float64), ("lock_age", np.int64), ("clock", np.int64), ("slock", np.int64),
    ("seen", np.int64), ("cgood", np.int64),
    ("acc_n", np.int64), ("stat_epoch", np.int64), ("acc_r2", np.float64), ("acc_r4", np.float64),
    ("acc_q", np.float64), ("acc_qi", np.float64),
    ("acc_mid", np.float64), ("blk_n", np.int64), ("blk_m2", np.float64), ("blk_m4", np.float64),
    ("ph_cos", np.float64), ("ph_sin", np.float64), ("ph_theta", np.float64), ("ph_count", np.int64),
    ("pull_left", np.int64), ("m2g", np.float64), ("m4g", np.float64), ("wg", np.float64), ("cnum_g", np.float64),
    ("cgood_g", np.int64), ("lock_path", np.int64), ("a_soft", np.float64), ("c_clip", np.float64),
    ("soft_on", np.int64),
    ("b_nb", np.int64), ("b_j", np.int64), ("b_t0", np.float64), ("b_half", np.float64), ("b_w", np.float64),
    ("b_cw", np.float64), ("b_sw", np.float64), ("b_c", np.float64), ("b_s", np.float64), ("b_ec", np.float64),
    ("b_et", np.float64),
])


@njit(cache=True, nogil=True)
def derotate(x, gain, phase0_rad, dphase_rad, resync_every, out):
    """``out[n] = gain * x[n] * exp(-j (phase0 + n dphase))``; returns the phase after the last sample.

    The phasor is advanced by one complex multiply per sample and recomputed exactly from the
    phase every ``resync_every`` samples, so rounding cannot accumulate and the result depends
    only on the block, not on how the caller split the stream.
    """
    n = x.shape[0]
    wc = math.cos(dphase_rad)
    ws = math.sin(dphase_rad)
    c = 1.0
    s = 0.0
    for i in range(n):
        if i % resync_every == 0:
            ph = phase0_rad + dphase_rad * i
            c = math.cos(ph)
            s = math.sin(ph)
        xr = x[i].real
        xi = x[i].imag
        out[i] = complex(gain * (xr * c + xi * s), gain * (xi * c - xr * s))
        c, s = c * wc - s * ws, s * wc + c * ws
    ph_end = phase0_rad + dphase_rad * n
    two_pi = 2.0 * math.pi
    return ph_end - two_pi * math.floor(ph_end / two_pi)


@njit(cache=True, nogil=True)
def fir_interleaved(u2, taps, out2):
    """Real-tap FIR on interleaved I/Q floats: ``out2[j] = sum_k taps[k] u2[j + 2 k]``.

    ``u2`` is a complex64 buffer viewed as float32 (re, im, re, im, ...); with real taps the two
    channels never mix, so one stride-2 FIR filters both.  Output is computed in blocks of 1024
    floats with the tap loop outside, which keeps the accumulators in L1 and lets the inner loop
    vectorise.  Cost ``len(taps)`` multiply-adds per float.
    """
    nout = out2.shape[0]
    ntap = taps.shape[0]
    blk = 1024
    acc = np.empty(blk, dtype=np.float32)
    for j0 in range(0, nout, blk):
        m = min(blk, nout - j0)
        for j in range(m):
            acc[j] = 0.0
        for k in range(ntap):
            hk = taps[k]
            # a slice of the input: the compiler then knows it does not alias the accumulator
            seg = u2[j0 + 2 * k:j0 + 2 * k + m]
            for j in range(m):
                acc[j] += hk * seg[j]
        for j in range(m):
            out2[j0 + j] = acc[j]


@njit(cache=True, nogil=True)
def dechirped_sum(x, w, f_cyc, r_cyc):
    """``sum_k w[k] x[k] exp(-j (2 pi f u + pi r u^2))``, ``u = k - (n - 1) / 2``, as a complex128.

    ``x`` complex64, ``w`` float32 (a real window), both of length ``n``; ``f_cyc`` the frequency in cycles per
    sample and ``r_cyc`` its rate in cycles per sample squared.  The phasor of sample ``k`` is exact (cos and
    sin in double precision) every 256 samples and advanced between them by its step, which the constant
    second difference ``2 pi r`` turns (``exp(-j 2 pi r)``): rounding cannot accumulate over more than 256
    steps (below 1e-13 relative).  Double-precision sums.  Cost: two complex multiplies and a multiply-add
    per sample, one read of each array (the two ``numpy.exp`` tables and products it replaces in
    ``_tone_q`` took 2.5 ms on 65536 samples).
    """
    n = x.shape[0]
    c = 0.5 * (n - 1)
    two_pi = 2.0 * math.pi
    cr2 = math.cos(two_pi * r_cyc)
    ci2 = -math.sin(two_pi * r_cyc)
    acc_r = 0.0
    acc_i = 0.0
    pr = 1.0
    pi_ = 0.0
    dr = 1.0
    di = 0.0
    for k in range(n):
        if k % 256 == 0:
            u = k - c
            ph = two_pi * f_cyc * u + math.pi * r_cyc * u * u
            pr = math.cos(ph)
            pi_ = -math.sin(ph)
            # the step to the next sample: phi(u + 1) - phi(u) = 2 pi f + pi r (2 u + 1)
            dph = two_pi * f_cyc + math.pi * r_cyc * (2.0 * u + 1.0)
            dr = math.cos(dph)
            di = -math.sin(dph)
        v = x[k]
        wk = np.float64(w[k])
        xr = wk * np.float64(v.real)
        xi = wk * np.float64(v.imag)
        acc_r += xr * pr - xi * pi_
        acc_i += xr * pi_ + xi * pr
        pr, pi_ = pr * dr - pi_ * di, pr * di + pi_ * dr
        dr, di = dr * cr2 - di * ci2, dr * ci2 + di * cr2
    return complex(acc_r, acc_i)


@njit(cache=True, nogil=True)
def power_block_sums(y, power, weight, block, out):
    """``out[b] = sum over block b of weight[k] y[k]^power`` (``power`` 2 or 4), blocks of ``block`` samples.

    ``y`` and ``weight`` complex64 of length at least ``len(out) block``; ``out`` complex64.  The M-th power and
    the window in single precision, a stretch of whole blocks at a time into a small buffer (a loop that
    vectorises), then each block's sum in double precision: the carrier search's data-line test in one pass
    over the window, without the numpy expression's four temporaries of its size.
    """
    n_b = out.shape[0]
    per = max(1, 2048 // block)  # whole blocks per stretch
    zr = np.empty(per * block, dtype=np.float32)
    zi = np.empty(per * block, dtype=np.float32)
    two = np.float32(2.0)
    for b0 in range(0, n_b, per):
        nb = min(per, n_b - b0)
        k0 = b0 * block
        m = nb * block
        ys = y[k0:k0 + m]  # views indexed from 0 up: no negative-index wrap per access (the loop vectorises)
        ws = weight[k0:k0 + m]
        for k in range(m):
            v = ys[k]
            a = v.real * v.real - v.imag * v.imag
            c = two * v.real * v.imag
            if power == 4:
                a, c = a * a - c * c, two * a * c
            wv = ws[k]
            zr[k] = a * wv.real - c * wv.imag
            zi[k] = a * wv.imag + c * wv.real
        for j in range(nb):
            sr = 0.0
            si = 0.0
            for k in range(j * block, (j + 1) * block):
                sr += zr[k]
                si += zi[k]
            out[b0 + j] = complex(sr, si)


@njit(cache=True, nogil=True)
def condition_block(x2, dc_re, dc_im, gain, phase0_rad, dphase_rad, table2, taps, hist2, out2, mom):
    """DC removal, gain, derotation and the matched filter of one block in one pass.

    Parameters
    ----------
    x2 : float32 array
        The block's complex samples viewed as interleaved floats (re, im, ...), ``n`` samples.
    dc_re, dc_im, gain : float
        DC offset removed from every non-zero sample (zeros are erasures and stay zero), then the gain.
    phase0_rad, dphase_rad : float
        Oscillator phase at the block's first sample and its advance per sample.
    table2 : float32 array
        ``exp(-j k dphase)`` for ``k = 0 .. 255`` as interleaved floats (:func:`phasor_table`).
    taps : float32 array
        Real, symmetric matched-filter taps (odd ``ntap``: ``taps[k] == taps[ntap - 1 - k]``), or
        empty: no filter, ``out`` is the derotated block.
    hist2 : float32 array
        The derotated block's predecessor's last ``ntap - 1`` samples (interleaved), updated in place.
    out2 : float32 array
        ``n`` complex outputs, interleaved: ``out[m] = sum_k taps[k] y[m + k - ntap + 1]`` with
        ``y[m] = gain (x[m] - dc) exp(-j (phase0 + m dphase))`` (``y`` before the block from ``hist2``).
    mom : float64 array of 4
        Set to the block's input moments as :func:`mean_power_nonzero` gives them (mean re, mean im,
        mean power over the non-zero samples; non-finite when a sample is NaN or Inf) and, in
        ``mom[3]``, the count of non-zero samples: the caller's DC and gain for the next block.

    Returns
    -------
    float
        The oscillator phase after the last sample, in ``[0, 2 pi)``.

    Notes
    -----
    The phasor of sample ``m = 256 s + k`` is the exact ``exp(-j (phase0 + 256 s dphase))``
    (cos and sin once per 256 samples, in double precision) times the table entry ``k``: no
    recursion, so rounding cannot accumulate, the result depends only on the block, and the
    per-sample loop has no dependency between samples (it vectorises).  The samples are
    derotated 1024 at a time into a small buffer behind the filter's history, and the FIR runs on
    it at once: the tap loop outside, the accumulators in L1, and the symmetric taps folded
    (``(ntap + 1) / 2`` multiplies and ``ntap`` adds per float, half the passes over the
    accumulators).  Cost per sample: about 12 flops for the rotation and ``3 ntap`` for the filter.
    """
    n = x2.shape[0] // 2
    ntap = taps.shape[0]
    nh = 2 * (ntap - 1) if ntap > 0 else 0
    half = ntap // 2
    seg = 1024
    work = np.empty(nh + 2 * seg, dtype=np.float32)
    for j in range(nh):
        work[j] = hist2[j]
    acc = np.empty(2 * seg, dtype=np.float32)
    dcr = np.float32(dc_re)
    dci = np.float32(dc_im)
    zero = np.float32(0.0)
    macc = np.zeros((3, 16), dtype=np.float64)
    mcnt = np.zeros(16, dtype=np.int64)
    for s0 in range(0, n, seg):
        m = min(seg, n - s0)
        dst = out2[2 * s0:2 * (s0 + m)] if ntap == 0 else work[nh:nh + 2 * m]
        for b0 in range(0, m, 256):
            ph = phase0_rad + dphase_rad * (s0 + b0)
            pr = np.float32(gain * math.cos(ph))
            pi_ = np.float32(-gain * math.sin(ph))
            mb = min(256, m - b0)
            src = x2[2 * (s0 + b0):2 * (s0 + b0 + mb)]
            d = dst[2 * b0:2 * (b0 + mb)]
            # the input's moments on the way (as mean_power_nonzero)
            moment_sums(src, macc, mcnt)
            for k in range(mb):
                xr = src[2 * k]
                xi = src[2 * k + 1]
                live = (xr != zero) | (xi != zero)
                xr = xr - dcr if live else zero
                xi = xi - dci if live else zero
                tr = table2[2 * k]
                ti = table2[2 * k + 1]
                cr = pr * tr - pi_ * ti
                ci = pr * ti + pi_ * tr
                d[2 * k] = xr * cr - xi * ci
                d[2 * k + 1] = xr * ci + xi * cr
        if ntap > 0:
            # symmetric taps: h[k] (y[j + k] + y[j + ntap - 1 - k]) pairs halve the passes over acc
            mm = 2 * m
            hc = taps[half]
            src = work[2 * half:2 * half + mm]
            for j in range(mm):
                acc[j] = hc * src[j]
            for k in range(half):
                hk = taps[k]
                sa = work[2 * k:2 * k + mm]
                sb = work[2 * (ntap - 1 - k):2 * (ntap - 1 - k) + mm]
                for j in range(mm):
                    acc[j] += hk * (sa[j] + sb[j])
            o = out2[2 * s0:2 * s0 + mm]
            for j in range(mm):
                o[j] = acc[j]
            for j in range(nh):
                work[j] = work[mm + j]
    for j in range(nh):
        hist2[j] = work[j]
    mom[3] = moment_means(macc, mcnt, mom)
    ph_end = phase0_rad + dphase_rad * n
    two_pi = 2.0 * math.pi
    return ph_end - two_pi * math.floor(ph_end / two_pi)


@njit(cache=True, nogil=True)
def phasor_table(dphase_rad, out2):
    """``out2`` (interleaved float32, ``len // 2`` entries) = ``exp(-j k dphase)``, ``k = 0, 1, ...``.

    Exact cos and sin every 32 entries, a double-precision rotation by ``exp(-j dphase)`` between
    them (error below 1e-14, far under float32's resolution).
    """
    wc = math.cos(dphase_rad)
    ws = -math.sin(dphase_rad)
    c = 1.0
    s = 0.0
    for k in range(out2.shape[0] // 2):
        if k % 32 == 0:
            c = math.cos(k * dphase_rad)
            s = -math.sin(k * dphase_rad)
        out2[2 * k] = c
        out2[2 * k + 1] = s
        c, s = c * wc - s * ws, s * wc + c * ws


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def window_moments(d, m2, m4, w, cq, mr2, mr4, mq):
    """One interval into a lock window's averages: each of ``M2, M4``, the weight and the carrier statistic
    becomes ``d old + (1 - d) new`` (``d`` the interval's decay; the weight's new value is 1)."""
    e = 1.0 - d
    return d * m2 + e * mr2, d * m4 + e * mr4, d * w + e, d * cq + e * mq


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH, error_model="numpy")
def soft_costas_error(a, yi, yq, zq, zi):
    """``tanh(a yi) zq - tanh(a yq) zi`` with ``tanh`` to within 1e-4: the soft QPSK Costas detector
    (``zq = yq``, ``zi = yi``; OQPSK: each rail's decision on its own strobe, the other rail's value there).

    ``tanh`` is the [7/6] Pade approximant, Lambert's continued fraction truncated:
    ``z (135135 + 17325 z^2 + 378 z^4 + z^6) / (135135 + 62370 z^2 + 3150 z^4 + 28 z^6)`` with ``z``
    clamped to +-4.97 (where it reaches 0.9999994); the two quotients share one division.  About 20
    multiplies and one division, no exponential.
    """
    u = a * yi
    v = a * yq
    u = min(max(u, -4.97), 4.97)
    v = min(max(v, -4.97), 4.97)
    u2 = u * u
    v2 = v * v
    nu = u * (135135.0 + u2 * (17325.0 + u2 * (378.0 + u2)))
    du = 135135.0 + u2 * (62370.0 + u2 * (3150.0 + 28.0 * u2))
    nv = v * (135135.0 + v2 * (17325.0 + v2 * (378.0 + v2)))
    dv = 135135.0 + v2 * (62370.0 + v2 * (3150.0 + 28.0 * v2))
    return (nu * dv * zq - nv * du * zi) / (du * dv)


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def hard_costas_slope(esn0, mod_code, soft_below, mid_power):
    """Slope per radian at zero phase error of the hard Costas detector over the amplitude, never below 0.3.

    BPSK (``mod_code`` 0) ``sgn(I) Q``: ``erf(sqrt(x))``, ``x = Es/N0`` (linear).  QPSK (1) ``(sgn(I) Q -
    sgn(Q) I) / sqrt 2`` at ``x >= soft_below``: ``erf(u) - 2 u exp(-u^2) / sqrt(pi)``, ``u = sqrt(x / 2)``:
    the decision ``sgn(I)`` moves with the phase too, by the cross term ``Q`` over the density of ``I`` at
    zero, which takes ``2 E[Q^2] f_I(0)`` off the slope (0.74 at 6 dB, where ``erf(u)`` is 0.95).  OQPSK (2)
    takes the cross term half a symbol from the decision, where the other rail's mean power is
    ``mid_power`` (``sum_i g(i + 1/2)^2`` of the combined pulse, 0.75 for RRC 0.5): ``erf(u) - mid_power 2 u
    exp(-u^2) / sqrt(pi)``.  Below ``soft_below`` (the hard detector there only pulls a stream in, before
    the soft one takes over) ``erf(u)`` as it always was.
    """
    cross = 0.0
    if mod_code != 0 and esn0 >= soft_below:
        cross = 1.0 if mod_code == 1 else mid_power
    k = costas_slope(esn0, mod_code, cross)
    return k if k > 0.3 else 0.3


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def costas_slope(esn0, mod_code, cross):
    """The hard Costas detector's slope at zero phase error, no floor (:func:`hard_costas_slope`): BPSK
    ``erf(sqrt(x))``; QPSK/OQPSK ``erf(u) - cross 2 u exp(-u^2) / sqrt(pi)``, ``u = sqrt(x / 2)``, ``cross`` the
    other rail's power where the detector takes it (1 QPSK, ``1 - r0`` OQPSK, 0 for the first term alone)."""
    if mod_code == 0:
        return math.erf(math.sqrt(esn0))
    u = math.sqrt(0.5 * esn0)
    k = math.erf(u)
    if cross != 0.0:
        k -= cross * 2.0 * u * math.exp(-u * u) / math.sqrt(math.pi)
    return k


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def hard_costas_squaring_loss(esn0, mod_code):
    """Squaring loss ``S_L`` of the hard Costas detector: its loop's phase variance is ``2 B_L T / (x S_L)``.

    ``S_L = k^2 / (2 x Var(e))`` with ``x = Es/N0`` (linear), ``k`` the detector's true slope at zero phase
    error (:func:`costas_slope`) and ``Var(e)`` its variance there, on symbols of unit
    energy (the data terms cancel at zero phase error, whatever the decisions).  BPSK ``sgn(I) Q``:
    ``Var(e) = sigma^2 = 1 / (2 x)``, so ``S_L = erf(sqrt x)^2``.  QPSK ``(sgn(I) Q - sgn(Q) I) / sqrt 2``:
    ``Var(e) = m^2 + sigma^2 - E|I|^2``, ``m = 1 / sqrt 2``, ``E|I| = m erf(u) + sigma sqrt(2 / pi)
    exp(-u^2)``, ``u = sqrt(x / 2)``, ``k = erf(u) - 2 u exp(-u^2) / sqrt(pi)``: 0.15 at 2 dB, 0.58 at
    6 dB (the analog four-phase Costas loop's ``1 / (1 + 9 / 2x + 6 / x^2 + 3 / 2x^3)`` gives 0.15 and
    0.40).  OQPSK takes the QPSK value (its cross terms' correlations are not worked out here).
    """
    k = costas_slope(esn0, mod_code, 1.0)
    if mod_code == 0:
        return k * k
    u = math.sqrt(0.5 * esn0)
    sigma2 = 0.5 / esn0
    m = math.sqrt(0.5)
    e_abs = m * math.erf(u) + math.sqrt(sigma2 * 2.0 / math.pi) * math.exp(-u * u)
    var = 0.5 + sigma2 - e_abs * e_abs
    return k * k / (2.0 * esn0 * var)


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def box_strobe(mf, base, t, hbox):
    """Exact integrate-and-dump of ``mf`` (centred on sample ``base`` at index 0) over ``[t - hbox, t + hbox]``.

    The samples are piecewise constant: sample ``j`` weighs the overlap of ``[j - 1/2, j + 1/2]`` with the
    window.  Returns ``(re, im)`` in double precision (:func:`track_symbols` with rect pulses).
    """
    vr = 0.0
    vi = 0.0
    jlo = int(math.floor(t - hbox - 0.5))
    jhi = int(math.ceil(t + hbox + 0.5))
    for j in range(jlo, jhi + 1):
        u = j - t
        lo_e = u - 0.5 if u - 0.5 > -hbox else -hbox
        hi_e = u + 0.5 if u + 0.5 < hbox else hbox
        wgt = hi_e - lo_e
        if wgt > 0.0:
            xs = mf[j - base]
            vr += wgt * float(xs.real)
            vi += wgt * float(xs.imag)
    return vr, vi


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def cubic_weights(m32):
    """The cubic Lagrange interpolator's four weights (samples ``i - 1 .. i + 2``) at ``m32 = mu`` (float32), in
    single precision: about 10 multiplies."""
    sixth = 1.0 / 6.0
    mp1 = m32 + np.float32(1.0)
    mm1 = m32 - np.float32(1.0)
    mm2 = m32 - np.float32(2.0)
    b_c = m32 * mm1
    a_d = mp1 * mm2
    return (np.float32(-sixth) * b_c * mm2, np.float32(0.5) * a_d * mm1, np.float32(-0.5) * a_d * m32,
            np.float32(sixth) * mp1 * b_c)


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def cubic_strobe(mf, i, mu):
    """``mf`` interpolated at ``i + mu`` (``0 <= mu < 1``, ``1 <= i <= len(mf) - 3``): ``(re, im)``.

    Cubic Lagrange interpolator through samples ``i - 1 .. i + 2``: the four weights from ``mu`` and the sums
    in single precision, the samples' own (``mu`` to 6e-8 of a sample: far finer than any timing jitter);
    the weights are shared by I and Q (an unsigned index: no negative-index wrap is compiled).  Farrow-free:
    about 12 multiplies for the weights, 8 for the sums.
    """
    u1 = np.uint64(1)
    iu = np.uint64(i - 1)
    a0 = mf[iu]
    a1 = mf[iu + u1]
    a2 = mf[iu + np.uint64(2)]
    a3 = mf[iu + np.uint64(3)]
    h0, h1, h2, h3 = cubic_weights(np.float32(mu))
    return (float(h0 * a0.real + h1 * a1.real + h2 * a2.real + h3 * a3.real),
            float(h0 * a0.imag + h1 * a1.imag + h2 * a2.imag + h3 * a3.imag))


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def quarter_im4_sum(sym, a, b, inv_amp):
    """``sum Im(r^4) / 4`` of the symbols whose normalised copies ``y = r inv_amp`` are ``sym[a:b]`` (complex64; one
    amplitude over a statistics interval), in double: ``Im y^4 = 4 (y_r^2 - y_i^2) y_r y_i``."""
    acc = 0.0
    for k in range(a, b):
        yr = float(sym[k].real)
        yi = float(sym[k].imag)
        acc += (yr * yr - yi * yi) * (yr * yi)
    return acc / (inv_amp * inv_amp * inv_amp * inv_amp)


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def derotated(vr, vi, cs, sn):
    """``(vr + j vi) exp(-j theta)`` with the carrier phasor ``(cs, sn) = (cos, sin) theta``: ``(re, im)``."""
    return vr * cs + vi * sn, vi * cs - vr * sn


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def phasor_step(theta, theta_ph, cs, sn, count):
    """The carrier phasor ``(cos, sin)`` at ``theta`` from the one at ``theta_ph``: ``(cs, sn, count)``.

    A small-angle rotation (fourth-order cosine, third-order sine) of the previous phasor, or the exact
    ``cos``/``sin`` after 64 steps (``count``) or a step beyond 0.3 rad, so it never drifts from ``theta``
    by more than about 1e-7 rad (:func:`track_symbols`).
    """
    d = theta - theta_ph
    if count >= 64 or d > 0.3 or d < -0.3:
        return math.cos(theta), math.sin(theta), 0
    d2 = d * d
    cd = 1.0 - d2 * (0.5 - d2 / 24.0)
    sd = d * (1.0 - d2 / 6.0)
    return cs * cd - sn * sd, sn * cd + cs * sd, count + 1


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def close_interval(st, pr, c_table, mod_code, acc_n, acc_r2, acc_r4, acc_q, acc_qi, acc_mid, inv_amp, kdc, clock,
                   slock, flags, trk, soft_on, a_soft, c_clip, g_c):
    """One statistics interval of :func:`track_symbols` closed (its Notes): amplitude, Es/N0, the detectors'
    scales, carrier and symbol lock, the loops' bandwidths, from the interval's sums; the state record ``st``
    updated; returns the loop's new ``(inv_amp, kdc, clock, slock, flags, trk, soft_on, a_soft, c_clip, g_c, g_t,
    kp_tl, ki_tl, kp_cl, ki_cl, kr_cl)``.  A function of its own, called once an interval, so that the symbol
    loop's code stays small (its registers, and its compile time)."""
    kd = pr["kd"]
    l_slow = pr["l_lock_slow"]
    inv_kd = 1.0 / kd
    warmup = pr["warmup"]
    gear = pr["gear_symbols"]
    kp_t = pr["kp_t"]
    kp_c = pr["kp_c"]
    l_amp = pr["l_amp"]
    l_lc = pr["l_lock_c"]
    l_ls = pr["l_lock_s"]
    soft_below = pr["soft_below"]
    sqrt2 = math.sqrt(2.0)
    dd_gain = pr["dd_gain"]
    t_ref = pr["t_ref_esn0"]
    t_min = pr["t_min_scale"]
    ki_t = pr["ki_t"]
    c_bn = pr["c_bn"]
    ki_c = pr["ki_c"]
    slow_esn0 = pr["slow_esn0"]
    c_hold = pr["c_hold"]
    c_hold_g = pr["c_hold_slow"]
    c_rho = pr["c_loop_snr"]
    c_min_sc = pr["c_min_scale"]
    kr_c = pr["kr_c"]
    c_on_g = pr["c_on_slow"]
    c_min_g = pr["c_min_slow"]
    c_off = pr["c_off"]
    r0 = pr["r0"]
    c_mag = pr["c_mag"]
    c_min = pr["c_min"]
    s_min = pr["s_min"]
    c_on = pr["c_on"]
    s_on = pr["s_on"]
    s_off = pr["s_off"]
    inv_n = 1.0 / acc_n
    d_amp = math.exp(acc_n * l_amp)
    d_lc = math.exp(acc_n * l_lc)
    d_ls = math.exp(acc_n * l_ls)
    mr2 = acc_r2 * inv_n
    mr4 = acc_r4 * inv_n
    # amplitude from the M2M4 moments
    m2s = d_amp * st["m2s"] + (1.0 - d_amp) * mr2
    m4s = d_amp * st["m4s"] + (1.0 - d_amp) * mr4
    wsum = d_amp * st["wsum"] + (1.0 - d_amp)
    st["m2s"] = m2s
    st["m4s"] = m4s
    st["wsum"] = wsum
    m2 = m2s / wsum
    m4 = m4s / wsum
    s2 = 2.0 * m2 * m2 - m4
    s_floor = 0.05 * m2
    sig = math.sqrt(s2) if s2 > s_floor * s_floor else s_floor
    if sig > 1e-30:
        # nothing but zeros so far (erasures, a silent start): the amplitude is kept
        amp = math.sqrt(sig)
        inv_amp = 1.0 / amp
        st["amp"] = amp
    esn0 = sig / (m2 - sig) if m2 > sig else 1e3
    # the long carrier-lock average (QPSK/OQPSK at low Es/N0, where the fourth-power statistic
    # over the short window is buried in its own noise): -Re(r^4) / M4 against its locked value
    # S^2 / M4, both over the same long window
    slow_ok = False
    slow_bad = True
    slow_low = False
    if l_slow < 0.0:
        d_g = math.exp(acc_n * l_slow)
        m2g, m4g, wg, cnum_g = window_moments(d_g, st["m2g"], st["m4g"], st["wg"], st["cnum_g"], mr2, mr4,
                                              acc_q * inv_n)
        st["m2g"] = m2g
        st["m4g"] = m4g
        st["wg"] = wg
        st["cnum_g"] = cnum_g
        s2g = 2.0 * m2g * m2g - m4g * wg
        ref_g = s2g if s2g > 0.0 else 0.0
        slow_ok = wg > 0.25 and cnum_g * wg > c_on_g * ref_g and cnum_g > c_min_g * m4g
        slow_bad = cnum_g * wg < c_off * ref_g or cnum_g < 0.5 * c_min_g * m4g
        # the long window's Es/N0 below slow_esn0: sg / (m2 - sg) < e  <=>  sg (1 + e) < e m2
        sg = math.sqrt(s2g) if s2g > 0.0 else 0.0
        slow_low = sg * (1.0 + slow_esn0) < slow_esn0 * m2g
        # at low Es/N0 the soft detector takes amplitude and Es/N0 from the long window (over 1024
        # symbols M2M4's S has a relative spread of about 25 % at -3 dB, which the detector's slope,
        # nearly proportional to (Es/N0)^2 there, would double)
        if wg > 0.25 and s2g > 0.0 and esn0 < soft_below:
            sgn = sg / wg
            m2n = m2g / wg
            if m2n > sgn and sgn > 1e-30:
                esn0 = sgn / (m2n - sgn)
                amp = math.sqrt(sgn)
                inv_amp = 1.0 / amp
                st["amp"] = amp
    # (once the lock window holds about 1000 symbols: over the first symbols of a stream, before the
    # timing has converged, the estimate can be far too low, and the hard detector keeps the pull-in
    # of a strong signal, and the phase ambiguity it settles in, as they always were)
    soft_on = esn0 < soft_below and st["wf"] > 0.4
    fisher = 1.0
    if soft_on:
        # below soft_below (QPSK/OQPSK) the soft detector, its slope at the measured Es/N0 x from the
        # table (its Fisher information J = sqrt(2) x slope per symbol); a = sqrt(2) x.  x from -6 dB
        # while the loops track, from 0 dB while they do not: the estimate over the first symbols of
        # a warm-up (timing not yet found) can be far too low, and the wide loop would take its noise
        # at a gain of 1 / slope
        x_lo = 0.25 if trk == 1 else 1.0
        x_s = esn0 if esn0 > x_lo else x_lo
        u = (10.0 * math.log10(x_s) - pr["ct_db0"]) / pr["ct_step"]
        nt = c_table.shape[0]
        if u <= 0.0:
            kdc = c_table[0]
        elif u >= nt - 1:
            kdc = c_table[nt - 1]
        else:
            ju = int(u)
            kdc = c_table[ju] + (u - ju) * (c_table[ju + 1] - c_table[ju])
        fisher = sqrt2 * x_s * kdc
        c_clip = 4.0 / math.sqrt(fisher) if fisher < 1.0 and trk == 1 else 4.0
        a_soft = sqrt2 * x_s
        g_c = 1.0 / kdc
    else:
        c_clip = 4.0
        if dd_gain > 0.0:
            # decision-directed slope at the measured Es/N0 (never below 0.3); QPSK from soft_below
            # up with the decision's correlation with the cross term (see Notes)
            kdc = hard_costas_slope(esn0, mod_code, soft_below, 1.0 - r0)
        g_c = inv_amp / kdc
    g_t = inv_amp * inv_amp * inv_kd

    # carrier-lock statistic relative to its locked value, which comes from M2M4 moments
    # averaged over the same window (a longer one would lag at a signal's onset and make a
    # slipping loop look locked).  The ratios are compared cross-multiplied.
    m2f, m4f, wf, cnum = window_moments(d_lc, st["m2f"], st["m4f"], st["wf"], st["cnum"], mr2, mr4,
                                        acc_q * inv_n)
    st["m2f"] = m2f
    st["m4f"] = m4f
    st["wf"] = wf
    st["cnum"] = cnum
    cnum_i = d_lc * st["cnum_i"] + (1.0 - d_lc) * 4.0 * acc_qi * inv_n
    st["cnum_i"] = cnum_i
    # the weight cancels in every ratio below, so the unnormalised sums are used
    s2w = 2.0 * m2f * m2f - m4f * wf
    if mod_code == 0:
        cden = d_lc * st["cden"] + (1.0 - d_lc) * mr2
        sigw = math.sqrt(s2w) if s2w > 0.0 else 0.0
        ref_num = sigw if sigw > 0.1 * m2f else 0.1 * m2f
        ref_den = m2f
    else:
        cden = d_lc * st["cden"] + (1.0 - d_lc) * mr4
        ref_num = s2w if s2w > 0.1 * m4f * wf else 0.1 * m4f * wf
        # the locked value is the window's own |E r^4| where that is lower (down to c_mag of S^2): noise
        # that is not Gaussian and circular (rails clipped before the matched filter) lowers -Re E r^4
        # and raises M2M4's S (see Notes)
        mag = math.sqrt(cnum * cnum + cnum_i * cnum_i) * wf
        if mag < ref_num:
            ref_num = mag if mag > c_mag * ref_num else c_mag * ref_num
        ref_den = m4f * wf
    st["cden"] = cden
    lhs = cnum * ref_den
    seen = st["seen"] + acc_n
    if seen > warmup:
        seen = int(warmup)
    st["seen"] = seen
    if clock == 0:
        # the condition must hold for `c_hold` symbols in a row: a loop slipping cycles
        # at a large frequency error can push the statistic up for a moment
        if lhs > c_on * ref_num * cden and cnum > c_min * cden:
            st["cgood"] += acc_n
        else:
            st["cgood"] = 0
        if st["cgood"] >= c_hold and seen >= warmup:
            clock = 1
            st["lock_path"] = 0
            st["cgood"] = 0
        # the long average declares lock only while a found carrier is pulled in
        if slow_ok and st["pull_left"] > 0:
            st["cgood_g"] += acc_n
        else:
            st["cgood_g"] = 0
        if clock == 0 and l_slow < 0.0 and st["cgood_g"] >= c_hold_g and seen >= warmup:
            clock = 1
            st["lock_path"] = 1
        if clock == 1:
            st["cgood_g"] = 0
        else:
            st["pull_left"] = st["pull_left"] - acc_n if st["pull_left"] > acc_n else 0
    elif st["lock_path"] == 0:
        if lhs < c_off * ref_num * cden or cnum < 0.5 * c_min * cden:
            # at low Es/N0 (over the long window) the long average holds the lock if it says so
            if slow_ok and slow_low:
                st["lock_path"] = 1
            else:
                clock = 0
    elif slow_bad:
        clock = 0
    if clock == 0 and flags & 1:
        st["pull_left"] = 0  # lock lost: the wide loop coasts (a fade), as before any lock
    trk = 1 if clock == 1 or (st["pull_left"] > 0 and seen >= warmup and soft_on) else 0

    # symbol-lock statistic: on-time versus midpoint energy, relative to r0 S / (S + N)
    eon = d_ls * st["eon"] + (1.0 - d_ls) * mr2
    emid = d_ls * st["emid"] + (1.0 - d_ls) * acc_mid * inv_n
    st["eon"] = eon
    st["emid"] = emid
    diff = eon - emid
    rho_num = sig if sig > 0.05 * m2 else 0.05 * m2
    if slock == 0:
        if diff * m2 > s_on * r0 * rho_num * eon and diff > s_min * eon and seen >= warmup:
            slock = 1
    else:
        if diff * m2 < s_off * r0 * rho_num * eon or diff < 0.5 * s_min * eon:
            slock = 0
    flags = clock + 2 * slock
    # the timing loop: its full bandwidth while the carrier is unlocked (pull-in), and in
    # lock narrowed in proportion to Es/N0 below t_ref (the detector's noise grows as
    # 1 / (Es/N0)), to at most t_min of it
    # (only once lock has been held for gear_symbols: the loops pull in at full bandwidth), from
    # the Es/N0 of the lock window's moments, which follows a signal's onset sooner
    sw = math.sqrt(s2w / (wf * wf)) if s2w > 0.0 else 0.0
    m2w = m2f / wf if wf > 0.0 else 0.0
    esn0 = sw / (m2w - sw) if m2w > sw else (1e3 if sw > 0.0 else 1e-3)
    if esn0 < 1e-3:
        esn0 = 1e-3
    if trk == 1:
        lock_age = st["lock_age"] + acc_n
        st["lock_age"] = lock_age
    else:
        lock_age = 0
        st["lock_age"] = 0
    geared = lock_age >= gear
    t_scale = 1.0
    if geared and slock == 1 and esn0 < t_ref:  # never narrowed while the timing is not locked
        t_scale = esn0 / t_ref if esn0 > t_min * t_ref else t_min
    st["t_scale"] = t_scale
    kp_tl = kp_t * t_scale
    ki_tl = ki_t * t_scale * t_scale
    # the carrier loop in lock: narrowed where the configured bandwidth would leave a loop
    # SNR below c_loop_snr, B_L T <= (Es/N0) S_L / rho with the Costas squaring loss S_L
    c_scale = 1.0
    # a carrier pulled in after an acquisition (whose frequency is close) is narrowed at once: at
    # low Es/N0 the full bandwidth's noise would walk the frequency away
    pulling = clock == 0 and trk == 1
    if geared or pulling:
        if soft_on:
            # loop SNR 1 / (2 B_L T / J) with the soft detector's Fisher information J per symbol
            bn_ok = 0.5 * fisher / c_rho
        else:
            s_l = hard_costas_squaring_loss(esn0, mod_code)
            bn_ok = esn0 * s_l / c_rho
        if bn_ok < c_bn:
            c_scale = bn_ok / c_bn if bn_ok > c_min_sc * c_bn else c_min_sc
            # narrowed gradually after the pull-in: gear / age of the full bandwidth, down to it
            if soft_on and not pulling and gear > c_scale * lock_age:
                c_scale = gear / lock_age
    st["c_scale"] = c_scale
    kp_cl = kp_c * c_scale
    ki_cl = ki_c * c_scale * c_scale
    kr_cl = kr_c * c_scale * c_scale * c_scale
    return (inv_amp, kdc, clock, slock, flags, trk, soft_on, a_soft, c_clip, g_c, g_t, kp_tl, ki_tl, kp_cl, ki_cl,
            kr_cl)


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def loop_gains(pr, st, soft_on, inv_amp, kdc):
    """The loops' normalisations and gains as :func:`close_interval` last set them, from the parameters ``pr``, the
    state ``st`` (its ``t_scale``, ``c_scale``), the detector in use, the amplitude's inverse and the carrier
    detector's slope: ``(g_c, g_t, kp_tl, ki_tl, kp_cl, ki_cl, kr_cl)``, carrier error / (A kdc) (the soft
    detector's / kdc), timing error / (A^2 K_D), and the bandwidths' scales applied to the gains."""
    g_c = 1.0 / kdc if soft_on else inv_amp / kdc
    g_t = inv_amp * inv_amp * (1.0 / pr["kd"])
    t_scale = st["t_scale"]
    c_scale = st["c_scale"]
    return (g_c, g_t, pr["kp_t"] * t_scale, pr["ki_t"] * t_scale * t_scale, pr["kp_c"] * c_scale,
            pr["ki_c"] * c_scale * c_scale, pr["kr_c"] * c_scale * c_scale * c_scale)


#: The locked tracker's batches (:func:`track_locked`): cells of ``stat_symbols / BATCH_CELLS`` nominal symbol
#: periods on the recording's sample grid (16 symbols), at most ``BATCH_MAX`` symbols each (the timing rate is
#: bounded by ``v_max``, 0.02: 17 at most).
BATCH_CELLS = 4
BATCH_MAX = 24


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def track_each(mf, base, t_limit, params, mod_code, third_order, state, c_table,
               out_pos, out_bitpos, out_soft, out_sym, out_flags, out_theta):
    """The per-symbol loop of :func:`track_symbols` (its arguments): ``(symbols written, go_batch)``.

    ``go_batch``: it stopped at a symbol's start with both locks held (batches allowed), for
    :func:`track_locked` to go on; else the data, ``t_limit`` or the buffers ended the call.
    """
    n_mf = mf.shape[0]
    cap = out_pos.shape[0]
    pr = params[0]
    sps = pr["sps"]
    kp_c_wide = pr["kp_c_wide"]
    inv_span = 1.0 / (pr["stat_symbols"] * sps)
    warmup = pr["warmup"]
    hbox = pr["hbox"]
    v_max = pr["v_max"]
    soft_on = state[0]["soft_on"] == 1
    look = int(hbox + 0.5) + 2 if hbox > 0.0 else 2

    st = state[0]
    t = st["t"]
    v_int = st["v_int"]
    theta = st["theta"]
    w_int = st["w_int"]
    w_rate = st["w_rate"]
    p1r = st["p1r"]
    p1i = st["p1i"]
    p2r = st["p2r"]
    p2i = st["p2i"]
    p3r = st["p3r"]
    p3i = st["p3i"]
    t_on = st["t_on"]
    parity = st["parity"]
    pend_ec = st["pend_ec"]
    pend_et = st["pend_et"]
    inv_amp = st["inv_amp"]
    kdc = st["kdc"]
    clock = st["clock"]
    slock = st["slock"]
    acc_n = st["acc_n"]
    cur_epoch = st["stat_epoch"]
    acc_r2 = st["acc_r2"]
    acc_r4 = st["acc_r4"]
    acc_q = st["acc_q"]
    acc_qi = st["acc_qi"]
    acc_mid = st["acc_mid"]
    blk_n = st["blk_n"]
    blk_m2 = st["blk_m2"]
    blk_m4 = st["blk_m4"]

    q1r = st["q1r"]
    q1i = st["q1i"]
    q3r = st["q3r"]
    q3i = st["q3i"]
    inv_sqrt2 = 1.0 / math.sqrt(2.0)
    sqrt2 = math.sqrt(2.0)
    flags = clock + 2 * slock
    # the loops track (second order, bandwidths from Es/N0) in lock and while a carrier the acquisition
    # found is being pulled in below soft_below (above it lock comes within a few hundred symbols, and the
    # wide loop pulls in as it always did); otherwise the first-order wide loop coasts
    trk = 1 if clock == 1 or (st["pull_left"] > 0 and st["seen"] >= warmup and soft_on) else 0
    g_c, g_t, kp_tl, ki_tl, kp_cl, ki_cl, kr_cl = loop_gains(pr, st, soft_on, inv_amp, kdc)
    a_soft = st["a_soft"]
    c_clip = st["c_clip"]
    nout = 0
    iv0 = 0  # the statistics interval's first symbol in out_sym (its symbols of earlier calls are in acc_qi)
    # carrier phasor exp(j theta_ph): advanced by small-angle rotations and recomputed exactly every 64
    # half-strobes, so it never drifts from theta by more than ~1e-7 rad; kept in the state, so the
    # output does not depend on where one call ends and the next begins
    cs = st["ph_cos"]
    sn = st["ph_sin"]
    theta_ph = st["ph_theta"]
    nresync = st["ph_count"]
    # in lock, symbols in batches with the loops held (track_locked; track_symbols Notes)
    batch_ok = pr["batch"] > 0.0 and hbox == 0.0 and mod_code != 2
    go_batch = False
    # one symbol per iteration: the on-time half-strobe (skipped when a call resumes at the midpoint), then
    # the midpoint one, which completes the symbol; each half as its own straight-line code
    while True:
        if parity == 0 and batch_ok and clock == 1 and slock == 1:
            go_batch = True  # locked at a symbol's start: track_locked takes over (track_symbols)
            break
        if parity == 0:
            if not t < t_limit:
                break
            m = int(math.floor(t))
            i = m - base
            if i + look >= n_mf:
                break
            if i - look < 0:
                # the wrapper always keeps enough history; this only guards the first call
                t += 0.5 * sps
                continue
            if hbox > 0.0:
                vr, vi = box_strobe(mf, base, t, hbox)
            else:
                vr, vi = cubic_strobe(mf, i, t - m)
            cs, sn, nresync = phasor_step(theta, theta_ph, cs, sn, nresync)
            theta_ph = theta
            wr, wi = derotated(vr, vi, cs, sn)
            t_on = t
            q3r = q1r
            q3i = q1i
            q1r = vr
            q1i = vi
            t += 0.5 * sps * (1.0 - v_int)
            p3r = p2r
            p3i = p2i
            p2r = p1r
            p2i = p1i
            p1r = wr
            p1i = wi
            theta += 0.5 * w_int
            parity = 1
        if not t < t_limit:
            break
        if nout >= cap:
            break  # buffers full: the next half-strobe completes a symbol; the caller continues
        m = int(math.floor(t))
        i = m - base
        if i + look >= n_mf:
            break
        if i - look < 0:
            t += 0.5 * sps
            continue
        if hbox > 0.0:
            vr, vi = box_strobe(mf, base, t, hbox)
        else:
            vr, vi = cubic_strobe(mf, i, t - m)
        if mod_code == 2:
            cs, sn, nresync = phasor_step(theta, theta_ph, cs, sn, nresync)
            theta_ph = theta
            wr, wi = derotated(vr, vi, cs, sn)
        else:
            # BPSK/QPSK midpoint: the Gardner detector and the midpoint energy do not depend on a
            # common phase, so it is taken as interpolated (with the on-time values as interpolated)
            wr = vr
            wi = vi

        # symbol k complete: w[2k] = p1, w[2k-1] = p2, w[2k-2] = p3, w[2k+1] = (wr, wi)
        if mod_code == 2:
            sr = p1r
            sq = wi
            et = p2r * (p1r - p3r) + p1i * (wi - p2i)
            mid_e = p2r * p2r + p1i * p1i
            if soft_on:
                ec_raw = soft_costas_error(a_soft, p1r * inv_amp, wi * inv_amp, p1i * inv_amp, wr * inv_amp)
            else:
                sg_i = 1.0 if p1r >= 0.0 else -1.0
                sg_q = 1.0 if wi >= 0.0 else -1.0
                ec_raw = (sg_i * p1i - sg_q * wr) * inv_sqrt2
        else:
            sr = p1r
            sq = p1i
            et = p2r * (q1r - q3r) + p2i * (q1i - q3i)
            mid_e = p2r * p2r + p2i * p2i
            sg_i = 1.0 if sr >= 0.0 else -1.0
            if mod_code == 0:
                ec_raw = sg_i * sq
            elif soft_on:
                # soft (MAP) QPSK detector on the normalised symbol: tanh(a I) Q - tanh(a Q) I
                yr = sr * inv_amp
                yi = sq * inv_amp
                ec_raw = soft_costas_error(a_soft, yr, yi, yi, yr)
            else:
                sg_q = 1.0 if sq >= 0.0 else -1.0
                ec_raw = (sg_i * sq - sg_q * sr) * inv_sqrt2
        sr2 = sr * sr
        sq2 = sq * sq
        r2 = sr2 + sq2
        r4 = r2 * r2
        # ---- the statistics: when the symbol enters a new interval of stat_symbols symbol periods on
        # the recording's sample grid (so that segments of a recording update at the same symbols), and
        # every 8 symbols during the warm-up; off the loops' critical path ----
        epoch = int(math.floor(t_on * inv_span))
        if acc_n > 0 and (epoch != cur_epoch or (acc_n >= 8 and st["seen"] + acc_n < warmup)):
            if mod_code != 0:
                # Im r^4 / 4 of the interval's symbols, from their normalised copies in out_sym (one amplitude over an
                # interval): off the loop, whose every extra sum costs about 1.5 ns a symbol
                acc_qi += quarter_im4_sum(out_sym, iv0, nout, inv_amp)
            (inv_amp, kdc, clock, slock, flags, trk, soft_on, a_soft, c_clip, g_c, g_t, kp_tl, ki_tl, kp_cl, ki_cl,
             kr_cl) = close_interval(st, pr, c_table, mod_code, acc_n, acc_r2, acc_r4, acc_q, acc_qi, acc_mid, inv_amp,
                                     kdc, clock, slock, flags, trk, soft_on, a_soft, c_clip, g_c)
            acc_n = 0
            acc_r2 = 0.0
            acc_r4 = 0.0
            acc_q = 0.0
            acc_qi = 0.0
            iv0 = nout
            acc_mid = 0.0
        cur_epoch = epoch

        # carrier-lock statistic: Re(r^2) (BPSK) or -Re(r^4) (QPSK)
        if mod_code == 0:
            acc_q += sr2 - sq2
        else:
            acc_q -= sr2 * sr2 - 6.0 * sr2 * sq2 + sq2 * sq2
        acc_r2 += r2
        acc_r4 += r4
        acc_mid += mid_e
        acc_n += 1
        blk_m2 += r2
        blk_m4 += r4
        blk_n += 1

        out_pos[nout] = t_on
        yr = sr * inv_amp
        yi = sq * inv_amp
        if mod_code == 0:
            out_bitpos[nout] = t_on
            out_soft[nout] = yr
        else:
            out_bitpos[2 * nout] = t_on
            out_bitpos[2 * nout + 1] = t if mod_code == 2 else t_on
            out_soft[2 * nout] = sqrt2 * yr
            out_soft[2 * nout + 1] = sqrt2 * yi
        out_sym[nout] = complex(yr, yi)
        out_flags[nout] = flags
        out_theta[nout] = theta
        nout += 1

        # The loops act on the previous symbol's errors: one symbol of delay (negligible at loop
        # bandwidths of a few thousandths of the symbol rate) takes the detectors off the strobe's
        # and the phase's critical path, so consecutive symbols overlap in the processor.
        ec = pend_ec
        # the carrier error bounded far outside the detector's range (4 noise deviations at Es/N0 =
        # -3 dB: an amplitude estimate that lags a sudden rise after silence cannot throw the
        # phase), the timing error at +-1
        pend_ec = min(max(ec_raw * g_c, -c_clip), c_clip)
        e_t = pend_et
        pend_et = min(max(et * g_t, -1.0), 1.0)
        # carrier loop (phase correction takes effect from the next half-strobe)
        if trk == 1:
            if third_order == 1:
                w_rate += kr_cl * ec
            w_int += ki_cl * ec + w_rate
            theta += kp_cl * ec
        else:
            theta += kp_c_wide * ec

        # timing loop
        if trk == 1:
            v_int += ki_tl * e_t
            if v_int > v_max:
                v_int = v_max
            elif v_int < -v_max:
                v_int = -v_max
        t += 0.5 * sps * (1.0 - v_int) - sps * kp_tl * e_t

        p3r = p2r
        p3i = p2i
        p2r = p1r
        p2i = p1i
        p1r = wr
        p1i = wi
        theta += 0.5 * w_int
        parity = 0

    st["t"] = t
    st["v_int"] = v_int
    st["theta"] = theta
    st["w_int"] = w_int
    st["w_rate"] = w_rate
    st["p1r"] = p1r
    st["p1i"] = p1i
    st["p2r"] = p2r
    st["p2i"] = p2i
    st["p3r"] = p3r
    st["p3i"] = p3i
    st["q1r"] = q1r
    st["q1i"] = q1i
    st["q3r"] = q3r
    st["q3i"] = q3i
    st["t_on"] = t_on
    st["parity"] = parity
    st["pend_ec"] = pend_ec
    st["pend_et"] = pend_et
    st["inv_amp"] = inv_amp
    st["kdc"] = kdc
    st["a_soft"] = a_soft
    st["c_clip"] = c_clip
    st["soft_on"] = 1 if soft_on else 0
    st["clock"] = clock
    st["slock"] = slock
    st["acc_n"] = acc_n
    st["stat_epoch"] = cur_epoch
    st["acc_r2"] = acc_r2
    st["acc_r4"] = acc_r4
    st["acc_q"] = acc_q
    if mod_code != 0:
        acc_qi += quarter_im4_sum(out_sym, iv0, nout, inv_amp)
    st["acc_qi"] = acc_qi
    st["acc_mid"] = acc_mid
    st["blk_n"] = blk_n
    st["blk_m2"] = blk_m2
    st["blk_m4"] = blk_m4
    st["ph_cos"] = cs
    st["ph_sin"] = sn
    st["ph_theta"] = theta_ph
    st["ph_count"] = nresync
    return nout, go_batch


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def batch_strobes(x2, base, t0, half, h0, nh, idx, wts, out_r, out_i):
    """The cubic interpolant (:func:`cubic_strobe`, the same arithmetic) at ``t0 + h half``, ``h0 <= h < h0 + nh``.

    ``x2`` the buffer (sample ``base`` first) as interleaved floats; ``idx`` (int64), ``wts`` (float32, 4 rows)
    and ``out_r``, ``out_i`` (float32, strobe ``h`` at ``h - h0``) at least ``nh`` long.
    The weights in one loop and the sums in another: the first has no gathered loads and runs in
    vector registers, which takes the interpolator from about 5 to 3 ns a strobe here.
    """
    for h in range(nh):
        th = t0 + (h0 + h) * half
        m = int(math.floor(th))
        idx[h] = 2 * (m - base) - 2
        wts[0, h], wts[1, h], wts[2, h], wts[3, h] = cubic_weights(np.float32(th - m))
    u1 = np.uint64(1)
    u2 = np.uint64(2)
    u3 = np.uint64(3)
    u4 = np.uint64(4)
    u5 = np.uint64(5)
    u6 = np.uint64(6)
    u7 = np.uint64(7)
    for h in range(nh):
        k = np.uint64(idx[h])  # unsigned: no negative-index wrap is compiled (1.2 ns a symbol)
        out_r[h] = wts[0, h] * x2[k] + wts[1, h] * x2[k + u2] + wts[2, h] * x2[k + u4] + wts[3, h] * x2[k + u6]
        out_i[h] = wts[0, h] * x2[k + u1] + wts[1, h] * x2[k + u3] + wts[2, h] * x2[k + u5] + wts[3, h] * x2[k + u7]


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def rotation(w):
    """``(cos w, sin w)``: Taylor series to the 8th and 9th order below 0.25 rad (error under 3e-13), else exact."""
    if -0.25 < w < 0.25:
        w2 = w * w
        c = 1.0 - w2 * (0.5 - w2 * (1.0 / 24.0 - w2 * (1.0 / 720.0 - w2 / 40320.0)))
        s = w * (1.0 - w2 * (1.0 / 6.0 - w2 * (1.0 / 120.0 - w2 * (1.0 / 5040.0 - w2 / 362880.0))))
        return c, s
    return math.cos(w), math.sin(w)


@njit(cache=True, nogil=True, fastmath=_TRACK_FASTMATH)
def track_locked(mf, base, t_limit, params, mod_code, third_order, state, c_table,
                 out_pos, out_bitpos, out_soft, out_sym, out_flags, out_theta):
    """The locked loop of :func:`track_symbols` (its arguments; BPSK/QPSK, the cubic): ``(written, lost)``.

    Called at a symbol's start with carrier and symbol lock held.  Symbols go in batches: the symbols whose
    on-time strobes fall in one cell of ``stat_symbols / BATCH_CELLS`` nominal symbol periods on the
    recording's sample grid (16 symbols) and whose strobes the buffer holds before ``t_limit``.  A batch's
    strobes stand at ``t + k sps (1 - v) / 2`` and its carrier phase advances by the frequency integrator per
    symbol; the loops' errors (each normalised and clipped as :func:`track_each` does) are summed over the
    batch and taken at its end, and the statistics interval closes between batches.  A batch that fills the
    output buffers is kept in the state (``b_*``) and finished by the next call with new buffers, exactly.
    ``lost``: the lock went at an interval's close (:func:`track_each` goes on); else the data, ``t_limit``
    or the buffers ended the call.
    """
    n_mf = mf.shape[0]
    cap = out_pos.shape[0]
    pr = params[0]
    sps = pr["sps"]
    inv_span = 1.0 / (pr["stat_symbols"] * sps)
    inv_cell = inv_span * BATCH_CELLS
    cell_len = 1.0 / inv_cell
    inv_sps = 1.0 / sps
    warmup = pr["warmup"]
    v_max = pr["v_max"]
    look = 2
    sqrt2 = math.sqrt(2.0)
    inv_sqrt2 = 1.0 / sqrt2
    x2 = mf.view(np.float32)

    st = state[0]
    t = st["t"]
    v_int = st["v_int"]
    theta = st["theta"]
    w_int = st["w_int"]
    w_rate = st["w_rate"]
    qr = st["q1r"]
    qi = st["q1i"]
    q3r = st["q3r"]
    q3i = st["q3i"]
    pr_ = st["p1r"]
    pi_ = st["p1i"]
    p2r = st["p2r"]
    p2i = st["p2i"]
    p3r = st["p3r"]
    p3i = st["p3i"]
    t_on = st["t_on"]
    pend_ec = st["pend_ec"]
    pend_et = st["pend_et"]
    inv_amp = st["inv_amp"]
    kdc = st["kdc"]
    clock = st["clock"]
    slock = st["slock"]
    soft_on = st["soft_on"] == 1
    a_soft = st["a_soft"]
    c_clip = st["c_clip"]
    acc_n = st["acc_n"]
    cur_epoch = st["stat_epoch"]
    acc_r2 = st["acc_r2"]
    acc_r4 = st["acc_r4"]
    acc_q = st["acc_q"]
    acc_qi = st["acc_qi"]
    acc_mid = st["acc_mid"]
    blk_n = st["blk_n"]
    blk_m2 = st["blk_m2"]
    blk_m4 = st["blk_m4"]
    cs = st["ph_cos"]
    sn = st["ph_sin"]
    theta_ph = st["ph_theta"]
    nresync = st["ph_count"]
    # the batch in progress (nb > j0: the last call's buffers filled within it)
    nb = st["b_nb"]
    j0 = st["b_j"]
    t0 = st["b_t0"]
    half = st["b_half"]
    w = st["b_w"]
    cw = st["b_cw"]
    sw = st["b_sw"]
    c = st["b_c"]
    s = st["b_s"]
    e_c = st["b_ec"]
    e_t = st["b_et"]
    flags = clock + 2 * slock
    trk = st["clock"]  # 1 here (locked); an int64 like track_each's, so close_interval compiles once
    g_c, g_t, kp_tl, ki_tl, kp_cl, ki_cl, kr_cl = loop_gains(pr, st, soft_on, inv_amp, kdc)
    u1 = np.uint64(1)
    idx = np.empty(2 * BATCH_MAX, dtype=np.int64)
    wts = np.empty((4, 2 * BATCH_MAX), dtype=np.float32)
    str_r = np.empty(2 * BATCH_MAX, dtype=np.float32)
    str_i = np.empty(2 * BATCH_MAX, dtype=np.float32)
    nout = 0
    iv0 = 0
    lost = False
    while True:
        if j0 >= nb:
            # a new batch: its symbols, the statistics interval closed as track_each would at the first
            if not t < t_limit:
                break
            half = 0.5 * sps * (1.0 - v_int)
            # the symbols whose on-time strobes share the cell of this one (an estimate, then made exact) and
            # whose last strobe lies before t_limit and within the buffer (floor(x) + look < base + n_mf)
            cell = math.floor(t * inv_cell)
            nb = min(max(int(((cell + 1.0) * cell_len - t) * inv_sps) + 1, 1), BATCH_MAX)
            while nb > 1 and math.floor((t + (2 * (nb - 1)) * half) * inv_cell) != cell:
                nb -= 1
            while nb < BATCH_MAX and math.floor((t + (2 * nb) * half) * inv_cell) == cell:
                nb += 1
            lim = min(t_limit, float(base + n_mf - look))
            while nb > 0 and not t + (2 * nb - 1) * half < lim:
                nb -= 1
            if nb == 0:
                break  # the next symbol's strobes are in the next call's samples
            epoch = int(math.floor(t * inv_span))
            if acc_n > 0 and (epoch != cur_epoch or (acc_n >= 8 and st["seen"] + acc_n < warmup)):
                if mod_code != 0:
                    acc_qi += quarter_im4_sum(out_sym, iv0, nout, inv_amp)
                (inv_amp, kdc, clock, slock, flags, trk, soft_on, a_soft, c_clip, g_c, g_t, kp_tl, ki_tl, kp_cl,
                 ki_cl, kr_cl) = close_interval(st, pr, c_table, mod_code, acc_n, acc_r2, acc_r4, acc_q, acc_qi,
                                                acc_mid, inv_amp, kdc, clock, slock, flags, trk, soft_on, a_soft,
                                                c_clip, g_c)
                acc_n = 0
                acc_r2 = 0.0
                acc_r4 = 0.0
                acc_q = 0.0
                acc_qi = 0.0
                iv0 = nout
                acc_mid = 0.0
            cur_epoch = epoch
            if clock == 0 or slock == 0:
                nb = 0
                lost = True
                break
            cs, sn, nresync = phasor_step(theta, theta_ph, cs, sn, nresync)
            t0 = t
            w = w_int
            cw, sw = rotation(w)
            c = cs
            s = sn
            e_c = pend_ec
            e_t = pend_et
            j0 = 0
        # symbols j0 .. j1 - 1 of the batch (all that the buffers take): the strobes, then each symbol
        # derotated, detected, summed and written
        j1 = min(nb, j0 + cap - nout)
        if j1 <= j0:
            break  # buffers full
        batch_strobes(x2, base, t0, half, 2 * j0, 2 * (j1 - j0), idx, wts, str_r, str_i)
        sr = 0.0
        sq = 0.0
        for j in range(j0, j1):
            h = np.uint64(2 * (j - j0))  # unsigned indices: no negative-index wrap is compiled
            vr = float(str_r[h])
            vi = float(str_i[h])
            sr, sq = derotated(vr, vi, c, s)
            c, s = c * cw - s * sw, s * cw + c * sw
            et = pr_ * (vr - qr) + pi_ * (vi - qi)
            mid_e = pr_ * pr_ + pi_ * pi_
            q3r = qr
            q3i = qi
            qr = vr
            qi = vi
            p3r = pr_
            p3i = pi_
            pr_ = float(str_r[h + u1])
            pi_ = float(str_i[h + u1])
            if mod_code == 0:
                ec_raw = sq if sr >= 0.0 else -sq
            elif soft_on:
                yr = sr * inv_amp
                yi = sq * inv_amp
                ec_raw = soft_costas_error(a_soft, yr, yi, yi, yr)
            else:
                sg_i = 1.0 if sr >= 0.0 else -1.0
                sg_q = 1.0 if sq >= 0.0 else -1.0
                ec_raw = (sg_i * sq - sg_q * sr) * inv_sqrt2
            e_c += min(max(ec_raw * g_c, -c_clip), c_clip)
            e_t += min(max(et * g_t, -1.0), 1.0)
            sr2 = sr * sr
            sq2 = sq * sq
            r2 = sr2 + sq2
            r4 = r2 * r2
            if mod_code == 0:
                acc_q += sr2 - sq2
            else:
                acc_q -= sr2 * sr2 - 6.0 * sr2 * sq2 + sq2 * sq2
            acc_r2 += r2
            acc_r4 += r4
            acc_mid += mid_e
            blk_m2 += r2
            blk_m4 += r4
            k = np.uint64(nout + j - j0)
            t_on = t0 + (2 * j) * half
            out_pos[k] = t_on
            yr = sr * inv_amp
            yi = sq * inv_amp
            if mod_code == 0:
                out_bitpos[k] = t_on
                out_soft[k] = yr
            else:
                k2 = k + k
                out_bitpos[k2] = t_on
                out_bitpos[k2 + u1] = t_on
                out_soft[k2] = sqrt2 * yr
                out_soft[k2 + u1] = sqrt2 * yi
            out_sym[k] = complex(yr, yi)
            out_flags[k] = flags
            out_theta[k] = theta + (j + 0.5) * w
        nout += j1 - j0
        acc_n += j1 - j0
        blk_n += j1 - j0
        p2r = sr  # the last symbol's derotated on-time value, where track_each leaves it
        p2i = sq
        j0 = j1
        if j1 < nb:
            t = t0 + (2 * j1) * half  # the next strobe (the buffer's tail is kept from it)
            break  # buffers full within the batch
        # the batch done: the phasor stands at its end; the loops take its errors (and the one pending before it)
        cs = c
        sn = s
        theta_ph = theta + nb * w
        nresync += nb
        if third_order == 1:
            w_rate += kr_cl * e_c
        theta += nb * w + kp_cl * e_c
        w_int += ki_cl * e_c + nb * w_rate
        v_int += ki_tl * e_t
        if v_int > v_max:
            v_int = v_max
        elif v_int < -v_max:
            v_int = -v_max
        # the proportional timing correction within a quarter symbol: the strobes stay in order
        corr = min(max(sps * kp_tl * e_t, -0.25 * sps), 0.25 * sps)
        t = t0 + (2 * nb) * half - corr
        pend_ec = 0.0
        pend_et = 0.0

    st["b_nb"] = nb
    st["b_j"] = j0
    st["b_t0"] = t0
    st["b_half"] = half
    st["b_w"] = w
    st["b_cw"] = cw
    st["b_sw"] = sw
    st["b_c"] = c
    st["b_s"] = s
    st["b_ec"] = e_c
    st["b_et"] = e_t
    st["t"] = t
    st["v_int"] = v_int
    st["theta"] = theta
    st["w_int"] = w_int
    st["w_rate"] = w_rate
    st["q3r"] = q3r
    st["q3i"] = q3i
    st["q1r"] = qr
    st["q1i"] = qi
    st["p3r"] = p3r
    st["p3i"] = p3i
    st["p2r"] = p2r
    st["p2i"] = p2i
    st["p1r"] = pr_
    st["p1i"] = pi_
    st["t_on"] = t_on
    st["parity"] = 0
    st["pend_ec"] = pend_ec
    st["pend_et"] = pend_et
    st["inv_amp"] = inv_amp
    st["kdc"] = kdc
    st["a_soft"] = a_soft
    st["c_clip"] = c_clip
    st["soft_on"] = 1 if soft_on else 0
    st["clock"] = clock
    st["slock"] = slock
    st["acc_n"] = acc_n
    st["stat_epoch"] = cur_epoch
    st["acc_r2"] = acc_r2
    st["acc_r4"] = acc_r4
    st["acc_q"] = acc_q
    if mod_code != 0:
        acc_qi += quarter_im4_sum(out_sym, iv0, nout, inv_amp)
    st["acc_qi"] = acc_qi
    st["acc_mid"] = acc_mid
    st["blk_n"] = blk_n
    st["blk_m2"] = blk_m2
    st["blk_m4"] = blk_m4
    st["ph_cos"] = cs
    st["ph_sin"] = sn
    st["ph_theta"] = theta_ph
    st["ph_count"] = nresync
    return nout, lost


def track_symbols(mf, base, t_limit, params, mod_code, third_order, state, c_table,
                  out_pos, out_bitpos, out_soft, out_sym, out_flags, out_theta):
    """Gardner timing recovery with a cubic (Farrow) interpolator and a symbol-rate carrier loop.

    Parameters
    ----------
    mf : complex64 array
        Matched-filter output (or, with ``hbox > 0``, the derotated samples); ``mf[i]`` is
        centred on recording sample ``base + i``.  ``int(hbox + 0.5) + 2`` samples (2 for the
        cubic) are needed on each side of a strobe.
    base : int
        Absolute sample index of ``mf[0]``.
    t_limit : float
        No strobe at or beyond this sample position is taken (end of the recording at flush).
    params : TRACK_PARAMS record array of length 1
        ``sps``; timing loop gains ``kp_t, ki_t``; carrier loop gains ``kp_c, ki_c, kr_c`` and the
        first-order gain ``kp_c_wide`` used while unlocked; ``stat_symbols`` the statistics interval
        in nominal symbol periods, and ``l_amp`` (M2M4 amplitude), ``l_lock_c``, ``l_lock_s`` (lock
        detectors) the logarithms ``log(1 - a)`` of per-symbol averages of weight ``a``; carrier lock
        ``c_on, c_off`` (relative) and ``c_min`` (absolute); symbol lock ``s_on, s_off, s_min``;
        ``r0`` the noise-free midpoint energy ratio, ``kd`` the Gardner detector gain; ``warmup``
        symbols averaged before any lock is declared; ``hbox > 0`` selects the exact
        integrate-and-dump of half-width ``hbox`` samples over unfiltered samples (rect pulses)
        instead of the cubic interpolator over matched-filter output; ``v_max`` bounds the timing
        rate integrator (the symbol rate may differ from nominal by at most this fraction);
        ``dd_gain`` 1 scales the carrier
        detector by the decision-directed slope at the measured Es/N0 (see Notes), 0 leaves it;
        ``t_ref_esn0`` (linear) and ``t_min_scale``: in lock, the timing loop's bandwidth is scaled by
        ``Es/N0 / t_ref_esn0`` when below 1, never below ``t_min_scale``; ``c_bn`` the carrier loop's
        ``B_L T`` and ``c_loop_snr`` the loop SNR it keeps in lock (its bandwidth scaled down to
        ``(Es/N0) S_L / c_loop_snr``, never below ``t_min_scale``: see Notes); ``gear_symbols`` the
        symbols of lock after which they apply; ``c_hold`` the symbols in a row the carrier lock
        condition must hold before lock is declared.  QPSK/OQPSK at low Es/N0 (all 0 for BPSK):
        ``soft_below`` (linear Es/N0) below which the carrier loop takes the soft detector, its slope
        from ``c_table`` on the grid ``ct_db0 + k ct_step`` dB; ``c_min_scale`` the narrowest carrier
        bandwidth (fraction of ``c_bn``); ``pull_symbols`` the symbols a carrier found by the
        acquisition is tracked before lock (the wrapper sets ``pull_left``); the long lock average:
        ``l_lock_slow`` its ``log(1 - a)``, ``c_on_slow`` (relative), ``c_min_slow`` (absolute),
        ``c_hold_slow`` its hold, ``slow_esn0`` the Es/N0 (linear) below which it holds a lock the
        short average lost; ``c_mag`` the lowest locked value of the fourth-power statistic taken from its
        own window, as a fraction of ``S^2`` (1 for BPSK: ``S^2`` alone; see Notes); ``batch > 0``: in lock,
        BPSK/QPSK symbols go in batches with the loops held over each (:func:`track_locked`; Notes).
    c_table : float64 array
        Slope of the soft QPSK detector per radian at the Es/N0 grid above
        (:func:`pipeline.demod._demodulator.soft_costas_slope`); any array for BPSK.
    mod_code : int
        0 BPSK, 1 QPSK, 2 OQPSK.
    third_order : int
        1 for the third-order carrier loop (rate integrator), else second order.
    state : TRACK_STATE record array of length 1, updated in place
        ``t`` next half-strobe (samples), ``v_int`` timing rate integrator, ``theta`` carrier
        phase (rad, unwrapped), ``w_int`` carrier frequency integrator (rad/symbol), ``w_rate``
        carrier rate integrator, ``p1r .. p3i`` the previous three half-strobe values (carrier-corrected;
        BPSK/QPSK midpoints as interpolated), ``q1r .. q3i`` the last two on-time values as
        interpolated (BPSK/QPSK timing detector), ``t_on``
        position of the pending on-time strobe, ``parity`` (0 = the next half-strobe is on-time),
        ``pend_ec, pend_et`` the normalised carrier and timing errors of the last symbol, which the
        loops take at the next one;
        the statistics: ``m2s, m4s, wsum`` averages of ``|r|^2``, ``|r|^4`` and their weight,
        ``cnum, cden`` carrier-lock averages (``cnum_i`` the imaginary part of ``r^4``'s, QPSK/OQPSK),
        ``m2f, m4f, wf`` the M2M4 averages over the carrier-lock window, ``eon, emid`` on-time / midpoint
        energy averages, ``amp`` the amplitude, ``inv_amp`` its inverse, ``kdc`` the carrier detector's slope,
        ``clock`` / ``slock`` carrier / symbol lock, ``seen`` symbols seen (saturating at ``warmup``),
        ``cgood`` symbols in a row meeting the lock condition; the sums of the statistics
        interval in progress ``acc_n, acc_r2, acc_r4, acc_q, acc_qi, acc_mid``; the block sums for the
        Es/N0 estimate ``blk_n, blk_m2, blk_m4`` (of ``|r|^2`` and ``|r|^4``, reset by the caller);
        ``ph_cos, ph_sin`` the carrier phasor at phase ``ph_theta``, ``ph_count`` half-strobes
        since it was last recomputed exactly; ``pull_left`` symbols of tracking left awaiting lock,
        ``m2g, m4g, wg, cnum_g`` the long averages (M2M4 and the fourth-power statistic),
        ``cgood_g`` symbols in a row meeting the long lock condition, ``lock_path`` 1 when the long
        average holds the lock, ``soft_on`` the soft detector in use with scale ``a_soft`` and the
        bound ``c_clip`` of the normalised carrier error.
    out_pos, out_bitpos, out_soft, out_sym, out_flags, out_theta
        Per symbol (length ``cap``): position of the on-time (I) strobe (samples); per channel bit
        (length ``cap`` for BPSK, ``2 cap`` for QPSK/OQPSK, I then Q): the position of the strobe it
        was taken at (OQPSK: the Q bit's midpoint strobe half a symbol later; BPSK may pass
        ``out_pos`` itself) and the soft value (the normalised symbol's real part, QPSK/OQPSK its
        real and imaginary parts times ``sqrt 2``); per symbol the carrier-corrected symbol divided by
        the amplitude estimate (noise-free symbols about unit magnitude), flags (bit 0 carrier lock,
        bit 1 symbol lock) and the carrier phase.

    Returns
    -------
    int
        Number of symbols written.  It equals ``cap`` only when the buffers filled up; the state
        then stands just before the next symbol, and a call with new buffers continues exactly.

    Notes
    -----
    The serial loop holds only the interpolator, the two detectors and the loop filters.  Two
    interpolants per symbol (on-time and midpoint) are taken at ``t`` by a cubic Lagrange
    interpolator (four weights from ``mu``, shared by I and Q); the strobe advances by
    ``sps (1 - v) / 2`` per half-strobe with the proportional timing correction applied once per
    symbol.  Timing error (Gardner 1986) ``e = Re{m^* (s_k - s_{k-1})}``, which does not depend on
    a common phase, so BPSK/QPSK take it on the values as interpolated and only the on-time value
    is carrier-corrected (OQPSK: I and Q each with their own midpoint, all corrected), normalised by
    ``A^2 K_D`` and clipped to +-1; ``|v| <= v_max``.  So a symbol advances the strobe by at least
    ``sps (1 - v_max - kp_t)`` samples, and a call writes at most ``len(mf) / (sps (1 - v_max - kp_t))
    + 2`` symbols (the bound the wrapper sizes the buffers by).  Carrier error: decision-directed
    Costas, ``sgn(I) Q`` (BPSK), ``sgn(I) Q - sgn(Q) I`` over ``sqrt(2) A`` (QPSK; OQPSK takes I and
    Q at their own strobes), divided by the detector's slope ``kdc`` so that the loop's gain, and
    its bandwidth, hold at low Es/N0.  QPSK/OQPSK below ``soft_below`` (once the lock window's
    weight passes 0.4, about 1000 symbols into a stream): the soft (MAP) detector
    ``tanh(a I) Q - tanh(a Q) I`` on the symbol over its amplitude, ``a = sqrt(2) Es/N0``
    (:func:`soft_costas_error`), which is ``1 / (sqrt(2) x)`` times the derivative of the
    non-data-aided log-likelihood of the phase: its slope equals ``J / (sqrt(2) x)`` with the Fisher
    information ``J`` per symbol (``c_table``), so divided by the slope the error has unit slope and
    variance ``1 / J``, clipped at ``4 / sqrt(J)``.  (The hard QPSK detector's slope is
    ``erf(u) - 2 u exp(-u^2) / sqrt(pi)``, ``u = sqrt(Es/2N0)``, not ``erf(u)``: 0.08 at -3 dB
    against 0.52, and its ``J`` 0.010 against the soft one's 0.025.)  While the carrier is
    unlocked, and no carrier found by the acquisition is being pulled in (``pull_left``, with the
    soft detector on), the loop runs first order
    with a wider gain and both integrators hold their value (coasting through fades).

    Amplitude, lock detectors and their averages are updated from sums the loop accumulates, once
    per interval of ``stat_symbols`` nominal symbol periods on the recording's sample grid (a
    symbol whose on-time strobe enters a new interval closes the last one; every 8 symbols during
    the warm-up), so that two receivers that have converged on the same signal (the segments of a
    recording) update at the same symbols.  An average of weight ``a`` per symbol becomes one of
    weight ``1 - (1 - a)^n`` over ``n`` symbols; the symbols of an interval are normalised by, and
    flagged with, what the intervals before gave.  Amplitude from the M2M4 moments
    (``S = sqrt(2 M2^2 - M4)``), which need no carrier or decisions.  The decision-directed slope
    at ``Es/N0 = S / (M2 - S)`` (:func:`hard_costas_slope`): ``erf(sqrt(Es/N0))`` (BPSK) and
    ``erf(u) - 2 u exp(-u^2) / sqrt(pi)`` (QPSK above ``soft_below``; OQPSK with the other rail's power
    between its symbols, ``1 - r0``, in front of the second term).  Below
    ``soft_below`` amplitude and Es/N0 come from the long window once its weight passes 1/4 (over 1024
    symbols M2M4's ``S`` spreads by about 25 % at -3 dB).

    Carrier lock: ``Re(r^2)`` (BPSK) or ``-Re(r^4)`` (QPSK/OQPSK) averaged over the lock window, whose
    value in lock is ``S`` or ``S^2`` when the noise is Gaussian and circular, against ``c_on`` (lock, held
    ``c_hold`` symbols in a row) and ``c_off`` (loss) times that, and against ``c_min`` (``c_min / 2`` for the
    loss) times ``M2`` or ``M4``.  QPSK/OQPSK: noise that is not Gaussian lowers ``-Re E r^4`` and raises
    M2M4's ``S`` (rails clipped before the matched filter: the clipping's distortion is tied to the data and
    sub-Gaussian; at rails clipped at their rms ``-Re E r^4`` is 0.44 ``S^2`` in lock and M2M4 reads Es/N0
    2.6 dB high), so the locked value is the window's own ``|E r^4|`` where that is lower than ``S^2``, but
    not below ``c_mag S^2``: in lock ``-Re E r^4 = |E r^4|`` whatever the noise, while a loop slipping
    cycles averages ``E r^4`` down (and turns it), which ``c_mag`` and ``c_min`` bound.  Every lock the
    ``S^2`` test declares is declared as soon and held at least as long.

    QPSK/OQPSK lock at low Es/N0: the fourth-power statistic's noise over the short window (2048
    symbols) is larger than its locked value below about 0 dB, so a long window (``l_lock_slow``,
    65536 symbols) gives a second condition, ``-Re(r^4) / M4 > max(c_on_slow S^2 / M4, c_min_slow)``
    over ``c_hold_slow`` symbols in a row once its weight passes 1/4, which may declare lock only while
    a carrier found by the acquisition is being pulled in; it holds a lock the short average lost
    when the long window's Es/N0 is below ``slow_esn0``, and lets it go when the long statistic falls
    below ``c_off`` times its locked value or half its floor.  After the signal goes, such a lock
    is reported for up to about one long window.

    Loop bandwidths from Es/N0 (once lock has been held for ``gear_symbols``; the full ones before,
    so that the loops pull in; a found carrier pulled in takes the narrowed carrier loop at once,
    its frequency being close): the timing loop's noise
    grows as ``1 / (Es/N0)`` at low Es/N0, so its bandwidth is scaled by ``Es/N0 / t_ref_esn0``
    below ``t_ref_esn0``; the carrier loop keeps a loop SNR of at least ``c_loop_snr`` where the
    configured bandwidth would not, ``B_L T <= (Es/N0) S_L / rho`` with the hard detector's squaring loss
    ``S_L`` (:func:`hard_costas_squaring_loss`: BPSK ``erf(sqrt(Es/N0))^2``, QPSK worked from the
    detector's slope and variance), and with the soft detector
    ``B_L T <= J / (2 rho)`` (phase variance ``2 B_L T / J``), never below ``c_min_scale``; after
    ``gear_symbols`` the soft detector's loop narrows as ``gear / age`` of the full bandwidth down to
    that.  Gains scale as ``kp ~ s``, ``ki ~ s^2``, ``kr ~ s^3`` (the damping stays).
    Cost: two interpolations and about 60 flops per symbol, plus about 100 flops per interval.

    In lock (carrier and symbol; BPSK/QPSK over the cubic) :func:`track_each` hands over to
    :func:`track_locked` at a symbol's start, which takes the symbols in batches: those whose on-time
    strobes fall in one cell of 16 nominal symbol periods on the recording's sample grid (a quarter of the
    statistics interval, so that intervals close between batches) and whose strobes the buffer holds.  Over
    a batch the loops hold: the strobes stand ``sps (1 - v) / 2`` apart, the phase advances by the frequency
    integrator per symbol, each symbol's errors are normalised and clipped as above and their sum is taken
    at the batch's end (the proportional timing step bounded to a quarter symbol, so the strobes stay in
    order).  The loops' delay grows from one symbol to 1-17: at ``B_L T = 0.002`` the carrier loop's
    crossover is near ``2 zeta omega_n T = 0.0053`` rad a symbol, so about 8 symbols more cost some 0.04 rad
    (2.4 deg) of phase margin.  Without feedback inside a batch the interpolation runs as straight loops (the
    weights in vector registers): 28 -> 22 ns a symbol on the 2 Msym/s QPSK link, with the implementation
    loss unchanged (DEVELOPERS.md).  Acquisition, pull-in, an unlocked loop, OQPSK and rect pulses stay per
    symbol; a lock lost at an interval's close hands back.  A batch whose output buffers fill is kept in
    the state and finished by the next call, exactly.

    References
    ----------
    F. M. Gardner, "A BPSK/QPSK timing-error detector for sampled receivers", IEEE Trans. Commun.
    COM-34 (1986) 423-429; U. Mengali, A. N. D'Andrea, *Synchronization Techniques for Digital
    Receivers* (1997), sec. 5.7 (decision-directed phase detectors, their S-curve slope);
    W. C. Lindsey, M. K. Simon, *Telecommunication Systems Engineering* (1973), ch. 2 (Costas loop
    squaring loss); Mengali and D'Andrea ch. 5 (maximum-likelihood non-data-aided phase recovery).
    """
    # A plain function that hands over between the two kernels: a compiled one would compile both for every
    # link, and track_locked (about 2 s from an empty cache) serves only the links that batch.
    bps = 1 if mod_code == 0 else 2
    st = state[0]
    pr = params[0]
    batch_ok = pr["batch"] > 0.0 and pr["hbox"] == 0.0 and mod_code != 2
    nout = 0
    while True:
        views = (out_pos[nout:], out_bitpos[bps * nout:], out_soft[bps * nout:], out_sym[nout:], out_flags[nout:],
                 out_theta[nout:])
        if batch_ok and st["parity"] == 0 and st["clock"] == 1 and st["slock"] == 1:
            n, lost = track_locked(mf, base, t_limit, params, mod_code, third_order, state, c_table, *views)
            nout += n
            if not lost:
                return nout
        else:
            n, go_batch = track_each(mf, base, t_limit, params, mod_code, third_order, state, c_table, *views)
            nout += n
            if not go_batch:
                return nout



#: Fields of :func:`block_summary`'s output record.
BLOCK_SUMMARY = np.dtype([
    ("mid", np.float64), ("theta_mid", np.float64), ("loop_hz_per_fs", np.float64), ("spread_per_fs", np.float64),
    ("locked", np.int64), ("last_locked", np.int64),
])


@njit(cache=True, nogil=True)
def block_summary(pos, theta, flags, n_sub, out):
    """What a block's track point needs from its symbols, in one pass; ``out`` a BLOCK_SUMMARY record array.

    ``mid`` = middle of the symbols' interval ``(pos[0] + pos[-1]) / 2`` and ``theta_mid`` the carrier
    phase there (linear between the two symbols around it); ``loop_hz_per_fs`` the loop's mean
    frequency ``(theta[-1] - theta[0]) / (2 pi (pos[-1] - pos[0]))`` in cycles per sample (nan below
    64 symbols); ``spread_per_fs`` the standard deviation of the mean frequencies of ``n_sub`` equal
    sub-intervals about a straight line fitted to them, ``n_sub - 2`` degrees of freedom (cycles
    per sample; nan below 64 symbols); ``locked`` the symbols with carrier lock (flag bit 0) and
    ``last_locked`` the index of the last one (-1: none).  Cost O(n).
    """
    n = pos.shape[0]
    o = out[0]
    cnt = 0
    last = -1
    for i in range(n):
        if flags[i] & 1:
            cnt += 1
            last = i
    o["locked"] = cnt
    o["last_locked"] = last
    nan = math.nan
    o["mid"] = nan
    o["theta_mid"] = nan
    o["loop_hz_per_fs"] = nan
    o["spread_per_fs"] = nan
    if n == 0:
        return
    mid = 0.5 * (pos[0] + pos[n - 1])
    k = 0
    while k + 1 < n and pos[k + 1] < mid:
        k += 1
    if k + 1 < n and pos[k + 1] > pos[k]:
        theta_mid = theta[k] + (theta[k + 1] - theta[k]) * (mid - pos[k]) / (pos[k + 1] - pos[k])
    else:
        theta_mid = theta[k]
    o["mid"] = mid
    o["theta_mid"] = theta_mid
    if n < 64 or not pos[n - 1] > pos[0]:
        return
    two_pi = 2.0 * math.pi
    o["loop_hz_per_fs"] = (theta[n - 1] - theta[0]) / (two_pi * (pos[n - 1] - pos[0]))
    # sub-interval frequencies f_j at times t_j (two passes: centred sums, no cancellation)
    fj = np.empty(n_sub, dtype=np.float64)
    tj = np.empty(n_sub, dtype=np.float64)
    for j in range(n_sub):
        e0 = (j * (n - 1)) // n_sub
        e1 = ((j + 1) * (n - 1)) // n_sub
        dt = pos[e1] - pos[e0]
        if not dt > 0.0:
            return
        fj[j] = (theta[e1] - theta[e0]) / (two_pi * dt)
        tj[j] = 0.5 * (pos[e0] + pos[e1]) - mid
    mf = 0.0
    mt = 0.0
    for j in range(n_sub):
        mf += fj[j]
        mt += tj[j]
    mf /= n_sub
    mt /= n_sub
    stt = 0.0
    stf = 0.0
    for j in range(n_sub):
        stt += (tj[j] - mt) * (tj[j] - mt)
        stf += (tj[j] - mt) * (fj[j] - mf)
    slope = stf / stt if stt > 0.0 else 0.0
    rss = 0.0
    for j in range(n_sub):
        r = fj[j] - mf - slope * (tj[j] - mt)
        rss += r * r
    o["spread_per_fs"] = math.sqrt(rss / (n_sub - 2))


@njit(cache=True, nogil=True)
def nrzm_decode(soft, prev, out):
    """Soft NRZ-M to NRZ-L: ``out[i] = sgn(a) sgn(b) min(|a|, |b|)`` of successive values.

    ``prev`` is the last soft value of the previous call (0.0 at the start: the first bit is an
    erasure because the reference level is unknown).  Returns the new ``prev``.
    Same sign (no level change) gives a positive value, i.e. bit 0 (CCSDS 131.0-B-2 sec. 3.3.3).
    """
    p = prev
    for i in range(soft.shape[0]):
        a = soft[i]
        mag = abs(a) if abs(a) < abs(p) else abs(p)
        if (a >= 0.0) == (p >= 0.0):
            out[i] = mag
        else:
            out[i] = -mag
        p = a
    return p


@njit(cache=True, nogil=True)
def moments_m2m4(sym, out):
    """``out[0] = mean |r|^2``, ``out[1] = mean |r|^4`` over complex symbols (float64 sums)."""
    s2 = 0.0
    s4 = 0.0
    n = sym.shape[0]
    for i in range(n):
        r2 = float(sym[i].real) ** 2 + float(sym[i].imag) ** 2
        s2 += r2
        s4 += r2 * r2
    if n > 0:
        out[0] = s2 / n
        out[1] = s4 / n
    else:
        out[0] = 0.0
        out[1] = 0.0


@njit(cache=True, nogil=True)
def moment_sums(x2, acc, cnt):
    """Add the samples of ``x2`` (complex, as interleaved float32) to 16 partial sums of re, im and
    ``|x|^2`` (``acc``, shape (3, 16), float64) and of the non-zero count (``cnt``, 16 int64).

    Sample ``i`` goes to lane ``i % 16`` (the tail of a length not a multiple of 16 to lane 0), so the
    loop vectorises and gives the same sums compiled or not; every sample enters the sums (a NaN or
    Inf makes them non-finite)."""
    lanes = 16
    n = x2.shape[0] // 2
    nb = n - n % lanes
    for i0 in range(0, 2 * nb, 2 * lanes):
        for j in range(lanes):
            re = np.float64(x2[i0 + 2 * j])
            im = np.float64(x2[i0 + 2 * j + 1])
            p = re * re + im * im
            acc[0, j] += re
            acc[1, j] += im
            acc[2, j] += p
            cnt[j] += 1 if p > 0.0 else 0
    for i in range(nb, n):
        re = np.float64(x2[2 * i])
        im = np.float64(x2[2 * i + 1])
        p = re * re + im * im
        acc[0, 0] += re
        acc[1, 0] += im
        acc[2, 0] += p
        cnt[0] += 1 if p > 0.0 else 0


@njit(cache=True, nogil=True)
def moment_means(acc, cnt, out):
    """``out[:3]`` = the partial sums of :func:`moment_sums` added in lane order, divided by the count
    (left as sums when it is 0); returns the count."""
    total = 0
    for j in range(cnt.shape[0]):
        total += cnt[j]
    for c in range(3):
        v = 0.0
        for j in range(cnt.shape[0]):
            v += acc[c, j]
        out[c] = v / total if total > 0 else v
    return total


@njit(cache=True, nogil=True)
def mean_power_nonzero(x, out):
    """Over the non-zero samples of ``x`` (zeros are erasures): ``out = [mean re, mean im, mean |x|^2]``.

    Returns the number of non-zero samples (``out`` is all zero when there is none).  A NaN or Inf
    sample makes the means non-finite (every sample enters the sums), which is how a caller sees it.
    Sums in double precision over 16 interleaved partial sums (:func:`moment_sums`), so the loop
    vectorises and gives the same result compiled or not; about 1 ns per sample.
    """
    acc = np.zeros((3, 16), dtype=np.float64)
    cnt = np.zeros(16, dtype=np.int64)
    moment_sums(x.view(np.float32), acc, cnt)
    return moment_means(acc, cnt, out)


@njit(cache=True, nogil=True)
def remove_dc(x, dc_re, dc_im, out):
    """``out[n] = x[n] - dc`` for the non-zero samples of ``x``; erasures (zeros) stay zero."""
    for i in range(x.shape[0]):
        re = x[i].real
        im = x[i].imag
        if re != 0.0 or im != 0.0:
            out[i] = complex(re - dc_re, im - dc_im)
        else:
            out[i] = 0j


@njit(cache=True, nogil=True, fastmath={"contract", "reassoc"})
def cancel_tones(x2, n0, freqs, sub, amps):
    """Take CW tones out of a block in place: per tone and per stretch of ``sub`` samples, its projection.

    Parameters
    ----------
    x2 : float32 array
        The block's complex samples viewed as interleaved floats (re, im, ...), ``n`` samples, changed in place.
    n0 : int
        Absolute index (in the recording) of the block's first sample.
    freqs : float64 array
        The tones' frequencies in cycles per sample.
    sub : int
        Stretch length: stretches lie on the recording's grid of ``sub`` samples (``[k sub, (k + 1) sub)``).
    amps : complex128 array
        Per tone the complex amplitude of its last whole stretch (against ``exp(j 2 pi f n)``, ``n`` absolute),
        updated in place; a stretch shorter than ``sub / 2`` (the recording's first or last, a block's end that is
        off the grid) takes it instead of its own.

    Notes
    -----
    For each stretch and tone, ``a = mean(x[n] exp(-j 2 pi f n))`` and ``x[n] -= a exp(j 2 pi f n)``, tone after tone:
    the stretch's component at exactly ``f`` is removed, a notch about ``fs / sub`` wide (at 4096 samples a
    20000th of the band at 5 Msample/s: the signal loses nothing measurable).  The phasor of sample ``g + j`` of a
    stretch starting at ``g`` is ``exp(j 2 pi f g)`` (``f g`` reduced to its fraction in double precision, exact
    per stretch) times the table entry ``exp(j 2 pi f j)`` (single precision, exact every 64 entries), so the result
    depends only on the samples of the stretch, not on how they were cut into blocks, and the sample loops have
    no dependency between samples (they vectorise; sums reassociated).  Cost per tone and sample: two complex
    multiply-adds.
    """
    n = x2.shape[0] // 2
    two_pi = 2.0 * math.pi
    tab = np.empty(2 * sub, dtype=np.float32)
    for t in range(freqs.shape[0]):
        f = freqs[t]
        wr = math.cos(two_pi * f)
        wi = math.sin(two_pi * f)
        cr = 1.0
        ci = 0.0
        for j in range(sub):
            if j % 64 == 0:
                cr = math.cos(two_pi * f * j)
                ci = math.sin(two_pi * f * j)
            tab[2 * j] = cr
            tab[2 * j + 1] = ci
            cr, ci = cr * wr - ci * wi, cr * wi + ci * wr
        a = 0
        while a < n:
            g = n0 + a
            b = min(n, a + (sub - g % sub))
            m = b - a
            fr = f * g
            fr -= math.floor(fr)
            c0 = complex(math.cos(two_pi * fr), math.sin(two_pi * fr))
            if 2 * m >= sub:
                sr = np.float32(0.0)
                si = np.float32(0.0)
                for j in range(m):
                    xr = x2[2 * (a + j)]
                    xi = x2[2 * (a + j) + 1]
                    tr = tab[2 * j]
                    ti = tab[2 * j + 1]
                    sr += xr * tr + xi * ti
                    si += xi * tr - xr * ti
                amp = c0.conjugate() * complex(float(sr) / m, float(si) / m)
                if m == sub:
                    amps[t] = amp
            else:
                amp = amps[t]
            bb = amp * c0
            br = np.float32(bb.real)
            bi = np.float32(bb.imag)
            for j in range(m):
                tr = tab[2 * j]
                ti = tab[2 * j + 1]
                x2[2 * (a + j)] -= br * tr - bi * ti
                x2[2 * (a + j) + 1] -= br * ti + bi * tr
            a = b


@njit(cache=True, nogil=True)
def iq_sums(x2, out):
    """Sums over the non-zero samples of ``x2`` (interleaved float32, ``n`` samples) for the I/Q balance.

    ``out`` (float64, 6) is set to ``[count, sum re, sum im, sum re^2, sum im^2, sum re im]``; zeros are erasures
    and are skipped.  One pass, double-precision sums.
    """
    cnt = 0.0
    sr = 0.0
    si = 0.0
    srr = 0.0
    sii = 0.0
    sri = 0.0
    for k in range(x2.shape[0] // 2):
        r = float(x2[2 * k])
        i = float(x2[2 * k + 1])
        if r != 0.0 or i != 0.0:
            cnt += 1.0
            sr += r
            si += i
            srr += r * r
            sii += i * i
            sri += r * i
    out[0] = cnt
    out[1] = sr
    out[2] = si
    out[3] = srr
    out[4] = sii
    out[5] = sri


@njit(cache=True, nogil=True)
def remove_image(x2, rho_re, rho_im):
    """In place: ``x - rho conj(x)`` for every sample of ``x2`` (interleaved float32); zeros stay zero."""
    for k in range(x2.shape[0] // 2):
        r = x2[2 * k]
        i = x2[2 * k + 1]
        # rho conj(x) = (rho_re r + rho_im i) + j (rho_im r - rho_re i)
        x2[2 * k] = np.float32(r - (rho_re * r + rho_im * i))
        x2[2 * k + 1] = np.float32(i - (rho_im * r - rho_re * i))


@njit(cache=True, nogil=True)
def mirror_sums(sym, pos, theta, phase0, dphase, sample0, out):
    """BPSK's image sums (:class:`pipeline.demod._iq.MirrorLine`) over the symbols ``sym`` (complex64, carrier-corrected
    and normalised), their positions ``pos`` (samples) and the loop's phases ``theta`` (rad).

    The total carrier phase a symbol was turned by is ``T = phase0 + dphase (pos - sample0) + theta`` (the oscillator
    over the block, linear, plus the loop); with the decision ``d = sign(Re y)``: ``out[0:2]`` = ``sum y d`` (re,
    im), ``out[2:4]`` = ``sum y d exp(2 j T)``, ``out[4:6]`` = ``sum exp(2 j T)``, ``out[6]`` = ``sum |y|^2``,
    ``out[7]`` = the symbols (all of them: the caller passes the slice it wants).
    """
    dr = 0.0
    di = 0.0
    mr = 0.0
    mi = 0.0
    er = 0.0
    ei = 0.0
    pw = 0.0
    n = sym.shape[0]
    for k in range(n):
        t = 2.0 * (phase0 + dphase * (pos[k] - sample0) + theta[k])
        c = math.cos(t)
        s = math.sin(t)
        yr = float(sym[k].real)
        yi = float(sym[k].imag)
        if yr < 0.0:
            yr = -yr
            yi = -yi
        dr += yr
        di += yi
        mr += yr * c - yi * s
        mi += yr * s + yi * c
        er += c
        ei += s
        pw += yr * yr + yi * yi
    out[0] = dr
    out[1] = di
    out[2] = mr
    out[3] = mi
    out[4] = er
    out[5] = ei
    out[6] = pw
    out[7] = n
