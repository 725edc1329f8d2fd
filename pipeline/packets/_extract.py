"""Space packets (CCSDS 133.0-B) and encapsulation packets (CCSDS 133.1-B) out of transfer frames.

Space packet primary header, 6 octets (from memory, not confirmed; ../shared/REFERENCES.md sec. 5)
    bits 0-2 version ``000``, 3 type, 4 secondary header flag, 5-15 APID (``0x7FF`` idle),
    16-17 sequence flags, 18-31 sequence count (14 bits), 32-47 packet data length
    (octets of the data field - 1).  Whole packet: 7..65542 octets.
Encapsulation packet header (version ``111``; PID/PVN confirmed by [SLI] sec. 7.7, the rest from
memory, not confirmed)
    octet 0: version (3), protocol id (3, ``000`` idle), length of length (2).
    LoL 00: the packet is this one octet (``E0`` = idle);
    LoL 01: octet 1 is the packet length; LoL 10: octet 1 user defined + protocol id
    extension, octets 2-3 the packet length; LoL 11: octet 1 as before, octets 2-3 CCSDS
    defined, octets 4-7 the packet length.  The packet length counts the whole packet.
"""

from __future__ import annotations

import hashlib
from dataclasses import asdict, dataclass, field, replace
from typing import Any

from pipeline.link._accounting import CountTracker, FramePeriod
from pipeline.packets._timecodes import check_time_code_config, decode_time_code
from pipeline.profile import LinkProfile, TimeCodeConfig
from pipeline.timescales import leap_seconds

__all__ = ["Packet", "PacketExtractor", "PacketStats", "SequenceGap", "IDLE_APID", "DROP_REASONS"]

#: APID of idle space packets.
IDLE_APID = 0x7FF
_FHP_NO_HEADER = 0x7FF
_SEQ_MODULUS = 1 << 14
_MAX_SPACE_PACKET = 65542
_IDLE_OCTET = 0xE0
_MAX_GAP_EVENTS = 1000
# Packet times after 9999-12-31 UTC are counted as time-code errors.
_TIME_MAX_NS = 2_932_897 * 86_400 * 1_000_000_000  # days from 1970-01-01 to 10000-01-01

#: Reasons a (partial) packet is discarded.  ``superseded``: the frames it began in were repeated or
#: replayed, and reassembly restarted from the copy (or the count track was given up).
DROP_REASONS = ("frame_gap", "fhp_mismatch", "bad_version", "bad_length", "too_long", "incomplete_at_end",
                "superseded")
#: Count streams followed per virtual channel and per APID (see pipeline.link.CountTracker).
_MAX_TRACKS = 4

# _packet_length results below zero
_NEED_MORE = 0
_BAD_VERSION = -1
_BAD_LENGTH = -2
_TOO_LONG = -3
_REASON = {_BAD_VERSION: "bad_version", _BAD_LENGTH: "bad_length", _TOO_LONG: "too_long"}


