"""The residual-carrier search beside a CW tone in the band (a receiver spur, an interferer).

Recordings come from ``tests/residual_signals.py``, an independent PCM/PM and PCM/PSK/PM transmitter (no pipeline
code), with a tone added at a level relative to the recording's total power.  A residual carrier carries its data's
spectrum around it, a tone none: the receiver must take the line the data sidebands are centred on, hold it, and
recover the symbols as a genie receiver told the true carrier, subcarrier and symbol intervals does on the same
samples, tone included (``residual_signals.genie_symbols``); a tone alone in noise must never be held as a carrier.
Data spectra are checked against ``scipy.signal.welch`` (Welch's averaged periodogram, a general-purpose reference).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
import residual_signals as rs
from scipy import signal

from pipeline.demod.residual import ResidualCarrierDemodulator
from pipeline.demod.residual._search import DataSidebands
from pipeline.profile import LinkSection, ReceiverSection

WAVES = {"nrz": ("pcm-pm", "square", "nrz-l"), "biphase": ("pcm-pm", "square", "bi-phase-l"),
         "square": ("pcm-psk-pm", "square", "nrz-l"), "sine": ("pcm-psk-pm", "sine", "nrz-l")}
RATE, SPS, INDEX = 2000.0, 64, 1.1
FS = RATE * SPS
CARRIER = 1500.0


def _link(wave: str) -> LinkSection:
    modulation, sc_wave, line = WAVES[wave]
    return LinkSection(modulation=modulation, symbol_rate_baud=RATE, line_code=line, pulse="rect",
                       modulation_index_rad=INDEX, subcarrier_hz=4.0 * RATE if modulation == "pcm-psk-pm" else 0.0,
                       subcarrier_wave=sc_wave)


def _with_tone(x: np.ndarray, f_hz: float, rel_db: float) -> np.ndarray:
    """``x`` plus a tone ``rel_db`` under (over) the recording's total power, as the lead's repro adds it."""
    p = float(np.mean(np.abs(x.astype(np.complex128)) ** 2))
    n = np.arange(x.size)
    return (x + math.sqrt(p * 10.0 ** (rel_db / 10.0)) * np.exp(2j * np.pi * f_hz / FS * n + 0.4j)).astype(np.complex64)


def _demodulate(wave: str, y: np.ndarray):
    demod = ResidualCarrierDemodulator(link=_link(wave), receiver=ReceiverSection(), sample_rate_hz=FS)
    step = 1 << 17
    out = [demod.process(SimpleNamespace(samples=y[a:a + step], start=a, nonfinite=0)) for a in range(0, y.size, step)]
    out.append(demod.flush())
    soft = np.concatenate([b.soft for b in out])
    pos = np.concatenate([b.position for b in out])
    return demod, soft, pos, [t for b in out for t in b.track]


def _errors(sig: rs.ResidualSignal, y: np.ndarray, soft: np.ndarray, pos: np.ndarray, first: int):
    """Wrong decisions of the receiver and of the genie on the same samples ``y``, over the same symbols."""
    k = sig.symbol_index(pos)
    kg, sg = rs.genie_symbols(sig, y)
    both = np.intersect1d(k[k >= first], kg[kg >= first])
    truth = sig.bits[both].astype(bool)
    wrong = (soft[np.searchsorted(k, both)] < 0) != truth
    if wrong.mean() > 0.5:  # the subcarrier's half-cycle ambiguity (the frame synchronizer resolves it)
        wrong = ~wrong
    g_wrong = (sg[np.searchsorted(kg, both)] < 0) != truth
    return wrong, g_wrong


# the lead's repro scaled to 2 ksym/s: the tone 0.625 R_s (10 dB under the total power) and 1.875 R_s (6 dB under)
# from the carrier, 8 and 12 dB above the residual carrier's line at Es/N0 = 3 dB, m = 1.1 rad
@pytest.mark.parametrize("wave,offset_rs,rel_db", [("nrz", 0.625, -10.0), ("nrz", 1.875, -6.0),
                                                   ("biphase", 1.875, -6.0), ("square", 1.875, -6.0)])
def test_carrier_found_and_held_beside_a_stronger_tone(wave, offset_rs, rel_db):
    sig = rs.transmit(16_000, wave=wave, sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX,
                      subcarrier_hz=4.0 * RATE, esn0_db=3.0, carrier_hz=CARRIER, clock_ppm=20.0, seed=3)
    tone_hz = CARRIER + offset_rs * RATE
    y = _with_tone(sig.samples, tone_hz, rel_db)
    demod, soft, pos, track = _demodulate(wave, y)
    assert demod.stats.carrier_found == 1
    held = [t for t in track if t.carrier_locked]
    assert len(held) >= 0.8 * len(track)
    # every locked block follows the carrier (within 2 Hz of it), none the tone
    assert all(abs(t.carrier_offset_hz - CARRIER) < 2.0 for t in held)
    wrong, g_wrong = _errors(sig, y, soft, pos, 4000)
    assert wrong.size > 0.95 * 12_000
    # symbols as the genie recovers them from the same samples, tone included (the tone's cost is the genie's):
    # at most 3 standard deviations of the discordant decisions, plus 0.2 % of the symbols, more errors
    discordant = np.count_nonzero(wrong != g_wrong)
    assert wrong.sum() - g_wrong.sum() <= 3.0 * math.sqrt(discordant + 1) + 0.002 * wrong.size, \
        (wrong.mean(), g_wrong.mean())


@pytest.mark.slow
@pytest.mark.parametrize("wave,esn0_db,over_carrier_db,offset_rs",
                         [("nrz", -6.0, 10.0, 1.5), ("square", -8.0, 10.0, 1.5), ("biphase", -6.0, 10.0, 0.8),
                          ("nrz", -8.0, 20.0, 3.0)])
def test_low_esn0_beside_a_tone(wave, esn0_db, over_carrier_db, offset_rs):
    """At the receiver's low Es/N0 operating points (m = 1.2 rad) a tone 10-20 dB over the carrier's line costs the
    symbols no more than it costs the genie (against the same recording without the tone)."""
    sig = rs.transmit(40_000, wave=wave, sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=1.2,
                      subcarrier_hz=4.0 * RATE, esn0_db=esn0_db, carrier_hz=CARRIER, clock_ppm=20.0, seed=7)
    p = float(np.mean(np.abs(sig.samples.astype(np.complex128)) ** 2))
    rel = 10.0 * math.log10(math.cos(1.2) ** 2 / p) + over_carrier_db  # P_c = cos^2 m of the unit signal
    y = _with_tone(sig.samples, CARRIER + offset_rs * RATE, rel)
    excess, discordant = [], 0
    for samples in (sig.samples, y):
        demod, soft, pos, track = _demodulate(wave, samples)
        assert demod.stats.carrier_found == 1
        held = [t for t in track if t.carrier_locked]
        assert len(held) >= 0.8 * len(track) and all(abs(t.carrier_offset_hz - CARRIER) < 2.0 for t in held)
        wrong, g_wrong = _errors(sig, samples, soft, pos, 12_000)
        assert wrong.size > 0.95 * 28_000
        excess.append(int(wrong.sum()) - int(g_wrong.sum()))
        discordant += int(np.count_nonzero(wrong != g_wrong))
    assert excess[1] - excess[0] <= 4.0 * math.sqrt(discordant + 1), excess


@pytest.mark.parametrize("rel_db", [-10.0, 10.0])
def test_tone_alone_in_noise_is_never_held(rel_db):
    noise = rs.transmit(16_000, wave="nrz", sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX, esn0_db=3.0,
                        seed=4)
    rng = np.random.default_rng(5)
    w = (rng.standard_normal(noise.samples.size) + 1j * rng.standard_normal(noise.samples.size)) \
        * math.sqrt(0.5 * float(np.mean(np.abs(noise.samples) ** 2)))  # the recording's noise level, no signal
    y = _with_tone(w.astype(np.complex64), 7345.0, rel_db)
    demod, soft, _, track = _demodulate("nrz", y)
    assert demod.stats.carrier_found == 0 and soft.size == 0
    assert not any(t.carrier_locked or t.symbol_locked for t in track)
    msg = demod.no_lock_message()
    assert "CW tone at +734" in msg, msg  # the tone named, at its frequency (a bin: 2 Hz)


def test_no_tone_unchanged():
    """Without a tone the carrier is found in the first dwell and the symbols are the genie's."""
    sig = rs.transmit(16_000, wave="nrz", sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX,
                      esn0_db=3.0, carrier_hz=CARRIER, clock_ppm=20.0, seed=3)
    demod, soft, pos, track = _demodulate("nrz", sig.samples)
    assert demod.stats.carrier_found == 1 and track[0].carrier_offset_hz == pytest.approx(CARRIER, abs=2.0)
    wrong, g_wrong = _errors(sig, sig.samples, soft, pos, 4000)
    assert wrong.sum() - g_wrong.sum() <= 3.0 * math.sqrt(np.count_nonzero(wrong != g_wrong) + 1)


