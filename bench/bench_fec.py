"""Throughput of pipeline.fec on one core: Viterbi, Reed-Solomon, convolutional encoder, randomizer, CRC.

Run: ``python bench/bench_fec.py [--bits N] [--repeat R] [--viterbi-only]``.  Fixed seeds; every
kernel is called once before timing (JIT compile and cache load stay outside the timed part); each
figure is the best CPU time of R runs.  Rates are information bits out for decoders (Viterbi:
decoded bits; RS: codeblock bits in, the CCSDS convention for decoder throughput).  The Viterbi
rows end with the kernels of one 16384-step block timed alone (quantiser, the portable and the
vector add-compare-select, traceback), which is where the time of a decode goes; the decoder uses
the vector one.

For scale, the Viterbi rows include a portable scalar C decoder written for this benchmark
(int32 metrics, one byte per decision, textbook add-compare-select), compiled with ``gcc -O2``
without machine-specific flags, when a C compiler is on the PATH.
"""

from __future__ import annotations

import argparse
import ctypes
import os
import shutil
import subprocess
import tempfile

import numpy as np

from pipeline.fec import (
    ViterbiDecoder,
    conv_encode,
    crc16,
    pn_sequence,
    rs_decode,
    rs_decode_blocks,
    rs_encode,
    viterbi_decode,
)
from pipeline.fec import _kernels as fec_kernels
from pipeline.tools._turbo import cpu_best_of

C_VITERBI = r"""
#include <stdint.h>
#include <string.h>
/* Portable textbook soft-decision Viterbi, K=7 r=1/2, CCSDS taps (G2 inverted).
   sym: 2 int8 per step (+ = bit 0). Decodes n steps, traceback from the best final state. */
static int parity(unsigned x) { x ^= x >> 4; x ^= x >> 2; x ^= x >> 1; return x & 1; }
void vit_decode(const int8_t *sym, long n, uint8_t *dec, uint8_t *out) {
    int32_t pm[64], nm[64];
    int s1[32], s2[32];
    for (int j = 0; j < 32; j++) {
        unsigned reg = 2u * j;
        s1[j] = 1 - 2 * parity(reg & 0x4F);
        s2[j] = 1 - 2 * (parity(reg & 0x6D) ^ 1);
    }
    memset(pm, 0, sizeof pm);
    for (long t = 0; t < n; t++) {
        int y1 = sym[2 * t], y2 = sym[2 * t + 1];
        uint8_t *d = dec + 64 * t;
        for (int j = 0; j < 32; j++) {
            int m = s1[j] * y1 + s2[j] * y2;
            int32_t a = pm[j], b = pm[j + 32];
            int32_t p0 = a + m, q0 = b - m, p1 = a - m, q1 = b + m;
            d[2 * j] = q0 > p0; nm[2 * j] = q0 > p0 ? q0 : p0;
            d[2 * j + 1] = q1 > p1; nm[2 * j + 1] = q1 > p1 ? q1 : p1;
        }
        memcpy(pm, nm, sizeof pm);
    }
    int st = 0;
    for (int s = 1; s < 64; s++) if (pm[s] > pm[st]) st = s;
    for (long t = n - 1; t >= 0; t--) {
        out[t] = st & 1;
        st = (st >> 1) | (dec[64 * t + st] << 5);
    }
}
"""


best_of = cpu_best_of  # best CPU time of ``repeat`` runs after one warm-up run (pipeline/tools/_turbo.py)


def row(name, amount, unit, seconds, note=""):
    print(f"{name:<60} {amount / seconds / 1e6:10.1f} {unit:<7} {note}")


def c_viterbi():
    cc = shutil.which("gcc") or shutil.which("cc")
    if cc is None:
        return None
    tmp = tempfile.mkdtemp(prefix="bench_fec_")
    src = os.path.join(tmp, "vit.c")
    lib = os.path.join(tmp, "vit.so")
    with open(src, "w") as f:
        f.write(C_VITERBI)
    subprocess.run([cc, "-O2", "-shared", "-fPIC", "-o", lib, src], check=True)
    return ctypes.CDLL(lib)


