"""Coding theory beside the measured error rates of ``downlink sweep``.

Closed forms and numerical limits for the codes of CCSDS 131.0-B on an AWGN channel with BPSK:

* uncoded BPSK bit error rate, ``Pb = 1/2 erfc(sqrt(Eb/N0))``;
* the union bound of the K=7 convolutional code (rate 1/2 and its punctured rates) with
  unquantized soft-decision maximum-likelihood (Viterbi) decoding, from the bit-weight distance
  spectrum, which :func:`conv_distance_spectrum` enumerates on the trellis;
* the bounded-distance Reed-Solomon decoder on hard BPSK decisions (ideal interleaving);
* the binary-input AWGN (BI-AWGN) capacity and the smallest Eb/N0 at which a rate ``R`` code
  can work (Shannon limit for binary antipodal signalling);
* :func:`ebn0_at_ber`, the Eb/N0 where a curve crosses a target error rate, interpolated in
  log10(BER), used for the implementation loss;
* the Polyanskiy-Poor-Verdu normal approximation for a block code of length n and dimension k on
  BPSK/AWGN (:func:`normal_approximation_ebn0_db`), with the BI-AWGN capacity and dispersion by
  Gauss-Hermite quadrature (:func:`biawgn_capacity_dispersion`): the reference the LDPC
  measurements are compared with.

Eb/N0 is per information bit throughout, as in ../shared/DESIGN.md.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy import integrate, optimize, special, stats

__all__ = [
    "q_function",
    "uncoded_bpsk_ber",
    "conv_distance_spectrum",
    "conv_union_bound_ber",
    "CONV_K7_R12_BIT_WEIGHTS",
    "rs_bounded_distance_ber",
    "biawgn_capacity",
    "capacity_limit_ebn0_db",
    "ebn0_at_ber",
    "biawgn_capacity_dispersion",
    "normal_approximation_ebn0_db",
    "clopper_pearson",
]

#: Bit weights B_d of the K=7 r=1/2 code (G1=171, G2=133 octal) for d = 10, 12, ..., 24.
#: ../shared/REFERENCES.md sec. 8 (computed there by trellis enumeration; classic published table).
CONV_K7_R12_BIT_WEIGHTS: dict[int, int] = {
    10: 36, 12: 211, 14: 1404, 16: 11633, 18: 77433, 20: 502690, 22: 3322763, 24: 21292910,
}

# Connection vectors of CCSDS 131.0-B sec. 3.3.1 and the puncturing patterns of sec. 3.4
# (../shared/REFERENCES.md sec. 1.2), written here again so the theory does not lean on the decoder.
_G1, _G2 = 0o171, 0o133
_PATTERNS = {
    "1/2": ("1", "1"),
    "2/3": ("10", "11"),
    "3/4": ("101", "110"),
    "5/6": ("10101", "11010"),
    "7/8": ("1000101", "1111010"),
}
_RATE_VALUE = {"1/2": 1 / 2, "2/3": 2 / 3, "3/4": 3 / 4, "5/6": 5 / 6, "7/8": 7 / 8}


def _db(x_db) -> np.ndarray:
    return np.power(10.0, np.asarray(x_db, dtype=np.float64) / 10.0)


def _check_rate(rate: str) -> str:
    if rate not in _PATTERNS:
        raise ValueError(f"Argument 'rate' must be one of {', '.join(_PATTERNS)}, not {rate!r}.")
    return rate


def q_function(x):
    """Gaussian tail probability ``Q(x) = 1/2 erfc(x / sqrt 2)``, elementwise."""
    return 0.5 * special.erfc(np.asarray(x, dtype=np.float64) / math.sqrt(2.0))


def uncoded_bpsk_ber(ebn0_db):
    """Bit error rate of uncoded coherent BPSK on AWGN.

    Parameters
    ----------
    ebn0_db : float or array_like
        Eb/N0 in dB.

    Returns
    -------
    numpy.ndarray (or float for a scalar input)
        ``Pb = 1/2 erfc(sqrt(Eb/N0))``.

    References
    ----------
    J. G. Proakis, *Digital Communications*, 4th ed., eq. 5.2-5 (from memory, not confirmed);
    ../shared/REFERENCES.md sec. 8 (9.588 dB at 1e-5).
    """
    out = 0.5 * special.erfc(np.sqrt(_db(ebn0_db)))
    return float(out) if np.ndim(out) == 0 else out


@lru_cache(maxsize=16)
def conv_distance_spectrum(rate: str = "1/2", max_distance: int = 24) -> dict[int, float]:
    """Bit-weight distance spectrum of the CCSDS K=7 code at ``rate``, per information bit.

    Parameters
    ----------
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}
        Mother code or one of its punctured rates (CCSDS 131.0-B Table 3-2 patterns).
    max_distance : int
        Largest Hamming distance enumerated (1..60).

    Returns
    -------
    dict
        ``{d: B_d}`` for every distance ``d <= max_distance`` with a path, where ``B_d`` is the total
        information weight of the first-event error paths of output weight ``d``, averaged over the
        ``P`` columns of the puncturing period at which the path may leave the zero state (so the
        union bound ``sum B_d Q(sqrt(2 d R Eb/N0))`` is per information bit).

    Notes
    -----
    Breadth-first dynamic programming on the trellis: for each (state, accumulated weight) the
    number of paths and their summed input weight; paths are started by a 1 leaving state 0,
    stopped when they merge back into state 0, and dropped once their weight exceeds
    ``max_distance``.  The inversion of G2 does not change distances (the code is a coset of a
    linear code), so it is left out.  Cost ``O(P x steps x 64 x max_distance)``, a few ms.

    References
    ----------
    A. J. Viterbi, "Convolutional codes and their performance in communication systems", IEEE
    Trans. Commun. Technol. 19(5), 1971 (transfer-function bound; from memory, not confirmed).
    ../shared/REFERENCES.md sec. 8 lists the rate 1/2 result.
    """
    rate = _check_rate(rate)
    if isinstance(max_distance, bool) or not isinstance(max_distance, int) or not 1 <= max_distance <= 60:
        raise ValueError(f"Argument 'max_distance' must be an integer 1..60, not {max_distance!r}.")
    c1_keep = [int(c) for c in _PATTERNS[rate][0]]
    c2_keep = [int(c) for c in _PATTERNS[rate][1]]
    period = len(c1_keep)
    n_states = 64
    # Output weights of each (state, input) branch: register = (state << 1) | input, bit 0 = input.
    g1 = int(f"{_G1:07b}"[::-1], 2)
    g2 = int(f"{_G2:07b}"[::-1], 2)
    next_state = np.zeros((n_states, 2), dtype=np.int64)
    out1 = np.zeros((n_states, 2), dtype=np.int64)
    out2 = np.zeros((n_states, 2), dtype=np.int64)
    for s in range(n_states):
        for u in (0, 1):
            reg = (s << 1) | u
            next_state[s, u] = reg & 0x3F
            out1[s, u] = bin(reg & g1).count("1") & 1
            out2[s, u] = bin(reg & g2).count("1") & 1
    dmax = max_distance
    total = np.zeros(dmax + 1, dtype=np.float64)
    for start in range(period):
        # count[s, d], weight[s, d]: paths in state s with output weight d (not yet merged).
        count = np.zeros((n_states, dmax + 1), dtype=np.float64)
        weight = np.zeros((n_states, dmax + 1), dtype=np.float64)
        ph = start
        w0 = out1[0, 1] * c1_keep[ph] + out2[0, 1] * c2_keep[ph]
        if w0 <= dmax:
            count[next_state[0, 1], w0] = 1.0
            weight[next_state[0, 1], w0] = 1.0
        ph = (ph + 1) % period
        for _step in range(100_000):
            if not count.any():
                break
            new_count = np.zeros_like(count)
            new_weight = np.zeros_like(weight)
            live = count.any(axis=1)
            live[0] = False
            for u in (0, 1):
                w = out1[:, u] * c1_keep[ph] + out2[:, u] * c2_keep[ph]
                for ws in (0, 1, 2):
                    sel = np.nonzero((w == ws) & live)[0]
                    if sel.size == 0:
                        continue
                    # shift the weight axis by the branch weight; weights beyond dmax fall off
                    c = np.zeros((sel.size, dmax + 1))
                    b = np.zeros((sel.size, dmax + 1))
                    c[:, ws:] = count[sel, : dmax + 1 - ws]
                    b[:, ws:] = weight[sel, : dmax + 1 - ws] + u * count[sel, : dmax + 1 - ws]
                    ns = next_state[sel, u]
                    merged = ns == 0
                    if merged.any():
                        total += b[merged].sum(axis=0)
                    np.add.at(new_count, ns[~merged], c[~merged])
                    np.add.at(new_weight, ns[~merged], b[~merged])
            count, weight = new_count, new_weight
            ph = (ph + 1) % period
        else:  # pragma: no cover - the CCSDS codes are not catastrophic
            raise RuntimeError(f"distance enumeration for rate {rate} did not terminate")
    spectrum = {d: float(total[d] / period) for d in range(dmax + 1) if total[d] > 0}
    return spectrum


def conv_union_bound_ber(ebn0_db, rate: str = "1/2", max_distance: int | None = None):
    """Union bound on the bit error rate of soft-decision ML decoding of the CCSDS K=7 code.

    Parameters
    ----------
    ebn0_db : float or array_like
        Eb/N0 per information bit, dB.
    rate : {"1/2", "2/3", "3/4", "5/6", "7/8"}
    max_distance : int, optional
        Terms up to this distance (default: dfree + 14, enough for BER below 1e-3).

    Returns
    -------
    numpy.ndarray (or float)
        ``Pb <= sum_d B_d Q(sqrt(2 d R Eb/N0))``, unquantized soft decisions on BPSK/AWGN.

    Notes
    -----
    For rate 1/2 the tabulated spectrum of ../shared/REFERENCES.md sec. 8 is used; the punctured
    rates use :func:`conv_distance_spectrum`.  The bound is loose above about 1e-3 and tight
    (within a few tenths of a dB) below 1e-5.
    """
    rate = _check_rate(rate)
    if rate == "1/2" and (max_distance is None or max_distance <= 24):
        spec = {d: float(b) for d, b in CONV_K7_R12_BIT_WEIGHTS.items() if max_distance is None or d <= max_distance}
    else:
        dfree = min(conv_distance_spectrum(rate, 12))
        limit = max_distance if max_distance is not None else dfree + 14
        spec = conv_distance_spectrum(rate, min(limit, 60))
    r = _RATE_VALUE[rate]
    ebn0 = _db(ebn0_db)
    out = np.zeros_like(ebn0, dtype=np.float64)
    for d, b in spec.items():
        out = out + b * q_function(np.sqrt(2.0 * d * r * ebn0))
    return float(out) if np.ndim(out) == 0 else out


def rs_bounded_distance_ber(ebn0_db, *, e: int = 16, code_rate: float | None = None):
    """Bit error rate of a bounded-distance RS(255, 255-2E) decoder on hard BPSK decisions.

    Parameters
    ----------
    ebn0_db : float or array_like
        Eb/N0 per information bit of the RS code, dB.
    e : {8, 16}
        Correctable symbols per codeword.
    code_rate : float, optional
        Information bits per channel bit; default ``(255 - 2E) / 255`` (RS alone).

    Returns
    -------
    numpy.ndarray (or float)
        ``Pb ~ (2^(m-1) / (2^m - 1)) sum_{i=E+1}^{n} (i/n) C(n,i) ps^i (1-ps)^(n-i)`` with
        ``ps = 1 - (1-p)^8`` and ``p = Q(sqrt(2 R Eb/N0))``.

    Notes
    -----
    Assumes independent symbol errors (ideal interleaving) and that a failed decode leaves the
    received errors in place.  Cost O(n) per point.

    References
    ----------
    B. Sklar, *Digital Communications*, 2nd ed., sec. 8.1.3 (from memory, not confirmed).
    """
    if e not in (8, 16):
        raise ValueError(f"Argument 'e' must be 8 or 16, not {e!r}.")
    n = 255
    r = (n - 2 * e) / n if code_rate is None else float(code_rate)
    p = q_function(np.sqrt(2.0 * r * _db(ebn0_db)))
    ps = 1.0 - (1.0 - p) ** 8
    i = np.arange(e + 1, n + 1, dtype=np.float64)
    log_c = special.gammaln(n + 1) - special.gammaln(i + 1) - special.gammaln(n - i + 1)
    ps_a = np.atleast_1d(ps)[:, None]
    with np.errstate(divide="ignore"):
        terms = np.exp(log_c + i * np.log(ps_a) + (n - i) * np.log1p(-ps_a)) * (i / n)
    out = (128.0 / 255.0) * terms.sum(axis=1)
    out = out.reshape(np.shape(ps))
    return float(out) if np.ndim(out) == 0 else out


def biawgn_capacity(esn0_db):
    """Capacity of the binary-input AWGN channel with soft output, bits per channel use.

    Parameters
    ----------
    esn0_db : float
        Es/N0 per binary channel symbol, dB.

    Returns
    -------
    float
        ``C = 1 - E[log2(1 + exp(-2 y / s^2))]`` with ``y ~ N(1, s^2)``, ``s^2 = 1 / (2 Es/N0)``.

    Notes
    -----
    Adaptive quadrature (scipy.integrate.quad) over +-40 standard deviations; relative accuracy
    about 1e-10.

    References
    ----------
    T. M. Cover and J. A. Thomas, *Elements of Information Theory*, 2nd ed., ch. 9 (mutual information
    of a binary input on a Gaussian channel; from memory, not confirmed).
    """
    es = float(_db(esn0_db))
    if not es > 0:
        raise ValueError(f"Argument 'esn0_db' must be finite, not {esn0_db!r}.")
    sigma = math.sqrt(1.0 / (2.0 * es))

    def integrand(y):
        pdf = math.exp(-((y - 1.0) ** 2) / (2 * sigma * sigma)) / (sigma * math.sqrt(2 * math.pi))
        z = -2.0 * y / (sigma * sigma)
        # log2(1 + e^z) without overflow
        l2 = (z + math.log1p(math.exp(-z))) / math.log(2) if z > 0 else math.log1p(math.exp(z)) / math.log(2)
        return pdf * l2

    val, _err = integrate.quad(integrand, 1.0 - 40 * sigma, 1.0 + 40 * sigma, limit=400, epsabs=1e-13)
    return 1.0 - val


def capacity_limit_ebn0_db(rate: float) -> float:
    """Smallest Eb/N0 (dB) at which a binary code of rate ``rate`` can be decoded on BI-AWGN.

    Parameters
    ----------
    rate : float
        Information bits per binary channel symbol, 0 < rate < 1.

    Returns
    -------
    float
        The Eb/N0 solving ``C(Es/N0 = rate x Eb/N0) = rate`` (:func:`biawgn_capacity`).

    Notes
    -----
    Brent's method on ``[-2, 12] dB``.

    References
    ----------
    ../shared/REFERENCES.md sec. 8: R=1/2 0.187 dB, 3/4 1.626 dB, 7/8 2.845 dB, 223/255 2.838 dB.
    """
    if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not 0.0 < float(rate) < 1.0:
        raise ValueError(f"Argument 'rate' must be a number in (0, 1), not {rate!r}.")
    rate = float(rate)

    def f(ebn0_db):
        return biawgn_capacity(ebn0_db + 10 * math.log10(rate)) - rate

    return float(optimize.brentq(f, -2.0, 12.0, xtol=1e-6))


def ebn0_at_ber(ebn0_db, ber, target: float = 1e-5) -> float | None:
    """Eb/N0 where a measured or theoretical curve first falls to ``target``.

    Parameters
    ----------
    ebn0_db, ber : array_like
        The curve, Eb/N0 increasing.  Zero or non-finite BER points are skipped (no errors seen
        means the rate is below what the point can resolve, not zero).
    target : float
        Error rate, 0 < target < 1.

    Returns
    -------
    float or None
        Linear interpolation of Eb/N0 against log10(BER) between the last point above and the
        first point at or below ``target``; None when the curve does not cross it.
    """
    if not 0.0 < float(target) < 1.0:
        raise ValueError(f"Argument 'target' must be in (0, 1), not {target!r}.")
    x = np.asarray(ebn0_db, dtype=np.float64)
    y = np.asarray(ber, dtype=np.float64)
    if x.shape != y.shape or x.ndim != 1:
        raise ValueError("Arguments 'ebn0_db' and 'ber' must be 1-D arrays of one length.")
    keep = np.isfinite(y) & (y > 0) & np.isfinite(x)
    x, y = x[keep], y[keep]
    lt = math.log10(target)
    ly = np.log10(y)
    for i in range(1, len(x)):
        if ly[i - 1] > lt >= ly[i]:
            frac = (ly[i - 1] - lt) / (ly[i - 1] - ly[i])
            return float(x[i - 1] + frac * (x[i] - x[i - 1]))
    return None


@lru_cache(maxsize=4)
def _hermite_nodes(n_points: int) -> tuple[np.ndarray, np.ndarray]:
    return np.polynomial.hermite.hermgauss(n_points)


def biawgn_capacity_dispersion(esn0_db: float, n_points: int = 200) -> tuple[float, float]:
    """Capacity C (bits per channel use) and dispersion V (bits^2) of BPSK on AWGN with soft output.

    Parameters
    ----------
    esn0_db : float
        Es/N0 per binary channel symbol, dB.
    n_points : int
        Gauss-Hermite nodes (200 by default).

    Returns
    -------
    (C, V) : tuple of float
        Mean and variance of the information density ``i = 1 - log2(1 + exp(-2 y / s^2))`` with
        ``y = 1 + s Z``, ``Z ~ N(0, 1)``, ``s^2 = 1 / (2 Es/N0)`` (input +1; the channel is
        symmetric).

    Notes
    -----
    ``E[g(Z)] = pi^-1/2 sum_i w_i g(sqrt 2 t_i)`` over the Gauss-Hermite nodes ``t_i`` and weights
    ``w_i``.  Cost O(n_points).

    References
    ----------
    Y. Polyanskiy, H. V. Poor, S. Verdu, "Channel coding rate in the finite blocklength regime",
    IEEE Trans. Inf. Theory 56(5), 2010 (dispersion of the BI-AWGN channel; from memory, not
    confirmed); ../shared/REFERENCES.md sec. 13.5 (the method: 200-point Gauss-Hermite quadrature).

    Examples
    --------
    >>> c, v = biawgn_capacity_dispersion(0.0)
    >>> round(c, 4)
    0.7215
    """
    es = float(_db(esn0_db))
    if not (es > 0 and math.isfinite(es)):
        raise ValueError(f"Argument 'esn0_db' must be finite, not {esn0_db!r}.")
    t, w = _hermite_nodes(int(n_points))
    s2 = 1.0 / (2.0 * es)
    y = 1.0 + math.sqrt(s2) * math.sqrt(2.0) * t
    dens = 1.0 - np.logaddexp(0.0, -2.0 * y / s2) / math.log(2.0)
    c = float(np.dot(w, dens) / math.sqrt(math.pi))
    v = float(np.dot(w, dens * dens) / math.sqrt(math.pi) - c * c)
    return c, max(v, 0.0)


def normal_approximation_ebn0_db(n: int, k: int, fer: float) -> float:
    """Eb/N0 (dB) at which the best (n, k) binary code reaches frame error rate ``fer`` on BPSK/AWGN,
    by the normal approximation.

    Parameters
    ----------
    n : int
        Channel bits per codeword (sent bits: punctured bits excluded, fill and tail bits included).
    k : int
        Information bits per codeword, 0 < k < n.
    fer : float
        Frame error rate, 0 < fer < 0.5.

    Returns
    -------
    float
        The Eb/N0 (per information bit, ``Es/N0 + 10 log10(n / k)``) solving
        ``k = n C - sqrt(n V) Q^-1(fer) + (1/2) log2 n``.

    Notes
    -----
    C and V from :func:`biawgn_capacity_dispersion`; Brent's method on Es/N0 in [-20, 20] dB.
    It is an estimate of the limit, not a bound: practical decoders land a few tenths of a dB
    to about 1 dB to the right of it.

    References
    ----------
    Polyanskiy, Poor, Verdu 2010 (eq. 296, the normal approximation with the (1/2) log n term;
    from memory, not confirmed); ../shared/REFERENCES.md sec. 13.5 (table computed there).

    Examples
    --------
    >>> round(normal_approximation_ebn0_db(8160, 7136, 1e-4), 2)
    3.22
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 2:
        raise ValueError(f"Argument 'n' must be an integer >= 2, not {n!r}.")
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 0 < k < n:
        raise ValueError(f"Argument 'k' must be an integer in 1..n-1, not {k!r}.")
    if not 0.0 < float(fer) < 0.5:
        raise ValueError(f"Argument 'fer' must be in (0, 0.5), not {fer!r}.")
    q_inv = math.sqrt(2.0) * float(special.erfcinv(2.0 * float(fer)))

    def gap(esn0_db):
        c, v = biawgn_capacity_dispersion(esn0_db)
        return n * c - math.sqrt(n * v) * q_inv + 0.5 * math.log2(n) - k

    esn0_db = optimize.brentq(gap, -20.0, 20.0, xtol=1e-9)
    return float(esn0_db + 10.0 * math.log10(n / k))


