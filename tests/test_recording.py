"""pipeline.recording: readers, writer, time stamps, symbol files, bad input."""

from __future__ import annotations

import datetime as dt
import io
import json
import struct
import wave

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.errors import OutputError, RecordingError
from pipeline.recording import (
    SAMPLE_FORMATS,
    SigmfWriter,
    format_iso8601_ns,
    open_recording,
    open_symbols,
    parse_iso8601_ns,
    sample_format,
)

T0 = "2026-03-14T09:30:00.123456789Z"


def _iq(rng, n, amp=0.3):
    return (amp * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)


def _write_meta(path, meta):
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(meta, fh)


def _meta(datatype="cf32_le", rate=1e6, captures=None, **glob):
    g = {"core:datatype": datatype, "core:sample_rate": rate, "core:version": "1.2.0", **glob}
    return {"global": g, "captures": captures if captures is not None else [{"core:sample_start": 0,
            "core:datetime": T0}], "annotations": []}


def _slow_reference(raw_components, name):
    """Obvious per-sample conversion, one Python complex at a time (the rule of the brief)."""
    out = []
    for i in range(0, len(raw_components), 2):
        a, b = float(raw_components[i]), float(raw_components[i + 1])
        if name.startswith("cf32"):
            if not (np.isfinite(a) and np.isfinite(b)):
                a = b = 0.0
            out.append(complex(a, b))
        elif name.startswith("ci16"):
            out.append(complex(a / 32768, b / 32768))
        elif name == "ci8":
            out.append(complex(a / 128, b / 128))
        else:
            out.append(complex((a - 127.5) / 128, (b - 127.5) / 128))
    return np.array(out, dtype=np.complex128)


# ---- time ------------------------------------------------------------------------------------

START_NS = 1_773_480_600_000_012_345  # 2026-03-14T09:30:00.000012345Z, POSIX ns


@pytest.mark.kat
def test_iso8601_known_values():
    # 2000-01-01T00:00:00Z is 946684800 s of POSIX time: common practice, no published source
    assert parse_iso8601_ns("2000-01-01T00:00:00Z") == 946_684_800 * 10**9
    assert parse_iso8601_ns("2000-01-01T12:00:00.000000001Z") == (946_684_800 + 43_200) * 10**9 + 1
    assert parse_iso8601_ns("2000-01-01T14:00:00+02:00") == (946_684_800 + 43_200) * 10**9  # ISO 8601 zone offset
    assert parse_iso8601_ns("2026-03-14T09:30:00.1234567891234Z") == parse_iso8601_ns(T0)  # beyond 1 ns: cut
    assert format_iso8601_ns(parse_iso8601_ns(T0)) == T0
    assert format_iso8601_ns(-1) == "1969-12-31T23:59:59.999999999Z"
    for bad in ("2026-02-30T00:00:00Z", "2026-03-14T25:00:00Z", "2026-03-14 nonsense", "2026-03-14T09:30:00",
                "1970-01-01T00:00:00Z", "1971-12-31T23:59:59.999Z"):  # UTC before 1972: no whole-second table
        with pytest.raises(ValueError):
            parse_iso8601_ns(bad)


@settings(max_examples=200, deadline=None)
@given(st.datetimes(min_value=dt.datetime(1972, 1, 1), max_value=dt.datetime(2200, 1, 1)),
       st.integers(0, 999))
def test_iso8601_against_stdlib(when, extra_ns):
    # Python's datetime (stdlib) as the outside reference, exact to the microsecond.
    aware = when.replace(tzinfo=dt.timezone.utc)
    delta = aware - dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)
    expect = (delta.days * 86400 + delta.seconds) * 10**9 + delta.microseconds * 1000 + extra_ns
    text = aware.strftime("%Y-%m-%dT%H:%M:%S") + f".{when.microsecond:06d}{extra_ns:03d}Z"
    assert parse_iso8601_ns(text) == expect
    assert format_iso8601_ns(expect) == text


def test_iso8601_against_astropy():
    import astropy.time as astropy_time
    # astropy (PyPI): Unix time of a UTC instant, leap seconds not counted (POSIX), as ours.
    t = astropy_time.Time("2026-03-14T09:30:00.123456", scale="utc", format="isot")
    assert abs(parse_iso8601_ns("2026-03-14T09:30:00.123456Z") - round(t.unix * 1e9)) < 1000


# ---- conversion of every datatype ---------------------------------------------------------------


def _quantise(x, name):
    comps = x.view(np.float32) if x.dtype == np.complex64 else x.astype(np.complex64).view(np.float32)
    if name.startswith("cf32"):
        return comps.astype(SAMPLE_FORMATS[name].component_dtype)
    if name.startswith("ci16"):
        return np.clip(np.round(comps * 32768), -32768, 32767).astype(SAMPLE_FORMATS[name].component_dtype)
    if name == "ci8":
        return np.clip(np.round(comps * 128), -128, 127).astype(np.int8)
    return np.clip(np.round(comps * 128 + 127.5), 0, 255).astype(np.uint8)


@pytest.mark.kat
@pytest.mark.parametrize("name", sorted(SAMPLE_FORMATS))
def test_conversion_matches_slow_reference(tmp_path, rng, name):
    x = _iq(rng, 257)
    comps = _quantise(x, name)
    if name.startswith("cf32"):
        comps[10] = np.nan
        comps[21] = np.inf
        comps[40] = -np.inf
        comps[41] = np.nan  # same sample twice: counted once
    path = tmp_path / "x.raw"
    comps.tofile(path)
    rec = open_recording(path, datatype=name, sample_rate_hz=48_000.0, start=T0)
    chunk = rec.read()
    assert chunk.samples.dtype == np.complex64 and chunk.start == 0
    ref = _slow_reference(comps, name)
    np.testing.assert_allclose(chunk.samples, ref, rtol=0, atol=1e-7)
    assert chunk.nonfinite == (3 if name.startswith("cf32") else 0)


