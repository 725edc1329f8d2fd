"""Throughput of the demodulator front end (samples/s per core) on the demo link.

Run: ``python bench/bench_demod.py [--seconds S]``.  Fixed seed; the first call (JIT compile)
is outside the timed part.  Prints one table row per configuration.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))

from demod_signals import Chunk, modulate  # noqa: E402

from pipeline.demod import Demodulator  # noqa: E402
from pipeline.demod._kernels import derotate, fir_interleaved  # noqa: E402
from pipeline.profile import LinkSection, ReceiverSection  # noqa: E402


def _run(demod: Demodulator, x: np.ndarray, chunk: int) -> int:
    n = 0
    for a in range(0, x.size, chunk):
        n += len(demod.process(Chunk(x[a:a + chunk], a)))
    return n + len(demod.flush())


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--seconds", type=float, default=2.0, help="signal length at 1 Msample/s")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    rng = np.random.default_rng(7)
    fs = 1e6
    nsym = int(args.seconds * 240e3)
    print(f"{'configuration':<34} {'Msample/s':>10} {'ksym/s':>10}")
    for mod in ("bpsk", "qpsk", "oqpsk"):
        w = modulate(nsym, modulation=mod, esn0_db=3.0, carrier_offset_hz=2300.0, clock_offset_ppm=20.0, rng=rng)
        x = w.samples
        link = LinkSection(modulation=mod)
        _run(Demodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=fs), x[:200_000], 1 << 18)
        best = math.inf
        for _ in range(args.repeat):
            d = Demodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=fs)
            t0 = time.perf_counter()
            _run(d, x, 1 << 18)
            best = min(best, time.perf_counter() - t0)
        print(f"{'demodulator ' + mod + ' 4.17 sps':<34} {x.size / best / 1e6:10.1f} {nsym / best / 1e3:10.0f}")
    # stage kernels alone
    d = Demodulator(link=LinkSection(), receiver=ReceiverSection(), sample_rate_hz=fs)
    x = w.samples[: 1 << 20]
    y = np.empty_like(x)
    derotate(x, 1.0, 0.0, 0.01, 256, y)
    t0 = time.perf_counter()
    derotate(x, 1.0, 0.0, 0.01, 256, y)
    dt = time.perf_counter() - t0
    print(f"{'kernel derotate':<34} {x.size / dt / 1e6:10.1f} {'':>10}")
    u = np.concatenate([np.zeros(d.taps.size - 1, np.complex64), x])
    out = np.empty_like(x)
    fir_interleaved(u.view(np.float32), d.taps, out.view(np.float32))
    t0 = time.perf_counter()
    fir_interleaved(u.view(np.float32), d.taps, out.view(np.float32))
    dt = time.perf_counter() - t0
    label = f"kernel matched filter ({d.taps.size} taps)"
    print(f"{label:<34} {x.size / dt / 1e6:10.1f} {'':>10}")


if __name__ == "__main__":
    main()
