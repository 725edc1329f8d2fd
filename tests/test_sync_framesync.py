"""FrameSync: marker search, check, lock, flywheel, slips, inversion, chunking; against a slow reference."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.fec import ASM
from pipeline.sync import Cadu, FrameSync, _kernels

ASM_BITS = np.unpackbits(np.frombuffer(ASM, dtype=np.uint8))


# ---- helpers ------------------------------------------------------------------------------------
def build_stream(rng, frames, *, prefix_bits=100, invert=None, marker_errors=None, suffix_bits=0):
    """Concatenate prefix noise, then ASM + frame bits for each frame.

    ``invert[k]`` complements CADU k (marker and data); ``marker_errors[k]`` flips that many marker bits.
    Returns (bits uint8, start index of every ASM).
    """
    parts = [rng.integers(0, 2, prefix_bits, dtype=np.uint8)]
    starts = []
    at = prefix_bits
    for k, f in enumerate(frames):
        marker = ASM_BITS.copy()
        if marker_errors is not None and marker_errors[k]:
            flip = rng.choice(32, size=marker_errors[k], replace=False)
            marker[flip] ^= 1
        cadu = np.concatenate((marker, f))
        if invert is not None and invert[k]:
            cadu = cadu ^ 1
        parts.append(cadu)
        starts.append(at)
        at += cadu.size
    parts.append(rng.integers(0, 2, suffix_bits, dtype=np.uint8))
    return np.concatenate(parts), starts


def to_soft(bits, rng=None, noise=0.0):
    s = (1.0 - 2.0 * bits.astype(np.float32))
    if rng is not None and noise:
        s = s + rng.normal(0, noise, s.size).astype(np.float32)
    return s.astype(np.float32)


def run(fs, soft, pos, cuts=None):
    if cuts is None:
        return fs.process(soft, pos) + fs.flush()
    out = []
    edges = [0, *sorted(cuts), soft.size]
    for a, b in zip(edges[:-1], edges[1:]):
        out += fs.process(soft[a:b], pos[a:b])
    return out + fs.flush()


def reference_sync(bits, frame_bits, marker, e, check_frames, flywheel, slip, lookback=0):
    """Slow, obvious synchronizer over the whole stream at once (same rules as FrameSync's docstring)."""
    m = len(marker)
    L = m + frame_bits
    n = len(bits)

    def errs(q):
        d = sum(int(bits[q + j]) != int(marker[j]) for j in range(m))
        return (m - d, True) if m - d < d else (d, False)

    def data(q, inverted):
        b = bits[q + m: q + L].copy()
        return np.packbits(b ^ 1 if inverted else b).tobytes()

    out, held = [], []  # flywheel CADUs are held until a marker decides about them

    def done():
        return out + held

    s = 0
    floor = 0  # one bit after the last marker found (where a search after a loss starts): the look-back stays there
    while True:
        c = None
        for q in range(s, n - m + 1):
            er, inv = errs(q)
            if er <= e:
                c = q
                break
        if c is None:
            return done()
        ok = True
        for k in range(1, check_frames + 1):
            if c + k * L + m > n:
                return done()
            if errs(c + k * L)[0] > e:
                ok = False
                break
        if not ok:
            s = c + 1
            continue
        # locked at c: look back over up to `lookback` periods (never before `floor`), with the lock's slip
        # window; after a miss only a marker the search would take counts (with hard decisions that is the same
        # test); stop after flywheel + 1 misses in a row; nothing before the oldest marker found
        lo = max(floor, c - lookback * L)
        back, misses, newer = [], 0, c
        while newer - L >= lo:
            p = newer - L
            er, inv_q = errs(p)
            q = p if er <= e else None
            if q is None:
                cands = [(errs(r)[0], abs(r - p), r) for r in range(max(p - slip, lo), min(p + slip, newer - 1) + 1)
                         if r != p and errs(r)[0] <= e]
                if cands:
                    q = min(cands)[2]
                    er, inv_q = errs(q)
            if q is not None:
                back.append((q, er, inv_q, True))
                misses, newer = 0, q
            else:
                back.append((p, None, None, False))
                misses, newer = misses + 1, p
                if misses > flywheel:
                    break
        while back and not back[-1][3]:
            back.pop()
        back.reverse()
        first = back[0][0] if back else c
        # the held flywheel CADUs that overlap the lock's first frame were on a grid that no longer holds
        out += [h for h in held if h[0] + L <= first]
        held = []
        inverted = inv
        for q, er, inv_q, found in back:
            if found:
                inverted = inv_q
                out.append((q, er, inverted, False, data(q, inverted)))
            else:
                up = sum(int(bits[q + j]) != int(marker[j]) for j in range(m))
                out.append((q, m - up if inverted else up, inverted, True, data(q, inverted)))
        p, misses, last, found_last = c, 0, c - 1, c - 1
        while True:
            if p + m > n:
                return done()
            er, inv2 = errs(p)
            found = None
            if er <= e:
                found = (p, er, inv2)
            else:
                cands = []
                for q in range(max(p - slip, last + 1, 0), min(p + slip, n - m) + 1):
                    if q != p:
                        er2, inv3 = errs(q)
                        if er2 <= e:
                            cands.append(((er2, abs(q - p), q), inv3))
                if cands:
                    (er2, _, q), inv3 = min(cands)
                    found = (q, er2, inv3)
            if found is not None:
                q, er2, inv3 = found
                if q + L > n:
                    return done()
                inverted, misses = inv3, 0
                out += held
                held = []
                out.append((q, er2, inverted, False, data(q, inverted)))
                last, found_last, p, floor = q, q, q + L, q + 1
            else:
                misses += 1
                if misses > flywheel:
                    s = found_last + 1  # the search restarts after the last marker found
                    break
                if p + L > n:
                    return done()
                up = sum(int(bits[p + j]) != int(marker[j]) for j in range(m))
                held.append((p, m - up if inverted else up, inverted, True, data(p, inverted)))
                last, p = p, p + L


def as_tuples(cadus):
    return [(c.bit_index, c.asm_errors, c.inverted, c.flywheel, c.data) for c in cadus]


# ---- basic acquisition -----------------------------------------------------------------------------
def test_clean_stream_all_cadus_found(rng):
    fb = 1024
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(12)]
    bits, starts = build_stream(rng, frames, prefix_bits=517)
    pos = 1000.0 + 2.0 * np.arange(bits.size)
    fs = FrameSync(frame_bits=fb)
    out = run(fs, to_soft(bits), pos)
    assert [c.bit_index for c in out] == starts
    assert all(c.data == np.packbits(f).tobytes() for c, f in zip(out, frames))
    assert [c.position for c in out] == [pos[s] for s in starts]
    assert not any(c.flywheel or c.inverted for c in out)
    assert fs.stats.cadus == 12 and fs.stats.locks == 1 and fs.stats.losses == 0
    assert fs.events[0].kind == "lock_acquired" and fs.events[0].bit_index == starts[0]