@dataclass(frozen=True, slots=True)
class Packet:
    """One reassembled packet with the provenance of the frame holding its first octet.

    Attributes
    ----------
    apid, seq_count, seq_flags : int or None
        Space packet fields; None for encapsulation packets.
    data : bytes
        The whole packet, primary header included.
    scid, vcid : int
    mcfc : int or None
        Master channel frame count of the first frame (None for AOS).
    vcfc : int
        Virtual channel frame count of the first frame.
    position : float
        Sample position of the first frame's ASM (its ERT is the packet's ERT).
    rs_corrected : tuple of int
        RS symbols corrected per codeword in that frame.
    time_ns : int or None
        UTC ns since 1970 (POSIX count) from the secondary-header time code, when the APID has one
        configured and it decoded to a date in 1972..9999; None otherwise.
    time_tai_ns : int or None
        The time code as TAI ns since 1958 (exact also inside a leap second; kept also before 1972,
        where UTC has no meaning); None when the code could not be decoded or lies beyond 9999
        (counted in ``stats.time_code_errors``).
    kind : {"space", "encapsulation"}
    packet_type : int or None
        Space packet type bit (0 telemetry, 1 telecommand).
    sec_header_flag : bool or None
    protocol_id : int or None
        Encapsulation protocol id.
    frames : int
        Number of transfer frames the packet spans.
    verified : bool
        Every frame the packet came from was verified (Reed-Solomon / LDPC / turbo decode or
        FECF succeeded); False on a link with neither.
    count_anomaly : {"duplicate", "backward"} or None
        ``"duplicate"``: a byte-identical copy of a packet already delivered from the same virtual
        channel frame count, or its APID sequence count repeated the last one, or its first frame
        repeated the last frame count; ``"backward"``: its first frame's count or its APID sequence
        count went behind the last (a replay or a restart).  None when both followed.
    copy : bool
        A byte-identical copy of a packet already delivered from the same virtual channel frame
        count (what ``drop_duplicates`` suppresses).
    """

    apid: int | None
    seq_count: int | None
    seq_flags: int | None
    data: bytes
    scid: int
    vcid: int
    mcfc: int | None
    vcfc: int
    position: float
    rs_corrected: tuple[int, ...]
    time_ns: int | None = None
    time_tai_ns: int | None = None
    kind: str = "space"
    packet_type: int | None = None
    sec_header_flag: bool | None = None
    protocol_id: int | None = None
    frames: int = 1
    verified: bool = False
    count_anomaly: str | None = None
    copy: bool = False

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready fields; the packet as ``hex``.

        ``length`` is the whole packet in octets (primary header included); ``data_length`` the space
        packet's Packet Data Length field as sent: octets of the packet data field minus one (CCSDS
        133.0-B, primary header; the clause number from memory, not confirmed), None for an
        encapsulation packet.
        """
        return {
            "kind": self.kind,
            "apid": self.apid,
            "seq_count": self.seq_count,
            "seq_flags": self.seq_flags,
            "packet_type": self.packet_type,
            "sec_header_flag": self.sec_header_flag,
            "protocol_id": self.protocol_id,
            "length": len(self.data),
            "data_length": int.from_bytes(self.data[4:6], "big") if self.kind == "space" else None,
            "scid": self.scid,
            "vcid": self.vcid,
            "mcfc": self.mcfc,
            "vcfc": self.vcfc,
            "frames": self.frames,
            "verified": self.verified,
            "count_anomaly": self.count_anomaly,
            "sample_position": float(self.position),
            "rs_corrected": list(self.rs_corrected),
            "time_ns": self.time_ns,
            "hex": self.data.hex(),
        }


@dataclass(frozen=True)
class SequenceGap:
    """A jump of an APID's 14-bit sequence count: ``missing`` packets between two received."""

    apid: int
    vcid: int
    expected: int
    got: int
    missing: int
    position: float

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class _ApidStats:
    sequence: CountTracker
    packets: int = 0
    octets: int = 0
    sequence_gaps: int = 0
    missing: int = 0
    duplicates: int = 0
    backward: int = 0
    vcids: set = field(default_factory=set)
    time_codes: int = 0


