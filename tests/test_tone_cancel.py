"""CW tones in the band taken out before the matched filter (pipeline.demod._tones, cancel_tones).

A tone about as strong as a soft-decoded link's signal inside its band (a receiver spur, an interferer) cost every
codeword: bench_impairments' tone 6 dB under the samples' power left an AR4JA k=1024 QPSK link at Eb/N0 2.5 dB 133
packets of 595 and a turbo k=1784 QPSK link at 1.5 dB 1 of 595.  The acquisition already refused to take such a
tone for the carrier; now the demodulator finds it and takes it out of the samples.
"""

from __future__ import annotations

import json
import math

import demod_signals as ds
import numpy as np
import pytest

from pipeline import decode
from pipeline.demod import Demodulator, SymbolBlock
from pipeline.demod._kernels import cancel_tones
from pipeline.demod._tones import TONE_STRETCH, ToneCanceller, find_tones
from pipeline.profile import LinkSection, ReceiverSection, profile_from_dict
from pipeline.sim import simulate

FS = 1e6


def _cancel_reference(x: np.ndarray, n0: int, freqs_hz, fs: float, sub: int) -> np.ndarray:
    """Slow and obvious: per tone, per stretch of the grid, the mean of x exp(-j 2 pi f n) subtracted, in double."""
    y = x.astype(np.complex128)
    n = np.arange(n0, n0 + x.size)
    for f in freqs_hz:
        ph = np.exp(2j * np.pi * (f / fs) * n.astype(np.float64))
        last = 0j
        k = 0
        while k < x.size:
            stop = min(x.size, k + sub - (n0 + k) % sub)
            seg = slice(k, stop)
            if 2 * (stop - k) >= sub:
                a = np.mean(y[seg] * np.conj(ph[seg]))
                if stop - k == sub:
                    last = a
            else:
                a = last
            y[seg] -= a * ph[seg]
            k = stop
    return y


def test_cancel_tones_against_a_stretch_by_stretch_reference():
    rng = np.random.default_rng(21)
    n0, n = 1_000_003, 3 * TONE_STRETCH + 1234  # off the grid at both ends
    idx = np.arange(n0, n0 + n)
    freqs = [123_456.7, -301_234.5]
    x = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * 0.5
    for f, a in zip(freqs, (0.8, 2.0 + 1j)):
        x = x + a * np.exp(2j * np.pi * (f / FS) * idx)
    x = x.astype(np.complex64)
    ref = _cancel_reference(x, n0, freqs, FS, TONE_STRETCH)
    got = x.copy()
    amps = np.zeros(2, np.complex128)
    cancel_tones(got.view(np.float32), n0, np.array(freqs) / FS, TONE_STRETCH, amps)
    assert np.max(np.abs(got - ref)) < 2e-5 * np.max(np.abs(x))


def test_the_cut_into_blocks_does_not_matter():
    # blocks on the grid of stretches: the same samples out, bit for bit, whatever the blocks
    rng = np.random.default_rng(22)
    n = 16 * TONE_STRETCH
    x = ((rng.standard_normal(n) + 1j * rng.standard_normal(n)) +
         3.0 * np.exp(2j * np.pi * 0.0712345 * np.arange(n))).astype(np.complex64)
    whole = ToneCanceller(FS)
    whole.add([71234.5])
    one = whole.apply(x, 0)
    parts = ToneCanceller(FS)
    parts.add([71234.5])
    cuts = [0, TONE_STRETCH, 5 * TONE_STRETCH, 12 * TONE_STRETCH, n]
    pieces = [parts.apply(x[a:b], a) for a, b in zip(cuts[:-1], cuts[1:])]
    assert np.array_equal(np.concatenate(pieces), one)


