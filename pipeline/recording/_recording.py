"""Reading IQ recordings: SigMF pairs, raw sample files and two-channel WAV, memmapped (or read) in chunks."""

from __future__ import annotations

import bisect
import logging
import os
import struct
from collections.abc import Iterator
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import RecordingError
from pipeline.recording._formats import FORMAT_CHOICES, SampleFormat, sample_format
from pipeline.recording._integrity import BackgroundFeed, DatasetChecksum
from pipeline.recording._kernels import float_iq_to_complex64, int_iq_to_complex64, zero_nonfinite_complex64
from pipeline.recording._sigmf import (
    MAX_META_BYTES,
    SAMPLE_COUNT_KEY,
    SIGMF_ARCHIVE_SUFFIX,
    SIGMF_DATA_SUFFIX,
    SIGMF_META_SUFFIX,
    archive_members,
    check_frequency,
    check_sample_rate,
    describe_metadata,
    parse_metadata,
    validate_metadata,
)
from pipeline.recording._time import check_end_time, elapsed_ns, position_ratio, start_tai_ns
from pipeline.timescales import format_utc, parse_utc, posix_ns_from_tai

__all__ = [
    "Capture",
    "Chunk",
    "Recording",
    "open_recording",
    "RAW_NEEDS",
    "SIGMF_META_SUFFIX",
    "SIGMF_DATA_SUFFIX",
]

#: What a user is told when a raw recording lacks its description.
RAW_NEEDS = f"a raw recording needs --format {FORMAT_CHOICES} and --sample-rate"
_log = logging.getLogger("pipeline.recording")


@dataclass(frozen=True)
class Capture:
    """One capture segment: samples from ``sample_start`` on, until the next segment.

    Attributes
    ----------
    sample_start : int
        Index of the segment's first sample in the recording.
    datetime_ns : int
        UTC of that sample, POSIX nanoseconds since 1970-01-01 (kept for the decode chain until it
        uses ``tai_ns``).  When the metadata gave no time it is carried on from the previous segment
        at the nominal sample rate (see ``time_given``); with no time anywhere it counts from 1970.
    frequency_hz : float or None
        Centre frequency of the segment, if known.
    time_given : bool
        True when the time came from the metadata (``core:datetime``) or the ``start`` argument.
    tai_ns : int or None
        The same instant on the uniform scale (TAI ns since 1958, :mod:`pipeline.timescales`), exact
        also inside a leap second; None when the recording has no time.
    """

    sample_start: int
    datetime_ns: int
    frequency_hz: float | None = None
    time_given: bool = True
    tai_ns: int | None = None


@dataclass(frozen=True, eq=False)
class Chunk:
    """A block of consecutive samples.

    Attributes
    ----------
    samples : numpy.ndarray
        complex64, C-contiguous, owned by the caller (a fresh array per chunk).
    start : int
        Absolute index of ``samples[0]`` in the recording.
    nonfinite : int
        Samples that held NaN or Inf in the file; they are 0 in ``samples`` (erasures).
    """

    samples: np.ndarray
    start: int
    nonfinite: int = 0

    @property
    def stop(self) -> int:
        """Index one past the last sample."""
        return self.start + int(self.samples.shape[0])

    def __len__(self) -> int:
        return int(self.samples.shape[0])