@dataclass
class PacketStats:
    """Counters of a :class:`PacketExtractor` run; :meth:`as_dict` for the report."""

    packets: int = 0
    space_packets: int = 0
    encapsulation_packets: int = 0
    idle_packets: int = 0
    encapsulation_idle: int = 0
    dropped: dict = field(default_factory=lambda: {r: 0 for r in DROP_REASONS})
    frames: dict = field(default_factory=lambda: {
        "used": 0, "unusable": 0, "foreign": 0, "idle": 0, "no_packet_zone": 0, "duplicate": 0,
        "backward": 0, "gap": 0})
    skipped_octets: int = 0
    # packets complete by their own length that ended before where the frame's first header pointer said the
    # next header starts (or in a frame whose pointer says none starts there): delivered, the octets between
    # counted in skipped_octets
    fhp_mismatch_delivered: int = 0
    unverified_packets: int = 0  # delivered from frames no RS / LDPC / turbo decode or FECF verified
    count_anomalies: dict = field(default_factory=lambda: {"duplicate": 0, "backward": 0})  # delivered, flagged
    copies: int = 0  # byte-identical copies of delivered packets (delivered unless drop_duplicates)
    copies_dropped: int = 0  # of those, suppressed by drop_duplicates
    sequence_gaps: int = 0
    sequence_missing: int = 0
    sequence_duplicates: int = 0
    sequence_backward: int = 0
    time_codes: int = 0
    time_code_errors: int = 0
    apids: dict = field(default_factory=dict)
    gap_events: list = field(default_factory=list)
    gap_events_dropped: int = 0

    def as_dict(self) -> dict[str, Any]:
        return {
            "packets": self.packets,
            "space_packets": self.space_packets,
            "encapsulation_packets": self.encapsulation_packets,
            "idle_packets": self.idle_packets,
            "encapsulation_idle": self.encapsulation_idle,
            "dropped": dict(self.dropped),
            "dropped_total": sum(self.dropped.values()),
            "frames": dict(self.frames),
            "skipped_octets": self.skipped_octets,
            "fhp_mismatch_delivered": self.fhp_mismatch_delivered,
            "unverified_packets": self.unverified_packets,
            "count_anomalies": dict(self.count_anomalies),
            "copies": self.copies,
            "copies_dropped": self.copies_dropped,
            "sequence_gaps": self.sequence_gaps,
            "sequence_missing": self.sequence_missing,
            "sequence_duplicates": self.sequence_duplicates,
            "sequence_backward": self.sequence_backward,
            "time_codes": self.time_codes,
            "time_code_errors": self.time_code_errors,
            "sequence_gap_events": [g.as_dict() for g in self.gap_events],
            "sequence_gap_events_not_listed": self.gap_events_dropped,
            "apids": [
                {"apid": apid, "vcids": sorted(a.vcids), "packets": a.packets, "octets": a.octets,
                 "sequence_gaps": a.sequence_gaps, "missing": a.missing, "duplicates": a.duplicates,
                 "backward": a.backward, "time_codes": a.time_codes}
                for apid, a in sorted(self.apids.items())
            ],
        }


@dataclass
class _Reassembly:
    """Reassembly state of one count track of a virtual channel."""

    synced: bool = False
    partial: bytearray = field(default_factory=bytearray)
    need: int = _NEED_MORE  # whole length of the partial packet once its header is complete
    origin: tuple = ()
    frames: int = 0  # frames the partial spans so far
    verified: bool = True  # every frame the partial spans so far was verified


def _checked_time_code(tc: TimeCodeConfig) -> TimeCodeConfig:
    """One ``[[packets.time_code]]`` entry checked by the profile's own rule (an integral float P-field
    becomes an int): :func:`pipeline.packets.check_time_code_config`."""
    try:
        pfield = check_time_code_config(tc.code, tc.pfield, tc.epoch, tc.offset)
    except ValueError as exc:
        raise ValueError(f"Argument 'profile' [[packets.time_code]] apid {tc.apid}: {exc}.") from None
    return replace(tc, pfield=pfield)


def _packet_length(head: bytes, encapsulation: bool, max_octets: int) -> int:
    """Whole length of the packet starting at ``head[0]``; _NEED_MORE or a negative code."""
    pvn = head[0] >> 5
    if pvn == 0:
        if len(head) < 6:
            return _NEED_MORE
        length = 7 + ((head[4] << 8) | head[5])
        return _TOO_LONG if length > max_octets else length
    if pvn != 7 or not encapsulation:
        return _BAD_VERSION
    lol = head[0] & 0x3
    if lol == 0:
        # A one-octet packet; 133.1-B allows it only as the idle packet (protocol id 000).
        return 1 if head[0] == _IDLE_OCTET else _BAD_LENGTH
    hlen = (2, 4, 8)[lol - 1]
    if len(head) < hlen:
        return _NEED_MORE
    if lol == 1:
        length = head[1]
    elif lol == 2:
        length = (head[2] << 8) | head[3]
    else:
        length = int.from_bytes(head[4:8], "big")
    if length < hlen:
        return _BAD_LENGTH
    return _TOO_LONG if length > max_octets else length


