"""The chain's seam and the segmented decode of one IQ recording.

The oracle is an unbroken chain: one :class:`FrontEnd` fed chunk by chunk into one :class:`BackEnd`,
written out below with the stages' own classes (no parallel code), so a change in the segmented decode
cannot change its own reference.  No timing here (speed is measured by ``downlink bench``).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from pipeline.chain import (
    DEFAULT_SEGMENT_SAMPLES,
    BackEnd,
    DecodeChain,
    FolderSinks,
    FrontEnd,
    SegmentedDecode,
    segment_plan,
)
from pipeline.chain._kernels import owned_counts
from pipeline.recording import open_recording
from pipeline.sim import simulate

OUTPUT_FILES = ("packets.jsonl", "frames.jsonl")
SEG = 1 << 20  # the smallest segment allowed, so that a 3.2 s recording has three segments


@pytest.fixture(scope="module")
def small_profile(demo_profile):
    # small chunks so that a short recording passes many chunks through the chain
    return demo_profile.with_changes(receiver={"chunk_samples": 1 << 16})


@pytest.fixture(scope="module")
def recording(tmp_path_factory, small_profile):
    return simulate(small_profile, tmp_path_factory.mktemp("rec"), seconds=1.5, seed=11)


def _plain_decode(meta_path, profile, folder: Path, chunk_samples: int | None = None) -> BackEnd:
    """The reference: one front end into one back end, chunk by chunk."""
    rec = open_recording(meta_path)
    sinks = FolderSinks(folder)
    front = FrontEnd(profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz)
    back = BackEnd(profile, timebase=rec, sample_rate_hz=rec.sample_rate_hz, sinks=sinks)
    for chunk in rec.chunks(chunk_samples or profile.receiver.chunk_samples):
        back.process(front.process_chunk(chunk))
    back.process(front.finish())
    back.finish()
    sinks.close()
    back.front_summary = front.summary()
    return back


def _segmented(meta_path, profile, folder: Path, *, workers: int = 1, segment_samples: int = SEG,
               scheduler: str | None = None):
    rec = open_recording(meta_path)
    sinks = FolderSinks(folder)
    back = BackEnd(profile, timebase=rec, sample_rate_hz=rec.sample_rate_hz, sinks=sinks)
    sd = SegmentedDecode(profile, workers=workers, segment_samples=segment_samples, scheduler=scheduler)
    back.front_summary = sd.run(rec, back)
    sinks.close()
    return back, sd


def _outputs(folder: Path) -> dict[str, bytes]:
    names = list(OUTPUT_FILES) + sorted(p.name for p in folder.glob("apid_*.bin"))
    names += [p.name for p in folder.glob("doppler.csv")]
    return {name: (folder / name).read_bytes() for name in names}


@pytest.fixture(scope="module")
def reference(tmp_path_factory, recording, small_profile):
    folder = tmp_path_factory.mktemp("plain")
    back = _plain_decode(recording.meta_path, small_profile, folder)
    return back, _outputs(folder)


def test_reference_decodes_packets(reference):
    back, out = reference
    # the identity tests below mean something only if the reference found frames and packets
    assert back.frame_count >= 10
    assert back.packet_count >= 10
    assert any(name.startswith("apid_") for name in out)
    assert len(out["packets.jsonl"].splitlines()) == back.packet_count
    assert len(out["doppler.csv"].splitlines()) > 10  # the carrier track is an output too


@pytest.mark.parametrize("chunk", [4096, 50_000, 1 << 18])
def test_chunk_sizes_do_not_change_output(tmp_path, recording, small_profile, reference, chunk):
    _plain_decode(recording.meta_path, small_profile, tmp_path, chunk_samples=chunk)
    assert _outputs(tmp_path) == reference[1]


def test_decode_chain_is_front_plus_back(tmp_path, recording, small_profile, reference):
    rec = open_recording(recording.meta_path)
    sinks = FolderSinks(tmp_path)
    chain = DecodeChain(small_profile, sample_rate_hz=rec.sample_rate_hz, timebase=rec, sinks=sinks)
    for chunk in rec.chunks(small_profile.receiver.chunk_samples):
        chain.process_chunk(chunk)
    summary = chain.finish()
    sinks.close()
    assert _outputs(tmp_path) == reference[1]
    assert summary.counts == reference[0].front_summary.counts
    assert summary.counts.samples == rec.num_samples


def test_single_segment_is_the_plain_chain(tmp_path, recording, small_profile, reference):
    # a recording shorter than one segment: the segmented decode is byte-identical to the plain chain
    back, _ = _segmented(recording.meta_path, small_profile, tmp_path, workers=2,
                         segment_samples=DEFAULT_SEGMENT_SAMPLES)
    assert _outputs(tmp_path) == reference[1]
    assert back.front_summary.counts == reference[0].front_summary.counts


@pytest.mark.kat
def test_owned_counts_kernel_counts_the_half_open_range():
    # the slow obvious reference: numpy's element-wise test lo <= p < hi (a segment's owned range [a, b))
    rng = np.random.default_rng(5)
    position = np.sort(rng.uniform(-50.0, 150.0, 300))
    position[[7, 100]] = (0.0, 100.0)  # both ends exactly: lo is inside, hi is not
    position[200] = np.nan  # never inside
    mask = rng.random(300) < 0.6
    out = np.zeros(2, np.int64)
    owned_counts(position, mask, 0.0, 100.0, out)
    inside = (position >= 0.0) & (position < 100.0)
    assert out.tolist() == [int(inside.sum()), int((inside & mask).sum())]
    owned_counts(position, np.zeros(0, np.bool_), 0.0, 100.0, out)  # no mask: the second count is 0
    assert out.tolist() == [int(inside.sum()), 0]
    owned_counts(position[:0], np.zeros(0, np.bool_), 0.0, 100.0, out)
    assert out.tolist() == [0, 0]


# ---- several segments ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def long_recording(tmp_path_factory, demo_profile):
    return simulate(demo_profile, tmp_path_factory.mktemp("rec3s"), seconds=3.2, seed=21)


@pytest.fixture(scope="module")
def long_plain(tmp_path_factory, long_recording, demo_profile):
    folder = tmp_path_factory.mktemp("plain3s")
    return _plain_decode(long_recording.meta_path, demo_profile, folder), _outputs(folder)


@pytest.fixture(scope="module")
def segmented_one_worker(tmp_path_factory, long_recording, demo_profile):
    folder = tmp_path_factory.mktemp("seg1")
    back, sd = _segmented(long_recording.meta_path, demo_profile, folder)
    return back, _outputs(folder), sd


def test_segment_plan_covers_recording_once(demo_profile):
    n = 10_500_000
    plan = segment_plan(n, demo_profile, 1e6, segment_samples=SEG)
    owned = [(a, b) for a, b, _, _ in plan]
    assert owned[0][0] == 0 and owned[-1][1] == n
    assert all(b0 == a1 for (_, b0), (a1, _) in zip(owned[:-1], owned[1:]))  # contiguous, no overlap
    assert all(b - a >= SEG for a, b in owned)  # a short remainder joins the last segment
    # CCSDS 131.0-B: CADU = 32-bit ASM + 1275-octet codeblock, rate 1/2 -> 20464 channel bits at 240 kbaud
    cadu = 85267
    assert int(np.ceil(demo_profile.samples_per_cadu(1e6))) == cadu
    for a, b, ra, rb in plan:
        assert ra == max(0, a - (4 * cadu + (1 << 17)))
        assert rb == min(n, b + 2 * cadu + (1 << 16))
    for a, _b, ra, _rb in segment_plan(n, demo_profile, 1e6, segment_samples=SEG, block_samples=16384):
        assert ra % 16384 == 0 and a - (4 * cadu + (1 << 17)) - 16384 < ra <= max(0, a - (4 * cadu + (1 << 17)))


def test_segment_plan_short_and_empty(demo_profile):
    assert segment_plan(5000, demo_profile, 1e6) == [(0, 5000, 0, 5000)]
    assert segment_plan(0, demo_profile, 1e6) == [(0, 0, 0, 0)]
    assert len(segment_plan(int(1.2 * DEFAULT_SEGMENT_SAMPLES), demo_profile, 1e6)) == 1
    assert len(segment_plan(3_200_000, demo_profile, 1e6, segment_samples=SEG)) == 3


@pytest.mark.parametrize("workers", [2, 3])
def test_segmented_output_independent_of_workers(tmp_path, long_recording, demo_profile, segmented_one_worker,
                                                 workers):
    back, _ = _segmented(long_recording.meta_path, demo_profile, tmp_path, workers=workers)
    assert _outputs(tmp_path) == segmented_one_worker[1]  # byte for byte
    assert back.frame_count == segmented_one_worker[0].frame_count
    assert back.track.position == segmented_one_worker[0].track.position


def test_segments_on_a_dask_cluster_give_the_same_output(tmp_path, long_recording, demo_profile,
                                                         segmented_one_worker):
    # issue 19: the segments as tasks on a (local) Dask cluster, each worker reading its own byte range
    import dask.distributed  # noqa: F401  (the [test] extra)
    back, _ = _segmented(long_recording.meta_path, demo_profile, tmp_path, workers=2, scheduler="local")
    assert _outputs(tmp_path) == segmented_one_worker[1]  # byte for byte
    assert back.front_summary.counts == segmented_one_worker[0].front_summary.counts


def _rows(blob: bytes, keys):
    return [tuple(json.dumps(json.loads(line)[k]) for k in keys) for line in blob.splitlines()]


def test_segmented_content_same_as_plain(long_recording, long_plain, segmented_one_worker):
    ref_back, ref = long_plain
    back, out, _ = segmented_one_worker
    assert back.frame_count == ref_back.frame_count >= 30
    assert back.packet_count == ref_back.packet_count >= 30
    assert back.status_counts == ref_back.status_counts
    assert back.front_summary.counts.samples == ref_back.front_summary.counts.samples == long_recording.num_samples
    assert back.front_summary.counts.channel_symbols == pytest.approx(
        ref_back.front_summary.counts.channel_symbols, abs=8)
    # the recovered octets are the same; positions (and the ERT/Es/N0 derived from them) come from a
    # fresh receiver after each boundary and agree only closely
    pkt_keys = ("apid", "seq_count", "hex", "vcid", "mcfc", "vcfc", "rs_corrected")
    assert _rows(out["packets.jsonl"], pkt_keys) == _rows(ref["packets.jsonl"], pkt_keys)
    frame_keys = ("status", "vcid", "mcfc", "vcfc", "rs_corrected", "asm_errors", "inverted", "flywheel")
    assert _rows(out["frames.jsonl"], frame_keys) == _rows(ref["frames.jsonl"], frame_keys)
    assert {k: v for k, v in out.items() if k.startswith("apid_")} == {k: v for k, v in ref.items()
                                                                       if k.startswith("apid_")}
    # one carrier-track row per demodulator block; blocks in the lead-ins are not repeated
    assert abs(len(out["doppler.csv"].splitlines()) - len(ref["doppler.csv"].splitlines())) <= 3
    pos = np.array([json.loads(line)["sample_position"] for line in out["frames.jsonl"].splitlines()])
    pos_ref = np.array([json.loads(line)["sample_position"] for line in ref["frames.jsonl"].splitlines()])
    # segments start on the demodulator's block grid, so the loops re-converge to the plain chain's
    # track: agreement to about 1e-6 samples was measured; 1e-3 leaves room (no published source)
    np.testing.assert_allclose(pos, pos_ref, rtol=0, atol=1e-3)


def test_overlap_frames_taken_once(long_recording, demo_profile, segmented_one_worker):
    back, _, sd = segmented_one_worker
    rec = open_recording(long_recording.meta_path)
    seen = []
    other = BackEnd(demo_profile, timebase=rec, sample_rate_hz=rec.sample_rate_hz)
    SegmentedDecode(demo_profile, segment_samples=SEG).run(
        rec, other, on_segment=lambda res: seen.append((res.index, len(res.frames))))
    assert [i for i, _ in seen] == [0, 1, 2]
    # the lead-ins repeat frames of the previous segment; each is dropped exactly once
    assert sd.frames_dropped_as_duplicates > 0
    assert sum(n for _, n in seen) > other.frame_count == back.frame_count
    assert len(sd.segment_cpu_s) == 3 and sd.speedup_bound(2) > 1.0


def test_stage_statistics_count_each_owned_range_once(long_plain, segmented_one_worker):
    # the lead-ins repeat the previous segment's last frames: the report's stage counters are the owned
    # ranges' (snapshots at both ends of each owned run), so they add up to the unbroken chain's to within
    # the stages' latency at each of the two boundaries, not the lead-ins' frames over again
    ref_back, _ = long_plain
    back, _, sd = segmented_one_worker
    ref, seg = ref_back.front_summary.stats, back.front_summary.stats
    assert sd.frames_dropped_as_duplicates > 2
    assert ref["frame_sync"].cadus == ref_back.frame_count
    assert abs(seg["frame_sync"].cadus - ref["frame_sync"].cadus) <= 2
    assert abs(seg["codeblock"].codewords - ref["codeblock"].codewords) <= 2 * 5
    assert abs(seg["branch"].bits_out - ref["branch"].bits_out) < 0.02 * ref["branch"].bits_out
    # a last value is the last segment's, never a sum
    assert 0.5 < seg["branch"].last_metric <= 1.0


@pytest.mark.parametrize("kwargs, exc, text", [
    ({"workers": 0}, ValueError, "Argument 'workers' must be 1..64, not 0."),
    ({"workers": 2.0}, TypeError, "Argument 'workers' must be an integer, not float."),
    ({"segment_samples": 1000}, ValueError, "Argument 'segment_samples' must be >= 1048576, not 1000."),
    ({"segment_samples": 2.0**21}, TypeError, "Argument 'segment_samples' must be an integer, not float."),
])
def test_segmented_bad_arguments(demo_profile, kwargs, exc, text):
    with pytest.raises(exc, match=text.replace(".", r"\.")):
        SegmentedDecode(demo_profile, **kwargs)


@pytest.mark.parametrize("workers", [1, 2])
def test_segment_worker_error_is_raised(tmp_path, long_recording, demo_profile, workers):
    from pipeline.errors import RecordingError

    meta = tmp_path / "cut.sigmf-meta"
    shutil.copy(long_recording.meta_path, meta)
    data = tmp_path / "cut.sigmf-data"
    shutil.copy(long_recording.data_path, data)
    rec = open_recording(meta)
    with open(data, "r+b") as f:  # the file shrinks after opening: a read fails in a worker
        f.truncate(8 * 1_500_000)
    with pytest.raises(RecordingError, match="cut.sigmf-data"):
        SegmentedDecode(demo_profile, workers=workers, segment_samples=SEG).run(rec, BackEnd(demo_profile))


@pytest.mark.parametrize("workers", [1, 2])
def test_a_recording_that_no_longer_matches_its_sha512_fails_the_segmented_decode(tmp_path, long_recording,
                                                                                  demo_profile, workers):
    # issue 13: core:sha512 (SigMF) is checked while the segments decode; a mismatch fails the run before
    # any output is marked complete; --no-checksum skips the check
    from pipeline.chain import decode_to_folder
    from pipeline.errors import RecordingError

    for suffix in (".sigmf-meta", ".sigmf-data"):
        shutil.copy(long_recording.meta_path.with_suffix(suffix), tmp_path / f"r{suffix}")
    meta = json.loads((tmp_path / "r.sigmf-meta").read_text())
    assert "core:sha512" in meta["global"]  # the simulator's writer records it
    with open(tmp_path / "r.sigmf-data", "r+b") as f:  # one sample changed, deep inside a later segment
        f.seek(8 * 2_500_000)
        f.write(b"\x00\x00\x80\x3f")
    with pytest.raises(RecordingError, match="sha512"):
        decode_to_folder(str(tmp_path / "r.sigmf-meta"), demo_profile, str(tmp_path / "out"), workers=workers,
                         segment_samples=SEG)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.sigmf-data", "r.sigmf-meta"]
    s = decode_to_folder(str(tmp_path / "r.sigmf-meta"), demo_profile, str(tmp_path / "out"), workers=workers,
                         segment_samples=SEG, verify_checksum=False)
    assert s.packets > 0 and s.report["recording"]["checksum"] == "not checked (--no-checksum)"
    good = decode_to_folder(str(long_recording.meta_path), demo_profile, str(tmp_path / "good"),
                            segment_samples=SEG, workers=workers)
    assert good.report["recording"]["checksum"] == "verified"
