"""Writing SigMF recordings in a stream: samples in chunks, the metadata when closed."""

from __future__ import annotations

import hashlib
import json
import math
import os
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import OutputError
from pipeline.recording._formats import sample_format
from pipeline.recording._kernels import complex_to_int_iq
from pipeline.recording._sigmf import (
    MAX_FREQUENCY_HZ,
    MAX_SAMPLE_RATE_HZ,
    MIN_SAMPLE_RATE_HZ,
    SAMPLE_COUNT_KEY,
    SIGMF_DATA_SUFFIX,
    SIGMF_META_SUFFIX,
    metadata_text,
)
from pipeline.recording._time import format_iso8601_ns

__all__ = ["SigmfWriter"]


class SigmfWriter:
    """Stream complex samples into a SigMF pair ``base.sigmf-data`` + ``base.sigmf-meta``.

    Parameters
    ----------
    base_path : str or path-like
        Path without suffix (a trailing ``.sigmf-meta`` / ``.sigmf-data`` is removed).
    sample_rate_hz : float
        ``core:sample_rate``, 1 .. 1e12 Hz (what the reader accepts).
    datatype : str
        ``cf32`` (default), ``ci16``, ``ci8``, ``cu8`` (little-endian; the user's ``--format``
        names) or a SigMF name (``cf32_le``, ``cf32_be``, ``ci16_le``, ``ci16_be``).  The metadata
        holds the SigMF name.
    datetime_ns : int
        UTC of the first sample, nanoseconds since 1970 (``core:datetime`` of the capture).
    frequency_hz : float, optional
        ``core:frequency`` of the capture, above 0 and up to 1e12 Hz.
    description : str
        ``core:description``.
    extra_global : dict, optional
        More ``global`` fields.  Names carry a namespace (``"tamarisk:pass_id"``) declared in a
        ``core:extensions`` entry (``downlink`` is declared by the writer itself).
    scale : float
        Integer datatypes: samples are multiplied by ``scale`` before quantising, and a value of
        1.0 then maps to the full-scale code (32768 for ci16, 128 for ci8/cu8), the inverse of the
        reader's conversion.  Codes beyond the type's range saturate and are counted in
        :attr:`clipped`.  Ignored for float datatypes.
    overwrite : bool
        Replace existing files; otherwise an existing pair raises :class:`OutputError`.

    Attributes
    ----------
    num_samples : int
        Samples written so far.
    clipped : int
        Components that saturated (integer datatypes).
    nonfinite : int
        Samples with a NaN component written to an integer datatype (as the zero code).

    Notes
    -----
    The data file is written as it comes (O(chunk) memory); its SHA-512 (``core:sha512``) is
    updated on the way.  :meth:`close` writes the metadata with one capture segment, the
    annotations added with :meth:`annotate` and ``downlink:sample_count`` (the exact number of
    samples, so a reader can tell a truncated copy at once); the ``sigmf`` library builds,
    validates against the SigMF schema and serialises it (``core:version`` is the library's).
    Leaving the ``with`` block by an exception calls :meth:`abort`: no metadata, no data file.

    References
    ----------
    SigMF specification 1.2.6: global object (``core:datatype``, ``core:sample_rate``,
    ``core:version``, ``core:sha512``, ``core:description``, ``core:recorder``,
    ``core:extensions``), captures and annotations objects.

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> from pipeline.recording import open_recording
    >>> with tempfile.TemporaryDirectory() as d:
    ...     with SigmfWriter(os.path.join(d, "pass"), sample_rate_hz=1e6, datatype="ci16",
    ...                      datetime_ns=1_773_480_600_000_000_000) as w:  # 2026-03-14T09:30:00Z
    ...         w.write(np.full(1000, 0.25 + 0.5j, dtype=np.complex64))
    ...     rec = open_recording(os.path.join(d, "pass.sigmf-meta"))
    ...     rec.datatype, rec.num_samples, rec.metadata["global"]["downlink:sample_count"]
    ('ci16_le', 1000, 1000)
    """

    def __init__(
        self,
        base_path: str | os.PathLike,
        *,
        sample_rate_hz: float,
        datatype: str = "cf32",
        datetime_ns: int,
        frequency_hz: float | None = None,
        description: str = "",
        extra_global: dict | None = None,
        scale: float = 1.0,
        overwrite: bool = False,
    ) -> None:
        base = Path(os.fspath(base_path))
        low = base.name.lower()
        if low.endswith(SIGMF_META_SUFFIX) or low.endswith(SIGMF_DATA_SUFFIX):
            base = base.with_name(base.name[: -len(SIGMF_META_SUFFIX)])
        if isinstance(sample_rate_hz, bool) or not isinstance(sample_rate_hz, (int, float, np.integer, np.floating)):
            raise TypeError(f"Argument 'sample_rate_hz' must be a number, not {type(sample_rate_hz).__name__}.")
        if not (MIN_SAMPLE_RATE_HZ <= sample_rate_hz <= MAX_SAMPLE_RATE_HZ):
            raise ValueError(f"Argument 'sample_rate_hz' must be {MIN_SAMPLE_RATE_HZ:g} .. {MAX_SAMPLE_RATE_HZ:g} Hz, "
                             f"not {sample_rate_hz!r}.")
        self.format = sample_format(datatype)
        if isinstance(datetime_ns, bool) or not isinstance(datetime_ns, (int, np.integer)):
            raise TypeError(f"Argument 'datetime_ns' must be an integer, not {type(datetime_ns).__name__}.")
        if frequency_hz is not None and not (
            isinstance(frequency_hz, (int, float, np.integer, np.floating)) and 0 < frequency_hz <= MAX_FREQUENCY_HZ
        ):
            raise ValueError(f"Argument 'frequency_hz' must be above 0 and up to {MAX_FREQUENCY_HZ:g} Hz, or None, "
                             f"not {frequency_hz!r}.")
        if not isinstance(description, str):
            raise TypeError(f"Argument 'description' must be a string, not {type(description).__name__}.")
        if extra_global is not None and not isinstance(extra_global, dict):
            raise TypeError(f"Argument 'extra_global' must be a dict or None, not {type(extra_global).__name__}.")
        if isinstance(scale, bool) or not isinstance(scale, (int, float)) or not (math.isfinite(scale) and scale > 0):
            raise ValueError(f"Argument 'scale' must be > 0 and finite, not {scale!r}.")
        self.base_path = base
        self.data_path = base.with_name(base.name + SIGMF_DATA_SUFFIX)
        self.meta_path = base.with_name(base.name + SIGMF_META_SUFFIX)
        if not overwrite:
            for p in (self.data_path, self.meta_path):
                if p.exists():
                    raise OutputError(f"{p}: exists (pass overwrite=True to replace it)")
        self.sample_rate_hz = float(sample_rate_hz)
        self.datetime_ns = int(datetime_ns)
        self.frequency_hz = None if frequency_hz is None else float(frequency_hz)
        self.description = description
        self.extra_global = dict(extra_global or {})
        self.scale = float(scale)
        self.num_samples = 0
        self.clipped = 0
        self.nonfinite = 0
        self._annotations: list[dict[str, Any]] = []
        self._sha = hashlib.sha512()
        self.metadata_text()  # a bad extra_global fails here, before anything is written
        fmt = self.format
        if not fmt.is_float:
            info = np.iinfo(fmt.component_dtype)
            self._gain = self.scale / fmt.scale
            self._lo, self._hi = float(info.min), float(info.max)
        try:
            self.data_path.parent.mkdir(parents=True, exist_ok=True)
            self._fh = open(self.data_path, "wb")
        except OSError as exc:
            raise OutputError(f"{self.data_path}: cannot write ({exc.strerror})") from None
        self.closed = False

    def __enter__(self) -> SigmfWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()

    def abort(self) -> None:
        """Stop without writing metadata and remove the data file written so far (nothing looks complete)."""
        if self.closed:
            return
        self.closed = True
        self._fh.close()
        try:
            self.data_path.unlink()
        except OSError:
            pass

    def write(self, samples: np.ndarray) -> None:
        """Append complex samples (any complex or real array, cast to the file's datatype)."""
        if self.closed:
            raise ValueError("Argument 'samples' cannot be written: the writer is closed.")
        x = np.ascontiguousarray(samples)
        if x.ndim != 1:
            raise ValueError(f"Argument 'samples' must be one-dimensional, not {x.ndim}-dimensional.")
        if not (np.iscomplexobj(x) or np.issubdtype(x.dtype, np.number)):
            raise TypeError(f"Argument 'samples' must be numeric, not {x.dtype}.")
        fmt = self.format
        if fmt.is_float:
            comps = np.ascontiguousarray(x, dtype=np.complex64).view(np.float32)
            if not fmt.native:
                comps = comps.astype(fmt.component_dtype)
        else:
            xc = np.ascontiguousarray(x, dtype=np.complex64)
            comps = np.empty(2 * xc.shape[0], dtype=fmt.component_dtype.newbyteorder("="))
            self.nonfinite += int(np.count_nonzero(~np.isfinite(xc)))
            self.clipped += int(complex_to_int_iq(xc, np.float32(self._gain), np.float32(fmt.offset),
                                                  np.float32(self._lo), np.float32(self._hi), comps))
            if not fmt.native:
                comps = comps.astype(fmt.component_dtype)
        buf = comps.tobytes()
        self._sha.update(buf)
        try:
            self._fh.write(buf)
        except OSError as exc:
            raise OutputError(f"{self.data_path}: cannot write ({exc.strerror})") from None
        self.num_samples += int(x.shape[0])

    def annotate(self, sample_start: int, sample_count: int, *, label: str | None = None,
                 comment: str | None = None, **fields: Any) -> None:
        """Add a SigMF annotation (``core:sample_start``, ``core:sample_count``, ``core:label``...).

        ``fields`` are extra keys written as given (use namespaced names: ``"downlink:esn0_db"``).
        """
        for name, v in (("sample_start", sample_start), ("sample_count", sample_count)):
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0:
                raise ValueError(f"Argument '{name}' must be a non-negative integer, not {v!r}.")
        ann: dict[str, Any] = {"core:sample_start": int(sample_start), "core:sample_count": int(sample_count)}
        if label is not None:
            ann["core:label"] = str(label)
        if comment is not None:
            ann["core:comment"] = str(comment)
        ann.update(fields)
        self._annotations.append(ann)

    def metadata_text(self) -> str:
        """The metadata :meth:`close` writes (as of now), as JSON text made by the ``sigmf`` library.

        Raises
        ------
        ValueError
            ``extra_global`` or an annotation field breaks the SigMF schema.
        """
        glob: dict[str, Any] = {
            "core:datatype": self.format.name,
            "core:sample_rate": self.sample_rate_hz,
            "core:num_channels": 1,
            "core:sha512": self._sha.hexdigest(),
            "core:recorder": "downlink",
            SAMPLE_COUNT_KEY: self.num_samples,
        }
        if self.description:
            glob["core:description"] = self.description
        glob.update(self.extra_global)
        capture: dict[str, Any] = {"core:sample_start": 0, "core:datetime": format_iso8601_ns(self.datetime_ns)}
        if self.frequency_hz is not None:
            capture["core:frequency"] = self.frequency_hz
        return metadata_text(glob, [capture], self._annotations)

    def metadata(self) -> dict:
        """The metadata :meth:`close` writes (as of now), as a dict."""
        return json.loads(self.metadata_text())

    def close(self) -> None:
        """Close the data file and write the metadata.  Calling it again does nothing."""
        if self.closed:
            return
        try:
            text = self.metadata_text()
        except ValueError:
            self.abort()
            raise
        self.closed = True
        self._fh.close()
        try:
            self.meta_path.write_text(text + "\n", encoding="utf-8")
        except OSError as exc:
            raise OutputError(f"{self.meta_path}: cannot write ({exc.strerror})") from None
