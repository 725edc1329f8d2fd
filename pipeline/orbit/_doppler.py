"""Measured against predicted Doppler: the ``predicted_hz`` and ``residual_hz`` columns of doppler.csv."""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

from pipeline.timescales import parse_utc

__all__ = ["PREDICTION_COLUMNS", "DopplerCheck", "DopplerComparison", "add_doppler_predictions"]

#: Columns added to the Doppler rows, in order.
PREDICTION_COLUMNS = ("predicted_hz", "residual_hz")


@dataclass(frozen=True)
class DopplerCheck:
    """Summary of a pass's Doppler residuals (for the report).

    Attributes
    ----------
    rows : int
        Rows with a residual (carrier locked, a prediction available).
    mean_residual_hz : float or None
        Mean of measured - predicted: the spacecraft oscillator's offset from its nominal frequency on a
        one-way link (plus any constant receiver offset).
    residual_rms_hz : float or None
        RMS of the residuals about their mean (what is left once the constant offset is removed).
    prediction : str
        What the prediction came from (orbit file, method, station).
    inverted_residual_rms_hz : float or None
        The RMS about the mean had the carrier offsets' sign been flipped (a spectrally inverted recording
        read upright measures ``-d`` for an offset ``d``).
    note : str or None
        Set when the flipped residuals are the flat ones (:data:`INVERSION_RATIO`): the recording's
        spectrum is then most likely inverted and the profile should say ``spectrum_inverted = true``.
    """

    rows: int
    mean_residual_hz: float | None
    residual_rms_hz: float | None
    prediction: str
    inverted_residual_rms_hz: float | None = None
    note: str | None = None

    def as_dict(self) -> dict:
        d = {"rows": self.rows, "mean_residual_hz": self.mean_residual_hz,
             "residual_rms_hz": self.residual_rms_hz, "prediction": self.prediction,
             "inverted_residual_rms_hz": self.inverted_residual_rms_hz}
        if self.note is not None:
            d["note"] = self.note
        return d


#: The flipped-sign residuals must be this many times flatter (RMS), over at least :data:`INVERSION_ROWS`
#: rows and with the upright RMS above :data:`INVERSION_MIN_RMS_HZ`, before the check says the spectrum
#: looks inverted (a Doppler that barely changes over the rows cannot tell the two apart).
INVERSION_RATIO = 4.0
INVERSION_ROWS = 10
INVERSION_MIN_RMS_HZ = 20.0

INVERSION_NOTE = ("the residuals are flat only with the measured carrier offsets' sign flipped: the recording's "
                  "spectrum is most likely inverted; decode it again with [receiver] spectrum_inverted = true "
                  "(the Doppler and range-rate columns are of the wrong sign until then)")