@pytest.mark.kat
def test_native_float_chunks_match_slow_reference(tmp_path, rng):
    """cf32_le chunks (read into complex64, NaN/Inf zeroed in place) against the slow reference and read()."""
    x = _iq(rng, 301)
    comps = _quantise(x, "cf32_le")
    comps[[4, 5, 77, 200, 601]] = [np.nan, np.inf, -np.inf, np.nan, np.nan]  # samples 2, 38, 100, 300
    path = tmp_path / "x.raw"
    comps.tofile(path)
    rec = open_recording(path, datatype="cf32_le", sample_rate_hz=48_000.0, start=T0)
    parts = list(rec.chunks(64, verify=False))
    joined = np.concatenate([c.samples for c in parts])
    ref = _slow_reference(comps, "cf32_le")
    assert joined.dtype == np.complex64
    np.testing.assert_array_equal(joined, ref)
    assert joined.view(np.uint32).tobytes() == rec.read().samples.view(np.uint32).tobytes()
    assert [c.nonfinite for c in parts] == [2, 1, 0, 0, 1]  # samples 2 and 38, 100, 300


def test_same_samples_from_every_datatype(tmp_path, rng):
    """One recording in cf32, ci16, ci8 and cu8: the same samples within each quantisation step."""
    x = _iq(rng, 5000, amp=0.25)
    got = {}
    for name in ("cf32_le", "ci16_le", "ci8", "cu8", "cf32_be", "ci16_be"):
        p = tmp_path / f"x.{name}"
        _quantise(x, name).tofile(p)
        got[name] = open_recording(p, datatype=name, sample_rate_hz=1e6).read().samples
    np.testing.assert_array_equal(got["cf32_le"], x)
    np.testing.assert_array_equal(got["cf32_be"], x)
    np.testing.assert_array_equal(got["ci16_be"], got["ci16_le"])
    # half a least-significant step per component (ci16: 1/32768, ci8 and cu8: 1/128)
    for name, lsb in (("ci16_le", 1 / 32768), ("ci8", 1 / 128), ("cu8", 1 / 128)):
        err = got[name] - x
        assert np.max(np.abs(err.real)) <= lsb / 2 + 1e-7
        assert np.max(np.abs(err.imag)) <= lsb / 2 + 1e-7


def test_reader_matches_sigmf_library(tmp_path, rng):
    from sigmf import sigmffile

    x = _iq(rng, 3000, amp=0.2)
    for name in ("cf32_le", "ci16_le", "ci8", "cu8"):
        base = tmp_path / name
        with SigmfWriter(base, sample_rate_hz=250e3, datatype=name, datetime_ns=parse_iso8601_ns(T0)) as w:
            w.write(x)
        theirs = sigmffile.fromfile(str(base) + ".sigmf-meta")  # sigmf (PyPI)
        theirs.validate()  # the SigMF JSON schema shipped with sigmf (PyPI)
        ours = open_recording(str(base) + ".sigmf-meta").read().samples
        ref = theirs.read_samples().astype(np.complex128)
        # sigmf scales integers by 1/2^(bits-1); for cu8 it removes 128 rather than our 127.5
        shift = (0.5 / 128) * (1 + 1j) if name == "cu8" else 0
        np.testing.assert_allclose(ours, ref + shift, rtol=0, atol=1e-6)


# ---- chunking ---------------------------------------------------------------------------------


def test_chunking_invariance(tmp_path, rng):
    x = _iq(rng, 20_011)
    for name in ("ci16_le", "cf32_be", "cu8", "cf32_le"):  # cf32_le: chunks() reads it straight into its arrays
        p = tmp_path / f"c.{name}"
        comps = _quantise(x, name)
        if name.startswith("cf32"):
            comps[rng.integers(0, comps.size, 25)] = np.nan
        comps.tofile(p)
        rec = open_recording(p, datatype=name, sample_rate_hz=1e6)
        whole = rec.read()
        for _ in range(5):
            size = int(rng.integers(1, 5000))
            start = int(rng.integers(0, 1000))
            stop = int(rng.integers(start, rec.num_samples + 1))
            parts = list(rec.chunks(size, start=start, stop=stop))
            assert [c.start for c in parts] == list(range(start, stop, size))
            assert all(len(c) == size for c in parts[:-1])
            joined = np.concatenate([c.samples for c in parts]) if parts else np.empty(0, np.complex64)
            np.testing.assert_array_equal(joined, whole.samples[start:stop])
            bad = int(np.count_nonzero((~np.isfinite(comps[2 * start:2 * stop].reshape(-1, 2))).any(axis=1)))
            assert sum(c.nonfinite for c in parts) == bad
        # random split points, not a fixed size
        cuts = np.sort(rng.choice(np.arange(1, rec.num_samples), 7, replace=False))
        edges = [0, *cuts.tolist(), rec.num_samples]
        joined = np.concatenate([rec.read(a, b - a).samples for a, b in zip(edges, edges[1:])])
        np.testing.assert_array_equal(joined, whole.samples)


