"""UTC and TAI in integer nanoseconds: the leap-second table and the ERT text format.

Two integer time lines are used throughout:

* **UTC ns**: nanoseconds since 1970-01-01T00:00:00 UTC counting 86 400 s per day (leap seconds
  not counted, as in POSIX time).  Recording times and ERTs are on this line.
* **TAI ns**: nanoseconds of TAI since 1958-01-01T00:00:00 TAI, the CCSDS level-1 epoch
  (CCSDS 301.0-B sec. 3.1).  Time codes decode to this line; it has no gaps and no repeats.

They are joined by TAI - UTC from the IERS leap-second table shipped as
``pipeline/data/leap-seconds.list``.
"""

from __future__ import annotations

import bisect
import datetime as _dt
import operator
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources
from pathlib import Path

__all__ = [
    "LeapSecondTable",
    "default_leap_seconds",
    "load_leap_seconds",
    "utc_ns_to_tai_ns",
    "tai_ns_to_utc_ns",
    "format_ert",
    "format_tai_as_utc",
    "parse_epoch_ns",
    "NS_PER_S",
    "NS_PER_DAY",
    "TAI_1958_TO_UNIX_DAYS",
]

NS_PER_S = 1_000_000_000
NS_PER_DAY = 86_400 * NS_PER_S
#: Days from 1958-01-01 to 1970-01-01 (CCSDS epoch to the POSIX epoch).
TAI_1958_TO_UNIX_DAYS = 4383
#: Seconds from 1900-01-01 (NTP epoch used by leap-seconds.list) to 1970-01-01.
_NTP_TO_UNIX_S = 2_208_988_800
_UNIX_ORDINAL = _dt.date(1970, 1, 1).toordinal()
_ORDINAL_1958 = _dt.date(1958, 1, 1).toordinal()
_MIN_NS = (_dt.date(1, 1, 1).toordinal() - _UNIX_ORDINAL) * NS_PER_DAY
_MAX_NS = (_dt.date(9999, 12, 31).toordinal() + 1 - _UNIX_ORDINAL) * NS_PER_DAY


def _as_int(name: str, value) -> int:
    if isinstance(value, bool):
        raise TypeError(f"Argument '{name}' must be an integer, not {value!r}.")
    try:
        return operator.index(value)
    except TypeError:
        raise TypeError(f"Argument '{name}' must be an integer, not {type(value).__name__}.") from None


