"""The carrier search centred on the predicted Doppler (``decode --tle``/``--oem``).

The pass: an invented low orbiter 120 s before its highest point over Hollow Ridge, where the one-way Doppler at
S band is about +40 kHz, its carrier moved by the Doppler that sgp4 (PyPI) and erfa's GMST give
(tests/orbit_truth.py, never pipeline.orbit), TM frames built by tests/third_party_tx.py.  Sign convention of
the one-way Doppler: f_d = -f v_r / c, positive while the spacecraft approaches (../shared/REFERENCES.md sec. 9,
formula from memory, not confirmed); the truth computes it as -f d(light time)/dt, the same convention.
"""

from __future__ import annotations

import dataclasses
import math
import pickle

import demod_signals as ds
import numpy as np
import orbit_truth
import pytest
import residual_signals as rs
import test_doppler_check as pass_sim
import third_party_tx as tx

from pipeline.demod import CarrierPrediction, Demodulator
from pipeline.demod.residual import ResidualCarrierDemodulator
from pipeline.profile import LinkSection, ReceiverSection

BEFORE_CULMINATION_S = -120.0  # the pass's Doppler is then about +40.5 kHz at 2.2455 GHz (sgp4 truth)
NARROW_RANGE_HZ = 3000.0  # far narrower than the Doppler
TUNING_HZ = 20e3  # the recording's centre above the nominal downlink frequency


class _Chunk:
    def __init__(self, samples, start):
        self.samples, self.start, self.nonfinite = samples, start, 0


