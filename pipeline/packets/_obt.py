"""Onboard time to UTC: the spacecraft clock correlation (``clock.json``) and its use on packets.

``downlink clock`` fits the model; ``decode --clock clock.json`` applies it with :class:`ObtToUtc`.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass
from pathlib import Path

from pipeline.errors import DataFileError
from pipeline.packets._extract import _checked_time_code
from pipeline.packets._timecodes import decode_obt_ns
from pipeline.profile import LinkProfile
from pipeline.timescales import NS_PER_S, format_utc, parse_utc

__all__ = ["CLOCK_JSON_KEYS", "ClockModel", "ObtToUtc", "read_clock_json"]

#: The keys of ``clock.json``, in order (``quadratic`` only when the fit used it).
CLOCK_JSON_KEYS = ("epoch_obt_s", "utc_at_epoch", "rate", "quadratic", "drift_s_per_s", "drift_uncertainty",
                   "residual_rms_s", "pairs_used", "pairs_rejected", "light_time_source")


@dataclass(frozen=True)
class ClockModel:
    """``UTC = utc_at_epoch + rate (OBT - epoch_obt_s) + quadratic (OBT - epoch_obt_s)^2``.

    Attributes
    ----------
    epoch_obt_s : float
        Onboard seconds at the epoch (a whole number when fitted here, so it is exact in JSON).
    utc_at_epoch_tai_ns : int
        UTC at the epoch, on the TAI ns scale (``utc_at_epoch`` in the file, ISO-8601 with 9 decimals).
    rate : float
        UTC seconds per onboard second at the epoch.
    quadratic : float or None
        UTC seconds per onboard second squared, when the fit used it.
    drift_s_per_s : float
        ``1 / rate - 1``: how fast the onboard clock runs (positive = fast).
    drift_uncertainty : float
        One-sigma uncertainty of the drift from the fit.
    residual_rms_s : float
        RMS of the residuals of the pairs used.
    pairs_used, pairs_rejected : int
    light_time_source : str
    """

    epoch_obt_s: float
    utc_at_epoch_tai_ns: int
    rate: float
    quadratic: float | None = None
    drift_s_per_s: float = 0.0
    drift_uncertainty: float = 0.0
    residual_rms_s: float = 0.0
    pairs_used: int = 0
    pairs_rejected: int = 0
    light_time_source: str = ""

    def utc_tai_ns(self, obt_ns: int) -> int:
        """UTC of an onboard time (ns of the time code's count) on the TAI ns scale.

        Notes
        -----
        ``dx = obt - epoch`` in integer ns (exact), then ``round(rate dx + quadratic dx^2 / 1e9)``: float
        products of at most 1e14 ns keep 0.01 ns.  O(1).

        Examples
        --------
        >>> m = ClockModel(1000.0, parse_utc("2026-03-14T09:30:00Z"), 1.0 - 1e-6)
        >>> format_utc(m.utc_tai_ns(1_010 * 10**9))
        '2026-03-14T09:30:09.999990000Z'
        """
        dx = int(obt_ns) - round(self.epoch_obt_s * NS_PER_S)
        extra = self.rate * dx
        if self.quadratic:
            extra += self.quadratic * dx * (dx / NS_PER_S)
        return self.utc_at_epoch_tai_ns + round(extra)

    def as_dict(self) -> dict:
        """The ``clock.json`` object: exactly :data:`CLOCK_JSON_KEYS` (``quadratic`` only when used)."""
        d = {"epoch_obt_s": float(self.epoch_obt_s), "utc_at_epoch": format_utc(self.utc_at_epoch_tai_ns),
             "rate": self.rate, "quadratic": self.quadratic, "drift_s_per_s": self.drift_s_per_s,
             "drift_uncertainty": self.drift_uncertainty, "residual_rms_s": self.residual_rms_s,
             "pairs_used": self.pairs_used, "pairs_rejected": self.pairs_rejected,
             "light_time_source": self.light_time_source}
        if self.quadratic is None:
            del d["quadratic"]
        return d

    @classmethod
    def from_dict(cls, d: dict, *, source: str = "<dict>") -> ClockModel:
        """Build from a ``clock.json`` object (DataFileError naming ``source`` when a key is missing or bad)."""
        if not isinstance(d, dict):
            raise DataFileError(f"{source}: a clock file holds one JSON object")
        for key in CLOCK_JSON_KEYS:
            if key not in d and key != "quadratic":
                raise DataFileError(f"{source}: clock file has no {key!r}")
        nums = {}
        for key in ("epoch_obt_s", "rate", "drift_s_per_s", "drift_uncertainty", "residual_rms_s", "quadratic"):
            v = d.get(key)
            if key == "quadratic" and v is None:
                nums[key] = None
                continue
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
                raise DataFileError(f"{source}: clock file {key!r} must be a finite number, not {v!r}")
            nums[key] = float(v)
        if not 0.5 < nums["rate"] < 2.0:
            raise DataFileError(f"{source}: clock file 'rate' must be near 1 UTC s per onboard s, not {nums['rate']}")
        if not isinstance(d["utc_at_epoch"], str):
            raise DataFileError(f"{source}: clock file 'utc_at_epoch' must be ISO-8601 UTC text")
        try:
            epoch = parse_utc(d["utc_at_epoch"])
        except ValueError as exc:
            raise DataFileError(f"{source}: clock file 'utc_at_epoch': {exc}") from None
        for key in ("pairs_used", "pairs_rejected"):
            if isinstance(d[key], bool) or not isinstance(d[key], int) or d[key] < 0:
                raise DataFileError(f"{source}: clock file {key!r} must be a count, not {d[key]!r}")
        return cls(epoch_obt_s=nums["epoch_obt_s"], utc_at_epoch_tai_ns=epoch, rate=nums["rate"],
                   quadratic=nums["quadratic"], drift_s_per_s=nums["drift_s_per_s"],
                   drift_uncertainty=nums["drift_uncertainty"], residual_rms_s=nums["residual_rms_s"],
                   pairs_used=d["pairs_used"], pairs_rejected=d["pairs_rejected"],
                   light_time_source=str(d["light_time_source"]))


def read_clock_json(path: str | os.PathLike) -> ClockModel:
    """Read ``clock.json`` (written by ``downlink clock``).

    Raises
    ------
    DataFileError
        Missing, not JSON, or not a clock model.
    """
    p = Path(os.fspath(path))
    try:
        d = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise DataFileError(f"{p}: clock file not found") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DataFileError(f"{p}: not a JSON clock file ({exc})") from None
    except OSError as exc:
        raise DataFileError(f"{p}: cannot read ({exc.strerror})") from None
    return ClockModel.from_dict(d, source=str(p))


class ObtToUtc:
    """Adds ``utc_from_obt`` to packets whose time code is onboard time (``decode --clock clock.json``).

    Parameters
    ----------
    model : ClockModel
    profile : LinkProfile
        Which packets carry onboard time, and where: every ``[[packets.time_code]]`` APID (the code at
        ``offset`` in the secondary header, which starts the data field) and the ``[clock]`` time packets.

    Notes
    -----
    The time code is read as a plain count (:func:`pipeline.packets.decode_obt_ns`) and turned into UTC
    by the model; a packet whose code cannot be read gets ``utc_from_obt = None``.  Stateless, O(1) per
    packet.

    Examples
    --------
    >>> from pipeline.profile import profile_from_dict
    >>> prof = profile_from_dict({"link": {}, "coding": {}, "frames": {},
    ...                           "packets": {"time_code": [{"apid": 100, "code": "cuc", "pfield": 0x2F}]}})
    >>> conv = ObtToUtc(model=ClockModel(0.0, parse_utc("2026-03-14T09:30:00Z"), 1.0), profile=prof)
    >>> pkt = bytes.fromhex("0864c0000009") + bytes.fromhex("0000000a80000000000000")
    >>> conv.process({"apid": 100, "hex": pkt.hex()})["utc_from_obt"]
    '2026-03-14T09:30:10.500000000Z'
    """

    def __init__(self, *, model: ClockModel, profile: LinkProfile) -> None:
        if not isinstance(model, ClockModel):
            raise TypeError(f"Argument 'model' must be a ClockModel, not {type(model).__name__}.")
        if not isinstance(profile, LinkProfile):
            raise TypeError(f"Argument 'profile' must be a LinkProfile, not {type(profile).__name__}.")
        self.model = model
        # each time code through the extractor's own check (an integral float P-field becomes an int)
        checked = [_checked_time_code(tc) for tc in profile.packets.time_codes]
        self.fields = {tc.apid: (tc.offset, tc.code, tc.pfield) for tc in checked}
        c = profile.clock
        if c is not None and c.time_packet_apid not in self.fields:
            self.fields[c.time_packet_apid] = (c.time_field_offset, c.code, c.pfield)

    def reset(self) -> None:
        """Nothing to forget (stateless); present for the stage contract."""

    def utc_tai_ns(self, apid: int | None, packet: bytes) -> int | None:
        """UTC (TAI ns) of the packet's onboard time; None when the APID has none or it cannot be read."""
        f = self.fields.get(apid)
        if f is None:
            return None
        offset, code, pfield = f
        try:
            obt = decode_obt_ns(bytes(packet)[6 + offset:], code=code, pfield=pfield)
            return self.model.utc_tai_ns(obt.ns)
        except ValueError:
            return None

    def process(self, packet: dict) -> dict:
        """The packet object (as in packets.jsonl: ``apid``, ``hex``) with ``utc_from_obt`` added when it applies."""
        if packet.get("apid") not in self.fields:
            return packet
        t = self.utc_tai_ns(packet.get("apid"), bytes.fromhex(packet["hex"]))
        try:
            packet["utc_from_obt"] = None if t is None else format_utc(t)
        except ValueError:  # before 1972 or past 9999: no UTC to give
            packet["utc_from_obt"] = None
        return packet
