"""CCSDS 301.0-B time codes: CUC (unsegmented) and CDS (day segmented), decoders and encoders.

Every decoder returns ``(tai_ns, octets)``: the instant as TAI ns since 1958-01-01 TAI and the
number of octets read (P-field included when it is explicit).  Encoders take the same TAI ns.

Bit layouts (from memory, not confirmed against 301.0-B-4; see ../shared/REFERENCES.md sec. 6):

CUC P-field octet 1 (MSB first)
    bit 0 extension flag, bits 1-3 time code ID (``001`` level 1, 1958 TAI epoch; ``010``
    level 2, agency-defined epoch), bits 4-5 coarse octets - 1, bits 6-7 fine octets.
CUC P-field octet 2 (when the extension flag is set)
    bit 0 a further extension (not supported), bits 1-2 additional coarse octets, bits 3-5
    additional fine octets, bits 6-7 reserved.
CDS P-field (one octet)
    bit 0 extension flag (must be 0), bits 1-3 ``100``, bit 4 epoch (0 = 1958-01-01, 1 = agency
    defined), bit 5 day segment length (0 = 16 bits, 1 = 24 bits), bits 6-7 sub-millisecond
    segment (``00`` none, ``01`` microseconds in 16 bits, ``10`` picoseconds in 32 bits).
CDS T-field
    day count, milliseconds of the UTC day (32 bits, up to 86 400 999 on a day with a leap
    second), optional sub-millisecond count.  Days count UTC days from the epoch date.
"""

from __future__ import annotations

from typing import NamedTuple

from pipeline.timescales import (
    NS_PER_DAY,
    LeapSecondTable,
    _as_int,
    leap_seconds,
    tai_from_calendar,
)

__all__ = [
    "decode_cuc",
    "decode_cds",
    "encode_cuc",
    "encode_cds",
    "decode_time_code",
    "decode_obt_ns",
    "OnboardTime",
    "cuc_pfield_layout",
    "cds_pfield_layout",
    "check_time_code_config",
    "LEVEL1_EPOCH",
]

#: CCSDS level-1 epoch (CCSDS 301.0-B sec. 3.1, from memory, not confirmed).
LEVEL1_EPOCH = "1958-01-01T00:00:00"


def _pfield_octets(name: str, pfield) -> bytes:
    """An implicit P-field given as an integer (one octet, or two when > 0xFF) as bytes."""
    value = _as_int(name, pfield)
    if not 0 <= value <= 0xFFFF:
        raise ValueError(f"Argument '{name}' must be 0..0xFFFF, not {value:#x}.")
    return bytes([value]) if value <= 0xFF else value.to_bytes(2, "big")


def cuc_pfield_layout(pfield: bytes) -> tuple[int, int, int, int]:
    """``(level, coarse_octets, fine_octets, pfield_octets)`` of a CUC P-field.

    Raises
    ------
    ValueError
        If the P-field is not a CUC one (time code ID other than 001/010), needs a third octet,
        or is cut short.
    """
    if len(pfield) < 1:
        raise ValueError("CUC P-field is empty")
    p1 = pfield[0]
    code_id = (p1 >> 4) & 0x7
    if code_id not in (1, 2):
        raise ValueError(f"CUC P-field {p1:#04x} has time code ID {code_id:03b}, not 001 or 010")
    coarse = ((p1 >> 2) & 0x3) + 1
    fine = p1 & 0x3
    n = 1
    if p1 & 0x80:
        if len(pfield) < 2:
            raise ValueError(f"CUC P-field {p1:#04x} announces a second octet that is missing")
        p2 = pfield[1]
        if p2 & 0x80:
            raise ValueError(f"CUC P-field second octet {p2:#04x} announces a third octet (not supported)")
        coarse += (p2 >> 5) & 0x3
        fine += (p2 >> 2) & 0x7
        n = 2
    return code_id, coarse, fine, n


