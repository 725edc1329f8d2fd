"""The Earth: WGS-84 station positions and the rotation between inertial frames and the Earth-fixed frame.

Frames (the names of the CCSDS Orbit Data Messages' ``REF_FRAME``):

``TEME``
    True equator, mean equinox: the frame of SGP4 element sets.  To the Earth-fixed frame by the
    Greenwich mean sidereal time (GMST 1982) alone (Vallado et al. 2006, sec. on TEME).
``EME2000`` (also ``GCRF``, ``ICRF``)
    Mean equator and equinox of J2000.0.  To the Earth-fixed frame by IAU 1976 precession, IAU 1980
    nutation (the 9 largest terms) and apparent sidereal time.  The 23 mas frame bias between EME2000
    and GCRF/ICRF is neglected (0.7 m at the Earth's surface).
``ITRF`` (any realisation)
    Earth-fixed.  Polar motion (up to about 0.5 arcsec, 15 m) is neglected: the terrestrial frame
    here is the pseudo Earth-fixed frame of date.

Every rotation takes UT1 from UTC plus ``ut1_minus_utc_s`` (IERS Bulletin A gives it; |UT1 - UTC| <
0.9 s); left at 0 the station is misplaced by up to 0.9 s of Earth rotation (420 m at the equator),
up to 1.4 us of light time and about 1 Hz of X-band Doppler.  Checked against astropy's ITRS and
TEME frames in the tests.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from pipeline.timescales import NS_PER_DAY, SCALE_OFFSETS_NS, utc_julian_date

__all__ = [
    "WGS84_A_KM",
    "WGS84_F",
    "EARTH_GM_KM3_S2",
    "EARTH_ROTATION_RAD_S",
    "SPEED_OF_LIGHT_KM_S",
    "INERTIAL_FRAMES",
    "GroundStation",
    "geodetic_to_ecef_km",
    "gmst82_rad",
    "inertial_to_earth_fixed",
    "working_frame",
]

#: WGS-84 semi-major axis (km) and flattening (NIMA TR8350.2, common practice).
WGS84_A_KM = 6378.137
WGS84_F = 1.0 / 298.257223563
#: Earth's gravitational parameter (km^3/s^2, WGS-84 / IERS 2010 value 3.986004418e14 m^3/s^2).
EARTH_GM_KM3_S2 = 398600.4418
#: Nominal mean angular velocity of the Earth (rad/s, IERS Conventions 2010 sec. 1.2).
EARTH_ROTATION_RAD_S = 7.292115146706979e-5
#: Speed of light (km/s, exact by the SI definition of the metre).
SPEED_OF_LIGHT_KM_S = 299_792.458

#: Frames an orbit may be given in, and the inertial frame each is worked in.
INERTIAL_FRAMES = {"TEME": "TEME", "EME2000": "EME2000", "GCRF": "EME2000", "ICRF": "EME2000",
                   "ITRF": "TEME"}

_ARCSEC = math.pi / (180.0 * 3600.0)
_JD_1958 = 2436204.5  # JD of 1958-01-01T00:00:00 (the epoch of the TAI ns scale)


def working_frame(ref_frame: str) -> str:
    """The inertial frame an orbit given in ``ref_frame`` is worked in (``ITRF...`` -> TEME)."""
    key = ref_frame.upper()
    if key.startswith("ITRF"):
        return "TEME"
    if key not in INERTIAL_FRAMES:
        raise ValueError(f"Argument 'ref_frame' must be one of TEME, EME2000, GCRF, ICRF or ITRF..., "
                         f"not {ref_frame!r}.")
    return INERTIAL_FRAMES[key]


def geodetic_to_ecef_km(latitude_deg: float, longitude_deg: float, altitude_m: float) -> np.ndarray:
    """Earth-fixed Cartesian position (km) of a WGS-84 geodetic latitude, longitude and ellipsoidal height.

    Notes
    -----
    ``N = a / sqrt(1 - e^2 sin^2 phi)``, ``x = (N + h) cos phi cos lambda``, ``y = (N + h) cos phi
    sin lambda``, ``z = (N (1 - e^2) + h) sin phi`` with ``e^2 = f (2 - f)``.

    References
    ----------
    NIMA TR8350.2 (WGS-84), sec. 4 (common practice; checked against astropy's EarthLocation).

    Examples
    --------
    >>> geodetic_to_ecef_km(0.0, 0.0, 0.0).tolist()
    [6378.137, 0.0, 0.0]
    """
    phi, lam = math.radians(latitude_deg), math.radians(longitude_deg)
    h = altitude_m / 1000.0
    e2 = WGS84_F * (2.0 - WGS84_F)
    n = WGS84_A_KM / math.sqrt(1.0 - e2 * math.sin(phi) ** 2)
    return np.array([(n + h) * math.cos(phi) * math.cos(lam), (n + h) * math.cos(phi) * math.sin(lam),
                     (n * (1.0 - e2) + h) * math.sin(phi)])


def _r1(a: float) -> np.ndarray:
    c, s = math.cos(a), math.sin(a)
    return np.array([[1.0, 0.0, 0.0], [0.0, c, s], [0.0, -s, c]])


def _r2(a: float) -> np.ndarray:
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, 0.0, -s], [0.0, 1.0, 0.0], [s, 0.0, c]])


def _r3(a: float) -> np.ndarray:
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, s, 0.0], [-s, c, 0.0], [0.0, 0.0, 1.0]])


def gmst82_rad(jd_ut1_whole: float, jd_ut1_fraction: float) -> float:
    """Greenwich mean sidereal time, IAU 1982 model (rad, 0..2 pi), of a Julian date of UT1.

    Notes
    -----
    ``GMST = 67310.54841 s + (876600 h + 8640184.812866 s) T + 0.093104 s T^2 - 6.2e-6 s T^3`` with
    ``T`` Julian centuries of UT1 from J2000.0 (Aoki et al. 1982; from memory, not confirmed; checked
    against astropy's ``sidereal_time('mean', model='IAU1982')`` in the tests).

    Examples
    --------
    >>> round(math.degrees(gmst82_rad(2451545.0, 0.0)), 6)   # J2000.0: 280.46061837 deg
    280.460618
    """
    t = ((jd_ut1_whole - 2451545.0) + jd_ut1_fraction) / 36525.0
    seconds = 67310.54841 + (876600.0 * 3600.0 + 8640184.812866) * t + 0.093104 * t * t - 6.2e-6 * t ** 3
    return (seconds % 86400.0) * (2.0 * math.pi / 86400.0)


# IAU 1980 nutation, the 9 largest terms: multipliers of (l, l', F, D, Omega) and the coefficients of
# sin (dpsi) and cos (deps) in 0.0001 arcsec (A + B T).  Seidelmann 1982 / Explanatory Supplement (1992)
# table 3.222.1; from memory, not confirmed (checked against astropy in the tests).
_NUTATION_TERMS = (
    ((0, 0, 0, 0, 1), -171996.0, -174.2, 92025.0, 8.9),
    ((0, 0, 2, -2, 2), -13187.0, -1.6, 5736.0, -3.1),
    ((0, 0, 2, 0, 2), -2274.0, -0.2, 977.0, -0.5),
    ((0, 0, 0, 0, 2), 2062.0, 0.2, -895.0, 0.5),
    ((0, 1, 0, 0, 0), 1426.0, -3.4, 54.0, -0.1),
    ((1, 0, 0, 0, 0), 712.0, 0.1, -7.0, 0.0),
    ((0, 1, 2, -2, 2), -517.0, 1.2, 224.0, -0.6),
    ((0, 0, 2, 0, 1), -386.0, -0.4, 200.0, 0.0),
    ((1, 0, 2, 0, 2), -301.0, 0.0, 129.0, -0.1),
)


def _precession_nutation(t: float) -> tuple[np.ndarray, float, float]:
    """``(N P, dpsi, eps)`` for ``t`` Julian centuries of TT from J2000.0 (mean of J2000 -> true of date)."""
    zeta = (2306.2181 * t + 0.30188 * t * t + 0.017998 * t ** 3) * _ARCSEC  # IAU 1976 (Lieske et al. 1977)
    z = (2306.2181 * t + 1.09468 * t * t + 0.018203 * t ** 3) * _ARCSEC
    theta = (2004.3109 * t - 0.42665 * t * t - 0.041833 * t ** 3) * _ARCSEC
    prec = _r3(-z) @ _r2(theta) @ _r3(-zeta)
    eps0 = (84381.448 - 46.8150 * t - 0.00059 * t * t + 0.001813 * t ** 3) * _ARCSEC
    deg = math.pi / 180.0
    args = (  # Delaunay arguments (rad), IAU 1980 (Explanatory Supplement 1992, eq. 3.222-3; from memory)
        (134.96298139 + 477198.8673981 * t) * deg,  # l, the Moon's mean anomaly
        (357.52772333 + 35999.0503400 * t) * deg,  # l', the Sun's mean anomaly
        (93.27191028 + 483202.0175381 * t) * deg,  # F
        (297.85036306 + 445267.1114800 * t) * deg,  # D
        (125.04452222 - 1934.1362608 * t) * deg,  # Omega
    )
    dpsi = deps = 0.0
    for mult, a, b, c, d in _NUTATION_TERMS:
        arg = sum(m * x for m, x in zip(mult, args))
        dpsi += (a + b * t) * math.sin(arg)
        deps += (c + d * t) * math.cos(arg)
    dpsi *= 1e-4 * _ARCSEC
    deps *= 1e-4 * _ARCSEC
    eps = eps0 + deps
    nut = _r1(-eps) @ _r3(-dpsi) @ _r1(eps0)
    return nut @ prec, dpsi, eps


def inertial_to_earth_fixed(frame: str, tai_ns: int, *, ut1_minus_utc_s: float = 0.0) -> np.ndarray:
    """Rotation matrix ``M`` with ``r_earth_fixed = M r_inertial`` at a TAI instant.

    Parameters
    ----------
    frame : {"TEME", "EME2000"}
        The inertial frame (see :func:`working_frame`).
    tai_ns : int
        TAI ns since 1958.
    ut1_minus_utc_s : float
        UT1 - UTC (s).

    Notes
    -----
    TEME: ``M = R3(GMST)``.  EME2000: ``M = R3(GAST) N P`` with ``GAST = GMST + dpsi cos eps`` (the
    equation of the equinoxes).  About 30 us per call.

    Examples
    --------
    >>> from pipeline.timescales import parse_utc
    >>> m = inertial_to_earth_fixed("TEME", parse_utc("2026-03-14T09:30:00Z"))
    >>> bool(np.allclose(m @ m.T, np.eye(3)))
    True
    """
    whole, frac = utc_julian_date(tai_ns)
    gmst = gmst82_rad(whole, frac + ut1_minus_utc_s / 86400.0)
    if frame == "TEME":
        return _r3(gmst)
    if frame != "EME2000":
        raise ValueError(f"Argument 'frame' must be TEME or EME2000, not {frame!r}.")
    t = ((_JD_1958 - 2451545.0) + (tai_ns + SCALE_OFFSETS_NS["TT"]) / NS_PER_DAY) / 36525.0
    npm, dpsi, eps = _precession_nutation(t)
    return _r3(gmst + dpsi * math.cos(eps)) @ npm


@dataclass(frozen=True)
class GroundStation:
    """A receiving station at a WGS-84 geodetic position.

    Attributes
    ----------
    name : str
    latitude_deg, longitude_deg : float
        Geodetic, degrees (north and east positive).
    altitude_m : float
        Height above the WGS-84 ellipsoid.

    Examples
    --------
    >>> hr = GroundStation("HOLLOW RIDGE", 44.7261, 3.4117, 1012.0)
    >>> round(float(np.linalg.norm(hr.ecef_km)), 3)
    6368.604
    """

    name: str
    latitude_deg: float
    longitude_deg: float
    altitude_m: float = 0.0

    @classmethod
    def from_profile(cls, profile) -> GroundStation:
        """The ``[station]`` section of a profile (ValueError when it has no position)."""
        st = profile.station
        if not st.has_position:
            raise ValueError(f"{profile.source}: [station] needs latitude_deg and longitude_deg for light time and "
                             f"predicted Doppler from an orbit")
        return cls(st.name or "STATION", float(st.latitude_deg), float(st.longitude_deg), float(st.altitude_m))

    @property
    def ecef_km(self) -> np.ndarray:
        """Earth-fixed position (km)."""
        return geodetic_to_ecef_km(self.latitude_deg, self.longitude_deg, self.altitude_m)

    @property
    def up(self) -> np.ndarray:
        """Unit vector of the local vertical (ellipsoid normal) in the Earth-fixed frame."""
        phi, lam = math.radians(self.latitude_deg), math.radians(self.longitude_deg)
        return np.array([math.cos(phi) * math.cos(lam), math.cos(phi) * math.sin(lam), math.sin(phi)])

    def inertial_state(self, frame: str, tai_ns: int, *, ut1_minus_utc_s: float = 0.0
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(r_km, v_km_s, M)``: the station's position and velocity in ``frame`` and the rotation used.

        ``r = M^T r_ef``, ``v = M^T (omega x r_ef)`` with ``omega`` the Earth's rotation about its axis.
        """
        m = inertial_to_earth_fixed(frame, tai_ns, ut1_minus_utc_s=ut1_minus_utc_s)
        r_ef = self.ecef_km
        v_ef = np.cross(np.array([0.0, 0.0, EARTH_ROTATION_RAD_S]), r_ef)
        return m.T @ r_ef, m.T @ v_ef, m
