"""Doppler observables from the carrier track: rows for doppler.csv and the range-rate conversion (issue 8)."""

from __future__ import annotations

import csv
import math

import pytest

from pipeline.demod import TrackPoint
from pipeline.demod.residual import (
    DOPPLER_COLUMNS,
    SPEED_OF_LIGHT_M_PER_S,
    ResidualTrackPoint,
    doppler_from_range_rate,
    doppler_rows,
    range_rate_from_doppler,
    write_doppler_csv,
)


@pytest.mark.kat
def test_range_rate_conversion_known_values():
    # 0.1 mm/s at 8.4 GHz is about 2.8 mHz of one-way Doppler (common practice, no published source)
    fd = doppler_from_range_rate(1e-4, 8.4e9)
    assert fd == pytest.approx(-2.8e-3, rel=0.01)
    assert fd == pytest.approx(-8.4e9 * 1e-4 / 299_792_458.0, rel=1e-15)
    assert range_rate_from_doppler(-2.8e-3, 8.4e9) == pytest.approx(1e-4, rel=0.01)
    # 8.42 GHz at +10 km/s receding: -280 861 Hz (REFERENCES.md sec. 9, f_d = -f v / c, computed there)
    assert doppler_from_range_rate(10_000.0, 8.42e9) == pytest.approx(-280_861.0, abs=1.0)
    assert SPEED_OF_LIGHT_M_PER_S == 299_792_458.0  # exact by the SI definition of the metre
    for v in (-3000.0, 0.0, 7.5, 12_345.6):
        assert range_rate_from_doppler(doppler_from_range_rate(v, 2.2945e9), 2.2945e9) == pytest.approx(v, abs=1e-9)
    with pytest.raises(ValueError, match="Argument 'downlink_frequency_hz' must be a positive finite number"):
        range_rate_from_doppler(1.0, 0.0)


def _utc(position):
    # 1 Msample/s recording starting 2026-03-14T09:30:00Z (1773480600 s since 1970)
    return 1_773_480_600_000_000_000 + int(round(position * 1000))


@pytest.mark.kat
def test_doppler_rows(tmp_path):
    tps = [
        ResidualTrackPoint(position=500_000.0, carrier_offset_hz=-2.8e-3, esn0_db=5.0, carrier_locked=True,
                           symbol_locked=True, carrier_std_hz=1.4e-3, modulation_index_rad=1.1),
        ResidualTrackPoint(position=1_500_000.5, carrier_offset_hz=1500.25, esn0_db=5.0, carrier_locked=False,
                           symbol_locked=False, carrier_std_hz=float("nan")),
        TrackPoint(2_000_000.0, 12.0, 7.0, True, True),  # the suppressed-carrier demodulator's: no std
    ]
    rows = doppler_rows(tps, _utc, downlink_frequency_hz=8.4e9)
    assert [list(r) for r in rows] == [list(DOPPLER_COLUMNS)] * 3
    r0, r1, r2 = rows
    assert r0["utc"] == "2026-03-14T09:30:00.500000000Z"
    assert r1["utc"] == "2026-03-14T09:30:01.500000500Z"
    assert r0["carrier_offset_hz"] == -0.0028 and r0["carrier_std_hz"] == 0.0014 and r0["locked"] is True
    assert r0["range_rate_m_per_s"] == pytest.approx(1e-4, rel=0.01)  # common practice, no published source
    assert r0["range_rate_std_m_per_s"] == pytest.approx(299_792_458.0 * 1.4e-3 / 8.4e9, abs=1e-6)
    assert r1["carrier_std_hz"] is None and r1["locked"] is False
    assert r1["range_rate_m_per_s"] == pytest.approx(-299_792_458.0 * 1500.25 / 8.4e9, abs=1e-6)
    assert r2["carrier_std_hz"] is None and r2["range_rate_std_m_per_s"] is None
    # without the downlink frequency there is no range rate; a recording object with utc_ns works too
    bare = doppler_rows(tps, type("Rec", (), {"utc_ns": staticmethod(_utc)})())
    assert all(r["range_rate_m_per_s"] is None for r in bare)
    # a tuning offset (recording centre minus nominal downlink) adds to the measured offset
    tuned = doppler_rows(tps[:1], _utc, 8.4e9, tuning_offset_hz=2.8e-3)
    assert tuned[0]["range_rate_m_per_s"] == pytest.approx(0.0, abs=1e-9)
    path = write_doppler_csv(tmp_path / "doppler.csv", rows)
    with open(path, newline="") as fh:
        table = list(csv.reader(fh))
    assert table[0] == list(DOPPLER_COLUMNS)
    assert table[1][0] == r0["utc"] and float(table[1][2]) == -0.0028 and table[1][4] == "1"
    assert table[2][3] == "" and table[2][4] == "0"
    with pytest.raises(TypeError, match="Argument 'utc_ns' must be callable"):
        doppler_rows(tps, 5)
    with pytest.raises(ValueError, match="Argument 'downlink_frequency_hz'"):
        doppler_rows(tps, _utc, downlink_frequency_hz=-1.0)
    assert math.isfinite(rows[0]["sample_position"])


def test_doppler_rows_through_a_leap_second_read_23_59_60():
    # The decode chain hands doppler_rows its ErtClock, whose received_tai_ns gives TAI: rows inside the leap second
    # at the end of 2016 read 23:59:60.x, in order, as astropy formats the same TAI instants (an independent
    # implementation of UTC with its own leap-second table; IERS Bulletin C 52 announced that leap second).  The
    # POSIX count has no 61st second, so formatting it gave 23:59:59.999999999 for every row in there.
    from astropy import units
    from astropy.time import Time

    import pipeline
    from pipeline.chain import ErtClock
    from pipeline.timescales import parse_utc

    t0 = parse_utc("2016-12-31T23:59:58Z")

    class Start:  # a recording at 1 Msample/s starting at t0 (TAI ns since 1958)
        def tai_ns(self, position):
            return t0 + round(position * 1000)

    clock = ErtClock(Start(), pipeline.load_profile(pipeline.demo_profile_path()), 1e6)
    positions = [250_000.0 * k for k in range(17)]  # 0 .. 4 s, every 0.25 s
    tps = [TrackPoint(p, 100.0, 7.0, True, True) for p in positions]
    got = [r["utc"] for r in doppler_rows(tps, clock, 2.2455e9)]
    assert got[8:12] == ["2016-12-31T23:59:60.000000000Z", "2016-12-31T23:59:60.250000000Z",
                         "2016-12-31T23:59:60.500000000Z", "2016-12-31T23:59:60.750000000Z"]
    assert len(set(got)) == len(got) and got[12] == "2017-01-01T00:00:00.000000000Z"
    tai_1958 = Time("1958-01-01T00:00:00", scale="tai")
    for p, text in zip(positions, got):
        ref = (tai_1958 + (clock.received_tai_ns(p) / 1e9) * units.s).utc
        assert ref.isot[:23] == text[:23], (ref.isot, text)
