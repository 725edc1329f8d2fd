"""pipeline.demod: complex IQ samples to soft channel bits (see DEVELOPERS.md, stage contracts).

DC removal, AGC, wide carrier acquisition, Costas carrier loop, matched filter, Gardner timing recovery,
lock detection, M2M4 Es/N0 estimation, and NRZ-M line decoding; plus ``inspect_recording``.
"""

from pipeline.demod._acquire import (
    CarrierAcquisition,
    CarrierEstimate,
    CarrierSearch,
    SpectralLine,
    estimate_carrier_offset,
    rail_values,
)
from pipeline.demod._demodulator import DcBlocker, DemodStats, Demodulator, SymbolBlock, TrackPoint
from pipeline.demod._filters import matched_filter_taps, raised_cosine_pulse, rrc_pulse
from pipeline.demod._inspect import fit_carrier_track, inspect_recording, write_inspect_plots
from pipeline.demod._line import LineDecoder
from pipeline.demod._predicted import CarrierPrediction, StreamPrediction
from pipeline.demod._snr import estimate_esn0_m2m4, m2m4_signal_noise

__all__ = [
    "CarrierAcquisition",
    "CarrierEstimate",
    "CarrierPrediction",
    "StreamPrediction",
    "CarrierSearch",
    "DcBlocker",
    "DemodStats",
    "Demodulator",
    "LineDecoder",
    "SpectralLine",
    "SymbolBlock",
    "TrackPoint",
    "estimate_carrier_offset",
    "estimate_esn0_m2m4",
    "fit_carrier_track",
    "inspect_recording",
    "write_inspect_plots",
    "m2m4_signal_noise",
    "matched_filter_taps",
    "rail_values",
    "raised_cosine_pulse",
    "rrc_pulse",
]
