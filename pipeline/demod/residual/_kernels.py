"""Numba kernels of the residual-carrier (and Bi-phase-L) demodulator.

The wrappers in ``_demodulator.py`` validate, cast and allocate.  Every function here is a
module-level ``@njit(cache=True)`` with all parameters as arguments, and gives the same answer with
``NUMBA_DISABLE_JIT=1``.
"""

from __future__ import annotations

import math

from numba import njit

__all__ = [
    "CARRIER_PARAM_SIZE",
    "CARRIER_STATE_SIZE",
    "SYMBOL_PARAM_SIZE",
    "SYMBOL_STATE_SIZE",
    "interval_sum",
    "track_carrier",
    "rect_symbols",
    "timing_search",
]

#: Length of the parameter vector of :func:`track_carrier` (layout documented there).
CARRIER_PARAM_SIZE = 17
#: Length of the state vector of :func:`track_carrier`.
CARRIER_STATE_SIZE = 24
#: Length of the parameter vector of :func:`rect_symbols`.
SYMBOL_PARAM_SIZE = 8
#: Length of the state vector of :func:`rect_symbols`.
SYMBOL_STATE_SIZE = 8


@njit(cache=True)
def track_carrier(x, gain, params, sf, out_u, out_lock, out_phase):
    """Carrier loop (residual-carrier PLL or BPSK Costas) and subcarrier Costas loop, per sample.

    Parameters
    ----------
    x : complex64 array
        Baseband samples of one block (NaN/Inf already replaced by 0).
    gain : float
        AGC gain applied to every sample.
    params : float64 array
        ``[carrier_mode, subcarrier_mode, kp_c, ki_c, kr_c, nu0, kp_s, ki_s, a_arm, a_lock, w_sq, raw,
        lock_on_cos, lock_off_cos, lock_on_snr, lock_off_snr, a_lock_costas]``.  ``carrier_mode`` 0: PLL on a residual
        carrier, error ``Im(r) / A_c``; 1: BPSK Costas, error ``I Q / P`` on one-pole arm filters.
        The Costas error is ``I Q / max(<I^2 - Q^2>, <I^2 + Q^2> / 10)``, 1 rad/rad at any SNR once locked.
        ``subcarrier_mode`` 0 none, 1 square wave, 2 sine wave; ``nu0`` the nominal subcarrier
        frequency in cycles per sample; ``kp_s, ki_s`` its loop gains (per cycle of error);
        ``a_arm`` the arm-filter coefficient (about 2 / chip length); ``a_lock`` the coefficient of the
        amplitude and lock averages; ``w_sq`` the half-width in cycles of the windowed quadrature
        reference of a square subcarrier; ``raw`` 1 to output ``Im(r)`` instead of the data signal
        (subcarrier phase acquisition); then the carrier-lock thresholds (cosine of the phase error
        and SNR of the averaged carrier, on / off; for the Costas loop the ratio
        ``<I^2 - Q^2> / <I^2 + Q^2>`` of the arms, averaged with ``a_lock_costas``).
    sf : float64 array, updated in place
        State: 0 carrier phase (rad, wrapped), 1 frequency (rad/sample), 2 frequency-rate integrator,
        3 total unwrapped carrier phase (rad), 4 carrier amplitude ``A_c`` (average of ``Re r``),
        5 average of ``Im r``, 6 average of ``(Re r)^2``, 7 subcarrier phase (cycles, wrapped),
        8 subcarrier frequency (cycles/sample), 9-10 subcarrier arms I/Q, 11 subcarrier arm power,
        12-13 carrier (Costas) arms I/Q, 14 carrier arm power, 15 carrier-lock flag,
        16 third-order flag (a parameter kept with the state), 17 sum of ``Re r`` and 18 of
        ``Im(r) * ref`` since the wrapper last cleared them, 19 their sample count,
        20-21 Costas lock averages of ``I^2 - Q^2`` and ``I^2 + Q^2``, 22 weight of the lock averages
        since the last acquisition (no lock is declared below 1/2).
    out_u : float64 array
        Per sample, the data signal: ``Im(r)`` (PCM/PM), ``Im(r) * ref_I(psi)`` (PCM/PSK/PM, ``ref_I``
        the +-1 square wave or ``sin 2 pi psi``), ``Re(r)`` (Costas).
    out_lock : int8 array
        Per sample, the carrier-lock flag.
    out_phase : float64 array
        Per sample, the total unwrapped carrier phase (rad) the sample was rotated by.

    Notes
    -----
    ``r = gain x exp(-j theta)``.  Residual carrier: ``r = A (cos m + j w sin m) exp(j phi)`` for a +-1
    data waveform ``w``, so ``Im r = A cos m sin phi + data`` and the loop's error ``Im(r) / A_c`` has a
    slope of 1 rad/rad; the data term has no mean (and no spectrum near 0 Hz for Bi-phase-L or a
    subcarrier).  Loop update per sample (Gardner, *Phaselock Techniques*, 3rd ed., ch. 2-4):
    ``rate += kr e; omega += ki e + rate; theta += omega + kp e``.  Subcarrier (a Costas loop on the
    subcarrier, Lindsey & Simon, *Telecommunication Systems Engineering*, ch. 2): arms
    ``I = LPF(q ref_I)``, ``Q = LPF(q ref_Q)`` with ``q = Im r``; ``ref_Q`` is ``cos 2 pi psi`` (sine) or,
    for a square wave, +1 / -1 in windows of +-``w_sq`` cycles around the reference's rising /
    falling edges (the windowed quadrature reference: less noise, same slope).  The error
    ``I Q / P`` is ``-2 pi delta`` (sine) or ``-4 delta`` (square) for a reference ``delta`` cycles
    ahead; the wrapper's gains include that slope.  Carrier lock: the averaged carrier ``A_c``
    against the averaged quadrature (cosine of the phase error) and against its own noise.
    Cost: one complex rotation, two subcarrier references and about 40 flops per sample.
    """
    n = x.shape[0]
    carrier_mode = int(params[0])
    sc_mode = int(params[1])
    kp_c = params[2]
    ki_c = params[3]
    kr_c = params[4]
    kp_s = params[6]
    ki_s = params[7]
    a_arm = params[8]
    a_lk = params[9]
    w_sq = params[10]
    raw = int(params[11])
    on_cos = params[12]
    off_cos = params[13]
    on_snr = params[14]
    off_snr = params[15]
    a_lc = params[16]

    theta = sf[0]
    omega = sf[1]
    rate = sf[2]
    total = sf[3]
    a_c = sf[4]
    b_c = sf[5]
    p_c = sf[6]
    psi = sf[7]
    nu = sf[8]
    i_s = sf[9]
    q_s = sf[10]
    p_s = sf[11]
    i_c = sf[12]
    q_c = sf[13]
    pw_c = sf[14]
    locked = int(sf[15])
    third = int(sf[16])
    sum_re = sf[17]
    sum_u = sf[18]
    count = sf[19]
    l_num = sf[20]
    l_den = sf[21]
    warm = sf[22]

    two_pi = 2.0 * math.pi
    for k in range(n):
        c = math.cos(theta)
        s = math.sin(theta)
        xr = gain * float(x[k].real)
        xi = gain * float(x[k].imag)
        rr = xr * c + xi * s
        ri = xi * c - xr * s
        out_phase[k] = total

        # ---- carrier phase detector ---------------------------------------------------------
        if carrier_mode == 0:
            a_c = (1.0 - a_lk) * a_c + a_lk * rr
            b_c = (1.0 - a_lk) * b_c + a_lk * ri
            p_c = (1.0 - a_lk) * p_c + a_lk * rr * rr
            norm = a_c if a_c > 0.05 else 0.05
            e = ri / norm
            # lock: phase error cosine of the averaged carrier, and its SNR against the noise of the average
            mag = math.sqrt(a_c * a_c + b_c * b_c)
            cosv = a_c / mag if mag > 0.0 else 0.0
            var_avg = (p_c - a_c * a_c) * a_lk / (2.0 - a_lk)
            snr = a_c * a_c / var_avg if var_avg > 1e-30 else 1e30
            if a_c <= 0.0:
                snr = 0.0
        else:
            i_c = (1.0 - a_arm) * i_c + a_arm * rr
            q_c = (1.0 - a_arm) * q_c + a_arm * ri
            pw = i_c * i_c + q_c * q_c
            pw_c = (1.0 - a_lk) * pw_c + a_lk * pw
            l_num = (1.0 - a_lc) * l_num + a_lc * (i_c * i_c - q_c * q_c)
            l_den = (1.0 - a_lc) * l_den + a_lc * pw
            # normalise by the arms' signal power <I^2 - Q^2> (their total power holds 2 N_arm of noise too,
            # which would shrink the loop gain at low SNR), floored at a tenth of the total while unlocked
            sig = l_num if l_num > 0.1 * l_den else 0.1 * l_den
            e = i_c * q_c / sig if sig > 1e-30 else 0.0
            cosv = l_num / l_den if l_den > 1e-30 else 0.0
            snr = 1e30
        # the lock averages start from nothing at an acquisition: no decision before they hold half their weight
        warm = (1.0 - a_lc) * warm + a_lc
        if locked == 1:
            if cosv < off_cos or snr < off_snr:
                locked = 0
        elif warm > 0.5:
            if cosv > on_cos and snr > on_snr:
                locked = 1
        out_lock[k] = locked

        # ---- subcarrier ---------------------------------------------------------------------
        if sc_mode == 0:
            u = rr if carrier_mode == 1 else ri
        else:
            f = psi - math.floor(psi)
            if sc_mode == 1:
                ref_i = 1.0 if f < 0.5 else -1.0
                if f < w_sq or f > 1.0 - w_sq:
                    ref_q = 1.0
                elif f > 0.5 - w_sq and f < 0.5 + w_sq:
                    ref_q = -1.0
                else:
                    ref_q = 0.0
            else:
                ref_i = math.sin(two_pi * f)
                ref_q = math.cos(two_pi * f)
            u = ri * ref_i
            i_s = (1.0 - a_arm) * i_s + a_arm * u
            q_s = (1.0 - a_arm) * q_s + a_arm * ri * ref_q
            p_s = (1.0 - a_lk) * p_s + a_lk * (i_s * i_s + q_s * q_s)
            e_s = i_s * q_s / p_s if p_s > 1e-30 else 0.0
            nu += ki_s * e_s
            psi += nu + kp_s * e_s
            psi -= math.floor(psi)
            if raw == 1:
                u = ri
        out_u[k] = u
        sum_re += rr
        sum_u += u
        count += 1.0

        # ---- carrier loop filter ------------------------------------------------------------
        if locked == 1 or carrier_mode == 0:
            if third == 1:
                rate += kr_c * e
            omega += ki_c * e + rate
        # an unlocked Costas loop runs first order: its frequency (from the acquisition) holds, so the
        # noisy error of a loop not yet pulled in cannot walk it away (the residual-carrier PLL's error is
        # clean enough to pull in with both integrators running, as under a Doppler rate it must)
        step = omega + kp_c * e
        theta += step
        total += step
        if theta > math.pi or theta < -math.pi:
            theta -= two_pi * math.floor((theta + math.pi) / two_pi)

    sf[0] = theta
    sf[1] = omega
    sf[2] = rate
    sf[3] = total
    sf[4] = a_c
    sf[5] = b_c
    sf[6] = p_c
    sf[7] = psi
    sf[8] = nu
    sf[9] = i_s
    sf[10] = q_s
    sf[11] = p_s
    sf[12] = i_c
    sf[13] = q_c
    sf[14] = pw_c
    sf[15] = float(locked)
    sf[17] = sum_re
    sf[18] = sum_u
    sf[19] = count
    sf[20] = l_num
    sf[21] = l_den
    sf[22] = warm


