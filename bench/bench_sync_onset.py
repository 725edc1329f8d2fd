"""Frames lost at signal onset by the soft frame synchronizer, without and with its look-back; false markers on
noise; the search threshold's trade.

Run from the repository root: ``python bench/bench_sync_onset.py [--onsets N] [--iq N] [--noise-bits N]
[--threshold-onsets N] [--seed S] [--skip onsets,iq,noise,thresholds]``.

"before" is ``FrameSync`` as ``pipeline.sync.frame_sync_for`` built it (soft correlation, search 4.5, lock 3.0,
flywheel 3) with ``lookback_frames=0`` (its slow reference in the tests, with no look-back, is the former one) and
the codeblock decoder without Es/N0 look-ahead; "after" is the default now: look-back of 8 periods or 65536 bits,
whichever is more, the search threshold of ``soft_search_threshold`` (4.5 for the ASM, 4.98 for the 64-bit and
5.34 for the 192-bit turbo marker) and the decoder's Es/N0 look-ahead of 8 CADUs.

1. Symbol onsets (``--onsets``, default 300 per point): channel symbols, BPSK over AWGN at the point's Es/N0,
   preceded by noise alone: the signal starts at a random bit of the frame grid after 0.5 to 3.5 CADU periods
   of noise.  Codewords from ``pipeline.sim.ChannelCoder`` (code, randomizer, marker).  Of the first 8 frames
   whose marker starts after the onset: ``lost sync`` = no CADU at its marker, ``lost`` = not delivered as the
   frame that was sent (sync lost or decoder failure); ``P(frame 0 lost)``; ``spurious`` = CADUs whose
   codeword is not entirely signal.  Means with 95 % intervals (normal approximation over onsets; Wilson for
   proportions); the paired difference (after - before, the same streams).
2. IQ onsets (``--iq``, default 40 per point): ``pipeline.simulate`` recordings (BPSK 48 ksym/s, RRC 0.5,
   200 ksample/s, 420 Hz carrier offset, 50 ppm clock) whose first 0.3 to 0.6 s are a dropout (noise alone),
   through ``pipeline.chain.FrontEnd`` (carrier acquisition and every loop included), the same counts against
   the simulator's truth frames.  Rate 1/6 is left out: issue 16 puts it on a residual carrier, and the
   suppressed-carrier receiver is specified down to -3 dB only.
3. Noise (``--noise-bits`` per marker): Gaussian noise alone through both synchronizers: candidates, locks and
   CADUs per 1e9 bits with exact Poisson 95 % intervals.  Also at thresholds lowered to 3.0 / 2.0 (``x``):
   there false locks are frequent enough to count what the look-back adds per false lock.
4. The search threshold T: on noise z^2 / m is Beta(1/2, (m-1)/2) (a direction uniform on the sphere), so a
   false candidate has probability ``P_fa(T)`` per bit and a false lock about ``P_fa(T) P_fa(3.0)``; a marker's
   miss probability ``P(|z| < T)`` at the point's Es/N0 (Monte Carlo, 200000 draws), and the frames the
   synchronizer loses per onset (``--threshold-onsets``, sync only) without and with look-back; also 0.5 dB
   lower (the receiver's implementation loss on IQ onsets is about that).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import stats

from pipeline.fec import crc16
from pipeline.profile import profile_from_dict
from pipeline.sim import ChannelCoder
from pipeline.sync import CodeblockDecoder, FrameSync, frame_sync_for, soft_search_threshold

FIRST_FRAMES = 8  # frames after the onset that are counted
CHUNK = 4096  # soft values per FrameSync.process call
BEFORE, AFTER = (0, 4.5), (None, None)  # (look-back, search threshold); None = FrameSync's default

POINTS = (  # (label, coding keys, frame octets, Es/N0 dB per channel bit)
    ("AR4JA r=1/2 k=1024", {"ldpc": "ar4ja", "ldpc_rate": "1/2", "ldpc_k": 1024}, 128, -1.2),
    ("turbo r=1/2 k=1784", {"turbo": "1/2", "turbo_k": 1784}, 223, -3.0),
    ("turbo r=1/2 k=1784", {"turbo": "1/2", "turbo_k": 1784}, 223, -1.4),
    ("turbo r=1/6 k=1784", {"turbo": "1/6", "turbo_k": 1784}, 223, -6.6),
)


def link_profile(coding: dict, octets: int):
    return profile_from_dict({
        "link": {"modulation": "bpsk", "symbol_rate": 48000.0},
        "coding": {"convolutional": "none", "reed_solomon": 0, **coding},
        "frames": {"length": octets, "fecf": "turbo" in coding, "ocf": True, "spacecraft_id": 499},
        "simulate": {"sample_rate_hz": 200000.0, "carrier_offset_hz": 420.0, "clock_offset_ppm": 50.0}})


def synchronizer(profile, lookback, search_threshold: float | None = None, lock_threshold: float = 3.0) -> FrameSync:
    """The link's synchronizer as ``frame_sync_for`` builds it, with the look-back and thresholds set."""
    base = frame_sync_for(profile)
    return FrameSync(frame_bits=base.frame_bits, asm=base.asm, flywheel=base.flywheel, correlation="soft",
                     keep_soft=True, search_threshold=search_threshold, lock_threshold=lock_threshold,
                     lookback_frames=lookback)


