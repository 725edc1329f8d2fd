"""CCSDS Tracking Data Messages (503.0-B, the text key-value form): the carrier track out, and read back.

The writer puts a pass's one-way carrier track in one segment: the station receives what the spacecraft
sends, so the signal path runs from participant 2 (the spacecraft) to participant 1 (the station).
Keywords (CCSDS 503.0-B-1, sec. 3; ``CCSDS_TDM_VERS = 1.0``).  Their names, their order, the value types,
enumerations, patterns and bounds, and that a segment holds at least one data line are checked against
ccsds-ndm's data models, generated from the CCSDS TDM 1.0 XML schema, line by line on the messages we
write (tests/test_ndm_reference.py).  The schema does not settle a keyword's *meaning*, so these stay
**from memory, not confirmed** (../shared/REFERENCES.md has no TDM section): that participant 1 is the
station and ``PATH = 2,1`` the one-way path from 2 to 1, that ``RECEIVE_FREQ_1`` is the frequency received
by participant 1 (in Hz: the schema gives no unit) and is the nominal frequency plus the measured offset
(its sign convention), that ``INTEGRATION_REF = MIDDLE`` puts the epoch in the middle of the interval,
``TIMETAG_REF = RECEIVE`` makes it the epoch of reception, and ``FREQ_OFFSET`` is added to every value:

=========================  ===============================================================
``CCSDS_TDM_VERS``         header: format version (``1.0``)
``CREATION_DATE``          header: UTC of writing
``ORIGINATOR``             header: who wrote it
``COMMENT``                free text (header, metadata, data)
``META_START/META_STOP``   bracket the metadata of a segment
``TIME_SYSTEM``            the scale of every epoch in the segment (``UTC``)
``START_TIME/STOP_TIME``   first and last data epoch
``PARTICIPANT_1``, ``_2``  the station and the spacecraft
``MODE``                   ``SEQUENTIAL`` (one signal path)
``PATH``                   ``2,1``: from participant 2 to participant 1 (one-way downlink)
``TIMETAG_REF``            the epoch is that of reception: ``RECEIVE``
``INTEGRATION_INTERVAL``   seconds each observable averages
``INTEGRATION_REF``        where in the interval the epoch lies: ``MIDDLE``
``FREQ_OFFSET``            Hz added to every ``RECEIVE_FREQ`` value (0: full frequencies are written)
``DATA_START/DATA_STOP``   bracket the data lines
``RECEIVE_FREQ_1``         data: ``epoch value``, the frequency (Hz) received by participant 1
=========================  ===============================================================
"""

from __future__ import annotations

import math
import os
import re
import shutil
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.errors import DataFileError
from pipeline.orbit._files import bracket_step, keyword_value, read_text_file, refuse_xml
from pipeline.timescales import format_utc, parse_utc, tai_from_scale

__all__ = ["TrackingData", "TrackingSegment", "TdmWriter", "format_tdm", "write_tdm", "parse_tdm", "read_tdm"]

_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")
_HEADER_KEYS = ("CCSDS_TDM_VERS", "CREATION_DATE", "ORIGINATOR", "MESSAGE_ID")
_META_KEYS = {"TIME_SYSTEM", "START_TIME", "STOP_TIME", "PARTICIPANT_1", "PARTICIPANT_2", "PARTICIPANT_3",
              "PARTICIPANT_4", "PARTICIPANT_5", "MODE", "PATH", "PATH_1", "PATH_2", "TRANSMIT_BAND", "RECEIVE_BAND",
              "TURNAROUND_NUMERATOR", "TURNAROUND_DENOMINATOR", "TIMETAG_REF", "INTEGRATION_INTERVAL",
              "INTEGRATION_REF", "FREQ_OFFSET", "RANGE_MODE", "RANGE_MODULUS", "RANGE_UNITS", "ANGLE_TYPE",
              "REFERENCE_FRAME", "TRANSMIT_DELAY_1", "TRANSMIT_DELAY_2", "RECEIVE_DELAY_1", "RECEIVE_DELAY_2",
              "DATA_QUALITY", "CORRECTION_ANGLE_1", "CORRECTION_ANGLE_2", "CORRECTION_DOPPLER",
              "CORRECTION_RANGE", "CORRECTION_RECEIVE", "CORRECTION_TRANSMIT", "CORRECTIONS_APPLIED"}
