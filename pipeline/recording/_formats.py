"""Sample formats of IQ recordings: the SigMF datatype names and how each becomes complex64."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

__all__ = [
    "Datatype",
    "Format",
    "FORMATS",
    "FORMAT_CHOICES",
    "SampleFormat",
    "SAMPLE_FORMATS",
    "RAW_FORMAT_ALIASES",
    "sample_format",
]

#: Complex datatypes this package reads and writes, by their SigMF names (as metadata spells them).
Datatype = Literal["cf32_le", "cf32_be", "ci16_le", "ci16_be", "ci8", "cu8"]

#: The sample formats a user names (``--format``, ``[simulate] format``): little-endian interleaved I/Q.
Format = Literal["cf32", "ci16", "ci8", "cu8"]
FORMATS: tuple[str, ...] = ("cf32", "ci16", "ci8", "cu8")
#: How messages list them.
FORMAT_CHOICES = "|".join(FORMATS)


@dataclass(frozen=True)
class SampleFormat:
    """How one IQ sample is stored and how it becomes a complex64 value.

    A stored component ``x`` (I or Q) becomes ``(x - offset) * scale``.

    Attributes
    ----------
    name : str
        SigMF datatype name (``"ci16_le"``).
    component_dtype : numpy.dtype
        dtype of one stored component, with its byte order.
    scale : float
        Factor applied after removing ``offset`` (1/32768 for ci16, 1/128 for ci8 and cu8).
    offset : float
        Value subtracted first (127.5 for cu8, the midpoint of 0..255; 0 otherwise).
    is_float : bool
        True for floating-point components (the ones that can hold NaN/Inf).
    """

    name: str
    component_dtype: np.dtype
    scale: float
    offset: float
    is_float: bool

    @property
    def short_name(self) -> str:
        """The user's name (``--format``): ``cf32``, ``ci16``, ``ci8``, ``cu8``; big-endian types keep theirs."""
        for short, full in RAW_FORMAT_ALIASES.items():
            if full == self.name:
                return short
        return self.name

    @property
    def bytes_per_sample(self) -> int:
        """Octets of one complex sample (I and Q)."""
        return 2 * self.component_dtype.itemsize

    @property
    def native(self) -> bool:
        """True when the components are stored in this machine's byte order."""
        return self.component_dtype.isnative or self.component_dtype.itemsize == 1

    @property
    def full_scale(self) -> float:
        """Largest magnitude of a component after conversion, ``inf`` for floats."""
        if self.is_float:
            return float("inf")
        info = np.iinfo(self.component_dtype)
        return max(abs(info.min - self.offset), abs(info.max - self.offset)) * self.scale


# SigMF specification, "Dataset format": datatype = [c|r] type [bits] [_le|_be], with the
# 8-bit types having no byte-order suffix.  Only complex ("c") types are IQ recordings.
SAMPLE_FORMATS: dict[str, SampleFormat] = {
    "cf32_le": SampleFormat("cf32_le", np.dtype("<f4"), 1.0, 0.0, True),
    "cf32_be": SampleFormat("cf32_be", np.dtype(">f4"), 1.0, 0.0, True),
    "ci16_le": SampleFormat("ci16_le", np.dtype("<i2"), 1.0 / 32768.0, 0.0, False),
    "ci16_be": SampleFormat("ci16_be", np.dtype(">i2"), 1.0 / 32768.0, 0.0, False),
    "ci8": SampleFormat("ci8", np.dtype("i1"), 1.0 / 128.0, 0.0, False),
    "cu8": SampleFormat("cu8", np.dtype("u1"), 1.0 / 128.0, 127.5, False),
}

#: The user's names (:data:`FORMATS`) and the SigMF datatypes they stand for: little-endian.
RAW_FORMAT_ALIASES: dict[str, str] = {"cf32": "cf32_le", "ci16": "ci16_le", "ci8": "ci8", "cu8": "cu8"}


def sample_format(name: str) -> SampleFormat:
    """The :class:`SampleFormat` for a user's format name (``cf32``) or a SigMF datatype (``cf32_le``).

    Raises
    ------
    ValueError
        When the name is not one of :data:`SAMPLE_FORMATS` or :data:`RAW_FORMAT_ALIASES`.

    Examples
    --------
    >>> sample_format("ci16").name, sample_format("ci16").bytes_per_sample, sample_format("ci16_le").short_name
    ('ci16_le', 4, 'ci16')
    """
    if not isinstance(name, str):
        raise TypeError(f"Argument 'datatype' must be a string, not {type(name).__name__}.")
    key = RAW_FORMAT_ALIASES.get(name.lower(), name.lower())
    try:
        return SAMPLE_FORMATS[key]
    except KeyError:
        known = " | ".join(list(RAW_FORMAT_ALIASES) + [k for k in SAMPLE_FORMATS if k not in RAW_FORMAT_ALIASES])
        raise ValueError(f"Argument 'datatype' must be one of {known}, not {name!r}.") from None
