"""downlink: a software-defined CCSDS telemetry decoding pipeline.

The public API: :func:`decode` (a recording in, packets, frames and a pass report out) with its
:class:`DecodeSummary`, :func:`open_recording`, :func:`load_profile` and :func:`demo_profile_path`,
:func:`simulate` (a recording with known truth), and the error classes.  The names that need the
numerical stages (numpy, numba) are imported on first use, so that ``import pipeline`` and the
command line's help stay quick.

Decoded data is no substitute for the mission's validated ground segment.
"""

from pipeline._version import __version__
from pipeline.errors import DownlinkError, OutputError, ProfileError, RecordingError, UsageError
from pipeline.profile import LinkProfile, demo_profile_path, load_profile

__all__ = [
    "__version__",
    "DecodeSummary",
    "DownlinkError",
    "LinkProfile",
    "OutputError",
    "ProfileError",
    "RecordingError",
    "UsageError",
    "decode",
    "demo_profile_path",
    "load_profile",
    "open_recording",
    "simulate",
]

#: Public names imported on first use, by the module that defines them.
_LAZY = {
    "DecodeSummary": "pipeline.chain",
    "decode": "pipeline.chain",
    "open_recording": "pipeline.recording",
    "simulate": "pipeline.sim",
}


def __getattr__(name: str):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'pipeline' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
