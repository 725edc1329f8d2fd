"""pipeline.report: report.json, the self-contained report.html and its plots."""

from __future__ import annotations

import base64
import io
import json
import os
import struct
import zlib
from html.parser import HTMLParser

import numpy as np
import pytest

from pipeline.report import (
    CAUTION,
    KNOWN_SECTIONS,
    MAX_TABLE_ROWS,
    PlotData,
    jsonable,
    render_html,
    write_report,
)

_VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


class _Checker(HTMLParser):
    """Collects tags, <img> sources, text and external references; checks that elements nest."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.imgs: list[dict] = []
        self.tags: list[str] = []
        self.text: list[str] = []
        self.refs: list[str] = []
        self.attr_names: set[str] = set()

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        self.attr_names.update(a)
        if tag == "img":
            self.imgs.append(a)
        for key in ("href", "src"):
            if key in a and tag != "img":
                self.refs.append(a[key])
        if tag not in _VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if tag in _VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")
            return
        self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def _parse(doc: str) -> _Checker:
    c = _Checker()
    c.feed(doc)
    c.close()
    assert not c.errors, c.errors[:5]
    assert not c.stack, f"unclosed elements: {c.stack}"
    return c


def _png_chunks(data: bytes) -> list[bytes]:
    """Walk a PNG's chunks checking each CRC-32 (W3C PNG specification, sec. 5.3 and 5.4)."""
    assert data[:8] == _PNG_SIGNATURE  # PNG specification sec. 5.2: the 8-byte signature
    pos, kinds = 8, []
    while pos < len(data):
        (length,) = struct.unpack(">I", data[pos:pos + 4])
        kind = data[pos + 4:pos + 8]
        body = data[pos + 8:pos + 8 + length]
        (crc,) = struct.unpack(">I", data[pos + 8 + length:pos + 12 + length])
        assert zlib.crc32(kind + body) & 0xFFFFFFFF == crc
        kinds.append(kind)
        pos += 12 + length
    assert kinds[0] == b"IHDR" and kinds[-1] == b"IEND"
    return kinds


def _check_images(checker: _Checker) -> list[bytes]:
    pngs = []
    for img in checker.imgs:
        src = img["src"]
        prefix = "data:image/png;base64,"
        assert src.startswith(prefix)
        data = base64.b64decode(src[len(prefix):], validate=True)
        _png_chunks(data)
        pngs.append(data)
        assert img.get("alt")
    return pngs


def _full_plots(rng) -> PlotData:
    """Plot data of a 10 s pass on a UTC axis, every panel filled (what build_report would give)."""
    t0 = 1_773_480_600.0  # 2026-03-14T09:30:00Z, UTC seconds
    t = t0 + np.arange(200) * 0.05
    locked = t > t0 + 1.0
    ft = t0 + 1.2 + np.arange(100) * 0.085
    cat = np.zeros(100, np.int64)
    cat[[0, 99]] = 1
    cat[40] = 2
    rs = rng.integers(0, 12, 100)
    rs[40] = -1
    clcw_flags = np.zeros(100, np.int64)
    clcw_flags[60:70] = 2  # wait
    return PlotData(
        time_is_utc=True, span_s=(t0, t0 + 10.0),
        spectrum_freq_hz=np.linspace(-5e5, 5e5, 1024),
        spectrum_db=-60 + 3 * rng.standard_normal(1024),
        constellation=(rng.choice([-1.0, 1.0], 6000) + 0.2 * rng.standard_normal(6000)
                       + 0.2j * rng.standard_normal(6000)),
        waterfall_time_s=t0 + np.arange(101) * 0.1, waterfall_freq_hz=(np.arange(64) - 32) * 1e4,
        waterfall_db=-70 + rng.standard_normal((100, 64)),
        track_time_s=t, track_esn0_db=np.where(locked, 6 + np.sin(t - t0), np.nan),
        track_carrier_hz=np.where(locked, 1500 + 20 * (t - t0), np.nan), track_locked=locked,
        frame_time_s=ft, frame_duration_s=0.085, frame_category=cat, frame_rs_corrected=rs, frame_rs_max=80,
        frame_asm_errors=rng.integers(0, 3, 100), frame_flywheel=cat == 2,
        missing_spans_s=[(t0 + 5.0, t0 + 5.3)],
        ber_time_s=t0 + 1.5 + np.arange(10.0), ber_estimate=np.full(10, 1e-4), ber_upper=np.full(10, 1e-3),
        ber_zero=np.arange(10) == 3, ber_lower_bound=np.arange(10) == 4,
        clcw_time_s=ft, clcw_report_value=np.arange(100) // 10, clcw_flags=clcw_flags,
    )


