"""An independent CCSDS transmitter for the tests, sharing no code with pipeline/.

It builds channel bits from packets with outside references only, so the simulator and the decoder
cannot share one mistake (issue 5):

- Reed-Solomon parity from ``reedsolo`` (PyPI) configured for CCSDS as in ../shared/REFERENCES.md
  sec. 10.2 (``generator`` is the field element 0xAD = alpha^11, ``fcr = 128 - E``), with the
  dual-basis conversion tables printed there (CCSDS 131.0-B-2 p. 4-6 matrices, tables computed).
- Randomizer from the LFSR definition h(x) = x^8 + x^7 + x^5 + x^3 + 1, all-ones seed
  (CCSDS 131.0-B-2 sec. 9 / REFERENCES.md sec. 1.4), written here bit by bit.
- Convolutional code K = 7, G1 = 171, G2 = 133 (octal), C1 first (CCSDS 131.0-B-2 sec. 3.3), written
  here as a plain shift register; G2 inverted for the rate-1/2 code only ("Symbol inversion: On output
  path of G2", sec. 3.3).  The punctured codes (2/3, 3/4, 5/6, 7/8; sec. 3.4, Table 3-2 patterns) puncture
  the same register's outputs with no inversion: the punctured encoder of CCSDS 130.1-G sec. 4.3,
  Fig. 4-2, has no inverter.
- Turbo codes (CCSDS 131.0-B-2 sec. 6, REFERENCES.md sec. 1.5, 13.3, 13.4): two 4-cell shift
  registers with the feedback and forward vectors typed in as strings, the interleaver formula
  evaluated one index at a time, the outputs multiplexed per rate by explicit loops, the rate's
  marker typed in from REFERENCES.md 13.4, the randomizer restarted for every codeword.
- LDPC codes (CCSDS 131.0-B-2 sec. 7, REFERENCES.md sec. 13.1, 13.2): the parity-check matrices built here
  from the tables typed in (C2 Table 7-1 and its two expurgation checks; the AR4JA rate-1/2 block layout with
  theta and phi for M = 512), and a systematic encoder found by plain Gauss-Jordan elimination over GF(2) on
  the parity columns (not the generator recipe of sec. 7.3.4 / 7.4.3 the pipeline uses); the ASM in front
  and the randomizer restarted for every codeword (REFERENCES.md sec. 13.4).
- CRC-16 FECF from ``crccheck`` (PyPI, CRC-16/IBM-3740 = CCSDS 132.0-B sec. 4.1.6).
- TM frame and space packet headers from the bit layouts in REFERENCES.md sec. 3 and sec. 5
  (from memory, not confirmed there; cross-checked against the worked examples).
"""

from __future__ import annotations

import functools

import numpy as np

# Conventional -> dual (T_alpha_l) and dual -> conventional, as printed in REFERENCES.md sec. 10.2
# (computed there from the CCSDS 131.0-B-2 p. 4-6 matrices).
TAL = bytes.fromhex(
    "007BAFD499E2364DFA81552E6318CCB7"
    "86FD29521F64B0CB7C07D3A8E59E4A31"
    "EC974338750EDAA1166DB9C28FF4205B"
    "6A11C5BEF3885C2790EB3F440972A6DD"
    "EF94403B760DD9A2156EBAC18CF72358"
    "6912C6BDF08B5F2493E83C470A71A5DE"
    "0378ACD79AE1354EF982562D601BCFB4"
    "85FE2A511C67B3C87F04D0ABE69D4932"
    "8DF62259146FBBC0770CD8A3EE95413A"
    "0B70A4DF92E93D46F18A5E256813C7BC"
    "611ACEB5F883572C9BE0344F0279ADD6"
    "E79C48337E05D1AA1D66B2C984FF2B50"
    "6219CDB6FB80542F98E3374C017AAED5"
    "E49F4B307D06D2A91E65B1CA87FC2853"
    "8EF5215A176CB8C3740FDBA0ED964239"
    "0873A7DC91EA3E45F2895D266B10C4BF"
)
TAL_INV = bytes.fromhex(
    "00CCAC6079B5D519F03C5C90894525E9"
    "FD31519D844828E40DC1A16D74B8D814"
    "2EE2824E579BFB37DE1272BEA76B0BC7"
    "D31F7FB3AA6606CA23EF8F435A96F63A"
    "428EEE223BF7975BB27E1ED2CB0767AB"
    "BF7313DFC60A6AA64F83E32F36FA9A56"
    "6CA0C00C15D9B9759C5030FCE5294985"
    "915D3DF1E824448861ADCD0118D4B478"
    "C50969A5BC7010DC35F999554C80E02C"
    "38F49458418DED21C80464A8B17D1DD1"
    "EB27478B925E3EF21BD7B77B62AECE02"
    "16DABA766FA3C30FE62A4A869F5333FF"
    "874B2BE7FE32529E77BBDB170EC2A26E"
    "7AB6D61A03CFAF638A4626EAF33F5F93"
    "A96505C9D01C7CB05995F53920EC8C40"
    "5498F8342DE1814DA46808C4DD1171BD"
)
assert all(TAL_INV[TAL[x]] == x for x in range(256))


