"""Benchmark figures of ``downlink sweep`` (issue 6 checks), printed as a table.

1. Soft Viterbi alone (K=7, each requested rate, no RS): Eb/N0 where the measured BER crosses 1e-5,
   the union bound's crossing, and the difference (target: within 0.3 dB at rate 1/2).
2. With ``--chain``: the concatenated code of the demo profile (conv 1/2 + RS(255,223) I=5) through
   the whole receiver (simulated IQ with carrier offset, Doppler and clock offset; carrier and
   timing recovery), packet loss at 2.7 and 3.0 dB (target: at most 1 % at 3.0 dB).

Fixed seeds; the figures are reproducible.  Run from the repository root::

    python bench/bench_sweep.py                     # rate 1/2 only, ~1e7 bits per point near 1e-5
    python bench/bench_sweep.py --rates 1/2,3/4,7/8 --chain --workers 2
"""

from __future__ import annotations

import argparse
import time

from pipeline.profile import demo_profile_path, load_profile, profile_from_dict
from pipeline.tools import _sweep as sw
from pipeline.tools import _theory as th

_GRIDS = {"1/2": "3.25:5.0:0.25", "2/3": "3.75:5.5:0.25", "3/4": "4.25:6.0:0.25", "5/6": "4.75:6.5:0.25",
          "7/8": "5.25:7.0:0.25"}


def viterbi_losses(rates, frames: int, errors: int, workers, seed: int) -> None:
    print(f"{'rate':<5} {'measured 1e-5 (dB)':>19} {'union bound (dB)':>17} {'loss (dB)':>10} {'points':>7} "
          f"{'time (s)':>9}")
    for rate in rates:
        prof = profile_from_dict({"link": {}, "coding": {"convolutional": rate, "reed_solomon": 0, "interleave": 1,
                                                         "randomizer": True}, "frames": {"length": 1115}},
                                 name=f"viterbi-{rate}")
        t0 = time.perf_counter()
        pts = sw.sweep(prof, sw.parse_ebn0_spec(_GRIDS[rate]), frames=frames, errors=errors, seed=seed,
                       workers=workers)
        loss = sw.implementation_losses(prof, pts)["curves"][0]
        lo, hi = loss["measured_low_db"], loss["measured_high_db"]
        span = f" [{lo:.2f}, {hi:.2f}]" if lo is not None and hi is not None else ""
        m = (f"{loss['measured_db']:.3f}" if loss["measured_db"] is not None else "no value") + span
        d = f"{loss['loss_db']:+.3f}" if loss["loss_db"] is not None else "n/a"
        print(f"{rate:<5} {m:>19} {loss['theory_db']:>17.3f} {d:>10} {len(pts):>7} {time.perf_counter() - t0:>9.1f}")
        for p in pts:
            print(f"      Eb/N0 {p.ebn0_db:5.2f} dB  BER {p.ber:.3e} ({p.bit_errors} errors in {p.bits} bits)  "
                  f"union bound {th.conv_union_bound_ber(p.ebn0_db, rate):.3e}")


def chain_packet_loss(frames: int, workers, seed: int) -> None:
    prof = load_profile(demo_profile_path())
    t0 = time.perf_counter()
    pts = sw.sweep(prof, [2.7, 3.0], frames=frames, errors=10**9, stage="chain", seed=seed, workers=workers)
    print(f"\nconcatenated code through the whole chain ({prof.name}: conv 1/2 + RS(255,223) I=5, "
          f"{frames} frames per point, {time.perf_counter() - t0:.0f} s)")
    print(f"{'Eb/N0 (dB)':>10} {'packets':>8} {'lost/wrong':>11} {'packet loss':>12} {'FER':>8} {'spurious':>9}")
    for p in pts:
        print(f"{p.ebn0_db:>10.2f} {p.packets:>8} {p.packet_errors:>11} {100 * p.per:>11.2f}% {p.fer:>8.4f} "
              f"{p.spurious_packets:>9}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rates", default="1/2", help="comma list of convolutional rates (default 1/2)")
    ap.add_argument("--frames", type=int, default=3000, help="frames of 1115 octets per point at most")
    ap.add_argument("--errors", type=int, default=200, help="bit errors per point before stopping")
    ap.add_argument("--chain", action="store_true", help="also measure packet loss through the whole chain")
    ap.add_argument("--chain-frames", type=int, default=600, help="frames per chain point")
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--seed", type=int, default=2026)
    args = ap.parse_args()
    viterbi_losses([r.strip() for r in args.rates.split(",")], args.frames, args.errors, args.workers, args.seed)
    if args.chain:
        chain_packet_loss(args.chain_frames, args.workers, args.seed)


if __name__ == "__main__":
    main()
