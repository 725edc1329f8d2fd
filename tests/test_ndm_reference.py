"""Our CCSDS Navigation Data Messages against an independent implementation: ccsds-ndm (PyPI).

ccsds-ndm 3.1.1 reads and writes the Navigation Data Messages with data models that xsdata generated from
the CCSDS NDM XML schemas: each dataclass field carries the schema element's name (the keyword), its
type, its enumeration and its ``pattern`` / bound restrictions in ``field.metadata``, and the fields come
in the order of the schema's ``xsd:sequence``.  Its KVN parser ignores an unknown keyword (the field stays
None) and does not enforce the patterns, so the checks here walk *our* text: every ``KEY = value`` line
(header, metadata, data) must land in the model field whose schema name is ``KEY``, with the same value,
and the value must satisfy that field's type, enumeration, pattern and bounds.

- ``doppler.tdm`` (:mod:`pipeline.orbit._tdm`) as the decode writes it, on the suppressed-carrier and the
  residual-carrier demodulator, and :func:`pipeline.orbit.format_tdm` on edge cases: every keyword, the
  keyword order, the data epochs and frequencies to the last printed digit.
- Orbit Ephemeris Messages (:mod:`pipeline.orbit._oem`): the demo's ``tamarisk.oem`` and an OEM that
  ccsds-ndm writes (comments, several segments, day-of-year epochs, accelerations, covariance) read by our
  reader and by ccsds-ndm: epochs and states agree exactly as printed.

What the models do not settle (the *meaning* of a keyword: the sign convention of RECEIVE_FREQ, what
INTEGRATION_REF = MIDDLE places where, the participant numbering of RECEIVE_FREQ_n) stays marked
"from memory" in pipeline/orbit/_tdm.py.
"""

from __future__ import annotations

import csv
import dataclasses
import enum
import operator
import re
import typing
from decimal import Decimal
from pathlib import Path
from typing import NamedTuple

import numpy as np
import orbit_truth as truth
import pytest
from ccsds_ndm.mapping import NDMFileFormats
from ccsds_ndm.models.ndmxml2 import ndmxml_2_0_0_common_2_0 as ndm2_common
from ccsds_ndm.models.ndmxml2 import ndmxml_2_0_0_master_2_0 as ndm2_master
from ccsds_ndm.models.ndmxml2 import ndmxml_2_0_0_oem_2_0 as ndm2_oem
from ccsds_ndm.ndm_io import NdmIo
from tdm_links import tdm_link_profile

from pipeline import decode, simulate
from pipeline.errors import DataFileError
from pipeline.orbit import format_tdm, parse_tdm, read_oem, read_tdm
from pipeline.timescales import format_utc, parse_utc, tai_from_scale

DEMO_OEM = Path(__file__).resolve().parents[1] / "pipeline" / "data" / "tamarisk.oem"
CREATED = parse_utc("2026-03-14T12:00:00Z", assume_utc=True)
TDM_KEYS = dict(spacecraft="TAMARISK", station="HOLLOW RIDGE", downlink_frequency_hz=8.45e9,
                integration_interval_s=0.032768, creation_tai_ns=CREATED)

# XML Schema 1.1 Part 2 (W3C), sec. 3.3.5 and 3.3.13: the lexical forms of xsd:double and xsd:integer, the
# types the generated models give the numeric fields
_XSD_DOUBLE = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?|[+-]?INF|NaN")
_XSD_INTEGER = re.compile(r"[+-]?\d+")
_BOUNDS = {"min_exclusive": operator.gt, "min_inclusive": operator.ge, "max_exclusive": operator.lt,
           "max_inclusive": operator.le}
_BLOCK_KEYWORDS = {"META_START": "metadata", "META_STOP": "data", "DATA_START": "data", "DATA_STOP": "data",
                   "COVARIANCE_START": "covariance", "COVARIANCE_STOP": "data"}


# ---- reading our text generically -------------------------------------------------------------------------------

class KvnLine(NamedTuple):
    """One non-blank line of a KVN message: its section and segment, and ``KEY``/value (key None: a bare line)."""

    lineno: int
    section: str  # header | metadata | data | covariance
    segment: int  # -1 in the header
    key: str | None
    value: str


