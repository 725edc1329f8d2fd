"""Decode one recording on several cores: a threaded stage pipeline and overlapping segments.

Two ways, both deterministic, both streaming in constant memory:

:class:`PipelinedDecode` (output byte-for-byte identical to the plain single-threaded chain).
The decode chain (``pipeline.chain._chain.DecodeChain``) is a sequence of streaming stages with explicit
state, and its two halves are independent except for the symbols flowing from the first to the
second::

    worker thread:   Demodulator.process                          (the carrier/timing loops)
    calling thread:  Recording.chunks, then BranchSync (Viterbi) -> LineDecoder -> FrameSync
                     -> CodeblockDecoder (RS) -> FrameParser -> ChannelAccounting
                     -> PacketExtractor -> sinks

Nothing travels the other way (the frame synchronizer's lost-lock notice goes to the branch
synchronizer, in the same half), so the two-stage pipeline feeds every stage exactly the same
arrays in exactly the same order as the plain loop::

    for chunk in recording.chunks(n):
        chain.process_chunk(chunk)
    chain.finish()

and ``packets.jsonl``, ``frames.jsonl``, ``apid_NNNN.bin`` and the report are the same for any
number of threads.  The overlap needs numba kernels that release the GIL (``@njit(nogil=True)``,
see :data:`NOGIL_KERNELS`); without it the answer is the same and the threads take turns.  The
speed-up is bounded by the demodulator's share of the work (about 73 % on the demo link).

:class:`SegmentedDecode` (output identical for any number of workers; equal to the plain chain
in every recovered octet, with positions within about 1e-5 samples after each boundary).  The
recording is cut into fixed owned segments (:func:`segment_plan`), each decoded with a lead-in by
a fresh front half of the chain in a worker process (:func:`decode_segment`); the frames are
merged in order by marker position and go through one frame/packet layer.  It needs no change to
any kernel and approaches ``workers / (1 + overlap)``.

:func:`run_chain` is the one call for ``decode_to_folder``.
"""

from __future__ import annotations

import math
import queue
import threading
import time
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np

__all__ = [
    "DEFAULT_SEGMENT_SAMPLES",
    "NOGIL_KERNELS",
    "PipelinedDecode",
    "SegmentResult",
    "SegmentedDecode",
    "decode_chain_parallel",
    "decode_segment",
    "decode_segmented",
    "lead_samples",
    "run_chain",
    "segment_plan",
]

