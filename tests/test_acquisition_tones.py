"""The suppressed-carrier receiver against a CW tone in the band: a spur of the receiver, or an interferer.

Two failures were measured on the demo link (BPSK 240 ksym/s, RRC 0.5, 1 Msample/s, Es/N0 2.4 dB):

* a tone 10 dB under the signal, 100-150 kHz from the carrier (inside the occupied band, +-180 kHz), pulled the
  carrier search's band centre towards itself (28 kHz at 100 kHz), the line search around the wrong centre
  missed the carrier, and nothing at all was decoded (0 of 101 packets);
* a tone alone (the noise before the signal comes up) was taken for a carrier: its square is a line at twice its
  frequency, as BPSK's is, and the Costas loop locked on it and held, so the signal that came later was never
  acquired (0 of 101 packets, and the report showed lock on the tone).

The signals come from tests/demod_signals.py (the test transmitter, no receiver code).  What a CW tone is, and
why its M-th power line is the M-th power of its own line: ``(A e^(j w t) + n)^M`` has mean ``A^M e^(j M w t)``
in circular Gaussian noise (``E n = E n^2 = E n^4 = 0``); a BPSK signal's square has a line from the modulation
(``d^2 = 1``) with no line in the signal itself but its carrier leakage (textbook facts; from memory, not
confirmed).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import demod_signals as ds
import numpy as np
import pytest

from pipeline.demod import Demodulator
from pipeline.demod._acquire import TONE_Q, CarrierSearch, _tone_q, _without_spikes
from pipeline.demod._filters import matched_filter_taps
from pipeline.profile import LinkSection, ReceiverSection

FS, RS = 1e6, 240e3


def _search(power: int) -> CarrierSearch:
    # the Demodulator's search for the link (RRC 0.5, 16-symbol matched filter, the whole band)
    taps = matched_filter_taps("rrc", 0.5, FS / RS, 16)
    return CarrierSearch(sample_rate_hz=FS, power=power, prefilter=taps, occupied_hz=1.5 * RS, fine_hz=0.05 * RS,
                         max_rate_hz_per_s=2000.0, symbol_rate_hz=RS)


def _tone(n: int, hz: float, power: float, phase: float = 1.0) -> np.ndarray:
    return (math.sqrt(power) * np.exp(2j * np.pi * hz / FS * np.arange(n) + 1j * phase)).astype(np.complex64)


def _noise(rng, n: int, power: float = 1.0) -> np.ndarray:
    return (math.sqrt(power / 2) * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)


@pytest.mark.parametrize("power", [2, 4])
@pytest.mark.parametrize("tone_db", [-10.0, 0.0, 10.0, 30.0])
def test_a_tone_is_not_taken_for_a_suppressed_carrier(power, tone_db):
    # the line stage run around a tone (as a band centre near it would): its M-th power line is found, and
    # |a_M| / |a_1|^M is 1 to within the noise at any level, so the search reports a CW tone, not a carrier
    rng = np.random.default_rng(int(tone_db) + 100 * power)
    search = _search(power)
    for _ in range(3):
        f0 = rng.uniform(-20e3, 20e3)
        x = _noise(rng, 65536) + _tone(65536, f0, 10 ** (tone_db / 10))
        got = search._fine(x - x.mean(), f0 + rng.uniform(-3e3, 3e3))
        if power == 4 and tone_db < 0:  # a tone's fourth power 10 dB under the noise does not pass the threshold
            assert not got.found and not got.tone
            continue
        assert got.tone and not got.found and got.line.kind == "CW tone", got
        assert abs(got.centre_hz - f0) < 100.0


@pytest.mark.parametrize("mod,leak_db", [("bpsk", None), ("bpsk", -10.0), ("bpsk", -20.0), ("qpsk", None),
                                         ("qpsk", -20.0)])
def test_a_suppressed_carrier_with_leakage_is_still_a_carrier(mod, leak_db):
    # a modulator's carrier leakage (-20 dB is a poor one; -10 dB hardly suppressed) leaves a line in the signal
    # itself, but the M-th power line comes from the modulation: q far above TONE_Q (measured 3.7 and more)
    rng = np.random.default_rng(7)
    power = 2 if mod == "bpsk" else 4
    for esn0 in (3.0, 10.0):
        w = ds.modulate(20000, modulation=mod, esn0_db=esn0, carrier_offset_hz=2300.0, lead_symbols=0,
                        rng=rng).samples[:65536]
        if leak_db is not None:
            signal_power = 10 ** (esn0 / 10) / (1 + 10 ** (esn0 / 10)) * float(np.mean(np.abs(w) ** 2))
            w = w + _tone(w.size, 2300.0, 10 ** (leak_db / 10) * signal_power, 0.3)
        got = _search(power).search(w)
        assert got.found and not got.tone and abs(got.offset_hz - 2300.0) < 50.0, (esn0, got)


@pytest.mark.kat
def test_tone_q_is_one_for_a_tone_and_large_for_bpsk():
    n = 4096
    t = np.arange(n)
    tone = (0.7 * np.exp(2j * np.pi * 0.01 * t + 0.4j)).astype(np.complex64)
    assert _tone_q(tone, tone * tone, 2, 0.01 * FS, 0.0, FS) == pytest.approx(1.0, rel=1e-3)
    rng = np.random.default_rng(1)
    bpsk = ((1 - 2 * rng.integers(0, 2, n)) * np.exp(2j * np.pi * 0.01 * t)).astype(np.complex64)
    assert _tone_q(bpsk, bpsk * bpsk, 2, 0.01 * FS, 0.0, FS) > 10 * TONE_Q


def _without_spikes_reference(p: np.ndarray, width: int) -> np.ndarray:
    """Bin by bin: the median of the ``width`` bins centred on a bin (the spectrum read circularly); a bin more
    than twice its median, and the two bins on each side of it, take their own medians, the others stay."""
    n, half = p.size, width // 2
    med = [float(np.median([p[(k + j) % n] for j in range(-half, half + 1)])) for k in range(n)]
    out = p.copy()
    for k in range(n):
        if p[k] > 2.0 * med[k]:
            for j in range(-2, 3):
                out[(k + j) % n] = med[(k + j) % n]
    return out


@pytest.mark.kat
def test_without_spikes_against_a_bin_by_bin_reference():
    rng = np.random.default_rng(3)
    p = 1.0 + 0.05 * rng.random(128)
    p[40:86] += np.hanning(46) * 3.0  # a band of 46 bins
    spiked = p.copy()
    spiked[20:25] += np.array([0.5, 40.0, 200.0, 40.0, 0.5])  # a tone's Hann lobe, 5 bins
    spiked[60:62] += 500.0  # one inside the band
    for width in (3, 7, 11):
        np.testing.assert_allclose(_without_spikes(spiked, width), _without_spikes_reference(spiked, width))
    clean = _without_spikes(spiked, 11)
    assert np.all(np.abs(clean[18:27] - 1.025) < 0.05)  # the lobe is gone
    assert np.all(np.abs(clean[45:81] - p[45:81]) < 0.25)  # the band keeps its shape
    np.testing.assert_array_equal(_without_spikes(p, 11), p)  # nothing to take out: untouched


def _demod_link() -> Demodulator:
    return Demodulator(link=LinkSection(modulation="bpsk"), receiver=ReceiverSection(), sample_rate_hz=FS)


def _run(demod: Demodulator, x: np.ndarray) -> SimpleNamespace:
    """The demodulator over ``x`` in chunks: every channel bit's position, soft value and lock flag."""
    blocks = [demod.process(SimpleNamespace(samples=x[i:i + 131072], start=i)) for i in range(0, x.size, 131072)]
    blocks.append(demod.flush())
    keys = ("position", "soft", "locked")
    return SimpleNamespace(**{k: np.concatenate([getattr(b, k) for b in blocks]) for k in keys})


