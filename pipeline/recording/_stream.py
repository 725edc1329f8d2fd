"""Live input: IQ samples or channel symbols from a pipe, standard input or any binary file object.

A stream is read once, in order, as the octets arrive; its length is known only at its end.  The
chunks are the same :class:`~pipeline.recording.Chunk` / :class:`~pipeline.recording.SymbolChunk`
objects a file gives, so a decode chain takes them unchanged.  Memory is one chunk whatever the
length of the stream.
"""

from __future__ import annotations

import io
import os
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import RecordingError
from pipeline.recording._formats import FORMAT_CHOICES
from pipeline.recording._kernels import float_iq_to_complex64, int8_to_soft, int_iq_to_complex64, unpack_bits_to_soft
from pipeline.recording._recording import (
    Capture,
    Chunk,
    Recording,
    _check_frequency,
    _check_rate,
    _format_or_error,
    _synth_meta,
    _timed_capture,
)
from pipeline.recording._symbols import SymbolChunk, SymbolTime, symbol_rate_or_error
from pipeline.recording._time import start_tai_ns

__all__ = ["SampleStream", "SymbolStream", "open_stream", "open_symbol_stream", "STDIN"]

#: The path that names standard input.
STDIN = "-"

# A non-blocking source with nothing to read is polled at this interval.
_POLL_S = 0.005


def _check_count(name: str, value: Any) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"Argument '{name}' must be an integer, not {type(value).__name__}.")
    if value < 1:
        raise ValueError(f"Argument '{name}' must be >= 1, not {value}.")
    return int(value)


class _Source:
    """Reads octets from a binary file object into a caller's buffer; owns what it opened."""

    def __init__(self, source: Any, what: str) -> None:
        self.owned = False
        if isinstance(source, (str, os.PathLike)):
            if os.fspath(source) == STDIN:
                stdin = sys.stdin
                if stdin is None:
                    raise RecordingError(f"-: there is no standard input to read {what} from")
                if stdin.isatty():
                    raise RecordingError(f"-: standard input is a terminal; pipe the {what} into it "
                                         f"(... | downlink decode - ...)")
                self.fh, self.name = stdin.buffer, STDIN
            else:
                p = Path(os.fspath(source))
                try:
                    self.fh = open(p, "rb", buffering=0)
                except OSError as exc:
                    raise RecordingError(f"{p}: cannot open ({exc.strerror})") from None
                self.owned, self.name = True, str(p)
        else:
            fh = source
            if isinstance(fh, io.TextIOBase):
                fh = getattr(fh, "buffer", None)
                if fh is None:
                    raise TypeError("Argument 'source' must be a binary file object, not a text stream.")
            if not (hasattr(fh, "readinto") or hasattr(fh, "read")):
                raise TypeError(f"Argument 'source' must be '-', a path or a binary file object, "
                                f"not {type(source).__name__}.")
            self.fh, self.name = fh, str(getattr(source, "name", "<stream>"))
        self._read1 = getattr(self.fh, "readinto1", None)
        self._readinto = getattr(self.fh, "readinto", None)

    def read_into(self, view: memoryview, *, fill: bool) -> int:
        """Read into ``view``: until it is full (``fill``) or what one read gives; 0 only at the end."""
        done = 0
        while done < len(view):
            part = view[done:]
            try:
                if not fill and self._read1 is not None:
                    got = self._read1(part)
                elif self._readinto is not None:
                    got = self._readinto(part)
                else:
                    data = self.fh.read(len(part))
                    got = None if data is None else len(data)
                    if got:
                        part[:got] = data
            except OSError as exc:
                raise RecordingError(f"{self.name}: cannot read ({exc.strerror})") from None
            if got is None:  # non-blocking source, nothing there yet
                if done and not fill:
                    return done
                time.sleep(_POLL_S)
                continue
            if got == 0:
                return done
            done += got
            if not fill:
                return done
        return done

    def close(self) -> None:
        if self.owned:
            self.fh.close()


