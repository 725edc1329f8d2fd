"""Two-line element sets, propagated with SGP4 through the ``sgp4`` library (PyPI).

The element set's two lines are checked here (column layout, checksums, the numeric fields) before
``sgp4`` sees them, so a damaged file is one :class:`~pipeline.errors.DataFileError` naming the fault.
Layout (Spacetrack Report #3 and the usual public description of the format; common practice, no
published source stored): line 1 columns 3-7 catalogue number, 19-32 epoch ``YYDDD.DDDDDDDD`` (UTC),
34-43 first derivative of the mean motion, 45-52 and 54-61 ``+-NNNNN+-E`` fields (second derivative,
B*); line 2 columns 9-16 inclination, 18-25 right ascension of the node, 27-33 eccentricity (decimal
point implied), 35-42 argument of perigee, 44-51 mean anomaly (degrees), 53-63 mean motion (rev/day);
column 69 of each line is the checksum: the sum of the digits, with ``-`` counting 1, modulo 10.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import numpy as np

from pipeline.errors import DataFileError
from pipeline.orbit._files import read_text_file
from pipeline.timescales import NS_PER_DAY, leap_seconds

__all__ = ["ElementSet", "parse_tle", "read_tle"]

_FLOAT = re.compile(r"\s*[+-]?(\d+\.?\d*|\.\d+)\s*")
_DECIMAL_POINT_IMPLIED = re.compile(r"[ +-]\d{5}[+-]\d")
_NDOT = re.compile(r"\s*[+-]?\.\d+\s*")
_EPOCH = re.compile(r"[ \d]\d\d{3}\.\d+")
_MAX_BYTES = 1 << 16
_HALF_STEP_S = 0.1  # of the central difference that gives the velocity


def _checksum(line: str) -> int:
    return sum(int(c) if c.isdigit() else (1 if c == "-" else 0) for c in line[:68]) % 10


class ElementSet:
    """A two-line element set and its SGP4 propagator (frame TEME, km and km/s).

    Attributes
    ----------
    name : str
        The title line of a three-line set, else the catalogue number.
    line1, line2 : str
    epoch_tai_ns : int
        The element set's epoch (UTC in the file) on the TAI ns scale.
    frame : str
        ``"TEME"``.
    source : str
        The file it was read from.
    """

    frame = "TEME"

    def __init__(self, line1: str, line2: str, *, name: str = "", source: str = "<text>") -> None:
        from sgp4.api import WGS72, Satrec

        self.line1, self.line2, self.source = line1, line2, source
        try:
            sat = Satrec.twoline2rv(line1, line2, WGS72)
        except (ValueError, IndexError, TypeError, RuntimeError) as exc:  # sgp4's own parser
            raise DataFileError(f"{source}: element set not accepted by sgp4 ({exc})") from None
        if sat.error:
            raise DataFileError(f"{source}: element set not accepted by sgp4 (initialisation error {sat.error})")
        self._sat = sat
        self.name = name or line1[2:7].strip()
        whole, frac = float(sat.jdsatepoch), float(sat.jdsatepochF)
        days = int(round(whole - 2436204.5)) + int(np.floor(frac))
        try:
            self.epoch_tai_ns = leap_seconds().tai_from_day(days, round((frac % 1.0) * NS_PER_DAY))
        except ValueError as exc:
            raise DataFileError(f"{source}: element set epoch: {exc}") from None

    def __repr__(self) -> str:
        return f"ElementSet({self.name!r}, epoch TAI {self.epoch_tai_ns} ns, {self.source!r})"

    @property
    def description(self) -> str:
        """One line for reports: the file and the method."""
        return f"element set {Path(self.source).name} ({self.name}, SGP4 via the sgp4 library, TEME)"

    def state(self, tai_ns: int) -> tuple[np.ndarray, np.ndarray] | None:
        """Position (km) and velocity (km/s) in TEME at a TAI instant; None when SGP4 reports an error.

        Notes
        -----
        Minutes since the epoch are taken on TAI (``(t - epoch) / 60 s``), so a leap second between
        the epoch and ``t`` is counted.  The velocity is the central difference of SGP4 positions over
        +-0.1 s (error below 1e-5 m/s), not SGP4's own velocity, which differs from the derivative of its
        positions by up to 2 cm/s (measured; 0.15 Hz at 2.2 GHz): the Doppler must be the derivative of
        the light time of the trajectory.  SGP4 errors (decay, eccentricity out of range) are a status,
        not an exception: the prediction at that instant is missing.  Three SGP4 calls.
        """
        minutes = (int(tai_ns) - self.epoch_tai_ns) / 60e9
        err, r, _ = self._sat.sgp4_tsince(minutes)
        err_p, r_p, _ = self._sat.sgp4_tsince(minutes + _HALF_STEP_S / 60.0)
        err_m, r_m, _ = self._sat.sgp4_tsince(minutes - _HALF_STEP_S / 60.0)
        if err or err_p or err_m:
            return None
        return np.array(r), (np.array(r_p) - np.array(r_m)) / (2.0 * _HALF_STEP_S)


def parse_tle(text: str, *, source: str = "<text>") -> ElementSet:
    """An :class:`ElementSet` from the text of a two- or three-line element set.

    Raises
    ------
    DataFileError
        Not two lines starting ``1 `` and ``2 `` (after an optional title line), a line not 69
        columns, a wrong checksum, catalogue numbers that differ, a numeric field out of form or range.

    Examples
    --------
    >>> tle = parse_tle('''TAMARISK TEST
    ... 1 99999U 26001A   26073.39583333  .00000000  00000+0  00000+0 0  9997
    ... 2 99999  97.5000 120.0000 0010000  90.0000 270.0000 15.20000000    19''')
    >>> tle.name, tle.frame
    ('TAMARISK TEST', 'TEME')
    """
    if not isinstance(text, str):
        raise TypeError(f"Argument 'text' must be a string, not {type(text).__name__}.")
    lines = [ln.rstrip() for ln in text.splitlines() if ln.strip()]
    name = ""
    if len(lines) == 3 and not lines[0].startswith("1 "):
        name = lines[0].strip()
        if name.startswith("0 "):
            name = name[2:].strip()
        lines = lines[1:]
    if len(lines) != 2 or not lines[0].startswith("1 ") or not lines[1].startswith("2 "):
        raise DataFileError(f"{source}: not a two-line element set (two lines starting '1 ' and '2 ', "
                            f"after an optional title line)")
    l1, l2 = lines
    for k, ln in ((1, l1), (2, l2)):
        if len(ln) != 69:
            raise DataFileError(f"{source}: line {k} of the element set has {len(ln)} columns, not 69")
        if not ln[68].isdigit() or _checksum(ln) != int(ln[68]):
            raise DataFileError(f"{source}: line {k} of the element set fails its checksum "
                                f"(column 69 is {ln[68]!r}, the sum is {_checksum(ln)})")
        if not ln.isascii():
            raise DataFileError(f"{source}: line {k} of the element set holds non-ASCII characters")
    if l1[2:7] != l2[2:7] or not l1[2:7].strip():
        raise DataFileError(f"{source}: the two lines name different objects ({l1[2:7]!r}, {l2[2:7]!r})")
    _check(source, l1[18:32], _EPOCH, "epoch (YYDDD.DDDDDDDD)")
    if not 1.0 <= float(l1[20:32]) < 367.0:
        raise DataFileError(f"{source}: element set epoch day {l1[20:32].strip()} is not 1..366")
    _check(source, l1[33:43], _NDOT, "first derivative of the mean motion")
    _check(source, l1[44:52], _DECIMAL_POINT_IMPLIED, "second derivative of the mean motion")
    _check(source, l1[53:61], _DECIMAL_POINT_IMPLIED, "B* drag term")
    for lo, hi, what, top in ((8, 16, "inclination", 180.0), (17, 25, "right ascension of the node", 360.0),
                              (34, 42, "argument of perigee", 360.0), (43, 51, "mean anomaly", 360.0),
                              (52, 63, "mean motion", 20.0)):
        _check(source, l2[lo:hi], _FLOAT, what)
        if not 0.0 <= float(l2[lo:hi]) <= top:
            raise DataFileError(f"{source}: element set {what} {l2[lo:hi].strip()} is outside 0..{top:g}")
    if float(l2[52:63]) <= 0.0:
        raise DataFileError(f"{source}: element set mean motion must be > 0 rev/day")
    if not l2[26:33].isdigit():
        raise DataFileError(f"{source}: element set eccentricity {l2[26:33]!r} is not 7 digits")
    return ElementSet(l1, l2, name=name, source=source)


def _check(source: str, field: str, pattern: re.Pattern, what: str) -> None:
    if pattern.fullmatch(field) is None:
        raise DataFileError(f"{source}: element set {what} {field!r} is not in the two-line format")


def read_tle(path: str | os.PathLike) -> ElementSet:
    """Read a two- or three-line element set file (see :func:`parse_tle`).

    Raises
    ------
    DataFileError
        The file is missing, not text, too large, or not an element set.
    """
    p, text = read_text_file(path, what="an element set", max_bytes=_MAX_BYTES, encoding="ascii")
    return parse_tle(text, source=str(p))
