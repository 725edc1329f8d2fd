"""Carrier acquisition: where the signal's band lies (coarse), then the spectral line of its M-th power (fine)."""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import scipy.fft

from pipeline.demod._kernels import (
    condition_block,
    dechirped_sum,
    derotate,
    fir_interleaved,
    phasor_table,
    power_block_sums,
)

__all__ = ["CarrierAcquisition", "CarrierEstimate", "CarrierSearch", "SpectralLine", "estimate_carrier_offset",
           "rail_values", "rails_clipped", "spectral_line"]

#: Detection threshold of a spectral line: peak over the median bin of the searched band (16 dB; the
#: mean of an exponential is 1/ln 2 times its median, so a noise bin passes with probability e^-27.7).
LINE_THRESHOLD = 40.0
#: Band detector threshold (standard deviations of the template correlation on noise alone).
_BAND_THRESHOLD_Z = 8.0
#: At most this many Doppler-rate hypotheses per search (the spacing widens beyond).
_MAX_RATES = 65
#: Line threshold of a long search (peak over median, 13.5 dB over the mean floor): it runs only where the
#: band detector saw a signal, and its noise peaks measured 11.4-11.9 dB over 262144 samples and 65 rates.
LONG_LINE_THRESHOLD = 32.0
#: At most this many in a long search (:meth:`CarrierSearch.search_long`; the rates stop there).
_MAX_RATES_LONG = 129
#: A window with at least this fraction of its values at one of a rail's two extremes (the most positive or the
#: most negative real or imaginary part, exactly) has clipped rails: unclipped samples reach an extreme once or
#: twice (:func:`rails_clipped`).
CLIPPED_FRACTION = 1.0 / 1024.0
#: A search looks at this many of its window's first samples for clipped rails.
_CLIP_LOOK = 16384
#: A found line whose ``|a_M| / |a_1|^M`` (:func:`_tone_q`) is below this is a CW tone, not a suppressed carrier
#: (tones measure 0.94-1.02, BPSK leaking -10 dB of its power as carrier 3.7 and more).
TONE_Q = 2.0


@dataclass(frozen=True)
class CarrierEstimate:
    """Result of :func:`estimate_carrier_offset`.

    ``offset_hz`` is the carrier offset; ``peak_ratio`` the spectral line over the median bin of
    the searched band (a detection statistic); ``found`` whether it exceeded the threshold.
    """

    offset_hz: float
    peak_ratio: float
    found: bool


@dataclass(frozen=True)
class SpectralLine:
    """The strongest spectral line (or band) an acquisition saw, for a "no lock" message.

    ``frequency_hz`` is the carrier frequency it stands for (an ``x^M`` line divided by ``M``),
    ``level_db`` its power over the mean noise floor of the searched band (estimated as the median
    bin over ln 2), ``kind`` what was measured: ``"x^2 line"``, ``"x^4 line"``, ``"carrier line"``
    (residual carrier) or ``"band"`` (the signal band's mean power over the floor, when no band
    stood out enough for a line search).
    """

    frequency_hz: float
    level_db: float
    kind: str

    def describe(self) -> str:
        """One phrase: ``"strongest x^2 line at -12345.6 Hz, 9.1 dB above the noise floor"``.

        Examples
        --------
        >>> SpectralLine(-12345.61, 9.07, "x^2 line").describe()
        'strongest x^2 line at -12345.6 Hz, 9.1 dB above the noise floor'
        """
        return f"strongest {self.kind} at {self.frequency_hz:+.1f} Hz, {self.level_db:.1f} dB above the noise floor"


@dataclass(frozen=True)
class CarrierAcquisition:
    """Result of :meth:`CarrierSearch.search`.

    Attributes
    ----------
    found : bool
        A line exceeded the threshold (:data:`LINE_THRESHOLD`).
    offset_hz : float
        Carrier frequency at the window's first sample (``centre_hz - rate T_w / 2``).
    centre_hz : float
        Mean carrier frequency over the window (the line divided by ``M``).
    rate_hz_per_s : float
        Doppler rate of the winning hypothesis.
    band_hz : float
        Centre of the signal band found by the coarse stage (0 when it was skipped).
    line : SpectralLine
        The strongest line (or, when the band detector stopped the search, the band).
    data_line : bool
        The line exceeded the threshold but is a data line of a carrier whose own line is stronger
        (``found`` is then False; see :class:`CarrierSearch`).
    tone : bool
        The line exceeded the threshold but is the M-th power of a CW tone in the samples (``found`` is then
        False, ``line.kind`` "CW tone"; see :class:`CarrierSearch`).
    """

    found: bool
    offset_hz: float
    centre_hz: float
    rate_hz_per_s: float
    band_hz: float
    line: SpectralLine
    data_line: bool = False
    tone: bool = False


def rail_values(x: np.ndarray) -> int:
    """The values (real and imaginary parts) of ``x`` that sit exactly at one of its rails' extremes (the most
    positive or most negative real or imaginary part), counting only the extremes that at least
    :data:`CLIPPED_FRACTION` of the samples (and 8) reach and more of them than reach the next value inside: 0 for
    samples below full scale, which reach each extreme once or twice (or, quantised to a few codes, less often
    than the code next to it).  An ADC driven past full scale (or a recording clipped on conversion) piles its
    values up at its largest and smallest codes.  Cost: four passes over each rail, two more for an extreme that
    many values reach.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(1).standard_normal(4096).astype(np.complex64)
    >>> rail_values(x), rail_values(np.clip(x.real, -1, 1) + 1j * np.clip(x.imag, -1, 1))
    (0, 1284)
    """
    x = np.asarray(x)
    if x.size == 0:
        return 0
    need = max(8, int(CLIPPED_FRACTION * x.size))
    total = 0
    for rail in (x.real, x.imag):
        hi, lo = rail.max(), rail.min()
        if hi == lo:
            continue  # constant (a rail of zeros): nothing clipped
        for edge, inside in ((hi, rail < hi), (lo, rail > lo)):
            k = int(np.count_nonzero(rail == edge))
            if k < need:
                continue
            # a pile-up: more values at the extreme than at the next value inside it (coarsely quantised samples
            # far below full scale, a few codes in all, reach their extreme code often, but less often than the
            # code next to it, as a tail does)
            nxt = rail[inside]
            nxt = nxt.max() if edge == hi else nxt.min()
            total += k if k > int(np.count_nonzero(rail == nxt)) else 0
    return total


