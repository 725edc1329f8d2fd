"""How fast could a symbol tracker be on one core?  Floors of the interpolator and of a batched receiver.

Run: ``python bench/bench_strobe_floor.py [--repeat 5] [--json]``.

Issue 19 asks for the 2 Msym/s QPSK link (5 Msample/s, 2.5 samples per symbol) at 10x real time on one core:
0.10 s of CPU per second of recording for the whole chain.  The rest of the chain takes about 0.076 s of it
(``bench/bench_qpsk_link.py``: ``qpsk_cpu_s`` less ``track_symbols``), so the tracker would have to run at
about 12 ns per symbol; the per-symbol loop (:func:`pipeline.demod._kernels.track_each`) takes 27-28 ns, and
since 2026-12-06 a locked QPSK link goes in batches (:func:`pipeline.demod._kernels.track_locked`, about 20 ns;
``bench/bench_track_replay.py``).  This script measures, on the same kind of matched-filter buffer (complex64
noise; the values do not matter, the memory access and arithmetic do), what parts of a
tracker cost when nothing else runs, with the house's numba flags (``fastmath={"contract"}``), on one
receiver block (32768 samples, in cache as in the demodulator) passed over as often as 3 s of the link takes:

- ``two_strobes``: the cubic Lagrange interpolant (as :func:`pipeline.demod._kernels.cubic_strobe`) at two
  strobes per symbol, 1.25 samples apart, written to an array: no loop, no feedback, every strobe
  independent.  The floor of any Gardner-detector tracker built on this interpolator (numba does not turn the
  four gathered samples per strobe into vector loads).
- ``one_strobe``: the same at one strobe per symbol (a decision-directed timing detector, such as
  Mueller-Mueller, needs no midpoint strobe).
- ``batch_K``: an idealised batched receiver: blocks of ``K`` symbols whose timing and carrier corrections
  are held over the block and applied at its end; per block the strobes are computed first, then per symbol
  the derotation (a polynomial phasor from the block's start phase), the hard QPSK Costas and Gardner errors,
  the moment sums and the outputs (soft values, symbol, position).  It has none of the lock detectors,
  amplitude or bandwidth control, so it is a lower bound for such a design, not a receiver.

Each figure is the kernel's CPU time (``time.thread_time``), best of ``--repeat``, per symbol, and the CPU
seconds it would take per second of the 2 Msym/s link.
"""

from __future__ import annotations

import argparse
import json
import math
import time

import numpy as np
from numba import njit

_FM = {"contract"}
SPS = 2.5  # the QPSK link: 5 Msample/s, 2 Msym/s


@njit(fastmath=_FM)
def _cubic(mf, m, u):
    mp1 = u + np.float32(1.0)
    mm1 = u - np.float32(1.0)
    mm2 = u - np.float32(2.0)
    bc = u * mm1
    ad = mp1 * mm2
    h0 = np.float32(-1.0 / 6.0) * bc * mm2
    h1 = np.float32(0.5) * ad * mm1
    h2 = np.float32(-0.5) * ad * u
    h3 = np.float32(1.0 / 6.0) * mp1 * bc
    a0 = mf[m - 1]
    a1 = mf[m]
    a2 = mf[m + 1]
    a3 = mf[m + 2]
    return (h0 * a0.real + h1 * a1.real + h2 * a2.real + h3 * a3.real,
            h0 * a0.imag + h1 * a1.imag + h2 * a2.imag + h3 * a3.imag)


@njit(fastmath=_FM)
def strobes(mf, t0, step, n, passes, out):
    """``n`` strobes at ``t0 + j step`` into ``out`` (interleaved re, im), ``passes`` times over."""
    for _ in range(passes):
        for j in range(n):
            x = t0 + j * step
            m = int(x)
            re, im = _cubic(mf, m, np.float32(x - m))
            out[2 * j] = re
            out[2 * j + 1] = im


@njit(fastmath=_FM)
def batch(mf, t0, sps, theta0, w, k_sym, n_blocks, passes, out_soft, out_sym, out_pos, sv):
    """The idealised batched receiver (see the module docstring), ``passes`` times over the buffer; returns a
    checksum of the loop's errors."""
    check = 0.0
    half = 0.5 * sps
    for _ in range(passes):
        check += _batch_pass(mf, t0, sps, half, theta0, w, k_sym, n_blocks, out_soft, out_sym, out_pos, sv)
    return check


