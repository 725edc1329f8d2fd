"""Parallel decode of one recording: output byte-for-byte identical to the single-threaded chain.

No timing here (speed is measured by ``downlink bench`` and bench/bench_end_to_end.py).  The
oracle is the plain loop of ``pipeline.chain._chain`` (``process_chunk`` per chunk, then ``finish``),
written out again below so that a change in the parallel code cannot change its own reference.
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest

from pipeline.chain._chain import DecodeChain, _Sinks
from pipeline.chain._parallel import PipelinedDecode, decode_chain_parallel
from pipeline.recording import open_recording
from pipeline.sim import simulate

OUTPUT_FILES = ("packets.jsonl", "frames.jsonl")


@pytest.fixture(scope="module")
def small_profile(demo_profile):
    # small chunks so that a short recording still passes many chunks through the queues
    return demo_profile.with_changes(receiver={"chunk_samples": 1 << 16})


@pytest.fixture(scope="module")
def recording(tmp_path_factory, small_profile):
    folder = tmp_path_factory.mktemp("rec")
    sim = simulate(small_profile, folder, seconds=1.5, seed=11)
    return sim


def _plain_decode(meta_path, profile, folder: Path) -> DecodeChain:
    """The reference: the single-threaded loop, exactly as decode_to_folder runs it."""
    rec = open_recording(meta_path)
    chain = DecodeChain(profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    chain.sinks = _Sinks(folder)
    for chunk in rec.chunks(profile.receiver.chunk_samples):
        chain.process_chunk(chunk)
    chain.finish()
    chain.sinks.close()
    return chain


def _outputs(folder: Path) -> dict[str, bytes]:
    names = list(OUTPUT_FILES) + sorted(p.name for p in folder.glob("apid_*.bin"))
    names += [p.name for p in folder.glob("doppler.csv")]
    return {name: (folder / name).read_bytes() for name in names}


@pytest.fixture(scope="module")
def reference(tmp_path_factory, recording, small_profile):
    folder = tmp_path_factory.mktemp("plain")
    chain = _plain_decode(recording.meta_path, small_profile, folder)
    return chain, _outputs(folder)


def test_reference_decodes_packets(reference, recording):
    chain, out = reference
    # the identity tests below mean something only if the reference found frames and packets
    assert chain.frame_count >= 10
    assert chain.packet_count >= 10
    assert any(name.startswith("apid_") for name in out)
    assert len(out["packets.jsonl"].splitlines()) == chain.packet_count
    assert len(out["doppler.csv"].splitlines()) > 10  # the carrier track is an output too


@pytest.mark.parametrize("threads", [1, 2, 3, 5])
def test_pipelined_output_identical(tmp_path, recording, small_profile, reference, threads):
    chain_ref, out_ref = reference
    chain = decode_chain_parallel(str(recording.meta_path), small_profile, sinks_folder=tmp_path, threads=threads)
    assert _outputs(tmp_path) == out_ref  # byte for byte, every file
    assert chain.frame_count == chain_ref.frame_count
    assert chain.packet_count == chain_ref.packet_count
    assert chain.status_counts == chain_ref.status_counts
    assert chain.track_position == chain_ref.track_position
    assert chain.track_esn0_db == chain_ref.track_esn0_db
    assert chain.samples == chain_ref.samples
    assert chain.channel_symbols == chain_ref.channel_symbols


@pytest.mark.parametrize("queue_chunks", [1, 64])
def test_queue_depth_does_not_change_output(tmp_path, recording, small_profile, reference, queue_chunks):
    chain = decode_chain_parallel(str(recording.meta_path), small_profile, sinks_folder=tmp_path, threads=2,
                                  queue_chunks=queue_chunks)
    assert _outputs(tmp_path) == reference[1]
    assert chain.frame_count == reference[0].frame_count


def test_report_same_as_plain(tmp_path, recording, small_profile, reference):
    chain_ref, _ = reference
    chain = decode_chain_parallel(str(recording.meta_path), small_profile, threads=2)
    info = {"path": "x"}
    rep_ref, _ = chain_ref.report(recording_info=info, elapsed_s=1.0, duration_s=1.5)
    rep, _ = chain.report(recording_info=info, elapsed_s=1.0, duration_s=1.5)
    assert rep == rep_ref


def test_on_chunk_called_in_order_on_calling_thread(recording, small_profile):
    rec = open_recording(recording.meta_path)
    chain = DecodeChain(small_profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    seen = []
    caller = threading.get_ident()

    def on_chunk(chunk):
        assert threading.get_ident() == caller
        seen.append(chunk.start)

    pd = PipelinedDecode(chain, threads=2)
    pd.run(rec.chunks(small_profile.receiver.chunk_samples), on_chunk=on_chunk)
    step = small_profile.receiver.chunk_samples
    assert seen == list(range(0, rec.num_samples, step))
    assert pd.chunks_done == len(seen)
    assert set(pd.cpu_s) == {"demod", "main"}
    # the stand-in is removed again
    from pipeline.demod import Demodulator

    assert isinstance(chain.demod, Demodulator)


class _Boom(RuntimeError):
    pass


def _failing_chunks(rec, n, fail_at):
    for i, chunk in enumerate(rec.chunks(n)):
        if i == fail_at:
            raise _Boom("recording read failed")
        yield chunk


@pytest.mark.parametrize("threads", [2, 3])
def test_error_in_reader_is_raised_and_threads_end(recording, small_profile, threads):
    rec = open_recording(recording.meta_path)
    chain = DecodeChain(small_profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    before = threading.active_count()
    with pytest.raises(_Boom):
        PipelinedDecode(chain, threads=threads).run(_failing_chunks(rec, small_profile.receiver.chunk_samples, 3))
    assert threading.active_count() == before


def test_error_on_main_thread_stops_workers(recording, small_profile):
    rec = open_recording(recording.meta_path)
    chain = DecodeChain(small_profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    before = threading.active_count()

    def on_chunk(chunk):
        if chunk.start > 0:
            raise _Boom("sink failed")

    with pytest.raises(_Boom):
        PipelinedDecode(chain, threads=3, queue_chunks=1).run(rec.chunks(small_profile.receiver.chunk_samples),
                                                               on_chunk=on_chunk)
    assert threading.active_count() == before


def test_empty_input(small_profile):
    chain = DecodeChain(small_profile, input_kind="iq", sample_rate_hz=1e6, timebase=None)
    PipelinedDecode(chain, threads=2).run([])
    assert chain.frame_count == 0 and chain.samples == 0


@pytest.mark.parametrize("kwargs, exc, text", [
    ({"threads": 0}, ValueError, "Argument 'threads' must be >= 1, not 0."),
    ({"threads": 2.0}, TypeError, "Argument 'threads' must be an integer, not float."),
    ({"threads": True}, TypeError, "Argument 'threads' must be an integer"),
    ({"queue_chunks": 0}, ValueError, "Argument 'queue_chunks' must be 1..64, not 0."),
    ({"queue_chunks": 65}, ValueError, "Argument 'queue_chunks' must be 1..64, not 65."),
])
def test_bad_arguments(small_profile, kwargs, exc, text):
    chain = DecodeChain(small_profile, input_kind="iq", sample_rate_hz=1e6)
    with pytest.raises(exc, match=text.replace(".", r"\.")):
        PipelinedDecode(chain, **kwargs)


def test_soft_chain_refused(small_profile):
    chain = DecodeChain(small_profile, input_kind="soft")
    with pytest.raises(ValueError, match="Argument 'chain' must be an IQ decode chain"):
        PipelinedDecode(chain, threads=2)


def test_chunk_sizes_do_not_change_output(tmp_path, recording, small_profile, reference):
    # chunking invariance of the whole pipelined chain: random chunk boundaries, same bytes
    rng = np.random.default_rng(5)
    rec = open_recording(recording.meta_path)
    cuts = np.sort(rng.choice(np.arange(1, rec.num_samples), size=20, replace=False))
    bounds = [0, *cuts.tolist(), rec.num_samples]

    def chunks():
        for a, b in zip(bounds[:-1], bounds[1:]):
            yield rec.read(a, b - a)

    chain = DecodeChain(small_profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    chain.sinks = _Sinks(tmp_path)
    PipelinedDecode(chain, threads=2).run(chunks())
    chain.sinks.close()
    assert _outputs(tmp_path) == reference[1]


# ---- overlapping segments -----------------------------------------------------------------------

from pipeline.chain._parallel import (  # noqa: E402
    DEFAULT_SEGMENT_SAMPLES,
    SegmentedDecode,
    decode_segmented,
    lead_samples,
    segment_plan,
)

SEG = 1 << 20  # the smallest segment allowed, so that a 3 s recording has three segments


@pytest.fixture(scope="module")
def long_recording(tmp_path_factory, demo_profile):
    folder = tmp_path_factory.mktemp("rec3s")
    return simulate(demo_profile, folder, seconds=3.2, seed=21)


@pytest.fixture(scope="module")
def long_plain(tmp_path_factory, long_recording, demo_profile):
    folder = tmp_path_factory.mktemp("plain3s")
    chain = _plain_decode(long_recording.meta_path, demo_profile, folder)
    return chain, _outputs(folder)


@pytest.fixture(scope="module")
def segmented_one_thread(tmp_path_factory, long_recording, demo_profile):
    folder = tmp_path_factory.mktemp("seg1")
    chain = decode_segmented(str(long_recording.meta_path), demo_profile, sinks_folder=folder, threads=1,
                             segment_samples=SEG)
    return chain, _outputs(folder)


def test_segment_plan_covers_recording_once(demo_profile):
    n = 10_500_000
    plan = segment_plan(n, demo_profile, 1e6, segment_samples=SEG)
    owned = [(a, b) for a, b, _, _ in plan]
    assert owned[0][0] == 0 and owned[-1][1] == n
    assert all(b0 == a1 for (_, b0), (a1, _) in zip(owned[:-1], owned[1:]))  # contiguous, no overlap
    assert all(b - a >= SEG for a, b in owned)  # a short remainder joins the last segment
    cadu = lead_samples(demo_profile, 1e6)
    # CCSDS 131.0-B: CADU = 32-bit ASM + 1275-octet codeblock, rate 1/2 -> 20464 channel bits at 240 kbaud
    assert cadu == 85267
    for a, b, ra, rb in plan:
        assert ra == max(0, a - (4 * cadu + (1 << 17)))
        assert rb == min(n, b + 2 * cadu + (1 << 16))
    for a, _b, ra, _rb in segment_plan(n, demo_profile, 1e6, segment_samples=SEG, block_samples=16384):
        assert ra % 16384 == 0 and a - (4 * cadu + (1 << 17)) - 16384 < ra <= max(0, a - (4 * cadu + (1 << 17)))


def test_segment_plan_short_and_empty(demo_profile):
    assert segment_plan(5000, demo_profile, 1e6) == [(0, 5000, 0, 5000)]
    assert segment_plan(0, demo_profile, 1e6) == [(0, 0, 0, 0)]
    assert len(segment_plan(int(1.2 * DEFAULT_SEGMENT_SAMPLES), demo_profile, 1e6)) == 1


def test_segmented_has_several_segments(long_recording, demo_profile):
    assert len(segment_plan(long_recording.num_samples, demo_profile, 1e6, segment_samples=SEG)) == 3


@pytest.mark.parametrize("threads, executor", [(2, "process"), (3, "process"), (2, "thread")])
def test_segmented_output_independent_of_threads(tmp_path, long_recording, demo_profile, segmented_one_thread,
                                                 threads, executor):
    chain = decode_segmented(str(long_recording.meta_path), demo_profile, sinks_folder=tmp_path, threads=threads,
                             segment_samples=SEG, executor=executor)
    assert _outputs(tmp_path) == segmented_one_thread[1]  # byte for byte
    assert chain.frame_count == segmented_one_thread[0].frame_count
    assert chain.track_position == segmented_one_thread[0].track_position


def _rows(blob: bytes, keys):
    import json

    return [tuple(json.dumps(json.loads(line)[k]) for k in keys) for line in blob.splitlines()]


def test_segmented_content_same_as_plain(long_recording, long_plain, segmented_one_thread):
    chain_ref, ref = long_plain
    chain, out = segmented_one_thread
    assert chain.frame_count == chain_ref.frame_count >= 30
    assert chain.packet_count == chain_ref.packet_count >= 30
    assert chain.samples == chain_ref.samples == long_recording.num_samples
    # the recovered octets are the same; positions (and the ERT/Es/N0 derived from them) come from a
    # fresh receiver after each boundary and agree only closely
    pkt_keys = ("apid", "seq_count", "hex", "vcid", "mcfc", "vcfc", "rs_corrected")
    assert _rows(out["packets.jsonl"], pkt_keys) == _rows(ref["packets.jsonl"], pkt_keys)
    frame_keys = ("status", "vcid", "mcfc", "vcfc", "fhp", "rs_corrected", "asm_errors", "inverted", "flywheel")
    assert _rows(out["frames.jsonl"], frame_keys) == _rows(ref["frames.jsonl"], frame_keys)
    assert {k: v for k, v in out.items() if k.startswith("apid_")} == {k: v for k, v in ref.items()
                                                                       if k.startswith("apid_")}
    # one carrier-track row per demodulator block; blocks in the lead-ins are not repeated
    assert abs(len(out["doppler.csv"].splitlines()) - len(ref["doppler.csv"].splitlines())) <= 3
    import json

    pos = np.array([json.loads(line)["position"] for line in out["frames.jsonl"].splitlines()])
    pos_ref = np.array([json.loads(line)["position"] for line in ref["frames.jsonl"].splitlines()])
        # segments start on the demodulator's block grid, so the loops re-converge to the plain chain's
    # track: agreement to about 1e-6 samples was measured; 1e-3 leaves room (no published source)
    np.testing.assert_allclose(pos, pos_ref, rtol=0, atol=1e-3)


def test_single_segment_is_the_plain_chain(tmp_path, recording, small_profile, reference):
    # a recording shorter than one segment: the segmented decode is byte-identical to the plain chain
    decode_segmented(str(recording.meta_path), small_profile, sinks_folder=tmp_path, threads=2)
    assert _outputs(tmp_path) == reference[1]


def test_segmented_report_counts(long_recording, demo_profile, long_plain, segmented_one_thread):
    chain_ref, _ = long_plain
    chain, _ = segmented_one_thread
    assert chain.status_counts == chain_ref.status_counts
    assert chain.channel_symbols == pytest.approx(chain_ref.channel_symbols, abs=8)
    info = {"path": "x"}
    rep, _ = chain.report(recording_info=info, elapsed_s=1.0, duration_s=3.2)
    rep_ref, _ = chain_ref.report(recording_info=info, elapsed_s=1.0, duration_s=3.2)
    assert rep["summary"] == rep_ref["summary"]
    assert rep["frames"] == rep_ref["frames"]
    assert rep["sync"]["codeblock.codeblocks"] >= chain.frame_count  # overlaps are decoded twice


@pytest.mark.parametrize("kwargs, exc, text", [
    ({"threads": 0}, ValueError, "Argument 'threads' must be >= 1, not 0."),
    ({"executor": "gpu"}, ValueError, "Argument 'executor' must be process | thread, not 'gpu'."),
    ({"segment_samples": 1000}, ValueError, "Argument 'segment_samples' must be >= 1048576, not 1000."),
    ({"segment_samples": 2.0**21}, TypeError, "Argument 'segment_samples' must be an integer, not float."),
])
def test_segmented_bad_arguments(demo_profile, kwargs, exc, text):
    with pytest.raises(exc, match=text.replace(".", r"\.").replace("|", r"\|")):
        SegmentedDecode(demo_profile, **kwargs)


def test_overlap_frames_taken_once(long_recording, demo_profile, segmented_one_thread):
    from pipeline.chain._chain import DecodeChain

    rec = open_recording(long_recording.meta_path)
    chain = DecodeChain(demo_profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    seen = []
    sd = SegmentedDecode(demo_profile, threads=1, segment_samples=SEG)
    sd.run(rec, chain, on_segment=lambda res: seen.append((res.index, len(res.frames))))
    assert [i for i, _ in seen] == [0, 1, 2]
    assert sd.segments_done == 3
    # the lead-ins repeat frames of the previous segment; each is dropped exactly once
    assert sd.frames_dropped_as_duplicates > 0
    assert sum(n for _, n in seen) > chain.frame_count == segmented_one_thread[0].frame_count


def test_nogil_kernel_list_names_real_kernels():
    import importlib

    from pipeline.chain._parallel import NOGIL_KERNELS

    for name in NOGIL_KERNELS:
        module, func = name.split(":")
        assert callable(getattr(importlib.import_module(module), func)), name


@pytest.mark.parametrize("mode, threads", [("pipeline", 1), ("pipeline", 2), ("segments", 2)])
def test_run_chain_one_call(tmp_path, recording, small_profile, reference, mode, threads):
    from pipeline.chain._parallel import run_chain

    rec = open_recording(recording.meta_path)
    chain = DecodeChain(small_profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    chain.sinks = _Sinks(tmp_path)
    done = []
    run_chain(chain, rec, threads=threads, mode=mode, on_progress=done.append)
    chain.sinks.close()
    assert _outputs(tmp_path) == reference[1]  # one segment: the plain chain in every mode
    assert done == sorted(done) and done[-1] == rec.num_samples


def test_run_chain_bad_mode(small_profile):
    from pipeline.chain._parallel import run_chain

    chain = DecodeChain(small_profile, input_kind="iq", sample_rate_hz=1e6)
    with pytest.raises(ValueError, match=r"Argument 'mode' must be pipeline \| segments, not 'gpu'\."):
        run_chain(chain, None, mode="gpu")


@pytest.mark.parametrize("threads", [1, 2])
def test_segment_worker_error_is_raised(tmp_path, long_recording, demo_profile, threads):
    import shutil

    from pipeline.errors import RecordingError

    meta = tmp_path / "cut.sigmf-meta"
    shutil.copy(long_recording.meta_path, meta)
    data = tmp_path / "cut.sigmf-data"
    shutil.copy(long_recording.data_path, data)
    rec = open_recording(meta)
    with open(data, "r+b") as f:  # the file shrinks after opening: a read fails in a worker
        f.truncate(8 * 1_500_000)
    with pytest.raises(RecordingError, match="cut.sigmf-data"):
        decode_segmented(rec, demo_profile, threads=threads, segment_samples=SEG)
