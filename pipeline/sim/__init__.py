"""pipeline.sim: the transmitter chain and channel model (see DEVELOPERS.md, stage contracts).

packets -> TM / AOS frames -> RS -> randomizer -> ASM -> (NRZ-M) convolutional code -> modulation
(suppressed carrier, or residual-carrier PCM/PM and PCM/PSK/PM; NRZ or Bi-phase-L)
-> channel -> SigMF recording plus truth files.
"""

from pipeline.sim._channel import Channel, DopplerPass, Fade, noise_variance_per_sample
from pipeline.sim._coding import ChannelCoder, CoderOutput, NrzmPosition
from pipeline.sim._frames import (
    FHP_IDLE,
    FHP_NO_PACKET,
    AosFrameBuilder,
    BuiltFrame,
    TmFrameBuilder,
    aos_primary_header,
    clcw_word,
    tm_primary_header,
)
from pipeline.sim._modulator import (
    Modulator,
    ModulatorOutput,
    ResidualCarrierModulator,
    data_power_fraction,
    make_modulator,
    rrc_pulse,
)
from pipeline.sim._packets import IDLE_APID, PacketSource, SimPacket, idle_packet, space_packet, space_packet_header
from pipeline.sim._simulate import SOFT_SCALE, SimulationResult, simulate, soft_channel_symbols
from pipeline.sim._time import (
    cuc_4_2,
    cuc_4_2_tai,
    format_tai_ns_as_utc,
    format_utc_ns,
    parse_utc_ns,
    tai_ns_from_utc_ns,
    tai_seconds_since_1958,
)

__all__ = [
    "SOFT_SCALE",
    "Channel",
    "ChannelCoder",
    "CoderOutput",
    "DopplerPass",
    "Fade",
    "Modulator",
    "ModulatorOutput",
    "ResidualCarrierModulator",
    "data_power_fraction",
    "make_modulator",
    "NrzmPosition",
    "SimulationResult",
    "noise_variance_per_sample",
    "rrc_pulse",
    "simulate",
    "soft_channel_symbols",
    "FHP_IDLE",
    "FHP_NO_PACKET",
    "IDLE_APID",
    "AosFrameBuilder",
    "BuiltFrame",
    "PacketSource",
    "SimPacket",
    "TmFrameBuilder",
    "aos_primary_header",
    "clcw_word",
    "cuc_4_2",
    "cuc_4_2_tai",
    "format_tai_ns_as_utc",
    "tai_ns_from_utc_ns",
    "format_utc_ns",
    "idle_packet",
    "parse_utc_ns",
    "space_packet",
    "space_packet_header",
    "tai_seconds_since_1958",
    "tm_primary_header",
]
