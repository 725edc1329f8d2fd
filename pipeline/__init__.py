"""downlink: a software-defined CCSDS telemetry decoding pipeline.

Decoded data is no substitute for the mission's validated ground segment.
"""

from pipeline._version import __version__
from pipeline.errors import DownlinkError, OutputError, ProfileError, RecordingError
from pipeline.profile import LinkProfile, load_profile

__all__ = [
    "__version__",
    "DownlinkError",
    "OutputError",
    "ProfileError",
    "RecordingError",
    "LinkProfile",
    "load_profile",
]