def rails_clipped(x: np.ndarray) -> bool:
    """Whether ``x`` has clipped rails (:func:`rail_values` above 0)."""
    return rail_values(x) > 0


def _next_pow2(n: float) -> int:
    return 1 << max(0, int(math.ceil(math.log2(max(1.0, n)))))


def _parabolic_peak(p: np.ndarray, k: int) -> float:
    """Fractional offset of the maximum of the parabola through ``log p`` at ``k - 1, k, k + 1`` (circular)."""
    n = p.size
    lo, mid, hi = p[(k - 1) % n], p[k], p[(k + 1) % n]
    if lo > 0 and mid > 0 and hi > 0:
        la, lb, lc = math.log(lo), math.log(mid), math.log(hi)
        den = la - 2.0 * lb + lc
        if den < 0:
            return 0.5 * (la - lc) / den
    return 0.0


def band_limited(z: np.ndarray, n_d: int) -> np.ndarray:
    """``z`` (``n`` samples) decimated to ``n_d`` samples through an ideal low-pass: no line can alias.

    The ``n_d`` lowest-frequency bins of the length-``n`` DFT (``|f| < fs n_d / (2 n)``) transformed back:
    the band-limited interpolation of ``z`` at the times ``j n / n_d`` (complex128, a line's amplitude
    ``n / n_d`` times its own, as in a sum of ``n / n_d`` samples).  A line outside the kept band reaches it
    only through the leakage of the length-``n`` rectangle, ``1 / (pi d)`` in amplitude ``d`` bins away,
    and stays at its own frequency (block sums instead fold every frequency into the band, 13 dB down at
    their first sidelobe).  Cost: one FFT of ``n`` points and one of ``n_d``.

    Examples
    --------
    >>> k = np.arange(64)
    >>> z = np.exp(2j * np.pi * 3 * k / 64) + np.exp(2j * np.pi * 20 * k / 64)  # bins 3 and 20
    >>> d = band_limited(z, 16)  # keeps bins -8 .. 7: bin 3 only
    >>> bool(np.allclose(d, 4 * np.exp(2j * np.pi * 3 * np.arange(16) / 16)))
    True
    """
    n = z.size
    if n_d >= n:
        return z.astype(np.complex128)
    spec = scipy.fft.fft(z, workers=1)
    half = n_d // 2
    kept = np.concatenate([spec[:n_d - half], spec[n - half:]]).astype(np.complex128)
    return scipy.fft.ifft(kept, workers=1)