_SCALES = ("UTC", "TAI", "TT", "GPS", "TDB")
_MAX_BYTES = 256 << 20
_BLOCKS = {"META_STOP": (("meta",), "between", "META_STOP without META_START"),
           "DATA_START": (("between",), "data", "DATA_START outside a segment"),
           "DATA_STOP": (("data",), "done", "DATA_STOP without DATA_START")}


@dataclass
class TrackingSegment:
    """One metadata block and its data lines.

    Attributes
    ----------
    meta : dict
        Keyword -> value text.
    observations : list of (keyword, epoch text, TAI ns, value)
        The data lines, epochs read on the segment's ``TIME_SYSTEM``.
    """

    meta: dict = field(default_factory=dict)
    observations: list = field(default_factory=list)


@dataclass
class TrackingData:
    """A parsed Tracking Data Message."""

    header: dict
    segments: list
    source: str = "<text>"


def _check_names(**names: str) -> None:
    for name, value in names.items():
        if not isinstance(value, str) or not value.strip() or "\n" in value or "=" in value:
            raise ValueError(f"Argument '{name}' must be a one-line name without '=', not {value!r}.")


def _check_frequency(downlink_frequency_hz) -> float:
    f = float(downlink_frequency_hz)
    if not (math.isfinite(f) and f > 0):
        raise ValueError(f"Argument 'downlink_frequency_hz' must be a positive finite number, "
                         f"not {downlink_frequency_hz!r}.")
    return f


def _check_interval(integration_interval_s) -> float:
    ti = float(integration_interval_s)
    if not (math.isfinite(ti) and ti > 0):
        raise ValueError(f"Argument 'integration_interval_s' must be > 0, not {integration_interval_s!r}.")
    return ti


def _observation(row: dict, frequency_hz: float, tuning_offset_hz: float) -> tuple[int, float] | None:
    """A row's epoch (TAI ns) and received frequency (Hz); None for a row without lock or a finite offset."""
    off = row.get("carrier_offset_hz")
    if off is None or not bool(row.get("locked")) or not math.isfinite(float(off)):
        return None
    return parse_utc(str(row["utc"]), assume_utc=True), frequency_hz + float(off) + float(tuning_offset_hz)


def _data_line(tai_ns: int, frequency_hz: float) -> str:
    """One data line of the message (with its newline): the one place a data line is formatted."""
    return f"RECEIVE_FREQ_1 = {format_utc(tai_ns, zone=False)} {frequency_hz:.6f}\n"


#: The end of the message, after the data lines.
_TAIL = "DATA_STOP\n"


def _head(*, first_tai_ns: int, last_tai_ns: int, spacecraft: str, station: str,
          integration_interval_s: float, originator: str, creation_tai_ns: int | None, comment: str | None) -> str:
    """Header and metadata up to and including ``DATA_START`` (with its newline)."""
    if creation_tai_ns is None:
        import time

        from pipeline.timescales import tai_from_posix_ns

        creation_tai_ns = tai_from_posix_ns(time.time_ns())
    lines = ["CCSDS_TDM_VERS = 1.0"]
    if comment:
        lines.append("COMMENT " + " ".join(str(comment).split()))
    lines += [f"CREATION_DATE = {format_utc(creation_tai_ns, digits=3, zone=False)}",
              f"ORIGINATOR = {originator.strip()}",
              "",
              "META_START",
              "COMMENT one-way carrier track: received frequency = nominal downlink frequency + measured offset",
              "TIME_SYSTEM = UTC",
              f"START_TIME = {format_utc(first_tai_ns, zone=False)}",
              f"STOP_TIME = {format_utc(last_tai_ns, zone=False)}",
              f"PARTICIPANT_1 = {station.strip()}",
              f"PARTICIPANT_2 = {spacecraft.strip()}",
              "MODE = SEQUENTIAL",
              "PATH = 2,1",
              "TIMETAG_REF = RECEIVE",
              f"INTEGRATION_INTERVAL = {integration_interval_s:.9g}",
              "INTEGRATION_REF = MIDDLE",
              "FREQ_OFFSET = 0.0",
              "META_STOP",
              "",
              "DATA_START",
              ""]
    return "\n".join(lines)


