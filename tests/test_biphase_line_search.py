"""The squared-power carrier search (CarrierSearch) against data lines and aliases.

Squared Bi-phase-L BPSK through its chip-long box has lines at twice the carrier plus multiples of the symbol rate
(derived below); a search centred near one of those data lines must not take it for the carrier, and a carrier
outside the searched range must not fold into it through the search's decimation.  Signals written here from the
textbook model (no pipeline code): Bi-phase-L sends a 0 as +1 then -1 (CCSDS 401.0-B sec. 2.4, from memory, not
confirmed), BPSK with rect or RRC pulses by tests/demod_signals.py.
"""

from __future__ import annotations

import math

import demod_signals as ds
import numpy as np
import pytest

from pipeline.demod._acquire import CarrierSearch, band_limited, estimate_carrier_offset
from pipeline.demod._filters import matched_filter_taps


def _biphase(n_symbols: int, sps: int, carrier_cycles_per_sample: float, esn0_db: float | None, seed: int):
    """Rect Bi-phase-L chips (a 0: +1 then -1) of ``sps`` samples per symbol on a carrier, optional white noise."""
    rng = np.random.default_rng(seed)
    bits = rng.integers(0, 2, n_symbols)
    chips = np.stack([1 - 2 * bits, 2 * bits - 1], axis=1).ravel().astype(np.float64)
    w = np.repeat(chips, sps // 2)
    k = np.arange(w.size)
    x = w * np.exp(2j * np.pi * carrier_cycles_per_sample * k + 0.4j)
    if esn0_db is not None:  # Es = sps (unit amplitude): noise variance per sample sps / (Es/N0)
        sigma = math.sqrt(sps / 10 ** (esn0_db / 10) / 2)
        x = x + sigma * (rng.standard_normal(x.size) + 1j * rng.standard_normal(x.size))
    return x


@pytest.mark.kat
def test_squared_biphase_has_lines_at_multiples_of_the_symbol_rate_with_the_derived_powers():
    # Derived here (no published source at hand): with the chip-long box h (unit gain) the filtered signal is
    # sum_k a_k g(t - kT) e^{j 2 pi f t}, g = Bi-phase pulse * h (ramps 0 -> 1, 1 -> -1, -1 -> 0, one chip each),
    # and for independent equiprobable a_k the mean of y^2 e^{-j 4 pi f t} is sum_k g^2(t - kT): periodic in T,
    # so x^2 has lines at 2f + n/T with amplitudes its Fourier coefficients c_n.  Over one symbol (u = t / T_c,
    # boundary at 0, mid-bit at 1) that mean is 1/2 + (2u - 1)^2 / 2 on [0, 1) (a boundary transition with
    # probability 1/2) and (3 - 2u)^2 on [1, 2) (the mid-bit one, always); integrating gives c_0 = 1/2,
    # c_n = 6 / (pi n)^2 for even n and -4j / (pi n)^3 for odd n, so the line powers relative to 2f are
    # (12 / (pi n)^2)^2 (n = 2: -10.3 dB, n = 4: -22.4 dB) and (8 / (pi n)^3)^2 (n = 1: -11.8 dB, n = 3: -40.4 dB).
    # The cyclostationary view (lines of a squarer at multiples of the symbol rate): W. A. Gardner, Statistical
    # Spectral Analysis, ch. 12, from memory, not confirmed.
    sps = 32
    f = 0.011
    x = _biphase(32768, sps, f, None, seed=1)
    box = np.ones(sps // 2) / (sps // 2)
    k = np.arange(x.size)
    y = np.convolve(x * np.exp(-2j * np.pi * f * k), box)[: x.size] * np.exp(2j * np.pi * f * k)  # centred on f
    z = (y * y)[sps:]  # past the filter's start
    k = np.arange(z.size)
    win = np.hanning(z.size)

    def line(freq):
        return abs(np.sum(z * win * np.exp(-2j * np.pi * freq * k))) ** 2

    p0 = line(2 * f)
    for n in (1, 2, 4, -1, -2, -4):
        want = (12 / (math.pi * n) ** 2) ** 2 if n % 2 == 0 else (8 / abs(math.pi * n) ** 3) ** 2
        got = line(2 * f + n / sps) / p0
        # discrete ramps of 16 steps (-11.8, -10.3, -22.0 dB) and the data line estimate over 32768 symbols: 0.6 dB
        assert abs(10 * math.log10(got / want)) < 0.6, (n, 10 * math.log10(got), 10 * math.log10(want))
    for n in (3, -3):
        assert line(2 * f + n / sps) / p0 < 10 ** (-35 / 10)
    # no line between them: half a symbol rate off, the data's continuous spectrum only
    assert line(2 * f + 0.5 / sps) / p0 < 1e-3


FS, RS = 240e3, 20e3  # Bi-phase-L at 20 ksym/s, 6 samples per chip (a fractional chip would add sampling lines)


def _residual_biphase_search(search_hz: float, **check) -> CarrierSearch:
    """The Bi-phase-L BPSK search as the residual-carrier demodulator sets it up (chip-long box, Manchester template,
    fine range 5 % of the symbol rate), with the data-line test when ``check`` holds its arguments."""
    box = np.ones(6)
    return CarrierSearch(sample_rate_hz=FS, power=2, prefilter=box / math.sqrt(6), template=np.concatenate([box, -box]),
                         occupied_hz=4 * RS, search_hz=search_hz, fine_hz=0.05 * RS, max_rate_hz_per_s=300.0, **check)


def _biphase_at(offset_hz: float, esn0_db: float, seed: int = 3) -> np.ndarray:
    """32768 samples of Bi-phase-L at 20 ksym/s, 240 ksample/s, white noise at ``esn0_db``."""
    rng = np.random.default_rng(seed)
    n = 32768
    bits = rng.integers(0, 2, int(n / FS * RS) + 2)
    t = np.arange(n) / FS
    chip = np.floor(t * 2 * RS).astype(np.int64)
    w = np.where(chip % 2 == 0, 1.0, -1.0) * (1 - 2 * bits[chip // 2])
    x = w * np.exp(2j * np.pi * offset_hz * t + 0.7j)
    sigma = math.sqrt(FS / RS / 10 ** (esn0_db / 10) / 2)
    return x + sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))


@pytest.mark.parametrize("order", [1, 4, -1, -4])  # (for +-2 the band detector stops at the other edge)
def test_the_search_declines_a_data_line_of_squared_biphase(order):
    # the carrier k R_s / 2 + 2.5 kHz beyond the searched range (+-3 kHz, as the LEO pass's): the band detector's
    # centre stops at the range's edge, and the k-th data line of the square, 2f + k R_s, lies 2 x 2.5 kHz inside
    # it, strong enough through the chip-long box centred there to pass the threshold (as without the test: a
    # carrier at 2.5 kHz).  It is the data's, not a carrier's: nothing found
    edge = -math.copysign(2500.0, order)
    x = _biphase_at(-order * RS / 2 + edge, esn0_db=12.0)
    check = dict(symbol_rate_hz=RS, check_taps=np.ones(3))
    plain = _residual_biphase_search(3000.0).search(x)
    assert plain.found and abs(plain.centre_hz - edge) < 20.0
    got = _residual_biphase_search(3000.0, **check).search(x)
    assert not got.found and got.data_line and abs(got.centre_hz - edge) < 20.0
    # centred on the carrier, it is found there, with or without the test
    y = _biphase_at(310.0, esn0_db=12.0)
    for search in (_residual_biphase_search(3000.0), _residual_biphase_search(3000.0, **check)):
        ok = search.search(y)
        assert ok.found and not ok.data_line and abs(ok.centre_hz - 310.0) < 5.0


def test_the_data_line_test_keeps_a_weak_carrier():
    # at Es/N0 = 2 dB the carrier's line barely passes; the data-line test must not throw it away (20 windows)
    search = _residual_biphase_search(3000.0, symbol_rate_hz=RS, check_taps=np.ones(3))
    found = [search.search(_biphase_at(-850.0, esn0_db=2.0, seed=s)) for s in range(20)]
    assert sum(a.data_line for a in found) == 0
    assert sum(a.found and abs(a.centre_hz + 850.0) < 10.0 for a in found) >= 18


@pytest.mark.parametrize("order", [1, -1])
def test_the_demodulators_rrc_search_declines_the_data_line_of_squared_bpsk(order):
    # the suppressed-carrier Demodulator's search (RRC matched filter, roll-off 0.5), BPSK at 60 ksym/s, 250 ksample/s;
    # squared RRC BPSK has lines at 2f +- R_s (the squarer's timing lines); the carrier R_s / 2 from the searched
    # range's centre puts one at 0.  With the symbol rate the search declines it (the Demodulator does not pass it yet)
    fs, rs = 250e3, 60e3
    taps = matched_filter_taps("rrc", 0.5, fs / rs, 16)
    rng = np.random.default_rng(7)
    x = ds.modulate(12000, modulation="bpsk", sample_rate_hz=fs, symbol_rate_baud=rs, esn0_db=12.0, rng=rng,
                    carrier_offset_hz=-order * rs / 2 + 250.0).samples[:65536]
    args = dict(sample_rate_hz=fs, power=2, prefilter=taps, occupied_hz=1.5 * rs, search_hz=2000.0, fine_hz=0.05 * rs)
    got = CarrierSearch(**args, symbol_rate_hz=rs).search(x)
    assert not got.found
    y = ds.modulate(12000, modulation="bpsk", sample_rate_hz=fs, symbol_rate_baud=rs, esn0_db=12.0, rng=rng,
                    carrier_offset_hz=250.0).samples[:65536]
    ok = CarrierSearch(**args, symbol_rate_hz=rs).search(y)
    assert ok.found and abs(ok.centre_hz - 250.0) < 5.0


@pytest.mark.parametrize("offset_hz", [30e3, 35e3, 45e3, 60e3])
def test_a_carrier_outside_the_searched_range_does_not_alias_into_it(offset_hz):
    # BPSK (8 samples per symbol at 1 Msample/s) with its carrier outside +-20 kHz: through block sums its squared
    # line folded into the searched band (at 30 kHz it was found at -20 kHz, at 35 kHz at -15 kHz); band-limited
    # decimation leaves nothing to find.  The same carrier inside the range is found where it is.
    fs = 1e6
    n = np.arange(32768)
    rng = np.random.default_rng(1)
    bits = np.repeat(rng.integers(0, 2, 32768 // 8) * 2 - 1, 8)
    noise = 0.3 * (rng.standard_normal(n.size) + 1j * rng.standard_normal(n.size))
    outside = bits * np.exp(2j * np.pi * offset_hz * n / fs) + noise
    assert not estimate_carrier_offset(outside, sample_rate_hz=fs, power=2, search_hz=20e3).found
    inside = bits * np.exp(2j * np.pi * (offset_hz - 25e3) / 2 * n / fs) + noise
    est = estimate_carrier_offset(inside, sample_rate_hz=fs, power=2, search_hz=20e3)
    assert est.found and abs(est.offset_hz - (offset_hz - 25e3) / 2) < 2.0


@pytest.mark.kat
def test_band_limited_decimation_keeps_the_band_and_drops_the_rest():
    # slow reference: the DFT of the decimated sequence holds the kept bins of the full DFT and nothing else
    rng = np.random.default_rng(4)
    n, n_d = 240, 24
    z = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    d = band_limited(z, n_d)
    full = np.array([np.sum(z * np.exp(-2j * np.pi * k * np.arange(n) / n)) for k in range(n)])
    want = np.array([full[k % n] for k in range(-(n_d // 2), n_d - n_d // 2)])
    got = np.fft.fftshift(np.fft.fft(d))
    np.testing.assert_allclose(got, want, atol=1e-9)
    # a tone between the kept band's edge and n / 2 leaves a tone-free result: nothing folds back
    k = np.arange(n)
    assert np.max(np.abs(band_limited(np.exp(2j * np.pi * 30 * k / n), n_d))) < 1e-12