class Recording:
    """An IQ recording on disk, read through read-only memory maps.

    Build with :func:`open_recording`.  Nothing is read at construction beyond the metadata; each
    call of :meth:`chunks` or :meth:`read` maps only the bytes it converts, so memory stays
    bounded by the chunk size however long the file is.

    Attributes
    ----------
    path : pathlib.Path
        The file holding the samples (the ``.sigmf-data`` of a pair, the ``.sigmf`` archive).
    meta_path : pathlib.Path or None
        The ``.sigmf-meta`` file (the archive for an archive), None for raw and WAV files.
    container : str
        ``"sigmf"``, ``"sigmf-archive"``, ``"raw"`` or ``"wav"``.
    datatype : str
        SigMF datatype name of the stored samples (``"ci16_le"``).
    sample_format : SampleFormat
        The parsed datatype.
    sample_rate_hz : float
        Samples per second.
    num_samples : int or None
        Complex samples in the file (None for a live stream until it has ended, see
        :class:`~pipeline.recording.SampleStream`).
    captures : tuple of Capture
        Capture segments sorted by ``sample_start``; the first starts at sample 0 or later.
    frequency_hz : float or None
        Centre frequency of the first segment.
    start_ns : int
        UTC of sample 0, POSIX nanoseconds since 1970-01-01 (``utc_ns(0)``).
    time_known : bool
        False when no start time was given anywhere (then ``start_ns`` is 0, i.e. 1970, and
        :meth:`tai_ns` refuses).
    time_source : str or None
        Where the time came from: ``"SigMF core:datetime of capture N"`` (``captures 0, 2`` when
        several segments carry their own), ``"--start"`` (the ``start`` argument); None when unknown.
        Its accuracy is the recorder's.
    metadata : dict
        The parsed SigMF metadata (``global``, ``captures``, ``annotations``) or, for raw and WAV
        files, an equivalent dict built from the arguments.
    data_offset_bytes : int
        Octets before the first sample (a WAV header, SigMF ``core:header_bytes``, the position of
        the data member in an archive).
    sha512 : str or None
        SigMF ``core:sha512`` of the dataset (lower case), None when the metadata gives none.
    dataset_span : tuple of int
        ``(offset, size)`` in octets of the dataset inside ``path``, the octets ``core:sha512``
        covers: the whole data file of a pair, the data member of an archive.
    verify_checksum : bool
        False when the caller skipped the ``core:sha512`` check (``open_recording(...,
        verify_checksum=False)``).
    checksum_verified : bool
        True once :meth:`chunks` has read the whole recording and its octets matched
        ``core:sha512`` (for the report); False until then and when there is nothing to check.
    """

    def __init__(
        self,
        *,
        path: Path,
        container: str,
        fmt: SampleFormat,
        sample_rate_hz: float,
        num_samples: int,
        captures: tuple[Capture, ...],
        metadata: dict,
        data_offset_bytes: int = 0,
        meta_path: Path | None = None,
        sha512: str | None = None,
        dataset_span: tuple[int, int] | None = None,
        verify_checksum: bool = True,
        time_source: str | None = None,
    ) -> None:
        self.path = Path(path)
        self.meta_path = meta_path
        self.container = container
        self.sample_format = fmt
        self.datatype = fmt.name
        self.sample_rate_hz = float(sample_rate_hz)
        self.num_samples = None if num_samples is None else int(num_samples)
        self.captures = tuple(captures)
        self.metadata = metadata
        self.data_offset_bytes = int(data_offset_bytes)
        self.sha512 = sha512
        if dataset_span is None and self.num_samples is not None:
            dataset_span = (0, self.data_offset_bytes + self.num_samples * fmt.bytes_per_sample)
        self.dataset_span = dataset_span
        self.verify_checksum = bool(verify_checksum)
        self.checksum_verified = False
        self._starts = [c.sample_start for c in self.captures]
        # Exact rational rate: utc_ns() is then exact integer arithmetic however long the pass.
        self._rate = Fraction(self.sample_rate_hz)
        self.time_known = any(c.time_given for c in self.captures)
        self.time_source = time_source if self.time_known else None

    # ---- derived ---------------------------------------------------------------------------
    @property
    def frequency_hz(self) -> float | None:
        return self.captures[0].frequency_hz

    @property
    def start_ns(self) -> int:
        return self.utc_ns(0)

    @property
    def duration_s(self) -> float | None:
        """``num_samples / sample_rate_hz`` (None while a stream's length is unknown)."""
        return None if self.num_samples is None else self.num_samples / self.sample_rate_hz

    @property
    def annotations(self) -> list:
        """The SigMF ``annotations`` list (empty for raw and WAV files)."""
        ann = self.metadata.get("annotations", [])
        return ann if isinstance(ann, list) else []

    def __repr__(self) -> str:
        return (
            f"Recording({str(self.path)!r}, {self.container}, {self.datatype}, "
            f"{self.sample_rate_hz:g} Hz, {self.num_samples} samples, {len(self.captures)} capture(s))"
        )

    # ---- time ------------------------------------------------------------------------------
    def capture_at(self, position: float) -> Capture:
        """The capture segment holding sample ``position`` (the first one for positions before it)."""
        i = bisect.bisect_right(self._starts, position) - 1
        return self.captures[max(i, 0)]

    def tai_ns(self, position: float) -> int:
        """Time of a (fractional) sample position on the uniform scale: TAI ns since 1958-01-01.

        Write it as UTC with :func:`pipeline.timescales.format_utc` (23:59:60.x inside a leap second).

        Raises
        ------
        RecordingError
            The recording has no time (``time_known`` False): give ``start``.

        Notes
        -----
        ``tai_ns + round((position - sample_start) * 1e9 / sample_rate_hz)`` for the capture segment
        holding ``position``: elapsed time is SI seconds, so a pass crossing a leap second is labelled
        right (starting at 2016-12-31T23:59:59.5Z, one second later reads 23:59:60.5).  Exact
        rational arithmetic, rounded half to even.

        References
        ----------
        SigMF specification, captures object: ``core:sample_start`` and ``core:datetime``.

        Examples
        --------
        >>> import json, os, tempfile
        >>> from pipeline.timescales import format_utc
        >>> with tempfile.TemporaryDirectory() as d:
        ...     base = os.path.join(d, "pass")
        ...     _ = open(base + ".sigmf-data", "wb").write(bytes(8 * 4))
        ...     meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": 2.0, "core:version": "1.2.0"},
        ...             "captures": [{"core:sample_start": 0, "core:datetime": "2016-12-31T23:59:59.5Z"}],
        ...             "annotations": []}
        ...     _ = open(base + ".sigmf-meta", "w").write(json.dumps(meta))
        ...     rec = open_recording(base + ".sigmf-meta")
        ...     print(format_utc(rec.tai_ns(2)), rec.time_source)
        2016-12-31T23:59:60.500000000Z SigMF core:datetime of capture 0
        """
        position_ratio(position)  # the argument check, before the segment lookup
        cap = self.capture_at(position)
        if cap.tai_ns is None:
            raise RecordingError(f"{self.path}: the recording has no start time; give one (--start)")
        return cap.tai_ns + elapsed_ns(position, cap.sample_start, self._rate)

    def utc_ns(self, position: float) -> int:
        """UTC of a (fractional) sample position, POSIX nanoseconds since 1970-01-01.

        Kept for the decode chain, which will switch to :meth:`tai_ns` (POSIX time cannot name
        23:59:60: inside a leap second this is held at 23:59:59.999999999).  With no time known it
        counts from 1970-01-01 (``time_known`` says so).
        """
        position_ratio(position)
        cap = self.capture_at(position)
        if cap.tai_ns is None:
            return cap.datetime_ns + elapsed_ns(position, cap.sample_start, self._rate)
        return posix_ns_from_tai(self.tai_ns(position))

    # ---- samples ---------------------------------------------------------------------------
    def _check_range(self, start: int, stop: int | None) -> tuple[int, int]:
        if isinstance(start, (bool, np.bool_)) or not isinstance(start, (int, np.integer)):
            raise TypeError(f"Argument 'start' must be an integer, not {type(start).__name__}.")
        start = int(start)
        if not 0 <= start <= self.num_samples:
            raise ValueError(f"Argument 'start' must be 0..{self.num_samples}, not {start}.")
        if stop is None:
            return start, self.num_samples
        if isinstance(stop, (bool, np.bool_)) or not isinstance(stop, (int, np.integer)):
            raise TypeError(f"Argument 'stop' must be an integer or None, not {type(stop).__name__}.")
        stop = int(stop)
        if not start <= stop <= self.num_samples:
            raise ValueError(f"Argument 'stop' must be {start}..{self.num_samples}, not {stop}.")
        return start, stop

    def checksum(self) -> DatasetChecksum | None:
        """A fresh :class:`DatasetChecksum` for the ``core:sha512`` check, None when there is none to do.

        None when the metadata holds no ``core:sha512`` or the check was skipped
        (``verify_checksum=False``).  :meth:`chunks` runs the check by itself when it reads the
        whole recording in order; a caller reading out of order (a segmented decode) runs this
        object instead, for example ``fut = rec.checksum().verify_in_background()`` while the
        workers decode and ``fut.result()`` before it marks the output complete.
        """
        if self.sha512 is None or not self.verify_checksum or self.dataset_span is None:
            return None
        offset, size = self.dataset_span
        return DatasetChecksum(path=self.path, expected=self.sha512, offset_bytes=offset, size_bytes=size,
                               meta_name="" if self.meta_path is None else self.meta_path.name)

    def _hash_span(self, check: DatasetChecksum, lo: int, hi: int) -> None:
        """Feed the octets ``[lo, hi)`` of ``path`` (a header or a trailer) into ``check``."""
        if hi <= lo:
            return
        try:
            with open(self.path, "rb") as fh:
                fh.seek(lo)
                while lo < hi:
                    block = fh.read(min(hi - lo, 1 << 22))
                    if not block:
                        raise RecordingError(f"{self.path}: ends at byte {lo}, before the {hi} bytes its metadata "
                                             f"describes; it changed during the decode")
                    check.update(block)
                    lo += len(block)
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot read ({exc.strerror})") from None

    def _convert(self, start: int, count: int, feed: BackgroundFeed | None = None) -> Chunk:
        fmt = self.sample_format
        out = np.empty(count, dtype=np.complex64)
        if count == 0:
            return Chunk(out, start, 0)
        try:
            raw = np.memmap(
                self.path,
                dtype=fmt.component_dtype,
                mode="r",
                offset=self.data_offset_bytes + start * fmt.bytes_per_sample,
                shape=(2 * count,),
            )
        except (OSError, ValueError) as exc:
            raise RecordingError(f"{self.path}: cannot read samples {start}..{start + count} ({exc})") from None
        # A fresh map per chunk (dropped on return) keeps resident memory at one chunk.
        raw = raw.view(np.ndarray)
        if feed is not None:
            feed.put(raw)
        comps = raw if fmt.native else raw.astype(fmt.component_dtype.newbyteorder("="))
        if fmt.is_float:
            bad = int(float_iq_to_complex64(comps, out))
        else:
            bad = int(int_iq_to_complex64(comps, np.float32(fmt.offset), np.float32(fmt.scale), out))
        del comps, raw
        return Chunk(out, start, bad)

    def _read_float_chunks(self, chunk_samples: int, start: int, stop: int) -> Iterator[Chunk]:
        """Chunks of native float I/Q read straight into their complex64 arrays (one file open, no map), then
        cleaned in place (:func:`zero_nonfinite_complex64`): the same chunks as :meth:`_convert` makes."""
        bps = self.sample_format.bytes_per_sample
        try:
            with open(self.path, "rb") as fh:
                fh.seek(self.data_offset_bytes + start * bps)
                pos = start
                while pos < stop:
                    n = min(chunk_samples, stop - pos)
                    out = np.empty(n, dtype=np.complex64)
                    if fh.readinto(memoryview(out).cast("B")) != n * bps:
                        raise RecordingError(f"{self.path}: cannot read samples {pos}..{pos + n} (the file ends "
                                             f"before them)")
                    yield Chunk(out, pos, int(zero_nonfinite_complex64(out)))
                    pos += n
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot read samples {start}..{stop} ({exc.strerror})") from None

    def read(self, start: int = 0, count: int | None = None) -> Chunk:
        """Convert ``count`` samples from ``start`` (all remaining when None) into one chunk."""
        start, stop = self._check_range(start, None)
        if count is not None:
            if isinstance(count, (bool, np.bool_)) or not isinstance(count, (int, np.integer)):
                raise TypeError(f"Argument 'count' must be an integer or None, not {type(count).__name__}.")
            if not 0 <= count <= stop - start:
                raise ValueError(f"Argument 'count' must be 0..{stop - start}, not {count}.")
            stop = start + int(count)
        return self._convert(start, stop - start)

    def chunks(self, chunk_samples: int, start: int = 0, stop: int | None = None, *,
               verify: bool = True) -> Iterator[Chunk]:
        """Yield consecutive :class:`Chunk` objects of ``chunk_samples`` samples (the last may be shorter).

        Parameters
        ----------
        chunk_samples : int
            Samples per chunk, at least 1.
        start, stop : int
            Sample range ``[start, stop)``; ``stop=None`` means the end of the recording.
        verify : bool, keyword-only
            When the range is the whole recording, check ``core:sha512`` on the way (see
            :meth:`checksum`); False leaves the check to the caller.

        Raises
        ------
        RecordingError
            After the last chunk, when the octets read do not match ``core:sha512``: nothing
            decoded from them may be marked complete.

        Notes
        -----
        Each chunk maps just its own bytes read-only, converts them in one pass (numba kernel,
        O(n)) and unmaps them, so resident memory is O(chunk_samples).  Without the checksum, native
        ``cf32`` chunks are instead read (one open file) straight into their complex64 arrays and
        cleaned of NaN/Inf in place (:func:`zero_nonfinite_complex64`): the same chunks, one copy less.
        The checksum hashes the same mapped octets, in file order, plus a Non-Conforming Dataset's header and trailer
        (one SHA-512 pass, about 0.7 GB/s), in a thread of its own (:class:`BackgroundFeed`) so
        that it overlaps with the caller's work on the next chunk.
        """
        if isinstance(chunk_samples, (bool, np.bool_)) or not isinstance(chunk_samples, (int, np.integer)):
            raise TypeError(f"Argument 'chunk_samples' must be an integer, not {type(chunk_samples).__name__}.")
        if chunk_samples < 1:
            raise ValueError(f"Argument 'chunk_samples' must be >= 1, not {chunk_samples}.")
        start, stop = self._check_range(start, stop)
        chunk_samples = int(chunk_samples)
        check = self.checksum() if verify and start == 0 and stop == self.num_samples else None
        if check is None:
            if self.sample_format.is_float and self.sample_format.native:
                yield from self._read_float_chunks(chunk_samples, start, stop)
                return
            pos = start
            while pos < stop:
                n = min(chunk_samples, stop - pos)
                yield self._convert(pos, n)
                pos += n
            return
        first = self.data_offset_bytes
        self._hash_span(check, check.offset_bytes, first)
        feed = BackgroundFeed(check)
        try:
            pos = start
            while pos < stop:
                n = min(chunk_samples, stop - pos)
                yield self._convert(pos, n, feed)
                pos += n
        finally:
            feed.join()
        end = check.offset_bytes + check.size_bytes
        self._hash_span(check, first + stop * self.sample_format.bytes_per_sample, end)
        check.finish()
        self.checksum_verified = True