@pytest.mark.kat
def test_kat_small_stream_known_offsets():
    # Hand-built: 13 zero bits, ASM + 16 bits of AA55, inverted ASM + complement of 0F0F, ASM + FFFF.
    # CCSDS 131.0-B sec. 8.2 (ASM 1ACFFC1D); inverted ASM E53003E2 per REFERENCES.md sec. 1.1 (computed)
    stream = (
        "0" * 13
        + format(0x1ACFFC1D, "032b") + format(0xAA55, "016b")
        + format(0xE53003E2, "032b") + format(0x0F0F ^ 0xFFFF, "016b")
        + format(0x1ACFFC1D, "032b") + format(0xFFFF, "016b")
    )
    bits = np.array([int(ch) for ch in stream], dtype=np.uint8)
    fs = FrameSync(frame_bits=16, max_errors=0, check_frames=1, flywheel=0, slip_bits=0)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [(c.bit_index, c.data.hex(), c.inverted) for c in out] == [
        (13, "aa55", False), (61, "0f0f", True), (109, "ffff", False)]
    assert fs.stats.polarity_changes == 2


@pytest.mark.kat
def test_kat_find_marker_kernel():
    hard = np.zeros(80, dtype=np.uint8)
    hard[20:52] = ASM_BITS
    hard[21] ^= 1  # one error
    res = np.zeros(2, dtype=np.int64)
    assert _kernels.find_marker(hard, 0, 80 - 32 + 1, ASM_BITS, 1, res) == 20
    assert list(res) == [1, 0]
    assert _kernels.find_marker(hard, 0, 80 - 32 + 1, ASM_BITS, 0, res) == -1
    inv = hard ^ 1
    assert _kernels.find_marker(inv, 0, 80 - 32 + 1, ASM_BITS, 1, res) == 20
    assert list(res) == [1, 1]
    out = np.zeros(3, dtype=np.int64)
    _kernels.marker_mismatches(hard, 19, 3, ASM_BITS, out)
    assert out[1] == 1 and out[0] > 4 and out[2] > 4
    # the largest aperiodic autocorrelation sidelobe of the +-1 ASM is 9 (REFERENCES.md sec. 1.1, computed):
    # so one-bit shifts of the marker leave at least (32 - 9) / 2 > 11 mismatches.
    lone = np.zeros(96, dtype=np.uint8)
    lone[32:64] = ASM_BITS
    allm = np.zeros(65, dtype=np.int64)
    _kernels.marker_mismatches(lone, 0, 65, ASM_BITS, allm)
    pm = 1 - 2 * ASM_BITS.astype(int)
    side = max(abs(int(np.dot(pm[k:], pm[: 32 - k]))) for k in range(1, 32))
    assert side == 9  # REFERENCES.md sec. 1.1 (computed here)