def test_chunk_arguments_are_checked(tmp_path, rng):
    p = tmp_path / "a.cf32"
    _iq(rng, 10).tofile(p)
    rec = open_recording(p, datatype="cf32", sample_rate_hz=1.0)
    with pytest.raises(ValueError, match="chunk_samples"):
        next(rec.chunks(0))
    with pytest.raises(ValueError, match="'stop' must be 3..10, not 11"):
        next(rec.chunks(4, start=3, stop=11))
    with pytest.raises(TypeError, match="chunk_samples"):
        next(rec.chunks(2.5))
    with pytest.raises(ValueError, match="Argument 'count' must be 0..8, not -1."):
        rec.read(2, -1)
    assert len(rec.read(2, 3)) == 3 and rec.read(2, 3).start == 2 and len(rec.read(4)) == 6


# ---- SigMF ------------------------------------------------------------------------------------


def test_writer_metadata_field_names(tmp_path, rng):
    base = tmp_path / "pass"
    with SigmfWriter(base, sample_rate_hz=1e6, datatype="ci16_le", datetime_ns=parse_iso8601_ns(T0),
                     frequency_hz=2_250_000_000.0, description="demo",
                     extra_global={"downlink:profile": "tamarisk"}) as w:
        w.write(_iq(rng, 100))
        w.annotate(10, 5, label="burst", comment="test")
    meta = json.loads((tmp_path / "pass.sigmf-meta").read_text())
    # SigMF specification, top-level object: "global", "captures", "annotations"
    assert set(meta) == {"global", "captures", "annotations"}
    g = meta["global"]
    # SigMF specification, global object: core:datatype, core:sample_rate, core:version (required)
    assert g["core:datatype"] == "ci16_le" and g["core:sample_rate"] == 1e6 and isinstance(g["core:version"], str)
    assert g["core:description"] == "demo" and g["core:num_channels"] == 1 and g["downlink:profile"] == "tamarisk"
    assert len(g["core:sha512"]) == 128  # SigMF specification: core:sha512 of the dataset file
    # SigMF specification, captures object: core:sample_start, core:datetime, core:frequency
    assert meta["captures"] == [{"core:sample_start": 0, "core:datetime": T0, "core:frequency": 2.25e9}]
    # SigMF specification, annotations object: core:sample_start, core:sample_count, core:label, core:comment
    assert meta["annotations"] == [{"core:sample_start": 10, "core:sample_count": 5, "core:label": "burst",
                                    "core:comment": "test"}]
    import hashlib

    assert g["core:sha512"] == hashlib.sha512((tmp_path / "pass.sigmf-data").read_bytes()).hexdigest()
    rec = open_recording(tmp_path / "pass.sigmf-data")
    assert rec.container == "sigmf" and rec.frequency_hz == 2.25e9 and rec.start_ns == parse_iso8601_ns(T0)
    assert rec.annotations[0]["core:label"] == "burst" and rec.num_samples == 100


@pytest.mark.kat
def test_writer_ci16_saturates_and_scales(tmp_path):
    x = np.array([0.5 + 0.25j, 1.0 - 1.0j, 2.0 + 0j, np.nan + 0j], dtype=np.complex64)
    with SigmfWriter(tmp_path / "s", sample_rate_hz=1.0, datatype="ci16_le", datetime_ns=0) as w:
        w.write(x)
    raw = np.fromfile(tmp_path / "s.sigmf-data", dtype="<i2")
    np.testing.assert_array_equal(raw, [16384, 8192, 32767, -32768, 32767, 0, 0, 0])
    assert w.clipped == 2 and w.nonfinite == 1
    with SigmfWriter(tmp_path / "t", sample_rate_hz=1.0, datatype="ci16_le", datetime_ns=0, scale=0.25) as w:
        w.write(x[:3])
    raw = np.fromfile(tmp_path / "t.sigmf-data", dtype="<i2")
    np.testing.assert_array_equal(raw, [4096, 2048, 8192, -8192, 16384, 0])
    assert w.clipped == 0
    with pytest.raises(OutputError, match="exists"):
        SigmfWriter(tmp_path / "t", sample_rate_hz=1.0, datetime_ns=0)
    with pytest.raises(ValueError, match=r"Argument 'sample_rate_hz' must be 1 \.\. 1e\+12 Hz"):
        SigmfWriter(tmp_path / "u", sample_rate_hz=0.0, datetime_ns=0)


def test_writer_chunking_invariance(tmp_path, rng):
    x = _iq(rng, 10_007, amp=0.6)  # some components beyond full scale: saturation counted the same way
    x[rng.choice(x.size, 9, replace=False)] = np.nan
    for name in ("ci16_le", "cu8", "cf32_be"):
        whole, parts = tmp_path / f"w-{name}", tmp_path / f"p-{name}"
        with SigmfWriter(whole, sample_rate_hz=1e6, datatype=name, datetime_ns=0, scale=2.0) as w1:
            w1.write(x)
        cuts = np.sort(rng.choice(np.arange(1, x.size), 11, replace=False))
        with SigmfWriter(parts, sample_rate_hz=1e6, datatype=name, datetime_ns=0, scale=2.0) as w2:
            for piece in np.split(x, cuts):
                w2.write(piece)
        assert (tmp_path / f"w-{name}.sigmf-data").read_bytes() == (tmp_path / f"p-{name}.sigmf-data").read_bytes()
        assert (w1.clipped, w1.nonfinite, w1.num_samples) == (w2.clipped, w2.nonfinite, w2.num_samples)
        assert w1.metadata()["global"]["core:sha512"] == w2.metadata()["global"]["core:sha512"]
        if name != "cf32_be":
            assert w1.clipped > 0 and w1.nonfinite == 9


