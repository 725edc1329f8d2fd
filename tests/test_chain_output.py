"""Output folders: two runs never share one, a killed run's leftovers are cleaned, nothing half-done looks complete."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

from pipeline.chain import OutputFolder
from pipeline.chain._output import _host
from pipeline.cli import ExitCode
from pipeline.errors import OutputError
from pipeline.profile import demo_profile_path


def _dead_pid() -> int:
    """A process id that no process of this host has (a child that has exited and been reaped)."""
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_second_run_into_the_same_folder_is_refused_and_the_first_survives(tmp_path):
    out = tmp_path / "out"
    first = OutputFolder(out)
    tmp = first.__enter__()
    (tmp / "packets.jsonl").write_text("first\n")
    with pytest.raises(OutputError, match=r"is writing this output folder") as info:
        with OutputFolder(out):
            pass
    assert str(os.getpid()) in str(info.value) and "\n" not in str(info.value)
    first.__exit__(None, None, None)
    assert (out / "packets.jsonl").read_text() == "first\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # no lock, no partial left


def test_overwrite_does_not_break_a_running_decode(tmp_path):
    out = tmp_path / "out"
    with OutputFolder(out) as tmp:
        (tmp / "a").write_text("1")
    running = OutputFolder(out, overwrite=True)
    running.__enter__()
    with pytest.raises(OutputError, match="is writing this output folder"), OutputFolder(out, overwrite=True):
        pass
    running.__exit__(None, None, None)
    assert not (out / "a").exists()  # the first overwrite run replaced it; the second changed nothing


def test_leftovers_of_dead_runs_of_this_host_are_removed(tmp_path):
    out = tmp_path / "out"
    dead = _dead_pid()
    stale = tmp_path / f".out.partial-{_host()}-{dead}"
    stale.mkdir()
    (stale / "packets.jsonl").write_text("half")
    other_host = tmp_path / f".out.partial-elsewhere-{dead}"
    other_host.mkdir()
    (tmp_path / ".out.lock").write_text(f"{_host()} {dead}\n")
    with OutputFolder(out) as tmp:
        (tmp / "done").write_text("ok")
    names = sorted(p.name for p in tmp_path.iterdir())
    # a partial folder of another machine cannot be checked from here: it is left alone
    assert names == [".out.partial-elsewhere-" + str(dead), "out"]


def test_a_lock_of_another_host_is_respected(tmp_path):
    (tmp_path / ".out.lock").write_text(f"elsewhere {os.getpid()}\n")
    with pytest.raises(OutputError, match=r"process \d+ on elsewhere is writing"):
        with OutputFolder(tmp_path / "out"):
            pass
    assert not (tmp_path / "out").exists()


def test_two_decode_processes_into_one_folder_exactly_one_succeeds(tmp_path, demo_profile):
    from pipeline.sim import simulate

    sim = simulate(demo_profile, tmp_path / "sim", seconds=1.5, seed=4)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "pipeline", "decode", str(sim.meta_path), "--profile",
           str(demo_profile_path()), "--out", str(out), "-q"]
    procs = [subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    results = [(p.wait(timeout=300), p.communicate()[1]) for p in procs]
    codes = sorted(code for code, _ in results)
    assert codes == [ExitCode.OK, ExitCode.BAD_OUTPUT], results
    err = next(e for c, e in results if c == ExitCode.BAD_OUTPUT)
    assert err.startswith("Error: ") and err.strip().count("\n") == 0
    assert (out / "report.json").is_file() and (out / "packets.jsonl").stat().st_size > 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out", "sim"]


def test_a_killed_decode_leaves_nothing_that_looks_complete_and_the_next_run_cleans_up(tmp_path, demo_profile):
    from pipeline.sim import simulate

    sim = simulate(demo_profile, tmp_path / "sim", seconds=6.0, seed=5)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "pipeline", "decode", str(sim.meta_path), "--profile", str(demo_profile_path()),
           "--out", str(out), "-q"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and not any(p.name.startswith(".out.partial") for p in tmp_path.iterdir()):
        time.sleep(0.02)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert not out.exists()
    left = sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".out"))
    assert any(name.startswith(".out.partial") for name in left)  # SIGKILL cannot clean up
    assert subprocess.run(cmd, capture_output=True).returncode == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out", "sim"]


def test_a_full_disk_is_an_output_error(tmp_path, demo_profile, monkeypatch, capsys):
    # issue 13: writing fails with ENOSPC part-way: one Error line, exit 4, nothing left that looks complete
    import errno

    from pipeline.chain import _sinks
    from pipeline.cli import main
    from pipeline.sim import simulate

    sim = simulate(demo_profile, tmp_path / "sim", seconds=1.5, seed=6)

    def full(self, obj, data):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(_sinks.FolderSinks, "_packet", full)
    capsys.readouterr()
    code = main(["decode", str(sim.meta_path), "--profile", str(demo_profile_path()), "--out", str(tmp_path / "o"),
                 "-q"])
    err = capsys.readouterr().err
    assert code == ExitCode.BAD_OUTPUT
    assert err.startswith("Error: ") and "No space left on device" in err and err.count("\n") == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["sim"]
