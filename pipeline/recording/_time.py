"""Time of a sample (or channel-symbol) position on the uniform scale, and the ISO-8601 helpers of old callers.

Positions stay float64 indices until an output needs a time; then
``tai_ns = anchor_tai_ns + round((position - anchor_position) * 1e9 / rate)`` on the uniform scale of
:mod:`pipeline.timescales` (TAI ns since 1958), exact rational arithmetic.  UTC text comes from
:func:`pipeline.timescales.format_utc`, which names a leap second 23:59:60.

``parse_iso8601_ns`` / ``parse_iso_ns`` / ``format_iso8601_ns`` work on the POSIX count (UTC ns since
1970, no leap seconds) for the callers that still carry it (the decode chain, the SigMF writer); they
call :mod:`pipeline.timescales` and go when those callers switch to TAI.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np

from pipeline.errors import RecordingError
from pipeline.timescales import (
    NS_PER_S,
    check_expiry,
    format_posix_ns,
    format_utc,
    parse_utc,
    posix_ns_from_tai,
    tai_from_posix_ns,
)

__all__ = ["elapsed_ns", "position_fraction", "position_ratio", "start_tai_ns", "check_end_time", "parse_iso8601_ns",
           "parse_iso_ns", "format_iso8601_ns", "NS_PER_S"]


def position_ratio(position) -> tuple[int, int]:
    """A sample position as an exact ratio ``(numerator, denominator)`` of integers, denominator a power of two.

    The same value as :func:`position_fraction` without building a :class:`fractions.Fraction` (not reduced:
    ``float.as_integer_ratio`` is already in lowest terms, an integer has denominator 1).

    Raises
    ------
    TypeError, ValueError
        A bool, a non-number or a non-finite value, naming the argument ``position``.

    Examples
    --------
    >>> position_ratio(2.75), position_ratio(7)
    ((11, 4), (7, 1))
    """
    if isinstance(position, (bool, np.bool_)):
        raise TypeError("Argument 'position' must be a number, not bool.")
    try:
        if isinstance(position, (int, np.integer)):
            return int(position), 1
        return float(position).as_integer_ratio()
    except (TypeError, ValueError, OverflowError):
        raise ValueError(f"Argument 'position' must be a finite number, not {position!r}.") from None


def position_fraction(position) -> Fraction:
    """A sample position as an exact fraction (a float64 is an exact binary fraction).

    Raises
    ------
    TypeError, ValueError
        A bool, a non-number or a non-finite value, naming the argument ``position``.
    """
    return Fraction(*position_ratio(position))


def elapsed_ns(position, anchor_position: int, rate: Fraction | int) -> int:
    """``round((position - anchor_position) * 1e9 / rate)``: ns from the anchor to ``position``.

    Notes
    -----
    Exact rational arithmetic on Python integers, rounded half to even (as ``round`` of the
    :class:`fractions.Fraction`): with ``position = n / d`` (:func:`position_ratio`) and
    ``rate = p / q``, the value is ``N / D`` with ``N = (n - anchor d) 1e9 q`` and ``D = d p``;
    ``divmod(N, D)`` gives the floor and the remainder that decides the rounding.  No
    normalization (gcd) is needed, so it costs a few integer products; the result does not drift
    however long the recording (a float64 product would lose ns after about 100 days at 1 GHz).

    Examples
    --------
    >>> elapsed_ns(1.5, 0, Fraction(4))   # 1.5 samples at 4 samples/s
    375000000
    """
    n, d = position_ratio(position)
    num = (n - int(anchor_position) * d) * NS_PER_S * rate.denominator
    den = d * rate.numerator
    if den < 0:
        num, den = -num, -den
    floor, rem = divmod(num, den)
    twice = 2 * rem
    if twice > den or (twice == den and floor & 1):
        floor += 1
    return floor


def start_tai_ns(path, start, what: str = "start time") -> int:
    """TAI ns of a ``start`` argument: ISO-8601 UTC text, or POSIX ns since 1970 as an integer.

    Raises
    ------
    RecordingError
        Naming ``path`` and ``what``: not one of those forms, before 1972 or after the year 9999.

    Examples
    --------
    >>> start_tai_ns("x.cf32", "2016-12-31T23:59:60.5Z") - start_tai_ns("x.cf32", 1_483_228_799 * 10**9)
    1500000000
    """
    if isinstance(start, (bool, np.bool_)) or not isinstance(start, (str, int, np.integer)):
        raise RecordingError(f"{path}: {what} must be an ISO-8601 UTC time, not {start!r}")
    try:
        if isinstance(start, str):
            return parse_utc(start)
        tai = tai_from_posix_ns(int(start))
        format_utc(tai)  # within the years 1972..9999
        return tai
    except ValueError as exc:
        raise RecordingError(f"{path}: {what}: {exc}") from None


def check_end_time(path, end_tai_ns: int, what: str = "recording") -> None:
    """Refuse a time that runs past the year 9999 (RecordingError); warn once past the leap-second table's expiry."""
    try:
        format_utc(end_tai_ns)
    except ValueError:
        raise RecordingError(f"{path}: the {what}'s time runs past the year 9999") from None
    check_expiry(end_tai_ns)


def parse_iso8601_ns(text: str, *, assume_utc: bool = False) -> int:
    """ISO-8601 UTC text -> POSIX ns (UTC since 1970); 23:59:60.x maps to 23:59:59.999999999.

    Raises ValueError for text :func:`pipeline.timescales.parse_utc` refuses (before 1972 included).
    """
    return posix_ns_from_tai(parse_utc(text, assume_utc=assume_utc))


#: Short name of :func:`parse_iso8601_ns` (used by the decode chain and the demo).
parse_iso_ns = parse_iso8601_ns
#: POSIX ns -> ``YYYY-MM-DDTHH:MM:SS.nnnnnnnnnZ`` (the SigMF writer's ``core:datetime``).
format_iso8601_ns = format_posix_ns