@functools.cache
def pn_bytes(n: int) -> bytes:
    """CCSDS TM pseudo-randomizer, h(x) = x^8+x^7+x^5+x^3+1, all-ones seed, MSB first."""
    a = [1] * 8
    out = bytearray()
    bits = []
    while len(out) < n:
        bits.append(a[0])
        # a_k = a_{k-8} xor a_{k-5} xor a_{k-3} xor a_{k-1}: REFERENCES.md sec. 10.1
        nxt = a[0] ^ a[3] ^ a[5] ^ a[7]
        a = a[1:] + [nxt]
        if len(bits) == 8:
            v = 0
            for b in bits:
                v = (v << 1) | b
            out.append(v)
            bits = []
    return bytes(out)


@functools.lru_cache(maxsize=4096)
def rs_codeblock(frame: bytes, e: int, interleave: int) -> bytes:
    """Frame + interleaved RS parity (dual basis), with virtual fill if the frame is short."""
    import reedsolo

    k = 255 - 2 * e
    codec = reedsolo.RSCodec(nsym=2 * e, nsize=255, fcr=128 - e, prim=0x187, generator=0xAD, c_exp=8)
    assert len(frame) % interleave == 0
    n_data = len(frame) // interleave
    assert n_data <= k
    parity = []
    for j in range(interleave):
        data_dual = frame[j::interleave]
        data_conv = bytes(TAL_INV[b] for b in data_dual)
        cw = codec.encode(data_conv)
        parity.append(bytes(TAL[b] for b in cw[n_data:]))
    out = bytearray(frame)
    for i in range(2 * e):
        for j in range(interleave):
            out.append(parity[j][i])
    return bytes(out)


def conv_encode_r12(bits: np.ndarray, state: int = 0, invert_g2: bool = True) -> tuple[np.ndarray, int]:
    """K=7 r=1/2, G1=171, G2=133 octal, C1 first; G2 inverted unless ``invert_g2`` is False.

    ``state`` = the last 6 input bits before ``bits`` (bit 5 the newest).  Each output is the
    modulo-2 convolution of the input with the generator's taps (tap 0 = the current input bit), as
    the shift register of CCSDS 131.0-B Fig. 3-1 computes it.
    """
    g1 = np.array([1, 1, 1, 1, 0, 0, 1])
    g2 = np.array([1, 0, 1, 1, 0, 1, 1])
    prior = [(state >> k) & 1 for k in range(6)]  # oldest first
    x = np.concatenate([np.array(prior, dtype=np.int64), np.asarray(bits, dtype=np.int64)])
    n = len(bits)
    out = np.empty(2 * n, dtype=np.uint8)
    out[0::2] = (np.convolve(x, g1)[6:6 + n] & 1).astype(np.uint8)
    out[1::2] = ((np.convolve(x, g2)[6:6 + n] & 1) ^ int(invert_g2)).astype(np.uint8)
    new_state = sum(int(b) << k for k, b in enumerate(x[-6:]))
    return out, new_state


# CCSDS 131.0-B sec. 3.4, Table 3-2: per rate the C1 row and the C2 row of the puncturing matrix
# (1 = sent); the symbols of one column go out C1 first.  7/8 is 1000101 / 1111010 (not the
# 1010101 / 1101010 pair some general references print).
PUNCTURING = {"2/3": ("10", "11"), "3/4": ("101", "110"), "5/6": ("10101", "11010"),
              "7/8": ("1000101", "1111010")}


