"""Earth-received time end to end (issue 17): leading edge, station delay, and a pass across a leap second.

Recordings are made without pipeline code (channel bits from tests/third_party_tx.py, samples from
tests/demod_signals.py, SigMF metadata written by hand); the truth times come from the transmitter's own
pulse positions, turned into UTC by astropy (PyPI) for the leap-second pass.
"""

from __future__ import annotations

import json

import numpy as np

from pipeline import decode, load_profile
from pipeline.timescales import parse_utc

SAMPLE_RATE = 1e6
SYMBOL_RATE = 240e3
PPM = 25.0


def _recording(tmp_path, start: str, n_packets: int = 40, seed: int = 5):
    """A BPSK, r=1/2 + RS(255,223) I=1 recording beginning at ``start``; returns its meta path, the
    packets, and the sample position of each frame's first ASM channel symbol (pulse peak)."""
    import demod_signals as ds
    import third_party_tx as tx

    rng = np.random.default_rng(seed)
    packets = [tx.space_packet(100, i, bytes(rng.integers(0, 256, 30 + 7 * (i % 5), dtype=np.uint8)))
               for i in range(n_packets)]
    frames = tx.tm_frames(packets, scid=77, vcid=1, length=223, ocf=False, fecf=False)
    lead = 211
    bits = tx.channel_bits(frames, rs_e=16, interleave=1, randomize=True, conv=True, nrz_m=False, lead_bits=lead)
    wave = ds.modulate(len(bits), modulation="bpsk", sample_rate_hz=SAMPLE_RATE, symbol_rate_baud=SYMBOL_RATE,
                       timing_offset=0.33, clock_offset_ppm=PPM, carrier_offset_hz=420.0, phase_rad=0.4,
                       esn0_db=9.0, rng=rng, bits=(bits, np.zeros_like(bits)), lead_symbols=300)
    (tmp_path / "pass.sigmf-data").write_bytes(wave.samples.astype("<c8").tobytes())
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": SAMPLE_RATE, "core:version": "1.2.0"},
            "captures": [{"core:sample_start": 0, "core:datetime": start}], "annotations": []}
    (tmp_path / "pass.sigmf-meta").write_text(json.dumps(meta))
    peaks = [wave.peak_position[2 * (lead + k * 8 * (4 + 255))] for k in range(len(frames))]
    return tmp_path / "pass.sigmf-meta", frames, np.array(peaks)


def _profile(tmp_path, delay_ns: int = 0):
    text = f"""
name = "ert-test"
[link]
modulation = "bpsk"
symbol_rate = {SYMBOL_RATE}
pulse = "rrc"
rolloff = 0.5
line_code = "nrz-l"
[coding]
convolutional = "1/2"
reed_solomon = 16
interleave = 1
randomizer = true
[frames]
kind = "tm"
length = 223
spacecraft_id = 77
[station]
name = "HOLLOW RIDGE"
receive_delay_ns = {delay_ns}
"""
    path = tmp_path / f"p{delay_ns}.toml"
    path.write_text(text)
    return load_profile(path)


def _edges_s(peaks: np.ndarray) -> np.ndarray:
    """Leading edge of each frame's first ASM symbol, seconds from the first sample: the pulse peak minus
    half the transmitted symbol period (common practice, no published source)."""
    sps_tx = SAMPLE_RATE / SYMBOL_RATE * (1.0 + PPM * 1e-6)
    return (peaks - 0.5 * sps_tx) / SAMPLE_RATE


def test_ert_is_the_leading_edge_and_the_station_delay_is_taken_off_exactly(tmp_path):
    meta, frames, peaks = _recording(tmp_path, "2026-03-14T09:30:00.000000000Z")
    plain = decode(meta, _profile(tmp_path))
    delayed = decode(meta, _profile(tmp_path, delay_ns=1250))
    ok = [f for f in plain.frames_list if f["status"] == "ok"]
    assert len(ok) == len(frames) >= 5
    t0 = parse_utc("2026-03-14T09:30:00Z")
    got = np.array([(parse_utc(f["ert"]) - t0) * 1e-9 for f in ok])
    np.testing.assert_allclose(got, _edges_s(peaks), rtol=0, atol=0.1 / SYMBOL_RATE)
    # the receive-path delay moves every time back by exactly its value (ns), frames and packets alike
    for a, b in ((plain.frames_list, delayed.frames_list), (plain.packets_list, delayed.packets_list)):
        assert len(a) == len(b) > 0
        assert all(parse_utc(x["ert"]) - parse_utc(y["ert"]) == 1250 for x, y in zip(a, b))
    assert plain.report["recording"]["time_source"] == "SigMF core:datetime of capture 0"
    assert "leading edge" in plain.report["recording"]["ert_definition"]
    assert delayed.report["recording"]["receive_delay_ns"] == 1250


