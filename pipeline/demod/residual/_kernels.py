"""Numba kernels of the residual-carrier (and Bi-phase-L) demodulator.

The wrappers in ``_demodulator.py`` validate, cast and allocate.  Every function here is a
module-level ``@njit(cache=True)`` with all parameters as arguments, and gives the same answer with
``NUMBA_DISABLE_JIT=1``.  Loop parameters and state are numpy structured records (one element),
read and written by field name.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = [
    "CARRIER_PARAMS",
    "CARRIER_STATE",
    "PHASOR_TABLE_SIZE",
    "SYMBOL_PARAMS",
    "SYMBOL_STATE",
    "interval_sum",
    "phasor_table",
    "rect_symbols",
    "symbol_integrals",
    "timing_energy",
    "track_carrier",
]

#: Entries of the phasor table (phase resolution 2 pi / 4096: at most 7.7e-4 rad from the exact phasor).
PHASOR_TABLE_SIZE = 4096

#: Parameters of :func:`track_carrier` (one record; meanings in its docstring).
CARRIER_PARAMS = np.dtype([
    ("carrier_mode", np.int64), ("subcarrier_mode", np.int64), ("third_order", np.int64),
    ("table_phasor", np.int64), ("raw", np.int64),
    ("kp_c", np.float64), ("ki_c", np.float64), ("kr_c", np.float64),
    ("kp_s", np.float64), ("ki_s", np.float64), ("a_arm", np.float64), ("w_sq", np.float64), ("sc_norm", np.float64),
    ("a_amp", np.float64), ("amp_floor", np.float64),
    ("lock_interval", np.int64), ("z_on", np.float64), ("z_off", np.float64),
    ("on_count", np.int64), ("off_count", np.int64),
    ("a_costas", np.float64), ("costas_on", np.float64), ("costas_off", np.float64),
])

#: State of :func:`track_carrier` (one record; meanings in its docstring).
CARRIER_STATE = np.dtype([
    ("phase", np.float64), ("frequency", np.float64), ("rate", np.float64), ("total", np.float64),
    ("amplitude", np.float64),
    ("sc_phase", np.float64), ("sc_frequency", np.float64), ("sc_i", np.float64), ("sc_q", np.float64),
    ("costas_i", np.float64), ("costas_q", np.float64), ("costas_num", np.float64), ("costas_den", np.float64),
    ("costas_warm", np.float64),
    ("locked", np.int64), ("above", np.int64), ("below", np.int64), ("decisions", np.int64),
    ("lk_count", np.int64), ("lk_sum", np.float64), ("lk_sum2", np.float64), ("lock_z", np.float64),
    ("sum_re", np.float64), ("sum_re2", np.float64),
    ("sum_im", np.float64), ("img_re", np.float64), ("img_im", np.float64), ("dbl_re", np.float64),
    ("dbl_im", np.float64),
])

#: Parameters of :func:`rect_symbols`.
SYMBOL_PARAMS = np.dtype([
    ("biphase", np.int64), ("quadrature", np.int64), ("kp_t", np.float64), ("ki_t", np.float64),
    ("window", np.float64), ("a_amp", np.float64), ("nominal", np.float64), ("limit", np.float64),
])

#: State of :func:`rect_symbols`.
SYMBOL_STATE = np.dtype([
    ("tau", np.float64), ("period", np.float64), ("prev", np.float64), ("amp", np.float64),
])


def phasor_table(size: int = PHASOR_TABLE_SIZE) -> tuple[np.ndarray, np.ndarray]:
    """``cos`` and ``sin`` of ``2 pi k / size`` for ``k = 0 .. size - 1`` (float64, contiguous).

    :func:`track_carrier` reads the carrier phasor (and a sine subcarrier's references) from it at
    the nearest entry: a phase error of at most ``pi / size`` rad.

    Examples
    --------
    >>> c, s = phasor_table(8)
    >>> [round(float(v), 3) for v in c[:3]], [round(float(v), 3) for v in s[:3]]
    ([1.0, 0.707, 0.0], [0.0, 0.707, 1.0])
    """
    k = np.arange(int(size), dtype=np.float64) * (2.0 * math.pi / int(size))
    return np.ascontiguousarray(np.cos(k)), np.ascontiguousarray(np.sin(k))


@njit(cache=True)
def track_carrier(x, gain, params, state, cos_table, sin_table, phase_at, out_u, out_uq, out_lock, out_phase):
    """Carrier loop (residual-carrier PLL or BPSK Costas) and subcarrier Costas loop, per sample.

    Parameters
    ----------
    x : complex64 array
        Baseband samples of one block (NaN/Inf already replaced by 0).
    gain : float
        AGC gain applied to every sample.
    params : CARRIER_PARAMS record array of length 1
        ``carrier_mode`` 0: PLL on a residual carrier, error ``Im(r) / A_c``; 1: BPSK Costas, error
        ``I Q / max(<I^2 - Q^2>, <I^2 + Q^2> / 10)`` on one-pole arm filters (1 rad/rad once locked).
        ``subcarrier_mode`` 0 none, 1 square wave, 2 sine wave.  ``third_order`` 1: the rate
        integrator adapts (gain ``kr_c``); 0: ``state.rate`` is a fixed frequency ramp (rate aiding).
        ``table_phasor`` 1: the phasor ``exp(-j theta)`` and a sine subcarrier's references are read
        from ``cos_table`` / ``sin_table`` at the nearest of their ``T`` entries (``T`` a power of
        two); 0: ``cos`` and ``sin`` of the exact phase.  ``raw`` 1: output ``Im(r)`` instead of the
        data signal (subcarrier acquisition).  ``kp_c, ki_c, kr_c``: carrier loop gains per sample
        (rad per unit error).  ``kp_s, ki_s``: subcarrier loop gains (cycles per unit error);
        ``a_arm`` the arm-filter coefficient (about 2 / chip length); ``w_sq`` the half-width in
        cycles of the windowed quadrature reference of a square subcarrier; ``sc_norm`` the data
        signal's power in the in-phase arm (the error is divided by it).  ``a_amp`` the
        coefficient of the carrier amplitude average, ``amp_floor`` the smallest amplitude the PLL
        error is divided by.  Carrier lock (residual carrier): one decision per ``lock_interval``
        samples on ``z = sum(Re r) / sqrt(n var(Re r))``; lock after ``on_count`` decisions in a row
        with ``z > z_on``, lost after ``off_count`` in a row with ``z < z_off``.  Costas lock:
        ``<I^2 - Q^2> / <I^2 + Q^2>`` of the arms averaged with ``a_costas``, on above
        ``costas_on``, off below ``costas_off``.
    state : CARRIER_STATE record array of length 1, updated in place
        ``phase`` (rad, in [0, 2 pi)), ``frequency`` (rad/sample), ``rate`` (rad/sample^2),
        ``total`` (unwrapped carrier phase, rad), ``amplitude`` (average of ``Re r``); subcarrier
        ``sc_phase`` (cycles, in [0, 1)), ``sc_frequency`` (cycles/sample), arms ``sc_i, sc_q``;
        Costas arms ``costas_i, costas_q``, lock averages ``costas_num, costas_den`` and their
        weight ``costas_warm`` (no Costas decision below 1/2);
        lock ``locked``, the run counters ``above, below``, ``decisions`` made, the open interval's
        ``lk_count, lk_sum, lk_sum2`` and the last statistic ``lock_z``; ``sum_re, sum_re2``: sums of
        ``Re r`` and ``(Re r)^2`` since the wrapper cleared them (over the block's samples); residual carrier
        only, the sums of the mirror line (see Notes): ``sum_im`` of ``Im r``, ``img_re, img_im`` of
        ``gain x exp(+j theta)``, ``dbl_re, dbl_im`` of ``exp(2 j theta)``.
    cos_table, sin_table : float64 arrays
        :func:`phasor_table`.
    phase_at : int64 array
        Increasing sample indices of this block at which ``total`` is recorded.
    out_u : float32 array
        Per sample, the data signal: ``Im(r)`` (PCM/PM), ``Im(r) ref_I(psi)`` (PCM/PSK/PM, ``ref_I``
        the +-1 square wave or ``sin 2 pi psi``), ``Re(r)`` (Costas).
    out_uq : float32 array
        Per sample (subcarrier modes; else length 0), ``Im(r) ref_Q(psi)`` with the full quadrature
        reference (square wave a quarter cycle ahead, or ``cos 2 pi psi``): the subcarrier lock arm.
    out_lock : int8 array
        Per sample, the carrier-lock flag.
    out_phase : float64 array
        ``total`` at the samples ``phase_at`` (the phase the sample was rotated by).

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
    ahead; the wrapper's gains include that slope.  Carrier lock: the coherent carrier amplitude in
    units of its own standard error, a t statistic that is about N(0, 1) without a carrier and
    ``sqrt(2 P_c T_d / N0)`` with one (``T_d`` the decision interval).
    The mirror-line sums (residual carrier): a front end's I/Q imbalance records ``mu s + nu s*``, whose image
    ``nu s*`` carries the carrier's line at minus its frequency; ``sum(gain x exp(+j theta))`` picks that line up
    (plus the direct carrier's own line turned by ``exp(2 j theta)``, which ``dbl`` gives the caller to take out),
    and ``sum(r)`` the direct one (:class:`pipeline.demod._iq.MirrorLine`).
    Cost per sample: one complex rotation (a table read with ``table_phasor``, else ``cos`` and
    ``sin``), two subcarrier references and about 50 flops.
    """
    n = x.shape[0]
    p = params[0]
    carrier_mode = p["carrier_mode"]
    sc_mode = p["subcarrier_mode"]
    third = p["third_order"]
    use_table = p["table_phasor"]
    raw = p["raw"]
    kp_c = p["kp_c"]
    ki_c = p["ki_c"]
    kr_c = p["kr_c"]
    kp_s = p["kp_s"]
    ki_s = p["ki_s"]
    a_arm = p["a_arm"]
    w_sq = p["w_sq"]
    sc_norm = p["sc_norm"]
    inv_sc_norm = 1.0 / sc_norm if sc_norm > 1e-30 else 0.0
    a_amp = p["a_amp"]
    amp_floor = p["amp_floor"]
    lock_interval = p["lock_interval"]
    z_on = p["z_on"]
    z_off = p["z_off"]
    on_count = p["on_count"]
    off_count = p["off_count"]
    a_lc = p["a_costas"]
    costas_on = p["costas_on"]
    costas_off = p["costas_off"]

    st = state[0]
    theta = st["phase"]
    omega = st["frequency"]
    rate = st["rate"]
    total = st["total"]
    amp = st["amplitude"]
    psi = st["sc_phase"]
    nu = st["sc_frequency"]
    i_s = st["sc_i"]
    q_s = st["sc_q"]
    i_c = st["costas_i"]
    q_c = st["costas_q"]
    l_num = st["costas_num"]
    l_den = st["costas_den"]
    warm = st["costas_warm"]
    locked = st["locked"]
    above = st["above"]
    below = st["below"]
    decisions = st["decisions"]
    lk_count = st["lk_count"]
    lk_sum = st["lk_sum"]
    lk_sum2 = st["lk_sum2"]
    lock_z = st["lock_z"]
    sum_re = st["sum_re"]
    sum_re2 = st["sum_re2"]
    sum_im = st["sum_im"]
    img_re = st["img_re"]
    img_im = st["img_im"]
    dbl_re = st["dbl_re"]
    dbl_im = st["dbl_im"]

    two_pi = 2.0 * math.pi
    size = cos_table.shape[0]
    mask = size - 1
    per_rad = size / two_pi
    n_at = phase_at.shape[0]
    j_at = 0
    for k in range(n):
        if use_table == 1:
            idx = int(theta * per_rad + 0.5) & mask
            c = cos_table[idx]
            s = sin_table[idx]
        else:
            c = math.cos(theta)
            s = math.sin(theta)
        xr = gain * float(x[k].real)
        xi = gain * float(x[k].imag)
        rr = xr * c + xi * s
        ri = xi * c - xr * s
        while j_at < n_at and phase_at[j_at] == k:
            out_phase[j_at] = total
            j_at += 1

        # ---- carrier phase detector and lock ----------------------------------------------------
        if carrier_mode == 0:
            amp += a_amp * (rr - amp)
            norm = amp if amp > amp_floor else amp_floor
            e = ri / norm if norm > 0.0 else 0.0
            lk_sum += rr
            lk_sum2 += rr * rr
            lk_count += 1
            sum_im += ri
            img_re += xr * c - xi * s
            img_im += xi * c + xr * s
            dbl_re += c * c - s * s
            dbl_im += 2.0 * c * s
            if lk_count >= lock_interval:
                mean = lk_sum / lk_count
                var = lk_sum2 / lk_count - mean * mean
                if var > 0.0:
                    lock_z = mean / math.sqrt(var / lk_count)
                else:
                    lock_z = 1e30 if mean > 0.0 else 0.0
                decisions += 1
                if locked == 1:
                    below = below + 1 if lock_z < z_off else 0
                    if below >= off_count:
                        locked = 0
                        below = 0
                else:
                    above = above + 1 if lock_z > z_on else 0
                    if above >= on_count:
                        locked = 1
                        above = 0
                lk_count = 0
                lk_sum = 0.0
                lk_sum2 = 0.0
        else:
            i_c = (1.0 - a_arm) * i_c + a_arm * rr
            q_c = (1.0 - a_arm) * q_c + a_arm * ri
            pw = i_c * i_c + q_c * q_c
            l_num = (1.0 - a_lc) * l_num + a_lc * (i_c * i_c - q_c * q_c)
            l_den = (1.0 - a_lc) * l_den + a_lc * pw
            # normalise by the arms' signal power <I^2 - Q^2> (their total power holds 2 N_arm of noise too,
            # which would shrink the loop gain at low SNR), floored at a tenth of the total while unlocked
            sig = l_num if l_num > 0.1 * l_den else 0.1 * l_den
            e = i_c * q_c / sig if sig > 1e-30 else 0.0
            ratio = l_num / l_den if l_den > 1e-30 else 0.0
            # the lock averages start from nothing at an acquisition: no decision before they hold half their weight
            warm = (1.0 - a_lc) * warm + a_lc
            if locked == 1:
                if ratio < costas_off:
                    locked = 0
            elif warm > 0.5 and ratio > costas_on:
                locked = 1
            lock_z = ratio
        out_lock[k] = locked

        # ---- subcarrier ---------------------------------------------------------------------
        if sc_mode == 0:
            u = rr if carrier_mode == 1 else ri
        else:
            f = psi
            if sc_mode == 1:
                ref_i = 1.0 if f < 0.5 else -1.0
                ref_qf = 1.0 if (f < 0.25 or f >= 0.75) else -1.0
                if f < w_sq or f > 1.0 - w_sq:
                    ref_q = 1.0
                elif f > 0.5 - w_sq and f < 0.5 + w_sq:
                    ref_q = -1.0
                else:
                    ref_q = 0.0
            else:
                if use_table == 1:
                    jf = int(f * size + 0.5) & mask
                    ref_i = sin_table[jf]
                    ref_q = cos_table[jf]
                else:
                    ref_i = math.sin(two_pi * f)
                    ref_q = math.cos(two_pi * f)
                ref_qf = ref_q
            u = ri * ref_i
            out_uq[k] = ri * ref_qf
            i_s = (1.0 - a_arm) * i_s + a_arm * u
            q_s = (1.0 - a_arm) * q_s + a_arm * ri * ref_q
            e_s = i_s * q_s * inv_sc_norm
            nu += ki_s * e_s
            psi += nu + kp_s * e_s
            if psi >= 1.0 or psi < 0.0:
                psi -= math.floor(psi)
            if raw == 1:
                u = ri
        out_u[k] = u
        sum_re += rr
        sum_re2 += rr * rr

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
        if theta >= two_pi or theta < 0.0:
            theta -= two_pi * math.floor(theta / two_pi)

    while j_at < n_at:  # indices past the block end (not used by the wrapper): the phase after the last sample
        out_phase[j_at] = total
        j_at += 1
    st["phase"] = theta
    st["frequency"] = omega
    st["rate"] = rate
    st["total"] = total
    st["amplitude"] = amp
    st["sc_phase"] = psi
    st["sc_frequency"] = nu
    st["sc_i"] = i_s
    st["sc_q"] = q_s
    st["costas_i"] = i_c
    st["costas_q"] = q_c
    st["costas_num"] = l_num
    st["costas_den"] = l_den
    st["costas_warm"] = warm
    st["locked"] = locked
    st["above"] = above
    st["below"] = below
    st["decisions"] = decisions
    st["lk_count"] = lk_count
    st["lk_sum"] = lk_sum
    st["lk_sum2"] = lk_sum2
    st["lock_z"] = lock_z
    st["sum_re"] = sum_re
    st["sum_re2"] = sum_re2
    st["sum_im"] = sum_im
    st["img_re"] = img_re
    st["img_im"] = img_im
    st["dbl_re"] = dbl_re
    st["dbl_im"] = dbl_im


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
            acc += (hi - lo) * float(u[m - base])
    return acc


@njit(cache=True)
def rect_symbols(u, uq, lock, base, params, state, out_pos, out_raw, out_soft, out_lock, out_half1, out_half2,
                 out_quad):
    """Integrate-and-dump matched filter and data-transition tracking loop for NRZ or Bi-phase-L.

    Parameters
    ----------
    u : float32 or float64 array
        Data signal; ``u[i]`` is recording sample ``base + i``.
    uq : float32 or float64 array
        Quadrature data signal (same indexing), integrated like ``u`` into ``out_quad`` when
        ``params.quadrature`` is 1 (else not read; may be empty).
    lock : int8 array
        Carrier-lock flag per sample (same indexing).
    base : int
        Absolute index of ``u[0]``.
    params : SYMBOL_PARAMS record array of length 1
        ``biphase`` (0 NRZ, 1 Bi-phase-L), ``quadrature``, timing loop gains ``kp_t, ki_t``,
        ``window`` (half-width of the transition window as a fraction of the symbol period),
        ``a_amp`` (amplitude average coefficient), the period estimate held within ``nominal (1 +-
        limit)`` (not bounded when ``nominal`` is 0).
    state : SYMBOL_STATE record array of length 1, updated in place
        ``tau`` (centre of the next symbol, absolute samples), ``period`` (samples), ``prev`` (previous
        raw symbol, 0 = none yet), ``amp`` (average of ``|s| / T``).
    out_pos, out_raw, out_soft, out_lock, out_half1, out_half2, out_quad
        Per symbol: centre (samples), raw integral ``s``, ``s / (A T)`` (about +-1), lock flag, the
        integrals over the first and the second half of the symbol, the quadrature integral; all of
        one length ``cap``.

    Returns
    -------
    int
        Symbols written.  A symbol is taken once its interval ends inside ``u`` (the rest waits for
        the next call); one whose centre lies after ``base - 1/2`` but whose start does not is the
        first symbol of the stream, integrated over the part that exists (no timing update).  It
        equals ``cap`` only when the buffers filled up; a call with new buffers then continues.
        Each symbol advances ``tau`` by at least ``T (1 - kp / 2)``, ``T >= nominal (1 - limit)``,
        so a call writes at most ``len(u) / (nominal (1 - limit) (1 - kp / 2)) + 2`` symbols.

    Notes
    -----
    Symbol ``k`` spans ``[tau - T/2, tau + T/2)``.  NRZ: ``s = int u``; Bi-phase-L:
    ``s = int_{first half} u - int_{second half} u`` (a 0 is +1 then -1).  Timing error: the
    data-transition tracking loop (DTTL, Simon 1970; Yuen, *Deep Space Telecommunications Systems
    Engineering*, ch. 5): the integral ``I_w`` of ``u`` over a window of +-``W`` around the expected
    transition, the symbol boundary before symbol ``k`` for NRZ (weighted by ``(sgn s_{k-1} - sgn
    s_k) / 2``) or the mid-symbol transition for Bi-phase-L (weighted by ``sgn s_k``).  A timing
    ``delta`` samples late gives ``I_w = -2 A delta`` per transition, so ``delta = -e / (2 A)``,
    clipped to half a symbol (not to the window: at low SNR the noise of ``delta`` is several window widths,
    and clipping it there would shrink the loop's gain).  Second-order loop per symbol: ``tau += T - kp delta``,
    ``T -= ki delta`` (the integrator held while the carrier is unlocked).  Cost O(T) per symbol
    (twice that with the quadrature integral).
    """
    n = u.shape[0]
    p = params[0]
    biphase = p["biphase"]
    quad = p["quadrature"]
    kp = p["kp_t"]
    ki = p["ki_t"]
    wfrac = p["window"]
    a_amp = p["a_amp"]
    nominal = p["nominal"]
    limit = p["limit"]
    st = state[0]
    tau = st["tau"]
    period = st["period"]
    prev = st["prev"]
    amp = st["amp"]
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
        h1 = interval_sum(u, base, a_in, tau)
        h2 = interval_sum(u, base, tau, b)
        if biphase == 1:
            s = h1 - h2
            lo_w = tau - w if tau - w > first else first
            iw = interval_sum(u, base, lo_w, tau + w)
            e = iw * (1.0 if s >= 0.0 else -1.0)
            have_e = tau - w >= first
        else:
            s = h1 + h2
            iw = interval_sum(u, base, a - w, a + w) if a - w >= first else 0.0
            if prev != 0.0 and a - w >= first:
                e = iw * ((1.0 if prev >= 0.0 else -1.0) - (1.0 if s >= 0.0 else -1.0)) * 0.5
                have_e = True
            else:
                e = 0.0
                have_e = False
        sq = 0.0
        if quad == 1:
            if biphase == 1:
                sq = interval_sum(uq, base, a_in, tau) - interval_sum(uq, base, tau, b)
            else:
                sq = interval_sum(uq, base, a_in, b)
        mag = abs(s) / period
        amp = (1.0 - a_amp) * amp + a_amp * mag if amp > 0.0 else mag
        centre = int(math.floor(tau + 0.5)) - base
        lk = lock[centre] if 0 <= centre < n else 0
        out_pos[nout] = tau
        out_raw[nout] = s
        out_soft[nout] = s / (amp * period) if amp > 0.0 else 0.0
        out_lock[nout] = lk
        out_half1[nout] = h1
        out_half2[nout] = h2
        out_quad[nout] = sq
        nout += 1
        delta = 0.0
        if have_e and amp > 0.0:
            delta = -e / (2.0 * amp)
            if delta > half:
                delta = half
            elif delta < -half:
                delta = -half
        prev = s if s != 0.0 else 1e-30
        tau += period - kp * delta
        if lk == 1:
            period -= ki * delta
            if nominal > 0.0:
                if period > nominal * (1.0 + limit):
                    period = nominal * (1.0 + limit)
                elif period < nominal * (1.0 - limit):
                    period = nominal * (1.0 - limit)
    st["tau"] = tau
    st["period"] = period
    st["prev"] = prev
    st["amp"] = amp
    return nout


@njit(cache=True)
def _held_integral(cum, u, base, t):
    """Integral of the sample-and-hold signal from the start of ``u``'s first cell to ``t`` (prefix sums)."""
    m = int(math.floor(t + 0.5)) - base
    if m <= 0:
        return 0.0
    if m >= u.shape[0]:
        return cum[u.shape[0]]
    return cum[m] + (t + 0.5 - (m + base)) * float(u[m])


@njit(cache=True)
def timing_energy(cum, u, base, first_centre, periods, n_phase, n_sym, biphase, out_energy):
    """Mean ``s^2`` of ``n_sym`` symbols for trial periods and ``n_phase`` trial timings per period.

    Trial ``(i, j)``: symbol ``k`` centred at ``first_centre + j P_i / n_phase + k P_i`` with period
    ``P_i = periods[i]``; ``s`` is the matched-filter output of :func:`rect_symbols` (NRZ: the
    integral over the symbol; Bi-phase-L: first half minus second half).  ``cum`` is the prefix sum
    of ``u`` (``cum[m] = sum u[:m]``, length ``len(u) + 1``), so each integral costs O(1); the trial
    with the largest mean energy is the symbol timing (non-data-aided, square law).  Cost
    O(len(periods) n_phase n_sym).
    """
    for i in range(periods.shape[0]):
        period = periods[i]
        for j in range(n_phase):
            t0 = first_centre + j * period / n_phase
            acc = 0.0
            for k in range(n_sym):
                s = _symbol_integral(cum, u, base, t0 + k * period, 0.5 * period, biphase)
                acc += s * s
            out_energy[i, j] = acc / n_sym if n_sym > 0 else 0.0


@njit(cache=True)
def _symbol_integral(cum, u, base, tau, half, biphase):
    """The matched-filter output of :func:`rect_symbols` for a symbol centred at ``tau`` (``half`` a period each
    side) from the prefix sums: NRZ the integral, Bi-phase-L first half less second half."""
    fa = _held_integral(cum, u, base, tau - half)
    fm = _held_integral(cum, u, base, tau)
    fb = _held_integral(cum, u, base, tau + half)
    if biphase == 1:
        return (fm - fa) - (fb - fm)
    return fb - fa


@njit(cache=True)
def symbol_integrals(cum, u, base, centres, half, biphase, out):
    """``out[k]``: the matched-filter output of :func:`rect_symbols` for a symbol centred at ``centres[k]`` (``half``
    a period each side), from the prefix sums ``cum`` of ``u`` as :func:`timing_energy` takes them."""
    for k in range(centres.shape[0]):
        out[k] = _symbol_integral(cum, u, base, centres[k], half, biphase)
