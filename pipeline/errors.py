"""Exception hierarchy of the pipeline.

Bad *input* (a file that cannot be read, a profile out of range, an output folder that exists)
raises one of these.  Bad *data* (a codeword that fails RS, a lost lock) never raises: it is a
status on the item and a counter in the run statistics.
"""

from __future__ import annotations

__all__ = [
    "DownlinkError",
    "RecordingError",
    "ProfileError",
    "OutputError",
    "UsageError",
    "DataFileError",
]


class DownlinkError(Exception):
    """Base class of every error the ``downlink`` command reports as one line."""


class RecordingError(DownlinkError):
    """A recording (or symbol file) cannot be opened or read; the message names the file."""


class ProfileError(DownlinkError):
    """A link profile is missing, malformed or out of range; the message names the file and key."""


class OutputError(DownlinkError):
    """The output folder cannot be written, or exists and ``--overwrite`` was not given."""


class UsageError(DownlinkError):
    """The command line asks for something inconsistent (an option out of range, options that exclude
    each other, a required option missing); the message names the option."""


class DataFileError(DownlinkError):
    """An input file other than a recording or a profile cannot be used: an element set, an ephemeris, a
    tracking data message, a decoded folder or a clock file; the message names the file and the fault."""
