"""pipeline.sync: frame synchronization and the codeblock path (see DEVELOPERS.md, stage contracts).

Decoded (or uncoded) soft bits -> :class:`FrameSync` -> :class:`Cadu` -> :class:`CodeblockDecoder`
-> :class:`DecodedFrame`.  :class:`BranchSync` comes first on convolutionally coded links.
"""

from pipeline.sync._branchsync import BranchSync, BranchSyncStats, branch_metric
from pipeline.sync._codeblock import CodeblockDecoder, CodeblockStats
from pipeline.sync._codes import (
    CodewordBatch,
    LdpcBlockCode,
    SoftBlockCode,
    TurboBlockCode,
    frame_sync_for,
    link_marker,
    soft_block_code,
)
from pipeline.sync._esn0 import Esn0Estimate, MarkerEsn0Estimator
from pipeline.sync._framesync import DEFAULT_ASM, Correlation, FrameSync, FrameSyncStats, soft_search_threshold
from pipeline.sync._types import Cadu, DecodedFrame, FrameStatus, SyncEvent, SyncEventKind

__all__ = [
    "BranchSync",
    "BranchSyncStats",
    "branch_metric",
    "FrameSync",
    "CodeblockDecoder",
    "CodeblockStats",
    "CodewordBatch",
    "SoftBlockCode",
    "TurboBlockCode",
    "LdpcBlockCode",
    "soft_block_code",
    "link_marker",
    "frame_sync_for",
    "Esn0Estimate",
    "MarkerEsn0Estimator",
    "Correlation",
    "FrameSyncStats",
    "soft_search_threshold",
    "DEFAULT_ASM",
    "Cadu",
    "DecodedFrame",
    "FrameStatus",
    "SyncEvent",
    "SyncEventKind",
]