def format_tdm(rows: Iterable[dict], *, spacecraft: str, station: str, downlink_frequency_hz: float,
               integration_interval_s: float, tuning_offset_hz: float = 0.0, originator: str = "DOWNLINK",
               creation_tai_ns: int | None = None, comment: str | None = None) -> str:
    """A Tracking Data Message (KVN text) with one-way received frequencies from Doppler rows.

    Parameters
    ----------
    rows : iterable of dict
        :func:`pipeline.demod.residual.doppler_rows` rows: ``utc`` (the middle of the interval the row
        averages), ``carrier_offset_hz``, ``locked``.  Rows without lock or without a finite offset are
        left out.
    spacecraft, station : str
        Participant names (the profile's ``name`` and ``[station] name``).
    downlink_frequency_hz : float
        Nominal carrier frequency; each observable is ``f + carrier_offset_hz + tuning_offset_hz``.
    integration_interval_s : float
        Seconds each row averages (the demodulator's processing block over the sample rate).
    tuning_offset_hz : float
        Recording centre frequency minus ``f``.
    creation_tai_ns : int, optional
        ``CREATION_DATE`` (TAI ns); now when None.
    comment : str, optional
        One ``COMMENT`` line in the header.

    Returns
    -------
    str
        Keywords as tabulated in the module docstring, epochs in UTC with 9 decimals (23:59:60.x inside
        a leap second), frequencies in Hz with 6 decimals.  :class:`TdmWriter` writes the same text as the
        rows arrive.

    Raises
    ------
    ValueError
        No row is locked with a finite offset: the message would have no data line, and a TDM's data
        section holds at least one observation (``minOccurs="1"`` in the CCSDS TDM XML schema, as the
        models of ccsds-ndm carry it; checked in tests/test_ndm_reference.py).

    Examples
    --------
    >>> rows = [{"utc": "2026-03-14T09:30:00.016384Z", "carrier_offset_hz": 2301.5, "locked": True}]
    >>> text = format_tdm(rows, spacecraft="TAMARISK", station="HOLLOW RIDGE", downlink_frequency_hz=8.45e9,
    ...                   integration_interval_s=0.032768, creation_tai_ns=0 + 2_159_000_000 * 10**9)
    >>> [ln for ln in text.splitlines() if ln.startswith("RECEIVE_FREQ_1")]
    ['RECEIVE_FREQ_1 = 2026-03-14T09:30:00.016384000 8450002301.500000']
    """
    f = _check_frequency(downlink_frequency_hz)
    ti = _check_interval(integration_interval_s)
    _check_names(spacecraft=spacecraft, station=station, originator=originator)
    data = [obs for obs in (_observation(row, f, tuning_offset_hz) for row in rows) if obs is not None]
    if not data:
        raise ValueError("Argument 'rows' must hold a locked row with a finite carrier offset (a Tracking Data "
                         "Message has at least one data line), not none.")
    head = _head(first_tai_ns=data[0][0], last_tai_ns=data[-1][0],
                 spacecraft=spacecraft, station=station, integration_interval_s=ti, originator=originator,
                 creation_tai_ns=creation_tai_ns, comment=comment)
    return head + "".join(_data_line(t, value) for t, value in data) + _TAIL


def write_tdm(path: str | os.PathLike, rows: Iterable[dict], **kwargs) -> Path:
    """Write :func:`format_tdm` to ``path``; returns the path."""
    p = Path(os.fspath(path))
    p.write_text(format_tdm(rows, **kwargs), encoding="ascii")
    return p


