"""The command-line boundary: help, version, exit codes, one-line errors, output folders."""

from __future__ import annotations

import subprocess
import sys

import pytest

from pipeline.chain._output import OutputFolder
from pipeline.cli import ExitCode, main
from pipeline.errors import OutputError


def test_version_and_help(capsys):
    assert main(["--version"]) == 0
    assert "downlink" in capsys.readouterr().out
    for cmd in ("decode", "demo", "simulate", "inspect", "verify", "sweep", "bench", "batch", "clock"):
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
    prof.write_text("[link]\n[coding]\ninterleave = 9\n[frames]\n")
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


def test_verify_json(capsys):
    import json

    assert main(["verify", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert len(out["cases"]) >= 20 and out["failed"] == 0
    assert all({"name", "passed", "source"} <= set(c) for c in out["cases"])
    assert all(c["source"] for c in out["cases"])


def test_inspect_json_and_plots(tmp_path, capsys):
    import json

    from test_end_to_end import _write_profile, small_profile

    prof = _write_profile(tmp_path, small_profile("bpsk", "concatenated", "nrz-m", seconds=0.8, carrier_hz=900.0))
    assert main(["simulate", "--profile", str(prof), "--out", str(tmp_path / "sim"), "-q"]) == 0
    capsys.readouterr()
    meta = str(tmp_path / "sim" / "recording.sigmf-meta")
    assert main(["inspect", meta, "--profile", str(prof), "--json", "--plot", str(tmp_path / "plots")]) == 0
    info = json.loads(capsys.readouterr().out)
    for key in ("sample_rate_hz", "duration_s", "carrier_offset_hz", "carrier_rate_hz_per_s", "esn0_db",
                "lock_fraction"):
        assert key in info
    assert info["sample_rate_hz"] == 200_000.0
    assert abs(info["carrier_offset_hz"] - 900.0) < 20.0
    assert info["lock_fraction"] > 0.9
    for png in ("spectrum.png", "constellation.png"):
        assert (tmp_path / "plots" / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_decode_workers_give_the_same_output(tmp_path, capsys):
    from test_end_to_end import _write_profile, small_profile

    prof = _write_profile(tmp_path, small_profile("bpsk", "concatenated", "nrz-m", seconds=1.0))
    assert main(["simulate", "--profile", str(prof), "--out", str(tmp_path / "sim"), "-q"]) == 0
    meta = str(tmp_path / "sim" / "recording.sigmf-meta")
    for n in (1, 2):
        assert main(["decode", meta, "--profile", str(prof), "--out", str(tmp_path / f"o{n}"), "--workers", str(n),
                     "-q"]) == 0
    for name in ("packets.jsonl", "frames.jsonl", "doppler.csv"):
        assert (tmp_path / "o1" / name).read_bytes() == (tmp_path / "o2" / name).read_bytes()
    assert main(["decode", meta, "--profile", str(prof), "--out", str(tmp_path / "o3"), "--workers", "0"]) \
        == ExitCode.USAGE  # a command-line value out of range is a usage error
    # the old name still works for one release, with a warning
    assert main(["decode", meta, "--profile", str(prof), "--out", str(tmp_path / "o4"), "--threads", "2", "-q"]) == 0
    assert (tmp_path / "o4" / "packets.jsonl").read_bytes() == (tmp_path / "o1" / "packets.jsonl").read_bytes()
    assert main(["decode", meta, "--profile", str(prof), "--out", str(tmp_path / "o5"), "--threads", "2",
                 "--workers", "2"]) == ExitCode.USAGE


def test_no_silent_epoch(tmp_path, capsys):
    # issue 17: an input without a start time is never stamped 1970; --no-time decodes with null ERT
    from pipeline.profile import demo_profile_path
    from pipeline.sim import simulate

    prof = demo_profile_path()
    sim = simulate(__import__("pipeline").load_profile(prof), tmp_path / "sim", seconds=1.5, seed=3)
    raw = tmp_path / "rec.cf32"
    raw.write_bytes(sim.data_path.read_bytes())  # cf32 samples, no metadata: no time
    base = ["decode", str(raw), "--format", "cf32", "--sample-rate", "1e6", "--profile", str(prof)]
    capsys.readouterr()
    assert main([*base, "--out", str(tmp_path / "a")]) == ExitCode.USAGE
    err = capsys.readouterr().err
    assert err.startswith("Error: ") and "--start" in err and "--no-time" in err and err.count("\n") == 1
    assert not (tmp_path / "a").exists()
    assert main([*base, "--out", str(tmp_path / "b"), "--no-time", "--start", "2026-01-01T00:00:00Z"]) \
        == ExitCode.USAGE
    assert main([*base, "--out", str(tmp_path / "c"), "--no-time", "-q"]) == ExitCode.OK
    import json

    packets = [json.loads(line) for line in (tmp_path / "c" / "packets.jsonl").read_text().splitlines()]
    frames = [json.loads(line) for line in (tmp_path / "c" / "frames.jsonl").read_text().splitlines()]
    assert len(packets) == sim.num_packets
    assert all(p["ert"] is None for p in packets) and all(f["ert"] is None for f in frames)
    report = json.loads((tmp_path / "c" / "report.json").read_text())
    assert report["recording"]["time_known"] is False and report["recording"]["start"] is None


def test_cold_kernel_cache_is_detected(tmp_path):
    # an empty numba cache (NUMBA_CACHE_DIR) means the first decode compiles: the CLI says so in one line
    import os

    code = "from pipeline.chain import kernel_cache_cold; print(kernel_cache_cold())"
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path))
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert r.stdout.strip() == "True", r.stderr


def test_closed_pipe_exits_quietly():
    # `downlink verify --json | head -c 0`: the reader goes away before anything is written; no traceback,
    # no "internal error" (the pipe is closed at once, so the first write is sure to fail)
    proc = subprocess.Popen([sys.executable, "-m", "pipeline", "verify", "--json"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=300) == 0
    assert "Error" not in err and "Traceback" not in err, err


def test_decode_on_a_local_dask_cluster(tmp_path):
    import dask.distributed  # noqa: F401  (the [test] extra)
    from test_end_to_end import _write_profile, small_profile

    prof = _write_profile(tmp_path, small_profile("bpsk", "concatenated", "nrz-m", seconds=1.0))
    assert main(["simulate", "--profile", str(prof), "--out", str(tmp_path / "sim"), "-q"]) == 0
    meta = str(tmp_path / "sim" / "recording.sigmf-meta")
    base = ["decode", meta, "--profile", str(prof), "-q"]
    assert main([*base, "--out", str(tmp_path / "one")]) == 0
    assert main([*base, "--out", str(tmp_path / "dask"), "--scheduler", "local", "--workers", "2"]) == 0
    for name in ("packets.jsonl", "frames.jsonl", "doppler.csv"):
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "dask" / name).read_bytes()
    bits = tmp_path / "c.bits"
    bits.write_bytes(bytes(100))
    assert main(["decode", str(bits), "--input", "bits", "--no-time", "--profile", str(prof), "--out",
                 str(tmp_path / "x"), "--scheduler", "local"]) == ExitCode.USAGE
