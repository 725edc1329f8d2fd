"""pipeline.sim: the modulator (pulses, positions, power) and the channel (noise, carrier, fades)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.profile import LinkSection
from pipeline.sim import Channel, DopplerPass, Modulator, noise_variance_per_sample, rrc_pulse
from pipeline.sim._kernels import idle_lfsr_fill, nrzm_encode_kernel, ou_phase_noise

FS = 1_000_000.0


def _link(mod="bpsk", pulse="rrc", rolloff=0.5, baud=240_000.0):
    return LinkSection(modulation=mod, pulse=pulse, rolloff=rolloff, symbol_rate_baud=baud)


def _levels(bits, mod):
    lv = 1.0 - 2.0 * bits
    if mod == "bpsk":
        return lv.astype(complex)
    return (lv[0::2] + 1j * lv[1::2]) / math.sqrt(2)


def _matched(samples, positions, period, pulse, rolloff=0.5, span=8):
    """Slow matched filter: sum_n s[n] h((n - tau) / T) / T at each tau (h of unit energy)."""
    out = np.empty(positions.size, dtype=complex)
    for i, tau in enumerate(positions):
        reach = span * period if pulse == "rrc" else 0.5 * period
        n = np.arange(max(0, math.ceil(tau - reach)), min(samples.size, math.floor(tau + reach) + 1))
        x = (n - tau) / period
        h = rrc_pulse(x, rolloff) if pulse == "rrc" else ((x >= -0.5) & (x < 0.5)).astype(float)
        out[i] = np.dot(samples[n], h) / period
    return out


# ---- the RRC pulse ------------------------------------------------------------------------------

@pytest.mark.kat
@pytest.mark.parametrize("beta", [0.2, 0.35, 0.5, 1.0])
def test_rrc_pulse_energy_and_nyquist(beta):
    x = np.arange(-40 * 64, 40 * 64 + 1) / 64.0
    h = rrc_pulse(x, beta)
    assert h[x.size // 2] == pytest.approx(1 - beta + 4 * beta / math.pi)  # h(0), Proakis & Salehi sec. 9.2
    assert np.sum(h * h) / 64 == pytest.approx(1.0, abs=2e-3)  # unit energy
    # RRC * RRC = raised cosine: zero at every non-zero integer lag (Nyquist criterion, any textbook)
    for m in range(1, 6):
        hs = rrc_pulse(x - m, beta)
        assert abs(np.sum(h * hs) / 64) < 3e-3
    # no division trouble at the points x = +-1/(4 beta)
    assert np.all(np.isfinite(rrc_pulse(np.array([1 / (4 * beta), -1 / (4 * beta)]), beta)))


# ---- the modulator ----------------------------------------------------------------------------

@pytest.mark.kat
def test_modulator_against_slow_reference(rng):
    link = _link()
    mod = Modulator(link=link, sample_rate_hz=FS, timing_offset=0.37, clock_offset_ppm=50.0, table_step=256)
    bits = rng.integers(0, 2, 120).astype(np.uint8)
    out = mod.process(bits)
    T = FS / (240_000 * (1 + 50e-6))
    assert mod.period == pytest.approx(T, rel=1e-15)
    p = 0.37 * T + np.arange(120) * T
    assert np.array_equal(out.positions, p)
    n = np.arange(out.sample_start, out.sample_start + out.samples.size)
    ref = np.zeros(n.size, complex)
    for k in range(120):  # direct evaluation of the analytic pulse, no table
        x = (n - p[k]) / T
        inside = np.abs(x) <= 8
        ref[inside] += (1 - 2.0 * bits[k]) * rrc_pulse(x[inside], 0.5)
    assert np.max(np.abs(out.samples - ref)) < 2e-3


@pytest.mark.parametrize("mod_name", ["bpsk", "qpsk", "oqpsk"])
@pytest.mark.parametrize("pulse", ["rrc", "rect"])
def test_positions_by_correlation_and_zero_isi(rng, mod_name, pulse):
    link = _link(mod_name, pulse)
    mod = Modulator(link=link, sample_rate_hz=FS, timing_offset=0.37, clock_offset_ppm=50.0)
    bits = rng.integers(0, 2, 1200).astype(np.uint8)
    out = mod.process(bits)
    s = out.samples
    a = _levels(bits, mod_name)
    T = mod.period
    keep = slice(20, a.size - 20)
    qs = T / 2 if mod_name == "oqpsk" else 0.0
    # correlate the matched-filter output with the symbols at offsets around the stated positions
    offsets = np.linspace(-0.4, 0.4, 17) * T
    score_i = [np.real(np.vdot(a[keep].real, _matched(s, out.positions[keep] + d, T, pulse).real)) for d in offsets]
    assert np.argmax(score_i) == 8  # the I rail peaks at p_k
    if mod_name != "bpsk":
        score_q = [np.real(np.vdot(a[keep].imag, _matched(s, out.positions[keep] + qs + d, T, pulse).imag))
                   for d in offsets]
        assert np.argmax(score_q) == 8  # the Q rail peaks at p_k (+ T/2 for OQPSK)
        np.testing.assert_array_equal(mod.bit_position(np.arange(1, 40, 2)), out.positions[:20] + qs)
    # at the stated positions the matched filter returns the symbols with (almost) no ISI (Nyquist)
    y_i = _matched(s, out.positions[keep], T, pulse).real
    y_q = _matched(s, out.positions[keep] + qs, T, pulse).imag
    tol = 0.02 if pulse == "rrc" else 1.0 / T + 1e-9  # rect: a window holds a whole number of samples
    assert np.max(np.abs(y_i - a[keep].real)) < tol
    if mod_name != "bpsk":
        assert np.max(np.abs(y_q - a[keep].imag)) < tol
    # and the hard decisions give the bits back, I bit first (Gray: I and Q mapped separately)
    dec = np.empty(bits.size, np.uint8)
    if mod_name == "bpsk":
        dec = (_matched(s, out.positions, T, pulse).real < 0).astype(np.uint8)
    else:
        dec[0::2] = _matched(s, out.positions, T, pulse).real < 0
        dec[1::2] = _matched(s, out.positions + qs, T, pulse).imag < 0
    assert np.array_equal(dec[40:-40], bits[40:-40])


@pytest.mark.parametrize("mod_name", ["bpsk", "qpsk", "oqpsk"])
def test_power_and_constant_envelope(rng, mod_name):
    bits = rng.integers(0, 2, 40000).astype(np.uint8)
    rrc = Modulator(link=_link(mod_name, "rrc"), sample_rate_hz=FS, amplitude=0.5).process(bits).samples[200:-200]
    assert np.mean(np.abs(rrc) ** 2) == pytest.approx(0.25, rel=0.02)  # mean power = amplitude^2
    rect = Modulator(link=_link(mod_name, "rect"), sample_rate_hz=FS, amplitude=0.5).process(bits).samples[5:-5]
    np.testing.assert_allclose(np.abs(rect), 0.5, rtol=1e-12)  # NRZ rectangles: constant envelope


@pytest.mark.parametrize("mod_name,pulse", [("bpsk", "rrc"), ("qpsk", "rect"), ("oqpsk", "rrc")])
def test_modulator_chunking_invariance(rng, mod_name, pulse):
    link = _link(mod_name, pulse)
    bits = rng.integers(0, 2, 5001).astype(np.uint8)
    one = Modulator(link=link, sample_rate_hz=FS, timing_offset=2.5, clock_offset_ppm=-30.0)
    ref = np.concatenate([one.process(bits).samples, one.flush().samples])
    mod = Modulator(link=link, sample_rate_hz=FS, timing_offset=2.5, clock_offset_ppm=-30.0)
    parts, starts = [], []
    for piece in np.split(bits, np.sort(rng.integers(0, bits.size, 25))):
        o = mod.process(piece)
        starts.append(o.sample_start)
        parts.append(o.samples)
    parts.append(mod.flush().samples)
    got = np.concatenate(parts)
    assert got.size == ref.size
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12)
    assert starts == sorted(starts)


def test_modulator_argument_errors():
    with pytest.raises(ValueError, match="Argument 'timing_offset' must be >= 0"):
        Modulator(link=_link(), sample_rate_hz=FS, timing_offset=-1.0)
    with pytest.raises(ValueError, match="Argument 'sample_rate_hz' must give at least 1 sample per symbol"):
        Modulator(link=_link(), sample_rate_hz=100_000.0)
    with pytest.raises(ValueError, match="modulation must be bpsk, qpsk or oqpsk"):
        Modulator(link=LinkSection(modulation="pcm-pm"), sample_rate_hz=FS)
    with pytest.raises(ValueError, match="Argument 'bits' must hold only 0 and 1"):
        Modulator(link=_link(), sample_rate_hz=FS).process(np.array([0, 2]))


# ---- the channel ----------------------------------------------------------------------------

def test_noise_variance_and_circularity():
    ch = Channel(sample_rate_hz=FS, noise_variance=0.3, seed=4)
    w = ch.process(np.zeros(400_000))
    assert np.mean(np.abs(w) ** 2) == pytest.approx(0.3, rel=0.015)  # E|w|^2 = N0 fs
    assert np.var(w.real) == pytest.approx(0.15, rel=0.015)
    assert abs(np.mean(w.real * w.imag)) < 0.003  # circular: I and Q uncorrelated


@pytest.mark.parametrize("esn0_db", [0.0, 5.0])
def test_measured_esn0_after_matched_filter(rng, esn0_db):
    # decision SNR of BPSK after a matched filter is 2 Es/N0 (Proakis & Salehi, Digital Communications, sec. 4.3)
    link = _link("bpsk", "rrc")
    mod = Modulator(link=link, sample_rate_hz=FS, timing_offset=0.2, clock_offset_ppm=20.0, amplitude=0.4)
    bits = rng.integers(0, 2, 6000).astype(np.uint8)
    out = mod.process(bits)
    var = noise_variance_per_sample(signal_power=0.16, symbol_period_samples=mod.period, esn0_db=esn0_db)
    y = Channel(sample_rate_hz=FS, noise_variance=var, seed=9).process(out.samples)
    z = _matched(y, out.positions[20:-20], mod.period, "rrc").real / 0.4 * (1 - 2.0 * bits[20:-20])
    measured = 1.0 / (2.0 * np.var(z))
    # Monte-Carlo: the variance estimate of ~6000 values has a relative std of ~1.8 %
    assert 10 * math.log10(measured) == pytest.approx(esn0_db, abs=0.25)
    assert np.mean(z) == pytest.approx(1.0, abs=0.03)


def test_uncoded_bpsk_ber_matches_theory(rng):
    from scipy.special import erfc

    ebn0_db = 4.0
    link = _link("bpsk", "rect")
    mod = Modulator(link=link, sample_rate_hz=FS, timing_offset=0.5, amplitude=1.0)
    bits = rng.integers(0, 2, 60_000).astype(np.uint8)
    out = mod.process(bits)
    var = noise_variance_per_sample(signal_power=1.0, symbol_period_samples=mod.period, esn0_db=ebn0_db)
    y = Channel(sample_rate_hz=FS, noise_variance=var, seed=11).process(out.samples)
    # rectangle integrate-and-dump, vectorised: the samples of symbol k are those with round-up index in [lo, hi)
    lo = np.ceil(out.positions - mod.period / 2).astype(np.int64)
    hi = np.ceil(out.positions + mod.period / 2).astype(np.int64)
    csum = np.concatenate([[0], np.cumsum(y.real)])
    ok = hi <= y.size
    dec = (csum[hi[ok]] - csum[lo[ok]]) < 0
    ber = np.mean(dec != bits[ok].astype(bool))
    want = 0.5 * erfc(math.sqrt(10 ** (ebn0_db / 10)))  # 1.25e-2: textbook, REFERENCES.md sec. 8
    # ~750 errors expected: the binomial spread is ~3.7 %; the whole-sample rectangles lose < 0.1 dB
    assert want * 0.85 < ber < want * 1.25


def test_carrier_offset_doppler_rate_and_pass():
    dp = DopplerPass(peak_hz=3000.0, tca_s=0.05, tau_s=0.02)
    ch = Channel(sample_rate_hz=FS, carrier_offset_hz=1500.0, doppler_rate_hz_per_s=-400.0, doppler_pass=dp,
                 phase0_rad=0.3)
    y = ch.process(np.ones(100_000))
    assert np.angle(y[0]) == pytest.approx(0.3)
    inst = np.angle(y[1:] * np.conj(y[:-1])) * FS / (2 * math.pi)  # measured instantaneous frequency
    t = (np.arange(1, y.size) - 0.5) / FS
    want = 1500.0 - 400.0 * t - 3000.0 * (t - 0.05) / np.sqrt(0.02 ** 2 + (t - 0.05) ** 2)
    assert np.max(np.abs(inst - want)) < 0.05
    assert ch.frequency_hz(50_000) == pytest.approx(1500.0 - 400.0 * 0.05)
    np.testing.assert_allclose(np.abs(y), 1.0, rtol=1e-12)


def test_phase_noise_rms():
    ch = Channel(sample_rate_hz=FS, phase_noise_rad=0.1, phase_noise_bandwidth_hz=2000.0, seed=3)
    th = np.angle(ch.process(np.ones(1_000_000)))
    # ~6000 correlation times: the std estimate spreads by ~1 %
    assert np.std(th) == pytest.approx(0.1, rel=0.06)
    assert abs(np.mean(th)) < 0.01


def test_fades_and_dropouts():
    ch = Channel(sample_rate_hz=FS, fades=[(0.01, 0.005, 20.0), (0.03, 0.001, math.inf)])
    y = np.abs(ch.process(np.ones(40_000)))
    assert y[9_999] == 1.0 and y[10_000] == pytest.approx(0.1) and y[14_999] == pytest.approx(0.1)
    assert y[15_000] == 1.0 and y[30_000] == 0.0 and y[30_999] == 0.0 and y[31_000] == 1.0
    with pytest.raises(ValueError, match="depth_db must be >= 0"):
        Channel(sample_rate_hz=FS, fades=[(0.0, 1.0, -3.0)])


def test_channel_chunking_invariance_and_seed(rng):
    kw = dict(sample_rate_hz=FS, noise_variance=0.2, carrier_offset_hz=777.0, doppler_rate_hz_per_s=50.0,
              phase_noise_rad=0.05, fades=[(0.002, 0.001, 6.0)], seed=21)
    x = np.exp(1j * rng.uniform(0, 6, 20_000))
    ref = Channel(**kw).process(x)
    ch = Channel(**kw)
    got = np.concatenate([ch.process(p) for p in np.split(x, np.sort(rng.integers(0, x.size, 30)))])
    np.testing.assert_array_equal(got, ref)
    ch.reset()
    np.testing.assert_array_equal(ch.process(x), ref)
    other = Channel(**{**kw, "seed": 22}).process(x)
    assert not np.allclose(other, ref)


# ---- kernels, small enough for NUMBA_DISABLE_JIT=1 --------------------------------------------

@pytest.mark.kat
def test_nrzm_kernel():
    bits = np.array([1, 0, 0, 1, 1, 1, 0], np.uint8)
    out = np.empty_like(bits)
    last = nrzm_encode_kernel(bits, np.uint8(0), out)
    assert out.tolist() == [1, 1, 1, 0, 1, 0, 0] and int(last) == 0  # a 1 is a change of level (131.0-B-2 3.3.3)


@pytest.mark.kat
def test_idle_pattern_recurrence():
    out = np.zeros(64, np.uint8)
    state = idle_lfsr_fill(0xFFFFFFFF, out)
    o = np.unpackbits(out).astype(int)
    assert out[:4].tobytes() == b"\xff\xff\xff\xff"  # the all-ones seed comes out first
    # o[k+32] = o[k] + o[k+1] + o[k+2] + o[k+22] (mod 2): x^32 + x^22 + x^2 + x + 1 (from memory, not confirmed)
    assert all(o[k + 32] == o[k] ^ o[k + 1] ^ o[k + 2] ^ o[k + 22] for k in range(o.size - 32))
    more = np.zeros(8, np.uint8)
    idle_lfsr_fill(state, more)
    both = np.zeros(72, np.uint8)
    idle_lfsr_fill(0xFFFFFFFF, both)
    assert np.array_equal(both, np.concatenate([out, more]))  # continues across calls


@pytest.mark.kat
def test_phase_noise_kernel_recursion():
    w = np.array([1.0, -0.5, 0.25, 2.0])
    out = np.empty(4)
    last = ou_phase_noise(w, 0.9, 0.1, 0.5, out)
    ref, th = [], 0.5
    for v in w:
        th = 0.9 * th + 0.1 * v
        ref.append(th)
    np.testing.assert_allclose(out, ref, rtol=1e-15)
    assert last == pytest.approx(ref[-1])


@pytest.mark.kat
def test_rect_and_channel_kernels_small():
    # rect: sample n belongs to the symbol whose rectangle [p0 + (k - 1/2) T, p0 + (k + 1/2) T) holds it
    bits = np.array([0, 1, 1, 0, 1, 0, 0, 0, 1, 1], np.uint8)
    mod = Modulator(link=_link("bpsk", "rect"), sample_rate_hz=FS, timing_offset=0.8)
    s = np.concatenate([mod.process(bits).samples, mod.flush().samples])
    T = mod.period
    n = np.arange(s.size)
    k = np.floor((n - 0.8 * T) / T + 0.5).astype(int)
    ok = (k >= 0) & (k < bits.size)
    np.testing.assert_array_equal(s[ok].real, 1.0 - 2.0 * bits[k[ok]])
    assert np.all(s[~ok] == 0)
    # channel: closed-form rotation and gain, no noise
    ch = Channel(sample_rate_hz=FS, carrier_offset_hz=1234.0, doppler_rate_hz_per_s=5e4, phase0_rad=1.0,
                 fades=[(0.0001, 0.0002, 6.0)])
    x = np.exp(1j * np.arange(500) * 0.01)
    y = ch.process(x)
    t = np.arange(500) / FS
    g = np.where((t >= 0.0001) & (t < 0.0001 + 0.0002), 10 ** (-6 / 20), 1.0)  # [start, start + duration)
    np.testing.assert_allclose(y, x * g * np.exp(1j * (1.0 + 2 * np.pi * (1234.0 * t + 2.5e4 * t * t))), atol=1e-9)
