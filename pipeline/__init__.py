"""downlink: a software-defined CCSDS telemetry decoding pipeline.

The public API: :func:`decode` (a recording in, packets, frames and a pass report out),
:func:`open_recording`, :func:`load_profile` and :func:`demo_profile_path`, :func:`simulate`
(a recording with known truth), and the error classes.

Decoded data is no substitute for the mission's validated ground segment.
"""

from pipeline._version import __version__
from pipeline.chain import DecodeResult, decode
from pipeline.errors import DownlinkError, OutputError, ProfileError, RecordingError
from pipeline.profile import LinkProfile, demo_profile_path, load_profile
from pipeline.recording import open_recording
from pipeline.sim import simulate

__all__ = [
    "__version__",
    "DecodeResult",
    "DownlinkError",
    "LinkProfile",
    "OutputError",
    "ProfileError",
    "RecordingError",
    "decode",
    "demo_profile_path",
    "load_profile",
    "open_recording",
    "simulate",
]