def _sample_report() -> dict:
    return {
        "events": [{"position": 10.5, "kind": "lock"}, {"position": 99.0, "kind": "slip", "detail": "x"}],
        "custom_stage": {"alpha": 1, "beta": [1, 2, 3]},
        "schema_version": 1,
        "pass": {"first_lock_utc": "2026-03-14T09:30:01.000000000Z", "last_lock_utc": "2026-03-14T09:30:09.900000000Z",
                 "first_lock_s": 1.0, "last_lock_s": 9.9, "locked_s": 8.9, "lock_source": "receiver",
                 "lock_resolution_s": 0.05, "packets": 178, "packets_missing": 2, "frames_ok": 1200,
                 "frames_failed": 3, "frames_failed_flywheel": 1, "frames_missing": 4, "frames_idle": 40,
                 "esn0_db_mean": 6.02, "esn0_db_min": 5.1, "esn0_db_max": 7.0, "carrier_offset_hz_min": 1500.0,
                 "carrier_offset_hz_max": 1700.0, "bit_error_rate": 1e-4, "bit_error_rate_of": "the channel bits",
                 "time_known": True, "ert_definition": "ERT is the time of X."},
        "bit_error_rate": {"method": "reed_solomon", "applies_to": "the channel bits", "estimator": "p = ...",
                           "frames": 1200, "bits": 10_000_000, "errors": 125, "upper": 2e-4, "lower_bound": False},
        "summary": {"tool": "downlink 0.1.0", "profile": "tamarisk", "frames": 1243, "esn0_db": 6.02,
                    "locked": True, "missing": None},
        "recording": {"path": "pass.sigmf-data", "sample_rate_hz": 1e6},
        "frames": {"status_counts": {"ok": 1200, "rs_uncorrectable": 3}},
        "virtual_channels": [{"vcid": 0, "frames": 800}, {"vcid": 1, "frames": 443, "gaps": 1}],
        "apids": [{"apid": 100, "vcids": [0, 1], "packets": 50}, {"apid": 200, "packets": 20, "octets": 40000}],
        "gaps": [{"kind": "mc", "scid": 499, "vcid": None, "expected": 5, "got": 9, "missing": 4,
                  "unusable_between": 0, "ambiguous": False, "ert": "2026-03-14T09:30:05.300000000Z"},
                 {"kind": "apid", "apid": 100, "vcid": 0, "expected": 7, "got": 9, "missing": 2,
                  "ert": "2026-03-14T09:30:05.300000000Z"}],
        "clcw": {"frames_with_clcw": 100, "wait_frames": 10, "report_value_first": 0, "report_value_last": 9},
    }


def test_full_report_parses_and_embeds_valid_pngs(rng):
    doc = render_html(_sample_report(), _full_plots(rng))
    c = _parse(doc)
    pngs = _check_images(c)
    assert len(pngs) == 3  # the pass timeline, the receiver snapshot, the CLCW
    # Pillow (PyPI) decodes each image: an outside PNG decoder, not our own chunk walk
    from PIL import Image

    for data in pngs:
        with Image.open(io.BytesIO(data)) as im:
            im.verify()
    text = " ".join(c.text)
    assert CAUTION in text
    # self-contained: no script, no stylesheet link, only in-page anchors
    assert "script" not in c.tags and "link" not in c.tags and "iframe" not in c.tags
    assert all(r.startswith("#") for r in c.refs), c.refs
    assert "http://" not in doc and "https://" not in doc
    # every timeline panel is named in the caption, the bit error rate with its estimator
    for words in ("Waterfall", "Es/N0", "Carrier offset", "top lane", "Middle lane", "Bottom lane",
                  "Bit error rate of the channel bits", "How the bit error rate is estimated", "p = ..."):
        assert words in text, words


def test_page_order_verdict_first_counters_last_and_folded():
    doc = render_html(_sample_report(), None)
    _parse(doc)
    order = [doc.index(f'id="s-{k}"') for k in ("verdict", "channels", "apids", "clcw", "recording", "counters")]
    assert order == sorted(order)
    verdict = doc[doc.index('id="s-verdict"'):doc.index("</section>", doc.index('id="s-verdict"'))]
    for words in ("178 packets delivered; 1200 frames good, 3 failed, 4 missing.", "09:30:01.000", "09:30:09.900",
                  "mean 6.0 dB", "worst 5.1 dB", "1500.0", "1700.0", "0.0001", "ERT is the time of X."):
        assert words in verdict, words
    assert 'class="verdict warn"' in verdict  # failed and missing frames: not a clean pass
    # the counters the page does not place are inside one folded <details>, after everything else
    details = doc[doc.index('<details id="s-counters"'):]
    assert "custom_stage" in details.replace(" ", "_") and "status counts" in details and "events" in details
    # gap tables: the frame-count gap and the packet sequence gap each in their own table, lists joined
    channels = doc[doc.index('id="s-channels"'):doc.index('id="s-apids"')]
    assert "master channel" in channels and "<td>2026-03-14T09:30:05.300000000Z</td>" in channels
    apids = doc[doc.index('id="s-apids"'):doc.index('id="s-clcw"')]
    assert "<td>0, 1</td>" in apids and "<th>octets</th>" in apids and "ERT of the packet after the gap" in apids
    assert "schema version 1" in doc
    assert KNOWN_SECTIONS[0] == "pass"