@dataclass(frozen=True)
class LeapSecondTable:
    """TAI - UTC as a step function of UTC.

    Attributes
    ----------
    utc_start_s : tuple of int
        UTC instants (seconds since 1970, POSIX count) at which each value takes effect, ascending.
    tai_minus_utc_s : tuple of int
        TAI - UTC in seconds from the matching instant on.
    expires_utc_s : int or None
        The instant after which the table may be missing a leap second (the file's ``#@`` line).
    source : str
        Where the table was read from.

    Notes
    -----
    Before the first entry (1972-01-01) UTC ran at a rate offset from TAI ("rubber seconds");
    this table holds the first value (10 s) constant before it, so instants before 1972 are
    off by up to about 10 s.  Telemetry from those years is not this project's concern.
    """

    utc_start_s: tuple[int, ...]
    tai_minus_utc_s: tuple[int, ...]
    expires_utc_s: int | None = None
    source: str = ""

    def __post_init__(self) -> None:
        if not self.utc_start_s or len(self.utc_start_s) != len(self.tai_minus_utc_s):
            raise ValueError("Argument 'utc_start_s' must be non-empty and as long as 'tai_minus_utc_s'.")
        if any(b <= a for a, b in zip(self.utc_start_s, self.utc_start_s[1:])):
            raise ValueError("Argument 'utc_start_s' must be strictly ascending.")
        # TAI instants (ns since 1958) at which each entry starts; used for TAI -> UTC.
        starts = tuple((u + TAI_1958_TO_UNIX_DAYS * 86_400 + d) * NS_PER_S
                       for u, d in zip(self.utc_start_s, self.tai_minus_utc_s))
        object.__setattr__(self, "_tai_start_ns", starts)
        object.__setattr__(self, "_utc_start_ns", tuple(u * NS_PER_S for u in self.utc_start_s))

    def tai_minus_utc(self, utc_ns: int) -> int:
        """TAI - UTC in seconds at the UTC instant ``utc_ns`` (ns since 1970)."""
        i = bisect.bisect_right(self._utc_start_ns, utc_ns) - 1
        return self.tai_minus_utc_s[max(i, 0)]

    def utc_to_tai(self, utc_ns: int) -> int:
        """TAI ns since 1958 of the UTC instant ``utc_ns`` (ns since 1970, POSIX count)."""
        return utc_ns + TAI_1958_TO_UNIX_DAYS * NS_PER_DAY + self.tai_minus_utc(utc_ns) * NS_PER_S

    def utc_day_to_tai(self, unix_day: int, ns_of_day: int) -> int:
        """TAI ns since 1958 of ``ns_of_day`` into UTC day ``unix_day`` (days since 1970).

        ``ns_of_day`` may run past 86 400 s on a day that ends with a positive leap second
        (23:59:60); that is what a CDS time code holds then.

        Raises
        ------
        ValueError
            If ``ns_of_day`` is negative or beyond the length of that UTC day.
        """
        start_ns = unix_day * NS_PER_DAY
        offset_s = self.tai_minus_utc(start_ns)
        day_len = NS_PER_DAY + (self.tai_minus_utc(start_ns + NS_PER_DAY) - offset_s) * NS_PER_S
        if not 0 <= ns_of_day < day_len:
            raise ValueError(f"time of day {ns_of_day} ns is outside UTC day {unix_day} of {day_len} ns")
        return start_ns + ns_of_day + TAI_1958_TO_UNIX_DAYS * NS_PER_DAY + offset_s * NS_PER_S

    def tai_to_utc_day(self, tai_ns: int) -> tuple[int, int]:
        """UTC day (days since 1970) and ns into that day of the TAI instant ``tai_ns`` (since 1958).

        During a positive leap second the ns of day runs from 86 400 s to 86 401 s (23:59:60).
        """
        i = max(bisect.bisect_right(self._tai_start_ns, tai_ns) - 1, 0)
        utc_ns = tai_ns - TAI_1958_TO_UNIX_DAYS * NS_PER_DAY - self.tai_minus_utc_s[i] * NS_PER_S
        if i + 1 < len(self._utc_start_ns) and utc_ns >= self._utc_start_ns[i + 1]:
            # Between the end of the old day and the instant the new offset is in effect:
            # the inserted second 23:59:60 of the day before the new entry.
            day = self._utc_start_ns[i + 1] // NS_PER_DAY - 1
            return day, utc_ns - day * NS_PER_DAY
        day, ns = divmod(utc_ns, NS_PER_DAY)
        return day, ns

    def tai_to_utc(self, tai_ns: int) -> int:
        """UTC ns since 1970 (POSIX count) of the TAI instant ``tai_ns`` (since 1958).

        POSIX time cannot name 23:59:60; an instant inside a positive leap second is held at
        23:59:59.999999999 of that day, so the result never decreases as ``tai_ns`` grows.
        """
        day, ns = self.tai_to_utc_day(tai_ns)
        return day * NS_PER_DAY + min(ns, NS_PER_DAY - 1)


