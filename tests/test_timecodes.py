"""Tests of time codes (pipeline.packets) and the leap-second table (pipeline.timescales): CUC, CDS, ERT text."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.packets import (
    cuc_pfield_layout,
    decode_cds,
    decode_cuc,
    decode_time_code,
    encode_cds,
    encode_cuc,
    format_ert,
)
from pipeline.timescales import (
    LeapSecondTable,
    format_utc,
    leap_seconds,
    load_leap_seconds,
    posix_ns_from_tai,
    tai_from_calendar,
    tai_from_posix_ns,
)

NS = 1_000_000_000
DAY_NS = 86_400 * NS
OFFSET_1958_NS = 4383 * DAY_NS  # 1958-01-01 -> 1970-01-01; computed in ../shared/REFERENCES.md sec. 6


@pytest.fixture(scope="module")
def astropy_time():
    """astropy's Time with downloads switched off (its leap seconds come from astropy-iers-data)."""
    from astropy.utils import iers

    iers.conf.auto_download = False
    from astropy.time import Time, TimeDelta

    return Time, TimeDelta


def _astropy_tai_ns(t, Time) -> int:
    """Integer TAI ns since 1958-01-01 TAI of an astropy Time (two-double arithmetic, ~10 ps)."""
    d = t.tai - Time("1958-01-01T00:00:00", scale="tai")
    return int(round(d.jd1 * 86400 * NS)) + int(round(d.jd2 * 86400 * NS))


# ---- ERT text -------------------------------------------------------------------------------

@pytest.mark.kat
def test_format_ert_known_values():
    assert format_ert(0) == "1970-01-01T00:00:00.000000000Z"  # the POSIX epoch
    assert format_ert(1) == "1970-01-01T00:00:00.000000001Z"
    assert format_ert(-1) == "1969-12-31T23:59:59.999999999Z"
    # 2000-01-01 is 10957 days after 1970-01-01 (computed: 30 years, 7 leap days)
    assert format_ert(10957 * DAY_NS + 12 * 3600 * NS + 5) == "2000-01-01T12:00:00.000000005Z"
    assert format_ert(np.int64(1_773_480_600_123_456_789)) == "2026-03-14T09:30:00.123456789Z"


