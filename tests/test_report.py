"""pipeline.report: report.json, the self-contained report.html and its plots."""

from __future__ import annotations

import base64
import io
import json
import os
import shutil
import struct
import subprocess
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
    t = np.arange(200) * 0.05
    return PlotData(
        spectrum_freq_hz=np.linspace(-5e5, 5e5, 1024),
        spectrum_db=-60 + 3 * rng.standard_normal(1024),
        constellation=(rng.choice([-1.0, 1.0], 6000) + 0.2 * rng.standard_normal(6000)
                       + 0.2j * rng.standard_normal(6000)),
        track_time_s=t,
        track_esn0_db=6 + np.sin(t),
        track_carrier_hz=1500 + 20 * t,
        track_locked=t > 1.0,
        frame_status_counts={"ok": 1200, "rs_uncorrectable": 3, "idle": 40},
    )


def _sample_report() -> dict:
    return {
        "events": [{"position": 10.5, "kind": "lock"}, {"position": 99.0, "kind": "slip", "detail": "x"}],
        "custom_stage": {"alpha": 1, "beta": [1, 2, 3]},
        "summary": {"tool": "downlink 0.1.0", "profile": "tamarisk", "frames": 1243, "esn0_db": 6.02,
                    "locked": True, "missing": None},
        "recording": {"path": "pass.sigmf-data", "sample_rate_hz": 1e6},
        "frames": {"status_counts": {"ok": 1200, "rs_uncorrectable": 3}},
        "virtual_channels": [{"vcid": 0, "frames": 800}, {"vcid": 1, "frames": 443, "gaps": 1}],
        "apids": [{"apid": 100, "packets": 50}, {"apid": 200, "packets": 20, "bytes": 40000}],
        "gaps": [],
    }


def test_full_report_parses_and_embeds_valid_pngs(rng):
    doc = render_html(_sample_report(), _full_plots(rng))
    c = _parse(doc)
    pngs = _check_images(c)
    assert len(pngs) == 5  # spectrum, constellation, tracks, lock timeline, frame status
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


def test_section_order_and_tables():
    doc = render_html(_sample_report(), None)
    order = [doc.index(f'id="s-{k}"') for k in ("summary", "recording", "frames", "virtual_channels", "apids",
                                                "gaps", "events", "custom_stage")]
    assert order == sorted(order)
    assert doc.index('id="s-plots"') < doc.index('id="s-recording"')
    c = _parse(doc)
    text = " ".join(c.text)
    # union of the keys as columns: "gaps" appears only in the second VC row, "bytes" in the second APID row
    vc = doc[doc.index('id="s-virtual_channels"'):doc.index('id="s-apids"')]
    assert vc.count("<th>") == 3 and "<th>gaps</th>" in vc and vc.count("<tr>") == 3
    ap = doc[doc.index('id="s-apids"'):doc.index('id="s-gaps"')]
    assert "<th>bytes</th>" in ap
    assert "1243" in text and "6.02" in text and "yes" in text
    assert "(none)" in text  # the empty gaps list
    assert tuple(KNOWN_SECTIONS[:3]) == ("summary", "recording", "profile")


def test_long_lists_are_capped():
    rows = [{"i": i, "v": i * 0.5} for i in range(MAX_TABLE_ROWS + 123)]
    doc = render_html({"events": rows}, None)
    part = doc[doc.index('id="s-events"'):]
    part = part[:part.index("</section>")]
    assert part.count("<tr>") == MAX_TABLE_ROWS + 1  # header row + the rows shown
    assert f"123 more rows not shown ({MAX_TABLE_ROWS + 123} in all" in part
    _parse(doc)


def test_everything_from_the_data_is_escaped():
    evil = '<script>alert("x")</script>&<img src=x onerror=1>'
    report = {
        "summary": {evil: evil, "profile": evil},
        evil: [{evil: evil, "n": 1}, {"other": [evil]}],
        "events": [evil, {"kind": evil}],
    }
    doc = render_html(report, PlotData(frame_status_counts={evil: 2, "$x$ ok": 1}))
    c = _parse(doc)
    assert "<script" not in doc and "script" not in c.tags
    assert not [n for n in c.attr_names if n.startswith("on")]  # no event-handler attribute got through
    assert len(c.imgs) == 1  # only the status chart: no <img> injected by the data
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
        assert text.count("not shown:") == 5  # every plot left out with a note


