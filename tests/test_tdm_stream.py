"""``doppler.tdm`` written as the rows arrive (:class:`pipeline.orbit.TdmWriter`): constant memory on a live stream.

The message's layout is :func:`pipeline.orbit.format_tdm`'s (CCSDS 503.0-B KVN; its keywords, their order
and values are checked against ccsds-ndm's models generated from the CCSDS TDM XML schema in
tests/test_ndm_reference.py; what the keywords mean stays from memory, not confirmed, as listed in
pipeline/orbit/_tdm.py), which is the slow obvious reference here: the file
written row by row, in any split, equals ``format_tdm`` of all the rows.  The epochs are checked against
astropy's UTC (an outside reference), a leap second included.
"""

from __future__ import annotations

import math
import tracemalloc

import numpy as np
import pytest

from pipeline.orbit import TdmWriter, format_tdm, parse_tdm
from pipeline.timescales import format_utc, parse_utc

KEYS = dict(spacecraft="TAMARISK", station="HOLLOW RIDGE", downlink_frequency_hz=2.2455e9, tuning_offset_hz=-125.5)
CREATED = parse_utc("2026-03-14T12:00:00Z", assume_utc=True)


def _rows(n: int, rng, *, start: str = "2016-12-31T23:59:58.250Z", step_ns: int = 32_768_000) -> list[dict]:
    """Doppler rows as ``doppler_rows`` makes them: locked and not, a few without a finite offset."""
    t0 = parse_utc(start, assume_utc=True)
    rows = []
    for i in range(n):
        off = float(rng.normal(0.0, 3000.0))
        if i % 17 == 5:
            off = math.nan
        rows.append({"utc": format_utc(t0 + i * step_ns), "carrier_offset_hz": None if i % 23 == 7 else off,
                     "locked": i % 11 not in (0, 1), "position": 32768.0 * i + 16384.0})
    return rows


@pytest.mark.parametrize("seed", range(5))
def test_written_as_it_goes_equals_format_tdm_for_any_split(tmp_path, seed):
    rng = np.random.default_rng(seed)
    rows = _rows(300, rng)
    cuts = np.sort(rng.choice(np.arange(1, len(rows)), size=int(rng.integers(0, 12)), replace=False))
    w = TdmWriter(tmp_path / "doppler.tdm", **KEYS)
    for part in np.split(np.arange(len(rows)), cuts):
        w.process([rows[i] for i in part])
    path = w.finish(integration_interval_s=0.032768, creation_tai_ns=CREATED)
    want = format_tdm(rows, integration_interval_s=0.032768, creation_tai_ns=CREATED, **KEYS)
    assert path.read_text(encoding="ascii") == want
    assert sorted(p.name for p in tmp_path.iterdir()) == ["doppler.tdm"]  # the body file is gone
    kept = [r for r in rows if r["locked"] and r["carrier_offset_hz"] is not None
            and math.isfinite(r["carrier_offset_hz"])]
    obs = parse_tdm(want).segments[0].observations
    assert w.lines == len(obs) == len(kept) and w.locked_rows == sum(r["locked"] for r in rows)
    # the epochs cross the leap second at the end of 2016: UTC text as astropy writes it (outside reference)
    from astropy.time import Time

    tai = Time("1958-01-01T00:00:00", scale="tai")
    # astropy (PyPI) reads the UTC text as the same TAI instants, 23:59:60.x included
    seconds = (Time([epoch for _, epoch, _, _ in obs], scale="utc") - tai).to_value("s")
    np.testing.assert_allclose(seconds, np.array([t for _, _, t, _ in obs]) * 1e-9, rtol=0, atol=1e-6)
    for (_, epoch, _, value), r in zip(obs, kept):
        assert epoch == r["utc"][:-1]
        assert value == pytest.approx(KEYS["downlink_frequency_hz"] + r["carrier_offset_hz"] + KEYS["tuning_offset_hz"],
                                      abs=1e-6)
    assert any(epoch.startswith("2016-12-31T23:59:60") for _, epoch, _, _ in obs)


