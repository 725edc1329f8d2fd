"""Channel symbols from a demodulator elsewhere: int8 soft values or packed hard bits."""

from __future__ import annotations

import math
import os
from collections.abc import Iterator
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import Literal

import numpy as np

from pipeline.errors import RecordingError
from pipeline.recording._kernels import int8_to_soft, unpack_bits_to_soft
from pipeline.recording._time import check_end_time, elapsed_ns, position_ratio, start_tai_ns
from pipeline.timescales import posix_ns_from_tai

__all__ = ["SymbolKind", "SymbolChunk", "SymbolFile", "open_symbols"]

SymbolKind = Literal["soft", "bits"]


@dataclass(frozen=True, eq=False)
class SymbolChunk:
    """Consecutive channel symbols as soft values.

    Attributes
    ----------
    soft : numpy.ndarray
        float32, positive = bit 0, magnitude = confidence, 0.0 = erasure.
    start : int
        Index of ``soft[0]`` among the file's channel symbols.
    """

    soft: np.ndarray
    start: int

    @property
    def stop(self) -> int:
        return self.start + int(self.soft.shape[0])

    def __len__(self) -> int:
        return int(self.soft.shape[0])


class SymbolTime:
    """The time of channel symbols: ``start + index / symbol_rate_hz`` on the uniform scale.

    Shared by symbol files and symbol streams.  ``start_tai_ns`` names the leading edge of channel
    symbol 0 (TAI ns since 1958); ``time_known`` is True when both it and the rate are given.
    """

    def __init__(self, path: Path, *, start_tai_ns: int | None = None, symbol_rate_hz: float | None = None) -> None:
        self.path = path
        self.start_tai_ns = start_tai_ns
        self.symbol_rate_hz = symbol_rate_hz
        self._rate = None if symbol_rate_hz is None else Fraction(symbol_rate_hz)
        self.time_known = start_tai_ns is not None and symbol_rate_hz is not None
        self.time_source = "--start" if self.time_known else None

    def tai_ns(self, position: float) -> int:
        """Time of channel symbol ``position`` (its leading edge) on the uniform scale, TAI ns since 1958.

        ``start + position / symbol_rate_hz``, exact rational arithmetic (see
        :func:`pipeline.recording._time.elapsed_ns`); a leap second in the pass is counted.

        Raises
        ------
        RecordingError
            No start time or no rate was given.

        Examples
        --------
        >>> import os, tempfile
        >>> from pipeline.timescales import format_utc
        >>> with tempfile.TemporaryDirectory() as d:
        ...     p = os.path.join(d, "ch.bits")
        ...     _ = open(p, "wb").write(bytes(16))
        ...     f = open_symbols(p, "bits", start="2016-12-31T23:59:59.5Z", symbol_rate_hz=64.0)
        ...     format_utc(f.tai_ns(64))
        '2016-12-31T23:59:60.500000000Z'
        """
        position_ratio(position)
        if not self.time_known:
            raise RecordingError(f"{self.path}: channel symbols have no start time; give one (--start)")
        return self.start_tai_ns + elapsed_ns(position, 0, self._rate)

    def utc_ns(self, position: float) -> int:
        """POSIX ns (UTC since 1970) of :meth:`tai_ns`."""
        return posix_ns_from_tai(self.tai_ns(position))


def symbol_rate_or_error(symbol_rate_hz) -> float | None:
    """Check a channel symbol rate argument (None, or a positive finite number)."""
    if symbol_rate_hz is None:
        return None
    if isinstance(symbol_rate_hz, bool) or not isinstance(symbol_rate_hz, (int, float, np.integer, np.floating)) \
            or not (math.isfinite(float(symbol_rate_hz)) and float(symbol_rate_hz) > 0):
        raise ValueError(f"Argument 'symbol_rate_hz' must be a positive finite number, not {symbol_rate_hz!r}.")
    return float(symbol_rate_hz)


