"""pipeline.link: transfer frames (TM, CCSDS 132.0-B; AOS, CCSDS 732.0-B) and channel accounting.

See DEVELOPERS.md, stage contracts.
"""

from pipeline.link._accounting import (
    ChannelAccounting,
    CountTrack,
    CountTracker,
    FramePeriod,
    Gap,
    TrackStep,
    count_step,
    master_missing,
)
from pipeline.link._fhec import FhecResult, fhec_check, fhec_decode, fhec_parity
from pipeline.link._frames import (
    BDP_ALL_VALID,
    BDP_IDLE,
    FHP_IDLE,
    FHP_NO_HEADER,
    FRAME_STATUSES,
    HEADER_FIELDS,
    CountAnomaly,
    FrameParser,
    FrameParserStats,
    FrameRecord,
    decode_clcw,
)

__all__ = [
    "FrameParser",
    "FrameParserStats",
    "FrameRecord",
    "FRAME_STATUSES",
    "HEADER_FIELDS",
    "CountAnomaly",
    "ChannelAccounting",
    "CountTracker",
    "CountTrack",
    "TrackStep",
    "Gap",
    "count_step",
    "master_missing",
    "FramePeriod",
    "decode_clcw",
    "fhec_parity",
    "fhec_check",
    "fhec_decode",
    "FhecResult",
    "FHP_NO_HEADER",
    "FHP_IDLE",
    "BDP_ALL_VALID",
    "BDP_IDLE",
]
