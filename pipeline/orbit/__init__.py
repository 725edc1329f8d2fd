"""pipeline.orbit: light time and one-way Doppler at the station, and the Tracking Data Message writer.

Orbits from a two-line element set (SGP4 through the ``sgp4`` library) or a CCSDS Orbit Ephemeris
Message (502.0-B, key-value text, Hermite-interpolated); the station from the profile's ``[station]``
(WGS-84); predictions at the instant of reception, light time included (:class:`OrbitPredictor`); a
constant light time or range for ``downlink clock`` (:class:`ConstantLightTime`); Doppler rows checked
against the prediction (:func:`add_doppler_predictions`); the carrier track as a CCSDS Tracking Data
Message (503.0-B, :func:`write_tdm`, or :class:`TdmWriter` as the rows arrive).  See DEVELOPERS.md, "pipeline.orbit".
"""

from pipeline.orbit._doppler import PREDICTION_COLUMNS, DopplerCheck, DopplerComparison, add_doppler_predictions
from pipeline.orbit._earth import GroundStation, geodetic_to_ecef_km, gmst82_rad, inertial_to_earth_fixed
from pipeline.orbit._oem import Ephemeris, EphemerisSegment, parse_oem, read_oem
from pipeline.orbit._predict import ConstantLightTime, LightTimeSource, OrbitPredictor, Prediction
from pipeline.orbit._tdm import TdmWriter, TrackingData, TrackingSegment, format_tdm, parse_tdm, read_tdm, write_tdm
from pipeline.orbit._tle import ElementSet, parse_tle, read_tle

__all__ = [
    "ConstantLightTime",
    "DopplerCheck",
    "DopplerComparison",
    "ElementSet",
    "Ephemeris",
    "EphemerisSegment",
    "GroundStation",
    "LightTimeSource",
    "OrbitPredictor",
    "PREDICTION_COLUMNS",
    "Prediction",
    "TdmWriter",
    "TrackingData",
    "TrackingSegment",
    "add_doppler_predictions",
    "format_tdm",
    "geodetic_to_ecef_km",
    "gmst82_rad",
    "inertial_to_earth_fixed",
    "parse_oem",
    "parse_tdm",
    "parse_tle",
    "read_oem",
    "read_tdm",
    "read_tle",
    "write_tdm",
]
