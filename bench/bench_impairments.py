"""Real-pass impairments: what each costs, link by link (packets and codewords lost against the clean pass).

Run: ``python bench/bench_impairments.py [--links demo,qpsk,ar4ja-qpsk,turbo-qpsk,turbo-pcm-pm] [--seed 7]``.

For each link a pass is simulated once (``pipeline.simulate``, the seed given, the link's own length), decoded
clean, then decoded again with one impairment applied to its samples from the middle of the recording on (a
time inside a processing block), through the canonical decode path (``pipeline.tools._bench._decode_once``:
segments into one back end, one process).  The impairments are what recordings from real passes carry:

- ``level +20 dB`` / ``level -10 dB``: the samples (signal and noise) scaled, a gain switched or the signal out
  of a fade;
- ``carrier +2 kHz``: the carrier's frequency steps (a transponder switching between coherent and one-way, a
  receiver retuned), continuous phase;
- ``phase 90 deg``: the carrier's phase jumps a quarter turn (downstream a cycle slip of the loop looks the same);
- ``drop 1234`` / ``zeros 5000``: samples lost by the recorder, or a gap it filled with zeros;
- ``tone -20 dB`` / ``tone -6 dB``: a CW tone 20 or 6 dB under the samples' power (signal and noise: at low
  Es/N0 the noise's), 0.6 symbol rates from the carrier, inside the signal's band, over the whole recording
  (a receiver spur, an interferer); ``tone -6 dB mid``: the second switched on in the middle of the pass;
- ``IQ 1 dB 5 deg`` / ``IQ 3 dB 15 deg``: I/Q gain and phase imbalance of the front end (an image 25 or 13 dB
  down), over the whole recording;
- ``clip 1.5 rms`` / ``clip 1 rms``: each rail clipped at 1.5 times or at its rms (an ADC overdriven: 13 % or 32 %
  of the values clipped), over the whole recording.

Printed per link and impairment: packets delivered (the clean pass's in the header), codewords or frames that
failed, frames found, and the packets lost against the clean pass.  Figures depend on the seed; the decoder's
own tests pin what each case must not cost (tests/test_demod_performance.py, tests/test_sync_branch.py,
tests/test_ldpc_end_to_end.py, tests/test_residual_demod.py, tests/test_acquisition_tones.py).
"""

from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from pipeline.profile import demo_profile_path, load_profile, profile_from_dict
from pipeline.recording import open_recording
from pipeline.sim import simulate
from pipeline.tools._bench import QPSK_LINK, _decode_once

_TRAFFIC = [{"apid": 200, "length": 200, "rate_hz": 100.0, "vcid": 1}]


def _soft_link(name: str, modulation: str, coding: dict, length: int, seconds: float, ebn0_db: float,
               symbol_rate: float = 240e3, sample_rate: float = 1e6, **link) -> dict:
    return {"name": name,
            "link": {"modulation": modulation, "symbol_rate": symbol_rate, "line_code": "nrz-l",
                     **({"pulse": "rrc", "rolloff": 0.5} if modulation != "pcm-pm" else {"pulse": "rect"}), **link},
            "coding": {"convolutional": "none", "reed_solomon": 0, **coding},
            "frames": {"kind": "tm", "length": length, "fecf": True, "ocf": False, "spacecraft_id": 77},
            "simulate": {"sample_rate_hz": sample_rate, "seconds": seconds, "ebn0_db": ebn0_db,
                         "carrier_offset_hz": 3e3 if modulation != "pcm-pm" else 1200.0, "clock_offset_ppm": 10.0,
                         "timing_offset": 0.3, "traffic": _TRAFFIC}}


def _links() -> dict:
    """Name -> (profile, seconds): the demo link, the 2 Msym/s QPSK link of ``downlink bench``, and soft-decoded
    links near their codes' thresholds."""
    return {
        "demo": (load_profile(demo_profile_path()), 8.0),
        "qpsk": (profile_from_dict(QPSK_LINK), 2.0),
        "ar4ja-qpsk": (profile_from_dict(_soft_link(
            "ar4ja-qpsk", "qpsk", {"ldpc": "ar4ja", "ldpc_rate": "1/2", "ldpc_k": 1024}, 128, 6.0, 2.5)), 6.0),
        "turbo-qpsk": (profile_from_dict(_soft_link(
            "turbo-qpsk", "qpsk", {"turbo": "1/2", "turbo_k": 1784}, 223, 6.0, 1.5)), 6.0),
        "turbo-pcm-pm": (profile_from_dict(_soft_link(
            "turbo-pcm-pm", "pcm-pm", {"turbo": "1/2", "turbo_k": 1784}, 223, 12.0, 1.5, symbol_rate=8000.0,
            sample_rate=200e3, modulation_index=1.2)), 12.0),
    }