def test_inverted_cadus_are_uninverted(rng):
    fb = 512
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(10)]
    invert = [False, False, True, True, True, False, False, True, False, False]
    bits, starts = build_stream(rng, frames, invert=invert)
    fs = FrameSync(frame_bits=fb)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [c.bit_index for c in out] == starts
    assert [c.inverted for c in out] == invert
    assert all(c.data == np.packbits(f).tobytes() for c, f in zip(out, frames))
    assert fs.stats.polarity_changes == 4
    assert fs.stats.inverted_cadus == 4


def test_whole_stream_inverted(rng):
    fb = 256
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(6)]
    bits, starts = build_stream(rng, frames, invert=[True] * 6)
    fs = FrameSync(frame_bits=fb)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [c.bit_index for c in out] == starts and all(c.inverted for c in out)
    assert all(c.data == np.packbits(f).tobytes() for c, f in zip(out, frames))
    assert fs.stats.polarity_changes == 0


def test_marker_errors_within_threshold_counted(rng):
    fb = 400
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(8)]
    errs = [0, 3, 4, 1, 2, 4, 0, 3]
    bits, starts = build_stream(rng, frames, marker_errors=errs)
    fs = FrameSync(frame_bits=fb, max_errors=4)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [c.asm_errors for c in out] == errs
    assert not any(c.flywheel for c in out)
    assert fs.stats.asm_errors == sum(errs)


# ---- flywheel and loss -------------------------------------------------------------------------------
def test_flywheel_through_missed_markers(rng):
    fb = 600
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(10)]
    errs = [0, 0, 12, 12, 12, 0, 0, 0, 0, 0]  # three markers destroyed
    bits, starts = build_stream(rng, frames, marker_errors=errs)
    fs = FrameSync(frame_bits=fb, flywheel=3)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [c.bit_index for c in out] == starts
    assert [c.flywheel for c in out] == [e > 4 for e in errs]
    assert [c.asm_errors for c in out][2:5] == [12, 12, 12]
    assert all(c.data == np.packbits(f).tobytes() for c, f in zip(out, frames))  # flywheel keeps the cut
    assert fs.stats.losses == 0 and fs.stats.flywheel_cadus == 3


