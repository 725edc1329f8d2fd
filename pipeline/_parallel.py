"""Decode one recording on two (or three) threads with output identical to the single-threaded chain.

The decode chain (``pipeline._chain.DecodeChain``) is a sequence of streaming stages with explicit
state.  Its two halves are independent except for the symbols flowing from the first to the second:

    thread "front":  Recording.chunks -> Demodulator.process          (the carrier/timing loops)
    main thread:     BranchSync (Viterbi) -> LineDecoder -> FrameSync -> CodeblockDecoder (RS)
                     -> FrameParser -> ChannelAccounting -> PacketExtractor -> sinks

Nothing travels the other way (the frame synchronizer's lost-lock notice goes to the branch
synchronizer, which is in the same half), so running the halves as a two-stage pipeline feeds every
stage exactly the same arrays in exactly the same order as the plain loop::

    for chunk in recording.chunks(n):
        chain.process_chunk(chunk)
    chain.finish()

and the output (``packets.jsonl``, ``frames.jsonl``, ``apid_NNNN.bin``, the report counts) is
byte-for-byte the same for any number of threads.  This is the property the tests check.

The speed-up comes from numba kernels that release the GIL (``@njit(nogil=True)``): while the
demodulator's kernels run in the front thread, the main thread runs the Viterbi decoder and the
rest.  Kernels compiled without ``nogil=True`` still give the right answer, only without the
overlap.  :data:`NOGIL_KERNELS` lists the kernels on the decode path.
"""

from __future__ import annotations

import queue
import threading
import time
from collections.abc import Callable, Iterable
from typing import Any

__all__ = ["NOGIL_KERNELS", "PipelinedDecode", "decode_chain_parallel"]

#: Kernels (``module:function``) on the decode path of an IQ recording; each must be compiled with
#: ``@njit(cache=True, nogil=True)`` for the threads to overlap.  The front thread runs the first
#: group (recording conversion, demodulator), the main thread the rest.
NOGIL_KERNELS: tuple[str, ...] = (
    "pipeline.recording._kernels:float_iq_to_complex64",
    "pipeline.recording._kernels:int_iq_to_complex64",
    "pipeline.demod._kernels:derotate",
    "pipeline.demod._kernels:fir_interleaved",
    "pipeline.demod._kernels:track_symbols",
    "pipeline.demod._kernels:power_nonzero",
    "pipeline.fec._kernels:*  (Viterbi add-compare-select and traceback, RS remainder/BM/Chien/Forney)",
    "pipeline.sync._kernels:*  (branch metrics, ASM search)",
)

_END = object()


class _FrontMessage:
    """One item handed from the front thread to the main thread."""

    __slots__ = ("kind", "chunk", "block", "snapshot", "error")

    def __init__(self, kind: str, chunk=None, block=None, snapshot=None, error: BaseException | None = None):
        self.kind = kind  # "chunk" | "flush" | "error"
        self.chunk = chunk
        self.block = block
        self.snapshot = snapshot
        self.error = error


class _PrecomputedDemod:
    """Stands in for the chain's demodulator on the main thread: returns blocks already computed.

    ``process(chunk)`` and ``flush()`` return the :class:`SymbolBlock` the real demodulator produced
    for that chunk in the front thread.  If the real demodulator has a ``constellation()`` method,
    it is answered with a snapshot taken right after the same chunk (so it shows the state the
    plain loop would see); every other attribute (``sample_rate_hz``, ...) is read from the real
    demodulator and must be configuration that does not change while decoding.
    """

    def __init__(self, real, consumed: threading.Event):
        self._real = real
        self._consumed = consumed
        self._pending = None  # the message whose block the next process()/flush() returns
        self._snapshot = None

    def _set(self, msg: _FrontMessage) -> None:
        self._pending = msg

    def _take(self, kind: str, chunk=None):
        msg = self._pending
        if msg is None or msg.kind != kind or (chunk is not None and msg.chunk is not chunk):
            raise RuntimeError(f"pipelined decode out of step: expected a {kind!r} block")  # a bug, not bad data
        self._pending = None
        self._snapshot = msg.snapshot
        return msg.block

    def process(self, chunk):
        return self._take("chunk", chunk)

    def flush(self):
        return self._take("flush")

    def _constellation(self):
        pts = self._snapshot
        if pts is not None and len(pts):
            # the main thread has what it wanted; the front thread may stop taking snapshots
            self._consumed.set()
        return pts

    def __getattr__(self, name: str) -> Any:
        if name == "constellation":
            if callable(getattr(self._real, "constellation", None)):
                return self._constellation
            raise AttributeError(name)
        return getattr(self._real, name)


