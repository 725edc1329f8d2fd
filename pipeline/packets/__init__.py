"""pipeline.packets: space packets (CCSDS 133.0-B), encapsulation packets (133.1-B) and time codes.

Packet reassembly per virtual channel, CUC / CDS time codes (CCSDS 301.0-B) and onboard time to UTC
through a clock correlation (``clock.json``).  Time scales and the leap-second table live in
:mod:`pipeline.timescales`; ``format_ert`` (POSIX ns -> text) stays for the decode chain until it writes
ERT from TAI with :func:`pipeline.timescales.format_utc`.  See DEVELOPERS.md, stage contracts.
"""

from pipeline.packets._extract import DROP_REASONS, IDLE_APID, Packet, PacketExtractor, PacketStats, SequenceGap
from pipeline.packets._obt import CLOCK_JSON_KEYS, ClockModel, ObtToUtc, read_clock_json
from pipeline.packets._timecodes import (
    LEVEL1_EPOCH,
    OnboardTime,
    cds_pfield_layout,
    check_time_code_config,
    cuc_pfield_layout,
    decode_cds,
    decode_cuc,
    decode_obt_ns,
    decode_time_code,
    encode_cds,
    encode_cuc,
)
from pipeline.timescales import format_posix_ns as format_ert

__all__ = [
    "Packet",
    "PacketExtractor",
    "PacketStats",
    "SequenceGap",
    "IDLE_APID",
    "DROP_REASONS",
    "format_ert",
    "decode_cuc",
    "decode_cds",
    "decode_obt_ns",
    "encode_cuc",
    "encode_cds",
    "decode_time_code",
    "cuc_pfield_layout",
    "cds_pfield_layout",
    "check_time_code_config",
    "LEVEL1_EPOCH",
    "OnboardTime",
    "CLOCK_JSON_KEYS",
    "ClockModel",
    "ObtToUtc",
    "read_clock_json",
]
