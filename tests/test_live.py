"""Live input (issue 18): samples or symbols piped into ``downlink decode -``.

Checks: the same packets as decoding the file; ``--packets-to-stdout`` gives them as they come; ``--follow``
writes straight into the folder with an ``INCOMPLETE`` marker that the normal end (end of input, or SIGINT)
removes and SIGKILL leaves.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import pytest

from pipeline.profile import demo_profile_path
from pipeline.sim import simulate

START = "2026-03-14T09:30:00Z"


@pytest.fixture(scope="module")
def pass_3s(tmp_path_factory, demo_profile):
    folder = tmp_path_factory.mktemp("live")
    sim = simulate(demo_profile, folder / "sim", seconds=3.0, seed=12, write_bits=True)
    ref = folder / "ref"
    from pipeline import decode

    decode(sim.meta_path, demo_profile, ref)
    return sim, ref


def _cmd(out, *extra):
    return [sys.executable, "-m", "pipeline", "decode", "-", "--format", "cf32", "--sample-rate", "1e6", "--start",
            START, "--profile", str(demo_profile_path()), "--out", str(out), "-q", *extra]


def test_piped_samples_give_the_packets_of_the_file(tmp_path, pass_3s):
    sim, ref = pass_3s
    out = tmp_path / "out"
    with open(sim.data_path, "rb") as f:
        r = subprocess.run(_cmd(out, "--packets-to-stdout"), stdin=f, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert (out / "packets.jsonl").read_bytes() == (ref / "packets.jsonl").read_bytes()
    assert (out / "frames.jsonl").read_bytes() == (ref / "frames.jsonl").read_bytes()
    # standard output carries exactly the packets, one JSON line each, in order; the report path went to stderr
    assert r.stdout == (ref / "packets.jsonl").read_text()
    assert str(out / "report.html") in r.stderr
    report = json.loads((out / "report.json").read_text())
    assert report["recording"]["live"] is True and report["recording"]["samples"] == sim.num_samples


def test_piped_symbols_give_the_packets_of_the_symbol_file(tmp_path, pass_3s):
    from pipeline import decode, load_profile

    sim, _ = pass_3s
    profile = load_profile(demo_profile_path())
    want = decode(sim.bits_path, profile, input_kind="bits", start=START)
    r = subprocess.run([sys.executable, "-m", "pipeline", "decode", "-", "--input", "bits", "--start", START,
                        "--profile", str(demo_profile_path()), "--out", str(tmp_path / "o"), "-q",
                        "--packets-to-stdout"], stdin=open(sim.bits_path, "rb"), capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    assert [json.loads(x) for x in r.stdout.splitlines()] == want.packets_list


def _feed_slowly(proc, path, seconds_per_mb=0.5):
    with open(path, "rb") as f:
        while True:
            block = f.read(1 << 19)
            if not block:
                break
            proc.stdin.write(block)
            proc.stdin.flush()
            time.sleep(seconds_per_mb / 2)


@pytest.mark.parametrize("how", ["end_of_input", "sigint"])
def test_follow_writes_as_it_goes_and_the_normal_end_removes_the_marker(tmp_path, pass_3s, how):
    sim, ref = pass_3s
    out = tmp_path / "out"
    # (SIGINT as an interactive shell leaves it: see test_interrupt._interruptible)
    proc = subprocess.Popen(_cmd(out, "--follow"), stdin=subprocess.PIPE, stderr=subprocess.PIPE,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    _feed_slowly(proc, sim.data_path)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and not (out / "packets.jsonl").exists():
        time.sleep(0.05)
    assert (out / "INCOMPLETE").exists()  # the folder is there while the run lasts, marked
    if how == "sigint":
        deadline = time.monotonic() + 120  # wait until the decoder has caught up, then stop it
        while time.monotonic() < deadline and len((out / "packets.jsonl").read_bytes()) < os.path.getsize(
                ref / "packets.jsonl"):
            time.sleep(0.05)
        proc.send_signal(signal.SIGINT)
        code = proc.wait(timeout=120)
        proc.stdin.close()
    else:
        proc.stdin.close()
        code = proc.wait(timeout=120)
    err = proc.stderr.read().decode()
    assert code == 0, err
    assert not (out / "INCOMPLETE").exists()
    assert json.loads((out / "report.json").read_text())["summary"]["packets"] > 0
    assert (out / "packets.jsonl").read_bytes() == (ref / "packets.jsonl").read_bytes()
    # doppler.tdm was written as the rows came (its body beside it) and put together at the end
    assert (out / "doppler.tdm").read_text().count("RECEIVE_FREQ_1") > 0 and not list(out.glob("*.partial"))


def test_a_killed_live_run_keeps_its_records_and_the_marker(tmp_path, pass_3s):
    sim, _ = pass_3s
    out = tmp_path / "out"
    proc = subprocess.Popen(_cmd(out, "--follow"), stdin=subprocess.PIPE, stderr=subprocess.DEVNULL)
    with open(sim.data_path, "rb") as f:
        proc.stdin.write(f.read(8 * 1_500_000))
        proc.stdin.flush()
    packets = out / "packets.jsonl"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and not (packets.exists() and packets.stat().st_size > 0):
        time.sleep(0.05)
    proc.kill()
    proc.wait()
    assert (out / "INCOMPLETE").exists()
    assert (out / "packets.jsonl").stat().st_size > 0  # what was decoded is there, each record flushed
    assert not (out / "report.json").exists()
    assert not (out / "doppler.tdm").exists()  # its data lines may be there, never passed off as the message


def test_a_live_stream_is_one_process(tmp_path):
    from pipeline.cli import ExitCode

    r = subprocess.run(_cmd(tmp_path / "o", "--workers", "2"), stdin=subprocess.DEVNULL, capture_output=True,
                       text=True, timeout=300)
    assert r.returncode == ExitCode.USAGE and r.stderr.startswith("Error: ") and "--workers" in r.stderr