def test_verdict_without_lock_or_time():
    report = _sample_report()
    report["pass"].update(first_lock_utc=None, last_lock_utc=None, first_lock_s=None, last_lock_s=None,
                          locked_s=None, lock_source=None, frames_ok=0, frames_failed=0, frames_missing=0,
                          packets=0, packets_missing=0, time_known=False)
    doc = render_html(report, None)
    verdict = doc[doc.index('id="s-verdict"'):]
    assert 'class="verdict bad"' in verdict and "No lock" in verdict and "Time is unknown" in verdict


def test_long_lists_are_capped():
    rows = [{"i": i, "v": i * 0.5} for i in range(MAX_TABLE_ROWS + 123)]
    doc = render_html({"events": rows}, None)
    part = doc[doc.index("<h3>events</h3>"):]
    part = part[:part.index("</details>")]
    assert part.count("<tr>") == MAX_TABLE_ROWS + 1  # header row + the rows shown
    assert f"123 more rows not shown ({MAX_TABLE_ROWS + 123} in all" in part
    _parse(doc)


def test_everything_from_the_data_is_escaped():
    evil = '<script>alert("x")</script>&<img src=x onerror=1>'
    report = {
        "summary": {evil: evil, "profile": evil},
        evil: [{evil: evil, "n": 1}, {"other": [evil]}],
        "events": [evil, {"kind": evil}],
        "pass": {"ert_definition": evil, "first_lock_utc": evil, "bit_error_rate_of": evil},
        "gaps": [{"kind": "apid", "apid": evil, "ert": evil}],
        "clcw": {"frames_with_clcw": evil},
    }
    plots = PlotData(frame_time_s=[1.0, 2.0], frame_category=[0, 2], track_time_s=[1.0, 2.0],
                     track_esn0_db=[3.0, 4.0], spectrum_freq_hz=[1.0, 2.0], spectrum_db=[1.0, 2.0])
    doc = render_html(report, plots)
    c = _parse(doc)
    assert "<script" not in doc and "script" not in c.tags
    assert not [n for n in c.attr_names if n.startswith("on")]  # no event-handler attribute got through
    assert len(c.imgs) == 2  # the timeline and the snapshot: no <img> injected by the data
    assert "&lt;script&gt;" in doc
    assert evil in " ".join(c.text)  # the text survives, shown literally
    _check_images(c)


def test_empty_report_and_empty_sections_render():
    for report in ({}, {"summary": {}, "frames": [], "events": [], "sync": {}, "gaps": None}):
        doc = render_html(report, PlotData())
        c = _parse(doc)
        assert c.imgs == []
        text = " ".join(c.text)
        assert CAUTION in text
        assert text.count("not shown:") == 2  # the timeline and the snapshot, each with a note; no CLCW section
        assert "CLCW" not in text


def test_bad_plot_data_is_a_note_not_a_crash():
    plots = PlotData(
        spectrum_freq_hz=np.arange(10.0), spectrum_db=np.arange(12.0),  # lengths differ
        constellation=np.full(5, np.nan + 0j),  # nothing finite
        track_time_s=np.arange(4.0), track_esn0_db=["a", "b", "c", "d"],  # not numeric
        track_carrier_hz=np.arange(3.0),  # wrong length
        frame_time_s=np.arange(3.0), frame_category=np.zeros(2),  # wrong length
        clcw_time_s=np.arange(3.0), clcw_report_value=np.arange(3), clcw_flags=None,  # flags missing
    )
    doc = render_html({"summary": {"frames": 0}}, plots)
    c = _parse(doc)
    assert c.imgs == []
    text = " ".join(c.text)
    assert "lengths differ (10 and 12)" in text and "no finite values" in text
    assert "not numeric" in text and "track time and carrier offset lengths differ (4 and 3)" in text
    assert "frame status and its times lengths differ (3 and 2)" in text and "no CLCW" in text
    # only the carrier track usable: the timeline is drawn with just that panel, the others named in a note
    doc = render_html({}, PlotData(track_time_s=np.arange(4.0), track_carrier_hz=np.arange(4.0),
                                   track_esn0_db=np.full(4, np.nan)))
    c = _parse(doc)
    assert len(_check_images(c)) == 1 and "not shown: Es/N0 (no Es/N0 while locked)" in " ".join(c.text)


