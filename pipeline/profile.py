"""Link profile: what the spacecraft sends and how the receiver is tuned, loaded from TOML.

A profile is a tree of frozen dataclasses validated once at load time.  Every stage takes the
parts it needs; nothing downstream re-checks ranges.

The TOML keys follow ../shared/DESIGN.md: the tables ``[link]``, ``[coding]`` and ``[frames]``
are required (a file without one is refused, never filled in with defaults), ``[packets]``,
``[receiver]``, ``[simulate]``, ``[station]`` and ``[clock]`` are optional.  The validator's ranges are
exactly what the stages support, so a profile that loads never makes a stage fail.  Attribute names
carry units (``symbol_rate_baud``) where the TOML key does not.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass, field, fields, replace
from importlib import resources
from pathlib import Path
from typing import Any, Literal, get_args

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from pipeline.errors import ProfileError

__all__ = [
    "CONV_RATES",
    "REQUIRED_TABLES",
    "TIMING_LOOP_BANDWIDTH_RANGE",
    "TURBO_CODE_RATES",
    "TURBO_MARKER_BITS",
    "ApidTraffic",
    "ClockSection",
    "CodingSection",
    "ConvRate",
    "FrameKind",
    "FramesSection",
    "LineCode",
    "LinkProfile",
    "LdpcCode",
    "LinkSection",
    "Modulation",
    "PacketsSection",
    "Pulse",
    "ReceiverSection",
    "SimulateSection",
    "StationSection",
    "TimeCodeConfig",
    "TimeCodeKind",
    "TurboRate",
    "demo_profile_path",
    "load_profile",
    "profile_from_dict",
]

Modulation = Literal["bpsk", "qpsk", "oqpsk", "pcm-pm", "pcm-psk-pm"]
Pulse = Literal["rrc", "rect"]
LineCode = Literal["nrz-l", "nrz-m", "bi-phase-l"]
ConvRate = Literal["none", "1/2", "2/3", "3/4", "5/6", "7/8"]
FrameKind = Literal["tm", "aos"]
TimeCodeKind = Literal["cuc", "cds"]
SubcarrierWave = Literal["square", "sine"]
TurboRate = Literal["none", "1/2", "1/3", "1/4", "1/6"]
LdpcCode = Literal["none", "c2", "ar4ja"]

#: Convolutional code rate as a fraction, by profile name ("none" = uncoded).
CONV_RATES: dict[str, float] = {"none": 1.0, "1/2": 0.5, "2/3": 2 / 3, "3/4": 0.75, "5/6": 5 / 6, "7/8": 7 / 8}

_RS_K = {16: 223, 8: 239}

#: Tables every profile file must have.
REQUIRED_TABLES: tuple[str, ...] = ("link", "coding", "frames")
#: Nominal turbo code rate as a fraction, by profile name (CCSDS 131.0-B sec. 6.4).
TURBO_CODE_RATES: dict[str, float] = {"1/2": 0.5, "1/3": 1 / 3, "1/4": 0.25, "1/6": 1 / 6}
#: Length of each turbo rate's attached sync marker in bits (CCSDS 131.0-B sec. 8.3, REFERENCES.md 13.4).
TURBO_MARKER_BITS: dict[str, int] = {"1/2": 64, "1/3": 96, "1/4": 128, "1/6": 192}
_TURBO_K = (1784, 3568, 7136, 8920)
_TURBO_TAIL_BITS = 4  # termination bit times per component encoder (131.0-B sec. 6.3)
_LDPC_RATES = ("1/2", "2/3", "4/5")
_LDPC_K = (1024, 4096, 16384)
# CCSDS 131.0-B-2 sec. 7.3.1: C2 is (8160, 7136); sec. 7.4.3.2 note and Table 7-5: AR4JA rate K/(K+2) sends
# M (K + 2) bits for k = M K information bits.
_C2_N, _C2_K = 8160, 7136
_AR4JA_KK = {"1/2": 2, "2/3": 4, "4/5": 8}

#: ``[receiver] timing_loop_bandwidth`` (B_L T) the timing loops support.  The loop gains come from the
#: continuous-time approximation (B_L T << 1); measured on the demo link at Eb/N0 = 40 dB, 0.08 still decoded
#: every packet and 0.09 lost two thirds of them (the loop no longer settles), so 0.05 is the top of the range.
#: At Eb/N0 = 7 dB everything up to 0.01 decoded every packet, 0.02 lost 6 of 38 (timing jitter).
TIMING_LOOP_BANDWIDTH_RANGE = (1e-5, 0.05)


@dataclass(frozen=True)
class LinkSection:
    """``[link]``: the physical layer."""

    modulation: Modulation = "bpsk"
    symbol_rate_baud: float = 240_000.0
    pulse: Pulse = "rrc"
    rolloff: float = 0.5
    line_code: LineCode = "nrz-l"
    modulation_index_rad: float = 1.1
    subcarrier_hz: float = 0.0
    subcarrier_wave: SubcarrierWave = "square"
    downlink_frequency_hz: float | None = None

    @property
    def bits_per_symbol(self) -> int:
        """Channel bits carried by one modulation symbol (2 for QPSK/OQPSK, else 1)."""
        return 2 if self.modulation in ("qpsk", "oqpsk") else 1

    @property
    def channel_bit_rate(self) -> float:
        """Channel bits per second: the modulation symbol rate times the bits per modulation symbol."""
        return self.symbol_rate_baud * self.bits_per_symbol


@dataclass(frozen=True)
class CodingSection:
    """``[coding]``: channel coding (CCSDS 131.0-B)."""

    convolutional: ConvRate = "1/2"
    reed_solomon: int = 16
    interleave: int = 5
    randomizer: bool = True
    # None: as CCSDS 131.0-B says (G2 inverted at rate 1/2 only); true/false for equipment that differs
    convolutional_g2_inverted: bool | None = None
    turbo: TurboRate = "none"  # CCSDS 131.0-B sec. 6 turbo code (nominal rate), "none" = no turbo code
    turbo_k: int = 8920  # turbo information block in bits: 1784 | 3568 | 7136 | 8920
    turbo_max_iterations: int = 10
    ldpc: LdpcCode = "none"  # CCSDS 131.0-B sec. 7 LDPC code: C2 (8160,7136) or the AR4JA family, "none" = none
    ldpc_rate: str = "1/2"  # AR4JA rate: 1/2 | 2/3 | 4/5 (C2 takes neither rate nor k)
    ldpc_k: int = 1024  # AR4JA information block in bits: 1024 | 4096 | 16384
    ldpc_max_iterations: int = 50

    @property
    def conv_rate(self) -> float:
        return CONV_RATES[self.convolutional]

    @property
    def conv_g2_inverted(self) -> bool | None:
        """Whether the G2 output of the convolutional code is inverted (None on an uncoded link).

        ``convolutional_g2_inverted`` when the profile sets it, else the standard's rule: inverted
        for the rate-1/2 code (CCSDS 131.0-B sec. 3.3, "Symbol inversion: On output path of G2"),
        not for the punctured codes (sec. 3.4; CCSDS 130.1-G sec. 4.3, Fig. 4-2 has no inverter).
        """
        if self.convolutional == "none":
            return None
        if self.convolutional_g2_inverted is None:
            return self.convolutional == "1/2"
        return bool(self.convolutional_g2_inverted)

    @property
    def turbo_codeword_bits(self) -> int:
        """Channel bits of one turbo codeword, ``(k + 4) / r`` (4 tail bit times), 0 without a turbo code."""
        if self.turbo == "none":
            return 0
        return int(round((self.turbo_k + _TURBO_TAIL_BITS) / TURBO_CODE_RATES[self.turbo]))

    @property
    def ldpc_info_bits(self) -> int:
        """Information bits of one LDPC codeword (C2: 7136; AR4JA: ``ldpc_k``), 0 without an LDPC code."""
        if self.ldpc == "none":
            return 0
        return _C2_K if self.ldpc == "c2" else self.ldpc_k

    @property
    def ldpc_codeword_bits(self) -> int:
        """Channel bits of one LDPC codeword: C2 8160; AR4JA ``k (K + 2) / K`` for rate K/(K+2) (the punctured
        columns not sent), 0 without an LDPC code."""
        if self.ldpc == "none":
            return 0
        if self.ldpc == "c2":
            return _C2_N
        kk = _AR4JA_KK[self.ldpc_rate]
        return self.ldpc_k * (kk + 2) // kk

    @property
    def block_code_info_bits(self) -> int:
        """Information bits per codeword of a soft-decoded block code (turbo ``turbo_k``, LDPC), 0 for others."""
        return self.turbo_k if self.turbo != "none" else self.ldpc_info_bits

    @property
    def rs_k(self) -> int:
        """RS information symbols per codeword (223 or 239), 255 when there is no RS code."""
        return _RS_K.get(self.reed_solomon, 255)


@dataclass(frozen=True)
class FramesSection:
    """``[frames]``: transfer frames (CCSDS 132.0-B TM or 732.0-B AOS)."""

    kind: FrameKind = "tm"
    length: int = 1115
    fecf: bool = False
    ocf: bool = False
    spacecraft_id: int = 499
    secondary_header_length: int = 0  # TM: octets of the secondary header incl. its ID octet (0 = none)
    fhec: bool = False  # AOS frame header error control
    insert_zone_length: int = 0  # AOS insert zone octets
    bitstream_vcids: tuple[int, ...] = ()  # AOS VCs carrying B_PDUs instead of M_PDUs
    idle_vcid: int = 63  # AOS idle VC (CCSDS 732.0-B); TM idle frames are marked by FHP 0x7FE

    @property
    def length_bytes(self) -> int:
        return self.length


@dataclass(frozen=True)
class TimeCodeConfig:
    """How one APID's packet secondary header starts with a CCSDS 301.0-B time code."""

    apid: int
    code: TimeCodeKind = "cuc"
    pfield: int | None = None  # implicit P-field octet(s) as an integer; None = explicit P-field in the packet
    epoch: str = "1958-01-01T00:00:00"  # TAI epoch for level-2 / agency-defined epochs
    offset: int = 0  # octets from the start of the secondary header