#: Kernels (``module:function``) called from Python on the decode path of an IQ recording; each
#: must be compiled with ``@njit(cache=True, nogil=True)`` for the threads to overlap (a kernel
#: called only from other kernels runs inside its caller's GIL-free region and needs nothing).
#: The first group is what the demo profile calls (counted by wrapping every dispatcher during a
#: decode); the second what other profiles and inputs add.  The demodulator thread runs the
#: ``demod`` kernels, the calling thread the others.
NOGIL_KERNELS: tuple[str, ...] = (
    "pipeline.recording._kernels:float_iq_to_complex64",
    "pipeline.demod._kernels:power_nonzero",
    "pipeline.demod._kernels:derotate",
    "pipeline.demod._kernels:fir_interleaved",
    "pipeline.demod._kernels:track_symbols",
    "pipeline.demod._kernels:moments_m2m4",
    "pipeline.demod._kernels:nrzm_decode",
    "pipeline.sync._kernels:hard_decisions",
    "pipeline.sync._kernels:reencode_metrics",
    "pipeline.sync._kernels:find_marker",
    "pipeline.fec._kernels:soft_quantize_kernel",
    "pipeline.fec._kernels:viterbi_acs_kernel",
    "pipeline.fec._kernels:viterbi_traceback_kernel",
    "pipeline.fec._kernels:conv_encode_kernel",
    "pipeline.fec._kernels:rs_decode_kernel",
    # other profiles and inputs
    "pipeline.recording._kernels:int_iq_to_complex64",
    "pipeline.recording._kernels:int8_to_soft",
    "pipeline.recording._kernels:unpack_bits_to_soft",
    "pipeline.sync._kernels:marker_mismatches",
    "pipeline.fec._kernels:depuncture_kernel",
    "pipeline.fec._kernels:crc16_kernel",
    "pipeline.fec._kernels:rs_remainder_kernel",
    "pipeline.fec._kernels:pn_bits_kernel",
    "pipeline.demod.residual._kernels:track_carrier",
    "pipeline.demod.residual._kernels:timing_search",
    "pipeline.demod.residual._kernels:rect_symbols",
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
    """Feed an IQ :class:`~pipeline.chain._chain.DecodeChain` with its demodulator in a worker thread.

    Parameters
    ----------
    chain : DecodeChain
        A fresh chain built for ``input_kind="iq"`` (sinks attached or not).  Its stage objects are
        used as they are; the demodulator is swapped for a stand-in only during :meth:`run`.
    threads : int, keyword-only
        1: the plain loop on the calling thread.  2: the demodulator in one worker thread;
        recording reads and the rest of the chain on the calling thread.  3 or more: recording
        reads in a second worker thread (the chain has three pipeline stages, so more threads are
        not used).
    queue_chunks : int, keyword-only
        Chunks allowed in flight between two threads, 1..64.  Memory held is about
        ``queue_chunks x (8 + 13 / samples per channel bit) x chunk_samples`` bytes per queue
        (about 2.4 MB per chunk of 2^18 samples on the demo link), whatever the length of the
        recording.

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
        to_front: queue.Queue = queue.Queue(maxsize=self.queue_chunks)
        workers = []
        # Two stages: this thread reads the recording too (it has the lighter half of the work),
        # keeping at most queue_chunks chunks in flight so that neither queue can fill up.
        # Three: a reader thread of its own.
        feed = None
        if self.stages >= 3:
            workers.append(threading.Thread(target=_reader, args=(chunks, to_front, stop, self.cpu_s),
                                            name="downlink-read", daemon=True))
        else:
            feed = iter(chunks)
        wants_snapshots = callable(getattr(real, "constellation", None))
        workers.append(threading.Thread(target=_front, args=(_drain(to_front, stop), real, to_main, stop, consumed,
                                                             wants_snapshots, self.cpu_s),
                                        name="downlink-demod", daemon=True))
        stand_in = _PrecomputedDemod(real, consumed)
        chain.demod = stand_in
        t0 = time.thread_time()
        in_flight = 0

        def refill() -> None:
            nonlocal feed, in_flight
            while feed is not None and in_flight < self.queue_chunks:
                chunk = next(feed, _END)
                to_front.put(chunk)  # never blocks: at most queue_chunks items are in flight
                if chunk is _END:
                    feed = None
                else:
                    in_flight += 1

        try:
            for w in workers:
                w.start()
            while True:
                refill()
                msg = to_main.get()
                if msg.kind == "error":
                    raise msg.error
                stand_in._set(msg)
                if msg.kind == "chunk":
                    in_flight -= 1
                    refill()  # the demodulator gets its next chunk before this one goes downstream
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
            for q in (to_main, to_front):
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

    from pipeline.chain._chain import DecodeChain, _Sinks
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


# ==== overlapping segments ======================================================================

#: Default owned length of one segment (samples).  The output of a segmented decode depends on it
#: (a boundary is where a fresh receiver takes over), never on the number of threads.
DEFAULT_SEGMENT_SAMPLES = 1 << 23


class SegmentResult:
    """What the front half of the chain found in one segment (picklable, for worker processes).

    Attributes
    ----------
    index, owned_start, owned_stop : int
        Segment number and the sample range ``[owned_start, owned_stop)`` it owns.
    frames : list of DecodedFrame
        Every frame the segment decoded, lead-in and lead-out included, in stream order.
    track : list of TrackPoint
        Receiver track points whose position lies in the owned range.
    samples, nonfinite, channel_symbols, locked_symbols : int
        Counts over the owned range (channel bits by their sample position).
    stats : dict
        ``{"branch" | "frame_sync" | "codeblock": stats object}`` of the whole segment.
    events : list
        Synchronizer events whose position lies in the owned range.
    cpu_s : float
        CPU seconds the worker thread spent on the segment (``time.thread_time``).
    constellation : numpy.ndarray or None
        The segment chain's last constellation snapshot (for the report's plot).
    """

    __slots__ = ("index", "owned_start", "owned_stop", "frames", "track", "samples", "nonfinite",
                 "channel_symbols", "locked_symbols", "stats", "events", "cpu_s", "constellation")

    def __init__(self, index: int, owned_start: int, owned_stop: int):
        self.index = index
        self.owned_start = owned_start
        self.owned_stop = owned_stop
        self.frames: list = []
        self.track: list = []
        self.samples = 0
        self.nonfinite = 0
        self.channel_symbols = 0
        self.locked_symbols = 0
        self.stats: dict = {}
        self.events: list = []
        self.cpu_s = 0.0
        self.constellation = None

    def __getstate__(self):
        return {k: getattr(self, k) for k in self.__slots__}

    def __setstate__(self, state):
        for k, v in state.items():
            setattr(self, k, v)


def segment_plan(num_samples: int, profile, sample_rate_hz: float, *, segment_samples: int = DEFAULT_SEGMENT_SAMPLES,
                 block_samples: int = 1) -> list[tuple[int, int, int, int]]:
    """Cut ``[0, num_samples)`` into owned segments with lead-in and lead-out.

    Returns ``(owned_start, owned_stop, read_start, read_stop)`` per segment.  The lead-in lets a
    fresh receiver acquire, lock its loops, resolve the branch and lock the frame synchronizer
    before the owned range starts; the lead-out completes the CADU whose marker lies just before
    ``owned_stop``.  Both are computed from the profile:

    * CADU length in samples ``C = cadu_bits / (conv rate x bits per symbol x symbol rate) x fs``;
    * lead-in ``= 4 C + 2^17`` samples (acquisition of 2^16 samples, loop pull-in, one CADU to
      find a marker, one to check it, margin), then the read start is moved back to a multiple of
      ``block_samples`` (the demodulator's processing block), so that a segment's blocks cover
      the same samples as the plain chain's and its per-block estimates (Es/N0, carrier) match
      them closely; lead-out ``= 2 C + 2^16``.
    """
    if isinstance(segment_samples, bool) or not isinstance(segment_samples, int):
        raise TypeError(f"Argument 'segment_samples' must be an integer, not {type(segment_samples).__name__}.")
    if segment_samples < 1 << 20:
        raise ValueError(f"Argument 'segment_samples' must be >= 1048576, not {segment_samples}.")
    if isinstance(block_samples, bool) or not isinstance(block_samples, int) or block_samples < 1:
        raise ValueError(f"Argument 'block_samples' must be a positive integer, not {block_samples!r}.")
    cadu = lead_samples(profile, sample_rate_hz)
    lead_in, lead_out = 4 * cadu + (1 << 17), 2 * cadu + (1 << 16)
    plan = []
    a = 0
    while a < num_samples or not plan:
        b = min(a + segment_samples, num_samples)
        # the last segment takes a short remainder instead of leaving a sliver on its own
        if num_samples - b < segment_samples // 4:
            b = num_samples
        read_start = max(0, (a - lead_in) // block_samples * block_samples)
        plan.append((a, b, read_start, min(num_samples, b + lead_out)))
        a = b
        if b >= num_samples:
            break
    return plan


def lead_samples(profile, sample_rate_hz: float) -> int:
    """Samples spanned by one CADU on the channel (rounded up)."""
    import math

    channel_bits = profile.cadu_bits / profile.coding.conv_rate
    seconds = channel_bits / (profile.link.bits_per_symbol * profile.link.symbol_rate_baud)
    return int(math.ceil(seconds * sample_rate_hz))


def decode_segment(recording, profile, index: int, owned_start: int, owned_stop: int, read_start: int,
                   read_stop: int) -> SegmentResult:
    """Run the front half of the chain (demodulator .. Reed-Solomon) over one segment.

    The stages are those of :class:`pipeline.chain._chain.DecodeChain`, wired by it; only the frame
    layer onwards (frame parser, accounting, packets, sinks) is left to the merge.
    """
    from pipeline.chain._chain import DecodeChain

    t0 = time.thread_time()
    res = SegmentResult(index, owned_start, owned_stop)
    chain = DecodeChain(profile, input_kind="iq", sample_rate_hz=recording.sample_rate_hz, timebase=None)
    plain_symbols = chain._symbols

    def collect_cadu(cadu) -> None:
        res.frames.append(chain.codeblock.process(cadu))

    def count_symbols(block) -> None:
        pos = block.position
        if len(pos):
            own = (pos >= owned_start) & (pos < owned_stop)
            res.channel_symbols += int(np.count_nonzero(own))
            res.locked_symbols += int(np.count_nonzero(own & block.locked))
        for tp in block.track:
            if owned_start <= tp.position < owned_stop:
                res.track.append(tp)
        plain_symbols(block)

    chain._cadu = collect_cadu
    chain._symbols = count_symbols
    n = profile.receiver.chunk_samples
    # three runs of chunks so that the owned range starts and ends on chunk boundaries (the stages
    # do not depend on the chunking) and its counts are exact
    for lo, hi, owned in ((read_start, owned_start, False), (owned_start, owned_stop, True),
                          (owned_stop, read_stop, False)):
        if hi <= lo:
            continue
        for chunk in recording.chunks(n, start=lo, stop=hi):
            if owned:
                res.samples += len(chunk.samples)
                res.nonfinite += int(chunk.nonfinite)
            chain._symbols(chain.demod.process(chunk))
    chain._symbols(chain.demod.flush())
    bits, pos = chain.branch.flush()
    chain._bits(bits, pos)
    for cadu in chain.fsync.flush():
        chain._cadu(cadu)
    res.stats = {"branch": getattr(chain.branch, "stats", None), "frame_sync": getattr(chain.fsync, "stats", None),
                 "codeblock": getattr(chain.codeblock, "stats", None)}
    for stage in (chain.branch, chain.fsync):
        for ev in getattr(stage, "events", []) or []:
            p = getattr(ev, "position", None)
            if p is None and isinstance(ev, dict):
                p = ev.get("position")
            if p is None or owned_start <= float(p) < owned_stop:
                res.events.append(ev)
    res.constellation = chain.constellation
    res.cpu_s = time.thread_time() - t0
    return res


class _PrecomputedCodeblocks:
    """Stands in for the chain's CodeblockDecoder in the merge: returns frames decoded in a segment."""

    def __init__(self, stats):
        self.stats = stats
        self._next = None

    def process(self, cadu):
        df = self._next
        if df is None or df.cadu is not cadu:
            raise RuntimeError("segmented decode out of step: no decoded frame for this CADU")  # a bug
        self._next = None
        return df


def _add_stats(total, part):
    """Field-wise sum of two statistics dataclasses (numbers added, anything else from ``part``)."""
    import dataclasses

    if part is None:
        return total
    if total is None:
        return dataclasses.replace(part) if dataclasses.is_dataclass(part) else part
    if not dataclasses.is_dataclass(total):
        return part
    kw = {}
    for f in dataclasses.fields(total):
        a, b = getattr(total, f.name), getattr(part, f.name)
        if isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
            kw[f.name] = a + b
        else:
            kw[f.name] = b
    return dataclasses.replace(total, **kw)


class SegmentedDecode:
    """Decode one IQ recording as overlapping segments on several workers, merged deterministically.

    Parameters
    ----------
    profile : LinkProfile
    threads : int, keyword-only
        Segments decoded at the same time (1 decodes them one after the other in this process).
    segment_samples : int, keyword-only
        Owned length of a segment, >= 2^20 samples; default :data:`DEFAULT_SEGMENT_SAMPLES`.
    executor : {"process", "thread"}, keyword-only
        Worker processes (forked where the platform allows: no GIL, so a speed-up with any numba
        kernel) or threads (a speed-up only with ``nogil=True`` kernels, see :data:`NOGIL_KERNELS`).

    Notes
    -----
    :func:`segment_plan` cuts the recording into owned ranges ``[a_i, b_i)``; segment ``i`` is
    decoded from ``a_i - lead_in`` to ``b_i + lead_out`` by a fresh front half of the chain
    (demodulator, branch synchronizer and Viterbi decoder, line decoder, frame synchronizer,
    Reed-Solomon) in a worker.  The merge, on the calling thread and in segment order, accepts a
    decoded frame of segment ``i`` when its marker position ``p`` satisfies ``p < b_i`` (the last
    segment: any ``p``) and ``p > p_last + C / 2``, where ``p_last`` is the last accepted frame and
    ``C`` the CADU length in samples; so a frame seen by two segments is taken once, and a frame the
    previous segment missed near its end is taken from the next one's lead-in.  Accepted frames
    then go through the chain's own frame parser, channel accounting, packet extractor and sinks
    in order, exactly as in the plain chain.

    The output depends on the recording, the profile and ``segment_samples`` only: not on
    ``threads`` or ``executor``.  It is *not* byte-identical to the plain single-threaded chain
    when there is more than one segment: after a boundary a fresh receiver estimates positions,
    Es/N0 and soft values slightly differently (the recovered frame and packet octets are the
    same when both receivers are locked; on the demo pass positions agreed within 2.2e-6 samples
    and every ERT and Es/N0 string was the same, only the printed float positions differed).
    With one segment (recordings up to about ``1.25 x segment_samples``) it *is* the plain chain.
    Cost: ``(lead_in + lead_out) / segment_samples`` extra work (about 8 % for the demo link at
    the default length); memory per worker is that of one streaming chain plus one segment's
    frames.
    """

    def __init__(self, profile, *, threads: int = 2, segment_samples: int = DEFAULT_SEGMENT_SAMPLES,
                 executor: str = "process"):
        if isinstance(threads, bool) or not isinstance(threads, int):
            raise TypeError(f"Argument 'threads' must be an integer, not {type(threads).__name__}.")
        if threads < 1:
            raise ValueError(f"Argument 'threads' must be >= 1, not {threads}.")
        if executor not in ("process", "thread"):
            raise ValueError(f"Argument 'executor' must be process | thread, not {executor!r}.")
        segment_plan(0, profile, 1.0, segment_samples=segment_samples)  # validates segment_samples
        self.profile = profile
        self.threads = threads
        self.segment_samples = segment_samples
        self.executor = executor
        self.segments_done = 0
        self.frames_dropped_as_duplicates = 0
        #: CPU seconds of each segment's worker in the last :meth:`run`, in segment order
        self.segment_cpu_s: list[float] = []

    def run(self, recording, chain, on_segment: Callable[[SegmentResult], None] | None = None) -> None:
        """Decode ``recording`` (an open Recording) into ``chain`` (a fresh IQ DecodeChain) and finish it."""
        if getattr(chain, "demod", None) is None:
            raise ValueError("Argument 'chain' must be an IQ decode chain (input_kind 'iq') with a demodulator.")
        fs = recording.sample_rate_hz
        block = getattr(chain.demod, "block_samples", 1)
        block = block if isinstance(block, int) and 1 <= block <= 1 << 20 else 1
        plan = segment_plan(recording.num_samples, self.profile, fs, segment_samples=self.segment_samples,
                            block_samples=block)
        half_cadu = 0.5 * lead_samples(self.profile, fs)
        self._spectrum(recording, chain)
        real_codeblock = chain.codeblock
        stand_in = _PrecomputedCodeblocks(None)
        chain.codeblock = stand_in
        merged_stats: dict = {}
        self.segment_cpu_s = []
        last = -math.inf
        try:
            for res in self._results(recording, plan):
                self._merge_counts(chain, res)
                final = res.index == len(plan) - 1
                for df in res.frames:
                    p = float(df.position)
                    if (not final and p >= res.owned_stop) or p <= last + half_cadu:
                        if p <= last + half_cadu:
                            self.frames_dropped_as_duplicates += 1
                        continue
                    stand_in._next = df
                    chain._cadu(df.cadu)
                    last = p
                for name, st in res.stats.items():
                    merged_stats[name] = _add_stats(merged_stats.get(name), st)
                self.segments_done += 1
                self.segment_cpu_s.append(res.cpu_s)
                if on_segment is not None:
                    on_segment(res)
            flush = getattr(chain.extractor, "flush", None)
            if flush is not None:
                for pkt in flush() or ():
                    chain._packet(pkt)
        finally:
            chain.codeblock = real_codeblock
        for name, stage in (("branch", chain.branch), ("frame_sync", chain.fsync), ("codeblock", chain.codeblock)):
            if merged_stats.get(name) is not None and hasattr(stage, "stats"):
                stage.stats = merged_stats[name]

    def speedup_bound(self, workers: int) -> float:
        """Speed-up ``workers`` idle cores would give over one, from the last run's segment CPU times.

        The segments are handed out in order to the first free worker (as :meth:`run` does); the
        bound is the total CPU time over the finishing time of that schedule (the merge, a small
        part, is left out).  Unlike a wall-clock ratio it does not depend on other load.
        """
        if not self.segment_cpu_s:
            return float("nan")
        free = [0.0] * max(1, int(workers))
        for t in self.segment_cpu_s:
            i = free.index(min(free))
            free[i] += t
        return sum(self.segment_cpu_s) / max(free)

    # ---- internals ------------------------------------------------------------------------
    def _results(self, recording, plan):
        """Segment results in plan order; at most ``threads + 1`` segments in flight."""
        jobs = [(recording, self.profile, i, *seg) for i, seg in enumerate(plan)]
        if self.threads == 1 or len(plan) == 1:
            for job in jobs:
                yield decode_segment(*job)
            return
        import collections
        import concurrent.futures as cf
        import multiprocessing as mp

        workers = min(self.threads, len(plan))
        if self.executor == "process":
            methods = mp.get_all_start_methods()
            ctx = mp.get_context("fork" if "fork" in methods else "spawn")
            pool = cf.ProcessPoolExecutor(max_workers=workers, mp_context=ctx)
        else:
            pool = cf.ThreadPoolExecutor(max_workers=workers, thread_name_prefix="downlink-segment")
        pending: collections.deque = collections.deque()
        try:
            it = iter(jobs)
            for job in it:
                pending.append(pool.submit(decode_segment, *job))
                if len(pending) > workers:
                    break
            while pending:
                res = pending.popleft().result()
                nxt = next(it, None)
                if nxt is not None:
                    pending.append(pool.submit(decode_segment, *nxt))
                yield res
        finally:
            for fut in pending:
                fut.cancel()
            pool.shutdown(wait=True, cancel_futures=True)

    @staticmethod
    def _spectrum(recording, chain) -> None:
        """The report's spectrum, from the first samples as in the plain chain."""
        from pipeline.chain._chain import _SPECTRUM_SAMPLES

        m = min(_SPECTRUM_SAMPLES, recording.num_samples)
        if m == 0:
            return
        chain._spectrum_buf = [recording.read(0, m).samples]
        chain._spectrum_len = m
        chain._make_spectrum()

    @staticmethod
    def _merge_counts(chain, res: SegmentResult) -> None:
        chain.samples += res.samples
        chain.nonfinite += res.nonfinite
        chain.channel_symbols += res.channel_symbols
        chain.locked_symbols += res.locked_symbols
        # The owned track points go through the chain's own symbol handler (track lists, lock
        # events, doppler.csv rows...) as a block without symbols, so nothing reaches the decoder.
        chain._symbols(_TrackOnlyBlock(res.track))
        if res.constellation is not None:
            chain.constellation = res.constellation
        stage_events = getattr(chain.branch, "events", None)
        if isinstance(stage_events, list):
            stage_events.extend(res.events)


class _TrackOnlyBlock:
    """A symbol block with track points and no symbols (duck-typed like ``SymbolBlock``)."""

    def __init__(self, track: list):
        self.track = track
        self.soft = np.zeros(0, dtype=np.float32)
        self.position = np.zeros(0, dtype=np.float64)
        self.locked = np.zeros(0, dtype=bool)
        self.symbols = np.zeros(0, dtype=np.complex64)

    def __len__(self) -> int:
        return 0


def decode_segmented(recording, profile, *, sinks_folder=None, threads: int = 2,
                     segment_samples: int = DEFAULT_SEGMENT_SAMPLES, executor: str = "process"):
    """Decode an IQ recording with a :class:`SegmentedDecode` and return the finished chain.

    ``recording`` is an open Recording or a path; ``sinks_folder`` an existing folder for
    ``packets.jsonl``, ``frames.jsonl`` and ``apid_NNNN.bin`` (None: no files).
    """
    from pathlib import Path

    from pipeline.chain._chain import DecodeChain, _Sinks
    from pipeline.recording import open_recording

    rec = open_recording(recording) if isinstance(recording, (str, Path)) else recording
    chain = DecodeChain(profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec)
    if sinks_folder is not None:
        chain.sinks = _Sinks(Path(sinks_folder))
    try:
        SegmentedDecode(profile, threads=threads, segment_samples=segment_samples, executor=executor).run(rec, chain)
    finally:
        if chain.sinks is not None:
            chain.sinks.close()
    return chain


def run_chain(chain, recording, *, threads: int = 1, mode: str = "pipeline",
              on_progress: Callable[[int], None] | None = None) -> None:
    """Feed a whole IQ recording through ``chain`` and finish it: the one call for ``decode_to_folder``.

    Parameters
    ----------
    chain : DecodeChain
        A fresh IQ chain (sinks attached as wanted).
    recording : Recording
        The open recording; chunks of ``chain.profile.receiver.chunk_samples``.
    threads : int, keyword-only
        1 is the plain loop.  More: see ``mode``.
    mode : {"pipeline", "segments"}, keyword-only
        "pipeline": :class:`PipelinedDecode` (output byte-identical to the plain loop for any
        ``threads``).  "segments": :class:`SegmentedDecode` with worker processes (output the same
        for any ``threads``, close to but not byte-identical with the plain loop when the recording
        holds more than one segment).
    on_progress : callable, optional, keyword-only
        ``on_progress(samples_done)`` on the calling thread, after each chunk or segment.
    """
    if mode not in ("pipeline", "segments"):
        raise ValueError(f"Argument 'mode' must be pipeline | segments, not {mode!r}.")
    if mode == "segments":
        SegmentedDecode(chain.profile, threads=threads).run(
            recording, chain, on_segment=None if on_progress is None else (lambda res: on_progress(res.owned_stop)))
        return
    PipelinedDecode(chain, threads=threads).run(
        recording.chunks(chain.profile.receiver.chunk_samples),
        on_chunk=None if on_progress is None else (lambda c: on_progress(c.start + len(c.samples))))
