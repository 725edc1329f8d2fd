"""Channel model: carrier offset, Doppler, phase noise, fades and dropouts, AWGN at a given Es/N0.

For input samples ``x[n]`` (sample ``n`` at time ``t = n / fs`` of the recording) the output is

    y[n] = x[n] g(t) exp(j (2 pi c(t) + theta[n])) + w[n]

- ``c(t) = phase0 / (2 pi) + f0 t + r t^2 / 2 + c_pass(t)`` cycles: a carrier offset ``f0``, a
  constant Doppler rate ``r`` and optionally a pass profile (:class:`DopplerPass`);
- ``theta`` a stationary Gauss-Markov phase noise of RMS ``phase_noise_rad`` and corner
  ``phase_noise_bandwidth_hz``;
- ``g(t) = 10^(-depth_db / 20)`` inside each fade ``(start_s, duration_s, depth_db)``, else 1;
- ``w`` circular complex white Gaussian noise, ``E|w|^2 = N0 fs``.

Es/N0 definition: ``Es = P T / fs`` is the energy of one modulation symbol of the unfaded input
(mean power ``P``, symbol period ``T`` samples) and ``N0`` the one-sided noise density, so the
noise variance per complex sample is ``sigma^2 = N0 fs = P T / (Es/N0)``.  A fade lowers Es
without changing N0.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from pipeline.sim._kernels import apply_channel_kernel, ou_phase_noise

__all__ = ["DopplerPass", "Fade", "Channel", "noise_variance_per_sample"]


@dataclass(frozen=True)
class DopplerPass:
    """A simple pass: straight-line flight past the station at constant speed.

    The Doppler shift is ``f(t) = -peak_hz (t - tca_s) / sqrt(tau_s^2 + (t - tca_s)^2)``: ``+peak_hz``
    long before closest approach, 0 at ``tca_s``, ``-peak_hz`` long after, with the steepest rate
    ``-peak_hz / tau_s`` at closest approach.  (The range rate of a straight-line pass at miss
    distance ``d`` and speed ``v`` is ``v^2 u / sqrt(d^2 + v^2 u^2)``, so ``tau = d / v``.)
    """

    peak_hz: float
    tca_s: float
    tau_s: float

    def __post_init__(self):
        for name in ("peak_hz", "tca_s", "tau_s"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise TypeError(f"Argument '{name}' must be a finite number, not {v!r}.")
        if self.tau_s <= 0:
            raise ValueError(f"Argument 'tau_s' must be > 0, not {self.tau_s}.")

    def cycles(self, t: np.ndarray) -> np.ndarray:
        """Phase in cycles, zero at t = 0: the integral of f(t)."""
        u = t - self.tca_s
        return -self.peak_hz * (np.sqrt(self.tau_s ** 2 + u * u) - math.hypot(self.tau_s, self.tca_s))

    def frequency_hz(self, t):
        u = np.asarray(t, dtype=np.float64) - self.tca_s
        return -self.peak_hz * u / np.sqrt(self.tau_s ** 2 + u * u)


@dataclass(frozen=True)
class Fade:
    """A fade: the signal is attenuated by ``depth_db`` from ``start_s`` for ``duration_s`` (inf = dropout)."""

    start_s: float
    duration_s: float
    depth_db: float

    def __post_init__(self):
        if not (math.isfinite(self.start_s) and self.start_s >= 0):
            raise ValueError(f"Argument 'fades' start_s must be finite and >= 0, not {self.start_s}.")
        if not (math.isfinite(self.duration_s) and self.duration_s > 0):
            raise ValueError(f"Argument 'fades' duration_s must be finite and > 0, not {self.duration_s}.")
        if math.isnan(self.depth_db) or self.depth_db < 0:
            raise ValueError(f"Argument 'fades' depth_db must be >= 0, not {self.depth_db}.")

    @property
    def gain(self) -> float:
        return 0.0 if math.isinf(self.depth_db) else 10.0 ** (-self.depth_db / 20.0)


def noise_variance_per_sample(*, signal_power: float, symbol_period_samples: float, esn0_db: float) -> float:
    """``sigma^2 = E|w|^2 = P T / (Es/N0)``: complex noise variance per sample for a given Es/N0."""
    return signal_power * symbol_period_samples / 10.0 ** (esn0_db / 10.0)


def _finite(name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)) \
            or not math.isfinite(value):
        raise TypeError(f"Argument '{name}' must be a finite number, not {value!r}.")
    return float(value)


class Channel:
    """Streaming channel (see the module docstring for the model).

    Parameters
    ----------
    sample_rate_hz :
        Sample rate of the recording.
    noise_variance :
        ``E|w|^2`` per complex sample (see :func:`noise_variance_per_sample`); 0 = no noise.
    carrier_offset_hz, doppler_rate_hz_per_s :
        Frequency at t = 0 and its constant rate of change.
    doppler_pass :
        An optional :class:`DopplerPass` added on top.
    phase0_rad :
        Carrier phase at t = 0.
    phase_noise_rad, phase_noise_bandwidth_hz :
        RMS and corner frequency of the phase noise (0 = none).
    fades :
        ``(start_s, duration_s, depth_db)`` triples or :class:`Fade` objects.
    seed :
        Seed of the noise and phase-noise generators (independent streams).

    Notes
    -----
    The deterministic phase is evaluated in closed form at every absolute sample index (no
    accumulated rounding over an hour); the random parts draw one value per sample from their own
    generators, so any chunking gives the same output.  O(1) work per sample.
    """

    def __init__(self, *, sample_rate_hz: float, noise_variance: float = 0.0, carrier_offset_hz: float = 0.0,
                 doppler_rate_hz_per_s: float = 0.0, doppler_pass: DopplerPass | None = None, phase0_rad: float = 0.0,
                 phase_noise_rad: float = 0.0, phase_noise_bandwidth_hz: float = 100.0,
                 fades: Iterable = (), seed: int = 0):
        self.sample_rate_hz = _finite("sample_rate_hz", sample_rate_hz)
        if self.sample_rate_hz <= 0:
            raise ValueError(f"Argument 'sample_rate_hz' must be > 0, not {sample_rate_hz}.")
        self.noise_variance = _finite("noise_variance", noise_variance)
        if self.noise_variance < 0:
            raise ValueError(f"Argument 'noise_variance' must be >= 0, not {noise_variance}.")
        self.carrier_offset_hz = _finite("carrier_offset_hz", carrier_offset_hz)
        self.doppler_rate_hz_per_s = _finite("doppler_rate_hz_per_s", doppler_rate_hz_per_s)
        if doppler_pass is not None and not isinstance(doppler_pass, DopplerPass):
            raise TypeError(f"Argument 'doppler_pass' must be a DopplerPass or None, "
                            f"not {type(doppler_pass).__name__}.")
        self.doppler_pass = doppler_pass
        self.phase0_rad = _finite("phase0_rad", phase0_rad)
        self.phase_noise_rad = _finite("phase_noise_rad", phase_noise_rad)
        if self.phase_noise_rad < 0:
            raise ValueError(f"Argument 'phase_noise_rad' must be >= 0, not {phase_noise_rad}.")
        self.phase_noise_bandwidth_hz = _finite("phase_noise_bandwidth_hz", phase_noise_bandwidth_hz)
        if not 0 < self.phase_noise_bandwidth_hz < self.sample_rate_hz / 2:
            raise ValueError(f"Argument 'phase_noise_bandwidth_hz' must be in (0, fs/2), "
                             f"not {phase_noise_bandwidth_hz}.")
        fl = []
        for f in fades:
            if isinstance(f, Fade):
                fl.append(f)
            else:
                try:
                    start, dur, depth = f
                except (TypeError, ValueError):
                    raise TypeError(f"Argument 'fades' must hold (start_s, duration_s, depth_db) triples, "
                                    f"not {f!r}.") from None
                fl.append(Fade(float(start), float(dur), float(depth)))
        self.fades = tuple(fl)
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
            raise TypeError(f"Argument 'seed' must be an integer, not {seed!r}.")
        self.seed = int(seed)
        self._pn_a = math.exp(-2.0 * math.pi * self.phase_noise_bandwidth_hz / self.sample_rate_hz)
        self._pn_b = self.phase_noise_rad * math.sqrt(1.0 - self._pn_a ** 2)
        self.reset()

    def reset(self) -> None:
        """Back to sample 0 with fresh random generators."""
        ss = np.random.SeedSequence([self.seed, 0xC4A7])
        noise_ss, pn_ss, pn0_ss = ss.spawn(3)
        self._noise_rng = np.random.default_rng(noise_ss)
        self._pn_rng = np.random.default_rng(pn_ss)
        # start the phase noise in its stationary distribution
        self._pn_state = float(np.random.default_rng(pn0_ss).standard_normal()) * self.phase_noise_rad
        self.samples_done = 0

    # ---- deterministic parts -----------------------------------------------------------------
    def cycles(self, n: np.ndarray) -> np.ndarray:
        """Deterministic carrier phase in cycles at absolute sample indices ``n``."""
        t = np.asarray(n, dtype=np.float64) / self.sample_rate_hz
        c = self.phase0_rad / (2 * math.pi) + self.carrier_offset_hz * t + 0.5 * self.doppler_rate_hz_per_s * t * t
        if self.doppler_pass is not None:
            c = c + self.doppler_pass.cycles(t)
        return c

    def frequency_hz(self, position):
        """Instantaneous carrier frequency offset (Hz) at a sample position (scalar or array)."""
        t = np.asarray(position, dtype=np.float64) / self.sample_rate_hz
        f = self.carrier_offset_hz + self.doppler_rate_hz_per_s * t
        if self.doppler_pass is not None:
            f = f + self.doppler_pass.frequency_hz(t)
        return float(f) if np.ndim(f) == 0 else f

    def gain(self, n: np.ndarray) -> np.ndarray:
        """Amplitude gain of the fades at absolute sample indices ``n``."""
        t = np.asarray(n, dtype=np.float64) / self.sample_rate_hz
        g = np.ones(t.shape, dtype=np.float64)
        for f in self.fades:
            inside = (t >= f.start_s) & (t < f.start_s + f.duration_s)
            g[inside] *= f.gain
        return g

    # ---- processing --------------------------------------------------------------------------
    def process(self, samples) -> np.ndarray:
        """Pass the next samples of the recording through the channel; returns complex128 samples."""
        x = np.ascontiguousarray(samples, dtype=np.complex128)
        if x.ndim != 1:
            raise ValueError(f"Argument 'samples' must be 1-D, not {x.ndim}-D.")
        m = x.size
        n = np.arange(self.samples_done, self.samples_done + m, dtype=np.int64)
        cycles = np.ascontiguousarray(self.cycles(n))
        gain = np.ascontiguousarray(self.gain(n))
        theta = np.zeros(m, dtype=np.float64)
        if self.phase_noise_rad > 0:
            normals = self._pn_rng.standard_normal(m)
            self._pn_state = float(ou_phase_noise(normals, self._pn_a, self._pn_b, self._pn_state, theta))
        if self.noise_variance > 0:
            w = self._noise_rng.standard_normal(2 * m).view(np.complex128) * math.sqrt(self.noise_variance / 2.0)
        else:
            w = np.zeros(m, dtype=np.complex128)
        out = np.empty(m, dtype=np.complex128)
        apply_channel_kernel(x, cycles, theta, gain, w, out)
        self.samples_done += m
        return out
