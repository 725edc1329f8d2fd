"""BranchSync: convolutional branch alignment and QPSK rotation on conv-encoded data; chunking; slips."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.fec import conv_bit_symbol_index, conv_encode, puncture_pattern, viterbi_decode
from pipeline.sync import BranchSync, branch_metric
from pipeline.sync._kernels import marker_scores, near_marker_scores, rotated_pairs

RATES = {"1/2": 0.5, "2/3": 2 / 3, "3/4": 0.75, "5/6": 5 / 6, "7/8": 7 / 8}


def channel(rng, bits, rate, ebn0_db, g2_inverted=None):
    """BPSK +1 = bit 0 over AWGN at the given Eb/N0 per information bit."""
    sym = conv_encode(bits, rate, g2_inverted=g2_inverted)
    esn0 = 10 ** ((ebn0_db + 10 * np.log10(RATES[rate])) / 10)
    sigma = np.sqrt(1 / (2 * esn0))
    return ((1.0 - 2.0 * sym) + rng.normal(0, sigma, sym.size)).astype(np.float32)


def rotate(soft, quarter_turns):
    """Rotate QPSK symbols (I, Q pairs) by quarter_turns * 90 degrees: I + jQ -> j^k (I + jQ)."""
    pr = soft[: soft.size // 2 * 2].reshape(-1, 2).copy()
    for _ in range(quarter_turns % 4):
        pr = np.stack((-pr[:, 1], pr[:, 0]), axis=1)
    return pr.ravel()


def run(bs, soft, pos, cuts=None):
    edges = [0, *(sorted(cuts) if cuts is not None else []), soft.size]
    outs, poss = [], []
    for a, b in zip(edges[:-1], edges[1:]):
        o, p = bs.process(soft[a:b], pos[a:b])
        outs.append(o)
        poss.append(p)
    o, p = bs.flush()
    return np.concatenate(outs + [o]), np.concatenate(poss + [p])


def align(decoded, bits, max_shift=16):
    """(bit error rate, shift, inverted) of the best match of decoded bits against bits[shift:]."""
    best = None
    for sh in range(max_shift):
        m = min(decoded.size, bits.size - sh)
        for inv in (0, 1):
            e = float(np.mean((decoded[:m] ^ inv) != bits[sh: sh + m]))
            if best is None or e < best[0]:
                best = (e, sh, inv)
    return best


# ---- acquisition on every rate, with offsets, inversions and rotations -------------------------------------
@pytest.mark.parametrize("rate,ebn0", [("1/2", 2.5), ("2/3", 3.5), ("3/4", 4.0), ("5/6", 4.5), ("7/8", 5.0)])
@pytest.mark.parametrize("modulation", ["bpsk", "qpsk"])
def test_alignment_found(rng, rate, ebn0, modulation):
    P = int(puncture_pattern(rate).sum())
    kp = puncture_pattern(rate).shape[1]
    bits = rng.integers(0, 2, 24000, dtype=np.uint8)
    soft = channel(rng, bits, rate, ebn0)
    drop = int(rng.integers(0, 2 * P))
    soft = soft[drop:]
    turns = int(rng.integers(0, 4)) if modulation == "qpsk" else 2 * int(rng.integers(0, 2))  # BPSK: invert or not
    soft = rotate(soft, turns) if modulation == "qpsk" else (soft if turns == 0 else -soft)
    pos = 100.0 + 0.5 * np.arange(soft.size)
    bs = BranchSync(rate=rate, modulation=modulation)
    out, opos = run(bs, soft, pos)
    dec = (out < 0).astype(np.uint8)
    ber, shift, inv = align(dec, bits)
    assert ber < 2e-3, (ber, shift, inv)
    # the 180-degree cases come out inverted, the others upright (CCSDS code: complement of a codeword)
    assert inv == (turns in (2, 3) if modulation == "qpsk" else turns == 2)
    assert bs.stats.switches == 1 and bs.stats.monitor_triggers == 0
    assert set(np.unique(out)) <= {-1.0, 1.0} and out.dtype == np.float32
    # positions: first channel bit of each decoded bit's branch, in the original stream
    first_sym = conv_bit_symbol_index(shift + dec.size, rate)[shift:] - drop
    assert shift % kp == 0
    assert np.array_equal(opos, 100.0 + 0.5 * first_sym)


def test_metric_separates_hypotheses(rng):
    # The right alignment has a much larger normalized path metric than the wrong one (rate 1/2, 1 dB).
    bits = rng.integers(0, 2, 8000, dtype=np.uint8)
    soft = channel(rng, bits, "1/2", 1.0)
    scores = []
    for off in (0, 1):
        s = soft[off: off + 15000]
        scores.append(branch_metric(s, conv_encode(viterbi_decode(s, "1/2"), "1/2")[: s.size]))
    assert scores[0] > scores[1] + 0.03
    assert branch_metric(np.ones(4, np.float32), np.zeros(4, np.uint8)) == 1.0
    assert branch_metric(np.zeros(4, np.float32), np.zeros(4, np.uint8)) == 0.0


@pytest.mark.kat
def test_kat_clean_rate_half_known_positions():
    # 64 bits from a fixed pattern, clean symbols, one symbol dropped in front: offset 1 must be chosen
    bits = np.array([(k * 37 + k // 3) % 2 for k in range(600)], dtype=np.uint8)
    soft = (1.0 - 2.0 * conv_encode(bits, "1/2")).astype(np.float32)[1:]
    bs = BranchSync(rate="1/2", modulation="bpsk", acquire_bits=256, block_bits=256)
    out, pos = run(bs, soft, np.arange(soft.size, dtype=np.float64))
    assert bs.events[0].kind == "branch_selected" and "offset 1" in bs.events[0].detail
    dec = (out < 0).astype(np.uint8)
    assert np.array_equal(dec[5:-5], bits[1 + 5: 1 + dec.size - 5])
    assert np.array_equal(pos, 1.0 + 2.0 * np.arange(dec.size))


def test_against_commpy_viterbi(rng):
    # scikit-commpy (PyPI) decodes the chosen alignment to the same bits.  commpy reads generator octals
    # with the opposite bit order (171 -> 117, 133 -> 155) and has no G2 inversion: undo it on the input.
    import commpy.channelcoding as commpy

    bits = rng.integers(0, 2, 1200, dtype=np.uint8)
    soft = channel(rng, bits, "1/2", 3.0)[3:]
    bs = BranchSync(rate="1/2", modulation="bpsk", acquire_bits=512, block_bits=256)
    out, _ = run(bs, soft, np.arange(soft.size, dtype=np.float64))
    ours = (out < 0).astype(np.uint8)
    tr = commpy.Trellis(np.array([6]), np.array([[0o117, 0o155]]))
    s = soft[1: 1 + 2 * 1100].astype(np.float64).copy()  # offset 1 = symbol 3 of the stream = C1 of bit 2
    s[1::2] *= -1  # undo the G2 inversion
    ref = commpy.viterbi_decode(-s, tr, tb_depth=64, decoding_type="unquantized")[:1100]
    # commpy starts from the zero state, ours from "any state": compare after the first constraint lengths
    assert np.array_equal(ours[20:1000], ref[20:1000])


@pytest.mark.parametrize("rate", ["1/2", "3/4"])
def test_g2_convention_override(rng, rate):
    # equipment that inverts G2 before puncturing (or not at rate 1/2), against the standard's rule
    # (CCSDS 131.0-B sec. 3.3/3.4, 130.1-G sec. 4.3 Fig. 4-2): the override decodes it, the default does not
    other = rate != "1/2"
    bits = rng.integers(0, 2, 16000, dtype=np.uint8)
    soft = channel(rng, bits, rate, 6.0, g2_inverted=other)[3:]
    pos = np.arange(soft.size, dtype=np.float64)
    bs = BranchSync(rate=rate, modulation="bpsk", g2_inverted=other)
    assert bs.g2_inverted is other
    ber, _, _ = align((run(bs, soft, pos)[0] < 0).astype(np.uint8), bits)
    assert ber < 1e-3
    wrong = BranchSync(rate=rate, modulation="bpsk")
    ber_wrong, _, _ = align((run(wrong, soft, pos)[0] < 0).astype(np.uint8), bits)
    assert ber_wrong > 0.05


# ---- tracking: slips and phase jumps ------------------------------------------------------------------------
@pytest.mark.parametrize("event", ["delete", "insert", "rotate"])
def test_follows_symbol_slip_and_phase_jump(rng, event):
    rate = "1/2"
    bits = rng.integers(0, 2, 40000, dtype=np.uint8)
    soft = channel(rng, bits, rate, 3.0)
    cut = 30001  # channel index of the event
    if event == "delete":
        soft = np.delete(soft, cut)
    elif event == "insert":
        soft = np.insert(soft, cut, np.float32(0.3))
    else:
        soft = np.concatenate((soft[:cut - 1], rotate(soft[cut - 1:], 1)))
    modulation = "qpsk" if event == "rotate" else "bpsk"
    bs = BranchSync(rate=rate, modulation=modulation)
    out, pos = run(bs, soft, np.arange(soft.size, dtype=np.float64))
    dec = (out < 0).astype(np.uint8)
    assert bs.stats.monitor_triggers >= 1 and bs.stats.switches == 2
    before = pos < cut - 200
    after = pos > cut + 3 * bs.block_bits * 2  # re-acquired within patience + 1 blocks
    assert align(dec[before], bits)[0] < 2e-3
    # after the event the decoded bits match the source again at the shifted index
    k0 = int(np.argmax(after))
    tail = dec[k0:]
    best = min(float(np.mean(tail[: 5000] ^ inv != bits[s: s + 5000])) for s in range(k0 - 4, k0 + 4) for inv in (0, 1))
    assert best < 2e-3


def test_notify_lost_lock_reevaluates_without_break(rng):
    bits = rng.integers(0, 2, 30000, dtype=np.uint8)
    soft = channel(rng, bits, "1/2", 3.0)
    pos = np.arange(soft.size, dtype=np.float64)
    ref = BranchSync(rate="1/2", modulation="bpsk")
    want, _ = run(ref, soft, pos)
    bs = BranchSync(rate="1/2", modulation="bpsk")
    o1, _ = bs.process(soft[:40000], pos[:40000])
    bs.notify_lost_lock()
    o2, _ = bs.process(soft[40000:], pos[40000:])
    o3, _ = bs.flush()
    got = np.concatenate((o1, o2, o3))
    assert bs.stats.lost_lock_notices == 1 and bs.stats.evaluations == 2 and bs.stats.switches == 1
    assert np.array_equal(got, want)  # same hypothesis kept: the decoder ran on without a break


@pytest.mark.parametrize("seed", range(3))
def test_chunking_invariance(seed):
    rng = np.random.default_rng(500 + seed)
    rate = ["1/2", "3/4", "7/8"][seed]
    bits = rng.integers(0, 2, 30000, dtype=np.uint8)
    soft = channel(rng, bits, rate, 4.0)
    soft = np.delete(soft, [9000, 21000 + seed])  # two slips, so that re-evaluations happen
    soft = rotate(soft[1:], seed + 1)
    pos = np.cumsum(rng.uniform(0.9, 1.1, soft.size))
    one = BranchSync(rate=rate, modulation="oqpsk")
    a, pa = run(one, soft, pos)
    many = BranchSync(rate=rate, modulation="oqpsk")
    cuts = rng.choice(np.arange(1, soft.size), size=40, replace=False)
    b, pb = run(many, soft, pos, cuts=cuts)
    assert np.array_equal(a, b) and np.array_equal(pa, pb)
    assert one.stats == many.stats or (np.isnan(one.stats.last_metric) and np.isnan(many.stats.last_metric))
    assert one.events == many.events
    assert one.stats.switches >= 2


def test_uncoded_passthrough(rng):
    soft = rng.normal(size=1000).astype(np.float32)
    pos = np.arange(1000, dtype=np.float64)
    bs = BranchSync(rate="none", modulation="bpsk")
    o, p = bs.process(soft, pos)
    assert np.array_equal(o, soft) and np.array_equal(p, pos)
    o, p = bs.flush()
    assert o.size == 0 and p.size == 0
    bs.notify_lost_lock()
    assert bs.stats.bits_out == 1000


def test_flush_then_new_stream_and_reset(rng):
    bits = rng.integers(0, 2, 6000, dtype=np.uint8)
    soft = channel(rng, bits, "1/2", 4.0)
    pos = np.arange(soft.size, dtype=np.float64)
    bs = BranchSync(rate="1/2", modulation="bpsk")
    a, _ = run(bs, soft, pos)
    b, _ = run(bs, soft, pos)
    assert np.array_equal(a, b) and a.size == bits.size
    bs.reset()
    assert bs.stats.bits_out == 0 and bs.events == []
    tiny_out, _ = run(bs, soft[:40], pos[:40])  # too short to judge: nothing decodable
    assert tiny_out.size == 0 and bs.stats.channel_bits_discarded == 40


@pytest.mark.parametrize(
    "kw,exc,text",
    [
        (dict(rate="4/5", modulation="bpsk"), ValueError, "Argument 'rate' must be one of none | 1/2"),
        (dict(rate="1/2", modulation="fsk"), ValueError, "Argument 'modulation' must be one of bpsk"),
        (dict(rate="1/2", modulation="bpsk", block_bits=10), ValueError,
         "Argument 'block_bits' must be 256..65536, not 10."),
        (dict(rate="1/2", modulation="bpsk", patience=0), ValueError, "Argument 'patience' must be 1..16, not 0."),
        (dict(rate="1/2", modulation="bpsk", acquire_bits=1.5), TypeError,
         "Argument 'acquire_bits' must be an integer"),
    ],
)
def test_bad_arguments(kw, exc, text):
    with pytest.raises(exc, match=text.replace(".", r"\.").replace("|", r"\|")):
        BranchSync(**kw)


def test_bad_process_arguments():
    bs = BranchSync(rate="1/2", modulation="bpsk")
    with pytest.raises(ValueError, match="Argument 'position' must have the length of 'soft'"):
        bs.process(np.zeros(10, np.float32), np.zeros(11))


@pytest.mark.kat
@pytest.mark.parametrize("rate", ["1/2", "2/3", "7/8"])
@pytest.mark.parametrize("g2_inverted", [None, False, True])
def test_kat_reencode_kernel_matches_fec_encoder(rate, g2_inverted):
    # The monitor's own re-encoder (CCSDS 131.0-B-2 sec. 3.3.1 generators; G2 inverted at rate 1/2 only,
    # sec. 3.3 and 3.4, 130.1-G sec. 4.3 Fig. 4-2, or as overridden) against pipeline.fec.conv_encode.
    from pipeline.sync import _branchsync as B
    from pipeline.sync import _kernels

    invert = int(rate == "1/2") if g2_inverted is None else int(g2_inverted)
    rng = np.random.default_rng(3)
    pat = puncture_pattern(rate)
    bits = rng.integers(0, 2, 14 * pat.shape[1], dtype=np.uint8)
    code = conv_encode(bits, rate, g2_inverted=g2_inverted)
    soft = (1.0 - 2.0 * code).astype(np.float32) * rng.uniform(0.5, 2.0, code.size).astype(np.float32)
    block = 2 * pat.shape[1]
    metrics = np.zeros(7, np.float64)
    states = np.zeros(7, np.int64)
    used = _kernels.reencode_metrics(bits, 0, B._G1_MASK, B._G2_MASK, invert, np.ascontiguousarray(pat[0]),
                                     np.ascontiguousarray(pat[1]), B._PARITY, soft, soft[:0], block, metrics, states)
    assert used == code.size
    assert np.allclose(metrics, 1.0)
    # one flipped symbol lowers exactly its block's metric
    soft[1] = -soft[1]
    _kernels.reencode_metrics(bits, 0, B._G1_MASK, B._G2_MASK, invert, np.ascontiguousarray(pat[0]),
                              np.ascontiguousarray(pat[1]), B._PARITY, soft, soft[:0], block, metrics, states)
    assert metrics[0] < 1.0 and np.allclose(metrics[1:], 1.0)
    last = 0
    for b in bits:
        last = ((last << 1) | int(b)) & 63
    assert states[-1] == last


def per_bit_count(pat, i: int) -> int:
    """Channel symbols sent for information bit ``i`` under the puncturing pattern ``pat``."""
    return int(pat[0, i % pat.shape[1]]) + int(pat[1, i % pat.shape[1]])


@pytest.mark.kat
@pytest.mark.parametrize("rate", ["1/2", "3/4"])
def test_kat_reencode_kernel_sums_as_the_obvious_loop(rate):
    # Noisy soft symbols: the kernel's metrics equal, to the last bit, a plain loop that adds +s for a re-encoded
    # bit 0 and -s for a bit 1 in transmission order (the definition, BranchSync Notes; encoder
    # pipeline.fec.conv_encode, CCSDS 131.0-B-2 sec. 3.3 and 3.4), and the last block may be short.
    from pipeline.sync import _branchsync as B
    from pipeline.sync import _kernels

    rng = np.random.default_rng(11)
    pat = puncture_pattern(rate)
    kp = pat.shape[1]
    bits = rng.integers(0, 2, 9 * kp * 4 + kp, dtype=np.uint8)
    code = conv_encode(bits, rate)
    soft = ((1.0 - 2.0 * code) + rng.normal(0.0, 0.8, code.size)).astype(np.float32)
    block = 4 * kp
    n_blocks = -(-bits.size // block)
    metrics, states = np.zeros(n_blocks), np.zeros(n_blocks, np.int64)
    _kernels.reencode_metrics(bits, 0, B._G1_MASK, B._G2_MASK, int(rate == "1/2"), np.ascontiguousarray(pat[0]),
                              np.ascontiguousarray(pat[1]), B._PARITY, soft, soft[:0], block, metrics, states)
    for cut in (0, 1, 7, 8 * kp, 33, soft.size):  # the symbols in two pieces, split anywhere: the same sums
        split, split_states = np.zeros(n_blocks), np.zeros(n_blocks, np.int64)
        _kernels.reencode_metrics(bits, 0, B._G1_MASK, B._G2_MASK, int(rate == "1/2"), np.ascontiguousarray(pat[0]),
                                  np.ascontiguousarray(pat[1]), B._PARITY, soft[:cut], soft[cut:], block, split,
                                  split_states)
        assert np.array_equal(split, metrics) and np.array_equal(split_states, states), cut
    for first in (1, 2, 5):  # resumed at a block boundary with the encoder memory there: the same blocks
        k0 = sum(per_bit_count(pat, i) for i in range(first * block))
        rest, rest_states = np.zeros(n_blocks - first), np.zeros(n_blocks - first, np.int64)
        _kernels.reencode_metrics(bits[first * block :], int(states[first - 1]), B._G1_MASK, B._G2_MASK,
                                  int(rate == "1/2"), np.ascontiguousarray(pat[0]), np.ascontiguousarray(pat[1]),
                                  B._PARITY, soft[k0:], soft[:0], block, rest, rest_states)
        assert np.array_equal(rest, metrics[first:]) and np.array_equal(rest_states, states[first:]), first
    per_bit = [per_bit_count(pat, i) for i in range(bits.size)]
    k = 0
    for j in range(n_blocks):
        corr = mag = 0.0
        for i in range(j * block, min((j + 1) * block, bits.size)):
            for _ in range(per_bit[i]):
                s = float(soft[k])
                corr = corr - s if code[k] else corr + s
                mag += abs(s)
                k += 1
        assert metrics[j] == corr / mag


# ---- uncoded QPSK: rotation by markers --------------------------------------------------------------------
def uncoded_cadu_stream(rng, n_frames, frame_bits=2000):
    from pipeline.fec import ASM

    marker = np.unpackbits(np.frombuffer(ASM, dtype=np.uint8))
    parts = [rng.integers(0, 2, 100, dtype=np.uint8)]
    for _ in range(n_frames):
        parts += [marker, rng.integers(0, 2, frame_bits, dtype=np.uint8)]
    parts.append(rng.integers(0, 2, 1, dtype=np.uint8))  # an odd length: the last bit has no partner
    return np.concatenate(parts)


@pytest.mark.parametrize("turns", [0, 1, 2, 3])
def test_uncoded_qpsk_rotation_resolved_by_markers(rng, turns):
    bits = uncoded_cadu_stream(rng, 40)
    soft = (1.0 - 2.0 * bits).astype(np.float32)
    rx = np.concatenate((rotate(soft, turns), soft[-1:]))
    pos = np.arange(rx.size, dtype=np.float64)
    bs = BranchSync(rate="none", modulation="qpsk", marker_block_bits=8192)
    out, opos = run(bs, rx, pos)
    assert np.array_equal(opos, pos)
    body = out[:-1]
    want = soft[:-1] * (-1 if turns in (2, 3) else 1)  # 180 degrees is left to FrameSync's inverted ASM
    assert np.array_equal(body, want)
    assert bs.stats.switches == (1 if turns in (1, 3) else 0)


def test_uncoded_qpsk_phase_jump_and_chunking(rng):
    bits = uncoded_cadu_stream(rng, 60)
    soft = (1.0 - 2.0 * bits).astype(np.float32)[:-1]
    jump = 70000  # even: a symbol boundary
    rx = np.concatenate((soft[:jump], rotate(soft[jump:], 1)))
    pos = np.arange(rx.size, dtype=np.float64)
    a, _ = run(BranchSync(rate="none", modulation="oqpsk", marker_block_bits=8192), rx, pos)
    bs = BranchSync(rate="none", modulation="oqpsk", marker_block_bits=8192)
    b, _ = run(bs, rx, pos, cuts=rng.choice(np.arange(1, rx.size), 30, replace=False))
    assert np.array_equal(a, b)
    assert bs.stats.switches == 1
    k = bs.events[0].bit_index
    assert jump <= k <= jump + 2 * 8192  # switched within the block after the jump
    assert np.array_equal(b[: jump], soft[: jump]) and np.array_equal(b[k:], soft[k:])


# ---- turbo / LDPC on QPSK: rotation by soft markers ----------------------------------------------------------
# the 64-bit marker of the rate-1/2 turbo code: REFERENCES.md sec. 1 (from memory, not confirmed; it equals the
# first 64 bits of the rate-1/4 marker, CCSDS 131.0-B-2 Fig. 8-4)
TURBO_R12_MARKER = bytes.fromhex("034776C7272895B0")


def turbo_cadu_stream(rng, n_frames, codeword_bits=3576):
    marker = np.unpackbits(np.frombuffer(TURBO_R12_MARKER, dtype=np.uint8))
    parts = [rng.integers(0, 2, 40, dtype=np.uint8)]
    for _ in range(n_frames):
        parts += [marker, rng.integers(0, 2, codeword_bits, dtype=np.uint8)]
    return np.concatenate(parts)


def test_turbo_marker_rotated_by_90_degrees_resembles_itself():
    # why found markers alone cannot pick the rotation: rotated, the 64-bit marker correlates with itself one bit
    # off at 41 of 64, a normalised score of 5.125 against the search threshold of 4.98 (a plain computation)
    from pipeline.sync import soft_search_threshold

    s = 1.0 - 2.0 * np.unpackbits(np.frombuffer(TURBO_R12_MARKER, dtype=np.uint8)).astype(np.float64)
    r = rotate(s.astype(np.float32), 1).astype(np.float64)
    best = np.max(np.abs(np.correlate(np.concatenate((np.zeros(64), r, np.zeros(64))), s, "valid"))) / 8.0
    assert best == pytest.approx(5.125) and best > soft_search_threshold(64)


@pytest.mark.parametrize("transform", ["turn1", "turn2", "turn3", "mirror", "mirror_turn1"])
@pytest.mark.parametrize("esn0_db", [20.0, -1.4])
def test_soft_markers_resolve_the_rotation_of_a_turbo_link(rng, transform, esn0_db):
    # strong signal (the rotated marker scores above the threshold) and the k = 1784 rate-1/2 code's operating
    # point near 1.6 dB Eb/N0 (Es/N0 -1.4 dB per channel bit): the rotation is the one that explains the markers
    bits = turbo_cadu_stream(rng, 60)
    sigma = np.sqrt(1.0 / (2.0 * 10.0 ** (esn0_db / 10.0)))
    soft = (1.0 - 2.0 * bits + rng.normal(0.0, sigma, bits.size)).astype(np.float32)
    if soft.size % 2:
        soft = soft[:-1]
    rx = {"turn1": rotate(soft, 1), "turn2": rotate(soft, 2), "turn3": rotate(soft, 3),
          "mirror": mirror(soft, "swap"), "mirror_turn1": rotate(mirror(soft, "conjugate"), 1)}[transform]
    pos = np.arange(rx.size, dtype=np.float64)
    bs = BranchSync(rate="none", modulation="qpsk", marker_block_bits=16384, asm=TURBO_R12_MARKER,
                    correlation="soft")
    out, opos = run(bs, rx, pos)
    assert np.array_equal(opos, pos)
    # 180 degrees is left to the frame synchronizer (either polarity): the output is the stream or its complement
    assert np.array_equal(np.abs(out), np.abs(soft)) and abs(float(np.mean(np.sign(out) == np.sign(soft))) - 0.5) > 0.49
    # chunking invariance
    out2, _ = run(BranchSync(rate="none", modulation="qpsk", marker_block_bits=16384, asm=TURBO_R12_MARKER,
                             correlation="soft"), rx, pos, cuts=rng.choice(np.arange(1, rx.size), 20, replace=False))
    assert np.array_equal(out, out2)


def test_a_wrong_rotation_showing_markers_is_still_left(rng):
    # noise-free, rotated by 90 degrees: the wrong rotation (the one the receiver starts with) shows soft markers
    # above the threshold, so "keep the rotation while it shows markers" would keep it; the comparison switches
    bits = turbo_cadu_stream(rng, 30)
    soft = (1.0 - 2.0 * bits).astype(np.float32)[: bits.size - bits.size % 2]
    rx = rotate(soft, 1)
    pos = np.arange(rx.size, dtype=np.float64)
    bs = BranchSync(rate="none", modulation="qpsk", marker_block_bits=16384, asm=TURBO_R12_MARKER,
                    correlation="soft")
    assert len(bs._soft_hits(rx[:16384], 8)) > 0  # the wrong rotation's own markers
    out, _ = run(bs, rx, pos)
    assert np.all((out == soft) | (out == -soft)) and abs(float(np.mean(out == soft)) - 0.5) == 0.5
    assert bs.stats.switches == 1



@pytest.mark.parametrize("esn0_db", [20.0, -1.4])
@pytest.mark.parametrize("turns", [1, 3])
def test_a_rotation_change_inside_a_block_switches_at_its_first_marker(rng, esn0_db, turns):
    # a carrier slip inside a block (turbo markers, soft correlation, the marker period given): the output
    # switches at the first marker of the new rotation, not at the next block (3 CADUs of 3640 bits later here)
    bits = turbo_cadu_stream(rng, 40)
    period = 64 + 3576
    sigma = np.sqrt(1.0 / (2.0 * 10.0 ** (esn0_db / 10.0)))
    soft = (1.0 - 2.0 * bits + rng.normal(0.0, sigma, bits.size)).astype(np.float32)[: bits.size - bits.size % 2]
    jump = 3 * 16384 + 5000  # a pair boundary inside the fourth block
    rx = np.concatenate((soft[:jump], rotate(soft[jump:], turns)))
    pos = np.arange(rx.size, dtype=np.float64)

    def sync():
        return BranchSync(rate="none", modulation="qpsk", marker_block_bits=16384, asm=TURBO_R12_MARKER,
                          correlation="soft", marker_period_bits=period)

    bs = sync()
    out, opos = run(bs, rx, pos)
    assert np.array_equal(opos, pos)
    switches = [e.bit_index for e in bs.events]
    assert len(switches) == 1 and jump <= switches[0] <= jump + period + 64 + 3
    k = switches[0]
    assert np.array_equal(np.abs(out[k:]), np.abs(soft[k:]))  # the stream (or its complement) from the switch on
    assert abs(float(np.mean(np.sign(out[k:]) == np.sign(soft[k:]))) - 0.5) > 0.49
    assert np.array_equal(out[:jump], soft[:jump])
    out2, _ = run(sync(), rx, pos, cuts=rng.choice(np.arange(1, rx.size), 25, replace=False))  # chunking
    assert np.array_equal(out, out2)


def test_channel_bits_lost_and_a_rotation_change_inside_a_block(rng):
    # samples dropped: 274 channel bits gone (the marker grid moves) and the carrier phase jumps with them
    # (hard-correlation link, the 32-bit ASM, 2000-bit frames): switched at the first marker after the loss
    bits = uncoded_cadu_stream(rng, 60)
    soft = (1.0 - 2.0 * bits).astype(np.float32)[:-1]
    cut_at = 4 * 8192 + 3000
    rx = np.concatenate((soft[:cut_at], rotate(soft[cut_at + 274:], 1)))
    pos = np.arange(rx.size, dtype=np.float64)
    bs = BranchSync(rate="none", modulation="qpsk", marker_block_bits=8192, marker_period_bits=2032)
    out, _ = run(bs, rx, pos)
    switches = [e.bit_index for e in bs.events]
    assert len(switches) == 1 and cut_at <= switches[0] <= cut_at + 2032 + 32
    k = switches[0]
    assert np.array_equal(out[k:], soft[k + 274:])
    assert np.array_equal(out[:cut_at], soft[:cut_at])


def test_soft_marker_arguments():
    with pytest.raises(ValueError, match="'correlation' must be 'hard' or 'soft'"):
        BranchSync(rate="none", modulation="qpsk", correlation="fuzzy")
    with pytest.raises(ValueError, match="'marker_threshold' must be in"):
        BranchSync(rate="none", modulation="qpsk", correlation="soft", marker_threshold=9.0)
    with pytest.raises(ValueError, match="'marker_period_bits' must be"):
        BranchSync(rate="5/6", modulation="qpsk", marker_period_bits=10)
    with pytest.raises(TypeError, match="'nrz_m' must be True or False"):
        BranchSync(rate="5/6", modulation="qpsk", nrz_m="yes")


def test_noise_then_signal_is_acquired_when_it_appears(rng):
    # Pure noise first: every evaluation is undecided (provisional choice), re-evaluated with back-off;
    # when the coded signal starts, the right alignment is found even if the noise pick was wrong.
    bits = rng.integers(0, 2, 30000, dtype=np.uint8)
    noise = rng.normal(0, 1.0, 30001).astype(np.float32)  # odd: the signal starts on the other alignment
    soft = np.concatenate((noise, channel(rng, bits, "1/2", 4.0)))
    pos = np.arange(soft.size, dtype=np.float64)
    bs = BranchSync(rate="1/2", modulation="bpsk")
    out, opos = run(bs, soft, pos)
    assert bs.stats.undecided_evaluations >= 2
    late = opos > noise.size + 40000
    dec = (out < 0).astype(np.uint8)[late]
    first = int(opos[late][0]) - noise.size  # channel index, within the signal, of that branch
    assert first % 2 == 0  # branches start on C1 symbols again
    k = first // 2
    assert float(np.mean(dec[:5000] != bits[k: k + 5000])) < 2e-3


def oqpsk_rotated(soft):
    """An OQPSK stream after a 90-degree rotation once the timing has re-paired Q_k with I_(k+1):
    received bits -c1, c2, -c3, c4, ... (common practice, no published source)."""
    rx = soft[1:].copy()
    rx[0::2] *= -1
    return rx


@pytest.mark.parametrize("rate", ["1/2", "3/4"])
def test_oqpsk_rotation_with_repairing(rng, rate):
    bits = rng.integers(0, 2, 20000, dtype=np.uint8)
    soft = channel(rng, bits, rate, 4.0)
    rx = oqpsk_rotated(soft)
    bs = BranchSync(rate=rate, modulation="oqpsk")
    out, _ = run(bs, rx, np.arange(rx.size, dtype=np.float64))
    assert "Q inverted" in bs.events[0].detail
    ber, shift, inv = align((out < 0).astype(np.uint8), bits)
    assert ber < 2e-3


def test_uncoded_oqpsk_rotation_with_repairing(rng):
    bits = uncoded_cadu_stream(rng, 20)
    soft = (1.0 - 2.0 * bits).astype(np.float32)
    rx = oqpsk_rotated(soft)
    bs = BranchSync(rate="none", modulation="oqpsk", marker_block_bits=8192)
    out, _ = run(bs, rx, np.arange(rx.size, dtype=np.float64))
    assert bs.stats.switches == 1 and "Q inverted" in bs.events[0].detail
    assert np.array_equal(out[: rx.size - 1] * -1, soft[1: rx.size])  # upright up to the 180-degree case


# ---- issue 14: mirror images, signal onset, fades, OQPSK time reference -------------------------------------

def mirror(soft, kind):
    """A spectrally inverted QPSK stream: the conjugate (Q inverted) or I and Q swapped, on (I, Q) pairs."""
    pr = soft[: soft.size // 2 * 2].reshape(-1, 2).copy()
    pr = np.stack((pr[:, 0], -pr[:, 1]), axis=1) if kind == "conjugate" else pr[:, ::-1]
    return pr.ravel()


@pytest.mark.parametrize("kind", ["conjugate", "swap"])
@pytest.mark.parametrize("turns", [0, 1])
def test_mirrored_qpsk_is_decoded(rng, kind, turns):
    """Conjugate: I + jQ -> I - jQ; swapped: Q + jI = j conj(I + jQ) (common practice, no published source)."""
    bits = rng.integers(0, 2, 16000, dtype=np.uint8)
    soft = rotate(mirror(channel(rng, bits, "1/2", 3.0), kind), turns)
    pos = np.arange(soft.size, dtype=np.float64)
    bs = BranchSync(rate="1/2", modulation="qpsk")
    a, _ = bs.process(soft, pos)
    assert bs.mirrored is True and "spectrum inverted" in bs.events[0].detail
    out = np.concatenate((a, bs.flush()[0]))
    ber, _, _ = align((out < 0).astype(np.uint8), bits)
    assert ber < 2e-3
    upright = BranchSync(rate="1/2", modulation="qpsk", mirror=False)
    out, _ = run(upright, soft, pos)
    assert align((out < 0).astype(np.uint8), bits)[0] > 0.2  # without the mirror hypotheses: nothing
    plain = BranchSync(rate="1/2", modulation="qpsk")
    plain.process(rotate(channel(rng, bits, "1/2", 3.0), turns), pos)
    assert plain.mirrored is False


def test_uncoded_mirrored_qpsk_by_markers(rng):
    bits = uncoded_cadu_stream(rng, 20)
    soft = mirror((1.0 - 2.0 * bits).astype(np.float32), "swap")
    bs = BranchSync(rate="none", modulation="qpsk", marker_block_bits=8192)
    out, _ = run(bs, soft, np.arange(soft.size, dtype=np.float64))
    n = soft.size
    assert np.array_equal(np.abs(out[8192:n]), np.abs(soft[8192:n]))
    assert np.array_equal(out[8192:n] < 0, bits[8192:n].astype(bool)) or np.array_equal(
        out[8192:n] >= 0, bits[8192:n].astype(bool))


@pytest.mark.parametrize("modulation, noise_bits", [("bpsk", 300_001), ("qpsk", 123_458)])
def test_signal_onset_decoded_from_its_start(rng, modulation, noise_bits):
    """After a long stretch of noise the hypothesis is chosen on the signal and the held stretch decoded under
    it: the decoded bits are right from a few constraint lengths after the onset on."""
    bits = rng.integers(0, 2, 20000, dtype=np.uint8)
    signal = channel(rng, bits, "1/2", 3.0)
    if modulation == "qpsk":
        signal = rotate(signal, 1)
    noise = rng.normal(0, 1.2, noise_bits).astype(np.float32)
    soft = np.concatenate((noise, signal))
    pos = np.arange(soft.size, dtype=np.float64)
    bs = BranchSync(rate="1/2", modulation=modulation)
    out, opos = run(bs, soft, pos)
    late = opos >= noise_bits
    first = int(opos[late][0]) - noise_bits
    assert first < 8  # decoding under the right hypothesis reaches back to the onset
    k = first // 2
    dec = (out[late] < 0).astype(np.uint8)[: bits.size - k]
    assert float(np.mean(dec[40:] != bits[k + 40:k + dec.size])) < 2e-3  # right after the decoder's start-up
    # one evaluation per block of 4096 channel bits while undecided, and on noise they cost no decoding
    assert bs.stats.quiet_evaluations >= noise_bits // 4096 - 3 and bs.stats.evaluations <= 6


def test_onset_and_fade_chunking_invariance(rng):
    bits = rng.integers(0, 2, 30000, dtype=np.uint8)
    sig = rotate(channel(rng, bits, "1/2", 3.0), 3)
    soft = np.concatenate((rng.normal(0, 1, 40001), sig[:30000], rng.normal(0, 1, 20000),
                           rotate(sig[30000:], 1))).astype(np.float32)  # a fade with a 90-degree slip
    pos = np.arange(soft.size, dtype=np.float64)
    one = BranchSync(rate="1/2", modulation="qpsk")
    a, pa = run(one, soft, pos)
    many = BranchSync(rate="1/2", modulation="qpsk")
    b, pb = run(many, soft, pos, cuts=rng.choice(np.arange(1, soft.size), size=60, replace=False))
    assert np.array_equal(a, b) and np.array_equal(pa, pb) and one.events == many.events
    # after the fade the new rotation is decoded from the fade's end on (the held blocks decoded again)
    end = 40001 + 30000 + 20000
    after = pa >= end
    assert int(pa[after][0]) - end < 8 and one.stats.redecoded_bits > 0
    k = (int(pa[after][0]) - 40001 - 20000) // 2
    dec = (a[after] < 0).astype(np.uint8)
    assert float(np.mean(dec[40:4000] != bits[k + 40:k + 4000])) < 2e-3 or float(
        np.mean(dec[40:4000] == bits[k + 40:k + 4000])) < 2e-3  # upright or complemented (FrameSync's ASM)


def test_oqpsk_branches_are_timed_by_the_i_rail():
    """Rate 3/4 on OQPSK: a branch whose first channel bit is on the Q rail takes the I pulse of its symbol.
    The demodulator times I bits at k T and Q bits at (k + 1/2) T: every decoded bit comes out at a whole k."""
    rng = np.random.default_rng(77)
    bits = rng.integers(0, 2, 12000, dtype=np.uint8)
    soft = channel(rng, bits, "3/4", 5.0)
    soft = soft[: soft.size // 2 * 2]
    pos = np.arange(soft.size) // 2 + 0.5 * (np.arange(soft.size) % 2)  # own-rail pulse peaks
    bs = BranchSync(rate="3/4", modulation="oqpsk")
    out, opos = run(bs, soft, pos.astype(np.float64))
    assert align((out < 0).astype(np.uint8), bits)[0] < 2e-3
    assert np.all(opos == np.floor(opos))
    qpsk = BranchSync(rate="3/4", modulation="qpsk")  # QPSK: the positions as given (both bits one symbol)
    _, qpos = run(qpsk, soft, pos.astype(np.float64))
    assert np.any(qpos != np.floor(qpos))


@pytest.mark.kat
@pytest.mark.parametrize("rate", ["1/2", "2/3", "3/4", "7/8"])
def test_kat_branch_output_kernel_matches_the_branch_index(rate):
    """branch_output: each bit's position is that of the first channel symbol of its branch, as counted by
    the puncturing pattern (CCSDS 131.0-B-2 sec. 3.4, Table 3-1; pipeline.fec.conv_bit_symbol_index), and
    its value +1.0 for bit 0 / -1.0 for bit 1."""
    from pipeline.sync import _kernels

    pat = puncture_pattern(rate)
    kp, P = pat.shape[1], int(pat.sum())
    period_index = np.ascontiguousarray(conv_bit_symbol_index(kp, rate), dtype=np.int64)
    bits = np.array([0, 1, 1, 0, 1, 0, 0, 0, 1, 1, 1], dtype=np.uint8)  # not a whole number of periods
    raw_pos = np.arange(100, dtype=np.float64) * 0.5 + 7.0
    first = 3
    want_pos = raw_pos[first + conv_bit_symbol_index(bits.size, rate)]
    for cut in (0, 4, 9, 10, 25, 100):  # the positions in two pieces, split anywhere
        signs, pos = np.empty(bits.size, np.float32), np.empty(bits.size, np.float64)
        _kernels.branch_output(bits, raw_pos[:cut], raw_pos[cut:], first, period_index, P, signs, pos)
        assert np.array_equal(pos, want_pos), cut
        assert signs.tolist() == [1.0 - 2.0 * b for b in bits.tolist()]


def test_memory_follows_the_calls_not_the_stream(rng):
    """Constant memory on a stream: between calls only the channel bits still needed are held (at most a decoder
    block and a few monitored blocks, whatever the call sizes), in arrays of their own (the caller's input is not
    kept), and the output equals one decode of the whole (common practice, no published source)."""
    bits = rng.integers(0, 2, 300000, dtype=np.uint8)
    soft = channel(rng, bits, "1/2", 5.0)
    pos = np.arange(soft.size, dtype=np.float64)
    whole, whole_pos = run(BranchSync(rate="1/2", modulation="bpsk"), soft, pos)
    bs = BranchSync(rate="1/2", modulation="bpsk")
    outs = [bs.process(soft[:240000], pos[:240000])]
    held = [bs._soft_kept.size]
    for a in range(240000, soft.size, 500):
        outs.append(bs.process(soft[a : a + 500], pos[a : a + 500]))
        held.append(bs._soft_kept.size)
        assert bs._soft_new.size == 0 and bs._soft_kept.base is None and bs._pos_kept.base is None
    assert max(held) <= bs._dec._block_symbols + 4 * bs._block_symbols
    outs.append(bs.flush())
    assert np.array_equal(np.concatenate([o[0] for o in outs]), whole)
    assert np.array_equal(np.concatenate([o[1] for o in outs]), whole_pos)


def _rotated_reference(pairs: np.ndarray, rotation: int) -> np.ndarray:
    """The rotation hypotheses as plain column assignments: 1 (a, b) -> (b, -a), 2 -> (a, -b), 3 -> (b, a)."""
    out = np.empty_like(pairs)
    a, b = pairs[:, 0], pairs[:, 1]
    out[:, 0] = a if rotation == 2 else b
    out[:, 1] = {1: -a, 2: -b, 3: a}[rotation]
    return out.reshape(-1)


@pytest.mark.kat
@pytest.mark.parametrize("rotation", [1, 2, 3])
@pytest.mark.parametrize("split", [0, 1, 2, 7, 10, 12])
def test_rotated_pairs_matches_column_assignments_across_a_split(rng, rotation, split):
    # the soft bits held in two pieces (kept and new) that may split a pair: the same values, bit for bit, as
    # joining them and rotating the pairs column by column
    soft = rng.standard_normal(12).astype(np.float32)
    soft[3] = 0.0  # an erasure keeps its sign bit as numpy's negation gives it
    out = np.empty(12, np.float32)
    rotated_pairs(soft[:split], soft[split:], rotation, out)
    ref = _rotated_reference(soft.reshape(-1, 2), rotation)
    assert np.array_equal(out.view(np.uint32), ref.view(np.uint32))


@pytest.mark.kat
def test_near_marker_scores_match_the_scores_one_offset_at_a_time(rng):
    # the largest |score| within 3 offsets of each place, and where (the first of equals), against marker_scores
    # offset by offset; places at both ends of the array, where fewer offsets fit, and one where none does
    sign = 1.0 - 2.0 * rng.integers(0, 2, 32).astype(np.float64)
    soft = rng.normal(0.0, 1.0, 400).astype(np.float32)
    soft[100:132] = sign  # a marker at 100
    places = np.array([0, 2, 98, 101, 250, 365, 368, 372, 399], dtype=np.int64)
    scores, offsets = np.empty(places.size), np.empty(places.size, np.int64)
    near_marker_scores(soft, places, 3, sign, scores, offsets)
    m = sign.size
    for p, sc, at in zip(places, scores, offsets):
        lo, hi = max(p - 3, 0), min(p + 3, soft.size - m)
        if hi < lo:
            assert (sc, at) == (0.0, p)
            continue
        out = np.empty(hi - lo + 1)
        marker_scores(soft, lo, hi - lo + 1, sign, out)
        j = int(np.argmax(np.abs(out)))
        assert sc == abs(out[j]) and at == lo + j
    assert offsets[2] == 100 and scores[2] == pytest.approx(np.sqrt(32.0))