def test_no_rows_and_no_lock(tmp_path):
    w = TdmWriter(tmp_path / "a.tdm", **KEYS)
    w.process([{"utc": "2026-03-14T09:30:00Z", "carrier_offset_hz": 5.0, "locked": False}])
    assert w.lines == 0 and w.locked_rows == 0 and list(tmp_path.iterdir()) == []  # no body file opened
    # no data line, no message: a TDM holds at least one observation (minOccurs 1 in the CCSDS TDM XML schema,
    # as ccsds-ndm's generated models carry it; tests/test_ndm_reference.py), and format_tdm refuses alike
    assert w.finish(integration_interval_s=1.0, creation_tai_ns=CREATED) is None
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(ValueError, match="Argument 'rows' must hold a locked row with a finite carrier offset"):
        format_tdm([], integration_interval_s=1.0, creation_tai_ns=CREATED, **KEYS)
    # locked rows without a finite offset give no data line either: the body file is removed, nothing is written
    w.process([{"utc": "2026-03-14T09:30:01Z", "carrier_offset_hz": math.nan, "locked": True},
               {"utc": "2026-03-14T09:30:02Z", "carrier_offset_hz": None, "locked": True}])
    assert w.locked_rows == 2 and w.lines == 0
    assert w.finish(integration_interval_s=1.0, creation_tai_ns=CREATED) is None
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(ValueError, match="Argument 'integration_interval_s' must be > 0"):
        TdmWriter(tmp_path / "b.tdm", **KEYS).finish(integration_interval_s=0.0)
    with pytest.raises(ValueError, match="Argument 'station'"):
        TdmWriter(tmp_path / "b.tdm", **{**KEYS, "station": "A = B"})
    with pytest.raises(ValueError, match="Argument 'downlink_frequency_hz'"):
        TdmWriter(tmp_path / "b.tdm", **{**KEYS, "downlink_frequency_hz": -1.0})


def test_an_unfinished_message_is_never_passed_off_as_complete(tmp_path):
    rng = np.random.default_rng(3)
    w = TdmWriter(tmp_path / "doppler.tdm", **KEYS)
    w.process(_rows(50, rng))
    w.close()  # the run ended without finish (an error, or the process killed after its last flush)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["doppler.tdm.body.partial"]
    body = (tmp_path / "doppler.tdm.body.partial").read_text()
    assert body.count("RECEIVE_FREQ_1") == w.lines and "DATA_START" not in body
    w.discard()
    assert list(tmp_path.iterdir()) == []


def _sizes(obj) -> dict:
    """Length of every sized attribute of ``obj`` (lists, arrays, dicts, text)."""
    out = {}
    for name, value in vars(obj).items():
        try:
            out[name] = len(value)
        except TypeError:
            pass
    return out


def test_the_sinks_hold_no_rows_on_a_long_stream(tmp_path):
    # a live decode passes every track point's row to the folder sinks; what Python keeps must not grow with
    # the number of rows (before, 16 bytes a row were kept for doppler.tdm): the rows go to the body file
    from pipeline.chain._run import _TrackFolderSinks

    sinks = _TrackFolderSinks(tmp_path, tdm=KEYS)
    rng = np.random.default_rng(7)
    t0 = parse_utc("2026-03-14T09:30:00Z", assume_utc=True)
    batch, batches = 500, 44
    offsets = rng.normal(0.0, 3000.0, batch * batches)
    rows = [[{"utc": format_utc(t0 + i * 32_768_000), "carrier_offset_hz": float(offsets[i]), "locked": True,
              "position": 32768.0 * i} for i in range(k * batch, (k + 1) * batch)] for k in range(batches)]
    for k in range(4):
        sinks.doppler(rows[k])
    tracemalloc.start()  # the rows were made before: only what the sinks allocate is traced
    try:
        before = (_sizes(sinks), _sizes(sinks.tdm), tracemalloc.get_traced_memory()[0])
        for k in range(4, batches):  # 20000 rows more: 320 kB in the former arrays, 1.4 MB of data lines
            sinks.doppler(rows[k])
        after = (_sizes(sinks), _sizes(sinks.tdm), tracemalloc.get_traced_memory()[0])
    finally:
        tracemalloc.stop()
    assert after[0] == before[0] and after[1] == before[1]
    assert after[2] - before[2] < 64 * 1024, (before[2], after[2])
    assert sinks.tdm.lines == sinks.tdm.locked_rows == batches * batch
    sinks.close()
    assert not (tmp_path / "doppler.tdm").exists()  # only the body, until the run has ended
    sinks.finish_tdm(0.032768)
    text = (tmp_path / "doppler.tdm").read_text()
    assert text.count("\nRECEIVE_FREQ_1 = ") == batches * batch
    assert f"START_TIME = {format_utc(t0, zone=False)}" in text
    assert not (tmp_path / "doppler.tdm.body.partial").exists()
