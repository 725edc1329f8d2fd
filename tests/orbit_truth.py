"""Invented orbits for the tests and the demo, written here without pipeline/ code.

- The lunar relay orbiter *Tamarisk*: an analytic trajectory in the Earth-centred EME2000 frame, the Moon
  on a circular orbit about the Earth plus a circular polar orbit about the Moon (two-body, invented
  elements).  An element set cannot describe it, so the demo's ephemeris is an OEM written from it.
- An invented low Earth orbiter element set (catalogue number 99999) for the SGP4 tests, and the one-way
  Doppler of its passes over Hollow Ridge from the ``sgp4`` library and erfa's GMST (light time iterated,
  differentiated numerically): the truth the Doppler check and the predicted acquisition are tested against.

``python tests/orbit_truth.py`` rewrites ``pipeline/data/tamarisk.oem`` (a test checks the two agree).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

GM_EARTH = 398600.4418  # km^3/s^2 (WGS-84)
GM_MOON = 4902.800066  # km^3/s^2 (lunar gravitational parameter, common practice)
MOON_DISTANCE_KM = 384_400.0
MOON_INCLINATION_DEG = 28.58  # of the invented lunar orbit plane to the equator
LUNAR_ORBIT_RADIUS_KM = 1737.4 + 100.0  # 100 km above the mean lunar radius

#: The demo's reference instant (the [simulate] start of the Tamarisk profile) as POSIX seconds.
DEMO_EPOCH_TEXT = "2026-03-14T09:30:00"
DEMO_EPOCH_POSIX_S = 1_773_480_600  # 2026-03-14T09:30:00Z


def tamarisk_state(t_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Position (km) and velocity (km/s) in EME2000 at ``t_s`` seconds after the demo epoch (UTC scale).

    Moon: circular, radius 384 400 km, period from ``GM_earth + GM_moon`` (Kepler's third law), plane
    inclined 28.58 deg about the x axis, argument 1.05 rad at the epoch (invented: above the Hollow Ridge
    meridian around the demo time).  Orbiter: circular polar orbit of radius 1837.4 km about the Moon,
    in the plane spanned by the x and z axes, argument 0.3 rad at the epoch.
    """
    n_m = math.sqrt((GM_EARTH + GM_MOON) / MOON_DISTANCE_KM ** 3)
    u = 1.05 + n_m * t_s
    inc = math.radians(MOON_INCLINATION_DEG)
    p_m = np.array([math.cos(u), math.sin(u) * math.cos(inc), math.sin(u) * math.sin(inc)])
    d_m = np.array([-math.sin(u), math.cos(u) * math.cos(inc), math.cos(u) * math.sin(inc)])
    n_l = math.sqrt(GM_MOON / LUNAR_ORBIT_RADIUS_KM ** 3)
    w = 0.3 + n_l * t_s
    p_l = np.array([math.cos(w), 0.0, math.sin(w)])
    d_l = np.array([-math.sin(w), 0.0, math.cos(w)])
    r = MOON_DISTANCE_KM * p_m + LUNAR_ORBIT_RADIUS_KM * p_l
    v = MOON_DISTANCE_KM * n_m * d_m + LUNAR_ORBIT_RADIUS_KM * n_l * d_l
    return r, v


def _utc_text(posix_s: float) -> str:
    import datetime as dt

    whole = math.floor(posix_s)
    frac = posix_s - whole
    t = dt.datetime(1970, 1, 1) + dt.timedelta(seconds=whole)
    return t.strftime("%Y-%m-%dT%H:%M:%S") + f".{round(frac * 1e6):06d}"


def oem_text(state, *, start_s: float, stop_s: float, step_s: float, object_name: str = "TAMARISK",
             object_id: str = "2026-999A", ref_frame: str = "EME2000", epoch_posix_s: int = DEMO_EPOCH_POSIX_S,
             degree: int | None = 7, comment: str = "Invented ephemeris, not a real mission") -> str:
    """An Orbit Ephemeris Message in key-value notation (CCSDS 502.0-B-2 keywords, from memory, not confirmed)."""
    n = int(round((stop_s - start_s) / step_s)) + 1
    times = [start_s + k * step_s for k in range(n)]
    lines = ["CCSDS_OEM_VERS = 2.0", f"COMMENT {comment}", "CREATION_DATE = 2026-03-01T00:00:00.000",
             "ORIGINATOR = TESTS", "", "META_START", f"OBJECT_NAME = {object_name}", f"OBJECT_ID = {object_id}",
             "CENTER_NAME = EARTH", f"REF_FRAME = {ref_frame}", "TIME_SYSTEM = UTC",
             f"START_TIME = {_utc_text(epoch_posix_s + times[0])}",
             f"STOP_TIME = {_utc_text(epoch_posix_s + times[-1])}"]
    if degree is not None:
        lines += ["INTERPOLATION = HERMITE", f"INTERPOLATION_DEGREE = {degree}"]
    lines += ["META_STOP", ""]
    for t in times:
        r, v = state(t)
        lines.append(f"{_utc_text(epoch_posix_s + t)} " + " ".join(f"{x:.6f}" for x in r) + " "
                     + " ".join(f"{x:.9f}" for x in v))
    return "\n".join(lines) + "\n"