def test_writer_roundtrip_all_datatypes(tmp_path, rng):
    x = _iq(rng, 999, amp=0.2)
    for name in sorted(SAMPLE_FORMATS):
        with SigmfWriter(tmp_path / name, sample_rate_hz=2e6, datatype=name, datetime_ns=START_NS) as w:
            for a in range(0, 999, 400):
                w.write(x[a:a + 400])
        rec = open_recording(tmp_path / f"{name}.sigmf-meta")
        assert rec.datatype == name and rec.num_samples == 999 and rec.start_ns == START_NS
        step = 0.0 if name.startswith("cf32") else 0.5 / round(1 / sample_format(name).scale) + 1e-7
        err = rec.read().samples - x
        assert np.max(np.abs(err.real)) <= step and np.max(np.abs(err.imag)) <= step


def test_several_capture_segments(tmp_path, rng):
    base = tmp_path / "multi"
    _iq(rng, 3000).tofile(str(base) + ".sigmf-data")
    caps = [
        {"core:sample_start": 0, "core:datetime": "2026-03-14T09:30:00Z", "core:frequency": 2.2e9},
        {"core:sample_start": 1000, "core:datetime": "2026-03-14T09:31:00.000000250Z"},  # a gap in time
        {"core:sample_start": 2000},  # no time: continues at the nominal rate
    ]
    _write_meta(str(base) + ".sigmf-meta", _meta(rate=1000.0, captures=caps))
    rec = open_recording(base)
    t0 = parse_iso8601_ns("2026-03-14T09:30:00Z")
    t1 = parse_iso8601_ns("2026-03-14T09:31:00.000000250Z")
    assert rec.start_ns == t0 and len(rec.captures) == 3
    assert rec.utc_ns(999.5) == t0 + 999_500_000
    assert rec.utc_ns(1000) == t1
    assert rec.utc_ns(1000.25) == t1 + 250_000
    assert rec.utc_ns(2500) == t1 + 1_500_000_000
    assert not rec.captures[2].time_given and rec.captures[1].frequency_hz is None
    # Integer nanoseconds hold where float seconds since 1970 cannot (~238 ns resolution in 2026).
    rec2 = open_recording(base, sample_rate_hz=3.0, start="2026-03-14T09:30:00.000000001Z")
    assert rec2.utc_ns(1) == t0 + 1 + 333_333_333
    assert rec2.utc_ns(2) == t0 + 1 + 666_666_667


def test_start_and_time_given_for_raw(tmp_path, rng):
    p = tmp_path / "x.ci8"
    _quantise(_iq(rng, 100), "ci8").tofile(p)
    rec = open_recording(p, datatype="ci8", sample_rate_hz=1e6)
    assert not rec.time_known and rec.start_ns == 0
    rec = open_recording(p, datatype="ci8", sample_rate_hz=1e6, start=T0, frequency_hz=8.45e9)
    assert rec.time_known and rec.utc_ns(10) == parse_iso8601_ns(T0) + 10_000
    assert rec.frequency_hz == 8.45e9 and abs(rec.duration_s - 1e-4) < 1e-15
    assert rec.metadata["global"]["core:datatype"] == "ci8"


def test_header_bytes_and_dataset_field(tmp_path, rng):
    x = _iq(rng, 50)
    (tmp_path / "cap.bin").write_bytes(b"H" * 24 + x.tobytes())
    meta = _meta(captures=[{"core:sample_start": 0, "core:header_bytes": 24}], **{"core:dataset": "cap.bin"})
    _write_meta(tmp_path / "cap.sigmf-meta", meta)
    rec = open_recording(tmp_path / "cap.sigmf-meta")
    np.testing.assert_array_equal(rec.read().samples, x)
    assert rec.path.name == "cap.bin" and not rec.time_known


# ---- WAV ---------------------------------------------------------------------------------------


def test_wav_int16_from_stdlib_wave(tmp_path, rng):
    x = _iq(rng, 1234)
    comps = _quantise(x, "ci16_le")
    p = tmp_path / "iq.wav"
    with wave.open(str(p), "wb") as w:  # Python's wave module (stdlib) writes the reference file
        w.setnchannels(2)
        w.setsampwidth(2)
        w.setframerate(192_000)
        w.writeframes(comps.tobytes())
    rec = open_recording(p, start=T0)
    assert rec.container == "wav" and rec.datatype == "ci16_le" and rec.sample_rate_hz == 192_000
    np.testing.assert_array_equal(rec.read().samples, comps.astype(np.float32).view(np.complex64) / 32768)
    assert open_recording(p, sample_rate_hz=96_000.0).sample_rate_hz == 96_000.0


def test_wav_float32_from_scipy(tmp_path, rng):
    from scipy.io import wavfile

    x = _iq(rng, 777)
    x[3] = np.inf
    p = tmp_path / "iqf.wav"
    wavfile.write(p, 48_000, np.stack([x.real, x.imag], axis=1).astype(np.float32))  # scipy (PyPI)
    rec = open_recording(p)
    chunk = rec.read()
    assert rec.datatype == "cf32_le" and rec.sample_rate_hz == 48_000 and chunk.nonfinite == 1
    expect = x.copy()
    expect[3] = 0
    np.testing.assert_array_equal(chunk.samples, expect)