class TdmWriter:
    """A Tracking Data Message written as its rows arrive, in constant memory (the decode's ``doppler.tdm``).

    The header names the first and last epoch, which a live stream knows only at its end, so the data
    lines go to a body file beside the message (``NAME.body.partial``) as the rows come, and
    :meth:`finish` writes the header, the body copied from that file and the end of the message under
    ``NAME.partial``, renames it to ``NAME`` and removes the body.  Until then no file named ``NAME``
    exists, so a run that fails or is killed leaves no message passed off as complete.  Python holds the
    first and last epoch and two counters, whatever the length of the stream.

    Parameters
    ----------
    path : str or os.PathLike
        The message's file; its folder must exist.
    spacecraft, station, downlink_frequency_hz, tuning_offset_hz, originator, comment
        As :func:`format_tdm` (checked here, before any row).

    Notes
    -----
    Every data line is formatted by the same function as :func:`format_tdm`'s, so for any split of the
    rows into :meth:`process` calls the file equals ``format_tdm`` of all the rows (the same
    ``creation_tai_ns`` given).  Cost: one UTC parse and one format per row; the copy at the end reads the
    body once.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> rows = [{"utc": "2026-03-14T09:30:00.016384Z", "carrier_offset_hz": 2301.5, "locked": True}]
    >>> keys = dict(spacecraft="TAMARISK", station="HOLLOW RIDGE", downlink_frequency_hz=8.45e9)
    >>> with tempfile.TemporaryDirectory() as d:
    ...     w = TdmWriter(pathlib.Path(d) / "doppler.tdm", **keys)
    ...     w.process(rows)
    ...     text = w.finish(integration_interval_s=0.032768, creation_tai_ns=2_159_000_000 * 10**9).read_text()
    ...     names = sorted(p.name for p in pathlib.Path(d).iterdir())
    >>> text == format_tdm(rows, integration_interval_s=0.032768, creation_tai_ns=2_159_000_000 * 10**9, **keys)
    True
    >>> names
    ['doppler.tdm']
    """

    def __init__(self, path: str | os.PathLike, *, spacecraft: str, station: str, downlink_frequency_hz: float,
                 tuning_offset_hz: float = 0.0, originator: str = "DOWNLINK", comment: str | None = None):
        self.path = Path(os.fspath(path))
        self.body_path = self.path.with_name(self.path.name + ".body.partial")
        self.frequency_hz = _check_frequency(downlink_frequency_hz)
        _check_names(spacecraft=spacecraft, station=station, originator=originator)
        self.tuning_offset_hz = float(tuning_offset_hz)
        self._names = dict(spacecraft=spacecraft, station=station, originator=originator, comment=comment)
        self._body = None
        self.reset()

    def reset(self) -> None:
        """Forget every row (the body file is removed)."""
        self.discard()
        self.locked_rows = 0  # rows with lock, a finite offset or not
        self.lines = 0  # data lines written
        self.first_tai_ns: int | None = None
        self.last_tai_ns: int | None = None

    def process(self, rows: Iterable[dict]) -> None:
        """Append the data lines of ``rows`` (as :func:`format_tdm` reads them) to the body file."""
        for row in rows:
            self.locked_rows += bool(row.get("locked"))
            obs = _observation(row, self.frequency_hz, self.tuning_offset_hz)
            if obs is None:
                continue
            if self._body is None:
                self._body = open(self.body_path, "w", encoding="ascii")
            self._body.write(_data_line(*obs))
            if self.first_tai_ns is None:
                self.first_tai_ns = obs[0]
            self.last_tai_ns = obs[0]
            self.lines += 1

    def close(self) -> None:
        """Close the body file (it stays, under its partial name, until :meth:`finish` or :meth:`discard`)."""
        if self._body is not None:
            self._body.close()
            self._body = None

    def discard(self) -> None:
        """Close and remove the body file: no message is written."""
        self.close()
        self.body_path.unlink(missing_ok=True)

    def finish(self, *, integration_interval_s: float, creation_tai_ns: int | None = None) -> Path | None:
        """Write the whole message to :attr:`path` (header, the body, ``DATA_STOP``); returns the path.

        With no data line (no row locked with a finite offset) no message is written, since a TDM holds at
        least one observation (as :func:`format_tdm` refuses): the body is removed and None returned.
        """
        ti = _check_interval(integration_interval_s)
        if not self.lines:
            self.discard()
            return None
        self.close()
        part = self.path.with_name(self.path.name + ".partial")
        with open(part, "w", encoding="ascii") as out:
            out.write(_head(first_tai_ns=self.first_tai_ns, last_tai_ns=self.last_tai_ns, integration_interval_s=ti,
                            creation_tai_ns=creation_tai_ns, **self._names))
            with open(self.body_path, encoding="ascii") as body:
                shutil.copyfileobj(body, out)
            out.write(_TAIL)
        os.replace(part, self.path)
        self.discard()
        return self.path


