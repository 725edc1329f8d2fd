"""End-to-end decode of a long recording: throughput and peak memory (issue 13: at most 300 MiB).

Run: ``python bench/bench_end_to_end.py [--gigabytes 1.0] [--modes plain,workers1,workers2]``.

A demo-profile (Tamarisk) pass of ``--gigabytes`` of cf32 samples (8 bytes per sample, 1 Msample/s,
so 1 GB is 125 s) is simulated with :func:`pipeline.sim.simulate` (fixed seed) into a temporary
folder.  Each mode then decodes it in a fresh ``python`` process, and the child prints its elapsed
time and its peak resident memory (``VmHWM`` of ``/proc/self/status``: the high-water mark of its own
address space, page cache not included).  One untimed ``workers1`` run first fills the numba cache;
every mode's output is then compared with it ("identical": every ``.jsonl``/``.bin`` file byte for
byte; "same packets": APID, sequence count and octets of every packet in order).

Modes: ``plain`` (one unbroken :class:`pipeline.chain.DecodeChain`, chunk by chunk: the reference
the segments are measured against), ``workersN`` (``pipeline.decode(..., workers=N)``, what
``downlink decode --workers N`` runs: overlapping segments on N worker processes, 1 = in the main
process).  "peak RSS" is the main decode process's; "worker RSS" the largest ``ru_maxrss`` of its
worker processes, an upper bound since a forked worker's count starts from the pages it shares with
the main process.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

_CHILD = r"""
import json, resource, sys, time
t0 = time.perf_counter()
from pathlib import Path
import pipeline
from pipeline.chain import DecodeChain, FolderSinks
from pipeline.tools._bench import peak_rss_mb
mode, meta, out = sys.argv[1], sys.argv[2], Path(sys.argv[3])
profile = pipeline.load_profile(pipeline.demo_profile_path())
if mode == "plain":
    rec = pipeline.open_recording(meta)
    out.mkdir()
    sinks = FolderSinks(out)
    chain = DecodeChain(profile, sample_rate_hz=rec.sample_rate_hz, timebase=rec, sinks=sinks)
    t1 = time.perf_counter()
    for chunk in rec.chunks(profile.receiver.chunk_samples):
        chain.process_chunk(chunk)
    summary = chain.finish()
    sinks.close()
    decode_s = time.perf_counter() - t1
    counts = dict(frames=chain.back.frame_count, frames_ok=chain.back.status_counts.get("ok", 0),
                  packets=chain.back.packet_count, samples=summary.counts.samples)
elif mode.startswith("workers"):
    s = pipeline.decode(meta, profile, out, workers=int(mode[len("workers"):]))
    decode_s = s.elapsed_s
    counts = dict(frames=s.frames, frames_ok=s.frames_ok, packets=s.packets, samples=s.samples)
else:
    raise SystemExit(f"unknown mode {mode}")
t3 = time.perf_counter()
print(json.dumps({"decode_s": decode_s, "total_s": t3 - t0, **counts, "peak_rss_mb": peak_rss_mb(),
                  "children_max_rss_mb": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0}))
"""


def _child(mode: str, meta: Path, out: Path) -> dict:
    proc = subprocess.run([sys.executable, "-c", _CHILD, mode, str(meta), str(out)], capture_output=True, text=True,
                          check=False)
    if proc.returncode != 0:
        raise SystemExit(f"{mode}: decode process failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _compare(a: Path, b: Path) -> str:
    """'identical' (every output file byte for byte), 'same packets' (apid, count, octets), or 'DIFFERENT'."""
    names = sorted(p.name for p in a.iterdir() if p.name.endswith((".jsonl", ".bin")))
    if names == sorted(p.name for p in b.iterdir() if p.name.endswith((".jsonl", ".bin"))) and all(
            (a / n).read_bytes() == (b / n).read_bytes() for n in names):
        return "identical"

    def rows(folder: Path):
        with open(folder / "packets.jsonl", encoding="utf-8") as f:
            return [(d["apid"], d["seq_count"], d["hex"]) for d in map(json.loads, f)]

    return "same packets" if rows(a) == rows(b) else "DIFFERENT"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--gigabytes", type=float, default=1.0, help="size of the cf32 recording (GB, 10^9 bytes)")
    ap.add_argument("--modes", default="plain,workers1,workers2",
                    help="comma-separated decode modes: plain, workersN")
    ap.add_argument("--keep", default=None, help="folder to keep the recording in (reused when present)")
    args = ap.parse_args()
    from pipeline.profile import demo_profile_path, load_profile
    from pipeline.sim import simulate
    from pipeline.tools._bench import cpu_model, peak_rss_mb

    profile = load_profile(demo_profile_path())
    seconds = args.gigabytes * 1e9 / 8 / profile.simulate.sample_rate_hz
    with tempfile.TemporaryDirectory(prefix="downlink-e2e-") as tmpname:
        tmp = Path(tmpname)
        rec_dir = Path(args.keep) if args.keep else tmp / "rec"
        meta = rec_dir / "recording.sigmf-meta"
        if not meta.exists():
            t0 = time.perf_counter()
            sim = simulate(profile, rec_dir, seconds=seconds, seed=7)
            print(f"simulated {sim.seconds:.1f} s ({sim.num_samples * 8 / 1e9:.2f} GB cf32, {sim.num_packets} packets) "
                  f"in {time.perf_counter() - t0:.1f} s; simulator peak RSS {peak_rss_mb():.0f} MiB", flush=True)
        print(f"CPU: {cpu_model()} ({os.cpu_count()} cores), load average {os.getloadavg()[0]:.2f}")
        _child("workers1", meta, tmp / "warm")  # fills the numba cache
        print(f"{'mode':<10} {'samples':>11} {'decode s':>9} {'Msample/s':>10} {'x real time':>11} {'total s':>9} "
              f"{'frames':>7} {'packets':>8} {'peak RSS MiB':>13} {'worker RSS MiB':>15}  output vs plain")
        for mode in args.modes.split(","):
            r = _child(mode, meta, tmp / f"out-{mode}")
            msps = r["samples"] / r["decode_s"] / 1e6
            same = _compare(tmp / "warm", tmp / f"out-{mode}")
            worker = f"{r['children_max_rss_mb']:.1f}" if mode.startswith("workers") and mode != "workers1" else "-"
            print(f"{mode:<10} {r['samples']:>11} {r['decode_s']:>9.2f} {msps:>10.2f} "
                  f"{msps * 1e6 / profile.simulate.sample_rate_hz:>11.1f} {r['total_s']:>9.2f} {r['frames']:>7} "
                  f"{r['packets']:>8} {r['peak_rss_mb']:>13.1f} {worker:>15}  {same}", flush=True)
        print(f"load average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
