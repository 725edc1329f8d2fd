"""Measured Doppler against the orbit's prediction (issue 17): ``decode --tle`` on a pass whose carrier the
transmitter moves by the Doppler of an invented element set, plus a constant oscillator offset.

The transmitter's Doppler comes from sgp4 (PyPI) and erfa's GMST (via astropy's dependency pyerfa), light
time iterated and differentiated numerically, never from pipeline.orbit; the signal from
tests/demod_signals.py.  The physics check is that the residual is flat: its RMS under 5 Hz and its mean
within 5 Hz of the oscillator offset.
"""

from __future__ import annotations

import json

import demod_signals as ds
import numpy as np
import orbit_truth
import sgp4  # noqa: F401  (a runtime dependency: missing, the test fails)

from pipeline.timescales import format_utc, tai_from_posix_ns

F_CARRIER = 2.2455e9  # Hz: the demo's invented S-band assignment
OSC_OFFSET_HZ = 850.0  # the spacecraft oscillator's offset from nominal (the mean residual to find)
FS = 250e3
RS = 60e3
SECONDS = 4.0
LAT, LON, ALT_M = 44.7261, 3.4117, 1012.0  # the invented Hollow Ridge station (the demo profile's)


def _decode_pass(tmp_path, *, conjugate: bool = False, receiver: str = "", from_culmination_s: float = 0.0,
                 tle: bool = True, bits: np.ndarray | None = None, tuning_hz: float = 0.0,
                 baseband: np.ndarray | None = None, link: str | None = None):
    """Simulate the pass (its samples conjugated: a spectrally inverted recording) and decode it with --tle
    (``tle`` False: without); the recording's middle lies about ``from_culmination_s`` after the highest point
    (on its 20 s grid, the start rounded to the second).  ``bits``: the channel bits to send (default: random
    bits for about SECONDS); the profile is uncoded and randomized, TM frames of 223 octets, spacecraft 77.
    ``tuning_hz``: the recording's centre lies this far above the nominal frequency (given in the profile).
    ``baseband`` and ``link``: another transmitter's samples at FS before the Doppler (noise included) and the
    profile's [link] keys for it (modulation, symbol rate, line code ...), instead of BPSK at RS."""
    tmp_path.mkdir(parents=True, exist_ok=True)
    from sgp4.api import WGS72, Satrec

    from pipeline import decode, load_profile

    l1, l2 = orbit_truth.leo_tle()
    (tmp_path / "leo.tle").write_text(f"TEST LEO\n{l1}\n{l2}\n")
    sat = Satrec.twoline2rv(l1, l2, WGS72)
    station = orbit_truth.station_ecef_km(LAT, LON, ALT_M)
    t0 = round(orbit_truth.culmination_posix_s(sat, station) + from_culmination_s - SECONDS / 2)
    # the transmitter: BPSK, its carrier moved by the Doppler (10 ms grid, cubic in between) plus the offset
    if baseband is None:
        rng = np.random.default_rng(17)
        n_sym = int(SECONDS * RS) - 40 if bits is None else int(bits.size)
        baseband = ds.modulate(n_sym, modulation="bpsk", sample_rate_hz=FS, symbol_rate_baud=RS, esn0_db=12.0,
                               rng=rng, lead_symbols=20,
                               bits=None if bits is None else (bits, np.zeros_like(bits))).samples
    n = len(baseband)
    grid = np.arange(0.0, n / FS + 0.02, 0.01)
    f_grid = np.array([orbit_truth.doppler_hz(sat, t0 + g, station, F_CARRIER) for g in grid]) + OSC_OFFSET_HZ
    from scipy.interpolate import CubicSpline

    f_t = CubicSpline(grid, f_grid)(np.arange(n) / FS)
    phase = 2 * np.pi * np.cumsum(f_t) / FS
    samples = (baseband * np.exp(1j * phase)).astype("<c8")
    if tuning_hz:
        samples = (samples * np.exp(-2j * np.pi * tuning_hz * np.arange(n) / FS)).astype("<c8")
    if conjugate:
        samples = np.conj(samples)
    (tmp_path / "pass.sigmf-data").write_bytes(samples.tobytes())
    start = format_utc(tai_from_posix_ns(int(t0) * 1_000_000_000))
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": FS, "core:version": "1.2.0"},
            "captures": [{"core:sample_start": 0, "core:datetime": start, "core:frequency": F_CARRIER + tuning_hz}],
            "annotations": []}
    (tmp_path / "pass.sigmf-meta").write_text(json.dumps(meta))
    (tmp_path / "p.toml").write_text(f"""
name = "leo-test"
[link]
{link or f'modulation = "bpsk"{chr(10)}symbol_rate = {RS}{chr(10)}line_code = "nrz-l"'}
{f"downlink_frequency_hz = {F_CARRIER}" if tuning_hz else ""}
[coding]
convolutional = "none"
reed_solomon = 0
randomizer = true
[frames]
kind = "tm"
length = 223
spacecraft_id = 77
[station]
name = "HOLLOW RIDGE"
latitude_deg = {LAT}
longitude_deg = {LON}
altitude_m = {ALT_M}
{receiver}
""")
    prof = load_profile(tmp_path / "p.toml")
    out = tmp_path / "out"
    summary = decode(tmp_path / "pass.sigmf-meta", prof, out, tle=tmp_path / "leo.tle" if tle else None)
    import csv

    with open(out / "doppler.csv", newline="") as f:
        rows = [r for r in csv.DictReader(f) if r["locked"] == "True" and r.get("residual_hz")]
    return rows, summary, out


