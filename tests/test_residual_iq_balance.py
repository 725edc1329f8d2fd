"""A receiver front end's I/Q imbalance on a residual-carrier link, measured on the carrier's mirror line and taken out
(pipeline.demod._iq.MirrorLine in the residual-carrier receiver).

I and Q paths that differ by 3 dB in gain and 15 degrees from quadrature leave the signal's mirror image 13 dB under
it; bench_impairments' turbo PCM/PM link at Es/N0 -1.5 dB lost 2 of its 20 packets to it.  A residual carrier is not
circular, so the suppressed-carrier receiver's estimate (E[x^2], tests/test_iq_balance.py) does not apply; the image
carries the carrier's line at minus its frequency instead.  Recordings come from ``tests/residual_signals.py``, an
independent PCM/PM transmitter (no pipeline code), whose carrier phase also gives the image left after the correction;
the image's level is checked against the image rejection ratio of a quadrature front end (the formula in
``_image_rejection_db``), and decisions against the same receiver on the balanced recording.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import demod_signals as ds
import numpy as np
import pytest
import residual_signals as rs

from pipeline.demod._iq import MirrorLine
from pipeline.demod.residual import ResidualCarrierDemodulator
from pipeline.demod.residual._kernels import track_carrier
from pipeline.profile import LinkSection, ReceiverSection

RATE, SPS, INDEX = 2000.0, 64, 1.2
FS = RATE * SPS
N_SYMBOLS = 16_000


def _signal(esn0_db: float, *, carrier_hz: float = 700.0, seed: int = 3, wave: str = "nrz"):
    return rs.transmit(N_SYMBOLS, wave=wave, sample_rate_hz=FS, symbol_rate_baud=RATE, index_rad=INDEX,
                       esn0_db=esn0_db, carrier_hz=carrier_hz, rate_hz_per_s=0.0, clock_ppm=20.0, seed=seed)


def _receive(y: np.ndarray, step: int = 1 << 17, **receiver):
    """The receiver over ``y`` in chunks of ``step``: its soft symbols and their positions, whether the image was taken
    out of each chunk's last block, and the receiver."""
    link = LinkSection(modulation="pcm-pm", symbol_rate_baud=RATE, line_code="nrz-l", pulse="rect",
                       modulation_index_rad=INDEX)
    demod = ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(**receiver), sample_rate_hz=FS)
    out, applied = [], []
    for a in range(0, y.size, step):
        out.append(demod.process(SimpleNamespace(samples=y[a:a + step], start=a, nonfinite=0)))
        applied.append(demod._image.applied)
    out.append(demod.flush())
    return np.concatenate([b.soft for b in out]), np.concatenate([b.position for b in out]), applied, demod


