"""pipeline.sim.simulate: recordings with known truth, checked by an independent decode of the channel bits."""

from __future__ import annotations

import hashlib
import json
import math

import numpy as np
import pytest

from pipeline.errors import OutputError
from pipeline.profile import ApidTraffic, LinkProfile, SimulateSection, demo_profile_path, load_profile
from pipeline.sim import SOFT_SCALE, rrc_pulse, simulate
from pipeline.sim._time import parse_utc_ns

ASM = bytes.fromhex("1ACFFC1D")  # CCSDS 131.0-B-2 sec. 8 / REFERENCES.md sec. 1.1
TRAFFIC = (
    ApidTraffic(apid=100, length=120, rate_hz=40.0, vcid=0, time_code=True),
    ApidTraffic(apid=200, length=700, rate_hz=12.0, vcid=1),
    ApidTraffic(apid=300, length=30, rate_hz=25.0, vcid=2, time_code=True),
)


def _profile(*, conv="none", rs=16, interleave=1, length=223, line="nrz-l", mod="bpsk", pulse="rrc", kind="tm",
             ocf=True, fecf=False, randomizer=True, seconds=0.5) -> LinkProfile:
    base = LinkProfile(simulate=SimulateSection(traffic=TRAFFIC, seconds=seconds))
    return base.with_changes(
        link={"modulation": mod, "pulse": pulse, "line_code": line, "symbol_rate_baud": 240_000.0},
        coding={"convolutional": conv, "reed_solomon": rs, "interleave": interleave, "randomizer": randomizer},
        frames={"kind": kind, "length": length, "ocf": ocf, "fecf": fecf, "spacecraft_id": 0x55 if kind == "aos"
                else 499},
    )


def _jsonl(path):
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


def _bits(path, n):
    return np.unpackbits(np.fromfile(path, dtype=np.uint8))[:n]


def _independent_frames(prof: LinkProfile, bits: np.ndarray, frames_truth):
    """Undo the uncoded chain with outside references only: NRZ-M, ASM, randomizer, RS (reedsolo)."""
    from third_party_tx import pn_bytes, rs_codeblock  # reedsolo (PyPI), bit-by-bit LFSR

    if prof.link.line_code == "nrz-m":
        bits = bits ^ np.concatenate([[0], bits[:-1]]).astype(np.uint8)  # a change of level is a 1
    n = 8 * (4 + prof.codeblock_bytes)
    out = []
    for fr in frames_truth:
        b = bits[fr["channel_bit"]:fr["channel_bit"] + n]
        assert np.packbits(b[:32]).tobytes() == ASM
        block = np.packbits(b[32:]).tobytes()
        if prof.coding.randomizer:
            block = bytes(x ^ y for x, y in zip(block, pn_bytes(len(block))))
        frame = block[:prof.frames.length]
        if prof.coding.reed_solomon:
            assert rs_codeblock(frame, prof.coding.reed_solomon, prof.coding.interleave) == block
        out.append(frame)
    return out


def _reassemble(fields):
    stream, synced, out = bytearray(), False, []
    for fhp, field in fields:
        if not synced:
            if fhp >= 0x7FE:
                continue
            field, synced = field[fhp:], True
        stream += field
        while len(stream) >= 6:
            n = 7 + int.from_bytes(stream[4:6], "big")
            if len(stream) < n:
                break
            out.append(bytes(stream[:n]))
            del stream[:n]
    return [p for p in out if int.from_bytes(p[:2], "big") & 0x7FF != 0x7FF]