def test_loss_after_flywheel_exhausted_then_reacquire(rng):
    fb = 600
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(12)]
    errs = [0, 0, 12, 12, 12, 12, 0, 0, 0, 0, 0, 0]  # four markers destroyed, flywheel 3
    bits, starts = build_stream(rng, frames, marker_errors=errs)
    fs = FrameSync(frame_bits=fb, flywheel=3, check_frames=1)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    kinds = [ev.kind for ev in fs.events]
    assert kinds == ["lock_acquired", "lock_lost", "lock_acquired"]
    assert fs.events[1].bit_index == starts[5]
    # frames 0,1 good, 2..4 flywheel, 5 lost, then frames 6.. re-acquired (search resumes in frame 4)
    good = [c.bit_index for c in out if not c.flywheel]
    assert good == starts[:2] + starts[6:]
    assert [c.bit_index for c in out if c.flywheel] == starts[2:5]


def test_zero_flywheel_and_zero_check(rng):
    fb = 300
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(6)]
    errs = [0, 0, 10, 0, 0, 0]
    bits, starts = build_stream(rng, frames, marker_errors=errs)
    fs = FrameSync(frame_bits=fb, flywheel=0, check_frames=0)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [c.bit_index for c in out if c.bit_index in starts] == starts[:2] + starts[3:]
    assert not any(c.flywheel for c in out)
    assert fs.stats.losses == 1


# ---- bit slips ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("slip", [-2, -1, 1, 2])
def test_small_bit_slip_followed_in_same_frame(rng, slip):
    fb = 800
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(10)]
    if slip > 0:  # insert bits inside frame 4
        frames[4] = np.concatenate((frames[4][:300], rng.integers(0, 2, slip, dtype=np.uint8), frames[4][300:]))
    else:  # delete bits inside frame 4
        frames[4] = np.delete(frames[4], np.arange(300, 300 - slip))
    bits, starts = build_stream(rng, frames)
    fs = FrameSync(frame_bits=fb, slip_bits=2)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [c.bit_index for c in out] == starts
    assert not any(c.flywheel for c in out)
    assert [ev.kind for ev in fs.events] == ["lock_acquired", "bit_slip"]
    assert fs.events[1].offset_bits == slip
    assert all(c.data == np.packbits(f).tobytes() for k, (c, f) in enumerate(zip(out, frames)) if k != 4)


@pytest.mark.parametrize("slip", [-1, 1, -37, 150])
def test_slip_reacquired_within_two_frames_without_slip_window(rng, slip):
    # With the slip window off the lock is lost, and the frames after the slip must still be
    # recovered from the second frame after it at the latest (issue 4 "survive bit slips").
    fb = 800
    n = 14
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(n)]
    if slip > 0:
        frames[4] = np.concatenate((frames[4][:300], rng.integers(0, 2, slip, dtype=np.uint8), frames[4][300:]))
    else:
        frames[4] = np.delete(frames[4], np.arange(300, 300 - slip))
    bits, starts = build_stream(rng, frames)
    fs = FrameSync(frame_bits=fb, slip_bits=0, flywheel=0, check_frames=1)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    good = {c.bit_index for c in out if not c.flywheel}
    assert set(starts[:5]) <= good
    assert set(starts[7:]) <= good  # frames 7.. (two after the slipped frame's successor) all back
    assert fs.stats.losses == 1


def test_large_slip_with_flywheel_recovers(rng):
    fb = 800
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(16)]
    frames[3] = frames[3][:500]  # 300 bits lost
    bits, starts = build_stream(rng, frames)
    fs = FrameSync(frame_bits=fb, flywheel=2)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    good = [c.bit_index for c in out if not c.flywheel]
    assert set(starts[7:]) <= set(good)
    for c in out:
        if c.bit_index in starts and c.bit_index not in starts[3:4]:
            k = starts.index(c.bit_index)
            assert c.data == np.packbits(frames[k]).tobytes()