@pytest.mark.parametrize("wave", ["nrz", "biphase", "square", "sine"])
def test_data_density_against_welch(wave):
    """``DataSidebands.density`` x the data power against Welch's periodogram of the noiseless transmitter."""
    sig = rs.transmit(40_000, wave=wave, sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX,
                      subcarrier_hz=4.0 * RATE, esn0_db=None, seed=6)
    f, pxx = signal.welch(sig.samples.astype(np.complex128), fs=FS, window="hann", nperseg=4096,
                          return_onesided=False, scaling="density")
    link = _link(wave)
    sb = DataSidebands(symbol_rate_hz=RATE, data_to_carrier=1.0, biphase=wave == "biphase",
                       subcarrier_hz=link.subcarrier_hz, subcarrier_wave=link.subcarrier_wave)
    model = sig.data_power * sb.density(f)
    if wave in ("nrz", "biphase"):
        # where the data's density is at least a quarter of its peak, away from the carrier's line: within 15 %
        use = (model > 0.25 * model.max()) & (np.abs(f) > 100.0)
        assert use.sum() > 50
        np.testing.assert_allclose(pxx[use], model[use], rtol=0.15)
    else:
        # on a subcarrier coherent with the symbol clock the shifted lobes interfere (the model sums their powers),
        # so the shape is compared over the test's window: correlation and power within 10 %
        use = (np.abs(f) > 100.0) & (np.abs(f) < sb.half_width_hz)
        assert np.corrcoef(pxx[use], model[use])[0, 1] > 0.98
        assert np.sum(model[use]) == pytest.approx(np.sum(pxx[use]), rel=0.1)


