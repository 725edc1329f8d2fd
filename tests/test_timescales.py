"""pipeline.timescales against astropy (PyPI): leap seconds, the 1972 and 2017 boundaries, 23:59:60.x text,
CUC/CDS epochs, other uniform scales; and the simulator's own time helpers against astropy too."""

from __future__ import annotations

import datetime as dt
import logging

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.packets import decode_cds, decode_cuc, decode_obt_ns, encode_cds
from pipeline.timescales import (
    NS_PER_DAY,
    NS_PER_S,
    LeapSecondTable,
    check_expiry,
    format_posix_ns,
    format_utc,
    leap_seconds,
    parse_utc,
    posix_ns_from_tai,
    tai_from_calendar,
    tai_from_posix_ns,
    tai_from_scale,
    tai_from_utc_fields,
    tai_minus_utc_s,
    utc_fields,
    utc_julian_date,
)

NS = NS_PER_S


@pytest.fixture(scope="module")
def Time():
    """astropy's Time with downloads switched off (leap seconds from its bundled astropy-iers-data)."""
    from astropy.utils import iers

    iers.conf.auto_download = False
    from astropy.time import Time

    return Time


def _astropy_tai_ns(t, Time) -> int:
    """Integer TAI ns since 1958-01-01 TAI of an astropy Time (two-double arithmetic, ~10 ps)."""
    d = t.tai - Time("1958-01-01T00:00:00", scale="tai")
    return int(round(d.jd1 * 86400 * NS)) + int(round(d.jd2 * 86400 * NS))


def _astropy_utc_text(tai_ns: int, Time) -> str:
    """astropy's UTC ISO text (9 decimals) of a TAI instant."""
    from astropy.time import TimeDelta

    days, rem = divmod(tai_ns, NS_PER_DAY)
    t = Time("1958-01-01T00:00:00", scale="tai") + TimeDelta(days, rem / NS_PER_DAY, format="jd", scale="tai")
    u = t.utc
    u.precision = 9
    return u.isot + "Z"