# ---- opening --------------------------------------------------------------------------------


def open_recording(
    path: str | os.PathLike,
    *,
    format: str | None = None,
    sample_rate_hz: float | None = None,
    start: str | int | None = None,
    frequency_hz: float | None = None,
    verify_checksum: bool = True,
    datatype: str | None = None,
) -> Recording:
    """Open an IQ recording: a SigMF pair or archive, a two-channel WAV file or a raw sample file.

    Parameters
    ----------
    path : str or path-like
        ``x.sigmf-meta`` or ``x.sigmf-data`` (either names the pair; ``x`` also finds it), an
        uncompressed SigMF archive ``x.sigmf`` (read in place, not extracted), ``x.wav``, or any
        other file, read as raw interleaved I/Q.  Standard input (``-``) and pipes are live
        streams: :func:`~pipeline.recording.open_stream`.
    format : {"cf32", "ci16", "ci8", "cu8"}, optional
        Raw files only (required there; ``--format``): little-endian interleaved I/Q.  The SigMF
        names (``cf32_be``, ``ci16_be``...) are accepted too.  Refused for SigMF and WAV, which
        say what they hold.
    sample_rate_hz : float, optional
        Required for raw files (``--sample-rate``), 1 .. 1e12 Hz.  For SigMF and WAV it overrides
        the rate in the file.
    start : str or int, optional
        UTC of sample 0: ISO-8601 with a zone (``2026-03-14T09:30:00.25Z``) or integer
        nanoseconds since 1970.  For SigMF it replaces the time of the first capture segment.
    frequency_hz : float, optional
        Centre frequency (> 0 Hz), when the file does not give one.
    verify_checksum : bool
        Check SigMF ``core:sha512`` while the whole recording is read (see
        :meth:`Recording.chunks` and :meth:`Recording.checksum`); False skips it.
    datatype : str, optional
        Former name of ``format``.

    Returns
    -------
    Recording

    Raises
    ------
    RecordingError
        One line naming the file and the problem (and the command-line flag that mends it):
        missing file, missing ``.sigmf-data`` or ``.sigmf-meta``, metadata that is not UTF-8
        JSON or breaks the SigMF schema, an unknown or real-valued datatype, a sample rate that
        is missing or outside 1 .. 1e12 Hz, a centre frequency not above 0, a size that is not a
        whole number of samples, fewer samples than the metadata describes, no samples.

    Notes
    -----
    SigMF metadata is validated against the schema of the ``sigmf`` library (PyPI); see
    :func:`pipeline.recording._sigmf.describe_metadata` for the rules beyond it and for what the
    metadata is taken to promise about the data file's length.

    References
    ----------
    SigMF specification 1.2.6 (global, captures and annotations objects, dataset format, archive
    format); Microsoft/IBM RIFF WAVE format (``fmt `` and ``data`` chunks).

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> with tempfile.TemporaryDirectory() as d:
    ...     raw = os.path.join(d, "pass.ci16")
    ...     np.array([1000, -1000, 0, 16384], dtype="<i2").tofile(raw)
    ...     rec = open_recording(raw, format="ci16", sample_rate_hz=1e6, start="2026-03-14T09:30:00Z")
    ...     rec.num_samples, rec.datatype, rec.read().samples[1]
    (2, 'ci16_le', np.complex64(0.5j))
    """
    if datatype is not None:
        if format is not None and format != datatype:
            raise ValueError("Argument 'datatype' is the former name of 'format'; give only 'format'.")
        format = datatype
    if os.fspath(path) == "-":
        raise RecordingError("-: standard input is a live stream: open it with open_stream() "
                             "(downlink decode - --format ... --sample-rate ...)")
    p = Path(os.fspath(path))
    name = p.name.lower()
    opts = (format, sample_rate_hz, start, frequency_hz, verify_checksum)
    if name.endswith(SIGMF_META_SUFFIX) or name.endswith(SIGMF_DATA_SUFFIX):
        base = Path(str(p)[: -len(SIGMF_META_SUFFIX)])
        meta, data = base.with_name(base.name + SIGMF_META_SUFFIX), base.with_name(base.name + SIGMF_DATA_SUFFIX)
        if name.endswith(SIGMF_DATA_SUFFIX) and not meta.exists() and format is not None:
            return _open_raw(p, *opts)
        return _open_sigmf(meta, data, *opts)
    if not p.exists():
        stem = Path(str(p)[: -len(SIGMF_ARCHIVE_SUFFIX)]) if name.endswith(SIGMF_ARCHIVE_SUFFIX) else p
        meta = stem.with_name(stem.name + SIGMF_META_SUFFIX)
        if meta.exists():
            return _open_sigmf(meta, stem.with_name(stem.name + SIGMF_DATA_SUFFIX), *opts)
        raise RecordingError(f"{p}: recording not found")
    if p.is_dir():
        raise RecordingError(f"{p}: is a folder, not a recording")
    if name.endswith(SIGMF_ARCHIVE_SUFFIX):
        return _open_archive(p, *opts)
    if name.endswith(".wav") or name.endswith(".wave") or (format is None and _looks_like_wav(p)):
        return _open_wav(p, *opts)
    return _open_raw(p, *opts)


