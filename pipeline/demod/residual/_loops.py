"""Loop bandwidths of the residual-carrier demodulator, chosen from the symbol rate and the carrier-to-noise density."""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["LoopPlan", "loop_gains", "plan_loops"]

_ZETA = 1.0 / math.sqrt(2.0)

#: Carrier loop SNR aimed at, P_c / (N0 B_L): phase jitter 1 / 50 rad^2 (0.14 rad rms, about 0.09 dB of data
#: amplitude), well clear of cycle slips (Gardner, *Phaselock Techniques*, 3rd ed., ch. 4; a second-order loop
#: slips about once a minute per hertz of bandwidth at 10 dB loop SNR, ch. 5).
CARRIER_LOOP_SNR = 50.0
#: Carrier loop bandwidth bounds, x symbol rate (the upper one the former fixed choice; NRZ PCM/PM keeps its
#: data spectrum, which peaks at the carrier, out of the loop with 0.001).
CARRIER_BW_MAX = 0.005
CARRIER_BW_MAX_NRZ_PM = 0.001
CARRIER_BW_MIN = 2e-4
#: Subcarrier loop: SNR aimed at, (P_d / N0) S_L / B_sc, the lowest it runs at while wide (a square wave's
#: phase jitter 1 / (4 sqrt 200) = 0.018 cycles rms, well inside the +-1/8 cycle window), and bounds x symbol rate.
SUBCARRIER_LOOP_SNR = 2000.0
SUBCARRIER_LOOP_SNR_MIN = 200.0
SUBCARRIER_BW_MAX = 0.002
SUBCARRIER_BW_MIN = 1e-5
#: Transition tracking loop: (Es/N0) S_L / (B_L T) aimed at, the lowest while wide (when the symbol period came
#: from a coherent subcarrier's frequency, and when it did not: then the loop must first take up the clock's
#: offset), and the smallest B_L T.
TIMING_LOOP_SNR = 4000.0
TIMING_LOOP_SNR_MIN = 500.0
TIMING_LOOP_SNR_MIN_UNAIDED = 200.0
TIMING_BT_MIN = 1e-5
#: Gear shifting after an acquisition: a loop starts wide and narrows as ``GEAR / t`` (t in its own units:
#: seconds for the subcarrier loop, symbols for the transition loop) until it reaches its aim.  A
#: first-order loop of bandwidth B averages over about 1 / (4 B), so 0.25 / t would be the running
#: average; 2 / t leaves a second-order loop's frequency integrator time to settle first.
GEAR = 2.0


@dataclass(frozen=True)
class LoopPlan:
    """Bandwidths for one block: carrier ``carrier_hz`` (B_L), subcarrier ``subcarrier_hz``, transition
    tracking ``timing_bt`` (B_L T), and the carrier-lock decision interval ``lock_interval_s``."""

    carrier_hz: float
    subcarrier_hz: float
    timing_bt: float
    lock_interval_s: float


def loop_gains(bn: float, order: int) -> tuple[float, float, float]:
    """Proportional, integral and rate gains of a loop of noise bandwidth ``bn`` (per update), B_L T << 1.

    Second order, damping 1/sqrt 2: ``w_n = 2 B / (zeta + 1 / (4 zeta))``, ``kp = 2 zeta w_n``,
    ``ki = w_n^2``; third order with Kaplan's coefficients (E. D. Kaplan, *Understanding GPS*, 2nd ed.,
    table 5.6; F. M. Gardner, *Phaselock Techniques*, 3rd ed., ch. 2-3).

    Examples
    --------
    >>> [round(g, 6) for g in loop_gains(0.001, 2)]
    [0.002667, 4e-06, 0.0]
    """
    if order == 3:
        wn = bn / 0.7845
        return 2.4 * wn, 1.1 * wn * wn, wn ** 3
    wn = 2.0 * bn / (_ZETA + 1.0 / (4.0 * _ZETA))
    return 2.0 * _ZETA * wn, wn * wn, 0.0


def squaring_loss(esn0: float) -> float:
    """``S_L = 2 E / (1 + 2 E)``: the SNR a Costas (or transition) loop keeps of its integrate-and-dump arms at
    symbol SNR ``E = Es/N0`` (Lindsey & Simon, *Telecommunication Systems Engineering*, ch. 2)."""
    e = max(float(esn0), 0.0)
    return 2.0 * e / (1.0 + 2.0 * e)


