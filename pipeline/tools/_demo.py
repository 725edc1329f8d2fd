"""``downlink demo``: simulate the invented demo pass and decode it.

The scenario (../shared/DESIGN.md): *Tamarisk*, an invented small lunar relay orbiter (spacecraft
id 499), received at the invented *Hollow Ridge* 13 m station.  BPSK 240 ksym/s, RRC 0.5,
convolutional r=1/2 + RS(255,223) I=5, 1115-octet TM frames, recorded at 1 Msample/s.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from pipeline.chain import OutputFolder

__all__ = ["compare_with_truth", "run_demo"]


def compare_with_truth(truth_path: Path, packets_path: Path) -> dict:
    """Match decoded packets against the simulator's truth.

    A decoded packet matches when APID, sequence count and every octet agree; its ERT error is the
    difference of the two ERT strings.  Returns counts, the worst ERT error in seconds, and the number
    of decoded packets that were never sent (must be 0).
    """
    from pipeline.recording._time import parse_iso_ns

    truth = [json.loads(line) for line in truth_path.read_text().splitlines() if line.strip()]
    got = [json.loads(line) for line in packets_path.read_text().splitlines() if line.strip()]
    sent = {}
    for t in truth:
        sent.setdefault((t["apid"], t["seq_count"], t["hex"]), []).append(t)
    matched = 0
    invented = 0
    worst = 0.0
    seen = set()
    for g in got:
        key = (g["apid"], g["seq_count"], g["hex"])
        cands = sent.get(key)
        if not cands:
            invented += 1
            continue
        best = min(cands, key=lambda t: abs(parse_iso_ns(t["ert"]) - parse_iso_ns(g["ert"])))
        err = abs(parse_iso_ns(best["ert"]) - parse_iso_ns(g["ert"])) * 1e-9
        if (key, best["ert"]) not in seen:
            seen.add((key, best["ert"]))
            matched += 1
        worst = max(worst, err)
    return {"sent": len(truth), "decoded": len(got), "matched": matched, "invented": invented,
            "worst_ert_error_s": worst}


def run_demo(*, out: str = "downlink-demo", overwrite: bool = False, seconds: float | None = None,
             ebn0_db: float | None = None, seed: int | None = None, quiet: bool = False) -> int:
    from pipeline.chain import decode
    from pipeline.profile import demo_profile_path, load_profile
    from pipeline.report import CAUTION
    from pipeline.sim import simulate

    profile = load_profile(demo_profile_path())
    with OutputFolder(out, overwrite=overwrite) as tmp:
        rec_dir = tmp / "recording"
        rec_dir.mkdir()
        if not quiet:
            print("simulating the Tamarisk pass at Hollow Ridge (invented demo scenario) ...", file=sys.stderr)
        sim = simulate(profile, rec_dir, seconds=seconds, ebn0_db=ebn0_db, seed=seed)
        if not quiet:
            print(f"  {sim.seconds:g} s, {sim.num_samples} samples, {sim.num_frames} frames, {sim.num_packets} "
                  f"packets, Es/N0 {sim.esn0_db:.2f} dB", file=sys.stderr)
            print("decoding ...", file=sys.stderr)
        summary = decode(sim.meta_path, profile, tmp / "decoded", progress=not quiet)
        cmp = compare_with_truth(Path(sim.truth_path), tmp / "decoded" / "packets.jsonl")
        (tmp / "decoded" / "truth_comparison.json").write_text(json.dumps(cmp, indent=2) + "\n")
    if not quiet:
        print("  " + summary.line(), file=sys.stderr)
        print(f"  {cmp['matched']} of {cmp['sent']} sent packets recovered unchanged, {cmp['invented']} invented, "
              f"worst ERT error {cmp['worst_ert_error_s'] * 1e6:.2f} us", file=sys.stderr)
        print(f"  {CAUTION}", file=sys.stderr)
    print(str(Path(out) / "decoded" / "report.html"))
    return 0 if cmp["invented"] == 0 else 1
