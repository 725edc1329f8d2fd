"""The public decode call: a recording and a profile in, a summary (and the records) out."""

from __future__ import annotations

import os

from pipeline.chain._run import DecodeSummary, TimeProducts, decode_in_memory, decode_to_folder

__all__ = ["decode"]


def decode(recording: str | os.PathLike, profile, out: str | os.PathLike | None = None, *,
           overwrite: bool = False, workers: int = 1, input_kind: str = "iq", format: str | None = None,
           sample_rate_hz: float | None = None, start: str | None = None, no_time: bool = False,
           cadus: bool = False, scheduler: str | None = None, drop_duplicates: bool = False,
           clock: str | os.PathLike | None = None, tle: str | os.PathLike | None = None,
           oem: str | os.PathLike | None = None, verify_checksum: bool = True,
           progress: bool = False) -> DecodeSummary:
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
        memory and returns the records in ``packets_list`` and ``frames_list`` and the report in
        ``report``: meant for recordings whose packets fit in memory.
    overwrite, workers, input_kind, format, sample_rate_hz, start, no_time, cadus, scheduler, drop_duplicates, \
clock, tle, oem, verify_checksum, progress :
        The ``decode`` command's options: ``--overwrite``, ``--workers``, ``--input`` (iq | soft |
        bits), ``--format`` (cf32 | ci16 | ci8 | cu8), ``--sample-rate``, ``--start`` (ISO-8601 UTC of
        the first sample; required when the input carries no time), ``--no-time`` (decode without a
        time: every ERT is null), ``--cadus`` (also ``cadus.bin``; folder output only),
        ``--scheduler`` (the segments of an IQ recording as tasks on a Dask cluster: ``"local"`` or a
        scheduler address), ``--drop-duplicates`` (suppress byte-identical copies of packets already
        delivered), ``--clock`` (a ``clock.json``: ``utc_from_obt`` on packets carrying onboard time),
        ``--tle`` / ``--oem`` (an orbit: predicted Doppler and residuals in ``doppler.csv``),
        ``--no-checksum`` (``verify_checksum=False``: skip the SigMF ``core:sha512`` check) and a progress
        bar on stderr.

    Returns
    -------
    DecodeSummary
        Counts (``frames``, ``frames_ok``, ``frames_idle``, ``frames_failed``, ``packets``,
        ``duration_s``, ``elapsed_s``), ``out``, ``report`` and, in memory, the records.

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
    from pipeline.profile import LinkProfile, load_profile

    prof = profile if isinstance(profile, LinkProfile) else load_profile(profile)
    products = TimeProducts(clock=None if clock is None else str(clock), tle=None if tle is None else str(tle),
                            oem=None if oem is None else str(oem))
    kw = dict(input_kind=input_kind, datatype=format, sample_rate_hz=sample_rate_hz, start=start, no_time=no_time,
              progress=progress, workers=workers, scheduler=scheduler, products=products,
              drop_duplicates=drop_duplicates, verify_checksum=verify_checksum)
    if out is None:
        return decode_in_memory(str(recording), prof, **kw)
    return decode_to_folder(str(recording), prof, str(out), overwrite=overwrite, cadus=cadus, **kw)
