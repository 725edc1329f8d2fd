"""Transfer frame parsing: TM (CCSDS 132.0-B) and AOS (CCSDS 732.0-B) frames into FrameRecords.

Bit positions below count from 0 at the most significant bit of the first octet.

TM primary header, 6 octets (from memory, not confirmed; ../shared/REFERENCES.md sec. 3)
    0-1 version ``00``, 2-11 spacecraft id, 12-14 virtual channel id, 15 OCF flag,
    16-23 master channel frame count, 24-31 virtual channel frame count, 32 secondary header
    flag, 33 synchronisation flag, 34 packet order flag, 35-36 segment length id, 37-47 first
    header pointer (``0x7FF`` no packet starts here, ``0x7FE`` only idle data).
TM secondary header
    first octet: version (2 bits, ``00``) and length - 1 (6 bits) of the whole secondary header.
AOS primary header, 6 octets (+2 with the FHEC) (from memory, not confirmed; sec. 4)
    0-1 version ``01``, 2-9 spacecraft id, 10-15 virtual channel id, 16-39 virtual channel frame
    count, 40 replay flag, 41 VC frame count usage flag, 42-43 spare, 44-47 VC frame count cycle.
    Then the optional FHEC, the optional insert zone and the data field: an M_PDU (5 spare bits,
    11-bit first header pointer) or a B_PDU (2 spare bits, 14-bit bitstream data pointer).
Trailer
    optional OCF (4 octets), optional FECF (2 octets, CRC-16 of the rest of the frame).
CLCW (OCF type 0; CCSDS 232.0-B sec. 4.2, from memory, not confirmed)
    0 type ``0``, 1-2 version, 3-5 status field, 6-7 COP in effect, 8-13 VCID, 14-15 spare,
    16 no RF available, 17 no bit lock, 18 lockout, 19 wait, 20 retransmit, 21-22 FARM-B
    counter, 23 spare, 24-31 report value V(R).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any, Literal

from pipeline.link._fhec import fhec_decode
from pipeline.profile import FramesSection

__all__ = [
    "FrameRecord",
    "FrameParser",
    "FrameParserStats",
    "CountAnomaly",
    "HEADER_FIELDS",
    "FrameStatus",
    "FRAME_STATUSES",
    "decode_clcw",
    "FHP_NO_HEADER",
    "FHP_IDLE",
    "BDP_ALL_VALID",
    "BDP_IDLE",
]

FrameStatus = Literal["ok", "rs_uncorrectable", "turbo_failed", "ldpc_failed", "fecf_error", "idle", "foreign_scid",
                      "bad_header"]
FRAME_STATUSES: tuple[str, ...] = ("ok", "rs_uncorrectable", "turbo_failed", "ldpc_failed", "fecf_error", "idle",
                                   "foreign_scid", "bad_header")

#: First header pointer: no packet header starts in this data field.
FHP_NO_HEADER = 0x7FF
#: First header pointer: the data field holds only idle data (TM OID frame, AOS idle M_PDU).
FHP_IDLE = 0x7FE
#: Bitstream data pointer: every bit of the B_PDU zone is valid data.
BDP_ALL_VALID = 0x3FFF
#: Bitstream data pointer: the B_PDU holds only idle data.
BDP_IDLE = 0x3FFE

#: A frame or packet counter that did not follow: the same count as the last, or one behind it.
CountAnomaly = Literal["duplicate", "backward"]

#: FrameRecord attributes decoded from the frame's header and trailer octets.  A frame that failed
#: its checks and whose octets are not verified keeps none of them: they move to ``unverified``.
HEADER_FIELDS: tuple[str, ...] = (
    "version", "scid", "vcid", "mcfc", "vcfc", "vcfc_modulus", "ocf_flag", "sec_header_flag", "sync_flag",
    "packet_order", "segment_length_id", "fhp", "sec_header", "replay_flag", "vc_count_usage", "vc_count_cycle",
    "insert_zone", "bdp", "ocf", "clcw",
)


def decode_clcw(ocf: bytes) -> dict[str, int] | None:
    """Fields of a Communications Link Control Word, or None when the OCF is a type-2 report.

    Parameters
    ----------
    ocf : bytes
        The 4-octet operational control field.

    References
    ----------
    CCSDS 232.0-B sec. 4.2 (bit map from memory, not confirmed); CCSDS 132.0-B sec. 4.1.5
    (type flag, source: [TM-DL] p. 4-12).
    """
    if len(ocf) != 4:
        raise ValueError(f"Argument 'ocf' must be 4 octets, not {len(ocf)}.")
    w = int.from_bytes(ocf, "big")
    if w >> 31:
        return None
    return {
        "control_word_type": 0,
        "version": (w >> 29) & 0x3,
        "status_field": (w >> 26) & 0x7,
        "cop_in_effect": (w >> 24) & 0x3,
        "vcid": (w >> 18) & 0x3F,
        "spare1": (w >> 16) & 0x3,
        "no_rf_available": (w >> 15) & 0x1,
        "no_bit_lock": (w >> 14) & 0x1,
        "lockout": (w >> 13) & 0x1,
        "wait": (w >> 12) & 0x1,
        "retransmit": (w >> 11) & 0x1,
        "farm_b_counter": (w >> 9) & 0x3,
        "spare2": (w >> 8) & 0x1,
        "report_value": w & 0xFF,
    }


@dataclass
class FrameRecord:
    """One transfer frame after parsing, with its decode provenance.

    Header fields are None when the frame could not be parsed that far (wrong length), and for
    a frame that failed its checks (any status other than ``ok`` and ``idle``) whose octets are
    not verified: their values, decoded from octets that may be wrong, are kept apart in
    ``unverified``.  Only ``status == "ok"`` frames carry data; a record with any other status
    must never be used as data.

    Attributes
    ----------
    status : str
        ``ok``, ``rs_uncorrectable``, ``fecf_error``, ``idle``, ``foreign_scid`` or ``bad_header``.
    verified : bool
        The frame's octets passed an error-detecting check: its Reed-Solomon (or LDPC / turbo)
        decode or its FECF succeeded.  False on a link with neither, and for a frame whose check
        failed.
    count_anomaly : {"duplicate", "backward"} or None
        Set by :class:`~pipeline.link.ChannelAccounting`: the frame count repeated the last one of
        its channel, or went behind it (a replay or a restart); None when it followed.
    unverified : dict or None
        Header fields of a failed, unverified frame (see above), or None.
    fhec_corrected : int or None
        AOS frame header error control: nibbles corrected (0..2), -1 when uncorrectable; None
        without FHEC.
    detail : str
        Why the status is not ``ok`` (empty when it is).
    kind : {"tm", "aos"}
    version, scid, vcid : int or None
    mcfc : int or None
        TM master channel frame count (8 bits); None for AOS, which has none.
    vcfc : int or None
        Virtual channel frame count: 8 bits (TM), 24 bits (AOS) or 28 bits (AOS with the VC
        frame count usage flag set: cycle * 2**24 + count).
    vcfc_modulus : int or None
        The modulus of ``vcfc`` (256, 2**24 or 2**28).
    fhp : int or None
        First header pointer (TM data field status, or AOS M_PDU header); None for B_PDUs and
        TM frames with the synchronisation flag set.
    data_field : bytes
        The transfer frame data field (AOS: including the M_PDU / B_PDU header).
    packet_zone : bytes or None
        The octets ``fhp`` indexes (TM data field when the sync flag is 0; AOS M_PDU packet
        zone); None otherwise.
    ocf : bytes or None
    clcw : dict or None
        :func:`decode_clcw` of the OCF.
    fecf_ok : bool or None
        FECF check result, None when the profile has no FECF.
    position : float
        Sample position of the first channel symbol of the frame's ASM.
    rs_corrected : tuple of int
        RS symbols corrected per codeword (negative: uncorrectable), from the codeblock decoder.
    decoder_iterations : int or None
        Iterations of the turbo (or LDPC) decoder for this frame's codeword; None for other codes.
    decoder_esn0_db : float or None
        The Es/N0 estimate (dB) its soft codeword was scaled with; None for other codes.
    decoder_syndrome_weight : int or None
        LDPC: unsatisfied parity checks after the decoder's last iteration (0 on success); None for
        other codes.
    """

    status: str
    kind: str
    position: float
    verified: bool = False
    count_anomaly: str | None = None
    unverified: dict | None = None
    fhec_corrected: int | None = None
    rs_corrected: tuple[int, ...] = ()
    asm_errors: int | None = None
    inverted: bool | None = None
    flywheel: bool | None = None
    decoder_iterations: int | None = None
    decoder_esn0_db: float | None = None
    decoder_syndrome_weight: int | None = None
    detail: str = ""
    version: int | None = None
    scid: int | None = None
    vcid: int | None = None
    mcfc: int | None = None
    vcfc: int | None = None
    vcfc_modulus: int | None = None
    ocf_flag: bool | None = None
    sec_header_flag: bool | None = None
    sync_flag: bool | None = None
    packet_order: bool | None = None
    segment_length_id: int | None = None
    fhp: int | None = None
    sec_header: bytes | None = None
    replay_flag: bool | None = None
    vc_count_usage: bool | None = None
    vc_count_cycle: int | None = None
    fhec_ok: bool | None = None
    insert_zone: bytes | None = None
    bdp: int | None = None
    data_field: bytes = b""
    packet_zone: bytes | None = None
    ocf: bytes | None = None
    clcw: dict | None = None
    fecf_ok: bool | None = None
    length: int = 0

    @property
    def bitstream_valid_bits(self) -> int | None:
        """Valid data bits in a B_PDU zone: all of it for pointer 0x3FFF, else pointer + 1; None otherwise."""
        if self.bdp is None:
            return None
        if self.bdp == BDP_ALL_VALID:
            return 8 * (len(self.data_field) - 2)
        return self.bdp + 1

    def withhold_unverified_header(self) -> None:
        """Move every header field into ``unverified`` (as JSON values) and set them to None."""
        values = {name: getattr(self, name) for name in HEADER_FIELDS}
        self.unverified = {k: (v.hex() if isinstance(v, bytes) else v) for k, v in values.items() if v is not None}
        for name in HEADER_FIELDS:
            setattr(self, name, None)
        self.packet_zone = None

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready fields (bytes as hex; the data field itself only as its length)."""
        d: dict[str, Any] = {
            "status": self.status,
            "verified": self.verified,
            "count_anomaly": self.count_anomaly,
            "kind": self.kind,
            "sample_position": float(self.position),
            "rs_corrected": list(self.rs_corrected),
            "asm_errors": self.asm_errors,
            "inverted": self.inverted,
            "flywheel": self.flywheel,
            "length": self.length,
            "version": self.version,
            "scid": self.scid,
            "vcid": self.vcid,
            "mcfc": self.mcfc,
            "vcfc": self.vcfc,
        }
        if self.detail:
            d["detail"] = self.detail
        if self.decoder_iterations is not None:  # turbo / LDPC links only
            d["decoder_iterations"] = self.decoder_iterations
            d["decoder_esn0_db"] = self.decoder_esn0_db
        if self.decoder_syndrome_weight is not None:  # LDPC links only
            d["decoder_syndrome_weight"] = self.decoder_syndrome_weight
        if self.kind == "tm":
            d.update(ocf_flag=self.ocf_flag, sec_header_flag=self.sec_header_flag, sync_flag=self.sync_flag,
                     packet_order=self.packet_order, segment_length_id=self.segment_length_id)
            if self.sec_header is not None:
                d["sec_header"] = self.sec_header.hex()
        else:
            d.update(replay_flag=self.replay_flag, vc_count_usage=self.vc_count_usage,
                     vc_count_cycle=self.vc_count_cycle)
            if self.fhec_ok is not None:
                d["fhec_ok"] = self.fhec_ok
                d["fhec_corrected"] = self.fhec_corrected
            if self.insert_zone is not None:
                d["insert_zone"] = self.insert_zone.hex()
            if self.bdp is not None:
                d["bdp"] = self.bdp
                d["bitstream_valid_bits"] = self.bitstream_valid_bits
        d["fhp"] = self.fhp
        d["data_field_length"] = len(self.data_field)
        d["ocf"] = None if self.ocf is None else self.ocf.hex()
        d["clcw"] = None if self.clcw is None else dict(self.clcw)
        d["fecf_ok"] = self.fecf_ok
        if self.unverified is not None:
            d["unverified"] = dict(self.unverified)
        return d


