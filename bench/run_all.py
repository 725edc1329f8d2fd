"""Run every benchmark of the project and print their tables one after the other.

Run from the repository root: ``python bench/run_all.py [--quick] [--json FILE]``.

1. ``downlink bench`` (:func:`pipeline.tools._bench.measure`): per-stage and end-to-end figures on the
   demo profile, segments on 1 and 2 processes, warm start, peak memory.  ``--json FILE`` also writes them
   as one JSON object.
2. The stage scripts beside this file, each in its own ``python`` process with its defaults:
   ``bench_recording.py``, ``bench_demod.py``, ``bench_track_replay.py``, ``bench_strobe_floor.py``,
   ``bench_acquisition.py`` (its sensitivity part left out
   with ``--quick``), ``bench_fec.py``, ``bench_turbo.py``, ``bench_ldpc.py``,
   ``bench_end_to_end.py`` (a 1 GB recording; 0.25 GB with ``--quick``), ``bench_impairments.py`` (the demo
   and QPSK links only with ``--quick``), ``bench_sweep.py``,
   ``sweep_turbo.py``, ``sweep_ldpc.py`` and ``bench_sync_onset.py`` (Monte-Carlo; left out with ``--quick``).  A
   script that is missing or fails is reported and the others still run; the exit status is 1 if any
   failed.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def _scripts(quick: bool) -> list[tuple[str, list[str]]]:
    rows = [
        ("bench_recording.py", ["--msamples", "4"] if quick else []),
        ("bench_demod.py", ["--seconds", "1"] if quick else []),
        ("bench_track_replay.py", ["--seconds", "1", "--repeat", "3"] if quick else []),
        ("bench_strobe_floor.py", ["--repeat", "2"] if quick else []),
        ("bench_acquisition.py", ["--cost-seconds", "5", "--skip-sensitivity"] if quick else []),
        ("bench_residual.py", ["--seconds", "2", "--repeat", "2"] if quick else []),
        ("bench_fec.py", ["--bits", "1000000", "--repeat", "3"] if quick else []),
        ("bench_turbo.py", ["--frames", "64", "--repeat", "2"] if quick else []),
        ("bench_ldpc.py", ["--codewords", "256", "--repeat", "3"] if quick else []),
        ("bench_end_to_end.py", ["--gigabytes", "0.25"] if quick else []),
        ("bench_impairments.py", ["--links", "demo,qpsk"] if quick else []),
    ]
    if not quick:
        rows.append(("bench_sweep.py", []))
        rows.append(("sweep_turbo.py", []))
        rows.append(("sweep_ldpc.py", ["--codewords", "3000"]))
        rows.append(("bench_sync_onset.py", []))
        rows.append(("bench_residual_loss.py", []))
    return rows


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller inputs, no Monte-Carlo sweep")
    ap.add_argument("--json", default=None, help="also write the downlink bench figures to this file")
    ap.add_argument("--seconds", type=float, default=4.0, help="demo recording length for downlink bench")
    args = ap.parse_args(argv)

    from pipeline.tools._bench import format_table, measure

    failed = []
    print("=" * 100)
    print("downlink bench")
    print("=" * 100, flush=True)
    t0 = time.perf_counter()
    res = measure(seconds=args.seconds, repeats=2 if args.quick else 3, segmented_seconds=20.0 if args.quick else 34.0)
    print(format_table(res))
    print(f"({time.perf_counter() - t0:.0f} s)", flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(res, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    for script, extra in _scripts(args.quick):
        path = HERE / script
        print()
        print("=" * 100)
        print(f"{script} {' '.join(extra)}".rstrip())
        print("=" * 100, flush=True)
        if not path.exists():
            print(f"missing: {path.name}")
            failed.append(script)
            continue
        t0 = time.perf_counter()
        rc = subprocess.run([sys.executable, str(path), *extra], check=False).returncode
        print(f"({time.perf_counter() - t0:.0f} s, exit status {rc})", flush=True)
        if rc != 0:
            failed.append(script)
    if failed:
        print(f"\nfailed: {', '.join(failed)}")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
