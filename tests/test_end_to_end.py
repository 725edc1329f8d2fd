"""simulate -> decode, end to end, through the command line (issue 5 checks).

Every packet the simulator sent must come out unchanged with its ERT within one symbol period, and
no packet that was not sent may ever appear.  The recordings are short and the links slow (48 ksym/s
at 200 ksample/s: the demo's non-integer 4.17 samples per symbol) so the matrix runs in seconds.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from pipeline.cli import main
from pipeline.profile import profile_from_dict
from pipeline.tools._demo import compare_with_truth

SYMBOL_RATE = 48_000.0
SAMPLE_RATE = 200_000.0

CODINGS = {
    # name: (convolutional, reed_solomon, fecf)
    "uncoded+fecf": ("none", 0, True),
    "conv+fecf": ("1/2", 0, True),
    "rs": ("none", 16, False),
    "concatenated": ("1/2", 16, False),
}


def small_profile(modulation: str, coding: str, line_code: str, *, seconds: float = 1.6, ebn0_db: float = 6.0,
                  interleave: int = 1, clock_ppm: float = 50.0, carrier_hz: float = 420.0, seed: int = 3):
    conv, rs, fecf = CODINGS[coding]
    return profile_from_dict({
        "name": f"e2e-{modulation}-{coding}-{line_code}",
        "link": {"modulation": modulation, "symbol_rate": SYMBOL_RATE, "pulse": "rrc", "rolloff": 0.5,
                 "line_code": line_code},
        "coding": {"convolutional": conv, "reed_solomon": rs, "interleave": interleave, "randomizer": True},
        "frames": {"kind": "tm", "length": 223 * interleave, "fecf": fecf, "ocf": True, "spacecraft_id": 77},
        "simulate": {
            "sample_rate_hz": SAMPLE_RATE, "seconds": seconds, "ebn0_db": ebn0_db,
            "carrier_offset_hz": carrier_hz, "doppler_rate_hz_per_s": 0.0, "timing_offset": 0.37,
            "clock_offset_ppm": clock_ppm, "seed": seed,
            "traffic": [{"apid": 100, "length": 40, "rate_hz": 12.0, "vcid": 0},
                        {"apid": 200, "length": 300, "rate_hz": 3.0, "vcid": 1}],
        },
    })


def _write_profile(tmp_path: Path, profile) -> Path:
    """Serialise the profile back to TOML so the command line loads it like a user's file."""
    L, C, F, S = profile.link, profile.coding, profile.frames, profile.simulate
    lines = [
        f'name = "{profile.name}"',
        "[link]", f'modulation = "{L.modulation}"', f"symbol_rate = {L.symbol_rate_baud}", f'pulse = "{L.pulse}"',
        f"rolloff = {L.rolloff}", f'line_code = "{L.line_code}"',
        "[coding]", f'convolutional = "{C.convolutional}"', f"reed_solomon = {C.reed_solomon}",
        f"interleave = {C.interleave}", f"randomizer = {str(C.randomizer).lower()}",
        "[frames]", f'kind = "{F.kind}"', f"length = {F.length}", f"fecf = {str(F.fecf).lower()}",
        f"ocf = {str(F.ocf).lower()}", f"spacecraft_id = {F.spacecraft_id}",
        "[simulate]", f"sample_rate_hz = {S.sample_rate_hz}", f"seconds = {S.seconds}", f"ebn0_db = {S.ebn0_db}",
        f"carrier_offset_hz = {S.carrier_offset_hz}", f"doppler_rate_hz_per_s = {S.doppler_rate_hz_per_s}",
        f"timing_offset = {S.timing_offset}", f"clock_offset_ppm = {S.clock_offset_ppm}", f"seed = {S.seed}",
    ]
    for t in S.traffic:
        lines += ["[[simulate.traffic]]", f"apid = {t.apid}", f"length = {t.length}", f"rate_hz = {t.rate_hz}",
                  f"vcid = {t.vcid}"]
    path = tmp_path / f"{profile.name}.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def simulate_and_decode(tmp_path: Path, profile, *extra_sim: str) -> tuple[dict, Path]:
    prof = _write_profile(tmp_path, profile)
    sim_dir, out_dir = tmp_path / "sim", tmp_path / "out"
    assert main(["simulate", "--profile", str(prof), "--out", str(sim_dir), "-q", *extra_sim]) == 0
    meta = sim_dir / "recording.sigmf-meta"
    assert main(["decode", str(meta), "--profile", str(prof), "--out", str(out_dir), "-q"]) == 0
    return compare_with_truth(sim_dir / "truth.jsonl", out_dir / "packets.jsonl"), out_dir