def _frames_and_packets(symbol_rate: float = pass_sim.RS):
    """Channel bits for about 4 s at ``symbol_rate`` (60 ksym/s): uncoded, randomized TM frames of 223 octets,
    spacecraft 77."""
    rng = np.random.default_rng(3)
    field = 223 - 6
    n_frames = (int(pass_sim.SECONDS * symbol_rate) - 40 - 317 - 200) // (8 * (223 + 4)) - 1
    packets, size = [], 0
    while size + 400 < n_frames * field:
        payload = bytes(rng.integers(0, 256, int(rng.integers(60, 300)), dtype=np.uint8))
        packets.append(tx.space_packet((100, 200, 300)[len(packets) % 3], len(packets) // 3, payload))
        size += len(packets[-1])
    frames = tx.tm_frames(packets, scid=77, vcid=0, length=223, ocf=False, fecf=False)
    bits = tx.channel_bits(frames, rs_e=0, interleave=1, randomize=True, conv=False, nrz_m=False)
    return bits, packets


def _truth_doppler_hz(t_offset_s: float) -> float:
    """sgp4/erfa one-way Doppler at the pass's start plus ``t_offset_s`` (the helper's own start time)."""
    from sgp4.api import WGS72, Satrec

    l1, l2 = orbit_truth.leo_tle()
    sat = Satrec.twoline2rv(l1, l2, WGS72)
    station = orbit_truth.station_ecef_km(pass_sim.LAT, pass_sim.LON, pass_sim.ALT_M)
    t0 = round(orbit_truth.culmination_posix_s(sat, station) + BEFORE_CULMINATION_S - pass_sim.SECONDS / 2)
    return orbit_truth.doppler_hz(sat, t0 + t_offset_s, station, pass_sim.F_CARRIER)


def test_a_narrow_search_loses_the_leo_carrier_without_the_orbit_and_finds_it_centred_on_the_prediction(tmp_path):
    bits, packets = _frames_and_packets()
    assert abs(_truth_doppler_hz(0.0)) > 10 * NARROW_RANGE_HZ  # the pass is far outside the narrow search
    receiver = f"[receiver]\nacquisition_range_hz = {NARROW_RANGE_HZ}"
    # without the orbit the search around the nominal frequency finds nothing: no lock, no packet
    _, nominal, _ = pass_sim._decode_pass(tmp_path / "nominal", receiver=receiver, bits=bits, tle=False,
                                          from_culmination_s=BEFORE_CULMINATION_S, tuning_hz=TUNING_HZ)
    assert nominal.packets == 0 and nominal.frames == 0
    assert nominal.no_lock.startswith(f"no carrier lock in +-{NARROW_RANGE_HZ:.0f} Hz:"), nominal.no_lock
    assert "acquisition_centre_hz" not in nominal.report["demod"]
    # with --tle the same search, centred on the prediction, recovers every packet
    rows, summary, out = pass_sim._decode_pass(tmp_path / "tle", receiver=receiver, bits=bits,
                                               from_culmination_s=BEFORE_CULMINATION_S, tuning_hz=TUNING_HZ)
    assert summary.packets == len(packets) and summary.frames_failed == 0
    for apid in (100, 200, 300):  # the octets of every packet, in order
        sent = b"".join(p for p in packets if (int.from_bytes(p[:2], "big") & 0x7FF) == apid)
        assert (out / f"apid_{apid:04d}.bin").read_bytes() == sent
    # the centre is the sgp4 truth at the first window's middle less the tuning offset (the recording's frame);
    # the window is the Demodulator's two first blocks
    fs = pass_sim.FS
    block = max(32768, 1 << math.ceil(math.log2(4096 * fs / pass_sim.RS)))
    centre = summary.report["demod"]["acquisition_centre_hz"]
    assert abs(centre - (_truth_doppler_hz((block - 0.5) / fs) - TUNING_HZ)) < 5.0, centre
    # and the residuals against the same prediction are flat about the oscillator's offset (tracked, not just found)
    residual = np.array([float(r["residual_hz"]) for r in rows[2:]])
    assert len(residual) >= 20 and float(np.std(residual)) < 5.0
    assert abs(float(np.mean(residual)) - pass_sim.OSC_OFFSET_HZ) < 5.0


#: The residual-carrier receiver's links on the same pass: 16 ksym/s (15.6 samples per symbol; Bi-phase-L needs 8),
#: sent by tests/residual_signals.py (wave, modulation index in rad, the profile's [link] keys).  20 ksym/s, where
#: a data line of the mirror image falls within the search, has a test of its own below.
RESIDUAL_RS = 16e3
RESIDUAL_LINKS = {
    # PCM/PM, NRZ-L data directly on the carrier at m = 1.1 rad: the residual carrier's dwell of periodograms
    "pcm-pm-nrz": ("nrz", 1.1, 'modulation = "pcm-pm"\nline_code = "nrz-l"\nmodulation_index = 1.1'),
    # BPSK with Bi-phase-L (m = pi/2: no carrier left): the per-block CarrierSearch ahead of the Costas loop
    "bpsk-biphase": ("biphase", math.pi / 2, 'modulation = "bpsk"\nline_code = "bi-phase-l"'),
}


def _transmitter(kind: str, symbol_rate: float = RESIDUAL_RS) -> tuple[dict, list[bytes]]:
    """``(keyword arguments of pass_sim._decode_pass, packets sent)`` for the link ``kind`` on the LEO pass."""
    if kind == "bpsk":  # the suppressed-carrier Demodulator (pass_sim's own BPSK transmitter at 60 ksym/s)
        bits, packets = _frames_and_packets()
        return dict(bits=bits), packets
    wave, index, keys = RESIDUAL_LINKS[kind]
    bits, packets = _frames_and_packets(symbol_rate)
    sig = rs.transmit(bits.size, wave=wave, sample_rate_hz=pass_sim.FS, symbol_rate_baud=symbol_rate,
                      index_rad=index, esn0_db=12.0, bits=bits, lead_samples=200, seed=23)
    return dict(baseband=sig.samples, link=f'symbol_rate = {symbol_rate}\npulse = "rect"\n{keys}'), packets


@pytest.mark.parametrize("kind", ["bpsk", *sorted(RESIDUAL_LINKS)])
def test_an_inverted_recording_is_found_at_the_mirrored_prediction_under_auto(tmp_path, kind):
    # the same pass with its samples conjugated (a spectrally inverted recording: the Doppler shows with the
    # opposite sign): under spectrum_inverted = "auto" the narrow search finds nothing at the prediction, then
    # finds the carrier at its mirror image, and the recording is demodulated as spectrum_inverted = true would;
    # for each demodulator's search: the suppressed carrier's, the residual carrier's dwell, Bi-phase-L BPSK's
    transmitter, packets = _transmitter(kind)
    receiver = f"[receiver]\nacquisition_range_hz = {NARROW_RANGE_HZ}"
    common = dict(**transmitter, from_culmination_s=BEFORE_CULMINATION_S, tuning_hz=TUNING_HZ)
    up_rows, upright, _ = pass_sim._decode_pass(tmp_path / "upright", receiver=receiver, **common)
    assert upright.packets == len(packets) and "carrier_found_mirrored" not in upright.report["demod"]
    rows, summary, out = pass_sim._decode_pass(tmp_path / "inverted", conjugate=True, receiver=receiver, **common)
    assert summary.packets == len(packets) and summary.frames_failed == 0
    for apid in (100, 200, 300):  # the octets of every packet, in order
        sent = b"".join(p for p in packets if (int.from_bytes(p[:2], "big") & 0x7FF) == apid)
        assert (out / f"apid_{apid:04d}.bin").read_bytes() == sent
    demod = summary.report["demod"]
    assert demod["carrier_found_mirrored"] >= 1
    assert "inferred from the predicted Doppler's sign" in demod["inversion_note"]
    # doppler.csv: the spacecraft's Doppler with its true sign, the upright decode's (sgp4 truth less the tuning
    # offset, plus the oscillator's offset: the residuals against the prediction are flat about it)
    assert len(rows) >= 20 and len(rows) >= len(up_rows) - 2
    up = {r["utc"]: float(r["carrier_offset_hz"]) for r in up_rows}
    both = [(float(r["carrier_offset_hz"]), up[r["utc"]]) for r in rows[2:] if r["utc"] in up]
    assert len(both) >= 20
    for got, want in both:
        assert np.sign(got) == np.sign(want) and abs(got - want) < 5.0, (got, want)
    residual = np.array([float(r["residual_hz"]) for r in rows[2:]])
    assert float(np.std(residual)) < 5.0 and abs(float(np.mean(residual)) - pass_sim.OSC_OFFSET_HZ) < 5.0
    assert "doppler_note" not in summary.report["pass"]  # nothing left for the Doppler check to flag
    tdm = (out / "doppler.tdm").read_text()
    assert tdm.count("RECEIVE_FREQ_1") == len(rows)
    # without the orbit: no lock, as before (the mirror is tried only around a prediction)
    _, nominal, _ = pass_sim._decode_pass(tmp_path / "nominal", conjugate=True, receiver=receiver, tle=False, **common)
    assert nominal.packets == 0 and nominal.frames == 0 and "carrier_found_mirrored" not in nominal.report["demod"]
    # spectrum_inverted = false with the orbit: the mirror is not tried, so the inverted recording stays unlocked
    _, upright_only, _ = pass_sim._decode_pass(tmp_path / "false", conjugate=True, tle=True, **common,
                                               receiver=receiver + "\nspectrum_inverted = false")
    assert upright_only.packets == 0 and "carrier_found_mirrored" not in upright_only.report["demod"]
    assert upright_only.no_lock is not None and "of the predicted carrier" in upright_only.no_lock


def test_a_data_line_of_the_mirror_image_is_not_taken_for_the_carrier(tmp_path):
    # Bi-phase-L BPSK at 20 ksym/s on the inverted pass: the mirror image's carrier lies 2 R_s (40 kHz) below the
    # prediction's +20.8 kHz, so the 4th data line of its square (2f + 4 R_s, derived in
    # tests/test_biphase_line_search.py) lies within the search around the prediction, and through the chip-long box
    # centred there it passed the threshold: a false lock at +18.3 kHz, 17 of 46 packets.  The search declines it
    # (the carrier whose data line it is shows a stronger line of its own), the mirror is searched, and every packet
    # comes out, octet for octet
    transmitter, packets = _transmitter("bpsk-biphase", 20e3)
    receiver = f"[receiver]\nacquisition_range_hz = {NARROW_RANGE_HZ}"
    rows, summary, out = pass_sim._decode_pass(tmp_path / "inverted", conjugate=True, receiver=receiver,
                                               **transmitter, from_culmination_s=BEFORE_CULMINATION_S,
                                               tuning_hz=TUNING_HZ)
    assert summary.packets == len(packets) and summary.frames_failed == 0
    for apid in (100, 200, 300):  # the octets of every packet, in order
        sent = b"".join(p for p in packets if (int.from_bytes(p[:2], "big") & 0x7FF) == apid)
        assert (out / f"apid_{apid:04d}.bin").read_bytes() == sent
    assert summary.report["demod"]["carrier_found_mirrored"] == 1
    # the Doppler with its true sign (sgp4 truth less the tuning offset, plus the oscillator's offset)
    residual = np.array([float(r["residual_hz"]) for r in rows[2:]])
    assert len(residual) >= 20 and abs(float(np.mean(residual)) - pass_sim.OSC_OFFSET_HZ) < 5.0


# ---- the Demodulator on its own ----------------------------------------------------------------------------------

FS, RS = 250e3, 60e3


def _bpsk(offset_hz: float, rate_hz_per_s: float = 0.0, seconds: float = 0.8):
    rng = np.random.default_rng(11)
    return ds.modulate(int(seconds * RS), modulation="bpsk", sample_rate_hz=FS, symbol_rate_baud=RS, esn0_db=10.0,
                       rng=rng, carrier_offset_hz=offset_hz, doppler_rate_hz_per_s=rate_hz_per_s).samples


def _run(demod, x, chunk=50_000):
    track = []
    for a in range(0, x.size, chunk):
        track += demod.process(_Chunk(x[a:a + chunk], a)).track
    track += demod.flush().track
    return track


@pytest.mark.parametrize("rate_hz_per_s", [0.0, -400.0])
def test_the_demodulator_finds_a_carrier_outside_its_range_where_the_table_predicts_it(rate_hz_per_s):
    offset = 21_000.0  # far outside +-2 kHz of the nominal frequency
    x = _bpsk(offset, rate_hz_per_s)
    rx = ReceiverSection(acquisition_range_hz=2000.0)
    link = LinkSection(modulation="bpsk", symbol_rate_baud=RS)
    plain = Demodulator(link=link, receiver=rx, sample_rate_hz=FS)
    _run(plain, x)
    assert plain.stats.carrier_locked_symbols == 0 and plain.stats.acquisition_centre_hz is None
    # a prediction 600 Hz off the truth (an oscillator offset), following the same Doppler rate
    t_end = x.size / FS
    table = CarrierPrediction(positions=[0.0, float(x.size)],
                              offsets_hz=[offset - 600.0, offset - 600.0 + rate_hz_per_s * t_end])
    demod = Demodulator(link=link, receiver=rx, sample_rate_hz=FS, carrier_prediction=table)
    track = _run(demod, x)
    assert demod.stats.carrier_locked_symbols > 0.8 * demod.stats.symbols_out
    mid = 0.5 * (2 * demod.block_samples - 1)
    assert demod.stats.acquisition_centre_hz == pytest.approx(offset - 600.0 + rate_hz_per_s * mid / FS, abs=1e-3)
    locked = [tp for tp in track if tp.carrier_locked]
    for tp in locked[2:]:  # the measured carrier is the transmitter's, not the prediction's
        assert abs(tp.carrier_offset_hz - (offset + rate_hz_per_s * tp.position / FS)) < 20.0


def test_the_residual_carrier_search_is_centred_on_the_prediction():
    # PCM/PM NRZ, 8 ksym/s at 200 kHz, carrier 30 kHz off nominal; search +-2 kHz
    link = LinkSection(modulation="pcm-pm", symbol_rate_baud=8000.0, line_code="nrz-l", pulse="rect",
                       modulation_index_rad=1.1)
    fs, offset = 200e3, 30_000.0
    sig = rs.transmit(16000, wave="nrz", sample_rate_hz=fs, symbol_rate_baud=8000.0, index_rad=1.1, esn0_db=8.0,
                      carrier_hz=offset, rate_hz_per_s=-200.0)
    x = sig.samples
    rx = ReceiverSection(acquisition_range_hz=2000.0)
    plain = ResidualCarrierDemodulator(link=link, receiver=rx, sample_rate_hz=fs)
    _run(plain, x)
    assert plain.stats.carrier_locked_symbols == 0
    t_end = x.size / fs
    table = CarrierPrediction(positions=[0.0, float(x.size)],
                              offsets_hz=[offset + 500.0, offset + 500.0 - 200.0 * t_end])
    demod = ResidualCarrierDemodulator(link=link, receiver=rx, sample_rate_hz=fs, carrier_prediction=table)
    track = _run(demod, x)
    assert demod.stats.carrier_locked_symbols > 0.8 * demod.stats.symbols_out
    assert abs(demod.stats.acquisition_centre_hz - (offset + 500.0)) < 200.0
    locked = [tp for tp in track if tp.carrier_locked]
    assert len(locked) >= 10
    for tp in locked[2:]:
        assert abs(tp.carrier_offset_hz - (offset - 200.0 * tp.position / fs)) < 5.0


def _symbols(demod, x, chunk):
    """``(soft, position, track)`` of a whole recording fed in chunks of ``chunk`` samples."""
    out = [demod.process(_Chunk(x[a:a + chunk], a)) for a in range(0, x.size, chunk)] + [demod.flush()]
    return (np.concatenate([b.soft for b in out]), np.concatenate([b.position for b in out]),
            [tp for b in out for tp in b.track])


@pytest.mark.parametrize("kind", ["pcm-pm-nrz", "bpsk-biphase"])
def test_the_residual_demodulator_finds_an_inverted_carrier_at_the_mirrored_prediction(kind):
    # the independent transmitter (tests/residual_signals.py) 27 kHz off nominal with a Doppler rate, its samples
    # conjugated (a spectrally inverted recording), searched +-2 kHz around a prediction 500 Hz off the truth: under
    # spectrum_inverted = "auto" the residual carrier's mirrored dwell (Bi-phase-L BPSK: the block searched again
    # conjugated) finds it, and from then on the samples are conjugated, so the symbols and track points are the
    # upright recording's, to the bit (conjugation is exact), whatever the chunking
    wave, index, _ = RESIDUAL_LINKS[kind]
    modulation, line_code = ("pcm-pm", "nrz-l") if wave == "nrz" else ("bpsk", "bi-phase-l")
    link = LinkSection(modulation=modulation, symbol_rate_baud=8000.0, line_code=line_code, pulse="rect",
                       modulation_index_rad=1.1)
    fs, offset, rate = 200e3, 27_000.0, -200.0
    x = rs.transmit(16000, wave=wave, sample_rate_hz=fs, symbol_rate_baud=8000.0, index_rad=index, esn0_db=8.0,
                    carrier_hz=offset, rate_hz_per_s=rate).samples
    t_end = x.size / fs
    table = CarrierPrediction(positions=[0.0, float(x.size)],
                              offsets_hz=[offset + 500.0, offset + 500.0 + rate * t_end])

    def demod(inverted="auto"):
        rx = ReceiverSection(acquisition_range_hz=2000.0, spectrum_inverted=inverted)
        return ResidualCarrierDemodulator(link=link, receiver=rx, sample_rate_hz=fs, carrier_prediction=table)

    upright = demod()
    soft, pos, track = _symbols(upright, x, 50_000)
    assert upright.stats.carrier_found_mirrored == 0 and upright.stats.carrier_locked_symbols > 0.8 * soft.size
    for chunk in (50_000, 77_777):
        mirrored = demod()
        got_soft, got_pos, got_track = _symbols(mirrored, np.conj(x), chunk)
        assert mirrored.stats.carrier_found_mirrored == 1 and mirrored.conjugate
        np.testing.assert_array_equal(got_soft, soft)
        np.testing.assert_array_equal(got_pos, pos)
        np.testing.assert_equal([dataclasses.astuple(tp) for tp in got_track],  # (nan fields count as equal)
                                [dataclasses.astuple(tp) for tp in track])
    # the Doppler with its true sign: the transmitter's carrier (residual_signals: f + r t), not its mirror
    locked = [tp for tp in got_track if tp.carrier_locked]
    assert len(locked) >= 10
    for tp in locked[2:]:
        assert abs(tp.carrier_offset_hz - (offset + rate * tp.position / fs)) < 5.0
    # spectrum_inverted = false, or no prediction: the mirror image is never searched, nothing locks
    for unlocked in (demod(False), ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(
            acquisition_range_hz=2000.0), sample_rate_hz=fs)):
        _symbols(unlocked, np.conj(x), 50_000)
        assert unlocked.stats.carrier_found_mirrored == 0 and unlocked.stats.carrier_locked_symbols == 0
        assert not unlocked.mirror_search and not unlocked.conjugate


# ---- the table -----------------------------------------------------------------------------------------------------

def test_the_rotation_is_the_integral_of_the_piecewise_straight_prediction():
    # slow reference: the phase at sample k is -2 pi times the exact integral of the piecewise-linear offset from
    # the start to k (trapezoids between knots and sample ends), per sample
    fs = 1000.0
    table = CarrierPrediction(positions=[10.0, 60.0, 90.0], offsets_hz=[50.0, -20.0, 80.0])
    start, n = 0, 120
    rot = table.rotation(start, n, fs)
    ref = np.empty(n, dtype=np.complex128)
    for k in range(n):
        grid = sorted({float(start), float(start + k), *[p for p in table.positions if start < p < start + k]})
        f = [float(np.interp(p, table.positions, table.offsets_hz)) for p in grid]
        cycles = sum(0.5 * (f[i] + f[i + 1]) * (grid[i + 1] - grid[i]) for i in range(len(grid) - 1)) / fs
        ref[k] = np.exp(-2j * math.pi * cycles)
    # the midpoint rule is exact on straight pieces; a sample straddling a knot errs by under (df/dp) / (8 fs) cycles
    assert np.max(np.abs(rot - ref)) < 2 * math.pi * 1.4 / (8 * fs) + 1e-5
    assert table.rate_hz_per_s(30.0, fs) == pytest.approx(-1400.0 * fs / 1000.0)
    assert table.rate_hz_per_s(5.0, fs) == 0.0 and table.rate_hz_per_s(95.0, fs) == 0.0


def test_the_table_is_validated_and_travels_to_workers():
    table = CarrierPrediction(positions=[0.0, 125000.0], offsets_hz=[40e3, 39.9e3])
    assert pickle.loads(pickle.dumps(table)) == table
    with pytest.raises(ValueError, match="strictly increasing"):
        CarrierPrediction(positions=[0.0, 0.0], offsets_hz=[1.0, 2.0])
    with pytest.raises(ValueError, match="one equal length"):
        CarrierPrediction(positions=[0.0, 1.0], offsets_hz=[1.0])
    with pytest.raises(ValueError, match="finite"):
        CarrierPrediction(positions=[0.0, 1.0], offsets_hz=[1.0, float("nan")])
    link = LinkSection(modulation="bpsk", symbol_rate_baud=RS)
    with pytest.raises(TypeError, match="Argument 'carrier_prediction' must be a CarrierPrediction or None, not "
                                        "tuple."):
        Demodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=FS, carrier_prediction=([0.0], [1.0]))