@pytest.mark.parametrize("line", ["nrz-l", "nrz-m"])
@pytest.mark.parametrize("mod", ["bpsk", "qpsk"])
def test_truth_matches_an_independent_decode(tmp_path, line, mod):
    prof = _profile(line=line, mod=mod, fecf=True)
    res = simulate(prof, tmp_path, write_bits=True, seed=5, clock_offset_ppm=50.0, timing_offset=0.37)
    frames_truth = _jsonl(res.truth_frames_path)
    packets_truth = _jsonl(res.truth_path)
    assert len(frames_truth) == res.num_frames > 50 and len(packets_truth) == res.num_packets > 20
    bits = _bits(res.bits_path, res.num_channel_bits)
    frames = _independent_frames(prof, bits, frames_truth)
    fs = prof.simulate.sample_rate_hz
    start = parse_utc_ns(prof.simulate.start)
    T = res.symbol_period_samples
    assert T == pytest.approx(fs / (240_000 * (1 + 50e-6)), rel=1e-14)  # symbol_rate is in baud for QPSK too
    per_vc = {}
    for fr, frame, nxt in zip(frames_truth, frames, frames_truth[1:] + [None]):
        w0 = int.from_bytes(frame[:2], "big")
        assert (w0 >> 4) & 0x3FF == 499 and (w0 >> 1) & 7 == fr["vcid"]
        assert (frame[2], frame[3]) == (fr["mcfc"], fr["vcfc"])
        fhp = int.from_bytes(frame[4:6], "big") & 0x7FF
        assert fhp == fr["fhp"]
        assert frame[-6:-2].hex() == fr["ocf"]
        # position: symbol (channel_bit // bits per symbol) at p0 + k T; ERT = start + position / fs
        k = fr["channel_bit"] // (2 if mod == "qpsk" else 1)
        assert fr["position"] == pytest.approx(0.37 * T + k * T, abs=1e-6)
        # ERT names the leading edge of the ASM's first symbol: its centre minus half a symbol period
        assert abs(parse_utc_ns(fr["ert"]) - (start + round((fr["position"] - 0.5 * T) / fs * 1e9))) <= 1
        if nxt is not None:
            assert nxt["channel_bit"] - fr["channel_bit"] == 8 * (4 + prof.codeblock_bytes)
        if not fr["idle"]:
            per_vc.setdefault(fr["vcid"], []).append((fhp, frame[6:-6]))
    assert frames_truth[0]["idle"] and frames_truth[-1]["idle"]  # idle lead-in and tail
    for vcid, fields in per_vc.items():
        assert _reassemble(fields) == [bytes.fromhex(p["hex"]) for p in packets_truth if p["vcid"] == vcid]
    by_index = {(f["vcid"], f["vcfc"], f["mcfc"]): f for f in frames_truth}
    for p in packets_truth:
        raw = bytes.fromhex(p["hex"])
        assert int.from_bytes(raw[:2], "big") & 0x7FF == p["apid"]
        assert int.from_bytes(raw[2:4], "big") & 0x3FFF == p["seq_count"]
        fr = by_index[(p["vcid"], p["vcfc"], p["mcfc"])]
        assert (p["position"], p["ert"], p["scid"]) == (fr["position"], fr["ert"], 499)
        assert parse_utc_ns(p["generation"]) < parse_utc_ns(p["ert"])  # generated before it was sent
    for apid in (100, 200, 300):
        seqs = [p["seq_count"] for p in packets_truth if p["apid"] == apid]
        assert seqs == list(range(len(seqs))) and seqs  # nothing lost between generation and truth


def test_position_of_the_asm_on_the_recording(tmp_path):
    # the truth position of every ASM is where the recording correlates best with that ASM's pulses
    prof = _profile(line="nrz-l")
    res = simulate(prof, tmp_path, noise=False, seed=2, carrier_offset_hz=0.0, doppler_rate_hz_per_s=0.0,
                   clock_offset_ppm=-80.0, timing_offset=2.61)
    from pipeline.recording import open_recording

    rec = open_recording(res.meta_path)
    x = np.concatenate([c.samples for c in rec.chunks(1 << 16)])
    T = res.symbol_period_samples
    a = 1.0 - 2.0 * np.unpackbits(np.frombuffer(ASM, np.uint8))
    offsets = np.linspace(-0.3, 0.3, 13) * T
    for fr in _jsonl(res.truth_frames_path)[1:6]:
        scores = []
        for d in offsets:
            p = fr["position"] + d + np.arange(32) * T
            n = np.arange(int(p[0] - 10 * T), int(p[-1] + 10 * T))
            template = sum(a[i] * rrc_pulse((n - p[i]) / T, 0.5) for i in range(32))
            scores.append(abs(np.vdot(template, x[n])))
        assert int(np.argmax(scores)) == 6