class _ReadOnce:
    """What a live stream adds to its reader: it is read once, from its start; it closes what it opened."""

    _source: _Source
    _started: bool

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Close the source if this object opened it (standard input and file objects stay open)."""
        self._source.close()

    def _begin(self, start: Any, stop: Any) -> None:
        if start != 0 or stop is not None:
            raise ValueError(f"Argument 'start' must be 0 and 'stop' None for a live stream, not {start!r}, {stop!r}.")
        if self._started:
            raise ValueError("Argument 'self' is a live stream that has been read already: it is read once.")
        self._started = True


class SampleStream(_ReadOnce, Recording):
    """IQ samples arriving on a pipe, standard input or a binary file object (see :func:`open_stream`).

    A :class:`~pipeline.recording.Recording` that can be read only once, in order, with
    :meth:`chunks`; ``num_samples`` (and ``duration_s``) are None until the stream has ended.
    Time works as for a raw file: ``tai_ns(position)`` from the ``start`` given.

    Attributes
    ----------
    samples_read : int
        Samples delivered so far.
    trailing_bytes : int
        Octets after the last whole sample when the stream ended (dropped; a writer killed in the
        middle of a sample leaves them).
    """

    def __init__(self, source: _Source, *, fmt, sample_rate_hz: float, capture: Capture) -> None:
        meta = _synth_meta(fmt, sample_rate_hz, capture, container="stream")
        super().__init__(path=Path(source.name), container="stream", fmt=fmt, sample_rate_hz=sample_rate_hz,
                         num_samples=None, captures=(capture,), metadata=meta,
                         time_source="--start" if capture.time_given else None)
        self._source = source
        self.samples_read = 0
        self.trailing_bytes = 0
        self._started = False

    def checksum(self):
        """None: a stream carries no ``core:sha512``."""
        return None

    def read(self, start: int = 0, count: int | None = None) -> Chunk:
        raise ValueError("Argument 'self' is a live stream: it is read once, in order, with chunks().")

    def chunks(self, chunk_samples: int, start: int = 0, stop: int | None = None, *, verify: bool = True,
               fill: bool = True) -> Iterator[Chunk]:
        """Yield the samples as :class:`Chunk` objects as they arrive, until the stream ends.

        Parameters
        ----------
        chunk_samples : int
            Samples per chunk at most.
        start, stop :
            Only ``0`` and ``None``: a stream is read from its beginning to its end, once.
        verify :
            Ignored (a stream has no checksum); accepted so that callers treat files and streams alike.
        fill : bool, keyword-only
            True: every chunk but the last holds exactly ``chunk_samples`` (the chunks of a file
            of the same octets).  False: a chunk is what one read of the source gave (at least one
            sample), for the lowest latency on a slow stream.

        Notes
        -----
        One buffer of ``chunk_samples`` samples is filled from the source and converted by the
        same kernels as a file (NaN/Inf samples become 0 and are counted in ``Chunk.nonfinite``);
        the few octets of a sample split between two reads wait in the buffer.  When the source
        ends, ``num_samples`` is set and the octets of an incomplete last sample are counted in
        :attr:`trailing_bytes`.  Memory: O(chunk_samples), however long the stream.
        """
        chunk_samples = _check_count("chunk_samples", chunk_samples)
        self._begin(start, stop)
        return self._generate(chunk_samples, fill)

    def _generate(self, chunk_samples: int, fill: bool) -> Iterator[Chunk]:
        fmt = self.sample_format
        bps = fmt.bytes_per_sample
        buf = bytearray(chunk_samples * bps)
        view = memoryview(buf)
        have = 0
        native = fmt.component_dtype.newbyteorder("=")
        while True:
            got = self._source.read_into(view[have:], fill=fill)
            have += got
            whole = have // bps
            if whole and (got == 0 or not fill or have == len(buf)):
                comps = np.frombuffer(buf, dtype=fmt.component_dtype, count=2 * whole)
                if not fmt.native:
                    comps = comps.astype(native)
                out = np.empty(whole, dtype=np.complex64)
                if fmt.is_float:
                    bad = int(float_iq_to_complex64(comps, out))
                else:
                    bad = int(int_iq_to_complex64(comps, np.float32(fmt.offset), np.float32(fmt.scale), out))
                del comps
                chunk = Chunk(out, self.samples_read, bad)
                rest = have - whole * bps
                buf[:rest] = buf[whole * bps: have]
                have = rest
                self.samples_read += whole
                yield chunk
            if got == 0:
                break
        self.trailing_bytes = have
        self.num_samples = self.samples_read


def open_stream(source: Any = STDIN, *, format: str | None = None, sample_rate_hz: float | None = None,
                start: str | int | None = None, frequency_hz: float | None = None) -> SampleStream:
    """Open a live stream of IQ samples: ``-`` (standard input), a pipe's path, or a binary file object.

    Parameters
    ----------
    source : "-", path-like or binary file object
        ``-`` is standard input (refused when it is a terminal).  A path (a named pipe, a
        device) is opened here and closed by :meth:`SampleStream.close`; a file object is read
        from its current position and left open.
    format : {"cf32", "ci16", "ci8", "cu8"}
        Interleaved little-endian I/Q (``--format``); the SigMF names are accepted too.
    sample_rate_hz : float
        Samples per second (``--sample-rate``), 1 .. 1e12.
    start : str or int, optional
        UTC of the first sample, ISO-8601 (``--start``) or integer nanoseconds since 1970; None
        when unknown (``time_known`` is then False).
    frequency_hz : float, optional
        Centre frequency, above 0 Hz.

    Returns
    -------
    SampleStream

    Raises
    ------
    RecordingError
        One line: format or sample rate missing or out of range (naming ``--format`` and
        ``--sample-rate``), a terminal on standard input, a path that cannot be opened.

    Examples
    --------
    >>> import io, numpy as np
    >>> data = np.arange(10, dtype=np.float32).tobytes()  # 5 cf32 samples
    >>> s = open_stream(io.BufferedReader(io.BytesIO(data)), format="cf32", sample_rate_hz=1e6)
    >>> [(c.start, len(c)) for c in s.chunks(2)], s.num_samples
    ([(0, 2), (2, 2), (4, 1)], 5)
    """
    src = _Source(source, "samples")
    try:
        if format is None or sample_rate_hz is None:
            raise RecordingError(f"{src.name}: samples from a stream need --format {FORMAT_CHOICES} and --sample-rate")
        fmt = _format_or_error(Path(src.name), format)
        rate = _check_rate(Path(src.name), sample_rate_hz)
        freq = _check_frequency(Path(src.name), frequency_hz, "frequency")
        tai0 = None if start is None else start_tai_ns(Path(src.name), start)
    except BaseException:
        src.close()
        raise
    return SampleStream(src, fmt=fmt, sample_rate_hz=rate, capture=_timed_capture(0, tai0, freq, start is not None))


class SymbolStream(_ReadOnce, SymbolTime):
    """Channel symbols arriving on a stream (see :func:`open_symbol_stream`).

    Attributes
    ----------
    path : pathlib.Path
        ``-`` for standard input, else the source's name.
    kind : str
        ``"soft"`` (int8 per channel symbol, + = bit 0) or ``"bits"`` (packed, MSB first).
    num_symbols : int or None
        None until the stream has ended, then the channel symbols it held.
    symbols_read : int
        Symbols delivered so far.
    """

    def __init__(self, source: _Source, kind: str, *, start_tai_ns: int | None = None,
                 symbol_rate_hz: float | None = None) -> None:
        SymbolTime.__init__(self, Path(source.name), start_tai_ns=start_tai_ns, symbol_rate_hz=symbol_rate_hz)
        self._source = source
        self.kind = kind
        self.num_symbols: int | None = None
        self.symbols_read = 0
        self._started = False

    def __repr__(self) -> str:
        return f"SymbolStream({str(self.path)!r}, {self.kind}, {self.symbols_read} symbols read)"

    def chunks(self, chunk_symbols: int, start: int = 0, stop: int | None = None, *,
               fill: bool = True) -> Iterator[SymbolChunk]:
        """Yield :class:`SymbolChunk` objects as the symbols arrive, until the stream ends.

        ``fill=True`` gives exactly the chunks of :meth:`SymbolFile.chunks` for the same octets;
        ``fill=False`` yields what each read gave.  Memory: O(chunk_symbols).
        """
        chunk_symbols = _check_count("chunk_symbols", chunk_symbols)
        self._begin(start, stop)
        return self._generate(chunk_symbols, fill)

    def _generate(self, chunk_symbols: int, fill: bool) -> Iterator[SymbolChunk]:
        per_byte = 8 if self.kind == "bits" else 1
        raw = bytearray(-(-chunk_symbols // per_byte))
        view = memoryview(raw)
        stage = np.empty(chunk_symbols + per_byte - 1, dtype=np.float32)  # at most 7 symbols carried over
        staged = 0
        eof = False
        while True:
            if not eof and staged < chunk_symbols:
                want = -(-(chunk_symbols - staged) // per_byte)
                got = self._source.read_into(view[:want], fill=fill)
                if got == 0:
                    eof = True
                else:
                    octets = np.frombuffer(raw, dtype=np.uint8 if per_byte == 8 else np.int8, count=got)
                    dest = stage[staged: staged + got * per_byte]
                    if per_byte == 8:
                        unpack_bits_to_soft(octets, 0, dest)
                    else:
                        int8_to_soft(octets, dest)
                    del octets
                    staged += got * per_byte
            if staged and (eof or not fill or staged >= chunk_symbols):
                n = min(staged, chunk_symbols)
                chunk = SymbolChunk(stage[:n].copy(), self.symbols_read)
                stage[: staged - n] = stage[n:staged]
                staged -= n
                self.symbols_read += n
                yield chunk
                continue
            if eof:
                break
        self.num_symbols = self.symbols_read


def open_symbol_stream(source: Any = STDIN, kind: str = "soft", *, start: str | int | None = None,
                       symbol_rate_hz: float | None = None) -> SymbolStream:
    """Open a live stream of channel symbols (``--input soft|bits`` from ``-``).

    Parameters
    ----------
    source : "-", path-like or binary file object
        As for :func:`open_stream`.
    kind : {"soft", "bits"}
        ``soft``: one int8 per channel symbol, positive = bit 0.  ``bits``: packed hard channel
        bits, MSB first; a 0 bit becomes +1.0 and a 1 bit -1.0.
    start, symbol_rate_hz : optional
        UTC of the leading edge of channel symbol 0 and the channel symbol rate, for
        :meth:`SymbolStream.tai_ns` (as :func:`pipeline.recording.open_symbols`).

    Returns
    -------
    SymbolStream

    Examples
    --------
    >>> import io
    >>> s = open_symbol_stream(io.BytesIO(bytes([0b10100000, 0xFF])), "bits")
    >>> [c.soft.tolist() for c in s.chunks(5)], s.num_symbols
    ([[-1.0, 1.0, -1.0, 1.0, 1.0], [1.0, 1.0, 1.0, -1.0, -1.0], [-1.0, -1.0, -1.0, -1.0, -1.0], [-1.0]], 16)
    """
    if kind not in ("soft", "bits"):
        raise ValueError(f"Argument 'kind' must be 'soft' or 'bits', not {kind!r}.")
    rate = symbol_rate_or_error(symbol_rate_hz)
    src = _Source(source, "channel symbols")
    try:
        start_tai = None if start is None else start_tai_ns(Path(src.name), start, "--start")
    except BaseException:
        src.close()
        raise
    return SymbolStream(src, kind, start_tai_ns=start_tai, symbol_rate_hz=rate)