def _parse_leap_seconds(text: str, source: str) -> LeapSecondTable:
    starts: list[int] = []
    values: list[int] = []
    expires: int | None = None
    for lineno, line in enumerate(text.splitlines(), 1):
        stripped = line.strip()
        if stripped.startswith("#@"):
            try:
                expires = int(stripped[2:].split()[0]) - _NTP_TO_UNIX_S
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
        starts.append(ntp - _NTP_TO_UNIX_S)
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
    """
    path = Path(path)
    return _parse_leap_seconds(path.read_text(encoding="utf-8"), str(path))


@lru_cache(maxsize=1)
def default_leap_seconds() -> LeapSecondTable:
    """The table shipped with the package (``pipeline/data/leap-seconds.list``)."""
    text = (resources.files("pipeline") / "data" / "leap-seconds.list").read_text(encoding="utf-8")
    return _parse_leap_seconds(text, "pipeline/data/leap-seconds.list")


def utc_ns_to_tai_ns(utc_ns: int, *, table: LeapSecondTable | None = None) -> int:
    """TAI ns since 1958-01-01 TAI of a UTC instant in ns since 1970 (POSIX count).

    Notes
    -----
    ``TAI = UTC + 4383 days + (TAI - UTC)``; 4383 days separate 1958-01-01 from 1970-01-01 and
    TAI - UTC comes from the leap-second table.  One bisection, O(log n).
    """
    utc_ns = _as_int("utc_ns", utc_ns)
    return (table or default_leap_seconds()).utc_to_tai(utc_ns)


def tai_ns_to_utc_ns(tai_ns: int, *, table: LeapSecondTable | None = None) -> int:
    """UTC ns since 1970 (POSIX count) of TAI ns since 1958; see :meth:`LeapSecondTable.tai_to_utc`."""
    tai_ns = _as_int("tai_ns", tai_ns)
    return (table or default_leap_seconds()).tai_to_utc(tai_ns)


def _format_day(day: int, ns_of_day: int) -> str:
    date = _dt.date.fromordinal(day + _UNIX_ORDINAL)
    secs, frac = divmod(ns_of_day, NS_PER_S)
    hh, rem = divmod(secs, 3600)
    mm, ss = divmod(rem, 60)
    if secs >= 86_400:  # the leap second 23:59:60
        hh, mm, ss = 23, 59, 60 + (secs - 86_400)
    return f"{date.year:04d}-{date.month:02d}-{date.day:02d}T{hh:02d}:{mm:02d}:{ss:02d}.{frac:09d}Z"


def format_ert(ns: int) -> str:
    """ISO-8601 UTC text of a time in ns since 1970 (POSIX count): ``YYYY-MM-DDTHH:MM:SS.nnnnnnnnnZ``.

    Parameters
    ----------
    ns : int
        Nanoseconds since 1970-01-01T00:00:00 UTC; any integer type (numpy included).

    Raises
    ------
    TypeError
        If ``ns`` is not an integer.
    ValueError
        If the date falls outside the years 1..9999.

    Notes
    -----
    Exact integer arithmetic (no float rounding): floor division into days and ns of day, the
    day turned into a Gregorian date.  O(1).
    """
    ns = _as_int("ns", ns)
    if not _MIN_NS <= ns < _MAX_NS:
        raise ValueError(f"Argument 'ns' must be within the years 1..9999, not {ns}.")
    day, ns_of_day = divmod(ns, NS_PER_DAY)
    return _format_day(day, ns_of_day)


def format_tai_as_utc(tai_ns: int, *, table: LeapSecondTable | None = None) -> str:
    """UTC text of a TAI instant (ns since 1958), naming a leap second as ``23:59:60.xxxxxxxxxZ``."""
    tai_ns = _as_int("tai_ns", tai_ns)
    day, ns_of_day = (table or default_leap_seconds()).tai_to_utc_day(tai_ns)
    if not _MIN_NS <= day * NS_PER_DAY < _MAX_NS:
        raise ValueError(f"Argument 'tai_ns' must be within the years 1..9999, not {tai_ns}.")
    return _format_day(day, ns_of_day)


def parse_epoch_ns(text: str, *, name: str = "epoch") -> int:
    """Nanoseconds from 1958-01-01T00:00:00 to the calendar instant ``text`` on the same time scale.

    ``text`` is ISO-8601 ``YYYY-MM-DD[THH:MM:SS[.ffffff]]`` with an optional ``Z``; no time zone
    offsets.  The difference is taken in calendar days of 86 400 s, which is exact for TAI
    (no leap seconds), the scale of CCSDS time-code epochs.
    """
    if not isinstance(text, str):
        raise TypeError(f"Argument '{name}' must be a string, not {type(text).__name__}.")
    s = text.strip()
    if s.endswith("Z"):
        s = s[:-1]
    try:
        when = _dt.datetime.fromisoformat(s)
    except ValueError:
        raise ValueError(f"Argument '{name}' must be an ISO-8601 date and time, not {text!r}.") from None
    if when.tzinfo is not None:
        raise ValueError(f"Argument '{name}' must not carry a time-zone offset, not {text!r}.")
    days = when.date().toordinal() - _ORDINAL_1958
    tod_us = ((when.hour * 60 + when.minute) * 60 + when.second) * 1_000_000 + when.microsecond
    return days * NS_PER_DAY + tod_us * 1000