def test_wav_bad_files(tmp_path):
    p = tmp_path / "mono.wav"
    with wave.open(str(p), "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(8000)
        w.writeframes(b"\0\0" * 10)
    with pytest.raises(RecordingError, match="1 channel"):
        open_recording(p)
    q = tmp_path / "cut.wav"
    with wave.open(str(q), "wb") as w:
        w.setnchannels(2)
        w.setsampwidth(2)
        w.setframerate(8000)
        w.writeframes(b"\0\1" * 400)
    q.write_bytes(q.read_bytes()[:-10])
    with pytest.raises(RecordingError, match="truncated"):
        open_recording(q)
    r = tmp_path / "junk.wav"
    r.write_bytes(b"RIFX" + struct.pack("<I", 4) + b"WAVE")
    with pytest.raises(RecordingError, match="not a RIFF WAVE"):
        open_recording(r)


# ---- bad input ---------------------------------------------------------------------------------


def _one_line(exc_info, path):
    msg = str(exc_info.value)
    assert "\n" not in msg and str(path.name) in msg
    return msg


def test_bad_input_messages(tmp_path, rng):
    x = _iq(rng, 16)
    with pytest.raises(RecordingError) as e:
        open_recording(tmp_path / "nothing.sigmf-meta")
    _one_line(e, tmp_path / "nothing.sigmf-meta")
    with pytest.raises(RecordingError, match="not found") as e:
        open_recording(tmp_path / "nothing.cf32", datatype="cf32", sample_rate_hz=1.0)
    raw = tmp_path / "t.cf32"
    raw.write_bytes(x.tobytes()[:-3])
    with pytest.raises(RecordingError, match="truncated") as e:
        open_recording(raw, datatype="cf32", sample_rate_hz=1.0)
    _one_line(e, raw)
    raw.write_bytes(x.tobytes())
    for rate in (0.0, -5.0, 0.5, 1e13, float("nan"), "fast"):
        with pytest.raises(RecordingError, match="sample rate .*--sample-rate") as e:
            open_recording(raw, format="cf32", sample_rate_hz=rate)
        _one_line(e, raw)
    for kw in ({}, {"format": "cf32"}, {"sample_rate_hz": 1e6}):
        with pytest.raises(RecordingError, match=r"a raw recording needs --format cf32\|ci16\|ci8\|cu8 and "
                                                 r"--sample-rate"):
            open_recording(raw, **kw)
    with pytest.raises(RecordingError, match=r"--format must be cf32\|ci16\|ci8\|cu8, not 'cf31'"):
        open_recording(raw, format="cf31", sample_rate_hz=1.0)
    with pytest.raises(ValueError, match="former name"):
        open_recording(raw, format="cf32", datatype="ci16", sample_rate_hz=1.0)
    assert open_recording(raw, datatype="cf32", sample_rate_hz=1.0).num_samples == 16  # the former keyword
    with pytest.raises(RecordingError, match="ISO-8601"):
        open_recording(raw, datatype="cf32", sample_rate_hz=1.0, start="yesterday")
    empty = tmp_path / "e.cu8"
    empty.write_bytes(b"")
    with pytest.raises(RecordingError, match="no samples"):
        open_recording(empty, datatype="cu8", sample_rate_hz=1.0)

    base = tmp_path / "m"
    (tmp_path / "m.sigmf-data").write_bytes(x.tobytes())
    schema = "breaks the SigMF schema at "
    cases = [
        ("{not json", "not valid JSON"),
        (json.dumps(_meta(datatype="cf99_le")), schema + "global.core:datatype: 'cf99_le' does not match"),
        (json.dumps(_meta(datatype="cf64_le")), "core:datatype 'cf64_le' cannot be read"),
        (json.dumps(_meta(datatype="rf32_le")), "real-valued"),
        (json.dumps(_meta(datatype="cf32")), "names no byte order"),
        (json.dumps(_meta(rate=0)), schema + "global.core:sample_rate: 0 is less than or equal to the minimum"),
        (json.dumps(_meta(rate=-1e6)), schema + "global.core:sample_rate"),
        (json.dumps(_meta(rate=10**400)), schema + "global.core:sample_rate"),
        (json.dumps(_meta(rate=0.5)), r"sample rate must be 1 \.\. 1e\+12 Hz, not 0.5 \(core:sample_rate\)"),
        ('{"global": {"core:datatype": "cf32_le", "core:sample_rate": 1e999}}', "not valid JSON"),
        ('{"global": {"core:datatype": "cf32_le", "core:sample_rate": NaN}}', "not valid JSON"),
        (json.dumps({"global": {"core:datatype": "cf32_le", "core:version": "1.2.6"}, "captures": [],
                     "annotations": []}), "has no core:sample_rate; give it with --sample-rate"),
        (json.dumps({"captures": []}), schema + "top level: 'global' is a required property"),
        (json.dumps([1, 2]), schema + "top level: .* is not of type 'object'"),
        (json.dumps(_meta(captures=[{"core:sample_start": 0, "core:datetime": "noon"}])), "core:datetime"),
        (json.dumps(_meta(captures=[{"core:sample_start": 5}, {"core:sample_start": 2}])),
         r"at captures\[1\]: core:sample_start 2 comes before 5"),
        (json.dumps(_meta(captures=[{"core:sample_start": 5}, {"core:sample_start": 5}])), "not after"),
        (json.dumps(_meta(captures=[{"core:sample_start": 99}])), r"holds 16 samples \(128 bytes\) but m.sigmf-meta "
                                                                  r"describes at least 100 .*capture 0 starts at"),
        (json.dumps(_meta(**{"core:num_channels": 2})), "single-channel"),
        (json.dumps(_meta(captures=[{"core:sample_start": 0, "core:frequency": 0.0}])),
         "capture 0 core:frequency must be a centre frequency above 0"),
        (json.dumps(_meta(captures=[{"core:sample_start": 0, "core:frequency": -2.2e9}])), "above 0"),
    ]
    for text, words in cases:
        (tmp_path / "m.sigmf-meta").write_text(text)
        with pytest.raises(RecordingError, match=words) as e:
            open_recording(base)
        _one_line(e, tmp_path / "m.sigmf-meta")
    _write_meta(tmp_path / "lone.sigmf-meta", _meta())
    with pytest.raises(RecordingError, match="dataset file missing") as e:
        open_recording(tmp_path / "lone.sigmf-meta")
    _one_line(e, tmp_path / "lone.sigmf-data")
    (tmp_path / "m.sigmf-meta").write_text(json.dumps(_meta()))
    (tmp_path / "m.sigmf-data").write_bytes(x.tobytes()[:-4])
    with pytest.raises(RecordingError, match="truncated"):
        open_recording(base)
    with pytest.raises(RecordingError, match="leave out --format"):
        open_recording(tmp_path / "m.sigmf-meta", format="cf32")


# ---- fuzzing the metadata parser ---------------------------------------------------------------

_json = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats(allow_nan=False) | st.text(max_size=30),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=12), inner, max_size=4),
    max_leaves=20,
)
_keys = st.sampled_from(["core:datatype", "core:sample_rate", "core:version", "core:num_channels",
                         "core:dataset", "core:sample_start", "core:datetime", "core:frequency",
                         "core:header_bytes", "core:sample_count", "global", "captures", "annotations",
                         "core:sha512", "core:trailing_bytes", "core:offset", "core:metadata_only",
                         "core:extensions", "downlink:sample_count"])
