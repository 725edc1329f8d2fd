"""Time for the simulator: UTC instants as integer nanoseconds, UTC -> TAI, CUC time codes.

The simulator keeps its own small time helpers on purpose: the truth files it writes must not share
a mistake with the decoder's time code readers (pipeline.packets), so these are written separately
and checked in the tests against astropy (PyPI).
"""

from __future__ import annotations

import re

__all__ = [
    "parse_utc_ns",
    "format_utc_ns",
    "tai_minus_utc_s",
    "tai_seconds_since_1958",
    "cuc_4_2",
    "cuc_4_2_tai",
    "tai_ns_from_utc_ns",
    "format_tai_ns_as_utc",
    "CUC_PFIELD_L1_4_2",
]

#: CUC P-field of a level-1 code (1958 TAI epoch) with 4 coarse and 2 fine octets:
#: extension 0, time code ID 001, (coarse - 1) = 11, fine = 10 -> 0 001 11 10 = 0x1E.
CUC_PFIELD_L1_4_2 = 0x1E  # CCSDS 301.0-B sec. 3.2 (layout from memory, not confirmed; REFERENCES.md sec. 6)

_NS = 1_000_000_000
_DAY_NS = 86_400 * _NS

# Seconds from 1958-01-01 to 1970-01-01 on a uniform (TAI-like) count: 4383 days.
_S_1958_TO_1970 = 4383 * 86_400

# TAI - UTC after each leap second (IERS leap-seconds.list), as (UTC date, TAI - UTC in s).
# Values from memory, not confirmed against the current list; the tests check every entry against astropy.
_LEAP_TABLE = (
    ((1972, 1, 1), 10), ((1972, 7, 1), 11), ((1973, 1, 1), 12), ((1974, 1, 1), 13), ((1975, 1, 1), 14),
    ((1976, 1, 1), 15), ((1977, 1, 1), 16), ((1978, 1, 1), 17), ((1979, 1, 1), 18), ((1980, 1, 1), 19),
    ((1981, 7, 1), 20), ((1982, 7, 1), 21), ((1983, 7, 1), 22), ((1985, 7, 1), 23), ((1988, 1, 1), 24),
    ((1990, 1, 1), 25), ((1991, 1, 1), 26), ((1992, 7, 1), 27), ((1993, 7, 1), 28), ((1994, 7, 1), 29),
    ((1996, 1, 1), 30), ((1997, 7, 1), 31), ((1999, 1, 1), 32), ((2006, 1, 1), 33), ((2009, 1, 1), 34),
    ((2012, 7, 1), 35), ((2015, 7, 1), 36), ((2017, 1, 1), 37),
)

_ISO = re.compile(
    r"^(\d{4})-(\d{2})-(\d{2})[T ](\d{2}):(\d{2}):(\d{2})(?:\.(\d{1,9}))?(Z|[+-]00:?00)?$"
)


