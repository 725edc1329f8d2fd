"""The bit error rate estimated from the decoders' corrections, and what build_report takes from the track.

Outside references: reedsolo (PyPI) encodes and decodes RS(255,223) codewords and says which octets it
corrected; the bit errors are thrown with numpy at a known rate, so the estimator is checked against the
errors actually made.  The exact binomial bound is checked against scipy.stats.
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.report import RunFacts, bit_error_estimate, bit_error_series, build_report
from pipeline.report._quality import octet_to_bit_error_rate, zero_count_bound


def test_estimate_from_reedsolo_corrections_matches_the_errors_made(rng):
    import reedsolo  # a test dependency in pyproject.toml

    codec = reedsolo.RSCodec(32)  # RS(255,223): 16 octets correctable per codeword
    p = 2e-3
    corrected, flipped, n_words = [], 0, 120
    for _ in range(n_words):
        word = bytearray(codec.encode(bytes(rng.integers(0, 256, 223, dtype=np.uint8))))
        errors = rng.random(255 * 8) < p
        flipped += int(errors.sum())
        noise = np.packbits(errors.astype(np.uint8))
        received = bytes(np.frombuffer(bytes(word), np.uint8) ^ noise)
        _, _, errata = codec.decode(received)
        corrected.append(len(errata))  # octets reedsolo corrected
    est = bit_error_estimate(corrected, np.zeros(n_words, int), codeblock_octets=255, rs_e=16, convolutional=False)
    made = flipped / (n_words * 255 * 8)
    assert est.method == "reed_solomon" and est.bits == n_words * 255 * 8 and est.errors == sum(corrected)
    # independent bit errors: the octet-to-bit conversion recovers the rate made, within sampling error
    # (about 4 % relative standard error for ~480 wrong octets); the burst limit s/N lies above it
    assert abs(est.estimate - made) < 0.15 * made, (est.estimate, made)
    assert est.upper > made and not est.lower_bound


def test_octet_conversion_and_zero_count_bound():
    import scipy.stats as scipy_stats

    # P = 1 - (1 - p)^8 inverted exactly (elementary probability)
    p = np.array([0.0, 1e-6, 1e-3, 0.05, 1.0])
    np.testing.assert_allclose(octet_to_bit_error_rate(1 - (1 - p) ** 8), p, rtol=1e-9, atol=1e-15)
    # no success in n trials: the 95 % upper bound is the Clopper-Pearson bound, beta.ppf(0.95, 1, n) (scipy)
    for n in (1, 10, 1000, 10**6):
        assert zero_count_bound(n) == pytest.approx(scipy_stats.beta.ppf(0.95, 1, n), rel=1e-9)


def test_failed_codeblocks_and_the_asm_estimator():
    e = bit_error_estimate([2, -1, 0], [0, 30, 0], codeblock_octets=1275, rs_e=16, convolutional=True)
    assert e.failed_codeblocks == 1 and e.lower_bound and e.errors == 2 + 17  # a failure counts E + 1 octets
    assert "Viterbi" in e.applies_to
    # without Reed-Solomon the ASM's 32 known bits are the count: 3 wrong bits in 4 frames
    a = bit_error_estimate([-2, -2, -2, -2, -2], [1, 0, 2, 0, -1], codeblock_octets=223, rs_e=0,
                           convolutional=False)
    assert a.method == "asm" and a.bits == 4 * 32 and a.errors == 3 and a.estimate == 3 / 128
    assert "channel bits" in a.applies_to
    s = bit_error_series(np.arange(10.0), [0] * 10, [0] * 10, codeblock_octets=255, rs_e=16, points=4)
    assert s["frames"].tolist() == [3, 3, 3, 1] and s["zero"].all()
    assert s["upper"][3] > s["upper"][0]  # one frame bounds the rate less tightly than three
    with pytest.raises(ValueError, match="Arguments 'rs_corrected' and 'asm_errors'"):
        bit_error_estimate([0, 1], [0], codeblock_octets=255, rs_e=16, convolutional=False)


def _facts(profile, **kw) -> RunFacts:
    base = dict(tool="downlink test", profile=profile, input_kind="iq", recording_info={}, duration_s=4.0,
                elapsed_s=1.0, position_rate_hz=1000.0)
    base.update(kw)
    return RunFacts(**base)


def test_esn0_trace_and_verdict_leave_out_unlocked_and_partial_blocks(demo_profile):
    # Track points every 100 positions (end of their block): unlocked noise first, lock gained in the block
    # ending at 500 (that block is partly noise), locked to 3000, then a 5-position block at the end of the
    # stream, whose Es/N0 the demodulator does not estimate (nan: a handful of symbols), then lost.
    pos = np.concatenate([np.arange(100.0, 3001.0, 100.0), [3005.0, 3100.0, 3200.0]])
    locked = (pos >= 500) & (pos <= 3005)
    esn0 = np.where(locked, 6.0, -12.0)
    esn0[pos == 500] = -4.0  # the acquisition block
    esn0[pos == 3005] = np.nan  # the short final block
    esn0[pos == 1500] = 4.0
    carrier = np.where(locked, 100.0 + pos / 100, 999.0)
    report, plots = build_report(_facts(demo_profile, track={"position": pos, "esn0_db": esn0, "carrier_hz": carrier,
                                                             "locked": locked}))
    used = locked & (pos != 500)
    np.testing.assert_array_equal(np.isfinite(plots.track_esn0_db), used & (pos != 3005))
    np.testing.assert_array_equal(np.isfinite(plots.track_carrier_hz), used)
    v = report["pass"]
    assert v["esn0_db_min"] == 4.0 and v["esn0_db_max"] == 6.0
    # mean of the power ratio: 25 points at 6 dB and one at 4 dB
    assert v["esn0_db_mean"] == round(10 * np.log10((24 * 10 ** 0.6 + 10 ** 0.4) / 25), 2)
    assert v["carrier_offset_hz_min"] == 106.0 and v["carrier_offset_hz_max"] == 130.1  # 130.05, one decimal
    # the lock window runs from the first to the last locked point, the time unknown here
    assert v["first_lock_s"] == 0.5 and v["last_lock_s"] == 3.005 and v["time_known"] is False
    assert v["first_lock_utc"] is None and plots.time_is_utc is False


def test_frames_missing_counts_only_frames_never_received(demo_profile):
    gaps = [
        {"kind": "mc", "missing": 5, "unusable_between": 0},
        {"kind": "vc", "missing": 5, "unusable_between": 0},  # the same frames, seen on their VC
        {"kind": "mc", "missing": 3, "unusable_between": 2},  # two received but failed: counted as failed
        {"kind": "apid", "missing": 7},
    ]
    report, _ = build_report(_facts(demo_profile, gaps=gaps, status_counts={"ok": 10, "idle": 2,
                                                                            "rs_uncorrectable": 2}, frames=14))
    v = report["pass"]
    assert v["frames_missing"] == 6 and v["frames_failed"] == 2 and v["frames_ok"] == 10 and v["frames_idle"] == 2


def _frame_log(n: int, **fields) -> dict:
    log = {"position": np.arange(n) * 100.0, "status": np.zeros(n, np.int8), "rs_corrected": np.full(n, -2),
           "asm_errors": np.zeros(n, np.int8), "flywheel": np.zeros(n, bool), "decoder_iterations": np.full(n, -1),
           "clcw_report_value": np.full(n, -1), "clcw_flags": np.zeros(n, np.int8), "statuses": ["ok"],
           "stride": 1}
    log.update(fields)
    return log


def test_decoder_iterations_lane_and_missing_spans(demo_profile):
    # a turbo link: the quality strip carries the iterations per frame; a master-channel gap of 3 frames is
    # drawn where it happened (the gap records use the output names after_sample_position / sample_position)
    turbo = demo_profile.with_changes(coding={"convolutional": "none", "reed_solomon": 0, "turbo": "1/2",
                                              "turbo_k": 1784}, frames={"length": 223, "fecf": True},
                                      link={"line_code": "nrz-l"})
    its = np.array([3, 4, 10, 2, 5], dtype=np.int64)
    gap = {"kind": "mc", "after_sample_position": 200.0, "sample_position": 600.0, "missing": 3,
           "unusable_between": 0}
    _, plots = build_report(_facts(turbo, frame_log=_frame_log(5, decoder_iterations=its), gaps=[gap]))
    np.testing.assert_array_equal(plots.frame_iterations, its)
    assert plots.frame_iterations_max == 10
    assert plots.missing_spans_s == [(0.2, 0.6)]
    # no iterative decoder on the demo link: no lane
    _, plain = build_report(_facts(demo_profile, frame_log=_frame_log(5)))
    assert plain.frame_iterations is None