def parse_tdm(text: str, *, source: str = "<text>") -> TrackingData:
    """Read a Tracking Data Message in key-value notation.

    Every data line must be ``KEYWORD = epoch value`` with the epoch on the segment's ``TIME_SYSTEM``
    (UTC, TAI, TT, GPS or TDB) and a decimal value.

    Raises
    ------
    DataFileError
        One line naming the file, the line and the fault.

    Examples
    --------
    >>> rows = [{"utc": "2016-12-31T23:59:60.5Z", "carrier_offset_hz": -15.25, "locked": True}]
    >>> tdm = parse_tdm(format_tdm(rows, spacecraft="TAMARISK", station="HOLLOW RIDGE",
    ...                            downlink_frequency_hz=2.2e9, integration_interval_s=1.0, creation_tai_ns=0
    ...                            + 2_000_000_000 * 10**9))
    >>> kw, epoch, tai, value = tdm.segments[0].observations[0]
    >>> kw, epoch, value
    ('RECEIVE_FREQ_1', '2016-12-31T23:59:60.500000000', 2199999984.75)
    """
    if not isinstance(text, str):
        raise TypeError(f"Argument 'text' must be a string, not {type(text).__name__}.")
    refuse_xml(text, source, "a Tracking Data Message")
    header: dict[str, str] = {}
    segments: list[TrackingSegment] = []
    seg: TrackingSegment | None = None
    state = "header"  # header | meta | between (META_STOP .. DATA_START) | data | done
    for lineno, raw in enumerate(text.splitlines(), 1):
        line = raw.strip()
        if not line or line.startswith("COMMENT"):
            continue
        where = f"{source}: line {lineno}"
        if line == "META_START":
            if state not in ("header", "done"):
                raise DataFileError(f"{where}: META_START inside a {state} block")
            if "CCSDS_TDM_VERS" not in header:
                raise DataFileError(f"{where}: the header has no CCSDS_TDM_VERS")
            seg = TrackingSegment()
            segments.append(seg)
            state = "meta"
            continue
        new_state = bracket_step(line, state, _BLOCKS, where)
        if new_state is not None:
            if line == "META_STOP" and seg.meta.get("TIME_SYSTEM", "").upper() not in _SCALES:
                raise DataFileError(f"{where}: TIME_SYSTEM must be one of {', '.join(_SCALES)}, "
                                    f"not {seg.meta.get('TIME_SYSTEM')!r}")
            state = new_state
            continue
        key, value = keyword_value(line, where)
        if state == "header":
            if key not in _HEADER_KEYS:
                raise DataFileError(f"{where}: unknown header keyword {key!r}")
            header[key] = value
        elif state == "meta":
            if key not in _META_KEYS:
                raise DataFileError(f"{where}: unknown metadata keyword {key!r}")
            seg.meta[key] = value
        elif state == "data":
            parts = value.split()
            if len(parts) != 2 or _NUMBER.fullmatch(parts[1]) is None:
                raise DataFileError(f"{where}: a data line is 'KEYWORD = epoch value', got {line[:60]!r}")
            try:
                tai = tai_from_scale(parts[0], seg.meta["TIME_SYSTEM"].upper(), name="epoch")
            except ValueError as exc:
                raise DataFileError(f"{where}: {exc}") from None
            seg.observations.append((key, parts[0], tai, float(parts[1])))
        else:
            raise DataFileError(f"{where}: {key!r} outside a metadata or data block")
    if state in ("meta", "data", "between"):
        raise DataFileError(f"{source}: ends inside a segment (no {'META_STOP' if state == 'meta' else 'DATA_STOP'})")
    if not segments:
        raise DataFileError(f"{source}: no META_START: not a Tracking Data Message")
    return TrackingData(header=header, segments=segments, source=source)


def read_tdm(path: str | os.PathLike) -> TrackingData:
    """Read a Tracking Data Message file (see :func:`parse_tdm`)."""
    p, text = read_text_file(path, what="a tracking data message", max_bytes=_MAX_BYTES, encoding="utf-8")
    return parse_tdm(text, source=str(p))