def conv_encode(bits: np.ndarray, rate: str, g2_inverted: bool | None = None) -> np.ndarray:
    """CCSDS convolutional code of ``rate`` from the zero state.

    G2 inverted at rate 1/2 only (131.0-B sec. 3.3 and 3.4; 130.1-G Fig. 4-2), unless ``g2_inverted``
    says otherwise (equipment that differs).
    """
    invert = (rate == "1/2") if g2_inverted is None else bool(g2_inverted)
    mother, _ = conv_encode_r12(bits, 0, invert)
    if rate == "1/2":
        return mother
    c1_row, c2_row = PUNCTURING[rate]
    out = []
    for k in range(len(bits)):
        col = k % len(c1_row)
        if c1_row[col] == "1":
            out.append(mother[2 * k])
        if c2_row[col] == "1":
            out.append(mother[2 * k + 1])
    return np.array(out, dtype=np.uint8)


def crc16(data: bytes) -> int:
    from crccheck.crc import Crc16CcittFalse  # = CRC-16/IBM-3740, check 0x29B1

    return Crc16CcittFalse.calc(data)


def space_packet(apid: int, seq: int, payload: bytes) -> bytes:
    """Unsegmented TM space packet, no secondary header (CCSDS 133.0-B; REFERENCES.md sec. 5)."""
    w1 = (0 << 13) | (0 << 12) | (0 << 11) | apid
    w2 = (0b11 << 14) | (seq & 0x3FFF)
    n = len(payload) - 1
    return bytes([w1 >> 8, w1 & 0xFF, w2 >> 8, w2 & 0xFF, n >> 8, n & 0xFF]) + payload


def idle_packet(length: int) -> bytes:
    """Idle packet (APID 0x7FF) of ``length`` octets in total (at least 7)."""
    return space_packet(0x7FF, 0, bytes([0x55]) * (length - 6))


def tm_frames(packets: list[bytes], *, scid: int, vcid: int, length: int, ocf: bool, fecf: bool) -> list[bytes]:
    """Cut a packet stream into TM frames (CCSDS 132.0-B; REFERENCES.md sec. 3), idle-filled at the end."""
    field_len = length - 6 - (4 if ocf else 0) - (2 if fecf else 0)
    stream = bytearray()
    starts = []
    for p in packets:
        starts.append(len(stream))
        stream += p
    frames = []
    pos = 0
    count = 0
    start_set = sorted(starts)
    si = 0
    while pos < len(stream):
        chunk = stream[pos:pos + field_len]
        while si < len(start_set) and start_set[si] < pos:
            si += 1
        fhp = (start_set[si] - pos) if si < len(start_set) and start_set[si] < pos + field_len else 0x7FF
        if len(chunk) < field_len:
            fill = field_len - len(chunk)
            if fill >= 7:
                if fhp == 0x7FF:
                    fhp = len(chunk)
                chunk = chunk + idle_packet(fill)
            else:
                chunk = chunk + bytes(fill)  # too short for a packet: pad (last frame only)
        w1 = (0 << 14) | (scid << 4) | (vcid << 1) | (1 if ocf else 0)
        w3 = (0 << 15) | (0 << 14) | (0 << 13) | (0b11 << 11) | fhp
        hdr = bytes([w1 >> 8, w1 & 0xFF, count & 0xFF, count & 0xFF, w3 >> 8, w3 & 0xFF])
        frame = hdr + bytes(chunk)
        if ocf:
            frame += bytes([0x01, 0x00, 0x00, 0x00])  # CLCW: COP-1 in effect, everything else zero
        if fecf:
            c = crc16(frame)
            frame += bytes([c >> 8, c & 0xFF])
        frames.append(frame)
        pos += field_len
        count += 1
    return frames


def channel_bits(frames: list[bytes], *, rs_e: int, interleave: int, randomize: bool, conv: bool | str,
                 nrz_m: bool, lead_bits: int = 317, seed: int = 5, g2_inverted: bool | None = None) -> np.ndarray:
    """ASM + codeblocks -> (randomized) -> NRZ-M -> convolutional code; random bits before the first ASM.

    ``conv``: False (uncoded), True (rate 1/2) or a rate "1/2" | "2/3" | "3/4" | "5/6" | "7/8".
    """
    asm = bytes.fromhex("1ACFFC1D")  # CCSDS 131.0-B-2 sec. 8 / REFERENCES.md sec. 1.1
    rng = np.random.default_rng(seed)
    stream = [rng.integers(0, 2, lead_bits, dtype=np.uint8)]
    for f in frames:
        block = rs_codeblock(f, rs_e, interleave) if rs_e else f
        if randomize:
            block = bytes(a ^ b for a, b in zip(block, pn_bytes(len(block))))
        stream.append(np.unpackbits(np.frombuffer(asm + block, dtype=np.uint8)))
    stream.append(rng.integers(0, 2, 200, dtype=np.uint8))
    bits = np.concatenate(stream)
    if nrz_m:
        # NRZ-M: a 1 is a change of level; with a convolutional code the conversion is done at the
        # encoder input (CCSDS 131.0-B-2 sec. 3.3.3)
        bits = (np.cumsum(bits) & 1).astype(np.uint8)
    if conv:
        bits = conv_encode(bits, "1/2" if conv is True else conv, g2_inverted)
    return bits


