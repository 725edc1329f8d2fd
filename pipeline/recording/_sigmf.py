"""SigMF metadata through the standard's own library (``sigmf``, PyPI): parse, validate, describe, write.

The library checks the metadata against the SigMF JSON schema it ships and writes new metadata;
this module adds what a decoder needs beyond the schema (a complex datatype we can read, one
channel, a sample rate and capture frequencies in the ranges below, the data file's promised
length) and turns every problem into one :class:`~pipeline.errors.RecordingError` line naming
the file.  Samples are never read here: ``_recording.py`` maps them chunk by chunk.

``sigmf`` (and the ``jsonschema`` it uses) is imported on first use, not with the package: it
adds about 55 ms to an interpreter that has numpy loaded (see DEVELOPERS.md, "pipeline.recording").
"""

from __future__ import annotations

import functools
import json
import math
import tarfile
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import RecordingError
from pipeline.recording._formats import SampleFormat, sample_format

__all__ = [
    "SIGMF_META_SUFFIX",
    "SIGMF_DATA_SUFFIX",
    "SIGMF_ARCHIVE_SUFFIX",
    "SAMPLE_COUNT_KEY",
    "EXTENSION",
    "MIN_SAMPLE_RATE_HZ",
    "MAX_SAMPLE_RATE_HZ",
    "MAX_FREQUENCY_HZ",
    "SigmfCapture",
    "SigmfDescription",
    "parse_metadata",
    "validate_metadata",
    "describe_metadata",
    "archive_members",
    "metadata_text",
    "sigmf_specification",
]

SIGMF_META_SUFFIX = ".sigmf-meta"
SIGMF_DATA_SUFFIX = ".sigmf-data"
SIGMF_ARCHIVE_SUFFIX = ".sigmf"

#: Our extension field (global object): the exact number of samples the writer put in the data file.
SAMPLE_COUNT_KEY = "downlink:sample_count"
#: The ``core:extensions`` entry declaring our namespace (SigMF: extension object, name/version/optional).
EXTENSION = {"name": "downlink", "version": "1.0.0", "optional": True}

#: Accepted ``core:sample_rate`` (and ``--sample-rate``), Hz.  The maximum is the SigMF 1.2.6 schema's
#: (``core:sample_rate`` maximum 1e12); below one sample per second is no radio recording.
MIN_SAMPLE_RATE_HZ = 1.0
MAX_SAMPLE_RATE_HZ = 1e12
#: Accepted capture ``core:frequency``: > 0 (an RF centre frequency) up to the schema's 1e12 Hz.
MAX_FREQUENCY_HZ = 1e12

# Largest metadata we parse: real ones are kilobytes; a huge one is a mistake, not a recording.
MAX_META_BYTES = 64 << 20


@functools.lru_cache(maxsize=1)
def _validator():
    """A JSON Schema validator for the schema the ``sigmf`` library ships, built once per process.

    ``sigmf.validate.validate`` checks the schema itself against the JSON Schema metaschema on
    every call (about 36 ms, against 0.2 ms for the validation proper); building the validator
    once keeps opening a recording cheap.  ``jsonschema`` is the library's own validator.
    """
    from jsonschema import validators
    from sigmf import schema

    meta_schema = schema.get_schema()
    return validators.validator_for(meta_schema)(meta_schema)


def sigmf_specification() -> str:
    """Version of the SigMF specification the installed ``sigmf`` library implements (``"1.2.6"``)."""
    import sigmf

    return str(sigmf.__specification__)


def _line(text: Any, limit: int = 160) -> str:
    """``text`` on one line, at most ``limit`` characters."""
    s = " ".join(str(text).split())
    return s if len(s) <= limit else s[: limit - 3] + "..."


# ---- parsing and validation ----------------------------------------------------------------------


def _no_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a JSON number")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"number {_line(text, 30)} is beyond the range of a double")
    return value


