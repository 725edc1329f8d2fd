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
    "power_nonzero",
    "STATE_F_SIZE",
    "STATE_I_SIZE",
    "PARAM_SIZE",
]

#: Length of the float state vector of :func:`track_symbols` (layout documented there).
STATE_F_SIZE = 24
#: Length of the integer state vector of :func:`track_symbols`.
STATE_I_SIZE = 8
#: Length of the parameter vector of :func:`track_symbols`.
PARAM_SIZE = 20


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
def track_symbols(mf, base, t_limit, params, mod_code, third_order, sf, si,
                  out_pos, out_sym, out_amp, out_flags, out_theta):
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
    params : float64 array
        ``[sps, kp_t, ki_t, kp_c, ki_c, kr_c, kp_c_wide, alpha_amp, alpha_lock_c, alpha_lock_s,
        c_on, c_off, c_min, s_on, s_off, s_min, r0, kd, warmup, hbox]``; no lock is declared before
        ``warmup`` symbols have been averaged.  ``hbox > 0`` selects the exact integrate-and-dump
        of half-width ``hbox`` samples over unfiltered samples (rect pulses) instead of the cubic
        interpolator over matched-filter output.
    mod_code : int
        0 BPSK, 1 QPSK, 2 OQPSK.
    third_order : int
        1 for the third-order carrier loop (rate integrator), else second order.
    sf, si : float64 / int64 arrays, updated in place
        State.  ``sf``: 0 t (next half-strobe), 1 timing rate integrator, 2 carrier phase (rad,
        unwrapped), 3 carrier frequency integrator (rad/symbol), 4 carrier rate integrator,
        5-10 the previous three half-strobe values (re, im), 11-12 EMA sums of ``|r|^2`` and
        ``|r|^4``, 13 EMA weight, 14-15 carrier-lock EMAs (numerator, denominator), 16-17 on-time /
        midpoint energy EMAs, 18 amplitude, 19 position of the pending on-time strobe, 20-22 the
        M2M4 EMAs (and weight) over the carrier-lock window.
        ``si``: 0 half-strobe parity (0 = next is on-time), 1 carrier lock, 2 symbol lock,
        3 symbols seen (saturating at ``warmup``), 4 consecutive symbols meeting the lock condition.
    out_pos, out_sym, out_amp, out_flags, out_theta
        Per symbol: position (samples), carrier-corrected symbol divided by the amplitude
        estimate (noise-free symbols about unit magnitude), the amplitude estimate,
        flags (bit 0 carrier lock, bit 1 symbol lock), carrier phase.

    Returns
    -------
    int
        Number of symbols written.

    Notes
    -----
    Two interpolants per symbol (on-time and midpoint) are taken at ``t`` by a cubic Lagrange
    interpolator in Farrow form; the strobe advances by ``sps (1 - v) / 2`` per half-strobe with
    the proportional timing correction applied once per symbol.  Timing error (Gardner 1986)
    ``e = Re{m^* (s_k - s_{k-1})}`` (OQPSK: I and Q each with their own midpoint), normalised by
    ``A^2 K_D``.  Carrier error: decision-directed Costas, ``sgn(I) Q`` (BPSK),
    ``sgn(I) Q - sgn(Q) I`` over ``sqrt(2) A`` (QPSK; OQPSK takes I and Q at their own strobes),
    so its slope is 1 rad/rad.  While the carrier is unlocked the loop runs first order with a
    wider gain and both integrators hold their value (coasting through fades).  Amplitude from
    the M2M4 moments (``S = sqrt(2 M2^2 - M4)``), which need no carrier or decisions.
    Cost: two interpolations and about 80 flops per symbol.
    """
    n_mf = mf.shape[0]
    sps = params[0]
    kp_t = params[1]
    ki_t = params[2]
    kp_c = params[3]
    ki_c = params[4]
    kr_c = params[5]
    kp_c_wide = params[6]
    a_amp = params[7]
    a_lc = params[8]
    a_ls = params[9]
    c_on = params[10]
    c_off = params[11]
    c_min = params[12]
    s_on = params[13]
    s_off = params[14]
    s_min = params[15]
    r0 = params[16]
    kd = params[17]
    warmup = params[18]
    hbox = params[19]
    look = int(hbox + 0.5) + 2 if hbox > 0.0 else 2

    t = sf[0]
    v_int = sf[1]
    theta = sf[2]
    w_int = sf[3]
    w_rate = sf[4]
    p1r = sf[5]
    p1i = sf[6]
    p2r = sf[7]
    p2i = sf[8]
    p3r = sf[9]
    p3i = sf[10]
    m2s = sf[11]
    m4s = sf[12]
    wsum = sf[13]
    cnum = sf[14]
    cden = sf[15]
    eon = sf[16]
    emid = sf[17]
    amp = sf[18]
    t_on = sf[19]
    m2f = sf[20]
    m4f = sf[21]
    wf = sf[22]
    parity = si[0]
    clock = si[1]
    slock = si[2]
    seen = si[3]
    cgood = si[4]

    inv_sqrt2 = 1.0 / math.sqrt(2.0)
    third = 1.0 / 3.0
    sixth = 1.0 / 6.0
    inv_kd = 1.0 / kd
    nout = 0
    # carrier phasor exp(j theta): advanced by small-angle rotations, recomputed exactly every
    # 64 half-strobes (and at every call), so it never drifts from theta by more than ~1e-7 rad
    cs = math.cos(theta)
    sn = math.sin(theta)
    theta_ph = theta
    nresync = 0
    while t < t_limit:
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
            t += 0.5 * sps * (1.0 - v_int) - sps * kp_t * e_t

        p3r = p2r
        p3i = p2i
        p2r = p1r
        p2i = p1i
        p1r = wr
        p1i = wi
        theta += 0.5 * w_int
        parity = 1 - parity

    sf[0] = t
    sf[1] = v_int
    sf[2] = theta
    sf[3] = w_int
    sf[4] = w_rate
    sf[5] = p1r
    sf[6] = p1i
    sf[7] = p2r
    sf[8] = p2i
    sf[9] = p3r
    sf[10] = p3i
    sf[11] = m2s
    sf[12] = m4s
    sf[13] = wsum
    sf[14] = cnum
    sf[15] = cden
    sf[16] = eon
    sf[17] = emid
    sf[18] = amp
    sf[19] = t_on
    sf[20] = m2f
    sf[21] = m4f
    sf[22] = wf
    si[0] = parity
    si[1] = clock
    si[2] = slock
    si[3] = seen
    si[4] = cgood
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
def power_nonzero(x):
    """Mean ``|x|^2`` over the non-zero samples of ``x`` (zeros are erasures), and their count."""
    acc = 0.0
    cnt = 0
    for i in range(x.shape[0]):
        p = float(x[i].real) ** 2 + float(x[i].imag) ** 2
        if p > 0.0:
            acc += p
            cnt += 1
    return (acc / cnt if cnt > 0 else 0.0), cnt