def cds_pfield_layout(pfield: int) -> tuple[bool, int, int]:
    """``(agency_epoch, day_octets, submillisecond_octets)`` of a one-octet CDS P-field.

    Raises
    ------
    ValueError
        If the time code ID is not 100, the extension flag is set or the resolution code is 11.
    """
    if pfield & 0x80:
        raise ValueError(f"CDS P-field {pfield:#04x} has the extension flag set (not supported)")
    if (pfield >> 4) & 0x7 != 0b100:
        raise ValueError(f"CDS P-field {pfield:#04x} has time code ID {(pfield >> 4) & 7:03b}, not 100")
    res = pfield & 0x3
    if res == 3:
        raise ValueError(f"CDS P-field {pfield:#04x} has the reserved sub-millisecond code 11")
    return bool(pfield & 0x08), (3 if pfield & 0x04 else 2), (0, 2, 4)[res]


def _buffer(name: str, data) -> bytes:
    if isinstance(data, (bytes, bytearray, memoryview)):
        return bytes(data)
    raise TypeError(f"Argument '{name}' must be bytes-like, not {type(data).__name__}.")


def decode_cuc(data, *, pfield: int | None = None, epoch: str = LEVEL1_EPOCH) -> tuple[int, int]:
    """Decode a CCSDS Unsegmented time Code (CUC) to TAI ns since 1958.

    Parameters
    ----------
    data : bytes-like
        Starts with the P-field when ``pfield`` is None (explicit), else with the T-field.
    pfield : int or None
        Implicit P-field: one octet (``0x1E``) or two octets as one integer (``0x9E04``).
    epoch : str
        The level-2 (agency-defined) epoch on the TAI scale; ignored for level-1 codes, whose
        epoch is 1958-01-01 TAI.

    Returns
    -------
    tai_ns : int
        ``epoch + coarse + fine / 256**fine_octets`` seconds, as TAI ns since 1958, rounded to
        the nearest ns (half up).
    octets : int
        Octets read from ``data``.

    Raises
    ------
    ValueError
        If the P-field is not a CUC one or ``data`` is too short (bad data: the packet
        extractor catches this and counts it).

    Notes
    -----
    Exact integer arithmetic on Python ints, O(octets).  The coarse count is TAI seconds; no
    leap-second table is involved until the result is turned into UTC.

    References
    ----------
    CCSDS 301.0-B-4 sec. 3.2 (layout from memory, not confirmed).
    """
    code_id, coarse_s, fine_count, fine, end = _cuc_fields(data, pfield)
    base = 0 if code_id == 1 else tai_from_calendar(epoch)
    return base + coarse_s * 1_000_000_000 + _fine_ns(fine_count, fine), end


def _cuc_fields(data, pfield) -> tuple[int, int, int, int, int]:
    """``(code_id, coarse count, fine count, fine octets, octets read)`` of a CUC."""
    buf = _buffer("data", data)
    if pfield is None:
        code_id, coarse, fine, n_p = cuc_pfield_layout(buf[:2])
        start = n_p
    else:
        code_id, coarse, fine, _ = cuc_pfield_layout(_pfield_octets("pfield", pfield))
        start = 0
    end = start + coarse + fine
    if len(buf) < end:
        raise ValueError(f"CUC needs {end} octets, only {len(buf)} present")
    return (code_id, int.from_bytes(buf[start:start + coarse], "big"),
            int.from_bytes(buf[start + coarse:end], "big"), fine, end)


def _fine_ns(fine_count: int, fine_octets: int) -> int:
    """``fine_count / 256**fine_octets`` s in ns, nearest (half up)."""
    scale = 1 << (8 * fine_octets)
    return (2 * fine_count * 1_000_000_000 + scale) // (2 * scale)


