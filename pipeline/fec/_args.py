"""Argument checks shared by the fec wrappers (one wording for every bad call, STYLE.md rule 6)."""

from __future__ import annotations

from typing import Literal, get_args

import numpy as np

__all__ = ["Rate", "RATES", "check_rate", "as_bits", "as_soft", "as_bytes", "check_int"]

#: Convolutional code rates of CCSDS 131.0-B (1/2 is the mother code, the others are punctured).
Rate = Literal["1/2", "2/3", "3/4", "5/6", "7/8"]
RATES: tuple[str, ...] = get_args(Rate)


def check_choice(name: str, value, choices) -> str:
    """Return ``value`` if it is one of the strings ``choices``, else raise ValueError naming them."""
    if not isinstance(value, str) or value not in choices:
        raise ValueError(f"Argument '{name}' must be one of {', '.join(choices)}, not {value!r}.")
    return value


def check_rate(rate) -> str:
    """Return ``rate`` if it is one of :data:`RATES`, else raise ValueError naming it."""
    return check_choice("rate", rate, RATES)


def check_int(name: str, value, lo: int | None = None, hi: int | None = None, *, allowed: tuple = (),
              or_none: bool = False) -> int:
    """``value`` as int if it is an integer in ``lo..hi`` (either end may be open) or one of ``allowed``.

    ``or_none`` only adds "or None" to the message, for parameters whose caller accepts None itself.

    The one integer-argument check of the stages (STYLE.md rule 6): TypeError when ``value`` is not an
    integer (bool is not), ValueError naming the parameter, the rule and the value otherwise.

    Examples
    --------
    >>> check_int("interleave", 5, 1, 8)
    5
    >>> check_int("e", 12, allowed=(16, 8))
    Traceback (most recent call last):
    ...
    ValueError: Argument 'e' must be 16 or 8, not 12.
    """
    if allowed:
        rule = " or ".join(str(v) for v in allowed)
    elif hi is None:
        rule = f">= {lo}"
    elif lo is None:
        rule = f"<= {hi}"
    else:
        rule = f"{lo}..{hi}"
    if or_none:
        rule += " or None"
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"Argument '{name}' must be an integer {rule}, not {type(value).__name__}.")
    value = int(value)
    ok = value in allowed if allowed else (lo is None or value >= lo) and (hi is None or value <= hi)
    if not ok:
        raise ValueError(f"Argument '{name}' must be {rule}, not {value}.")
    return value


def as_bits(name: str, bits) -> np.ndarray:
    """Bits as a contiguous uint8 array of 0/1; any integer or bool dtype, 1-D."""
    arr = np.asarray(bits)
    if arr.ndim != 1:
        raise ValueError(f"Argument '{name}' must be 1-D, not {arr.ndim}-D.")
    if arr.dtype == np.bool_:
        return np.ascontiguousarray(arr, dtype=np.uint8)
    if not np.issubdtype(arr.dtype, np.integer):
        if arr.size == 0:
            return np.zeros(0, np.uint8)
        raise TypeError(f"Argument '{name}' must hold integer or bool bits, not dtype {arr.dtype}.")
    if arr.size and (arr.min() < 0 or arr.max() > 1):
        raise ValueError(f"Argument '{name}' must hold only 0 and 1, not values in {arr.min()}..{arr.max()}.")
    return np.ascontiguousarray(arr, dtype=np.uint8)


def as_soft(name: str, soft) -> np.ndarray:
    """Soft symbols as a contiguous float32 1-D array; float dtypes only, finite values."""
    arr = np.asarray(soft)
    if arr.ndim != 1:
        raise ValueError(f"Argument '{name}' must be 1-D, not {arr.ndim}-D.")
    if not np.issubdtype(arr.dtype, np.floating):
        if arr.size == 0:
            return np.zeros(0, np.float32)
        raise TypeError(f"Argument '{name}' must be a float array (float32, + = bit 0), not dtype {arr.dtype}.")
    arr = np.ascontiguousarray(arr, dtype=np.float32)
    if arr.size and not np.isfinite(arr).all():
        raise ValueError(f"Argument '{name}' must hold finite values, not NaN or Inf.")
    return arr


def as_bytes(name: str, data) -> tuple[np.ndarray, bool]:
    """Octets as a contiguous uint8 array, and whether the caller passed a bytes-like object."""
    if isinstance(data, (bytes, bytearray, memoryview)):
        return np.frombuffer(bytes(data), dtype=np.uint8), True
    if isinstance(data, np.ndarray):
        if data.ndim != 1:
            raise ValueError(f"Argument '{name}' must be 1-D, not {data.ndim}-D.")
        if data.dtype != np.uint8:
            raise TypeError(f"Argument '{name}' must be bytes or a uint8 array, not dtype {data.dtype}.")
        return np.ascontiguousarray(data), False
    raise TypeError(f"Argument '{name}' must be bytes or a uint8 array, not {type(data).__name__}.")