# ---- chunking invariance and the reference ---------------------------------------------------------------
def noisy_scenario(rng, n_frames=30, fb=700):
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(n_frames)]
    for k in rng.choice(n_frames, 3, replace=False):  # slips of various sizes
        d = int(rng.choice([-3, -1, 1, 2, 60]))
        if d > 0:
            frames[k] = np.concatenate((frames[k][:200], rng.integers(0, 2, d, dtype=np.uint8), frames[k][200:]))
        else:
            frames[k] = np.delete(frames[k], np.arange(200, 200 - d))
    invert = np.zeros(n_frames, bool)
    invert[rng.integers(0, n_frames): rng.integers(0, n_frames)] = True
    errs = rng.choice([0, 1, 2, 5, 8, 14], size=n_frames, p=[0.5, 0.15, 0.1, 0.1, 0.1, 0.05])
    bits, _ = build_stream(rng, frames, invert=invert, marker_errors=errs, prefix_bits=int(rng.integers(0, 900)),
                           suffix_bits=int(rng.integers(0, 900)))
    # sprinkle channel errors everywhere (about 1 %), so false candidates and near-misses happen
    flips = rng.random(bits.size) < 0.01
    return bits ^ flips.astype(np.uint8), fb


@pytest.mark.parametrize("seed", range(4))
def test_matches_slow_reference(seed):
    rng = np.random.default_rng(1000 + seed)
    bits, fb = noisy_scenario(rng)
    params = dict(max_errors=int(rng.integers(2, 7)), check_frames=int(rng.integers(0, 3)),
                  flywheel=int(rng.integers(0, 4)), slip_bits=int(rng.integers(0, 4)),
                  lookback_frames=[0, 0, 3, 8][seed])
    fs = FrameSync(frame_bits=fb, **params)
    got = as_tuples(run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64)))
    want = reference_sync(bits, fb, ASM_BITS, params["max_errors"], params["check_frames"], params["flywheel"],
                          params["slip_bits"], params["lookback_frames"])
    assert got == want
    assert len(got) > 10


@pytest.mark.parametrize("seed", range(4))
def test_chunking_invariance(seed):
    rng = np.random.default_rng(2000 + seed)
    bits, fb = noisy_scenario(rng)
    soft = to_soft(bits, rng, noise=0.3)
    pos = 0.5 + 2.37 * np.arange(bits.size)
    kw = dict(frame_bits=fb, max_errors=3, check_frames=1, flywheel=2, slip_bits=2, keep_soft=True)
    one = FrameSync(**kw)
    whole = run(one, soft, pos)
    cuts = rng.choice(np.arange(1, bits.size), size=int(rng.integers(5, 60)), replace=False)
    many = FrameSync(**kw)
    pieces = run(many, soft, pos, cuts=cuts)
    assert pieces == whole
    assert [c.position for c in pieces] == [c.position for c in whole]
    assert all(np.array_equal(a.soft, b.soft) for a, b in zip(pieces, whole))
    assert one.stats == many.stats and one.events == many.events
    # single-bit chunks for a short stretch
    tiny = FrameSync(**kw)
    part = 5000
    got = []
    for i in range(part):
        got += tiny.process(soft[i: i + 1], pos[i: i + 1])
    got += tiny.process(soft[part:], pos[part:]) + tiny.flush()
    assert got == whole


def test_soft_values_carried_and_uninverted(rng):
    fb = 64
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(4)]
    bits, starts = build_stream(rng, frames, invert=[False, True, True, False])
    soft = to_soft(bits) * 0.7
    fs = FrameSync(frame_bits=fb, keep_soft=True)
    out = run(fs, soft, np.arange(bits.size, dtype=np.float64))
    for c, f in zip(out, frames):
        assert c.soft.dtype == np.float32
        assert np.array_equal(c.soft < 0, f.astype(bool))


def test_reset_restarts_bit_index(rng):
    fb = 200
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(4)]
    bits, starts = build_stream(rng, frames)
    fs = FrameSync(frame_bits=fb)
    a = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    fs.reset()
    assert fs.stats.cadus == 0 and fs.events == []
    b = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert a == b


def test_flush_then_new_stream_continues_bit_count(rng):
    fb = 200
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(3)]
    bits, starts = build_stream(rng, frames, suffix_bits=40)
    fs = FrameSync(frame_bits=fb)
    a = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert fs.stats.bits_discarded == 40
    b = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [c.bit_index - bits.size for c in b] == [c.bit_index for c in a]