def test_the_amplitude_taken_out_has_the_least_squares_error_and_nothing_else_is_touched():
    # the amplitude of a complex exponential of known frequency, estimated by least squares over L samples of complex
    # white noise of variance s2, has an error of variance s2 / L (the linear model's estimator, efficient: S. M. Kay,
    # Fundamentals of Statistical Signal Processing: Estimation Theory, 1993, ch. 4; from memory); what the
    # cancellation took out of each stretch is that estimate: its error over 64 stretches within 40 % of s2 / L
    # (a chi-square of 128 degrees of freedom: 3 standard deviations), and the rest of the samples' power is
    # the noise's, less the 1 / L of it at the tone's frequency
    rng = np.random.default_rng(23)
    stretches, f, s2, amp = 64, 0.1234567, 2.0, 10.0 * np.exp(0.7j)
    n = stretches * TONE_STRETCH
    t = np.arange(n)
    ph = np.exp(2j * np.pi * f * t)
    x = (amp * ph + math.sqrt(s2 / 2) * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)
    c = ToneCanceller(FS)
    c.add([f * FS])
    y = c.apply(x, 0).astype(np.complex128)
    taken = ((x.astype(np.complex128) - y) * np.conj(ph)).reshape(stretches, TONE_STRETCH).mean(axis=1)
    err = np.mean(np.abs(taken - amp) ** 2)
    assert abs(err / (s2 / TONE_STRETCH) - 1.0) < 0.4
    assert abs(np.mean(np.abs(y) ** 2) / (s2 * (1.0 - 1.0 / TONE_STRETCH)) - 1.0) < 0.01


def test_find_tones_sees_a_tone_20_db_under_the_samples_and_nothing_in_a_clean_band():
    rng = np.random.default_rng(24)
    w = ds.modulate(30_000, modulation="qpsk", esn0_db=3.0, carrier_offset_hz=2300.0, rng=rng)
    x = w.samples[:65536]
    assert find_tones(x, FS).size == 0
    p = float(np.mean(np.abs(x) ** 2))
    tone = math.sqrt(0.01 * p) * np.exp(2j * np.pi * (144_321.0 / FS) * np.arange(x.size))
    f = find_tones(x + tone, FS)
    # within a fifth of the periodogram's bin: the cancellation needs a tenth of a stretch's bin (fs / 4096), 8 times
    # coarser (a tenth of it off costs about 20 dB of the cancellation)
    assert f.size == 1 and abs(f[0] - 144_321.0) < 0.2 * FS / 32768
    # BPSK, noise alone, a DC offset: nothing
    b = ds.modulate(30_000, modulation="bpsk", esn0_db=10.0, rng=rng).samples[:65536]
    assert find_tones(b, FS).size == 0
    assert find_tones((rng.standard_normal(65536) + 1j * rng.standard_normal(65536) + 5.0), FS).size == 0


def test_a_line_spectrum_of_the_signal_itself_is_left_alone():
    # data that repeats (a 63-bit sequence sent over and over, no randomizer) has a spectrum of lines 3.8 kHz
    # apart: more than MAX_TONES narrow lines, so none is a tone
    rng = np.random.default_rng(25)
    seq = rng.integers(0, 2, 63).astype(np.uint8)
    bits = np.tile(seq, 600)
    w = ds.modulate(bits.size, modulation="bpsk", esn0_db=15.0, rng=rng, bits=(bits, np.zeros_like(bits)))
    assert find_tones(w.samples[:65536], FS).size == 0


def _demodulate(x: np.ndarray, mod: str, **rx) -> tuple[SymbolBlock, Demodulator]:
    d = Demodulator(link=LinkSection(modulation=mod), receiver=ReceiverSection(**rx), sample_rate_hz=FS)
    blocks = [d.process(ch) for ch in ds.chunked(x, [123_457, 400_000])] + [d.flush()]
    return SymbolBlock(soft=np.concatenate([b.soft for b in blocks]),
                       position=np.concatenate([b.position for b in blocks]),
                       locked=np.concatenate([b.locked for b in blocks])), d


@pytest.mark.parametrize("mod,inverted", [("qpsk", False), ("bpsk", False), ("qpsk", True)])
def test_a_tone_as_strong_as_the_signal_costs_the_decisions_nothing(mod, inverted):
    # Es/N0 1 dB, a tone of the signal's power 0.6 symbol rates from the carrier (inside the band): symbol errors
    # as without the tone (within 6 %; 1.2 to 1.4 times as many before), the tone found within a hundredth of a
    # stretch bin; a spectrally inverted recording (spectrum_inverted = true) finds it at its mirror image
    rng = np.random.default_rng(26)
    esn0 = 1.0
    w = ds.modulate(120_000, modulation=mod, esn0_db=esn0, carrier_offset_hz=-1500.0, clock_offset_ppm=20.0, rng=rng)
    f_tone = -1500.0 + 0.6 * 240e3
    n = np.arange(w.samples.size)
    snr = 10 ** (esn0 / 10) * 240e3 / FS  # signal over noise per sample: Es/N0 times Rs / fs
    sig_power = float(np.mean(np.abs(w.samples) ** 2)) * snr / (1.0 + snr)
    tone = math.sqrt(sig_power) * np.exp(2j * np.pi * (f_tone / FS) * n + 0.3j)
    clean, with_tone = w.samples, (w.samples + tone).astype(np.complex64)
    if inverted:
        clean, with_tone = np.conj(clean), np.conj(with_tone)
    rx = {"spectrum_inverted": True} if inverted else {}
    a, _ = _demodulate(clean, mod, **rx)
    b, d = _demodulate(with_tone, mod, **rx)
    e0, n0, _ = ds.symbol_errors(a, w, mod, skip=4000)
    e1, n1, _ = ds.symbol_errors(b, w, mod, skip=4000)
    assert n1 > 100_000 and e1 / n1 < 1.06 * e0 / n0
    seen = -f_tone if inverted else f_tone  # in the recording's frame
    assert len(d.stats.tones_hz) == 1 and abs(d.stats.tones_hz[0] - seen) < 0.01 * FS / TONE_STRETCH