class SymbolFile(SymbolTime):
    """A file of channel symbols read through read-only memory maps (see :func:`open_symbols`).

    Attributes
    ----------
    path : pathlib.Path
    kind : str
        ``"soft"``: one int8 per channel symbol, value kept (+ = bit 0, 0 = erasure).
        ``"bits"``: packed hard channel bits, MSB first; bit 0 -> +1.0, bit 1 -> -1.0.
    num_symbols : int
        Channel symbols in the file (bytes for soft, 8 x bytes for bits).
    symbol_rate_hz : float or None
        Channel symbols per second (the profile's symbol rate x channel bits per modulation symbol).
    start_tai_ns : int or None
        Time of the leading edge of channel symbol 0 on the uniform scale (TAI ns since 1958).
    time_known : bool
        True when both the start time and the rate were given.
    time_source : str or None
        ``"--start"`` when the time is known, else None.
    """

    def __init__(self, path: Path, kind: str, size_bytes: int, *, start_tai_ns: int | None = None,
                 symbol_rate_hz: float | None = None) -> None:
        super().__init__(path, start_tai_ns=start_tai_ns, symbol_rate_hz=symbol_rate_hz)
        self.kind = kind
        self.size_bytes = int(size_bytes)
        self.num_symbols = self.size_bytes * (8 if kind == "bits" else 1)

    def __repr__(self) -> str:
        return f"SymbolFile({str(self.path)!r}, {self.kind}, {self.num_symbols} symbols)"

    def _convert(self, start: int, count: int) -> SymbolChunk:
        out = np.empty(count, dtype=np.float32)
        if count == 0:
            return SymbolChunk(out, start)
        if self.kind == "soft":
            raw = np.memmap(self.path, dtype=np.int8, mode="r", offset=start, shape=(count,)).view(np.ndarray)
            int8_to_soft(raw, out)
        else:
            b0, b1 = start >> 3, (start + count + 7) >> 3
            raw = np.memmap(self.path, dtype=np.uint8, mode="r", offset=b0, shape=(b1 - b0,)).view(np.ndarray)
            unpack_bits_to_soft(raw, start & 7, out)
        del raw
        return SymbolChunk(out, start)

    def chunks(self, chunk_symbols: int, start: int = 0, stop: int | None = None) -> Iterator[SymbolChunk]:
        """Yield :class:`SymbolChunk` objects of ``chunk_symbols`` symbols over ``[start, stop)``.

        Notes
        -----
        One read-only map per chunk, converted in one O(n) pass; memory is O(chunk_symbols).
        """
        if isinstance(chunk_symbols, (bool, np.bool_)) or not isinstance(chunk_symbols, (int, np.integer)):
            raise TypeError(f"Argument 'chunk_symbols' must be an integer, not {type(chunk_symbols).__name__}.")
        if chunk_symbols < 1:
            raise ValueError(f"Argument 'chunk_symbols' must be >= 1, not {chunk_symbols}.")
        for name, v in (("start", start), ("stop", stop)):
            if v is not None and (isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer))):
                raise TypeError(f"Argument '{name}' must be an integer, not {type(v).__name__}.")
        start = int(start)
        stop = self.num_symbols if stop is None else int(stop)
        if not 0 <= start <= self.num_symbols:
            raise ValueError(f"Argument 'start' must be 0..{self.num_symbols}, not {start}.")
        if not start <= stop <= self.num_symbols:
            raise ValueError(f"Argument 'stop' must be {start}..{self.num_symbols}, not {stop}.")
        pos = start
        while pos < stop:
            n = min(int(chunk_symbols), stop - pos)
            yield self._convert(pos, n)
            pos += n


def open_symbols(path: str | os.PathLike, kind: str, *, start: str | int | None = None,
                 symbol_rate_hz: float | None = None) -> SymbolFile:
    """Open a channel-symbol file for ``--input soft`` or ``--input bits``.

    Parameters
    ----------
    path : str or path-like
    kind : {"soft", "bits"}
        ``soft``: one int8 per channel symbol, positive = bit 0 (the value becomes the float32
        soft value, 0 = erasure).  ``bits``: packed hard channel bits, MSB first of each octet;
        a 0 bit becomes +1.0 and a 1 bit -1.0.
    start : str or int, optional
        UTC of the leading edge of channel symbol 0: ISO-8601 with a zone, or POSIX ns since 1970.
    symbol_rate_hz : float, optional
        Channel symbols per second (needed with ``start`` for :meth:`SymbolFile.tai_ns`).

    Raises
    ------
    ValueError
        ``kind`` is not ``"soft"`` or ``"bits"``, or the rate is not a positive finite number.
    RecordingError
        The file is missing, not a regular file, or empty; ``start`` unreadable, before 1972, or the
        symbols' time running past the year 9999.
    """
    if kind not in ("soft", "bits"):
        raise ValueError(f"Argument 'kind' must be 'soft' or 'bits', not {kind!r}.")
    symbol_rate_hz = symbol_rate_or_error(symbol_rate_hz)
    p = Path(os.fspath(path))
    try:
        st = p.stat()
    except FileNotFoundError:
        raise RecordingError(f"{p}: symbol file not found") from None
    except OSError as exc:
        raise RecordingError(f"{p}: cannot read ({exc.strerror})") from None
    if not p.is_file():
        raise RecordingError(f"{p}: not a regular file")
    if st.st_size == 0:
        raise RecordingError(f"{p}: contains no symbols")
    start_tai = None if start is None else start_tai_ns(p, start, "--start")
    f = SymbolFile(p, kind, st.st_size, start_tai_ns=start_tai, symbol_rate_hz=symbol_rate_hz)
    if f.time_known:
        check_end_time(p, f.tai_ns(f.num_symbols), "channel symbols")
    return f