def test_a_pass_across_the_2016_leap_second(tmp_path):
    import astropy.time as astropy_time
    start = "2016-12-31T23:59:59.960000000Z"
    meta, frames, peaks = _recording(tmp_path, start, n_packets=60, seed=8)
    result = decode(meta, _profile(tmp_path))
    ok = [f for f in result.frames_list if f["status"] == "ok"]
    assert len(ok) == len(frames) >= 6
    # truth by astropy (PyPI): UTC + elapsed SI seconds, printed with 23:59:60.x inside the leap second
    t_start = astropy_time.Time("2016-12-31T23:59:59.96", scale="utc", precision=9)
    inside = 0
    for f, edge_s in zip(ok, _edges_s(peaks)):
        truth = (t_start + astropy_time.TimeDelta(edge_s, format="sec")).isot + "Z"
        assert abs(parse_utc(f["ert"]) - parse_utc(truth)) < 0.1e9 / SYMBOL_RATE, (f["ert"], truth)
        assert f["ert"][:17] == truth[:17]  # the same second label, 23:59:60 included
        inside += f["ert"].startswith("2016-12-31T23:59:60")
    assert inside >= 2  # some frames were received during the leap second itself
    assert all(p["ert"] >= start[:19] for p in result.packets_list)


def test_the_simulators_pass_across_the_leap_second_matches_its_truth(tmp_path, demo_profile):
    # the simulator's truth (its own leap-second table, checked against astropy in tests/test_sim_packets.py)
    # and the decoder's ERT agree to well under a symbol through 23:59:60 and after it
    from pipeline import simulate
    from pipeline.tools._demo import compare_with_truth

    prof = demo_profile.with_changes(simulate={"start": "2016-12-31T23:59:58.6Z"})
    sim = simulate(prof, tmp_path / "sim", seconds=3.0, seed=3)
    truth = [json.loads(line) for line in sim.truth_path.read_text().splitlines() if line.strip()]
    assert any(t["ert"].startswith("2016-12-31T23:59:60") for t in truth)
    assert any(t["ert"].startswith("2017-01-01T00:00:00") for t in truth)
    out = tmp_path / "out"
    decode(sim.meta_path, prof, out)
    cmp = compare_with_truth(sim.truth_path, out / "packets.jsonl")
    assert cmp["matched"] == cmp["sent"] == sim.num_packets
    assert cmp["worst_ert_error_s"] < 0.1 / prof.link.symbol_rate_baud


def test_ert_text_is_format_utc_through_a_leap_second_and_midnight(demo_profile):
    # ErtClock remembers the UTC day of its last text; every text must still be format_utc's own (2016-12-31
    # ends with a leap second: IERS Bulletin C 52), before, inside and after 23:59:60, and across 2017-01-01
    from pipeline.chain._time import ErtClock
    from pipeline.timescales import format_utc

    class Start:  # positions are ns from 2016-12-31T23:59:58.25Z (sample rate 1 GHz)
        def tai_ns(self, position):
            return parse_utc("2016-12-31T23:59:58.25Z") + round(position)

    clock = ErtClock(Start(), demo_profile.with_changes(station={"receive_delay_ns": 0}), None)
    steps = [0, 1, 999_999_999, 750_000_000, 1_000_000_000, 1_749_999_999, 1_750_000_000, 2_749_999_999,
             2_750_000_000, 2_750_000_001, 86_400_000_000_000]
    for p in steps + steps[::-1]:
        assert clock.ert(float(p)) == format_utc(Start().tai_ns(p)), p
    assert clock.ert(1_750_000_000.0) == "2016-12-31T23:59:60.000000000Z"
    assert clock.ert(2_750_000_000.0) == "2017-01-01T00:00:00.000000000Z"