@functools.lru_cache(maxsize=8)
def _half_bin_probes(n: int, block: int) -> np.ndarray:
    """DFT probes of a length-``n`` window at ``d = -1, -0.5, 0, 0.5, 1`` bins, applied to its sums over blocks of
    ``block`` samples (complex64, 5 rows of ``n / block``, read-only): ``exp(-2 pi j d c / n)`` at each block's
    centre ``c``.  Within a bin of 0 Hz a block sum passes a line to within ``(pi / (n / block))^2 / 6`` and
    stops the others it could fold there to ``block / n`` in amplitude (its nulls lie at multiples of
    ``1 / block`` cycles per sample), so the probes see the window's spectrum there as the full sums would."""
    centre = np.arange(n // block) * block + 0.5 * (block - 1)
    d = np.array([-1.0, -0.5, 0.0, 0.5, 1.0])
    probes = np.exp(-2j * math.pi * d[:, None] * centre[None, :] / n).astype(np.complex64)
    probes.flags.writeable = False
    return probes


@functools.lru_cache(maxsize=8)
def _hann(n: int, dtype: type) -> np.ndarray:
    """``numpy.hanning(n)`` as ``dtype``, read-only (the data-line test's window, complex64; the tone test's,
    float32)."""
    w = np.hanning(n).astype(dtype)
    w.flags.writeable = False
    return w


def _without_spikes(p: np.ndarray, width: int = 11) -> np.ndarray:
    """The periodogram ``p`` with narrow lines taken out: bins more than twice the running median over ``width``
    bins (circular), and two bins on each side of them, take that median; every other bin is kept as it is.

    A CW tone in the band (a spur, an interferer) is a line a few bins wide (the Hann window's main lobe spans
    four) that can stand far above the signal's level; correlated with the pulse's energy spectrum it pulls the
    band's centre towards itself (a tone 10 dB under the demo signal, 100 kHz from its carrier, moved the centre
    28 kHz and the carrier was not found).  The averaged periodogram of noise and of a signal's band varies by a
    few per cent from bin to bin and across the median's width by far less than a factor of two except on a
    steep band edge, where a few bins may be evened out; a band's shape is otherwise left exactly as it was.
    """
    n = p.size
    if n < 2 * width:
        return p
    half = width // 2
    # a bin over twice its median is over twice its window's minimum: the medians are needed only there
    low = p.copy()
    for k in range(1, half + 1):
        np.minimum(low, np.roll(p, k), out=low)
        np.minimum(low, np.roll(p, -k), out=low)
    cand = np.flatnonzero(p > 2.0 * low)
    if cand.size == 0:
        return p
    offsets = np.arange(-half, half + 1)

    def median_at(bins: np.ndarray) -> np.ndarray:
        return np.median(p[(bins[:, None] + offsets[None, :]) % n], axis=1)

    spike = cand[p[cand] > 2.0 * median_at(cand)]
    if spike.size == 0:
        return p
    near = np.unique((spike[:, None] + np.arange(-2, 3)[None, :]) % n)
    out = p.copy()
    out[near] = median_at(near)
    return out


def _tone_q(y: np.ndarray, ym: np.ndarray, power: int, offset_hz: float, rate_hz_per_s: float,
            sample_rate_hz: float) -> float:
    """``|a_M| / |a_1|^M``: the line found in ``ym = y^M`` against the M-th power of the line in ``y`` itself.

    ``a_1`` and ``a_M`` are the Hann-weighted means of ``y`` and ``y^M`` rotated by the found carrier (offset
    ``offset_hz`` from ``y``'s centre, Doppler rate ``rate_hz_per_s``) and by ``M`` times it.  For a CW tone
    ``A e^(j phi(t))`` in circular noise both are unbiased, ``E a_1 = A`` and ``E a_M = A^M`` (the noise's
    ``E n^2 = E n^4 = 0``), so the ratio is 1 whatever the tone's level (measured 0.94-1.02 from -10 to +30 dB
    over the noise, tests/test_acquisition_tones.py); for a suppressed-carrier signal ``a_M`` comes from the
    modulation and ``a_1`` from the carrier leakage alone: 3.7-8 for BPSK leaking -10 dB of its power as
    carrier, 30 and more at -20 dB, thousands without leakage; QPSK 15 and more.  Cost: two weighted sums
    (:func:`~pipeline.demod._kernels.dechirped_sum`, about 0.1 ms each on 65536 samples).
    """
    n = y.size
    w = _hann(n, np.float32)
    f_cyc = offset_hz / sample_rate_hz
    r_cyc = rate_hz_per_s / (sample_rate_hz * sample_rate_hz)
    a1 = abs(dechirped_sum(np.ascontiguousarray(y, dtype=np.complex64), w, f_cyc, r_cyc))
    am = abs(dechirped_sum(np.ascontiguousarray(ym, dtype=np.complex64), w, power * f_cyc, power * r_cyc))
    a1 /= float(n) / 2.0  # the Hann window's sum
    am /= float(n) / 2.0
    return am / a1 ** power if a1 > 0.0 else math.inf


#: Dechirping tables of :meth:`CarrierSearch._chirps`, shared by the searches of a process: (sample rate, power,
#: rate range, fine range, window, decimated window, FFT length) -> (rows, rates, bins outside the band); at most 4.
_CHIRP_TABLES: dict[tuple, tuple] = {}


def _decimated_times(n: int, n_d: int, sample_rate_hz: float) -> np.ndarray:
    """Times (s, from the window's centre) of :func:`band_limited`'s ``n_d`` samples of ``n``."""
    return (np.arange(n_d) * (n / n_d) - 0.5 * (n - 1)) / sample_rate_hz


class CarrierSearch:
    """Find a suppressed carrier anywhere in the band, under a Doppler rate, in one window of samples.

    Parameters
    ----------
    sample_rate_hz : float
    power : {2, 4}
        ``M``: 2 removes BPSK modulation, 4 QPSK / OQPSK.
    prefilter : ndarray or None
        Real FIR applied before the ``M``-th power (the matched filter): raises the line over the noise.
    template : ndarray or None
        Real pulse whose energy spectrum is the signal's power spectral density shape (default
        ``prefilter``); used by the coarse stage.
    occupied_hz : float
        Occupied bandwidth of the signal (``R_s (1 + roll-off)`` for RRC).  0 skips the coarse stage
        (band detector and band centre).
    search_hz : float or None
        The carrier is searched within ``+- search_hz`` of 0 Hz; None: the whole band ``+- fs / 2``.
    fine_hz : float
        Half-width of the line search around the coarse estimate.  When ``search_hz <= fine_hz``
        the coarse stage is skipped and the line is searched within ``+- search_hz``.
    max_rate_hz_per_s : float
        Doppler rates within ``+-`` this are searched.
    threshold : float
        Line detection threshold on peak / median.
    symbol_rate_hz : float
        ``R_s``: the data lines of ``x^M`` lie at multiples of it from the carrier's line (below); 0 skips the
        data-line test.
    check_taps : ndarray or None
        Real FIR applied before the ``M``-th power in the data-line test (default ``prefilter``).

    Notes
    -----
    **Coarse** (the band detector; when ``search_hz > fine_hz`` also the band's centre): an averaged
    periodogram of the window (mean removed: a DC offset is never a signal) with ``K >= 32``
    Hann-windowed segments of about 16 samples per symbol, normalised to its median (the noise
    floor, while the signal holds less than half the band), is correlated circularly with the
    template's energy spectrum ``|H(f)|^2``; the maximum within ``+- search_hz`` (parabolically
    refined) is the band centre.  Its height over the median correlation of the positions whose
    template does not overlap the band, in units of the correlation's standard deviation on noise
    ``sqrt(sum |H|^4 / K)``, is a band detector: below 8 the line search is not run (measured on
    white noise: 2.5 on average, 5.4 the largest of 200 windows; a BPSK signal at Es/N0 = -3 dB, 240
    ksym/s at 1 Msample/s: 50 or more). Measured accuracy of the centre: 2 kHz rms at Es/N0 = -0.3
    dB, 0.5 kHz at 10 dB (the data's own spectral fluctuation), so ``fine_hz`` is 5 % of the symbol
    rate in the demodulators.

    **Fine**: the window is rotated to the band centre, matched-filtered, normalised and raised to
    the ``M``-th power; the result is decimated by ``D = fs / (2.5 M fine_hz)`` through an ideal
    low-pass (:func:`band_limited`; the line moves to ``M`` times the residual offset, at most
    ``M fine_hz``; a line outside the band cannot alias into it, as it did through block sums: a BPSK
    carrier 1.5 times the search range away was found at minus the range), and the decimated
    sequence, Hann-windowed and multiplied by ``exp(-j pi M r t^2)`` (``t`` from the window centre)
    for each hypothesised Doppler rate ``r``, is transformed.  The rate grid spacing
    ``4 / (M T_w^2)`` keeps the residual quadratic phase within ``pi / 2`` at the window ends
    (about 1 dB); at most 65 rates.  The best rate's spectrum is computed again with four-fold
    zero padding and its peak refined by a parabola through the log-power; the ratio of the peak
    to the median bin of the searched band is the detection statistic.  A square-law (``M``-th
    power) nonlinearity turns M-PSK into a line at ``M`` times the carrier offset.

    **Data lines** (with ``symbol_rate_hz``): the filtered ``M``-th power is cyclostationary, so besides
    the carrier's line at ``M f_c`` it has lines at ``M f_c + k R_s`` (squared Bi-phase-L after its
    chip-long box: ``k = +-1, +-2, +-4`` at -11.8, -10.3, -22.4 dB, tests/test_biphase_line_search.py).
    Through a prefilter centred away from the carrier a data line can outgrow the carrier's own (the
    mirror image of a spectrally inverted recording 2 R_s away in carrier frequency: the ``k = 4`` line
    of squared Bi-phase-L at 20 ksym/s was found 10 dB over the threshold).  So a line found at
    ``M f`` is tested against the carriers it could be a data line of, ``f - k R_s / M`` for
    ``0 < |k| <= M B T / 2`` (``B`` = ``occupied_hz``, the ``M``-th power's lines within its band): each
    one's own line is measured at ``M f - k R_s`` through ``check_taps`` centred on it (Hann window,
    the found Doppler rate, the best of five probes within a bin), and the line is the carrier's only if
    ``k = 0`` gives the strongest; else ``found`` is False and ``data_line`` True.  Cost, only when a line
    is found: ``2 K + 1`` rotations, filters and ``M``-th powers of the window and 5 dot products each.

    **CW tones** (a receiver spur, an interferer): the coarse stage's periodogram loses its narrow lines
    before the correlation (:func:`_without_spikes`), so a tone cannot pull the band's centre to itself; and
    a found line is refused as a tone (``tone`` True, the line's kind "CW tone") when the ``M``-th power's
    line is the ``M``-th power of a line in the samples themselves (:func:`_tone_q` below :data:`TONE_Q`):
    the square of a tone is a line as BPSK's is, and the loop would lock on it.

    Cost per window of ``N`` samples: one FFT pass of ``N log(16 sps)`` (coarse), the matched
    filter ``N (2 D_mf + 1)``, and ``R`` FFTs of ``N / D`` points for ``R`` rates (65536 samples
    at 240 ksym/s and 1 Msample/s, rates to +-5 kHz/s: about 2 ms coarse, 5 ms fine for BPSK with
    23 rates, 10-20 ms for QPSK with 45; ``bench/bench_acquisition.py``).

    References
    ----------
    F. M. Gardner, *Phaselock Techniques*, 3rd ed., ch. 11 (squaring and Costas loops);
    U. Mengali, A. N. D'Andrea, *Synchronization Techniques for Digital Receivers*, ch. 3 (feedforward
    frequency estimation); P. D. Welch, IEEE Trans. Audio Electroacoust. 15 (1967) 70 (averaged
    periodogram).  Rate search by dechirping: common practice, no published source.
    """

    def __init__(self, *, sample_rate_hz: float, power: int, prefilter: np.ndarray | None = None,
                 template: np.ndarray | None = None, occupied_hz: float = 0.0, search_hz: float | None = None,
                 fine_hz: float, max_rate_hz_per_s: float = 0.0, threshold: float = LINE_THRESHOLD,
                 symbol_rate_hz: float = 0.0, check_taps: np.ndarray | None = None) -> None:
        if power not in (2, 4):
            raise ValueError(f"Argument 'power' must be 2 or 4, not {power!r}.")
        fs = float(sample_rate_hz)
        if not (fs > 0 and math.isfinite(fs)):
            raise ValueError(f"Argument 'sample_rate_hz' must be a positive finite number, not {sample_rate_hz!r}.")
        if not (fine_hz > 0 and math.isfinite(fine_hz)):
            raise ValueError(f"Argument 'fine_hz' must be a positive finite number, not {fine_hz!r}.")
        if search_hz is not None and not (search_hz > 0 and math.isfinite(search_hz)):
            raise ValueError(f"Argument 'search_hz' must be a positive finite number or None, not {search_hz!r}.")
        if not (max_rate_hz_per_s >= 0 and math.isfinite(max_rate_hz_per_s)):
            raise ValueError(f"Argument 'max_rate_hz_per_s' must be >= 0, not {max_rate_hz_per_s!r}.")
        if not (symbol_rate_hz >= 0 and math.isfinite(symbol_rate_hz)):
            raise ValueError(f"Argument 'symbol_rate_hz' must be >= 0, not {symbol_rate_hz!r}.")
        self.sample_rate_hz = fs
        self.power = int(power)
        self.search_hz = min(float(search_hz), 0.5 * fs) if search_hz is not None else 0.5 * fs
        self.prefilter = None if prefilter is None else np.ascontiguousarray(prefilter, dtype=np.float32)
        tpl = template if template is not None else prefilter
        self.occupied_hz = float(occupied_hz)
        self.gate = tpl is not None and 0 < self.occupied_hz < fs  # the band detector can be run
        self.coarse = self.gate and self.search_hz > fine_hz  # the band's centre steers the line search
        self.fine_hz = float(fine_hz) if self.coarse else min(float(fine_hz), self.search_hz)
        self.max_rate_hz_per_s = float(max_rate_hz_per_s)
        self.threshold = float(threshold)
        self.symbol_rate_hz = float(symbol_rate_hz)
        # the data lines of x^M within M/2 occupied bandwidths of the carrier's line: orders 1 .. this (0: no test)
        self.data_line_orders = 0 if self.symbol_rate_hz == 0 else \
            max(1, int(0.5 * self.power * self.occupied_hz / self.symbol_rate_hz + 1e-9))
        taps = check_taps if check_taps is not None else prefilter
        self._check_taps = np.ones(1, np.float32) if taps is None else np.ascontiguousarray(taps, dtype=np.float32)
        # odd symmetric check taps (the matched filter): the data-line test derotates and filters in one pass
        # (condition_block, its table-driven phasor); others (the Bi-phase-L chip's box) through derotate and
        # fir_interleaved
        ct = self._check_taps
        self._check_fused = ct.size % 2 == 1 and bool(np.array_equal(ct, ct[::-1]))
        self._tpl = None if tpl is None else np.asarray(tpl, dtype=np.float64)
        self._tpl_cache: dict[int, tuple[np.ndarray, np.ndarray, float]] = {}

    # ---- public -----------------------------------------------------------------------------
    def search(self, samples: np.ndarray) -> CarrierAcquisition:
        """Search one window (complex, at least 1024 samples); see the class Notes."""
        x = np.asarray(samples)
        if x.ndim != 1 or x.size < 1024 or not np.iscomplexobj(x):
            raise ValueError(f"Argument 'samples' must be complex, one-dimensional, at least 1024 samples, "
                             f"not {x.dtype} {x.shape}.")
        clipped = rails_clipped(x[:_CLIP_LOOK])
        # a receiver DC offset would otherwise square into a false line at 0 Hz
        x = (x - np.mean(x, dtype=np.complex128)).astype(np.complex64)
        band_hz = 0.0
        if self.gate:
            centre, z, excess_db = self._coarse(x)
            if z < _BAND_THRESHOLD_Z:
                return CarrierAcquisition(False, centre, centre, 0.0, centre, SpectralLine(centre, excess_db, "band"))
            if self.coarse:
                band_hz = centre
        return self._fine(x, band_hz, clipped=clipped)

    def search_long(self, samples: np.ndarray, band_hz: float) -> CarrierAcquisition:
        """The line search alone over a long window (complex, at least 1024 samples) around ``band_hz``.

        For a weak carrier the short window's search cannot find (``M = 4`` at Es/N0 below about -1 dB):
        the line's height over the noise floor grows in proportion to the window, so a window ``L``
        times longer raises it by ``10 log10 L`` dB.  The Doppler-rate grid keeps its spacing
        ``4 / (M T_w^2)`` for the long window, so the rates searched are limited to 65 steps of it
        (``+- 64 * 4 / (M T_w^2)``: +-233 Hz/s for ``M = 4`` over 524288 samples at 1 Msample/s) rather
        than widened, and the dechirping rows are formed by repeated multiplication (no table).
        Threshold :data:`LONG_LINE_THRESHOLD`; the result as :meth:`search`'s (``band_hz`` as given: no coarse
        stage).
        """
        x = np.asarray(samples)
        if x.ndim != 1 or x.size < 1024 or not np.iscomplexobj(x):
            raise ValueError(f"Argument 'samples' must be complex, one-dimensional, at least 1024 samples, "
                             f"not {x.dtype} {x.shape}.")
        clipped = rails_clipped(x[:_CLIP_LOOK])
        x = (x - np.mean(x, dtype=np.complex128)).astype(np.complex64)
        return self._fine(x, float(band_hz), long=True, clipped=clipped)

    # ---- stages -----------------------------------------------------------------------------
    def _template(self, nfft: int) -> tuple[np.ndarray, np.ndarray, float]:
        got = self._tpl_cache.get(nfft)
        if got is None:
            h = np.abs(np.fft.fft(self._tpl, max(nfft, self._tpl.size))) ** 2
            if h.size > nfft:  # a template longer than the segment: its spectrum on the segment's grid
                h = h[:: h.size // nfft][:nfft]
            h = h / h.sum()
            got = (h, np.conj(np.fft.fft(h)), float(np.sqrt(np.sum(h * h))))
            self._tpl_cache[nfft] = got
        return got

    def _coarse(self, x: np.ndarray) -> tuple[float, float, float]:
        """Band centre (Hz), band detector z and the band's mean excess (dB) from the averaged periodogram."""
        fs = self.sample_rate_hz
        n = x.size
        nfft = _next_pow2(16.0 * fs / max(self.occupied_hz, 1e-9) * 1.5)  # about 16 samples per symbol at beta 0.5
        nfft = max(64, min(nfft, _next_pow2(n) // 32))
        k_seg = n // nfft
        seg = x[: k_seg * nfft].reshape(k_seg, nfft)
        spec = scipy.fft.fft(seg * np.hanning(nfft).astype(np.float32), axis=1, workers=1)  # single precision
        # narrow lines out: a running median over 11 bins (a tone's Hann lobe spans up to 5), at most a third of
        # the band's width in bins
        band_bins = self.occupied_hz * nfft / fs
        width = int(min(11, max(3, band_bins / 3))) | 1
        p = _without_spikes(np.mean(spec.real.astype(np.float64) ** 2 + spec.imag.astype(np.float64) ** 2, axis=0),
                            width)
        floor = float(np.median(p))
        if floor <= 0:
            return 0.0, 0.0, float("-inf")
        e = p / floor - 1.0
        h, h_fft_conj, h_norm = self._template(nfft)
        c = np.fft.ifft(np.fft.fft(e) * h_fft_conj).real  # c[k] = sum_f e[f] h[f - k]
        freqs = np.fft.fftfreq(nfft, d=1.0 / fs)
        allowed = np.abs(freqs) <= self.search_hz + 0.5 * fs / nfft
        k = int(np.flatnonzero(allowed)[np.argmax(c[allowed])])
        # the correlation's sub-bin peak (a parabola through c itself: c is a smooth hump, not a line)
        lo, mid, hi = c[(k - 1) % nfft], c[k], c[(k + 1) % nfft]
        den = lo - 2.0 * mid + hi
        delta = 0.5 * (lo - hi) / den if den < 0 else 0.0
        f = (k + delta) * fs / nfft
        f = (f + 0.5 * fs) % fs - 0.5 * fs
        if self.search_hz < 0.5 * fs:
            f = min(max(f, -self.search_hz), self.search_hz)
        # reference: positions whose template does not overlap the band
        width = int(math.ceil(self.occupied_hz * nfft / fs)) + 1
        dist = np.abs((np.arange(nfft) - k + nfft // 2) % nfft - nfft // 2)
        far = dist > width
        if np.count_nonzero(far) >= nfft // 8:
            z = (c[k] - float(np.median(c[far]))) / (h_norm / math.sqrt(k_seg))
        else:
            z = math.inf  # the band fills the spectrum: no reference, always search for the line
        excess = max(float(c[k]) / max(float(np.sum(h * h)), 1e-30), 1e-12)
        return float(f), float(z), 10.0 * math.log10(excess)

    def _fine(self, x: np.ndarray, band_hz: float, long: bool = False, clipped: bool = False) -> CarrierAcquisition:
        """The line search (class Notes); ``clipped``: the window's rails are clipped, so the recording's own 0 Hz
        is taken out of the ``M``-th power first, and put back if no line is found without it."""
        if clipped:
            got = self._fine_once(x, band_hz, long, True)
            if got.found or got.data_line or got.tone:
                return got
        return self._fine_once(x, band_hz, long, False)

    def _fine_once(self, x: np.ndarray, band_hz: float, long: bool, no_clip_line: bool) -> CarrierAcquisition:
        fs, m = self.sample_rate_hz, self.power
        n = x.size
        y = np.empty(n, dtype=np.complex64)
        derotate(x, 1.0, 0.0, 2.0 * math.pi * band_hz / fs, 256, y)
        if self.prefilter is not None and self.prefilter.size > 1:
            ntap = self.prefilter.size
            u = np.concatenate([np.zeros(ntap - 1, np.complex64), y])
            fir_interleaved(u.view(np.float32), self.prefilter, y.view(np.float32))
        rms = math.sqrt(float(np.mean(y.real.astype(np.float64) ** 2 + y.imag.astype(np.float64) ** 2)))
        kind = f"x^{m} line"
        if rms == 0.0:
            return CarrierAcquisition(False, band_hz, band_hz, 0.0, band_hz, SpectralLine(band_hz, -math.inf, kind))
        y *= np.float32(1.0 / rms)
        zz = y * y
        if m == 4:
            zz *= zz
        line_band = min(m * self.fine_hz, 0.5 * fs)
        if no_clip_line and m * abs(band_hz) <= line_band:
            # clipped rails: the recording's samples fill a square, whose M-th power has a line at the recording's
            # own 0 Hz (here -M band_hz) whatever the carrier; its projection over the window is taken out
            art = np.exp(-2j * math.pi * (m * band_hz / fs) * np.arange(n)).astype(np.complex64)
            zz -= art * np.complex64(np.vdot(art, zz) / n)
        n_d = n // max(1, int(fs / (2.5 * line_band)))
        zd = band_limited(zz, n_d)
        fs_d = fs * n_d / n
        base = zd * np.hanning(n_d)
        nfft1 = _next_pow2(n_d)
        if long:
            chirps, rates, outside = None, self._rates(n / fs, widen=False), self._outside(fs_d, nfft1)
            t = _decimated_times(n, n_d, fs)
            step = rates[1] - rates[0] if rates.size > 1 else 0.0
            c1 = np.exp(-1j * math.pi * m * step * t * t)
        else:
            chirps, rates, outside = self._chirps(n, n_d, nfft1)
        best_r = 0.0
        if rates.size > 1:
            best_p = -1.0
            base32 = base.astype(np.complex64)
            row = np.exp(-1j * math.pi * m * rates[0] * t * t) if long else None
            for a in range(0, rates.size, 16):
                if long:
                    # rows exp(-j pi M r_k t^2), r_k = r_0 + k step, by repeated multiplication (double precision)
                    rows = np.empty((min(16, rates.size - a), n_d), dtype=np.complex64)
                    for j in range(rows.shape[0]):
                        rows[j] = row
                        row = row * c1
                else:
                    rows = chirps[a:a + 16]
                # single precision is ample to pick the best rate; the chosen one is transformed again below
                spec = scipy.fft.fft(rows * base32, nfft1, axis=1, workers=1)
                p = spec.real ** 2 + spec.imag ** 2
                p[:, outside] = 0.0
                peak = p.max(axis=1)
                j = int(np.argmax(peak))
                if peak[j] > best_p:
                    best_p, best_r = float(peak[j]), float(rates[a + j])
        if best_r:
            t = _decimated_times(n, n_d, fs)
            base = base * np.exp(-1j * math.pi * m * best_r * t * t)
        nfft2 = 4 * nfft1
        spec2 = np.fft.fft(base, nfft2)
        spec2 = spec2.real ** 2 + spec2.imag ** 2
        f2 = np.fft.fftfreq(nfft2, d=1.0 / fs_d)
        band2 = np.flatnonzero(np.abs(f2) <= line_band)
        k = int(band2[np.argmax(spec2[band2])])
        med = float(np.median(spec2[band2]))
        ratio = float(spec2[k] / med) if med > 0 else (math.inf if spec2[k] > 0 else 0.0)
        f_line = (k + _parabolic_peak(spec2, k)) * fs_d / nfft2
        if f_line >= 0.5 * fs_d:
            f_line -= fs_d
        centre = band_hz + f_line / m
        start = centre - best_r * 0.5 * (n - 1) / fs
        level = 10.0 * math.log10(ratio * math.log(2.0)) if ratio > 0 else -math.inf
        threshold = min(self.threshold, LONG_LINE_THRESHOLD) if long else self.threshold
        found = ratio >= threshold
        tone = found and _tone_q(y, zz, m, f_line / m, best_r, fs) < TONE_Q
        if tone:
            # the M-th power's line is the M-th power of a line in the samples themselves: a CW tone, not a
            # suppressed carrier (a spur or an interferer the loop would lock on)
            found, kind = False, "CW tone"
        data_line = False
        if found and self.data_line_orders:
            # the line is the carrier's only if no carrier it could be a data line of shows a stronger line
            data_line = self._data_line_of(x, centre, best_r) != 0
        return CarrierAcquisition(found and not data_line, float(start), float(centre), best_r, band_hz,
                                  SpectralLine(float(centre), level, kind), data_line, tone)

    def _chirps(self, n: int, n_d: int, nfft: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Dechirping rows ``exp(-j pi M r t^2)`` per rate hypothesis, the rates, and the bins outside the band.

        Kept for every search of the process with the same parameters (:data:`_CHIRP_TABLES`): each segment of
        a recording has a receiver of its own, and building the rows took 1.8 ms on the QPSK link (45 rates).
        """
        fs, m = self.sample_rate_hz, self.power
        key = (fs, m, self.max_rate_hz_per_s, self.fine_hz, n, n_d, nfft)
        got = _CHIRP_TABLES.get(key)
        if got is None:
            t = _decimated_times(n, n_d, fs)
            rates = self._rates(n / fs)
            chirps = None
            if rates.size > 1:
                chirps = np.exp(-1j * math.pi * m * rates[:, None] * (t * t)[None, :]).astype(np.complex64)
                chirps.flags.writeable = False
            got = (chirps, rates, self._outside(fs * n_d / n, nfft))
            if len(_CHIRP_TABLES) >= 4:
                _CHIRP_TABLES.clear()
            _CHIRP_TABLES[key] = got
        return got

    def _outside(self, fs_d: float, nfft: int) -> np.ndarray:
        """Bins of the decimated spectrum (sample rate ``fs_d``) outside the band the line can lie in."""
        f1 = np.fft.fftfreq(nfft, d=1.0 / fs_d)
        return np.abs(f1) > min(self.power * self.fine_hz, 0.5 * self.sample_rate_hz)

    def _data_line_of(self, x: np.ndarray, centre_hz: float, rate_hz_per_s: float) -> int:
        """Order ``k`` of the carrier (``centre_hz - k R_s / M``) whose own line is the strongest (see the Notes).

        0: the line found at ``M centre_hz`` is the carrier's own; else it is the ``k``-th data line of a carrier
        whose own line, measured alike, is stronger.
        """
        fs, m = self.sample_rate_hz, self.power
        n = x.size
        # each line within a bin of where it should be: five probes half a bin apart (Hann scalloping <= 0.4 dB),
        # the same for every window of n samples; the window and the found Doppler rate's dechirp apply per call
        block = max(1, n // 4096)  # the probes on block sums: at most 4096 per window (see _half_bin_probes)
        n_b = n // block
        probes = _half_bin_probes(n, block)
        weight = _hann(n, np.complex64)
        if rate_hz_per_s:
            t = (np.arange(n) - 0.5 * (n - 1)) / fs
            weight = weight * np.exp(-1j * math.pi * m * rate_hz_per_s * t * t).astype(np.complex64)
        taps = self._check_taps
        x = np.ascontiguousarray(x, dtype=np.complex64)
        y = np.empty(n, dtype=np.complex64)
        zb = np.empty(n_b, dtype=np.complex64)
        fused = self._check_fused
        table = np.empty(512, dtype=np.float32)
        hist = np.zeros(2 * (taps.size - 1), dtype=np.float32)
        mom = np.empty(4, dtype=np.float64)
        u = None if fused else np.zeros(n + taps.size - 1, dtype=np.complex64)
        orders = [0, *(k for j in range(1, self.data_line_orders + 1) for k in (j, -j))]
        power = []
        for k in orders:
            dphase = 2.0 * math.pi * (centre_hz - k * self.symbol_rate_hz / m) / fs
            if fused:
                phasor_table(dphase, table)
                hist[:] = 0.0
                condition_block(x.view(np.float32), 0.0, 0.0, 1.0, 0.0, dphase, table, taps, hist,
                                y.view(np.float32), mom)
            else:
                derotate(x, 1.0, 0.0, dphase, 256, u[taps.size - 1:])
                fir_interleaved(u.view(np.float32), taps, y.view(np.float32))
            power_block_sums(y, m, weight, block, zb)  # the window's M-th power summed over blocks, in one pass
            v = np.array([np.dot(p, zb) for p in probes])  # row by row: numpy's complex64 matmul can be slow here
            power.append(float(np.max(v.real.astype(np.float64) ** 2 + v.imag.astype(np.float64) ** 2)))
        return orders[int(np.argmax(power))]

    def _rates(self, window_s: float, widen: bool = True) -> np.ndarray:
        """Doppler-rate hypotheses: 0 and +-k s up to the maximum, ``s = 4 / (M T_w^2)``, at most 65
        (``widen``: the spacing widens to reach the maximum; else at most 129, stopping at 64 steps)."""
        r = self.max_rate_hz_per_s
        if r <= 0 or window_s <= 0:
            return np.zeros(1)
        step = 4.0 / (self.power * window_s * window_s)
        half = int(math.ceil(r / step))
        if 2 * half + 1 > (_MAX_RATES if widen else _MAX_RATES_LONG):
            half = ((_MAX_RATES if widen else _MAX_RATES_LONG) - 1) // 2
            if widen:
                step = r / half
        if half == 0:
            return np.zeros(1)
        return np.arange(-half, half + 1) * step


def estimate_carrier_offset(samples: np.ndarray, *, sample_rate_hz: float, power: int, search_hz: float,
                            prefilter: np.ndarray | None = None, threshold: float = LINE_THRESHOLD) -> CarrierEstimate:
    """Estimate a suppressed carrier's frequency offset from the spectral line of ``x^power`` within ``+- search_hz``.

    Parameters
    ----------
    samples : complex ndarray
        Baseband samples (any scale), at least 1024.
    sample_rate_hz : float
        Sample rate.
    power : {2, 4}
        2 removes BPSK modulation, 4 removes QPSK / OQPSK modulation.
    search_hz : float
        The carrier is searched in ``+- search_hz``.
    prefilter : ndarray, optional
        Real FIR applied first (the matched filter), which raises the line-to-noise ratio.
    threshold : float
        Detection threshold on ``peak / median`` of the searched bins.

    Returns
    -------
    CarrierEstimate

    Notes
    -----
    The fine stage of :class:`CarrierSearch` around 0 Hz, with no Doppler rate: mean removed,
    matched filter, ``M``-th power, decimation, Hann-windowed FFT with four-fold zero padding,
    parabolic refinement, divided by ``power``.  Cost O(n log n).

    References
    ----------
    F. M. Gardner, *Phaselock Techniques*, 3rd ed., ch. 11; U. Mengali, A. N. D'Andrea,
    *Synchronization Techniques for Digital Receivers*, ch. 3.

    Examples
    --------
    >>> import numpy as np
    >>> n = np.arange(8192)
    >>> bits = np.repeat(np.random.default_rng(1).integers(0, 2, 2048) * 2 - 1, 4)
    >>> x = bits * np.exp(2j * np.pi * 1234.5 * n / 1e6)
    >>> est = estimate_carrier_offset(x, sample_rate_hz=1e6, power=2, search_hz=20e3)
    >>> est.found, round(est.offset_hz)
    (True, 1234)
    """
    if not search_hz > 0:
        raise ValueError(f"Argument 'search_hz' must be > 0, not {search_hz!r}.")
    x = np.asarray(samples)
    if x.ndim != 1 or x.size < 1024:
        raise ValueError(f"Argument 'samples' must be one-dimensional with at least 1024 samples, not shape {x.shape}.")
    s = CarrierSearch(sample_rate_hz=sample_rate_hz, power=power, prefilter=prefilter, search_hz=search_hz,
                      fine_hz=search_hz, threshold=threshold)
    got = s.search(x.astype(np.complex128))
    return CarrierEstimate(got.centre_hz, 10.0 ** (got.line.level_db / 10.0) / math.log(2.0), got.found)


def spectral_line(y: np.ndarray, *, sample_rate_hz: float, search_hz: float) -> tuple[float, float]:
    """Frequency of the strongest spectral line of ``y`` within ``+- search_hz``, and its peak/median ratio.

    Hann window, zero-padded FFT of twice the length (next power of two), peak bin refined by a
    parabola through the log-power of the peak and its two neighbours.  The ratio is 0 for an
    all-zero input and infinite when the median of the searched bins is 0 but the peak is not.
    Cost O(n log n).
    """
    n = y.size
    nfft = 1 << int(math.ceil(math.log2(2 * n)))
    spec = np.abs(np.fft.fft(y * np.hanning(n), nfft)) ** 2
    freqs = np.fft.fftfreq(nfft, d=1.0 / sample_rate_hz)
    band = np.abs(freqs) <= min(search_hz, 0.5 * sample_rate_hz)
    idx = np.flatnonzero(band)
    k = int(idx[np.argmax(spec[idx])])
    med = float(np.median(spec[idx]))
    if med > 0:
        ratio = float(spec[k] / med)
    else:
        ratio = float("inf") if spec[k] > 0 else 0.0
    f_line = (k + _parabolic_peak(spec, k)) * sample_rate_hz / nfft
    if f_line >= 0.5 * sample_rate_hz:
        f_line -= sample_rate_hz
    return f_line, ratio