@dataclass(frozen=True)
class PacketsSection:
    """``[packets]``: space packets and their time codes."""

    time_codes: tuple[TimeCodeConfig, ...] = ()
    encapsulation: bool = True  # accept CCSDS 133.1-B encapsulation packets (PVN 111)


@dataclass(frozen=True)
class ReceiverSection:
    """``[receiver]``: receiver tuning.  Defaults suit the demo link."""

    carrier_loop_bandwidth_hz: float = 0.0  # 0 = automatic (a fraction of the symbol rate)
    carrier_loop_order: int = 2  # 2 or 3 (third order tracks a Doppler rate without bias)
    timing_loop_bandwidth: float = 0.005  # loop noise bandwidth x symbol period (B_L T)
    acquisition_range_hz: float | None = None  # Hz either side of nominal searched; None = all the sample rate allows
    spectrum_inverted: bool | str = "auto"  # True: conjugate the input; "auto": mirrored constellations tried too
    asm_max_errors: int = 4  # mismatched ASM bits accepted when searching / checking
    flywheel_frames: int = 3  # missed markers tolerated before dropping back to search
    chunk_samples: int = 1 << 18


@dataclass(frozen=True)
class ApidTraffic:
    """One APID of the simulated traffic."""

    apid: int
    length: int  # packet data field octets (the packet is 6 octets longer)
    rate_hz: float
    vcid: int = 0
    time_code: bool = False  # put a CUC secondary header (4+2 octets, P-field 0x1E, implicit)


