"""Where the back end's records go: files in the output folder, or lists in memory.

Both sinks take the same calls: ``frame(obj)``, ``packet(obj, data)``, ``doppler(rows)``,
``frame_octets(vcid, data)`` (a transfer frame that passed its checks), ``cadu(data)`` (every CADU as
found) and ``close()``.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path
from typing import Any

from pipeline.errors import OutputError

__all__ = ["FolderSinks", "MemorySinks"]

#: ``json.dumps(obj, separators=(",", ":"))`` without building an encoder per record: the same text.
_ENCODE = json.JSONEncoder(separators=(",", ":")).encode


def _doppler_columns() -> tuple[str, ...]:
    from pipeline.demod.residual import DOPPLER_COLUMNS

    return tuple(DOPPLER_COLUMNS)


class FolderSinks:
    """The files of the output folder, written as items arrive.

    ``packets.jsonl``, ``frames.jsonl``, ``apid_NNNN.bin`` (the packets of each APID), ``doppler.csv``,
    ``frames.bin`` and ``frames_vcN.bin`` (the transfer frames that passed their checks, idle ones included,
    each at the frame length, in reception order), and with ``cadus`` also ``cadus.bin`` (every CADU the
    frame synchronizer found: marker and codeblock as hard bits, still randomized, before decoding).

    Parameters
    ----------
    folder : Path
        An existing folder (the output folder's temporary name during a run).
    cadus : bool, keyword-only
        Also write ``cadus.bin``.
    doppler_columns : sequence of str or None, keyword-only
        Columns of ``doppler.csv`` (default: the demodulator's ``DOPPLER_COLUMNS``).
    flush : bool, keyword-only
        Flush ``packets.jsonl`` and ``frames.jsonl`` after every record (a live decode: readers see each
        record as soon as it is decoded).
    packets_to : text stream or None, keyword-only
        Also write each packet's JSON line to this stream (standard output for ``--packets-to-stdout``),
        flushed at once.
    """

    def __init__(self, folder: Path, *, cadus: bool = False, doppler_columns=None, flush: bool = False,
                 packets_to=None):
        self.folder = Path(folder)
        self._apid_files: dict[Any, Any] = {}
        self._vc_files: dict[int, Any] = {}
        self._frames_bin = None
        self._cadus_bin = None
        self._doppler_file = None
        self._doppler_csv = None
        self._columns = tuple(doppler_columns) if doppler_columns else None
        self._flush = bool(flush)
        self._packets_to = packets_to
        try:
            self._packets = open(self.folder / "packets.jsonl", "w", encoding="utf-8")
            self._frames = open(self.folder / "frames.jsonl", "w", encoding="utf-8")
            self._frames_bin = open(self.folder / "frames.bin", "wb")
            if cadus:
                self._cadus_bin = open(self.folder / "cadus.bin", "wb")
        except OSError as exc:
            raise self._error(exc) from None

    def doppler(self, rows: list[dict]) -> None:
        """Append rows to ``doppler.csv`` (the carrier-frequency track: one-way Doppler and range rate)."""
        try:
            self._doppler(rows)
        except OSError as exc:
            raise self._error(exc) from None

    def frame(self, obj: dict) -> None:
        try:
            self._frames.write(_ENCODE(obj) + "\n")
            if self._flush:
                self._frames.flush()
        except OSError as exc:
            raise self._error(exc) from None

    def packet(self, obj: dict, data: bytes) -> None:
        try:
            self._packet(obj, data)
        except BrokenPipeError:  # the reader of --packets-to-stdout went away: the command ends quietly
            raise
        except OSError as exc:
            raise self._error(exc) from None

    def frame_octets(self, vcid: int, data: bytes) -> None:
        try:
            self._frames_bin.write(data)
            f = self._vc_files.get(vcid)
            if f is None:
                f = self._vc_files[vcid] = open(self.folder / f"frames_vc{int(vcid)}.bin", "wb")
            f.write(data)
        except OSError as exc:
            raise self._error(exc) from None

    def cadu(self, data: bytes) -> None:
        if self._cadus_bin is not None:
            try:
                self._cadus_bin.write(data)
            except OSError as exc:
                raise self._error(exc) from None

    def close(self) -> None:
        try:
            for f in (self._packets, self._frames, *self._apid_files.values(), self._doppler_file, self._frames_bin,
                      self._cadus_bin, *self._vc_files.values()):
                if f is not None:
                    f.close()
        except OSError as exc:
            raise self._error(exc) from None

    def _error(self, exc: OSError) -> OutputError:
        # a full disk or a vanished folder is an output problem, not a bug
        return OutputError(f"{self.folder}: cannot write output ({exc.strerror or exc})")

    def _doppler(self, rows: list[dict]) -> None:
        if self._doppler_csv is None:
            self._columns = self._columns or _doppler_columns()
            self._doppler_file = open(self.folder / "doppler.csv", "w", encoding="utf-8", newline="")
            self._doppler_csv = csv.writer(self._doppler_file)  # (the rows as lists: what a DictWriter writes)
            self._doppler_csv.writerow(self._columns)
        columns = self._columns
        self._doppler_csv.writerows([("" if row.get(k) is None else row.get(k)) for k in columns] for row in rows)

    def _packet(self, obj: dict, data: bytes) -> None:
        line = _ENCODE(obj) + "\n"
        self._packets.write(line)
        if self._flush:
            self._packets.flush()
        if self._packets_to is not None:
            self._packets_to.write(line)
            self._packets_to.flush()
        apid = obj["apid"]
        key = apid if apid is not None else ("encapsulation", obj.get("protocol_id"))
        f = self._apid_files.get(key)
        if f is None:
            name = f"apid_{apid:04d}.bin" if apid is not None else f"encapsulation_pid{obj.get('protocol_id')}.bin"
            f = self._apid_files[key] = open(self.folder / name, "wb")
        f.write(data)


class MemorySinks:
    """The same records kept in lists (``packets``, ``frames``, ``doppler``), for an in-memory decode."""

    def __init__(self):
        self.packets: list[dict] = []
        self.frames: list[dict] = []
        self.doppler_rows: list[dict] = []

    def doppler(self, rows: list[dict]) -> None:
        self.doppler_rows.extend(rows)

    def frame(self, obj: dict) -> None:
        self.frames.append(obj)

    def packet(self, obj: dict, data: bytes) -> None:
        self.packets.append(obj)

    def frame_octets(self, vcid: int, data: bytes) -> None:
        pass  # the frame records hold what a caller in memory needs

    def cadu(self, data: bytes) -> None:
        pass

    def close(self) -> None:
        pass
