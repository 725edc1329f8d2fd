"""pipeline.chain: the product path, a recording in, packets, frames and a pass report out.

::

    FrontEnd  samples | channel symbols -> demodulator -> branch sync (Viterbi) -> line decoder
              -> frame sync -> codeblock decoder            => decoded frames + receiver track
    BackEnd   decoded frames -> frame parser -> channel accounting -> packet extractor -> sinks
    DecodeChain       one front end + one back end (symbol files, live streams)
    SegmentedDecode   one front end per segment of an IQ recording (worker processes), one back end

The public call is :func:`decode` (re-exported as ``pipeline.decode``); ``downlink decode`` runs
:func:`decode_to_folder`.
"""

from pipeline.chain._api import decode
from pipeline.chain._backend import BackEnd, FrameLog, TrackLog
from pipeline.chain._chain import DecodeChain
from pipeline.chain._frontend import FrontCounts, FrontEnd, FrontOutput, FrontSummary
from pipeline.chain._output import OutputFolder
from pipeline.chain._run import (
    DecodeSummary,
    TimeProducts,
    decode_in_memory,
    decode_to_folder,
    is_stream,
    kernel_cache_cold,
)
from pipeline.chain._segments import (
    DEFAULT_SEGMENT_SAMPLES,
    SegmentedDecode,
    SegmentResult,
    decode_segment,
    segment_plan,
)
from pipeline.chain._sinks import FolderSinks, MemorySinks
from pipeline.chain._time import ERT_DEFINITION, ErtClock

__all__ = [
    "ERT_DEFINITION",
    "ErtClock",
    "DEFAULT_SEGMENT_SAMPLES",
    "BackEnd",
    "DecodeChain",
    "DecodeSummary",
    "FolderSinks",
    "FrameLog",
    "FrontCounts",
    "FrontEnd",
    "FrontOutput",
    "FrontSummary",
    "MemorySinks",
    "OutputFolder",
    "SegmentResult",
    "SegmentedDecode",
    "TimeProducts",
    "TrackLog",
    "decode",
    "decode_in_memory",
    "decode_segment",
    "decode_to_folder",
    "is_stream",
    "kernel_cache_cold",
    "segment_plan",
]
