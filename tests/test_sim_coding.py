"""pipeline.sim.ChannelCoder: frames -> channel bits, against references built from outside sources."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.profile import LinkProfile
from pipeline.sim import ChannelCoder

ASM = bytes.fromhex("1ACFFC1D")  # CCSDS 131.0-B-2 sec. 8 / REFERENCES.md sec. 1.1

# CCSDS punctured patterns (REFERENCES.md sec. 1.2: 130.1-G-1 Table 4-1, Wikipedia table), C1 row, C2 row
PATTERNS = {"2/3": ("10", "11"), "3/4": ("101", "110"), "5/6": ("10101", "11010"), "7/8": ("1000101", "1111010")}


def _profile(*, conv="1/2", rs=16, interleave=5, randomizer=True, length=1115, line="nrz-l",
             g2_inverted=None) -> LinkProfile:
    return LinkProfile().with_changes(
        link={"line_code": line},
        coding={"convolutional": conv, "reed_solomon": rs, "interleave": interleave, "randomizer": randomizer,
                "convolutional_g2_inverted": g2_inverted},
        frames={"length": length},
    )


def _frames(rng, n, length):
    return [rng.integers(0, 256, length, dtype=np.uint8).tobytes() for _ in range(n)]


def _ref_conv(bits: np.ndarray, invert: bool = True) -> np.ndarray:
    """K=7 r=1/2 mother code (171, 133 octal, C1 first) as a plain shift register (REFERENCES.md sec. 1.2).

    ``invert``: the G2 output inverted, as the rate-1/2 code does (CCSDS 131.0-B sec. 3.3); the
    punctured codes puncture the mother code without it (sec. 3.4; 130.1-G sec. 4.3, Fig. 4-2).
    """
    reg = [0] * 6
    out = np.empty(2 * bits.size, np.uint8)
    for n, b in enumerate(bits.tolist()):
        r = [b] + reg
        out[2 * n] = (r[0] ^ r[1] ^ r[2] ^ r[3] ^ r[6]) & 1  # G1 = 1111001
        out[2 * n + 1] = (r[0] ^ r[2] ^ r[3] ^ r[5] ^ r[6] ^ int(invert)) & 1  # G2 = 1011011
        reg = r[:6]
    return out


def _ref_puncture(c: np.ndarray, rate: str) -> np.ndarray:
    """Column-by-column read-out of the CCSDS pattern (C1 before C2), REFERENCES.md sec. 1.2."""
    p1, p2 = PATTERNS[rate]
    period = len(p1)
    out = []
    for k in range(c.size // 2):
        col = k % period
        if p1[col] == "1":
            out.append(c[2 * k])
        if p2[col] == "1":
            out.append(c[2 * k + 1])
    return np.array(out, np.uint8)


def _ref_cadus(frames, e, interleave, randomize) -> np.ndarray:
    from third_party_tx import pn_bytes, rs_codeblock  # reedsolo (PyPI) RS, bit-by-bit LFSR randomizer

    out = []
    for f in frames:
        block = rs_codeblock(f, e, interleave) if e else f
        if randomize:
            block = bytes(a ^ b for a, b in zip(block, pn_bytes(len(block))))
        out.append(np.unpackbits(np.frombuffer(ASM + block, np.uint8)))
    return np.concatenate(out)


@pytest.mark.kat
def test_encoded_asm_from_zero_state_and_invariant_part():
    prof = _profile(rs=0, randomizer=False, length=40)
    coder = ChannelCoder(prof)
    out = coder.process([bytes(range(40))] * 3)
    bits = out.bits
    assert np.packbits(bits[:64]).tobytes().hex() == "56081c971aa73d3e"  # REFERENCES.md sec. 10.3
    inv = np.array([int(c) for c in "1000000111001001011100011010101001110011110100111110"], np.uint8)
    assert list(out.asm_bits) == [0, 2 * 8 * 44, 4 * 8 * 44]
    for a in out.asm_bits:
        # the last 52 of the 64 ASM symbols do not depend on the prior state (REFERENCES.md sec. 10.3)
        assert np.array_equal(bits[a + 12:a + 64], inv)


@pytest.mark.kat
def test_uncoded_asm_positions():
    prof = _profile(conv="none", rs=0, randomizer=True, length=30)
    out = ChannelCoder(prof).process([bytes(30)] * 2)
    assert out.bits.size == 2 * 8 * 34
    for a in out.asm_bits:
        assert np.packbits(out.bits[a:a + 32]).tobytes() == ASM
    # randomized zero frame = the PN sequence, FF 48 0E C0 9A ... (REFERENCES.md sec. 1.4)
    assert np.packbits(out.bits[32:72]).tobytes() == bytes.fromhex("FF480EC09A")


@pytest.mark.parametrize("e,interleave,length", [(16, 5, 1115), (16, 5, 1000), (8, 1, 200), (16, 8, 1784),
                                                 (8, 3, 717)])
def test_concatenated_against_reedsolo_reference(rng, e, interleave, length):
    prof = _profile(rs=e, interleave=interleave, length=length)
    frames = _frames(rng, 3, length)
    out = ChannelCoder(prof).process(frames)
    want = _ref_conv(_ref_cadus(frames, e, interleave, True))
    assert np.array_equal(out.bits, want)
    # virtual fill: the transmitted codeblock is the frame plus 2 E I octets (131.0-B-2 sec. 4.3.7)
    assert out.bits.size == 3 * 2 * 8 * (4 + length + 2 * e * interleave)


@pytest.mark.parametrize("rate", sorted(PATTERNS))
def test_punctured_rates_against_reference(rng, rate):
    prof = _profile(conv=rate, rs=16, interleave=1, length=223)
    frames = _frames(rng, 3, 223)
    coder = ChannelCoder(prof)
    out = coder.process(frames)
    # no G2 inversion on the punctured codes (CCSDS 131.0-B sec. 3.4; 130.1-G sec. 4.3, Fig. 4-2)
    full = _ref_conv(_ref_cadus(frames, 16, 1, True), invert=False)
    want = _ref_puncture(full, rate)
    assert np.array_equal(out.bits[:want.size], want)
    # [coding] convolutional_g2_inverted = true: equipment that inverts before puncturing
    inv = ChannelCoder(_profile(conv=rate, rs=16, interleave=1, length=223, g2_inverted=True)).process(frames)
    want_inv = _ref_puncture(_ref_conv(_ref_cadus(frames, 16, 1, True), invert=True), rate)
    assert np.array_equal(inv.bits[:want_inv.size], want_inv)
    # the index of each ASM's first channel symbol = symbols sent for all earlier CADU bits
    p1, p2 = PATTERNS[rate]
    per_col = [int(a) + int(b) for a, b in zip(p1, p2)]
    cadu_bits = 8 * (4 + 223 + 32)
    for j, a in enumerate(out.asm_bits):
        assert a == sum(per_col[k % len(per_col)] for k in range(j * cadu_bits))


@pytest.mark.parametrize("conv,nrzm_at", [("1/2", "encoder_input"), ("1/2", "channel"), ("none", "encoder_input"),
                                          ("3/4", "encoder_input")])
def test_nrzm(rng, conv, nrzm_at):
    prof = _profile(conv=conv, rs=8, interleave=2, length=400, line="nrz-m")
    frames = _frames(rng, 3, 400)
    out = ChannelCoder(prof, nrzm_at=nrzm_at).process(frames)
    cadus = _ref_cadus(frames, 8, 2, True)
    diff = lambda b: (np.cumsum(b) & 1).astype(np.uint8)  # noqa: E731  NRZ-M: a 1 is a change (131.0-B-2 3.3.3)
    if conv == "none":
        want = diff(cadus)
    elif nrzm_at == "encoder_input":
        want = _ref_conv(diff(cadus), invert=conv == "1/2")  # 131.0-B-2 sec. 3.3.3: conversion at the encoder input
        if conv != "1/2":
            want = _ref_puncture(want, conv)
    else:
        want = diff(_ref_conv(cadus))
    assert np.array_equal(out.bits[:want.size], want)


@pytest.mark.parametrize("conv,line", [("1/2", "nrz-m"), ("7/8", "nrz-l"), ("none", "nrz-m")])
def test_chunking_invariance(rng, conv, line):
    prof = _profile(conv=conv, rs=16, interleave=2, length=300, line=line)
    frames = _frames(rng, 12, 300)
    one = ChannelCoder(prof).process(frames)
    coder = ChannelCoder(prof)
    cuts = np.sort(rng.integers(0, 12, 4))
    bits, asm = [], []
    for part in np.split(np.arange(12), cuts):
        o = coder.process([frames[i] for i in part])
        assert o.first_bit == sum(b.size for b in bits)
        bits.append(o.bits)
        asm.append(o.asm_bits)
    assert np.array_equal(np.concatenate(bits), one.bits)
    assert np.array_equal(np.concatenate(asm), one.asm_bits)
    coder.reset()
    assert np.array_equal(coder.process(frames).bits, one.bits)


def test_coder_argument_errors():
    with pytest.raises(ValueError, match="Argument 'nrzm_at'"):
        ChannelCoder(_profile(), nrzm_at="after")
    with pytest.raises(ValueError, match="Argument 'frames' items must be 1115 octets, not 3"):
        ChannelCoder(_profile()).process([b"abc"])
    with pytest.raises(TypeError, match="Argument 'profile'"):
        ChannelCoder("tamarisk")


@pytest.mark.parametrize("rate, randomizer", [("1/2", True), ("1/3", True), ("1/6", False)])
def test_turbo_cadus_equal_the_independent_transmitter(rate, randomizer):
    # tests/third_party_tx.py: the standard's shift registers and interleaver formula, the markers typed in
    # from REFERENCES.md 13.4, the randomizer restarted per codeword ([TM-SC] sec. 6, 8.3, 9)
    import third_party_tx as tx

    rng = np.random.default_rng(7)
    prof = LinkProfile().with_changes(coding={"convolutional": "none", "reed_solomon": 0, "turbo": rate,
                                              "turbo_k": 1784, "randomizer": randomizer},
                                      frames={"length": 223, "fecf": True})
    frames = _frames(rng, 3, 223)
    coder = ChannelCoder(prof)
    out = coder.process(frames)
    ref = tx.turbo_channel_bits(frames, rate=rate, randomize=randomizer, lead_bits=0, tail_bits=0)
    assert np.array_equal(out.bits, ref)
    cadu = prof.cadu_bits
    assert coder.cadu_bits == cadu and out.asm_bits.tolist() == [0, cadu, 2 * cadu]
    with pytest.raises(ValueError, match="use cadu_bit_rows"):
        coder.codeblock(frames[0])
