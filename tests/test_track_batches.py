"""The locked tracker's batches (pipeline.demod._kernels.track_locked): acquisition untouched, batches on the
recording's sample grid, the symbol error rate of the per-symbol loop and of theory, exact continuation."""

from __future__ import annotations

import numpy as np
import pytest
from demod_signals import chunked, esn0_from_ser, modulate, symbol_errors, theory_ser

from pipeline.demod import Demodulator, SymbolBlock
from pipeline.demod._demodulator import _STAT_SYMBOLS
from pipeline.demod._kernels import BATCH_CELLS
from pipeline.profile import LinkSection, ReceiverSection

FS = 1e6  # demod_signals.modulate's defaults: 240 ksym/s at 1 Msample/s
CELL = _STAT_SYMBOLS / BATCH_CELLS * FS / 240e3  # a batch's cell, in samples


def _receiver(mod, pulse="rrc", batch=1.0):
    d = Demodulator(link=LinkSection(modulation=mod, pulse=pulse), receiver=ReceiverSection(), sample_rate_hz=FS)
    d._params[0]["batch"] = batch
    return d


def _run(d, samples, cuts=()):
    blocks = [d.process(c) for c in chunked(samples, list(cuts))] + [d.flush()]
    return tuple(np.concatenate([getattr(b, k) for b in blocks]) for k in ("soft", "position", "locked"))


def _pair(mod, samples, pulse="rrc"):
    """The same samples through a receiver with batches (the default) and one with the per-symbol loop only."""
    return [_run(_receiver(mod, pulse, batch), samples) for batch in (1.0, 0.0)]


@pytest.mark.parametrize("mod", ["bpsk", "qpsk"])
def test_acquisition_is_the_per_symbol_loop_and_lock_goes_in_batches(rng, mod):
    w = modulate(30000, modulation=mod, esn0_db=8.0, carrier_offset_hz=2400.0, clock_offset_ppm=50.0, rng=rng)
    (soft_b, pos_b, locked_b), (soft_s, pos_s, locked_s) = _pair(mod, w.samples)
    bps = 1 if mod == "bpsk" else 2
    first = int(np.argmax(locked_s[::bps]))
    assert locked_s[::bps][first] and first < 3000
    # up to the first carrier lock (symbol lock comes with it or later) the two are the same receiver
    np.testing.assert_array_equal(pos_b[:bps * (first + 1)], pos_s[:bps * (first + 1)])
    np.testing.assert_array_equal(soft_b[:bps * (first + 1)], soft_s[:bps * (first + 1)])
    # after it the batches run: the strobes move otherwise, and the lock holds as it did
    assert not np.array_equal(pos_b[bps * (first + 2000):], pos_s[bps * (first + 2000):pos_b.size])
    assert np.mean(locked_b[::bps][first + 2000:]) == 1.0


def test_the_receiver_batches_qpsk_only():
    """QPSK takes batches by default; BPSK, OQPSK and rect pulses keep the per-symbol loop (BPSK's small gain is not
    worth the kernel's compile on the demo's first run, DEVELOPERS.md)."""
    for mod, pulse, batch in (("qpsk", "rrc", 1.0), ("bpsk", "rrc", 0.0), ("oqpsk", "rrc", 0.0), ("qpsk", "rect", 0.0)):
        d = Demodulator(link=LinkSection(modulation=mod, pulse=pulse), receiver=ReceiverSection(), sample_rate_hz=FS)
        assert d._params[0]["batch"] == batch or (pulse == "rect" and d._params[0]["hbox"] > 0.0), (mod, pulse)


@pytest.mark.parametrize("mod, pulse", [("oqpsk", "rrc"), ("bpsk", "rect")])
def test_oqpsk_and_rect_pulses_keep_the_per_symbol_loop(rng, mod, pulse):
    """OQPSK (its rails' own strobes) and rect pulses (the exact integrate-and-dump) never batch, even when asked."""
    w = modulate(8000, modulation=mod, pulse=pulse, esn0_db=8.0, carrier_offset_hz=900.0, rng=rng)
    (soft_b, pos_b, _), (soft_s, pos_s, _) = _pair(mod, w.samples, pulse=pulse)
    np.testing.assert_array_equal(pos_b, pos_s)
    np.testing.assert_array_equal(soft_b, soft_s)


