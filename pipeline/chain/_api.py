"""The public decode call: a recording and a profile in, a summary (and the records) out."""

from __future__ import annotations

import json
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

__all__ = ["DecodeResult", "decode"]


@dataclass
class DecodeResult:
    """What :func:`decode` returns: the run's counts, and the records when no folder was asked for.

    Attributes
    ----------
    frames, frames_ok, frames_idle, frames_failed, packets : int
        Frames found (every status), frames that passed their checks and carry data, idle frames,
        frames that failed a check, and packets delivered.
    duration_s, elapsed_s : float
        Length of the recording and wall time of the decode.
    out : str or None
        The output folder, None when the decode ran in memory.
    packets_list, frames_list : list of dict
        With ``out=None`` only: the objects ``packets.jsonl`` and ``frames.jsonl`` would hold.
    summary : object
        The full run summary (also printed by the command as its last line, ``summary.line()``).
    """

    frames: int
    frames_ok: int
    frames_idle: int
    frames_failed: int
    packets: int
    duration_s: float
    elapsed_s: float
    out: str | None
    summary: Any = None
    packets_list: list[dict] = field(default_factory=list)
    frames_list: list[dict] = field(default_factory=list)


def decode(recording: str | os.PathLike, profile, out: str | os.PathLike | None = None, *,
           overwrite: bool = False, workers: int = 1, input_kind: str = "iq", format: str | None = None,
           sample_rate_hz: float | None = None, start: str | None = None, progress: bool = False) -> DecodeResult:
    """Decode a recording into packets, frames and a pass report.

    Parameters
    ----------
    recording : path
        A SigMF recording (``.sigmf-meta`` or ``.sigmf-data``), a two-channel WAV file, a raw file
        (with ``format`` and ``sample_rate_hz``), or a channel-symbol file (``input_kind``).
    profile : path or LinkProfile
        The link profile (a TOML file, or one loaded with :func:`pipeline.load_profile`).
    out : path or None
        Output folder (``packets.jsonl``, ``frames.jsonl``, ``report.json``, ...).  None decodes in
        memory and returns the records in ``packets_list`` and ``frames_list``: meant for recordings
        whose packets fit in memory.
    overwrite, workers, input_kind, format, sample_rate_hz, start, progress :
        The ``decode`` command's options: ``--overwrite``, ``--workers``, ``--input`` (iq | soft |
        bits), ``--format`` (cf32 | ci16 | ci8 | cu8), ``--sample-rate``, ``--start`` (ISO-8601 UTC)
        and a progress bar on stderr.

    Returns
    -------
    DecodeResult

    Examples
    --------
    >>> import tempfile, pipeline
    >>> profile = pipeline.load_profile(pipeline.demo_profile_path())
    >>> with tempfile.TemporaryDirectory() as d:
    ...     sim = pipeline.simulate(profile, d, seconds=1.5, seed=7)
    ...     result = pipeline.decode(sim.meta_path, profile)
    >>> result.packets == sim.num_packets
    True
    """
    from pipeline.chain._chain import decode_to_folder
    from pipeline.profile import LinkProfile, load_profile

    prof = profile if isinstance(profile, LinkProfile) else load_profile(profile)
    kw = dict(input_kind=input_kind, datatype=format, sample_rate_hz=sample_rate_hz, start=start,
              progress=progress, threads=workers)
    if out is not None:
        s = decode_to_folder(str(recording), prof, str(out), overwrite=overwrite, **kw)
        return _result(s, str(out))
    with tempfile.TemporaryDirectory(prefix="downlink-") as tmp:
        folder = Path(tmp) / "decoded"
        s = decode_to_folder(str(recording), prof, str(folder), **kw)
        res = _result(s, None)
        res.packets_list = _read_jsonl(folder / "packets.jsonl")
        res.frames_list = _read_jsonl(folder / "frames.jsonl")
    return res


def _result(s, out: str | None) -> DecodeResult:
    return DecodeResult(frames=s.frames, frames_ok=s.frames_ok, frames_idle=s.frames_idle,
                        frames_failed=s.frames - s.frames_ok - s.frames_idle,
                        packets=s.packets, duration_s=s.duration_s, elapsed_s=s.elapsed_s, out=out, summary=s)


def _read_jsonl(path: Path) -> list[dict]:
    with open(path, encoding="utf-8") as f:
        return [json.loads(line) for line in f if line.strip()]
