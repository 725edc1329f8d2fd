"""Frame and bit error rates of the LDPC decoder on AWGN, code alone, beside the normal approximation.

For each point: random information (fixed seed), the project's encoder, BPSK, white Gaussian noise
at the stated Eb/N0 (per information bit, ``Es/N0 = Eb/N0 + 10 log10(k/n)``), unquantized
log-likelihood ratios ``2 y / sigma^2`` into :class:`pipeline.fec.ldpc.LdpcDecoder`.  A frame error
is a codeword whose decoded frame differs from the sent one (failed or not); ``undetected`` counts
the wrong ones whose syndrome was zero.  Intervals are two-sided 95 % Clopper-Pearson.  Each point
runs until 50 frame errors or ``--codewords`` codewords (at least 3000), in batches.

The last columns compare with the Polyanskiy-Poor-Verdu normal approximation for the same (n, k)
(:func:`pipeline.tools._theory.normal_approximation_ebn0_db`): the Eb/N0 it needs for FER 1e-3, and
how far the measured point lies to its right.

Run from the repository root (one core; ``--workers 2`` only when nobody else needs the second)::

    python bench/sweep_ldpc.py                       # the four issue-15 target points
    python bench/sweep_ldpc.py --points c2:3.7,c2:3.8 --variant offset --correction 0.5
"""

from __future__ import annotations

import argparse
import math
import multiprocessing
import time

import numpy as np

from pipeline.fec.ldpc import LdpcDecoder, ldpc_code, ldpc_encode_bits
from pipeline.tools._theory import clopper_pearson, normal_approximation_ebn0_db

#: Issue 15 targets (code label, Eb/N0 dB): FER at most 1e-3 at each.
TARGETS = ("c2:3.9", "ar4ja-1/2-1024:1.8", "ar4ja-1/2-16384:1.2", "ar4ja-4/5-1024:3.6")
BATCH = 256


def parse_code(label: str):
    """``c2`` or ``ar4ja-<rate>-<k>`` -> LdpcCode."""
    if label == "c2":
        return ldpc_code("c2")
    fam, rate, k = label.split("-")
    return ldpc_code(fam, rate=rate, k=int(k))


def awgn_batch(code, ebn0_db: float, n_cw: int, rng) -> tuple[np.ndarray, np.ndarray]:
    """(information bits, LLRs of the sent codewords) for ``n_cw`` random codewords."""
    info = rng.integers(0, 2, (n_cw, code.k), dtype=np.uint8)
    word = ldpc_encode_bits(code, info)
    esn0 = 10 ** (ebn0_db / 10) * code.k / code.n
    sigma = math.sqrt(1 / (2 * esn0))
    y = 1.0 - 2.0 * word + sigma * rng.standard_normal(word.shape)
    return info, (2.0 * y / sigma**2).astype(np.float32)


def run_point(label: str, ebn0_db: float, *, codewords: int, errors: int = 50, seed: int = 15,
              decoder: dict | None = None, llr_factor: float = 1.0) -> dict:
    """Simulate one point; returns a dict of counts, rates, intervals and the normal-approximation distance.

    ``llr_factor`` multiplies the LLRs handed to the decoder (a mis-scaled soft input, as from an Es/N0
    estimate off by ``10 log10(llr_factor)`` dB)."""
    code = parse_code(label)
    dec = LdpcDecoder(code=code, **(decoder or {}))
    rng = np.random.default_rng([seed, int(round(ebn0_db * 1000)), code.n, code.k])
    n = fe = be = und = fail = iters = 0
    t0 = time.process_time()
    while n < codewords and fe < errors:
        m = min(BATCH, codewords - n)
        info, llr = awgn_batch(code, ebn0_db, m, rng)
        res = dec.decode(llr if llr_factor == 1.0 else (llr * llr_factor).astype(np.float32))
        sent = np.packbits(info, axis=1)
        wrong_bits = np.unpackbits(res.frames ^ sent, axis=1).sum(axis=1)
        wrong = wrong_bits > 0
        fe += int(wrong.sum())
        be += int(wrong_bits.sum())
        und += int((wrong & res.ok).sum())
        fail += int((~res.ok).sum())
        iters += int(res.iterations.sum())
        n += m
    na = normal_approximation_ebn0_db(code.n, code.k, 1e-3)
    return {
        "code": code.name, "ebn0_db": ebn0_db, "codewords": n, "frame_errors": fe, "fer": fe / n,
        "fer_ci95": clopper_pearson(fe, n), "bit_errors": be, "ber": be / (n * code.k),
        "ber_ci95": clopper_pearson(be, n * code.k), "failed": fail, "undetected": und,
        "mean_iterations": iters / n, "normal_approx_db_at_1e-3": na, "distance_db": ebn0_db - na,
        "cpu_s": time.process_time() - t0,
        "decoder": f"{dec.variant} {dec.correction:g}, scale {dec.llr_scale:g}, clip {dec.llr_clip}, "
                   f"max {dec.max_iterations} it",
    }