def test_batches_are_cells_of_the_recording_sample_grid(rng):
    """Within a cell of 16 nominal symbol periods the strobes are evenly spaced (the loops hold); at the
    cells' edges the spacing moves (the loops take the batch's errors), so segments of a recording that
    have converged take their batches at the same symbols."""
    w = modulate(40000, modulation="qpsk", esn0_db=6.0, carrier_offset_hz=2400.0, clock_offset_ppm=50.0, rng=rng)
    (_, pos, locked), _ = _pair("qpsk", w.samples)
    p = pos[::2][np.flatnonzero(locked[::2])[0] + 2000:]
    cell = np.floor(p / CELL).astype(np.int64)
    step = np.diff(p)
    same = cell[1:] == cell[:-1]
    # cells whose symbols are all spaced alike (a block's end splits a cell about once in 500)
    starts = np.flatnonzero(np.diff(cell)) + 1
    even = [np.ptp(step[a:b - 1]) < 1e-9 for a, b in zip(starts[:-1], starts[1:])]
    assert np.mean(even) > 0.99
    # the spacing changes at the cells' edges
    edge_change = np.abs(step[~same][1:] - step[np.flatnonzero(~same)[1:] - 1])
    assert np.mean(edge_change > 1e-9) > 0.9
    # 16 or 17 symbols to a cell (the symbol clock 50 ppm slow: a cell of 66.7 samples holds 16.0 periods)
    counts = np.diff(starts)
    assert set(np.unique(counts)) <= {15, 16, 17}


@pytest.mark.parametrize("mod, esn0_db", [("bpsk", 4.0), ("qpsk", 7.0)])
def test_symbol_errors_are_those_of_the_per_symbol_loop_and_of_theory(rng, mod, esn0_db):
    # Proakis, Digital Communications, 4th ed., eqs. 5.2-5 / 5.2-59 (theory_ser); a Doppler rate the carrier loop
    # follows with a lag of about 0.015 rad (2 pi R / wn^2 at B_L T = 0.002: the second-order loop's steady-state error
    # to a frequency ramp, F. M. Gardner, Phaselock Techniques, ch. 2; from memory)
    w = modulate(60000, modulation=mod, esn0_db=esn0_db, carrier_offset_hz=2400.0, doppler_rate_hz_per_s=-2000.0,
                 clock_offset_ppm=50.0, rng=rng)
    got = []
    for soft, pos, _ in _pair(mod, w.samples):
        errs, n, perr = symbol_errors(SymbolBlock(soft=soft, position=pos), w, mod, skip=4000)
        assert perr < 0.1
        got.append((errs, n))
    (e_b, n_b), (e_s, n_s) = got
    # the same noise: the two loops' errors differ by little (their difference's spread at most sqrt(e_b + e_s))
    assert abs(e_b - e_s) < 3.0 * np.sqrt(e_b + e_s)
    # implementation loss of the batches against theory below 0.2 dB (the per-symbol loop's: below 0.2 dB too)
    for e, n in got:
        assert esn0_db - esn0_from_ser(e / n, mod) < 0.2
    assert e_b / n_b > 0.3 * theory_ser(esn0_db, mod)  # errors are counted at all


def test_full_buffers_within_a_batch_continue_exactly(rng):
    """A call whose buffers fill within a batch keeps the batch in the state; the next call finishes it: with
    buffers of 2 symbols per call the output equals the one with buffers from the bound."""
    w = modulate(6000, modulation="qpsk", esn0_db=8.0, carrier_offset_hz=900.0, rng=rng)
    ref = _receiver("qpsk")
    small = _receiver("qpsk")
    small._min_symbol_advance = small.samples_per_symbol * 1e6  # cap = 2 + size / (huge) -> 2 per call
    a = _run(ref, w.samples, [7777, 20000])
    b = _run(small, w.samples, [7777, 20000])
    assert np.mean(a[2]) > 0.8  # locked: the batches ran
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])
