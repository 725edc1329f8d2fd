"""The decode path of the 2 Msym/s QPSK link and of the demo profile, end to end, with a per-stage breakdown;
before and after side by side in one run.

Run: ``python bench/bench_qpsk_link.py [--before PATH] [--rounds 3] [--qpsk-seconds 3] [--demo-seconds 4]
[--json]`` where PATH is the root of another checkout (for example ``git worktree add --detach ../main-ro
main``); without ``--before`` only this checkout is measured.

What is measured (one process, one decode worker: ``pipeline.tools._bench._decode_once(rec, profile,
folder, 1)``, the checkout's own ``downlink bench`` decode path with its folder sinks):

- ``qpsk_msps`` / ``qpsk_realtime``: the QPSK link of ``downlink bench`` (``QPSK_LINK``: r=1/2 +
  RS(255,223) I=5, 1115-octet TM frames, RRC 0.5, 5 Msample/s) simulated for ``--qpsk-seconds`` (seed 3),
  opened with ``verify_checksum=False``; Msample/s and the real-time factor (Msample/s / 5).
- ``qpsk_checksum_msps``: the same with the SigMF ``core:sha512`` check on.
- ``demo_msps`` / ``demo_checksum_msps``: the demo profile (1 Msample/s), ``--demo-seconds`` (seed 1).
- ``qpsk_cpu_s`` / ``qpsk_nondemod_cpu_s`` (and ``demo_...``): CPU seconds of the decoding thread
  (``time.thread_time``: the checksum thread and other processes on a shared machine are not counted) of
  one decode without the checksum, and the part of it spent outside ``Demodulator.process`` / ``flush``
  (recording reads, branch and frame sync, Reed-Solomon, back end, sinks): the best of 3 decodes.  Lower is
  better; the least disturbed by other load of all the figures.
- ``stage_s``: seconds of ``tottime`` of one cProfile'd QPSK decode (no checksum), summed by the room
  of the code that spent it (``demod``, ``fec``, ``sync``, ``recording``, ``link``, ``packets``,
  ``chain``, ``timescales``, ``numpy``, ``json``, ``builtins`` (C functions such as file reads),
  ``stdlib-other``); cProfile adds its own overhead per call.
- the SHA-256 of ``packets.jsonl`` and ``frames.jsonl`` of every decode: they must agree within a
  checkout and between the two checkouts (output identical); the script says so and exits 1 if not.

Each figure is the best of 3 timed decodes (after one untimed) in a fresh ``python`` process whose
``PYTHONPATH`` is the checkout; rounds alternate before / after so that a shared machine's load falls on
both alike, and the best over rounds is kept.  The 1-, 5- and 15-minute load averages (``os.getloadavg``,
as ``uptime`` prints them) are printed with every round.  The recordings are simulated once, by this
checkout, and decoded by both.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent.parent

_SIMULATE = r"""
import json, sys
from pathlib import Path
from pipeline.profile import load_profile, demo_profile_path, profile_from_dict
from pipeline.sim import simulate
from pipeline.tools._bench import QPSK_LINK
tmp, qs, ds = Path(sys.argv[1]), float(sys.argv[2]), float(sys.argv[3])
q = simulate(profile_from_dict(QPSK_LINK), tmp / "qpsk", seed=3, seconds=qs)
d = simulate(load_profile(demo_profile_path()), tmp / "demo", seed=1, seconds=ds)
print(json.dumps({"qpsk": str(q.meta_path), "demo": str(d.meta_path), "qpsk_link": QPSK_LINK}))
"""

_MEASURE = r"""
import cProfile, hashlib, json, pstats, sys
from pathlib import Path
from pipeline.profile import load_profile, demo_profile_path, profile_from_dict
from pipeline.recording import open_recording
from pipeline.tools._bench import _decode_once as decode_once
paths, qpsk_link, tmp = json.loads(sys.argv[1]), json.loads(sys.argv[2]), Path(sys.argv[3])
out, hashes = {}, {}

def digest(folder):
    return "/".join(hashlib.sha256((folder / f).read_bytes()).hexdigest()[:16]
                    for f in ("packets.jsonl", "frames.jsonl"))