class PipelinedDecode:
    """Feed an IQ :class:`~pipeline._chain.DecodeChain` with its demodulator in a worker thread.

    Parameters
    ----------
    chain : DecodeChain
        A fresh chain built for ``input_kind="iq"`` (sinks attached or not).  Its stage objects are
        used as they are; the demodulator is swapped for a stand-in only during :meth:`run`.
    threads : int, keyword-only
        1: the plain loop on the calling thread.  2: demodulator (and recording reads) in one
        worker thread, the rest on the calling thread.  3 or more: recording reads in a second
        worker thread as well (the chain has three pipeline stages, so more threads are not used).
    queue_chunks : int, keyword-only
        Chunks allowed in flight between two threads, 1..64.  Memory held is about
        ``queue_chunks x (8 + 13 / samples per channel bit) x chunk_samples`` bytes per queue,
        whatever the length of the recording.

    Notes
    -----
    The output does not depend on ``threads``: every stage receives the same inputs in the same
    order as in the plain loop (see the module docstring).  Cost: one queue hand-off per chunk;
    the overlap is real only for numba kernels compiled with ``nogil=True`` (see
    :data:`NOGIL_KERNELS`), otherwise the threads take turns and the speed is that of one thread.
    An exception in any thread stops the others and is raised from :meth:`run`.
    """

    def __init__(self, chain, *, threads: int = 2, queue_chunks: int = 4):
        if isinstance(threads, bool) or not isinstance(threads, int):
            raise TypeError(f"Argument 'threads' must be an integer, not {type(threads).__name__}.")
        if threads < 1:
            raise ValueError(f"Argument 'threads' must be >= 1, not {threads}.")
        if isinstance(queue_chunks, bool) or not isinstance(queue_chunks, int):
            raise TypeError(f"Argument 'queue_chunks' must be an integer, not {type(queue_chunks).__name__}.")
        if not 1 <= queue_chunks <= 64:
            raise ValueError(f"Argument 'queue_chunks' must be 1..64, not {queue_chunks}.")
        if getattr(chain, "demod", None) is None:
            raise ValueError("Argument 'chain' must be an IQ decode chain (input_kind 'iq') with a demodulator.")
        self.chain = chain
        self.threads = threads
        self.stages = min(threads, 3)
        self.queue_chunks = queue_chunks
        self.chunks_done = 0
        #: CPU seconds spent by each pipeline stage's thread in the last :meth:`run` (``time.thread_time``);
        #: ``max`` of them bounds the wall time on idle cores, their sum is the single-thread work.
        self.cpu_s: dict[str, float] = {}

    # ---- public ---------------------------------------------------------------------------
    def run(self, chunks: Iterable, on_chunk: Callable[[Any], None] | None = None) -> None:
        """Feed every chunk of ``chunks`` through the chain, then ``chain.finish()``.

        ``on_chunk(chunk)`` is called on the calling thread after each chunk has gone through the
        whole chain (a progress bar, for example).
        """
        self.cpu_s = {}
        if self.stages == 1:
            t0 = time.thread_time()
            for chunk in chunks:
                self.chain.process_chunk(chunk)
                self.chunks_done += 1
                if on_chunk is not None:
                    on_chunk(chunk)
            self.chain.finish()
            self.cpu_s["main"] = time.thread_time() - t0
            return
        self._run_threads(chunks, on_chunk)

    # ---- internals ------------------------------------------------------------------------
    def _run_threads(self, chunks: Iterable, on_chunk) -> None:
        chain = self.chain
        real = chain.demod
        stop = threading.Event()
        consumed = threading.Event()
        to_main: queue.Queue = queue.Queue(maxsize=self.queue_chunks)
        workers = []
        source: Iterable = chunks
        if self.stages >= 3:
            to_front: queue.Queue = queue.Queue(maxsize=self.queue_chunks)
            workers.append(threading.Thread(target=_reader, args=(chunks, to_front, stop, self.cpu_s),
                                            name="downlink-read", daemon=True))
            source = _drain(to_front, stop)
        wants_snapshots = callable(getattr(real, "constellation", None))
        workers.append(threading.Thread(target=_front, args=(source, real, to_main, stop, consumed, wants_snapshots,
                                                                   self.cpu_s),
                                        name="downlink-demod", daemon=True))
        stand_in = _PrecomputedDemod(real, consumed)
        chain.demod = stand_in
        t0 = time.thread_time()
        try:
            for w in workers:
                w.start()
            while True:
                msg = to_main.get()
                if msg.kind == "error":
                    raise msg.error
                stand_in._set(msg)
                if msg.kind == "chunk":
                    chain.process_chunk(msg.chunk)
                    self.chunks_done += 1
                    if on_chunk is not None:
                        on_chunk(msg.chunk)
                else:  # "flush": the demodulator's tail; finish the rest of the chain here
                    chain.finish()
                    break
        finally:
            self.cpu_s["main"] = time.thread_time() - t0
            stop.set()
            chain.demod = real
            for q in ([to_main] + ([to_front] if self.stages >= 3 else [])):
                _empty(q)
            for w in workers:
                w.join()


