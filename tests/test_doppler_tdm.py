"""``doppler.tdm``: the decode's carrier track as a CCSDS Tracking Data Message (CCSDS 503.0-B-2).

INTEGRATION_INTERVAL is the time over which each observable is averaged (the Doppler count time) and
INTEGRATION_REF = MIDDLE puts each epoch in the middle of its interval (CCSDS 503.0-B sec. 3.5; the keyword
names, value types and enumerations are checked against ccsds-ndm's models generated from the CCSDS TDM
XML schema in tests/test_ndm_reference.py, but their meanings stay from memory, not confirmed:
../shared/REFERENCES.md has no TDM section, and the schema does not say them).  The receiver averages
each track point over one processing block and the blocks tile the recording, so the epochs of consecutive
points are one interval apart: that spacing is measured on the file itself, on a link whose block is longer
than 32768 samples (more than 8 samples per symbol on the suppressed-carrier demodulator).
"""

from __future__ import annotations

import csv

import numpy as np
import pytest
from tdm_links import tdm_link_profile

from pipeline import decode, simulate
from pipeline.orbit import read_tdm

FS = 1_000_000.0


# blocks of the demodulators (DEVELOPERS.md): suppressed carrier max(32768, 2^ceil(log2(4096 T))), residual carrier
# max(32768, 2^ceil(log2(256 T))) samples at T samples per symbol: 65536 at T = 16 and at T = 200
@pytest.mark.parametrize("modulation, symbol_rate, seconds, block", [("bpsk", 62_500.0, 1.3, 65536),
                                                                  ("pcm-pm", 5_000.0, 2.4, 65536)])
def test_tdm_integration_interval_is_the_track_block_of_the_link(tmp_path, modulation, symbol_rate, seconds, block):
    prof = tdm_link_profile(modulation=modulation, symbol_rate=symbol_rate, seconds=seconds, sample_rate_hz=FS)
    sim = simulate(prof, tmp_path / "sim")
    out = tmp_path / "out"
    decode(sim.meta_path, prof, out)
    seg = read_tdm(out / "doppler.tdm").segments[0]
    interval = float(seg.meta["INTEGRATION_INTERVAL"])
    assert seg.meta["INTEGRATION_REF"] == "MIDDLE"
    # the epochs of consecutive observables, each the middle of its interval, lie one interval apart
    tai = np.array([obs[2] for obs in seg.observations], dtype=np.int64)
    assert tai.size >= 8
    spacing_s = np.diff(tai) * 1e-9
    symbol_s = 1.0 / symbol_rate
    assert np.median(spacing_s) == pytest.approx(interval, abs=symbol_s)
    inner = spacing_s[:-2]  # the recording ends inside a block: its last points average less
    assert np.all(np.abs(inner - interval) < 2 * symbol_s), spacing_s
    # ... and the interval is the receiver's block of this link, in seconds of the recording
    assert interval == pytest.approx(block / FS, rel=1e-9)
    # the rows of doppler.csv are the same blocks (positions in samples of the recording)
    with open(out / "doppler.csv", encoding="utf-8", newline="") as f:
        locked = [r for r in csv.DictReader(f) if r["locked"] == "True"]
    pos = np.array([float(r["sample_position"]) for r in locked])
    assert np.median(np.diff(pos)) == pytest.approx(block, abs=FS * symbol_s)
    # one RECEIVE_FREQ_1 per locked row: its epoch, and the received frequency = nominal + measured offset (the
    # simulator's recording is centred on the nominal downlink frequency)
    assert [(k, e) for k, e, _, _ in seg.observations] == [("RECEIVE_FREQ_1", r["utc"][:-1]) for r in locked]
    for (_, _, _, value), r in zip(seg.observations, locked):
        assert value == pytest.approx(prof.link.downlink_frequency_hz + float(r["carrier_offset_hz"]), abs=1e-6)
