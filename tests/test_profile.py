"""Link profile loading and validation (pipeline/profile.py)."""

from __future__ import annotations

import math
import re

import pytest

from pipeline.errors import ProfileError
from pipeline.profile import demo_profile_path, load_profile, profile_from_dict


def test_demo_profile_sizes(demo_profile):
    p = demo_profile
    assert p.frames.spacecraft_id == 499
    # CCSDS 131.0-B-2 sec. 4: RS(255,223) with I = 5 -> 5 x 32 parity octets after a 1115-octet frame
    assert p.rs_parity_bytes == 160
    assert p.codeblock_bytes == 1275
    assert p.virtual_fill_bytes == 0
    assert p.cadu_bits == 32 + 8 * 1275


def test_esn0_from_ebn0_follows_design_definition(demo_profile):
    # ../shared/DESIGN.md: Es/N0 = Eb/N0 + 10 log10(code rate x bits per modulation symbol)
    rate = 0.5 * 1115 / 1275
    assert demo_profile.esn0_from_ebn0(6.0) == pytest.approx(6.0 + 10 * math.log10(rate))
    qpsk = demo_profile.with_changes(link={"modulation": "qpsk"})
    assert qpsk.esn0_from_ebn0(6.0) == pytest.approx(6.0 + 10 * math.log10(2 * rate))


def _full(data: dict) -> dict:
    """``data`` with the required tables present (empty ones where it has none)."""
    return {"link": {}, "coding": {}, "frames": {}, **data}


def test_virtual_fill_from_length():
    # CCSDS 130.1-G-1 Fig. 5-3: I = 5 with Q = 15 fill octets (q = 3 per codeword) -> 8800-bit frame
    p = profile_from_dict(_full({"coding": {"interleave": 5}, "frames": {"length": 1100}}))
    assert p.virtual_fill_bytes == 15
    assert 8 * p.frames.length == 8800
    assert 8 * p.codeblock_bytes == 10080


