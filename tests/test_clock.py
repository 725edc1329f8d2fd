"""``downlink clock`` (pipeline.tools._clock) and ``decode --clock`` (pipeline.packets.ObtToUtc).

The end-to-end check builds channel bits with tests/third_party_tx.py (reedsolo-free uncoded TM with a
crccheck FECF, independent of pipeline/): a spacecraft clock with a known offset and a drift of 1e-6 s/s is
sampled at the ASM leading edge of every 8th frame and sent in a time packet two frames later (CUC, 4 coarse
+ 3 fine octets); the bits are decoded through ``pipeline.decode`` and correlated.
"""

from __future__ import annotations

import csv
import json
from fractions import Fraction

import numpy as np
import pytest
import third_party_tx as tx

from pipeline import decode
from pipeline.errors import DataFileError, OutputError, ProfileError
from pipeline.packets import CLOCK_JSON_KEYS, ClockModel, ObtToUtc, read_clock_json
from pipeline.profile import profile_from_dict
from pipeline.timescales import NS_PER_S, parse_utc
from pipeline.tools._clock import CLOCK_CSV_COLUMNS, ClockPair, fit_clock, pair_time_packets, run_clock

START = "2026-03-14T09:30:00Z"
BIT_RATE = 1664.0  # channel bits per second: 4 frames a second, 2400 frames span 10 minutes
FRAME_LEN = 48
FIELD_LEN = FRAME_LEN - 6 - 2  # TM header, FECF
LEAD = 317
N_FRAMES = 2400
EVERY = 8
LIGHT_TIME_S = Fraction(12817, 10_000)  # 1.2817 s, a lunar distance
DELAY_NS = 1500
OBT0 = Fraction(812_345_678) + Fraction(1, 4)  # onboard seconds at the first sampled frame's departure
DRIFT = Fraction(1, 10**6)  # the onboard clock runs fast by 1e-6 s/s
FINE = 1 << 24  # 3 fine octets: 2^-24 s = 59.6 ns

PROFILE = {
    "name": "tamarisk-clock",
    "link": {"modulation": "bpsk", "symbol_rate": BIT_RATE},
    "coding": {"convolutional": "none", "reed_solomon": 0, "interleave": 1, "randomizer": True},
    "frames": {"kind": "tm", "length": FRAME_LEN, "fecf": True, "ocf": False, "spacecraft_id": 499},
    "packets": {"time_code": [{"apid": 127, "code": "cuc", "pfield": 0x2F}]},
    "clock": {"time_packet_apid": 127, "time_field_offset": 0, "code": "cuc", "pfield": 0x2F,
              "sampled_every": EVERY, "onboard_delay_ns": DELAY_NS},
}


#: PROFILE as a TOML file (for the command line)
PROFILE_TOML = f"""
name = "tamarisk-clock"
[link]
modulation = "bpsk"
symbol_rate = {BIT_RATE}
[coding]
convolutional = "none"
reed_solomon = 0
interleave = 1
randomizer = true
[frames]
kind = "tm"
length = {FRAME_LEN}
fecf = true
ocf = false
spacecraft_id = 499
[[packets.time_code]]
apid = 127
code = "cuc"
pfield = 0x2F
[clock]
time_packet_apid = 127
time_field_offset = 0
code = "cuc"
pfield = 0x2F
sampled_every = {EVERY}
onboard_delay_ns = {DELAY_NS}
"""


def _with_required_tables(data: dict, **kw):
    """``profile_from_dict`` with empty [link], [coding] and [frames] tables where the test gives none."""
    return profile_from_dict({"link": {}, "coding": {}, "frames": {}, **data}, **kw)


def _departure(i: int) -> Fraction:
    """Truth: TAI seconds (from START) at which frame i's ASM leading edge left the spacecraft antenna."""
    received = Fraction(LEAD + i * (32 + 8 * FRAME_LEN)) / Fraction(BIT_RATE)
    return received - LIGHT_TIME_S - Fraction(DELAY_NS, NS_PER_S)


