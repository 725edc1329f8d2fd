"""pipeline.demod.residual: residual-carrier links and Bi-phase-L (see DEVELOPERS.md, stage contracts).

PCM/PM (NRZ or Bi-phase-L data directly on the carrier) and PCM/PSK/PM (data on a square or sine
subcarrier) with a PLL on the residual carrier, a Costas loop on the subcarrier, integrate-and-dump
symbols with a data-transition tracking loop; Bi-phase-L BPSK without carrier; the modulation-index
estimate; Doppler observables; and :func:`make_demodulator`, which picks the demodulator for a profile.
"""

from pipeline.demod.residual._demodulator import (
    ResidualCarrierDemodulator,
    ResidualTrackPoint,
    make_demodulator,
    modulation_index_from_amplitudes,
)
from pipeline.demod.residual._doppler import (
    DOPPLER_COLUMNS,
    SPEED_OF_LIGHT_M_PER_S,
    doppler_from_range_rate,
    doppler_rows,
    range_rate_from_doppler,
    write_doppler_csv,
)

__all__ = [
    "DOPPLER_COLUMNS",
    "SPEED_OF_LIGHT_M_PER_S",
    "ResidualCarrierDemodulator",
    "ResidualTrackPoint",
    "doppler_from_range_rate",
    "doppler_rows",
    "make_demodulator",
    "modulation_index_from_amplitudes",
    "range_rate_from_doppler",
    "write_doppler_csv",
]