@pytest.mark.parametrize("mod", ["qpsk", "bpsk"])
def test_a_tone_that_comes_up_mid_pass_is_taken_out_within_a_quarter_second(mod):
    # an interferer switched on 0.3 s into the pass (a tone of the signal's power, inside its band): the samples'
    # power rises, the receiver looks for new tones in the next block (and about every TONE_LOOK_S in any case), so
    # from 0.3 s after the onset on the symbols are as good as without it.  Before, it looked every 256 blocks (8.4 s
    # here) and the rest of the pass (0.7 s) went with the tone: 1.2 (QPSK) and 1.4 (BPSK) times the errors
    rng = np.random.default_rng(27)
    esn0 = 1.0
    w = ds.modulate(240_000, modulation=mod, esn0_db=esn0, carrier_offset_hz=2500.0, clock_offset_ppm=20.0, rng=rng)
    n = np.arange(w.samples.size)
    snr = 10 ** (esn0 / 10) * 240e3 / FS
    sig_power = float(np.mean(np.abs(w.samples) ** 2)) * snr / (1.0 + snr)
    onset = int(0.3 * FS)
    tone = np.where(n >= onset, math.sqrt(sig_power) * np.exp(2j * np.pi * ((2500.0 - 0.6 * 240e3) / FS) * n), 0.0)
    a, _ = _demodulate(w.samples, mod)
    b, d = _demodulate((w.samples + tone).astype(np.complex64), mod)
    after = onset + int(0.3 * FS)

    def later(blk: SymbolBlock) -> SymbolBlock:
        keep = blk.position >= after  # per channel bit (a QPSK symbol's two at its own position)
        return SymbolBlock(soft=blk.soft[keep], position=blk.position[keep], locked=blk.locked[keep])

    e0, n0, _ = ds.symbol_errors(later(a), w, mod, skip=0)
    e1, n1, _ = ds.symbol_errors(later(b), w, mod, skip=0)
    assert n1 > 90_000 and e1 / n1 < 1.06 * e0 / n0, (e1 / n1, e0 / n0)
    assert len(d.stats.tones_hz) == 1


def test_qpsk_link_with_an_in_band_tone_decodes_as_clean_and_the_report_names_it(tmp_path):
    from pipeline.tools._bench import QPSK_LINK

    prof = profile_from_dict(QPSK_LINK)
    sim = simulate(prof, tmp_path / "clean", seconds=0.4, seed=6, ebn0_db=4.0)
    clean = decode(sim.meta_path, prof, verify_checksum=False)
    x = np.fromfile(sim.data_path, dtype=np.complex64)
    p = float(np.mean(np.abs(x) ** 2))
    f_tone = 12e3 + 0.4 * 2e6
    y = (x + math.sqrt(0.5 * p) * np.exp(2j * np.pi * (f_tone / 5e6) * np.arange(x.size))).astype(np.complex64)
    got = decode(ds.rewritten_recording(sim, y, tmp_path / "tone"), prof, tmp_path / "out")
    assert got.packets == clean.packets == sim.num_packets and got.frames_failed == 0
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    removed = report["demod"]["tones_removed_hz"]
    assert len(removed) == 1 and abs(removed[0] - f_tone) < 0.1 * 5e6 / 32768
    assert f"{removed[0]:+.0f} Hz" in report["pass"]["tones_note"]
    assert "Interference:" in (tmp_path / "out" / "report.html").read_text()
    assert "tones_removed_hz" not in clean.report["demod"] and "tones_note" not in clean.report["pass"]
