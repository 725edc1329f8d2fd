"""Parallel decode of one recording: output byte-for-byte identical to the single-threaded chain.

No timing here (speed is measured by ``downlink bench`` and bench/bench_end_to_end.py).  The
oracle is the plain loop of ``pipeline._chain`` (``process_chunk`` per chunk, then ``finish``),
written out again below so that a change in the parallel code cannot change its own reference.
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest

from pipeline._chain import DecodeChain, _Sinks
from pipeline._parallel import PipelinedDecode, decode_chain_parallel
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
