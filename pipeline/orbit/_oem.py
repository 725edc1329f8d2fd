"""CCSDS Orbit Ephemeris Messages (502.0-B, the text key-value form): reading and Hermite interpolation.

Keywords read (CCSDS 502.0-B-2 sec. 5; names, data-line columns and units checked against ccsds-ndm's
models generated from the CCSDS OEM 2.0 XML schema in tests/test_ndm_reference.py; the meaning of
``USEABLE_*`` and ``INTERPOLATION_DEGREE`` from memory, not confirmed: ../shared/REFERENCES.md has no ODM
section): header ``CCSDS_OEM_VERS``, ``CREATION_DATE``, ``ORIGINATOR``, ``COMMENT``; per segment
``META_START`` ... ``META_STOP`` with ``OBJECT_NAME``, ``OBJECT_ID``, ``CENTER_NAME``, ``REF_FRAME``,
``REF_FRAME_EPOCH``, ``TIME_SYSTEM``, ``START_TIME``, ``USEABLE_START_TIME``, ``USEABLE_STOP_TIME``,
``STOP_TIME``, ``INTERPOLATION``, ``INTERPOLATION_DEGREE``; then data lines ``epoch x y z x_dot y_dot
z_dot [x_ddot y_ddot z_ddot]`` in km, km/s (km/s^2); ``COVARIANCE_START`` ... ``COVARIANCE_STOP`` blocks
are skipped.  Epochs are ``YYYY-MM-DDThh:mm:ss[.d]`` or ``YYYY-DDDThh:mm:ss[.d]`` on ``TIME_SYSTEM``
(UTC, TAI, TT, GPS or TDB).  Only Earth-centred ephemerides are used (``CENTER_NAME = EARTH``): another
centre would need that body's ephemeris, which the pipeline does not carry.  The XML form is refused (one
line naming the file); the other time systems and frames the standard allows are refused likewise.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.errors import DataFileError
from pipeline.orbit._earth import EARTH_ROTATION_RAD_S, inertial_to_earth_fixed, working_frame
from pipeline.orbit._files import bracket_step, keyword_value, read_text_file, refuse_xml
from pipeline.timescales import NS_PER_S, tai_from_scale

__all__ = ["Ephemeris", "EphemerisSegment", "parse_oem", "read_oem", "DEFAULT_HERMITE_POINTS"]

#: Nodes of the Hermite interpolation when the file states no INTERPOLATION_DEGREE (degree 2 x 4 - 1 = 7).
DEFAULT_HERMITE_POINTS = 4
_MAX_BYTES = 64 << 20
_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")
_REQUIRED = ("OBJECT_NAME", "OBJECT_ID", "CENTER_NAME", "REF_FRAME", "TIME_SYSTEM", "START_TIME", "STOP_TIME")
_META_KEYS = set(_REQUIRED) | {"REF_FRAME_EPOCH", "USEABLE_START_TIME", "USEABLE_STOP_TIME", "INTERPOLATION",
                               "INTERPOLATION_DEGREE", "COMMENT"}
_SCALES = ("UTC", "TAI", "TT", "GPS", "TDB")
_BLOCKS = {"META_STOP": (("meta",), "data", "META_STOP without META_START"),
           "COVARIANCE_START": (("data",), "covariance", "COVARIANCE_START outside a data block"),
           "COVARIANCE_STOP": (("covariance",), "data", "COVARIANCE_STOP without COVARIANCE_START")}


@dataclass(frozen=True, eq=False)
class EphemerisSegment:
    """One OEM segment, states turned into the working inertial frame.

    Attributes
    ----------
    object_name, center, ref_frame, time_system : str
        As in the metadata.
    frame : str
        Working inertial frame (``TEME`` or ``EME2000``; an ``ITRF`` segment is rotated into TEME).
    t0_tai_ns : int
        TAI ns of the first state; ``t_s`` counts seconds from it.
    t_s : numpy.ndarray
        Seconds of each state from ``t0_tai_ns`` (float64, strictly increasing).
    r_km, v_km_s : numpy.ndarray
        (n, 3) positions and velocities.
    usable_tai_ns : tuple of int
        The span interpolation may serve (``USEABLE_START_TIME``/``USEABLE_STOP_TIME``, else
        ``START_TIME``/``STOP_TIME``), clipped to the first and last state.
    points : int
        Hermite nodes per interpolation.
    """

    object_name: str
    center: str
    ref_frame: str
    time_system: str
    frame: str
    t0_tai_ns: int
    t_s: np.ndarray
    r_km: np.ndarray
    v_km_s: np.ndarray
    usable_tai_ns: tuple[int, int]
    points: int
    _cache: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def state(self, tai_ns: int) -> tuple[np.ndarray, np.ndarray]:
        """Hermite-interpolated position (km) and velocity (km/s) at ``tai_ns`` (inside the usable span).

        Notes
        -----
        The ``m`` states nearest ``t`` (``m = points``) define the polynomial of degree ``2m - 1`` that
        matches each position and velocity (Hermite interpolation); the velocity is its derivative.  Time is
        scaled to the node spacing around the window's centre, the ``2m`` coefficients come from the
        confluent Vandermonde system (solved once per window and cached, O(m^3)), and each call evaluates
        the polynomial and its derivative, O(m).  Error for a smooth orbit sampled at step ``h``: of order
        ``|r^(2m)| h^(2m) / (2m)!``; measured in the tests and ``bench/bench_time.py``.
        """
        t = (int(tai_ns) - self.t0_tai_ns) / NS_PER_S
        n = len(self.t_s)
        m = min(self.points, n)
        i = int(np.searchsorted(self.t_s, t))
        lo = min(max(i - m // 2, 0), n - m)
        tc, h, coef = self._window(lo, m)
        x = (t - tc) / h
        powers = x ** np.arange(2 * m)
        slopes = np.arange(2 * m) * np.concatenate(([0.0], powers[:-1]))
        return powers @ coef, (slopes @ coef) / h

    def _window(self, lo: int, m: int) -> tuple[float, float, np.ndarray]:
        cache = self._cache
        hit = cache.get(lo)
        if hit is not None:
            return hit
        ts = self.t_s[lo:lo + m]
        tc = 0.5 * (ts[0] + ts[-1])
        h = (ts[-1] - ts[0]) / max(m - 1, 1)
        xs = (ts - tc) / h
        k = np.arange(2 * m)
        a = np.empty((2 * m, 2 * m))
        a[0::2] = xs[:, None] ** k
        a[1::2] = k * np.where(k > 0, xs[:, None] ** np.maximum(k - 1, 0), 0.0)
        y = np.empty((2 * m, 3))
        y[0::2] = self.r_km[lo:lo + m]
        y[1::2] = self.v_km_s[lo:lo + m] * h
        hit = (tc, h, np.linalg.solve(a, y))
        if len(cache) > 64:
            cache.clear()
        cache[lo] = hit
        return hit


class Ephemeris:
    """An Orbit Ephemeris Message: one or more segments in one working inertial frame.

    Attributes
    ----------
    segments : list of EphemerisSegment
    frame : str
        The working inertial frame shared by all segments.
    source : str
    header : dict
        ``CCSDS_OEM_VERS``, ``CREATION_DATE``, ``ORIGINATOR`` (those present).
    """

    def __init__(self, segments: list[EphemerisSegment], *, source: str, header: dict) -> None:
        self.segments = segments
        self.source = source
        self.header = header
        frames = {s.frame for s in segments}
        if len(frames) != 1:
            raise DataFileError(f"{source}: segments in different frames ({', '.join(sorted(frames))}) "
                                f"cannot be used together")
        self.frame = frames.pop()

    def __repr__(self) -> str:
        return f"Ephemeris({self.source!r}, {len(self.segments)} segment(s), {self.frame})"

    @property
    def name(self) -> str:
        return self.segments[0].object_name

    @property
    def description(self) -> str:
        """One line for reports: the file and the method."""
        s = self.segments[0]
        return (f"ephemeris {Path(self.source).name} ({s.object_name}, {s.ref_frame}, {s.time_system}; Hermite "
                f"interpolation, {s.points} states, degree {2 * s.points - 1})")

    def state(self, tai_ns: int) -> tuple[np.ndarray, np.ndarray] | None:
        """Position (km) and velocity (km/s) in :attr:`frame`; None outside every segment's usable span."""
        tai_ns = int(tai_ns)
        for s in self.segments:
            if s.usable_tai_ns[0] <= tai_ns <= s.usable_tai_ns[1]:
                return s.state(tai_ns)
        return None


