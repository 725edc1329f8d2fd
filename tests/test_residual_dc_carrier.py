"""A residual carrier at (or passing slowly through) 0 Hz: a recording tuned to the carrier's predicted frequency.

The receiver removes its front end's DC offset (the blocks' means), and a carrier within a bin or so of 0 Hz would
go with it.  The residual-carrier search keeps the means and searches 0 Hz too (an offset alone is a bare line there,
refused for its missing data sidebands as any tone is), and while a carrier is tracked within two bins of 0 Hz the
offset estimate is held.  Recordings come from ``tests/residual_signals.py``, an independent PCM/PM transmitter (no
pipeline code); decisions are checked against the same receiver on the same pass with its carrier 700 Hz away,
against ideal coherent detection of the same samples (``residual_signals.genie_symbols``), and the genie against the
coherent antipodal error rate (Proakis and Salehi, *Digital Communications*, 5th ed., sec. 4.2).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
import residual_signals as rs

from pipeline.demod.residual import ResidualCarrierDemodulator
from pipeline.profile import LinkSection, ReceiverSection

RATE, SPS, INDEX = 2000.0, 64, 1.2
FS = RATE * SPS
N_SYMBOLS = 16_000


def _run(carrier_hz: float, *, esn0_db: float = 3.0, rate_hz_per_s: float = 0.0, dc: complex = 0j, seed: int = 3):
    """The receiver's and the genie's wrong decisions over the pass's last 80 % (and how many), and the receiver."""
    sig = rs.transmit(N_SYMBOLS, wave="nrz", sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX,
                      esn0_db=esn0_db, carrier_hz=carrier_hz, rate_hz_per_s=rate_hz_per_s, clock_ppm=20.0, seed=seed)
    y = sig.samples
    if dc:
        y = (y + np.complex64(dc)).astype(np.complex64)
    link = LinkSection(modulation="pcm-pm", symbol_rate_baud=RATE, line_code="nrz-l", pulse="rect",
                       modulation_index_rad=INDEX)
    demod = ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=FS)
    step = 1 << 17
    out = [demod.process(SimpleNamespace(samples=y[a:a + step], start=a, nonfinite=0)) for a in range(0, y.size, step)]
    out.append(demod.flush())
    soft = np.concatenate([b.soft for b in out])
    pos = np.concatenate([b.position for b in out])
    k = sig.symbol_index(pos)
    kg, sg = rs.genie_symbols(sig)
    both = np.intersect1d(k[k >= N_SYMBOLS // 5], kg)
    truth = sig.bits[both].astype(bool)
    wrong = (soft[np.searchsorted(k, both)] < 0) != truth
    if wrong.mean() > 0.5:  # the data's sign ambiguity (the frame synchronizer resolves it)
        wrong = ~wrong
    g_wrong = (sg[np.searchsorted(kg, both)] < 0) != truth
    return demod, int(wrong.sum()), int(g_wrong.sum()), int(both.size)


@pytest.fixture(scope="module")
def far():
    """The receiver's errors on the same pass with its carrier 700 Hz from 0 Hz (its own implementation loss: 1.13
    times the genie's at Es/N0 3 dB), and with a Doppler rate of -0.5 Hz/s."""
    return {rate: _run(700.0, rate_hz_per_s=rate)[1] for rate in (0.0, -0.5)}


@pytest.mark.parametrize("carrier_hz", [0.0, 0.4, -1.5])
def test_carrier_at_0_hz_is_found_and_held(carrier_hz, far):
    # before: the blocks' means took the carrier out, every dwell ended with nothing found, and not a symbol came out
    demod, wrong, g_wrong, n = _run(carrier_hz)
    assert demod.stats.carrier_found == 1 and demod.stats.acquisitions == 1
    assert demod.stats.carrier_locked_symbols > 0.85 * N_SYMBOLS
    assert n > 0.75 * N_SYMBOLS and wrong <= 1.1 * far[0.0] + 10, (wrong, far[0.0], n)
    theory = rs.bit_error_rate_theory(3.0)
    assert abs(g_wrong / n - theory) < 4.0 * math.sqrt(theory / n)


def test_carrier_at_0_hz_beside_a_dc_offset(far):
    # the front end's own offset, 10 dB under the residual carrier's line, stays in the samples: the loop holds the
    # carrier and the offset together (a phase error of at most atan(0.32) = 18 degrees, a cos^2 loss of 0.4 dB)
    a_c = math.cos(INDEX)
    demod, wrong, _, n = _run(0.0, dc=0.32 * a_c * np.exp(1j * 1.0))
    assert demod.stats.carrier_found == 1 and demod.stats.carrier_locked_symbols > 0.85 * N_SYMBOLS
    assert wrong <= 1.2 * far[0.0] + 10, (wrong, far[0.0], n)


@pytest.mark.parametrize("carrier_hz,rate", [(2.0, -0.5), (3.0, -1.0)])
def test_carrier_passing_slowly_through_0_hz(carrier_hz, rate, far):
    # within two bins (7.8 Hz) of 0 Hz for the whole pass, through 0 Hz after 3-4 s: the estimate is held there.
    # Before: (2, -0.5) nothing found, (3, -1) found only after 3.6 s
    demod, wrong, _, n = _run(carrier_hz, rate_hz_per_s=rate)
    assert demod.stats.carrier_found == 1 and demod.stats.carrier_locked_symbols > 0.85 * N_SYMBOLS
    assert wrong <= 1.1 * far[-0.5] + 10, (wrong, far[-0.5], n)


def test_a_dc_offset_alone_is_not_a_carrier():
    # complex white noise and a front end's offset 13 dB over one block's noise in its bin: the search at 0 Hz sees
    # the offset's bare line, refuses it (no data sidebands around it), and nothing is held
    rng = np.random.default_rng(5)
    n = 40 * 32768
    y = ((rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(0.5) + 0.05 * np.exp(0.7j)).astype(
        np.complex64)
    link = LinkSection(modulation="pcm-pm", symbol_rate_baud=RATE, line_code="nrz-l", pulse="rect",
                       modulation_index_rad=INDEX)
    demod = ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=FS)
    for a in range(0, n, 1 << 17):
        demod.process(SimpleNamespace(samples=y[a:a + (1 << 17)], start=a, nonfinite=0))
    demod.flush()
    assert demod.stats.carrier_found == 0 and demod.stats.carrier_locked_symbols == 0
    assert "tone" in (demod.no_lock_message() or "")


@pytest.mark.parametrize("carrier_hz", [300.0, 1500.0])
def test_a_strong_offset_beside_the_carrier(carrier_hz):
    # a front end's offset 10 dB over the whole signal, the carrier 0.15 and 0.75 symbol rates from it (inside the
    # data's sidebands, which the search weighs): the search at 0 Hz refuses the offset's bare line, finds the carrier,
    # and the offset estimate takes the offset out once the carrier is tracked away from it
    demod, wrong, g_wrong, n = _run(carrier_hz, dc=3.16 * np.exp(0.5j))
    assert demod.stats.carrier_found == 1 and demod.stats.acquisitions == 1
    assert demod.stats.carrier_locked_symbols > 0.85 * N_SYMBOLS
    assert wrong <= 1.15 * g_wrong + 10, (wrong, g_wrong, n)