def parse_metadata(raw: bytes, where: Path | str) -> Any:
    """Decode metadata octets (UTF-8 JSON) into Python objects.

    Raises
    ------
    RecordingError
        One line: too large, not UTF-8, not JSON (position given), ``NaN``/``Infinity`` literals
        and numbers beyond a double (``1e999``), integers too long to convert, nesting too deep.
    """
    if len(raw) > MAX_META_BYTES:
        raise RecordingError(f"{where}: metadata is {len(raw)} bytes, more than a SigMF meta file should be")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RecordingError(f"{where}: metadata is not UTF-8 text (byte {exc.start})") from None
    try:
        return json.loads(text, parse_constant=_no_constant, parse_float=_finite_float)
    except json.JSONDecodeError as exc:
        raise RecordingError(f"{where}: metadata is not valid JSON ({exc.msg} at line {exc.lineno} "
                             f"column {exc.colno})") from None
    except ValueError as exc:  # NaN/Infinity literals, integers beyond the conversion limit
        raise RecordingError(f"{where}: metadata is not valid JSON ({_line(exc, 80)})") from None
    except RecursionError:
        raise RecordingError(f"{where}: metadata is nested too deeply") from None


def _location(path) -> str:
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out or "top level"


def validate_metadata(meta: Any, where: Path | str) -> None:
    """Check parsed metadata against the SigMF JSON schema that the ``sigmf`` library ships.

    Notes
    -----
    The checks of ``sigmf.validate.validate``: the schema (types, required keys, ranges,
    patterns; the violation reported is the one ``jsonschema.exceptions.best_match`` picks, as
    there) and the ascending ``core:sample_start`` order of captures and annotations.  Its
    warning about extension namespaces used without a ``core:extensions`` entry is not an error
    for a reader and is left out.  The validator is built once (see ``_validator``).  Cost: one
    pass over the metadata, about 50 microseconds per annotation.

    Raises
    ------
    RecordingError
        ``"<file>: metadata breaks the SigMF schema at captures[0].core:sample_start: -1 is less
        than the minimum of 0"``: one line.

    References
    ----------
    SigMF specification 1.2.6 (the schema shipped with ``sigmf``, PyPI): captures and
    annotations "MUST be sorted by the value of each ... core:sample_start key, ascending".
    """
    from jsonschema.exceptions import best_match

    try:
        error = best_match(_validator().iter_errors(meta))
    except RecursionError:
        raise RecordingError(f"{where}: metadata is nested too deeply") from None
    if error is not None:
        raise RecordingError(f"{where}: metadata breaks the SigMF schema at {_location(error.absolute_path)}: "
                             f"{_line(error.message)}")
    for key in ("captures", "annotations"):
        starts = [item["core:sample_start"] for item in meta[key]]
        for i in range(1, len(starts)):
            if starts[i] < starts[i - 1]:
                raise RecordingError(f"{where}: metadata breaks the SigMF schema at {key}[{i}]: core:sample_start "
                                     f"{starts[i]} comes before {starts[i - 1]}; {key} must be sorted by it")


# ---- what the decoder takes from valid metadata ------------------------------------------------


@dataclass(frozen=True)
class SigmfCapture:
    """One capture segment as written: ``core:sample_start``, ``core:datetime`` (text), ``core:frequency``."""

    sample_start: int
    datetime: str | None
    frequency_hz: float | None