_values = st.one_of(_json, st.sampled_from(["cf32_le", "ci16_be", "cu8", "ri16_le", "cf32", "2026-03-14T09:30:00Z",
                                            "2026-13-01T00:00:00Z", "x.sigmf-data", "..", "/etc/passwd",
                                            "ab" * 64, 1e15, 0.0, -2.2e9, 64, 63, 8]),
                    st.integers(-3, 300), st.floats(-1e7, 1e7), st.integers(-(10**400), 10**400))


@st.composite
def _mutated_meta(draw):
    meta = _meta(captures=[{"core:sample_start": 0, "core:datetime": T0, "core:frequency": 1e9},
                           {"core:sample_start": 10}])
    meta["annotations"] = [{"core:sample_start": 1, "core:sample_count": 3}]
    # Handles taken before mutation: a replaced "global" leaves the old dict harmlessly detached.
    objs = {"top": meta, "global": meta["global"], "cap0": meta["captures"][0], "cap1": meta["captures"][1],
            "ann": meta["annotations"][0]}
    for _ in range(draw(st.integers(1, 4))):
        obj = objs[draw(st.sampled_from(sorted(objs)))]
        if not isinstance(obj, dict):
            continue
        if draw(st.booleans()):
            obj[draw(_keys)] = draw(_values)
        elif obj:
            obj.pop(draw(st.sampled_from(sorted(obj))), None)
    return meta


def _check_fuzz(tmp_path, meta_obj, text=None):
    (tmp_path / "f.sigmf-meta").write_text(text if text is not None else json.dumps(meta_obj))
    try:
        rec = open_recording(tmp_path / "f.sigmf-meta")
    except RecordingError as exc:
        assert "\n" not in str(exc) and ("f.sigmf" in str(exc) or "x.sigmf-data" in str(exc))
        return
    assert rec.num_samples > 0 and rec.sample_rate_hz > 0
    assert isinstance(rec.start_ns, int) and isinstance(rec.utc_ns(rec.num_samples - 1), int)
    assert len(rec.read(0, 4)) == 4


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(meta=_mutated_meta())
def test_fuzz_mutated_metadata(tmp_path, meta):
    (tmp_path / "f.sigmf-data").write_bytes(np.zeros(64, np.complex64).tobytes())
    _check_fuzz(tmp_path, meta)


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(meta=_json, junk=st.text(max_size=40))
def test_fuzz_random_json(tmp_path, meta, junk):
    (tmp_path / "f.sigmf-data").write_bytes(np.zeros(64, np.complex64).tobytes())
    _check_fuzz(tmp_path, meta)
    _check_fuzz(tmp_path, None, text=junk)
    _check_fuzz(tmp_path, None, text="[" * 100_000)  # nesting deeper than the JSON parser's recursion


@settings(max_examples=60, deadline=None)
@given(meta=_mutated_meta())
def test_schema_verdict_is_the_sigmf_librarys(meta):
    """Our validation (a validator built once) accepts exactly what sigmf.validate.validate accepts."""
    import warnings

    from jsonschema.exceptions import ValidationError
    from sigmf import schema
    from sigmf import validate as sigmf_validate

    from pipeline.recording._sigmf import validate_metadata

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DeprecationWarning)
            sigmf_validate.validate(meta, schema.get_schema())  # sigmf (PyPI)
        theirs = None
    except ValidationError as exc:
        theirs = exc
    try:
        validate_metadata(meta, "f.sigmf-meta")
        ours = None
    except RecordingError as exc:
        ours = exc
    assert (theirs is None) == (ours is None), (theirs, ours)
    if theirs is not None and theirs.message in str(ours):
        assert "\n" not in str(ours)


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(prefix=st.sampled_from([b"", b'{"global": ', b'{"global": {"core:datatype": "cf32_le"}, "captures": [']),
       junk=st.binary(max_size=60))
def test_fuzz_metadata_bytes(tmp_path, prefix, junk):
    """Any octets as metadata (not UTF-8, cut short, control characters): a Recording or one RecordingError."""
    (tmp_path / "f.sigmf-data").write_bytes(np.zeros(64, np.complex64).tobytes())
    (tmp_path / "f.sigmf-meta").write_bytes(prefix + junk)
    try:
        open_recording(tmp_path / "f.sigmf-meta")
    except RecordingError as exc:
        assert "\n" not in str(exc) and "f.sigmf-meta" in str(exc)


