"""The command-line boundary: help, version, exit codes, one-line errors, output folders."""

from __future__ import annotations

import subprocess
import sys

import pytest

from pipeline._output import OutputFolder
from pipeline.cli import ExitCode, main
from pipeline.errors import OutputError


def test_version_and_help(capsys):
    assert main(["--version"]) == 0
    assert "downlink" in capsys.readouterr().out
    for cmd in ("decode", "demo", "simulate", "inspect", "verify", "sweep", "bench", "batch"):
        assert main([cmd, "--help"]) == 0
        assert "usage: downlink " + cmd in capsys.readouterr().out


def test_usage_error_exit_code(capsys):
    assert main(["decode"]) == ExitCode.USAGE
    assert main(["no-such-command"]) == ExitCode.USAGE


def test_missing_profile_is_one_line(tmp_path, capsys):
    code = main(["decode", str(tmp_path / "x.sigmf-meta"), "--profile", str(tmp_path / "p.toml"),
                 "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == ExitCode.BAD_INPUT
    assert err.count("\n") == 1 and err.startswith("Error: ") and "p.toml" in err
    assert not (tmp_path / "o").exists()


def test_profile_out_of_range(tmp_path, capsys):
    prof = tmp_path / "p.toml"
    prof.write_text("[coding]\ninterleave = 9\n")
    code = main(["simulate", "--profile", str(prof), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == ExitCode.BAD_INPUT
    assert "interleave must be 1..8, not 9" in err


def test_output_folder_refuses_existing(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    with pytest.raises(OutputError, match="use --overwrite"):
        OutputFolder(out)
    assert (out / "keep.txt").read_text() == "mine"


def test_output_folder_appears_only_on_success(tmp_path):
    out = tmp_path / "out"
    with pytest.raises(RuntimeError), OutputFolder(out) as tmp:
        (tmp / "half.jsonl").write_text("x")
        raise RuntimeError("boom")
    assert not out.exists()
    assert list(tmp_path.iterdir()) == []
    with OutputFolder(out) as tmp:
        (tmp / "done.txt").write_text("ok")
    assert (out / "done.txt").read_text() == "ok"
    with OutputFolder(out, overwrite=True) as tmp:
        (tmp / "new.txt").write_text("ok")
    assert sorted(p.name for p in out.iterdir()) == ["new.txt"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_python_dash_m_works():
    r = subprocess.run([sys.executable, "-m", "pipeline", "--version"], capture_output=True, text=True)
    assert r.returncode == 0 and "downlink" in r.stdout
