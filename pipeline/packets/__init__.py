"""pipeline.packets: space packets (CCSDS 133.0-B), encapsulation packets (133.1-B) and time.

Packet reassembly per virtual channel, CUC / CDS time codes (CCSDS 301.0-B), the leap-second
table and the ERT text format.  See DEVELOPERS.md, stage contracts.
"""

from pipeline.packets._extract import DROP_REASONS, IDLE_APID, Packet, PacketExtractor, PacketStats, SequenceGap
from pipeline.packets._time import (
    LeapSecondTable,
    default_leap_seconds,
    format_ert,
    format_tai_as_utc,
    load_leap_seconds,
    parse_epoch_ns,
    tai_ns_to_utc_ns,
    utc_ns_to_tai_ns,
)
from pipeline.packets._timecodes import (
    LEVEL1_EPOCH,
    cds_pfield_layout,
    check_time_code_config,
    cuc_pfield_layout,
    decode_cds,
    decode_cuc,
    decode_time_code,
    encode_cds,
    encode_cuc,
)

__all__ = [
    "Packet",
    "PacketExtractor",
    "PacketStats",
    "SequenceGap",
    "IDLE_APID",
    "DROP_REASONS",
    "format_ert",
    "format_tai_as_utc",
    "LeapSecondTable",
    "default_leap_seconds",
    "load_leap_seconds",
    "utc_ns_to_tai_ns",
    "tai_ns_to_utc_ns",
    "parse_epoch_ns",
    "decode_cuc",
    "decode_cds",
    "encode_cuc",
    "encode_cds",
    "decode_time_code",
    "cuc_pfield_layout",
    "cds_pfield_layout",
    "check_time_code_config",
    "LEVEL1_EPOCH",
]