def _kvn_lines(text: str) -> list[KvnLine]:
    """Every non-blank line of a CCSDS KVN message (block keywords included), in order."""
    out, section, segment = [], "header", -1
    for lineno, raw in enumerate(text.splitlines(), 1):
        line = raw.strip()
        if not line:
            continue
        if line in _BLOCK_KEYWORDS:
            segment += line == "META_START"
            out.append(KvnLine(lineno, section, segment, line, ""))
            section = _BLOCK_KEYWORDS[line]
        elif line.startswith("COMMENT"):
            out.append(KvnLine(lineno, section, segment, "COMMENT", line[len("COMMENT"):].strip()))
        elif "=" in line:
            key, _, value = line.partition("=")
            out.append(KvnLine(lineno, section, segment, key.strip(), value.strip()))
        else:
            out.append(KvnLine(lineno, section, segment, None, line))
    return out


def _schema_fields(cls) -> dict[str, tuple[int, dataclasses.Field, type]]:
    """Schema element name (the KVN keyword) -> (position in the xsd:sequence, field, value type) of a model."""
    hints = typing.get_type_hints(cls)
    out = {}
    for position, f in enumerate(dataclasses.fields(cls)):
        name = f.metadata.get("name")
        if name:
            args = [a for a in typing.get_args(hints[f.name]) if a is not type(None)]
            out[name] = (position, f, args[0] if len(args) == 1 else hints[f.name])
    return out


def _check_keyword(model, key: str, text: str, where: str) -> int:
    """``KEY = text`` landed in ``model``'s field named ``KEY`` (schema name), same value, valid per the schema.

    Returns the field's position in the schema's sequence.
    """
    # ccsds-ndm 3.1.1 (models generated from the CCSDS NDM XML schemas), an independent implementation
    fields = _schema_fields(type(model))
    assert key in fields, f"{where}: {key!r} is not a keyword of the schema's {type(model).__name__}"
    position, f, kind = fields[key]
    got = getattr(model, f.name)
    assert got is not None, f"{where}: {key} = {text!r} was not read into {type(model).__name__}.{f.name}"
    pattern = f.metadata.get("pattern")
    if pattern is not None:  # an XSD pattern matches the whole value
        assert re.fullmatch(pattern, text), f"{where}: {key} = {text!r} does not match the schema's {pattern!r}"
    if isinstance(kind, type) and issubclass(kind, enum.Enum):
        assert text in {e.value for e in kind}, f"{where}: {key} = {text!r} is not in the schema's enumeration"
        assert got.value == text, f"{where}: {key} read as {got.value!r}, written {text!r}"
    elif kind is float or isinstance(kind, type) and dataclasses.is_dataclass(kind):  # double, or double + units
        value = got if kind is float else got.value
        assert _XSD_DOUBLE.fullmatch(text), f"{where}: {key} = {text!r} is not an xsd:double"
        assert value == float(text), f"{where}: {key} read as {value!r}, written {text!r}"
    elif kind is int:
        assert _XSD_INTEGER.fullmatch(text), f"{where}: {key} = {text!r} is not an xsd:integer"
        assert got == int(text), f"{where}: {key} read as {got!r}, written {text!r}"
    else:
        assert kind is str, f"{where}: {key}: unexpected schema type {kind!r}"
        assert got == text, f"{where}: {key} read as {got!r}, written {text!r}"
    for bound, holds in _BOUNDS.items():
        if bound in f.metadata:
            assert holds(float(text), f.metadata[bound]), f"{where}: {key} = {text} breaks {bound} {f.metadata[bound]}"
    return position


def _check_order(positions: list[tuple[int, str]], where: str) -> None:
    """The keywords of one block follow the schema's sequence (COMMENT, first in every block, and the data
    lines may repeat)."""
    # ccsds-ndm 3.1.1: xsdata generates the fields in the order of the schema's xsd:sequence; the XML form must
    # keep it, and that the KVN form keeps the same order is from memory, not confirmed (CCSDS 503.0-B, 502.0-B)
    keys = [k for _, k in positions]
    assert [p for p, _ in positions] == sorted(p for p, _ in positions), f"{where}: keywords out of order: {keys}"
    plain = [k for k in keys if k not in ("COMMENT", "data line")]
    assert len(plain) == len(set(plain)), f"{where}: a keyword twice: {keys}"


