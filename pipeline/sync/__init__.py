"""pipeline.sync: frame synchronization and the codeblock path (see DEVELOPERS.md, stage contracts).

Decoded (or uncoded) soft bits -> :class:`FrameSync` -> :class:`Cadu` -> :class:`CodeblockDecoder`
-> :class:`DecodedFrame`.  :class:`BranchSync` comes first on convolutionally coded links.
"""

from pipeline.sync._branchsync import BranchSync, BranchSyncStats, branch_metric
from pipeline.sync._codeblock import CodeblockDecoder, CodeblockStats
from pipeline.sync._framesync import DEFAULT_ASM, FrameSync, FrameSyncStats
from pipeline.sync._types import Cadu, DecodedFrame, FrameStatus, SyncEvent, SyncEventKind

__all__ = [
    "BranchSync",
    "BranchSyncStats",
    "branch_metric",
    "FrameSync",
    "CodeblockDecoder",
    "CodeblockStats",
    "FrameSyncStats",
    "DEFAULT_ASM",
    "Cadu",
    "DecodedFrame",
    "FrameStatus",
    "SyncEvent",
    "SyncEventKind",
]
