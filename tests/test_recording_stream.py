"""Live input: IQ samples and channel symbols from pipes and standard input.

The reference is the file reader of the same octets (``open_recording`` / ``open_symbols``, whose
conversions are checked against slow references and outside libraries in test_recording.py):
a stream must give the same chunks, however the octets arrive.
"""

from __future__ import annotations

import io
import os
import subprocess
import sys
import threading
import tracemalloc

import numpy as np
import pytest

from pipeline.errors import RecordingError
from pipeline.recording import SampleStream, open_recording, open_stream, open_symbol_stream, open_symbols

T0 = "2026-03-14T09:30:00Z"


def _pipe_reader(payload: bytes, rng, *, max_piece: int = 5000) -> io.BufferedReader:
    """A pipe whose writer thread sends ``payload`` in pieces of random sizes (split samples included)."""
    r, w = os.pipe()
    cuts = np.sort(rng.integers(0, len(payload), size=max(1, len(payload) // max_piece)))

    def feed():
        with os.fdopen(w, "wb", buffering=0) as fh:
            prev = 0
            for c in list(cuts) + [len(payload)]:
                fh.write(payload[prev:c])
                prev = c

    threading.Thread(target=feed, daemon=True).start()
    return os.fdopen(r, "rb")


def _same_chunks(a, b):
    a, b = list(a), list(b)
    assert [(c.start, len(c), c.nonfinite) for c in a] == [(c.start, len(c), c.nonfinite) for c in b]
    for x, y in zip(a, b):
        np.testing.assert_array_equal(x.samples, y.samples)


@pytest.mark.parametrize("fmt", ["cf32", "ci16", "ci8", "cu8"])
def test_stream_gives_the_chunks_of_the_file(tmp_path, rng, fmt):
    n = 20_011
    comps = {"cf32": lambda: rng.standard_normal(2 * n).astype("<f4"),
             "ci16": lambda: rng.integers(-32768, 32768, 2 * n).astype("<i2"),
             "ci8": lambda: rng.integers(-128, 128, 2 * n).astype("i1"),
             "cu8": lambda: rng.integers(0, 256, 2 * n).astype("u1")}[fmt]()
    if fmt == "cf32":
        comps[[5, 6, 999]] = [np.nan, np.inf, -np.inf]  # erasures, counted per chunk
    payload = comps.tobytes()
    (tmp_path / "x.raw").write_bytes(payload)
    rec = open_recording(tmp_path / "x.raw", format=fmt, sample_rate_hz=1e6, start=T0)
    for chunk in (5, 777, 4096, 1 << 16):
        stream = open_stream(_pipe_reader(payload, rng), format=fmt, sample_rate_hz=1e6, start=T0)
        assert stream.num_samples is None and stream.duration_s is None
        _same_chunks(stream.chunks(chunk), rec.chunks(chunk))
        assert stream.num_samples == n == stream.samples_read and stream.trailing_bytes == 0
        assert stream.utc_ns(12345.5) == rec.utc_ns(12345.5) and stream.time_known
    # chunks as they arrive: any sizes, the same samples in the same places
    stream = open_stream(_pipe_reader(payload, rng, max_piece=700), format=fmt, sample_rate_hz=1e6)
    parts = list(stream.chunks(4096, fill=False))
    assert [c.start for c in parts] == list(np.cumsum([0] + [len(c) for c in parts[:-1]]))
    assert all(1 <= len(c) <= 4096 for c in parts)
    np.testing.assert_array_equal(np.concatenate([c.samples for c in parts]), rec.read().samples)


def test_stream_from_a_subprocess_and_from_standard_input(tmp_path, rng):
    x = (0.3 * (rng.standard_normal(30_000) + 1j * rng.standard_normal(30_000))).astype("<c8")
    (tmp_path / "x.cf32").write_bytes(x.tobytes())
    writer = [sys.executable, "-c", "import sys; sys.stdout.buffer.write(open(sys.argv[1], 'rb').read())",
              str(tmp_path / "x.cf32")]
    with subprocess.Popen(writer, stdout=subprocess.PIPE) as proc:
        stream = open_stream(proc.stdout, format="cf32", sample_rate_hz=2e6)
        got = np.concatenate([c.samples for c in stream.chunks(8192)])
    np.testing.assert_array_equal(got, x)
    # "-": this test's own child reads its standard input, fed from the file
    reader = ("import sys, hashlib; from pipeline.recording import open_stream\n"
              "s = open_stream('-', format='cf32', sample_rate_hz=2e6)\n"
              "h = hashlib.sha256()\n"
              "for c in s.chunks(5000): h.update(c.samples.tobytes())\n"
              "print(s.num_samples, h.hexdigest())\n")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in sys.path if p))
    with open(tmp_path / "x.cf32", "rb") as fin:
        out = subprocess.run([sys.executable, "-c", reader], stdin=fin, capture_output=True, text=True, env=env,
                             check=True).stdout.split()
    import hashlib

    assert out == [str(x.size), hashlib.sha256(x.tobytes()).hexdigest()]


def test_stream_memory_is_one_chunk_on_a_long_stream():
    class Endless(io.RawIOBase):  # 64 MB of zeros, made as they are asked for
        left = 64 << 20

        def readable(self):
            return True

        def readinto(self, b):
            n = min(len(b), self.left)
            b[:n] = bytes(n)
            self.left -= n
            return n

    chunk = 1 << 14
    stream = open_stream(Endless(), format="ci16", sample_rate_hz=1e6)
    it = stream.chunks(chunk)
    next(it)  # kernel compilation outside the measurement
    tracemalloc.start()
    total = chunk
    for c in it:
        total += len(c)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert total == (64 << 20) // 4 == stream.num_samples
    assert peak < 6 * 8 * chunk  # a few chunks of complex64, against 128 MB for the stream held whole


def test_stream_ends_inside_a_sample_and_other_rules(tmp_path, monkeypatch):
    s = open_stream(io.BytesIO(bytes(8 * 5 + 3)), format="cf32", sample_rate_hz=1e6)
    assert sum(len(c) for c in s.chunks(2)) == 5 and s.trailing_bytes == 3 and s.num_samples == 5
    with pytest.raises(ValueError, match="read once"):
        s.chunks(2)
    with pytest.raises(ValueError, match="live stream"):
        s.read(0, 1)
    with pytest.raises(ValueError, match="Argument 'start' must be 0"):
        open_stream(io.BytesIO(bytes(8)), format="cf32", sample_rate_hz=1e6).chunks(2, start=1)
    assert isinstance(s, SampleStream) and s.checksum() is None and s.container == "stream"
    for kw, words in (({"sample_rate_hz": 1e6}, "need --format cf32|ci16|ci8|cu8 and --sample-rate"),
                      ({"format": "cf32"}, "need --format cf32|ci16|ci8|cu8 and --sample-rate"),
                      ({"format": "cf64", "sample_rate_hz": 1e6}, "--format must be cf32|ci16|ci8|cu8, not 'cf64'"),
                      ({"format": "cu8", "sample_rate_hz": 1e15}, "sample rate must be 1 .. 1e+12 Hz"),
                      ({"format": "cu8", "sample_rate_hz": 1e6, "start": "noon"}, "start time")):
        with pytest.raises(RecordingError) as e:
            open_stream(io.BytesIO(b""), **kw)
        assert words in str(e.value) and "\n" not in str(e.value)

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    monkeypatch.setattr(sys, "stdin", Terminal())
    with pytest.raises(RecordingError, match="standard input is a terminal"):
        open_stream("-", format="cf32", sample_rate_hz=1e6)
    with pytest.raises(RecordingError, match="standard input is a live stream"):
        open_recording("-", format="cf32", sample_rate_hz=1e6)
    fifo = tmp_path / "digitizer"
    os.mkfifo(fifo)
    with pytest.raises(RecordingError, match="a pipe or device, not a file"):
        open_recording(fifo, format="cf32", sample_rate_hz=1e6)


@pytest.mark.parametrize("kind", ["soft", "bits"])
def test_symbol_stream_gives_the_chunks_of_the_file(tmp_path, rng, kind):
    payload = rng.integers(0, 256, 1001, dtype=np.uint8).tobytes()
    (tmp_path / f"c.{kind}").write_bytes(payload)
    ref = open_symbols(tmp_path / f"c.{kind}", kind)
    for chunk in (3, 13, 4096, 100_000):
        s = open_symbol_stream(_pipe_reader(payload, rng, max_piece=300), kind)
        got = list(s.chunks(chunk))
        want = list(ref.chunks(chunk))
        assert [(c.start, len(c)) for c in got] == [(c.start, len(c)) for c in want]
        for a, b in zip(got, want):
            np.testing.assert_array_equal(a.soft, b.soft)
        assert s.num_symbols == ref.num_symbols
    s = open_symbol_stream(_pipe_reader(payload, rng, max_piece=300), kind)
    parts = list(s.chunks(1000, fill=False))
    np.testing.assert_array_equal(np.concatenate([c.soft for c in parts]), np.concatenate([c.soft for c in want]))
    assert [c.start for c in parts] == list(np.cumsum([0] + [len(c) for c in parts[:-1]]))
    with pytest.raises(ValueError, match="'soft' or 'bits'"):
        open_symbol_stream(io.BytesIO(b""), "iq")