def bench_viterbi(n_bits, repeat, rng):
    bits = rng.integers(0, 2, n_bits, dtype=np.uint8)
    for rate in ("1/2", "2/3", "3/4", "5/6", "7/8"):
        num, den = map(int, rate.split("/"))
        sym = conv_encode(bits, rate)
        soft = (1 - 2 * sym.astype(np.float32)) + np.float32(0.6) * rng.standard_normal(sym.size, dtype=np.float32)
        t = best_of(lambda soft=soft, rate=rate: viterbi_decode(soft, rate), repeat)
        row(f"viterbi_decode r={rate}, one call, {n_bits / 1e6:g} Mbit", n_bits, "Mbit/s", t)
        if rate == "1/2":
            chunk = 1 << 16

            def chunked(soft=soft, rate=rate, chunk=chunk):
                dec = ViterbiDecoder(rate=rate)
                for a in range(0, soft.size, chunk):
                    dec.process(soft[a:a + chunk])
                dec.flush()

            t = best_of(chunked, repeat)
            row(f"ViterbiDecoder r={rate}, 64 ksym chunks", n_bits, "Mbit/s", t)
            hot = soft[:chunk].copy()
            n_rep = max(1, soft.size // chunk)

            def cached(rate=rate, hot=hot, n_rep=n_rep):
                dec = ViterbiDecoder(rate=rate)
                for _ in range(n_rep):
                    dec.process(hot)
                dec.flush()

            t = best_of(cached, repeat)
            row(f"ViterbiDecoder r={rate}, one 64 ksym chunk in cache", n_rep * chunk // 2, "Mbit/s", t,
                "(stage-to-stage hand-off)")
            lib = c_viterbi()
            if lib is not None:
                q = np.clip(np.rint(soft * 32), -127, 127).astype(np.int8)
                n = n_bits
                dec_c = np.zeros(64 * n, dtype=np.uint8)
                out_c = np.zeros(n, dtype=np.uint8)
                fn = lib.vit_decode
                fn.restype = None
                args = (q.ctypes.data_as(ctypes.c_void_p), ctypes.c_long(n),
                        dec_c.ctypes.data_as(ctypes.c_void_p), out_c.ctypes.data_as(ctypes.c_void_p))
                t = best_of(lambda fn=fn, args=args: fn(*args), repeat)
                row("portable scalar C Viterbi r=1/2 (gcc -O2)", n, "Mbit/s", t, "(baseline, see docstring)")
                agree = np.mean(out_c == viterbi_decode(soft, rate))
                print(f"{'  C baseline agrees with viterbi_decode on':<60} {100 * agree:10.3f} % of bits")
            bench_viterbi_kernels(soft, repeat)


def bench_viterbi_kernels(soft, repeat):
    """The kernels of one r=1/2 block of 16384 steps (inputs in cache), one call each."""
    from pipeline.fec._viterbi import _QUANT_LEVEL, _new_work

    n_steps = 16384
    blk = np.ascontiguousarray(soft[: 2 * n_steps])
    sym = np.empty(2 * n_steps, np.int8)
    fec_kernels.soft_quantize_kernel(blk, _QUANT_LEVEL, sym)
    words = np.empty(n_steps, np.uint64)
    out = np.empty(n_steps, np.uint8)
    reps = 20  # calls per timed run: one block is ~0.1 ms
    t = best_of(lambda: [fec_kernels.soft_quantize_kernel(blk, _QUANT_LEVEL, sym) for _ in range(reps)], repeat)
    row("  soft_quantize_kernel (2 symbols per bit)", reps * n_steps, "Mbit/s", t,
        f"({t / reps / n_steps * 1e9:.2f} ns/bit)")
    t = best_of(lambda: [fec_kernels.viterbi_acs_kernel(sym, n_steps, _new_work(), words) for _ in range(reps)],
                repeat)
    row("  viterbi_acs_kernel (radix-4 add-compare-select)", reps * n_steps, "Mbit/s", t,
        f"({t / reps / n_steps * 1e9:.2f} ns/bit)")
    no_ahead = np.zeros(0, np.float32)
    t = best_of(lambda: [fec_kernels.viterbi_acs_vector_kernel(sym, n_steps, _new_work(), words, no_ahead)
                         for _ in range(reps)], repeat)
    row("  viterbi_acs_vector_kernel (LLVM vector IR; the decoder's)", reps * n_steps, "Mbit/s", t,
        f"({t / reps / n_steps * 1e9:.2f} ns/bit)")
    t = best_of(lambda: [fec_kernels.viterbi_traceback_kernel(words, n_steps, 0, n_steps - 96, out)
                         for _ in range(reps)], repeat)
    row("  viterbi_traceback_kernel", reps * n_steps, "Mbit/s", t, f"({t / reps / n_steps * 1e9:.2f} ns/bit)")


def bench_rs(repeat, rng):
    n_blocks, interleave = 1000, 5
    data = rng.integers(0, 256, (n_blocks, 1115), dtype=np.uint8)
    blocks = np.stack([rs_encode(d, interleave=interleave) for d in data])
    bad = blocks.copy()
    for b in range(n_blocks):
        for c in range(interleave):
            pos = rng.choice(255, 16, replace=False)
            bad[b, pos * interleave + c] ^= rng.integers(1, 256, 16, dtype=np.uint8)
    n_bits = blocks.size * 8
    for label, arr in (("clean", blocks), ("16 errors per codeword", bad)):
        t = best_of(lambda arr=arr: rs_decode_blocks(arr, interleave=interleave), repeat)
        row(f"rs_decode_blocks RS(255,223) I=5, {label}", n_bits, "Mbit/s", t)
        t = best_of(lambda arr=arr: [rs_decode(arr[b], interleave=interleave) for b in range(n_blocks)], repeat)
        row(f"rs_decode (one call per codeblock), {label}", n_bits, "Mbit/s", t,
            f"({t / n_blocks * 1e6:.1f} us per call)")
    t = best_of(lambda: [rs_encode(d, interleave=interleave) for d in data], repeat)
    row("rs_encode RS(255,223) I=5 (one call per frame)", data.size * 8, "Mbit/s", t)
    data8 = rng.integers(0, 256, (n_blocks, 239 * 4), dtype=np.uint8)
    blocks8 = np.stack([rs_encode(d, e=8, interleave=4) for d in data8])
    bad8 = blocks8.copy()
    for b in range(n_blocks):
        for c in range(4):
            pos = rng.choice(255, 8, replace=False)
            bad8[b, pos * 4 + c] ^= rng.integers(1, 256, 8, dtype=np.uint8)
    for label, arr in (("clean", blocks8), ("8 errors per codeword", bad8)):
        t = best_of(lambda arr=arr: rs_decode_blocks(arr, e=8, interleave=4), repeat)
        row(f"rs_decode_blocks RS(255,239) I=4, {label}", arr.size * 8, "Mbit/s", t)


def bench_misc(n_bits, repeat, rng):
    bits = rng.integers(0, 2, n_bits, dtype=np.uint8)
    t = best_of(lambda: conv_encode(bits), repeat)
    row("conv_encode r=1/2", n_bits, "Mbit/s", t)
    frame = rng.integers(0, 256, 1115, dtype=np.uint8)
    pn = pn_sequence(1275)
    t = best_of(lambda: [frame ^ pn[:1115] for _ in range(1000)], repeat)
    row("de-randomize 1115-octet frames (data ^ pn_sequence)", 1000 * 1115 * 8, "Mbit/s", t)
    t = best_of(lambda: [crc16(frame) for _ in range(1000)], repeat)
    row("crc16 of 1115-octet frames (one call per frame)", 1000 * 1115 * 8, "Mbit/s", t)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bits", type=int, default=4_000_000, help="information bits for the Viterbi rows")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--viterbi-only", action="store_true", help="only the Viterbi rows")
    args = ap.parse_args()
    rng = np.random.default_rng(20261201)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"# {os.cpu_count()} CPUs, load average {load:.2f}; best CPU time of {args.repeat} runs")
    print(f"{'configuration':<60} {'rate':>10} {'unit':<7}")
    bench_viterbi(args.bits, args.repeat, rng)
    if args.viterbi_only:
        return
    bench_rs(args.repeat, rng)
    bench_misc(args.bits, args.repeat, rng)


if __name__ == "__main__":
    main()