@dataclass(frozen=True)
class SigmfDescription:
    """What the decoder needs from schema-valid SigMF metadata.

    Attributes
    ----------
    format : SampleFormat
        ``core:datatype``.
    sample_rate_hz : float or None
        ``core:sample_rate`` (None when absent: then ``--sample-rate`` must give it).
    captures : tuple of SigmfCapture
        At least one (an empty list means one segment from sample 0 with nothing known).
    header_bytes, trailing_bytes : int
        Octets before the first sample (``core:header_bytes`` of the first capture) and after the
        last (``core:trailing_bytes``), for Non-Conforming Datasets.
    dataset : str or None
        ``core:dataset``: the data file's name beside the metadata (Non-Conforming Dataset).
    sha512 : str or None
        ``core:sha512`` in lower case.
    min_samples : int
        Samples the metadata says exist at least: the end of the furthest annotation and the
        start of the last capture plus one (see :func:`describe_metadata`).
    min_samples_why : str
        Which field sets ``min_samples`` (for the error message).
    exact_samples : int or None
        ``downlink:sample_count`` (written by :class:`SigmfWriter`), the exact sample count.
    """

    format: SampleFormat
    sample_rate_hz: float | None
    captures: tuple[SigmfCapture, ...]
    header_bytes: int
    trailing_bytes: int
    dataset: str | None
    sha512: str | None
    min_samples: int
    min_samples_why: str
    exact_samples: int | None


