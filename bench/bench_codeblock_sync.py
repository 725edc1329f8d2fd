"""Turbo codeblock sync and the marker Es/N0 estimate: miss and false-lock rates, estimator bias.

Run from the repository root: ``python bench/bench_codeblock_sync.py [--cadus N] [--noise-bits N] [--chain]``.

1. Frame synchronizer (``pipeline.sync.frame_sync_for`` of a turbo profile: soft correlation, default
   thresholds (search: ``soft_search_threshold`` of the marker, 4.98 ... 5.34; lock 3.0), flywheel 3,
   look-back): random codewords behind the rate's marker, BPSK over AWGN at the Es/N0 where the code works
   near threshold (rate 1/2: -3 dB, 1/3: -5 dB, 1/4: -6 dB, 1/6: -8 dB per channel bit).  ``miss`` =
   markers not found where they were sent (their CADU is lost or cut by the flywheel), ``flywheel`` = CADUs
   cut by the flywheel, ``wrong`` = CADUs emitted anywhere else.  False locks: locks acquired on Gaussian
   noise alone, per 10^6 bits.
2. Es/N0 estimate (``MarkerEsn0Estimator``, 32 markers of 64 bits): mean of the dB estimates and of the
   linear ones against the truth, -5 .. +10 dB.  With ``--chain`` also through the whole receiver: the
   simulator's k = 1784 rate-1/2 BPSK recordings (its Es/N0 is the truth) decoded by ``pipeline.decode``,
   the median ``decoder_esn0_db`` of the frames after the first four (the receiver's own loss included).
"""

from __future__ import annotations

import argparse
import math
import tempfile
from pathlib import Path

import numpy as np

from pipeline.fec import TURBO_ASMS
from pipeline.profile import profile_from_dict
from pipeline.sync import MarkerEsn0Estimator, frame_sync_for

POINTS = (("1/2", -3.0), ("1/3", -5.0), ("1/4", -6.0), ("1/6", -8.0))


