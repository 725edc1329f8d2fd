"""pipeline.fec.ldpc: the CCSDS LDPC codes of 131.0-B sec. 7 (C2 and AR4JA).

:func:`ldpc_code` names a code (what a profile selects), :func:`ldpc_encode` encodes frames,
:class:`LdpcDecoder` (or :func:`ldpc_decode`) decodes soft values with layered min-sum in int8
fixed point, 32 or 64 codewords side by side.  See DEVELOPERS.md (pipeline.fec) for the contract.
"""

from pipeline.fec.ldpc._codes import (
    AR4JA_K,
    AR4JA_RATES,
    LDPC_FAMILIES,
    LdpcCode,
    LdpcFamily,
    SparseParityCheck,
    ar4ja_permutation,
    expurgation_failures,
    ldpc_code,
    ldpc_codes,
    parity_check,
    qc_generator,
)
from pipeline.fec.ldpc._decoder import MIN_SUM_VARIANTS, LdpcDecoder, LdpcResult, MinSumVariant, ldpc_decode
from pipeline.fec.ldpc._encoder import ldpc_encode, ldpc_encode_bits
from pipeline.fec.ldpc._gf2 import gf2_rank

__all__ = [
    "AR4JA_K",
    "AR4JA_RATES",
    "LDPC_FAMILIES",
    "LdpcCode",
    "LdpcFamily",
    "SparseParityCheck",
    "ar4ja_permutation",
    "expurgation_failures",
    "ldpc_code",
    "ldpc_codes",
    "parity_check",
    "qc_generator",
    "ldpc_encode",
    "ldpc_encode_bits",
    "LdpcDecoder",
    "LdpcResult",
    "ldpc_decode",
    "MinSumVariant",
    "MIN_SUM_VARIANTS",
    "gf2_rank",
]