def cuc_field(ticks: int, *, coarse: int = 4, fine: int = 3) -> bytes:
    """CUC T-field (no P-field) of a count of 2^-(8 fine) s units: coarse whole seconds then the fine octets,
    big-endian (CCSDS 301.0-B sec. 3.2; layout from memory, REFERENCES.md sec. 6)."""
    return int(ticks).to_bytes(coarse + fine, "big")


def time_packet(apid: int, seq: int, time_field: bytes, length: int) -> bytes:
    """A space packet of ``length`` octets whose data field starts with ``time_field`` (zero padded)."""
    return space_packet(apid, seq, time_field + bytes(length - 6 - len(time_field)))


# ---- turbo codes -------------------------------------------------------------------------------------------
# REFERENCES.md sec. 13.3: G1..G3 source: [TM-SC] sec. 6.3 h); G0 from memory, not confirmed.
G0 = "10011"
G1, G2, G3 = "11011", "10101", "11111"
PRIMES = (31, 37, 43, 47, 53, 59, 61, 67)  # [TM-SC] sec. 6.3 step 2


class ShiftRegisterEncoder:
    """One component encoder of Figure 6-2: cells D1..D4, feedback G0, outputs out0 (input) and out1..out3."""

    def __init__(self, feedback: str = G0):
        self.g0 = [int(c) for c in feedback]
        self.cells = [0, 0, 0, 0]  # D1, D2, D3, D4

    def feedback_sum(self) -> int:
        return sum(g * d for g, d in zip(self.g0[1:], self.cells)) % 2

    def step(self, u: int) -> list[int]:
        a = (u + self.feedback_sum()) % 2
        outs = [u]
        for g in (G1, G2, G3):
            taps = [int(c) for c in g]
            outs.append((taps[0] * a + sum(t * d for t, d in zip(taps[1:], self.cells))) % 2)
        self.cells = [a] + self.cells[:3]
        return outs

    def terminate(self) -> list[int]:
        """One tail bit time: the switch feeds the feedback sum back in, so a = 0."""
        return self.step(self.feedback_sum())