def turbo_profile(rate: str, k: int = 1784, **sim):
    return profile_from_dict({
        "link": {"modulation": "bpsk", "symbol_rate": 48000.0},
        "coding": {"convolutional": "none", "reed_solomon": 0, "turbo": rate, "turbo_k": k},
        "frames": {"length": k // 8, "fecf": True, "ocf": True, "spacecraft_id": 499},
        "simulate": {"sample_rate_hz": 200000.0, "carrier_offset_hz": 420.0, "clock_offset_ppm": 50.0, **sim}})


def sync_rates(rate: str, esn0_db: float, cadus: int, seed: int = 1) -> dict:
    rng = np.random.default_rng(seed)
    p = turbo_profile(rate)
    n, marker = p.codeblock_bits, np.unpackbits(np.frombuffer(TURBO_ASMS[rate], np.uint8))
    lead = 1001
    blocks = rng.integers(0, 2, (cadus, n), dtype=np.uint8)
    bits = np.concatenate([rng.integers(0, 2, lead, dtype=np.uint8),
                           np.concatenate([np.broadcast_to(marker, (cadus, marker.size)), blocks], axis=1).ravel(),
                           rng.integers(0, 2, 500, dtype=np.uint8)])
    sigma = 1.0 / math.sqrt(2 * 10 ** (esn0_db / 10))
    y = ((1.0 - 2.0 * bits) + sigma * rng.standard_normal(bits.size)).astype(np.float32)
    fs = frame_sync_for(p)
    pos = np.arange(y.size, dtype=np.float64)
    got = []
    for a in range(0, y.size, 1 << 16):
        got += fs.process(y[a:a + (1 << 16)], pos[a:a + (1 << 16)])
    got += fs.flush()
    starts = set(lead + (marker.size + n) * np.arange(cadus))
    found = {c.bit_index for c in got if not c.flywheel}
    return {"cadus": cadus, "miss": len(starts - found) / cadus,
            "flywheel": sum(c.flywheel for c in got), "wrong": sum(c.bit_index not in starts for c in got),
            "locks": fs.stats.locks}


def false_locks(rate: str, bits: int, seed: int = 2) -> dict:
    p = turbo_profile(rate)
    y = np.random.default_rng(seed).standard_normal(bits).astype(np.float32)
    fs = frame_sync_for(p)
    pos = np.arange(bits, dtype=np.float64)
    cadus = 0
    for a in range(0, bits, 1 << 18):
        cadus += len(fs.process(y[a:a + (1 << 18)], pos[a:a + (1 << 18)]))
    cadus += len(fs.flush())
    return {"bits": bits, "locks": fs.stats.locks, "per_1e6_bits": fs.stats.locks / bits * 1e6, "cadus": cadus,
            "candidates": fs.stats.candidates}


def estimator_bias(esn0_db: float, trials: int = 400, seed: int = 3) -> tuple[float, float]:
    rng = np.random.default_rng(seed)
    sign = 1.0 - 2.0 * np.unpackbits(np.frombuffer(TURBO_ASMS["1/2"], np.uint8)).astype(np.float64)
    sigma = 1.0 / math.sqrt(2 * 10 ** (esn0_db / 10))
    db, lin = [], []
    for _ in range(trials):
        est = MarkerEsn0Estimator(window_cadus=32)
        for _ in range(32):
            e = est.update(sign + sigma * rng.standard_normal(64), sign)
        db.append(e.esn0_db)
        lin.append(10 ** (e.esn0_db / 10))
    return float(np.mean(db) - esn0_db), float(10 * math.log10(np.mean(lin)) - esn0_db)


def chain_bias(esn0_db: float) -> float | None:
    from pipeline import decode, simulate

    p = turbo_profile("1/2")
    ebn0 = esn0_db - 10 * math.log10(p.code_rate)
    with tempfile.TemporaryDirectory() as d:
        sim = simulate(p, Path(d) / "s", seconds=3.0, ebn0_db=ebn0, seed=7)
        res = decode(sim.meta_path, p)
        est = [f["decoder_esn0_db"] for f in res.frames_list[4:] if f.get("decoder_esn0_db") is not None]
        return None if not est else float(np.median(est) - sim.esn0_db)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cadus", type=int, default=300)
    ap.add_argument("--noise-bits", type=int, default=4_000_000)
    ap.add_argument("--chain", action="store_true")
    args = ap.parse_args(argv)
    print("frame sync (soft; search threshold per marker, lock 3.0; look-back)")
    print(f"{'rate':<5} {'Es/N0':>6} {'CADUs':>6} {'miss':>8} {'flywheel':>8} {'wrong':>6} {'locks':>5} | "
          f"noise: {'bits':>8} {'locks':>5} {'/1e6 bits':>9} {'CADUs':>6}")
    for rate, esn0 in POINTS:
        r = sync_rates(rate, esn0, args.cadus)
        f = false_locks(rate, args.noise_bits)
        print(f"{rate:<5} {esn0:6.1f} {r['cadus']:6d} {r['miss']:8.4f} {r['flywheel']:8d} {r['wrong']:6d} "
              f"{r['locks']:5d} | {f['bits']:14d} {f['locks']:5d} {f['per_1e6_bits']:9.3f} {f['cadus']:6d}", flush=True)
    print("\nmarker Es/N0 estimate, 32 markers of 64 bits, 400 trials: bias in dB")
    print(f"{'Es/N0':>6} {'mean dB':>8} {'linear':>8}" + (f" {'chain':>8}" if args.chain else ""))
    for esn0 in (-5.0, -2.5, 0.0, 2.5, 5.0, 7.5, 10.0):
        b_db, b_lin = estimator_bias(esn0)
        line = f"{esn0:6.1f} {b_db:+8.3f} {b_lin:+8.3f}"
        if args.chain:
            c = chain_bias(esn0)
            line += f" {c:+8.3f}" if c is not None else "   no lock"
        print(line, flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