def test_the_receiver_acquires_beside_a_tone_in_the_band():
    # a tone 10 dB under the signal's power, 120 kHz from the carrier (in the RRC's roll-off, inside the band):
    # the band's centre stays on the signal, the carrier is found and held
    rng = np.random.default_rng(11)
    w = ds.modulate(300_000, esn0_db=2.4, carrier_offset_hz=2300.0, rng=rng)
    x = w.samples + _tone(w.samples.size, 2300.0 + 120e3, 0.1 * float(np.mean(np.abs(w.samples) ** 2)))
    d = _demod_link()
    out = _run(d, x)
    assert d.stats.carrier_found >= 1 and out.locked[out.position > 0.3 * FS].mean() > 0.95
    # hard decisions against the bits sent, after the pull-in, as theory has them with the tone counted as noise:
    # Es/N0 2.4 dB is N0 = 0.575 Es; the tone, 8 dB under the signal's own power and 3 dB down through the RRC at
    # f T = 0.5, adds about 0.08 Es: Es / (N0 + I) = 1.84 dB, Q(sqrt(2 x 1.53)) = 4.0 % (Proakis eq. 5.2-5)
    errs, n, _ = ds.symbol_errors(out, w, "bpsk", skip=20000)
    assert n > 200_000 and errs / n < 0.05, errs / n


def test_a_tone_before_the_signal_does_not_keep_the_receiver_from_it():
    # 1 s of noise with a tone 6 dB under the signal's power at +80 kHz, then the signal with the tone still on:
    # nothing locks on the tone, and the signal is acquired within about a block of its start
    rng = np.random.default_rng(12)
    w = ds.modulate(240_000, esn0_db=2.4, carrier_offset_hz=2300.0, rng=rng)
    p = float(np.mean(np.abs(w.samples) ** 2))
    lead = int(FS)
    signal_noise = p / (1 + 10 ** (2.4 / 10) * RS / FS)  # the transmitter's noise power per sample, about
    x = np.concatenate([_noise(rng, lead, signal_noise), w.samples])
    x = x + _tone(x.size, 80e3, 10 ** (-6 / 10) * p)
    out = _run(_demod_link(), x)
    assert not out.locked[out.position < lead].any()  # no lock on the tone
    assert out.locked[out.position > lead + 0.1 * FS].mean() > 0.95
    # and the tone alone is named when nothing locks (taken out before the search: tests/test_tone_cancel.py)
    alone = _demod_link()
    _run(alone, _noise(rng, 2 * lead) + _tone(2 * lead, 80e3, 100.0))
    assert "CW tone at +80000" in alone.no_lock_message() and "not the link's carrier" in alone.no_lock_message()
    assert "taken out" in alone.no_lock_message()