def _impairments(x: np.ndarray, fs: float, rs: float) -> dict:
    """Name -> impaired copy of ``x`` (complex64)."""
    n, mid = x.size, x.size // 2
    t = np.arange(n - mid) / fs
    out = {}
    y = x.copy()
    y[mid:] *= np.float32(10.0)
    out["level +20 dB"] = y
    y = x.copy()
    y[mid:] *= np.float32(10.0 ** -0.5)
    out["level -10 dB"] = y
    y = x.copy()
    y[mid:] *= np.exp(2j * np.pi * 2000.0 * t).astype(np.complex64)
    out["carrier +2 kHz"] = y
    y = x.copy()
    y[mid:] *= np.complex64(1j)
    out["phase 90 deg"] = y
    out["drop 1234"] = np.concatenate([x[:mid], x[mid + 1234:]])
    out["zeros 5000"] = np.concatenate([x[:mid], np.zeros(5000, np.complex64), x[mid:]])
    p = float(np.mean(np.abs(x[: min(n, 1 << 20)]) ** 2))
    f_tone = min(0.6 * rs, 0.45 * fs)
    for db in (-20.0, -6.0):  # under the samples' power (signal and noise)
        tone = np.sqrt(p * 10.0 ** (db / 10.0)) * np.exp(2j * np.pi * f_tone * np.arange(n) / fs)
        out[f"tone {db:g} dB"] = (x + tone).astype(np.complex64)
    tone[:mid] = 0.0  # the -6 dB tone switched on in the middle of the pass
    out["tone -6 dB mid"] = (x + tone).astype(np.complex64)
    for gdb, deg in ((1.0, 5.0), (3.0, 15.0)):
        g, ph = 10.0 ** (gdb / 20.0), np.deg2rad(deg)
        out[f"IQ {gdb:g} dB {deg:g} deg"] = (x.real + 1j * g * (np.sin(ph) * x.real + np.cos(ph) * x.imag)).astype(
            np.complex64)
    for c in (1.5, 1.0):
        r = np.float32(c * np.sqrt(p / 2.0))
        out[f"clip {c:g} rms"] = (np.clip(x.real, -r, r) + 1j * np.clip(x.imag, -r, r)).astype(np.complex64)
    return out


def _decode(meta: Path, profile, folder: Path) -> tuple[int, int, int]:
    """Packets, frames found, frames or codewords that failed."""
    rec = open_recording(meta, verify_checksum=False)
    _, _, back = _decode_once(rec, profile, folder, 1)
    failed = sum(v for k, v in back.status_counts.items() if k not in ("ok", "idle"))
    return back.packet_count, back.frame_count, failed


def _write(folder: Path, sim, meta: dict, y: np.ndarray) -> Path:
    folder.mkdir()
    y.astype(np.complex64).tofile(folder / Path(sim.data_path).name)
    m = json.loads(json.dumps(meta))
    m["global"].pop("core:sha512", None)  # the samples changed
    m["global"].pop("downlink:sample_count", None)  # and their number, for some
    path = folder / Path(sim.meta_path).name
    path.write_text(json.dumps(m))
    return path


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--links", default="demo,qpsk,ar4ja-qpsk,turbo-qpsk,turbo-pcm-pm")
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    links = _links()
    names = [s.strip() for s in args.links.split(",") if s.strip()]
    unknown = [s for s in names if s not in links]
    if unknown:
        raise SystemExit(f"unknown link(s) {', '.join(unknown)}; known: {', '.join(links)}")
    stamp = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    print(f"bench_impairments: seed {args.seed}, load {os.getloadavg()[0]:.2f}, {stamp}")
    with tempfile.TemporaryDirectory(prefix="bench-impair-") as d:
        tmp = Path(d)
        for name in names:
            profile, seconds = links[name]
            sim = simulate(profile, tmp / name, seed=args.seed, seconds=seconds)
            meta = json.loads(Path(sim.meta_path).read_text())
            x = np.fromfile(sim.data_path, dtype=np.complex64)
            fs = profile.simulate.sample_rate_hz
            clean = _decode(Path(sim.meta_path), profile, tmp / f"{name}_clean")
            print(f"\n{name} ({seconds:g} s; clean: {clean[0]} packets, {clean[1]} frames, {clean[2]} failed)")
            print(f"  {'impairment':16s} {'packets':>8s} {'frames':>7s} {'failed':>7s} {'lost':>5s}")
            for k, (label, y) in enumerate(_impairments(x, fs, profile.link.symbol_rate_baud).items()):
                meta_path = _write(tmp / f"{name}_{k}", sim, meta, y)
                got = _decode(meta_path, profile, tmp / f"{name}_{k}_out")
                print(f"  {label:16s} {got[0]:8d} {got[1]:7d} {got[2]:7d} {clean[0] - got[0]:5d}", flush=True)


if __name__ == "__main__":
    main()
