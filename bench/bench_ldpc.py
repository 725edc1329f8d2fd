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

from pipeline.tools._ldpc import ldpc_speed


def measure(codewords: int = 1024, repeat: int = 5, seed: int = 15) -> dict:
    """Decoder and encoder throughput at the two operating points; returns ``{key: value}`` (Mbit/s etc.).

    The measurement lives in the package (``downlink bench`` reports the same ``ldpc_c2_mbps`` and
    ``ldpc_ar4ja_r12_k1024_mbps``): :func:`pipeline.tools._ldpc.ldpc_speed`.
    """
    return ldpc_speed(codewords=codewords, repeat=repeat, seed=seed)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--codewords", type=int, default=1024)
    ap.add_argument("--repeat", type=int, default=5)
    a = ap.parse_args()
    for key, value in measure(a.codewords, a.repeat).items():
        print(f"{key:<40} {value:>10.3f}" if isinstance(value, float) else f"{key:<40} {value:>10}")


if __name__ == "__main__":
    main()
