"""Lock detectors of the residual-carrier demodulator at symbol level: a t statistic with a hold time."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["HeldDecision", "MeanStatistic"]


class MeanStatistic:
    """Exponentially weighted mean of a per-symbol statistic in units of its own standard error.

    Parameters
    ----------
    memory_symbols : float
        The weight of a symbol falls by ``e`` over this many later symbols.

    Notes
    -----
    :meth:`add` takes one block's values ``d_k``; the block's sums are weighted by
    ``lambda = exp(-n / memory)`` per later block of ``n`` symbols.  With ``W1 = sum w n``,
    ``W2 = sum w^2 n`` the mean is ``m = S1 / W1`` and its variance ``(v + 2 c) W2 / W1^2`` with the
    per-symbol variance ``v`` and the lag-one covariance ``c`` (neighbouring symbols share samples
    in the statistics built here); :attr:`z` is ``m`` over its standard error, about N(0, 1) when the
    statistic has zero mean (a t statistic; Kay, *Fundamentals of Statistical Signal Processing*,
    vol. II, sec. 9.4 for the variance of a correlated sample mean).  Cost O(n) per block.

    Examples
    --------
    >>> s = MeanStatistic(memory_symbols=4096)
    >>> s.add(np.random.default_rng(1).standard_normal(4000) + 0.2)
    >>> round(s.z)
    12
    """

    def __init__(self, *, memory_symbols: float) -> None:
        if not memory_symbols > 0:
            raise ValueError(f"Argument 'memory_symbols' must be > 0, not {memory_symbols!r}.")
        self.memory_symbols = float(memory_symbols)
        self.reset()

    def reset(self) -> None:
        """Forget all symbols."""
        self.w1 = self.w2 = self.s1 = self.s2 = self.c1 = 0.0
        self.mean = float("nan")
        self.z = 0.0

    def add(self, values: np.ndarray) -> None:
        """Add one block's per-symbol values (in stream order)."""
        d = np.asarray(values, dtype=np.float64)
        n = d.size
        if n == 0:
            return
        lam = math.exp(-n / self.memory_symbols)
        self.w1 = lam * self.w1 + n
        self.w2 = lam * lam * self.w2 + n
        self.s1 = lam * self.s1 + float(np.sum(d))
        self.s2 = lam * self.s2 + float(np.dot(d, d))
        self.c1 = lam * self.c1 + (float(np.dot(d[:-1], d[1:])) * n / (n - 1) if n > 1 else 0.0)
        m = self.s1 / self.w1
        v = self.s2 / self.w1 - m * m
        c = self.c1 / self.w1 - m * m
        var_mean = max(v + 2.0 * c, 0.25 * v) * self.w2 / (self.w1 * self.w1)
        self.mean = m
        self.z = m / math.sqrt(var_mean) if var_mean > 0 else 0.0


class HeldDecision:
    """Lock from a statistic: on after ``hold`` decisions in a row above ``on``, off after ``hold`` below ``off``.

    Examples
    --------
    >>> d = HeldDecision(on=5.0, off=3.0, hold=2)
    >>> [d.update(z) for z in (6.0, 6.0, 4.0, 2.0, 2.0)]
    [False, True, True, True, False]
    """

    def __init__(self, *, on: float, off: float, hold: int) -> None:
        if not off <= on:
            raise ValueError(f"Argument 'off' must be <= on ({on!r}), not {off!r}.")
        if isinstance(hold, bool) or not isinstance(hold, int) or hold < 1:
            raise ValueError(f"Argument 'hold' must be a positive integer, not {hold!r}.")
        self.on = float(on)
        self.off = float(off)
        self.hold = int(hold)
        self.reset()

    def reset(self) -> None:
        """Unlocked, no run counted."""
        self.locked = False
        self._run = 0

    def update(self, z: float) -> bool:
        """Take one decision's statistic; return the lock state after it."""
        if self.locked:
            self._run = self._run + 1 if z < self.off else 0
        else:
            self._run = self._run + 1 if z > self.on else 0
        if self._run >= self.hold:
            self.locked = not self.locked
            self._run = 0
        return self.locked