class PacketExtractor:
    """Reassemble packets per virtual channel from :class:`~pipeline.link.FrameRecord` objects.

    Parameters
    ----------
    profile : LinkProfile
        Uses ``frames.spacecraft_id``, ``packets.encapsulation`` and ``packets.time_codes``.
    max_packet_octets : int
        Longest packet accepted (default 65542, the largest space packet); a header announcing
        more is dropped as ``too_long`` and the channel re-synchronises at the next first header
        pointer.  Also caps the reassembly buffer, so memory stays bounded.
    drop_duplicates : bool
        Suppress byte-identical copies of packets already delivered from the same virtual channel
        frame count (counted in ``stats.copies_dropped``).  Off by default: copies are delivered,
        flagged ``count_anomaly = "duplicate"``.
    duplicate_window : int
        How many delivered packets are remembered to recognise copies (1..2**22; 16 octets each).

    Notes
    -----
    Delivery rule: every frame with status ``ok`` of the profile's spacecraft feeds reassembly,
    whatever its counts say, and every packet reassembled from such frames is delivered (with
    ``verified`` telling whether all its frames were verified); counter anomalies are facts,
    flagged on the packet, never a reason to withhold it.

    Each virtual channel's frame count is followed by a :class:`pipeline.link.CountTracker`, so
    no help from :class:`ChannelAccounting` is needed: a frame continues the *track* (stream of
    consecutive counts) it is next for, with its own packet in progress; a jump in a track, the
    first frame of a channel, or ``gap=True`` from the caller discards that track's packet in
    progress (``dropped["frame_gap"]``) and extraction resumes at the first header pointer: a
    packet is never stitched across a gap.  A frame behind every track (a replay of older frames,
    or a counter restart) starts a new track from its first header pointer, so the running
    stream's packet in progress survives a replay between its frames; a repeated frame count
    restarts its track from the repeated frame's first header pointer.  Frame positions give a
    running frame period (:class:`pipeline.link.FramePeriod`), so a jump after an outage longer
    than half the count range is still a gap.  Frames whose status is not ``ok`` are never used;
    idle frames advance their count only.

    Consistency checks guard against data that was never sent: a packet in progress must end
    exactly where the next frame's first header pointer says the next header starts
    (``fhp_mismatch`` otherwise), it must not end inside a frame whose pointer says no header
    starts there, and a header with a version other than 000 (or 111 with encapsulation) or an
    impossible length throws away the rest of that frame (``bad_version``, ``bad_length``,
    ``too_long``).  After each such drop the track waits for the next first header pointer.

    Idle space packets (APID 0x7FF) and idle encapsulation packets (protocol id 000, e.g. the
    octet ``E0``) are counted and dropped.  Sequence counts are followed per APID modulo 2**14
    with a count tracker too (gaps are reported, repeats and steps back flag the packet).

    Cost: O(octets) per frame (slicing), plus O(1) per packet (one 16-octet BLAKE2b digest).
    State per VC: at most 4 tracks, each with at most one partial packet (<= ``max_packet_octets``);
    plus ``duplicate_window`` digests.

    References
    ----------
    CCSDS 133.0-B sec. 4.1 (space packet), CCSDS 133.1-B sec. 4.1 (encapsulation packet),
    CCSDS 132.0-B sec. 4.1.2.7 / 732.0-B sec. 4.1.4.2 (first header pointer).
    """

    def __init__(self, *, profile: LinkProfile, max_packet_octets: int = _MAX_SPACE_PACKET,
                 drop_duplicates: bool = False, duplicate_window: int = 1 << 16) -> None:
        if not isinstance(profile, LinkProfile):
            raise TypeError(f"Argument 'profile' must be a LinkProfile, not {type(profile).__name__}.")
        if isinstance(max_packet_octets, bool) or not isinstance(max_packet_octets, int) \
                or not 7 <= max_packet_octets <= (1 << 32) - 1:
            raise ValueError(f"Argument 'max_packet_octets' must be 7..4294967295, not {max_packet_octets!r}.")
        if not isinstance(drop_duplicates, bool):
            raise TypeError(f"Argument 'drop_duplicates' must be True or False, not {drop_duplicates!r}.")
        if isinstance(duplicate_window, bool) or not isinstance(duplicate_window, int) \
                or not 1 <= duplicate_window <= 1 << 22:
            raise ValueError(f"Argument 'duplicate_window' must be 1..4194304, not {duplicate_window!r}.")
        self.profile = profile
        self.spacecraft_id = profile.frames.spacecraft_id
        self.encapsulation = bool(profile.packets.encapsulation)
        self.max_packet_octets = max_packet_octets
        self.drop_duplicates = drop_duplicates
        self.duplicate_window = duplicate_window
        self.time_codes = {tc.apid: _checked_time_code(tc) for tc in profile.packets.time_codes}
        self._leap = leap_seconds() if self.time_codes else None
        self.reset()

    def reset(self) -> None:
        """Forget every partial packet, frame count, remembered packet and counter."""
        self.channels: dict[int, CountTracker] = {}
        self.stats = PacketStats()
        self._pending_gaps: list[SequenceGap] = []
        self.period = FramePeriod()
        self._delivered: dict[bytes, None] = {}  # digests of delivered packets, oldest first

    def take_sequence_gaps(self) -> list[SequenceGap]:
        """The sequence-count gaps found since the last call (and forget them)."""
        out, self._pending_gaps = self._pending_gaps, []
        return out

    def flush(self) -> list[Packet]:
        """End of input: packets still in progress are incomplete and dropped (counted)."""
        for tracker in self.channels.values():
            for track in tracker.tracks:
                ra = track.payload
                if ra is not None and ra.partial:
                    self.stats.dropped["incomplete_at_end"] += 1
                track.payload = _Reassembly()
        return []

    # ---- frames -----------------------------------------------------------------------------
    def process_many(self, records) -> list[Packet]:
        """Packets completed by a batch of frame records (the same as calling :meth:`process` on each)."""
        out: list[Packet] = []
        for record in records:
            out += self.process(record)
        return out

    def process(self, record, gap: bool = False) -> list[Packet]:
        """Packets completed by one frame record, in order.

        Parameters
        ----------
        record : FrameRecord
        gap : bool
            The caller knows frames of this virtual channel were lost just before ``record``
            (the extractor also detects it from the counts).
        """
        S = self.stats
        self.period.update(float(record.position))
        if record.status == "foreign_scid":
            S.frames["foreign"] += 1
            return []
        if record.status not in ("ok", "idle"):
            S.frames["unusable"] += 1
            return []
        if record.scid != self.spacecraft_id:
            S.frames["foreign"] += 1
            return []
        if record.vcid is None or record.vcfc is None:
            S.frames["unusable"] += 1
            return []
        count, modulus = int(record.vcfc), int(record.vcfc_modulus)
        tracker = self.channels.get(record.vcid)
        if tracker is None or tracker.modulus != modulus:
            if tracker is not None:  # (AOS: the VC count cycle extension switched on or off)
                for t in tracker.tracks:
                    self._lose_sync(t.payload, "frame_gap")
            tracker = self.channels[record.vcid] = CountTracker(modulus=modulus, max_tracks=_MAX_TRACKS)
        res = tracker.step(count, float(record.position), self.period)
        for t in res.dropped:
            self._lose_sync(t.payload, "superseded")
        ra = res.track.payload
        if ra is None:
            ra = res.track.payload = _Reassembly()
        if res.kind == "gap":
            S.frames["gap"] += 1
            self._lose_sync(ra, "frame_gap")
        elif res.kind == "duplicate":
            S.frames["duplicate"] += 1
            self._lose_sync(ra, "superseded")
        elif res.kind == "backward":
            S.frames["backward"] += 1
        if gap:
            self._lose_sync(ra, "frame_gap")
        if record.status == "idle":
            S.frames["idle"] += 1
            return []
        zone = record.packet_zone
        if zone is None or record.fhp is None:
            S.frames["no_packet_zone"] += 1
            return []
        S.frames["used"] += 1
        origin = (int(record.scid), int(record.vcid), record.mcfc, count, float(record.position),
                  tuple(record.rs_corrected), bool(record.verified), res.anomaly)
        out: list[Packet] = []
        fhp = int(record.fhp)
        if ra.synced:
            self._continue(ra, zone, fhp, origin, out)
        elif fhp == _FHP_NO_HEADER:
            S.skipped_octets += len(zone)
        else:
            S.skipped_octets += fhp
            ra.synced = True
            self._walk(ra, zone, fhp, origin, out)
        return out

    def _lose_sync(self, ra: _Reassembly | None, reason: str) -> None:
        if ra is None:
            return
        if ra.partial:
            self.stats.dropped[reason] += 1
        ra.partial, ra.need, ra.synced, ra.frames = bytearray(), _NEED_MORE, False, 0

    def _continue(self, ra: _Reassembly, zone: bytes, fhp: int, origin: tuple, out: list[Packet]) -> None:
        """A frame in sequence on a synchronised track."""
        verified = origin[6]
        if fhp == _FHP_NO_HEADER:
            if not ra.partial:
                # Nothing in progress, yet no header starts here: this data belongs to a packet we
                # never saw the start of.
                self.stats.skipped_octets += len(zone)
                self._lose_sync(ra, "fhp_mismatch")
                return
            ra.partial += zone
            ra.frames += 1
            ra.verified = ra.verified and verified
            length = self._partial_length(ra)
            if length < 0:
                return
            if length and len(ra.partial) >= length:
                if len(ra.partial) == length:
                    self._emit(bytes(ra.partial), ra.origin, ra.frames, ra.verified, out)
                    ra.partial, ra.need, ra.frames = bytearray(), _NEED_MORE, 0
                else:
                    # the packet ends inside a frame whose pointer says no header starts there (a sender that
                    # pads a frame's last few octets instead of starting an idle packet): the packet is whole
                    # by its own length and is delivered; what follows it is no packet we can place
                    self._deliver_before_mismatch(ra, length, out)
                    ra.synced = False
            return
        if ra.partial:
            if fhp:
                ra.partial += zone[:fhp]
                ra.frames += 1
                ra.verified = ra.verified and verified
            length = self._partial_length(ra)
            if length >= 0:
                if length and len(ra.partial) == length:
                    self._emit(bytes(ra.partial), ra.origin, ra.frames, ra.verified, out)
                    ra.partial, ra.need, ra.frames = bytearray(), _NEED_MORE, 0
                elif length and len(ra.partial) > length:
                    # whole by its own length before the pointer: delivered, the octets up to the pointer skipped
                    self._deliver_before_mismatch(ra, length, out)
                else:  # the pointer cuts the packet short (or its header): it cannot be whole
                    self._lose_sync(ra, "fhp_mismatch")
        elif fhp:
            self.stats.skipped_octets += fhp  # octets of a packet whose start we never had
        ra.partial, ra.need, ra.synced, ra.frames = bytearray(), _NEED_MORE, True, 0
        self._walk(ra, zone, fhp, origin, out)

    def _deliver_before_mismatch(self, ra: _Reassembly, length: int, out: list[Packet]) -> None:
        """The packet in progress is whole by its own ``length`` but octets follow it where the frame's first
        header pointer places none: deliver it (flagged as its frames were verified or not, as any packet), count
        the mismatch and skip the octets after it.  Before, such a packet was dropped as ``fhp_mismatch``,
        though every octet of it was there (in verified frames too)."""
        self.stats.fhp_mismatch_delivered += 1
        self.stats.skipped_octets += len(ra.partial) - length
        self._emit(bytes(ra.partial[:length]), ra.origin, ra.frames, ra.verified, out)
        ra.partial, ra.need, ra.frames = bytearray(), _NEED_MORE, 0

    def _partial_length(self, ra: _Reassembly) -> int:
        """Whole length of the packet in progress (0 while its header is incomplete).

        A negative result means the header is impossible: the partial has been dropped.
        """
        if ra.need:
            return ra.need
        length = _packet_length(bytes(ra.partial[:8]), self.encapsulation, self.max_packet_octets)
        if length < 0:
            self._lose_sync(ra, _REASON[length])
            return length
        ra.need = length
        return length

    def _walk(self, ra: _Reassembly, zone: bytes, pos: int, origin: tuple, out: list[Packet]) -> None:
        """Cut packets from ``zone`` starting with a header at ``pos``; keep the unfinished tail."""
        n = len(zone)
        while pos < n:
            if self.encapsulation and zone[pos] == _IDLE_OCTET:
                run = (n - pos) - len(zone[pos:].lstrip(b"\xe0"))
                self.stats.encapsulation_idle += run
                pos += run
                continue
            length = _packet_length(zone[pos:pos + 8], self.encapsulation, self.max_packet_octets)
            if length < 0:
                self.stats.dropped[_REASON[length]] += 1
                self.stats.skipped_octets += n - pos
                ra.partial, ra.need, ra.synced, ra.frames = bytearray(), _NEED_MORE, False, 0
                return
            if length and pos + length <= n:
                self._emit(zone[pos:pos + length], origin, 1, origin[6], out)
                pos += length
                continue
            ra.partial, ra.need, ra.origin, ra.frames = bytearray(zone[pos:]), length, origin, 1
            ra.verified = origin[6]
            return
        ra.partial, ra.need, ra.frames = bytearray(), _NEED_MORE, 0

    # ---- packets ----------------------------------------------------------------------------
    def _is_copy(self, pkt: bytes, scid: int, vcid: int, vcfc: int) -> bool:
        """Whether this packet was delivered before from the same VC frame count; remember it if not."""
        h = hashlib.blake2b(digest_size=16)
        h.update(scid.to_bytes(2, "big") + vcid.to_bytes(1, "big") + vcfc.to_bytes(4, "big"))
        h.update(pkt)
        key = h.digest()
        if key in self._delivered:
            return True
        self._delivered[key] = None
        if len(self._delivered) > self.duplicate_window:
            del self._delivered[next(iter(self._delivered))]
        return False

    def _emit(self, pkt: bytes, origin: tuple, frames: int, verified: bool, out: list[Packet]) -> None:
        S = self.stats
        scid, vcid, mcfc, vcfc, position, rs, _, frame_anomaly = origin
        space = pkt[0] >> 5 != 7
        if space and ((pkt[0] & 0x07) << 8 | pkt[1]) == IDLE_APID:
            S.idle_packets += 1
            return
        if not space and (pkt[0] >> 2) & 0x7 == 0:
            S.encapsulation_idle += 1
            return
        copy = self._is_copy(pkt, scid, vcid, vcfc)
        if copy:
            S.copies += 1
            if self.drop_duplicates:
                S.copies_dropped += 1
                return
        if not space:
            anomaly = "duplicate" if copy else frame_anomaly
            self._count_delivery(verified, anomaly)
            S.encapsulation_packets += 1
            out.append(Packet(apid=None, seq_count=None, seq_flags=None, data=pkt, scid=scid, vcid=vcid, mcfc=mcfc,
                              vcfc=vcfc, position=position, rs_corrected=rs, kind="encapsulation",
                              protocol_id=(pkt[0] >> 2) & 0x7, frames=frames, verified=verified,
                              count_anomaly=anomaly, copy=copy))
            return
        apid = ((pkt[0] & 0x07) << 8) | pkt[1]
        seq_flags = pkt[2] >> 6
        seq = ((pkt[2] & 0x3F) << 8) | pkt[3]
        sec_flag = bool(pkt[0] & 0x08)
        a = S.apids.get(apid)
        if a is None:
            a = S.apids[apid] = _ApidStats(sequence=CountTracker(modulus=_SEQ_MODULUS, max_tracks=_MAX_TRACKS))
        a.packets += 1
        a.octets += len(pkt)
        a.vcids.add(vcid)
        step = a.sequence.step(seq)
        if step.kind == "gap":
            a.sequence_gaps += 1
            a.missing += step.missing
            S.sequence_gaps += 1
            S.sequence_missing += step.missing
            g = SequenceGap(apid=apid, vcid=vcid, expected=step.expected, got=seq, missing=step.missing,
                            position=position)
            self._pending_gaps.append(g)
            if len(self._pending_gaps) > 10 * _MAX_GAP_EVENTS:
                del self._pending_gaps[: _MAX_GAP_EVENTS]
            if len(S.gap_events) < _MAX_GAP_EVENTS:
                S.gap_events.append(g)
            else:
                S.gap_events_dropped += 1
        elif step.kind == "duplicate":
            a.duplicates += 1
            S.sequence_duplicates += 1
        elif step.kind == "backward":
            a.backward += 1
            S.sequence_backward += 1
        anomaly = "duplicate" if copy else (frame_anomaly or step.anomaly)
        time_ns = time_tai = None
        tc = self.time_codes.get(apid)
        if tc is not None:
            time_tai = self._time_code(pkt, sec_flag, tc)
            if time_tai is not None:
                try:
                    time_ns = self._leap.tai_to_utc(time_tai)
                except ValueError:
                    # before 1972 (e.g. an onboard clock counting from its level-1 epoch): no UTC, the
                    # TAI count stays (decode --clock turns such onboard time into UTC)
                    time_ns = None
                if time_ns is not None and time_ns >= _TIME_MAX_NS:
                    # e.g. a 24-bit CDS day count far in the future: not a time anyone can print
                    time_ns = time_tai = None
            if time_tai is not None:
                a.time_codes += 1
                S.time_codes += 1
            else:
                S.time_code_errors += 1
        self._count_delivery(verified, anomaly)
        S.space_packets += 1
        out.append(Packet(apid=apid, seq_count=seq, seq_flags=seq_flags, data=pkt, scid=scid, vcid=vcid, mcfc=mcfc,
                          vcfc=vcfc, position=position, rs_corrected=rs, time_ns=time_ns, time_tai_ns=time_tai,
                          kind="space", packet_type=(pkt[0] >> 4) & 1, sec_header_flag=sec_flag, frames=frames,
                          verified=verified, count_anomaly=anomaly, copy=copy))

    def _count_delivery(self, verified: bool, anomaly: str | None) -> None:
        S = self.stats
        S.packets += 1
        if not verified:
            S.unverified_packets += 1
        if anomaly is not None:
            S.count_anomalies[anomaly] += 1

    def _time_code(self, pkt: bytes, sec_flag: bool, tc) -> int | None:
        if not sec_flag:
            return None
        try:
            tai, _ = decode_time_code(pkt[6 + tc.offset:], code=tc.code, pfield=tc.pfield, epoch=tc.epoch,
                                      table=self._leap)
        except ValueError:
            return None
        return tai