# ---- symbol files ------------------------------------------------------------------------------


@pytest.mark.kat
def test_symbols_bits_msb_first(tmp_path):
    p = tmp_path / "b.bin"
    p.write_bytes(bytes([0b10110000, 0xFF]))
    f = open_symbols(p, "bits")
    assert f.num_symbols == 16
    soft = next(f.chunks(100)).soft
    # MSB first, bit 0 -> +1.0, bit 1 -> -1.0 (DEVELOPERS.md contract)
    np.testing.assert_array_equal(soft, [-1, 1, -1, -1, 1, 1, 1, 1] + [-1] * 8)
    assert soft.dtype == np.float32


@pytest.mark.kat
def test_symbols_soft_values_kept(tmp_path):
    p = tmp_path / "s.i8"
    vals = np.array([127, -128, 0, 5, -7], dtype=np.int8)
    vals.tofile(p)
    f = open_symbols(p, "soft")
    np.testing.assert_array_equal(next(f.chunks(10)).soft, vals.astype(np.float32))


def test_symbols_chunking_invariance(tmp_path, rng):
    data = rng.integers(0, 256, 1001, dtype=np.uint8)
    p = tmp_path / "r.bin"
    data.tofile(p)
    ref_bits = 1.0 - 2.0 * np.unpackbits(data).astype(np.float32)  # numpy.unpackbits, MSB first
    ref_soft = data.view(np.int8).astype(np.float32)
    for kind, ref in (("bits", ref_bits), ("soft", ref_soft)):
        f = open_symbols(p, kind)
        assert f.num_symbols == ref.size
        for _ in range(6):
            size = int(rng.integers(1, 3000))
            start = int(rng.integers(0, 20))
            stop = int(rng.integers(start, f.num_symbols + 1))
            parts = list(f.chunks(size, start=start, stop=stop))
            assert [c.start for c in parts] == list(range(start, stop, size))
            joined = np.concatenate([c.soft for c in parts]) if parts else np.empty(0, np.float32)
            np.testing.assert_array_equal(joined, ref[start:stop])


def test_symbols_bad_input(tmp_path):
    with pytest.raises(RecordingError, match="not found"):
        open_symbols(tmp_path / "none.bin", "soft")
    (tmp_path / "z.bin").write_bytes(b"")
    with pytest.raises(RecordingError, match="no symbols"):
        open_symbols(tmp_path / "z.bin", "bits")
    with pytest.raises(ValueError, match="Argument 'kind' must be 'soft' or 'bits', not 'iq'"):
        open_symbols(tmp_path / "z.bin", "iq")


def test_chunks_map_only_their_own_bytes(tmp_path, monkeypatch):
    """Memory does not grow with the file: every map covers one chunk, and Python-side allocations
    stay near one chunk's worth however many chunks go by (tracemalloc counts numpy buffers)."""
    import tracemalloc

    p = tmp_path / "big.ci16"
    n, chunk = 400_000, 4096
    (np.arange(2 * n) % 20000).astype("<i2").tofile(p)
    rec = open_recording(p, datatype="ci16", sample_rate_hz=1e6)
    mapped = []
    real_memmap = np.memmap

    def spy(*args, **kw):
        m = real_memmap(*args, **kw)
        mapped.append(m.nbytes)
        return m

    monkeypatch.setattr(np, "memmap", spy)
    next(rec.chunks(chunk))  # warm-up outside the measurement (kernel compilation)
    tracemalloc.start()
    total = 0
    for c in rec.chunks(chunk):
        total += len(c)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert total == n and len(mapped) == 1 + n // chunk + 1
    assert max(mapped) == 4 * chunk  # 4 bytes per ci16 sample
    assert peak < 8 * (8 * chunk)  # a few chunks of complex64, far below the 3.2 MB of the whole file


def test_utc_ns_accepts_numpy_positions(tmp_path, rng):
    p = tmp_path / "t.cf32"
    _iq(rng, 10).tofile(p)
    rec = open_recording(p, datatype="cf32", sample_rate_hz=4.0, start="2026-01-01T00:00:00Z")
    t0 = parse_iso8601_ns("2026-01-01T00:00:00Z")
    assert rec.utc_ns(np.float32(1.5)) == rec.utc_ns(np.float64(1.5)) == rec.utc_ns(1.5) == t0 + 375_000_000
    assert rec.utc_ns(np.int64(3)) == t0 + 750_000_000
    with pytest.raises(ValueError, match="position"):
        rec.utc_ns(float("nan"))


# ---- SigMF archives ----------------------------------------------------------------------------


def _tar_archive(path, name, meta, data):
    import tarfile

    with tarfile.open(path, "w") as tar:
        for member, payload in ((f"{name}/{name}.sigmf-meta", json.dumps(meta).encode()),
                                (f"{name}/{name}.sigmf-data", data)):
            info = tarfile.TarInfo(member)
            info.size = len(payload)
            tar.addfile(info, io.BytesIO(payload))