def test_doppler_residuals_are_flat_and_show_the_oscillator_offset(tmp_path):
    rows, summary, out = _decode_pass(tmp_path)
    assert len(rows) >= 20
    residual = np.array([float(r["residual_hz"]) for r in rows[2:]])  # the loop's pull-in left out
    assert float(np.std(residual)) < 5.0, residual
    assert abs(float(np.mean(residual)) - OSC_OFFSET_HZ) < 5.0, np.mean(residual)
    check = summary.report["doppler_check"]
    assert abs(check["mean_residual_hz"] - OSC_OFFSET_HZ) < 5.0 and check["residual_rms_hz"] < 10.0
    assert "note" not in check and "doppler_note" not in summary.report["pass"]
    assert (out / "doppler.tdm").read_text().count("RECEIVE_FREQ_1") == sum(1 for _ in open(out / "doppler.csv")) - 1
    # the report draws the residual over the pass and explains it
    page = (out / "report.html").read_text()
    assert "Doppler residual: the measured carrier frequency minus" in page


def test_an_inverted_spectrum_read_upright_is_named_and_declared_inversion_restores_the_doppler(tmp_path):
    # the transmitter's samples conjugated (the receiver's I and Q swapped): BPSK decodes either way, but
    # the measured Doppler has the wrong sign, so its residual follows twice the Doppler's change
    rows, summary, out = _decode_pass(tmp_path / "auto", conjugate=True)
    check = summary.report["doppler_check"]
    assert check["rows"] >= 20
    assert check["residual_rms_hz"] > 40.0, check
    assert check["inverted_residual_rms_hz"] < 10.0, check
    # flipped, the mean is the oscillator offset again: -(D + f_osc) -> D + f_osc
    assert "spectrum_inverted = true" in check["note"] and summary.report["pass"]["doppler_note"] == check["note"]
    assert "Doppler check:" in (out / "report.html").read_text()
    # declared in the profile, the receiver conjugates the input and the residuals are flat as upright
    rows, summary, out = _decode_pass(tmp_path / "declared", conjugate=True,
                                      receiver="[receiver]\nspectrum_inverted = true")
    check = summary.report["doppler_check"]
    residual = np.array([float(r["residual_hz"]) for r in rows[2:]])
    assert float(np.std(residual)) < 5.0 and abs(float(np.mean(residual)) - OSC_OFFSET_HZ) < 5.0
    assert "note" not in check