def _obt(i: int) -> Fraction:
    return OBT0 + (1 + DRIFT) * (_departure(i) - _departure(0))


@pytest.fixture(scope="module")
def decoded(tmp_path_factory):
    return build_decoded_pass(tmp_path_factory.mktemp("clock"))


def build_decoded_pass(tmp):
    """Channel bits of the pass written to ``tmp/pass.bits`` and decoded into ``tmp/decoded``: (profile, folder)."""
    packets = []
    for i in range(N_FRAMES):
        if i % EVERY == 2:  # the time packet of sampled frame i - 2, one packet per frame
            ticks = int(_obt(i - 2) * FINE)  # the clock is read by truncation
            if i - 2 == 400:
                ticks += FINE // 1000  # one corrupt sample (1 ms): the fit must leave it out
            packets.append(tx.time_packet(127, i // EVERY, tx.cuc_field(ticks), FIELD_LEN))
        else:
            packets.append(tx.space_packet(100, i, bytes((i + k) & 0xFF for k in range(FIELD_LEN - 6))))
    frames = tx.tm_frames(packets, scid=499, vcid=0, length=FRAME_LEN, ocf=False, fecf=True)
    assert len(frames) == N_FRAMES
    for bad in (80, 800):  # two sampled frames arrive damaged: their FECF fails
        frames[bad] = frames[bad][:20] + bytes([frames[bad][20] ^ 0xFF]) + frames[bad][21:]
    bits = tx.channel_bits(frames, rs_e=0, interleave=1, randomize=True, conv=False, nrz_m=False, lead_bits=LEAD)
    path = tmp / "pass.bits"
    path.write_bytes(np.packbits(bits).tobytes())
    prof = _with_required_tables(PROFILE, name="tamarisk-clock")
    out = tmp / "decoded"
    res = decode(path, prof, out, input_kind="bits", start=START)
    assert res.frames >= N_FRAMES
    return prof, out


def test_clock_correlation_end_to_end(decoded, tmp_path):
    prof, folder = decoded
    res = run_clock([folder], prof, light_time_s=float(LIGHT_TIME_S), out=tmp_path / "clock")
    doc = json.loads((tmp_path / "clock" / "clock.json").read_text())
    assert list(doc) == [k for k in CLOCK_JSON_KEYS if k != "quadratic"]  # linear data: no quadratic term
    model = read_clock_json(tmp_path / "clock" / "clock.json")
    t0 = parse_utc(START)
    worst = 0
    for i in range(0, N_FRAMES - 2, EVERY):  # every sampled frame, the rejected ones included
        truth_ns = t0 + round(_departure(i) * NS_PER_S)
        worst = max(worst, abs(model.utc_tai_ns(round(_obt(i) * NS_PER_S)) - truth_ns))
    assert worst < 1000  # ns: within 1 us at every sampled frame
    # UTC = a + OBT / (1 + d): rate = 1 / (1 + 1e-6), drift = 1 / rate - 1 = 1e-6 s/s
    assert abs(doc["drift_s_per_s"] - 1e-6) < 1e-8 and doc["drift_uncertainty"] < 1e-9
    assert doc["pairs_rejected"] == 3 and doc["pairs_used"] == N_FRAMES // EVERY - 3
    assert res.rejected["sampled_frame_failed"] == 2 and res.rejected["outlier"] == 1
    assert doc["residual_rms_s"] < 40e-9  # the 3-fine-octet quantisation: 59.6 ns / sqrt(12) = 17 ns
    assert doc["light_time_source"] == "constant light time 1.281700000 s (--light-time)"
    assert float(doc["epoch_obt_s"]).is_integer()
    with open(tmp_path / "clock" / "clock.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0]) == CLOCK_CSV_COLUMNS and len(rows) == N_FRAMES // EVERY
    assert sum(r["used"] == "true" for r in rows) == doc["pairs_used"]
    assert sum(r["frame_ert"] == "" for r in rows) == 2  # the two damaged sampled frames
    assert (tmp_path / "clock" / "clock_residuals.png").read_bytes()[:4] == b"\x89PNG"
    # the same pass with the light time given as a range gives the same model
    again = run_clock([folder], prof, range_km=float(LIGHT_TIME_S) * 299_792.458, plot=False)
    assert abs(again.model.utc_at_epoch_tai_ns - model.utc_at_epoch_tai_ns) <= 1
    assert again.model.rate == pytest.approx(model.rate, abs=1e-15)
    with pytest.raises(OutputError, match="exists"):
        run_clock([folder], prof, light_time_s=1.2817, out=tmp_path / "clock")


def test_decode_clock_adds_utc_from_obt(decoded, tmp_path):
    prof, folder = decoded
    model = run_clock([folder], prof, light_time_s=float(LIGHT_TIME_S), plot=False).model
    conv = ObtToUtc(model=model, profile=prof)
    t0 = parse_utc(START)
    packets = [json.loads(x) for x in (folder / "packets.jsonl").read_text().splitlines()]
    checked = 0
    for p in packets:
        out = conv.process(dict(p))
        if p["apid"] != 127:
            assert "utc_from_obt" not in out
            continue
        seq = p["seq_count"]
        i = seq * EVERY  # the sampled frame this time packet names
        if i == 400:
            continue  # the corrupt sample
        truth_ns = t0 + round(_departure(i) * NS_PER_S)
        assert abs(parse_utc(out["utc_from_obt"]) - truth_ns) < 1000
        checked += 1
    assert checked == N_FRAMES // EVERY - 1


def _frames_tm(count, *, drop=(), fail=(), period=1000.0):
    out = []
    for k in range(count):
        if k in drop:
            continue
        out.append({"sample_position": period * k, "status": "fecf_error" if k in fail else "ok", "scid": 499,
                    "vcid": 0, "mcfc": k % 256, "vcfc": k % 256,
                    "ert": f"2026-03-14T09:{30 + k // 60:02d}:{k % 60:02d}Z"})
    return out


def _time_packet(k, obt_s, *, vcid=0, vcfc=None):
    return {"apid": 127, "sample_position": 1000.0 * k, "mcfc": k % 256, "vcid": vcid,
            "vcfc": k if vcfc is None else vcfc, "hex": "087fc0000006" + (obt_s << 24).to_bytes(7, "big").hex()}


def test_pairing_tm_rules():
    prof = _with_required_tables({"frames": {"length": 64}, "coding": {"reed_solomon": 0},
                              "clock": {"time_packet_apid": 127, "pfield": 0x2F, "sampled_every": 4}})
    frames = _frames_tm(40, drop=(8,), fail=(16,))
    packets = [_time_packet(k, 100 + k) for k in (1, 9, 17, 27, 39)]
    packets.append({"apid": 127, "sample_position": 1000.0 * 5, "mcfc": 5, "hex": "087fc0000001ffff"})  # too short
    pairs = pair_time_packets(frames, packets, prof, folder="x")
    assert [p.reason for p in pairs] == [None, "sampled_frame_not_received", "sampled_frame_failed", None, None,
                                         "time_code_unreadable"]
    assert pairs[0].frame_ert == "2026-03-14T09:30:00Z" and pairs[3].frame_ert == "2026-03-14T09:30:24Z"
    # 256 frames lost between the sampled frame and the packet: the count alone would alias, the period does not
    frames2 = _frames_tm(600, drop=range(41, 301))  # frame 44 has the sampled count 44 too, 256 frames earlier
    pairs2 = pair_time_packets(frames2, [_time_packet(301, 5)], prof)
    assert pairs2[0].reason == "sampled_frame_not_received"


def test_pairing_aos_rules():
    prof = _with_required_tables({"frames": {"kind": "aos", "length": 64, "spacecraft_id": 99},
                              "coding": {"reed_solomon": 0},
                              "clock": {"time_packet_apid": 127, "pfield": 0x2F, "sampled_every": 4,
                                        "sampled_vcid": 2}})
    frames = []
    for k in range(60):  # VC 2 and VC 5 alternate; VC 2 counts 0, 1, 2, ...
        vcid = 2 if k % 2 == 0 else 5
        if vcid == 2 and k // 2 in (9, 13):  # VC 2 counts 9 and 13 are lost
            continue
        frames.append({"sample_position": 1000.0 * k, "status": "ok", "scid": 99, "vcid": vcid, "mcfc": None,
                       "vcfc": k // 2, "ert": f"2026-03-14T09:30:{k:02d}Z"})
    # packets on VC 5 at k = 11 (after VC-2 count 5), k = 25 (VC-2 count 12 is sampled but count 13 lost
    # after 12 is no sampled count: fine), k = 29 (VC-2 counts 13..14: count 13 lost, not a multiple of 4)
    packets = [_time_packet(11, 1, vcid=5), _time_packet(25, 2, vcid=5), _time_packet(17, 3, vcid=5)]
    pairs = pair_time_packets(frames, packets, prof)
    assert pairs[0].reason is None and pairs[0].frame_ert == "2026-03-14T09:30:08Z"  # VC-2 count 4 at k = 8
    assert pairs[1].reason is None and pairs[1].frame_ert == "2026-03-14T09:30:24Z"  # VC-2 count 12
    assert pairs[2].reason is None and pairs[2].frame_ert == "2026-03-14T09:30:16Z"  # count 8; 9 lost, not sampled
    # lose VC-2 count 8 (sampled) and ask for a packet between counts 7 and 10: the latest sampled is unknown
    frames_lost = [f for f in frames if not (f["vcid"] == 2 and f["vcfc"] == 8)]
    assert pair_time_packets(frames_lost, [_time_packet(17, 3, vcid=5)], prof)[0].reason == \
        "sampled_frame_not_received"


def _pairs(obt_s, utc_s, resolution_ns=1.0):
    t0 = parse_utc(START)
    return [ClockPair("x", round(o * NS_PER_S), resolution_ns, utc_spacecraft_tai_ns=t0 + round(u * NS_PER_S))
            for o, u in zip(obt_s, utc_s)]


def test_fit_chooses_the_quadratic_term_by_residuals():
    obt = np.linspace(5000.0, 9000.0, 200)
    rng = np.random.default_rng(2)
    linear = (obt - 5000.0) * (1 - 2e-6) + rng.normal(0, 20e-9, obt.size)
    m = fit_clock(_pairs(obt, linear))
    assert m.quadratic is None and abs(m.drift_s_per_s - 2e-6 / (1 - 2e-6)) < 1e-10
    aging = linear + 3e-10 * (obt - 7000.0) ** 2  # 3e-10 s/s^2: 1.2 ms of curvature over the span
    mq = fit_clock(_pairs(obt, aging))
    assert mq.quadratic == pytest.approx(3e-10, rel=1e-3) and mq.residual_rms_s < 30e-9
    assert set(mq.as_dict()) == set(CLOCK_JSON_KEYS)
    assert fit_clock(_pairs(obt, aging), quadratic=False).quadratic is None
    with pytest.raises(DataFileError, match="at least 3"):
        fit_clock(_pairs(obt[:2], linear[:2]))


def test_run_clock_arguments(decoded, tmp_path):
    prof, folder = decoded
    with pytest.raises(ValueError, match="exactly one of"):
        run_clock([folder], prof, light_time_s=1.0, range_km=3.0)
    with pytest.raises(ProfileError, match=r"\[station\] needs latitude_deg"):
        run_clock([folder], prof, tle=tmp_path / "none.tle")
    with pytest.raises(ProfileError, match=r"no \[clock\] section"):
        run_clock([folder], _with_required_tables({k: v for k, v in PROFILE.items() if k != "clock"}), light_time_s=1.0)
    with pytest.raises(DataFileError, match="not a decoded folder"):
        run_clock([tmp_path / "nowhere"], prof, light_time_s=1.0)
    (tmp_path / "empty").mkdir()
    with pytest.raises(DataFileError, match="frames.jsonl: not found"):
        run_clock([tmp_path / "empty"], prof, light_time_s=1.0)


def test_clock_json_reader_errors(tmp_path):
    good = ClockModel(100.0, parse_utc(START), 1.0 - 1e-6, drift_s_per_s=1e-6, pairs_used=5,
                      light_time_source="x").as_dict()
    p = tmp_path / "clock.json"
    for change, message in ((("rate", "fast"), "'rate' must be a finite number"), (("rate", 3.0), "near 1"),
                            (("utc_at_epoch", "yesterday"), "utc_at_epoch"), (("pairs_used", -1), "a count")):
        bad = dict(good)
        bad[change[0]] = change[1]
        p.write_text(json.dumps(bad))
        with pytest.raises(DataFileError, match=message):
            read_clock_json(p)
    p.write_text("{")
    with pytest.raises(DataFileError, match="not a JSON clock file"):
        read_clock_json(p)
    p.write_text(json.dumps(good))
    assert read_clock_json(p) == ClockModel.from_dict(good)


def test_clock_and_decode_clock_on_the_command_line(decoded, tmp_path, capsys):
    # `downlink clock` writes clock.json; `downlink decode --clock clock.json` adds utc_from_obt to the time
    # packets, within 1 us of the truth (the same bits decoded again, now with the correlation)
    from pipeline.cli import main

    prof, folder = decoded
    ptoml = tmp_path / "p.toml"
    ptoml.write_text(PROFILE_TOML)
    capsys.readouterr()
    assert main(["clock", str(folder), "--profile", str(ptoml), "--light-time", str(float(LIGHT_TIME_S)),
                 "--out", str(tmp_path / "c"), "--json", "-q"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc == json.loads((tmp_path / "c" / "clock.json").read_text())
    assert main(["decode", str(folder.parent / "pass.bits"), "--input", "bits", "--start", START, "--profile",
                 str(ptoml), "--out", str(tmp_path / "d"), "--clock", str(tmp_path / "c" / "clock.json"), "-q"]) == 0
    t0 = parse_utc(START)
    checked = 0
    for line in (tmp_path / "d" / "packets.jsonl").read_text().splitlines():
        p = json.loads(line)
        if p["apid"] != 127 or p["seq_count"] * EVERY == 400:  # 400: the corrupt sample
            assert p["apid"] == 127 or "utc_from_obt" not in p
            continue
        truth_ns = t0 + round(_departure(p["seq_count"] * EVERY) * NS_PER_S)
        assert abs(parse_utc(p["utc_from_obt"]) - truth_ns) < 1000
        checked += 1
    assert checked == N_FRAMES // EVERY - 1
    # a clock.json that is not one is one line and exit 3
    (tmp_path / "bad.json").write_text("{")
    assert main(["decode", str(folder.parent / "pass.bits"), "--input", "bits", "--start", START, "--profile",
                 str(ptoml), "--out", str(tmp_path / "e"), "--clock", str(tmp_path / "bad.json")]) == 3
    assert capsys.readouterr().err.startswith("Error: ")


def test_a_time_code_p_field_written_as_an_integral_float_reads_as_the_integer():
    # TOML writes 47.0 as a float; the profile accepts it (pipeline.packets.check_time_code_config), so the
    # onboard-time conversion must read it as 47 too (it raised TypeError before).  CUC P-field 0x2F: level 2
    # epoch, 4 coarse and 3 fine octets (CCSDS 301.0-B-4 sec. 3.2; layout from memory, not confirmed)
    from pipeline.packets import ClockModel
    from pipeline.profile import profile_from_dict

    pkt = bytes.fromhex("0864c0000009") + bytes.fromhex("0000000a80000000000000")
    got = {}
    for pfield in (0x2F, 47.0):
        prof = profile_from_dict({"link": {}, "coding": {}, "frames": {},
                                  "packets": {"time_code": [{"apid": 100, "code": "cuc", "pfield": pfield}]}})
        conv = ObtToUtc(model=ClockModel(0.0, parse_utc("2026-03-14T09:30:00Z"), 1.0), profile=prof)
        got[pfield] = conv.process({"apid": 100, "hex": pkt.hex()})["utc_from_obt"]
    assert got[0x2F] == got[47.0] == "2026-03-14T09:30:10.500000000Z"
