"""UTC time stamps as integer nanoseconds since 1970-01-01T00:00:00Z.

Float seconds since 1970 carry only about 0.2 microsecond of resolution today, so every time here
is an ``int`` of nanoseconds and every conversion is exact integer arithmetic.
"""

from __future__ import annotations

import datetime as _dt
import re

__all__ = ["parse_iso8601_ns", "parse_iso_ns", "format_iso8601_ns", "NS_PER_S"]

NS_PER_S = 1_000_000_000
_NS_PER_DAY = 86_400 * NS_PER_S
_EPOCH_ORDINAL = _dt.date(1970, 1, 1).toordinal()

_ISO = re.compile(
    r"(?P<y>\d{4})-(?P<mo>\d{2})-(?P<d>\d{2})[Tt ](?P<h>\d{2}):(?P<mi>\d{2}):(?P<s>\d{2})"
    r"(?:[.,](?P<frac>\d+))?(?P<tz>[Zz]|[+-]\d{2}:?\d{2})?"
)


def parse_iso8601_ns(text: str, *, assume_utc: bool = False) -> int:
    """Parse an ISO-8601 date-time into integer nanoseconds since 1970-01-01 UTC.

    Parameters
    ----------
    text : str
        ``YYYY-MM-DDTHH:MM:SS[.fffffffff](Z|+HH:MM|-HH:MM)``.  Up to 9 fractional digits are
        exact; further digits are truncated (they are below one nanosecond).
    assume_utc : bool
        Accept a time without a zone designator and take it as UTC.

    Returns
    -------
    int
        Nanoseconds since the Unix epoch, POSIX convention (no leap seconds counted).  A
        leap second ``23:59:60`` maps to the first instant of the next day, as POSIX does.

    Raises
    ------
    ValueError
        One line quoting the text and the rule broken.

    Notes
    -----
    ``days * 86400e9 + seconds of day * 1e9 + fraction - zone offset``, all in Python integers,
    with the day number from the proleptic Gregorian calendar (``datetime.date.toordinal``).

    References
    ----------
    ISO 8601-1:2019 sec. 5.4 (combined date and time), as used by the SigMF ``core:datetime``
    field (SigMF specification, captures object).
    """
    if not isinstance(text, str):
        raise TypeError(f"Time must be an ISO-8601 string, not {type(text).__name__}.")
    m = _ISO.fullmatch(text.strip())
    if m is None:
        raise ValueError(f"Time {text!r} is not ISO-8601 'YYYY-MM-DDTHH:MM:SS[.fff]Z'.")
    y, mo, d = int(m["y"]), int(m["mo"]), int(m["d"])
    h, mi, s = int(m["h"]), int(m["mi"]), int(m["s"])
    try:
        ordinal = _dt.date(y, mo, d).toordinal()
    except ValueError:
        raise ValueError(f"Time {text!r} has no such calendar date.") from None
    if h > 23 or mi > 59 or s > 60:
        raise ValueError(f"Time {text!r} has an hour, minute or second out of range.")
    frac = m["frac"] or ""
    frac_ns = int((frac + "000000000")[:9])
    tz = m["tz"]
    if tz is None and not assume_utc:
        raise ValueError(f"Time {text!r} has no zone designator; write it in UTC with a trailing 'Z'.")
    offset_s = 0
    if tz not in (None, "Z", "z"):
        sign = -1 if tz[0] == "-" else 1
        digits = tz[1:].replace(":", "")
        tz_h, tz_m = int(digits[:2]), int(digits[2:])
        if tz_h > 23 or tz_m > 59:
            raise ValueError(f"Time {text!r} has a zone offset out of range.")
        offset_s = sign * (tz_h * 3600 + tz_m * 60)
    seconds_of_day = h * 3600 + mi * 60 + s - offset_s
    return (ordinal - _EPOCH_ORDINAL) * _NS_PER_DAY + seconds_of_day * NS_PER_S + frac_ns


def format_iso8601_ns(ns: int, *, digits: int = 9) -> str:
    """Format integer nanoseconds since 1970 UTC as ``YYYY-MM-DDTHH:MM:SS.fffffffffZ``.

    Parameters
    ----------
    ns : int
        Nanoseconds since the Unix epoch (may be negative).
    digits : int
        Fractional digits, 0..9 (the fraction is truncated, never rounded up into the next second).

    Notes
    -----
    Inverse of :func:`parse_iso8601_ns` for ``digits=9``: floor division into days, seconds
    and nanoseconds, all integer.
    """
    if isinstance(ns, bool) or not isinstance(ns, int):
        try:
            import numpy as np

            if isinstance(ns, np.integer):
                ns = int(ns)
            else:
                raise TypeError
        except TypeError:
            raise TypeError(f"Argument 'ns' must be an integer, not {type(ns).__name__}.") from None
    if isinstance(digits, bool) or not isinstance(digits, int) or not 0 <= digits <= 9:
        raise ValueError(f"Argument 'digits' must be 0..9, not {digits!r}.")
    days, rem = divmod(ns, _NS_PER_DAY)
    sec, frac = divmod(rem, NS_PER_S)
    date = _dt.date.fromordinal(days + _EPOCH_ORDINAL)
    hh, rest = divmod(sec, 3600)
    mm, ss = divmod(rest, 60)
    text = f"{date.year:04d}-{date.month:02d}-{date.day:02d}T{hh:02d}:{mm:02d}:{ss:02d}"
    if digits:
        text += "." + f"{frac:09d}"[:digits]
    return text + "Z"


#: Short name of :func:`parse_iso8601_ns` (used by the decode chain and the demo).
parse_iso_ns = parse_iso8601_ns
