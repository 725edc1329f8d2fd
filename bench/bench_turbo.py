"""Throughput of the CCSDS turbo decoder on one core: the vector kernel beside the scalar one.

Run: ``python bench/bench_turbo.py [--frames N] [--repeat R] [--scalar-frames M] [--ebn0 DB]``.

Transfer frames of k = 8920 bits (random octets with a valid FECF, fixed seed) are turbo encoded
at rate 1/2, sent over BPSK/AWGN at Eb/N0 = 1.0 dB (Eb per information bit, the tail counted in
the rate) and decoded from channel LLRs with at most 10 iterations and the FECF stopping check.
Each decoder is run once on the same input before timing (JIT compile and cache load stay
outside the timed part); a figure is the best CPU time of R runs.  Rates are information bits
per second: ``turbo_r12_k8920_mbps`` is the default decoder (log-MAP, 32-lane vector kernel),
``turbo_r12_k8920_maxlog_mbps`` the max-log-MAP vector kernel, ``..._scalar_mbps`` the plain
fixed-point kernel (one frame at a time) on the first ``--scalar-frames`` frames (it gives the
same decisions as the vector kernel, so those frames take the same iterations in both).  The mean
iterations and the frame errors of each run are printed beside, since the speed depends on them,
and ``turbo_vector_over_scalar_per_iteration`` compares the two kernels per iteration.
"""

from __future__ import annotations

import argparse
import math

import numpy as np
from bench_fec import best_of

from pipeline.fec import crc16
from pipeline.fec.turbo import TurboCode, TurboDecoder, turbo_encode


def frames_with_fecf(rng: np.random.Generator, n: int, k: int) -> np.ndarray:
    """``n`` random transfer frames of k/8 octets whose last two octets are their FECF (uint8, (n, k/8))."""
    frames = rng.integers(0, 256, (n, k // 8), dtype=np.uint8)
    for f in frames:
        f[-2:] = np.frombuffer(crc16(f[:-2].tobytes()).to_bytes(2, "big"), dtype=np.uint8)
    return frames


def awgn_llr(rng: np.random.Generator, bits: np.ndarray, ebn0_db: float, code_rate: float) -> np.ndarray:
    """Channel LLRs (float32, nats, + = bit 0) of ``bits`` sent as BPSK +-1 over AWGN at ``ebn0_db``.

    Es/N0 = code_rate Eb/N0; noise variance per dimension sigma^2 = 1 / (2 Es/N0); L = 2 y / sigma^2.
    """
    esn0 = code_rate * 10.0 ** (ebn0_db / 10.0)
    sigma = math.sqrt(1.0 / (2.0 * esn0))
    y = (1.0 - 2.0 * bits.astype(np.float32)) + np.float32(sigma) * rng.standard_normal(bits.shape, dtype=np.float32)
    return (np.float32(2.0 / sigma**2) * y).astype(np.float32)


def measure(*, frames: int = 128, repeat: int = 3, scalar_frames: int = 8, ebn0_db: float = 1.0,
            seed: int = 20261216) -> dict:
    """Decoder figures at rate 1/2, k = 8920 (see the module docstring); returns a dict of numbers."""
    rng = np.random.default_rng(seed)
    code = TurboCode(rate="1/2", k=8920)
    info = frames_with_fecf(rng, frames, code.k)
    llr = awgn_llr(rng, turbo_encode(info, rate=code.rate), ebn0_db, code.code_rate)
    res: dict = {"turbo_ebn0_db": ebn0_db, "turbo_frames": frames}
    runs = (
        ("turbo_r12_k8920", dict(algorithm="log-map", kernel="vector"), frames),
        ("turbo_r12_k8920_maxlog", dict(algorithm="max-log", kernel="vector"), frames),
        ("turbo_r12_k8920_scalar", dict(algorithm="log-map", kernel="scalar"), min(scalar_frames, frames)),
    )
    for name, options, n in runs:
        dec = TurboDecoder(rate=code.rate, k=code.k, max_iterations=10, check="fecf", **options)
        out = {}

        def once(dec=dec, n=n, out=out):
            out["result"] = dec.process(llr[:n])

        seconds = best_of(once, repeat if n == frames else 1)
        result = out["result"]
        res[f"{name}_mbps"] = n * code.k / seconds / 1e6
        res[f"{name}_mean_iterations"] = float(result.iterations.mean())
        res[f"{name}_frame_errors"] = int(np.any(result.data != info[:n], axis=1).sum())
    # per iteration, since the scalar run's frames may need a different mean number of iterations
    res["turbo_vector_over_scalar_per_iteration"] = (
        res["turbo_r12_k8920_mbps"] * res["turbo_r12_k8920_mean_iterations"]
        / (res["turbo_r12_k8920_scalar_mbps"] * res["turbo_r12_k8920_scalar_mean_iterations"]))
    return res


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=128, help="codewords per timed run (default 128)")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs; the best counts (default 3)")
    ap.add_argument("--scalar-frames", type=int, default=8, help="codewords for the scalar kernel (default 8)")
    ap.add_argument("--ebn0", type=float, default=1.0, help="Eb/N0 in dB (default 1.0)")
    args = ap.parse_args(argv)
    res = measure(frames=args.frames, repeat=args.repeat, scalar_frames=args.scalar_frames, ebn0_db=args.ebn0)
    for key, value in res.items():
        print(f"{key:<44} {value:12.3f}" if isinstance(value, float) else f"{key:<44} {value:12d}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
