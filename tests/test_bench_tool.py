"""``downlink bench`` plumbing (pipeline.tools._bench): the measurements run and report sane figures.

No figure is compared with a speed (no timed assertions): the checks are that every key exists,
that the bench's own test data are what they claim (16 RS errors per codeword, Viterbi output
length).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from pipeline.fec import rs_decode
from pipeline.tools import _bench

REQUIRED = ("viterbi_mbps", "rs_clean_mbps", "rs_16err_mbps", "turbo_r12_k8920_mbps", "turbo_r12_k8920_scalar_mbps",
            "ldpc_c2_mbps", "ldpc_c2_scalar_mbps", "ldpc_ar4ja_r12_k1024_mbps", "ldpc_ar4ja_r12_k1024_scalar_mbps",
            "frontend_msps", "end_to_end_msps", "end_to_end_realtime_factor", "peak_rss_mb", "cpu", "warm_start_s")


def test_cpu_model_is_named():
    name = _bench.cpu_model()
    assert isinstance(name, str) and name.strip() and name != "unknown"


def test_peak_rss_is_plausible():
    big = np.ones(20_000_000, dtype=np.uint8)  # 20 MB touched: the high-water mark is at least that
    big[::4096] = 2
    assert _bench.peak_rss_mb() >= 19.0
    del big


def test_rs_bench_blocks_have_the_errors_they_claim():
    for errors in (0, 16):
        for block in _bench._rs_blocks(errors, 3):
            assert len(block) == 1275
            _, corrected = rs_decode(block, 16, 5)
            assert tuple(corrected) == (errors,) * 5  # E = 16 per codeword: CCSDS 131.0-B sec. 4


@pytest.fixture(scope="module")
def small_run():
    return _bench.measure(seconds=0.8, repeats=1, segmented_seconds=0, fresh_runs=2)


def test_measure_small_run_has_every_figure(small_run):
    res = small_run
    for key in REQUIRED:
        assert key in res, key
    for key, value in res.items():
        if isinstance(value, float) and key not in ("load_average_before", "load_average_after"):
            assert math.isfinite(value) and value > 0, (key, value)
    assert res["end_to_end_realtime_factor"] == pytest.approx(res["end_to_end_msps"], rel=1e-2)  # 1 Msample/s
    assert res["end_to_end_packets"] > 0
    assert 20 < res["peak_rss_mb"] < 4000
    text = _bench.format_table(res)
    assert "Viterbi r=1/2" in text and res["cpu"] in text
    json.dumps(res)  # one JSON object


def test_measure_bad_arguments():
    with pytest.raises(ValueError, match=r"Argument 'seconds' must be 0\.5\.\.600, not 0\.1\."):
        _bench.measure(seconds=0.1)
    with pytest.raises(ValueError, match=r"Argument 'repeats' must be 1\.\.20, not 0\."):
        _bench.measure(repeats=0)


@pytest.mark.parametrize("as_json", [True, False])
def test_run_bench_prints_one_json_object_or_a_table(monkeypatch, capsys, small_run, as_json):
    seen = {}

    def fake_measure(**kwargs):
        seen.update(kwargs)
        return small_run

    monkeypatch.setattr(_bench, "measure", fake_measure)
    assert _bench.run_bench(as_json=as_json, seconds=2.5) == 0
    assert seen["seconds"] == 2.5
    out = capsys.readouterr().out
    if as_json:
        assert json.loads(out) == json.loads(json.dumps(small_run))  # the whole of stdout is one object
    else:
        assert out.splitlines()[0].startswith("downlink bench: demo profile")
        assert any(line.startswith("end to end, 1 process") for line in out.splitlines())
