"""Space packets of the simulated spacecraft (CCSDS 133.0-B) and the traffic source that makes them.

A packet is a 6-octet primary header followed by the packet data field.  When an APID's traffic
has ``time_code = true`` the data field starts with a secondary header holding the packet's
generation time as a CUC T-field (implicit P-field 0x1E: level 1, 1958 TAI epoch, 4 coarse and
2 fine octets); the rest of the data field is pseudo-random user data.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from pipeline.profile import ApidTraffic
from pipeline.sim._time import cuc_4_2_tai, tai_ns_from_utc_ns

__all__ = [
    "IDLE_APID",
    "SimPacket",
    "space_packet_header",
    "space_packet",
    "idle_packet",
    "PacketSource",
]

#: APID of idle packets (CCSDS 133.0-B; from memory, not confirmed, REFERENCES.md sec. 5).
IDLE_APID = 0x7FF

_SEQ_UNSEGMENTED = 0b11


@dataclass(frozen=True)
class SimPacket:
    """One packet as sent.

    Attributes
    ----------
    apid, seq_count, vcid :
        Application process id, 14-bit sequence count, virtual channel that carries it.
    data :
        The whole packet, primary header included.
    generation_ns :
        UTC generation time, nanoseconds since 1970-01-01 (the value in its CUC secondary header,
        when it has one).
    generation_s :
        The same instant in seconds since the start of the recording.
    generation_tai_ns :
        The same instant on TAI (:func:`pipeline.sim.tai_ns_from_utc_ns`): the recording's start plus
        ``generation_s`` SI seconds, exact across a leap second (``generation_ns``, a POSIX count, is
        a second off after one); None when not given (then ``generation_ns`` is the time).
    """

    apid: int
    seq_count: int
    vcid: int
    data: bytes
    generation_ns: int
    generation_s: float
    generation_tai_ns: int | None = None


def space_packet_header(*, apid: int, seq_count: int, data_length: int, secondary_header: bool,
                        packet_type: int = 0, seq_flags: int = _SEQ_UNSEGMENTED) -> bytes:
    """The 6-octet Space Packet primary header.

    Layout: version (3 bits, 000), type (1), secondary header flag (1), APID (11), sequence flags
    (2), sequence count (14), packet data length (16) = octets in the data field - 1.

    References
    ----------
    CCSDS 133.0-B-2 sec. 4.1.3 (layout from memory, not confirmed; worked example REFERENCES.md sec. 5).
    """
    if not 0 <= apid <= 0x7FF:
        raise ValueError(f"Argument 'apid' must be 0..2047, not {apid}.")
    if not 1 <= data_length <= 65536:
        raise ValueError(f"Argument 'data_length' must be 1..65536, not {data_length}.")
    if not 0 <= seq_count <= 0x3FFF:
        raise ValueError(f"Argument 'seq_count' must be 0..16383, not {seq_count}.")
    word0 = (0 << 13) | ((packet_type & 1) << 12) | ((1 if secondary_header else 0) << 11) | apid
    word1 = ((seq_flags & 3) << 14) | seq_count
    return word0.to_bytes(2, "big") + word1.to_bytes(2, "big") + (data_length - 1).to_bytes(2, "big")


def space_packet(*, apid: int, seq_count: int, data_field: bytes, secondary_header: bool) -> bytes:
    """A whole unsegmented telemetry Space Packet: header + ``data_field``."""
    return space_packet_header(apid=apid, seq_count=seq_count, data_length=len(data_field),
                               secondary_header=secondary_header) + bytes(data_field)


def idle_packet(length: int, fill: bytes | None = None) -> bytes:
    """An idle packet (APID 0x7FF) of ``length`` octets in total (at least 7).

    ``fill`` gives the data field (``length - 6`` octets); zeros when omitted.
    """
    if length < 7:
        raise ValueError(f"Argument 'length' must be >= 7 (6-octet header + 1), not {length}.")
    body = bytes(length - 6) if fill is None else bytes(fill)
    if len(body) != length - 6:
        raise ValueError(f"Argument 'fill' must hold {length - 6} octets, not {len(body)}.")
    return space_packet(apid=IDLE_APID, seq_count=0, data_field=body, secondary_header=False)


class PacketSource:
    """Periodic packet traffic of several APIDs, emitted in generation-time order.

    APID ``a`` with rate ``r`` generates its packet ``n`` at
    ``t = start_s + (n + phase_a) / r`` seconds after the start of the recording, where ``phase_a``
    is drawn uniformly in [0, 1) from the seed so the APIDs do not tick together.  Generation stops
    at ``stop_s`` (exclusive).  Packets of equal time come out in the order of ``traffic``.

    Parameters
    ----------
    traffic :
        The ``[simulate]`` traffic entries (APID, data-field length, rate, VC, time code).
    start_ns :
        UTC of the recording start (nanoseconds since 1970-01-01), to stamp the time codes.
    seed :
        Seed of the user data and phases; the same seed gives the same packets.
    start_s, stop_s :
        First and end generation time, seconds after the recording start.

    Notes
    -----
    Sequence counts run per APID modulo 2^14.  Cost: O(number of APIDs) per packet.
    """

    def __init__(self, *, traffic: Iterable[ApidTraffic], start_ns: int, seed: int = 0, start_s: float = 0.0,
                 stop_s: float = math.inf):
        self.traffic = tuple(traffic)
        if not self.traffic:
            raise ValueError("Argument 'traffic' must name at least one APID, not an empty list.")
        apids = [t.apid for t in self.traffic]
        if len(set(apids)) != len(apids):
            raise ValueError(f"Argument 'traffic' must list each APID once, not {apids}.")
        for t in self.traffic:
            if not 0 <= t.apid <= 0x7FE:
                raise ValueError(f"Argument 'traffic' APIDs must be 0..2046, not {t.apid}.")
            if not (t.rate_hz > 0 and math.isfinite(t.rate_hz)):
                raise ValueError(f"Argument 'traffic' rate_hz must be > 0, not {t.rate_hz}.")
            if t.time_code and t.length < 6:
                raise ValueError(f"Argument 'traffic' length of APID {t.apid} must be >= 6 with a time code, "
                                 f"not {t.length}.")
            if not 1 <= t.length <= 65536:
                raise ValueError(f"Argument 'traffic' length must be 1..65536, not {t.length}.")
        if not math.isfinite(start_s) or start_s < 0:
            raise ValueError(f"Argument 'start_s' must be finite and >= 0, not {start_s}.")
        if not stop_s > start_s:
            raise ValueError(f"Argument 'stop_s' must be > start_s ({start_s}), not {stop_s}.")
        self.start_ns = int(start_ns)
        self._start_tai_ns = tai_ns_from_utc_ns(self.start_ns)
        self.seed = seed
        self.start_s = float(start_s)
        self.stop_s = float(stop_s)
        self.reset()

    def reset(self) -> None:
        """Back to the first packet of every APID."""
        self._rng = np.random.default_rng(np.random.SeedSequence([int(self.seed), 0x5A1]))
        self.phases = self._rng.random(len(self.traffic))
        self.next_index = [0] * len(self.traffic)
        self.seq_counts = [0] * len(self.traffic)
        self.emitted = 0

    def _time(self, i: int) -> float:
        t = self.traffic[i]
        return self.start_s + (self.next_index[i] + self.phases[i]) / t.rate_hz

    def process(self, until_s: float) -> list[SimPacket]:
        """All packets generated before ``until_s`` (seconds after the start) not yet returned."""
        out = []
        limit = min(float(until_s), self.stop_s)
        while True:
            times = [self._time(i) for i in range(len(self.traffic))]
            i = min(range(len(times)), key=times.__getitem__)
            t_s = times[i]
            if not t_s < limit:
                break
            out.append(self._make(i, t_s))
        return out

    def _make(self, i: int, t_s: float) -> SimPacket:
        tr = self.traffic[i]
        gen_ns = self.start_ns + round(t_s * 1e9)
        gen_tai = self._start_tai_ns + round(t_s * 1e9)  # uniform: exact across a leap second
        if tr.time_code:
            field = cuc_4_2_tai(gen_tai) + self._rng.bytes(tr.length - 6)
        else:
            field = self._rng.bytes(tr.length)
        data = space_packet(apid=tr.apid, seq_count=self.seq_counts[i], data_field=field,
                            secondary_header=tr.time_code)
        pkt = SimPacket(apid=tr.apid, seq_count=self.seq_counts[i], vcid=tr.vcid, data=data,
                        generation_ns=gen_ns, generation_s=t_s, generation_tai_ns=gen_tai)
        self.seq_counts[i] = (self.seq_counts[i] + 1) & 0x3FFF
        self.next_index[i] += 1
        self.emitted += 1
        return pkt