def _run(args):
    label, eb, kw = args
    return run_point(label, eb, **kw)


def measure(points=TARGETS, *, codewords: int = 10000, errors: int = 50, seed: int = 15, workers: int = 1,
            decoder: dict | None = None, llr_factor: float = 1.0) -> list[dict]:
    """Run every ``"label:ebn0"`` point; ``workers`` > 1 runs points in parallel processes."""
    if codewords < 3000:
        raise ValueError(f"Argument 'codewords' must be >= 3000, not {codewords}.")
    jobs = []
    for p in points:
        label, eb = p.rsplit(":", 1)
        jobs.append((label, float(eb), dict(codewords=codewords, errors=errors, seed=seed, decoder=decoder,
                                                llr_factor=llr_factor)))
    if workers > 1:
        with multiprocessing.get_context("spawn").Pool(workers) as pool:
            return pool.map(_run, jobs)
    return [_run(j) for j in jobs]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", default=",".join(TARGETS), help="comma list of code:ebn0 (code c2 or ar4ja-R-K)")
    ap.add_argument("--codewords", type=int, default=10000, help="codewords at most per point (>= 3000)")
    ap.add_argument("--errors", type=int, default=50, help="stop a point after this many frame errors")
    ap.add_argument("--seed", type=int, default=15)
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--variant", default="normalized")
    ap.add_argument("--correction", type=float, default=None)
    ap.add_argument("--max-iterations", type=int, default=50)
    ap.add_argument("--llr-scale", type=float, default=None)
    ap.add_argument("--llr-clip", type=int, default=None)
    ap.add_argument("--llr-factor", type=float, default=1.0, help="multiply the LLRs (soft-input scale error)")
    a = ap.parse_args()
    dec = {"variant": a.variant, "correction": a.correction, "max_iterations": a.max_iterations}
    if a.llr_scale is not None:
        dec["llr_scale"] = a.llr_scale
    if a.llr_clip is not None:
        dec["llr_clip"] = a.llr_clip
    rows = measure(a.points.split(","), codewords=a.codewords, errors=a.errors, seed=a.seed, workers=a.workers,
                   decoder=dec, llr_factor=a.llr_factor)
    print(f"decoder: {rows[0]['decoder']}; LLRs x {a.llr_factor:g}; BER intervals count bits as independent trials "
          "(errors come in frames, so they are narrower than the truth)")
    print(f"{'code':<26} {'Eb/N0':>6} {'codewords':>9} {'FER (95% interval)':>30} {'BER (95% interval)':>32} "
          f"{'undet':>5} {'iter':>5} {'NA 1e-3':>8} {'dist':>6} {'cpu s':>6}")
    for r in rows:
        lo, hi = r["fer_ci95"]
        blo, bhi = r["ber_ci95"]
        print(f"{r['code']:<26} {r['ebn0_db']:>6.2f} {r['codewords']:>9} "
              f"{r['fer']:>9.2e} [{lo:.1e}, {hi:.1e}] {r['frame_errors']:>3}e "
              f"{r['ber']:>9.2e} [{blo:.1e}, {bhi:.1e}] "
              f"{r['undetected']:>5} {r['mean_iterations']:>5.1f} {r['normal_approx_db_at_1e-3']:>8.3f} "
              f"{r['distance_db']:>+6.2f} {r['cpu_s']:>6.1f}")


if __name__ == "__main__":
    main()