def _looks_like_wav(p: Path) -> bool:
    try:
        with open(p, "rb") as fh:
            head = fh.read(12)
    except OSError:
        return False
    return len(head) == 12 and head[:4] in (b"RIFF", b"RF64") and head[8:12] == b"WAVE"


def _check_rate(p: Path, rate: Any) -> float:
    """A ``--sample-rate`` argument in the accepted range (1 .. 1e12 Hz)."""
    return check_sample_rate(p, rate, " (--sample-rate)")


def _check_frequency(p: Path, freq: Any, what: str) -> float | None:
    return check_frequency(p, freq, what)


def _timed_capture(sample_start: int, tai: int | None, freq: float | None, given: bool,
                   posix_if_unknown: int = 0) -> Capture:
    """A Capture with both time fields filled (the POSIX one derived from TAI when the time is known)."""
    if tai is None:
        return Capture(sample_start, posix_if_unknown, freq, given, None)
    return Capture(sample_start, posix_ns_from_tai(tai), freq, given, tai)


def _check_time_span(p: Path, recording: Recording) -> Recording:
    """Refuse a recording whose time runs past the year 9999; warn once past the leap-second table's expiry."""
    if recording.time_known:  # tai_ns is integer arithmetic; check_end_time refuses past 9999 and warns
        check_end_time(p, recording.tai_ns(recording.num_samples))
    return recording