def test_a_stream_table_worked_out_ahead_answers_as_the_whole_table():
    # a predictor known everywhere but only at the table's points: the stream's table, extended as it is asked,
    # against a CarrierPrediction built beforehand on the same points
    from pipeline.demod import StreamPrediction

    fs, step = 1000.0, 50

    def predict(p):
        return None if 600 <= p < 800 else 40e3 - 3.0 * p + 0.004 * p * p  # the orbit without state in a gap

    asked = []
    stream = StreamPrediction(lambda p: asked.append(p) or predict(p), step_samples=step, ahead_points=4)
    assert max(asked) == 150  # the first stretch only
    points = [float(p) for p in range(0, 5000, step) if predict(p) is not None]
    whole = CarrierPrediction(positions=points, offsets_hz=[predict(p) for p in points])
    for start, n in ((0, 120), (130, 400), (590, 300), (2000, 1500)):
        np.testing.assert_allclose(stream.rotation(start, n, fs), whole.rotation(start, n, fs), atol=2e-6)
        np.testing.assert_array_equal(stream.offset_hz([start, start + n / 2]), whole.offset_hz([start, start + n / 2]))
        assert stream.rate_hz_per_s(start + n / 2, fs) == whole.rate_hz_per_s(start + n / 2, fs)
    assert max(asked) <= 3500 + 2 * 4 * step  # worked out ahead by at most a stretch past what was asked
    with pytest.raises(ValueError, match="no state"):
        StreamPrediction(lambda p: None, step_samples=step)
    with pytest.raises(ValueError, match="step_samples"):
        StreamPrediction(predict, step_samples=0)


