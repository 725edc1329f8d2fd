"""``downlink bench``: per-stage and end-to-end throughput on the demo link, honestly measured.

Everything runs from the installed package: the test data are made here with :mod:`pipeline.sim`
(and the codes' own encoders) in a temporary folder, with fixed seeds.  Each figure is the best of
a few timed repeats after an untimed warm-up run (numba compilation, page cache), measured with
``time.perf_counter`` around the stage's ``process``/``flush`` calls only.

Figures (all per process; "Mbit/s" = 10^6 bits per second, "Msample/s" = 10^6 complex samples):

==========================  ===============================================================
``recording_read_msps``     ``Recording.chunks`` over a cf32 SigMF file (conversion included)
``frontend_msps``           :class:`pipeline.demod.Demodulator` on the demo recording's samples
``viterbi_mbps``            :class:`pipeline.fec.ViterbiDecoder` r=1/2, decoded bits per second
``framesync_mbps``          :class:`pipeline.sync.FrameSync`, soft bits in per second
``rs_clean_mbps``           :func:`pipeline.fec.rs_decode` E=16 I=5, codeblock bits in, no errors
``rs_16err_mbps``           the same with 16 symbol errors in every codeword (the most it corrects)
``turbo_r12_k8920_mbps``    :class:`pipeline.fec.TurboDecoder` (log-MAP, 32-lane vector kernel), rate 1/2, k = 8920,
                            Eb/N0 1.0 dB, at most 10 iterations, information bits per second, CPU time of one
                            core (:func:`pipeline.tools._turbo.turbo_speed`); ``..._scalar_mbps`` the plain
                            scalar kernel on the same codewords in the same run
``ldpc_c2_mbps``            :class:`pipeline.fec.ldpc.LdpcDecoder` (layered normalized min-sum, 32-lane vector
                            kernel, at most 50 iterations) on C2 at Eb/N0 4.0 dB, information bits per second, CPU
                            time of one core (:func:`pipeline.tools._ldpc.ldpc_speed`); ``..._scalar_mbps`` the
                            scalar reference kernel on the same codewords in the same run
``ldpc_ar4ja_r12_k1024_mbps``  the same for AR4JA rate 1/2, k = 1024, at Eb/N0 2.0 dB
``frames_packets_mbps``     :class:`pipeline.link.FrameParser` + :class:`pipeline.packets.PacketExtractor`
``end_to_end_msps``         the decode path with its sinks (:class:`pipeline.chain.SegmentedDecode` into a
                            :class:`pipeline.chain.BackEnd`; one segment, one process), report not built
``end_to_end_msps_no_checksum``  the same with the SigMF ``core:sha512`` check off (``--no-checksum``); with
                            it on, the check hashes the data file in a thread of its own while the decode
                            runs (on a second core if there is one); ``sha512_msps`` that hash alone
``end_to_end_msps_segmented``  the same on a longer recording (several segments), 1 process;
                            ``..._2proc`` with 2 worker processes; both without the sha512 check, like
                            the bound they are compared with
``end_to_end_qpsk_5msps_realtime``  real-time factor of the same decode path (1 process) on a 2 Msym/s QPSK link:
                            r=1/2 + RS(255,223) I=5, 1115-octet TM frames, RRC 0.5, 5 Msample/s (2.5 samples
                            per symbol), a 1 s recording at Eb/N0 6 dB; ``..._msps`` the same in Msample/s,
                            ``..._realtime_no_checksum`` without the sha512 check
``warm_start_s``            a fresh ``python`` process with the numba cache present: start to the return of the
                            first ``process_chunk`` (imports, cached kernels loaded, first chunk decoded)
``cold_start_s``            the first decode of the demo recording in a fresh process with an empty kernel cache
                            (``NUMBA_CACHE_DIR`` set to an empty folder): process start to the end of the decode,
                            every kernel compiled on the way; ``cold_first_chunk_s`` to its first chunk
``cold_decode_s``           the same for what a user's first run does: ``pipeline.decode`` of the demo recording
                            (1 worker, its report and time products included) in a fresh process with an empty
                            kernel cache, process start to its return
==========================  ===============================================================

Since the machine may be shared, ``segmented_speedup_bound`` gives what two idle cores would reach,
from the CPU time per segment (``time.thread_time``), which other load does not change.

``end_to_end_realtime_factor`` divides by the demo recording's 1 Msample/s.  ``warm_start_s`` and
``peak_rss_mb`` come from a fresh ``python`` process decoding the demo recording (numba cache
present): the time from starting the process to the return of the first ``process_chunk`` call,
and the process's peak resident memory.  That peak counts the resident pages of mapped files too, above
all the 170 MB ``libllvmlite.so``, and how many of those are resident depends on the page cache: a just
installed copy measured 240 MiB against 194 for one installed an hour earlier, with the same anonymous
memory (``end_rss_anon_mb`` and ``end_rss_file_mb``, from ``/proc/self/status`` at the end of the decode,
tell the two apart).  The machine is shared, so the load average before and
after is printed with the figures.  The long-recording figures give the scaling of 1 and 2 worker
processes (``segmented_speedup``) and its bound from per-segment CPU time (``segmented_speedup_bound``;
``segmented_speedup_of_bound`` their ratio).
"""