def _check_comments(model, ours: list[str], where: str) -> None:
    assert model.comment == ours, f"{where}: COMMENT lines read as {model.comment!r}, written {ours!r}"


def _check_message(text: str, kind: str, data_line) -> object:
    """Every line of our KVN text against ccsds-ndm's parse of it; returns the model.

    Header and metadata lines go through :func:`_check_keyword`; a data line goes to ``data_line(data, k,
    line, where)`` (``k`` counts the segment's data lines) and the count of data lines must equal the model's.
    """
    obj = NdmIo().from_string(text)  # ccsds-ndm 3.1.1, an independent implementation
    lines = _kvn_lines(text)
    assert type(obj).__name__ == kind, type(obj)
    # the version line is the root's id/version attributes, first in the message
    assert (lines[0].key, lines[0].value) == (obj.id, obj.version), lines[0]
    segments = obj.body.segment
    assert len(segments) == sum(ln.key == "META_START" for ln in lines) >= 1
    blocks: dict[tuple[str, int], list] = {}
    comments: dict[tuple[str, int], list[str]] = {}
    counts: dict[int, int] = {}
    for ln in lines[1:]:
        if ln.key in _BLOCK_KEYWORDS or ln.section == "covariance":
            continue
        where = f"line {ln.lineno}"
        block = (ln.section, ln.segment)
        if ln.section == "header":
            model = obj.header
        elif ln.section == "metadata":
            model = segments[ln.segment].metadata
        else:
            model = segments[ln.segment].data
        if ln.key == "COMMENT":
            comments.setdefault(block, []).append(ln.value)
            blocks.setdefault(block, []).append((_schema_fields(type(model))["COMMENT"][0], "COMMENT"))
        elif ln.section in ("header", "metadata"):
            assert ln.key is not None, f"{where}: not 'KEY = value': {ln.value!r}"
            blocks.setdefault(block, []).append((_check_keyword(model, ln.key, ln.value, where), ln.key))
        else:
            k = counts.get(ln.segment, 0)
            counts[ln.segment] = k + 1
            blocks.setdefault(block, []).append((data_line(model, k, ln, where), "data line"))
    for block, positions in blocks.items():
        _check_order(positions, f"{block[0]} of segment {block[1]}")
    _check_comments(obj.header, comments.get(("header", -1), []), "header")
    for i, seg in enumerate(segments):
        _check_comments(seg.metadata, comments.get(("metadata", i), []), f"metadata of segment {i}")
        _check_comments(seg.data, comments.get(("data", i), []), f"data of segment {i}")
        # a segment's data holds at least one data line (the schema's minOccurs on its list of them)
        (rows,) = [f for f in dataclasses.fields(seg.data) if f.name in ("observation", "state_vector")]
        assert len(getattr(seg.data, rows.name)) == counts.get(i, 0) >= rows.metadata["min_occurs"], \
            f"segment {i}: {counts.get(i, 0)} data lines written, {len(getattr(seg.data, rows.name))} read"
    return obj


def _tdm_data_line(data, k: int, ln: KvnLine, where: str) -> int:
    """A TDM data line 'KEY = epoch value': the k-th observation of the data block holds it, and only it."""
    assert ln.key is not None, f"{where}: a data line is 'KEY = epoch value', got {ln.value!r}"
    assert k < len(data.observation), f"{where}: ccsds-ndm read fewer observations than we wrote"
    obs = data.observation[k]
    parts = ln.value.split()
    assert len(parts) == 2, f"{where}: a data line is 'KEY = epoch value', got {ln.value!r}"
    _check_keyword(obs, "EPOCH", parts[0], where)
    _check_keyword(obs, ln.key, parts[1], where)
    present = [f.name for f in dataclasses.fields(obs) if getattr(obs, f.name) is not None]
    assert present == ["epoch", ln.key.lower()], f"{where}: observation read as {present}"
    return [f.name for f in dataclasses.fields(data)].index("observation")  # after the block's COMMENT lines


def check_tdm(text: str):
    """Every line of our TDM text against ccsds-ndm's parse of it (TDM 1.0 models); returns the model."""
    obj = _check_message(text, "Tdm", _tdm_data_line)
    assert type(obj).__module__.startswith("ccsds_ndm.models.ndmxml1.") and obj.version == "1.0"
    return obj


