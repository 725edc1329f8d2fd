"""The symbol rate measured on the spacing of the frame markers (``pass.symbol_rate_note``, ``demod.symbol_rate_*``).

The end-to-end check sends frames built by ``tests/third_party_tx.py`` through the independent BPSK modulator of
``tests/demod_signals.py`` with its symbol clock slow by a known fraction, on the LEO pass of
``tests/test_doppler_check.py`` (the carrier moved by the Doppler, the symbol clock not), and reads the rate back from
the report; the unit checks use marker positions made up here.
"""

from __future__ import annotations

import math

import demod_signals as ds
import numpy as np
import pytest
import test_doppler_check as pass_sim
from test_predicted_acquisition import _frames_and_packets

from pipeline.report._build import measured_symbol_rate

CADU = 10_000.0


def test_the_spacing_is_the_sum_over_the_kept_pairs():
    rng = np.random.default_rng(4)
    true = CADU * (1.0 + 37e-6)  # 37 ppm long
    n = np.arange(200)
    pos = 500.0 + n * true + 0.05 * rng.standard_normal(n.size)
    found = np.ones(n.size, bool)
    found[[7, 8, 50]] = False  # markers not found: their neighbours are two and three CADUs apart
    pos[120:] += 1234.0  # samples inserted by the recorder
    pos[160:] += 4.0  # a symbol slipped (4 samples: 400 ppm of a CADU)
    got = measured_symbol_rate(pos, found, CADU, 4.0)
    assert got is not None
    spacing, cadus = got
    # the pairs across the insertion and the slip are left out: 199 CADUs less 2
    assert cadus == 197
    # a straight-line fit through three runs of about 65 markers with 0.05 samples of jitter each: a slope error
    # of 0.05 sqrt(12 / (3 65^3)) = 5.5e-5 samples per CADU (its standard deviation), here within 4 of them (a
    # least-squares slope's variance sigma^2 / sum (n - mean n)^2, about 12 sigma^2 / N^3 per run of N: N. R. Draper,
    # H. Smith, Applied Regression Analysis, ch. 1; from memory)
    assert spacing == pytest.approx(true, abs=4 * 0.05 * np.sqrt(12 / (3 * 65 ** 3)))


def test_too_few_cadus_give_no_rate():
    pos = 100.0 + np.arange(9) * CADU
    assert measured_symbol_rate(pos, np.ones(9, bool), CADU, 4.0) is None  # 8 CADUs
    assert measured_symbol_rate(np.array([0.0]), np.ones(1, bool), CADU, 4.0) is None
    pos = np.arange(20) * CADU * 1.01  # every spacing 1 % off: none kept
    assert measured_symbol_rate(pos, np.ones(20, bool), CADU, 4.0) is None


@pytest.mark.parametrize("ppm", [-30.0, 45.0])
def test_the_report_gives_the_transmitters_symbol_rate(tmp_path, ppm):
    # demod_signals' clock runs ppm slow: fs / Rs (1 + ppm 1e-6) samples per symbol, so the rate is Rs / (1 + ppm 1e-6)
    bits, packets = _frames_and_packets()
    rng = np.random.default_rng(5)
    baseband = ds.modulate(int(bits.size), modulation="bpsk", sample_rate_hz=pass_sim.FS, symbol_rate_baud=pass_sim.RS,
                           esn0_db=12.0, clock_offset_ppm=ppm, rng=rng, lead_symbols=20,
                           bits=(bits, np.zeros_like(bits))).samples
    link = f'modulation = "bpsk"\nsymbol_rate = {pass_sim.RS}\nline_code = "nrz-l"'
    _, summary, out = pass_sim._decode_pass(tmp_path, baseband=baseband, link=link, tle=False)
    assert summary.packets == len(packets)
    demod = summary.report["demod"]
    truth = pass_sim.RS / (1.0 + ppm * 1e-6)
    assert demod["symbol_rate_cadus"] >= 20
    # a straight line through 128 CADUs' markers over 3.6 s (900k samples) with a few hundredths of a sample of
    # jitter: 0.02 ppm was measured
    assert demod["symbol_rate_measured_baud"] == pytest.approx(truth, abs=truth * 0.05e-6)
    assert demod["symbol_rate_offset_ppm"] == pytest.approx((truth / pass_sim.RS - 1.0) * 1e6, abs=0.05)
    assert f"{demod['symbol_rate_offset_ppm']:+.2f} ppm from the profile's 60,000" in summary.report["pass"][
        "symbol_rate_note"]
    assert "Symbol rate:" in (out / "report.html").read_text()


def test_with_an_orbit_the_dopplers_part_is_taken_out(tmp_path):
    # the transmitter's symbol clock exact, its symbols reaching the station compressed by the light time's change
    # (orbit_truth.light_time_s: sgp4 and erfa, never pipeline.orbit) on the LEO pass 120 s before its highest point,
    # where the range shrinks at about 5.4 km/s: the measured offset is the Doppler's (about +18 ppm), and less the
    # orbit's predicted Doppler (decode --tle) it is the symbol clock's, 0
    import orbit_truth
    from sgp4.api import WGS72, Satrec

    bits, packets = _frames_and_packets()
    l1, l2 = orbit_truth.leo_tle()
    sat = Satrec.twoline2rv(l1, l2, WGS72)
    station = orbit_truth.station_ecef_km(pass_sim.LAT, pass_sim.LON, pass_sim.ALT_M)
    from_culmination_s = -120.0
    t0 = round(orbit_truth.culmination_posix_s(sat, station) + from_culmination_s - pass_sim.SECONDS / 2)
    fs, rs = pass_sim.FS, pass_sim.RS
    # receive times on a grid, their transmit times t - (tau(t) - tau(0)); the symbols' transmit times mapped back
    grid = np.arange(0.0, bits.size / rs + 1.0, 0.01)
    tau = np.array([orbit_truth.light_time_s(sat, t0 + g, station) for g in grid])
    centres = np.interp((20 + np.arange(bits.size) + 0.37) / rs, grid - (tau - tau[0]), grid) * fs
    n = int(math.ceil(centres[-1] + 40 * fs / rs))
    s, e_pulse = ds._add_pulses(n, centres, (1.0 - 2.0 * bits).astype(np.complex128), fs / rs, "rrc", 0.5, 16)
    rng = np.random.default_rng(6)
    sigma = math.sqrt(e_pulse / 10 ** (12.0 / 10) / 2)
    baseband = (s + sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)
    link = f'modulation = "bpsk"\nsymbol_rate = {rs}\nline_code = "nrz-l"\ndownlink_frequency_hz = {pass_sim.F_CARRIER}'
    _, summary, _ = pass_sim._decode_pass(tmp_path, baseband=baseband, link=link,
                                          from_culmination_s=from_culmination_s)
    assert summary.packets == len(packets)
    demod = summary.report["demod"]
    compression = -(tau[-1] - tau[0]) / (grid[-1] - grid[0]) * 1e6  # the mean -d tau / dt, ppm
    assert 15.0 < demod["symbol_rate_offset_ppm"] < 21.0
    assert abs(demod["symbol_rate_offset_ppm"] - compression) < 0.5  # (the frames' span is inside the grid's)
    assert abs(demod["symbol_rate_doppler_ppm"] - demod["symbol_rate_offset_ppm"]) < 0.05
    assert abs(demod["symbol_rate_offset_less_doppler_ppm"]) < 0.05
    assert "less the orbit's predicted Doppler" in summary.report["pass"]["symbol_rate_note"]
