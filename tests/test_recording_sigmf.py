"""SigMF through the standard's own library, data-file integrity, and bad-input probes.

Outside references: the ``sigmf`` library (PyPI) writes recordings and archives, validates ours
against the SigMF JSON schema it ships and computes SHA-512 (``sigmf.hashing``); ``hashlib``
(FIPS 180-4) for digests.
"""

from __future__ import annotations

import hashlib
import json
import warnings

import numpy as np
import pytest
import sigmf
from sigmf import hashing, sigmffile
from sigmf import validate as sigmf_validate

import pipeline
from pipeline.errors import ProfileError, RecordingError
from pipeline.recording import DatasetChecksum, SigmfWriter, format_iso8601_ns, open_recording

CAPTURES = [  # sample_start, core:datetime, core:frequency
    (0, "2026-03-14T09:30:00.000000000Z", 2.2e9),
    (2000, "2026-03-14T09:30:01.250000000Z", 2.2001e9),
    (4500, "2026-03-14T09:30:07.000000000Z", None),
]


def _iq(rng, n, amp=0.3):
    return (amp * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)


def _one_line(exc, *names):
    msg = str(exc)
    assert "\n" not in msg, msg
    for name in names:
        assert name in msg, (name, msg)
    return msg


def _library_recording(tmp_path, rng, n=6000, annotate=True):
    """A multi-capture recording written by sigmf's own writer: pair ``lib`` and archive ``lib.sigmf``."""
    x = _iq(rng, n)
    f = sigmf.fromarray(x)  # sigmf (PyPI): datatype from the array, data held in memory until tofile()
    f.set_global_field("core:sample_rate", 250e3)
    for s0, dt, freq in CAPTURES:
        md = {"core:datetime": dt}
        if freq is not None:
            md["core:frequency"] = freq
        f.add_capture(s0, metadata=md)
    if annotate:
        f.add_annotation(100, length=n - 100, metadata={"core:label": "pass"})
    f.tofile(tmp_path / "lib")
    f.tofile(tmp_path / "lib.sigmf")
    return x


def _check_captures(rec):
    assert [c.sample_start for c in rec.captures] == [c[0] for c in CAPTURES]
    assert [c.frequency_hz for c in rec.captures] == [c[2] for c in CAPTURES]
    for s0, dt, _ in CAPTURES:  # the time of each segment's first sample is the core:datetime written
        assert format_iso8601_ns(rec.utc_ns(s0)) == dt


# ---- the library as writer and as validator ------------------------------------------------------


def test_recording_written_by_sigmf_reads_back(tmp_path, rng):
    x = _library_recording(tmp_path, rng)
    for path, container in ((tmp_path / "lib.sigmf-meta", "sigmf"), (tmp_path / "lib.sigmf", "sigmf-archive")):
        rec = open_recording(path)
        assert rec.container == container and rec.datatype == "cf32_le" and rec.sample_rate_hz == 250e3
        assert not rec.checksum_verified
        got = np.concatenate([c.samples for c in rec.chunks(777)])  # checks core:sha512 on the way
        np.testing.assert_array_equal(got, x)
        assert rec.checksum_verified
        _check_captures(rec)
        # sigmf (PyPI) computed core:sha512 over the data file (pair) and the data member (archive)
        assert rec.sha512 == hashing.calculate_sha512(tmp_path / "lib.sigmf-data")
        assert rec.checksum().verify_file(block_bytes=4096) is True


def test_simulated_recording_passes_the_sigmf_validator(tmp_path, demo_profile):
    res = pipeline.simulate(demo_profile, tmp_path, seconds=0.3, seed=5, format="ci16")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # sigmf warns about undeclared extension namespaces
        theirs = sigmffile.fromfile(str(res.meta_path))  # sigmf (PyPI): recomputes and compares core:sha512
        theirs.validate()  # the SigMF 1.2.6 JSON schema shipped with sigmf (PyPI)
    sigmf_validate.main((str(res.meta_path),))  # the library's command-line validator: returns only when valid
    meta = json.loads(res.meta_path.read_text())
    assert meta["global"]["core:datatype"] == "ci16_le"  # metadata keeps the SigMF spelling
    assert meta["global"]["core:version"] == sigmf.__specification__
    assert {"name": "downlink", "version": "1.0.0", "optional": True} in meta["global"]["core:extensions"]
    assert meta["global"]["downlink:sample_count"] == res.num_samples == theirs.sample_count