def _data_tokens(text: str) -> list[tuple[str, str, str]]:
    """(keyword, epoch, value) of every data line, as printed."""
    return [(ln.key, *ln.value.split()) for ln in _kvn_lines(text) if ln.section == "data" and ln.key
            and ln.key not in _BLOCK_KEYWORDS and ln.key != "COMMENT"]


def _check_observations_read(obj, tokens: list[tuple[str, str, str]]) -> None:
    """ccsds-ndm's observations carry our epochs and values to the last printed digit."""
    read = [o for seg in obj.body.segment for o in seg.data.observation]
    assert len(read) == len(tokens)
    for (key, epoch, value), obs in zip(tokens, read):
        decimals = len(value.partition(".")[2])
        got = getattr(obs, key.lower())
        assert obs.epoch == epoch and f"{got:.{decimals}f}" == value, (key, epoch, value, obs.epoch, got)


# ---- TDM: the decode's doppler.tdm ------------------------------------------------------------------------------

FS = 250_000.0


# the suppressed-carrier demodulator (BPSK) and the residual-carrier one (PCM/PM): short recordings, each a few
# locked track points
LINKS = {"suppressed": dict(modulation="bpsk", symbol_rate=31_250.0, seconds=0.8),
         "residual": dict(modulation="pcm-pm", symbol_rate=5_000.0, seconds=1.2)}


@pytest.fixture(scope="module", params=sorted(LINKS))
def decoded(request, tmp_path_factory):
    """(profile, output folder) of a decode of a simulated recording of the link."""
    prof = tdm_link_profile(**LINKS[request.param], sample_rate_hz=FS)
    base = tmp_path_factory.mktemp(request.param)
    sim = simulate(prof, base / "sim")
    decode(sim.meta_path, prof, base / "out")
    return prof, base / "out"


def test_decoded_doppler_tdm_read_by_ccsds_ndm(decoded):
    prof, out = decoded
    text = (out / "doppler.tdm").read_text(encoding="ascii")
    obj = check_tdm(text)
    tokens = _data_tokens(text)
    assert len(tokens) >= 4
    _check_observations_read(obj, tokens)
    # the data lines are doppler.csv's locked rows: epoch = the row's UTC, frequency = nominal + measured offset,
    # exactly in decimal to the last printed digit (the simulator's recording is centred on the nominal frequency)
    with open(out / "doppler.csv", encoding="utf-8", newline="") as f:
        locked = [r for r in csv.DictReader(f) if r["locked"] == "1" or r["locked"] == "True"]
    assert [(k, e) for k, e, _ in tokens] == [("RECEIVE_FREQ_1", r["utc"].removesuffix("Z")) for r in locked]
    nominal = Decimal(repr(prof.link.downlink_frequency_hz))
    for (_, _, value), r in zip(tokens, locked):
        assert Decimal(value) == nominal + Decimal(r["carrier_offset_hz"]), (value, r["carrier_offset_hz"])
    # ... and our reader reads the same epochs and values as ccsds-ndm
    ours = parse_tdm(text).segments[0].observations
    assert [(k, e, v) for k, e, _, v in ours] == [("RECEIVE_FREQ_1", o.epoch, o.receive_freq_1)
                                                 for o in obj.body.segment[0].data.observation]
    meta = obj.body.segment[0].metadata
    assert (meta.participant_1, meta.participant_2) == ("HOLLOW RIDGE", prof.name.upper())
    assert (meta.start_time, meta.stop_time) == (tokens[0][1], tokens[-1][1])


# ---- TDM: format_tdm on edge cases ------------------------------------------------------------------------------

def _rows(offsets_hz, *, start: str = "2026-03-14T09:30:00.016384Z", step_ns: int = 32_768_000) -> list[dict]:
    t0 = parse_utc(start, assume_utc=True)
    return [{"utc": format_utc(t0 + i * step_ns), "carrier_offset_hz": off, "locked": True}
            for i, off in enumerate(offsets_hz)]