def _epoch(text: str, scale: str, where: str) -> int:
    try:
        return tai_from_scale(text.strip(), scale, name="epoch")
    except ValueError as exc:
        raise DataFileError(f"{where}: {exc}") from None


def _segment(meta: dict, rows: list[tuple[int, str, list[str]]], source: str, lineno: int,
             points_default: int) -> EphemerisSegment:
    where = f"{source}: segment ending at line {lineno}"
    for key in _REQUIRED:
        if key not in meta:
            raise DataFileError(f"{where}: metadata has no {key}")
    scale = meta["TIME_SYSTEM"].upper()
    if scale not in _SCALES:
        raise DataFileError(f"{where}: TIME_SYSTEM {meta['TIME_SYSTEM']!r} is not one of {', '.join(_SCALES)}")
    if meta["CENTER_NAME"].upper() != "EARTH":
        raise DataFileError(f"{where}: CENTER_NAME {meta['CENTER_NAME']!r}: only Earth-centred ephemerides can be "
                            f"used (another centre needs that body's ephemeris); give the orbit relative to EARTH")
    try:
        frame = working_frame(meta["REF_FRAME"])
    except ValueError:
        raise DataFileError(f"{where}: REF_FRAME {meta['REF_FRAME']!r} is not TEME, EME2000, GCRF, ICRF or "
                            f"ITRF...") from None
    if len(rows) < 2:
        raise DataFileError(f"{where}: needs at least 2 states, has {len(rows)}")
    start = _epoch(meta["START_TIME"], scale, f"{where}: START_TIME")
    stop = _epoch(meta["STOP_TIME"], scale, f"{where}: STOP_TIME")
    lo = _epoch(meta["USEABLE_START_TIME"], scale, f"{where}: USEABLE_START_TIME") \
        if "USEABLE_START_TIME" in meta else start
    hi = _epoch(meta["USEABLE_STOP_TIME"], scale, f"{where}: USEABLE_STOP_TIME") \
        if "USEABLE_STOP_TIME" in meta else stop
    times = []
    values = np.empty((len(rows), 6))
    for k, (ln, ep, nums) in enumerate(rows):
        if len(nums) not in (6, 9):
            raise DataFileError(f"{source}: line {ln}: a state needs an epoch and 6 (or 9) numbers, has {len(nums)}")
        for x in nums:
            if _NUMBER.fullmatch(x) is None:
                raise DataFileError(f"{source}: line {ln}: {x!r} is not a number")
        values[k] = [float(x) for x in nums[:6]]
        times.append(_epoch(ep, scale, f"{source}: line {ln}"))
    if not np.all(np.isfinite(values)):
        raise DataFileError(f"{where}: a state is not finite")
    if any(b <= a for a, b in zip(times, times[1:])):
        raise DataFileError(f"{where}: state epochs must increase strictly")
    if times[0] < start or times[-1] > stop:
        raise DataFileError(f"{where}: states lie outside START_TIME..STOP_TIME")
    if not start <= lo <= hi <= stop:
        raise DataFileError(f"{where}: USEABLE_START_TIME..USEABLE_STOP_TIME must lie inside START_TIME..STOP_TIME")
    points = points_default
    if "INTERPOLATION_DEGREE" in meta:
        deg = meta["INTERPOLATION_DEGREE"].strip()
        if not deg.isdigit() or not 1 <= int(deg) <= 31:
            raise DataFileError(f"{where}: INTERPOLATION_DEGREE must be 1..31, not {deg!r}")
        points = max(2, math.ceil((int(deg) + 1) / 2))  # Hermite of degree >= the file's, from its own states
    r, v = values[:, :3].copy(), values[:, 3:].copy()
    if meta["REF_FRAME"].upper().startswith("ITRF"):
        omega = np.array([0.0, 0.0, EARTH_ROTATION_RAD_S])
        for k, t in enumerate(times):
            m = inertial_to_earth_fixed("TEME", t)
            v[k] = m.T @ (v[k] + np.cross(omega, r[k]))
            r[k] = m.T @ r[k]
    t0 = times[0]
    return EphemerisSegment(
        object_name=meta["OBJECT_NAME"].strip(), center="EARTH", ref_frame=meta["REF_FRAME"].strip(),
        time_system=scale, frame=frame, t0_tai_ns=t0,
        t_s=np.array([(t - t0) / NS_PER_S for t in times]), r_km=r, v_km_s=v,
        usable_tai_ns=(max(lo, times[0]), min(hi, times[-1])), points=points)


