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

from pipeline.tools._turbo import turbo_speed

# the measurement lives in the package (downlink bench reports the same turbo_r12_k8920_mbps)
measure = turbo_speed


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