def _aligned(sig, soft: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """The soft symbols of the pass's last 80 % times their sent levels (positive when right)."""
    k = sig.symbol_index(pos)
    keep = (k >= N_SYMBOLS // 5) & (k < N_SYMBOLS)
    v = soft[keep] * (1.0 - 2.0 * sig.bits[k[keep]].astype(np.float64))
    return -v if v.mean() < 0 else v  # the data's sign ambiguity (the frame synchronizer resolves it)


def _soft_snr_db(sig, soft: np.ndarray, pos: np.ndarray) -> float:
    """``mean^2 / variance`` of the aligned soft symbols (2 Es/N0 for an ideal receiver), dB."""
    v = _aligned(sig, soft, pos)
    return 10.0 * math.log10(v.mean() ** 2 / v.var())


def test_mirror_sums_against_numpy():
    # the carrier loop's block sums against numpy over the phases it rotated each sample by (exact phasor)
    sig = _signal(10.0)
    _, _, _, demod = _receive(sig.samples[: 1 << 18])
    assert demod._cs[0]["locked"]
    params = demod._cparams.copy()
    params[0]["table_phasor"] = 0
    state = demod._cs.copy()
    for name in ("sum_re", "sum_re2", "sum_im", "img_re", "img_im", "dbl_re", "dbl_im"):
        state[0][name] = 0.0
    x = sig.samples[1 << 18: (1 << 18) + 20000]
    n = x.size
    gain = 0.37
    u, lk, ph = np.empty(n, np.float32), np.empty(n, np.int8), np.empty(n, np.float64)
    track_carrier(x, gain, params, state, demod._cos, demod._sin, np.arange(n, dtype=np.int64), u,
                  np.empty(0, np.float32), lk, ph)
    g = gain * x.astype(np.complex128)
    st = state[0]
    direct = np.sum(g * np.exp(-1j * ph))
    np.testing.assert_allclose([st["sum_re"], st["sum_im"]], [direct.real, direct.imag], rtol=1e-9, atol=1e-6)
    mirror = np.sum(g * np.exp(1j * ph))
    np.testing.assert_allclose([st["img_re"], st["img_im"]], [mirror.real, mirror.imag], rtol=1e-9, atol=1e-6)
    double = np.sum(np.exp(2j * ph))
    np.testing.assert_allclose([st["dbl_re"], st["dbl_im"]], [double.real, double.imag], rtol=1e-9, atol=1e-6)


def test_sums_brought_back_to_the_recorded_samples():
    # MirrorLine.update on sums over corrected samples gives the estimate of the recorded ones: a line a e^{j w k} with
    # its image b e^{-j w k}, rotated by the exact phase w k, corrected with any rho0 first
    n, w = 4096, 0.05
    k = np.arange(n)
    a, b = 0.8 * np.exp(0.4j), 0.1 - 0.07j
    x = a * np.exp(1j * w * k) + b * np.conj(a * np.exp(1j * w * k))
    direct_true = np.sum(x * np.exp(-1j * (w * k + np.angle(a))))
    mirror_true = np.sum(x * np.exp(1j * (w * k + np.angle(a))))
    double = np.sum(np.exp(2j * (w * k + np.angle(a))))
    truth = (mirror_true - direct_true / n * double) / np.conj(direct_true)
    assert abs(truth - b) < 1e-3  # the line's image ratio, the direct line's leak taken out
    for rho0 in (0j, 0.05 + 0.02j, -0.2 + 0.1j):
        est = MirrorLine()
        est._used = rho0
        y = x - rho0 * np.conj(x)
        th = w * k + np.angle(a)
        est.update(n, complex(np.sum(y * np.exp(-1j * th))), complex(np.sum(y * np.exp(1j * th))), complex(double))
        assert abs(est.rho - truth) < 1e-12
    est.conjugate()
    assert abs(est.rho - np.conj(truth)) < 1e-12


@pytest.mark.parametrize("gain_db,phase_deg", [(1.0, 5.0), (3.0, 15.0), (-2.0, -8.0)])
def test_the_image_measured_as_theory_has_it_and_taken_out(gain_db, phase_deg):
    sig = _signal(6.0)
    y = ds.imbalanced(sig.samples, gain_db, phase_deg)
    _, _, applied, demod = _receive(y)
    im = demod._image
    # (the report's figure is the image taken out of the last block: the estimate before that block's sums)
    assert applied[-1] and abs(demod.stats.iq_image_db - im.image_db) < 0.5
    # within 4 of the estimate's standard deviations (MirrorLine Notes: at most 1 / (a sqrt(N)))
    a = abs(im._dir) / im._len
    std = 1.0 / (a * math.sqrt(im._n_eff))
    r = 10.0 ** (-ds.image_rejection_db(gain_db, phase_deg) / 20.0)
    assert abs(abs(im.rho) - r) < 4.0 * std
    # the image left in the corrected samples, on the transmitter's own carrier phase: the estimate's noise
    z = y.astype(np.complex128) - im.rho * np.conj(y.astype(np.complex128))
    ph = sig.carrier_phase(np.arange(z.size))
    left = np.mean(z * np.exp(1j * ph)) / np.conj(np.mean(z * np.exp(-1j * ph)))
    assert abs(left) < 4.0 * std


def test_a_balanced_front_end_is_never_touched():
    for seed in range(4):
        for esn0_db in (3.0, 12.0):
            sig = _signal(esn0_db, seed=20 + seed)
            _, _, applied, demod = _receive(sig.samples)
            assert not any(applied) and demod.stats.iq_image_db is None


@pytest.mark.parametrize("esn0_db", [0.0, 12.0])
def test_soft_symbols_with_an_image_13_db_down_as_without_it(esn0_db):
    # the soft symbols' SNR within 0.12 dB of the balanced recording's (the same noise); without the correction the
    # image cost 0.22 dB at Es/N0 0 dB and 0.60 dB at 12 dB, and the decisions' errors with it (1079 against 1026 of
    # 12800 at 0 dB)
    sig = _signal(esn0_db)
    balanced = _soft_snr_db(sig, *_receive(sig.samples)[:2])
    soft, pos, applied, _ = _receive(ds.imbalanced(sig.samples, 3.0, 15.0))
    assert applied[-1] and pos.size > 0.95 * N_SYMBOLS
    assert _soft_snr_db(sig, soft, pos) > balanced - 0.12


def test_chunking_does_not_change_the_symbols():
    sig = _signal(6.0)
    y = ds.imbalanced(sig.samples, 3.0, 15.0)
    a = _receive(y)
    b = _receive(y, step=12_345)
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])


def test_a_carrier_at_0_hz_is_left_alone():
    # at 0 Hz the carrier and its mirror are one line: no block is measured, nothing is taken out
    sig = _signal(6.0, carrier_hz=0.0)
    _, _, applied, demod = _receive(ds.imbalanced(sig.samples, 3.0, 15.0))
    assert not any(applied) and demod._image._blocks == 0 and demod._cs[0]["locked"]


def test_pcm_pm_link_with_an_imbalanced_front_end_and_the_report(tmp_path):
    # a PCM/PSK/PM link (square subcarrier, convolutional r=1/2) through pipeline.decode: every packet, and the report
    # names the image taken out, at the level theory gives
    import json

    from test_residual_end_to_end import CASES, _profile

    from pipeline import decode
    from pipeline.sim import simulate

    prof = _profile(**{**CASES["psk-square-conv"], "seconds": 4.0})
    sim = simulate(prof, tmp_path / "clean")
    x = np.fromfile(sim.data_path, dtype=np.complex64)
    got = decode(ds.rewritten_recording(sim, ds.imbalanced(x, 3.0, 15.0), tmp_path / "iq"), prof, tmp_path / "out")
    assert got.packets == sim.num_packets and got.frames_failed == 0
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert abs(-report["demod"]["iq_image_removed_db"] - ds.image_rejection_db(3.0, 15.0)) < 0.5
    assert "mirror image" in report["pass"]["iq_note"]
    assert "I/Q balance:" in (tmp_path / "out" / "report.html").read_text()