def _leap_days():
    """(date of the last day before each change, new TAI - UTC) from the bundled table."""
    tab = leap_seconds()
    return [(dt.date(1970, 1, 1) + dt.timedelta(days=u // 86400 - 1), v)
            for u, v in zip(tab.utc_start_s[1:], tab.tai_minus_utc_s[1:])]


# ---- known values ------------------------------------------------------------------------------

@pytest.mark.kat
def test_known_values():
    # IERS Bulletin C 54: TAI - UTC = 37 s from 2017-01-01 (../shared/REFERENCES.md sec. 6)
    assert tai_minus_utc_s(parse_utc("2017-01-01T00:00:00Z")) == 37
    assert tai_minus_utc_s(parse_utc("2016-12-31T23:59:60.5Z")) == 36  # the old value during the leap second
    # IERS leap-seconds.list: TAI - UTC = 10 s at 1972-01-01, the table's first entry
    assert parse_utc("1972-01-01T00:00:00Z") == (4383 + 730) * NS_PER_DAY + 10 * NS  # 730 days 1970 -> 1972
    # ../shared/REFERENCES.md sec. 6 (computed there): 2000-01-01T00:00:00 TAI = 1 325 376 000 s from 1958
    assert tai_from_calendar("2000-01-01T00:00:00") == 1_325_376_000 * NS
    assert format_utc(1_325_376_000 * NS) == "1999-12-31T23:59:28.000000000Z"  # TAI - UTC = 32 s in 1999
    assert format_utc(1_325_376_000 * NS, digits=3, zone=False) == "1999-12-31T23:59:28.000"


@pytest.mark.kat
def test_pass_across_the_2016_leap_second():
    # The example of issue 17: starting at 2016-12-31T23:59:59.5, one second later UTC reads 23:59:60.5
    t0 = parse_utc("2016-12-31T23:59:59.5Z")
    assert [format_utc(t0 + k * NS // 2) for k in range(5)] == [
        "2016-12-31T23:59:59.500000000Z", "2016-12-31T23:59:60.000000000Z", "2016-12-31T23:59:60.500000000Z",
        "2017-01-01T00:00:00.000000000Z", "2017-01-01T00:00:00.500000000Z"]
    assert utc_fields(t0 + NS + 123) == (2016, 12, 31, 23, 59, 60, 500_000_123)


def test_every_leap_second_against_astropy(Time):
    # Just before, at the start of, inside, at the last ns of, and just after each inserted second.
    for day, _ in _leap_days():
        for text in (f"{day}T23:59:59.500000000", f"{day}T23:59:60.000000000", f"{day}T23:59:60.250000000",
                     f"{day}T23:59:60.999999999", f"{day + dt.timedelta(days=1)}T00:00:00.000000000"):
            tai = parse_utc(text + "Z")
            assert abs(tai - _astropy_tai_ns(Time(text, scale="utc"), Time)) <= 1  # astropy (PyPI)
            assert format_utc(tai) == text + "Z"
            assert _astropy_utc_text(tai, Time) == text + "Z"  # astropy prints 23:59:60 too
        # POSIX time cannot name 23:59:60: held at the last ns of the day, never decreasing
        inside = parse_utc(f"{day}T23:59:60.25Z")
        assert format_posix_ns(posix_ns_from_tai(inside)) == f"{day}T23:59:59.999999999Z"


def test_random_instants_against_astropy(rng, Time):
    lo, hi = parse_utc("1972-01-01T00:00:00Z"), parse_utc("2027-06-01T00:00:00Z")  # within astropy's table
    for tai in rng.integers(lo, hi, 300, dtype=np.int64):
        tai = int(tai)
        text = format_utc(tai)
        assert text == _astropy_utc_text(tai, Time)  # astropy (PyPI) tai -> utc text
        assert parse_utc(text) == tai


def test_1972_boundary(Time):
    first = parse_utc("1972-01-01T00:00:00Z")
    assert abs(first - _astropy_tai_ns(Time("1972-01-01T00:00:00", scale="utc"), Time)) <= 1  # astropy (PyPI)
    assert format_utc(first) == "1972-01-01T00:00:00.000000000Z"
    for text in ("1971-12-31T23:59:59.999999999Z", "1965-06-01T00:00:00Z", "1958-01-01T00:00:00Z"):
        with pytest.raises(ValueError, match="before 1972-01-01T00:00:00Z: UTC had no whole-second offset"):
            parse_utc(text)
    with pytest.raises(ValueError, match="before 1972-01-01T00:00:00Z"):
        format_utc(first - 1)
    with pytest.raises(ValueError, match="before 1972-01-01T00:00:00Z"):
        tai_from_posix_ns(0)
    with pytest.raises(ValueError, match="before 1972-01-01T00:00:00Z"):
        tai_from_utc_fields(1971, 12, 31, 23, 59, 59)


def test_2017_boundary(Time):
    for text in ("2016-12-31T23:59:59.999999999", "2016-12-31T23:59:60.000000001", "2017-01-01T00:00:00.000000001"):
        assert abs(parse_utc(text + "Z") - _astropy_tai_ns(Time(text, scale="utc"), Time)) <= 1  # astropy (PyPI)
    assert parse_utc("2017-01-01T00:00:00Z") - parse_utc("2016-12-31T23:59:59Z") == 2 * NS


# ---- parsing ----------------------------------------------------------------------------------

def test_parse_second_60_only_in_a_leap_second():
    with pytest.raises(ValueError, match="does not end with a leap second"):
        parse_utc("2016-07-18T23:59:60Z")
    with pytest.raises(ValueError, match="second 60 exists only at 23:59:60"):
        parse_utc("2016-12-31T23:58:60Z")
    with pytest.raises(ValueError, match="does not end with a leap second"):
        tai_from_utc_fields(2016, 7, 18, 23, 59, 60)
    # ISO 8601 zone offsets: the leap second at 00:59:60+01:00 is 23:59:60Z of the UTC day before
    assert parse_utc("2017-01-01T00:59:60.5+01:00") == parse_utc("2016-12-31T23:59:60.5Z")
    assert parse_utc("2016-12-31T18:59:60.5-05:00") == parse_utc("2016-12-31T23:59:60.5Z")
    assert parse_utc("2026-03-14T10:30:00+01:00") == parse_utc("2026-03-14T09:30:00Z")
    assert parse_utc("2026-03-14T09:30:00.1234567891234Z") == parse_utc("2026-03-14T09:30:00.123456789Z")
    for bad in ("2026-02-30T00:00:00Z", "2026-03-14T25:00:00Z", "nonsense", "2026-03-14T09:30:00",
                "2026-03-14T09:30:00+25:00", "9999-12-31T23:30:00-01:00"):
        with pytest.raises(ValueError):
            parse_utc(bad)
    assert parse_utc("2026-03-14T09:30:00", assume_utc=True) == parse_utc("2026-03-14T09:30:00Z")
    with pytest.raises(TypeError, match="Argument 'when'"):
        parse_utc(5, name="when")


def test_format_arguments():
    t = parse_utc("2026-03-14T09:30:00.123456789Z")
    assert format_utc(np.int64(t)) == "2026-03-14T09:30:00.123456789Z"
    assert format_utc(t, digits=0) == "2026-03-14T09:30:00Z"
    with pytest.raises(ValueError, match="Argument 'digits' must be 0..9"):
        format_utc(t, digits=10)
    with pytest.raises(TypeError, match="Argument 'tai_ns'"):
        format_utc(1.5)
    with pytest.raises(ValueError, match="outside the years 1..9999"):
        format_utc(10_000 * 366 * NS_PER_DAY)
    assert format_utc(parse_utc("9999-12-31T23:59:59.999999999Z")) == "9999-12-31T23:59:59.999999999Z"


@given(st.integers(parse_utc("1972-01-01T00:00:00Z"), parse_utc("2200-01-01T00:00:00Z")))
@settings(max_examples=400, deadline=None)
def test_format_parse_round_trip(tai):
    assert parse_utc(format_utc(tai)) == tai


@given(st.text(max_size=40))
@settings(max_examples=400, deadline=None)
def test_parse_fuzz_text(text):
    # Any text: a TAI instant or a ValueError, nothing else (STYLE.md 20).
    try:
        tai = parse_utc(text)
    except ValueError:
        return
    assert isinstance(tai, int) and format_utc(tai)


@given(st.text(alphabet="0123456789-T:.Z+ ", max_size=32))
@settings(max_examples=400, deadline=None)
def test_parse_fuzz_iso_like(text):
    try:
        tai = parse_utc(text)
    except ValueError:
        return
    assert parse_utc(format_utc(tai)) == tai


# ---- other scales, Julian dates, expiry ---------------------------------------------------------

def test_uniform_scales_against_astropy(Time):
    for text in ("2026-03-14T09:30:00.123456", "2016-12-31T23:59:59.000000", "1999-06-01T00:00:00.000000"):
        utc = Time(text, scale="utc", precision=9)
        assert tai_from_scale(text, "UTC") == parse_utc(text + "Z")
        assert abs(tai_from_scale(utc.tai.isot, "TAI") - _astropy_tai_ns(utc, Time)) <= 1000  # astropy (PyPI)
        assert abs(tai_from_scale(utc.tt.isot, "TT") - _astropy_tai_ns(utc, Time)) <= 1000
        assert abs(tai_from_scale(utc.tdb.isot, "TDB") - _astropy_tai_ns(utc, Time)) < 50_000  # 2 terms
    # GPS time = TAI - 19 s (GPS epoch 1980-01-06 00:00:00 UTC, when TAI - UTC was 19 s; IERS table)
    assert tai_from_scale("1980-01-06T00:00:00", "GPS") == parse_utc("1980-01-06T00:00:00Z")
    with pytest.raises(ValueError, match="Argument 'scale'"):
        tai_from_scale("2026-01-01T00:00:00", "UT1")


def test_julian_date_against_astropy(Time):
    t = parse_utc("2026-03-14T09:30:00.25Z")
    whole, frac = utc_julian_date(t)
    ref = Time("2026-03-14T09:30:00.25", scale="utc")  # astropy (PyPI) jd1 + jd2 of UTC
    assert abs((whole - ref.jd1) + (frac - ref.jd2)) * 86400 < 1e-6


def test_expiry_warns_once(caplog):
    tab = LeapSecondTable((63072000, 78796800), (10, 11), expires_utc_s=1_000_000_000, source="test-table")
    before = tab.utc_to_tai(999_999_999 * NS)
    after = tab.utc_to_tai(1_000_000_001 * NS)
    with caplog.at_level(logging.WARNING, logger="pipeline.timescales"):
        assert not check_expiry(before, table=tab)
        assert check_expiry(after, table=tab) and check_expiry(after + NS, table=tab)
    msgs = [r.getMessage() for r in caplog.records if "test-table" in r.getMessage()]
    assert len(msgs) == 1 and "may be off by one second" in msgs[0] and "2001-09-09T01:46:40Z" in msgs[0]
    # the bundled table's expiry is a real instant after its last leap second
    assert leap_seconds().expires_tai_ns > parse_utc("2017-01-01T00:00:00Z")


def test_table_refuses_non_midnight_entries():
    with pytest.raises(ValueError, match="UTC midnights"):
        LeapSecondTable((63072001,), (10,))


# ---- time-code epochs --------------------------------------------------------------------------

def test_cuc_and_cds_epochs_against_astropy(Time):
    # CUC level 1 counts TAI seconds from 1958-01-01 TAI (CCSDS 301.0-B, from memory, not confirmed); CDS
    # counts UTC days from 1958-01-01 and ms of the UTC day.  astropy (PyPI) gives the truth of both.
    utc = Time("2016-12-31T23:59:60.5", scale="utc")
    tai = _astropy_tai_ns(utc, Time)
    coarse, frac = divmod(tai, NS)
    cuc = coarse.to_bytes(4, "big") + (frac * 65536 // NS).to_bytes(2, "big")
    assert decode_cuc(cuc, pfield=0x1E)[0] == tai  # 0.5 s is exact in 2 fine octets
    days = (dt.date(2016, 12, 31) - dt.date(1958, 1, 1)).days
    cds = days.to_bytes(2, "big") + (86_400_500).to_bytes(4, "big")  # ms of day past 86 400 000: 23:59:60.5
    assert decode_cds(cds, pfield=0x40)[0] == tai
    assert encode_cds(tai, pfield=0x40) == cds
    # agency (level-2) epochs are calendar instants on the TAI scale
    assert tai_from_calendar("2000-01-01T12:00:00Z") == _astropy_tai_ns(Time("2000-01-01T12:00:00", scale="tai"),
                                                                         Time)
    # a CDS day before 1972 has no UTC day length: bad data, a ValueError
    with pytest.raises(ValueError, match="before 1972"):
        decode_cds(bytes(6), pfield=0x40)


@pytest.mark.kat
def test_onboard_time_reading():
    # 3 fine octets: the count is coarse + fine / 2^24 s (CCSDS 301.0-B sec. 3.2, layout from memory)
    obt = decode_obt_ns(bytes.fromhex("2F0001E240FFFFFF"), code="cuc")
    assert obt.octets == 8 and obt.ns == 123456 * NS + round((2**24 - 1) * NS / 2**24)
    assert obt.resolution_ns == pytest.approx(59.6046447754)
    cds = decode_obt_ns(bytes.fromhex("0002" "00000064" "03E7"), code="cds", pfield=0x41)
    assert cds.ns == 2 * NS_PER_DAY + 100_000_000 + 999_000 and cds.resolution_ns == 1000.0
    with pytest.raises(ValueError, match="Argument 'code'"):
        decode_obt_ns(b"", code="ccs")


@given(st.binary(max_size=16), st.sampled_from(["cuc", "cds"]), st.sampled_from([None, 0x1E, 0x2F, 0x40, 0x41]))
@settings(max_examples=400, deadline=None)
def test_onboard_time_fuzz(data, code, pfield):
    try:
        obt = decode_obt_ns(data, code=code, pfield=pfield)
    except ValueError:
        return
    assert obt.ns >= 0 and 1 <= obt.octets <= len(data)


# ---- the simulator's separate time helpers -------------------------------------------------------

def test_simulator_time_against_astropy(rng, Time):
    # pipeline/sim/_time.py stays independent of the receiver's time code; check it against astropy as well.
    from pipeline.sim import cuc_4_2, format_utc_ns, parse_utc_ns, tai_seconds_since_1958

    epoch = Time("1958-01-01T00:00:00", scale="tai")
    for posix_s in rng.integers(63_072_000, 1_800_000_000, 100):
        text = format_utc_ns(int(posix_s) * NS + 250_000_000)
        t = Time(text[:-1], scale="utc")
        secs, ns = tai_seconds_since_1958(parse_utc_ns(text))
        want = (t.tai - epoch).to_value("s")  # astropy (PyPI)
        assert secs + ns * 1e-9 == pytest.approx(want, abs=1e-6)
        assert int.from_bytes(cuc_4_2(parse_utc_ns(text))[:4], "big") == secs
    with pytest.raises(ValueError, match="1972"):
        tai_seconds_since_1958(parse_utc_ns("1971-06-01T00:00:00Z"))
