"""Implementation loss of the suppressed-carrier receiver against ideal coherent detection, lock and false lock.

Run: ``python bench/bench_low_esn0.py [--symbols N] [--esn0 -3,-2,-1,0,2,4] [--mod bpsk,qpsk] [--noise-seconds S]``.

For each modulation and Es/N0 (per modulation symbol) one recording is made by the test transmitter
(``tests/demod_signals.py``, which shares no code with the receiver): 240 ksym/s, RRC 0.5, 1 Msample/s,
carrier 2.4 kHz off with a -40 Hz/s Doppler rate, the symbol clock 50 ppm off, timing offset 0.37.
Two receivers see the same samples:

- the receiver (:class:`pipeline.demod.Demodulator`, default ``[receiver]`` settings), acquisition and
  tracking included;
- ideal coherent detection: the carrier phase and the symbol times known, the matched filter evaluated
  at each symbol's true peak (direct sum of the closed-form RRC pulse), decisions on the sign.

Symbol errors are counted after the first 4000 symbols (pull-in), with the carrier's phase ambiguity
resolved per window of 2000 symbols (what a frame synchronizer's marker does); a window whose
ambiguity differs from the one before is a cycle slip (counted).  Each symbol error rate is turned
into the Es/N0 at which theory gives it (BPSK ``Q(sqrt(2 Es/N0))``, QPSK
``2 Q(sqrt(Es/N0)) - Q^2``; Proakis, *Digital Communications*, 4th ed., eqs. 5.2-5, 5.2-59); the
implementation loss is the difference between the two receivers' values (same noise, so the
statistical spread largely cancels), and beside it the loss against theory; the loss and the slips are
also given over the symbols from the first lock declaration on (``loss lk``, ``slips lk``: the tracking
alone, the acquisition time left out).  Lock: the fraction of
symbols after the pull-in flagged with carrier lock, and the symbol at which lock was first declared.

False lock: the receiver on complex white Gaussian noise alone (``--noise-seconds`` at 1 Msample/s,
several seeds); reported are the fraction of symbols flagged locked and the number of lock
declarations per hour of noise.

Figures go to stdout as a table (``--json`` for one object per line).  Fixed seeds.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))

from demod_signals import Chunk, esn0_from_ser, modulate, rrc_closed_form  # noqa: E402

from pipeline.demod import Demodulator  # noqa: E402
from pipeline.profile import LinkSection, ReceiverSection  # noqa: E402

FS = 1e6
RS = 240e3
SKIP = 4000
WINDOW = 2000
CARRIER_HZ = 2400.0
RATE_HZ_PER_S = -40.0
PHASE_RAD = 0.8


def demodulate(samples: np.ndarray, mod: str, receiver: ReceiverSection, chunk: int = 1 << 18):
    """Soft bits, positions, lock flags per channel bit and the track points, fed in chunks."""
    d = Demodulator(link=LinkSection(modulation=mod), receiver=receiver, sample_rate_hz=FS)
    outs = [d.process(Chunk(samples[a:a + chunk], a)) for a in range(0, samples.size, chunk)] + [d.flush()]
    soft = np.concatenate([o.soft for o in outs])
    pos = np.concatenate([o.position for o in outs])
    locked = np.concatenate([o.locked for o in outs])
    return soft, pos, locked, [t for o in outs for t in o.track]


def genie_symbols(samples: np.ndarray, wave, sps: float) -> np.ndarray:
    """Matched filter at each symbol's true peak, carrier removed with its true phase (complex, one per symbol)."""
    n = np.arange(samples.size)
    t = n / FS
    x = samples.astype(np.complex128) * np.exp(-1j * (2 * math.pi * (CARRIER_HZ * t + 0.5 * RATE_HZ_PER_S * t * t)
                                                      + PHASE_RAD))
    c = wave.peak_position
    half = int(math.ceil(4 * sps)) + 1
    offs = np.arange(-half, half + 1)
    out = np.empty(c.size, dtype=np.complex128)
    for a in range(0, c.size, 20000):
        cc = c[a:a + 20000]
        idx = np.floor(cc).astype(np.int64)[:, None] + offs[None, :]
        ok = (idx >= 0) & (idx < samples.size)
        g = rrc_closed_form((idx - cc[:, None]) / sps, 0.5) * ok
        out[a:a + 20000] = np.sum(x[np.clip(idx, 0, samples.size - 1)] * g, axis=1)
    return out