def clopper_pearson(errors: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Exact two-sided binomial confidence interval for an error rate ``errors / trials``.

    Returns
    -------
    (low, high) : tuple of float
        ``low = B^-1(a; e, n - e + 1)`` and ``high = B^-1(1 - a; e + 1, n - e)`` with ``a = (1 - confidence) / 2``
        and B the beta distribution (``low = 0`` when e = 0, ``high = 1`` when e = n).

    References
    ----------
    C. J. Clopper, E. S. Pearson, "The use of confidence or fiducial limits illustrated in the case of
    the binomial", Biometrika 26(4), 1934 (from memory, not confirmed).

    Examples
    --------
    >>> lo, hi = clopper_pearson(0, 3000)
    >>> lo, round(hi, 5)
    (0.0, 0.00123)
    """
    if trials < 1 or not 0 <= errors <= trials:
        raise ValueError(f"Arguments 'errors' and 'trials' must satisfy 0 <= errors <= trials, trials >= 1, "
                         f"not {errors} and {trials}.")
    a = (1.0 - confidence) / 2.0
    lo = 0.0 if errors == 0 else float(stats.beta.ppf(a, errors, trials - errors + 1))
    hi = 1.0 if errors == trials else float(stats.beta.ppf(1.0 - a, errors + 1, trials - errors))
    return lo, hi
