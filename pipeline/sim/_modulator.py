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
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from pipeline.profile import LinkSection
from pipeline.sim._kernels import scatter_pulses, scatter_rect

__all__ = ["rrc_pulse", "ModulatorOutput", "Modulator"]


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
        if link.line_code == "bi-phase-l":
            raise ValueError("Argument 'link' line_code must be nrz-l or nrz-m for the simulator, not 'bi-phase-l'.")
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
        self.rect = link.pulse == "rect"
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
        if self.rect:
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
        if self.rect:
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
