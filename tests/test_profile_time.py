"""Profile sections [station] and [clock] (issue 17): keys, defaults and one-line errors."""

from __future__ import annotations

import pytest

from pipeline.errors import ProfileError
from pipeline.profile import ClockSection, StationSection, load_profile, profile_from_dict

CLOCK = {"time_packet_apid": 127, "time_field_offset": 0, "code": "cuc", "pfield": 0x2F, "sampled_every": 8,
         "onboard_delay_ns": 0}
AOS = {"kind": "aos", "length": 222, "spacecraft_id": 99}


def _with_required_tables(data: dict, **kw):
    """``profile_from_dict`` with empty [link], [coding] and [frames] tables where the test gives none."""
    return profile_from_dict({"link": {}, "coding": {}, "frames": {}, **data}, **kw)


def test_demo_profile_station(demo_profile):
    st = demo_profile.station
    assert st.name == "HOLLOW RIDGE" and st.has_position and st.receive_delay_ns == 0
    assert demo_profile.clock is None


def test_defaults_without_the_sections():
    p = _with_required_tables({})
    assert p.station == StationSection() and not p.station.has_position and p.clock is None


def test_clock_section_exactly_as_issue_17(tmp_path):
    text = """
[link]
[frames]
kind = "tm"
length = 223
[coding]
reed_solomon = 16
interleave = 1
[station]
name = "HOLLOW RIDGE"
latitude_deg = 44.7261
longitude_deg = 3.4117
altitude_m = 812.0
receive_delay_ns = 1250
[clock]
time_packet_apid = 127   # packets that carry a sampled onboard time
time_field_offset = 0    # octet offset of the time code in the packet's data field
code = "cuc"             # cuc | cds, with pfield as in [[packets.time_code]]
pfield = 0x2F            # e.g. agency epoch, 4 coarse + 3 fine octets (60 ns)
sampled_every = 8        # frames whose count % sampled_every == 0 are the sampled ones
# sampled_vcid = 0       # AOS (no master-channel count): the virtual channel whose count is used
onboard_delay_ns = 0     # spacecraft transmit-path delay
"""
    path = tmp_path / "p.toml"
    path.write_text(text)
    p = load_profile(path)
    assert p.clock == ClockSection(time_packet_apid=127, pfield=0x2F, sampled_every=8)
    assert p.station.receive_delay_ns == 1250 and p.station.altitude_m == 812.0


@pytest.mark.parametrize("clock, frames, message", [
    ({"sampled_every": 3}, {}, r"\[clock\] sampled_every must divide 256 .* not 3"),
    ({"sampled_every": 512}, {}, "must divide 256"),
    ({"sampled_vcid": 0}, {}, "sampled_vcid applies to AOS frames only"),
    ({}, AOS, r"sampled_vcid must be 0..63 on AOS links"),
    ({"sampled_vcid": 2, "sampled_every": 6}, AOS, "must divide 16777216"),
    ({"code": "ccs"}, {}, r"\[clock\] code must be one of cuc \| cds"),
    ({"code": "cds", "pfield": 0x2F2F}, {}, "one octet"),
    # the P-field's layout, as [[packets.time_code]] checks it (CCSDS 301.0-B-4 sec. 3.2 CUC, sec. 3.3 CDS;
    # the bit layouts from memory, not confirmed: REFERENCES.md sec. 6)
    ({"pfield": 0x4E}, {}, r"\[clock\] pfield is not a valid CUC P-field"),
    ({"pfield": 0x9E}, {}, r"\[clock\] pfield is not a valid CUC P-field .*second octet"),
    ({"code": "cds", "pfield": 0x1E}, {}, r"\[clock\] pfield is not a valid CDS P-field"),
    ({"time_packet_apid": 2047}, {}, "time_packet_apid must be 0..2046"),
    ({"onboard_delay_ns": -1}, {}, "onboard_delay_ns must be 0..1000000000"),
    ({"sampled_every": 8.0}, {}, "must be an integer"),
    ({"wobble": 1}, {}, "unknown key 'wobble' in \\[clock\\]"),
])
def test_clock_errors(clock, frames, message):
    data = {"clock": {**CLOCK, **clock}, "frames": {**{"length": 223}, **frames},
            "coding": {"reed_solomon": 0, "interleave": 1}}
    with pytest.raises(ProfileError, match=message):
        _with_required_tables(data, source="p.toml")


def test_clock_needs_the_apid():
    with pytest.raises(ProfileError, match=r"\[clock\] needs 'time_packet_apid'"):
        _with_required_tables({"clock": {"sampled_every": 8}})


def test_aos_clock_ok():
    p = _with_required_tables({"frames": {"kind": "aos", "length": 222, "spacecraft_id": 99},
                               "coding": {"reed_solomon": 0},
                               "clock": {**CLOCK, "sampled_vcid": 3, "sampled_every": 64}})
    assert p.clock.sampled_vcid == 3


@pytest.mark.parametrize("station, message", [
    ({"latitude_deg": 40.0}, "needs both latitude_deg and longitude_deg"),
    ({"latitude_deg": 91.0, "longitude_deg": 0.0}, "latitude_deg must be -90..90"),
    ({"latitude_deg": 0.0, "longitude_deg": 361.0}, "longitude_deg must be -180..360"),
    ({"altitude_m": 2e5}, "altitude_m must be -500..100000 m above the WGS-84 ellipsoid"),
    ({"receive_delay_ns": -5}, "receive_delay_ns must be 0..1000000000"),
    ({"receive_delay_ns": 1.5}, "must be an integer"),
    ({"height": 3}, "unknown key 'height' in \\[station\\]"),
])
def test_station_errors(station, message):
    with pytest.raises(ProfileError, match=message):
        _with_required_tables({"station": station}, source="p.toml")
