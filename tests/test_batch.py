"""``pipeline.tools._batch.run_batch`` (``downlink batch``) on a local Dask cluster with tiny recordings.

Checks: every recording's output is identical to a single ``pipeline.decode`` of it; a failing
recording is reported in ``index.json`` and does not stop the others; a second run skips the
finished recordings and retries the failed one.  No timing here.
"""

from __future__ import annotations

import json
from pathlib import Path

import dask.distributed  # noqa: F401  (the [test] extra: a missing dask fails here, never skips)
import pytest

from pipeline import decode
from pipeline.errors import OutputError
from pipeline.profile import demo_profile_path
from pipeline.sim import simulate
from pipeline.tools._batch import output_name, output_names, run_batch

COMPARED = ("packets.jsonl", "frames.jsonl")


def _outputs(folder: Path) -> dict[str, bytes]:
    names = list(COMPARED) + sorted(p.name for p in folder.glob("apid_*.bin"))
    return {name: (folder / name).read_bytes() for name in names}


@pytest.fixture(scope="module")
def archive(tmp_path_factory, demo_profile):
    """Two good tiny passes and one recording whose metadata is not JSON."""
    folder = tmp_path_factory.mktemp("archive")
    good = []
    for name, seed in (("pass_a", 3), ("pass_b", 4)):
        sim = simulate(demo_profile, folder / name, seconds=1.2, seed=seed, name=name)  # truth files per pass
        good.append(str(sim.meta_path))
    bad = folder / "pass_bad.sigmf-meta"
    bad.write_text("{ this is not json", encoding="utf-8")
    (folder / "pass_bad.sigmf-data").write_bytes(b"\0" * 800)
    return good, str(bad)


@pytest.fixture(scope="module")
def single_decodes(tmp_path_factory, archive, demo_profile):
    # in-process decodes: the reference output (and they fill the numba cache the workers load)
    ref = tmp_path_factory.mktemp("single")
    outs = {}
    for rec in archive[0]:
        folder = ref / output_name(rec)
        s = decode(rec, demo_profile, str(folder))
        assert s.packets > 0  # the comparison below is worth something only with packets
        outs[output_name(rec)] = _outputs(folder)
    return outs


@pytest.fixture(scope="module")
def batch_runs(tmp_path_factory, archive, demo_profile, single_decodes):
    out = tmp_path_factory.mktemp("batch") / "out"
    good, bad = archive
    recordings = [good[0], bad, good[1]]
    rc1 = run_batch(recordings, demo_profile, str(demo_profile_path()), str(out), workers=2, quiet=True)
    index1 = json.loads((out / "index.json").read_text())
    names = output_names(recordings)
    stamps = {r: (out / names[r] / "packets.jsonl").stat().st_mtime_ns for r in good}
    rc2 = run_batch(recordings, demo_profile, str(demo_profile_path()), str(out), workers=1, quiet=True)
    index2 = json.loads((out / "index.json").read_text())
    return out, recordings, (rc1, index1), (rc2, index2), stamps, names


def test_output_name():
    assert output_name("/a/b/pass_a.sigmf-meta") == "pass_a"
    assert output_name("pass.sigmf-data") == "pass"
    assert output_name("raw.cu8") == "raw"
    assert output_name("x.tar.bin") == "x.tar"


def test_batch_output_identical_to_single_decode(batch_runs, single_decodes, archive):
    out, names = batch_runs[0], batch_runs[5]
    for rec in archive[0]:
        folder = out / names[rec]
        assert _outputs(folder) == single_decodes[output_name(rec)]  # byte for byte
        assert (folder / "report.json").is_file()
        assert (folder / "report.html").is_file()


def test_failed_recording_reported_and_others_decoded(batch_runs, archive):
    out, recordings, (rc1, index1), _, _, _ = batch_runs
    assert rc1 == 1  # not every recording decoded
    by_rec = {r["recording"]: r for r in index1["recordings"]}
    assert [r["recording"] for r in index1["recordings"]] == recordings  # index in the order given
    good, bad = archive
    assert by_rec[bad]["status"] == "failed"
    assert "pass_bad" in by_rec[bad]["error"]
    assert not (out / "pass_bad").exists()  # no half-written folder
    for rec in good:
        assert by_rec[rec]["status"] == "decoded"
        assert by_rec[rec]["packets"] > 0
        assert by_rec[rec]["frames"] >= by_rec[rec]["frames_ok"] > 0
    assert index1["profile"] == str(demo_profile_path())