@dataclass(frozen=True)
class SimulateSection:
    """``[simulate]``: the transmitter and channel of ``downlink simulate``."""

    start: str = "2026-03-14T09:30:00Z"
    sample_rate_hz: float = 1_000_000.0
    seconds: float = 10.0
    ebn0_db: float = 8.0
    carrier_offset_hz: float = 1500.0
    doppler_rate_hz_per_s: float = 0.0
    phase_noise_rad: float = 0.0
    timing_offset: float = 0.37  # fraction of a symbol
    clock_offset_ppm: float = 20.0
    datatype: str = "cf32"  # TOML key "format" (or "datatype"): cf32 | ci16 | ci8 | cu8
    seed: int = 1
    traffic: tuple[ApidTraffic, ...] = (
        ApidTraffic(apid=100, length=120, rate_hz=10.0, vcid=0, time_code=True),
        ApidTraffic(apid=200, length=2000, rate_hz=4.0, vcid=1),
        ApidTraffic(apid=300, length=60, rate_hz=5.0, vcid=0, time_code=True),
    )


@dataclass(frozen=True)
class StationSection:
    """``[station]``: the receiving station.

    Attributes
    ----------
    name : str
        The station's name (the receiving participant of a Tracking Data Message).
    latitude_deg, longitude_deg : float or None
        WGS-84 geodetic latitude (-90..90, north positive) and longitude (-180..360, east positive)
        of the antenna reference point; needed for predicted Doppler and light time from an orbit.
    altitude_m : float
        Height above the WGS-84 ellipsoid (not above the geoid).
    receive_delay_ns : int
        Signal delay from the antenna reference point to the digitizer, as the station calibrates it;
        subtracted from every ERT (0..1e9).
    """

    name: str = ""
    latitude_deg: float | None = None
    longitude_deg: float | None = None
    altitude_m: float = 0.0
    receive_delay_ns: int = 0

    @property
    def has_position(self) -> bool:
        """True when latitude and longitude are both given."""
        return self.latitude_deg is not None and self.longitude_deg is not None


@dataclass(frozen=True)
class ClockSection:
    """``[clock]``: how the spacecraft reports samples of its clock (for ``downlink clock``).

    The spacecraft samples its clock when the leading edge of the ASM of every sampled frame leaves
    the antenna, and sends that sample in a time packet (common practice, no published source).

    Attributes
    ----------
    time_packet_apid : int
        APID of the packets carrying a sampled onboard time.
    time_field_offset : int
        Octet offset of the time code in the packet's data field (after the 6-octet primary header).
    code : {"cuc", "cds"}
    pfield : int or None
        Implicit P-field (one octet, or two as one integer); None = explicit P-field in the packet.
    sampled_every : int
        Frames whose count is a multiple of this are the sampled ones.  TM: the 8-bit master-channel
        count, so it must divide 256; AOS: the virtual-channel count of ``sampled_vcid``.
    sampled_vcid : int or None
        AOS only (no master-channel count): the virtual channel whose count is used.
    onboard_delay_ns : int
        Spacecraft transmit-path delay from the clock sample to the antenna (>= 0).
    """

    time_packet_apid: int = -1
    time_field_offset: int = 0
    code: TimeCodeKind = "cuc"
    pfield: int | None = None
    sampled_every: int = 1
    sampled_vcid: int | None = None
    onboard_delay_ns: int = 0


