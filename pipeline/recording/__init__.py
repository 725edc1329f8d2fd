"""pipeline.recording: IQ recordings in and out, live streams, and channel-symbol files.

Read SigMF pairs and archives (metadata validated by the ``sigmf`` library), raw cf32/ci16/ci8/cu8
files and two-channel WAV through read-only memory maps in chunks, checking SigMF ``core:sha512``
on the way; read live streams (standard input, pipes) chunk by chunk; write SigMF in a stream;
read ``--input soft|bits`` symbol files and streams.  See DEVELOPERS.md, "pipeline.recording",
for the contract.
"""

from pipeline.recording._formats import (
    FORMAT_CHOICES,
    FORMATS,
    RAW_FORMAT_ALIASES,
    SAMPLE_FORMATS,
    Datatype,
    Format,
    SampleFormat,
    sample_format,
)
from pipeline.recording._integrity import CHECKSUM_FLAG, DatasetChecksum
from pipeline.recording._recording import Capture, Chunk, Recording, open_recording
from pipeline.recording._sigmf import MAX_FREQUENCY_HZ, MAX_SAMPLE_RATE_HZ, MIN_SAMPLE_RATE_HZ, SAMPLE_COUNT_KEY
from pipeline.recording._stream import STDIN, SampleStream, SymbolStream, open_stream, open_symbol_stream
from pipeline.recording._symbols import SymbolChunk, SymbolFile, SymbolKind, open_symbols
from pipeline.recording._time import format_iso8601_ns, parse_iso8601_ns, parse_iso_ns
from pipeline.recording._writer import SigmfWriter

__all__ = [
    "CHECKSUM_FLAG",
    "Capture",
    "Chunk",
    "DatasetChecksum",
    "Datatype",
    "FORMATS",
    "FORMAT_CHOICES",
    "Format",
    "MAX_FREQUENCY_HZ",
    "MAX_SAMPLE_RATE_HZ",
    "MIN_SAMPLE_RATE_HZ",
    "RAW_FORMAT_ALIASES",
    "Recording",
    "SAMPLE_COUNT_KEY",
    "SAMPLE_FORMATS",
    "STDIN",
    "SampleFormat",
    "SampleStream",
    "SigmfWriter",
    "SymbolChunk",
    "SymbolFile",
    "SymbolKind",
    "SymbolStream",
    "format_iso8601_ns",
    "open_recording",
    "open_stream",
    "open_symbol_stream",
    "open_symbols",
    "parse_iso8601_ns",
    "parse_iso_ns",
    "sample_format",
]
