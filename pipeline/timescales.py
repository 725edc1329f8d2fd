"""Time scales: TAI as integer nanoseconds, UTC through the IERS leap-second table.

The one home of time in the pipeline.  Every instant is carried on a **uniform scale**: an ``int``
of TAI nanoseconds since **1958-01-01T00:00:00 TAI** (the CCSDS level-1 time-code epoch,
CCSDS 301.0-B sec. 3.1, from memory, not confirmed; ../shared/REFERENCES.md sec. 6).  That scale has
no gaps and no repeats, so differences are elapsed SI seconds, and level-1 CUC codes are read on it
directly.  UTC appears only as text (:func:`format_utc`, :func:`parse_utc`) or as UTC calendar
fields, through the leap-second table shipped as ``pipeline/data/leap-seconds.list`` (IERS):

* ``UTC = TAI - (TAI - UTC)``, the offset a whole number of seconds from 1972-01-01 on;
* inside a positive leap second UTC reads ``23:59:60.x`` and is printed so;
* before 1972-01-01 UTC ran at an offset *rate* from TAI ("rubber seconds"), so no whole-second table
  describes it: such instants are refused with one error (:data:`BEFORE_1972`);
* past the table's expiry (``#@`` line) a leap second announced since may be missing:
  :func:`check_expiry` warns once (logging) that such times may be off by one second.

POSIX time (UTC nanoseconds since 1970 counting 86 400 s per day, the ``utc_ns`` of older callers)
is kept as a conversion pair (:func:`tai_from_posix_ns`, :func:`posix_ns_from_tai`); it cannot name
23:59:60.

Calendar arithmetic uses the proleptic Gregorian day numbers of Python's ``datetime.date``
(``toordinal``); everything else is integer arithmetic, exact to the nanosecond.  astropy (PyPI) is
the outside reference in the tests; it is not a runtime dependency (measured: importing and first use
of ``astropy.time`` cost 0.28 s more per process than this module, and its leap-second table wants a
network download once the bundled one nears expiry, which a station must not depend on).

References
----------
IERS ``leap-seconds.list`` (NTP seconds of each change and TAI - UTC; ``#@`` expiry), IERS
Bulletin C; ISO 8601-1:2019 sec. 5.4; CCSDS 301.0-B-4 sec. 3 (epochs; from memory, not confirmed).
"""

from __future__ import annotations

import bisect
import datetime as _dt
import logging
import operator
import re
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from pathlib import Path

__all__ = [
    "NS_PER_S",
    "NS_PER_DAY",
    "DAYS_1958_TO_1970",
    "BEFORE_1972",
    "SCALE_OFFSETS_NS",
    "TimeScale",
    "LeapSecondTable",
    "leap_seconds",
    "load_leap_seconds",
    "tai_from_utc_fields",
    "utc_fields",
    "parse_utc",
    "format_utc",
    "tai_from_posix_ns",
    "posix_ns_from_tai",
    "format_posix_ns",
    "tai_minus_utc_s",
    "tai_from_calendar",
    "tai_from_scale",
    "check_expiry",
    "utc_julian_date",
]

NS_PER_S = 1_000_000_000
NS_PER_DAY = 86_400 * NS_PER_S
#: Days from 1958-01-01 (the scale's epoch) to 1970-01-01 (the POSIX epoch): 12 years, 3 leap days.
DAYS_1958_TO_1970 = 4383
#: The one wording of the refusal of UTC instants before 1972 (``{what}`` names the value).
BEFORE_1972 = ("{what} is before 1972-01-01T00:00:00Z: UTC had no whole-second offset from TAI then, "
               "so the leap-second table cannot convert it")

#: Scales that differ from TAI by a constant (ns): TT = TAI + 32.184 s (IAU 1991 Resolution A4), GPS time =
#: TAI - 19 s (GPS epoch 1980-01-06, when TAI - UTC was 19 s; IERS leap-seconds.list).
SCALE_OFFSETS_NS = {"TAI": 0, "TT": 32_184_000_000, "GPS": -19_000_000_000}

TimeScale = str  # "UTC" | "TAI" | "TT" | "GPS" | "TDB"

