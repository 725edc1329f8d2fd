"""Recording time on the uniform scale: a SigMF pass across the 2016-12-31 leap second against astropy, the
time source, refused start times, channel-symbol files."""

from __future__ import annotations

import json
import logging

import numpy as np
import pytest

from pipeline.errors import RecordingError
from pipeline.recording import open_recording, open_symbols
from pipeline.timescales import format_utc, parse_utc

FS = 1000.0  # samples per second: a short recording spans the leap second


@pytest.fixture(scope="module")
def Time():
    from astropy.utils import iers

    iers.conf.auto_download = False
    from astropy.time import Time

    return Time


def _write_sigmf(base, n: int, captures: list[dict], rate: float = FS):
    """A SigMF pair written by hand (SigMF specification: global core:datatype/core:sample_rate/core:version,
    captures with core:sample_start and core:datetime); nothing of pipeline/ makes it."""
    np.zeros(2 * n, dtype="<f4").tofile(str(base) + ".sigmf-data")
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": rate, "core:version": "1.2.0"},
            "captures": captures, "annotations": []}
    with open(str(base) + ".sigmf-meta", "w", encoding="utf-8") as f:
        json.dump(meta, f)
    return str(base) + ".sigmf-meta"


def _astropy_truth(Time, start: str, seconds: float) -> tuple[int, str]:
    """(TAI ns since 1958, UTC text with 9 decimals) of ``start`` (UTC) plus ``seconds`` of elapsed SI time."""
    from astropy.time import TimeDelta

    t = Time(start, scale="utc", precision=9) + TimeDelta(seconds, format="sec")
    d = t.tai - Time("1958-01-01T00:00:00", scale="tai")
    tai = int(round(d.jd1 * 86400e9)) + int(round(d.jd2 * 86400e9))
    u = t.utc
    u.precision = 9
    return tai, u.isot + "Z"


def test_sigmf_pass_across_the_2016_leap_second(tmp_path, Time):
    meta = _write_sigmf(tmp_path / "leap", 3000, [{"core:sample_start": 0,
                                                   "core:datetime": "2016-12-31T23:59:59.5Z"}])
    rec = open_recording(meta)
    assert rec.time_known and rec.time_source == "SigMF core:datetime of capture 0"
    for pos in (0, 250.5, 499.999, 500, 1000, 1499.75, 1500, 2999.25):
        want_tai, want_text = _astropy_truth(Time, "2016-12-31T23:59:59.5", pos / FS)  # astropy (PyPI)
        assert abs(rec.tai_ns(pos) - want_tai) <= 1, pos
        assert format_utc(rec.tai_ns(pos)) == want_text, pos
    # one second after the start, UTC reads 23:59:60.5 (issue 17); two seconds after, 00:00:00.5
    assert format_utc(rec.tai_ns(1000)) == "2016-12-31T23:59:60.500000000Z"
    assert format_utc(rec.tai_ns(2000)) == "2017-01-01T00:00:00.500000000Z"


def test_posix_view_of_a_leap_second_recording(tmp_path):
    meta = _write_sigmf(tmp_path / "leap", 3000, [{"core:sample_start": 0,
                                                   "core:datetime": "2016-12-31T23:59:59.5Z"}])
    rec = open_recording(meta)
    posix_2017 = 1_483_228_800 * 10**9  # POSIX time of 2017-01-01T00:00:00Z: common practice, no published source
    assert rec.utc_ns(2000) == posix_2017 + 500_000_000  # today's chain read 00:00:01.5 here
    assert rec.utc_ns(1000) == posix_2017 - 1  # 23:59:60.5 held at 23:59:59.999999999
    assert rec.start_ns == posix_2017 - 500_000_000


def test_capture_segments_carry_time_across_the_leap_second(tmp_path, Time):
    meta = _write_sigmf(tmp_path / "caps", 3000, [
        {"core:sample_start": 0, "core:datetime": "2016-12-31T23:59:59.25Z"},
        {"core:sample_start": 1500, "core:datetime": "2016-12-31T23:59:60.75Z"},
        {"core:sample_start": 2500}])
    rec = open_recording(meta)
    assert rec.time_source == "SigMF core:datetime of captures 0, 1"
    want_tai, want_text = _astropy_truth(Time, "2016-12-31T23:59:60.75", 1.25)  # astropy (PyPI)
    assert rec.tai_ns(2750) == want_tai and format_utc(rec.tai_ns(2750)) == want_text == \
        "2017-01-01T00:00:01.000000000Z"
    assert not rec.captures[2].time_given and rec.captures[2].tai_ns == parse_utc("2017-01-01T00:00:00.75Z")


def test_start_argument_wins_with_a_warning(tmp_path, caplog):
    meta = _write_sigmf(tmp_path / "s", 100, [{"core:sample_start": 0, "core:datetime": "2026-03-14T09:30:00Z"}])
    with caplog.at_level(logging.WARNING, logger="pipeline.recording"):
        rec = open_recording(meta, start="2026-03-14T09:31:00.5Z")
    assert rec.time_source == "--start"
    assert format_utc(rec.tai_ns(0)) == "2026-03-14T09:31:00.500000000Z"
    warn = [r.getMessage() for r in caplog.records if r.name == "pipeline.recording"]
    assert len(warn) == 1 and "2026-03-14T09:31:00.500000000Z" in warn[0] and "2026-03-14T09:30:00.000000000Z" \
        in warn[0]


