"""Argument checks shared by the synchronizer stages (one wording: DEVELOPERS.md "Rules of the code")."""

from __future__ import annotations

import numpy as np

from pipeline.fec._args import check_int  # the one integer-argument check of the stages

__all__ = ["check_int", "as_soft_and_position"]


def as_soft_and_position(soft, position) -> tuple[np.ndarray, np.ndarray]:
    """Soft values (1-D, real) as contiguous float32 and their positions (same length) as float64."""
    soft = np.asarray(soft)
    position = np.asarray(position)
    if soft.ndim != 1:
        raise ValueError(f"Argument 'soft' must be one-dimensional, not {soft.ndim}-dimensional.")
    if not (np.issubdtype(soft.dtype, np.floating) or np.issubdtype(soft.dtype, np.integer)):
        raise TypeError(f"Argument 'soft' must hold real numbers, not {soft.dtype}.")
    if position.shape != soft.shape:
        raise ValueError(f"Argument 'position' must have the length of 'soft' ({soft.size}), not {position.size}.")
    if not (np.issubdtype(position.dtype, np.floating) or np.issubdtype(position.dtype, np.integer)):
        raise TypeError(f"Argument 'position' must hold real numbers, not {position.dtype}.")
    return np.ascontiguousarray(soft, dtype=np.float32), np.ascontiguousarray(position, dtype=np.float64)