from __future__ import annotations

import json
import math
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

__all__ = ["cpu_model", "format_table", "measure", "peak_rss_mb", "run_bench"]

_SEED = 20260314


def cpu_model() -> str:
    """CPU model name from ``/proc/cpuinfo`` (Linux), else :func:`platform.processor`."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as f:
            for line in f:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine() or "unknown"


def peak_rss_mb() -> float:
    """Peak resident memory of this process in MiB: ``VmHWM`` of ``/proc/self/status`` (Linux).

    ``VmHWM`` belongs to the process's own address space; ``ru_maxrss`` is not used where
    ``VmHWM`` exists because Linux carries the parent's high-water mark into a child across
    ``fork``/``exec``.
    """
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux, bytes on macOS


def _best(fn, repeats: int) -> float:
    """Smallest wall time of ``repeats`` calls of ``fn()`` (each call sets up its own state)."""
    best = math.inf
    for _ in range(repeats):
        t = fn()
        best = min(best, t)
    return best


def _bench_read(rec, chunk: int, repeats: int) -> float:
    def once():
        t0 = time.perf_counter()
        for _c in rec.chunks(chunk, verify=False):  # the read alone: the sha512 check is not in this figure
            pass
        return time.perf_counter() - t0

    once()
    return rec.num_samples / _best(once, repeats) / 1e6


def _bench_frontend(profile, chunks, fs: float, repeats: int) -> float:
    from pipeline.demod import Demodulator

    n = sum(len(c.samples) for c in chunks)

    def once():
        d = Demodulator(link=profile.link, receiver=profile.receiver, sample_rate_hz=fs)
        t0 = time.perf_counter()
        for c in chunks:
            d.process(c)
        d.flush()
        return time.perf_counter() - t0

    once()
    return n / _best(once, repeats) / 1e6


def _bench_sha512(rec, repeats: int) -> float:
    """Msample/s of the SigMF ``core:sha512`` check alone (:meth:`DatasetChecksum.verify_file`)."""
    def once():
        t0 = time.perf_counter()
        rec.checksum().verify_file()
        return time.perf_counter() - t0

    return rec.num_samples / _best(once, repeats) / 1e6


def _bench_viterbi(repeats: int, nbits: int = 1 << 20) -> float:
    from pipeline.fec import ViterbiDecoder, conv_encode

    rng = np.random.default_rng(_SEED)
    bits = rng.integers(0, 2, nbits, dtype=np.uint8)
    coded = conv_encode(bits, "1/2")
    # BPSK at Es/N0 = 1 dB (Eb/N0 = 4 dB): a realistic operating point, + means bit 0
    sigma = math.sqrt(1.0 / (2.0 * 10 ** (1.0 / 10)))
    soft = ((1.0 - 2.0 * coded.astype(np.float32)) + sigma * rng.standard_normal(coded.size)).astype(np.float32)
    ViterbiDecoder(rate="1/2").process(soft[: 1 << 16])

    def once():
        v = ViterbiDecoder(rate="1/2")
        t0 = time.perf_counter()
        out = v.process(soft)
        out2 = v.flush()
        dt = time.perf_counter() - t0
        if out.size + out2.size != nbits:
            raise RuntimeError("Viterbi bench: wrong number of decoded bits")
        return dt

    return nbits / _best(once, repeats) / 1e6


def _bench_framesync(profile, repeats: int, ncadus: int = 400) -> float:
    from pipeline.fec import ASM
    from pipeline.sync import FrameSync

    rng = np.random.default_rng(_SEED + 1)
    cb = profile.codeblock_bytes
    blocks = rng.integers(0, 256, (ncadus, cb), dtype=np.uint8)
    asm = np.frombuffer(ASM, dtype=np.uint8)
    stream = np.concatenate([np.concatenate([asm, b]) for b in blocks])
    bits = np.unpackbits(stream)
    soft = ((1.0 - 2.0 * bits.astype(np.float32)) + 0.5 * rng.standard_normal(bits.size)).astype(np.float32)
    pos = np.arange(bits.size, dtype=np.float64)
    rx = profile.receiver

    def make():
        return FrameSync(frame_bits=8 * cb, max_errors=rx.asm_max_errors, flywheel=rx.flywheel_frames)

    make().process(soft[:200_000], pos[:200_000])

    def once():
        fs = make()
        t0 = time.perf_counter()
        out = fs.process(soft, pos)
        out += fs.flush()
        dt = time.perf_counter() - t0
        if len(out) < ncadus - 1:
            raise RuntimeError(f"frame sync bench: {len(out)} CADUs found of {ncadus}")
        return dt

    return bits.size / _best(once, repeats) / 1e6


def _rs_blocks(errors: int, nblocks: int, e: int = 16, interleave: int = 5) -> list[bytes]:
    from pipeline.fec import rs_encode

    rng = np.random.default_rng(_SEED + 2 + errors)
    k = 255 - 2 * e
    out = []
    for _ in range(nblocks):
        data = rng.integers(0, 256, k * interleave, dtype=np.uint8).tobytes()
        cb = np.frombuffer(rs_encode(data, e, interleave), dtype=np.uint8).copy()
        for c in range(interleave):  # codeword c owns octets c, c + I, ...
            where = rng.choice(255, size=errors, replace=False)
            cb[where * interleave + c] ^= rng.integers(1, 256, errors, dtype=np.uint8)
        out.append(cb.tobytes())
    return out


def _bench_rs(errors: int, repeats: int, nblocks: int = 200) -> float:
    from pipeline.fec import rs_decode

    blocks = _rs_blocks(errors, nblocks)
    rs_decode(blocks[0], 16, 5)

    def once():
        t0 = time.perf_counter()
        for b in blocks:
            _, corrected = rs_decode(b, 16, 5)
        dt = time.perf_counter() - t0
        if tuple(corrected) != (errors,) * 5:
            raise RuntimeError(f"RS bench: expected {errors} corrections per codeword, got {corrected}")
        return dt

    return nblocks * len(blocks[0]) * 8 / _best(once, repeats) / 1e6


def _bench_frames_packets(profile, frames: list, repeats: int) -> tuple[float, float]:
    from pipeline.link import FrameParser
    from pipeline.packets import PacketExtractor

    if not frames:
        return float("nan"), float("nan")

    def once():
        parser = FrameParser(frames=profile.frames)
        ext = PacketExtractor(profile=profile)
        t0 = time.perf_counter()
        for df in frames:
            ext.process(parser.process(df))
        return time.perf_counter() - t0

    once()
    dt = _best(once, repeats)
    return len(frames) * 8 * profile.frames.length / dt / 1e6, len(frames) / dt


# ---- end to end -----------------------------------------------------------------------------


def _decode_once(rec, profile, folder: Path | None, workers: int, *, repeats_tag: str = ""):
    """One decode of ``rec`` by the canonical path (segments into one back end, sinks in ``folder``).

    Returns the wall time of the decode (the report is not built) and the :class:`SegmentedDecode`.
    """
    from pipeline.chain import BackEnd, FolderSinks, SegmentedDecode

    sinks = None
    if folder is not None:
        folder.mkdir(parents=True, exist_ok=True)
        sinks = FolderSinks(folder)
    back = BackEnd(profile, timebase=rec, sample_rate_hz=rec.sample_rate_hz, sinks=sinks)
    sd = SegmentedDecode(profile, workers=workers)
    t0 = time.perf_counter()
    sd.run(rec, back)
    dt = time.perf_counter() - t0
    if sinks is not None:
        sinks.close()
    return dt, sd, back


def _end_to_end(rec, profile, tmp: Path, workers: int, repeats: int) -> tuple[float, float, int]:
    """Best Msample/s over ``repeats`` decodes (after one untimed), its idle-core bound and the packets."""
    _decode_once(rec, profile, tmp / f"warm{workers}", workers)
    best, bound, packets = math.inf, float("nan"), 0
    for r in range(repeats):
        dt, sd, back = _decode_once(rec, profile, tmp / f"w{workers}_{r}", workers)
        if dt < best:
            best, bound, packets = dt, sd.speedup_bound(2), back.packet_count
    return rec.num_samples / best / 1e6, bound, packets


_CHILD = r"""
import json, resource, sys, time
from pipeline.profile import load_profile, demo_profile_path
from pipeline.recording import open_recording
from pipeline.chain import DecodeChain, FolderSinks
profile = load_profile(demo_profile_path())
rec = open_recording(sys.argv[1])
sinks = FolderSinks(__import__("pathlib").Path(sys.argv[2]))
chain = DecodeChain(profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz, timebase=rec, sinks=sinks)
first = None
for chunk in rec.chunks(profile.receiver.chunk_samples):
    chain.process_chunk(chunk)
    if first is None:
        first = time.monotonic()
