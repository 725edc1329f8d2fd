"""The CCSDS turbo codes alone on BPSK/AWGN: test frames, channel LLRs, decoder speed and error counts.

One home for what ``downlink bench`` (key ``turbo_r12_k8920_mbps``), ``downlink sweep`` (code stage of a
turbo profile), ``bench/bench_turbo.py`` and ``bench/sweep_turbo.py`` measure.  Eb/N0 is per information
bit with the 4 tail bits counted in the rate (``Es/N0 = Eb/N0 k / n``), as in REFERENCES.md 13.5.
"""

from __future__ import annotations

import math
import time

import numpy as np

__all__ = ["frames_with_fecf", "awgn_llr", "cpu_best_of", "turbo_speed", "turbo_code_errors"]


def frames_with_fecf(rng: np.random.Generator, n: int, k: int) -> np.ndarray:
    """``n`` random transfer frames of k/8 octets whose last two octets are their FECF (uint8, (n, k/8)).

    Examples
    --------
    >>> from pipeline.fec import crc16
    >>> f = frames_with_fecf(np.random.default_rng(1), 2, 1784)
    >>> f.shape, crc16(f[0].tobytes())
    ((2, 223), 0)
    """
    from pipeline.fec import crc16

    frames = rng.integers(0, 256, (n, k // 8), dtype=np.uint8)
    for f in frames:
        f[-2:] = np.frombuffer(crc16(f[:-2].tobytes()).to_bytes(2, "big"), dtype=np.uint8)
    return frames


def awgn_llr(rng: np.random.Generator, bits: np.ndarray, ebn0_db: float, code_rate: float) -> np.ndarray:
    """Channel LLRs (float32, nats, + = bit 0) of ``bits`` sent as BPSK +-1 over AWGN at ``ebn0_db``.

    Notes
    -----
    ``Es/N0 = code_rate Eb/N0``; noise variance per dimension ``sigma^2 = 1 / (2 Es/N0)``;
    ``L = 2 y / sigma^2`` (the exact LLR: the decoder sees a perfectly scaled input).

    Examples
    --------
    >>> llr = awgn_llr(np.random.default_rng(1), np.zeros(4, np.uint8), 20.0, 0.5)
    >>> bool((llr > 0).all())
    True
    """
    esn0 = code_rate * 10.0 ** (ebn0_db / 10.0)
    sigma = math.sqrt(1.0 / (2.0 * esn0))
    y = (1.0 - 2.0 * bits.astype(np.float32)) + np.float32(sigma) * rng.standard_normal(bits.shape, dtype=np.float32)
    return (np.float32(2.0 / sigma**2) * y).astype(np.float32)


def cpu_best_of(fn, repeat: int) -> float:
    """Best CPU time (``time.process_time``) of ``repeat`` runs of ``fn()`` after one untimed warm-up run.

    CPU time rather than wall time: on a shared machine it leaves out the time the process waited
    for a core, which is what "throughput on one core" means.
    """
    fn()
    best = math.inf
    for _ in range(repeat):
        t0 = time.process_time()
        fn()
        best = min(best, time.process_time() - t0)
    return best


def turbo_speed(*, frames: int = 128, repeat: int = 3, scalar_frames: int = 8, ebn0_db: float = 1.0,
                seed: int = 20261216, maxlog: bool = True) -> dict:
    """Turbo decoder speed at rate 1/2, k = 8920: the default decoder beside the scalar kernel, same data.

    Parameters
    ----------
    frames : int
        Codewords per timed run of the vector kernels.
    repeat : int
        Timed runs; the best CPU time counts (:func:`cpu_best_of`).
    scalar_frames : int
        Codewords for the scalar kernel (one frame at a time; it gives the same decisions).
    ebn0_db : float
        Eb/N0 of the channel (1.0 dB: issue 16's operating point).
    seed : int
    maxlog : bool
        Also measure the max-log-MAP vector kernel.

    Returns
    -------
    dict
        ``turbo_r12_k8920_mbps`` (information bits per second / 1e6, log-MAP, 32-lane vector kernel, at
        most 10 iterations, FECF stopping check), ``..._scalar_mbps``, ``..._maxlog_mbps``, each with its
        ``_mean_iterations`` and ``_frame_errors``, and ``turbo_vector_over_scalar_per_iteration``.
    """
    from pipeline.fec.turbo import TurboCode, TurboDecoder, turbo_encode

    rng = np.random.default_rng(seed)
    code = TurboCode(rate="1/2", k=8920)
    info = frames_with_fecf(rng, frames, code.k)
    llr = awgn_llr(rng, turbo_encode(info, rate=code.rate), ebn0_db, code.code_rate)
    res: dict = {"turbo_ebn0_db": ebn0_db, "turbo_frames": frames}
    runs = [("turbo_r12_k8920", dict(algorithm="log-map", kernel="vector"), frames)]
    if maxlog:
        runs.append(("turbo_r12_k8920_maxlog", dict(algorithm="max-log", kernel="vector"), frames))
    runs.append(("turbo_r12_k8920_scalar", dict(algorithm="log-map", kernel="scalar"), min(scalar_frames, frames)))
    for name, options, n in runs:
        dec = TurboDecoder(rate=code.rate, k=code.k, max_iterations=10, check="fecf", **options)
        out = {}

        def once(dec=dec, n=n, out=out):
            out["result"] = dec.process(llr[:n])

        seconds = cpu_best_of(once, repeat if n == frames else 1)
        result = out["result"]
        res[f"{name}_mbps"] = n * code.k / seconds / 1e6
        res[f"{name}_mean_iterations"] = float(result.iterations.mean())
        res[f"{name}_frame_errors"] = int(np.any(result.data != info[:n], axis=1).sum())
    # per iteration, since the scalar run's frames may need a different mean number of iterations
    res["turbo_vector_over_scalar_per_iteration"] = (
        res["turbo_r12_k8920_mbps"] * res["turbo_r12_k8920_mean_iterations"]
        / (res["turbo_r12_k8920_scalar_mbps"] * res["turbo_r12_k8920_scalar_mean_iterations"]))
    return res


def turbo_code_errors(rng: np.random.Generator, *, rate: str, k: int, ebn0_db: float, frames: int,
                      max_iterations: int = 10, algorithm: str = "log-map") -> dict:
    """Encode ``frames`` random frames, send them over BPSK/AWGN, decode: error counts of the code alone.

    Returns
    -------
    dict
        ``frames``, ``bit_errors`` (per frame, numpy array), ``failed`` (FECF still failing),
        ``undetected`` (wrong frames whose FECF passed), ``iterations`` (sum), ``bits`` (k per frame).
    """
    from pipeline.fec.turbo import TurboCode, TurboDecoder, turbo_encode

    code = TurboCode(rate=rate, k=k)
    dec = TurboDecoder(rate=rate, k=k, max_iterations=max_iterations, check="fecf", algorithm=algorithm)
    info = frames_with_fecf(rng, frames, k)
    res = dec.process(awgn_llr(rng, turbo_encode(info, rate=rate), ebn0_db, code.code_rate))
    wrong = np.unpackbits(res.data ^ info, axis=1).sum(axis=1)
    return {"frames": frames, "bit_errors": wrong, "failed": int((~res.passed).sum()),
            "undetected": int(((wrong > 0) & res.passed).sum()), "iterations": int(res.iterations.sum()),
            "bits": frames * k}