# ---- statistics against the binomial formulas of REFERENCES.md sec. 1.7 -----------------------------------
def p_false(m, e):
    return sum(math.comb(m, i) for i in range(e + 1)) / 2.0**m


def p_miss(m, e, ber):
    return 1.0 - sum(math.comb(m, i) * ber**i * (1 - ber) ** (m - i) for i in range(e + 1))


def test_binomial_formulas_reproduce_reference_values():
    # REFERENCES.md sec. 1.7 (computed there): e=2: 1.23e-7, 3.99e-3 @1e-2; e=4: 9.65e-6, 1.61e-5 @1e-2, 2.04e-2 @5e-2
    assert p_false(32, 2) == pytest.approx(1.23e-7, rel=5e-3)
    assert p_miss(32, 2, 1e-2) == pytest.approx(3.99e-3, rel=5e-3)
    assert p_false(32, 4) == pytest.approx(9.65e-6, rel=5e-3)
    assert p_miss(32, 4, 1e-2) == pytest.approx(1.61e-5, rel=1e-2)
    assert p_miss(32, 4, 5e-2) == pytest.approx(2.04e-2, rel=5e-3)
    assert p_false(32, 6) == pytest.approx(2.68e-4, rel=5e-3)


def test_false_candidate_rate_in_random_bits():
    # Every offset of random data is examined once; a candidate is an offset matching the ASM or its
    # complement within e errors: expected count N * 2 * P_false (REFERENCES.md sec. 1.7 formula).
    rng = np.random.default_rng(7)
    n, e = 1_500_000, 6
    bits = rng.integers(0, 2, n, dtype=np.uint8)
    fs = FrameSync(frame_bits=4000, max_errors=e, check_frames=1, flywheel=0)
    run(fs, to_soft(bits), np.arange(n, dtype=np.float64))
    expected = (n - 31) * 2 * p_false(32, e)
    assert abs(fs.stats.candidates - expected) < 5 * math.sqrt(expected)  # binomial, 5 sigma
    # every candidate was either rejected, locked, or (the last one) left undecided at the end of the data
    assert fs.stats.candidates - fs.stats.locks - 1 <= fs.stats.false_candidates <= fs.stats.candidates - fs.stats.locks
    # a false lock needs a second match one period later: about expected * 2 P_false = 0.4 here
    assert fs.stats.locks <= 3


@pytest.mark.parametrize("e,ber", [(4, 0.05), (2, 0.03)])
def test_miss_rate_while_locked(e, ber):
    # Markers through a binary symmetric channel; a missed marker shows as a flywheel CADU.
    # Expected fraction = P_miss of REFERENCES.md sec. 1.7 (binomial).
    rng = np.random.default_rng(11)
    fb, n_frames = 96, 6000
    frames = rng.integers(0, 2, (n_frames, fb), dtype=np.uint8)
    markers = np.tile(ASM_BITS, (n_frames, 1)) ^ (rng.random((n_frames, 32)) < ber).astype(np.uint8)
    markers[:3] = ASM_BITS  # clean start so that the lock is acquired on frame 0
    bits = np.concatenate((np.zeros(10, np.uint8), np.hstack((markers, frames)).ravel()))
    fs = FrameSync(frame_bits=fb, max_errors=e, flywheel=1000, slip_bits=0)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert len(out) == n_frames and fs.stats.losses == 0
    misses = sum(c.flywheel for c in out)
    expected = (n_frames - 3) * p_miss(32, e, ber)
    assert abs(misses - expected) < 5 * math.sqrt(expected)


# ---- bad input ---------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "kw,exc,text",
    [
        (dict(frame_bits=4), ValueError, "Argument 'frame_bits' must be 8..4194304, not 4."),
        (dict(frame_bits=800, max_errors=16), ValueError, "Argument 'max_errors' must be 0..15, not 16."),
        (dict(frame_bits=800, flywheel=-1), ValueError, "Argument 'flywheel' must be 0..1000, not -1."),
        (dict(frame_bits=800, asm="1ACF"), TypeError, "Argument 'asm' must be bytes, not str."),
        (dict(frame_bits=800.0), TypeError, "Argument 'frame_bits' must be an integer 8..4194304, not float."),
        (dict(frame_bits=800, check_frames=True), TypeError, "Argument 'check_frames' must be an integer"),
    ],
)
def test_bad_arguments(kw, exc, text):
    with pytest.raises(exc, match=text.replace(".", r"\.")):
        FrameSync(**kw)