EDGE_CASES = {
    # one data line: START_TIME = STOP_TIME
    "one row": (_rows([2301.5]), {}),
    # the optional header COMMENT, a tuning offset, negative offsets and a fraction at the 6th decimal
    "header comment": (_rows([-1234.000001, 0.0, 987654.321, -0.5]), dict(comment="pass 12  over Hollow Ridge",
                                                                           tuning_offset_hz=-125.5)),
    # epochs across the leap second at the end of 2016 (23:59:60.x is a valid epoch in the schema's pattern)
    "leap second": (_rows([10.0, 11.0, 12.0, 13.0], start="2016-12-31T23:59:59.9Z", step_ns=400_000_000), {}),
    # unlocked rows and rows without a finite offset are left out
    "gaps": ([*_rows([1.0, 2.0]), {"utc": "2026-03-14T09:30:01Z", "carrier_offset_hz": float("nan"), "locked": True},
              {"utc": "2026-03-14T09:30:02Z", "carrier_offset_hz": 5.0, "locked": False}], {}),
    # another interval: INTEGRATION_INTERVAL printed with 9 significant digits
    "long interval": (_rows([7.25, 7.5]), dict(integration_interval_s=1.0 / 3.0)),
}


@pytest.mark.parametrize("case", sorted(EDGE_CASES))
def test_format_tdm_edge_cases_read_by_ccsds_ndm(case):
    rows, extra = EDGE_CASES[case]
    keys = {**TDM_KEYS, **extra}
    text = format_tdm(rows, **keys)
    obj = check_tdm(text)
    tokens = _data_tokens(text)
    _check_observations_read(obj, tokens)
    kept = [r for r in rows if r["locked"] and np.isfinite(r["carrier_offset_hz"])]
    assert [e for _, e, _ in tokens] == [r["utc"].removesuffix("Z") for r in kept]
    nominal, tuning = Decimal(repr(keys["downlink_frequency_hz"])), Decimal(repr(keys.get("tuning_offset_hz", 0.0)))
    for (_, _, value), r in zip(tokens, kept):
        assert Decimal(value) == nominal + tuning + Decimal(repr(r["carrier_offset_hz"])), (value, r)
    if "comment" in extra:
        assert obj.header.comment == [" ".join(extra["comment"].split())]
    assert obj.body.segment[0].metadata.integration_interval == float(f"{keys['integration_interval_s']:.9g}")


# a copy of a message we write with one line changed: ccsds-ndm reads each without complaint (an unknown keyword
# is ignored, patterns are not enforced), and the check above must refuse it
MUTATIONS = {
    "misspelled metadata keyword": ("TIMETAG_REF = RECEIVE", "TIMETAG_REFERENCE = RECEIVE", "TIMETAG_REFERENCE"),
    "misspelled header keyword": ("ORIGINATOR = DOWNLINK", "ORIGINATER = DOWNLINK", "ORIGINATER"),
    "invented keyword": ("FREQ_OFFSET = 0.0", "FREQ_OFFSET = 0.0\nCARRIER_OFFSET = 0.0", "CARRIER_OFFSET"),
    "misspelled data keyword": ("RECEIVE_FREQ_1 = 2026-03-14T09:30:00.049152000",
                                "RECEIVE_FREQUENCY_1 = 2026-03-14T09:30:00.049152000", "RECEIVE_FREQUENCY_1"),
    "PATH against its pattern": ("PATH = 2,1", "PATH = 2->1", "PATH"),
    "epoch against its pattern": ("START_TIME = 2026-03-14T09:30:00.016384000",
                                  "START_TIME = 2026-03-14 09:30:00.016384000", "START_TIME"),
    "keyword order": ("TIMETAG_REF = RECEIVE\nINTEGRATION_INTERVAL = 0.032768\nINTEGRATION_REF = MIDDLE",
                      "INTEGRATION_INTERVAL = 0.032768\nINTEGRATION_REF = MIDDLE\nTIMETAG_REF = RECEIVE",
                      "out of order"),
    # the message format_tdm wrote before for rows without a data line (it now refuses them)
    "no data line": ("RECEIVE_FREQ_1 = 2026-03-14T09:30:00.016384000 8450002301.500000\n"
                     "RECEIVE_FREQ_1 = 2026-03-14T09:30:00.049152000 8450002302.500000\n", "", "0 data lines"),
    "a bound of the schema": ("INTEGRATION_INTERVAL = 0.032768", "INTEGRATION_INTERVAL = -0.032768", "min_exclusive"),
}