chain.finish()
sinks.close()
status = {l.split(":")[0]: l.split()[1] for l in open("/proc/self/status")
          if l.startswith(("VmHWM", "RssAnon", "RssFile"))}
peak = (int(status["VmHWM"]) / 1024.0 if "VmHWM" in status
        else resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)
anon, file = (int(status[k]) / 1024.0 if k in status else float("nan") for k in ("RssAnon", "RssFile"))
print(json.dumps({"first": first, "end": time.monotonic(), "packets": chain.back.packet_count, "peak_rss_mb": peak,
                  "end_rss_anon_mb": anon, "end_rss_file_mb": file}))
"""


def _child(meta: Path, out: Path, env: dict | None = None, code: str = _CHILD) -> tuple[float, dict]:
    """Run the bench child ``code`` decoding ``meta`` into ``out``; its start time and its JSON line."""
    out.mkdir()
    t0 = time.monotonic()  # CLOCK_MONOTONIC: the same clock in the child on Linux
    proc = subprocess.run([sys.executable, "-c", code, str(meta), str(out)], capture_output=True, text=True,
                          check=False, env=env)
    if proc.returncode != 0:
        raise RuntimeError(f"bench child process failed: {proc.stderr.strip().splitlines()[-1:]}")
    return t0, json.loads(proc.stdout.strip().splitlines()[-1])


_CHILD_DECODE = r"""
import json, sys, time
import pipeline
summary = pipeline.decode(sys.argv[1], pipeline.load_profile(pipeline.demo_profile_path()), sys.argv[2],
                          overwrite=True, workers=1)