def test_bad_plot_data_is_a_note_not_a_crash(rng):
    plots = PlotData(
        spectrum_freq_hz=np.arange(10.0), spectrum_db=np.arange(12.0),  # lengths differ
        constellation=np.full(5, np.nan + 0j),  # nothing finite
        track_time_s=np.arange(4.0), track_esn0_db=["a", "b", "c", "d"],  # not numeric
        track_locked=np.ones(3, bool),  # wrong length
        frame_status_counts={"ok": "many"},
    )
    doc = render_html({"summary": {"frames": 0}}, plots)
    c = _parse(doc)
    assert c.imgs == []
    text = " ".join(c.text)
    assert "lengths differ (10 and 12)" in text and "no finite values" in text
    assert "not numeric" in text and "track time and lock lengths differ (4 and 3)" in text
    # only the carrier track present: the track plot is drawn with just that panel
    doc = render_html({}, PlotData(track_time_s=np.arange(4.0), track_carrier_hz=np.arange(4.0)))
    assert len(_check_images(_parse(doc))) == 1


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
    assert len(_check_images(_parse((out / "report.html").read_text(encoding="utf-8")))) == 5
    with pytest.raises(TypeError, match="Argument 'report' must be a dict"):
        write_report(out, [1, 2], None)


def test_long_series_are_thinned_without_losing_peaks(rng):
    from pipeline.report._plots import MAX_LINE_BINS, _envelope, _lock_changes

    n = 300_001
    x = np.arange(n, dtype=np.float64)
    y = rng.standard_normal(n)
    y[123_457] = 50.0  # a narrow spectral line must survive the thinning
    y[7] = -50.0
    y[1000:1100] = np.nan
    tx, ty = _envelope(x, y)
    assert ty.size <= 2 * MAX_LINE_BINS and np.all(np.diff(tx) > 0)
    assert ty.max() == 50.0 and tx[np.argmax(ty)] == 123_457 and ty.min() == -50.0
    # slow obvious reference: the min and max of each bin, bin by bin
    edges = np.linspace(0, n, MAX_LINE_BINS + 1).astype(np.int64)
    ref = sorted(v for a, b in zip(edges[:-1], edges[1:]) for v in (np.nanmin(y[a:b]), np.nanmax(y[a:b])))
    np.testing.assert_array_equal(np.sort(ty), ref)
    short_x, short_y = _envelope(x[:100], y[:100])
    assert np.array_equal(short_x, x[:100]) and np.array_equal(short_y, y[:100], equal_nan=True)
    # lock track: a post-step through the change points equals the step through every point
    t = np.sort(rng.uniform(0, 100, 5000))
    locked = np.repeat(rng.integers(0, 2, 50).astype(bool), 100)
    tk, lk = _lock_changes(t, locked)
    at = np.searchsorted(tk, t, side="right") - 1
    np.testing.assert_array_equal(lk[at], locked.astype(float))
    assert tk[0] == t[0] and tk[-1] == t[-1] and tk.size <= 51 + 1


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return "/usr/bin/chromium" if os.path.exists("/usr/bin/chromium") else None


def test_report_in_headless_chromium(tmp_path, rng):
    exe = _chromium()
    if exe is None:
        pytest.skip("Chromium not installed (apt-get install chromium): headless browser check skipped")
    write_report(tmp_path / "out", _sample_report(), _full_plots(rng))
    url = (tmp_path / "out" / "report.html").resolve().as_uri()
    flags = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-dev-shm-usage",
             f"--user-data-dir={tmp_path / 'profile'}"]
    try:
        dom = subprocess.run(flags + ["--dump-dom", url], capture_output=True, text=True, timeout=120)
        shot = tmp_path / "shot.png"
        subprocess.run(flags + ["--hide-scrollbars", "--window-size=1200,3200", f"--screenshot={shot}", url],
                       capture_output=True, timeout=120)
    except subprocess.TimeoutExpired:
        pytest.skip("Chromium did not finish within 120 s on this machine")
    assert dom.returncode == 0, dom.stderr[-500:]
    c = _parse(dom.stdout)  # the DOM as the browser built it
    assert len(_check_images(c)) == 5
    assert CAUTION in " ".join(c.text)
    # The screenshot shows the plots: the plot line colour (#1f4e79, not used by the page's CSS) is there.
    import matplotlib.image as mpimg

    rgb = np.round(mpimg.imread(shot)[..., :3] * 255)
    plot_ink = np.abs(rgb - [0x1F, 0x4E, 0x79]).max(axis=2) < 30
    assert plot_ink.sum() > 1000
