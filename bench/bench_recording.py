"""Read throughput of pipeline.recording per datatype, on a generated file; checksum, stream and import costs.

Run: ``python bench/bench_recording.py [--msamples 16] [--chunk 262144]``.  Prints one row per
datatype: Msample/s through ``Recording.chunks`` (conversion to complex64 included) and the peak
resident memory of the process, to show that it does not grow with the file.  The file is read
once untimed first (warm-up: numba compilation and the page cache), then timed.  Then: reading
with the ``core:sha512`` check against without it (wall and process CPU time), a live stream
through a pipe, and what the ``sigmf`` library adds to the start of a decode (fresh interpreters).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from pipeline.recording import SAMPLE_FORMATS, SigmfWriter, open_recording, open_stream, open_symbols

# Run in a fresh interpreter: the costs of the first SigMF open (which imports sigmf and jsonschema),
# against a raw file of the same samples, after the decode chain's own imports.
_START = """
import time, sys
t0 = time.perf_counter()
import pipeline.chain  # what a decode imports before it opens the recording
t1 = time.perf_counter()
from pipeline.recording import open_recording
rec = open_recording(sys.argv[1]) if sys.argv[2] == "sigmf" else open_recording(
    sys.argv[1], format="cf32", sample_rate_hz=1e6)
next(rec.chunks(1 << 16))
t2 = time.perf_counter()
print(t1 - t0, t2 - t1, "sigmf" in sys.modules)
"""


def _peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux reports KiB


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--msamples", type=float, default=16.0, help="samples per file, millions")
    ap.add_argument("--chunk", type=int, default=1 << 18, help="samples per chunk")
    ap.add_argument("--repeat", type=int, default=3, help="timed passes; the best is shown")
    args = ap.parse_args()
    n = int(args.msamples * 1e6)
    rng = np.random.default_rng(7)
    block = (0.2 * (rng.standard_normal(1 << 16) + 1j * rng.standard_normal(1 << 16))).astype(np.complex64)
    with tempfile.TemporaryDirectory() as tmp:
        print(f"{n / 1e6:.1f} Msample per file, chunks of {args.chunk} samples")
        print(f"{'datatype':<10} {'MB on disk':>10} {'Msample/s':>10} {'peak RSS MiB':>13}")
        for name in sorted(SAMPLE_FORMATS):
            base = Path(tmp) / name
            with SigmfWriter(base, sample_rate_hz=1e6, datatype=name, datetime_ns=1_773_480_600 * 10**9) as w:
                left = n
                while left > 0:
                    w.write(block[: min(left, block.size)])
                    left -= block.size
            rec = open_recording(str(base) + ".sigmf-meta")
            for _c in rec.chunks(args.chunk, verify=False):  # warm-up
                pass
            best = float("inf")
            for _ in range(args.repeat):
                t0 = time.perf_counter()
                total = 0
                for c in rec.chunks(args.chunk, verify=False):  # the checksum is measured below
                    total += len(c)
                best = min(best, time.perf_counter() - t0)
            size_mb = rec.num_samples * rec.sample_format.bytes_per_sample / 1e6
            print(f"{name:<10} {size_mb:>10.1f} {total / best / 1e6:>10.1f} {_peak_rss_mib():>13.1f}")
            base.with_name(name + ".sigmf-data").unlink()
        # --input soft|bits readers
        for kind, nbytes in (("soft", n), ("bits", n // 8)):
            p = Path(tmp) / f"sym.{kind}"
            rng.integers(0, 256, nbytes, dtype=np.uint8).tofile(p)
            f = open_symbols(p, kind)
            for _c in f.chunks(args.chunk):
                pass
            t0 = time.perf_counter()
            for _c in f.chunks(args.chunk):
                pass
            dt = time.perf_counter() - t0
            print(f"{'sym ' + kind:<10} {nbytes / 1e6:>10.1f} {f.num_symbols / dt / 1e6:>10.1f} "
                  f"{_peak_rss_mib():>13.1f}")
        _checksum_and_stream(Path(tmp), n, block, args)
        _start_cost(Path(tmp), args.repeat)


def _checksum_and_stream(tmp: Path, n: int, block: np.ndarray, args) -> None:
    base = tmp / "sha"
    with SigmfWriter(base, sample_rate_hz=1e6, datatype="cf32", datetime_ns=0) as w:
        left = n
        while left > 0:
            w.write(block[: min(left, block.size)])
            left -= block.size
    rec = open_recording(str(base) + ".sigmf-meta")
    print(f"\ncf32 {rec.num_samples / 1e6:.1f} Msample: Recording.chunks with and without the core:sha512 check")
    print(f"{'':<22} {'Msample/s':>10} {'CPU s':>8} {'wall s':>8}")
    for label, verify in (("checksum verified", True), ("checksum skipped", False), ("checksum verified", True),
                          ("checksum skipped", False)):
        c0, t0 = time.process_time(), time.perf_counter()
        for _c in rec.chunks(args.chunk, verify=verify):
            pass
        cpu, wall = time.process_time() - c0, time.perf_counter() - t0
        print(f"{label:<22} {rec.num_samples / wall / 1e6:>10.1f} {cpu:>8.3f} {wall:>8.3f}")
    data = base.with_name("sha.sigmf-data")
    r, w = os.pipe()

    def feed() -> None:
        with open(data, "rb") as src, os.fdopen(w, "wb") as dst:
            while buf := src.read(1 << 20):
                dst.write(buf)

    threading.Thread(target=feed, daemon=True).start()
    t0 = time.perf_counter()
    stream = open_stream(os.fdopen(r, "rb"), format="cf32", sample_rate_hz=1e6)
    for _c in stream.chunks(args.chunk):
        pass
    dt = time.perf_counter() - t0
    print(f"{'stream through a pipe':<22} {stream.num_samples / dt / 1e6:>10.1f} {'':>8} {dt:>8.3f}   "
          f"(peak RSS {_peak_rss_mib():.1f} MiB)")


def _start_cost(tmp: Path, repeat: int) -> None:
    x = np.zeros(1 << 17, dtype=np.complex64)
    with SigmfWriter(tmp / "start", sample_rate_hz=1e6, datatype="cf32", datetime_ns=0) as w:
        w.write(x)
    x.tofile(tmp / "start.cf32")
    print("\nstart of a decode in a fresh interpreter: chain imports, then open + first chunk (best of "
          f"{repeat})")
    for kind, path in (("raw", tmp / "start.cf32"), ("sigmf", tmp / "start.sigmf-meta")):
        runs = [json.loads("[" + subprocess.run([sys.executable, "-c", _START, str(path), kind], capture_output=True,
                                                text=True, check=True).stdout.strip().replace(" ", ", ")
                           .replace("True", "true").replace("False", "false") + "]") for _ in range(repeat)]
        best = min(runs, key=lambda v: v[1])
        print(f"  {kind:<6} chain imports {best[0] * 1e3:7.1f} ms, open + first chunk {best[1] * 1e3:7.1f} ms, "
              f"sigmf imported: {best[2]}")
    out = subprocess.run([sys.executable, "-X", "importtime", "-c", "import numpy, sigmf"], capture_output=True,
                         text=True, check=True).stderr.splitlines()
    cum = {ln.split("|")[2].strip(): int(ln.split("|")[1]) for ln in out if ln.startswith("import time:") and
           ln.split("|")[1].strip().isdigit()}
    print(f"  python -X importtime: sigmf {cum.get('sigmf', 0) / 1e3:.1f} ms (of which jsonschema "
          f"{cum.get('jsonschema', 0) / 1e3:.1f} ms) on top of numpy")


if __name__ == "__main__":
    main()