@pytest.mark.parametrize("line_code", ["nrz-l", "nrz-m"])
@pytest.mark.parametrize("coding", list(CODINGS))
@pytest.mark.parametrize("modulation", ["bpsk", "qpsk"])
def test_every_packet_recovered(tmp_path, modulation, coding, line_code):
    # Uncoded frames need a higher Eb/N0 (still >= 6 dB as the issue asks): at 6 dB the BPSK bit error
    # rate 0.5 erfc(sqrt(Eb/N0)) = 2.4e-3 (any textbook) spoils 98 % of 1784-bit frames.
    # RS alone with NRZ-M: differential decoding doubles the 2.4e-3 bit errors, about 9 symbol errors per
    # 255-octet codeword on average, so E = 16 fails now and then at 6 dB; 8 dB leaves a wide margin.
    ebn0_db = {"uncoded+fecf": 12.0, "rs": 8.0}.get(coding, 6.0)
    profile = small_profile(modulation, coding, line_code, ebn0_db=ebn0_db)
    cmp, out = simulate_and_decode(tmp_path, profile)
    assert cmp["sent"] > 10
    assert cmp["invented"] == 0, cmp
    assert cmp["matched"] == cmp["sent"], cmp
    # ERT within one symbol period (issue 5)
    assert cmp["worst_ert_error_s"] < 1.0 / SYMBOL_RATE, cmp
    report = json.loads((out / "report.json").read_text())
    assert report["summary"]["packets"] == cmp["decoded"]
    frames = [json.loads(x) for x in (out / "frames.jsonl").read_text().splitlines()]
    assert all(f["ert"].endswith("Z") and len(f["ert"].split(".")[1]) == 10 for f in frames)


@pytest.mark.slow
def test_concatenated_at_threshold(tmp_path):
    # issue 5 / 6: at Eb/N0 = 3.0 dB the concatenated code delivers at least 99 % of the packets
    profile = small_profile("bpsk", "concatenated", "nrz-m", seconds=6.0, ebn0_db=3.0, interleave=5, seed=11)
    cmp, _ = simulate_and_decode(tmp_path, profile)
    assert cmp["invented"] == 0
    assert cmp["matched"] >= 0.99 * cmp["sent"], cmp


def test_nothing_decodes_from_noise(tmp_path):
    # issue 9: a recording with no signal is not an error: exit 0, empty packets.jsonl, "no lock" in the report
    from pipeline.recording import SigmfWriter

    base = tmp_path / "noise"
    rng = np.random.default_rng(4)
    with SigmfWriter(base, sample_rate_hz=SAMPLE_RATE, datatype="cf32_le", datetime_ns=1_773_480_600 * 10**9) as w:
        for _ in range(4):
            w.write(((rng.standard_normal(50_000) + 1j * rng.standard_normal(50_000)) * 0.1).astype(np.complex64))
    prof = _write_profile(tmp_path, small_profile("bpsk", "concatenated", "nrz-l"))
    out = tmp_path / "out"
    assert main(["decode", str(base) + ".sigmf-meta", "--profile", str(prof), "--out", str(out), "-q"]) == 0
    assert (out / "packets.jsonl").read_text() == ""
    report = json.loads((out / "report.json").read_text())
    assert report["summary"]["packets"] == 0
    assert "no lock was found" in report["demod"]["note"]
    assert "no lock was found" in (out / "report.html").read_text()