@dataclass
class FrameParserStats:
    """Counters of a :class:`FrameParser` run; :meth:`as_dict` for the report."""

    statuses: dict = field(default_factory=lambda: {s: 0 for s in FRAME_STATUSES})
    verified: int = 0  # frames whose RS / LDPC / turbo decode or FECF succeeded
    unverified: int = 0  # frames with no such check (link with neither) or whose check failed
    fhec_corrected_frames: int = 0  # AOS headers corrected by the FHEC
    fhec_corrected_nibbles: int = 0
    fhec_uncorrectable: int = 0  # AOS headers the FHEC could not correct (bad_header)

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


class FrameParser:
    """Parse decoded codeblocks into :class:`FrameRecord` objects.

    Parameters
    ----------
    frames : FramesSection
        Frame kind, length, trailer options, spacecraft id, secondary header / insert zone
        lengths, FHEC flag, bitstream and idle virtual channels.

    Notes
    -----
    Stateless apart from the counters in ``stats``: each frame is parsed on its own, so any
    chunking gives the same records.  The order of checks decides the status:

    1. an input status other than ``ok`` (``rs_uncorrectable``) is kept;
    2. a wrong frame length is ``bad_header``;
    3. AOS with FHEC: the frame header error control is decoded first and corrects up to two
       nibbles of the protected fields (version, spacecraft id, virtual channel id, signalling
       field) before any of them is read; a header it cannot correct is ``bad_header``;
    4. the FECF (when configured, over the frame as corrected) failing is ``fecf_error``;
    5. a wrong version number is ``bad_header``;
    6. another spacecraft id is ``foreign_scid`` (the rest of its layout may differ, so it is
       not checked);
    7. an OCF flag that disagrees with the profile, a secondary header whose length disagrees,
       or a first header pointer past the end of the packet zone is ``bad_header``;
    8. a TM OID frame (FHP 0x7FE), an AOS frame on the idle VC or an AOS M_PDU with FHP 0x7FE
       is ``idle``.

    ``verified`` is set when the input status is ``ok`` and the codeblock decoder verified the
    octets (a Reed-Solomon decode: non-empty ``rs_corrected``; LDPC / turbo decoders set
    ``fec_verified`` on their decoded frames) or the FECF matched.  A frame that failed its checks
    (status other than ``ok`` / ``idle``) without verified octets keeps no header fields: they
    go to ``unverified``.  Cost O(frame length) (a copy of the data field, and the CRC when
    configured).

    References
    ----------
    CCSDS 132.0-B sec. 4.1 (TM), CCSDS 732.0-B sec. 4.1 (AOS; FHEC sec. 4.1.2.6), CCSDS 232.0-B
    sec. 4.2 (CLCW).  Clause numbers of 732.0-B from memory, not confirmed.
    """

    def __init__(self, *, frames: FramesSection) -> None:
        if not isinstance(frames, FramesSection):
            raise TypeError(f"Argument 'frames' must be a FramesSection, not {type(frames).__name__}.")
        self.frames = frames
        self._crc16 = None
        if frames.fecf:
            from pipeline.fec import crc16  # imported here: only FECF profiles need the fec stage

            self._crc16 = crc16
        trailer = (4 if frames.ocf else 0) + (2 if frames.fecf else 0)
        self._data_end = frames.length - trailer
        if frames.kind == "aos":
            self._aos_data_start = 6 + (2 if frames.fhec else 0) + frames.insert_zone_length
        self._bitstream = frozenset(frames.bitstream_vcids)
        self.stats = FrameParserStats()

    def reset(self) -> None:
        """Zero the counters."""
        self.stats = FrameParserStats()

    def process(self, decoded) -> FrameRecord:
        """Parse one decoded frame.

        Parameters
        ----------
        decoded : DecodedFrame-like
            Attributes ``frame`` (bytes), ``status`` (``ok`` or a decoder failure),
            ``rs_corrected`` (tuple, empty without Reed-Solomon) and ``cadu`` (with ``position``,
            ``asm_errors``, ``inverted`` and ``flywheel``); optionally ``fec_verified`` (bool, set
            by LDPC / turbo decoders when the codeword decoded).
        """
        cadu = decoded.cadu
        frame = bytes(decoded.frame)
        rs_corrected = tuple(int(v) for v in decoded.rs_corrected)
        rec = FrameRecord(
            status="ok",
            kind=self.frames.kind,
            position=float(cadu.position),
            rs_corrected=rs_corrected,
            asm_errors=_opt_int(cadu.asm_errors),
            inverted=_opt_bool(cadu.inverted),
            flywheel=_opt_bool(cadu.flywheel),
            decoder_iterations=_opt_int(getattr(decoded, "decoder_iterations", None)),
            decoder_esn0_db=getattr(decoded, "decoder_esn0_db", None),
            decoder_syndrome_weight=_opt_int(getattr(decoded, "decoder_syndrome_weight", None)),
            length=len(frame),
        )
        in_status = str(decoded.status)
        if in_status != "ok":
            rec.status = in_status
            rec.detail = "codeblock decoder"
        # LDPC / turbo decoders mark their frames; a Reed-Solomon decode shows in rs_corrected
        fec_ok = in_status == "ok" and (bool(rs_corrected) or bool(getattr(decoded, "fec_verified", False)))
        if len(frame) != self.frames.length:
            if rec.status == "ok":
                rec.status = "bad_header"
                rec.detail = f"frame of {len(frame)} octets, profile says {self.frames.length}"
            return self._finish(rec, fec_ok)
        if self.frames.kind == "aos" and self.frames.fhec:
            frame = self._correct_aos_header(frame, rec)
        if self._crc16 is not None:
            rec.fecf_ok = self._crc16(frame) == 0
            if not rec.fecf_ok and rec.status == "ok":
                rec.status, rec.detail = "fecf_error", "FECF mismatch"
        if self.frames.kind == "tm":
            self._parse_tm(frame, rec)
        else:
            self._parse_aos(frame, rec)
        return self._finish(rec, fec_ok or (rec.fecf_ok is True and in_status == "ok"))

    def _finish(self, rec: FrameRecord, verified: bool) -> FrameRecord:
        rec.verified = bool(verified)
        st = self.stats
        st.statuses[rec.status] = st.statuses.get(rec.status, 0) + 1
        if rec.verified:
            st.verified += 1
        else:
            st.unverified += 1
            if rec.status not in ("ok", "idle"):
                rec.withhold_unverified_header()
        return rec

    def _correct_aos_header(self, frame: bytes, rec: FrameRecord) -> bytes:
        """Decode the FHEC (octets 6-7) and return the frame with the header corrected."""
        res = fhec_decode(frame[:6], (frame[6] << 8) | frame[7])
        rec.fhec_corrected = res.corrected
        rec.fhec_ok = res.corrected >= 0
        if res.corrected < 0:
            self.stats.fhec_uncorrectable += 1
            self._bad(rec, "FHEC: more than two header nibbles in error")
            return frame
        if res.corrected:
            self.stats.fhec_corrected_frames += 1
            self.stats.fhec_corrected_nibbles += res.corrected
            frame = res.header + res.fhec.to_bytes(2, "big") + frame[8:]
        return frame

    # ---- TM ---------------------------------------------------------------------------------
    def _parse_tm(self, frame: bytes, rec: FrameRecord) -> None:
        F = self.frames
        w = (frame[0] << 8) | frame[1]
        rec.version = w >> 14
        rec.scid = (w >> 4) & 0x3FF
        rec.vcid = (w >> 1) & 0x7
        rec.ocf_flag = bool(w & 1)
        rec.mcfc = frame[2]
        rec.vcfc = frame[3]
        rec.vcfc_modulus = 256
        dfs = (frame[4] << 8) | frame[5]
        rec.sec_header_flag = bool(dfs >> 15)
        rec.sync_flag = bool((dfs >> 14) & 1)
        rec.packet_order = bool((dfs >> 13) & 1)
        rec.segment_length_id = (dfs >> 11) & 0x3
        fhp = dfs & 0x7FF
        if rec.version != 0:
            return self._bad(rec, f"TM version {rec.version}, not 0")
        if rec.scid != F.spacecraft_id:
            return self._set(rec, "foreign_scid", f"spacecraft id {rec.scid}")
        start = 6
        if rec.sec_header_flag:
            sh_len = (frame[6] & 0x3F) + 1
            if frame[6] >> 6:
                return self._bad(rec, f"secondary header version {frame[6] >> 6}, not 0")
            if F.secondary_header_length and sh_len != F.secondary_header_length:
                return self._bad(rec, f"secondary header of {sh_len} octets, profile says {F.secondary_header_length}")
            if 6 + sh_len >= self._data_end:
                return self._bad(rec, f"secondary header of {sh_len} octets leaves no data field")
            rec.sec_header = frame[6:6 + sh_len]
            start += sh_len
        elif F.secondary_header_length:
            return self._bad(rec, "secondary header flag is 0, profile says there is one")
        if F.ocf:
            rec.ocf = frame[self._data_end:self._data_end + 4]
            rec.clcw = decode_clcw(rec.ocf)
        if rec.ocf_flag != F.ocf:
            return self._bad(rec, f"OCF flag {int(rec.ocf_flag)}, profile says {int(F.ocf)}")
        rec.data_field = frame[start:self._data_end]
        if rec.sync_flag:
            return None  # VCA_SDU data: no packets, the FHP is undefined
        rec.fhp = fhp
        rec.packet_zone = rec.data_field
        return self._check_fhp(rec)

    # ---- AOS --------------------------------------------------------------------------------
    def _parse_aos(self, frame: bytes, rec: FrameRecord) -> None:
        F = self.frames
        w = (frame[0] << 8) | frame[1]
        rec.version = w >> 14
        rec.scid = (w >> 6) & 0xFF
        rec.vcid = w & 0x3F
        count = int.from_bytes(frame[2:5], "big")
        sig = frame[5]
        rec.replay_flag = bool(sig >> 7)
        rec.vc_count_usage = bool((sig >> 6) & 1)
        rec.vc_count_cycle = sig & 0xF
        if rec.vc_count_usage:
            rec.vcfc, rec.vcfc_modulus = (rec.vc_count_cycle << 24) | count, 1 << 28
        else:
            rec.vcfc, rec.vcfc_modulus = count, 1 << 24
        if rec.version != 1:
            return self._bad(rec, f"AOS version {rec.version}, not 1")
        if rec.scid != F.spacecraft_id:
            return self._set(rec, "foreign_scid", f"spacecraft id {rec.scid}")
        if F.insert_zone_length:
            iz = 6 + (2 if F.fhec else 0)
            rec.insert_zone = frame[iz:iz + F.insert_zone_length]
        if F.ocf:
            rec.ocf = frame[self._data_end:self._data_end + 4]
            rec.clcw = decode_clcw(rec.ocf)
        rec.data_field = frame[self._aos_data_start:self._data_end]
        if rec.vcid == F.idle_vcid:
            return self._set(rec, "idle", f"idle virtual channel {rec.vcid}")
        hdr = (rec.data_field[0] << 8) | rec.data_field[1]
        if rec.vcid in self._bitstream:
            rec.bdp = hdr & 0x3FFF
            if rec.bdp == BDP_IDLE:
                return self._set(rec, "idle", "B_PDU with idle data only")
            zone_bits = 8 * (len(rec.data_field) - 2)
            if rec.bdp != BDP_ALL_VALID and rec.bdp >= zone_bits:
                return self._bad(rec, f"bitstream data pointer {rec.bdp} past the {zone_bits}-bit zone")
            return None
        rec.fhp = hdr & 0x7FF
        rec.packet_zone = rec.data_field[2:]
        return self._check_fhp(rec)

    # ---- helpers ----------------------------------------------------------------------------
    def _check_fhp(self, rec: FrameRecord) -> None:
        fhp = rec.fhp
        if fhp == FHP_IDLE:
            return self._set(rec, "idle", "only idle data (first header pointer 0x7FE)")
        if fhp != FHP_NO_HEADER and fhp >= len(rec.packet_zone):
            return self._bad(rec, f"first header pointer {fhp} past the {len(rec.packet_zone)}-octet data field")
        return None

    @staticmethod
    def _set(rec: FrameRecord, status: str, detail: str) -> None:
        if rec.status == "ok":
            rec.status, rec.detail = status, detail

    def _bad(self, rec: FrameRecord, detail: str) -> None:
        self._set(rec, "bad_header", detail)


def _opt_int(v) -> int | None:
    return None if v is None else int(v)


def _opt_bool(v) -> bool | None:
    return None if v is None else bool(v)