def test_sidebands_validation():
    with pytest.raises(ValueError, match="symbol_rate_hz"):
        DataSidebands(symbol_rate_hz=0.0, data_to_carrier=1.0)
    with pytest.raises(ValueError, match="subcarrier_wave"):
        DataSidebands(symbol_rate_hz=1.0, data_to_carrier=1.0, subcarrier_wave="saw")


@pytest.mark.parametrize("wave", ["nrz", "square", "biphase"])
def test_a_tone_inside_the_data_is_taken_out_once_the_carrier_is_held(wave):
    # a tone 10 dB under the total power, 0.625 R_s from the carrier (inside the data's band; the subcarrier's lines
    # at the carrier +- 4 R_s stay clear): found when the carrier is first tracked and taken out of the samples, so
    # the symbols are as the genie recovers them from the recording *without* the tone (at most 3 standard
    # deviations of the discordant decisions, plus 0.2 %); the receiver that kept the tone made 1.5-9 times
    # the genie's errors
    sig = rs.transmit(16_000, wave=wave, sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX,
                      subcarrier_hz=4.0 * RATE, esn0_db=3.0, carrier_hz=CARRIER, clock_ppm=20.0, seed=3)
    tone_hz = CARRIER + 0.625 * RATE
    y = _with_tone(sig.samples, tone_hz, -10.0)
    demod, soft, pos, track = _demodulate(wave, y)
    assert demod.stats.carrier_found == 1
    assert len(demod.stats.tones_hz) == 1 and abs(demod.stats.tones_hz[0] - tone_hz) < 1.0
    wrong, _ = _errors(sig, y, soft, pos, 4000)
    _, g_clean = _errors(sig, sig.samples, soft, pos, 4000)
    assert wrong.size > 0.95 * 12_000
    discordant = np.count_nonzero(wrong != g_clean)
    assert wrong.sum() - g_clean.sum() <= 3.0 * math.sqrt(discordant + 1) + 0.002 * wrong.size, \
        (wrong.mean(), g_clean.mean())


def test_a_tone_that_comes_up_mid_pass_is_taken_out_soon():
    # the same tone switched on 2 s into an 8 s NRZ pass: the samples' power rises 0.4 dB and the receiver looks for
    # new tones in the next block (and about every 2 s in any case), so from 0.5 s after the onset the symbols are as
    # the genie recovers them without the tone.  Before, it looked every 256 blocks (65 s here): the rest of the pass
    # went with the tone
    sig = rs.transmit(16_000, wave="nrz", sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX,
                      esn0_db=3.0, carrier_hz=CARRIER, clock_ppm=20.0, seed=3)
    tone_hz = CARRIER + 0.625 * RATE
    onset = int(2.0 * FS)
    y = sig.samples.copy()
    y[onset:] = _with_tone(sig.samples, tone_hz, -10.0)[onset:]
    demod, soft, pos, track = _demodulate("nrz", y)
    assert len(demod.stats.tones_hz) == 1 and abs(demod.stats.tones_hz[0] - tone_hz) < 1.0
    first = int(sig.symbol_index(onset + int(0.5 * FS)))
    wrong, _ = _errors(sig, y, soft, pos, first)
    _, g_clean = _errors(sig, sig.samples, soft, pos, first)
    assert wrong.size > 0.95 * (16_000 - first)
    discordant = np.count_nonzero(wrong != g_clean)
    assert wrong.sum() - g_clean.sum() <= 3.0 * math.sqrt(discordant + 1) + 0.002 * wrong.size, \
        (wrong.mean(), g_clean.mean())


def test_the_carrier_and_the_subcarrier_are_never_taken_out():
    # PCM/PSK/PM on a square subcarrier, carrier held, no tone: nothing is taken out (the carrier's line and the
    # subcarrier's are the signal's own)
    sig = rs.transmit(16_000, wave="square", sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX,
                      subcarrier_hz=4.0 * RATE, esn0_db=12.0, carrier_hz=CARRIER, clock_ppm=20.0, seed=8)
    demod, _, _, track = _demodulate("square", sig.samples)
    assert demod.stats.carrier_found == 1 and demod.stats.tones_hz == []
    assert sum(t.carrier_locked for t in track) >= 0.8 * len(track)