def best(name, meta, prof, checksum, repeats=3):
    rec = open_recording(meta, verify_checksum=checksum)
    decode_once(rec, prof, tmp / (name + "_warm"), 1)
    runs = []
    for r in range(repeats):
        rec = open_recording(meta, verify_checksum=checksum)
        runs.append(decode_once(rec, prof, tmp / f"{name}{r}", 1)[0])
        hashes.setdefault(name.split("_")[0], set()).add(digest(tmp / f"{name}{r}"))
    return rec.num_samples / min(runs) / 1e6, rec.sample_rate_hz

def cpu(name, meta, prof, repeats=3):
    # CPU seconds of this thread per decode, and those outside the demodulator (best of ``repeats``)
    import time
    from pipeline.demod._demodulator import Demodulator
    inside = [0.0]
    saved = {k: getattr(Demodulator, k) for k in ("process", "flush")}
    def timed(f):
        def run(*a, **k):
            t = time.thread_time()
            try:
                return f(*a, **k)
            finally:
                inside[0] += time.thread_time() - t
        return run
    for k, f in saved.items():
        setattr(Demodulator, k, timed(f))
    try:
        rec = open_recording(meta, verify_checksum=False)
        decode_once(rec, prof, tmp / (name + "_cpu_warm"), 1)
        totals, outside = [], []
        for r in range(repeats):
            inside[0] = 0.0
            t = time.thread_time()
            decode_once(rec, prof, tmp / f"{name}_cpu{r}", 1)
            totals.append(time.thread_time() - t)
            outside.append(totals[-1] - inside[0])
    finally:
        for k, f in saved.items():
            setattr(Demodulator, k, f)
    return min(totals), min(outside)

qprof, dprof = profile_from_dict(qpsk_link), load_profile(demo_profile_path())
out["qpsk_msps"], fs = best("qpsk_nock", paths["qpsk"], qprof, False)
out["qpsk_realtime"] = out["qpsk_msps"] * 1e6 / fs
out["qpsk_checksum_msps"], _ = best("qpsk_ck", paths["qpsk"], qprof, True)
out["demo_msps"], _ = best("demo_nock", paths["demo"], dprof, False)
out["demo_checksum_msps"], _ = best("demo_ck", paths["demo"], dprof, True)
out["qpsk_cpu_s"], out["qpsk_nondemod_cpu_s"] = cpu("qpsk", paths["qpsk"], qprof)
out["demo_cpu_s"], out["demo_nondemod_cpu_s"] = cpu("demo", paths["demo"], dprof)

rooms = ("demod", "fec", "sync", "recording", "link", "packets", "chain", "report", "sim")
def room(filename):
    f = filename.replace("\\", "/")
    if "/pipeline/" in f:
        part = f.split("/pipeline/")[-1].split("/")[0]
        part = part[:-3] if part.endswith(".py") else part
        return part if part in rooms or part == "timescales" else "pipeline-other"
    if "/numpy/" in f:
        return "numpy"
    if "/json/" in f:
        return "json"
    return "stdlib-other"

rec = open_recording(paths["qpsk"], verify_checksum=False)
pr = cProfile.Profile()
pr.enable()
decode_once(rec, qprof, tmp / "qpsk_profiled", 1)
pr.disable()
stage = {}
for (filename, _line, func), (_cc, _nc, tt, _ct, _callers) in pstats.Stats(pr).stats.items():
    key = room(filename) if filename != "~" else ("numpy" if "numpy" in func else "builtins")
    stage[key] = stage.get(key, 0.0) + tt