@pytest.mark.parametrize(
    "data, fragment",
    [
        ({"coding": {"interleave": 9}}, "interleave must be 1..8, not 9"),
        ({"coding": {"reed_solomon": 5}}, "reed_solomon must be 0, 8 or 16, not 5"),
        ({"link": {"symbol_rate": -1.0}}, "symbol_rate must be > 0"),
        ({"link": {"modulation": "fsk"}}, "modulation must be one of"),
        ({"coding": {"convolutional": "4/5"}}, "convolutional must be one of"),
        ({"frames": {"length": 1116}}, "multiple of [coding] interleave"),
        ({"frames": {"length": 2000}}, "at most 1115"),
        ({"frames": {"spacecraft_id": 1024}}, "spacecraft_id must be 0..1023"),
        ({"frames": {"kind": "aos", "spacecraft_id": 499}}, "spacecraft_id must be 0..255"),
        ({"link": {"bogus": 1}}, "unknown key 'bogus' in [link]"),
        ({"extra": {}}, "unknown table [extra]"),
        ({"coding": {"interleave": "5"}}, "interleave must be an integer"),
        ({"coding": {"randomizer": 1}}, "randomizer must be true or false"),
        # issue 13: the validator's ranges are the frame parser's (an AOS header with FHEC, the M_PDU header
        # and one data octet need 11 octets; length 9 used to pass and crash the parser)
        ({"frames": {"kind": "aos", "spacecraft_id": 5, "fhec": True, "length": 9}}, "length must be 11..65536"),
        ({"frames": {"kind": "aos", "spacecraft_id": 5, "fhec": True, "ocf": True, "fecf": True,
                     "insert_zone_length": 3, "length": 19}}, "length must be 20..65536 octets, not 19"),
        ({"frames": {"kind": "aos", "spacecraft_id": 5, "insert_zone_length": -2}},
         "insert_zone_length must be 0 or more octets, not -2"),
        ({"frames": {"insert_zone_length": 4}}, "insert_zone_length applies to AOS frames"),
        ({"frames": {"fhec": True}}, "fhec applies to AOS frames"),
        ({"frames": {"bitstream_vcids": [3]}}, "bitstream_vcids applies to AOS frames"),
        ({"frames": {"kind": "aos", "spacecraft_id": 5, "secondary_header_length": 8}},
         "secondary_header_length applies to TM frames"),
        ({"frames": {"secondary_header_length": 65}}, "secondary_header_length must be 0..64"),
        ({"frames": {"length": 6, "reed_solomon": 0}}, "unknown key 'reed_solomon' in [frames]"),
        # time codes: the packet extractor's own check, at load time (issue 13)
        ({"packets": {"time_code": [{"apid": 5, "pfield": 0x4E}]}}, "apid 5: pfield is not a valid CUC P-field"),
        ({"packets": {"time_code": [{"apid": 5, "code": "cds", "pfield": 0x1E}]}},
         "apid 5: pfield is not a valid CDS P-field"),
        ({"packets": {"time_code": [{"apid": 5, "pfield": 0x9E}]}}, "announces a second octet that is missing"),
        ({"packets": {"time_code": [{"apid": 5, "pfield": 0x1E04}]}}, "the extension flag disagrees with its length"),
        ({"packets": {"time_code": [{"apid": 5, "epoch": "soon"}]}},
         "apid 5: epoch must be an ISO-8601 date and time without a zone offset, not 'soon'"),
        ({"packets": {"time_code": [{"apid": 5, "offset": 70000}]}}, "offset must be 0..65535 octets, not 70000"),
        ({"receiver": {"acquisition_range": 0.05}}, "acquisition_range (a fraction of the symbol rate) was replaced "
                                                    "by acquisition_range_hz"),
        ({"receiver": {"acquisition_range_hz": -5.0}}, "acquisition_range_hz must be a frequency > 0 Hz, not -5.0"),
        ({"receiver": {"acquisition_range_hz": "wide"}}, "acquisition_range_hz must be a frequency > 0 Hz"),
        ({"receiver": {"spectrum_inverted": "yes"}}, 'spectrum_inverted must be true, false or "auto", not \'yes\''),
        ({"receiver": {"timing_loop_bandwidth": 0.09}}, "timing_loop_bandwidth must be 1e-05..0.05"),
        ({"receiver": {"timing_loop_bandwidth": 0.0}}, "timing_loop_bandwidth must be 1e-05..0.05"),
        # README's [receiver] table: "below 5 % of the symbol rate", checked when the file is loaded (it was
        # refused only by the receiver: 'downlink inspect' stopped with an internal error, exit 70)
        ({"link": {"symbol_rate": 240000.0}, "receiver": {"carrier_loop_bandwidth_hz": 12000.0}},
         "carrier_loop_bandwidth_hz must be below 5 % of the symbol rate (12000 Hz), not 12000"),
    ],
)
def test_out_of_range_values_name_the_key(data, fragment):
    with pytest.raises(ProfileError) as info:
        profile_from_dict(_full(data), source="p.toml")
    msg = str(info.value)
    assert msg.startswith("p.toml: ")
    assert fragment in msg
    assert "\n" not in msg


def test_carrier_loop_bandwidth_just_below_the_receivers_limit_loads():
    # the receivers' own bound (pipeline.demod: B_L / symbol rate < 0.05) is the profile's: just below it loads
    p = profile_from_dict(_full({"link": {"symbol_rate": 240000.0},
                                 "receiver": {"carrier_loop_bandwidth_hz": 11999.0}}))
    assert p.receiver.carrier_loop_bandwidth_hz == 11999.0