@pytest.mark.parametrize("case", sorted(MUTATIONS))
def test_a_changed_copy_fails_the_check(case):
    old, new, named = MUTATIONS[case]
    text = format_tdm(_rows([2301.5, 2302.5]), **TDM_KEYS)
    check_tdm(text)
    assert text.count(old) == 1
    bad = text.replace(old, new)
    NdmIo().from_string(bad)  # ccsds-ndm 3.1.1 reads the changed copy without an error
    with pytest.raises(AssertionError, match=named):
        check_tdm(bad)


def test_ccsds_ndm_enforces_the_enumerations():
    # ccsds-ndm 3.1.1: the schema's enumerations (MODE, TIME_SYSTEM, TIMETAG_REF, INTEGRATION_REF) are enforced by
    # the parser itself; our values are members (checked above), a changed one is refused
    text = format_tdm(_rows([2301.5]), **TDM_KEYS)
    for old, new in (("MODE = SEQUENTIAL", "MODE = ONE_WAY"), ("TIME_SYSTEM = UTC", "TIME_SYSTEM = Z"),
                     ("TIMETAG_REF = RECEIVE", "TIMETAG_REF = RECEPTION"),
                     ("INTEGRATION_REF = MIDDLE", "INTEGRATION_REF = CENTRE")):
        with pytest.raises(ValueError):
            NdmIo().from_string(text.replace(old, new))


# ---- OEM: our reader against ccsds-ndm --------------------------------------------------------------------------

def _oem_data_line(data, k: int, ln: KvnLine, where: str) -> int:
    """An OEM state line 'epoch x y z x_dot y_dot z_dot [x_ddot y_ddot z_ddot]': the k-th state vector."""
    assert ln.key is None, f"{where}: {ln.key} = ... in a data block"
    assert k < len(data.state_vector), f"{where}: ccsds-ndm read fewer states than the file has"
    sv = data.state_vector[k]
    parts = ln.value.split()
    # the columns are the schema's elements of stateVectorAccType in its order (EPOCH, X ... Z_DOT, X_DDOT ...)
    columns = sorted(_schema_fields(type(sv)).items(), key=lambda item: item[1][0])
    assert len(parts) in (7, 10), f"{where}: {len(parts)} columns"
    for (name, _), token in zip(columns, parts):
        _check_keyword(sv, name, token, where)
    assert all(getattr(sv, f.name) is None for (_, (_, f, _)) in columns[len(parts):])
    return [f.name for f in dataclasses.fields(data)].index("state_vector")


def check_oem(text: str):
    """Every line of the OEM text against ccsds-ndm's parse of it (OEM 2.0 models); returns the model."""
    obj = _check_message(text, "Oem", _oem_data_line)
    assert (obj.id, obj.version) == ("CCSDS_OEM_VERS", "2.0")
    return obj