@pytest.mark.parametrize("datatype", ["cf32_le", "ci16_le"])
def test_measured_esn0_on_the_recording(tmp_path, datatype):
    prof = _profile(conv="1/2", rs=16, interleave=1)
    ebn0_db = 5.0
    res = simulate(prof, tmp_path, ebn0_db=ebn0_db, seed=8, carrier_offset_hz=0.0, doppler_rate_hz_per_s=0.0,
                   clock_offset_ppm=0.0, phase_noise_rad=0.0, datatype=datatype, write_bits=True)
    assert res.esn0_db == pytest.approx(prof.esn0_from_ebn0(ebn0_db))
    # Es/N0 = Eb/N0 + 10 log10(1/2 x 223/255) (../shared/DESIGN.md)
    assert res.esn0_db == pytest.approx(ebn0_db + 10 * math.log10(0.5 * 223 / 255))
    from pipeline.recording import open_recording

    rec = open_recording(res.meta_path)
    assert rec.num_samples == res.num_samples == 500_000 and rec.sample_rate_hz == 1e6
    x = np.concatenate([c.samples for c in rec.chunks(1 << 16)]).astype(np.complex128)
    assert np.sqrt(np.mean(np.abs(x) ** 2)) == pytest.approx(0.35, rel=0.02)  # about 0.35 of full scale
    bits = _bits(res.bits_path, res.num_channel_bits)[:20_000]
    T = res.symbol_period_samples
    p = res.first_symbol_position + np.arange(bits.size) * T
    y = np.empty(bits.size, complex)
    for k in range(20, bits.size - 20):  # matched filter at the stated positions
        n = np.arange(math.ceil(p[k] - 8 * T), math.floor(p[k] + 8 * T) + 1)
        y[k] = np.dot(x[n], rrc_pulse((n - p[k]) / T, 0.5)) / T
    z = y[20:-20] * (1 - 2.0 * bits[20:-20])
    z = z * np.exp(-1j * np.angle(np.mean(z)))  # the carrier phase is random but constant here
    esn0_measured = np.mean(z.real) ** 2 / (2 * np.var(z.real))  # decision SNR = 2 Es/N0 (Proakis sec. 4.3)
    assert 10 * math.log10(esn0_measured) == pytest.approx(res.esn0_db, abs=0.2)  # MC spread ~0.05 dB


