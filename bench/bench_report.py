"""CPU time of the pass report: building the report dict and drawing report.html (plots included).

Simulates the demo pass once (fixed seed), then in fresh processes decodes it in memory, keeps the
run's ``RunFacts`` and times, with ``time.process_time``:

- ``import_s``: importing matplotlib's figure and Agg canvas (paid once per run by the first plot);
- ``build_s``: :func:`pipeline.report.build_report`;
- ``render_s``: :func:`pipeline.report.render_html` (every plot drawn and PNG-encoded, the page written
  to a string), first call in the process, matplotlib already imported;
- ``total_s``: the three together, what a decode run pays for its report.

Prints the best and the median over ``--repeat`` processes (JSON with ``--json``).  The figure is CPU
time of one process, so it is little affected by other load on the machine, but not immune to it.

    python bench/bench_report.py [--seconds 10] [--repeat 5] [--json]
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _child(meta: str) -> dict:
    import pipeline
    import pipeline.report as rep

    captured = {}
    original = rep.build_report

    def keep(facts):  # the run's facts, kept for timing (bench only: the decode looks the name up per run)
        captured["facts"] = facts
        return original(facts)

    rep.build_report = keep
    try:
        pipeline.decode(meta, pipeline.load_profile(pipeline.demo_profile_path()))
    finally:
        rep.build_report = original
    facts = captured["facts"]
    t0 = time.process_time()
    from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
    from matplotlib.figure import Figure  # noqa: F401

    t1 = time.process_time()
    report, plots = rep.build_report(facts)
    t2 = time.process_time()
    html = rep.render_html(report, plots)
    t3 = time.process_time()
    return {"import_s": t1 - t0, "build_s": t2 - t1, "render_s": t3 - t2, "total_s": t3 - t0,
            "html_bytes": len(html.encode())}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=10.0, help="length of the simulated demo pass (s)")
    ap.add_argument("--repeat", type=int, default=5, help="fresh processes to time")
    ap.add_argument("--json", action="store_true", help="print JSON")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(_child(args.child)))
        return 0
    import pipeline

    with tempfile.TemporaryDirectory() as tmp:
        sim = pipeline.simulate(pipeline.load_profile(pipeline.demo_profile_path()), Path(tmp) / "rec",
                                seconds=args.seconds, seed=1)
        runs = []
        for _ in range(args.repeat):
            out = subprocess.run([sys.executable, __file__, "--child", str(sim.meta_path)], capture_output=True,
                                 text=True, check=True)
            runs.append(json.loads(out.stdout.strip().splitlines()[-1]))
    keys = ("import_s", "build_s", "render_s", "total_s")
    result = {"seconds": args.seconds, "repeat": args.repeat, "html_bytes": runs[-1]["html_bytes"]}
    for k in keys:
        vals = [r[k] for r in runs]
        result[k + "_best"] = round(min(vals), 4)
        result[k + "_median"] = round(statistics.median(vals), 4)
    if args.json:
        print(json.dumps(result))
    else:
        print(f"report CPU time, demo pass of {args.seconds:g} s, {args.repeat} fresh processes (best / median):")
        for k in keys:
            print(f"  {k:9s} {result[k + '_best']:.3f} / {result[k + '_median']:.3f} s")
        print(f"  report.html {result['html_bytes']} bytes")
    return 0


if __name__ == "__main__":
    sys.exit(main())
