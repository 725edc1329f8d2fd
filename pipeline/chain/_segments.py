"""Decode one IQ recording as overlapping segments, each by a front end of its own, merged in order.

The recording is cut into fixed owned segments (:func:`segment_plan`); segment ``i`` is decoded from
``a_i - lead_in`` to ``b_i + lead_out`` by a fresh :class:`~pipeline.chain.FrontEnd` in a worker
(:func:`decode_segment`), and the decoded frames are merged in order by marker position into one
:class:`~pipeline.chain.BackEnd` (:class:`SegmentedDecode`).  The output depends on the recording, the
profile and the segment length only, never on the number of workers; with one segment (recordings up to
about 1.25 segment lengths) it is exactly the unbroken chain.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field

from pipeline.chain._frontend import FrontEnd, FrontSummary, owned_stats
from pipeline.profile import LinkProfile

__all__ = ["DEFAULT_SEGMENT_SAMPLES", "SegmentResult", "SegmentedDecode", "decode_segment", "segment_plan"]

#: Default owned length of one segment (samples).  The output of a segmented decode depends on it
#: (a boundary is where a fresh receiver takes over), never on the number of workers.  Each boundary costs a
#: lead-in, a lead-out and an acquisition: at 2^23 a 34 s demo recording decoded on one worker took 13 % more
#: CPU than as one segment and a 10 s recording of the 2 Msym/s QPSK link 10 % more; at 2^24 4 % each
#: (DEVELOPERS.md); a task on a cluster reads about 128 MiB of cf32 samples.
DEFAULT_SEGMENT_SAMPLES = 1 << 24


@dataclass
class SegmentResult:
    """What a front end found in one segment (picklable, for worker processes).

    Attributes
    ----------
    index, owned_start, owned_stop : int
        Segment number and the sample range ``[owned_start, owned_stop)`` it owns.
    frames : list of DecodedFrame
        Every frame the segment decoded, lead-in and lead-out included, in stream order.
    track : list of TrackPoint
        Receiver track points whose position lies in the owned range.
    summary : FrontSummary
        Counts over the owned range, stage statistics of the whole segment, events in the owned range.
    cpu_s : float
        CPU seconds the worker spent on the segment (``time.thread_time``).
    """

    index: int
    owned_start: int
    owned_stop: int
    frames: list = field(default_factory=list)
    track: list = field(default_factory=list)
    summary: FrontSummary = field(default_factory=FrontSummary)
    cpu_s: float = 0.0


def segment_plan(num_samples: int, profile: LinkProfile, sample_rate_hz: float, *,
                 segment_samples: int = DEFAULT_SEGMENT_SAMPLES, block_samples: int = 1,
                 acquisition_samples: int = 1 << 16) -> list[tuple[int, int, int, int]]:
    """Cut ``[0, num_samples)`` into owned segments with lead-in and lead-out.

    Returns ``(owned_start, owned_stop, read_start, read_stop)`` per segment.  The lead-in lets a fresh
    receiver acquire, lock its loops, resolve the branch and lock the frame synchronizer before the
    owned range starts; the lead-out completes the CADU whose marker lies just before ``owned_stop``.
    With ``C`` the CADU length in samples (:meth:`LinkProfile.samples_per_cadu`) and ``A`` the samples the
    demodulator may hold while it acquires (``acquisition_samples``: 2^16 on the demo link; residual-carrier
    links at low Es/N0 hold more), the lead-in is ``4 C + 2 A`` samples (acquisition, loop pull-in, one CADU
    to find a marker, one to check it, margin), then the read start moves back to a multiple of ``block_samples`` (the
    demodulator's processing block) so that a segment's blocks cover the same samples as the unbroken
    chain's; the lead-out is ``2 C + 2^16``.  A last remainder shorter than a quarter segment joins the
    segment before it.
    """
    if isinstance(segment_samples, bool) or not isinstance(segment_samples, int):
        raise TypeError(f"Argument 'segment_samples' must be an integer, not {type(segment_samples).__name__}.")
    if segment_samples < 1 << 20:
        raise ValueError(f"Argument 'segment_samples' must be >= 1048576, not {segment_samples}.")
    if isinstance(block_samples, bool) or not isinstance(block_samples, int) or block_samples < 1:
        raise ValueError(f"Argument 'block_samples' must be a positive integer, not {block_samples!r}.")
    cadu = math.ceil(profile.samples_per_cadu(sample_rate_hz))
    lead_in, lead_out = 4 * cadu + 2 * int(acquisition_samples), 2 * cadu + (1 << 16)
    plan = []
    a = 0
    while True:
        b = min(a + segment_samples, num_samples)
        if num_samples - b < segment_samples // 4:
            b = num_samples
        read_start = max(0, (a - lead_in) // block_samples * block_samples)
        plan.append((a, b, read_start, min(num_samples, b + lead_out)))
        a = b
        if b >= num_samples:
            return plan


def decode_segment(recording, profile: LinkProfile, index: int, owned_start: int, owned_stop: int, read_start: int,
                   read_stop: int, waterfall_row_samples: int | None = None,
                   carrier_prediction=None) -> SegmentResult:
    """Run a front end over one segment of ``recording`` and return what it found (``carrier_prediction``: the
    table of predicted carrier offsets the demodulator searches around, see :class:`SegmentedDecode`)."""
    t0 = time.thread_time()
    front = FrontEnd(profile, input_kind="iq", sample_rate_hz=recording.sample_rate_hz,
                     owned=(owned_start, owned_stop), waterfall_row_samples=waterfall_row_samples,
                     carrier_prediction=carrier_prediction)
    res = SegmentResult(index, owned_start, owned_stop)
    n = profile.receiver.chunk_samples

    def take(out) -> None:
        res.frames.extend(out.frames)
        res.track.extend(out.track)

    # three runs of chunks, so that the owned range starts and ends on chunk boundaries (the stages do
    # not depend on the chunking) and the sample counts of the owned range are exact; the stage statistics
    # are snapshot at both ends of the owned run, so that the lead-in's repeated work is not counted twice
    snaps = []
    for lo, hi in ((read_start, owned_start), (owned_start, owned_stop), (owned_stop, read_stop)):
        if hi > lo:
            # verify=False: SegmentedDecode hashes the file once, in order, itself (a one-segment recording's
            # owned run is the whole file, and the chunks would hash it a second time)
            for chunk in recording.chunks(n, start=lo, stop=hi, verify=False):
                take(front.process_chunk(chunk))
        snaps.append(front.stats_snapshot())
    take(front.finish())
    res.summary = front.summary()
    last = read_stop <= owned_stop  # no lead-out: the flushed end belongs to this segment
    res.summary.stats = owned_stats(res.summary.stats if last else snaps[1],
                                    snaps[0] if read_start < owned_start else None)
    res.cpu_s = time.thread_time() - t0
    return res


class SegmentedDecode:
    """Decode one IQ recording as overlapping segments on several workers, merged deterministically.

    Parameters
    ----------
    profile : LinkProfile
    workers : int, keyword-only
        Segments decoded at the same time in worker processes (1: one after the other in this process),
        or the workers of a local Dask cluster (``scheduler="local"``).
    scheduler : str or None, keyword-only
        None: worker processes of this machine.  ``"local"``: a Dask cluster started here with ``workers``
        single-threaded worker processes.  Any other string: the address of a running Dask scheduler
        (``tcp://host:8786``); its workers read their segments from the recording's path, so the recording
        must be on storage they all see.  The output is the same in every case.
    segment_samples : int, keyword-only
        Owned length of a segment, >= 2^20 samples; default :data:`DEFAULT_SEGMENT_SAMPLES`.
    waterfall_row_samples : int or None, keyword-only
        Also accumulate the recording's waterfall on rows of this many samples (see :class:`FrontEnd`).
    carrier_prediction : CarrierPrediction or None, keyword-only
        The carrier's predicted offset over the whole recording (``--tle``/``--oem``): a small picklable table
        that travels with every segment's job to its worker (process pool or Dask), where the demodulator
        searches around it.

    Notes
    -----
    The merge, on the calling thread and in segment order, accepts a decoded frame of segment ``i``
    when its marker position ``p`` satisfies ``p < b_i`` (the last segment: any ``p``) and
    ``p > p_last + C / 2``, where ``p_last`` is the last accepted frame and ``C`` the CADU length in
    samples; so a frame seen by two segments is taken once, and a frame the previous segment missed
    near its end is taken from the next one's lead-in.  Accepted frames and the owned track points go
    to the back end in order, exactly as from an unbroken chain.

    With more than one segment the output is not byte-identical to the unbroken chain: after a boundary
    a fresh receiver estimates positions, Es/N0 and soft values slightly differently (the recovered
    octets are the same when both are locked; on the demo pass positions agreed within 2.2e-6 samples
    and every ERT and Es/N0 string was the same).  Cost: ``(lead_in + lead_out) / segment_samples``
    extra work (about 8 % for the demo link); memory per worker is one streaming front end plus one
    segment's frames.
    """

    def __init__(self, profile: LinkProfile, *, workers: int = 1, segment_samples: int = DEFAULT_SEGMENT_SAMPLES,
                 waterfall_row_samples: int | None = None, scheduler: str | None = None, verbose: bool = False,
                 carrier_prediction=None):
        if isinstance(workers, bool) or not isinstance(workers, int):
            raise TypeError(f"Argument 'workers' must be an integer, not {type(workers).__name__}.")
        if not 1 <= workers <= 64:
            raise ValueError(f"Argument 'workers' must be 1..64, not {workers}.")
        segment_plan(0, profile, 1.0, segment_samples=segment_samples)  # validates segment_samples
        if scheduler is not None and (not isinstance(scheduler, str) or not scheduler.strip()):
            raise ValueError(f"Argument 'scheduler' must be 'local' or a scheduler address, not {scheduler!r}.")
        self.profile = profile
        self.scheduler = scheduler
        self.verbose = verbose
        self.workers = workers
        self.segment_samples = segment_samples
        self.waterfall_row_samples = waterfall_row_samples
        self.carrier_prediction = carrier_prediction
        self.frames_dropped_as_duplicates = 0
        #: CPU seconds of each segment's worker in the last :meth:`run`, in segment order
        self.segment_cpu_s: list[float] = []
        #: the demodulator's processing block (a doppler.csv row's span), set by :meth:`run`
        self.block_samples: int | None = None
        self._check = None  # the recording's core:sha512 check of the current run, and its future
        self._check_future = None

    def run(self, recording, back, *, on_segment: Callable[[SegmentResult], None] | None = None) -> FrontSummary:
        """Decode ``recording`` (an open Recording) into ``back`` (a fresh BackEnd) and finish it.

        Returns the front-end summary merged over the segments.
        """
        fs = recording.sample_rate_hz
        probe = FrontEnd(self.profile, input_kind="iq", sample_rate_hz=fs)
        self.block_samples = probe.block_samples  # the demodulator's block (a doppler.csv row's span)
        plan = segment_plan(recording.num_samples, self.profile, fs, segment_samples=self.segment_samples,
                            block_samples=probe.block_samples, acquisition_samples=probe.demod.acquisition_samples)
        half_cadu = 0.5 * math.ceil(self.profile.samples_per_cadu(fs))
        summary = FrontSummary()
        self.segment_cpu_s = []
        last = -math.inf
        # core:sha512: the segments read byte ranges out of order, so the recording is hashed once, in order,
        # in a thread of this process while they decode (started before the first segment in one process;
        # with a process pool once its workers have been forked, never before a fork)
        self._check = recording.checksum()
        self._check_future = None
        try:
            for res in self._results(recording, plan):  # each way of running starts the check (_start_check)
                last = self._merge(res, back, final=res.index == len(plan) - 1, last=last, half_cadu=half_cadu)
                summary.merge(res.summary)
                self.segment_cpu_s.append(res.cpu_s)
                if on_segment is not None:
                    on_segment(res)
            if self._check_future is not None:
                self._check_future.result()  # a mismatch raises here, before anything is marked complete
                recording.checksum_verified = True
        except BaseException:
            if self._check is not None:
                self._check.cancel()
            raise
        back.finish()
        return summary

    def _start_check(self) -> None:
        if self._check is not None and self._check_future is None:
            self._check_future = self._check.verify_in_background()

    def _merge(self, res: SegmentResult, back, *, final: bool, last: float, half_cadu: float) -> float:
        """Hand a segment's owned track points and new frames to the back end; returns the last ASM position."""
        back.process_track(res.track)
        for decoded in res.frames:
            p = float(decoded.position)
            if p <= last + half_cadu:
                self.frames_dropped_as_duplicates += 1
                continue
            if not final and p >= res.owned_stop:
                continue
            back.process_frame(decoded)
            last = p
        return last

    def speedup_bound(self, workers: int) -> float:
        """Speed-up ``workers`` idle cores would give over one, from the last run's segment CPU times.

        The segments are handed out in order to the first free worker (as :meth:`run` does); the bound is
        the total CPU time over the finishing time of that schedule (the merge, a small part, is left out).
        Unlike a wall-clock ratio it does not depend on other load.
        """
        if not self.segment_cpu_s:
            return float("nan")
        free = [0.0] * max(1, int(workers))
        for t in self.segment_cpu_s:
            i = free.index(min(free))
            free[i] += t
        return sum(self.segment_cpu_s) / max(free)

    def _results(self, recording, plan) -> Iterator[SegmentResult]:
        """Segment results in plan order; at most ``workers + 1`` segments in flight."""
        jobs = [(recording, self.profile, i, *seg, self.waterfall_row_samples, self.carrier_prediction)
                for i, seg in enumerate(plan)]
        if self.scheduler is not None:
            yield from self._dask_results(jobs)
            return
        if self.workers == 1 or len(plan) <= 1:
            self._start_check()
            for job in jobs:
                yield decode_segment(*job)
            return
        import collections
        import concurrent.futures as cf
        import multiprocessing as mp

        workers = min(self.workers, len(plan))
        ctx = mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")
        pending: collections.deque = collections.deque()
        with cf.ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            try:
                it = iter(jobs)
                for job in it:
                    pending.append(pool.submit(decode_segment, *job))
                    if len(pending) > workers:
                        break
                self._start_check()  # the fork context has started every worker at the first submit
                while pending:
                    res = pending.popleft().result()
                    nxt = next(it, None)
                    if nxt is not None:
                        pending.append(pool.submit(decode_segment, *nxt))
                    yield res
            finally:
                for fut in pending:
                    fut.cancel()

    def _dask_results(self, jobs) -> Iterator[SegmentResult]:
        """The segments as tasks on a Dask cluster, results in plan order, a bounded number in flight."""
        import collections
        import logging

        try:
            from dask.distributed import Client, LocalCluster
        except ImportError:
            from pipeline.errors import UsageError

            raise UsageError('--scheduler needs dask.distributed: pip install ".[dask]"') from None
        level = logging.INFO if self.verbose else logging.ERROR
        for name in ("distributed", "dask"):
            logging.getLogger(name).setLevel(level)
        cluster = None
        if self.scheduler == "local":
            cluster = LocalCluster(n_workers=self.workers, threads_per_worker=1, processes=True,
                                   dashboard_address=None, silence_logs=level)
            client = Client(cluster)
        else:
            client = Client(self.scheduler)
        try:
            slots = max(1, sum(client.nthreads().values()))
            pending: collections.deque = collections.deque()
            it = iter(jobs)
            for job in it:
                pending.append(client.submit(decode_segment, *job, pure=False))
                if len(pending) > slots:
                    break
            self._start_check()  # the cluster's workers are processes of their own (or other machines)
            while pending:
                res = pending.popleft().result()
                nxt = next(it, None)
                if nxt is not None:
                    pending.append(client.submit(decode_segment, *nxt, pure=False))
                yield res
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