def test_a_live_stream_is_searched_centred_on_the_prediction(tmp_path):
    # the narrow search of the first test, on the pass piped into `decode -` with --start and --tle: before, a live
    # stream's search stayed on the nominal frequency and found nothing
    import json
    import subprocess
    import sys

    bits, packets = _frames_and_packets()
    link = f'modulation = "bpsk"\nsymbol_rate = {pass_sim.RS}\nline_code = "nrz-l"\n' \
           f'downlink_frequency_hz = {pass_sim.F_CARRIER}'
    receiver = f"[receiver]\nacquisition_range_hz = {NARROW_RANGE_HZ}"
    _, recorded, folder = pass_sim._decode_pass(tmp_path / "file", receiver=receiver, bits=bits, link=link,
                                                from_culmination_s=BEFORE_CULMINATION_S)
    assert recorded.packets == len(packets)
    folder = folder.parent
    start = json.loads((folder / "pass.sigmf-meta").read_text())["captures"][0]["core:datetime"]
    out = tmp_path / "live"
    with open(folder / "pass.sigmf-data", "rb") as f:
        r = subprocess.run([sys.executable, "-m", "pipeline", "decode", "-", "--format", "cf32", "--sample-rate",
                            str(pass_sim.FS), "--start", start, "--profile", str(folder / "p.toml"), "--tle",
                            str(folder / "leo.tle"), "--out", str(out), "-q"],
                           stdin=f, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    keys = ("apid", "seq_count", "hex")
    live = [tuple(json.loads(line)[k] for k in keys) for line in (out / "packets.jsonl").read_text().splitlines()]
    ref = [tuple(json.loads(line)[k] for k in keys)
           for line in (folder / "out" / "packets.jsonl").read_text().splitlines()]
    assert live == ref and len(live) == len(packets)
    report = json.loads((out / "report.json").read_text())
    assert report["recording"]["live"] is True
    assert abs(report["demod"]["acquisition_centre_hz"] - recorded.report["demod"]["acquisition_centre_hz"]) < 1.0
