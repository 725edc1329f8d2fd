"""Frame and bit error rates of the CCSDS turbo codes alone on BPSK/AWGN, with confidence intervals.

Run from the repository root::

    python bench/sweep_turbo.py                                 # the three targets of issue 16
    python bench/sweep_turbo.py --point 1/2,1784,1.3 --algorithm max-log --min-frames 1000

Each point encodes random transfer frames (valid FECF, fixed seed per point), sends them as BPSK
over AWGN at the given Eb/N0 (Eb per information bit, the 4 tail bits counted in the rate) and
decodes the channel LLRs with at most 10 iterations and the FECF stopping check.  A point runs
until it has ``--min-frames`` frames (default 3000) or ``--min-errors`` frame errors (default
50), in batches of ``--batch`` frames.  A frame error is a decoded frame that differs from the
one sent (whether or not its FECF passed; ``undetected`` counts those that passed).  The FER
interval is the exact (Clopper-Pearson) 95 % binomial interval; bit errors cluster in frames, so
the BER interval comes from resampling whole frames (2000 bootstrap draws), and with no bit
error at all its upper end is the FER's (BER <= FER always).  ``targets`` are issue 16's: FER at
most 1e-3 at each of the three default points.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from pipeline.fec.turbo import TurboCode
from pipeline.tools._theory import clopper_pearson, normal_approximation_ebn0_db
from pipeline.tools._turbo import turbo_code_errors

#: issue 16's code-alone targets: (rate, k, Eb/N0 dB), FER at most 1e-3 each
TARGETS = (("1/2", 8920, 1.0), ("1/6", 8920, 0.2), ("1/2", 1784, 1.6))


def run_point(rate: str, k: int, ebn0_db: float, *, min_frames: int = 3000, min_errors: int = 50,
              batch: int = 256, algorithm: str = "log-map", max_iterations: int = 10, seed: int = 16) -> dict:
    """Measure one point; returns frames, errors, rates with intervals, mean iterations, seconds."""
    rng = np.random.default_rng([seed, k, int(round(ebn0_db * 1000)) + 100000, len(rate), int(rate[-1])])
    frames = frame_errors = undetected = failed = 0
    bit_errors_per_frame: list[np.ndarray] = []
    iterations = 0
    t0 = time.perf_counter()
    while frames < min_frames and frame_errors < min_errors:
        n = min(batch, min_frames - frames)
        got = turbo_code_errors(rng, rate=rate, k=k, ebn0_db=ebn0_db, frames=n, max_iterations=max_iterations,
                                algorithm=algorithm)
        wrong = got["bit_errors"]
        bit_errors_per_frame.append(wrong)
        frames += n
        frame_errors += int((wrong > 0).sum())
        undetected += got["undetected"]
        failed += got["failed"]
        iterations += got["iterations"]
    bits = np.concatenate(bit_errors_per_frame)
    fer_lo, fer_hi = clopper_pearson(frame_errors, frames)
    ber = float(bits.sum()) / (frames * k)
    if bits.sum() == 0:
        ber_lo, ber_hi = 0.0, fer_hi
    else:
        boot = np.random.default_rng(seed).integers(0, frames, (2000, frames))
        sums = bits[boot].sum(axis=1) / (frames * k)
        ber_lo, ber_hi = (float(x) for x in np.percentile(sums, [2.5, 97.5]))
    return {
        "rate": rate, "k": k, "ebn0_db": ebn0_db, "algorithm": algorithm, "frames": frames,
        "frame_errors": frame_errors, "fer": frame_errors / frames, "fer_lo": fer_lo, "fer_hi": fer_hi,
        "ber": ber, "ber_lo": ber_lo, "ber_hi": ber_hi, "failed": failed, "undetected": undetected,
        "mean_iterations": iterations / frames, "seconds": time.perf_counter() - t0,
    }


def format_row(p: dict) -> str:
    # distance from the normal approximation (REFERENCES.md sec. 13.5's method) at FER 1e-3, issue 16's target
    na = normal_approximation_ebn0_db(TurboCode(rate=p["rate"], k=p["k"]).n, p["k"], 1e-3)
    dist = f"{p['ebn0_db'] - na:+.2f}"
    return (f"{p['rate']:<4} {p['k']:>5} {p['ebn0_db']:>6.2f} {p['algorithm']:<8} {p['frames']:>6} "
            f"{p['frame_errors']:>5} {p['fer']:9.2e} [{p['fer_lo']:8.2e}, {p['fer_hi']:8.2e}] "
            f"{p['ber']:9.2e} [{p['ber_lo']:8.2e}, {p['ber_hi']:8.2e}] {p['undetected']:>4} "
            f"{p['mean_iterations']:6.2f} {dist:>7} {p['seconds']:7.1f}")


HEADER = (f"{'rate':<4} {'k':>5} {'Eb/N0':>6} {'algo':<8} {'frames':>6} {'errs':>5} {'FER':>9} "
          f"{'95 % interval':^22} {'BER':>9} {'95 % interval':^22} {'und.':>4} {'iters':>6} "
          f"{'-NA1e-3':>7} {'sec':>7}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--point", action="append", default=None, metavar="RATE,K,EBN0",
                    help="a point to measure (repeatable); default: the three targets")
    ap.add_argument("--algorithm", default="log-map", choices=("log-map", "max-log"))
    ap.add_argument("--min-frames", type=int, default=3000)
    ap.add_argument("--min-errors", type=int, default=50)
    ap.add_argument("--batch", type=int, default=256)
    ap.add_argument("--seed", type=int, default=16)
    args = ap.parse_args(argv)
    points = TARGETS if args.point is None else [
        (r, int(k), float(e)) for r, k, e in (p.split(",") for p in args.point)]
    print(HEADER)
    for rate, k, ebn0 in points:
        p = run_point(rate, k, ebn0, min_frames=args.min_frames, min_errors=args.min_errors, batch=args.batch,
                      algorithm=args.algorithm, seed=args.seed)
        print(format_row(p), flush=True)
    print("-NA1e-3: Eb/N0 of the point minus the normal approximation at FER 1e-3 (REFERENCES.md sec. 13.5's method).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