def test_writer_metadata_is_the_librarys(tmp_path, rng):
    with SigmfWriter(tmp_path / "w", sample_rate_hz=2e6, datatype="cu8", datetime_ns=0, frequency_hz=8.4e9,
                     extra_global={"core:hw": "Hollow Ridge 13 m"}) as w:
        w.write(_iq(rng, 1000))
        w.annotate(10, 20, label="fade")
    f = sigmffile.fromfile(str(tmp_path / "w.sigmf-meta"))
    f.validate()
    assert f.get_global_field("core:datatype") == "cu8" and f.get_global_field("core:hw") == "Hollow Ridge 13 m"
    assert f.get_annotations() == [{"core:sample_start": 10, "core:sample_count": 20, "core:label": "fade"}]
    with pytest.raises(ValueError, match="breaks the SigMF schema at global.core:hw"):
        SigmfWriter(tmp_path / "v", sample_rate_hz=2e6, datetime_ns=0, extra_global={"core:hw": 5})
    with pytest.raises(ValueError, match="namespace without a core:extensions entry"):
        SigmfWriter(tmp_path / "v", sample_rate_hz=2e6, datetime_ns=0, extra_global={"tamarisk:pass": 1})
    assert not (tmp_path / "v.sigmf-data").exists()


def test_writer_leaves_nothing_when_interrupted(tmp_path, rng):
    with pytest.raises(KeyboardInterrupt):
        with SigmfWriter(tmp_path / "k", sample_rate_hz=2e6, datetime_ns=0) as w:
            w.write(_iq(rng, 100))
            raise KeyboardInterrupt
    assert not (tmp_path / "k.sigmf-data").exists() and not (tmp_path / "k.sigmf-meta").exists()


# ---- length promised by the metadata -------------------------------------------------------------


def test_short_data_file_names_both_sizes(tmp_path, rng):
    _library_recording(tmp_path, rng, n=6000)
    data = tmp_path / "lib.sigmf-data"
    data.write_bytes(data.read_bytes()[: -8 * 1000])  # 1000 whole cf32 samples short
    with pytest.raises(RecordingError) as e:
        open_recording(tmp_path / "lib.sigmf-meta")
    _one_line(e.value, "lib.sigmf-data", "holds 5000 samples (40000 bytes)",
              "describes at least 6000 (48000 bytes; annotation 0 ends at sample 6000)", "incomplete")
    # no annotation: the last capture still needs its first sample
    meta = json.loads((tmp_path / "lib.sigmf-meta").read_text())
    meta["annotations"] = []
    (tmp_path / "lib.sigmf-meta").write_text(json.dumps(meta))
    data.write_bytes(data.read_bytes()[: 8 * 4500])
    with pytest.raises(RecordingError, match=r"holds 4500 samples .* at least 4501 .*capture 2 starts at sample 4500"):
        open_recording(tmp_path / "lib.sigmf-meta")


def test_exact_sample_count_of_our_writer(tmp_path, rng):
    with SigmfWriter(tmp_path / "s", sample_rate_hz=1e6, datatype="ci16", datetime_ns=1_773_480_600_000_000_000) as w:
        w.write(_iq(rng, 3000))
    data = tmp_path / "s.sigmf-data"
    whole = data.read_bytes()
    data.write_bytes(whole[:-4 * 7])
    with pytest.raises(RecordingError) as e:
        open_recording(tmp_path / "s.sigmf-meta")
    _one_line(e.value, "holds 2993 samples (11972 bytes)", "downlink:sample_count = 3000 (12000 bytes)", "incomplete")
    data.write_bytes(whole + bytes(4))  # one sample too many is a mismatch as well
    with pytest.raises(RecordingError, match="holds 3001 samples"):
        open_recording(tmp_path / "s.sigmf-meta")


# ---- core:sha512 -----------------------------------------------------------------------------------


def _flip(path, at):
    b = bytearray(path.read_bytes())
    b[at] ^= 0x01
    path.write_bytes(bytes(b))


