"""pipeline.chain: the product path, a recording in, packets, frames and a pass report out.

The public call is :func:`decode` (re-exported as ``pipeline.decode``).
"""

from pipeline.chain._api import DecodeResult, decode

__all__ = ["DecodeResult", "decode"]
