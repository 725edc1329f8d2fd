"""``downlink verify``: the runner reports every case, fails loudly, and the vectors are reproducible."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

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
@pytest.mark.parametrize("folder", ["vectors", "pipeline/data/vectors"])
def test_every_source_is_self_contained(folder):
    # issue 18: the installed copy names no file the user does not have; each case says where its values
    # come from (a standard and section, a library and version, or what they were computed from)
    cases = load_cases(REPO / folder)
    assert cases and not any(c.kind in ("unknown_format", "unreadable") for c in cases)
    for c in cases:
        assert len(c.source) > 20 and "REFERENCES" not in c.source and ".md" not in c.source, c.name
        assert any(k in c.source for k in ("CCSDS", "IERS", "(PyPI)")), c.name
    for lib in ("reedsolo 1.7.0 (PyPI)", "scikit-commpy 0.8.0 (PyPI)", "crccheck 1.3.1 (PyPI)", "galois 0.4.11"):
        assert any(lib in c.source for c in cases), lib
    assert not (REPO / folder / "fec").exists()  # one format, one generator: vectors/fec/ is folded in


@pytest.mark.kat
def test_punctured_vectors_follow_the_standard():
    # CCSDS 131.0-B sec. 3.3: G2 inverted at rate 1/2 only; sec. 3.4 / 130.1-G sec. 4.3 Fig. 4-2: no inverter
    cases = [c for c in load_cases(default_vectors_dir()) if c.kind in ("conv_encode", "viterbi_decode")]
    for c in cases:
        rate = c.data["params"]["rate"]
        assert c.data["params"]["g2_inverted"] is (rate == "1/2"), c.name
        if rate != "1/2":
            assert "no G2 inversion" in c.source and "Fig. 4-2" in c.source, c.name
    assert {c.data["params"]["rate"] for c in cases if c.kind == "viterbi_decode"} == {"1/2", "2/3", "3/4", "5/6",
                                                                                        "7/8"}


@pytest.mark.kat
def test_bundled_copy_matches_checkout():
    # the copy shipped in the package must not drift from vectors/ (vectors/make.py writes both)
    bundled = REPO / "pipeline" / "data" / "vectors"
    mine = sorted(p.relative_to(REPO / "vectors") for p in (REPO / "vectors").rglob("*.json"))
    assert mine == sorted(p.relative_to(bundled) for p in bundled.rglob("*.json"))
    for rel in mine:
        assert (bundled / rel).read_bytes() == (REPO / "vectors" / rel).read_bytes(), rel


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
    assert "CCSDS 132.0-B sec. 4.1.6" in out  # each case's source is printed


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


@pytest.mark.kat
def test_cli_verify_json(tmp_path, capsys):
    from pipeline.cli import main

    _copy_case(tmp_path, "crc16_empty")
    assert main(["verify", str(tmp_path / "v"), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["cases"][0]["name"] == "crc16_empty"


@pytest.mark.kat
def test_a_file_without_source_or_in_another_layout_is_a_failure(tmp_path):
    # one format: a case must carry kind, expected and its source; anything else fails, nothing is skipped
    folder = tmp_path / "v" / "fec"
    folder.mkdir(parents=True)
    case = {"kind": "crc16", "input": {"hex": ""}, "expected": {"crc": 65535}}
    (folder / "no_source.json").write_text(json.dumps(case))
    (folder / "old_layout.json").write_text(json.dumps({"kind": "crc16", "cases": [["", 0xFFFF]]}))
    results = {c.name: run_case(c) for c in load_cases(tmp_path / "v")}
    assert set(results) == {"no_source", "old_layout"}
    assert not any(r.passed for r in results.values())
    assert "not a vector case" in results["no_source"].detail


@pytest.mark.kat
def test_a_case_whose_stage_is_missing_fails(tmp_path, monkeypatch):
    # the runner does not turn an import that fails into a skip
    path = _copy_case(tmp_path, "crc16_empty")
    monkeypatch.setitem(__import__("sys").modules, "pipeline.fec", None)
    (res,) = [run_case(c) for c in load_cases(path.parent.parent)]
    assert not res.passed and res.detail.startswith(("ImportError", "ModuleNotFoundError")), res.detail