def test_convolutional_g2_inverted_key():
    # default as CCSDS 131.0-B says: G2 inverted at rate 1/2 (sec. 3.3), not on the punctured codes
    # (sec. 3.4; 130.1-G sec. 4.3, Fig. 4-2); the key overrides it for equipment that differs
    base = {"link": {}, "frames": {"length": 223}}
    half = profile_from_dict({**base, "coding": {"convolutional": "1/2", "reed_solomon": 16, "interleave": 1}})
    assert half.coding.conv_g2_inverted is True
    for rate in ("2/3", "3/4", "5/6", "7/8"):
        p = profile_from_dict({**base, "coding": {"convolutional": rate, "reed_solomon": 16, "interleave": 1}})
        assert p.coding.conv_g2_inverted is False
        q = profile_from_dict({**base, "coding": {"convolutional": rate, "reed_solomon": 16, "interleave": 1,
                                                  "convolutional_g2_inverted": True}})
        assert q.coding.conv_g2_inverted is True
    off = profile_from_dict({**base, "coding": {"convolutional": "1/2", "reed_solomon": 16, "interleave": 1,
                                                "convolutional_g2_inverted": False}})
    assert off.coding.conv_g2_inverted is False
    with pytest.raises(ProfileError, match="convolutional_g2_inverted must be true or false, not 'yes'"):
        profile_from_dict({**base, "coding": {"convolutional": "3/4", "convolutional_g2_inverted": "yes"}})
    with pytest.raises(ProfileError, match="convolutional_g2_inverted applies to a convolutional code"):
        profile_from_dict({**base, "coding": {"convolutional": "none", "convolutional_g2_inverted": True}})


@pytest.mark.parametrize("missing", ["link", "coding", "frames"])
def test_required_tables(tmp_path, missing):
    # issue 13: a missing [link], [coding] or [frames] is one clear error, never a silent default
    data = _full({})
    del data[missing]
    with pytest.raises(ProfileError, match=rf"^p.toml: missing table \[{missing}\] \(a profile needs \[link\], "):
        profile_from_dict(data, source="p.toml")
    text = demo_profile_path().read_text()
    start = text.index(f"[{missing}]")
    end = text.index("\n[", start + 1)
    path = tmp_path / "cut.toml"
    path.write_text(text[:start] + text[end:])
    with pytest.raises(ProfileError, match=rf"cut.toml: missing table \[{missing}\]"):
        load_profile(path)


def test_every_profile_the_validator_accepts_the_stages_accept():
    # the smallest frames of each layout load, and the frame parser and packet extractor take them
    from pipeline.link import FrameParser
    from pipeline.packets import PacketExtractor
    from pipeline.sync import DecodedFrame
    from pipeline.sync._types import Cadu

    for frames in ({"kind": "aos", "spacecraft_id": 5, "fhec": True, "length": 11},
                   {"kind": "aos", "spacecraft_id": 5, "fhec": True, "insert_zone_length": 3, "ocf": True,
                    "fecf": True, "length": 20},
                   {"kind": "tm", "length": 7}, {"kind": "tm", "secondary_header_length": 64, "length": 71}):
        p = profile_from_dict({"link": {}, "coding": {"reed_solomon": 0}, "frames": frames,
                               "packets": {"time_code": [{"apid": 1, "code": "cds", "pfield": 0x4A,
                                                          "epoch": "2000-01-01T12:00:00"}]}})
        parser, ex = FrameParser(frames=p.frames), PacketExtractor(profile=p)
        for fill in (0x00, 0xFF, 0x5A):
            data = bytes([fill]) * p.frames.length
            rec = parser.process(DecodedFrame(frame=data, status="ok", rs_corrected=(),
                                              cadu=Cadu(data=data, position=0.0, asm_errors=0, inverted=False,
                                                        flywheel=False, bit_index=0)))
            ex.process(rec)
def test_receiver_keys():
    rx = profile_from_dict(_full({})).receiver
    assert rx.acquisition_range_hz is None and rx.spectrum_inverted == "auto"  # whole band, both mirror images
    rx = profile_from_dict(_full({"receiver": {"acquisition_range_hz": 12000, "spectrum_inverted": True}})).receiver
    assert rx.acquisition_range_hz == 12000.0 and isinstance(rx.acquisition_range_hz, float)
    assert rx.spectrum_inverted is True
    assert profile_from_dict(_full({"receiver": {"spectrum_inverted": False}})).receiver.spectrum_inverted is False
    with pytest.raises(ProfileError, match="known: .*spectrum_inverted"):
        profile_from_dict(_full({"receiver": {"spectrum_invert": True}}))