def hard_bits(z: np.ndarray, mod: str) -> np.ndarray:
    """Decisions (bit 1 where negative): BPSK the real part; QPSK I then Q per symbol."""
    if mod == "bpsk":
        return (z.real < 0).astype(np.uint8)[:, None]
    return np.stack([(z.real < 0), (z.imag < 0)], axis=1).astype(np.uint8)


def windowed_errors(rx: np.ndarray, tx: np.ndarray, mod: str) -> tuple[int, int, int]:
    """Symbol errors with the ambiguity resolved per window, the symbols compared and the cycle slips.

    ``rx`` and ``tx`` are (symbols, bits) hard decisions.  BPSK: sign; QPSK: the 4 rotations.
    """
    errs, n, slips, prev = 0, 0, 0, None
    for a in range(0, rx.shape[0] - WINDOW + 1, WINDOW):
        r = rx[a:a + WINDOW]
        t = tx[a:a + WINDOW]
        best, best_h = None, None
        if mod == "bpsk":
            hyps = [r, 1 - r]
        else:
            # rotations by 0, 90, 180, 270 degrees of (I, Q) as bits: (i, q) -> (q', i) ...
            i, q = r[:, 0], r[:, 1]
            hyps = [np.stack(h, axis=1) for h in ((i, q), (q, 1 - i), (1 - i, 1 - q), (1 - q, i))]
        for h_idx, h in enumerate(hyps):
            e = int(np.count_nonzero(np.any(h != t, axis=1)))
            if best is None or e < best:
                best, best_h = e, h_idx
        if prev is not None and best_h != prev:
            slips += 1
        prev = best_h
        errs += best
        n += WINDOW
    return errs, n, slips


def measure_point(mod: str, esn0_db: float, nsym: int, seed: int, receiver: ReceiverSection) -> dict:
    rng = np.random.default_rng(seed)
    w = modulate(nsym, modulation=mod, esn0_db=esn0_db, carrier_offset_hz=CARRIER_HZ,
                 doppler_rate_hz_per_s=RATE_HZ_PER_S, phase_rad=PHASE_RAD, timing_offset=0.37,
                 clock_offset_ppm=50.0, rng=rng)
    sps = FS / RS * (1 + 50e-6)
    t0 = time.perf_counter()
    soft, pos, locked, track = demodulate(w.samples, mod, receiver)
    dt = time.perf_counter() - t0
    bps = 1 if mod == "bpsk" else 2
    spos = pos[::bps]
    k = np.rint((spos - w.peak_position[0]) / sps).astype(np.int64)
    ok = (k >= SKIP) & (k < nsym)
    k_ok = k[ok]
    if mod == "bpsk":
        z = soft[ok].astype(np.float64) + 0j
    else:
        z = soft[0::2][ok].astype(np.float64) + 1j * soft[1::2][ok]
    tx = np.stack([w.i_bits, w.q_bits], axis=1)[:, :bps]
    e_rx, n_rx, slips = windowed_errors(hard_bits(z, mod), tx[k_ok], mod)
    g = genie_symbols(w.samples, w, sps)[SKIP:]
    e_g, n_g, _ = windowed_errors(hard_bits(g, mod), tx[SKIP:], mod)
    ser_rx, ser_g = e_rx / max(n_rx, 1), e_g / max(n_g, 1)
    eq_rx, eq_g = esn0_from_ser(ser_rx, mod), esn0_from_ser(ser_g, mod)
    lock_sym = locked[::bps]
    first = int(np.argmax(lock_sym)) if lock_sym.any() else -1
    after = lock_sym[ok]
    # the same from the first lock declaration on (the tracking alone, acquisition time left out)
    loss_l, slips_l, n_l = float("nan"), -1, 0
    if first >= 0:
        k_first = max(SKIP, int(k[first]))
        sel = k_ok >= k_first
        e_l, n_l, slips_l = windowed_errors(hard_bits(z[sel], mod), tx[k_ok[sel]], mod)
        e_lg, n_lg, _ = windowed_errors(hard_bits(g[k_first - SKIP:], mod), tx[k_first:], mod)
        if n_l and n_lg:
            loss_l = esn0_from_ser(e_lg / n_lg, mod) - esn0_from_ser(e_l / n_l, mod)
    return {"modulation": mod, "esn0_db": esn0_db, "symbols": int(n_rx), "ser_receiver": ser_rx, "ser_ideal": ser_g,
            "loss_db": eq_g - eq_rx, "loss_vs_theory_db": esn0_db - eq_rx, "ideal_vs_theory_db": esn0_db - eq_g,
            "locked_fraction": float(after.mean()) if after.size else 0.0, "first_lock_symbol": first,
            "cycle_slips": slips, "loss_after_lock_db": loss_l, "slips_after_lock": slips_l,
            "symbols_after_lock": int(n_l), "symbols_lost": int(nsym - SKIP - n_rx) if n_rx else nsym,
            "esn0_estimate_db": float(np.nanmedian([t.esn0_db for t in track[2:-1]])) if len(track) > 3
            else float("nan"),
            "msps": w.samples.size / dt / 1e6}


