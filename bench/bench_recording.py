"""Read throughput of pipeline.recording per datatype, on a generated file.

Run: ``python bench/bench_recording.py [--msamples 16] [--chunk 262144]``.  Prints one row per
datatype: Msample/s through ``Recording.chunks`` (conversion to complex64 included) and the peak
resident memory of the process, to show that it does not grow with the file.  The file is read
once untimed first (warm-up: numba compilation and the page cache), then timed.
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path

import numpy as np

from pipeline.recording import SAMPLE_FORMATS, SigmfWriter, open_recording, open_symbols


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
            for _c in rec.chunks(args.chunk):  # warm-up
                pass
            best = float("inf")
            for _ in range(args.repeat):
                t0 = time.perf_counter()
                total = 0
                for c in rec.chunks(args.chunk):
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


if __name__ == "__main__":
    main()