def _format_or_error(p: Path, fmt: Any) -> SampleFormat:
    """A ``--format`` argument."""
    if not isinstance(fmt, str):
        raise RecordingError(f"{p}: --format must be {FORMAT_CHOICES}, not {fmt!r}")
    try:
        return sample_format(fmt)
    except ValueError:
        raise RecordingError(f"{p}: --format must be {FORMAT_CHOICES}, not {fmt!r}") from None


def _count_samples(p: Path, size_bytes: int, header_bytes: int, fmt: SampleFormat) -> int:
    payload = size_bytes - header_bytes
    if payload < 0:
        raise RecordingError(f"{p}: file is shorter ({size_bytes} bytes) than its {header_bytes}-byte header")
    if payload % fmt.bytes_per_sample:
        raise RecordingError(
            f"{p}: truncated: {payload} bytes is not a whole number of {fmt.bytes_per_sample}-byte "
            f"{fmt.name} samples"
        )
    n = payload // fmt.bytes_per_sample
    if n == 0:
        raise RecordingError(f"{p}: contains no samples")
    return n


def _file_size(p: Path, missing: str) -> int:
    try:
        st = p.stat()
    except FileNotFoundError:
        raise RecordingError(f"{p}: {missing}") from None
    except OSError as exc:
        raise RecordingError(f"{p}: cannot read ({exc.strerror})") from None
    if not p.is_file():
        raise RecordingError(f"{p}: a pipe or device, not a file: read it as a live stream (open_stream(), "
                             f"or pipe it into 'downlink decode -')")
    return st.st_size


