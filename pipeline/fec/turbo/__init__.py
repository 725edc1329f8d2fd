"""pipeline.fec.turbo: the CCSDS turbo codes (131.0-B sec. 6), encoder and iterative decoder.

:class:`TurboCode` describes one (rate, k); :func:`turbo_encode` encodes transfer frames;
:class:`TurboDecoder` / :func:`turbo_decode` decode channel LLRs into frames with a pass/fail
status and the iterations used.  See DEVELOPERS.md (pipeline.fec) for the contract.
"""

from pipeline.fec.turbo._code import (
    FEEDBACK_VECTOR,
    FORWARD_VECTORS,
    TURBO_BLOCK_SIZES,
    TURBO_RATES,
    TurboCode,
    TurboRate,
    component_trellis,
    turbo_interleaver,
)
from pipeline.fec.turbo._decoder import (
    LLR_SCALE,
    TURBO_ALGORITHMS,
    TURBO_CHECKS,
    TurboAlgorithm,
    TurboCheck,
    TurboDecoder,
    TurboResult,
    correction_table,
    turbo_decode,
)
from pipeline.fec.turbo._encoder import turbo_encode

__all__ = [
    "TurboRate",
    "TURBO_RATES",
    "TURBO_BLOCK_SIZES",
    "FEEDBACK_VECTOR",
    "FORWARD_VECTORS",
    "TurboCode",
    "component_trellis",
    "turbo_interleaver",
    "turbo_encode",
    "TurboAlgorithm",
    "TURBO_ALGORITHMS",
    "TurboCheck",
    "TURBO_CHECKS",
    "LLR_SCALE",
    "TurboResult",
    "TurboDecoder",
    "turbo_decode",
    "correction_table",
]