def _hertz(where: Path | str, value: Any, what: str, hint: str) -> float:
    """``value`` as a float number of Hz (inf when too large for one), or one RecordingError line."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) and not hasattr(value, "__float__"):
        raise RecordingError(f"{where}: {what} must be a number of Hz, not {_line(repr(value), 40)}{hint}")
    try:
        return float(value)
    except (OverflowError, ValueError, TypeError):
        return math.inf


def check_sample_rate(where: Path | str, rate: Any, flag_hint: str = "") -> float:
    """A sample rate within ``MIN_SAMPLE_RATE_HZ .. MAX_SAMPLE_RATE_HZ``, or one RecordingError line."""
    value = _hertz(where, rate, "sample rate", flag_hint)
    if not (MIN_SAMPLE_RATE_HZ <= value <= MAX_SAMPLE_RATE_HZ):  # NaN fails too
        raise RecordingError(f"{where}: sample rate must be {MIN_SAMPLE_RATE_HZ:g} .. {MAX_SAMPLE_RATE_HZ:g} Hz, "
                             f"not {value:g}{flag_hint}")
    return value


def check_frequency(where: Path | str, freq: Any, what: str) -> float | None:
    """A centre frequency in ``(0, MAX_FREQUENCY_HZ]`` Hz, None for None, or one RecordingError line."""
    if freq is None:
        return None
    value = _hertz(where, freq, what, "")
    if not (0.0 < value <= MAX_FREQUENCY_HZ):
        raise RecordingError(f"{where}: {what} must be a centre frequency above 0 and up to {MAX_FREQUENCY_HZ:g} Hz, "
                             f"not {value:g} (leave it out when unknown)")
    return value


def _sigmf_format(where: Path | str, datatype: str) -> SampleFormat:
    low = datatype.lower()
    if low.startswith("r"):
        raise RecordingError(f"{where}: core:datatype {datatype!r} is real-valued; an IQ (complex) recording is needed")
    if low in ("cf32", "ci16"):
        raise RecordingError(f"{where}: core:datatype {datatype!r} names no byte order (SigMF writes {low}_le or "
                             f"{low}_be)")
    try:
        return sample_format(low)
    except ValueError:
        raise RecordingError(f"{where}: core:datatype {datatype!r} cannot be read (cf32_le, cf32_be, ci16_le, "
                             f"ci16_be, ci8, cu8 can)") from None


def describe_metadata(meta: dict, where: Path | str) -> SigmfDescription:
    """The decoder's view of metadata that passed :func:`validate_metadata`.

    Rules beyond the schema: ``core:datatype`` complex and readable; ``core:num_channels`` 1;
    ``core:sample_rate`` in ``1 .. 1e12`` Hz; capture ``core:sample_start`` strictly increasing;
    ``core:header_bytes`` only on the first capture (samples are one contiguous run); capture
    ``core:frequency`` above 0; not ``core:metadata_only``; ``downlink:sample_count`` a
    non-negative integer.

    Notes
    -----
    SigMF has no field giving the dataset's length.  What the metadata *promises* is taken as
    the largest of: the last capture's ``core:sample_start`` + 1 (a segment holds at least one
    sample) and, over the annotations, ``core:sample_start + core:sample_count`` (an annotation
    without a count: its ``core:sample_start``) minus ``core:offset`` (annotation indices may be
    absolute).  The annotation rule is the one the ``sigmf`` library uses to warn that a data
    source "ends before the final annotation".  Files written by :class:`SigmfWriter` also carry
    ``downlink:sample_count``, the exact count.  The ``core:sha512`` check (while streaming)
    covers every other change of the data file.

    Raises
    ------
    RecordingError
        One line naming the field and the rule.
    """
    glob = meta["global"]
    fmt = _sigmf_format(where, glob["core:datatype"])
    if glob.get("core:metadata_only") is True:
        raise RecordingError(f"{where}: core:metadata_only is true: this SigMF file has no samples to decode")
    channels = int(glob.get("core:num_channels", 1))
    if channels != 1:
        raise RecordingError(f"{where}: core:num_channels is {channels}; only single-channel recordings are read")
    rate = glob.get("core:sample_rate")
    rate = None if rate is None else check_sample_rate(where, rate, " (core:sample_rate)")
    dataset = glob.get("core:dataset")
    if dataset is not None and (not dataset or any(c in dataset for c in "/\\") or dataset in (".", "..")):
        raise RecordingError(f"{where}: core:dataset must be a file name beside the metadata, not {dataset!r}")
    sha = glob.get("core:sha512")
    exact = glob.get(SAMPLE_COUNT_KEY)
    if exact is not None and (isinstance(exact, bool) or not isinstance(exact, int) or exact < 0):
        raise RecordingError(f"{where}: {SAMPLE_COUNT_KEY} must be a non-negative integer, "
                             f"not {_line(repr(exact), 40)}")

    caps: list[SigmfCapture] = []
    header_bytes = 0
    for i, c in enumerate(meta["captures"]):
        s0 = int(c["core:sample_start"])  # the schema allows 5.0 for an integer
        if caps and s0 <= caps[-1].sample_start:
            raise RecordingError(f"{where}: capture {i} core:sample_start {s0} is not after the previous one")
        hb = int(c.get("core:header_bytes", 0))
        if hb and i > 0:
            raise RecordingError(f"{where}: core:header_bytes in capture {i}: only a header before the first capture "
                                 f"is supported")
        header_bytes += hb
        freq = check_frequency(where, c.get("core:frequency"), f"capture {i} core:frequency")
        caps.append(SigmfCapture(s0, c.get("core:datetime"), freq))
    if not caps:
        caps.append(SigmfCapture(0, None, None))

    offset = int(glob.get("core:offset", 0))
    need, why = caps[-1].sample_start + 1, f"capture {len(caps) - 1} starts at sample {caps[-1].sample_start}"
    for i, a in enumerate(meta["annotations"]):
        start = int(a["core:sample_start"])
        end = start + int(a.get("core:sample_count", 0)) - offset
        if end > need:
            need, why = end, f"annotation {i} ends at sample {end}"
    return SigmfDescription(format=fmt, sample_rate_hz=rate, captures=tuple(caps), header_bytes=header_bytes,
                            trailing_bytes=int(glob.get("core:trailing_bytes", 0)), dataset=dataset,
                            sha512=None if sha is None else sha.lower(), min_samples=need, min_samples_why=why,
                            exact_samples=exact)


# ---- archives ---------------------------------------------------------------------------------------


def archive_members(path: Path) -> tuple[bytes, int, int]:
    """Find the recording in an uncompressed SigMF archive: (metadata octets, data offset, data size).

    A tar member's octets are contiguous in the archive, so the samples can be mapped in place at
    the data member's offset: nothing is extracted, only the tar headers and the metadata are read.
    The ``sigmf`` library's archive reader is not used because it loads a compressed archive's
    samples into memory and hashes the data when it opens.

    Raises
    ------
    RecordingError
        Compressed archive, not a tar, no or several ``.sigmf-meta`` members, no matching
        ``.sigmf-data`` member.

    References
    ----------
    SigMF specification, "SigMF Archive Format": a tar holding ``base.sigmf-meta`` and
    ``base.sigmf-data`` in a folder ``base``.
    """
    try:
        with open(path, "rb") as fh:
            magic = fh.read(6)
        if magic[:2] == b"\x1f\x8b" or magic == b"\xfd7zXZ\x00" or magic[:3] == b"BZh" or magic[:4] == b"PK\x03\x04":
            raise RecordingError(f"{path}: compressed SigMF archive: decompress it (or extract the pair) first, "
                                 f"samples are read in place from an uncompressed tar only")
        with tarfile.open(path, mode="r:") as tar:
            members = [m for m in tar.getmembers() if m.isfile()]
            metas = [m for m in members if m.name.lower().endswith(SIGMF_META_SUFFIX)]
            if len(metas) != 1:
                raise RecordingError(f"{path}: SigMF archive holds {len(metas)} recordings; exactly one can be opened")
            meta_m = metas[0]
            if meta_m.size > MAX_META_BYTES:
                raise RecordingError(f"{path}: metadata in the archive is too large ({meta_m.size} bytes)")
            raw = tar.extractfile(meta_m).read()
    except tarfile.TarError as exc:
        raise RecordingError(f"{path}: not a readable SigMF archive (tar: {_line(exc, 80)})") from None
    except OSError as exc:
        raise RecordingError(f"{path}: cannot read ({exc.strerror})") from None
    data_name = meta_m.name[: -len(SIGMF_META_SUFFIX)] + SIGMF_DATA_SUFFIX
    data_m = next((m for m in members if m.name == data_name), None)
    if data_m is None:
        raise RecordingError(f"{path}: SigMF archive has no {Path(data_name).name} beside {Path(meta_m.name).name}")
    return raw, int(data_m.offset_data), int(data_m.size)


# ---- writing ---------------------------------------------------------------------------------------


def metadata_text(global_fields: dict, captures: list[dict], annotations: list[dict]) -> str:
    """SigMF metadata built, validated and serialised by the ``sigmf`` library.

    Parameters
    ----------
    global_fields : dict
        Global object fields; ``core:version`` is the library's specification version and
        ``core:num_channels`` 1.  Fields of our namespace (``downlink:``) get their
        ``core:extensions`` entry.
    captures, annotations : list of dict
        Each with its ``core:sample_start`` (annotations may carry ``core:sample_count``).

    Returns
    -------
    str
        The JSON text (keys sorted, ``global``, ``captures``, ``annotations`` first), no newline at
        the end.

    Raises
    ------
    ValueError
        When the result breaks the SigMF schema (a bad extra field of the caller's).
    """
    from jsonschema.exceptions import ValidationError
    from sigmf import SigMFFile

    glob = dict(global_fields)
    if any(k.startswith("downlink:") for k in glob):
        ext = [e for e in glob.get("core:extensions", []) if e.get("name") != EXTENSION["name"]]
        glob["core:extensions"] = ext + [dict(EXTENSION)]
    f = SigMFFile(global_info=glob)
    for c in captures:
        c = dict(c)
        f.add_capture(c.pop("core:sample_start"), metadata=c)
    for a in annotations:
        a = dict(a)
        start = a.pop("core:sample_start")
        f.add_annotation(start, a.pop("core:sample_count", None), metadata=a)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", DeprecationWarning)
            f.validate()
    except ValidationError as exc:
        raise ValueError(f"Argument 'extra_global' (or an annotation) makes metadata that breaks the SigMF "
                         f"schema at {_location(exc.absolute_path)}: {_line(exc.message)}.") from None
    undeclared = [w for w in caught if "undeclared extensions" in str(w.message)]
    if undeclared:  # the library only warns today; a writer should not leave it to readers
        raise ValueError(f"Argument 'extra_global' uses a namespace without a core:extensions entry: "
                         f"{_line(undeclared[0].message)}")
    return f.dumps(pretty=True)