def _open_raw(p, fmt_name, sample_rate_hz, start, frequency_hz, verify_checksum) -> Recording:
    size = _file_size(p, "recording not found")
    if fmt_name is None or sample_rate_hz is None:
        raise RecordingError(f"{p}: {RAW_NEEDS}")
    fmt = _format_or_error(p, fmt_name)
    rate = _check_rate(p, sample_rate_hz)
    freq = _check_frequency(p, frequency_hz, "frequency")
    n = _count_samples(p, size, 0, fmt)
    cap = _timed_capture(0, None if start is None else start_tai_ns(p, start), freq, start is not None)
    meta = _synth_meta(fmt, rate, cap, container="raw")
    return _check_time_span(p, Recording(path=p, container="raw", fmt=fmt, sample_rate_hz=rate, num_samples=n,
                                         captures=(cap,), metadata=meta, time_source="--start"))


def _synth_meta(fmt: SampleFormat, rate: float, cap: Capture, container: str) -> dict:
    capture: dict[str, Any] = {"core:sample_start": 0}
    if cap.time_given:
        capture["core:datetime"] = format_utc(cap.tai_ns)
    if cap.frequency_hz is not None:
        capture["core:frequency"] = cap.frequency_hz
    return {
        "global": {"core:datatype": fmt.name, "core:sample_rate": rate, "downlink:container": container},
        "captures": [capture],
        "annotations": [],
    }


# ---- SigMF ------------------------------------------------------------------------------------


def _open_sigmf(meta_path: Path, data_path: Path, fmt_name, sample_rate_hz, start, frequency_hz,
                verify_checksum) -> Recording:
    if fmt_name is not None:
        raise RecordingError(f"{meta_path}: a SigMF recording names its own sample format (core:datatype); "
                             f"leave out --format")
    try:
        with open(meta_path, "rb") as fh:
            raw = fh.read(MAX_META_BYTES + 1)
    except FileNotFoundError:
        raise RecordingError(f"{meta_path}: SigMF metadata file not found") from None
    except OSError as exc:
        raise RecordingError(f"{meta_path}: cannot read ({exc.strerror})") from None
    meta = parse_metadata(raw, meta_path)
    return recording_from_sigmf_meta(meta, meta_path=meta_path, data_path=data_path, sample_rate_hz=sample_rate_hz,
                                     start=start, frequency_hz=frequency_hz, verify_checksum=verify_checksum)