def codeblock_decoder(profile, lookback) -> CodeblockDecoder:
    return CodeblockDecoder(profile=profile, esn0_lookahead_cadus=0 if lookback == 0 else 8)


def random_frames(rng, count: int, octets: int, fecf: bool) -> list[bytes]:
    out = []
    for _ in range(count):
        body = bytes(rng.integers(0, 256, octets - (2 if fecf else 0), dtype=np.uint8))
        if fecf:
            c = crc16(body)
            body += bytes([c >> 8, c & 0xFF])
        out.append(body)
    return out


def run_sync(fs: FrameSync, y: np.ndarray):
    pos = np.arange(y.size, dtype=np.float64)
    out = []
    for a in range(0, y.size, CHUNK):
        out += fs.process(y[a:a + CHUNK], pos[a:a + CHUNK])
    return out + fs.flush()


def onset_trial(rng, profile, rows: np.ndarray, frames: list[bytes], esn0_db: float, configs, decode=True) -> dict:
    """One onset: the same soft stream through each synchronizer ``configs`` = ((look-back, search threshold),
    ...) and (with ``decode``) the codeblock decoder."""
    L = rows.shape[1]
    m = profile.marker_bits
    onset = int(rng.integers(L // 2, 7 * L // 2))
    # enough frames after the first 8 for a lock whose look-back reaches them
    pick = rng.integers(0, len(frames), onset // L + FIRST_FRAMES + synchronizer(profile, None).lookback_frames + 4)
    shift = int(rng.integers(0, L))  # the onset falls anywhere in the grid
    bits = rows[pick].reshape(-1)[shift:]
    starts = np.arange(L - shift, bits.size - L + 1, L)  # markers of the whole CADUs in the stream
    sigma = 1.0 / math.sqrt(2.0 * 10 ** (esn0_db / 10.0))
    y = (1.0 - 2.0 * bits) + sigma * rng.standard_normal(bits.size)
    y[:onset] = sigma * rng.standard_normal(onset)  # no signal before the onset
    y = y.astype(np.float32)
    after = [int(s) for s in starts if s >= onset][:FIRST_FRAMES]
    sent = {int(s): frames[pick[(int(s) + shift) // L]] for s in starts}
    result = {}
    for lb, threshold in configs:
        fs = synchronizer(profile, lb, threshold)
        cadus = run_sync(fs, y)
        found = {c.bit_index for c in cadus}
        r = dict(lost_sync=sum(s not in found for s in after), lookback_cadus=fs.stats.lookback_cadus,
                 spurious=sum(1 for c in cadus if c.bit_index + m < onset or c.bit_index not in sent))
        if decode:
            dec = codeblock_decoder(profile, lb)
            at = {d.cadu.bit_index: d for d in dec.process_cadus(cadus) + dec.flush()}
            lost = [s not in at or at[s].status != "ok" or at[s].frame != sent[s] for s in after]
            r.update(lost=sum(lost), frame0=bool(lost[0]))
        result[(lb, threshold)] = r
    return result


def iq_trial(profile, esn0_db: float, seed: int, lead_s: float, configs=(BEFORE, AFTER)) -> dict:
    """One simulated IQ recording with a dropout over its first ``lead_s`` seconds, through the front end."""
    from pipeline import open_recording, simulate
    from pipeline.chain import FrontEnd

    cadu_s = profile.cadu_channel_bits / profile.link.channel_bit_rate
    ebn0 = esn0_db - 10 * math.log10(profile.code_rate)
    result = {}
    with tempfile.TemporaryDirectory(prefix="onset-") as d:
        tail = FIRST_FRAMES + synchronizer(profile, None).lookback_frames + 3
        sim = simulate(profile, Path(d) / "s", seconds=lead_s + tail * cadu_s, ebn0_db=ebn0, seed=seed,
                       fades=[(0.0, lead_s, float("inf"))])
        rec = open_recording(sim.meta_path)
        truth = [json.loads(line) for line in Path(sim.truth_frames_path).read_text().splitlines() if line]
        onset = lead_s * rec.sample_rate_hz
        after = [t["position"] for t in truth if t["position"] >= onset][:FIRST_FRAMES]
        for cfg in configs:
            front = FrontEnd(profile, input_kind="iq", sample_rate_hz=rec.sample_rate_hz)
            front.fsync = synchronizer(profile, cfg[0], cfg[1])  # the one thing the two runs differ in
            front.codeblock = codeblock_decoder(profile, cfg[0])
            frames = []
            for chunk in rec.chunks(32768):
                frames += front.process_chunk(chunk).frames
            frames += front.finish().frames
            status = []
            for tp in after:
                near = [f.status for f in frames if abs(f.position - tp) < 2.0]
                status.append(near[0] if near else None)
            result[cfg] = dict(lost_sync=sum(s is None for s in status), lost=sum(s != "ok" for s in status),
                               frame0=status[0] != "ok", lookback_cadus=front.fsync.stats.lookback_cadus,
                               spurious=sum(1 for f in frames if f.position + 10 < onset))
    return result


def mean_ci(x) -> tuple[float, float, float]:
    x = np.asarray(x, dtype=float)
    h = 1.96 * x.std(ddof=1) / math.sqrt(x.size) if x.size > 1 else float("nan")
    return float(x.mean()), float(x.mean() - h), float(x.mean() + h)


def wilson(k: int, n: int) -> tuple[float, float, float]:
    z = 1.96
    p = k / n
    c = (p + z * z / (2 * n)) / (1 + z * z / n)
    h = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return p, max(0.0, c - h), min(1.0, c + h)


def poisson_ci(k: int) -> tuple[float, float]:
    lo = 0.0 if k == 0 else stats.chi2.ppf(0.025, 2 * k) / 2
    return lo, stats.chi2.ppf(0.975, 2 * k + 2) / 2


def fmt(t, digits=2) -> str:
    return f"{t[0]:.{digits}f} [{t[1]:.{digits}f}, {t[2]:.{digits}f}]"


def print_table(res: list[dict]) -> None:
    n = len(res)
    print(f"  {'':8} {'lost sync / onset':>24} {'lost / onset':>24} {'P(frame 0 lost)':>24} {'spurious':>9}")
    for cfg, name in ((BEFORE, "before"), (AFTER, "after")):
        r = [x[cfg] for x in res]
        lost_sync, lost = mean_ci([x["lost_sync"] for x in r]), mean_ci([x["lost"] for x in r])
        frame0, spurious = wilson(sum(x["frame0"] for x in r), n), sum(x["spurious"] for x in r)
        print(f"  {name:8} {fmt(lost_sync):>24} {fmt(lost):>24} {fmt(frame0, 3):>24} {spurious:9d}")
    d = [x[AFTER]["lost"] - x[BEFORE]["lost"] for x in res]
    print(f"  paired difference of lost frames per onset (after - before): {fmt(mean_ci(d))}; "
          f"look-back CADUs {sum(x[AFTER]['lookback_cadus'] for x in res)}", flush=True)


def onsets(args) -> None:
    print(f"\n1. symbol onsets: {args.onsets} per point, the first {FIRST_FRAMES} frames after the onset")
    for label, coding, octets, esn0 in POINTS:
        t0 = time.perf_counter()
        p = link_profile(coding, octets)
        rng = np.random.default_rng([args.seed, int(-10 * esn0)])
        frames = random_frames(rng, 64, octets, fecf=p.frames.fecf)
        rows = ChannelCoder(p).cadu_bit_rows(frames)
        res = [onset_trial(rng, p, rows, frames, esn0, (BEFORE, AFTER)) for _ in range(args.onsets)]
        fs, ebn0 = synchronizer(p, None), esn0 - 10 * math.log10(p.code_rate)
        print(f"\n{label}, Es/N0 {esn0:+.1f} dB (Eb/N0 {ebn0:+.1f} dB); after: look-back {fs.lookback_frames} periods, "
              f"search threshold {fs.search_threshold:.2f} ({time.perf_counter() - t0:.0f} s)")
        print_table(res)


def iq(args) -> None:
    print(f"\n2. IQ onsets: {args.iq} simulated recordings per point through the front end")
    for label, coding, octets, esn0 in POINTS:
        if "1/6" in label:
            continue
        t0 = time.perf_counter()
        p = link_profile(coding, octets)
        rng = np.random.default_rng([args.seed, 7, int(-10 * esn0)])
        res = [iq_trial(p, esn0, int(rng.integers(1 << 30)), float(rng.uniform(0.3, 0.6))) for _ in range(args.iq)]
        print(f"\n{label}, Es/N0 {esn0:+.1f} dB ({time.perf_counter() - t0:.0f} s)")
        print_table(res)


def noise(args) -> None:
    print(f"\n3. noise alone: {args.noise_bits:.3g} bits per marker, Gaussian; per 1e9 bits [95 % Poisson]")
    print(f"  {'marker':>7} {'thresholds':>10} {'look-back':>9} {'candidates':>24} {'locks':>24} {'CADUs':>24}")
    for _, coding, octets, esn0 in POINTS:
        if esn0 == -1.4:
            continue
        p = link_profile(coding, octets)
        for ts, tl in ((4.5, 3.0), (None, 3.0), (3.0, 2.0)):
            for lb in (0, None) if ts != 4.5 or p.marker_bits == 32 else (0,):
                if ts is None and p.marker_bits == 32:
                    continue  # the default is 4.5 for the ASM
                fs = synchronizer(p, lb, ts, tl)
                rng = np.random.default_rng([args.seed, p.marker_bits])
                cadus, block = 0, 1 << 20
                blocks = max(1, round(args.noise_bits / block / (10 if ts == 3.0 else 1)))
                for b in range(blocks):
                    pos = np.arange(b * block, (b + 1) * block, dtype=np.float64)
                    cadus += len(fs.process(rng.standard_normal(block).astype(np.float32), pos))
                cadus += len(fs.flush())
                scale = 1e9 / (blocks * block)
                cells = []
                for k in (fs.stats.candidates, fs.stats.locks, cadus):
                    lo, hi = poisson_ci(k)
                    cells.append(f"{k * scale:.3g} [{lo * scale:.2g}, {hi * scale:.2g}]")
                thresholds = f"{fs.search_threshold:.2f}/{tl}"
                print(f"  {p.marker_bits:7d} {thresholds:>10} {fs.lookback_frames:9d} {cells[0]:>24} {cells[1]:>24}"
                      f" {cells[2]:>24}", flush=True)


def p_false(m: int, t: float) -> float:
    """P(|z| >= t) per offset on isotropic Gaussian noise: z^2 / m ~ Beta(1/2, (m - 1)/2)."""
    return float(stats.beta.sf(min(t * t / m, 1.0), 0.5, (m - 1) / 2))


def marker_scores(m: int, esn0_db: float, draws: int, rng) -> np.ndarray:
    """|z| of the marker itself (amplitude 1, noise sigma per bit), ``draws`` times."""
    sigma = 1.0 / math.sqrt(2.0 * 10 ** (esn0_db / 10.0))
    out = np.empty(draws)
    for a in range(0, draws, 20000):
        y = 1.0 + sigma * rng.standard_normal((min(20000, draws - a), m))
        out[a:a + y.shape[0]] = np.abs(y.sum(axis=1) / np.sqrt((y * y).sum(axis=1)))
    return out


def equal_rate_threshold(m: int) -> float:
    """The T at which a false candidate on noise is as rare per bit as for the 32-bit ASM at 4.5 (the default)."""
    return round(soft_search_threshold(m), 2)


def thresholds(args) -> None:
    print("\n4. search threshold T (lock threshold 3.0): false candidates per bit on noise (Beta law), false locks "
          "per bit\n   (x 6e8 bits: 10 min at 1 Mbit/s), a marker's miss probability at T (Monte Carlo, 200000), "
          f"and frames lost\n   by the synchronizer per onset ({args.threshold_onsets} onsets, sync only, first "
          f"{FIRST_FRAMES} frames) without and with look-back")
    rng = np.random.default_rng(args.seed)
    for label, coding, octets, point in POINTS:
        if point == -1.4:
            continue
        for esn0 in (point, point - 0.5) + ((-8.0,) if "1/6" in label else ()):
            t0 = time.perf_counter()
            p = link_profile(coding, octets)
            m = p.marker_bits
            z = marker_scores(m, esn0, 200_000, rng)
            frames = random_frames(rng, 64, octets, fecf=p.frames.fecf)
            rows = ChannelCoder(p).cadu_bit_rows(frames)
            ts = sorted(t for t in {3.5, 4.0, 4.5, 5.0, 5.5, equal_rate_threshold(m)} if t * t < m)
            configs = [(lb, t) for t in ts for lb in (0, None)]
            res = [onset_trial(rng, p, rows, frames, esn0, configs, decode=False)
                   for _ in range(args.threshold_onsets)]
            print(f"\n  {label} ({m}-bit marker), Es/N0 {esn0:+.1f} dB: P(miss at 3.0) = {np.mean(z < 3.0):.4f}, "
                  f"P_fa(3.0) = {p_false(m, 3.0):.3g} ({time.perf_counter() - t0:.0f} s)")
            print(f"  {'T':>5} {'P_fa(T)/bit':>12} {'false locks/bit':>16} {'x 6e8':>8} {'P(miss at T)':>13}"
                  f" {'lost sync, no look-back':>26} {'lost sync, look-back':>26} {'spurious':>9}")
            for t in ts:
                pf = p_false(m, t)
                lock = pf * p_false(m, 3.0)
                no_lb = fmt(mean_ci([x[(0, t)]["lost_sync"] for x in res]))
                lb = fmt(mean_ci([x[(None, t)]["lost_sync"] for x in res]))
                spur = sum(x[(None, t)]["spurious"] for x in res)
                print(f"  {t:5.1f} {pf:12.3g} {lock:16.3g} {lock * 6e8:8.3g} {np.mean(z < t):13.4f} {no_lb:>26}"
                      f" {lb:>26} {spur:9d}", flush=True)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--onsets", type=int, default=300)
    ap.add_argument("--iq", type=int, default=40)
    ap.add_argument("--noise-bits", type=float, default=2e8)
    ap.add_argument("--threshold-onsets", type=int, default=300)
    ap.add_argument("--seed", type=int, default=2027)
    ap.add_argument("--skip", default="", help="comma-separated parts to skip: onsets,iq,noise,thresholds")
    args = ap.parse_args(argv)
    print(f"load average (1 min) at start: {os.getloadavg()[0]:.2f}")
    skip = set(filter(None, args.skip.split(",")))
    for name, part in (("onsets", onsets), ("iq", iq), ("noise", noise), ("thresholds", thresholds)):
        if name not in skip:
            part(args)
    print(f"\nload average (1 min) at the end: {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