@njit(cache=True)
def interval_sum(u, base, a, b):
    """``sum_n u[n - base] |[a, b) & [n - 1/2, n + 1/2)|``: the integral of the sample-and-hold signal over ``[a, b)``.

    The exact integrate-and-dump over a fractional interval: each sample counts with the length of
    its cell inside the interval.  Cost O(b - a).
    """
    n_lo = int(math.floor(a + 0.5))
    n_hi = int(math.floor(b + 0.5))
    acc = 0.0
    for m in range(n_lo, n_hi + 1):
        lo = m - 0.5 if m - 0.5 > a else a
        hi = m + 0.5 if m + 0.5 < b else b
        if hi > lo:
            acc += (hi - lo) * u[m - base]
    return acc


@njit(cache=True)
def rect_symbols(u, lock, base, params, sf, out_pos, out_raw, out_soft, out_lock):
    """Integrate-and-dump matched filter and data-transition tracking loop for NRZ or Bi-phase-L.

    Parameters
    ----------
    u : float64 array
        Data signal; ``u[i]`` is recording sample ``base + i``.
    lock : int8 array
        Carrier-lock flag per sample (same indexing).
    base : int
        Absolute index of ``u[0]``.
    params : float64 array
        ``[biphase, kp_t, ki_t, window_half_fraction, a_amp, nominal_period, period_limit, 0]``:
        window half-width as a fraction of the symbol period; the period estimate is held within
        ``nominal_period (1 +- period_limit)`` (not bounded when ``nominal_period`` is 0).
    sf : float64 array, updated in place
        0 ``tau`` (centre of the next symbol, absolute samples), 1 symbol period estimate (samples),
        2 previous raw symbol (0 = none yet), 3 amplitude per sample (average of ``|s| / T``).
    out_pos, out_raw, out_soft, out_lock
        Per symbol: centre (samples), raw integral ``s``, ``s / (A T)`` (about +-1), lock flag;
        all of one length ``cap``.

    Returns
    -------
    int
        Symbols written.  A symbol is taken once its interval ends inside ``u`` (the rest waits for
        the next call); one whose centre lies after ``base - 1/2`` but whose start does not is the
        first symbol of the stream, integrated over the part that exists (no timing update).  It
        equals ``cap`` only when the buffers filled up; a call with new buffers then continues.
        Each symbol advances ``tau`` by at least ``T (1 - kp W)``, ``T >= nominal (1 - limit)``,
        so a call writes at most ``len(u) / (nominal (1 - limit) (1 - kp W)) + 2`` symbols.

    Notes
    -----
    Symbol ``k`` spans ``[tau - T/2, tau + T/2)``.  NRZ: ``s = int u``; Bi-phase-L:
    ``s = int_{first half} u - int_{second half} u`` (a 0 is +1 then -1).  Timing error: the
    data-transition tracking loop (DTTL, Simon 1970; Yuen, *Deep Space Telecommunications Systems
    Engineering*, ch. 5): the integral ``I_w`` of ``u`` over a window of +-``W`` around the expected
    transition, the symbol boundary before symbol ``k`` for NRZ (weighted by ``(sgn s_{k-1} - sgn
    s_k) / 2``) or the mid-symbol transition for Bi-phase-L (weighted by ``sgn s_k``).  A timing
    ``delta`` samples late gives ``I_w = -2 A delta`` per transition, so ``delta = -e / (2 A)``,
    clipped to the window.  Second-order loop per symbol: ``tau += T - kp delta``,
    ``T -= ki delta`` (the integrator held while the carrier is unlocked).  Cost O(T) per symbol.
    """
    n = u.shape[0]
    biphase = int(params[0])
    kp = params[1]
    ki = params[2]
    wfrac = params[3]
    a_amp = params[4]
    nominal = params[5]
    limit = params[6]
    tau = sf[0]
    period = sf[1]
    prev = sf[2]
    amp = sf[3]
    cap = out_pos.shape[0]
    nout = 0
    while nout < cap:
        half = 0.5 * period
        w = wfrac * period
        a = tau - half
        b = tau + half
        first = base - 0.5  # the start of the first sample's cell
        if tau < first:
            tau += period  # centre before the first sample of the stream
            continue
        if int(math.floor(b + 0.5)) - base >= n:
            break
        # a symbol cut by the start of the stream is integrated over the part that exists
        a_in = a if a > first else first
        if biphase == 1:
            s = interval_sum(u, base, a_in, tau) - interval_sum(u, base, tau, b)
            lo_w = tau - w if tau - w > first else first
            iw = interval_sum(u, base, lo_w, tau + w)
            e = iw * (1.0 if s >= 0.0 else -1.0)
            have_e = tau - w >= first
        else:
            s = interval_sum(u, base, a_in, b)
            iw = interval_sum(u, base, a - w, a + w) if a - w >= first else 0.0
            if prev != 0.0 and a - w >= first:
                e = iw * ((1.0 if prev >= 0.0 else -1.0) - (1.0 if s >= 0.0 else -1.0)) * 0.5
                have_e = True
            else:
                e = 0.0
                have_e = False
        mag = abs(s) / period
        amp = (1.0 - a_amp) * amp + a_amp * mag if amp > 0.0 else mag
        centre = int(math.floor(tau + 0.5)) - base
        lk = lock[centre] if 0 <= centre < n else 0
        out_pos[nout] = tau
        out_raw[nout] = s
        out_soft[nout] = s / (amp * period) if amp > 0.0 else 0.0
        out_lock[nout] = lk
        nout += 1
        delta = 0.0
        if have_e and amp > 0.0:
            delta = -e / (2.0 * amp)
            if delta > w:
                delta = w
            elif delta < -w:
                delta = -w
        prev = s if s != 0.0 else 1e-30
        tau += period - kp * delta
        if lk == 1:
            period -= ki * delta
            if nominal > 0.0:
                if period > nominal * (1.0 + limit):
                    period = nominal * (1.0 + limit)
                elif period < nominal * (1.0 - limit):
                    period = nominal * (1.0 - limit)
    sf[0] = tau
    sf[1] = period
    sf[2] = prev
    sf[3] = amp
    return nout


@njit(cache=True)
def timing_search(u, base, first_centre, period, biphase, n_phase, n_sym, out_energy):
    """Mean ``|s|`` of ``n_sym`` symbols for ``n_phase`` trial timings ``first_centre + j T / n_phase``.

    ``s`` is the matched-filter output of :func:`rect_symbols` for each trial; the trial with the
    largest mean magnitude is the symbol timing (non-data-aided maximum-energy search).
    Cost O(n_phase n_sym T).
    """
    for j in range(n_phase):
        t0 = first_centre + j * period / n_phase
        acc = 0.0
        for k in range(n_sym):
            tau = t0 + k * period
            a = tau - 0.5 * period
            b = tau + 0.5 * period
            if biphase == 1:
                s = interval_sum(u, base, a, tau) - interval_sum(u, base, tau, b)
            else:
                s = interval_sum(u, base, a, b)
            acc += abs(s)
        out_energy[j] = acc / n_sym if n_sym > 0 else 0.0