def test_rerun_skips_finished_and_retries_failed(batch_runs, archive):
    out, _, _, (rc2, index2), stamps, names = batch_runs
    good, bad = archive
    by_rec = {r["recording"]: r for r in index2["recordings"]}
    assert rc2 == 1
    for rec in good:
        assert by_rec[rec]["status"] == "skipped"
        # the finished folder was not written again
        assert (out / names[rec] / "packets.jsonl").stat().st_mtime_ns == stamps[rec]
    assert by_rec[bad]["status"] == "failed"


def test_all_good_returns_zero_and_incomplete_folder_not_skipped(tmp_path, archive, demo_profile, single_decodes):
    good, _ = archive
    out = tmp_path / "out"
    # a folder without its report is not "finished": it is not skipped (the ordinary decode then
    # refuses to overwrite it, so it is reported as failed rather than silently kept)
    stale = out / output_name(good[0])
    stale.mkdir(parents=True)
    (stale / "packets.jsonl").write_text("")
    rc = run_batch(good[:1], demo_profile, "p.toml", str(out), workers=1, quiet=True)
    entry = json.loads((out / "index.json").read_text())["recordings"][0]
    assert rc == 1 and entry["status"] == "failed"
    (stale / "packets.jsonl").unlink()
    stale.rmdir()
    rc = run_batch(good[:1], demo_profile, "p.toml", str(out), workers=1, quiet=True)
    assert rc == 0
    assert json.loads((out / "index.json").read_text())["recordings"][0]["status"] == "decoded"
    assert _outputs(out / output_name(good[0])) == single_decodes[output_name(good[0])]


def test_two_recordings_with_one_file_name_decode_into_two_folders(tmp_path, demo_profile, capfd):
    # issue 18: `simulate` names every recording "recording"; folders below a common parent keep them apart
    recs = [str(simulate(demo_profile, tmp_path / "arch" / d, seconds=1.2, seed=s).meta_path)
            for d, s in (("day1", 5), ("day2", 6))]
    out = tmp_path / "out"
    capfd.readouterr()
    assert run_batch(recs, demo_profile, "p.toml", str(out), workers=2) == 0
    err = capfd.readouterr().err.strip().splitlines()
    # one progress line per recording and a summary: no scheduler logging without -v.  (Only the batch's own lines
    # and the scheduler's are counted: a worker compiling a kernel whose cache another worker is writing may warn
    # once on stderr, which is numba's, not the scheduler's.)
    ours = [line for line in err if line.startswith(("[", "batch:"))]
    assert len(ours) == 3 and ours[0].startswith("[1/2]") and ours[-1].startswith("batch: 2 decoded"), err
    assert not [line for line in err if "distributed." in line or "dask" in line.lower()], err
    for d in ("day1", "day2"):
        assert (out / d / "recording" / "packets.jsonl").stat().st_size > 0
    index = json.loads((out / "index.json").read_text())
    assert [r["out"] for r in index["recordings"]] == [str(out / "day1" / "recording"), str(out / "day2" / "recording")]


def test_recordings_that_would_share_a_folder_are_refused_before_anything_is_made(tmp_path, demo_profile):
    a = tmp_path / "pass.wav"
    b = tmp_path / "pass.cf32"
    out = tmp_path / "out"
    with pytest.raises(OutputError, match="share the output folder pass"):
        run_batch([str(a), str(b)], demo_profile, "p.toml", str(out), workers=1, quiet=True)
    assert not out.exists()  # no empty folder left behind
    # the two files of one SigMF recording are one recording, decoded once
    names = output_names([str(tmp_path / "x.sigmf-meta"), str(tmp_path / "x.sigmf-data")])
    assert set(names.values()) == {"x"}