def encode_cuc(tai_ns: int, *, pfield: int = 0x1E, explicit: bool = False, epoch: str = LEVEL1_EPOCH) -> bytes:
    """Encode TAI ns since 1958 as a CUC (P-field first when ``explicit``).

    The fine count is the nearest multiple of ``2**(-8 fine_octets)`` s (half up); an instant
    that does not fit the coarse octets, or lies before the epoch, raises ValueError.

    References
    ----------
    CCSDS 301.0-B-4 sec. 3.2 (layout from memory, not confirmed).
    """
    tai_ns = _as_int("tai_ns", tai_ns)
    p = _pfield_octets("pfield", pfield)
    try:
        code_id, coarse, fine, n_p = cuc_pfield_layout(p)
    except ValueError as exc:
        raise ValueError(f"Argument 'pfield' is not a CUC P-field: {exc}.") from None
    if n_p != len(p):
        raise ValueError(f"Argument 'pfield' {pfield:#x} has {len(p)} octets but its extension flag says {n_p}.")
    rel = tai_ns - (0 if code_id == 1 else tai_from_calendar(epoch))
    scale = 1 << (8 * fine)
    ticks = (2 * rel * scale + 1_000_000_000) // 2_000_000_000  # nearest count of 2^-8f s
    if not 0 <= ticks < (1 << (8 * (coarse + fine))):
        raise ValueError(f"Argument 'tai_ns' {tai_ns} does not fit a CUC of {coarse}+{fine} octets after its epoch.")
    t_field = ticks.to_bytes(coarse + fine, "big")
    return (p + t_field) if explicit else t_field


def _cds_epoch_day(agency: bool, epoch: str) -> tuple[int, int]:
    """(day from 1958-01-01, ns into that day) of the CDS epoch."""
    if not agency:
        return 0, 0
    return divmod(tai_from_calendar(epoch), NS_PER_DAY)


def decode_cds(data, *, pfield: int | None = None, epoch: str = LEVEL1_EPOCH,
               table: LeapSecondTable | None = None) -> tuple[int, int]:
    """Decode a CCSDS Day Segmented time code (CDS) to TAI ns since 1958.

    Parameters
    ----------
    data : bytes-like
        Starts with the one-octet P-field when ``pfield`` is None, else with the T-field.
    pfield : int or None
        Implicit P-field octet, e.g. ``0x40`` (1958 epoch, 16-bit days, no sub-ms), ``0x41``
        (microseconds), ``0x42`` (picoseconds), ``0x44`` (24-bit days).
    epoch : str
        Agency-defined epoch (P-field bit 4 set): the UTC date whose day is day 0.
    table : LeapSecondTable, optional
        TAI - UTC; the shipped table by default.

    Returns
    -------
    tai_ns : int
        The instant ``ms_of_day`` ms (+ sub-ms) after the start of UTC day ``epoch + days``, as
        TAI ns since 1958.  Picoseconds are rounded to the nearest ns.
    octets : int

    Raises
    ------
    ValueError
        Bad P-field, short data, sub-ms count out of range, or a ms-of-day beyond the end of
        that UTC day (86 400 000 ms, or 86 401 000 on a day ending with a leap second).

    Notes
    -----
    ``TAI = (day start in UTC) + ms of day + (TAI - UTC at the start of that day)``; the ms of
    day runs on through a positive leap second, so the result is continuous in TAI.  O(1).

    References
    ----------
    CCSDS 301.0-B-4 sec. 3.3 (layout from memory, not confirmed).
    """
    agency, days, ms, sub_ns, _, end = _cds_fields(data, pfield)
    day0, tod0 = _cds_epoch_day(agency, epoch)
    tab = table or leap_seconds()
    return tab.tai_from_day(day0 + days, tod0 + ms * 1_000_000 + sub_ns), end


def _cds_fields(data, pfield) -> tuple[bool, int, int, int, int, int]:
    """``(agency epoch, days, ms of day, sub-ms in ns, resolution in ns, octets read)`` of a CDS."""
    buf = _buffer("data", data)
    if pfield is None:
        if not buf:
            raise ValueError("CDS needs a P-field octet, none present")
        p, start = buf[0], 1
    else:
        p = _as_int("pfield", pfield)
        if not 0 <= p <= 0xFF:
            raise ValueError(f"Argument 'pfield' must be one octet for CDS, not {p:#x}.")
        start = 0
    agency, day_octets, sub_octets = cds_pfield_layout(p)
    end = start + day_octets + 4 + sub_octets
    if len(buf) < end:
        raise ValueError(f"CDS needs {end} octets, only {len(buf)} present")
    days = int.from_bytes(buf[start:start + day_octets], "big")
    ms = int.from_bytes(buf[start + day_octets:start + day_octets + 4], "big")
    sub = int.from_bytes(buf[start + day_octets + 4:end], "big")
    if sub_octets == 2:
        if sub > 999:
            raise ValueError(f"CDS microseconds of millisecond {sub} exceed 999")
        return agency, days, ms, sub * 1000, 1000, end
    if sub_octets == 4:
        if sub > 999_999_999:
            raise ValueError(f"CDS picoseconds of millisecond {sub} exceed 999999999")
        return agency, days, ms, (sub + 500) // 1000, 1, end
    return agency, days, ms, 0, 1_000_000, end