def test_input_bits_from_an_independent_transmitter(tmp_path):
    """Channel bits built with reedsolo, crccheck and a plain shift register (tests/third_party_tx.py)."""
    import third_party_tx as tx

    packets = [tx.space_packet(100 + (i % 3), i // 3, bytes((i * 7 + k) & 0xFF for k in range(30 + 11 * (i % 5))))
               for i in range(60)]
    frames = tx.tm_frames(packets, scid=77, vcid=2, length=223, ocf=True, fecf=False)
    bits = tx.channel_bits(frames, rs_e=16, interleave=1, randomize=True, conv=True, nrz_m=True)
    path = tmp_path / "ch.bits"
    path.write_bytes(np.packbits(bits).tobytes())
    prof = _write_profile(tmp_path, small_profile("bpsk", "concatenated", "nrz-m"))
    out = tmp_path / "out"
    assert main(["decode", str(path), "--input", "bits", "--start", "2026-03-14T09:30:00Z", "--profile", str(prof),
                 "--out", str(out), "-q"]) == 0
    got = [json.loads(x) for x in (out / "packets.jsonl").read_text().splitlines()]
    # the last packet may end in the idle-filled last frame; every packet must come out once and unchanged
    assert [bytes.fromhex(g["hex"]) for g in got] == packets
    assert all(g["scid"] == 77 and g["vcid"] == 2 for g in got)


@pytest.mark.parametrize("modulation", ["bpsk", "qpsk"])
def test_iq_from_an_independent_transmitter(tmp_path, modulation):
    """Channel bits from tests/third_party_tx.py, modulated by tests/demod_signals.py, SigMF metadata written
    here by hand (SigMF specification: global core:datatype/core:sample_rate/core:version, captures with
    core:sample_start and core:datetime): nothing of pipeline/ is used to make the recording."""
    import demod_signals as ds
    import third_party_tx as tx

    rng = np.random.default_rng(99)
    packets = [tx.space_packet(100 + (i % 2), i // 2, bytes(rng.integers(0, 256, 25 + 9 * (i % 7), dtype=np.uint8)))
               for i in range(70)]
    field_len = 223 - 6 - 4
    frames = tx.tm_frames(packets, scid=77, vcid=3, length=223, ocf=True, fecf=False)
    lead = 317
    bits = tx.channel_bits(frames, rs_e=16, interleave=1, randomize=True, conv=True, nrz_m=True, lead_bits=lead)
    if modulation == "bpsk":
        sym_bits = (bits, np.zeros_like(bits))
    else:
        bits = bits[: len(bits) // 2 * 2]
        sym_bits = (bits[0::2], bits[1::2])  # QPSK: the I bit is sent first (Gray mapping, issue 3 contract)
    wave = ds.modulate(len(sym_bits[0]), modulation=modulation, sample_rate_hz=SAMPLE_RATE,
                       symbol_rate_baud=SYMBOL_RATE, timing_offset=0.21, clock_offset_ppm=-40.0,
                       carrier_offset_hz=-650.0, phase_rad=1.0, esn0_db=8.0, rng=rng, bits=sym_bits, lead_symbols=400)
    base = tmp_path / "indep"
    (tmp_path / "indep.sigmf-data").write_bytes(wave.samples.astype("<c8").tobytes())
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": SAMPLE_RATE, "core:version": "1.2.0"},
            "captures": [{"core:sample_start": 0, "core:datetime": "2026-03-14T09:30:00Z"}], "annotations": []}
    (tmp_path / "indep.sigmf-meta").write_text(json.dumps(meta))
    prof = _write_profile(tmp_path, small_profile(modulation, "concatenated", "nrz-m"))
    out = tmp_path / "out"
    assert main(["decode", str(base) + ".sigmf-meta", "--profile", str(prof), "--out", str(out), "-q"]) == 0
    got = [json.loads(x) for x in (out / "packets.jsonl").read_text().splitlines()]
    assert [bytes.fromhex(g["hex"]) for g in got] == packets
    # ERT (issue 17): the leading edge of the first channel symbol of the ASM of the frame holding the
    # packet's first octet = its pulse peak minus half the transmitted symbol period (common practice, no
    # published source), within 0.1 symbol
    from pipeline.timescales import parse_utc

    t0 = parse_utc("2026-03-14T09:30:00Z")
    sps_tx = SAMPLE_RATE / SYMBOL_RATE * (1.0 - 40e-6)  # demod_signals: the symbol clock runs -40 ppm
    starts = np.cumsum([0] + [len(p) for p in packets[:-1]])
    bps = 1 if modulation == "bpsk" else 2
    for g, s in zip(got, starts):
        frame = int(s) // field_len
        channel_bit = 2 * (lead + frame * 8 * (4 + 255))  # r = 1/2: two channel bits per information bit
        expected_s = (wave.peak_position[channel_bit // bps] - 0.5 * sps_tx) / SAMPLE_RATE
        err = abs((parse_utc(g["ert"]) - t0) * 1e-9 - expected_s)
        assert err < 0.1 / SYMBOL_RATE, (g["ert"], expected_s)


def test_doppler_csv_range_rate(tmp_path):
    """doppler.csv: carrier offset over time and range rate v = -c f_d / f (first-order one-way Doppler,
    REFERENCES.md sec. 9), with f the downlink frequency the simulator wrote as SigMF core:frequency."""
    import csv
    import dataclasses

    from pipeline import decode
    from pipeline.sim import simulate

    base = small_profile("bpsk", "concatenated", "nrz-m", seconds=1.2, carrier_hz=650.0)
    profile = base.with_changes(link=dataclasses.replace(base.link, downlink_frequency_hz=2.2e9))
    sim = simulate(profile, tmp_path / "sim")
    decode(str(sim.meta_path), profile, str(tmp_path / "out"))
    rows = list(csv.DictReader(open(tmp_path / "out" / "doppler.csv", encoding="utf-8")))
    locked = [r for r in rows if r["locked"] == "True"]
    assert len(locked) >= 3
    c = 299_792_458.0
    for r in locked[1:]:
        f_d = float(r["carrier_offset_hz"])
        assert abs(f_d - 650.0) < 5.0
        assert float(r["range_rate_m_per_s"]) == pytest.approx(-c * f_d / 2.2e9, rel=1e-6)
        assert r["utc"].startswith("2026-03-14T09:30:0") and r["utc"].endswith("Z")


def test_raw_frame_and_cadu_files(tmp_path):
    # issue 18: frames.bin / frames_vcN.bin hold the frames that passed their checks at the frame length;
    # cadus.bin every CADU as found: ASM (CCSDS 131.0-B sec. 8, 1ACFFC1D) + the codeblock, still randomized
    import json

    from pipeline import decode, load_profile, simulate
    from pipeline.fec import pn_sequence
    from pipeline.profile import demo_profile_path

    profile = load_profile(demo_profile_path())
    sim = simulate(profile, tmp_path / "sim", seconds=2.0, seed=9)
    out = tmp_path / "out"
    decode(sim.meta_path, profile, out, cadus=True)
    frames = [json.loads(line) for line in (out / "frames.jsonl").read_text().splitlines()]
    good = [f for f in frames if f["status"] in ("ok", "idle")]
    length = profile.frames.length
    raw = (out / "frames.bin").read_bytes()
    assert len(raw) == len(good) * length > 0
    for k, f in enumerate(good):
        frame = raw[k * length:(k + 1) * length]
        assert (frame[0] >> 6, ((frame[0] & 0x3F) << 4) | (frame[1] >> 4)) == (0, profile.frames.spacecraft_id)
        assert frame[2] == f["mcfc"]
    for vc in {f["vcid"] for f in good}:
        assert len((out / f"frames_vc{vc}.bin").read_bytes()) == sum(f["vcid"] == vc for f in good) * length
    cadus = (out / "cadus.bin").read_bytes()
    size = 4 + profile.codeblock_bytes
    assert len(cadus) == len(frames) * size
    pn = pn_sequence(profile.codeblock_bytes).tobytes()
    first = cadus[:size]
    assert first[:4] == bytes.fromhex("1ACFFC1D")
    derandomized = bytes(a ^ b for a, b in zip(first[4:], pn))  # CCSDS 131.0-B sec. 9: XOR with the PN sequence
    # the information octets of the codeblock are the frame itself (CCSDS 131.0-B sec. 4: systematic code,
    # symbol interleaving keeps their order); the first frame of this clean recording needed no correction
    assert frames[0]["status"] in ("ok", "idle") and frames[0]["rs_corrected"] == [0] * 5
    assert derandomized[:length] == raw[:length]
