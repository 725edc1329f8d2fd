"""The waterfall accumulator: any chunking and any cut into segments give the same rows, and a tone
lands in its bin (a numpy FFT of the same window is the outside reference)."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.chain import FrameLog
from pipeline.report import Waterfall, waterfall_row_samples


def _signal(n, rng):
    t = np.arange(n)
    x = np.exp(2j * np.pi * 0.1 * t) + 0.1 * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
    return x.astype(np.complex64)


def test_any_chunking_gives_the_same_rows(rng):
    x = _signal(50_000, rng)
    ref = Waterfall(row_samples=2048, nfft=256)
    ref.feed(x, 0)
    rows_ref, db_ref = ref.result()
    for _ in range(5):
        w = Waterfall(row_samples=2048, nfft=256)
        cuts = np.sort(rng.choice(np.arange(1, len(x)), size=7, replace=False))
        for a, b in zip(np.r_[0, cuts], np.r_[cuts, len(x)]):
            w.feed(x[a:b], int(a))
        rows, db = w.result()
        np.testing.assert_array_equal(rows, rows_ref)
        np.testing.assert_allclose(db, db_ref, rtol=0, atol=1e-4)


def test_segments_add_up_to_the_unbroken_rows(rng):
    x = _signal(40_000, rng)
    whole = Waterfall(row_samples=1024, nfft=128)
    whole.feed(x, 0)
    parts = []
    for a, b in ((0, 13_000), (13_000, 27_500), (27_500, 40_000)):
        w = Waterfall(row_samples=1024, nfft=128, owned=(a, b))
        lo, hi = max(0, a - 3000), min(len(x), b + 500)  # lead-in and lead-out, as a segment reads them
        w.feed(x[lo:hi], lo)
        parts.append(w)
    total = parts[0]
    for w in parts[1:]:
        total.add(w)
    np.testing.assert_array_equal(total.result()[0], whole.result()[0])
    np.testing.assert_allclose(total.result()[1], whole.result()[1], rtol=0, atol=1e-4)


def test_a_tone_lands_in_its_bin_with_the_power_numpy_gives():
    nfft = 256
    x = np.exp(2j * np.pi * (32 / nfft) * np.arange(4 * nfft)).astype(np.complex64)
    w = Waterfall(row_samples=nfft, nfft=nfft, ffts_per_row=1)
    w.feed(x, 0)
    _, db = w.result()
    win = np.hanning(nfft)
    ref = np.abs(np.fft.fftshift(np.fft.fft(x[:nfft] * win))) ** 2 / np.sum(win ** 2)  # numpy (outside reference)
    ref_db = 10 * np.log10(np.maximum(ref, 1e-30))
    near = ref_db > ref_db.max() - 60  # below that, float32 rounding of the samples dominates
    np.testing.assert_allclose(db[0][near], ref_db[near], atol=1e-3)
    assert int(np.argmax(db[0])) == nfft // 2 + 32


def test_rows_stay_bounded_on_an_endless_stream(rng):
    w = Waterfall(row_samples=64, nfft=64, ffts_per_row=1)
    x = _signal(64 * 5000, rng)
    for k in range(0, len(x), 10_000):
        w.feed(x[k:k + 10_000], k)
    rows, _ = w.result()
    assert len(rows) <= 2048 and w.effective_row_samples > 64
    assert waterfall_row_samples(None, 1e6) == 1000448  # one second, rounded up to whole FFTs of 512
    assert waterfall_row_samples(20_000_000, 1e6) == 33792


@pytest.mark.parametrize("kwargs", [dict(row_samples=100, nfft=64), dict(row_samples=128, nfft=100),
                                    dict(row_samples=128, nfft=64, ffts_per_row=0)])
def test_bad_arguments(kwargs):
    with pytest.raises(ValueError, match="Argument '"):
        Waterfall(**kwargs)


def test_frame_log_keeps_every_frame_then_thins_evenly():
    from types import SimpleNamespace

    log = FrameLog()
    for i in range(3000):
        log.append(SimpleNamespace(position=float(i), status="ok" if i % 3 else "rs_uncorrectable",
                                   rs_corrected=(i % 5, -1) if i % 7 == 0 else (i % 5,), asm_errors=i % 4,
                                   flywheel=False, clcw=None))
    a = log.arrays()
    assert len(log) == 3000 and a["stride"] == 1
    assert a["statuses"] == ["rs_uncorrectable", "ok"]
    assert a["rs_corrected"][0] == -1 and a["rs_corrected"][1] == 1 and a["asm_errors"][3] == 3
    assert np.all(a["clcw_report_value"] == -1)


def test_track_log_is_bounded_and_keeps_its_newest_points_exact(monkeypatch):
    # an endless live stream must not grow the track without bound (constant memory); the newest points,
    # which the frames' Es/N0 is looked up in, stay exact, the history grows coarser with its age
    from types import SimpleNamespace

    import pipeline.chain._backend as backend

    monkeypatch.setattr(backend, "MAX_TRACK_LOG", 64)
    log = backend.TrackLog()
    for i in range(1000):
        log.residual_hz.append(float(i) / 10)  # as process_track extends them, one per track point
        log.predicted_hz.append(float(i) / 100)
        log.append(SimpleNamespace(position=100.0 * i, carrier_offset_hz=float(i), esn0_db=float(i % 50),
                                   carrier_locked=True, symbol_locked=i % 2 == 0, modulation_index_rad=1.2))
    a = log.arrays()
    n = len(log.position)
    assert 32 <= n <= 64 and len(log.modulation_index_rad) <= 64
    assert all(len(getattr(log, k)) == n for k in backend._ALIGNED)
    assert np.all(np.diff(a["position"]) > 0) and a["position"][-1] == 99_900.0
    # every entry still holds its own track point's values
    np.testing.assert_array_equal(a["carrier_hz"] * 100.0, a["position"])
    np.testing.assert_array_equal(a["residual_hz"] * 1000.0, a["position"])
    np.testing.assert_allclose(a["predicted_hz"] * 10000.0, a["position"], rtol=1e-12)
    # the newest 32 points are all there, so a frame's Es/N0 lookup near the end is exact
    assert a["position"][-32:].tolist() == [100.0 * i for i in range(968, 1000)]
    assert log.esn0_at(99_950.0) == 49.0 and log.esn0_at(96_850.0) == 18.0
