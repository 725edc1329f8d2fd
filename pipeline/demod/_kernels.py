"""Numba kernels of the demodulator.  Wrappers in ``_demodulator.py`` validate, cast and allocate.

Every function here is a module-level ``@njit(cache=True)`` with all parameters as arguments, and
gives the same answer with ``NUMBA_DISABLE_JIT=1``.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = [
    "derotate",
    "fir_interleaved",
    "track_symbols",
    "nrzm_decode",
    "moments_m2m4",
    "mean_power_nonzero",
    "remove_dc",
    "TRACK_PARAMS",
    "TRACK_STATE",
]

#: Parameters of :func:`track_symbols` (one record; meanings in its docstring).
TRACK_PARAMS = np.dtype([
    ("sps", np.float64), ("kp_t", np.float64), ("ki_t", np.float64), ("kp_c", np.float64), ("ki_c", np.float64),
    ("kr_c", np.float64), ("kp_c_wide", np.float64), ("a_amp", np.float64), ("a_lock_c", np.float64),
    ("a_lock_s", np.float64), ("c_on", np.float64), ("c_off", np.float64), ("c_min", np.float64),
    ("s_on", np.float64), ("s_off", np.float64), ("s_min", np.float64), ("r0", np.float64), ("kd", np.float64),
    ("warmup", np.float64), ("hbox", np.float64), ("v_max", np.float64),
])

#: Loop state of :func:`track_symbols` (one record, updated in place; meanings in its docstring).
TRACK_STATE = np.dtype([
    ("t", np.float64), ("v_int", np.float64), ("theta", np.float64), ("w_int", np.float64), ("w_rate", np.float64),
    ("p1r", np.float64), ("p1i", np.float64), ("p2r", np.float64), ("p2i", np.float64), ("p3r", np.float64),
    ("p3i", np.float64), ("m2s", np.float64), ("m4s", np.float64), ("wsum", np.float64), ("cnum", np.float64),
    ("cden", np.float64), ("eon", np.float64), ("emid", np.float64), ("amp", np.float64), ("t_on", np.float64),
    ("m2f", np.float64), ("m4f", np.float64), ("wf", np.float64), ("parity", np.int64), ("clock", np.int64),
    ("slock", np.int64), ("seen", np.int64), ("cgood", np.int64), ("ph_cos", np.float64), ("ph_sin", np.float64),
    ("ph_theta", np.float64), ("ph_count", np.int64),
])


@njit(cache=True)
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


@njit(cache=True)
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


@njit(cache=True)
def track_symbols(mf, base, t_limit, params, mod_code, third_order, state,
                  out_pos, out_qpos, out_sym, out_amp, out_flags, out_theta):
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
        first-order gain ``kp_c_wide`` used while unlocked; averaging weights ``a_amp`` (M2M4
        amplitude), ``a_lock_c``, ``a_lock_s`` (lock detectors); carrier lock ``c_on, c_off``
        (relative) and ``c_min`` (absolute); symbol lock ``s_on, s_off, s_min``; ``r0`` the
        noise-free midpoint energy ratio, ``kd`` the Gardner detector gain; ``warmup`` symbols
        averaged before any lock is declared; ``hbox > 0`` selects the exact integrate-and-dump
        of half-width ``hbox`` samples over unfiltered samples (rect pulses) instead of the cubic
        interpolator over matched-filter output; ``v_max`` bounds the timing rate integrator
        (the symbol rate may differ from nominal by at most this fraction).
    mod_code : int
        0 BPSK, 1 QPSK, 2 OQPSK.
    third_order : int
        1 for the third-order carrier loop (rate integrator), else second order.
    state : TRACK_STATE record array of length 1, updated in place
        ``t`` next half-strobe (samples), ``v_int`` timing rate integrator, ``theta`` carrier
        phase (rad, unwrapped), ``w_int`` carrier frequency integrator (rad/symbol), ``w_rate``
        carrier rate integrator, ``p1r .. p3i`` the previous three half-strobe values, ``m2s, m4s,
        wsum`` EMA sums of ``|r|^2``, ``|r|^4`` and their weight, ``cnum, cden`` carrier-lock EMAs,
        ``eon, emid`` on-time / midpoint energy EMAs, ``amp`` amplitude, ``t_on`` position of the
        pending on-time strobe, ``m2f, m4f, wf`` the M2M4 EMAs over the carrier-lock window;
        ``parity`` (0 = the next half-strobe is on-time), ``clock`` / ``slock`` carrier / symbol
        lock, ``seen`` symbols seen (saturating at ``warmup``), ``cgood`` consecutive symbols
        meeting the lock condition; ``ph_cos, ph_sin`` the carrier phasor at phase ``ph_theta``,
        ``ph_count`` half-strobes since it was last recomputed exactly.
    out_pos, out_qpos, out_sym, out_amp, out_flags, out_theta
        Per symbol: position of the on-time (I) strobe (samples), position of the strobe the Q
        value was taken at (OQPSK: the midpoint strobe half a symbol later; else ``out_pos``),
        carrier-corrected symbol divided by the amplitude estimate (noise-free symbols about unit
        magnitude), the amplitude estimate, flags (bit 0 carrier lock, bit 1 symbol lock), carrier
        phase.  All of one length ``cap``.

    Returns
    -------
    int
        Number of symbols written.  It equals ``cap`` only when the buffers filled up; the state
        then stands just before the next symbol, and a call with new buffers continues exactly.

    Notes
    -----
    Two interpolants per symbol (on-time and midpoint) are taken at ``t`` by a cubic Lagrange
    interpolator in Farrow form; the strobe advances by ``sps (1 - v) / 2`` per half-strobe with
    the proportional timing correction applied once per symbol.  Timing error (Gardner 1986)
    ``e = Re{m^* (s_k - s_{k-1})}`` (OQPSK: I and Q each with their own midpoint), normalised by
    ``A^2 K_D`` and clipped to +-1; ``|v| <= v_max``.  So a symbol advances the strobe by at least
    ``sps (1 - v_max - kp_t)`` samples, and a call writes at most ``len(mf) / (sps (1 - v_max - kp_t))
    + 2`` symbols (the bound the wrapper sizes the buffers by).  Carrier error: decision-directed
    Costas, ``sgn(I) Q`` (BPSK), ``sgn(I) Q - sgn(Q) I`` over ``sqrt(2) A`` (QPSK; OQPSK takes I and
    Q at their own strobes), so its slope is 1 rad/rad.  While the carrier is unlocked the loop runs
    first order with a wider gain and both integrators hold their value (coasting through fades).
    Amplitude from the M2M4 moments (``S = sqrt(2 M2^2 - M4)``), which need no carrier or decisions.
    Cost: two interpolations and about 80 flops per symbol.
    """
    n_mf = mf.shape[0]
    cap = out_pos.shape[0]
    pr = params[0]
    sps = pr["sps"]
    kp_t = pr["kp_t"]
    ki_t = pr["ki_t"]
    kp_c = pr["kp_c"]
    ki_c = pr["ki_c"]
    kr_c = pr["kr_c"]
    kp_c_wide = pr["kp_c_wide"]
    a_amp = pr["a_amp"]
    a_lc = pr["a_lock_c"]
    a_ls = pr["a_lock_s"]
    c_on = pr["c_on"]
    c_off = pr["c_off"]
    c_min = pr["c_min"]
    s_on = pr["s_on"]
    s_off = pr["s_off"]
    s_min = pr["s_min"]
    r0 = pr["r0"]
    kd = pr["kd"]
    warmup = pr["warmup"]
    hbox = pr["hbox"]
    v_max = pr["v_max"]
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
    m2s = st["m2s"]
    m4s = st["m4s"]
    wsum = st["wsum"]
    cnum = st["cnum"]
    cden = st["cden"]
    eon = st["eon"]
    emid = st["emid"]
    amp = st["amp"]
    t_on = st["t_on"]
    m2f = st["m2f"]
    m4f = st["m4f"]
    wf = st["wf"]
    parity = st["parity"]
    clock = st["clock"]
    slock = st["slock"]
    seen = st["seen"]
    cgood = st["cgood"]

    inv_sqrt2 = 1.0 / math.sqrt(2.0)
    third = 1.0 / 3.0
    sixth = 1.0 / 6.0
    inv_kd = 1.0 / kd
    nout = 0
    # carrier phasor exp(j theta_ph): advanced by small-angle rotations and recomputed exactly every 64
    # half-strobes, so it never drifts from theta by more than ~1e-7 rad; kept in the state, so the
    # output does not depend on where one call ends and the next begins
    cs = st["ph_cos"]
    sn = st["ph_sin"]
    theta_ph = st["ph_theta"]
    nresync = st["ph_count"]
    while t < t_limit:
        if parity == 1 and nout >= cap:
            break  # buffers full: the next half-strobe completes a symbol; the caller continues
        m = int(math.floor(t))
        i = m - base
        if i + look >= n_mf:
            break
        if i - look < 0:
            # the wrapper always keeps enough history; this only guards the first call
            t += 0.5 * sps
            continue
        if hbox > 0.0:
            # exact integrate-and-dump over [t - h, t + h] of the piecewise-constant samples:
            # weight of sample j is the overlap of [j - 1/2, j + 1/2] with the window
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
        else:
            mu = t - m
            a0 = mf[i - 1]
            a1 = mf[i]
            a2 = mf[i + 1]
            a3 = mf[i + 2]
            x0r = float(a0.real)
            x1r = float(a1.real)
            x2r = float(a2.real)
            x3r = float(a3.real)
            x0i = float(a0.imag)
            x1i = float(a1.imag)
            x2i = float(a2.imag)
            x3i = float(a3.imag)
            # Farrow coefficients of the cubic Lagrange interpolator (multiplications, not divisions)
            c1r = -third * x0r - 0.5 * x1r + x2r - sixth * x3r
            c2r = 0.5 * x0r - x1r + 0.5 * x2r
            c3r = sixth * (x3r - x0r) + 0.5 * (x1r - x2r)
            c1i = -third * x0i - 0.5 * x1i + x2i - sixth * x3i
            c2i = 0.5 * x0i - x1i + 0.5 * x2i
            c3i = sixth * (x3i - x0i) + 0.5 * (x1i - x2i)
            vr = x1r + mu * (c1r + mu * (c2r + mu * c3r))
            vi = x1i + mu * (c1i + mu * (c2i + mu * c3i))
        d = theta - theta_ph
        if nresync >= 64 or d > 0.3 or d < -0.3:
            cs = math.cos(theta)
            sn = math.sin(theta)
            nresync = 0
        else:
            d2 = d * d
            cd = 1.0 - d2 * (0.5 - d2 / 24.0)
            sd = d * (1.0 - d2 / 6.0)
            cs, sn = cs * cd - sn * sd, sn * cd + cs * sd
            nresync += 1
        theta_ph = theta
        wr = vr * cs + vi * sn
        wi = vi * cs - vr * sn

        if parity == 0:
            t_on = t
            t += 0.5 * sps * (1.0 - v_int)
        else:
            # symbol k complete: w[2k] = p1, w[2k-1] = p2, w[2k-2] = p3, w[2k+1] = (wr, wi)
            if mod_code == 2:
                sr = p1r
                sq = wi
                et = p2r * (p1r - p3r) + p1i * (wi - p2i)
                mid_e = p2r * p2r + p1i * p1i
                sg_i = 1.0 if p1r >= 0.0 else -1.0
                sg_q = 1.0 if wi >= 0.0 else -1.0
                ec_raw = (sg_i * p1i - sg_q * wr) * inv_sqrt2
            else:
                sr = p1r
                sq = p1i
                et = p2r * (p1r - p3r) + p2i * (p1i - p3i)
                mid_e = p2r * p2r + p2i * p2i
                sg_i = 1.0 if sr >= 0.0 else -1.0
                if mod_code == 0:
                    ec_raw = sg_i * sq
                else:
                    sg_q = 1.0 if sq >= 0.0 else -1.0
                    ec_raw = (sg_i * sq - sg_q * sr) * inv_sqrt2
            r2 = sr * sr + sq * sq
            # the loops are normalised by the amplitude of the previous symbol: it changes slowly,
            # and this keeps the square roots and division off the loops' critical path
            inv_amp_loop = 1.0 / amp

            # amplitude from bias-corrected EMAs of the M2M4 moments
            m2s = (1.0 - a_amp) * m2s + a_amp * r2
            m4s = (1.0 - a_amp) * m4s + a_amp * r2 * r2
            wsum = (1.0 - a_amp) * wsum + a_amp
            inv_w = 1.0 / wsum
            m2 = m2s * inv_w
            m4 = m4s * inv_w
            s2 = 2.0 * m2 * m2 - m4
            s_floor = 0.05 * m2
            sig = math.sqrt(s2) if s2 > s_floor * s_floor else s_floor
            amp = math.sqrt(sig) if sig > 1e-30 else 1e-15

            # carrier-lock statistic: Re(r^2) (BPSK) or -Re(r^4) (QPSK), relative to its locked
            # value, which comes from M2M4 moments averaged over the same window (a longer one
            # would lag at a signal's onset and make a slipping loop look locked).  The ratios
            # are compared cross-multiplied, so no division is needed.
            m2f = (1.0 - a_lc) * m2f + a_lc * r2
            m4f = (1.0 - a_lc) * m4f + a_lc * r2 * r2
            wf = (1.0 - a_lc) * wf + a_lc
            # the weight cancels in every ratio below, so the unnormalised sums are used
            s2w = 2.0 * m2f * m2f - m4f * wf
            if mod_code == 0:
                q = sr * sr - sq * sq
                qd = r2
                # expect = sigw / m2w; floor 0.1
                sigw = math.sqrt(s2w) if s2w > 0.0 else 0.0
                ref_num = sigw if sigw > 0.1 * m2f else 0.1 * m2f
                ref_den = m2f
            else:
                sr2 = sr * sr
                sq2 = sq * sq
                q = -(sr2 * sr2 - 6.0 * sr2 * sq2 + sq2 * sq2)
                qd = r2 * r2
                # expect = sigw^2 / m4w; floor 0.1
                ref_num = s2w if s2w > 0.1 * m4f * wf else 0.1 * m4f * wf
                ref_den = m4f * wf
            cnum = (1.0 - a_lc) * cnum + a_lc * q
            cden = (1.0 - a_lc) * cden + a_lc * qd
            # cnorm = (cnum / cden) / (ref_num / ref_den) compared with c_on / c_off
            lhs = cnum * ref_den
            if seen < warmup:
                seen += 1
            if clock == 0:
                # the condition must hold for `warmup` symbols in a row: a loop slipping cycles
                # at a large frequency error can push the statistic up for a moment
                if lhs > c_on * ref_num * cden and cnum > c_min * cden:
                    cgood += 1
                else:
                    cgood = 0
                if cgood >= warmup and seen >= warmup:
                    clock = 1
                    cgood = 0
            else:
                if lhs < c_off * ref_num * cden or cnum < 0.5 * c_min * cden:
                    clock = 0

            # symbol-lock statistic: on-time versus midpoint energy, relative to r0 S / (S + N)
            eon = (1.0 - a_ls) * eon + a_ls * r2
            emid = (1.0 - a_ls) * emid + a_ls * mid_e
            diff = eon - emid
            rho_num = sig if sig > 0.05 * m2 else 0.05 * m2
            if slock == 0:
                if diff * m2 > s_on * r0 * rho_num * eon and diff > s_min * eon and seen >= warmup:
                    slock = 1
            else:
                if diff * m2 < s_off * r0 * rho_num * eon or diff < 0.5 * s_min * eon:
                    slock = 0

            out_pos[nout] = t_on
            out_qpos[nout] = t if mod_code == 2 else t_on
            inv_amp = 1.0 / amp
            out_sym[nout] = complex(sr * inv_amp, sq * inv_amp)
            out_amp[nout] = amp
            out_flags[nout] = clock + 2 * slock
            out_theta[nout] = theta
            nout += 1

            # carrier loop (phase correction takes effect from the next half-strobe)
            ec = ec_raw * inv_amp_loop
            if clock == 1:
                if third_order == 1:
                    w_rate += kr_c * ec
                w_int += ki_c * ec + w_rate
                theta += kp_c * ec
            else:
                theta += kp_c_wide * ec

            # timing loop
            e_t = et * (inv_amp_loop * inv_amp_loop * inv_kd)
            if e_t > 1.0:
                e_t = 1.0
            elif e_t < -1.0:
                e_t = -1.0
            if clock == 1:
                v_int += ki_t * e_t
                if v_int > v_max:
                    v_int = v_max
                elif v_int < -v_max:
                    v_int = -v_max
            t += 0.5 * sps * (1.0 - v_int) - sps * kp_t * e_t

        p3r = p2r
        p3i = p2i
        p2r = p1r
        p2i = p1i
        p1r = wr
        p1i = wi
        theta += 0.5 * w_int
        parity = 1 - parity

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
    st["m2s"] = m2s
    st["m4s"] = m4s
    st["wsum"] = wsum
    st["cnum"] = cnum
    st["cden"] = cden
    st["eon"] = eon
    st["emid"] = emid
    st["amp"] = amp
    st["t_on"] = t_on
    st["m2f"] = m2f
    st["m4f"] = m4f
    st["wf"] = wf
    st["parity"] = parity
    st["clock"] = clock
    st["slock"] = slock
    st["seen"] = seen
    st["cgood"] = cgood
    st["ph_cos"] = cs
    st["ph_sin"] = sn
    st["ph_theta"] = theta_ph
    st["ph_count"] = nresync
    return nout


@njit(cache=True)
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


@njit(cache=True)
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


@njit(cache=True)
def mean_power_nonzero(x, out):
    """Over the non-zero samples of ``x`` (zeros are erasures): ``out = [mean re, mean im, mean |x|^2]``.

    Returns the number of non-zero samples (``out`` is all zero when there is none).
    """
    sr = 0.0
    si = 0.0
    acc = 0.0
    cnt = 0
    for i in range(x.shape[0]):
        re = float(x[i].real)
        im = float(x[i].imag)
        p = re * re + im * im
        if p > 0.0:
            sr += re
            si += im
            acc += p
            cnt += 1
    if cnt > 0:
        out[0] = sr / cnt
        out[1] = si / cnt
        out[2] = acc / cnt
    else:
        out[0] = 0.0
        out[1] = 0.0
        out[2] = 0.0
    return cnt


@njit(cache=True)
def remove_dc(x, dc_re, dc_im, out):
    """``out[n] = x[n] - dc`` for the non-zero samples of ``x``; erasures (zeros) stay zero."""
    for i in range(x.shape[0]):
        re = x[i].real
        im = x[i].imag
        if re != 0.0 or im != 0.0:
            out[i] = complex(re - dc_re, im - dc_im)
        else:
            out[i] = 0j
