"""pipeline.fec: the CCSDS channel codes (131.0-B) and the TM/AOS frame CRC (132.0-B).

Encoders and decoders are bit-exact to the standards: the K=7 convolutional code and its
punctured rates, Reed-Solomon (255,223)/(255,239) in the dual basis with interleaving and virtual
fill, the TM pseudo-randomizer, the FECF CRC-16, the attached sync markers, the turbo codes
(:mod:`pipeline.fec.turbo`) and the LDPC codes C2 and AR4JA (:mod:`pipeline.fec.ldpc`).
See DEVELOPERS.md (stage contracts) for how the other stages use these.
"""

from pipeline.fec._args import RATES, Rate
from pipeline.fec._conv import (
    ConvEncoder,
    conv_bit_symbol_index,
    conv_encode,
    conv_output_length,
    g2_inverted_default,
    puncture_pattern,
)
from pipeline.fec._crc import crc16
from pipeline.fec._markers import (
    ASM,
    ASM_BITS,
    ASM_INVERTED,
    TURBO_ASM_R1_2,
    TURBO_ASM_R1_3,
    TURBO_ASM_R1_4,
    TURBO_ASM_R1_6,
    TURBO_ASMS,
    marker_bits,
)
from pipeline.fec._randomizer import pn_sequence
from pipeline.fec._rs import dual_basis_tables, rs_decode, rs_decode_blocks, rs_encode, rs_generator, rs_k
from pipeline.fec._viterbi import DEFAULT_TRACEBACK_DEPTH, ViterbiDecoder, viterbi_decode
from pipeline.fec.ldpc import (
    AR4JA_K,
    AR4JA_RATES,
    LDPC_FAMILIES,
    LdpcCode,
    LdpcDecoder,
    LdpcResult,
    ldpc_code,
    ldpc_decode,
    ldpc_encode,
    ldpc_encode_bits,
)
from pipeline.fec.turbo import (
    TURBO_ALGORITHMS,
    TURBO_BLOCK_SIZES,
    TURBO_CHECKS,
    TURBO_RATES,
    TurboCode,
    TurboDecoder,
    TurboRate,
    TurboResult,
    turbo_decode,
    turbo_encode,
    turbo_interleaver,
)

__all__ = [
    "RATES",
    "Rate",
    "ConvEncoder",
    "conv_encode",
    "conv_bit_symbol_index",
    "conv_output_length",
    "g2_inverted_default",
    "puncture_pattern",
    "crc16",
    "ASM",
    "ASM_BITS",
    "ASM_INVERTED",
    "TURBO_ASM_R1_2",
    "TURBO_ASM_R1_3",
    "TURBO_ASM_R1_4",
    "TURBO_ASM_R1_6",
    "TURBO_ASMS",
    "marker_bits",
    "pn_sequence",
    "rs_encode",
    "rs_decode",
    "rs_decode_blocks",
    "rs_generator",
    "rs_k",
    "dual_basis_tables",
    "ViterbiDecoder",
    "viterbi_decode",
    "DEFAULT_TRACEBACK_DEPTH",
    "TurboRate",
    "TURBO_RATES",
    "TURBO_BLOCK_SIZES",
    "TURBO_ALGORITHMS",
    "TURBO_CHECKS",
    "TurboCode",
    "TurboDecoder",
    "TurboResult",
    "turbo_decode",
    "turbo_encode",
    "turbo_interleaver",
    "AR4JA_K",
    "AR4JA_RATES",
    "LDPC_FAMILIES",
    "LdpcCode",
    "LdpcDecoder",
    "LdpcResult",
    "ldpc_code",
    "ldpc_decode",
    "ldpc_encode",
    "ldpc_encode_bits",
]