class DopplerComparison:
    """Streams Doppler rows through the prediction: ``process(rows) -> rows`` with ``predicted_hz`` and
    ``residual_hz`` added; :meth:`summary` gives the :class:`DopplerCheck` of everything seen.

    Parameters
    ----------
    predictor : OrbitPredictor
        Gives ``predict(tai_ns)`` and ``description``.
    downlink_frequency_hz : float
        The carrier's nominal frequency ``f``.
    tuning_offset_hz : float
        Recording centre frequency minus ``f`` (as for ``doppler_rows``): measured Doppler =
        ``carrier_offset_hz + tuning_offset_hz``.

    Notes
    -----
    The mean and the RMS about the mean are kept as running sums (Welford's update), so memory is
    constant however long the pass; any split of the rows into calls gives the same summary.  The same
    sums are kept for the residuals with the carrier offset's sign flipped, ``-c + t - p``: a recording
    whose spectrum is inverted (the receiver's I and Q swapped, or conjugated) but read upright shows a
    Doppler of the wrong sign, whose residual follows twice the Doppler's change; flipped, it is flat.
    BPSK and residual-carrier signals are their own mirror images, so nothing else in the chain can see it.
    """

    def __init__(self, *, predictor, downlink_frequency_hz: float, tuning_offset_hz: float = 0.0) -> None:
        f = float(downlink_frequency_hz)
        if not (math.isfinite(f) and f > 0):
            raise ValueError(f"Argument 'downlink_frequency_hz' must be a positive finite number, "
                             f"not {downlink_frequency_hz!r}.")
        self.predictor = predictor
        self.downlink_frequency_hz = f
        self.tuning_offset_hz = float(tuning_offset_hz)
        self.reset()

    def predicted_offset_hz(self, tai_ns: int) -> float | None:
        """The carrier offset the recording should show at ``tai_ns``: predicted Doppler - ``tuning_offset_hz``.

        The inverse of the measured side of :meth:`process` (measured Doppler = ``carrier_offset_hz +
        tuning_offset_hz``), so a carrier at this offset has a residual of 0; None where the orbit has no
        state.  The demodulators centre their carrier search on it (a decode with ``--tle``/``--oem``).
        """
        pred = self.predictor.predict(int(tai_ns))
        return None if pred is None else pred.doppler_hz(self.downlink_frequency_hz) - self.tuning_offset_hz

    def reset(self) -> None:
        """Forget the residuals seen so far."""
        self._n = 0
        self._mean = 0.0
        self._m2 = 0.0
        self._mean_inv = 0.0
        self._m2_inv = 0.0

    def process(self, rows: Iterable[dict]) -> list[dict]:
        """Copies of ``rows`` with ``predicted_hz`` and ``residual_hz`` (see :func:`add_doppler_predictions`)."""
        out = []
        for row in rows:
            new = dict(row)
            pred = self.predictor.predict(parse_utc(str(row["utc"]), assume_utc=True))
            predicted = None if pred is None else pred.doppler_hz(self.downlink_frequency_hz)
            new["predicted_hz"] = None if predicted is None else round(predicted, 6)
            off = row.get("carrier_offset_hz")
            residual = None
            if predicted is not None and off is not None and bool(row.get("locked")) and math.isfinite(float(off)):
                residual = float(off) + self.tuning_offset_hz - predicted
                self._n += 1
                delta = residual - self._mean
                self._mean += delta / self._n
                self._m2 += delta * (residual - self._mean)
                flipped = -float(off) + self.tuning_offset_hz - predicted
                delta = flipped - self._mean_inv
                self._mean_inv += delta / self._n
                self._m2_inv += delta * (flipped - self._mean_inv)
            new["residual_hz"] = None if residual is None else round(residual, 6)
            out.append(new)
        return out

    def summary(self) -> DopplerCheck:
        """Mean residual and RMS about it over every row with a residual."""
        if not self._n:
            return DopplerCheck(0, None, None, self.predictor.description)
        rms = math.sqrt(self._m2 / self._n)
        rms_inv = math.sqrt(self._m2_inv / self._n)
        inverted = (self._n >= INVERSION_ROWS and rms > INVERSION_MIN_RMS_HZ and rms_inv * INVERSION_RATIO < rms)
        return DopplerCheck(self._n, round(self._mean, 6), round(rms, 6), self.predictor.description,
                            round(rms_inv, 6), INVERSION_NOTE if inverted else None)


def add_doppler_predictions(rows: Iterable[dict], predictor, *, downlink_frequency_hz: float,
                            tuning_offset_hz: float = 0.0) -> tuple[list[dict], DopplerCheck]:
    """Add ``predicted_hz`` and ``residual_hz`` to Doppler rows and summarise the residuals.

    Parameters
    ----------
    rows : iterable of dict
        As :func:`pipeline.demod.residual.doppler_rows` yields them: ``utc`` (ISO-8601, the instant the
        row's mean frequency refers to), ``carrier_offset_hz``, ``locked``.
    predictor : OrbitPredictor
        Gives ``predict(tai_ns)``.
    downlink_frequency_hz : float
        The carrier's nominal frequency ``f``.
    tuning_offset_hz : float
        Recording centre frequency minus ``f`` (as for ``doppler_rows``): measured Doppler =
        ``carrier_offset_hz + tuning_offset_hz``.

    Returns
    -------
    rows : list of dict
        Copies with ``predicted_hz`` (one-way Doppler at ``f``, light time included, evaluated at the
        row's own time; None where the orbit has no state) and ``residual_hz`` = measured - predicted
        (None when the carrier was not locked or either side is missing); rounded to 1e-6 Hz.
    check : DopplerCheck

    Notes
    -----
    One prediction per row (see :class:`OrbitPredictor`); the mean and the RMS about the mean over the
    rows with a residual, O(n).  The streaming form is :class:`DopplerComparison`.

    Examples
    --------
    >>> from pipeline.orbit import Prediction
    >>> class Fixed:  # a stand-in predictor: +1000 Hz at 8.4 GHz whenever asked
    ...     description = "fixed"
    ...     def predict(self, tai_ns):
    ...         return Prediction(1.0, 3e5, 0.0, 1.0 + 1000.0 / 8.4e9, 45.0)
    >>> rows = [{"utc": "2026-03-14T09:30:00Z", "carrier_offset_hz": 1010.0, "locked": True}]
    >>> out, check = add_doppler_predictions(rows, Fixed(), downlink_frequency_hz=8.4e9)
    >>> out[0]["predicted_hz"], out[0]["residual_hz"], check.mean_residual_hz
    (1000.0, 10.0, 10.0)
    """
    comp = DopplerComparison(predictor=predictor, downlink_frequency_hz=downlink_frequency_hz,
                             tuning_offset_hz=tuning_offset_hz)
    return comp.process(rows), comp.summary()