def test_soft_file_and_bits_file_agree(tmp_path):
    prof = _profile(conv="3/4", mod="qpsk", line="nrz-m")
    res = simulate(prof, tmp_path, write_bits=True, write_soft=True, noise=False, seed=3)
    bits = _bits(res.bits_path, res.num_channel_bits)
    soft = np.fromfile(res.soft_path, dtype=np.int8)
    assert soft.size == res.num_channel_bits == bits.size
    np.testing.assert_array_equal(soft, np.where(bits == 0, SOFT_SCALE, -SOFT_SCALE).astype(np.int8))  # + = bit 0
    # a symbol inside the recording for every channel bit, and no more
    bps = 2
    last_pos = res.first_symbol_position + ((bits.size - 1) // bps) * res.symbol_period_samples
    assert last_pos < res.num_samples <= last_pos + res.symbol_period_samples + 1
    noisy = simulate(prof, tmp_path / "noisy", write_soft=True, ebn0_db=4.0, seed=3)
    s = np.fromfile(noisy.soft_path, dtype=np.int8).astype(float) / SOFT_SCALE * (1 - 2.0 * bits)
    # per channel bit of QPSK, sigma^2 = 2 / (2 Es/N0): Proakis & Salehi sec. 4.3
    esn0 = 10 ** (noisy.esn0_db / 10)
    assert np.var(s) == pytest.approx(1 / esn0, rel=0.05)


def test_same_seed_same_bytes_and_chunking_invariance(tmp_path):
    prof = _profile(conv="1/2", line="nrz-m", fecf=True)
    kw = dict(seed=12, phase_noise_rad=0.02, fades=[(0.2, 0.01, 6.0)], write_soft=True)
    a = simulate(prof, tmp_path / "a", chunk_frames=1, **kw)
    b = simulate(prof, tmp_path / "b", chunk_frames=7, **kw)
    c = simulate(prof, tmp_path / "c", **{**kw, "seed": 13})
    digest = lambda p: hashlib.sha256(p.read_bytes()).hexdigest()  # noqa: E731
    for attr in ("data_path", "truth_path", "truth_frames_path", "soft_path"):
        assert digest(getattr(a, attr)) == digest(getattr(b, attr)), attr
    assert digest(a.data_path) != digest(c.data_path)
    assert digest(a.truth_path) != digest(c.truth_path)
    meta = json.loads(a.meta_path.read_text())
    assert meta["annotations"][0]["core:label"] == "fade"
    assert "SIMULATED" in meta["global"]["core:description"]
    assert meta["captures"][0]["core:datetime"].startswith("2026-03-14T09:30:00")


def test_aos_and_oqpsk_rect(tmp_path):
    prof = _profile(kind="aos", mod="oqpsk", pulse="rect", conv="7/8", rs=8, interleave=2, length=478, fecf=True)
    from pipeline.sim import DopplerPass

    dp = DopplerPass(peak_hz=5000.0, tca_s=0.25, tau_s=0.1)
    res = simulate(prof, tmp_path, seed=4, carrier_offset_hz=100.0, doppler_rate_hz_per_s=0.0, doppler_pass=dp,
                   fades=[(0.1, 0.02, 100.0)])
    frames = _jsonl(res.truth_frames_path)
    for f in frames:
        t = f["position"] / 1e6
        want = 100.0 - 5000.0 * (t - 0.25) / math.hypot(0.1, t - 0.25)  # the straight-line pass of DopplerPass
        assert f["carrier_offset_hz"] == pytest.approx(want, abs=1e-6)
    meta = json.loads(res.meta_path.read_text())
    assert [a["core:label"] for a in meta["annotations"]] == ["dropout"]  # depth >= 100 dB is a dropout
    assert meta["annotations"][0]["core:sample_start"] == 100_000
    assert {f["vcid"] for f in frames} >= {0, 1, 2, 63}
    assert all(f["mcfc"] is None for f in frames)
    pk = _jsonl(res.truth_path)
    assert pk and all(p["scid"] == 0x55 for p in pk)


def test_demo_profile_short_run(tmp_path):
    prof = load_profile(demo_profile_path())
    res = simulate(prof, tmp_path, seconds=2.0)
    assert res.num_samples == 2_000_000
    # 240 ksym/s, rate 1/2: 20464 channel bits per 1275-octet codeblock + ASM -> 11.7 frames/s
    assert res.num_frames == int((2_000_000 - 4.17) / (20464 * res.symbol_period_samples))
    assert res.num_packets > 25
    pk = _jsonl(res.truth_path)
    assert {p["apid"] for p in pk} == {100, 200, 300}
    assert res.esn0_db == pytest.approx(6.0 + 10 * math.log10(0.5 * 1115 / 1275))


def test_refuses_to_overwrite_and_bad_arguments(tmp_path):
    prof = _profile(seconds=0.1)
    simulate(prof, tmp_path)
    with pytest.raises(OutputError, match="exists"):
        simulate(prof, tmp_path)
    with pytest.raises(ValueError, match=r"Argument 'format' must be cf32 \| ci16 \| ci8 \| cu8, not 'cf64'"):
        simulate(prof, tmp_path / "x", format="cf64")
    with pytest.raises(ValueError, match="former name of 'format'"):
        simulate(prof, tmp_path / "x", format="cf32", datatype="ci16_le")
    with pytest.raises(ValueError, match="Argument 'seconds' must be > 0"):
        simulate(prof, tmp_path / "y", seconds=0.0)
    with pytest.raises(TypeError, match="Argument 'fades'"):
        simulate(prof, tmp_path / "z", fades=[(1.0, 2.0)])


def test_a_profile_the_simulator_cannot_make_is_bad_input(tmp_path, capsys):
    # README: a profile value that cannot be used is one 'Error:' line and exit 3; an AOS profile with FHEC
    # (valid for decoding, CCSDS 732.0-B sec. 4.1.2.6) stopped 'downlink simulate' with an internal error (70)
    from pipeline.cli import main
    from pipeline.errors import ProfileError

    fhec = _profile(kind="aos", length=478, rs=8, interleave=2).with_changes(frames={"fhec": True})
    with pytest.raises(ProfileError, match="fhec = true: the simulator does not generate"):
        simulate(fhec, tmp_path / "a")
    toml = tmp_path / "aos.toml"
    toml.write_text('[link]\n[coding]\nreed_solomon = 8\ninterleave = 2\n'
                    '[frames]\nkind = "aos"\nlength = 478\nfhec = true\nspacecraft_id = 5\n')
    capsys.readouterr()
    assert main(["simulate", "--profile", str(toml), "--out", str(tmp_path / "b"), "--seconds", "0.1"]) == 3
    err = capsys.readouterr().err
    assert err.startswith(f"Error: {toml}: ") and "fhec" in err and err.count("\n") == 1  # names the file
    assert not (tmp_path / "b").exists()