def test_bad_process_arguments():
    fs = FrameSync(frame_bits=800)
    with pytest.raises(ValueError, match="Argument 'position' must have the length of 'soft'"):
        fs.process(np.zeros(10, np.float32), np.zeros(9))
    with pytest.raises(ValueError, match="Argument 'soft' must be one-dimensional"):
        fs.process(np.zeros((2, 5), np.float32), np.zeros((2, 5)))
    with pytest.raises(TypeError, match="Argument 'soft' must hold real numbers"):
        fs.process(np.zeros(4, np.complex64), np.zeros(4))


def test_cadu_is_value_object():
    c = Cadu(data=b"\x01", position=1.0, asm_errors=0, inverted=False, flywheel=False, bit_index=3)
    assert c == Cadu(data=b"\x01", position=1.0, asm_errors=0, inverted=False, flywheel=False, bit_index=3,
                     soft=np.zeros(8, np.float32))


# ---- the search kernel against brute force, markers of every length ------------------------------------------
@pytest.mark.kat
def test_kat_popcount():
    for x in (0, 1, 0xFF, 0x8000000000000001, 0xFFFFFFFFFFFFFFFF, 0x123456789ABCDEF0):
        assert _kernels.popcount64(np.uint64(x)) == bin(x).count("1")


@pytest.mark.parametrize("marker_hex", ["1ACFFC1D", "034776C7272895B0", "25D5C0CE8990F6C9461BF79C", "1ACF"])
def test_find_marker_equals_brute_force(marker_hex):
    # 16-, 32-, 64- and 96-bit markers (the last ones: turbo markers of CCSDS 131.0-B-2 Fig. 8-3, REFERENCES.md 1.1)
    rng = np.random.default_rng(int(marker_hex[:6], 16))
    marker = np.unpackbits(np.frombuffer(bytes.fromhex(marker_hex), dtype=np.uint8))
    m = marker.size
    e = m // 8
    hard = rng.integers(0, 2, 30000, dtype=np.uint8)
    for at in rng.choice(30000 - m, 25, replace=False):  # plant noisy markers, upright and inverted
        mk = marker ^ (rng.random(m) < 0.06).astype(np.uint8)
        hard[at: at + m] = mk ^ np.uint8(rng.integers(0, 2))
    windows = np.lib.stride_tricks.sliding_window_view(hard, m)
    d = np.count_nonzero(windows != marker, axis=1)
    want = np.flatnonzero((d <= e) | (m - d <= e))
    got = []
    res = np.zeros(2, dtype=np.int64)
    i = 0
    stop = hard.size - m + 1
    while i < stop:
        k = _kernels.find_marker(hard, i, stop, marker, e, res)
        if k < 0:
            break
        assert (res[0], bool(res[1])) == ((d[k], False) if d[k] <= e else (m - d[k], True))
        got.append(k)
        i = k + 1
    assert got == want.tolist() and len(got) >= 20


def test_turbo_marker_stream(rng):
    from pipeline.fec import TURBO_ASM_R1_3

    marker = np.unpackbits(np.frombuffer(TURBO_ASM_R1_3, dtype=np.uint8))
    fb = 1000
    frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(5)]
    bits = np.concatenate([rng.integers(0, 2, 77, dtype=np.uint8)] + [np.concatenate((marker, f)) for f in frames])
    fs = FrameSync(frame_bits=fb, asm=TURBO_ASM_R1_3, max_errors=8)
    out = run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64))
    assert [c.bit_index for c in out] == [77 + k * (96 + fb) for k in range(5)]
    assert all(c.data == np.packbits(f).tobytes() for c, f in zip(out, frames))


