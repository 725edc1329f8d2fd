"""The decode chain: a front end and a back end wired in order, for one unbroken stream.

::

    samples | channel symbols -> FrontEnd -> decoded frames + track points -> BackEnd -> sinks

This is the chain of a symbol file, of a live stream, and of every segment boundary-free decode; an IQ
recording decoded in segments (:class:`~pipeline.chain.SegmentedDecode`) uses one front end per segment
and one back end.
"""

from __future__ import annotations

import numpy as np

from pipeline.chain._backend import BackEnd
from pipeline.chain._frontend import FrontEnd, FrontSummary
from pipeline.profile import LinkProfile

__all__ = ["DecodeChain"]


class DecodeChain:
    """Every stage after the sample source, wired in order.

    Parameters
    ----------
    profile : LinkProfile
    input_kind : {"iq", "soft", "bits"}, keyword-only
        "iq" starts at the demodulator; "soft" and "bits" start at the branch synchronizer.
    sample_rate_hz : float, keyword-only
        Sample rate of an IQ recording (required for "iq").
    waterfall_row_samples : int or None, keyword-only
        Accumulate the recording's waterfall (see :class:`~pipeline.chain.FrontEnd`).
    carrier_prediction : CarrierPrediction or None, keyword-only
        The carrier's predicted offset, for the demodulator's search (see :class:`~pipeline.chain.FrontEnd`).
    timebase, sinks : keyword-only
        Passed to the :class:`~pipeline.chain.BackEnd`.
    **back_options
        The other keyword arguments of :class:`~pipeline.chain.BackEnd` (``downlink_frequency_hz``,
        ``tuning_offset_hz``, ``drop_duplicates``, ``obt_to_utc``, ``doppler_check``).

    Examples
    --------
    >>> import numpy as np, pipeline
    >>> from pipeline.chain import DecodeChain
    >>> chain = DecodeChain(pipeline.load_profile(pipeline.demo_profile_path()), input_kind="soft")
    >>> chain.process_symbols(np.ones(1000, np.float32), np.arange(1000.0))
    >>> summary = chain.finish()
    >>> chain.back.frame_count, summary.counts.channel_symbols
    (0, 1000)
    """

    def __init__(self, profile: LinkProfile, *, input_kind: str = "iq", sample_rate_hz: float | None = None,
                 waterfall_row_samples: int | None = None, timebase=None, sinks=None, carrier_prediction=None,
                 **back_options):
        self.profile = profile
        self.front = FrontEnd(profile, input_kind=input_kind, sample_rate_hz=sample_rate_hz,
                              waterfall_row_samples=waterfall_row_samples, carrier_prediction=carrier_prediction)
        self.back = BackEnd(profile, timebase=timebase, sample_rate_hz=sample_rate_hz if input_kind == "iq" else None,
                            sinks=sinks, **back_options)

    def process_chunk(self, chunk) -> None:
        """Feed one recording chunk (``samples``, ``start``, ``nonfinite``)."""
        self.back.process(self.front.process_chunk(chunk))

    def process_symbols(self, soft: np.ndarray, position: np.ndarray) -> None:
        """Feed channel symbols: soft float32 (+ means bit 0) and their positions."""
        self.back.process(self.front.process_symbols(soft, position))

    def finish(self) -> FrontSummary:
        """Flush every stage in order and return the front end's summary."""
        self.back.process(self.front.finish())
        self.back.finish()
        return self.front.summary()
