"""Light time and one-way Doppler at a receiving station, from an orbit or from a constant.

Every quantity refers to an instant of **reception** ``t_r`` at the station (the time a Doppler row or
a frame's ERT names), on the TAI ns scale of :mod:`pipeline.timescales`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from pipeline.orbit._earth import EARTH_GM_KM3_S2, SPEED_OF_LIGHT_KM_S, GroundStation
from pipeline.timescales import NS_PER_S

__all__ = ["Prediction", "OrbitPredictor", "ConstantLightTime", "LightTimeSource"]

_C = SPEED_OF_LIGHT_KM_S
_MAX_ITERATIONS = 12


class _Orbit(Protocol):
    frame: str
    description: str

    def state(self, tai_ns: int) -> tuple[np.ndarray, np.ndarray] | None: ...


class LightTimeSource(Protocol):
    """Anything that gives the one-way light time (s) of a signal received at a TAI instant."""

    description: str

    def light_time_s(self, tai_ns: int) -> float | None: ...


@dataclass(frozen=True)
class Prediction:
    """Geometry of one reception.

    Attributes
    ----------
    light_time_s : float
        One-way light time: reception minus emission, TAI seconds.
    range_km : float
        Distance from the spacecraft at emission to the station at reception (inertial frame).
    range_rate_km_s : float
        ``c d(light time)/d t_r``: positive when the spacecraft recedes.
    frequency_ratio : float
        Received over transmitted frequency (each in its own proper time when ``relativistic``).
    elevation_deg : float
        Elevation of the spacecraft above the station's ellipsoidal horizon (geometric).
    """

    light_time_s: float
    range_km: float
    range_rate_km_s: float
    frequency_ratio: float
    elevation_deg: float

    def doppler_hz(self, frequency_hz: float) -> float:
        """One-way Doppler shift ``f (ratio - 1)`` of a carrier transmitted at ``frequency_hz``."""
        return float(frequency_hz) * (self.frequency_ratio - 1.0)


class OrbitPredictor:
    """Light time and one-way Doppler at a station from an element set or an ephemeris.

    Parameters
    ----------
    orbit : ElementSet or Ephemeris
        Anything with ``frame`` (TEME or EME2000), ``description`` and ``state(tai_ns) -> (r_km,
        v_km_s) | None``.
    station : GroundStation
    ut1_minus_utc_s : float
        UT1 - UTC for the Earth's rotation (see :mod:`pipeline.orbit._earth`; 0 costs up to ~1 Hz at X band).
    relativistic : bool
        Include the clock-rate terms of special and general relativity (below).

    Notes
    -----
    In the orbit's inertial frame, with the station at ``r_s, v_s`` at reception ``t_r``: iterate
    ``tau = |r(t_r - tau) - r_s| / c`` from ``tau = 0`` until it changes by less than 1 ps (3 or 4
    steps).  With ``u`` the unit vector from the station to the spacecraft at emission,
    ``a = u.v/c`` and ``b = u.v_s/c``, the one-way frequency ratio is ``(1 + b) / (1 + a)`` (exact
    first-order light-time Doppler, ``d t_e / d t_r``), times
    ``(1 - v^2/2c^2 - GM/(r c^2)) / (1 - v_s^2/2c^2 - GM/(r_s c^2))`` when ``relativistic`` (proper-time
    rates of both clocks in the Earth's field; about -2.6e-10 for a low orbit, -2.2 Hz at 8.4 GHz).
    Each call costs a few orbit evaluations and two 3x3 rotations (about 0.2 ms).

    References
    ----------
    T. D. Moyer, *Formulation for Observed and Computed Values of Deep Space Network Data Types*,
    JPL 2000, ch. 8 and 13 (light-time solution, one-way Doppler); from memory, not confirmed.

    Examples
    --------
    >>> from pipeline.orbit import parse_tle, GroundStation
    >>> from pipeline.timescales import parse_utc
    >>> tle = parse_tle('''1 99999U 26001A   26073.39583333  .00000000  00000+0  00000+0 0  9997
    ... 2 99999  97.5000 120.0000 0010000  90.0000 270.0000 15.20000000    19''')
    >>> p = OrbitPredictor(tle, GroundStation("HOLLOW RIDGE", 44.7261, 3.4117, 1012.0))
    >>> pred = p.predict(parse_utc("2026-03-14T09:30:00Z"))
    >>> 0.002 < pred.light_time_s < 0.05
    True
    """

    def __init__(self, orbit: _Orbit, station: GroundStation, *, ut1_minus_utc_s: float = 0.0,
                 relativistic: bool = True) -> None:
        if not isinstance(station, GroundStation):
            raise TypeError(f"Argument 'station' must be a GroundStation, not {type(station).__name__}.")
        if not math.isfinite(float(ut1_minus_utc_s)) or abs(float(ut1_minus_utc_s)) > 1.0:
            raise ValueError(f"Argument 'ut1_minus_utc_s' must be within -1..1 s, not {ut1_minus_utc_s!r}.")
        self.orbit = orbit
        self.station = station
        self.ut1_minus_utc_s = float(ut1_minus_utc_s)
        self.relativistic = bool(relativistic)
        self.frame = orbit.frame

    @property
    def description(self) -> str:
        return f"{self.orbit.description}, station {self.station.name}"

    def predict(self, tai_ns: int) -> Prediction | None:
        """The :class:`Prediction` for reception at ``tai_ns``; None where the orbit has no state."""
        t_r = int(tai_ns)
        r_s, v_s, m = self.station.inertial_state(self.frame, t_r, ut1_minus_utc_s=self.ut1_minus_utc_s)
        tau = 0.0
        for _ in range(_MAX_ITERATIONS):
            st = self.orbit.state(t_r - round(tau * NS_PER_S))
            if st is None:
                return None
            r, v = st
            rho = r - r_s
            dist = float(np.sqrt(rho @ rho))
            new = dist / _C
            done = abs(new - tau) < 1e-12
            tau = new
            if done:
                break
        u = rho / dist
        a, b = float(u @ v) / _C, float(u @ v_s) / _C
        ratio = (1.0 + b) / (1.0 + a)
        if self.relativistic:
            c2 = _C * _C
            sc = 1.0 - float(v @ v) / (2 * c2) - EARTH_GM_KM3_S2 / (float(np.sqrt(r @ r)) * c2)
            gs = 1.0 - float(v_s @ v_s) / (2 * c2) - EARTH_GM_KM3_S2 / (float(np.sqrt(r_s @ r_s)) * c2)
            ratio *= sc / gs
        up_inertial = m.T @ self.station.up
        elevation = math.degrees(math.asin(max(-1.0, min(1.0, float(u @ up_inertial)))))
        return Prediction(light_time_s=tau, range_km=dist, range_rate_km_s=_C * (a - b) / (1.0 + a),
                          frequency_ratio=ratio, elevation_deg=elevation)

    def light_time_s(self, tai_ns: int) -> float | None:
        """One-way light time (s) of a signal received at ``tai_ns``; None where the orbit has no state."""
        p = self.predict(tai_ns)
        return None if p is None else p.light_time_s

    def doppler_hz(self, tai_ns: int, frequency_hz: float) -> float | None:
        """Predicted one-way Doppler (Hz) at ``frequency_hz`` for reception at ``tai_ns``."""
        p = self.predict(tai_ns)
        return None if p is None else p.doppler_hz(frequency_hz)


class ConstantLightTime:
    """A light time that does not change over the pass (``--light-time`` or ``--range-km``).

    Examples
    --------
    >>> round(ConstantLightTime.from_range_km(384_400.0).light_time_s(0), 9)   # 384400 km / c
    1.282220382
    """

    def __init__(self, seconds: float, *, description: str | None = None) -> None:
        s = float(seconds)
        if not (math.isfinite(s) and 0.0 <= s <= 1e6):
            raise ValueError(f"Argument 'seconds' must be a light time of 0..1e6 s, not {seconds!r}.")
        self.seconds = s
        self.description = description or f"constant light time {s:.9f} s"

    @classmethod
    def from_range_km(cls, range_km: float) -> ConstantLightTime:
        """Light time of a constant one-way range: ``range / c``."""
        km = float(range_km)
        if not (math.isfinite(km) and 0.0 <= km <= 1e6 * _C):
            raise ValueError(f"Argument 'range_km' must be 0..{1e6 * _C:g} km, not {range_km!r}.")
        return cls(km / _C, description=f"constant range {km:.3f} km (light time {km / _C:.9f} s)")

    def light_time_s(self, tai_ns: int) -> float:
        return self.seconds
