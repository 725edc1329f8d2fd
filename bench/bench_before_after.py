"""Before and after, side by side in one run: the same measurements on two checkouts of the package.

Run: ``python bench/bench_before_after.py --before PATH [--after PATH] [--rounds 2] [--json]`` where PATH is
the root of a checkout (for example a second git worktree of ``main``); ``--after`` defaults to this one.

Each measurement runs in a fresh ``python`` process whose ``PYTHONPATH`` is the checkout, so the code
measured is that checkout's own; the measuring code is this file's (the same for both).  The rounds
alternate before / after, so slow drifts of a shared machine's load fall on both alike; the best of the
rounds is kept, and the 1-minute load average is printed with every round.  Figures (one core, the
demo profile's recording simulated once per process with a fixed seed):

- ``frontend_msps``: :class:`pipeline.demod.Demodulator` on a 4 s demo recording (Msample/s, best of 3);
- ``end_to_end_msps``: the decode path with its sinks (segments into one back end, 1 process), 4 s;
- ``end_to_end_qpsk_5msps_realtime``: the same on the 2 Msym/s QPSK link of ``downlink bench``, 1 s at
  5 Msample/s, real-time factor;
- ``warm_start_s``: a fresh process decoding the demo recording (``downlink bench``'s child script), start to
  the first chunk decoded (cache present);
- ``cold_start_s``: the same with ``NUMBA_CACHE_DIR`` an empty folder: start to the end of the decode.
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

HERE = Path(__file__).resolve().parent.parent

_SPEED = r"""
import json, sys
from pathlib import Path
from pipeline.profile import load_profile, demo_profile_path, profile_from_dict
from pipeline.recording import open_recording
from pipeline.sim import simulate
from pipeline.tools._bench import _bench_frontend as bench_frontend, _decode_once as decode_once
qpsk_link = json.loads(sys.argv[1])
tmp = Path(sys.argv[2])

def best_decode(rec, prof, name, repeats=3):
    # the checkout's own downlink bench decode (segments into one back end with its sinks, 1 process)
    decode_once(rec, prof, tmp / (name + "_warm"), 1)
    runs = [decode_once(rec, prof, tmp / f"{name}{r}", 1) for r in range(repeats)]
    dt = min(r[0] for r in runs)
    return rec.num_samples / dt / 1e6, runs[0][2].packet_count

prof = load_profile(demo_profile_path())
rec = open_recording(simulate(prof, tmp / "demo", seconds=4.0, seed=1).meta_path)
chunks = list(rec.chunks(prof.receiver.chunk_samples, verify=False))
out = {"frontend_msps": bench_frontend(prof, chunks, rec.sample_rate_hz, 3)}  # the checkout's own, best of 3
del chunks
out["end_to_end_msps"], out["end_to_end_packets"] = best_decode(rec, prof, "demo")
qprof = profile_from_dict(qpsk_link)
qrec = open_recording(simulate(qprof, tmp / "qpsk", seed=3).meta_path)
msps, out["end_to_end_qpsk_packets"] = best_decode(qrec, qprof, "qpsk", repeats=2)
out["end_to_end_qpsk_5msps_realtime"] = msps * 1e6 / qrec.sample_rate_hz
out["demo_meta"] = str(rec.meta_path)
print(json.dumps(out))
"""




def _run(code: str, root: Path, args: list[str], env_extra: dict | None = None) -> tuple[float, str]:
    env = dict(os.environ, PYTHONPATH=str(root), **(env_extra or {}))
    t0 = time.monotonic()  # CLOCK_MONOTONIC: the same clock in the child on Linux
    # cwd: the checkout itself (``python -c`` puts the working folder first on sys.path)
    proc = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, env=env, check=False,
                          cwd=root)
    if proc.returncode != 0:
        raise RuntimeError(f"{root}: {proc.stderr.strip().splitlines()[-3:]}")
    return t0, proc.stdout.strip().splitlines()[-1]


def measure(root: Path, tmp: Path, tag: str) -> dict:
    sys.path.insert(0, str(HERE))
    # this checkout's definitions, for both: the link, and the fresh-process decode of downlink bench
    from pipeline.tools._bench import _CHILD, QPSK_LINK

    tmp.mkdir(parents=True)
    _, line = _run(_SPEED, root, [json.dumps(QPSK_LINK), str(tmp / "speed")])
    res = json.loads(line)
    meta = res.pop("demo_meta")
    cache = tmp / f"cache_{tag}"
    cache.mkdir()
    (tmp / f"cold_{tag}").mkdir()
    t0, line = _run(_CHILD, root, [meta, str(tmp / f"cold_{tag}")], {"NUMBA_CACHE_DIR": str(cache)})
    res["cold_start_s"] = json.loads(line)["end"] - t0
    warm = []
    for r in range(3):
        (tmp / f"warm_{tag}{r}").mkdir()
        t0, line = _run(_CHILD, root, [meta, str(tmp / f"warm_{tag}{r}")])
        warm.append(json.loads(line)["first"] - t0)
    res["warm_start_s"] = min(warm)
    return res


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--before", required=True, type=Path, help="root of the checkout measured as 'before'")
    ap.add_argument("--after", type=Path, default=HERE, help="root of the 'after' checkout (default: this one)")
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    best: dict = {"before": {}, "after": {}}
    with tempfile.TemporaryDirectory(prefix="downlink-ba-") as tmpname:
        tmp = Path(tmpname)
        for r in range(args.rounds):
            for tag, root in (("before", args.before), ("after", args.after)):
                load = os.getloadavg()[0]
                res = measure(root.resolve(), tmp / f"{tag}{r}", tag)
                print(json.dumps({"round": r, "tag": tag, "load_1min": round(load, 2), **res}), file=sys.stderr)
                for k, v in res.items():
                    lower_better = k.endswith("_s")
                    old = best[tag].get(k)
                    if old is None or (v < old if lower_better else v > old):
                        best[tag][k] = v
    ratio = {k: best["after"][k] / best["before"][k] for k in best["after"] if best["before"].get(k)}
    if args.json:
        print(json.dumps({"best": best, "after_over_before": ratio}))
    else:
        print(f"{'figure':<34} {'before':>10} {'after':>10} {'after/before':>13}")
        for k in best["after"]:
            print(f"{k:<34} {best['before'].get(k, float('nan')):10.3f} {best['after'][k]:10.3f} "
                  f"{ratio.get(k, float('nan')):13.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