def interleaver_from_formula(k: int) -> list[int]:
    """pi(s) for s = 1..k (REFERENCES.md sec. 1.5, [TM-SC] sec. 6.3), one s at a time."""
    k1, k2 = 8, k // 8
    out = []
    for s in range(1, k + 1):
        m = (s - 1) % 2
        i = (s - 1) // (2 * k2)
        j = (s - 1) // 2 - i * k2
        t = (19 * i + 1) % (k1 // 2)
        q = t % 8 + 1
        c = (PRIMES[q - 1] * j + 21 * m) % k2
        out.append(2 * (t + c * k1 // 2 + 1) - m)
    return out


def reference_encode(info_bits: np.ndarray, rate: str) -> tuple[np.ndarray, tuple[list[int], list[int]]]:
    """Codeword bits and the final cells of encoders a and b."""
    k = len(info_bits)
    pi = interleaver_from_formula(k)
    enc_a, enc_b = ShiftRegisterEncoder(), ShiftRegisterEncoder()
    out_a, out_b = [], []
    for s in range(k):
        out_a.append(enc_a.step(int(info_bits[s])))
        out_b.append(enc_b.step(int(info_bits[pi[s] - 1])))  # the s-th bit into b is bit pi(s) of the block
    for _ in range(4):
        out_a.append(enc_a.terminate())
        out_b.append(enc_b.terminate())
    bits = []
    for t in range(k + 4):
        a, b = out_a[t], out_b[t]
        if rate == "1/2":  # (out0a, out1a, out0a, out1b) repeated
            bits += [a[0], a[1]] if t % 2 == 0 else [a[0], b[1]]
        elif rate == "1/3":
            bits += [a[0], a[1], b[1]]
        elif rate == "1/4":
            bits += [a[0], a[2], a[3], b[1]]
        else:
            bits += [a[0], a[1], a[2], a[3], b[1], b[3]]
    return np.array(bits, dtype=np.uint8), (enc_a.cells, enc_b.cells)


# REFERENCES.md sec. 13.4: rate 1/3, 1/4, 1/6 from [TM-SC] Figs. 8-3 to 8-5; rate 1/2 from memory, not confirmed
TURBO_MARKERS = {
    "1/2": "034776C7272895B0",
    "1/3": "25D5C0CE8990F6C9461BF79C",
    "1/4": "034776C7272895B0FCB88938D8D76A4F",
    "1/6": "25D5C0CE8990F6C9461BF79CDA2A3F31766F0936B9E40863",
}


def turbo_channel_bits(frames: list[bytes], *, rate: str, randomize: bool = True, lead_bits: int = 317,
                       tail_bits: int = 200, seed: int = 5) -> np.ndarray:
    """Marker + (randomized) turbo codeword per frame, random bits before the first marker and after the last.

    Order on the send side (REFERENCES.md sec. 13.4, [TM-SC] sec. 9.2): encode, randomize the codeword with
    the sequence restarted at all ones for each codeword, put the marker (not randomized) in front.
    """
    rng = np.random.default_rng(seed)
    marker = np.unpackbits(np.frombuffer(bytes.fromhex(TURBO_MARKERS[rate]), dtype=np.uint8))
    stream = [rng.integers(0, 2, lead_bits, dtype=np.uint8)]
    for f in frames:
        cw, _ = reference_encode(np.unpackbits(np.frombuffer(bytes(f), dtype=np.uint8)), rate)
        if randomize:
            pn = np.unpackbits(np.frombuffer(pn_bytes((cw.size + 7) // 8), dtype=np.uint8))[: cw.size]
            cw = cw ^ pn
        stream += [marker, cw]
    stream.append(rng.integers(0, 2, tail_bits, dtype=np.uint8))
    return np.concatenate(stream)


# ---- LDPC codes ----------------------------------------------------------------------------------------------
# C2: first-row positions of the 2 x 16 circulants A_i,j of size 511 ([TM-SC] Table 7-1, REFERENCES.md sec. 13.1)
C2_TABLE_7_1 = (
    ((0, 176), (12, 239), (0, 352), (24, 431), (0, 392), (151, 409), (0, 351), (9, 359),
     (0, 307), (53, 329), (0, 207), (18, 281), (0, 399), (202, 457), (0, 247), (36, 261)),
    ((99, 471), (130, 473), (198, 435), (260, 478), (215, 420), (282, 481), (48, 396), (193, 445),
     (273, 430), (302, 451), (96, 379), (191, 386), (244, 467), (364, 470), (51, 382), (192, 414)),
)
# the expurgation to the (8176,7154) subcode as two checks constant on the 511-blocks (REFERENCES.md sec. 13.1,
# computed there; principle [GB2] p. 8-x)
C2_EXPURGATION = ("0000110101111101", "0000011011100110")
# AR4JA rate 1/2, M = 512 (k = 1024): theta_k and phi_k(j, 512) for k = 1..8 (REFERENCES.md sec. 13.2, from a
# general-purpose LDPC design library citing 131.0-B-5 Tables 7-3 and 7-4)
AR4JA_THETA_1_8 = (3, 0, 1, 2, 2, 3, 0, 1)
AR4JA_PHI_512_1_8 = ((16, 103, 105, 0, 50, 29, 115, 30), (0, 53, 74, 45, 47, 0, 59, 102),
                     (0, 8, 119, 89, 31, 122, 1, 69), (0, 35, 97, 112, 64, 93, 99, 94))


def c2_parity_check() -> np.ndarray:
    """H of the basic (8176,7156) code from Table 7-1 (1022 x 8176, 0/1) plus the two expurgation rows."""
    b = 511
    h = np.zeros((2 * b + 2, 16 * b), dtype=np.uint8)
    for i, row in enumerate(C2_TABLE_7_1):
        for j, positions in enumerate(row):
            for r in range(b):  # each row of a circulant is the one above it shifted right by one ([TM-SC] 7.3.3)
                for pos in positions:
                    h[i * b + r, j * b + (pos + r) % b] = 1
    for t, flags in enumerate(C2_EXPURGATION):
        for j, f in enumerate(flags):
            if f == "1":
                h[2 * b + t, j * b:(j + 1) * b] = 1
    return h


def ar4ja_r12_k1024_parity_check() -> np.ndarray:
    """H_1/2 for M = 512: 3 x 5 blocks (the last block column punctured), from the layout of REFERENCES.md 13.2."""
    m = 512

    def perm(k: int) -> np.ndarray:
        out = np.zeros((m, m), dtype=np.uint8)
        for i in range(m):
            j = 4 * i // m
            out[i, (m // 4) * ((AR4JA_THETA_1_8[k - 1] + j) % 4) + (AR4JA_PHI_512_1_8[j][k - 1] + i) % (m // 4)] = 1
        return out

    eye, zero = np.eye(m, dtype=np.uint8), np.zeros((m, m), dtype=np.uint8)
    blocks = [[zero, zero, eye, zero, eye ^ perm(1)],
              [eye, eye, zero, eye, perm(2) ^ perm(3) ^ perm(4)],
              [eye, perm(5) ^ perm(6), zero, perm(7) ^ perm(8), eye]]
    return np.block(blocks)


def gf2_parity_map(h: np.ndarray, n_info: int) -> np.ndarray:
    """R (0/1) with parity = R info (mod 2) for every word [info | parity] whose product with ``h`` is zero.

    Plain Gauss-Jordan elimination over GF(2) on the parity columns (the last columns of ``h``), with the rows
    packed into octets; the rows left over must be all zero (dependent checks).
    """
    n_par = h.shape[1] - n_info
    a = np.concatenate([h[:, n_info:], h[:, :n_info]], axis=1)
    rows = np.packbits(a, axis=1)
    for c in range(n_par):
        octet, shift = c >> 3, 7 - (c & 7)
        below = np.flatnonzero((rows[c:, octet] >> shift) & 1)
        if below.size == 0:
            raise ValueError(f"the parity columns of H are dependent (column {c})")
        p = c + int(below[0])
        rows[[c, p]] = rows[[p, c]]
        hit = ((rows[:, octet] >> shift) & 1).astype(bool)
        hit[c] = False
        rows[hit] ^= rows[c]
    assert not rows[n_par:].any()
    return np.unpackbits(rows[:n_par], axis=1)[:, n_par:n_par + n_info]


@functools.cache
def _ldpc_encoder(code: str) -> tuple[np.ndarray, int, int]:
    """(R restricted to the sent information bits, sent parity bits, zero bits appended)."""
    if code == "c2":
        # 18 shortened zeros in front of the 7136 information bits, 1022 parity bits, 2 zeros appended
        return np.ascontiguousarray(gf2_parity_map(c2_parity_check(), 7154)[:, 18:]), 1022, 2
    if code == "ar4ja-1/2-1024":
        # 1024 information bits, the first 2M = 1024 of the 3M parity bits sent (the last M punctured)
        return np.ascontiguousarray(gf2_parity_map(ar4ja_r12_k1024_parity_check(), 1024)[:1024]), 1024, 0
    raise ValueError(f"no LDPC code {code!r} in the test transmitter")


def ldpc_encode_frame(frame: bytes, code: str) -> np.ndarray:
    """The sent codeword bits of one frame: information bits (MSB first), parity, appended zeros."""
    r, _, extra = _ldpc_encoder(code)
    info = np.unpackbits(np.frombuffer(bytes(frame), dtype=np.uint8))
    parity = (r.astype(np.int32) @ info.astype(np.int32)) & 1
    return np.concatenate([info, parity.astype(np.uint8), np.zeros(extra, np.uint8)])


def ldpc_channel_bits(frames: list[bytes], *, code: str, randomize: bool = True, lead_bits: int = 317,
                      tail_bits: int = 200, seed: int = 5) -> np.ndarray:
    """ASM + (randomized) LDPC codeword per frame, random bits before the first ASM and after the last.

    Order on the send side (REFERENCES.md sec. 13.4): encode, randomize the whole codeword (C2's appended zeros
    included) with the sequence restarted at all ones, put the ASM 1ACFFC1D (from memory, not confirmed) in front.
    """
    rng = np.random.default_rng(seed)
    asm = np.unpackbits(np.frombuffer(bytes.fromhex("1ACFFC1D"), dtype=np.uint8))
    stream = [rng.integers(0, 2, lead_bits, dtype=np.uint8)]
    for f in frames:
        cw = ldpc_encode_frame(f, code)
        if randomize:
            cw = cw ^ np.unpackbits(np.frombuffer(pn_bytes(cw.size // 8), dtype=np.uint8))
        stream += [asm, cw]
    stream.append(rng.integers(0, 2, tail_bits, dtype=np.uint8))
    return np.concatenate(stream)
