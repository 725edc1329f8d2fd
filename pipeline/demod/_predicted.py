"""A predicted carrier offset over a recording: the table the acquisitions centre their search on."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["CarrierPrediction", "StreamPrediction"]


class CarrierPrediction:
    """Predicted carrier offset (Hz, in the recording's frame) at sample positions, linear in between.

    Parameters
    ----------
    positions : array_like of float, keyword-only
        Sample positions (recording samples, strictly increasing, at least one), e.g. one every 0.5 s.
    offsets_hz : array_like of float, keyword-only
        The carrier's predicted offset from the recording's centre frequency at each position: the
        one-way Doppler of the orbit less the tuning offset (see
        :meth:`pipeline.orbit.DopplerComparison.predicted_offset_hz`).

    Notes
    -----
    Between two positions the offset is the straight line through them; before the first and after the
    last it is held.  :meth:`rotation` integrates it sample by sample (midpoint rule, exact on a straight
    line) into the phase ``phi(k) = 2 pi sum_{i<k} f(p + i + 1/2) / fs``, so a window rotated by it has the
    prediction, Doppler rate included, removed.  Two float64 arrays: picklable and small (a 15-minute pass
    at one point per 0.5 s is 29 kB), so it travels to a segmented decode's worker processes.  Cost of
    :meth:`rotation`: one interpolation, a cumulative sum and a complex exponential per sample.

    Examples
    --------
    >>> p = CarrierPrediction(positions=[0.0, 1000.0], offsets_hz=[100.0, 300.0])
    >>> float(p.offset_hz(500.0)), float(p.offset_hz(-5.0)), float(p.offset_hz(2e3))
    (200.0, 100.0, 300.0)
    """

    def __init__(self, *, positions, offsets_hz) -> None:
        pos = np.array(positions, dtype=np.float64, ndmin=1)
        off = np.array(offsets_hz, dtype=np.float64, ndmin=1)
        if pos.ndim != 1 or off.ndim != 1 or pos.size != off.size or pos.size == 0:
            raise ValueError(f"Argument 'positions' and 'offsets_hz' must be one-dimensional of one equal length "
                             f">= 1, not shapes {pos.shape} and {off.shape}.")
        if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(off))):
            raise ValueError("Argument 'positions' and 'offsets_hz' must be finite numbers, not NaN or Inf.")
        if pos.size > 1 and not np.all(np.diff(pos) > 0):
            raise ValueError("Argument 'positions' must be strictly increasing sample positions.")
        self.positions = pos
        self.offsets_hz = off

    def __eq__(self, other) -> bool:
        return (isinstance(other, CarrierPrediction) and np.array_equal(self.positions, other.positions)
                and np.array_equal(self.offsets_hz, other.offsets_hz))

    def __repr__(self) -> str:
        return (f"CarrierPrediction({self.positions.size} points, {self.positions[0]:g}..{self.positions[-1]:g}, "
                f"{self.offsets_hz.min():+.1f}..{self.offsets_hz.max():+.1f} Hz)")

    def offset_hz(self, position):
        """Predicted offset (Hz) at ``position`` (a number or an array of sample positions)."""
        return np.interp(position, self.positions, self.offsets_hz)

    def rate_hz_per_s(self, position: float, sample_rate_hz: float) -> float:
        """Slope of the prediction (Hz/s) on the straight piece holding ``position`` (0 outside the table)."""
        pos = self.positions
        i = int(np.searchsorted(pos, float(position), side="right")) - 1
        if i < 0 or i >= pos.size - 1:
            return 0.0
        return float((self.offsets_hz[i + 1] - self.offsets_hz[i]) / (pos[i + 1] - pos[i]) * float(sample_rate_hz))

    def rotation(self, start: int, n: int, sample_rate_hz: float) -> np.ndarray:
        """``exp(-j phi(k))``, ``k = 0 .. n-1``, from sample ``start``: multiplied into the window that begins
        there, it moves the predicted carrier to 0 Hz (complex64)."""
        fs = float(sample_rate_hz)
        f = self.offset_hz(float(start) + 0.5 + np.arange(n, dtype=np.float64))
        cycles = np.empty(n, dtype=np.float64)
        if n:
            cycles[0] = 0.0
            np.cumsum(f[:-1] / fs, out=cycles[1:])
        cycles -= np.floor(cycles)  # whole cycles do not matter; keeps the phase small for the exponential
        ph = (-2.0 * math.pi) * cycles
        out = np.empty(n, dtype=np.complex64)
        out.real = np.cos(ph)
        out.imag = np.sin(ph)
        return out


class StreamPrediction(CarrierPrediction):
    """A :class:`CarrierPrediction` for a live stream, whose length is not known: the table is worked out ahead, a
    stretch at a time, as the receiver reaches it.

    Parameters
    ----------
    predict : callable
        Sample position (int) -> the predicted offset (Hz) there, or None where the orbit has no state (such
        positions are left out of the table, as for a recording).
    step_samples : int, keyword-only
        The table's spacing, samples (>= 1).
    ahead_points : int, keyword-only
        Positions worked out at a time (default 120: a minute at one point per 0.5 s, about 25 ms of orbit
        prediction).

    Raises
    ------
    ValueError
        When the orbit has no state at any position of the first stretch (the caller then searches without a
        prediction, as for a recording the orbit does not cover).

    Notes
    -----
    Every method first extends the table to one step past the last position it is asked about, so its answers
    are those of a :class:`CarrierPrediction` on the same points (positions ``0, step, 2 step, ...``, a
    recording's table without its end point) built over the whole stream beforehand.  Not picklable (it holds
    the predictor): a live stream is decoded by one process.
    """

    def __init__(self, predict, *, step_samples: int, ahead_points: int = 120) -> None:
        if isinstance(step_samples, bool) or not isinstance(step_samples, (int, np.integer)) or step_samples < 1:
            raise ValueError(f"Argument 'step_samples' must be an integer >= 1, not {step_samples!r}.")
        if isinstance(ahead_points, bool) or not isinstance(ahead_points, (int, np.integer)) or ahead_points < 1:
            raise ValueError(f"Argument 'ahead_points' must be an integer >= 1, not {ahead_points!r}.")
        self._predict = predict
        self._step = int(step_samples)
        self._ahead = int(ahead_points)
        self._next = 0  # the next table position to work out
        pos, off = self._stretch()
        if not pos:
            raise ValueError("The orbit has no state over the stream's first stretch.")
        super().__init__(positions=pos, offsets_hz=off)

    def _stretch(self) -> tuple[list[float], list[float]]:
        """The next ``ahead_points`` positions' predictions (those the orbit has)."""
        pos, off = [], []
        for k in range(self._ahead):
            p = self._next + k * self._step
            f = self._predict(p)
            if f is not None:
                pos.append(float(p))
                off.append(float(f))
        self._next += self._ahead * self._step
        return pos, off

    def _cover(self, position: float) -> None:
        while self._next <= position + self._step:
            pos, off = self._stretch()
            if pos:
                self.positions = np.concatenate([self.positions, pos])
                self.offsets_hz = np.concatenate([self.offsets_hz, off])

    def offset_hz(self, position):
        self._cover(float(np.max(position)))
        return super().offset_hz(position)

    def rate_hz_per_s(self, position: float, sample_rate_hz: float) -> float:
        self._cover(float(position))
        return super().rate_hz_per_s(position, sample_rate_hz)

    def rotation(self, start: int, n: int, sample_rate_hz: float) -> np.ndarray:
        self._cover(float(start) + n)
        return super().rotation(start, n, sample_rate_hz)
