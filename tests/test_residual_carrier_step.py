"""A residual carrier that jumps in frequency mid-pass (a transponder switched between coherent and one-way, a
receiver retuned), or whose signal ends: the receiver searches again at once instead of after its lock detector's
lag and three unlocked blocks (pipeline.demod.residual._demodulator, ``_carrier_went``).

Recordings come from ``tests/residual_signals.py``, an independent PCM/PM transmitter (no pipeline code), made
noiseless and given their noise here, so that the signal can step in frequency or stop with the noise going on.
Decisions are checked against the bits it sent and against the same receiver on the same pass without the step.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import residual_signals as rs

from pipeline.demod.residual import ResidualCarrierDemodulator
from pipeline.profile import LinkSection, ReceiverSection

RATE, SPS = 2000.0, 64
FS = RATE * SPS
N_SYMBOLS = 16_000
BLOCK = 32768  # the receiver's block at 64 samples per symbol (512 symbols, 0.256 s)


def _pass(esn0_db: float, *, index: float = 1.2, step_hz: float = 0.0, off_s: float = 0.0, seed: int = 5):
    """The transmitter's signal, its carrier stepped by ``step_hz`` (continuous phase) or switched off for ``off_s``
    from the middle of the pass on, plus white noise at ``esn0_db`` (the transmitter's own convention)."""
    sig = rs.transmit(N_SYMBOLS, wave="nrz", sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=index, esn0_db=None,
                      carrier_hz=900.0, clock_ppm=20.0, seed=seed)
    x = sig.samples.astype(np.complex128)
    mid = x.size // 2 + 5000  # inside a block
    if step_hz:
        x[mid:] *= np.exp(2j * math.pi * step_hz * np.arange(x.size - mid) / FS)
    if off_s:
        x[mid:mid + int(off_s * FS)] = 0.0
    sigma = math.sqrt(sig.data_power * sig.period / 10.0 ** (esn0_db / 10.0) / 2.0)
    rng = np.random.default_rng(seed + 100)
    x += sigma * (rng.standard_normal(x.size) + 1j * rng.standard_normal(x.size))
    return sig, x.astype(np.complex64), mid


def _receive(y: np.ndarray, index: float = 1.2):
    link = LinkSection(modulation="pcm-pm", symbol_rate_baud=RATE, line_code="nrz-l", pulse="rect",
                       modulation_index_rad=index)
    demod = ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=FS)
    step = 1 << 17
    out = [demod.process(SimpleNamespace(samples=y[a:a + step], start=a, nonfinite=0)) for a in range(0, y.size, step)]
    out.append(demod.flush())
    demod.track = [tp for b in out for tp in b.track]
    return (np.concatenate([b.soft for b in out]), np.concatenate([b.position for b in out]),
            np.concatenate([b.locked for b in out]), demod)


def _wrong(sig, soft, pos, a: float, b: float) -> tuple[int, int]:
    """Wrong decisions of the symbols centred in samples [a, b) (the sign ambiguity taken from all of them), and how
    many there were (symbols not produced count as wrong)."""
    k = sig.symbol_index(pos)
    ok = (k >= 0) & (k < N_SYMBOLS)
    wrong_all = (soft[ok] < 0) != sig.bits[k[ok]].astype(bool)
    flip = wrong_all.mean() > 0.5
    expect = np.arange(N_SYMBOLS)[(sig.centre(np.arange(N_SYMBOLS)) >= a) & (sig.centre(np.arange(N_SYMBOLS)) < b)]
    got = dict(zip(k[ok].tolist(), ((soft[ok] < 0) != sig.bits[k[ok]].astype(bool)) ^ flip))
    return sum(1 for j in expect.tolist() if got.get(j, True)), int(expect.size)


def test_a_carrier_step_is_searched_for_at_once():
    # Es/N0 3 dB (P_c/N0 28 dB-Hz, a block's carrier 17 standard errors over 0): from the second block after the one
    # the 2 kHz step falls in, decisions as good as the same pass's without the step; before, the search started
    # only after the lock detector's two decision intervals and three unlocked blocks, about 1.3 s after the step
    sig, y, mid = _pass(3.0, step_hz=2000.0)
    soft, pos, locked, demod = _receive(y)
    sig0, y0, _ = _pass(3.0)
    soft0, pos0, _, demod0 = _receive(y0)
    assert demod.stats.carrier_moved == 1 and demod0.stats.carrier_moved == 0
    a = (mid // BLOCK + 2) * BLOCK
    b = a + 2 * FS  # 2 s from there
    e, n = _wrong(sig, soft, pos, a, b)
    e0, _ = _wrong(sig0, soft0, pos0, a, b)
    assert n > 3900 and e <= 1.2 * e0 + 10
    # the symbols of the block after the step's, where the carrier was found gone, are flagged unlocked
    after = (pos >= (mid // BLOCK + 1) * BLOCK) & (pos < (mid // BLOCK + 2) * BLOCK)
    assert after.any() and not locked[after].any()
    # and tracked where the step put it (the track points' mean frequency over their blocks)
    f_after = [tp.carrier_offset_hz for tp in demod.track if tp.position > a]
    assert len(f_after) > 10 and all(abs(f - 2900.0) < 2.0 for f in f_after)


def test_a_signal_that_stops_and_comes_back_is_not_counted_as_a_step():
    # the signal off for 1.5 s: searched at once when it goes, found again where it was (no carrier_moved), and the
    # decisions after it comes back as the pass's without the gap
    sig, y, mid = _pass(3.0, off_s=1.5)
    soft, pos, _, demod = _receive(y)
    sig0, y0, _ = _pass(3.0)
    soft0, pos0, _, _ = _receive(y0)
    assert demod.stats.carrier_moved == 0 and demod.stats.carrier_found >= 2
    a = mid + 1.5 * FS + 2 * BLOCK
    e, n = _wrong(sig, soft, pos, a, a + 1.5 * FS)
    e0, _ = _wrong(sig0, soft0, pos0, a, a + 1.5 * FS)
    assert n > 2900 and e <= 1.2 * e0 + 10


def test_a_weak_carrier_is_never_taken_for_gone():
    # Es/N0 -3 dB: P_c/N0 22 dB-Hz, a block's carrier 8.8 standard errors of its in-phase mean over 0 (the least the
    # check takes), so a block's mean under a quarter of it would be 6.6 of them out: over 31 blocks of each of three
    # passes the search never starts again (a carrier taken for gone would be found a second time)
    for seed in (5, 6, 7):
        sig, y, _ = _pass(-3.0, seed=seed)
        _, _, _, demod = _receive(y)
        assert demod.stats.carrier_found == 1 and demod.stats.carrier_moved == 0
