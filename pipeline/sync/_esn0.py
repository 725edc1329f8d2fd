"""Data-aided Es/N0 estimate from the known sync marker bits of recent CADUs (scales soft codewords into LLRs)."""

from __future__ import annotations

import functools
import math
from collections import deque
from dataclasses import dataclass

import numpy as np
from scipy import special

from pipeline.sync._args import check_int

__all__ = ["Esn0Estimate", "MarkerEsn0Estimator"]

#: Es/N0 reported when the marker shows no signal at all (the estimate of A^2 is not positive).
NO_SIGNAL_ESN0_DB = -40.0


@dataclass(frozen=True)
class Esn0Estimate:
    """One estimate of :class:`MarkerEsn0Estimator`.

    Attributes
    ----------
    esn0_db : float
        Es/N0 per channel bit in dB, ``10 log10(A^2 / (2 sigma^2))`` (``NO_SIGNAL_ESN0_DB`` when the
        estimate of ``A^2`` is not positive).
    amplitude : float
        Mean soft value along the marker's signs, the estimate of the signal amplitude ``A``.
    noise_variance : float
        Variance of the soft values about ``A`` (``sigma^2`` per channel bit).
    llr_scale : float
        ``2 A / sigma^2``: the channel LLR of a soft value ``y`` is ``llr_scale * y`` (nats, positive
        = bit 0); 0.0 when ``A <= 0``.
    values : int
        Marker bits the estimate is built on.
    """

    esn0_db: float
    amplitude: float
    noise_variance: float
    llr_scale: float
    values: int


@functools.lru_cache(maxsize=64)
def _chi2_median_ratio(m: int) -> float:
    """Median of chi^2 with m - 1 degrees of freedom over m - 1: the median of a sample variance over sigma^2."""
    k = m - 1
    return float(2.0 * special.gammaincinv(0.5 * k, 0.5) / k)


class MarkerEsn0Estimator:
    """Es/N0 from the soft values of the known marker bits of the last ``window_cadus`` CADUs.

    Parameters
    ----------
    window_cadus : int
        CADUs whose markers are pooled (1 .. 4096); the estimate after a CADU includes its own marker.

    Notes
    -----
    Model: a soft value is ``y = A s + n`` with ``s = +-1`` the known marker bit (+1 for bit 0) and
    ``n ~ N(0, sigma^2)``, so ``z = s y ~ N(A, sigma^2)`` whatever the bits: the marker removes the
    data, which is what keeps the estimate unbiased at any Es/N0 (moment estimators on unknown data,
    such as M2M4, lean on the data's constant modulus and bias upwards below 0 dB).  Per CADU ``j``
    (``m`` marker bits): ``mu_j = mean(z)`` and ``v_j = sum((z - mu_j)^2) / (m - 1)``.  Over the window
    the medians are taken, so that markers cut while the receiver was still acquiring (or a false
    lock) do not drag the scale of the good codewords that follow: ``A = median(mu_j)`` (``mu_j`` is
    symmetric about A, so its median is unbiased) and ``sigma^2 = median(v_j) / c`` with ``c`` the
    median of ``chi^2_{m-1} / (m - 1)`` (0.99 for m = 64).  ``A^2`` is corrected by the variance of the
    median, ``(pi / 2) sigma^2 / (m W)``; ``Es/N0 = A^2 / (2 sigma^2)`` (BPSK: ``Es = A^2``, ``N0 / 2 =
    sigma^2``) and the LLR scale is ``2 A / sigma^2``.  Cost O(m) per CADU and O(W log W) per estimate;
    the result depends only on the sequence of markers, never on how they are batched.

    References
    ----------
    D. R. Pauluzzi, N. C. Beaulieu, "A comparison of SNR estimation techniques for the AWGN channel",
    IEEE Trans. Commun. 48(10), 2000 (the data-aided ML estimator, sec. II-A).

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> est = MarkerEsn0Estimator(window_cadus=32)
    >>> signs = np.where(rng.integers(0, 2, 64) == 0, 1.0, -1.0)
    >>> for _ in range(32):
    ...     e = est.update(signs * 1.0 + rng.normal(0.0, 1.0, 64), signs)
    >>> round(e.esn0_db)  # A = 1, sigma = 1: Es/N0 = 1/2, i.e. -3 dB
    -3
    """

    def __init__(self, *, window_cadus: int = 32) -> None:
        self.window_cadus = check_int("window_cadus", window_cadus, 1, 4096)
        self.reset()

    def reset(self) -> None:
        """Forget every marker seen."""
        self._sums: deque[tuple[float, float, int]] = deque(maxlen=self.window_cadus)  # per CADU: mu_j, v_j, m

    def update(self, marker_soft: np.ndarray, signs: np.ndarray) -> Esn0Estimate:
        """Add one CADU's marker (soft values, inversion removed, and the marker's +-1 signs); estimate.

        Raises
        ------
        ValueError
            When the two arrays differ in length.
        """
        y = np.asarray(marker_soft, dtype=np.float64)
        s = np.asarray(signs, dtype=np.float64)
        if y.shape != s.shape or y.ndim != 1:
            raise ValueError(f"Argument 'marker_soft' must have the shape of 'signs' {s.shape}, not {y.shape}.")
        z = s * y
        m = int(z.size)
        mu = float(z.mean()) if m else 0.0
        v = float(np.dot(z - mu, z - mu)) / (m - 1) if m > 1 else float("nan")
        self._sums.append((mu, v, m))
        return self.estimate()

    def estimate(self) -> Esn0Estimate:
        """The estimate over the markers in the window (no signal before the first one)."""
        n = sum(c for _, _, c in self._sums)
        if not self._sums or self._sums[0][2] < 2:
            return Esn0Estimate(NO_SIGNAL_ESN0_DB, 0.0, float("nan"), 0.0, n)
        w = len(self._sums)
        mu = float(np.median([a for a, _, _ in self._sums]))
        v = max(float(np.median([b / _chi2_median_ratio(c) for _, b, c in self._sums])), 1e-30)
        m = n / w
        a2 = mu * mu - (0.5 * math.pi if w > 2 else 1.0) * v / (m * w)
        esn0_db = 10.0 * math.log10(a2 / (2.0 * v)) if a2 > 0 else NO_SIGNAL_ESN0_DB
        esn0_db = max(esn0_db, NO_SIGNAL_ESN0_DB)
        return Esn0Estimate(esn0_db, mu, v, 2.0 * mu / v if mu > 0 else 0.0, n)