def _compare_with_our_reader(obj, eph) -> None:
    """Our :class:`~pipeline.orbit.Ephemeris` of a file against ccsds-ndm's model of it: exactly as printed."""
    assert len(eph.segments) == len(obj.body.segment)
    for seg, theirs in zip(eph.segments, obj.body.segment):
        m = theirs.metadata
        assert (seg.object_name, seg.center, seg.ref_frame, seg.time_system) == \
               (m.object_name, m.center_name, m.ref_frame, m.time_system)
        states = theirs.data.state_vector
        # epochs: ccsds-ndm's epoch text on the segment's scale, as TAI ns, equals ours to the nanosecond
        tai = np.array([tai_from_scale(sv.epoch, m.time_system, name="epoch") for sv in states], dtype=np.int64)
        np.testing.assert_array_equal(seg.t0_tai_ns + np.round(seg.t_s * 1e9).astype(np.int64), tai)
        # states: the same doubles (EME2000: no rotation)
        r = [[sv.x.value, sv.y.value, sv.z.value] for sv in states]
        v = [[sv.x_dot.value, sv.y_dot.value, sv.z_dot.value] for sv in states]
        np.testing.assert_array_equal(seg.r_km, r)
        np.testing.assert_array_equal(seg.v_km_s, v)
        lo = tai_from_scale(m.useable_start_time or m.start_time, m.time_system, name="epoch")
        hi = tai_from_scale(m.useable_stop_time or m.stop_time, m.time_system, name="epoch")
        assert seg.usable_tai_ns == (max(lo, int(tai[0])), min(hi, int(tai[-1])))
        if m.interpolation_degree is not None:
            assert seg.points == max(2, -(-(m.interpolation_degree + 1) // 2))
        # the Hermite interpolation passes through every state inside the usable span
        for t, rk, vk in zip(tai, r, v):
            if seg.usable_tai_ns[0] <= t <= seg.usable_tai_ns[1]:
                got_r, got_v = eph.state(int(t))
                np.testing.assert_allclose(got_r, rk, rtol=0, atol=1e-6)
                np.testing.assert_allclose(got_v, vk, rtol=0, atol=1e-9)


def test_demo_oem_read_by_ccsds_ndm_and_by_us():
    text = DEMO_OEM.read_text(encoding="utf-8")
    obj = check_oem(text)
    assert len(obj.body.segment[0].data.state_vector) == 181
    _compare_with_our_reader(obj, read_oem(DEMO_OEM))


def _state_vector(epoch: str, t_s: float, *, accelerations: bool):
    """ccsds-ndm's stateVectorAccType of Tamarisk ``t_s`` seconds after the demo epoch (tests/orbit_truth.py)."""
    r, v = truth.tamarisk_state(t_s)
    pos, vel, acc = ndm2_common.PositionType, ndm2_common.VelocityType, ndm2_common.AccType
    extra = {}
    if accelerations:  # two-body about the Moon's centre would do; any finite numbers are valid here
        extra = dict(x_ddot=acc(value=-1.25e-6), y_ddot=acc(value=3.5e-7), z_ddot=acc(value=2.0e-9))
    return ndm2_common.StateVectorAccType(
        epoch=epoch, x=pos(value=float(r[0])), y=pos(value=float(r[1])), z=pos(value=float(r[2])),
        x_dot=vel(value=float(v[0])), y_dot=vel(value=float(v[1])), z_dot=vel(value=float(v[2])), **extra)


def _covariance(epoch: str, scale: float):
    """A covariance block of ccsds-ndm's model: its 21 lower-triangle elements, each of the schema's type (any
    numbers: our reader skips the block, and the states around it must still be read)."""
    cls = ndm2_common.OemCovarianceMatrixType
    hints = typing.get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls) if f.name not in ("comment", "epoch", "cov_ref_frame")]
    assert len(names) == 21
    values = {n: hints[n](value=scale * (i + 1)) for i, n in enumerate(names)}
    return cls(comment=["covariance at the first state"], epoch=epoch, cov_ref_frame="EME2000", **values)


def _ccsds_ndm_oem(**changes) -> object:
    """An OEM built with ccsds-ndm's OEM 2.0 models: comments everywhere, two segments (UTC with calendar
    epochs, a useable span, an interpolation degree and covariance; TAI with day-of-year epochs and
    accelerations).  ``changes`` replace metadata fields of the first segment."""
    meta1 = dict(comment=["first segment"], object_name="TAMARISK", object_id="2026-999A", center_name="EARTH",
                 ref_frame="EME2000", time_system="UTC", start_time="2026-03-14T09:30:00.000",
                 useable_start_time="2026-03-14T09:31:00.000", useable_stop_time="2026-03-14T09:35:00.000",
                 stop_time="2026-03-14T09:36:00.000", interpolation="HERMITE", interpolation_degree=5)
    meta1.update(changes)
    seg1 = ndm2_oem.OemSegment(
        metadata=ndm2_oem.OemMetadata(**meta1),
        data=ndm2_oem.OemData(comment=["states every 60 s"],
                              state_vector=[_state_vector(f"2026-03-14T09:{30 + k}:00.000", 60.0 * k,
                                                          accelerations=False) for k in range(7)],
                              covariance_matrix=[_covariance("2026-03-14T09:30:00.000", 1e-2),
                                                 _covariance("2026-03-14T09:36:00.000", 4e-2)]))
    # TAI = UTC + 37 s in 2026: the TAI epoch 09:37:37 is 09:37:00 UTC, 420 s after the demo epoch
    seg2 = ndm2_oem.OemSegment(
        metadata=ndm2_oem.OemMetadata(object_name="TAMARISK", object_id="2026-999A", center_name="EARTH",
                                      ref_frame="EME2000", time_system="TAI", start_time="2026-073T09:37:37",
                                      stop_time="2026-073T09:41:37.5"),
        data=ndm2_oem.OemData(state_vector=[_state_vector(f"2026-073T09:{37 + k}:37.5", 420.5 + 60.0 * k,
                                                          accelerations=True) for k in range(4)]))
    header = ndm2_common.NdmHeader(comment=["written by ccsds-ndm for the tests"], creation_date="2026-03-14T12:00:00",
                                   originator="TESTS")
    return ndm2_master.Oem(header=header, body=ndm2_oem.OemBody(segment=[seg1, seg2]))