def test_format_ert_matches_datetime(rng):
    # Python's datetime (microseconds) as the outside reference; the last three digits are ns.
    epoch = dt.datetime(1970, 1, 1)
    for ns in rng.integers(-2_000_000_000 * NS, 7_000_000_000 * NS, 2000, dtype=np.int64):
        ns = int(ns)
        ref = epoch + dt.timedelta(microseconds=ns // 1000)
        assert format_ert(ns) == ref.strftime("%Y-%m-%dT%H:%M:%S.%f") + f"{ns % 1000:03d}Z"


def test_format_ert_rejects_bad_input():
    with pytest.raises(TypeError, match="Argument 'ns'"):
        format_ert(1.5)
    with pytest.raises(TypeError, match="Argument 'ns'"):
        format_ert(True)
    with pytest.raises(ValueError, match="Argument 'ns' must be within the years 1..9999"):
        format_ert(400_000 * 365 * DAY_NS)


# ---- leap seconds ---------------------------------------------------------------------------

@pytest.mark.kat
def test_leap_table_known_values():
    tab = leap_seconds()
    # IERS Bulletin C 54: TAI - UTC = 37 s from 2017-01-01 (../shared/REFERENCES.md sec. 6)
    assert tab.tai_minus_utc(1483228800 * NS) == 37
    assert tab.tai_minus_utc(1483228800 * NS - 1) == 36
    # 10 s at 1972-01-01 (IERS leap-seconds.list, first entry)
    assert tab.tai_minus_utc_s[0] == 10 and tab.utc_start_s[0] == 63072000
    assert tab.expires_utc_s is not None and tab.expires_utc_s > 1483228800


def test_leap_table_matches_astropy():
    # astropy-iers-data (PyPI) Leap_Second.dat, via astropy.utils.iers
    from astropy.utils import iers

    iers.conf.auto_download = False
    import datetime as dt

    ref = iers.LeapSeconds.auto_open()
    # The table's columns depend on the source astropy picked (an 'mjd' column is not always there, e.g.
    # once erfa's table has been consulted); 'year', 'month' and 'tai_utc' always are.
    mjd = [(dt.date(int(y), int(m), 1) - dt.date(1858, 11, 17)).days for y, m in zip(ref["year"], ref["month"])]
    theirs = [(d, int(v)) for d, v in zip(mjd, ref["tai_utc"]) if d >= 41317]  # from 1972-01-01 (integer table)
    tab = leap_seconds()
    mine = [(u // 86400 + 40587, d) for u, d in zip(tab.utc_start_s, tab.tai_minus_utc_s)]  # MJD of 1970 = 40587
    assert mine == theirs


def test_load_leap_seconds_file_errors(tmp_path):
    p = tmp_path / "leap.list"
    p.write_text("#@ 4000000000\n2272060800 10 # 1 Jan 1972\n2287785600 11\n", encoding="utf-8")
    tab = load_leap_seconds(p)
    assert tab.tai_minus_utc_s == (10, 11) and tab.expires_utc_s == 4000000000 - 2208988800
    p.write_text("2272060800 ten\n", encoding="utf-8")
    with pytest.raises(ValueError, match="line 1: not integers"):
        load_leap_seconds(p)
    p.write_text("2287785600 11\n2272060800 10\n", encoding="utf-8")
    with pytest.raises(ValueError, match="strictly ascending"):
        load_leap_seconds(p)
    p.write_text("# nothing\n", encoding="utf-8")
    with pytest.raises(ValueError, match="no leap-second entries"):
        load_leap_seconds(p)


def test_utc_tai_against_astropy_random(rng, astropy_time):
    Time, _ = astropy_time
    lo, hi = 63072000 * NS, 1_830_000_000 * NS  # 1972 .. 2027
    for ns in rng.integers(lo, hi, 300, dtype=np.int64):
        ns = int(ns) // 1000 * 1000  # whole microseconds, so astropy's text is exact
        t = Time(format_ert(ns)[:-4], scale="utc", format="isot")
        ref = _astropy_tai_ns(t, Time)  # astropy (PyPI) Time, scale conversion utc -> tai
        assert abs(tai_from_posix_ns(ns) - ref) < 100
        assert posix_ns_from_tai(ref) == pytest.approx(ns, abs=100)


def test_leap_second_instants_against_astropy(astropy_time):
    # Every positive leap second in the table: just before, inside (23:59:60) and after.
    Time, _ = astropy_time
    tab = leap_seconds()
    for u in tab.utc_start_s[1:]:
        day = dt.date(1970, 1, 1) + dt.timedelta(days=u // 86400 - 1)
        for text, sec in ((f"{day}T23:59:59.500000", 86399.5), (f"{day}T23:59:60.250000", 86400.25)):
            ref = _astropy_tai_ns(Time(text, scale="utc"), Time)  # astropy (PyPI)
            ms = int(sec * 1000)
            cds = (((u // 86400 - 1) + 4383).to_bytes(2, "big") + ms.to_bytes(4, "big"))
            tai, n = decode_cds(cds, pfield=0x40)
            assert n == 6 and abs(tai - ref) < 100
            assert format_utc(tai) == text + "000Z"
            # POSIX time cannot name 23:59:60: held at the last ns of the day
            if sec > 86400:
                assert format_ert(posix_ns_from_tai(tai)) == f"{day}T23:59:59.999999999Z"
        after = Time(f"{day + dt.timedelta(days=1)}T00:00:00.500000", scale="utc")
        assert abs(tai_from_posix_ns(u * NS + NS // 2) - _astropy_tai_ns(after, Time)) < 100


def test_tai_to_utc_never_decreases():
    tab = leap_seconds()
    start = tai_from_posix_ns(1483228800 * NS) - 3 * NS
    steps = [tab.tai_to_utc(start + k * NS // 4) for k in range(20)]
    assert steps == sorted(steps)


def test_utc_day_rejects_time_beyond_day():
    tab = leap_seconds()
    with pytest.raises(ValueError, match="outside UTC day"):
        tab.utc_day_to_tai(17000, 86400 * NS)  # 2016-07-18: no leap second that day
    tab.utc_day_to_tai(17166, 86400 * NS)  # 2016-12-31 has 23:59:60


def test_table_validation():
    with pytest.raises(ValueError, match="non-empty"):
        LeapSecondTable((), ())


# ---- CUC ------------------------------------------------------------------------------------

@pytest.mark.kat
def test_cuc_worked_example():
    # ../shared/REFERENCES.md sec. 6, computed there: 2000-01-01T00:00:00 TAI = 1 325 376 000 s = 0x4EFFA200
    tai = 1_325_376_000 * NS
    assert encode_cuc(tai, pfield=0x1E) == bytes.fromhex("4EFFA2000000")
    assert encode_cuc(tai, pfield=0x1E, explicit=True) == bytes.fromhex("1E4EFFA2000000")
    assert decode_cuc(bytes.fromhex("1E4EFFA2000000")) == (tai, 7)
    assert decode_cuc(bytes.fromhex("4EFFA2008000"), pfield=0x1E) == (tai + NS // 2, 6)
    # that instant is 1999-12-31T23:59:28 UTC (TAI - UTC = 32 s in 1999, IERS leap-seconds.list)
    assert format_ert(posix_ns_from_tai(tai)) == "1999-12-31T23:59:28.000000000Z"


@pytest.mark.kat
def test_cuc_pfield_layouts():
    # ../shared/REFERENCES.md sec. 6 (computed there from the from-memory layout)
    assert cuc_pfield_layout(b"\x1e") == (1, 4, 2, 1)
    assert cuc_pfield_layout(b"\x2e") == (2, 4, 2, 1)
    assert cuc_pfield_layout(b"\x1f") == (1, 4, 3, 1)
    assert cuc_pfield_layout(b"\x9e\x2c") == (1, 5, 5, 2)  # +1 coarse, +3 fine
    with pytest.raises(ValueError, match="time code ID 100"):
        cuc_pfield_layout(b"\x4e")
    with pytest.raises(ValueError, match="third octet"):
        cuc_pfield_layout(b"\x9e\x80")


def test_cuc_against_astropy_random(rng, astropy_time):
    # CUC counts TAI seconds from 1958-01-01 TAI; the UTC we report must equal astropy's.
    Time, TimeDelta = astropy_time
    epoch = Time("1958-01-01T00:00:00", scale="tai")
    for coarse_s, fine in zip(rng.integers(442_000_000, 2_200_000_000, 200), rng.integers(0, 65536, 200)):
        cuc = int(coarse_s).to_bytes(4, "big") + int(fine).to_bytes(2, "big")  # P-field 0x1E T-field
        tai, _ = decode_cuc(cuc, pfield=0x1E)
        t = epoch + TimeDelta(int(coarse_s), int(fine) / 65536, format="sec", scale="tai")
        u = t.utc
        u.precision = 9
        whole = dt.datetime.fromisoformat(u.isot[:19]) - dt.datetime(1970, 1, 1)
        ref_ns = (whole.days * 86400 + whole.seconds) * NS + int(u.isot[20:29])
        assert abs(posix_ns_from_tai(tai) - ref_ns) <= 2  # astropy (PyPI) tai -> utc


def test_cuc_level2_epoch():
    # Level 2 (ID 010): counted from an agency epoch on the TAI scale
    epoch = "2000-01-01T00:00:00"
    tai, _ = decode_cuc(bytes.fromhex("000000100000"), pfield=0x2E, epoch=epoch)
    assert tai == tai_from_calendar(epoch) + 16 * NS == 15340 * DAY_NS + 16 * NS  # 15340 days: REFERENCES.md sec. 6
    assert encode_cuc(tai, pfield=0x2E, epoch=epoch) == bytes.fromhex("000000100000")


@given(st.integers(0, (1 << 32) * NS - 1), st.sampled_from([0x1C, 0x1D, 0x1E, 0x1F, 0x10, 0x18, 0x9E08, 0x9E04]))
@settings(max_examples=300, deadline=None)
def test_cuc_round_trip(tai, pfield):
    _, coarse, fine, _ = cuc_pfield_layout(pfield.to_bytes(2 if pfield > 0xFF else 1, "big"))
    if tai >= (1 << (8 * coarse)) * NS:
        with pytest.raises(ValueError, match="does not fit"):
            encode_cuc(tai, pfield=pfield)
        return
    try:
        enc = encode_cuc(tai, pfield=pfield, explicit=True)
    except ValueError:  # rounding up past the last count
        assert tai + NS // (1 << (8 * fine)) >= (1 << (8 * coarse)) * NS
        return
    got, n = decode_cuc(enc)
    assert n == len(enc) == (2 if pfield > 0xFF else 1) + coarse + fine
    assert abs(got - tai) <= NS / (1 << (8 * fine)) / 2 + 1


# ---- CDS ------------------------------------------------------------------------------------

@pytest.mark.kat
def test_cds_worked_examples():
    # ../shared/REFERENCES.md sec. 6, computed there: 2000-01-01 is day 15340 = 0x3BEC
    t0 = tai_from_posix_ns(10957 * DAY_NS)
    assert encode_cds(t0, pfield=0x40) == bytes.fromhex("3BEC00000000")
    assert encode_cds(t0 + 12 * 3600 * NS, pfield=0x40) == bytes.fromhex("3BEC02932E00")
    assert decode_cds(bytes.fromhex("403BEC02932E00")) == (t0 + 12 * 3600 * NS, 7)
    # microsecond and picosecond segments
    assert decode_cds(bytes.fromhex("3BEC0000000103E7"), pfield=0x41)[0] == t0 + 1_000_000 + 999_000
    assert decode_cds(bytes.fromhex("3BEC0000000000000BB8"), pfield=0x42)[0] == t0 + 3  # 3000 ps
    assert encode_cds(t0, pfield=0x44) == bytes.fromhex("003BEC00000000")  # 24-bit day


def test_cds_against_astropy_random(rng, astropy_time):
    Time, _ = astropy_time
    for ns in rng.integers(63072000 * NS, 1_830_000_000 * NS, 200, dtype=np.int64):
        ns = int(ns) // 1000 * 1000
        t = Time(format_ert(ns)[:-4], scale="utc", format="isot")
        day, tod = divmod(ns, DAY_NS)
        us_of_ms = (tod // 1000) % 1000
        cds = (day + 4383).to_bytes(2, "big") + (tod // 1_000_000).to_bytes(4, "big") + us_of_ms.to_bytes(2, "big")
        tai, n = decode_cds(cds, pfield=0x41)
        assert n == 8 and abs(tai - _astropy_tai_ns(t, Time)) < 100  # astropy (PyPI) utc -> tai
        assert encode_cds(tai, pfield=0x41) == cds


def test_cds_short_against_spacepackets(rng):
    # spacepackets (PyPI; an independent implementation of the CCSDS time codes, CCSDS 301.0-B-4 sec. 3.3): its
    # CDS short timestamp, the P-field then a 16-bit day count from 1958-01-01 and a 32-bit ms of day, packs the
    # same 7 octets as encode_cds with the P-field 0x40 given first, and reads ours back to the same instant; this
    # confirms the P-field value 0x40 and the T-field layout that ../shared/REFERENCES.md sec. 6 has from memory.
    # (Its from_datetime takes the ms of day through floating point and can come out 1 ms low, so whole seconds
    # go through it, and any ms through its day and ms fields.)
    from spacepackets.ccsds.time import CdsShortTimestamp

    for ms in rng.integers(63072000 * 1000, 1_830_000_000 * 1000, 200, dtype=np.int64):
        utc_ns = int(ms) * 1_000_000
        when = dt.datetime.fromtimestamp(utc_ns // NS, tz=dt.timezone.utc) + dt.timedelta(
            microseconds=(utc_ns % NS) // 1000)
        ours = encode_cds(tai_from_posix_ns(utc_ns), pfield=0x40, explicit=True)
        theirs = CdsShortTimestamp.unpack(ours)
        assert theirs.as_datetime() == when
        assert CdsShortTimestamp(theirs.ccsds_days, theirs.ms_of_day).pack() == ours
        whole = when.replace(microsecond=0)
        assert CdsShortTimestamp.from_datetime(whole).pack() == encode_cds(
            tai_from_posix_ns(utc_ns // NS * NS), pfield=0x40, explicit=True)


def test_cds_agency_epoch():
    tai, _ = decode_cds(bytes.fromhex("0001" "00000000"), pfield=0x48, epoch="2017-01-01")
    assert format_utc(tai) == "2017-01-02T00:00:00.000000000Z"
    assert encode_cds(tai, pfield=0x48, epoch="2017-01-01") == bytes.fromhex("000100000000")


@given(st.integers(63072000 * NS, 0xFFFF * DAY_NS - OFFSET_1958_NS), st.sampled_from([0x40, 0x41, 0x42, 0x44, 0x45]))
@settings(max_examples=300, deadline=None)
def test_cds_round_trip(utc_ns, pfield):
    tai = tai_from_posix_ns(utc_ns)
    enc = encode_cds(tai, pfield=pfield, explicit=True)
    got, n = decode_cds(enc)
    assert n == len(enc)
    res = {0: 1_000_000, 1: 1000, 2: 1}[pfield & 3]
    assert 0 <= tai - got < res


def test_cds_bad_data_raises_value_error():
    with pytest.raises(ValueError, match="exceed 999"):
        decode_cds(bytes.fromhex("3BEC000000000400"), pfield=0x41)
    with pytest.raises(ValueError, match="time code ID"):
        decode_cds(bytes.fromhex("1E3BEC00000000"))
    with pytest.raises(ValueError, match="reserved sub-millisecond"):
        decode_cds(bytes.fromhex("433BEC00000000"))
    with pytest.raises(ValueError, match="only 3 present"):
        decode_cds(b"\x3b\xec\x00", pfield=0x40)
    with pytest.raises(ValueError, match="outside UTC day"):
        decode_cds(bytes.fromhex("3BEC05265C00"), pfield=0x40)  # ms of day 86 400 000 on 2000-01-01


def test_argument_errors():
    with pytest.raises(TypeError, match="Argument 'data' must be bytes-like"):
        decode_cuc("1E00", pfield=None)
    with pytest.raises(ValueError, match="Argument 'pfield' must be one octet for CDS"):
        decode_cds(b"\x00" * 8, pfield=0x140)
    with pytest.raises(ValueError, match="Argument 'pfield' is not a CUC P-field"):
        encode_cuc(0, pfield=0x40)
    with pytest.raises(ValueError, match="Argument 'code' must be cuc | cds"):
        decode_time_code(b"", code="ccs")
    with pytest.raises(ValueError, match="Argument 'epoch'"):
        tai_from_calendar("yesterday")
    with pytest.raises(ValueError, match="without a zone offset"):
        tai_from_calendar("2000-01-01T00:00:00+01:00")


@given(st.binary(max_size=24), st.sampled_from(["cuc", "cds"]))
@settings(max_examples=500, deadline=None)
def test_decoders_fuzz_never_crash(data, code):
    # Random bytes: a result or a ValueError (bad data), nothing else.
    try:
        tai, n = decode_time_code(data, code=code)
    except ValueError:
        return
    assert isinstance(tai, int) and 1 <= n <= len(data)
