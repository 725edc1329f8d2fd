"""pipeline.recording: IQ recordings in and out, and channel-symbol files.

Read SigMF pairs, raw cf32/ci16/ci8/cu8 files and two-channel WAV through read-only memory maps
in chunks; write SigMF in a stream; read ``--input soft|bits`` symbol files.  See DEVELOPERS.md,
"pipeline.recording", for the contract.
"""

from pipeline.recording._formats import RAW_FORMAT_ALIASES, SAMPLE_FORMATS, Datatype, SampleFormat, sample_format
from pipeline.recording._recording import Capture, Chunk, Recording, open_recording
from pipeline.recording._symbols import SymbolChunk, SymbolFile, SymbolKind, open_symbols
from pipeline.recording._time import format_iso8601_ns, parse_iso8601_ns, parse_iso_ns
from pipeline.recording._writer import SIGMF_VERSION, SigmfWriter

__all__ = [
    "Capture",
    "Chunk",
    "Datatype",
    "RAW_FORMAT_ALIASES",
    "Recording",
    "SAMPLE_FORMATS",
    "SIGMF_VERSION",
    "SampleFormat",
    "SigmfWriter",
    "SymbolChunk",
    "SymbolFile",
    "SymbolKind",
    "format_iso8601_ns",
    "open_recording",
    "open_symbols",
    "parse_iso8601_ns",
    "parse_iso_ns",
    "sample_format",
]
