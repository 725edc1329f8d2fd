"""``downlink verify``: the runner reports every case, fails loudly, and the vectors are reproducible."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.tools import _verify
from pipeline.tools._verify import default_vectors_dir, load_cases, run_case, run_verify

REPO = Path(__file__).resolve().parents[1]


def _copy_case(tmp_path: Path, name: str) -> Path:
    src = next(c.path for c in load_cases(default_vectors_dir()) if c.name == name)
    dst = tmp_path / "v" / src.parent.name
    dst.mkdir(parents=True)
    shutil.copy(src, dst / src.name)
    return dst / src.name


@pytest.mark.kat
def test_at_least_twenty_cases_each_naming_source_generator_and_seed():
    cases = load_cases(default_vectors_dir())
    assert len(cases) >= 20
    kinds = {c.kind for c in cases}
    # issue 6: every stage is covered
    for kind in ("randomizer", "crc16", "rs_encode", "rs_decode", "conv_encode", "viterbi_decode", "markers",
                 "frame_sync", "tm_frame", "aos_frame", "packets_from_frames", "cuc", "cds", "whole_link"):
        assert kind in kinds
    for c in cases:
        assert c.kind != "unknown_format", c.path
        assert c.source and c.data["generator"] and "seed" in c.data
        assert not c.path.name.endswith(".sidecar.json")
    rs = {(c.data["params"]["e"], c.data["params"]["interleave"], c.data["params"].get("virtual_fill_per_codeword"))
          for c in cases if c.kind == "rs_encode"}
    for e in (16, 8):
        for i in (1, 2, 4, 5, 8):
            assert (e, i, 0) in rs and any(k[:2] == (e, i) and k[2] for k in rs)
    rates = {c.data["params"]["rate"] for c in cases if c.kind == "conv_encode"}
    assert rates == {"1/2", "2/3", "3/4", "5/6", "7/8"}


@pytest.mark.kat
def test_bundled_copy_matches_checkout():
    # the copy shipped in the package must not drift from vectors/ (vectors/make.py writes both)
    bundled = REPO / "pipeline" / "data" / "vectors"
    for path in sorted((REPO / "vectors").rglob("*.json")):
        rel = path.relative_to(REPO / "vectors")
        if rel.parts[0] == "fec":
            continue
        assert (bundled / rel).read_bytes() == path.read_bytes(), rel


def test_make_py_reproduces_the_files():
    # the generator is deterministic (fixed seeds) and imports no pipeline code
    text = (REPO / "vectors" / "make.py").read_text()
    assert "import pipeline" not in text and "from pipeline" not in text
    res = subprocess.run([sys.executable, str(REPO / "vectors" / "make.py"), "--check"], capture_output=True,
                         text=True, timeout=300)
    assert res.returncode == 0, res.stdout + res.stderr


@pytest.mark.kat
def test_json_output_and_exit_code_zero_on_pass(tmp_path, capsys):
    _copy_case(tmp_path, "crc16_ascii123456789")
    _copy_case(tmp_path, "randomizer_first40bits")
    assert run_verify(str(tmp_path / "v"), as_json=True) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["passed"] == 2 and doc["failed"] == 0
    for case in doc["cases"]:
        assert set(case) >= {"name", "stage", "passed", "source", "detail"}
        assert case["passed"] is True and case["source"]


@pytest.mark.kat
def test_a_wrong_expected_value_fails_with_exit_code_one(tmp_path, capsys):
    path = _copy_case(tmp_path, "crc16_ascii123456789")
    data = json.loads(path.read_text())
    data["expected"]["crc"] = 0x29B2
    path.write_text(json.dumps(data))
    _copy_case(tmp_path, "randomizer_period255")
    assert run_verify(str(tmp_path / "v"), as_json=False) == 1
    out = capsys.readouterr().out
    assert "FAIL" in out and "PASS" in out and "0x29b1, expected 0x29b2" in out
    assert "1 of 2 cases passed, 1 failed" in out
    assert "REFERENCES.md sec. 10.4" in out  # each case's source is printed


@pytest.mark.kat
def test_unknown_kind_and_unreadable_file_are_failures_not_skips(tmp_path):
    folder = tmp_path / "v"
    folder.mkdir()
    (folder / "odd.json").write_text(json.dumps({"kind": "teleport", "expected": {}, "source": "x"}))
    (folder / "broken.json").write_text("{not json")
    results = {c.name: run_case(c) for c in load_cases(folder)}
    assert not results["odd"].passed and "unknown vector kind" in results["odd"].detail
    assert not results["broken"].passed and "cannot read" in results["broken"].detail
    assert run_verify(str(folder), as_json=True) == 1


@pytest.mark.kat
def test_exceptions_inside_a_case_become_failed_rows(tmp_path):
    path = _copy_case(tmp_path, "rs_encode_e16_i5_fill3")
    data = json.loads(path.read_text())
    data["params"]["interleave"] = 9  # rs_encode refuses it
    path.write_text(json.dumps(data))
    (res,) = [run_case(c) for c in load_cases(tmp_path / "v")]
    assert not res.passed and "ValueError" in res.detail


@pytest.mark.kat
def test_missing_folder_is_one_line_error(tmp_path):
    from pipeline.errors import DownlinkError

    with pytest.raises(DownlinkError, match="vector folder not found"):
        run_verify(str(tmp_path / "nope"), as_json=False)
    (tmp_path / "empty").mkdir()
    with pytest.raises(DownlinkError, match="no vector files"):
        run_verify(str(tmp_path / "empty"), as_json=False)


@pytest.mark.kat
def test_default_dir_is_checkout_or_bundle():
    import pipeline

    d = default_vectors_dir()
    # a checkout (editable install) uses vectors/; an installed package (pip install ., as in CI) its bundle
    installed = Path(pipeline.__file__).parent / "data" / "vectors"
    assert d.is_dir() and d in (REPO / "vectors", REPO / "pipeline" / "data" / "vectors", installed)
    assert len(list(d.rglob("*.json"))) >= 20
    assert _verify.NOT_AVAILABLE


@pytest.mark.kat
def test_cli_verify_json(tmp_path, capsys):
    from pipeline.cli import main

    _copy_case(tmp_path, "crc16_empty")
    assert main(["verify", str(tmp_path / "v"), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["cases"][0]["name"] == "crc16_empty"


@pytest.mark.kat
def test_fec_layout_with_sidecar_is_read_and_without_is_a_failure(tmp_path):
    # the fec engineer's layout: NAME.json with "kind" at the top, NAME.sidecar.json with the source
    folder = tmp_path / "v" / "fec"
    folder.mkdir(parents=True)
    case = {"kind": "crc16", "cases": [["313233343536373839", 0x29B1], ["", 0xFFFF]]}
    (folder / "crc_a.json").write_text(json.dumps(case))
    (folder / "crc_a.sidecar.json").write_text(json.dumps({"generator": "g", "seed": None,
                                                           "source": "REFERENCES.md sec. 10.4"}))
    (folder / "crc_b.json").write_text(json.dumps({**case, "cases": [["", 0x1234]]}))
    (folder / "crc_b.sidecar.json").write_text(json.dumps({"generator": "g", "seed": None, "source": "made up"}))
    (folder / "crc_c.json").write_text(json.dumps(case))  # no sidecar: no source
    results = {c.name: run_case(c) for c in load_cases(tmp_path / "v")}
    assert set(results) == {"crc_a", "crc_b", "crc_c"}
    assert results["crc_a"].passed and results["crc_a"].stage == "fec"
    assert not results["crc_b"].passed and "expected 0x1234" in results["crc_b"].detail
    assert not results["crc_c"].passed