def _put(q: queue.Queue, item, stop: threading.Event) -> bool:
    """Put ``item`` unless ``stop`` is set; False when stopped (the consumer has gone)."""
    while not stop.is_set():
        try:
            q.put(item, timeout=0.1)
            return True
        except queue.Full:
            continue
    return False


def _empty(q: queue.Queue) -> None:
    while True:
        try:
            q.get_nowait()
        except queue.Empty:
            return


def _reader(chunks: Iterable, out: queue.Queue, stop: threading.Event, cpu_s: dict) -> None:
    t0 = time.thread_time()
    try:
        for chunk in chunks:
            if not _put(out, chunk, stop):
                return
        _put(out, _END, stop)
    except BaseException as exc:  # handed to the main thread, which raises it
        _put(out, _FrontMessage("error", error=exc), stop)
    finally:
        cpu_s["read"] = time.thread_time() - t0


def _drain(q: queue.Queue, stop: threading.Event):
    """Iterate the reader thread's queue (in the front thread); re-raise a reader error there."""
    while True:
        try:
            item = q.get(timeout=0.1)
        except queue.Empty:
            if stop.is_set():
                return
            continue
        if item is _END:
            return
        if isinstance(item, _FrontMessage):
            raise item.error
        yield item


def _front(chunks: Iterable, demod, out: queue.Queue, stop: threading.Event, consumed: threading.Event,
           wants_snapshots: bool, cpu_s: dict) -> None:
    t0 = time.thread_time()
    try:
        for chunk in chunks:
            block = demod.process(chunk)
            snap = demod.constellation() if wants_snapshots and not consumed.is_set() else None
            if not _put(out, _FrontMessage("chunk", chunk=chunk, block=block, snapshot=snap), stop):
                return
            if stop.is_set():
                return
        if stop.is_set():  # the reader stopped because the main thread gave up
            return
        block = demod.flush()
        snap = demod.constellation() if wants_snapshots and not consumed.is_set() else None
        _put(out, _FrontMessage("flush", block=block, snapshot=snap), stop)
    except BaseException as exc:  # handed to the main thread, which raises it
        _put(out, _FrontMessage("error", error=exc), stop)
    finally:
        cpu_s["demod"] = time.thread_time() - t0


def decode_chain_parallel(recording, profile, *, sinks_folder=None, threads: int = 2, queue_chunks: int = 4,
                          on_chunk: Callable[[Any], None] | None = None):
    """Decode an IQ recording with a :class:`PipelinedDecode` and return the finished chain.

    Parameters
    ----------
    recording : Recording or str
        An open :class:`pipeline.recording.Recording`, or a path for
        :func:`pipeline.recording.open_recording`.
    profile : LinkProfile
    sinks_folder : path-like or None, keyword-only
        Folder (existing) to write ``packets.jsonl``, ``frames.jsonl`` and ``apid_NNNN.bin`` into;
        None decodes without writing.
    threads, queue_chunks : int, keyword-only
        See :class:`PipelinedDecode`.  The output does not depend on them.
    on_chunk : callable, optional, keyword-only
        Called with each chunk once it has gone through the whole chain.

    Returns
    -------
    DecodeChain
        The chain after ``finish()``: counts, tracks and ``report(...)`` as for a plain decode.
    """
    from pathlib import Path

    from pipeline._chain import DecodeChain, _Sinks
    from pipeline.recording import open_recording

    rec = open_recording(recording) if isinstance(recording, (str, Path)) else recording
    chain = DecodeChain(profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    if sinks_folder is not None:
        chain.sinks = _Sinks(Path(sinks_folder))
    try:
        PipelinedDecode(chain, threads=threads, queue_chunks=queue_chunks).run(
            rec.chunks(profile.receiver.chunk_samples), on_chunk=on_chunk)
    finally:
        if chain.sinks is not None:
            chain.sinks.close()
    return chain
