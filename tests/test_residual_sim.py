"""pipeline.sim: the residual-carrier modes (PCM/PM, PCM/PSK/PM) and Bi-phase-L (issue 8)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy.special import j0, j1

from pipeline.profile import ApidTraffic, LinkProfile, LinkSection, SimulateSection
from pipeline.sim import Modulator, ResidualCarrierModulator, data_power_fraction, make_modulator, simulate
from pipeline.sim._kernels import phase_modulate

FS = 200_000.0


def _link(modulation="pcm-psk-pm", line="nrz-l", wave="square", index=1.1, rate=2000.0, sc=16000.0):
    return LinkSection(modulation=modulation, symbol_rate_baud=rate, line_code=line, modulation_index_rad=index,
                       subcarrier_hz=sc, subcarrier_wave=wave, pulse="rect")


def _samples(link, bits, **kw):
    mod = make_modulator(link=link, sample_rate_hz=FS, **kw)
    return mod, np.concatenate([mod.process(bits).samples, mod.flush().samples])


@pytest.mark.kat
def test_phase_modulate_kernel_formula(rng):
    levels = 1.0 - 2.0 * rng.integers(0, 2, 300).astype(np.float64)
    n0, m, cps, ph0 = 1234, 0.8, 0.0731, 0.21
    psi = ph0 + (n0 + np.arange(300)) * cps
    frac = psi - np.floor(psi)
    for mode, sub in ((0, np.ones(300)), (1, np.where(frac < 0.5, 1.0, -1.0)), (2, np.sin(2 * np.pi * frac))):
        out = np.empty(300, dtype=np.complex128)
        phase_modulate(levels, n0, m, mode, cps, ph0, 0.5, out)
        np.testing.assert_allclose(out, 0.5 * np.exp(1j * m * levels * sub), atol=1e-12)


@pytest.mark.kat
@pytest.mark.parametrize("line", ["nrz-l", "bi-phase-l"])
def test_residual_modulator_waveform(rng, line):
    # PCM/PM with rectangular data: every sample is exp(j m w), w the NRZ level or the Bi-phase-L chip
    link = _link("pcm-pm", line=line, rate=10_000.0)
    bits = rng.integers(0, 2, 50).astype(np.uint8)
    mod, x = _samples(link, bits, timing_offset=0.3)
    T = mod.period
    k = np.arange(50)
    d = 1.0 - 2.0 * bits
    for offset, sign in ((-0.25, 1.0), (0.25, -1.0 if line == "bi-phase-l" else 1.0)):
        n = np.rint(mod.symbol_position(k) + offset * T).astype(int)
        # a 0 is +1 then -1 in Bi-phase-L (CCSDS 401.0-B, from memory, not confirmed)
        np.testing.assert_allclose(x[n], np.exp(1j * 1.1 * sign * d), atol=1e-12)
    assert np.allclose(np.abs(x), 1.0)  # constant envelope


@pytest.mark.kat
def test_bpsk_biphase_modulator_chips(rng):
    link = LinkSection(modulation="bpsk", symbol_rate_baud=10_000.0, line_code="bi-phase-l")
    bits = rng.integers(0, 2, 40).astype(np.uint8)
    mod, x = _samples(link, bits, timing_offset=0.4, amplitude=2.0)
    d = 1.0 - 2.0 * bits
    T = mod.period
    first = np.rint(mod.symbol_position(np.arange(40)) - 0.25 * T).astype(int)
    second = np.rint(mod.symbol_position(np.arange(40)) + 0.25 * T).astype(int)
    np.testing.assert_allclose(x[first], 2.0 * d, atol=1e-12)
    np.testing.assert_allclose(x[second], -2.0 * d, atol=1e-12)
    with pytest.raises(ValueError, match="line_code 'bi-phase-l' needs modulation bpsk"):
        Modulator(link=LinkSection(modulation="qpsk", line_code="bi-phase-l"), sample_rate_hz=FS)


@pytest.mark.parametrize("line,wave", [("nrz-l", "square"), ("bi-phase-l", "square"), ("nrz-m", "sine")])
def test_residual_modulator_chunking_invariance(rng, line, wave):
    link = _link(line=line, wave=wave)
    bits = rng.integers(0, 2, 3000).astype(np.uint8)
    mod, ref = _samples(link, bits, timing_offset=0.37, clock_offset_ppm=20.0)
    mod.reset()
    cuts = np.sort(rng.choice(np.arange(1, 3000), 12, replace=False))
    parts, starts = [], []
    for a, b in zip([0, *cuts], [*cuts, 3000]):
        o = mod.process(bits[a:b])
        starts.append(o.sample_start)
        parts.append(o.samples)
    parts.append(mod.flush().samples)
    got = np.concatenate(parts)
    np.testing.assert_array_equal(got, ref)
    assert starts == sorted(starts)


@pytest.mark.parametrize("modulation,line,wave", [("pcm-pm", "nrz-l", "square"), ("pcm-pm", "bi-phase-l", "square"),
                                                   ("pcm-psk-pm", "nrz-l", "square"), ("pcm-psk-pm", "nrz-l", "sine")])
@pytest.mark.parametrize("index", [0.5, 1.1])
def test_carrier_suppression_and_data_power(rng, modulation, line, wave, index):
    link = _link(modulation, line=line, wave=wave, index=index)
    bits = rng.integers(0, 2, 4000).astype(np.uint8)
    mod, x = _samples(link, bits, timing_offset=0.5)  # symbol k spans samples [100 k, 100 k + 100)
    total = float(np.mean(np.abs(x) ** 2))
    carrier = abs(complex(np.mean(x))) ** 2 / total
    sine = modulation == "pcm-psk-pm" and wave == "sine"
    # textbook phase modulation by a +-1 waveform: exp(j m w) = cos m + j w sin m, the carrier keeps cos^2 m
    # and the data sin^2 m; a sine subcarrier: exp(j m sin x) = sum J_n(m) exp(j n x) (Jacobi-Anger,
    # Abramowitz & Stegun 9.1.41), carrier J0(m)^2, first-harmonic data sidebands 2 J1(m)^2
    expect_carrier = j0(index) ** 2 if sine else math.cos(index) ** 2
    assert carrier == pytest.approx(expect_carrier, abs=0.005)
    if not sine:
        assert 1.0 - carrier == pytest.approx(math.sin(index) ** 2, abs=0.005)
        assert data_power_fraction(link) == pytest.approx(math.sin(index) ** 2, abs=1e-15)
    else:
        # the sidebands at +-f_sc: correlate the carrier-removed signal with the subcarrier's first harmonic;
        # 16 kHz / 2 ksym/s is 8 whole cycles per symbol, so the data sign is one per 100 samples
        n = np.arange(x.size)
        psi = mod.subcarrier_phase0_cycles + n * mod.subcarrier_cycles_per_sample
        q = x.imag  # odd harmonics: d sin(m sin x) = 2 d sum_odd J_k(m) sin(k x)
        first = 2.0 * q * np.sin(2 * np.pi * psi)  # 2 J1(m) d per sample, after averaging over the symbol
        per_symbol = first[: 100 * (x.size // 100)].reshape(-1, 100).mean(axis=1)
        sideband_power = float(np.mean(per_symbol ** 2)) / 2.0  # amplitude 2 J1 d -> power (2 J1)^2 / 2
        assert sideband_power == pytest.approx(2.0 * j1(index) ** 2, rel=0.01)
        assert data_power_fraction(link) == pytest.approx(2.0 * j1(index) ** 2, rel=1e-12)


def _profile(modulation="pcm-psk-pm", line="nrz-l", wave="square", seconds=0.6):
    base = LinkProfile(simulate=SimulateSection(
        traffic=(ApidTraffic(apid=100, length=30, rate_hz=5.0),), seconds=seconds, sample_rate_hz=FS,
        carrier_offset_hz=800.0, clock_offset_ppm=0.0))
    return base.with_changes(
        link={"modulation": modulation, "symbol_rate_baud": 8000.0, "line_code": line, "pulse": "rect",
              "modulation_index_rad": 1.0, "subcarrier_hz": 32000.0, "subcarrier_wave": wave,
              "downlink_frequency_hz": 8.4125e9},
        coding={"convolutional": "none", "reed_solomon": 0, "randomizer": True},
        frames={"length": 64, "ocf": False, "fecf": True})


@pytest.mark.parametrize("modulation,wave", [("pcm-psk-pm", "square"), ("pcm-psk-pm", "sine"), ("pcm-pm", "square")])
def test_simulate_noise_refers_to_the_data_power(tmp_path, modulation, wave):
    prof = _profile(modulation, wave=wave)
    ebn0 = 6.0
    clean = simulate(prof, tmp_path / "clean", ebn0_db=ebn0, noise=False, seed=3)
    noisy = simulate(prof, tmp_path / "noisy", ebn0_db=ebn0, seed=3)
    from pipeline.recording import open_recording

    a = open_recording(clean.meta_path).read().samples.astype(np.complex128)
    b = open_recording(noisy.meta_path).read().samples.astype(np.complex128)
    # same seed: the same signal, scaled by the noisy recording's smaller amplitude (0.35 RMS of the total)
    scale = float(np.vdot(a, b).real / np.vdot(a, a).real)
    w = b - scale * a
    p_data = data_power_fraction(prof.link) * scale ** 2 * float(np.mean(np.abs(a) ** 2))
    T = noisy.symbol_period_samples
    esn0_measured = 10 * math.log10(p_data * T / float(np.mean(np.abs(w) ** 2)))
    # Es/N0 = Eb/N0 + 10 log10(code rate) (DESIGN.md), Es = P_data T / fs, sigma^2 = N0 fs (pipeline.sim._channel)
    assert esn0_measured == pytest.approx(noisy.esn0_db, abs=0.05)
    assert noisy.esn0_db == pytest.approx(ebn0 + 10 * math.log10(prof.code_rate), abs=1e-12)
    meta = json.loads(noisy.meta_path.read_text())
    assert meta["captures"][0]["core:frequency"] == pytest.approx(8.4125e9)  # [link] downlink_frequency_hz
    assert meta["global"]["downlink:modulation_index_rad"] == 1.0
    assert "SIMULATED" in meta["global"]["core:description"]


def test_simulate_biphase_bpsk_and_pm(tmp_path):
    for mod in ("bpsk", "pcm-pm"):
        prof = _profile(mod, line="bi-phase-l", seconds=0.4)
        res = simulate(prof, tmp_path / mod, noise=False, write_bits=True)
        assert res.num_frames >= 4
        assert res.num_channel_bits == 3200


def test_residual_modulator_argument_errors():
    with pytest.raises(ValueError, match="modulation must be pcm-pm or pcm-psk-pm"):
        ResidualCarrierModulator(link=LinkSection(modulation="bpsk"), sample_rate_hz=FS)
    with pytest.raises(ValueError, match="at least 4 samples per subcarrier cycle"):
        ResidualCarrierModulator(link=_link(sc=60_000.0), sample_rate_hz=FS)
    with pytest.raises(ValueError, match="at least 4 samples per symbol"):
        ResidualCarrierModulator(link=_link("pcm-pm", line="bi-phase-l", rate=60_000.0), sample_rate_hz=FS)
    with pytest.raises(ValueError, match="Argument 'timing_offset' must be >= 0"):
        ResidualCarrierModulator(link=_link(), sample_rate_hz=FS, timing_offset=-0.1)
    with pytest.raises(ValueError, match="must hold only 0 and 1"):
        ResidualCarrierModulator(link=_link(), sample_rate_hz=FS).process(np.array([0, 3]))
    qpsk = LinkSection(modulation="qpsk", symbol_rate_baud=48_000.0)
    assert isinstance(make_modulator(link=qpsk, sample_rate_hz=FS), Modulator)