def test_sha512_mismatch_is_one_error_after_the_last_chunk(tmp_path, rng):
    x = _library_recording(tmp_path, rng)
    _flip(tmp_path / "lib.sigmf-data", 8 * 3000 + 1)  # same length, one bit of sample 3000
    rec = open_recording(tmp_path / "lib.sigmf-meta")
    seen = []
    with pytest.raises(RecordingError) as e:
        for c in rec.chunks(1000):
            seen.append(c.stop)
    assert seen == [1000, 2000, 3000, 4000, 5000, 6000]  # every chunk first, the verdict at the end
    assert not rec.checksum_verified
    _one_line(e.value, "lib.sigmf-data", "does not match core:sha512 in lib.sigmf-meta", "--no-checksum")
    # a partial read concludes nothing; skipping the check reads the same samples
    assert [len(c) for c in rec.chunks(1000, 0, 5999)][-1] == 999
    assert len(list(rec.chunks(4000, verify=False))) == 2
    skipped = open_recording(tmp_path / "lib.sigmf-meta", verify_checksum=False)
    assert skipped.checksum() is None
    got = np.concatenate([c.samples for c in skipped.chunks(1000)])
    assert np.count_nonzero(got != x) == 1
    # the same verdict from the thread a segmented decode would run
    fut = rec.checksum().verify_in_background(block_bytes=1000)
    with pytest.raises(RecordingError, match="does not match core:sha512"):
        fut.result()
    check = rec.checksum()
    check.cancel()
    assert check.verify_file() is False and check.ok is None
    # the archive: the data member is what core:sha512 covers
    arch = tmp_path / "lib.sigmf"
    raw = arch.read_bytes()
    at = raw.index(x[:4].tobytes()) + 8 * 3000 + 1
    _flip(arch, at)
    with pytest.raises(RecordingError, match="lib.sigmf: content does not match core:sha512"):
        list(open_recording(arch).chunks(4096))


def test_sha512_covers_header_and_trailer_of_a_non_conforming_dataset(tmp_path, rng):
    x = _iq(rng, 500)
    body = b"HDR!" * 4 + x.tobytes() + b"TRAILER"
    (tmp_path / "ncd.bin").write_bytes(body)
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": 1e6, "core:version": "1.2.6",
                       "core:dataset": "ncd.bin", "core:trailing_bytes": 7,
                       "core:sha512": hashing.calculate_sha512(tmp_path / "ncd.bin")},  # sigmf (PyPI)
            "captures": [{"core:sample_start": 0, "core:header_bytes": 16}], "annotations": []}
    (tmp_path / "ncd.sigmf-meta").write_text(json.dumps(meta))
    rec = open_recording(tmp_path / "ncd.sigmf-meta")
    assert rec.num_samples == 500 and rec.dataset_span == (0, len(body))
    np.testing.assert_array_equal(np.concatenate([c.samples for c in rec.chunks(128)]), x)
    for at in (3, len(body) - 2):  # one bit of the header, then of the trailer
        _flip(tmp_path / "ncd.bin", at)
        with pytest.raises(RecordingError, match="does not match core:sha512"):
            list(open_recording(tmp_path / "ncd.sigmf-meta").chunks(128))
        _flip(tmp_path / "ncd.bin", at)
    assert open_recording(tmp_path / "ncd.sigmf-meta").checksum().verify_file() is True


@pytest.mark.kat
def test_dataset_checksum_against_hashlib(tmp_path):
    data = bytes(range(256)) * 41
    (tmp_path / "d").write_bytes(b"xx" + data + b"yy")
    good = hashlib.sha512(data).hexdigest()  # FIPS 180-4 through hashlib
    check = DatasetChecksum(path=tmp_path / "d", expected=good.upper(), offset_bytes=2, size_bytes=len(data))
    for i in range(0, len(data), 1000):
        check.update(data[i:i + 1000])
    check.finish()
    assert check.ok is True
    with pytest.raises(ValueError, match="runs past the end"):
        check.update(b"z")
    short = DatasetChecksum(path=tmp_path / "d", expected=good, size_bytes=len(data))
    short.update(data[:10])
    with pytest.raises(ValueError, match="covered 10 of"):
        short.finish()
    with pytest.raises(ValueError, match="128 hexadecimal"):
        DatasetChecksum(path=tmp_path / "d", expected="abc", size_bytes=1)


# ---- bad input through the public API: one line, no output ----------------------------------------


@pytest.fixture(scope="module")
def sim_pass(tmp_path_factory, demo_profile):
    d = tmp_path_factory.mktemp("sim")
    res = pipeline.simulate(demo_profile, d, seconds=0.3, seed=11)
    return res.meta_path, res.data_path


def _probe(tmp_path, meta_bytes, data_bytes, profile, *words, error=RecordingError):
    (tmp_path / "p.sigmf-meta").write_bytes(meta_bytes)
    (tmp_path / "p.sigmf-data").write_bytes(data_bytes)
    out = tmp_path / "out"
    with pytest.raises(error) as e:
        pipeline.open_recording(tmp_path / "p.sigmf-meta")
    _one_line(e.value, "p.sigmf-meta", *words)
    with pytest.raises(error) as e:
        pipeline.decode(tmp_path / "p.sigmf-meta", profile, out)
    _one_line(e.value, "p.sigmf-meta", *words)
    assert not out.exists() and sorted(p.name for p in tmp_path.iterdir()) == ["p.sigmf-data", "p.sigmf-meta"]