@njit(fastmath=_FM)
def _batch_pass(mf, t0, sps, half, theta0, w, k_sym, n_blocks, out_soft, out_sym, out_pos, sv):
    t = t0
    theta = theta0
    nout = 0
    check = 0.0
    for _ in range(n_blocks):
        for j in range(2 * k_sym):
            x = t + j * half
            m = int(x)
            re, im = _cubic(mf, m, np.float32(x - m))
            sv[2 * j] = re
            sv[2 * j + 1] = im
        cs = math.cos(theta)
        sn = math.sin(theta)
        ec = 0.0
        et = 0.0
        r2s = 0.0
        r4s = 0.0
        q4 = 0.0
        for k in range(k_sym):
            d = k * w
            d2 = d * d
            cd = 1.0 - d2 * (0.5 - d2 / 24.0)
            sd = d * (1.0 - d2 / 6.0)
            c = cs * cd - sn * sd
            s = sn * cd + cs * sd
            vr = float(sv[4 * k])
            vi = float(sv[4 * k + 1])
            sr = vr * c + vi * s
            sq = vi * c - vr * s
            mr = float(sv[4 * k + 2])
            mi = float(sv[4 * k + 3])
            nr = float(sv[4 * k + 4]) if k + 1 < k_sym else vr
            ni = float(sv[4 * k + 5]) if k + 1 < k_sym else vi
            et += mr * (nr - vr) + mi * (ni - vi)
            ec += (1.0 if sr >= 0.0 else -1.0) * sq - (1.0 if sq >= 0.0 else -1.0) * sr
            r2 = sr * sr + sq * sq
            r2s += r2
            r4s += r2 * r2
            q4 -= sr * sr * sr * sr - 6.0 * sr * sr * sq * sq + sq * sq * sq * sq
            out_soft[2 * (nout + k)] = sr
            out_soft[2 * (nout + k) + 1] = sq
            out_sym[nout + k] = complex(sr, sq)
            out_pos[nout + k] = t + k * sps
        nout += k_sym
        check += ec + et + r2s + r4s + q4
        t += k_sym * sps - 1e-6 * et
        theta += k_sym * w + 1e-6 * ec
    return check


def _best(fn, repeat: int) -> float:
    fn()  # compiled and warm
    best = math.inf
    for _ in range(repeat):
        t0 = time.thread_time()
        fn()
        best = min(best, time.thread_time() - t0)
    return best


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    # one receiver block of matched-filter output (32768 samples, as the demodulator's), in cache, passed over
    # as many times as 3 s of the link would take
    n = 32768
    passes = 458
    rng = np.random.default_rng(1)
    mf = (rng.standard_normal(n) + 1j * rng.standard_normal(n)).astype(np.complex64)
    nsym = int((n - 16) / SPS)
    res: dict[str, float] = {}
    out = np.empty(4 * nsym, np.float32)
    res["two_strobes"] = _best(lambda: strobes(mf, 4.0, 0.5 * SPS, 2 * nsym, passes, out), args.repeat)
    res["two_strobes"] /= nsym * passes
    res["one_strobe"] = _best(lambda: strobes(mf, 4.0, SPS, nsym, passes, out), args.repeat) / (nsym * passes)
    out_soft = np.empty(2 * nsym)
    out_sym = np.empty(nsym, np.complex64)
    out_pos = np.empty(nsym)
    for k in (16, 64):
        nb = nsym // k
        sv = np.empty(4 * k + 4, np.float32)
        secs = _best(lambda k=k, nb=nb, sv=sv: batch(mf, 4.0, SPS, 0.1, 1e-3, k, nb, passes, out_soft, out_sym,
                                                     out_pos, sv), args.repeat)
        res[f"batch_{k}"] = secs / (nb * k * passes)
    figures = {name: {"ns_per_symbol": round(v * 1e9, 2), "cpu_s_per_s_at_2msym": round(v * 2e6, 4)}
               for name, v in res.items()}
    if args.json:
        print(json.dumps(figures))
    else:
        for name, f in figures.items():
            print(f"{name:12s} {f['ns_per_symbol']:7.2f} ns per symbol  "
                  f"{f['cpu_s_per_s_at_2msym']:.4f} s CPU per s of the 2 Msym/s link")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