@dataclass(frozen=True)
class LinkProfile:
    """A whole link profile.  Build with :func:`load_profile` or :func:`profile_from_dict`."""

    link: LinkSection = field(default_factory=LinkSection)
    coding: CodingSection = field(default_factory=CodingSection)
    frames: FramesSection = field(default_factory=FramesSection)
    packets: PacketsSection = field(default_factory=PacketsSection)
    receiver: ReceiverSection = field(default_factory=ReceiverSection)
    simulate: SimulateSection = field(default_factory=SimulateSection)
    station: StationSection = field(default_factory=StationSection)
    clock: ClockSection | None = None
    name: str = "profile"
    #: Where the profile came from, for error messages: the file it was read from, else its name.
    source: str = field(default="profile", compare=False)

    # ---- derived sizes -------------------------------------------------------------------
    @property
    def rs_parity_bytes(self) -> int:
        """Parity octets in one codeblock (2 E I), 0 without RS."""
        c = self.coding
        return 2 * c.reed_solomon * c.interleave if c.reed_solomon else 0

    @property
    def codeblock_bits(self) -> int:
        """Bits between two sync markers: the turbo codeword (``(k + 4) / r``), the LDPC codeword (C2 8160, AR4JA
        ``n``), else the frame plus RS parity."""
        if self.coding.turbo != "none":
            return self.coding.turbo_codeword_bits
        if self.coding.ldpc != "none":
            return self.coding.ldpc_codeword_bits
        return 8 * (self.frames.length + self.rs_parity_bytes)

    @property
    def codeblock_bytes(self) -> int:
        """Octets between two ASMs: the frame plus RS parity (CCSDS 131.0-B); a turbo codeword whose length
        is not a whole number of octets (rate 1/3) is counted up to the next octet."""
        return (self.codeblock_bits + 7) // 8

    @property
    def marker_bits(self) -> int:
        """Bits of the attached sync marker: the turbo rate's own marker (64 .. 192 bits), else 32 (the ASM, also in
        front of LDPC codewords)."""
        if self.coding.turbo != "none":
            return TURBO_MARKER_BITS[self.coding.turbo]
        return 32

    @property
    def virtual_fill_bytes(self) -> int:
        """Virtual fill octets per codeblock (k I - frame length), 0 without RS."""
        c = self.coding
        return c.rs_k * c.interleave - self.frames.length if c.reed_solomon else 0

    @property
    def cadu_bits(self) -> int:
        """Bits of one CADU: the sync marker plus the codeblock."""
        return self.marker_bits + self.codeblock_bits

    @property
    def cadu_channel_bits(self) -> float:
        """Channel bits of one CADU on the link (the CADU's bits over the convolutional code rate)."""
        return self.cadu_bits / self.coding.conv_rate

    def samples_per_cadu(self, sample_rate_hz: float) -> float:
        """Samples one CADU spans in a recording at ``sample_rate_hz``."""
        return self.cadu_channel_bits / self.link.channel_bit_rate * sample_rate_hz

    @property
    def code_rate(self) -> float:
        """Overall information rate per channel bit (convolutional x RS, turbo k / n with the tail, LDPC k / n),
        ASM excluded."""
        if self.coding.turbo != "none" or self.coding.ldpc != "none":
            return self.coding.block_code_info_bits / self.codeblock_bits
        rs = (self.frames.length / self.codeblock_bytes) if self.coding.reed_solomon else 1.0
        return self.coding.conv_rate * rs

    def esn0_from_ebn0(self, ebn0_db: float) -> float:
        """``Es/N0 = Eb/N0 + 10 log10(code rate x bits per modulation symbol)`` (../shared/DESIGN.md)."""
        return ebn0_db + 10.0 * math.log10(self.code_rate * self.link.bits_per_symbol)

    def with_changes(self, **sections: Any) -> LinkProfile:
        """A copy with whole sections or section fields replaced: ``p.with_changes(coding={"interleave": 1})``."""
        kw = {}
        for name, value in sections.items():
            current = getattr(self, name)
            if isinstance(value, dict):
                kw[name] = replace(current, **value)
            else:
                kw[name] = value
        new = replace(self, **kw)
        _validate(new, "<changes>")
        return new


# ---- loading -----------------------------------------------------------------------------

_KEY_MAP = {
    "link": {"symbol_rate": "symbol_rate_baud", "modulation_index": "modulation_index_rad"},
    "simulate": {"format": "datatype"},  # "datatype" is the former key
}


# [simulate] format: the user's names (pipeline.recording.FORMATS) and the SigMF names of the same types
_SIMULATE_FORMATS = ("cf32", "ci16", "ci8", "cu8", "cf32_le", "ci16_le")


def demo_profile_path() -> Path:
    """Path of the bundled demo profile (the invented *Tamarisk* lunar relay orbiter)."""
    return Path(str(resources.files("pipeline") / "data" / "tamarisk.toml"))