def test_look_back_on_hard_decisions_equals_the_reference():
    # with hard correlation the look-back (off by default there) finds what a rejected candidate left behind:
    # a marker found, the next one spoiled, so the check fails and the search locks on a later pair
    total = 0
    for seed in range(30):
        rng = np.random.default_rng(3000 + seed)
        fb = int(rng.integers(60, 300))
        frames = [rng.integers(0, 2, fb, dtype=np.uint8) for _ in range(int(rng.integers(4, 14)))]
        errs = rng.choice([0, 0, 1, 3, 9, 12], size=len(frames))
        bits, _ = build_stream(rng, frames, prefix_bits=int(rng.integers(0, 600)), marker_errors=errs,
                               invert=rng.random(len(frames)) < 0.2, suffix_bits=int(rng.integers(0, 200)))
        bits = bits ^ (rng.random(bits.size) < 0.01).astype(np.uint8)
        kw = dict(max_errors=int(rng.integers(2, 6)), check_frames=int(rng.integers(1, 3)),
                  flywheel=int(rng.integers(0, 4)), slip_bits=int(rng.integers(0, 3)),
                  lookback_frames=int(rng.integers(1, 9)))
        fs = FrameSync(frame_bits=fb, **kw)
        cuts = rng.choice(np.arange(1, bits.size), size=int(rng.integers(0, 20)), replace=False)
        got = as_tuples(run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64), cuts=cuts))
        assert got == reference_sync(bits, fb, ASM_BITS, kw["max_errors"], kw["check_frames"], kw["flywheel"],
                                     kw["slip_bits"], kw["lookback_frames"])
        total += fs.stats.lookback_cadus
    assert total >= 10


# ---- property: any scenario, any chunking: the stage equals the slow reference -------------------------------
@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_frames=st.integers(0, 12),
    frame_bits=st.integers(8, 160),
    max_errors=st.integers(0, 6),
    check_frames=st.integers(0, 2),
    flywheel=st.integers(0, 3),
    slip_bits=st.integers(0, 3),
    n_cuts=st.integers(0, 12),
    lookback=st.integers(0, 4),
    slips=st.booleans(),
)
def test_property_equals_reference_for_any_chunking(seed, n_frames, frame_bits, max_errors, check_frames, flywheel,
                                                    slip_bits, n_cuts, lookback, slips):
    # without slips the frame grid holds, so the look-back (which has no slip search) finds markers that a
    # rejected candidate or a loss of lock left behind
    rng = np.random.default_rng(seed)
    slip_bits = min(slip_bits, frame_bits // 2)
    frames = []
    for _ in range(n_frames):
        f = rng.integers(0, 2, frame_bits, dtype=np.uint8)
        d = int(rng.choice([0, 0, 0, -1, 1, 2, -5, 9])) if slips else 0
        if d > 0:
            f = np.concatenate((f, rng.integers(0, 2, d, dtype=np.uint8)))
        elif d < 0:
            f = f[: frame_bits + d]
        frames.append(f)
    bits, _ = build_stream(rng, frames, prefix_bits=int(rng.integers(0, 200)),
                           invert=rng.random(n_frames) < 0.3,
                           marker_errors=rng.choice([0, 1, 3, 6, 10], size=n_frames),
                           suffix_bits=int(rng.integers(0, 100)))
    bits = bits ^ (rng.random(bits.size) < 0.02).astype(np.uint8)
    cuts = rng.choice(np.arange(1, bits.size), size=min(n_cuts, bits.size - 1), replace=False) if bits.size > 1 else []
    fs = FrameSync(frame_bits=frame_bits, max_errors=max_errors, check_frames=check_frames, flywheel=flywheel,
                   slip_bits=slip_bits, lookback_frames=lookback)
    got = as_tuples(run(fs, to_soft(bits), np.arange(bits.size, dtype=np.float64), cuts=cuts))
    assert got == reference_sync(bits, frame_bits, ASM_BITS, max_errors, check_frames, flywheel, slip_bits, lookback)
    assert fs.stats.cadus == len(got)
    assert all(b[0] > a[0] for a, b in zip(got, got[1:]))  # strictly in stream order