def test_sigmf_archive_read_in_place(tmp_path, rng):
    x = _iq(rng, 300)
    comps = _quantise(x, "ci16_le")
    _tar_archive(tmp_path / "p.sigmf", "p", _meta(datatype="ci16_le", rate=2e6), comps.tobytes())
    rec = open_recording(tmp_path / "p.sigmf")
    assert rec.container == "sigmf-archive" and rec.num_samples == 300 and rec.data_offset_bytes % 512 == 0
    np.testing.assert_array_equal(rec.read().samples, comps.astype(np.float32).view(np.complex64) / 32768)
    assert rec.start_ns == parse_iso8601_ns(T0)
    # a gzip-compressed archive cannot be mapped in place
    import gzip

    (tmp_path / "z.sigmf").write_bytes(gzip.compress((tmp_path / "p.sigmf").read_bytes()))
    with pytest.raises(RecordingError, match="compressed SigMF archive"):
        open_recording(tmp_path / "z.sigmf")
    (tmp_path / "junk.sigmf").write_bytes(b"\0" * 100)
    with pytest.raises(RecordingError, match="junk.sigmf"):
        open_recording(tmp_path / "junk.sigmf")


def test_sigmf_archive_from_sigmf_library(tmp_path, rng):
    from sigmf import SigMFFile

    x = _iq(rng, 500)
    x.tofile(tmp_path / "src.sigmf-data")
    # sigmf (PyPI) writes the archive: an outside producer of the SigMF archive format
    f = SigMFFile(data_file=str(tmp_path / "src.sigmf-data"),
                  global_info={"core:datatype": "cf32_le", "core:sample_rate": 48_000.0})
    f.add_capture(0, metadata={"core:datetime": "2026-03-14T09:30:00.5Z", "core:frequency": 2.2e9})
    f.tofile(str(tmp_path / "arch"), toarchive=True)
    rec = open_recording(tmp_path / "arch.sigmf")
    np.testing.assert_array_equal(rec.read().samples, x)
    assert rec.frequency_hz == 2.2e9 and rec.start_ns == parse_iso8601_ns("2026-03-14T09:30:00.5Z")


# ---- more WAV variants -------------------------------------------------------------------------


def _riff(fmt_body: bytes, data: bytes, *, rf64: bool = False, extra: bytes = b"") -> bytes:
    chunks = b""
    if rf64:
        chunks += b"ds64" + struct.pack("<I", 28) + struct.pack("<QQQI", 0, len(data), len(data) // 4, 0)
    chunks += b"fmt " + struct.pack("<I", len(fmt_body)) + fmt_body + extra
    chunks += b"data" + struct.pack("<I", 0xFFFFFFFF if rf64 else len(data)) + data
    riff_size = 0xFFFFFFFF if rf64 else 4 + len(chunks)
    return (b"RF64" if rf64 else b"RIFF") + struct.pack("<I", riff_size) + b"WAVE" + chunks


def test_wav_extensible_rf64_and_8bit(tmp_path, rng):
    x = _iq(rng, 64, amp=0.2)
    # WAVE_FORMAT_EXTENSIBLE (0xFFFE) with the IEEE-float SubFormat GUID: Microsoft WAVEFORMATEXTENSIBLE layout
    guid_float = struct.pack("<H", 3) + bytes.fromhex("000000001000800000aa00389b71")
    ext = struct.pack("<HHIIHHHHI", 0xFFFE, 2, 50_000, 50_000 * 8, 8, 32, 22, 32, 3) + guid_float
    odd = b"LIST" + struct.pack("<I", 3) + b"abc\0"  # an odd-sized chunk before data, padded to even
    (tmp_path / "ext.wav").write_bytes(_riff(ext, x.tobytes(), extra=odd))
    rec = open_recording(tmp_path / "ext.wav")
    assert rec.datatype == "cf32_le" and rec.sample_rate_hz == 50_000
    np.testing.assert_array_equal(rec.read().samples, x)
    # RF64 (EBU Tech 3306): sizes in the ds64 chunk
    pcm16 = struct.pack("<HHIIHH", 1, 2, 8000, 8000 * 4, 4, 16)
    comps = _quantise(x, "ci16_le")
    (tmp_path / "big.wav").write_bytes(_riff(pcm16, comps.tobytes(), rf64=True))
    rec = open_recording(tmp_path / "big.wav")
    assert rec.num_samples == 64 and rec.datatype == "ci16_le"
    # 8-bit WAV PCM is unsigned (read as cu8)
    pcm8 = struct.pack("<HHIIHH", 1, 2, 8000, 8000 * 2, 2, 8)
    (tmp_path / "u8.wav").write_bytes(_riff(pcm8, _quantise(x, "cu8").tobytes()))
    rec = open_recording(tmp_path / "u8.wav")
    assert rec.datatype == "cu8" and np.max(np.abs(rec.read().samples - x)) < 1 / 128
    # a streaming writer that never filled in the sizes: the samples run to the end of the file
    blob = bytearray(_riff(pcm16, comps.tobytes()))
    blob[4:8] = bytes(4)
    blob[blob.index(b"data") + 4:blob.index(b"data") + 8] = bytes(4)
    (tmp_path / "open.wav").write_bytes(bytes(blob))
    assert open_recording(tmp_path / "open.wav").num_samples == 64


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(body=st.binary(max_size=120), keep=st.integers(0, 80))
def test_fuzz_wav_headers(tmp_path, body, keep):
    pcm16 = struct.pack("<HHIIHH", 1, 2, 8000, 8000 * 4, 4, 16)
    good = _riff(pcm16, bytes(64))
    for blob in (b"RIFF" + struct.pack("<I", len(body) + 4) + b"WAVE" + body, good[:12 + keep] + body):
        (tmp_path / "f.wav").write_bytes(blob)
        try:
            rec = open_recording(tmp_path / "f.wav")
        except RecordingError as exc:
            assert "\n" not in str(exc) and "f.wav" in str(exc)
            continue
        assert rec.num_samples > 0 and len(rec.read()) == rec.num_samples