_ORD_1958 = _dt.date(1958, 1, 1).toordinal()
_ORD_MAX = _dt.date(9999, 12, 31).toordinal()
_NTP_TO_POSIX_S = 2_208_988_800  # 1900-01-01 -> 1970-01-01, the offset of leap-seconds.list's NTP seconds
_TABLE_PATH = "pipeline/data/leap-seconds.list"
_log = logging.getLogger("pipeline.timescales")


def _as_int(name: str, value) -> int:
    if isinstance(value, bool):
        raise TypeError(f"Argument '{name}' must be an integer, not {value!r}.")
    try:
        return operator.index(value)
    except TypeError:
        raise TypeError(f"Argument '{name}' must be an integer, not {type(value).__name__}.") from None


def _date_of_day(day58: int) -> _dt.date:
    """Calendar date of a day number counted from 1958-01-01 (years 1..9999)."""
    ordinal = day58 + _ORD_1958
    if not 1 <= ordinal <= _ORD_MAX:
        raise ValueError(f"Day {day58} from 1958-01-01 is outside the years 1..9999.")
    return _dt.date.fromordinal(ordinal)


def _day_of_date(year: int, month: int, day: int, what: str) -> int:
    try:
        return _dt.date(year, month, day).toordinal() - _ORD_1958
    except ValueError:
        raise ValueError(f"{what} has no such calendar date.") from None


# ---- the leap-second table ------------------------------------------------------------------


