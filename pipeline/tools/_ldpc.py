"""The CCSDS LDPC codes alone on BPSK/AWGN: channel LLRs, decoder speed and error counts.

One home for what ``downlink bench`` (keys ``ldpc_c2_mbps``, ``ldpc_ar4ja_r12_k1024_mbps``), ``downlink sweep``
(code stage of an LDPC profile) and ``bench/bench_ldpc.py`` measure.  Eb/N0 is per information bit
(``Es/N0 = Eb/N0 k / n``, n the sent bits), as in REFERENCES.md 13.5.
"""

from __future__ import annotations

import math
import os

import numpy as np

from pipeline.tools._turbo import cpu_best_of

__all__ = ["LDPC_SPEED_POINTS", "ldpc_awgn_batch", "ldpc_speed", "ldpc_code_errors"]

#: (key, (family, rate, k), Eb/N0 dB): issue 15's speed operating points.
LDPC_SPEED_POINTS = (("ldpc_c2", ("c2", None, None), 4.0), ("ldpc_ar4ja_r12_k1024", ("ar4ja", "1/2", 1024), 2.0))


def ldpc_awgn_batch(code, ebn0_db: float, codewords: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Random information bits, encoded, sent as BPSK +-1 over AWGN: (info bits (B, k), LLRs float32 (B, n)).

    Notes
    -----
    ``Es/N0 = (k / n) Eb/N0``, ``sigma^2 = 1 / (2 Es/N0)``, ``L = 2 y / sigma^2`` (exact LLRs, unquantized; the
    decoder quantises them itself).

    Examples
    --------
    >>> from pipeline.fec.ldpc import ldpc_code
    >>> info, llr = ldpc_awgn_batch(ldpc_code("ar4ja", rate="1/2", k=1024), 3.0, 2, np.random.default_rng(1))
    >>> info.shape, llr.shape, llr.dtype
    ((2, 1024), (2, 2048), dtype('float32'))
    """
    from pipeline.fec.ldpc import ldpc_encode_bits

    info = rng.integers(0, 2, (codewords, code.k), dtype=np.uint8)
    word = ldpc_encode_bits(code, info)
    sigma = math.sqrt(1 / (2 * 10 ** (ebn0_db / 10) * code.k / code.n))
    y = 1.0 - 2.0 * word + sigma * rng.standard_normal(word.shape)
    return info, (2.0 * y / sigma**2).astype(np.float32)


def ldpc_speed(*, codewords: int = 1024, repeat: int = 5, seed: int = 15, lanes64: bool = True,
               encoder: bool = True) -> dict:
    """LDPC decoder speed at issue 15's two operating points: the default decoder beside the scalar kernel.

    Parameters
    ----------
    codewords : int
        Codewords per timed run of the vector decoder (the scalar kernel gets ``max(64, codewords // 8)``).
    repeat : int
        Timed runs; the best CPU time counts (:func:`pipeline.tools._turbo.cpu_best_of`, after one warm-up run).
    seed : int
    lanes64 : bool
        Also measure the 64-lane vector kernel.
    encoder : bool
        Also measure the encoder.

    Returns
    -------
    dict
        For ``key`` = ``ldpc_c2`` (Eb/N0 4.0 dB) and ``ldpc_ar4ja_r12_k1024`` (2.0 dB): ``{key}_mbps``
        (information bits per second / 1e6 of CPU time, one core: :class:`pipeline.fec.ldpc.LdpcDecoder`, 32-lane
        vector kernel, at most 50 iterations), ``{key}_scalar_mbps`` (the one-codeword reference kernel, same
        decisions), ``{key}_lanes64_mbps``, ``{key}_iterations`` (mean per codeword), ``{key}_fer``,
        ``{key}_speedup_vs_scalar``, ``{key}_encode_mbps``; ``load_average_1min`` before the run.

    Raises
    ------
    AssertionError
        If the scalar and vector kernels disagree on any codeword (they must decide bit for bit alike).
    """
    from pipeline.fec.ldpc import LdpcDecoder, ldpc_code, ldpc_encode_bits

    out: dict = {"load_average_1min": os.getloadavg()[0], "codewords": codewords}
    for key, (fam, rate, k), ebn0_db in LDPC_SPEED_POINTS:
        code = ldpc_code(fam, rate=rate, k=k)
        info, llr = ldpc_awgn_batch(code, ebn0_db, codewords, np.random.default_rng([seed, code.n]))
        decoders = {"": LdpcDecoder(code=code), "_scalar": LdpcDecoder(code=code, kernel="scalar")}
        if lanes64:
            decoders["_lanes64"] = LdpcDecoder(code=code, lanes=64)
        results = {}
        for name, dec in decoders.items():
            batch = llr if name != "_scalar" else llr[: max(64, codewords // 8)]
            runs = repeat if name != "_scalar" else max(1, repeat // 2)

            def once(d=dec, b=batch, n=name, r=results):
                r[n] = d.decode(b)

            out[f"{key}{name}_mbps"] = code.k * batch.shape[0] / max(cpu_best_of(once, runs), 1e-9) / 1e6
        res = results[""]
        n_s = results["_scalar"].ok.shape[0]
        for field in ("frames", "iterations", "syndrome_weight", "corrected_bits"):  # same decisions
            assert np.array_equal(getattr(results["_scalar"], field), getattr(res, field)[:n_s]), field
        out[f"{key}_iterations"] = float(res.iterations.mean())
        out[f"{key}_fer"] = float((res.frames != np.packbits(info, axis=1)).any(axis=1).mean())
        out[f"{key}_speedup_vs_scalar"] = out[f"{key}_mbps"] / out[f"{key}_scalar_mbps"]
        if encoder:
            seconds = cpu_best_of(lambda c=code, i=info: ldpc_encode_bits(c, i), repeat)
            out[f"{key}_encode_mbps"] = code.k * codewords / max(seconds, 1e-9) / 1e6
    return out


def ldpc_code_errors(rng: np.random.Generator, *, family: str, rate: str | None, k: int | None, ebn0_db: float,
                     frames: int, max_iterations: int = 50) -> dict:
    """Encode ``frames`` random frames, send them over BPSK/AWGN, decode: error counts of the code alone.

    Returns
    -------
    dict
        ``frames``, ``bit_errors`` (per frame, numpy array), ``failed`` (nonzero final syndrome), ``undetected``
        (wrong frames with a zero syndrome), ``iterations`` (sum), ``bits`` (k per frame).

    Examples
    --------
    >>> got = ldpc_code_errors(np.random.default_rng(2), family="ar4ja", rate="1/2", k=1024, ebn0_db=4.0,
    ...                        frames=4)
    >>> got["frames"], int(got["bit_errors"].sum()), got["failed"]
    (4, 0, 0)
    """
    from pipeline.fec.ldpc import LdpcDecoder, ldpc_code

    code = ldpc_code(family) if family == "c2" else ldpc_code(family, rate=rate, k=k)
    info, llr = ldpc_awgn_batch(code, ebn0_db, frames, rng)
    res = LdpcDecoder(code=code, max_iterations=max_iterations).decode(llr)
    wrong = np.unpackbits(res.frames ^ np.packbits(info, axis=1), axis=1).sum(axis=1)
    return {"frames": frames, "bit_errors": wrong, "failed": int((~res.ok).sum()),
            "undetected": int(((wrong > 0) & res.ok).sum()), "iterations": int(res.iterations.sum()),
            "bits": frames * code.k}