def parse_oem(text: str, *, source: str = "<text>", points: int = DEFAULT_HERMITE_POINTS) -> Ephemeris:
    """An :class:`Ephemeris` from the text of an OEM in key-value notation.

    Parameters
    ----------
    text : str
    source : str
        Names the file in errors.
    points : int
        Hermite nodes when a segment states no ``INTERPOLATION_DEGREE`` (2..16).

    Raises
    ------
    DataFileError
        One line naming the file (and line) and the fault.

    Examples
    --------
    >>> text = '''CCSDS_OEM_VERS = 2.0
    ... CREATION_DATE = 2026-03-01T00:00:00
    ... ORIGINATOR = EXAMPLE
    ... META_START
    ... OBJECT_NAME = TAMARISK
    ... OBJECT_ID = 2026-999A
    ... CENTER_NAME = EARTH
    ... REF_FRAME = EME2000
    ... TIME_SYSTEM = UTC
    ... START_TIME = 2026-03-14T09:30:00
    ... STOP_TIME = 2026-03-14T09:32:00
    ... META_STOP
    ... 2026-03-14T09:30:00 7000 0 0 0 7.5 0
    ... 2026-03-14T09:31:00 6996.0 449.9 0 -0.13 7.49 0
    ... 2026-03-14T09:32:00 6983.9 899.3 0 -0.27 7.45 0
    ... '''
    >>> eph = parse_oem(text)
    >>> eph.frame, len(eph.segments[0].t_s)
    ('EME2000', 3)
    """
    if not isinstance(text, str):
        raise TypeError(f"Argument 'text' must be a string, not {type(text).__name__}.")
    if isinstance(points, bool) or not isinstance(points, int) or not 2 <= points <= 16:
        raise ValueError(f"Argument 'points' must be 2..16, not {points!r}.")
    refuse_xml(text, source, "an Orbit Ephemeris Message")
    header: dict[str, str] = {}
    segments: list[EphemerisSegment] = []
    meta: dict[str, str] | None = None
    rows: list[tuple[int, str, list[str]]] = []
    state = "header"  # header | meta | data | covariance
    lineno = 0
    for lineno, raw in enumerate(text.splitlines(), 1):
        line = raw.strip()
        if not line or line.startswith("COMMENT"):
            continue
        if line == "META_START":
            if state == "meta":
                raise DataFileError(f"{source}: line {lineno}: META_START inside a metadata block")
            if state == "header" and "CCSDS_OEM_VERS" not in header:
                raise DataFileError(f"{source}: line {lineno}: the header has no CCSDS_OEM_VERS")
            if meta is not None:
                segments.append(_segment(meta, rows, source, lineno - 1, points))
            meta, rows, state = {}, [], "meta"
            continue
        new_state = bracket_step(line, state, _BLOCKS, f"{source}: line {lineno}")
        if new_state is not None:
            state = new_state
            continue
        if state == "covariance":
            continue
        if state in ("header", "meta"):
            key, value = keyword_value(line, f"{source}: line {lineno}")
            if state == "header":
                if key not in ("CCSDS_OEM_VERS", "CREATION_DATE", "ORIGINATOR", "MESSAGE_ID"):
                    raise DataFileError(f"{source}: line {lineno}: unknown header keyword {key!r}")
                header[key] = value
            else:
                if key not in _META_KEYS:
                    raise DataFileError(f"{source}: line {lineno}: unknown metadata keyword {key!r}")
                meta[key] = value
            continue
        parts = line.split()
        rows.append((lineno, parts[0], parts[1:]))
    if state in ("meta", "covariance"):
        raise DataFileError(f"{source}: ends inside a {'metadata' if state == 'meta' else 'covariance'} block")
    if meta is None:
        raise DataFileError(f"{source}: no META_START: not an Orbit Ephemeris Message")
    segments.append(_segment(meta, rows, source, lineno, points))
    return Ephemeris(segments, source=source, header=header)


def read_oem(path: str | os.PathLike, *, points: int = DEFAULT_HERMITE_POINTS) -> Ephemeris:
    """Read an OEM file in key-value notation (see :func:`parse_oem`).

    Raises
    ------
    DataFileError
        The file is missing, not text, too large, or not a usable OEM.
    """
    p, text = read_text_file(path, what="an ephemeris", max_bytes=_MAX_BYTES, encoding="utf-8")
    return parse_oem(text, source=str(p), points=points)