def demo_oem_text() -> str:
    """The bundled demo ephemeris: Tamarisk from 1 h before to 2 h after the demo epoch, one state a minute."""
    return oem_text(tamarisk_state, start_s=-3600.0, stop_s=7200.0, step_s=60.0,
                    comment="Invented ephemeris of the invented lunar relay orbiter Tamarisk (tests/orbit_truth.py)")


def tle_checksum(line: str) -> str:
    """Column 69: sum of the digits of columns 1-68, '-' counting 1, modulo 10 (common practice)."""
    return str(sum(int(c) if c.isdigit() else (1 if c == "-" else 0) for c in line[:68]) % 10)


def leo_tle(epoch_yyddd: str = "20167.50000000", raan: str = "305.0000", anomaly: str = "200.0000") -> tuple[str, str]:
    """An invented sun-synchronous low orbiter (catalogue 99999), two lines with checksums."""
    l1 = f"1 99999U 20999A   {epoch_yyddd}  .00000100  00000+0  10000-4 0  999"
    l2 = f"2 99999  97.6000 {raan} 0012000  80.0000 {anomaly} 15.10000000 1000"
    assert len(l1) == 68 and len(l2) == 68, (len(l1), len(l2))
    return l1 + tle_checksum(l1), l2 + tle_checksum(l2)


# ---- the one-way Doppler of a low orbiter over Hollow Ridge, from sgp4 and erfa (no pipeline/ code) --------------

C_KM_S = 299_792.458
HOLLOW_RIDGE = (44.7261, 3.4117, 1012.0)  # the invented station (the demo profile's): latitude, longitude (deg), m


def station_ecef_km(lat_deg: float = HOLLOW_RIDGE[0], lon_deg: float = HOLLOW_RIDGE[1],
                    alt_m: float = HOLLOW_RIDGE[2]) -> np.ndarray:
    """WGS-84 geodetic -> Earth-fixed (the textbook formula; a = 6378.137 km, f = 1/298.257223563)."""
    a, f = 6378.137, 1 / 298.257223563
    e2 = f * (2 - f)
    lat, lon = math.radians(lat_deg), math.radians(lon_deg)
    n = a / math.sqrt(1 - e2 * math.sin(lat) ** 2)
    h = alt_m / 1000.0
    return np.array([(n + h) * math.cos(lat) * math.cos(lon), (n + h) * math.cos(lat) * math.sin(lon),
                     (n * (1 - e2) + h) * math.sin(lat)])


def julian_date(posix_s: float) -> tuple[float, float]:
    """The two-part Julian date (day, fraction) of a POSIX time, as sgp4 and erfa take it."""
    return 2440587.5 + math.floor(posix_s / 86400.0), (posix_s % 86400.0) / 86400.0


def _station_teme(station: np.ndarray, posix_s: float) -> tuple[np.ndarray, float, float]:
    import erfa  # pyerfa, installed with astropy (the [test] extra)

    gmst = erfa.gmst82(*julian_date(posix_s))
    c, s = math.cos(gmst), math.sin(gmst)
    return np.array([c * station[0] - s * station[1], s * station[0] + c * station[1], station[2]]), c, s


def light_time_s(sat, posix_r: float, station: np.ndarray) -> float:
    """One-way light time of reception at ``posix_r`` (UTC seconds; UT1 = UTC): sgp4 position at emission,
    the station rotated into TEME by erfa's GMST 1982."""
    r_st, _, _ = _station_teme(station, posix_r)
    tau = 0.0
    for _ in range(8):
        e, r, _ = sat.sgp4(*julian_date(posix_r - tau))
        assert e == 0
        tau = float(np.linalg.norm(np.array(r) - r_st)) / C_KM_S
    return tau


def doppler_hz(sat, posix_r: float, station: np.ndarray, carrier_hz: float, h: float = 0.01) -> float:
    """One-way Doppler f (1 - d tau / d t_r) - f at reception, by a central difference of the light time."""
    return -carrier_hz * (light_time_s(sat, posix_r + h, station) - light_time_s(sat, posix_r - h, station)) / (2 * h)


def culmination_posix_s(sat, station: np.ndarray) -> float:
    """POSIX time (UTC, on a 20 s grid) of the highest point of the first pass of the day after the epoch."""
    epoch = (sat.jdsatepoch - 2440587.5 + sat.jdsatepochF) * 86400.0
    best, best_t = -1.0, epoch
    up = station / np.linalg.norm(station)
    for k in range(0, 86400, 20):
        t = epoch + k
        r_st, c, s = _station_teme(station, t)
        u = np.array([c * up[0] - s * up[1], s * up[0] + c * up[1], up[2]])
        _, r, _ = sat.sgp4(*julian_date(t))
        d = np.array(r) - r_st
        elev = math.degrees(math.asin(float(np.dot(d, u)) / float(np.linalg.norm(d))))
        if elev > best:
            best, best_t = elev, t
        elif best > 30 and elev < 0:
            break
    assert best > 30, "the invented element set must rise well above the station within a day"
    return best_t


if __name__ == "__main__":
    out = Path(__file__).resolve().parent.parent / "pipeline" / "data" / "tamarisk.oem"
    out.write_text(demo_oem_text(), encoding="ascii")
    print(f"wrote {out}")