def test_oem_written_by_ccsds_ndm_read_by_us(tmp_path):
    # ccsds-ndm 3.1.1 writes the message (KVN) from its schema-generated models, an independent implementation
    text = NdmIo().to_string(_ccsds_ndm_oem(), NDMFileFormats.KVN)
    assert "COVARIANCE_START" in text and "2026-073T09:38:37.5" in text
    path = tmp_path / "written.oem"
    path.write_text(text, encoding="utf-8")
    obj = check_oem(text)
    eph = read_oem(path)
    assert [len(s.t_s) for s in eph.segments] == [7, 4]
    _compare_with_our_reader(obj, eph)
    # the span between the segments is served by neither
    assert eph.state(parse_utc("2026-03-14T09:36:30Z", assume_utc=True)) is None


def test_oem_state_units_are_the_schemas_only_ones():
    # ccsds-ndm 3.1.1 (OEM 2.0 models from the CCSDS NDM XML schemas): the units attribute of each state column
    # allows one value, the unit our reader assumes (km, km/s, km/s**2; pipeline/orbit/_oem.py)
    columns = _schema_fields(ndm2_common.StateVectorAccType)
    units = {}
    for name, (_, _, kind) in columns.items():
        if name != "EPOCH":
            (enum_type,) = [a for a in typing.get_args(typing.get_type_hints(kind)["units"]) if a is not type(None)]
            units[name] = [u.value for u in enum_type]
    assert units == {**{k: ["km"] for k in ("X", "Y", "Z")}, **{k: ["km/s"] for k in ("X_DOT", "Y_DOT", "Z_DOT")},
                     **{k: ["km/s**2"] for k in ("X_DDOT", "Y_DDOT", "Z_DDOT")}}


# standard OEMs our reader refuses on purpose (CCSDS 502.0-B allows them): one line, the file named, the reason
REFUSED = {
    "centre": (dict(center_name="MOON"), "only Earth-centred"),
    "time system": (dict(time_system="TCB"), "TIME_SYSTEM 'TCB' is not one of"),
    "frame": (dict(ref_frame="TOD"), "REF_FRAME 'TOD' is not"),
}


@pytest.mark.parametrize("case", sorted(REFUSED))
def test_oem_limits_are_clear_errors(tmp_path, case):
    changes, reason = REFUSED[case]
    text = NdmIo().to_string(_ccsds_ndm_oem(**changes), NDMFileFormats.KVN)
    check_oem(text)  # a valid message per ccsds-ndm's models
    path = tmp_path / "refused.oem"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(DataFileError) as info:
        read_oem(path)
    message = str(info.value)
    assert "\n" not in message and message.startswith(str(path)) and reason in message, message


def test_xml_form_is_a_clear_error(tmp_path):
    # the XML form of the same messages (ccsds-ndm writes it): our readers take the key-value form only
    oem_path = tmp_path / "written.oem"
    oem_path.write_text(NdmIo().to_string(_ccsds_ndm_oem(), NDMFileFormats.XML), encoding="utf-8")
    tdm_path = tmp_path / "written.tdm"
    tdm = NdmIo().from_string(format_tdm(_rows([2301.5]), **TDM_KEYS))
    tdm_path.write_text(NdmIo().to_string(tdm, NDMFileFormats.XML), encoding="utf-8")
    for path, read in ((oem_path, read_oem), (tdm_path, read_tdm)):
        with pytest.raises(DataFileError) as info:
            read(path)
        message = str(info.value)
        assert "\n" not in message and message.startswith(str(path)) and "XML" in message, message