def load_profile(path: str | Path) -> LinkProfile:
    """Read and validate a TOML link profile.

    Raises
    ------
    ProfileError
        One line naming the file and the problem: missing, not TOML, unknown key, value out of range.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ProfileError(f"{path}: profile not found") from None
    except OSError as exc:
        raise ProfileError(f"{path}: cannot read profile ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        raise ProfileError(f"{path}: profile is not UTF-8 text (byte {exc.start}, line {line}); TOML files are "
                           f"UTF-8") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{path}: not valid TOML ({exc})") from None
    return profile_from_dict(data, source=str(path), name=path.stem)


def profile_from_dict(data: dict, *, source: str = "<dict>", name: str = "profile") -> LinkProfile:
    """Build and validate a profile from the parsed TOML tree (see :func:`load_profile`)."""
    if not isinstance(data, dict):
        raise ProfileError(f"{source}: profile must be a TOML table")
    known = {"link", "coding", "frames", "packets", "receiver", "simulate", "station", "clock", "name"}
    for key in data:
        if key not in known:
            raise ProfileError(f"{source}: unknown table [{key}] (expected one of {', '.join(sorted(known))})")
    for key in REQUIRED_TABLES:
        if key not in data:
            raise ProfileError(f"{source}: missing table [{key}] (a profile needs [link], [coding] and [frames])")
    sections: dict[str, Any] = {}
    for sec_name, cls in (
        ("link", LinkSection),
        ("coding", CodingSection),
        ("frames", FramesSection),
        ("station", StationSection),
    ):
        sections[sec_name] = _build_section(cls, data.get(sec_name, {}), sec_name, source)
    sections["receiver"] = _build_receiver(data.get("receiver", {}), source)
    if "clock" in data:
        if not isinstance(data["clock"], dict) or "time_packet_apid" not in data["clock"]:
            raise ProfileError(f"{source}: [clock] needs 'time_packet_apid'")
        sections["clock"] = _build_section(ClockSection, data["clock"], "clock", source)
    sections["packets"] = _build_packets(data.get("packets", {}), source)
    sections["simulate"] = _build_simulate(data.get("simulate", {}), source)
    prof_name = str(data.get("name", name))
    prof = LinkProfile(name=prof_name, source=prof_name if source == "<dict>" else str(source), **sections)
    _validate(prof, source)
    return prof


def _build_section(cls, table: Any, sec_name: str, source: str, skip: tuple[str, ...] = ()):
    if not isinstance(table, dict):
        raise ProfileError(f"{source}: [{sec_name}] must be a table")
    keymap = _KEY_MAP.get(sec_name, {})
    names = {f.name: f for f in fields(cls)}
    kw = {}
    for key, value in table.items():
        if key in skip:
            continue
        attr = keymap.get(key, key)
        if attr not in names:
            allowed = sorted({next((k for k, v in keymap.items() if v == n), n) for n in names} - set(skip))
            raise ProfileError(f"{source}: unknown key '{key}' in [{sec_name}] (known: {', '.join(allowed)})")
        default = names[attr].default
        kw[attr] = _coerce(value, default, f"[{sec_name}] {key}", source)
    try:
        return cls(**kw)
    except TypeError as exc:  # pragma: no cover - defensive
        raise ProfileError(f"{source}: [{sec_name}] {exc}") from None


def _coerce(value: Any, default: Any, where: str, source: str) -> Any:
    if isinstance(default, bool):
        if not isinstance(value, bool):
            raise ProfileError(f"{source}: {where} must be true or false, not {value!r}")
        return value
    if isinstance(default, int) and not isinstance(default, bool):
        if isinstance(value, bool) or not isinstance(value, int):
            raise ProfileError(f"{source}: {where} must be an integer, not {value!r}")
        return value
    if default is None and isinstance(value, int) and not isinstance(value, bool):
        return value  # optional integers (pfield) stay integers
    if isinstance(default, float) or (default is None and isinstance(value, float)):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ProfileError(f"{source}: {where} must be a number, not {value!r}")
        value = float(value)
        if not math.isfinite(value):
            raise ProfileError(f"{source}: {where} must be finite, not {value!r}")
        return value
    if isinstance(default, str):
        if not isinstance(value, str):
            raise ProfileError(f"{source}: {where} must be a string, not {value!r}")
        return value
    if isinstance(default, tuple):
        if not isinstance(value, list) or not all(isinstance(v, int) and not isinstance(v, bool) for v in value):
            raise ProfileError(f"{source}: {where} must be a list of integers, not {value!r}")
        return tuple(value)
    return value


def _build_receiver(table: Any, source: str) -> ReceiverSection:
    """``[receiver]``: the generic keys, plus ``spectrum_inverted`` (true | false | "auto") and the replaced key."""
    if not isinstance(table, dict):
        raise ProfileError(f"{source}: [receiver] must be a table")
    if "acquisition_range" in table:
        raise ProfileError(f"{source}: [receiver] acquisition_range (a fraction of the symbol rate) was replaced by "
                           f"acquisition_range_hz (Hz either side of the nominal frequency; leave it out to search "
                           f"everything the sample rate allows)")
    generic = {k: v for k, v in table.items() if k != "spectrum_inverted"}  # not one TOML type: checked below
    base = _build_section(ReceiverSection, generic, "receiver", source)
    rng = base.acquisition_range_hz
    if isinstance(rng, int) and not isinstance(rng, bool):
        base = replace(base, acquisition_range_hz=float(rng))
    if "spectrum_inverted" not in table:
        return base
    value = table["spectrum_inverted"]
    if not (isinstance(value, bool) or value == "auto"):
        raise ProfileError(f"{source}: [receiver] spectrum_inverted must be true, false or \"auto\", not {value!r}")
    return replace(base, spectrum_inverted=value)


def _build_packets(table: Any, source: str) -> PacketsSection:
    if not isinstance(table, dict):
        raise ProfileError(f"{source}: [packets] must be a table")
    base = _build_section(PacketsSection, table, "packets", source, skip=("time_code",))
    codes = []
    entries = table.get("time_code", [])
    if not isinstance(entries, list):
        raise ProfileError(f"{source}: [[packets.time_code]] must be an array of tables")
    for i, entry in enumerate(entries):
        if not isinstance(entry, dict) or "apid" not in entry:
            raise ProfileError(f"{source}: [[packets.time_code]] entry {i + 1} needs an 'apid'")
        entry = dict(entry)
        apid = entry.pop("apid")
        if isinstance(apid, bool) or not isinstance(apid, int):
            raise ProfileError(f"{source}: [[packets.time_code]] apid must be an integer, not {apid!r}")
        tc = _build_section(TimeCodeConfig, {"apid": apid, **entry}, "packets.time_code", source)
        codes.append(tc)
    return replace(base, time_codes=tuple(codes))


def _build_simulate(table: Any, source: str) -> SimulateSection:
    if not isinstance(table, dict):
        raise ProfileError(f"{source}: [simulate] must be a table")
    base = _build_section(SimulateSection, table, "simulate", source, skip=("traffic",))
    if "traffic" not in table:
        return base
    entries = table["traffic"]
    if not isinstance(entries, list) or not entries:
        raise ProfileError(f"{source}: [[simulate.traffic]] must be a non-empty array of tables")
    traffic = []
    for i, entry in enumerate(entries):
        if not isinstance(entry, dict) or not {"apid", "length", "rate_hz"} <= set(entry):
            raise ProfileError(f"{source}: [[simulate.traffic]] entry {i + 1} needs 'apid', 'length' and 'rate_hz'")
        proto = ApidTraffic(apid=0, length=1, rate_hz=1.0)
        kw = {}
        for key, value in entry.items():
            if key not in {f.name for f in fields(ApidTraffic)}:
                raise ProfileError(f"{source}: unknown key '{key}' in [[simulate.traffic]]")
            kw[key] = _coerce(value, getattr(proto, key), f"[[simulate.traffic]] {key}", source)
        traffic.append(ApidTraffic(**kw))
    return replace(base, traffic=tuple(traffic))


def _choice(value: str, alias, where: str, source: str) -> None:
    allowed = get_args(alias)
    if value not in allowed:
        raise ProfileError(f"{source}: {where} must be one of {' | '.join(allowed)}, not {value!r}")


def _check(cond: bool, source: str, message: str) -> None:
    if not cond:
        raise ProfileError(f"{source}: {message}")


def _validate_frames(F: FramesSection, source: str) -> None:
    """``[frames]``: every range is one the frame parser supports (CCSDS 132.0-B / 732.0-B layouts)."""
    _choice(F.kind, FrameKind, "[frames] kind", source)
    tm = F.kind == "tm"
    max_scid = 0x3FF if tm else 0xFF
    _check(0 <= F.spacecraft_id <= max_scid, source,
           f"[frames] spacecraft_id must be 0..{max_scid} for {F.kind.upper()} frames, not {F.spacecraft_id}")
    _check(0 <= F.secondary_header_length <= 64, source,
           f"[frames] secondary_header_length must be 0..64, not {F.secondary_header_length}")
    _check(F.insert_zone_length >= 0, source,
           f"[frames] insert_zone_length must be 0 or more octets, not {F.insert_zone_length}")
    if tm:
        _check(F.insert_zone_length == 0, source, "[frames] insert_zone_length applies to AOS frames, not TM")
        _check(not F.fhec, source, "[frames] fhec applies to AOS frames, not TM")
        _check(not F.bitstream_vcids, source, "[frames] bitstream_vcids applies to AOS frames, not TM")
    else:
        _check(F.secondary_header_length == 0, source,
               "[frames] secondary_header_length applies to TM frames, not AOS")
    _check(all(0 <= v <= 63 for v in F.bitstream_vcids), source, "[frames] bitstream_vcids must be 0..63")
    _check(0 <= F.idle_vcid <= 63, source, f"[frames] idle_vcid must be 0..63, not {F.idle_vcid}")
    # header (TM 6 + secondary header; AOS 6 + FHEC 2 + insert zone + M_PDU/B_PDU header 2), at least one
    # octet of data, then the trailer (OCF 4, FECF 2)
    head = 6 + F.secondary_header_length if tm else 6 + (2 if F.fhec else 0) + F.insert_zone_length + 2
    min_len = head + 1 + (4 if F.ocf else 0) + (2 if F.fecf else 0)
    _check(min_len <= F.length <= 65536, source, f"[frames] length must be {min_len}..65536 octets, not {F.length}")


def _validate(p: LinkProfile, source: str) -> None:
    L, C, F, R, S = p.link, p.coding, p.frames, p.receiver, p.simulate
    _choice(L.modulation, Modulation, "[link] modulation", source)
    _choice(L.pulse, Pulse, "[link] pulse", source)
    _choice(L.line_code, LineCode, "[link] line_code", source)
    _choice(L.subcarrier_wave, SubcarrierWave, "[link] subcarrier_wave", source)
    _check(L.symbol_rate_baud > 0, source, f"[link] symbol_rate must be > 0, not {L.symbol_rate_baud:g}")
    _check(0.0 < L.rolloff <= 1.0, source, f"[link] rolloff must be in (0, 1], not {L.rolloff:g}")
    if L.modulation in ("pcm-pm", "pcm-psk-pm"):
        _check(0.0 < L.modulation_index_rad < math.pi / 2, source,
               f"[link] modulation_index must be in (0, pi/2) rad, not {L.modulation_index_rad:g}")
    if L.modulation == "pcm-psk-pm":
        _check(L.subcarrier_hz > 0, source, f"[link] subcarrier_hz must be > 0 for pcm-psk-pm, not {L.subcarrier_hz:g}")
        _check(L.subcarrier_hz >= L.symbol_rate_baud, source,
               f"[link] subcarrier_hz must be at least the symbol rate ({L.symbol_rate_baud:g}), "
               f"not {L.subcarrier_hz:g}")
    if L.line_code == "bi-phase-l":
        _check(L.modulation in ("bpsk", "pcm-pm", "pcm-psk-pm"), source,
               f"[link] line_code bi-phase-l needs modulation bpsk, pcm-pm or pcm-psk-pm, not {L.modulation!r}")
    _choice(C.convolutional, ConvRate, "[coding] convolutional", source)
    _check(C.reed_solomon in (0, 8, 16), source, f"[coding] reed_solomon must be 0, 8 or 16, not {C.reed_solomon}")
    _check(1 <= C.interleave <= 8, source, f"[coding] interleave must be 1..8, not {C.interleave}")
    _check(C.convolutional_g2_inverted is None or isinstance(C.convolutional_g2_inverted, bool), source,
           f"[coding] convolutional_g2_inverted must be true or false, not {C.convolutional_g2_inverted!r}")
    _check(C.convolutional_g2_inverted is None or C.convolutional != "none", source,
           "[coding] convolutional_g2_inverted applies to a convolutional code; convolutional is \"none\"")
    _validate_frames(F, source)
    _validate_block_codes(p, source)
    if C.reed_solomon:
        k = C.rs_k
        _check(F.length % C.interleave == 0, source,
               f"[frames] length {F.length} must be a multiple of [coding] interleave {C.interleave} with Reed-Solomon")
        _check(F.length <= k * C.interleave, source,
               f"[frames] length must be at most {k * C.interleave} octets for RS E={C.reed_solomon} and "
               f"interleave {C.interleave}, not {F.length}")
        _check(F.length > 2 * C.reed_solomon * 0 + C.interleave, source, "[frames] length too short for RS")
    _check(R.carrier_loop_bandwidth_hz >= 0, source, "[receiver] carrier_loop_bandwidth_hz must be >= 0")
    # both receivers refuse a loop as wide as 5 % of the symbol rate (B_L T << 1: the loop gains' approximation)
    _check(R.carrier_loop_bandwidth_hz < 0.05 * L.symbol_rate_baud, source,
           f"[receiver] carrier_loop_bandwidth_hz must be below 5 % of the symbol rate "
           f"({0.05 * L.symbol_rate_baud:g} Hz), not {R.carrier_loop_bandwidth_hz:g}")
    _check(R.carrier_loop_order in (2, 3), source,
           f"[receiver] carrier_loop_order must be 2 or 3, not {R.carrier_loop_order}")
    lo, hi = TIMING_LOOP_BANDWIDTH_RANGE
    _check(lo <= R.timing_loop_bandwidth <= hi, source,
           f"[receiver] timing_loop_bandwidth must be {lo:g}..{hi:g} (x symbol rate), not {R.timing_loop_bandwidth:g}")
    _check(R.acquisition_range_hz is None or (isinstance(R.acquisition_range_hz, (int, float))
                                              and not isinstance(R.acquisition_range_hz, bool)
                                              and math.isfinite(R.acquisition_range_hz)
                                              and R.acquisition_range_hz > 0), source,
           f"[receiver] acquisition_range_hz must be a frequency > 0 Hz, not {R.acquisition_range_hz!r}")
    _check(isinstance(R.spectrum_inverted, bool) or R.spectrum_inverted == "auto", source,
           f"[receiver] spectrum_inverted must be true, false or \"auto\", not {R.spectrum_inverted!r}")
    _check(0 <= R.asm_max_errors <= 10, source, f"[receiver] asm_max_errors must be 0..10, not {R.asm_max_errors}")
    _check(0 <= R.flywheel_frames <= 100, source, "[receiver] flywheel_frames must be 0..100")
    _check(1024 <= R.chunk_samples <= 1 << 26, source, "[receiver] chunk_samples must be 1024..67108864")
    _check(L.downlink_frequency_hz is None or (isinstance(L.downlink_frequency_hz, float)
                                               and L.downlink_frequency_hz > 0), source,
           f"[link] downlink_frequency_hz must be a frequency > 0 Hz, not {L.downlink_frequency_hz!r}")
    for tc in p.packets.time_codes:
        _choice(tc.code, TimeCodeKind, "[[packets.time_code]] code", source)
        _check(0 <= tc.apid <= 0x7FE, source, f"[[packets.time_code]] apid must be 0..2046, not {tc.apid}")
        # the packet extractor's own check of these values (one rule, shared)
        from pipeline.packets._timecodes import check_time_code_config

        try:
            check_time_code_config(tc.code, tc.pfield, tc.epoch, tc.offset)
        except ValueError as exc:
            raise ProfileError(f"{source}: [[packets.time_code]] apid {tc.apid}: {exc}") from None
    _validate_station(p.station, source)
    if p.clock is not None:
        _validate_clock(p.clock, F.kind, source)
    _check(S.sample_rate_hz > 0, source, f"[simulate] sample_rate_hz must be > 0, not {S.sample_rate_hz:g}")
    _check(S.seconds > 0, source, f"[simulate] seconds must be > 0, not {S.seconds:g}")
    _check(S.datatype in _SIMULATE_FORMATS, source,
           f"[simulate] format must be cf32 | ci16 | ci8 | cu8, not {S.datatype!r}")
    for t in S.traffic:
        _check(0 <= t.apid <= 0x7FE, source, f"[[simulate.traffic]] apid must be 0..2046, not {t.apid}")
        _check(1 <= t.length <= 65536, source, f"[[simulate.traffic]] length must be 1..65536, not {t.length}")
        _check(t.rate_hz > 0, source, f"[[simulate.traffic]] rate_hz must be > 0, not {t.rate_hz:g}")
        _check(0 <= t.vcid <= 63, source, f"[[simulate.traffic]] vcid must be 0..63, not {t.vcid}")


def _validate_station(st: StationSection, source: str) -> None:
    if (st.latitude_deg is None) != (st.longitude_deg is None):
        raise ProfileError(f"{source}: [station] needs both latitude_deg and longitude_deg, or neither")
    if st.latitude_deg is not None:
        _check(-90.0 <= st.latitude_deg <= 90.0, source,
               f"[station] latitude_deg must be -90..90, not {st.latitude_deg:g}")
        _check(-180.0 <= st.longitude_deg <= 360.0, source,
               f"[station] longitude_deg must be -180..360, not {st.longitude_deg:g}")
    _check(-500.0 <= st.altitude_m <= 100_000.0, source,
           f"[station] altitude_m must be -500..100000 m above the WGS-84 ellipsoid, not {st.altitude_m:g}")
    _check(0 <= st.receive_delay_ns <= 1_000_000_000, source,
           f"[station] receive_delay_ns must be 0..1000000000, not {st.receive_delay_ns}")


def _validate_clock(c: ClockSection, frame_kind: str, source: str) -> None:
    _check(0 <= c.time_packet_apid <= 0x7FE, source,
           f"[clock] time_packet_apid must be 0..2046, not {c.time_packet_apid}")
    _check(0 <= c.time_field_offset <= 65535, source,
           f"[clock] time_field_offset must be 0..65535 octets, not {c.time_field_offset}")
    _choice(c.code, TimeCodeKind, "[clock] code", source)
    # the P-field through the packet extractor's own check (one rule with [[packets.time_code]]); the clock reads
    # onboard time, so the epoch given is only a valid placeholder
    from pipeline.packets._timecodes import check_time_code_config

    try:
        check_time_code_config(c.code, c.pfield, "1958-01-01T00:00:00", c.time_field_offset)
    except ValueError as exc:
        raise ProfileError(f"{source}: [clock] {exc}") from None
    _check(0 <= c.onboard_delay_ns <= 1_000_000_000, source,
           f"[clock] onboard_delay_ns must be 0..1000000000, not {c.onboard_delay_ns}")
    if frame_kind == "tm":
        _check(c.sampled_vcid is None, source, "[clock] sampled_vcid applies to AOS frames only; TM frames use the "
                                               "master-channel frame count")
        _check(1 <= c.sampled_every <= 256 and 256 % c.sampled_every == 0, source,
               f"[clock] sampled_every must divide 256 (the 8-bit master-channel frame count): 1, 2, 4, ..., 256, "
               f"not {c.sampled_every}")
    else:
        _check(c.sampled_vcid is not None and 0 <= c.sampled_vcid <= 63, source,
               f"[clock] sampled_vcid must be 0..63 on AOS links (the virtual channel whose count is sampled), "
               f"not {c.sampled_vcid!r}")
        _check(1 <= c.sampled_every <= 1 << 24 and (1 << 24) % c.sampled_every == 0, source,
               f"[clock] sampled_every must divide 16777216 (the 24-bit virtual-channel frame count), "
               f"not {c.sampled_every}")
def _validate_block_codes(p: LinkProfile, source: str) -> None:
    """The turbo keys (issue 16) and the LDPC keys (issue 15): values, then what they exclude."""
    C = p.coding
    _choice(C.turbo, TurboRate, "[coding] turbo", source)
    _check(C.turbo_k in _TURBO_K, source,
           f"[coding] turbo_k must be one of {' | '.join(map(str, _TURBO_K))}, not {C.turbo_k}")
    _check(1 <= C.turbo_max_iterations <= 100, source,
           f"[coding] turbo_max_iterations must be 1..100, not {C.turbo_max_iterations}")
    _choice(C.ldpc, LdpcCode, "[coding] ldpc", source)
    _check(C.ldpc_rate in _LDPC_RATES, source,
           f"[coding] ldpc_rate must be one of {' | '.join(_LDPC_RATES)}, not {C.ldpc_rate!r}")
    _check(C.ldpc_k in _LDPC_K, source,
           f"[coding] ldpc_k must be one of {' | '.join(map(str, _LDPC_K))}, not {C.ldpc_k}")
    _check(1 <= C.ldpc_max_iterations <= 1000, source,
           f"[coding] ldpc_max_iterations must be 1..1000, not {C.ldpc_max_iterations}")
    _check(C.turbo == "none" or C.ldpc == "none", source,
           f'[coding] turbo = "{C.turbo}" and ldpc = "{C.ldpc}": a link has one of them, set the other to "none"')
    if C.turbo != "none":
        _validate_turbo(p, source)
    elif C.ldpc != "none":
        _validate_ldpc(p, source)


def _block_code_rules(p: LinkProfile, decoder: str, k: int, length_rule: str) -> list[str]:
    """What a turbo or LDPC link breaks of the rules both share: no convolutional or RS code, one frame of k bits
    per codeword, no NRZ-M (each broken rule one text, in a fixed order)."""
    L, C, F = p.link, p.coding, p.frames
    wrong = []
    if C.convolutional != "none":
        wrong.append(f'[coding] convolutional must be "none", not {C.convolutional!r}')
    if C.reed_solomon:
        wrong.append(f"[coding] reed_solomon must be 0, not {C.reed_solomon}")
    if F.length != k // 8:
        wrong.append(f"[frames] length must be {k // 8} octets ({length_rule}), not {F.length}")
    if L.line_code == "nrz-m":
        wrong.append('[link] line_code must be "nrz-l" or "bi-phase-l" (soft NRZ-M decoding would cost the '
                     f"{decoder} decoder several dB)")
    return wrong


def _validate_turbo(p: LinkProfile, source: str) -> None:
    C, F = p.coding, p.frames
    k = C.turbo_k
    # CCSDS 131.0-B sec. 6.2: one transfer frame per codeword, FECF required (sec. 6.2.2); the turbo code
    # replaces the convolutional and Reed-Solomon codes (sec. 2).  Every rule is checked at once so the one
    # error names everything that is wrong.
    wrong = _block_code_rules(p, "turbo", k, "turbo_k / 8")
    if not F.fecf:
        wrong.append("[frames] fecf must be true (CCSDS 131.0-B sec. 6.2.2)")
    _check(not wrong, source, f'[coding] turbo = "{C.turbo}" (k = {k}) needs: ' + "; ".join(wrong))


def _validate_ldpc(p: LinkProfile, source: str) -> None:
    C = p.coding
    k = C.ldpc_info_bits
    # CCSDS 131.0-B sec. 7.2-7.4: one transfer frame of exactly k bits per codeword (sec. 7.3.1, 7.4.3.1); the LDPC
    # code replaces the convolutional and Reed-Solomon codes; the FECF is optional (sec. 7.2.3).  The 32-bit ASM
    # precedes each codeword, so the uncoded QPSK / OQPSK rotation search (on that ASM) serves LDPC links.
    wrong = _block_code_rules(p, "LDPC", k, "the C2 information block" if C.ldpc == "c2" else "ldpc_k / 8")
    name = '"c2"' if C.ldpc == "c2" else f'"ar4ja" (rate {C.ldpc_rate}, k = {k})'
    _check(not wrong, source, f"[coding] ldpc = {name} needs: " + "; ".join(wrong))