def recording_from_sigmf_meta(meta: Any, *, meta_path: Path, data_path: Path, sample_rate_hz=None, start=None,
                              frequency_hz=None, data_span: tuple[int, int] | None = None,
                              container: str = "sigmf", verify_checksum: bool = True) -> Recording:
    """Validate parsed SigMF metadata and build the :class:`Recording` (see :func:`open_recording`).

    ``data_span`` is ``(offset, size)`` of the dataset inside ``data_path`` (an archive member);
    None means the whole file.
    """
    mp = meta_path
    validate_metadata(meta, mp)
    desc = describe_metadata(meta, mp)
    fmt = desc.format
    if sample_rate_hz is not None:
        rate = _check_rate(mp, sample_rate_hz)
    elif desc.sample_rate_hz is None:
        raise RecordingError(f"{mp}: 'global' has no core:sample_rate; give it with --sample-rate")
    else:
        rate = desc.sample_rate_hz
    if desc.dataset is not None and data_span is None:
        # Non-conforming dataset named in the metadata (SigMF "core:dataset"): a file beside the meta.
        data_path = mp.with_name(desc.dataset)

    parsed: list[tuple[int, int | None, float | None]] = []
    for i, c in enumerate(desc.captures):
        s0 = c.sample_start
        dt = c.datetime
        dt_ns = None
        if dt is not None:
            if not isinstance(dt, str):
                raise RecordingError(f"{mp}: capture {i} core:datetime must be a string, not {dt!r}")
            try:
                dt_ns = parse_utc(dt)  # TAI ns since 1958
            except ValueError as exc:
                raise RecordingError(f"{mp}: capture {i} core:datetime: {exc}") from None
        parsed.append((s0, dt_ns, c.frequency_hz))
    sources = [f"SigMF core:datetime of capture {i}" for i, (_, t, _) in enumerate(parsed) if t is not None]
    if start is not None:
        s0, own, f0 = parsed[0]
        t = start_tai_ns(mp, start)
        # The argument is the time of sample 0; move it to the first segment's start.
        parsed[0] = (s0, t + elapsed_ns(s0, 0, Fraction(rate)), f0)
        if own is not None:
            sources = sources[1:]
            _log.warning("%s: --start %s replaces the recording's own time %s (SigMF core:datetime of capture 0)",
                         mp, format_utc(parsed[0][1]), format_utc(own))
        sources.insert(0, "--start")
    if frequency_hz is not None:
        f = _check_frequency(mp, frequency_hz, "frequency")
        parsed = [(s, t, f if fr is None else fr) for s, t, fr in parsed]

    if data_span is None:
        base_offset = 0
        size = _file_size(data_path, f"SigMF dataset file missing (expected beside {mp.name})")
    else:  # inside an archive: the data member's offset and size
        base_offset, size = data_span
    if desc.trailing_bytes > size:
        raise RecordingError(f"{data_path}: file is shorter ({size} bytes) than its {desc.trailing_bytes} "
                             f"core:trailing_bytes")
    n = _count_samples(data_path, size - desc.trailing_bytes, desc.header_bytes, fmt)
    _check_promised_length(mp, data_path, n, fmt, desc)
    captures = _resolve_times(parsed, rate, mp)
    return _check_time_span(mp, Recording(path=data_path, container=container, fmt=fmt, sample_rate_hz=rate,
                                          num_samples=n, captures=captures, metadata=meta,
                                          data_offset_bytes=base_offset + desc.header_bytes, meta_path=mp,
                                          sha512=desc.sha512, dataset_span=(base_offset, size),
                                          verify_checksum=verify_checksum, time_source=_join_sources(sources)))


def _check_promised_length(mp: Path, data_path: Path, n: int, fmt: SampleFormat, desc) -> None:
    """The data file holds the samples the metadata describes (see ``describe_metadata``, Notes)."""
    bps = fmt.bytes_per_sample
    holds = f"{data_path}: holds {n} samples ({n * bps} bytes)"
    if desc.exact_samples is not None and n != desc.exact_samples:
        m = desc.exact_samples
        why = "; the data file is incomplete" if n < m else ""
        raise RecordingError(f"{holds} but {mp.name} says {SAMPLE_COUNT_KEY} = {m} ({m * bps} bytes){why}")
    if n < desc.min_samples:
        m = desc.min_samples
        raise RecordingError(f"{holds} but {mp.name} describes at least {m} ({m * bps} bytes; "
                             f"{desc.min_samples_why}); the data file is incomplete")


def _join_sources(sources: list[str]) -> str | None:
    """``["SigMF core:datetime of capture 0", "... of capture 2"]`` -> ``"SigMF core:datetime of captures 0, 2"``."""
    prefix = "SigMF core:datetime of capture "
    caps = [s[len(prefix):] for s in sources if s.startswith(prefix)]
    parts = [s for s in sources if not s.startswith(prefix)]
    if len(caps) == 1:
        parts.append(prefix + caps[0])
    elif caps:
        parts.append(prefix.rstrip() + "s " + ", ".join(caps))
    return "; ".join(parts) or None


def _resolve_times(parsed: list[tuple[int, int | None, float | None]], rate: float,
                   mp: Path) -> tuple[Capture, ...]:
    """Fill in segments without ``core:datetime`` by carrying time on at the nominal rate (on TAI)."""
    r = Fraction(rate)
    known = [i for i, (_, t, _) in enumerate(parsed) if t is not None]
    if not known:
        # No time anywhere: POSIX counts from 1970 for utc_ns(); tai_ns() refuses (time_known False).
        return tuple(_timed_capture(s0, None, f, False, elapsed_ns(s0, 0, r)) for s0, _, f in parsed)
    caps: list[Capture] = []
    anchor_i, anchor_t = known[0], parsed[known[0]][1]
    for s0, t, f in parsed:
        if t is not None:
            caps.append(_timed_capture(s0, t, f, True))
            continue
        if caps:
            prev = caps[-1]
            t_new = prev.tai_ns + elapsed_ns(s0, prev.sample_start, r)
        else:
            # Before the first segment with a time: count back from it.
            t_new = anchor_t - elapsed_ns(parsed[anchor_i][0], s0, r)
        try:
            caps.append(_timed_capture(s0, t_new, f, False))
        except ValueError:
            raise RecordingError(f"{mp}: capture at sample {s0} would start before 1972 (counted back from capture "
                                 f"{anchor_i}'s core:datetime)") from None
    return tuple(caps)