def test_raw_recording_time(tmp_path):
    p = tmp_path / "cap.cf32"
    np.zeros(200, dtype="<f4").tofile(p)
    rec = open_recording(p, datatype="cf32", sample_rate_hz=FS, start="2016-12-31T23:59:60.9Z")
    assert rec.time_source == "--start"
    assert format_utc(rec.tai_ns(50)) == "2016-12-31T23:59:60.950000000Z"
    assert format_utc(rec.tai_ns(100)) == "2017-01-01T00:00:00.000000000Z"
    bare = open_recording(p, datatype="cf32", sample_rate_hz=FS)
    assert not bare.time_known and bare.time_source is None
    with pytest.raises(RecordingError, match="no start time; give one"):
        bare.tai_ns(0)
    assert bare.utc_ns(1000) == 1_000_000_000  # the chain's view: counts from 1970 until --no-time is wired


@pytest.mark.parametrize("start", ["1971-12-31T23:59:59Z", "1965-01-01T00:00:00Z", 0])
def test_start_before_1972_is_one_recording_error(tmp_path, start):
    p = tmp_path / "cap.cf32"
    np.zeros(20, dtype="<f4").tofile(p)
    with pytest.raises(RecordingError, match="before 1972-01-01T00:00:00Z"):
        open_recording(p, datatype="cf32", sample_rate_hz=FS, start=start)
    meta = _write_sigmf(tmp_path / "old", 10, [{"core:sample_start": 0, "core:datetime": "1969-07-20T20:17:40Z"}])
    with pytest.raises(RecordingError, match="capture 0 core:datetime: .*before 1972"):
        open_recording(meta)


def test_start_past_9999_is_one_recording_error(tmp_path):
    meta = _write_sigmf(tmp_path / "far", 10, [{"core:sample_start": 0, "core:datetime": "10000-01-01T00:00:00Z"}])
    with pytest.raises(RecordingError, match="core:datetime"):
        open_recording(meta)
    # the last sample past 9999-12-31T23:59:59.999999999
    meta = _write_sigmf(tmp_path / "edge", 3000, [{"core:sample_start": 0, "core:datetime": "9999-12-31T23:59:59Z"}])
    with pytest.raises(RecordingError, match="runs past the year 9999"):
        open_recording(meta)
    p = tmp_path / "cap.cf32"
    np.zeros(20, dtype="<f4").tofile(p)
    with pytest.raises(RecordingError, match="start time"):
        open_recording(p, datatype="cf32", sample_rate_hz=FS, start=10**30)


def test_channel_symbol_file_time(tmp_path, Time):
    p = tmp_path / "ch.bits"
    p.write_bytes(bytes(250))  # 2000 channel symbols
    f = open_symbols(p, "bits", start="2016-12-31T23:59:59.5Z", symbol_rate_hz=1000.0)
    assert f.time_known and f.time_source == "--start"
    for k in (0, 999, 1000, 1999):
        want_tai, want_text = _astropy_truth(Time, "2016-12-31T23:59:59.5", k / 1000.0)  # astropy (PyPI)
        assert abs(f.tai_ns(k) - want_tai) <= 1 and format_utc(f.tai_ns(k)) == want_text
    g = open_symbols(p, "bits")
    assert not g.time_known and g.time_source is None
    with pytest.raises(RecordingError, match="no start time"):
        g.tai_ns(0)
    with pytest.raises(RecordingError, match="before 1972"):
        open_symbols(p, "bits", start="1970-01-01T00:00:00Z", symbol_rate_hz=1000.0)
    with pytest.raises(ValueError, match="Argument 'symbol_rate_hz'"):
        open_symbols(p, "bits", start="2026-01-01T00:00:00Z", symbol_rate_hz=0.0)


def test_elapsed_ns_integer_arithmetic_matches_python_fractions():
    """elapsed_ns (integer divmod, half to even) against the obvious reference: Python's own exact
    ``round(Fraction)`` (Python standard library, fractions.Fraction.__round__: round half to even)."""
    import random
    from fractions import Fraction

    from pipeline.recording._time import elapsed_ns, position_fraction, position_ratio

    rng = random.Random(19)
    rates = [Fraction(5e6), Fraction(1e6), Fraction(4), Fraction(7, 3), Fraction(2.048e6), Fraction(1234567.891), 1000]
    cases = [(rng.uniform(-1e6, 1e9), 0), (rng.randint(-10**6, 10**10) * 0.5 ** rng.randint(0, 9), 5),
             (rng.randint(-10**6, 10**10), 1000)]
    cases += [(rng.uniform(0, 3e7), rng.choice((0, 7, -3))) for _ in range(3000)]
    cases += [(p, 0) for p in (0.125, 0.375, -0.125, -0.375, 1.5, 2.5, -2.5, np.float64(3.5), np.int64(9))]
    for p, anchor in cases:
        for rate in rates:
            want = round((Fraction(float(p)) - anchor) * 10**9 / Fraction(rate))
            assert elapsed_ns(p, anchor, rate) == want, (p, anchor, rate)
    # exact ties at 1e9 .. 8e9 samples/s land on the even ns either way
    for p in (0.5, 1.5, 2.5, -0.5, -1.5):
        for rate in (Fraction(10**9), Fraction(2 * 10**9), Fraction(4 * 10**9)):
            assert elapsed_ns(p, 0, rate) == round(Fraction(p) * 10**9 / rate)
    assert position_ratio(2.75) == (11, 4) and position_fraction(-0.5) == Fraction(-1, 2)
    for bad in (float("nan"), float("inf"), "x"):
        with pytest.raises(ValueError, match="position"):
            elapsed_ns(bad, 0, Fraction(1))
    with pytest.raises(TypeError, match="position"):
        elapsed_ns(True, 0, Fraction(1))
