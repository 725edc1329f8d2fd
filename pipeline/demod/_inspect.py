"""``downlink inspect``: what a recording looks like, without decoding it."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.demod._demodulator import Demodulator, TrackPoint
from pipeline.timescales import format_posix_ns

__all__ = ["inspect_recording", "write_inspect_plots", "fit_carrier_track"]

_SPECTRUM_FFT = 4096
_CONSTELLATION_POINTS = 2000




def fit_carrier_track(track: list[TrackPoint], sample_rate_hz: float) -> tuple[float, float] | None:
    """Carrier offset at the recording start (Hz) and its drift (Hz/s) from the track points.

    ``t`` is seconds from recording sample 0.  When the points carry the total carrier phase, a
    quadratic ``phi(t) = a + 2 pi (f0 t + rate t^2 / 2)`` is fitted by least squares over the
    longest run of consecutive carrier-locked points (the phase is continuous there, and a phase
    fit averages the loop's jitter far better than per-block frequencies); otherwise, and for
    fewer than four points, a line through the per-block frequencies.  Returns ``None`` when no
    point is locked.  Cost O(len(track)).
    """
    best: list[TrackPoint] = []
    run: list[TrackPoint] = []
    for p in track:
        if p.carrier_locked and math.isfinite(p.carrier_offset_hz):
            run.append(p)
            if len(run) > len(best):
                best = list(run)
        else:
            run = []
    if not best:
        return None
    t = np.array([p.position / sample_rate_hz for p in best])
    phase = np.array([p.carrier_phase_rad for p in best])
    if t.size >= 4 and np.all(np.isfinite(phase)) and np.ptp(t) > 0:
        tc = t - t.mean()  # centred for conditioning
        a = np.vstack([np.ones_like(tc), tc, 0.5 * tc * tc]).T
        (_, f_mid, rate), *_ = np.linalg.lstsq(a, phase / (2.0 * math.pi), rcond=None)
        return float(f_mid - rate * t.mean()), float(rate)
    f = np.array([p.carrier_offset_hz for p in best])
    if t.size < 3 or np.ptp(t) <= 0:
        return float(np.mean(f)), 0.0
    a = np.vstack([np.ones_like(t), t]).T
    (f0, rate), *_ = np.linalg.lstsq(a, f, rcond=None)
    return float(f0), float(rate)


def occupied_band(freqs: np.ndarray, psd: np.ndarray, *, share: float = 0.99) -> tuple[float, float, float] | None:
    """Centre, width and level of the signal band in an averaged power spectrum (fftshift-ed).

    The noise floor is the median bin (a signal narrower than half the band leaves the median on the noise)
    and its spread the bins' median absolute deviation; bins more than four spreads above the floor carry
    the signal, their power above the floor is accumulated across frequency, and the band is where the
    middle ``share`` of it lies (the occupied-bandwidth definition of ITU-R SM.328, from memory, not
    confirmed).  Counting only those bins keeps the noise's own fluctuations out of the band's tails.  Returns
    ``(centre_hz, width_hz, level_db)``, ``level_db`` being the band's mean power over the floor, or None when
    nothing stands above the floor.

    Examples
    --------
    >>> f = np.linspace(-500, 500, 1001)
    >>> p = np.ones_like(f) + np.where(np.abs(f - 100) <= 50, 100.0, 0.0)  # a 100 Hz wide band at +100 Hz
    >>> [round(v, 1) for v in occupied_band(f, p)]
    [100.0, 100.0, 20.0]
    """
    psd = np.asarray(psd, dtype=np.float64)
    floor = float(np.median(psd))
    spread = 1.4826 * float(np.median(np.abs(psd - floor)))  # the MAD as a standard deviation (Gaussian)
    excess = np.where(psd > floor + 4.0 * spread, psd - floor, 0.0)
    total = float(excess.sum())
    if floor <= 0 or total <= 0.05 * floor * psd.size:  # less than a twentieth of the noise: nothing there
        return None
    cum = np.cumsum(excess) / total
    lo = int(np.searchsorted(cum, (1 - share) / 2))
    hi = int(np.searchsorted(cum, 1 - (1 - share) / 2))
    centre = 0.5 * (float(freqs[lo]) + float(freqs[hi]))
    width = float(freqs[hi] - freqs[lo])
    level = 10.0 * math.log10(float(np.mean(psd[lo:hi + 1])) / floor) if hi > lo else 0.0
    return centre, width, level


def inspect_recording(recording: Any, *, profile: Any = None, max_seconds: float | None = None) -> dict:
    """Describe a recording: format, duration, spectrum; with a profile, carrier, Es/N0 and lock.

    Parameters
    ----------
    recording : pipeline.recording.Recording
        Any object with ``sample_rate_hz``, ``num_samples``, ``datatype``, ``start_ns`` and
        ``chunks(chunk_samples, start=0, stop=None)`` yielding chunks (``samples``, ``start``,
        ``nonfinite``).
    profile : LinkProfile, optional
        When given, the recording is demodulated with its ``[link]`` and ``[receiver]``.
    max_seconds : float, optional
        Analyse only the first ``max_seconds`` (the whole recording by default).

    Returns
    -------
    dict
        ``sample_rate_hz``, ``num_samples``, ``duration_s``, ``analysed_s``, ``datatype``,
        ``start`` (ISO-8601 UTC), ``frequency_hz``, ``band_centre_hz``, ``occupied_bandwidth_hz``,
        ``band_above_noise_db`` (the signal band, :func:`occupied_band`), ``nonfinite_samples``;
        with a profile also ``modulation``, ``symbol_rate_baud``, ``carrier_found``, ``message``,
        ``carrier_offset_hz`` (at the recording start), ``carrier_rate_hz_per_s``, ``esn0_db``
        (per modulation symbol, median of the locked blocks' M2M4 estimates), ``ebn0_db``,
        ``lock_fraction`` (carrier-locked share of the symbols), ``symbol_lock_fraction``.
        Measured values are ``None`` when no carrier was found.  ``plots`` holds arrays:
        ``spectrum_freq_hz``, ``spectrum_db``, ``constellation`` (complex), ``track_time_s``,
        ``track_carrier_hz``, ``track_esn0_db``.

    Notes
    -----
    Spectrum: averaged periodogram of 4096-point Hann-windowed segments (Welch, no overlap),
    in dB relative to its maximum.  Memory is constant: chunks are read and dropped.
    """
    fs = float(recording.sample_rate_hz)
    total = int(recording.num_samples)
    if max_seconds is not None:
        if not (isinstance(max_seconds, (int, float)) and max_seconds > 0):
            raise ValueError(f"Argument 'max_seconds' must be a positive number, not {max_seconds!r}.")
        stop = min(total, int(math.ceil(max_seconds * fs)))
    else:
        stop = total
    nfft = _SPECTRUM_FFT
    while nfft > 64 and nfft > stop:
        nfft //= 2
    win = np.hanning(nfft)
    psd = np.zeros(nfft)
    nseg = 0
    leftover = np.zeros(0, dtype=np.complex64)
    nonfinite = 0
    demod = None
    if profile is not None:
        demod = Demodulator(link=profile.link, receiver=profile.receiver, sample_rate_hz=fs)
        chunk_samples = profile.receiver.chunk_samples
    else:
        chunk_samples = 1 << 18
    track: list[TrackPoint] = []
    nsym = 0
    nlock = 0
    nslock = 0
    constellation = np.zeros(0, dtype=np.complex64)

    def take(block) -> None:
        nonlocal nsym, nlock, constellation
        track.extend(block.track)
        bps = demod.bits_per_symbol
        locked = block.locked[::bps]
        nsym += locked.size
        nlock += int(np.count_nonzero(locked))
        good = block.symbols[locked] if locked.any() else np.zeros(0, np.complex64)
        if good.size:
            constellation = np.concatenate([constellation, good])[-_CONSTELLATION_POINTS:]

    if stop > 0:
        for chunk in recording.chunks(chunk_samples, 0, stop):
            nonfinite += int(getattr(chunk, "nonfinite", 0) or 0)
            x = np.concatenate([leftover, chunk.samples]) if leftover.size else np.asarray(chunk.samples)
            nfull = x.size // nfft
            if nfull:
                segs = x[:nfull * nfft].reshape(nfull, nfft).astype(np.complex128)
                segs = np.nan_to_num(segs)
                psd += np.sum(np.abs(np.fft.fft(segs * win, axis=1)) ** 2, axis=0)
                nseg += nfull
            leftover = np.array(x[nfull * nfft:], dtype=np.complex64)
            if demod is not None:
                take(demod.process(chunk))
        if demod is not None:
            take(demod.flush())
    freqs = np.fft.fftshift(np.fft.fftfreq(nfft, d=1.0 / fs))
    psd = np.fft.fftshift(psd)
    if nseg and psd.max() > 0:
        spec_db = 10.0 * np.log10(np.maximum(psd / psd.max(), 1e-20))
        band = occupied_band(freqs, psd)
    else:
        spec_db = np.full(nfft, -200.0)
        band = None
    start_ns = getattr(recording, "start_ns", None)
    result: dict[str, Any] = {
        "sample_rate_hz": fs,
        "num_samples": total,
        "duration_s": total / fs,
        "analysed_s": stop / fs,
        "datatype": str(getattr(recording, "datatype", "unknown")),
        "start": format_posix_ns(int(start_ns)) if start_ns is not None else None,
        "frequency_hz": getattr(recording, "frequency_hz", None),
        "band_centre_hz": None if band is None else band[0],
        "occupied_bandwidth_hz": None if band is None else band[1],
        "band_above_noise_db": None if band is None else band[2],
        "nonfinite_samples": nonfinite,
    }
    plots: dict[str, Any] = {"spectrum_freq_hz": freqs, "spectrum_db": spec_db, "constellation": constellation}
    if demod is not None:
        link = profile.link
        fit = fit_carrier_track(track, fs)
        locked_esn0 = [p.esn0_db for p in track if p.carrier_locked and math.isfinite(p.esn0_db)]
        nslock = sum(1 for p in track if p.symbol_locked)
        found = fit is not None
        esn0 = float(np.median(locked_esn0)) if (found and locked_esn0) else None
        ebn0 = None
        if esn0 is not None:
            ebn0 = esn0 - 10.0 * math.log10(profile.code_rate * link.bits_per_symbol)
        if found:
            message = (f"carrier locked on {100.0 * nlock / max(nsym, 1):.1f}% of {nsym} symbols "
                       f"({link.modulation}, {link.symbol_rate_baud:g} baud)")
        else:
            detail = demod.no_lock_message() or f"no carrier lock in +-{demod.acquisition_search_hz:.0f} Hz"
            message = (f"no carrier found: no {link.modulation} signal at {link.symbol_rate_baud:g} baud locked "
                       f"({detail})")
        result.update({
            "modulation": link.modulation,
            "symbol_rate_baud": link.symbol_rate_baud,
            "carrier_found": found,
            "message": message,
            "carrier_offset_hz": fit[0] if found else None,
            "carrier_rate_hz_per_s": fit[1] if found else None,
            "esn0_db": esn0,
            "ebn0_db": ebn0,
            "lock_fraction": nlock / nsym if nsym else 0.0,
            "symbol_lock_fraction": nslock / len(track) if track else 0.0,
        })
        plots.update({
            "track_time_s": np.array([p.position / fs for p in track]),
            "track_carrier_hz": np.array([p.carrier_offset_hz for p in track]),
            "track_esn0_db": np.array([p.esn0_db for p in track]),
        })
    result["plots"] = plots
    return result


def write_inspect_plots(result: dict, out_dir: str | Path) -> list[Path]:
    """Write ``spectrum.png`` and ``constellation.png`` for an :func:`inspect_recording` result.

    Uses matplotlib's Agg canvas directly (no global backend switch).  Creates ``out_dir`` if
    needed and returns the paths written.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    plots = result.get("plots", {})
    paths = []

    fig = Figure(figsize=(8, 4.5), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    f = np.asarray(plots.get("spectrum_freq_hz", []))
    ax.plot(f / 1e3, np.asarray(plots.get("spectrum_db", [])), lw=0.8)
    ax.set_xlabel("frequency offset (kHz)")
    ax.set_ylabel("power (dB rel. peak)")
    ax.set_title(f"spectrum, {result.get('sample_rate_hz', 0) / 1e6:g} Msample/s")
    ax.grid(True, alpha=0.3)
    p = out / "spectrum.png"
    fig.savefig(p)
    paths.append(p)

    fig = Figure(figsize=(5, 5), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    c = np.asarray(plots.get("constellation", []), dtype=np.complex64)
    if c.size:
        ax.plot(c.real, c.imag, ".", ms=2, alpha=0.5)
    else:
        ax.text(0.5, 0.5, "no carrier-locked symbols", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlim(-2.5, 2.5)
    ax.set_ylim(-2.5, 2.5)
    ax.set_aspect("equal")
    ax.set_xlabel("in-phase")
    ax.set_ylabel("quadrature")
    esn0 = result.get("esn0_db")
    ax.set_title("constellation" + (f", Es/N0 {esn0:.1f} dB" if isinstance(esn0, float) else ""))
    ax.grid(True, alpha=0.3)
    p = out / "constellation.png"
    fig.savefig(p)
    paths.append(p)
    return paths