def _open_archive(p: Path, fmt_name, sample_rate_hz, start, frequency_hz, verify_checksum) -> Recording:
    """A SigMF archive (uncompressed tar), its samples mapped in place (see ``archive_members``)."""
    if fmt_name is not None:
        raise RecordingError(f"{p}: a SigMF recording names its own sample format (core:datatype); leave out --format")
    raw, offset, size = archive_members(p)
    meta = parse_metadata(raw, p)
    return recording_from_sigmf_meta(meta, meta_path=p, data_path=p, sample_rate_hz=sample_rate_hz, start=start,
                                     frequency_hz=frequency_hz, data_span=(offset, size), container="sigmf-archive",
                                     verify_checksum=verify_checksum)


# ---- WAV -------------------------------------------------------------------------------------


def _open_wav(p: Path, fmt_given, sample_rate_hz, start, frequency_hz, verify_checksum) -> Recording:
    size = _file_size(p, "recording not found")
    if fmt_given is not None:
        raise RecordingError(f"{p}: a WAV file names its own sample format; leave out --format")
    fmt_name, rate_in_file, data_offset, data_bytes = _parse_wav(p, size)
    fmt = sample_format(fmt_name)
    if sample_rate_hz is not None:
        rate = _check_rate(p, sample_rate_hz)
    else:
        rate = check_sample_rate(p, rate_in_file, " (WAV header; --sample-rate overrides it)")
    freq = _check_frequency(p, frequency_hz, "frequency")
    if data_offset + data_bytes > size:
        raise RecordingError(f"{p}: truncated: the data chunk declares {data_bytes} bytes but only "
                             f"{size - data_offset} follow")
    n = _count_samples(p, data_bytes, 0, fmt)
    cap = _timed_capture(0, None if start is None else start_tai_ns(p, start), freq, start is not None)
    meta = _synth_meta(fmt, rate, cap, container="wav")
    return _check_time_span(p, Recording(path=p, container="wav", fmt=fmt, sample_rate_hz=rate, num_samples=n,
                                         captures=(cap,), metadata=meta, data_offset_bytes=data_offset,
                                         time_source="--start"))


_WAVE_FORMAT_PCM = 0x0001
_WAVE_FORMAT_IEEE_FLOAT = 0x0003
_WAVE_FORMAT_EXTENSIBLE = 0xFFFE


def _parse_wav(p: Path, size: int) -> tuple[str, int, int, int]:
    """Walk the RIFF chunks: returns (datatype, sample rate, data offset, data bytes).

    Reads only the chunk headers (a few dozen bytes), never the samples.
    """
    with open(p, "rb") as fh:
        head = fh.read(12)
        if len(head) < 12 or head[:4] not in (b"RIFF", b"RF64") or head[8:12] != b"WAVE":
            raise RecordingError(f"{p}: not a RIFF WAVE file")
        rf64 = head[:4] == b"RF64"
        riff_size = struct.unpack("<I", head[4:8])[0]
        big_data_size = None
        fmt = None
        pos = 12
        while pos + 8 <= size:
            fh.seek(pos)
            hdr = fh.read(8)
            cid, csize = hdr[:4], struct.unpack("<I", hdr[4:])[0]
            body = pos + 8
            if cid == b"ds64":
                ds = fh.read(24)
                if len(ds) < 24:
                    raise RecordingError(f"{p}: truncated ds64 chunk")
                big_data_size = struct.unpack("<QQQ", ds)[1]
            elif cid == b"fmt ":
                raw = fh.read(min(csize, 40))
                if len(raw) < 16:
                    raise RecordingError(f"{p}: WAV fmt chunk too short")
                tag, channels, rate, _, block_align, bits = struct.unpack("<HHIIHH", raw[:16])
                if tag == _WAVE_FORMAT_EXTENSIBLE and len(raw) >= 40:
                    tag = struct.unpack("<H", raw[24:26])[0]  # first two octets of the SubFormat GUID
                fmt = (tag, channels, rate, block_align, bits)
            elif cid == b"data":
                if fmt is None:
                    raise RecordingError(f"{p}: WAV data chunk before its fmt chunk")
                data_bytes = big_data_size if (rf64 and csize == 0xFFFFFFFF and big_data_size is not None) else csize
                tag, channels, rate, block_align, bits = fmt
                if channels != 2:
                    raise RecordingError(f"{p}: WAV has {channels} channel(s); IQ needs 2 (I left, Q right)")
                if tag == _WAVE_FORMAT_PCM and bits == 16:
                    name = "ci16_le"
                elif tag == _WAVE_FORMAT_PCM and bits == 8:
                    name = "cu8"  # 8-bit WAV PCM is unsigned, zero level near 128
                elif tag == _WAVE_FORMAT_IEEE_FLOAT and bits == 32:
                    name = "cf32_le"
                else:
                    raise RecordingError(f"{p}: WAV format tag {tag} with {bits} bits is not supported "
                                         f"(16-bit PCM, 8-bit PCM or 32-bit float)")
                if block_align != 2 * bits // 8:
                    raise RecordingError(f"{p}: WAV block align {block_align} does not match 2 x {bits} bits")
                if not rf64 and riff_size in (0, 0xFFFFFFFF) and csize in (0, 0xFFFFFFFF):
                    # A streaming writer that never came back to fill in the sizes: the samples
                    # run to the end of the file.
                    data_bytes = size - body
                return name, rate, body, data_bytes
            pos = body + csize + (csize & 1)  # chunks are padded to an even size
    raise RecordingError(f"{p}: WAV file has no data chunk")