def test_missing_and_malformed_files(tmp_path):
    with pytest.raises(ProfileError, match="profile not found"):
        load_profile(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[link\nmodulation = 'bpsk'\n")
    with pytest.raises(ProfileError, match="not valid TOML"):
        load_profile(bad)


def test_time_codes_and_traffic_tables():
    p = load_profile(demo_profile_path())
    assert [tc.apid for tc in p.packets.time_codes] == [100, 300]
    assert p.packets.time_codes[0].pfield == 0x1E
    assert {t.apid for t in p.simulate.traffic} == {100, 200, 300}
    with pytest.raises(ProfileError, match="needs 'apid', 'length' and 'rate_hz'"):
        profile_from_dict(_full({"simulate": {"traffic": [{"apid": 5}]}}))


# ---- fuzzing (issue 9): any parsed TOML tree gives a profile or one ProfileError, never anything else ----

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_scalars = st.one_of(st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True, allow_infinity=True),
                     st.text(max_size=8), st.lists(st.integers(-5, 70), max_size=3))
_keys = st.sampled_from(["modulation", "symbol_rate", "pulse", "rolloff", "line_code", "convolutional",
                         "reed_solomon", "interleave", "randomizer", "kind", "length", "fecf", "ocf",
                         "spacecraft_id", "asm_max_errors", "chunk_samples", "seconds", "ebn0_db", "apid",
                         "acquisition_range_hz", "spectrum_inverted", "timing_loop_bandwidth", "acquisition_range",
                         "code", "pfield", "traffic", "time_code", "bitstream_vcids", "bogus"])
_tables = st.dictionaries(_keys, st.one_of(_scalars, st.lists(st.dictionaries(_keys, _scalars, max_size=4),
                                                                 max_size=2)), max_size=5)
_tree = st.dictionaries(st.sampled_from(["link", "coding", "frames", "packets", "receiver", "simulate", "x"]),
                        st.one_of(_tables, _scalars), max_size=4)
# most trees carry the three required tables, so that the fuzz reaches the value checks
_full_tree = st.fixed_dictionaries({"link": _tables, "coding": _tables, "frames": _tables}).flatmap(
    lambda base: _tree.map(lambda extra: {**base, **extra}))


@settings(max_examples=300, deadline=None)
@given(tree=st.one_of(_tree, _full_tree))
def test_fuzz_profile_tree(tree):
    try:
        prof = profile_from_dict(tree, source="fuzz.toml")
    except ProfileError as exc:
        msg = str(exc)
        assert msg.startswith("fuzz.toml: ") and "\n" not in msg
    else:
        assert prof.codeblock_bytes >= prof.frames.length
        # every stage accepts what the loader accepted
        from pipeline.chain import DecodeChain

        DecodeChain(prof, input_kind="bits")


def test_simulate_format_key_uses_the_recording_vocabulary(tmp_path):
    from pipeline.recording import FORMATS, RAW_FORMAT_ALIASES, sample_format
    from pipeline.sim import simulate

    for fmt in FORMATS:
        assert _tables(simulate={"format": fmt}).simulate.datatype == fmt
    assert _tables(simulate={"datatype": "ci16_le"}).simulate.datatype == "ci16_le"  # former key
    with pytest.raises(ProfileError, match=r"\[simulate\] format must be cf32 \| ci16 \| ci8 \| cu8, not 'cf64'"):
        _tables(simulate={"format": "cf64"})
    # every name the validator accepts is one pipeline.recording reads and the simulator writes
    from pipeline.profile import _SIMULATE_FORMATS

    assert set(FORMATS) <= set(_SIMULATE_FORMATS) <= set(FORMATS) | set(RAW_FORMAT_ALIASES.values())
    prof = profile_from_dict({"link": {}, "coding": {}, "frames": {}, "simulate": {"format": "ci8", "seconds": 0.1}})
    res = simulate(prof, tmp_path)
    import json

    # SigMF specification: the metadata spells the datatype as the standard does
    assert json.loads(res.meta_path.read_text())["global"]["core:datatype"] == sample_format("ci8").name == "ci8"


def _tables(**sections):
    """``profile_from_dict`` with empty [link], [coding] and [frames] tables and the given ones."""
    return profile_from_dict({"link": {}, "coding": {}, "frames": {}, **sections})


# ---- turbo keys (issue 16) -------------------------------------------------------------------------------
def _turbo(rate="1/2", k=1784, **over):
    coding = {"convolutional": "none", "reed_solomon": 0, "turbo": rate, "turbo_k": k}
    coding.update(over.pop("coding", {}))
    frames = {"length": k // 8, "fecf": True}
    frames.update(over.pop("frames", {}))
    return profile_from_dict({"link": over.pop("link", {}), "coding": coding, "frames": frames, **over},
                             source="t.toml")


@pytest.mark.parametrize("rate, n_1784, n_8920, marker", [
    # codeword n = (k + 4) / r: REFERENCES.md sec. 1.5 (computed there from the termination rule, [TM-SC] p. 6-7);
    # marker lengths: REFERENCES.md sec. 13.4 ([TM-SC] Figs. 8-3 to 8-5; 64 bits from memory, not confirmed)
    ("1/2", 3576, 17848, 64), ("1/3", 5364, 26772, 96), ("1/4", 7152, 35696, 128), ("1/6", 10728, 53544, 192)])
def test_turbo_derived_sizes(rate, n_1784, n_8920, marker):
    for k, n in ((1784, n_1784), (8920, n_8920)):
        p = _turbo(rate, k)
        assert p.codeblock_bits == n and p.marker_bits == marker
        assert p.cadu_bits == marker + n
        assert p.codeblock_bytes == -(-n // 8)  # rate 1/3 codewords are not whole octets
        assert p.code_rate == pytest.approx(k / n)  # the tail counted in the rate, as REFERENCES.md sec. 13.5
        # ../shared/DESIGN.md: Es/N0 = Eb/N0 + 10 log10(code rate x bits per symbol)
        assert p.esn0_from_ebn0(1.0) == pytest.approx(1.0 + 10 * math.log10(k / n))
        assert p.samples_per_cadu(1e6) == pytest.approx((marker + n) / p.link.channel_bit_rate * 1e6)
        assert p.coding.turbo_max_iterations == 10  # issue 16's default


def test_turbo_k_and_frame_length_pairs():
    # issue 16: [frames] length = k/8 octets (223, 446, 892, 1115), k from [TM-SC] Table 6-3
    for k, length in ((1784, 223), (3568, 446), (7136, 892), (8920, 1115)):
        assert _turbo("1/4", k).frames.length == length


@pytest.mark.parametrize("over, fragments", [
    ({"coding": {"convolutional": "1/2"}}, ['convolutional must be "none"']),
    ({"coding": {"reed_solomon": 16}}, ["reed_solomon must be 0"]),
    ({"frames": {"fecf": False}}, ["fecf must be true"]),
    ({"frames": {"length": 224}}, ["length must be 223 octets"]),
    ({"coding": {"convolutional": "1/2", "reed_solomon": 8}, "frames": {"fecf": False}},
     ['convolutional must be "none"', "reed_solomon must be 0", "fecf must be true"]),
    ({"link": {"line_code": "nrz-m"}}, ["line_code must be"]),
])
def test_turbo_rules_are_one_error(over, fragments):
    with pytest.raises(ProfileError) as info:
        _turbo("1/2", 1784, **over)
    msg = str(info.value)
    assert msg.startswith("t.toml: [coding] turbo = \"1/2\" (k = 1784) needs:") and "\n" not in msg
    for f in fragments:
        assert f in msg


@pytest.mark.parametrize("coding, fragment", [
    ({"turbo": "1/5"}, "turbo must be one of none | 1/2 | 1/3 | 1/4 | 1/6, not '1/5'"),
    ({"turbo_k": 1000}, "turbo_k must be one of 1784 | 3568 | 7136 | 8920, not 1000"),
    ({"turbo_max_iterations": 0}, "turbo_max_iterations must be 1..100, not 0"),
    ({"ldpc_rate": "3/4"}, "ldpc_rate must be one of 1/2 | 2/3 | 4/5"),
    ({"ldpc_k": 2048}, "ldpc_k must be one of 1024 | 4096 | 16384"),
    ({"ldpc": "ldpc2"}, "ldpc must be one of none | c2 | ar4ja"),
    ({"ldpc_max_iterations": 0}, "ldpc_max_iterations must be 1..1000, not 0"),
    ({"ldpc": "c2", "turbo": "1/2"}, 'turbo = "1/2" and ldpc = "c2": a link has one of them'),
])
def test_turbo_and_reserved_ldpc_values(coding, fragment):
    with pytest.raises(ProfileError, match=None) as info:
        profile_from_dict({"link": {}, "coding": coding, "frames": {}}, source="t.toml")
    assert fragment in str(info.value)


# ---- LDPC keys (issue 15) --------------------------------------------------------------------------------
def _ldpc(code="c2", rate="1/2", k=1024, **over):
    coding = {"convolutional": "none", "reed_solomon": 0, "ldpc": code, "ldpc_rate": rate, "ldpc_k": k}
    coding.update(over.pop("coding", {}))
    frames = {"length": 892 if code == "c2" else k // 8}
    frames.update(over.pop("frames", {}))
    return profile_from_dict({"link": over.pop("link", {}), "coding": coding, "frames": frames, **over},
                             source="t.toml")


@pytest.mark.parametrize("code, rate, k, n", [
    # CCSDS 131.0-B-2 sec. 7.3.1 (C2 (8160,7136)) and Table 7-5 (AR4JA n for each k and rate), as in
    # ../shared/REFERENCES.md sec. 13.1 and 13.2
    ("c2", "1/2", 1024, 8160), ("ar4ja", "1/2", 1024, 2048), ("ar4ja", "2/3", 1024, 1536),
    ("ar4ja", "4/5", 1024, 1280), ("ar4ja", "1/2", 4096, 8192), ("ar4ja", "2/3", 4096, 6144),
    ("ar4ja", "4/5", 4096, 5120), ("ar4ja", "1/2", 16384, 32768), ("ar4ja", "2/3", 16384, 24576),
    ("ar4ja", "4/5", 16384, 20480)])
def test_ldpc_derived_sizes(code, rate, k, n):
    p = _ldpc(code, rate, k)
    info = 7136 if code == "c2" else k
    assert p.codeblock_bits == n and p.codeblock_bytes == n // 8
    assert p.marker_bits == 32 and p.cadu_bits == 32 + n  # the 32-bit ASM (REFERENCES.md 13.4, from memory)
    assert p.code_rate == pytest.approx(info / n)
    assert p.frames.length == info // 8  # 892 for C2; 128, 512, 2048 (issue 15)
    # ../shared/DESIGN.md: Es/N0 = Eb/N0 + 10 log10(code rate x bits per symbol)
    assert p.esn0_from_ebn0(2.0) == pytest.approx(2.0 + 10 * math.log10(info / n))
    assert p.coding.ldpc_max_iterations == 50  # issue 15's default


@pytest.mark.parametrize("code, over, fragments", [
    ("c2", {"coding": {"convolutional": "1/2"}}, ['convolutional must be "none"']),
    ("c2", {"coding": {"reed_solomon": 16}}, ["reed_solomon must be 0"]),
    ("c2", {"frames": {"length": 1115}}, ["length must be 892 octets"]),
    ("ar4ja", {"frames": {"length": 892}}, ["length must be 128 octets (ldpc_k / 8)"]),
    ("ar4ja", {"coding": {"convolutional": "1/2", "reed_solomon": 8}, "link": {"line_code": "nrz-m"}},
     ['convolutional must be "none"', "reed_solomon must be 0", "line_code must be"]),
])
def test_ldpc_rules_are_one_error(code, over, fragments):
    with pytest.raises(ProfileError) as info:
        _ldpc(code, **over)
    msg = str(info.value)
    head = '[coding] ldpc = "c2" needs:' if code == "c2" else '[coding] ldpc = "ar4ja" (rate 1/2, k = 1024) needs:'
    assert msg.startswith("t.toml: " + head) and "\n" not in msg
    for f in fragments:
        assert f in msg


def test_turbo_links_on_qpsk_and_oqpsk_are_accepted():
    # the rotation search finds the turbo marker by soft correlation (pipeline.sync.BranchSync, correlation="soft")
    assert _turbo("1/2", 1784, link={"modulation": "qpsk"}).link.modulation == "qpsk"
    assert _turbo("1/6", 8920, link={"modulation": "oqpsk"}).link.modulation == "oqpsk"


def test_ldpc_links_on_qpsk_and_with_fecf_are_accepted():
    # the ASM precedes LDPC codewords, so the uncoded QPSK rotation search serves them; FECF optional (131.0-B
    # sec. 7.2.3)
    assert _ldpc("c2", link={"modulation": "qpsk"}).link.modulation == "qpsk"
    assert _ldpc("ar4ja", frames={"fecf": True}).frames.fecf


def test_ldpc_sizes_agree_with_the_codec():
    # the profile derives sizes by arithmetic (it imports nothing of ours); the codec's LdpcCode is the other home
    from pipeline.fec.ldpc import ldpc_code

    for family, rate, k in [("c2", "1/2", 1024)] + [("ar4ja", r, k) for r in ("1/2", "2/3", "4/5")
                                                    for k in (1024, 4096, 16384)]:
        p = _ldpc(family, rate, k)
        code = ldpc_code(family) if family == "c2" else ldpc_code(family, rate=rate, k=k)
        assert (p.codeblock_bits, p.frames.length, p.coding.ldpc_info_bits) == (code.n, code.frame_octets, code.k)


def test_turbo_sizes_agree_with_the_codec():
    # the profile derives sizes by arithmetic (it imports nothing of ours); the codec's TurboCode is the other home
    from pipeline.fec import TURBO_ASMS, TurboCode

    for rate in ("1/2", "1/3", "1/4", "1/6"):
        for k in (1784, 3568, 7136, 8920):
            p, code = _turbo(rate, k), TurboCode(rate=rate, k=k)
            assert (p.codeblock_bits, p.marker_bits, p.frames.length) == (code.n, 8 * len(TURBO_ASMS[rate]),
                                                                          code.frame_octets)


def test_errors_found_after_loading_name_the_profile_file(tmp_path):
    # A profile valid on its own that a later step cannot use (no station position for an orbit's light time and
    # Doppler) is refused naming the file it came from, as every error at loading does; a profile built from a dict
    # is named by its name.
    from pipeline.orbit import GroundStation

    text = demo_profile_path().read_text()
    cut = "\n".join(line for line in text.splitlines() if not line.startswith(("latitude_deg", "longitude_deg")))
    path = tmp_path / "no-position.toml"
    path.write_text(cut)
    prof = load_profile(path)
    assert prof.source == str(path) and not prof.station.has_position
    with pytest.raises(ValueError, match=f"^{re.escape(str(path))}: \\[station\\] needs latitude_deg"):
        GroundStation.from_profile(prof)
    assert prof.with_changes(coding={"interleave": 5}).source == str(path)
    from pipeline.profile import tomllib  # the stdlib's, or tomli before Python 3.11

    assert profile_from_dict(tomllib.loads(cut)).source == prof.name  # from a dict: its name