@dataclass(frozen=True)
class LeapSecondTable:
    """TAI - UTC as a step function of UTC, from 1972-01-01 on.

    Attributes
    ----------
    utc_start_s : tuple of int
        POSIX seconds (UTC since 1970) at which each value takes effect, ascending, each at a UTC
        midnight.
    tai_minus_utc_s : tuple of int
        TAI - UTC in seconds from the matching instant on.
    expires_utc_s : int or None
        POSIX second after which the table may be missing a leap second (the file's ``#@`` line).
    source : str
        Where the table was read from.

    Notes
    -----
    Internally each entry is a UTC day number ``d`` (days from 1958-01-01) and its offset ``o``;
    the entry starts at TAI ``d * 86400 s + o``.  A UTC day is ``86400 + o(next) - o(this)`` seconds
    long, so a positive leap second gives it 86 401 s (23:59:60) and a negative one 86 399 s.
    Lookups are one bisection, O(log n).  Before the first entry the table has no meaning: every
    method raises ValueError with the wording of :data:`BEFORE_1972`.
    """

    utc_start_s: tuple[int, ...]
    tai_minus_utc_s: tuple[int, ...]
    expires_utc_s: int | None = None
    source: str = ""
    _days: tuple[int, ...] = field(init=False, repr=False, compare=False)
    _tai_start_ns: tuple[int, ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not self.utc_start_s or len(self.utc_start_s) != len(self.tai_minus_utc_s):
            raise ValueError("Argument 'utc_start_s' must be non-empty and as long as 'tai_minus_utc_s'.")
        if any(b <= a for a, b in zip(self.utc_start_s, self.utc_start_s[1:])):
            raise ValueError("Argument 'utc_start_s' must be strictly ascending.")
        if any(u % 86_400 for u in self.utc_start_s):
            raise ValueError("Argument 'utc_start_s' must hold UTC midnights (multiples of 86400 s).")
        days = tuple(u // 86_400 + DAYS_1958_TO_1970 for u in self.utc_start_s)
        object.__setattr__(self, "_days", days)
        object.__setattr__(self, "_tai_start_ns", tuple(d * NS_PER_DAY + o * NS_PER_S
                                                        for d, o in zip(days, self.tai_minus_utc_s)))

    # ---- derived ------------------------------------------------------------------------
    @property
    def expires_tai_ns(self) -> int | None:
        """TAI ns of the expiry instant (UTC midnight of the ``#@`` date), None when the file has none."""
        if self.expires_utc_s is None:
            return None
        day = self.expires_utc_s // 86_400 + DAYS_1958_TO_1970
        return self.tai_from_day(day, (self.expires_utc_s % 86_400) * NS_PER_S)

    # ---- UTC day <-> TAI ------------------------------------------------------------------
    def offset_on_day(self, day58: int) -> int:
        """TAI - UTC (s) at the start of UTC day ``day58`` (days from 1958-01-01)."""
        i = bisect.bisect_right(self._days, day58) - 1
        if i < 0:
            raise ValueError(BEFORE_1972.format(what=f"UTC day {_date_of_day(day58)}"))
        return self.tai_minus_utc_s[i]

    def day_length_ns(self, day58: int) -> int:
        """Length of UTC day ``day58`` in ns: 86 400 s, plus or minus a leap second at its end."""
        return NS_PER_DAY + (self.offset_on_day(day58 + 1) - self.offset_on_day(day58)) * NS_PER_S

    def tai_from_day(self, day58: int, ns_of_day: int) -> int:
        """TAI ns of the instant ``ns_of_day`` into UTC day ``day58`` (days from 1958-01-01).

        ``ns_of_day`` may reach 86 401 s (exclusive) on a day that ends with a positive leap second.

        Raises
        ------
        ValueError
            Before 1972, or ``ns_of_day`` negative or beyond the length of that UTC day.
        """
        length = self.day_length_ns(day58)
        if not 0 <= ns_of_day < length:
            raise ValueError(f"time of day {ns_of_day} ns is outside UTC day {_date_of_day(day58)} "
                             f"of {length} ns")
        return day58 * NS_PER_DAY + ns_of_day + self.offset_on_day(day58) * NS_PER_S

    def day_from_tai(self, tai_ns: int) -> tuple[int, int]:
        """UTC day (from 1958-01-01) and ns into that day of a TAI instant; 86 400 s and more in 23:59:60."""
        i = bisect.bisect_right(self._tai_start_ns, tai_ns) - 1
        if i < 0:
            raise ValueError(BEFORE_1972.format(what=f"TAI instant {tai_ns} ns from 1958"))
        utc = tai_ns - self.tai_minus_utc_s[i] * NS_PER_S  # UTC "ns from 1958" counting 86 400 s days
        if i + 1 < len(self._days) and utc >= self._days[i + 1] * NS_PER_DAY:
            # after the old day's 86 400 s, before the new offset is in force: the inserted 23:59:60
            day = self._days[i + 1] - 1
            return day, utc - day * NS_PER_DAY
        return divmod(utc, NS_PER_DAY)

    def tai_minus_utc_at(self, tai_ns: int) -> int:
        """TAI - UTC (s) in force at a TAI instant (the old value during a leap second)."""
        i = bisect.bisect_right(self._tai_start_ns, tai_ns) - 1
        if i < 0:
            raise ValueError(BEFORE_1972.format(what=f"TAI instant {tai_ns} ns from 1958"))
        return self.tai_minus_utc_s[i]

    # ---- POSIX (kept for callers of the older interface) ---------------------------------
    def tai_minus_utc(self, utc_ns: int) -> int:
        """TAI - UTC (s) at a POSIX instant (UTC ns since 1970)."""
        return self.offset_on_day(utc_ns // NS_PER_DAY + DAYS_1958_TO_1970)

    def utc_to_tai(self, utc_ns: int) -> int:
        """TAI ns since 1958 of a POSIX instant (UTC ns since 1970, 86 400 s per day)."""
        day, ns = divmod(utc_ns, NS_PER_DAY)
        return self.tai_from_day(day + DAYS_1958_TO_1970, ns)

    def tai_to_utc(self, tai_ns: int) -> int:
        """POSIX ns (UTC since 1970) of a TAI instant; inside 23:59:60 held at 23:59:59.999999999."""
        day, ns = self.day_from_tai(tai_ns)
        return (day - DAYS_1958_TO_1970) * NS_PER_DAY + min(ns, NS_PER_DAY - 1)

    def utc_day_to_tai(self, unix_day: int, ns_of_day: int) -> int:
        """TAI ns of ``ns_of_day`` into UTC day ``unix_day`` (days since 1970); see :meth:`tai_from_day`."""
        return self.tai_from_day(unix_day + DAYS_1958_TO_1970, ns_of_day)


def _parse_leap_seconds(text: str, source: str) -> LeapSecondTable:
    starts: list[int] = []
    values: list[int] = []
    expires: int | None = None
    for lineno, line in enumerate(text.splitlines(), 1):
        stripped = line.strip()
        if stripped.startswith("#@"):
            try:
                expires = int(stripped[2:].split()[0]) - _NTP_TO_POSIX_S
            except (ValueError, IndexError):
                raise ValueError(f"{source}: line {lineno}: bad expiry line {line!r}") from None
            continue
        body = stripped.split("#", 1)[0].split()
        if not body:
            continue
        if len(body) != 2:
            raise ValueError(f"{source}: line {lineno}: expected 'NTP-seconds TAI-UTC', got {line!r}")
        try:
            ntp, dat = int(body[0]), int(body[1])
        except ValueError:
            raise ValueError(f"{source}: line {lineno}: not integers: {line!r}") from None
        starts.append(ntp - _NTP_TO_POSIX_S)
        values.append(dat)
    if not starts:
        raise ValueError(f"{source}: no leap-second entries")
    try:
        return LeapSecondTable(tuple(starts), tuple(values), expires, source)
    except ValueError as exc:
        raise ValueError(f"{source}: {exc}") from None


def load_leap_seconds(path: str | Path) -> LeapSecondTable:
    """Read a leap-second table in the IERS ``leap-seconds.list`` layout.

    Lines ``NTP-seconds TAI-UTC [# comment]``; ``#@ NTP-seconds`` gives the expiry; other ``#``
    lines are comments.

    Raises
    ------
    ValueError
        One line naming the file and the line that cannot be read.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as d:
    ...     p = os.path.join(d, "leap.list")
    ...     _ = open(p, "w").write("#@ 4000000000\\n2272060800 10\\n2287785600 11\\n")
    ...     load_leap_seconds(p).tai_minus_utc_s
    (10, 11)
    """
    path = Path(path)
    return _parse_leap_seconds(path.read_text(encoding="utf-8"), str(path))


@lru_cache(maxsize=1)
def leap_seconds() -> LeapSecondTable:
    """The table shipped with the package (``pipeline/data/leap-seconds.list``, IERS).

    Examples
    --------
    >>> leap_seconds().tai_minus_utc_s[-1]   # IERS Bulletin C 54: 37 s from 2017-01-01
    37
    """
    text = (resources.files("pipeline") / "data" / "leap-seconds.list").read_text(encoding="utf-8")
    return _parse_leap_seconds(text, _TABLE_PATH)


# ---- UTC fields and text ----------------------------------------------------------------------


def _explain(exc: ValueError, what: str, day58: int) -> ValueError:
    """The error of a failed :meth:`LeapSecondTable.tai_from_day`, reworded for the value ``what``."""
    msg = str(exc)
    if "outside UTC day" in msg:
        return ValueError(f"{what}: {_date_of_day(day58)} does not end with a leap second.")
    if "before 1972" in msg:
        return ValueError(BEFORE_1972.format(what=what))
    return ValueError(f"{what}: {msg}")


def tai_from_utc_fields(year: int, month: int, day: int, hour: int = 0, minute: int = 0, second: int = 0,
                        ns: int = 0, *, table: LeapSecondTable | None = None) -> int:
    """TAI ns since 1958 of a UTC calendar instant; ``second`` may be 60 at the end of a leap-second day.

    Raises
    ------
    ValueError
        No such date or time of day (second 60 on a day without a leap second), or before 1972.

    Examples
    --------
    >>> format_utc(tai_from_utc_fields(2016, 12, 31, 23, 59, 60, 500_000_000))
    '2016-12-31T23:59:60.500000000Z'
    """
    what = f"UTC {year:04d}-{month:02d}-{day:02d}T{hour:02d}:{minute:02d}:{second:02d}"
    if not (0 <= hour <= 23 and 0 <= minute <= 59 and 0 <= second <= 60 and 0 <= ns < NS_PER_S):
        raise ValueError(f"{what} has an hour, minute, second or fraction out of range.")
    if second == 60 and (hour, minute) != (23, 59):
        raise ValueError(f"{what}: second 60 exists only at 23:59:60 of a day ending with a leap second.")
    d58 = _day_of_date(year, month, day, what)
    tab = table or leap_seconds()
    try:
        return tab.tai_from_day(d58, ((hour * 60 + minute) * 60 + second) * NS_PER_S + ns)
    except ValueError as exc:
        raise _explain(exc, what, d58) from None


def utc_fields(tai_ns: int, *, table: LeapSecondTable | None = None) -> tuple[int, int, int, int, int, int, int]:
    """``(year, month, day, hour, minute, second, ns)`` of a TAI instant in UTC (second 60 in a leap second).

    Raises
    ------
    ValueError
        Before 1972 or after the year 9999.
    """
    tai_ns = _as_int("tai_ns", tai_ns)
    day58, ns_of_day = (table or leap_seconds()).day_from_tai(tai_ns)
    date = _date_of_day(day58)
    secs, frac = divmod(ns_of_day, NS_PER_S)
    if secs >= 86_400:
        hh, mm, ss = 23, 59, 60 + (secs - 86_400)
    else:
        hh, rem = divmod(secs, 3600)
        mm, ss = divmod(rem, 60)
    return date.year, date.month, date.day, hh, mm, ss, frac


def format_utc(tai_ns: int, *, digits: int = 9, zone: bool = True, table: LeapSecondTable | None = None) -> str:
    """ISO-8601 UTC text ``YYYY-MM-DDTHH:MM:SS.nnnnnnnnnZ`` of a TAI instant (ns since 1958).

    Parameters
    ----------
    tai_ns : int
        Any integer type (numpy included).
    digits : int
        Fractional digits 0..9; the fraction is truncated, never rounded into the next second.
    zone : bool
        Append ``Z``.

    Raises
    ------
    ValueError
        Before 1972 (:data:`BEFORE_1972`) or after the year 9999.

    Notes
    -----
    One bisection in the leap-second table, then integer division into date, time of day and
    fraction; inside a positive leap second the seconds read 60.  O(log n).

    Examples
    --------
    >>> t = tai_from_utc_fields(2016, 12, 31, 23, 59, 59, 500_000_000)
    >>> format_utc(t + 10**9), format_utc(t + 2 * 10**9)
    ('2016-12-31T23:59:60.500000000Z', '2017-01-01T00:00:00.500000000Z')
    """
    if isinstance(digits, bool) or not isinstance(digits, int) or not 0 <= digits <= 9:
        raise ValueError(f"Argument 'digits' must be 0..9, not {digits!r}.")
    y, mo, d, hh, mm, ss, frac = utc_fields(tai_ns, table=table)
    text = f"{y:04d}-{mo:02d}-{d:02d}T{hh:02d}:{mm:02d}:{ss:02d}"
    if digits:
        text += "." + f"{frac:09d}"[:digits]
    return text + ("Z" if zone else "")


_ISO = re.compile(
    r"(?P<y>\d{4})-(?P<mo>\d{2})-(?P<d>\d{2})[Tt ](?P<h>\d{2}):(?P<mi>\d{2}):(?P<s>\d{2})"
    r"(?:[.,](?P<frac>\d+))?(?P<tz>[Zz]|[+-]\d{2}:?\d{2})?"
)


def parse_utc(text: str, *, assume_utc: bool = False, name: str = "time",
              table: LeapSecondTable | None = None) -> int:
    """Parse ISO-8601 UTC text into TAI ns since 1958, 23:59:60.x of a leap-second day included.

    Parameters
    ----------
    text : str
        ``YYYY-MM-DDTHH:MM:SS[.fffffffff](Z|+HH:MM|-HH:MM)``.  Up to 9 fractional digits are exact;
        further digits are cut (below 1 ns).
    assume_utc : bool
        Accept a time without a zone designator as UTC.
    name : str
        Names the value in error messages.

    Raises
    ------
    ValueError
        One line quoting the text and the rule broken: not ISO-8601, no such date, second 60
        outside a leap second, no zone, before 1972 (:data:`BEFORE_1972`).

    Notes
    -----
    The zone offset (whole minutes) is applied to the date, hour and minute; the seconds (up to 60)
    are kept, so ``00:59:60.5+01:00`` is the leap second of that UTC day.  O(log n).

    References
    ----------
    ISO 8601-1:2019 sec. 5.4 (combined date and time), as used by SigMF ``core:datetime``.

    Examples
    --------
    >>> format_utc(parse_utc("2016-12-31T23:59:60.25Z"))
    '2016-12-31T23:59:60.250000000Z'
    >>> parse_utc("2017-01-01T00:00:00Z") - parse_utc("2016-12-31T23:59:59Z")   # 2 s: a leap second between
    2000000000
    """
    if not isinstance(text, str):
        raise TypeError(f"Argument '{name}' must be an ISO-8601 string, not {type(text).__name__}.")
    m = _ISO.fullmatch(text.strip())
    if m is None:
        raise ValueError(f"{name.capitalize()} {text!r} is not ISO-8601 'YYYY-MM-DDTHH:MM:SS[.fff]Z'.")
    y, mo, d = int(m["y"]), int(m["mo"]), int(m["d"])
    h, mi, s = int(m["h"]), int(m["mi"]), int(m["s"])
    if h > 23 or mi > 59 or s > 60:
        raise ValueError(f"{name.capitalize()} {text!r} has an hour, minute or second out of range.")
    d58 = _day_of_date(y, mo, d, f"{name.capitalize()} {text!r}")
    frac_ns = int(((m["frac"] or "") + "000000000")[:9])
    tz = m["tz"]
    if tz is None and not assume_utc:
        raise ValueError(f"{name.capitalize()} {text!r} has no zone designator; write it in UTC with a trailing 'Z'.")
    offset_min = 0
    if tz not in (None, "Z", "z"):
        digits = tz[1:].replace(":", "")
        tz_h, tz_m = int(digits[:2]), int(digits[2:])
        if tz_h > 23 or tz_m > 59:
            raise ValueError(f"{name.capitalize()} {text!r} has a zone offset out of range.")
        offset_min = (-1 if tz[0] == "-" else 1) * (tz_h * 60 + tz_m)
    day_shift, minute_of_day = divmod(h * 60 + mi - offset_min, 1440)
    d58 += day_shift
    try:
        _date_of_day(d58)
    except ValueError:
        raise ValueError(f"{name.capitalize()} {text!r} is outside the years 1..9999 in UTC.") from None
    if s == 60 and minute_of_day != 1439:
        raise ValueError(f"{name.capitalize()} {text!r}: second 60 exists only at 23:59:60 UTC.")
    tab = table or leap_seconds()
    try:
        return tab.tai_from_day(d58, (minute_of_day * 60 + s) * NS_PER_S + frac_ns)
    except ValueError as exc:
        raise _explain(exc, f"{name.capitalize()} {text!r}", d58) from None


# ---- POSIX ------------------------------------------------------------------------------------


def tai_from_posix_ns(posix_ns: int, *, table: LeapSecondTable | None = None) -> int:
    """TAI ns since 1958 of a POSIX instant (UTC ns since 1970, 86 400 s per day).

    Notes
    -----
    ``TAI = POSIX + 4383 days + (TAI - UTC)``.  Raises ValueError before 1972.

    Examples
    --------
    >>> tai_from_posix_ns(0 + 946_684_800 * 10**9) == parse_utc("2000-01-01T00:00:00Z")
    True
    """
    posix_ns = _as_int("posix_ns", posix_ns)
    return (table or leap_seconds()).utc_to_tai(posix_ns)


def posix_ns_from_tai(tai_ns: int, *, table: LeapSecondTable | None = None) -> int:
    """POSIX ns (UTC since 1970) of a TAI instant; held at 23:59:59.999999999 inside a leap second.

    Examples
    --------
    >>> posix_ns_from_tai(parse_utc("2000-01-01T00:00:00Z")) // 10**9
    946684800
    """
    tai_ns = _as_int("tai_ns", tai_ns)
    return (table or leap_seconds()).tai_to_utc(tai_ns)


def format_posix_ns(posix_ns: int, *, digits: int = 9) -> str:
    """Calendar text of a POSIX count (UTC ns since 1970), no table involved: never prints 23:59:60.

    Kept for callers that still carry POSIX time (the decode chain until it switches to TAI); years
    1..9999, before 1972 included (the count is then only a calendar, not UTC).

    Examples
    --------
    >>> format_posix_ns(1_773_480_600_123_456_789)
    '2026-03-14T09:30:00.123456789Z'
    """
    posix_ns = _as_int("ns", posix_ns)
    if isinstance(digits, bool) or not isinstance(digits, int) or not 0 <= digits <= 9:
        raise ValueError(f"Argument 'digits' must be 0..9, not {digits!r}.")
    day, ns_of_day = divmod(posix_ns, NS_PER_DAY)
    try:
        date = _date_of_day(day + DAYS_1958_TO_1970)
    except ValueError:
        raise ValueError(f"Argument 'ns' must be within the years 1..9999, not {posix_ns}.") from None
    secs, frac = divmod(ns_of_day, NS_PER_S)
    hh, rem = divmod(secs, 3600)
    mm, ss = divmod(rem, 60)
    text = f"{date.year:04d}-{date.month:02d}-{date.day:02d}T{hh:02d}:{mm:02d}:{ss:02d}"
    return text + ("." + f"{frac:09d}"[:digits] if digits else "") + "Z"


def tai_minus_utc_s(tai_ns: int, *, table: LeapSecondTable | None = None) -> int:
    """TAI - UTC in seconds in force at a TAI instant (raises ValueError before 1972).

    Examples
    --------
    >>> tai_minus_utc_s(parse_utc("2026-03-14T09:30:00Z"))
    37
    """
    return (table or leap_seconds()).tai_minus_utc_at(_as_int("tai_ns", tai_ns))


# ---- uniform scales ---------------------------------------------------------------------------

_CAL = re.compile(r"(?P<y>\d{4})-(?P<mo>\d{2})-(?P<d>\d{2})"
                  r"(?:[Tt ](?P<h>\d{2}):(?P<mi>\d{2})(?::(?P<s>\d{2})(?:[.,](?P<frac>\d+))?)?)?(?P<z>[Zz])?")


def tai_from_calendar(text: str, *, name: str = "epoch") -> int:
    """Nanoseconds from 1958-01-01T00:00:00 to the calendar instant ``text`` on the same uniform scale.

    For time-code epochs (CCSDS 301.0-B level-2 / agency epochs are given on the TAI scale): days of
    86 400 s exactly, no leap seconds, no zone offsets.  ``text`` is ``YYYY-MM-DD[THH:MM[:SS[.f]]]``
    with an optional ``Z``; years 1..9999 (before 1958 gives a negative count).

    Raises
    ------
    ValueError
        Naming ``name``: not that form, no such date, a field out of range.

    Examples
    --------
    >>> tai_from_calendar("2000-01-01") // 86_400_000_000_000   # ../shared/REFERENCES.md sec. 6: day 15340
    15340
    """
    if not isinstance(text, str):
        raise TypeError(f"Argument '{name}' must be a string, not {type(text).__name__}.")
    m = _CAL.fullmatch(text.strip())
    if m is None:
        raise ValueError(f"Argument '{name}' must be an ISO-8601 date and time without a zone offset, "
                         f"not {text!r}.")
    h, mi, s = int(m["h"] or 0), int(m["mi"] or 0), int(m["s"] or 0)
    if h > 23 or mi > 59 or s > 59:
        raise ValueError(f"Argument '{name}' has an hour, minute or second out of range: {text!r}.")
    d58 = _day_of_date(int(m["y"]), int(m["mo"]), int(m["d"]), f"Argument '{name}' {text!r}")
    frac_ns = int(((m["frac"] or "") + "000000000")[:9])
    return d58 * NS_PER_DAY + ((h * 60 + mi) * 60 + s) * NS_PER_S + frac_ns


def _tdb_minus_tt_ns(tt_ns: int) -> int:
    """TDB - TT (ns), the two largest periodic terms; error below 50 us (the planetary terms left out).

    ``g = 357.53 + 0.98560028 (JD - 2451545.0)`` deg (mean anomaly of the Earth),
    ``TDB - TT = 0.001657 sin g + 0.000014 sin 2g`` s (Explanatory Supplement to the Astronomical
    Almanac, 1992, eq. 2.222-1; from memory, not confirmed; checked against astropy in the tests).
    """
    import math

    jd_tt = 2436204.5 + tt_ns / NS_PER_DAY  # 1958-01-01T00:00 = JD 2436204.5
    g = math.radians(357.53 + 0.98560028 * (jd_tt - 2451545.0))
    return round((0.001657 * math.sin(g) + 0.000014 * math.sin(2 * g)) * NS_PER_S)


_ORDINAL = re.compile(r"(\d{4})-(\d{3})([Tt ].*)?")


def _calendar_from_ordinal(text: str, name: str) -> str:
    """``YYYY-DDDThh:mm:ss`` (ISO 8601 ordinal date, CCSDS ASCII time code B) -> ``YYYY-MM-DDThh:mm:ss``."""
    m = _ORDINAL.fullmatch(text)
    if m is None:
        return text
    year, doy = int(m[1]), int(m[2])
    try:
        date = _dt.date(year, 1, 1) + _dt.timedelta(days=doy - 1)
    except (ValueError, OverflowError):
        date = None
    if date is None or doy < 1 or date.year != year:
        raise ValueError(f"{name.capitalize()} {text!r} has day of year {doy}, outside year {year}.")
    return date.isoformat() + (m[3] or "")


def tai_from_scale(text: str, scale: TimeScale, *, name: str = "time") -> int:
    """TAI ns since 1958 of a calendar instant written on ``scale`` (UTC, TAI, TT, GPS or TDB).

    ``text`` is ``YYYY-MM-DDThh:mm:ss[.f]`` or the ordinal form ``YYYY-DDDThh:mm:ss[.f]`` (CCSDS ASCII time
    code B).  UTC goes through :func:`parse_utc` (``Z`` optional, 23:59:60 allowed); TAI, TT and GPS are TAI
    plus a constant (:data:`SCALE_OFFSETS_NS`); TDB is TT plus the periodic terms of
    ``_tdb_minus_tt_ns`` (error below 50 us, solved by fixed-point steps).

    Examples
    --------
    >>> tai_from_scale("2026-03-14T09:31:09.184", "TT") == parse_utc("2026-03-14T09:30:00Z")
    True
    """
    if not isinstance(text, str):
        raise TypeError(f"Argument '{name}' must be a string, not {type(text).__name__}.")
    text = _calendar_from_ordinal(text.strip(), name)
    key = str(scale).upper()
    if key == "UTC":
        return parse_utc(text, assume_utc=True, name=name)
    cal = tai_from_calendar(text, name=name)
    if key in SCALE_OFFSETS_NS:
        return cal - SCALE_OFFSETS_NS[key]
    if key == "TDB":
        tt = cal - _tdb_minus_tt_ns(cal)
        tt = cal - _tdb_minus_tt_ns(tt)
        return tt - SCALE_OFFSETS_NS["TT"]
    raise ValueError(f"Argument 'scale' must be UTC | TAI | TT | GPS | TDB, not {scale!r}.")


def utc_julian_date(tai_ns: int, *, table: LeapSecondTable | None = None) -> tuple[float, float]:
    """Julian date of a TAI instant read on UTC, as ``(whole + 0.5, fraction)`` for full precision.

    Inside a leap second the fraction runs past the day by up to 1/86400 (the usual convention of
    quasi-JD(UTC)); orbit propagators and sidereal-time formulae take this as their UTC input.

    Examples
    --------
    >>> utc_julian_date(parse_utc("2000-01-01T12:00:00Z"))
    (2451544.5, 0.5)
    """
    day58, ns_of_day = (table or leap_seconds()).day_from_tai(_as_int("tai_ns", tai_ns))
    return 2436204.5 + day58, ns_of_day / NS_PER_DAY


# ---- expiry ---------------------------------------------------------------------------------------

_warned: set[str] = set()


def check_expiry(tai_ns: int, *, table: LeapSecondTable | None = None) -> bool:
    """True when ``tai_ns`` lies past the table's expiry; the first time, log one warning (per table).

    Examples
    --------
    >>> check_expiry(parse_utc("2020-01-01T00:00:00Z"))
    False
    """
    tab = table or leap_seconds()
    exp = tab.expires_tai_ns
    if exp is None or _as_int("tai_ns", tai_ns) < exp:
        return False
    if tab.source not in _warned:
        _warned.add(tab.source)
        _log.warning("times after %s (the expiry of the leap-second table %s) may be off by one second: a leap "
                     "second announced since is not in it", format_utc(exp, digits=0, table=tab),
                     tab.source or "in use")
    return True
