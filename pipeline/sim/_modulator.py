"""Modulator: channel bits -> complex baseband samples at the recording's sample rate.

Symbol positions (the contract with the demodulator)
----------------------------------------------------
The period of one modulation symbol, in samples of the recording, is

    T = sample_rate_hz / (symbol_rate_baud * (1 + clock_offset_ppm * 1e-6))

(a positive ``clock_offset_ppm`` means the transmitter's symbol clock runs fast against the
recorder's sample clock, so symbols are shorter in samples).  Modulation symbol ``k`` (k = 0, 1,
... from the first channel bit) has its pulse peak at the float sample index

    p_k = p_0 + k * T,    p_0 = timing_offset * T

computed in float64 exactly as written.  For OQPSK the Q component of symbol ``k`` peaks half a
symbol later, at ``p_k + T / 2``.  For rectangular pulses the peak is the centre of the rectangle,
which spans ``[p_0 + (k - 1/2) T, p_0 + (k + 1/2) T)`` (each edge evaluated by that one expression,
so the rectangles tile the time axis).

Mapping: a channel bit 0 is +1, a 1 is -1 (the soft-value sign of DEVELOPERS.md).  BPSK sends
one bit per symbol; QPSK and OQPSK send the I bit then the Q bit of each symbol
(``(I + jQ) / sqrt(2)``, Gray by construction since I and Q are mapped independently).

Bi-phase-L (Manchester): channel bit ``k`` is two rectangular chips of half a symbol each, the
level ``+1`` then ``-1`` for a 0 and ``-1`` then ``+1`` for a 1 (CCSDS 401.0-B, from memory, not
confirmed).  ``symbol_rate_baud`` stays the channel-bit rate; chip ``2k`` is centred at ``p_k - T/4``
and chip ``2k + 1`` at ``p_k + T/4``, so ``p_k`` is the centre of the data symbol (its mid-bit
transition).  Bi-phase-L and the residual-carrier modes are rectangular waveforms by definition:
``[link] pulse`` and ``rolloff`` apply only to NRZ suppressed-carrier links.

Residual carrier (:class:`ResidualCarrierModulator`): the sample is ``A exp(j m w(t))`` with the
modulation index ``m`` (``[link] modulation_index``) and ``w`` the rectangular NRZ or Bi-phase-L
waveform (``pcm-pm``) or that waveform times a unit subcarrier ``S(t)`` (``pcm-psk-pm``: a square
wave of levels +-1 or ``sin``).  The subcarrier is coherent with the symbol clock (the same
``clock_offset_ppm``) and starts a cycle at the leading edge of symbol 0,
``psi(n) = (n - p_0 + T/2) f_sc / (R_s T)`` cycles at sample ``n``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from pipeline.profile import LinkSection
from pipeline.sim._kernels import phase_modulate, scatter_pulses, scatter_rect

__all__ = ["rrc_pulse", "ModulatorOutput", "Modulator", "ResidualCarrierModulator", "make_modulator",
           "data_power_fraction"]


def rrc_pulse(x, rolloff: float) -> np.ndarray:
    """Root-raised-cosine pulse ``h(x)`` at times ``x`` in symbol periods, unit energy (int h^2 dx = 1).

    Notes
    -----
    h(x) = [sin(pi x (1-b)) + 4 b x cos(pi x (1+b))] / [pi x (1 - (4 b x)^2)], with the limits
    h(0) = 1 - b + 4 b / pi and h(+-1/(4b)) = b/sqrt(2) [(1 + 2/pi) sin(pi/(4b)) + (1 - 2/pi) cos(pi/(4b))].
    Its square is the raised-cosine spectrum's pulse, so two RRCs in cascade satisfy the Nyquist
    zero-ISI criterion.

    References
    ----------
    J. G. Proakis, M. Salehi, Digital Communications, 5th ed., sec. 9.2 (raised cosine spectrum).
    """
    if not (0.0 < rolloff <= 1.0):
        raise ValueError(f"Argument 'rolloff' must be in (0, 1], not {rolloff}.")
    x = np.asarray(x, dtype=np.float64)
    b = float(rolloff)
    out = np.empty_like(x)
    at0 = np.abs(x) < 1e-12
    at_sing = np.abs(np.abs(x) - 1.0 / (4.0 * b)) < 1e-9
    reg = ~(at0 | at_sing)
    xr = x[reg]
    num = np.sin(np.pi * xr * (1 - b)) + 4 * b * xr * np.cos(np.pi * xr * (1 + b))
    den = np.pi * xr * (1 - (4 * b * xr) ** 2)
    out[reg] = num / den
    out[at0] = 1 - b + 4 * b / np.pi
    out[at_sing] = b / math.sqrt(2) * ((1 + 2 / np.pi) * math.sin(np.pi / (4 * b))
                                       + (1 - 2 / np.pi) * math.cos(np.pi / (4 * b)))
    return out


def _check_clock_args(sample_rate_hz, timing_offset, clock_offset_ppm, amplitude) -> None:
    """The argument checks every modulator shares (one wording for bad calls, STYLE.md rule 6)."""
    for name, value in (("sample_rate_hz", sample_rate_hz), ("timing_offset", timing_offset),
                        ("clock_offset_ppm", clock_offset_ppm), ("amplitude", amplitude)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise TypeError(f"Argument '{name}' must be a finite number, not {value!r}.")
    if sample_rate_hz <= 0:
        raise ValueError(f"Argument 'sample_rate_hz' must be > 0, not {sample_rate_hz}.")
    if timing_offset < 0:
        raise ValueError(f"Argument 'timing_offset' must be >= 0 symbol periods, not {timing_offset}.")
    if not -1000.0 <= clock_offset_ppm <= 1000.0:
        raise ValueError(f"Argument 'clock_offset_ppm' must be -1000..1000, not {clock_offset_ppm}.")
    if amplitude <= 0:
        raise ValueError(f"Argument 'amplitude' must be > 0, not {amplitude}.")


@dataclass(frozen=True)
class ModulatorOutput:
    """Final samples of one :meth:`Modulator.process` call.

    Attributes
    ----------
    samples : complex128 array
        Samples ``sample_start, sample_start + 1, ...`` of the recording (no later symbol touches them).
    sample_start : int
        Absolute sample index of ``samples[0]``.
    first_symbol : int
        Index of the first modulation symbol consumed by this call.
    positions : float64 array
        Peak position ``p_k`` of each symbol consumed by this call (see the module docstring).
    """

    samples: np.ndarray
    sample_start: int
    first_symbol: int
    positions: np.ndarray


class Modulator:
    """BPSK / QPSK / OQPSK with RRC or rectangular pulses at an arbitrary samples-per-symbol ratio.

    Parameters
    ----------
    link :
        ``[link]`` of the profile: modulation, symbol rate, pulse, roll-off.
    sample_rate_hz :
        Sample rate of the recording.
    timing_offset :
        Position of symbol 0 in symbol periods (>= 0), see the module docstring.
    clock_offset_ppm :
        Transmitter symbol clock against the sample clock, parts per million.
    amplitude :
        RMS amplitude of the output: the mean power is ``amplitude**2`` for random data.
    span_symbols :
        The RRC pulse is truncated to +- ``span_symbols`` symbol periods.
    table_step :
        Points per symbol period of the tabulated pulse (linear interpolation in between).

    Notes
    -----
    Each symbol's pulse is added ("scattered") into the samples it reaches; a sample is output
    once no later symbol can reach it, so any split of the bit stream gives the same samples.
    Cost: about ``2 span_symbols T`` multiply-adds per symbol (twice for OQPSK).  The RRC table
    is renormalised so that the truncated pulse keeps unit energy.
    """

    def __init__(self, *, link: LinkSection, sample_rate_hz: float, timing_offset: float = 0.0,
                 clock_offset_ppm: float = 0.0, amplitude: float = 1.0, span_symbols: int = 8,
                 table_step: int = 512):
        if not isinstance(link, LinkSection):
            raise TypeError(f"Argument 'link' must be a LinkSection, not {type(link).__name__}.")
        if link.modulation not in ("bpsk", "qpsk", "oqpsk"):
            raise ValueError(f"Argument 'link' modulation must be bpsk, qpsk or oqpsk for the simulator, "
                             f"not {link.modulation!r}.")
        if link.line_code == "bi-phase-l" and link.modulation != "bpsk":
            raise ValueError(f"Argument 'link' line_code 'bi-phase-l' needs modulation bpsk (or a residual-carrier "
                             f"mode), not {link.modulation!r}.")
        _check_clock_args(sample_rate_hz, timing_offset, clock_offset_ppm, amplitude)
        if not isinstance(span_symbols, int) or not 2 <= span_symbols <= 64:
            raise ValueError(f"Argument 'span_symbols' must be an integer 2..64, not {span_symbols!r}.")
        if not isinstance(table_step, int) or not 16 <= table_step <= 8192:
            raise ValueError(f"Argument 'table_step' must be an integer 16..8192, not {table_step!r}.")
        self.link = link
        self.sample_rate_hz = float(sample_rate_hz)
        self.timing_offset = float(timing_offset)
        self.clock_offset_ppm = float(clock_offset_ppm)
        self.amplitude = float(amplitude)
        self.bits_per_symbol = link.bits_per_symbol
        self.period = self.sample_rate_hz / (link.symbol_rate_baud * (1.0 + self.clock_offset_ppm * 1e-6))
        if self.period < 1.0:
            raise ValueError(f"Argument 'sample_rate_hz' must give at least 1 sample per symbol, not "
                             f"{self.period:.3f} ({sample_rate_hz:g} Hz for {link.symbol_rate_baud:g} baud).")
        self.p0 = self.timing_offset * self.period
        # Bi-phase-L is a rectangular waveform by definition (two half-symbol chips), whatever [link] pulse says
        self.biphase = link.line_code == "bi-phase-l"
        self.rect = link.pulse == "rect" or self.biphase
        self.chip_p0, self.chip_period, self.chips_per_symbol = _chip_layout(self.p0, self.period, self.biphase)
        if self.rect:
            self.half_span = 0.5
            self.table = np.zeros(2, dtype=np.float64)
        else:
            self.half_span = float(span_symbols)
            x = np.arange(2 * span_symbols * table_step + 1, dtype=np.float64) / table_step - span_symbols
            h = rrc_pulse(x, link.rolloff)
            energy = float(np.sum(h * h)) / table_step  # int h^2 dx over the truncated span
            self.table = np.ascontiguousarray(h / math.sqrt(energy))
        self.table_step = table_step
        # the Q rail of OQPSK is half a symbol late
        self.q_shift = 0.5 * self.period if link.modulation == "oqpsk" else 0.0
        self.data_power_fraction = 1.0  # suppressed carrier: all the power carries data
        self.reset()

    def reset(self) -> None:
        """Back to symbol 0 and sample 0, nothing pending."""
        self.symbols_done = 0
        self.base = 0
        self.tail = np.zeros(0, dtype=np.complex128)
        self.pending_bits = np.zeros(0, dtype=np.uint8)

    # ---- positions ---------------------------------------------------------------------------
    def symbol_position(self, k) -> np.ndarray | float:
        """Peak position ``p_0 + k T`` (samples) of modulation symbol ``k`` (scalar or array)."""
        k = np.asarray(k, dtype=np.int64)
        pos = self.p0 + k.astype(np.float64) * self.period
        return float(pos) if pos.ndim == 0 else pos

    def bit_position(self, i) -> np.ndarray | float:
        """Peak position of the pulse carrying channel bit ``i`` (the Q bit of OQPSK is T/2 later)."""
        i = np.asarray(i, dtype=np.int64)
        bps = self.bits_per_symbol
        pos = self.p0 + (i // bps).astype(np.float64) * self.period
        if self.q_shift:
            pos = pos + np.where(i % bps == 1, self.q_shift, 0.0)
        return float(pos) if pos.ndim == 0 else pos

    # ---- processing --------------------------------------------------------------------------
    def _map(self, bits: np.ndarray):
        levels = 1.0 - 2.0 * bits.astype(np.float64)
        if self.bits_per_symbol == 1:
            return levels.astype(np.complex128), None
        s = 1.0 / math.sqrt(2.0)
        i_rail = levels[0::2] * s
        q_rail = levels[1::2] * s
        if self.q_shift:
            return i_rail.astype(np.complex128), (1j * q_rail).astype(np.complex128)
        return (i_rail + 1j * q_rail).astype(np.complex128), None

    def process(self, bits) -> ModulatorOutput:
        """Modulate channel bits (uint8 0/1); QPSK bits left over from an odd count wait for the next call."""
        bits = np.asarray(bits)
        if bits.ndim != 1:
            raise ValueError(f"Argument 'bits' must be 1-D, not {bits.ndim}-D.")
        if bits.size and (not np.issubdtype(bits.dtype, np.integer) and bits.dtype != np.bool_):
            raise TypeError(f"Argument 'bits' must hold integer 0/1 values, not dtype {bits.dtype}.")
        bits = np.ascontiguousarray(bits, dtype=np.uint8)
        if bits.size and bits.max() > 1:
            raise ValueError(f"Argument 'bits' must hold only 0 and 1, not values up to {bits.max()}.")
        if self.pending_bits.size:
            bits = np.concatenate([self.pending_bits, bits])
        bps = self.bits_per_symbol
        m = bits.size // bps
        self.pending_bits = bits[m * bps:].copy()
        k0 = self.symbols_done
        positions = self.symbol_position(np.arange(k0, k0 + m, dtype=np.int64))
        if m == 0:
            return ModulatorOutput(np.zeros(0, np.complex128), self.base, k0, positions)
        main, q_rail = self._map(bits[:m * bps])
        T = self.period
        p_last = self.p0 + (k0 + m - 1) * T + self.q_shift
        end = int(math.floor(p_last + self.half_span * T)) + 2
        buf = np.zeros(max(end - self.base, self.tail.size), dtype=np.complex128)
        buf[:self.tail.size] = self.tail
        amp = self.amplitude
        if self.biphase:
            chips = _biphase_chips(main.real) * amp
            scatter_rect(chips.astype(np.complex128), np.int64(2 * k0), self.chip_p0, self.chip_period, 0.0,
                         np.int64(self.base), buf)
        elif self.rect:
            scatter_rect(main * amp, np.int64(k0), self.p0, T, 0.0, np.int64(self.base), buf)
            if q_rail is not None:
                scatter_rect(q_rail * amp, np.int64(k0), self.p0, T, self.q_shift, np.int64(self.base), buf)
        else:
            scatter_pulses(main * amp, np.int64(k0), self.p0, T, 0.0, self.table, self.table_step, self.half_span,
                           np.int64(self.base), buf)
            if q_rail is not None:
                scatter_pulses(q_rail * amp, np.int64(k0), self.p0, T, self.q_shift, self.table, self.table_step,
                               self.half_span, np.int64(self.base), buf)
        self.symbols_done = k0 + m
        if self.biphase:
            final_end = _next_chip_edge(self.chip_p0, self.chip_period, 2 * (k0 + m))
        elif self.rect:
            # the leading edge of the next symbol, as scatter_rect computes it
            final_end = int(math.ceil(self.p0 + (k0 + m) * T + 0.0 - 0.5 * T))
        else:
            final_end = int(math.ceil(self.p0 + (k0 + m) * T - self.half_span * T))
        n_final = min(max(final_end - self.base, 0), buf.size)
        out = buf[:n_final].copy()
        start = self.base
        self.tail = buf[n_final:].copy()
        self.base += n_final
        return ModulatorOutput(out, start, k0, positions)

    def flush(self) -> ModulatorOutput:
        """Output the samples still reached by already-modulated pulses (the end of the transmission)."""
        out = self.tail.copy()
        start = self.base
        self.base += out.size
        self.tail = np.zeros(0, dtype=np.complex128)
        return ModulatorOutput(out, start, self.symbols_done, np.zeros(0, np.float64))


def _chip_layout(p0: float, period: float, biphase: bool) -> tuple[float, float, int]:
    """Centre of chip 0, chip period and chips per symbol (Bi-phase-L: two half-symbol chips)."""
    if biphase:
        return p0 - 0.25 * period, 0.5 * period, 2
    return p0, period, 1


def _next_chip_edge(chip_p0: float, chip_period: float, chip_index: int) -> int:
    """First sample of chip ``chip_index``, computed exactly as :func:`scatter_rect` computes it."""
    return int(math.ceil(chip_p0 + chip_index * chip_period + 0.0 - 0.5 * chip_period))


def _biphase_chips(levels: np.ndarray) -> np.ndarray:
    """NRZ levels ``d_k`` -> Bi-phase-L chips ``(d_k, -d_k)``: a 0 (+1) is +1 then -1."""
    chips = np.empty(2 * levels.size, dtype=np.float64)
    chips[0::2] = levels
    chips[1::2] = -levels
    return chips


def data_power_fraction(link: LinkSection) -> float:
    """Fraction of the transmitted power that carries data (the power Eb/N0 and Es/N0 refer to).

    Returns
    -------
    float
        1 for suppressed-carrier modes; ``sin^2(m)`` for ``pcm-pm`` and for ``pcm-psk-pm`` with a
        square-wave subcarrier; ``2 J1(m)^2`` for a sine-wave subcarrier.

    Notes
    -----
    Phase modulation by a +-1 waveform ``w``: ``exp(j m w) = cos m + j w sin m``, so the carrier keeps
    ``cos^2 m`` of the power and the data ``sin^2 m``.  A sine subcarrier: the Jacobi-Anger expansion
    ``exp(j m sin x) = sum_n J_n(m) exp(j n x)`` leaves ``J0(m)^2`` in the carrier and ``2 J1(m)^2`` in
    the two first-harmonic data sidebands; the higher harmonics (the rest) are not counted as data
    power, since the receiver correlates with the first harmonic only.

    References
    ----------
    J. H. Yuen (ed.), *Deep Space Telecommunications Systems Engineering*, JPL/Plenum 1983, ch. 5
    (residual-carrier power division); M. K. Simon, S. Million, *Residual versus suppressed-carrier
    coherent communications*, JPL TDA Progress Report 42-127 (1996), sec. II.  Both from memory, not
    confirmed; the Bessel expansion itself is textbook (Abramowitz & Stegun 9.1.41).
    """
    if link.modulation == "pcm-pm" or (link.modulation == "pcm-psk-pm" and link.subcarrier_wave == "square"):
        return math.sin(link.modulation_index_rad) ** 2
    if link.modulation == "pcm-psk-pm":
        from scipy.special import j1

        return 2.0 * float(j1(link.modulation_index_rad)) ** 2
    return 1.0


class ResidualCarrierModulator:
    """PCM/PM and PCM/PSK/PM (square or sine subcarrier) with NRZ or Bi-phase-L data, streaming.

    Parameters
    ----------
    link :
        ``[link]``: ``modulation`` ``"pcm-pm"`` or ``"pcm-psk-pm"``, symbol rate, line code,
        ``modulation_index_rad``, ``subcarrier_hz`` and ``subcarrier_wave``.
    sample_rate_hz, timing_offset, clock_offset_ppm, amplitude :
        As :class:`Modulator`; the output has constant envelope ``amplitude``.

    Notes
    -----
    The data waveform is built as rectangular chips (one per NRZ symbol, two per Bi-phase-L
    symbol, see the module docstring) by :func:`scatter_rect`, then phase modulated by
    :func:`phase_modulate`.  A sample is output once no later chip reaches it, so any split of
    the bit stream gives the same samples.  Cost: O(1) per sample (one sine and cosine).
    ``data_power_fraction`` is the part of ``amplitude**2`` Eb/N0 refers to
    (:func:`data_power_fraction`).
    """

    def __init__(self, *, link: LinkSection, sample_rate_hz: float, timing_offset: float = 0.0,
                 clock_offset_ppm: float = 0.0, amplitude: float = 1.0):
        if not isinstance(link, LinkSection):
            raise TypeError(f"Argument 'link' must be a LinkSection, not {type(link).__name__}.")
        if link.modulation not in ("pcm-pm", "pcm-psk-pm"):
            raise ValueError(f"Argument 'link' modulation must be pcm-pm or pcm-psk-pm for the residual-carrier "
                             f"modulator, not {link.modulation!r}.")
        _check_clock_args(sample_rate_hz, timing_offset, clock_offset_ppm, amplitude)
        if not 0.0 < link.modulation_index_rad < math.pi / 2:
            raise ValueError(f"Argument 'link' modulation_index_rad must be in (0, pi/2), "
                             f"not {link.modulation_index_rad}.")
        self.link = link
        self.sample_rate_hz = float(sample_rate_hz)
        self.timing_offset = float(timing_offset)
        self.clock_offset_ppm = float(clock_offset_ppm)
        self.amplitude = float(amplitude)
        self.bits_per_symbol = 1
        self.period = self.sample_rate_hz / (link.symbol_rate_baud * (1.0 + self.clock_offset_ppm * 1e-6))
        self.biphase = link.line_code == "bi-phase-l"
        min_samples = 4.0 if self.biphase else 2.0
        if self.period < min_samples:
            raise ValueError(f"Argument 'sample_rate_hz' must give at least {min_samples:g} samples per symbol, not "
                             f"{self.period:.3f} ({sample_rate_hz:g} Hz for {link.symbol_rate_baud:g} baud).")
        self.p0 = self.timing_offset * self.period
        self.half_span = 0.5
        self.rect = True
        self.q_shift = 0.0
        self.chip_p0, self.chip_period, self.chips_per_symbol = _chip_layout(self.p0, self.period, self.biphase)
        self.index_rad = float(link.modulation_index_rad)
        if link.modulation == "pcm-psk-pm":
            if not link.subcarrier_hz > 0:
                raise ValueError(f"Argument 'link' subcarrier_hz must be > 0 for pcm-psk-pm, not {link.subcarrier_hz}.")
            self.subcarrier_mode = 1 if link.subcarrier_wave == "square" else 2
            # cycles of subcarrier per sample: coherent with the (clock-offset) symbol clock
            self.subcarrier_cycles_per_sample = link.subcarrier_hz / (link.symbol_rate_baud * self.period)
            if self.subcarrier_cycles_per_sample >= 0.25:
                raise ValueError(f"Argument 'sample_rate_hz' must give at least 4 samples per subcarrier cycle, not "
                                 f"{1.0 / self.subcarrier_cycles_per_sample:.3f}.")
            self.subcarrier_phase0_cycles = -(self.p0 - 0.5 * self.period) * self.subcarrier_cycles_per_sample
        else:
            self.subcarrier_mode = 0
            self.subcarrier_cycles_per_sample = 0.0
            self.subcarrier_phase0_cycles = 0.0
        self.data_power_fraction = data_power_fraction(link)
        self.reset()

    def reset(self) -> None:
        """Back to symbol 0 and sample 0, nothing pending."""
        self.symbols_done = 0
        self.base = 0
        self.tail = np.zeros(0, dtype=np.float64)

    def symbol_position(self, k) -> np.ndarray | float:
        """Centre ``p_0 + k T`` (samples) of data symbol ``k`` (scalar or array)."""
        k = np.asarray(k, dtype=np.int64)
        pos = self.p0 + k.astype(np.float64) * self.period
        return float(pos) if pos.ndim == 0 else pos

    bit_position = symbol_position

    def process(self, bits) -> ModulatorOutput:
        """Modulate channel bits (uint8 0/1); see :meth:`Modulator.process`."""
        bits = np.asarray(bits)
        if bits.ndim != 1:
            raise ValueError(f"Argument 'bits' must be 1-D, not {bits.ndim}-D.")
        if bits.size and (not np.issubdtype(bits.dtype, np.integer) and bits.dtype != np.bool_):
            raise TypeError(f"Argument 'bits' must hold integer 0/1 values, not dtype {bits.dtype}.")
        bits = np.ascontiguousarray(bits, dtype=np.uint8)
        if bits.size and bits.max() > 1:
            raise ValueError(f"Argument 'bits' must hold only 0 and 1, not values up to {bits.max()}.")
        m = bits.size
        k0 = self.symbols_done
        positions = self.symbol_position(np.arange(k0, k0 + m, dtype=np.int64))
        if m == 0:
            return ModulatorOutput(np.zeros(0, np.complex128), self.base, k0, positions)
        levels = 1.0 - 2.0 * bits.astype(np.float64)
        chips = _biphase_chips(levels) if self.biphase else levels
        cps = self.chips_per_symbol
        T = self.period
        end = int(math.floor(self.p0 + (k0 + m - 1) * T + 0.5 * T)) + 2
        buf = np.zeros(max(end - self.base, self.tail.size), dtype=np.float64)
        buf[:self.tail.size] = self.tail
        scatter_rect(chips, np.int64(cps * k0), self.chip_p0, self.chip_period, 0.0, np.int64(self.base), buf)
        self.symbols_done = k0 + m
        final_end = _next_chip_edge(self.chip_p0, self.chip_period, cps * (k0 + m))
        n_final = min(max(final_end - self.base, 0), buf.size)
        start = self.base
        out = self._modulate(buf[:n_final], start)
        self.tail = buf[n_final:].copy()
        self.base += n_final
        return ModulatorOutput(out, start, k0, positions)

    def _modulate(self, levels: np.ndarray, start: int) -> np.ndarray:
        out = np.empty(levels.size, dtype=np.complex128)
        phase_modulate(np.ascontiguousarray(levels), np.int64(start), self.index_rad, self.subcarrier_mode,
                       self.subcarrier_cycles_per_sample, self.subcarrier_phase0_cycles, self.amplitude, out)
        return out

    def flush(self) -> ModulatorOutput:
        """Output the samples still reached by already-modulated chips (the end of the transmission)."""
        start = self.base
        out = self._modulate(self.tail, start)
        self.base += self.tail.size
        self.tail = np.zeros(0, dtype=np.float64)
        return ModulatorOutput(out, start, self.symbols_done, np.zeros(0, np.float64))


def make_modulator(*, link: LinkSection, sample_rate_hz: float, timing_offset: float = 0.0,
                   clock_offset_ppm: float = 0.0, amplitude: float = 1.0):
    """The modulator for ``link.modulation``: :class:`ResidualCarrierModulator` or :class:`Modulator`."""
    cls = ResidualCarrierModulator if getattr(link, "modulation", None) in ("pcm-pm", "pcm-psk-pm") else Modulator
    return cls(link=link, sample_rate_hz=sample_rate_hz, timing_offset=timing_offset,
               clock_offset_ppm=clock_offset_ppm, amplitude=amplitude)
