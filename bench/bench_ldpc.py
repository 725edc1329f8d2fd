"""Throughput of the LDPC codec on one core: the vector decoder beside the scalar reference kernel.

Figures are information bits per second of CPU time (``time.process_time``, so time the process
waits for a core on a shared machine is not counted; cache contention still is).  The decoders get
unquantized LLRs of BPSK on AWGN at the issue-15 operating points (C2 at Eb/N0 4.0 dB, AR4JA rate 1/2
k = 1024 at 2.0 dB), fixed seeds; every kernel runs once before timing (JIT compile and cache load
outside the timed part); each figure is the best of ``repeat`` runs over the same batch.

Keys: ``ldpc_c2_mbps`` and ``ldpc_ar4ja_r12_k1024_mbps`` (the default decoder: vector kernel, 32
lanes), ``*_scalar_mbps`` (the one-codeword-at-a-time reference kernel, same arithmetic and same
decisions), ``*_lanes64_mbps``, ``*_iterations`` (mean iterations per codeword), ``*_encode_mbps``,
and ``load_average_1min`` before the run.  Run from the repository root::

    python bench/bench_ldpc.py [--codewords 1024] [--repeat 5]
"""

from __future__ import annotations

import argparse
import math
import os
import time

import numpy as np

from pipeline.fec.ldpc import LdpcDecoder, ldpc_code, ldpc_encode_bits

POINTS = (("ldpc_c2", ("c2", None, None), 4.0), ("ldpc_ar4ja_r12_k1024", ("ar4ja", "1/2", 1024), 2.0))


def _llr(code, ebn0_db: float, n_cw: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng([seed, code.n])
    info = rng.integers(0, 2, (n_cw, code.k), dtype=np.uint8)
    word = ldpc_encode_bits(code, info)
    sigma = math.sqrt(1 / (2 * 10 ** (ebn0_db / 10) * code.k / code.n))
    y = 1.0 - 2.0 * word + sigma * rng.standard_normal(word.shape)
    return info, (2.0 * y / sigma**2).astype(np.float32)


def _best(fn, repeat: int) -> float:
    best = math.inf
    for _ in range(repeat):
        t0 = time.process_time()
        fn()
        best = min(best, time.process_time() - t0)
    return max(best, 1e-9)


def measure(codewords: int = 1024, repeat: int = 5, seed: int = 15) -> dict:
    """Decoder and encoder throughput at the two operating points; returns ``{key: value}`` (Mbit/s etc.)."""
    out: dict = {"load_average_1min": os.getloadavg()[0], "codewords": codewords}
    for key, (fam, rate, k), ebn0_db in POINTS:
        code = ldpc_code(fam, rate=rate, k=k)
        info, llr = _llr(code, ebn0_db, codewords, seed)
        bits = code.k * codewords
        decoders = {"": LdpcDecoder(code=code), "_lanes64": LdpcDecoder(code=code, lanes=64),
                    "_scalar": LdpcDecoder(code=code, kernel="scalar")}
        results = {}
        for name, dec in decoders.items():
            dec.decode(llr[:80])  # warm-up: compile or load the kernels, allocate the work space
            batch = llr if name != "_scalar" else llr[: max(64, codewords // 8)]
            runs = repeat if name != "_scalar" else max(1, repeat // 2)
            t = _best(lambda d=dec, b=batch, r=results, n=name: r.__setitem__(n, d.decode(b)), runs)
            out[f"{key}{name}_mbps"] = code.k * batch.shape[0] / t / 1e6
        res = results[""]
        n_s = results["_scalar"].ok.shape[0]
        for field in ("frames", "iterations", "syndrome_weight", "corrected_bits"):  # same decisions
            assert np.array_equal(getattr(results["_scalar"], field), getattr(res, field)[:n_s]), field
        out[f"{key}_iterations"] = float(res.iterations.mean())
        out[f"{key}_fer"] = float((res.frames != np.packbits(info, axis=1)).any(axis=1).mean())
        out[f"{key}_speedup_vs_scalar"] = out[f"{key}_mbps"] / out[f"{key}_scalar_mbps"]
        ldpc_encode_bits(code, info[:4])
        out[f"{key}_encode_mbps"] = bits / _best(lambda c=code, i=info: ldpc_encode_bits(c, i), repeat) / 1e6
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--codewords", type=int, default=1024)
    ap.add_argument("--repeat", type=int, default=5)
    a = ap.parse_args()
    for key, value in measure(a.codewords, a.repeat).items():
        print(f"{key:<40} {value:>10.3f}" if isinstance(value, float) else f"{key:<40} {value:>10}")


if __name__ == "__main__":
    main()