def test_time_axis_utc_or_seconds(rng):
    """The bottom axis reads UTC when the time is known, seconds from the start otherwise (tick text in the PNG
    cannot be read back, so the axis objects are checked through the same drawing code)."""
    from pipeline.report._plots import _Axis

    d = _full_plots(rng)
    assert _Axis(d).utc and _Axis(d).x(86400.0) == 1.0  # matplotlib date numbers: days since 1970
    d.time_is_utc = False
    assert not _Axis(d).utc and _Axis(d).x(5.0) == 5.0
    doc = render_html(_sample_report(), d)
    assert len(_check_images(_parse(doc))) == 3


def test_jsonable_and_write_report(tmp_path, rng):
    report = _sample_report()
    report["demod"] = {"esn0_db": np.float32(5.5), "lock": np.bool_(True), "nan": float("nan"),
                       "inf": np.float64("inf"), "n": np.int64(7), "arr": np.arange(3), "raw": b"\x01\xff",
                       "z": 1 + 2j, "t": (1, 2)}
    out = tmp_path / "deep" / "run"
    write_report(out, report, _full_plots(rng))
    assert sorted(os.listdir(out)) == ["report.html", "report.json"]

    def _no_constants(name):
        raise AssertionError(f"non-standard JSON constant {name}")

    back = json.loads((out / "report.json").read_text(encoding="utf-8"), parse_constant=_no_constants)
    assert back["demod"] == {"esn0_db": 5.5, "lock": True, "nan": None, "inf": None, "n": 7, "arr": [0, 1, 2],
                             "raw": "01ff", "z": [1.0, 2.0], "t": [1, 2]}
    assert back["summary"] == jsonable(report["summary"])
    assert len(_check_images(_parse((out / "report.html").read_text(encoding="utf-8")))) == 3
    with pytest.raises(TypeError, match="Argument 'report' must be a dict"):
        write_report(out, [1, 2], None)


def test_long_series_are_thinned_without_losing_peaks(rng):
    from pipeline.report._plots import MAX_LINE_BINS, _envelope, _runs, _worst_per_bin

    n = 300_001
    x = np.arange(n, dtype=np.float64)
    y = rng.standard_normal(n)
    y[123_457] = 50.0  # a narrow spectral line must survive the thinning
    y[7] = -50.0
    y[1000:1100] = np.nan
    tx, ty = _envelope(x, y)
    assert ty.size <= 2 * MAX_LINE_BINS and np.all(np.diff(tx) > 0)
    assert np.nanmax(ty) == 50.0 and tx[np.nanargmax(ty)] == 123_457 and np.nanmin(ty) == -50.0
    # slow obvious reference: the min and max of each bin, bin by bin
    edges = np.linspace(0, n, MAX_LINE_BINS + 1).astype(np.int64)
    ref = sorted(v for a, b in zip(edges[:-1], edges[1:]) for v in {np.nanmin(y[a:b]), np.nanmax(y[a:b])})
    np.testing.assert_array_equal(np.sort(ty[np.isfinite(ty)]), ref)
    short_x, short_y = _envelope(x[:100], y[:100])
    assert np.array_equal(short_x, x[:100]) and np.array_equal(short_y, y[:100], equal_nan=True)
    # runs of flagged items: slow reference walking item by item
    t = np.cumsum(rng.choice([1.0, 1.0, 1.0, 3.0], 2000))
    flag = np.repeat(rng.integers(0, 2, 100).astype(bool), 20)
    runs, cur = [], None
    for i in range(t.size):
        if flag[i] and cur is not None and i == cur[2] + 1 and t[i] - t[cur[2]] <= 1.5:
            cur[1], cur[2] = t[i], i
        elif flag[i]:
            if cur is not None:
                runs.append((cur[0], cur[1] - cur[0] + 1.0))
            cur = [t[i], t[i], i]
    if cur is not None:
        runs.append((cur[0], cur[1] - cur[0] + 1.0))
    assert _runs(t, flag, 1.0) == runs
    # the worst of each bin keeps every maximum
    v = rng.integers(0, 5, 10_000)
    v[4321] = 99
    bt, bv = _worst_per_bin(np.arange(10_000.0), v, 100)
    assert bv.size == 100 and bv.max() == 99 and bv[43] == 99