out["stage_s"] = {k: round(v, 4) for k, v in sorted(stage.items(), key=lambda kv: -kv[1])}
out["stage_total_s"] = round(sum(stage.values()), 4)
out["hashes"] = {k: sorted(v) for k, v in hashes.items()}
print(json.dumps(out))
"""


def _run(code: str, root: Path, args: list[str]) -> dict:
    env = dict(os.environ, PYTHONPATH=str(root), NUMBA_NUM_THREADS="1", OMP_NUM_THREADS="1",
               OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    proc = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, env=env, check=False,
                          cwd=root)
    if proc.returncode != 0:
        raise RuntimeError(f"{root}: {proc.stderr.strip().splitlines()[-3:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _load() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--before", type=Path, default=None, help="root of the checkout measured as 'before'")
    ap.add_argument("--after", type=Path, default=HERE, help="root of the 'after' checkout (default: this one)")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--qpsk-seconds", type=float, default=3.0)
    ap.add_argument("--demo-seconds", type=float, default=4.0)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    sides = [("after", args.after.resolve())]
    if args.before is not None:
        sides.insert(0, ("before", args.before.resolve()))
    best: dict = {tag: {} for tag, _ in sides}
    stages: dict = {tag: None for tag, _ in sides}
    hashes: dict = {tag: {} for tag, _ in sides}
    loads = []
    with tempfile.TemporaryDirectory(prefix="downlink-qpsk-") as tmpname:
        tmp = Path(tmpname)
        sim = _run(_SIMULATE, args.after.resolve(), [str(tmp), str(args.qpsk_seconds), str(args.demo_seconds)])
        paths = {"qpsk": sim["qpsk"], "demo": sim["demo"]}
        for r in range(args.rounds):
            for tag, root in sides:
                load = _load()
                work = tmp / f"{tag}{r}"
                work.mkdir()
                res = _run(_MEASURE, root, [json.dumps(paths), json.dumps(sim["qpsk_link"]), str(work)])
                loads.append(load)
                print(json.dumps({"round": r, "tag": tag, "load_avg_1_5_15": load,
                                  **{k: v for k, v in res.items() if k != "hashes"}}), file=sys.stderr)
                for name, hs in res.pop("hashes").items():
                    hashes[tag].setdefault(name, set()).update(hs)
                if stages[tag] is None or res["stage_total_s"] < stages[tag]["stage_total_s"]:
                    stages[tag] = {"stage_total_s": res["stage_total_s"], "stage_s": res["stage_s"]}
                for k, v in res.items():
                    if not isinstance(v, float) or k.startswith("stage"):
                        continue
                    lower_is_better = k.endswith("_s")  # seconds; the rest are rates
                    if k not in best[tag] or (v < best[tag][k] if lower_is_better else v > best[tag][k]):
                        best[tag][k] = v
                for d in (work,):
                    for p in sorted(d.rglob("*"), reverse=True):
                        p.unlink() if p.is_file() else p.rmdir()
    identical = all(len(v) == 1 for h in hashes.values() for v in h.values())
    if len(sides) == 2:
        identical = identical and all(hashes["before"].get(k) == hashes["after"].get(k)
                                      for k in set(hashes["before"]) | set(hashes["after"]))
    summary = {"best": best, "stages": stages, "outputs_identical": identical,
               "hashes": {t: {k: sorted(v) for k, v in h.items()} for t, h in hashes.items()},
               "load_avg_1_5_15_per_round": loads, "load_avg_1_5_15_end": _load(),
               "rounds": args.rounds, "qpsk_seconds": args.qpsk_seconds, "demo_seconds": args.demo_seconds}
    if "before" in best:
        summary["after_over_before"] = {k: best["after"][k] / best["before"][k] for k in best["after"]
                                        if best["before"].get(k)}
    if args.json:
        print(json.dumps(summary))
    else:
        tags = [t for t, _ in sides]
        print(f"best of 3 decodes x {args.rounds} rounds, 1 process; load average per round: {', '.join(loads)}; "
              f"at the end: {summary['load_avg_1_5_15_end']}")
        print(f"{'figure':<24}" + "".join(f"{t:>12}" for t in tags) + ("  after/before" if len(tags) == 2 else ""))
        for k in best["after"]:
            line = f"{k:<24}" + "".join(f"{best[t].get(k, float('nan')):12.3f}" for t in tags)
            if len(tags) == 2:
                line += f"{summary['after_over_before'].get(k, float('nan')):14.2f}"
            print(line)
        print("per-stage tottime of one cProfile'd QPSK decode (s; the round with the smallest total):")
        keys = list(dict.fromkeys(k for t in tags for k in stages[t]["stage_s"]))
        for k in keys + ["total"]:
            vals = [stages[t]["stage_total_s"] if k == "total" else stages[t]["stage_s"].get(k, 0.0) for t in tags]
            print(f"  {k:<22}" + "".join(f"{v:12.4f}" for v in vals))
        print("packets.jsonl / frames.jsonl:", "identical in every decode" + (" of both checkouts" if len(tags) == 2
              else "") if identical else f"DIFFER: {summary['hashes']}")
    return 0 if identical else 1


if __name__ == "__main__":
    raise SystemExit(main())