print(json.dumps({"end": time.monotonic(), "packets": summary.packets}))
"""


def _cold_start(meta: Path, tmp: Path) -> dict:
    """First decode of ``meta`` in fresh processes whose numba cache folders are empty (every kernel compiled):
    the bench child (:class:`DecodeChain` alone) and the public ``pipeline.decode`` with its report."""
    res = {}
    for name, code in (("chain", _CHILD), ("decode", _CHILD_DECODE)):
        cache = tmp / f"empty_numba_cache_{name}"
        cache.mkdir()
        env = dict(os.environ, NUMBA_CACHE_DIR=str(cache))
        t0, d = _child(meta, tmp / f"cold_{name}", env, code)
        if name == "chain":
            res.update(cold_start_s=d["end"] - t0, cold_first_chunk_s=d["first"] - t0)
        else:
            res["cold_decode_s"] = d["end"] - t0
    return res


def _fresh_process(meta: Path, tmp: Path, runs: int = 3) -> dict:
    """Warm start and peak RSS of a fresh interpreter decoding ``meta`` (the first run fills the cache)."""
    results = []
    for r in range(runs):
        out = tmp / f"child{r}"
        out.mkdir()
        t0 = time.monotonic()  # CLOCK_MONOTONIC: the same clock in the child on Linux
        proc = subprocess.run([sys.executable, "-c", _CHILD, str(meta), str(out)], capture_output=True, text=True,
                              check=False)
        if proc.returncode != 0:
            raise RuntimeError(f"bench child process failed: {proc.stderr.strip().splitlines()[-1:]}")
        d = json.loads(proc.stdout.strip().splitlines()[-1])
        results.append({"warm_start_s": d["first"] - t0, "process_total_s": d["end"] - t0,
                        "peak_rss_mb": d["peak_rss_mb"], "packets": d["packets"],
                        "end_rss_anon_mb": d.get("end_rss_anon_mb", math.nan),
                        "end_rss_file_mb": d.get("end_rss_file_mb", math.nan)})
    warm = results[1:] or results
    return {"warm_start_s": min(r["warm_start_s"] for r in warm),
            "process_total_s": min(r["process_total_s"] for r in warm),
            "peak_rss_mb": max(r["peak_rss_mb"] for r in warm),
            "end_rss_anon_mb": max(r["end_rss_anon_mb"] for r in warm),
            "end_rss_file_mb": max(r["end_rss_file_mb"] for r in warm),
            "cold_first_run_s": results[0]["warm_start_s"]}


#: The 2 Msym/s QPSK link of ``end_to_end_qpsk_5msps_realtime`` (issue 19).
QPSK_LINK = {
    "name": "qpsk-2msym",
    "link": {"modulation": "qpsk", "symbol_rate": 2.0e6, "pulse": "rrc", "rolloff": 0.5, "line_code": "nrz-l"},
    "coding": {"convolutional": "1/2", "reed_solomon": 16, "interleave": 5, "randomizer": True},
    "frames": {"kind": "tm", "length": 1115, "fecf": False, "ocf": False, "spacecraft_id": 499},
    "simulate": {"sample_rate_hz": 5.0e6, "seconds": 1.0, "ebn0_db": 6.0, "carrier_offset_hz": 12e3,
                 "clock_offset_ppm": 10.0, "timing_offset": 0.3,
                 "traffic": [{"apid": 200, "length": 2000, "rate_hz": 400.0, "vcid": 1}]},
}


def _qpsk_link(tmp: Path, repeats: int) -> tuple[float, float, int, float]:
    """Msample/s, real-time factor and packets of the QPSK link's decode (1 process); its real-time factor
    without the checksum."""
    from pipeline.profile import profile_from_dict
    from pipeline.recording import open_recording
    from pipeline.sim import simulate

    profile = profile_from_dict(QPSK_LINK)
    sim = simulate(profile, tmp / "qpsk", seed=3)
    rec = open_recording(sim.meta_path)
    msps, _, packets = _end_to_end(rec, profile, tmp / "qpsk_out", 1, repeats)
    rec_nc = open_recording(sim.meta_path, verify_checksum=False)
    msps_nc = _end_to_end(rec_nc, profile, tmp / "qpsk_out_nc", 1, repeats)[0]
    (tmp / "qpsk" / sim.data_path.name).unlink()
    return msps, msps * 1e6 / rec.sample_rate_hz, packets, msps_nc * 1e6 / rec.sample_rate_hz


def measure(*, seconds: float = 4.0, repeats: int = 3, segmented_seconds: float = 34.0, fresh_runs: int = 3,
            progress=None) -> dict:
    """Run every benchmark and return the figures as a dict (see the module docstring).

    Parameters
    ----------
    seconds : float
        Length of the simulated demo recording for the end-to-end figures (1 Msample/s).
    repeats : int
        Timed repeats per figure; the best is kept.
    segmented_seconds : float
        Length of the recording for the overlapping-segment figures (0 skips them); it must hold
        at least two default segments (2^24 samples) to show a speed-up.
    fresh_runs : int
        Fresh processes started for the warm-start and memory figures (the first fills the cache).
    progress : callable or None
        ``progress(str)`` is told which figure is being measured.
    """
    from pipeline.profile import demo_profile_path, load_profile
    from pipeline.recording import open_recording
    from pipeline.sim import simulate

    if not (isinstance(seconds, (int, float)) and 0.5 <= seconds <= 600):
        raise ValueError(f"Argument 'seconds' must be 0.5..600, not {seconds!r}.")
    if isinstance(repeats, bool) or not isinstance(repeats, int) or not 1 <= repeats <= 20:
        raise ValueError(f"Argument 'repeats' must be 1..20, not {repeats!r}.")
    say = progress or (lambda s: None)
    profile = load_profile(demo_profile_path())
    res: dict = {"cpu": cpu_model(), "cores": os.cpu_count(), "python": platform.python_version(),
                 "load_average_before": [round(x, 2) for x in os.getloadavg()], "seconds": float(seconds),
                 "repeats": repeats}
    with tempfile.TemporaryDirectory(prefix="downlink-bench-") as tmpname:
        tmp = Path(tmpname)
        say("simulating the demo recording")
        sim = simulate(profile, tmp / "demo", seconds=float(seconds), seed=1)
        rec = open_recording(sim.meta_path)
        fs = rec.sample_rate_hz
        res["sample_rate_hz"] = fs
        say("recording read")
        res["recording_read_msps"] = _bench_read(rec, profile.receiver.chunk_samples, repeats)
        say("front end")
        chunks = list(rec.chunks(profile.receiver.chunk_samples, verify=False))
        res["frontend_msps"] = _bench_frontend(profile, chunks, fs, repeats)
        del chunks
        say("Viterbi")
        res["viterbi_mbps"] = _bench_viterbi(repeats)
        say("frame synchronizer")
        res["framesync_mbps"] = _bench_framesync(profile, repeats)
        say("Reed-Solomon")
        res["rs_clean_mbps"] = _bench_rs(0, repeats)
        res["rs_16err_mbps"] = _bench_rs(16, repeats)
        say("turbo decoder")
        from pipeline.tools._turbo import turbo_speed

        turbo = turbo_speed(frames=128, repeat=repeats, scalar_frames=8, maxlog=False)
        for key in ("turbo_r12_k8920_mbps", "turbo_r12_k8920_mean_iterations", "turbo_r12_k8920_scalar_mbps",
                    "turbo_vector_over_scalar_per_iteration"):
            res[key] = turbo[key]
        say("LDPC decoder")
        from pipeline.tools._ldpc import LDPC_SPEED_POINTS, ldpc_speed

        ldpc = ldpc_speed(codewords=256, repeat=repeats, lanes64=False, encoder=False)
        for key, _, _ in LDPC_SPEED_POINTS:
            for tail in ("_mbps", "_iterations", "_scalar_mbps", "_speedup_vs_scalar"):
                res[key + tail] = ldpc[key + tail]
        say("frames and packets")
        from pipeline.chain import decode_segment

        seg = decode_segment(rec, profile, 0, 0, rec.num_samples, 0, rec.num_samples)
        res["frames_packets_mbps"], res["frames_packets_per_s"] = _bench_frames_packets(profile, seg.frames,
                                                                                        repeats)
        say("end to end, 1 process")
        msps1, _, packets = _end_to_end(rec, profile, tmp, 1, repeats)
        res["end_to_end_msps"] = msps1
        rec_nc = open_recording(sim.meta_path, verify_checksum=False)
        res["end_to_end_msps_no_checksum"] = _end_to_end(rec_nc, profile, tmp / "nc", 1, repeats)[0]
        res["sha512_msps"] = _bench_sha512(rec, repeats)
        res["end_to_end_realtime_factor"] = msps1 * 1e6 / fs
        res["end_to_end_packets"] = packets
        say("end to end, QPSK 2 Msym/s at 5 Msample/s, 1 process")
        q_msps, q_rt, q_packets, q_rt_nc = _qpsk_link(tmp, repeats)
        res["end_to_end_qpsk_5msps_realtime_no_checksum"] = q_rt_nc
        res["end_to_end_qpsk_5msps_msps"] = q_msps
        res["end_to_end_qpsk_5msps_realtime"] = q_rt
        res["end_to_end_qpsk_5msps_packets"] = q_packets
        if segmented_seconds:
            say(f"overlapping segments, {segmented_seconds:g} s recording, 1 and 2 worker processes")
            sim_long = simulate(profile, tmp / "long", seconds=float(segmented_seconds), seed=2)
            # without the sha512 check: the bound below counts the segments' CPU only, and the hash (its own
            # figure, sha512_msps) would be a third load on two cores
            rec_long = open_recording(sim_long.meta_path, verify_checksum=False)
            s1, bound, _ = _end_to_end(rec_long, profile, tmp, 1, max(1, repeats - 1))
            s2, _, _ = _end_to_end(rec_long, profile, tmp, 2, max(1, repeats - 1))
            res["segmented_seconds"] = float(segmented_seconds)
            res["end_to_end_msps_segmented"] = s1
            res["end_to_end_msps_segmented_2proc"] = s2
            res["segmented_speedup"] = s2 / s1
            res["segmented_speedup_bound"] = bound
            res["segmented_speedup_of_bound"] = (s2 / s1) / bound if bound and bound == bound else float("nan")
            (tmp / "long" / sim_long.data_path.name).unlink()
        say("fresh process: cold start (empty kernel cache)")
        res.update(_cold_start(sim.meta_path, tmp))
        say("fresh process: warm start and peak memory")
        res.update(_fresh_process(sim.meta_path, tmp, runs=fresh_runs))
    res["load_average_after"] = [round(x, 2) for x in os.getloadavg()]
    res["bench_process_peak_rss_mb"] = peak_rss_mb()
    return {k: (round(v, 3) if isinstance(v, float) else v) for k, v in res.items()}


_ROWS = [
    ("recording_read_msps", "recording read (cf32 SigMF)", "Msample/s"),
    ("frontend_msps", "front end (Demodulator)", "Msample/s"),
    ("viterbi_mbps", "Viterbi r=1/2 (decoded bits)", "Mbit/s"),
    ("framesync_mbps", "frame synchronizer (soft bits in)", "Mbit/s"),
    ("rs_clean_mbps", "RS E=16 I=5, clean (codeblock bits)", "Mbit/s"),
    ("rs_16err_mbps", "RS E=16 I=5, 16 errors/codeword", "Mbit/s"),
    ("turbo_r12_k8920_mbps", "turbo r=1/2 k=8920 1 dB (info bits)", "Mbit/s"),
    ("turbo_r12_k8920_scalar_mbps", "  the same, scalar kernel", "Mbit/s"),
    ("ldpc_c2_mbps", "LDPC C2 4 dB (info bits)", "Mbit/s"),
    ("ldpc_c2_scalar_mbps", "  the same, scalar kernel", "Mbit/s"),
    ("ldpc_ar4ja_r12_k1024_mbps", "LDPC AR4JA r=1/2 k=1024 2 dB (info bits)", "Mbit/s"),
    ("ldpc_ar4ja_r12_k1024_scalar_mbps", "  the same, scalar kernel", "Mbit/s"),
    ("frames_packets_mbps", "frames + packets (frame bits)", "Mbit/s"),
    ("end_to_end_msps", "end to end, 1 process", "Msample/s"),
    ("end_to_end_realtime_factor", "  real-time factor (1 Msample/s)", "x"),
    ("end_to_end_msps_no_checksum", "  the same without the sha512 check", "Msample/s"),
    ("sha512_msps", "sha512 check alone (its own thread)", "Msample/s"),
    ("end_to_end_qpsk_5msps_msps", "QPSK 2 Msym/s link, 5 Msample/s, 1 process", "Msample/s"),
    ("end_to_end_qpsk_5msps_realtime", "  real-time factor", "x"),
    ("end_to_end_qpsk_5msps_realtime_no_checksum", "  the same without the sha512 check", "x"),
    ("end_to_end_msps_segmented", "long recording, 1 process", "Msample/s"),
    ("end_to_end_msps_segmented_2proc", "long recording, 2 worker processes", "Msample/s"),
    ("segmented_speedup", "  speed-up over 1 process", "x"),
    ("segmented_speedup_bound", "  bound on 2 idle cores (segment CPU)", "x"),
    ("segmented_speedup_of_bound", "  speed-up / bound", "x"),
    ("warm_start_s", "warm start to first sample", "s"),
    ("cold_start_s", "cold start: first decode, empty kernel cache", "s"),
    ("cold_decode_s", "  the same through pipeline.decode, report included", "s"),
    ("peak_rss_mb", "peak RSS, fresh decode process", "MiB"),
    ("end_rss_anon_mb", "  its own memory at the end (RssAnon)", "MiB"),
    ("end_rss_file_mb", "  mapped files at the end (RssFile)", "MiB"),
]


def format_table(res: dict) -> str:
    """The figures as an aligned text table."""
    lines = [f"downlink bench: demo profile (Tamarisk), {res['seconds']:g} s recording at "
             f"{res['sample_rate_hz'] / 1e6:g} Msample/s, best of {res['repeats']}",
             f"CPU: {res['cpu']} ({res['cores']} cores), Python {res['python']}, load average "
             f"{res['load_average_before'][0]:.2f} before / {res['load_average_after'][0]:.2f} after", ""]
    lines.append(f"{'figure':<40} {'value':>10}  unit")
    for key, label, unit in _ROWS:
        if key in res:
            v = res[key]
            lines.append(f"{label:<40} {v:>10.2f}  {unit}")
    return "\n".join(lines)


def run_bench(as_json: bool = False, seconds: float = 4.0) -> int:
    """The ``downlink bench`` command: measure, then print a table (or one JSON object) on stdout."""
    def progress(msg: str) -> None:
        if sys.stderr.isatty():
            print(f"  {msg} ...", file=sys.stderr)

    res = measure(seconds=seconds, progress=progress)
    if as_json:
        print(json.dumps(res, sort_keys=True))
    else:
        print(format_table(res))
    return 0
