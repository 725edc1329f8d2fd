"""Residual-carrier recordings decode end to end (issue 8): every packet, ERT within one symbol period.

The simulator writes a PCM/PSK/PM or PCM/PM recording; ``pipeline.decode`` decodes it (the chain picks
the residual-carrier demodulator with :func:`pipeline.demod.residual.make_demodulator`).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from pipeline import decode
from pipeline.profile import profile_from_dict
from pipeline.sim import simulate
from pipeline.tools._demo import compare_with_truth

SAMPLE_RATE = 200_000.0


def _profile(*, modulation, line_code, symbol_rate, conv, rs, wave="square", subcarrier_hz=0.0, index=1.1,
             seconds=1.6, ebn0_db=7.0, carrier_hz=2500.0, rate=0.0, seed=5, downlink_hz=8.42e9):
    link = {"modulation": modulation, "symbol_rate": symbol_rate, "line_code": line_code, "pulse": "rect",
            "modulation_index": index, "downlink_frequency_hz": downlink_hz}
    if modulation == "pcm-psk-pm":
        link.update({"subcarrier_hz": subcarrier_hz, "subcarrier_wave": wave})
    return profile_from_dict({
        "name": f"res-{modulation}-{wave}-{line_code}",
        "link": link,
        "coding": {"convolutional": conv, "reed_solomon": rs, "interleave": 1, "randomizer": True},
        "frames": {"kind": "tm", "length": 96, "fecf": rs == 0, "ocf": False, "spacecraft_id": 401},
        "simulate": {"sample_rate_hz": SAMPLE_RATE, "seconds": seconds, "ebn0_db": ebn0_db,
                     "carrier_offset_hz": carrier_hz, "doppler_rate_hz_per_s": rate, "timing_offset": 0.37,
                     "clock_offset_ppm": 30.0, "seed": seed,
                     "traffic": [{"apid": 100, "length": 24, "rate_hz": 8.0, "vcid": 0},
                                 {"apid": 300, "length": 60, "rate_hz": 2.0, "vcid": 1}]},
    })


CASES = {
    # PCM/PSK/PM, square subcarrier, NRZ-L, convolutional r=1/2: 8 ksym/s (channel) on a 32 kHz
    # subcarrier, 6.25 samples per subcarrier cycle
    "psk-square-conv": dict(modulation="pcm-psk-pm", line_code="nrz-l", symbol_rate=8000.0, conv="1/2", rs=0,
                            wave="square", subcarrier_hz=32000.0, seconds=3.2),
    # PCM/PSK/PM, sine subcarrier, NRZ-M, RS(255,239): the Costas half-cycle ambiguity is a data inversion
    "psk-sine-nrzm-rs": dict(modulation="pcm-psk-pm", line_code="nrz-m", symbol_rate=8000.0, conv="none", rs=8,
                             wave="sine", subcarrier_hz=32000.0, index=1.2, seconds=2.0),
    # PCM/PM with Bi-phase-L, convolutional r=1/2, a third-order carrier loop under a Doppler rate
    "pm-biphase-conv": dict(modulation="pcm-pm", line_code="bi-phase-l", symbol_rate=16000.0, conv="1/2", rs=0,
                            index=0.9, rate=-150.0, seconds=2.0),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_residual_recording_decodes_every_packet(tmp_path, case):
    prof = _profile(**CASES[case])
    if CASES[case].get("rate"):
        prof = prof.with_changes(receiver={"carrier_loop_order": 3})
    sim = simulate(prof, tmp_path / "sim")
    assert sim.num_packets >= 10
    out = tmp_path / "out"
    summary = decode(str(sim.meta_path), prof, str(out))
    cmp = compare_with_truth(sim.truth_path, out / "packets.jsonl")
    assert cmp["invented"] == 0
    assert cmp["matched"] == cmp["sent"] == sim.num_packets  # every packet, unchanged
    symbol_period_s = 1.0 / prof.link.symbol_rate_baud
    assert cmp["worst_ert_error_s"] < symbol_period_s  # ERT within one symbol period (issue 8)
    report = json.loads((out / "report.json").read_text())
    # every frame the simulator sent came out, good or idle: none lost, none failed
    statuses = report["frames"]["status_counts"]
    assert set(statuses) <= {"ok", "idle"}, statuses
    truth_frames = [json.loads(line) for line in sim.truth_frames_path.read_text().splitlines() if line.strip()]
    got_frames = [json.loads(line) for line in (out / "frames.jsonl").read_text().splitlines() if line.strip()]
    T = sim.symbol_period_samples
    # every frame comes out at its position, the first too (its first symbol is cut by the start of the
    # recording: the demodulator integrates the part that exists)
    expected = [(f["mcfc"], f["position"]) for f in truth_frames]
    assert len(expected) == sim.num_frames
    got = {g["mcfc"]: g["sample_position"] for g in got_frames}
    for mcfc, position in expected:
        assert mcfc in got, f"frame {mcfc} lost"
        assert abs(got[mcfc] - position) < T
    assert summary.frames == len(got_frames)
    assert report["demod"]["lock_fraction"] > 0.95
    # the carrier offsets the chain reports are the simulated ones (the channel's frequency at each frame)
    # over the whole recording, 2500 Hz plus the Doppler rate times time (a partial last block is noisier)
    rate = CASES[case].get("rate", 0.0)
    ends = (2500.0, 2500.0 + rate * prof.simulate.seconds)
    for key in ("carrier_offset_hz_first", "carrier_offset_hz_last"):
        assert min(ends) - 5.0 < report["demod"][key] < max(ends) + 5.0
    # the verdict's residual-carrier Pc/N0 against the power split of phase modulation: a +-1 waveform
    # leaves cos^2(m) in the carrier and sin^2(m) in the data; a sine subcarrier J0(m)^2 and 2 J1(m)^2
    # (Jacobi-Anger expansion, Abramowitz & Stegun 9.1.42: section number from memory, not confirmed), so
    # Pc/N0 = Es/N0 Rs Pc/Pd with Es/N0 the simulator's (it refers to the data power)
    from scipy.special import j0, j1

    m = prof.link.modulation_index_rad
    split = j0(m) ** 2 / (2 * j1(m) ** 2) if CASES[case].get("wave") == "sine" else (np.cos(m) / np.sin(m)) ** 2
    want_cn0 = sim.esn0_db + 10 * np.log10(prof.link.symbol_rate_baud * split)
    verdict = report["pass"]
    assert verdict["carrier_cn0_dbhz_mean"] == pytest.approx(want_cn0, abs=0.5)
    assert verdict["carrier_cn0_dbhz_min"] <= verdict["carrier_cn0_dbhz_mean"]
    assert "Residual carrier Pc/N0 while locked" in (out / "report.html").read_text()
    # the modulation index the receiver measured (carrier against data amplitude), the simulated one
    assert report["demod"]["modulation_index_rad_median"] == pytest.approx(m, abs=0.05)
    # the SigMF core:frequency carries the profile's downlink frequency
    meta = json.loads(sim.meta_path.read_text())
    assert meta["captures"][0]["core:frequency"] == pytest.approx(8.42e9)