def false_lock(mod: str, seconds: float, seeds: int, receiver: ReceiverSection) -> dict:
    locked_sym, total_sym, declarations = 0, 0, 0
    for s in range(seeds):
        rng = np.random.default_rng(1000 + s)
        n = int(seconds * FS)
        x = ((rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(0.5)).astype(np.complex64)
        _, _, locked, _ = demodulate(x, mod, receiver)
        bps = 1 if mod == "bpsk" else 2
        lk = locked[::bps]
        locked_sym += int(lk.sum())
        total_sym += lk.size
        declarations += int(np.count_nonzero(lk[1:] & ~lk[:-1]) + (1 if lk.size and lk[0] else 0))
    hours = seconds * seeds / 3600.0
    return {"modulation": mod, "noise_seconds": seconds * seeds, "locked_fraction": locked_sym / max(total_sym, 1),
            "lock_declarations": declarations, "declarations_per_hour": declarations / hours}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--symbols", type=int, default=240_000, help="symbols per point (1 s of signal)")
    ap.add_argument("--esn0", default="-3,-2,-1,0,2,4", help="Es/N0 points, dB per modulation symbol")
    ap.add_argument("--mod", default="bpsk,qpsk")
    ap.add_argument("--noise-seconds", type=float, default=4.0, help="noise per seed for the false-lock figure")
    ap.add_argument("--noise-seeds", type=int, default=3)
    ap.add_argument("--seed", type=int, default=16)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    rx = ReceiverSection()
    rows = []
    for mod in args.mod.split(","):
        for i, e in enumerate(float(v) for v in args.esn0.split(",")):
            rows.append(measure_point(mod, e, args.symbols, args.seed + 7 * i, rx))
            r = rows[-1]
            if args.json:
                print(json.dumps(r))
            else:
                if len(rows) == 1:
                    print(f"{'mod':<5} {'Es/N0':>6} {'symbols':>8} {'SER rx':>9} {'SER ideal':>9} {'loss dB':>8} "
                          f"{'vs theory':>9} {'locked':>7} {'1st lock':>8} {'slips':>5} {'est dB':>7} {'Msps':>6} "
                          f"{'loss lk':>7} {'slips lk':>8} {'sym lk':>7}")
                print(f"{mod:<5} {e:6.1f} {r['symbols']:8d} {r['ser_receiver']:9.5f} {r['ser_ideal']:9.5f} "
                      f"{r['loss_db']:8.3f} {r['loss_vs_theory_db']:9.3f} {r['locked_fraction']:7.4f} "
                      f"{r['first_lock_symbol']:8d} {r['cycle_slips']:5d} {r['esn0_estimate_db']:7.2f} "
                      f"{r['msps']:6.1f} {r['loss_after_lock_db']:7.3f} {r['slips_after_lock']:8d} "
                      f"{r['symbols_after_lock']:7d}", flush=True)
    if args.noise_seconds > 0:
        for mod in args.mod.split(","):
            f = false_lock(mod, args.noise_seconds, args.noise_seeds, rx)
            if args.json:
                print(json.dumps(f))
            else:
                print(f"false lock, {mod}: {f['noise_seconds']:g} s of noise, locked fraction "
                      f"{f['locked_fraction']:.2e}, {f['lock_declarations']} declarations "
                      f"({f['declarations_per_hour']:.1f} per hour)", flush=True)


if __name__ == "__main__":
    main()