def _edit(meta_path, fn):
    meta = json.loads(meta_path.read_text())
    fn(meta)
    return json.dumps(meta).encode()


@pytest.mark.parametrize("edit, words", [
    (lambda m: m["global"].update({"core:sample_rate": 1e15}),
     ["breaks the SigMF schema at global.core:sample_rate", "1000000000000"]),
    (lambda m: m["global"].update({"core:sample_rate": 0.25}), ["sample rate must be 1 .. 1e+12 Hz"]),
    (lambda m: m["captures"][0].update({"core:frequency": 0.0}), ["capture 0 core:frequency must be", "above 0"]),
    (lambda m: m["captures"][0].update({"core:frequency": -8.4e9}), ["capture 0 core:frequency must be"]),
    (lambda m: m["global"].update({"core:sample_rate": "1e6"}), ["global.core:sample_rate", "not of type 'number'"]),
    (lambda m: m.update({"captures": {"core:sample_start": 0}}), ["at captures:", "not of type 'array'"]),
    (lambda m: m["annotations"].append({"core:sample_start": 0, "core:sample_count": -1}),
     ["annotations[0].core:sample_count"]),
    (lambda m: m["global"].pop("core:datatype"), ["'core:datatype' is a required property"]),
    (lambda m: m["global"].update({"core:sha512": "00"}), ["global.core:sha512"]),
])
def test_bad_metadata_probes(tmp_path, sim_pass, demo_profile, edit, words):
    meta, data = sim_pass
    _probe(tmp_path, _edit(meta, edit), data.read_bytes()[:80_000], demo_profile, *words)


@pytest.mark.parametrize("meta_bytes, words", [
    (b"{oops", ["not valid JSON (Expecting property name"]),
    (b"[1, 2, 3]", ["top level: [1, 2, 3] is not of type 'object'"]),
    (b"\xff\xfe{}", ["not UTF-8 text (byte 0)"]),
    (b'{"global": {"core:sample_rate": NaN}}', ["not valid JSON", "NaN"]),
])
def test_unreadable_metadata_probes(tmp_path, demo_profile, meta_bytes, words):
    _probe(tmp_path, meta_bytes, bytes(800), demo_profile, *words)


def test_checksum_mismatch_stops_the_decode_without_output(tmp_path, sim_pass, demo_profile):
    meta, data = sim_pass
    raw = bytearray(data.read_bytes())
    raw[len(raw) // 2] ^= 0x10  # one bit, length unchanged
    (tmp_path / "p.sigmf-meta").write_bytes(meta.read_bytes())
    (tmp_path / "p.sigmf-data").write_bytes(bytes(raw))
    assert pipeline.open_recording(tmp_path / "p.sigmf-meta").num_samples == len(raw) // 8  # no samples read yet
    with pytest.raises(RecordingError) as e:
        pipeline.decode(tmp_path / "p.sigmf-meta", demo_profile, tmp_path / "out")
    _one_line(e.value, "p.sigmf-data", "does not match core:sha512")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["p.sigmf-data", "p.sigmf-meta"]


def test_profile_not_utf8(tmp_path, sim_pass):
    prof = tmp_path / "latin1.toml"
    prof.write_bytes('[link]\nmodulation = "bpsk"  # Hollow Ridge \xe9t\xe9\n'.encode("latin-1"))
    with pytest.raises(ProfileError) as e:
        pipeline.load_profile(prof)
    _one_line(e.value, "latin1.toml", "not UTF-8 text (byte 43, line 2)")
    with pytest.raises(ProfileError):
        pipeline.decode(sim_pass[0], prof, tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_raw_recording_errors_name_the_flags(tmp_path, demo_profile):
    raw = tmp_path / "pass.cf32"
    raw.write_bytes(bytes(8000))
    with pytest.raises(RecordingError) as e:
        pipeline.decode(raw, demo_profile, tmp_path / "out")
    _one_line(e.value, "pass.cf32", "a raw recording needs --format cf32|ci16|ci8|cu8 and --sample-rate")
    with pytest.raises(RecordingError) as e:
        pipeline.decode(raw, demo_profile, tmp_path / "out", format="cf32", sample_rate_hz=1e15)
    _one_line(e.value, "sample rate must be 1 .. 1e+12 Hz, not 1e+15 (--sample-rate)")
    assert not (tmp_path / "out").exists()