def _days_from_civil(y: int, m: int, d: int) -> int:
    """Days since 1970-01-01 of a proleptic Gregorian date (H. Hinnant's civil-from-days inverse)."""
    y -= m <= 2
    era = (y if y >= 0 else y - 399) // 400
    yoe = y - era * 400
    doy = (153 * (m + (-3 if m > 2 else 9)) + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


def _civil_from_days(z: int) -> tuple[int, int, int]:
    z += 719468
    era = (z if z >= 0 else z - 146096) // 146097
    doe = z - era * 146097
    yoe = (doe - doe // 1460 + doe // 36524 - doe // 146096) // 365
    y = yoe + era * 400
    doy = doe - (365 * yoe + yoe // 4 - yoe // 100)
    mp = (5 * doy + 2) // 153
    d = doy - (153 * mp + 2) // 5 + 1
    m = mp + (3 if mp < 10 else -9)
    return y + (m <= 2), m, d


_LEAP_NS = tuple((_days_from_civil(*date) * _DAY_NS, dat) for date, dat in _LEAP_TABLE)


def parse_utc_ns(text: str) -> int:
    """Parse ``YYYY-MM-DDTHH:MM:SS[.fffffffff][Z]`` (UTC) into nanoseconds since 1970-01-01 UTC.

    Leap seconds are not representable (second 60 is refused), as in POSIX time.
    """
    if not isinstance(text, str):
        raise TypeError(f"Argument 'start' must be an ISO-8601 UTC string, not {text!r}.")
    m = _ISO.match(text.strip())
    if not m:
        raise ValueError(f"Argument 'start' must be an ISO-8601 UTC time like 2026-03-14T09:30:00Z, not {text!r}.")
    y, mo, d, hh, mm, ss = (int(m.group(i)) for i in range(1, 7))
    if not (1 <= mo <= 12 and 1 <= d <= 31 and hh < 24 and mm < 60 and ss < 60):
        raise ValueError(f"Argument 'start' must be a valid UTC date and time, not {text!r}.")
    if _civil_from_days(_days_from_civil(y, mo, d)) != (y, mo, d):
        raise ValueError(f"Argument 'start' must be a valid UTC date, not {text!r}.")
    frac = m.group(7) or ""
    ns_frac = int(frac.ljust(9, "0")) if frac else 0
    return _days_from_civil(y, mo, d) * _DAY_NS + ((hh * 60 + mm) * 60 + ss) * _NS + ns_frac


def format_utc_ns(ns: int) -> str:
    """``YYYY-MM-DDTHH:MM:SS.nnnnnnnnnZ`` for nanoseconds since 1970-01-01 UTC (9 decimals, Z)."""
    ns = int(ns)
    days, rem = divmod(ns, _DAY_NS)
    y, mo, d = _civil_from_days(days)
    secs, frac = divmod(rem, _NS)
    hh, secs = divmod(secs, 3600)
    mm, ss = divmod(secs, 60)
    return f"{y:04d}-{mo:02d}-{d:02d}T{hh:02d}:{mm:02d}:{ss:02d}.{frac:09d}Z"


def tai_minus_utc_s(utc_ns: int) -> int:
    """TAI - UTC in whole seconds at a UTC instant from 1972-01-01 on.

    Raises
    ------
    ValueError
        Before 1972-01-01, where TAI - UTC was not an integer number of seconds.
    """
    if utc_ns < _LEAP_NS[0][0]:
        raise ValueError(f"Argument 'utc_ns' must be on or after 1972-01-01 (integer leap seconds), not {utc_ns}.")
    dat = _LEAP_NS[0][1]
    for at_ns, value in _LEAP_NS:
        if utc_ns >= at_ns:
            dat = value
        else:
            break
    return dat


def tai_ns_from_utc_ns(utc_ns: int) -> int:
    """TAI on a uniform count of nanoseconds from 1970-01-01 (``utc_ns + (TAI - UTC)``): an instant
    ``e`` SI seconds later is ``tai_ns_from_utc_ns(u) + e * 1e9``, leap seconds in between or not."""
    return int(utc_ns) + tai_minus_utc_s(utc_ns) * _NS


def format_tai_ns_as_utc(tai_ns: int) -> str:
    """The UTC text (9 decimals, Z) of a TAI instant from :func:`tai_ns_from_utc_ns`; inside a leap second
    the seconds read 60 (``2016-12-31T23:59:60.500000000Z``).

    Notes
    -----
    The leap second inserted before a table date ``D`` (POSIX count ``d``) occupies the TAI instants
    ``[d + before, d + after)`` (``before``, ``after`` the TAI - UTC values either side, in ns): it is
    ``23:59:60`` of the day before ``D``.  Elsewhere UTC = TAI - (TAI - UTC in force).
    """
    tai_ns = int(tai_ns)
    before = _LEAP_NS[0][1]
    if tai_ns < _LEAP_NS[0][0] + before * _NS:
        raise ValueError(f"Argument 'tai_ns' must be on or after 1972-01-01 UTC, not {tai_ns}.")
    dat = before
    for at_ns, value in _LEAP_NS[1:]:
        if tai_ns >= at_ns + value * _NS:
            dat = value
            continue
        if tai_ns >= at_ns + dat * _NS:  # inside the leap second before this date: 23:59:60.x
            text = format_utc_ns(at_ns - _NS + (tai_ns - at_ns - dat * _NS))
            return text[:17] + "60" + text[19:]
        break
    return format_utc_ns(tai_ns - dat * _NS)


def cuc_4_2_tai(tai_ns: int) -> bytes:
    """:func:`cuc_4_2` of a TAI instant from :func:`tai_ns_from_utc_ns` (valid inside a leap second too)."""
    total = int(tai_ns) + _S_1958_TO_1970 * _NS
    secs, ns = divmod(total, _NS)
    fine = (ns << 16) // _NS
    return (secs & 0xFFFFFFFF).to_bytes(4, "big") + fine.to_bytes(2, "big")


def tai_seconds_since_1958(utc_ns: int) -> tuple[int, int]:
    """TAI time elapsed since 1958-01-01T00:00:00 TAI at a UTC instant, as (seconds, nanoseconds).

    Notes
    -----
    ``TAI count = (UTC - 1970-01-01) + 4383 days + (TAI - UTC)``: the POSIX count omits leap seconds,
    so adding the current TAI - UTC gives the uniform count (valid from 1972 on).
    """
    total_ns = int(utc_ns) + (_S_1958_TO_1970 + tai_minus_utc_s(utc_ns)) * _NS
    return divmod(total_ns, _NS)


def cuc_4_2(utc_ns: int) -> bytes:
    """CUC T-field (4 coarse + 2 fine octets, level 1, 1958 TAI epoch) of a UTC instant.

    Notes
    -----
    Coarse = whole TAI seconds since 1958 (big-endian, 32 bits); fine = floor(fraction x 2^16)
    (16 bits, units of 2^-16 s ~ 15.3 us).  The implicit P-field is :data:`CUC_PFIELD_L1_4_2`.

    References
    ----------
    CCSDS 301.0-B-4 sec. 3.2 (CUC); REFERENCES.md sec. 6.
    """
    return cuc_4_2_tai(tai_ns_from_utc_ns(utc_ns))