def encode_cds(tai_ns: int, *, pfield: int = 0x40, explicit: bool = False, epoch: str = LEVEL1_EPOCH,
               table: LeapSecondTable | None = None) -> bytes:
    """Encode TAI ns since 1958 as a CDS (P-field first when ``explicit``).

    The instant is split into UTC day and ms of day with the leap-second table (an instant inside
    a leap second gets ms of day >= 86 400 000); the sub-ms part is truncated to the resolution.

    References
    ----------
    CCSDS 301.0-B-4 sec. 3.3 (layout from memory, not confirmed).
    """
    tai_ns = _as_int("tai_ns", tai_ns)
    p = _as_int("pfield", pfield)
    if not 0 <= p <= 0xFF:
        raise ValueError(f"Argument 'pfield' must be one octet for CDS, not {p:#x}.")
    try:
        agency, day_octets, sub_octets = cds_pfield_layout(p)
    except ValueError as exc:
        raise ValueError(f"Argument 'pfield' is not a CDS P-field: {exc}.") from None
    tab = table or leap_seconds()
    day, ns_of_day = tab.day_from_tai(tai_ns)
    day0, tod0 = _cds_epoch_day(agency, epoch)
    days = day - day0
    ns_of_day -= tod0
    if ns_of_day < 0:  # an epoch that is not at midnight: borrow a day
        days -= 1
        ns_of_day += NS_PER_DAY
    if not 0 <= days < (1 << (8 * day_octets)):
        raise ValueError(f"Argument 'tai_ns' {tai_ns} is outside the {8 * day_octets}-bit CDS day range of its epoch.")
    ms, rem_ns = divmod(ns_of_day, 1_000_000)
    out = bytearray([p]) if explicit else bytearray()
    out += days.to_bytes(day_octets, "big") + ms.to_bytes(4, "big")
    if sub_octets == 2:
        out += (rem_ns // 1000).to_bytes(2, "big")
    elif sub_octets == 4:
        out += (rem_ns * 1000).to_bytes(4, "big")
    return bytes(out)


def decode_time_code(data, *, code: str, pfield: int | None = None, epoch: str = LEVEL1_EPOCH,
                     table: LeapSecondTable | None = None) -> tuple[int, int]:
    """Dispatch to :func:`decode_cuc` (``code="cuc"``) or :func:`decode_cds` (``code="cds"``)."""
    if code == "cuc":
        return decode_cuc(data, pfield=pfield, epoch=epoch)
    if code == "cds":
        return decode_cds(data, pfield=pfield, epoch=epoch, table=table)
    raise ValueError(f"Argument 'code' must be cuc | cds, not {code!r}.")


def check_time_code_config(code: str, pfield, epoch: str, offset) -> int | None:
    """Check one configured time code (a profile's ``[[packets.time_code]]`` entry); return its P-field.

    The one check of these values: the profile validator and the packet extractor both call it, so
    whatever a profile may hold, the extractor decodes (issue 13).

    Parameters
    ----------
    code : {"cuc", "cds"}
    pfield : int, integral float or None
        The implicit P-field (one or two octets for CUC, one for CDS), or None for an explicit
        P-field carried in each packet.
    epoch : str
        ISO-8601 epoch for agency-defined epochs (:func:`pipeline.timescales.tai_from_calendar`).
    offset : int
        Octets from the start of the packet's secondary header to the time code, 0..65535.

    Returns
    -------
    int or None
        The P-field as an integer.

    Raises
    ------
    ValueError
        One line naming the value and the rule, e.g. ``pfield 0x4e is not a valid CUC P-field
        (...)``.

    Examples
    --------
    >>> check_time_code_config("cuc", 0x1E, "1958-01-01T00:00:00", 0)
    30
    """
    if code not in ("cuc", "cds"):
        raise ValueError(f"code must be cuc | cds, not {code!r}")
    if pfield is not None:
        if isinstance(pfield, float) and pfield.is_integer():
            pfield = int(pfield)
        if isinstance(pfield, bool) or not isinstance(pfield, int):
            raise ValueError(f"pfield must be an integer P-field or absent, not {pfield!r}")
        try:
            if code == "cuc":
                if not 0 <= pfield <= 0xFFFF:
                    raise ValueError(f"0x{pfield:x} is not one or two octets")
                octets = pfield.to_bytes(2 if pfield > 0xFF else 1, "big")
                if cuc_pfield_layout(octets)[3] != len(octets):
                    raise ValueError(f"0x{pfield:x}: the extension flag disagrees with its length")
            else:
                if not 0 <= pfield <= 0xFF:
                    raise ValueError(f"0x{pfield:x} is not one octet")
                cds_pfield_layout(pfield)
        except ValueError as exc:
            raise ValueError(f"pfield is not a valid {code.upper()} P-field ({exc})") from None
    if isinstance(offset, bool) or not isinstance(offset, int) or not 0 <= offset <= 65535:
        raise ValueError(f"offset must be 0..65535 octets, not {offset!r}")
    try:
        tai_from_calendar(epoch)
    except (TypeError, ValueError) as exc:
        raise ValueError(str(exc).replace("Argument 'epoch' must", "epoch must").rstrip(".")) from None
    return pfield


class OnboardTime(NamedTuple):
    """A time code read as a plain count (onboard time), without its epoch or any time scale.

    Attributes
    ----------
    ns : int
        The count in ns: CUC ``coarse + fine / 256**f`` s; CDS ``days x 86400 s + ms + sub-ms``.
    octets : int
        Octets read (P-field included when explicit).
    resolution_ns : float
        One step of the least significant field (CUC ``1e9 / 256**f``, CDS 1 ms, 1 us or 1 ps).
    """

    ns: int
    octets: int
    resolution_ns: float


def decode_obt_ns(data, *, code: str, pfield: int | None = None) -> OnboardTime:
    """Read a CUC or CDS as onboard time: the T-field's count in ns, no epoch and no leap seconds.

    A spacecraft clock that is not kept on UTC runs from an arbitrary origin; correlation
    (``downlink clock``) relates this count to UTC, so nothing here assumes a scale.

    Raises
    ------
    ValueError
        Bad P-field or short data (as :func:`decode_cuc` / :func:`decode_cds`), or a bad ``code``.

    Notes
    -----
    Integer arithmetic; the CUC fine count is rounded to the nearest ns (half up).  O(octets).

    References
    ----------
    CCSDS 301.0-B-4 sec. 3.2 and 3.3 (layouts from memory, not confirmed).

    Examples
    --------
    >>> decode_obt_ns(bytes.fromhex("0000000A800000"), code="cuc", pfield=0x2F)  # 10.5 s, 3 fine octets
    OnboardTime(ns=10500000000, octets=7, resolution_ns=59.604644775390625)
    """
    if code == "cuc":
        _, coarse_s, fine_count, fine, end = _cuc_fields(data, pfield)
        return OnboardTime(coarse_s * 1_000_000_000 + _fine_ns(fine_count, fine), end, 1e9 / (1 << (8 * fine)))
    if code == "cds":
        _, days, ms, sub_ns, res, end = _cds_fields(data, pfield)
        return OnboardTime(days * NS_PER_DAY + ms * 1_000_000 + sub_ns, end, float(res))
    raise ValueError(f"Argument 'code' must be cuc | cds, not {code!r}.")