def plan_loops(*, symbol_rate_baud: float, cn0_hz: float, data_to_carrier: float, nrz_pm: bool,
               since_s: float, fixed_carrier_hz: float | None = None, timing_bt_max: float = 0.005,
               period_aided: bool = False) -> LoopPlan:
    """Loop bandwidths from the symbol rate and the carrier-to-noise density ``P_c / N0`` (Hz).

    Parameters
    ----------
    symbol_rate_baud : float
    cn0_hz : float
        Residual carrier power over the noise density (``nan`` or <= 0: unknown, the widest bandwidths).
    data_to_carrier : float
        ``P_d / P_c`` of the modulation (``tan^2 m`` for NRZ and a square subcarrier).
    nrz_pm : bool
        NRZ PCM/PM (the data spectrum peaks at the carrier: a narrower carrier loop).
    since_s : float
        Time since the acquisition (gear shifting of the subcarrier and transition loops).
    fixed_carrier_hz : float or None
        ``[receiver] carrier_loop_bandwidth_hz`` when set (not 0): used as it is.
    timing_bt_max : float
        ``[receiver] timing_loop_bandwidth``: the widest transition loop.
    period_aided : bool
        The symbol period came from the subcarrier's measured frequency (a coherent subcarrier): the
        transition loop may start narrower.

    Returns
    -------
    LoopPlan

    Notes
    -----
    With ``E = Es/N0 = (P_c / N0) (P_d / P_c) / R_s``: carrier ``B_L = (P_c / N0) / 50`` within
    ``[2e-4, 5e-3] R_s`` (``1e-3`` for NRZ PCM/PM); subcarrier ``B_sc = (P_d / N0) S_L / 2000``
    within ``[1e-5, 2e-3] R_s``; transition loop ``B_L T = E S_L / 4000`` within ``[1e-5,
    timing_loop_bandwidth]``; the last two start wide (at a loop SNR of 200, twice the aim for a
    transition loop whose period came from a coherent subcarrier, within the upper bounds) and narrow
    as ``2 / t`` (``t`` in seconds, and in symbols for ``B_L T``) after an acquisition.  The carrier-lock decision
    interval is ``1 / B_L``: with the loop's aim its statistic is ``sqrt(2 x 50) = 10`` standard
    errors when locked.  At Es/N0 = -8 dB and m = 1.2 rad: ``B_L = 4.8e-4 R_s``, ``B_sc = 1.9e-5
    R_s``, ``B_L T = 9.5e-6`` (so ``1e-5``).  The aims come from the jitter formulas of Yuen (ed.),
    *Deep Space Telecommunications Systems Engineering*, ch. 5 (phase jitter ``1 / rho``; square
    subcarrier amplitude ``1 - 4 |delta|``; transition loop ``sigma^2 ~ W B_L T / (2 E erf^2
    sqrt E)``), with the constants set by the implementation-loss measurements
    (``bench/bench_residual_loss.py``).
    """
    rs = float(symbol_rate_baud)
    c_max = (CARRIER_BW_MAX_NRZ_PM if nrz_pm else CARRIER_BW_MAX) * rs
    known = cn0_hz is not None and math.isfinite(cn0_hz) and cn0_hz > 0
    if fixed_carrier_hz:
        carrier = float(fixed_carrier_hz)
    elif known:
        carrier = min(max(cn0_hz / CARRIER_LOOP_SNR, CARRIER_BW_MIN * rs), c_max)
    else:
        carrier = c_max
    sc_max = SUBCARRIER_BW_MAX * rs
    if known:
        pd_n0 = cn0_hz * data_to_carrier
        esn0 = pd_n0 / rs
        sl = squaring_loss(esn0)
        sc_aim = min(max(pd_n0 * sl / SUBCARRIER_LOOP_SNR, SUBCARRIER_BW_MIN * rs), sc_max)
        sc_wide = min(max(pd_n0 * sl / SUBCARRIER_LOOP_SNR_MIN, sc_aim), sc_max)
        bt_aim = min(max(esn0 * sl / TIMING_LOOP_SNR, TIMING_BT_MIN), timing_bt_max)
        snr_min = TIMING_LOOP_SNR_MIN if period_aided else TIMING_LOOP_SNR_MIN_UNAIDED
        bt_wide = min(max(esn0 * sl / snr_min, bt_aim), timing_bt_max)
    else:
        sc_aim = sc_wide = sc_max
        bt_aim = bt_wide = timing_bt_max
    t = max(float(since_s), 1e-9)
    sc = min(max(sc_aim, GEAR / t), sc_wide)
    bt = min(max(bt_aim, GEAR / (t * rs)), bt_wide)
    return LoopPlan(carrier_hz=carrier, subcarrier_hz=sc, timing_bt=bt, lock_interval_s=1.0 / carrier)
