"""Write the known-answer vectors of pipeline.fec (one case per .json file, plus a .sidecar.json).

Every expected value here comes from an outside source, not from pipeline.fec itself:
- Reed-Solomon parity and corrections: reedsolo (PyPI) configured for CCSDS, with the dual-basis
  conversion built from the two 8x8 matrices printed in CCSDS 131.0-B-2 sec. 4.3.9;
- convolutional symbols: scikit-commpy (PyPI), generator octals bit-reversed (117/155), G2 inverted,
  punctured with the CCSDS 131.0-B Table 3-2 patterns;
- randomizer: the LFSR of 130.1-G-1 sec. 8.2 written out bit by bit (first 40 bits as printed);
- CRC: crccheck (PyPI) Crc16Ibm3740;
- Viterbi: the transmitted bits themselves, at a noise level where decoding must succeed.

Run from the repository root:  python vectors/fec/make_vectors.py
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SEED = 20261201

T_AL = "10001101 11101111 11101100 10000110 11111010 10011001 10101111 01111011".split()
T_AL_INV = "11000101 01000010 00101110 11111101 11110000 01111001 10101100 11001100".split()


def _matrix_map(rows):
    m = [[int(c) for c in r] for r in rows]
    table = []
    for x in range(256):
        vec = [(x >> (7 - i)) & 1 for i in range(8)]
        out = [0] * 8
        for i, v in enumerate(vec):
            if v:
                out = [a ^ b for a, b in zip(out, m[i])]
        table.append(int("".join(map(str, out)), 2))
    return np.array(table, dtype=np.uint8)


C2D = _matrix_map(T_AL)  # conventional -> dual (131.0-B-2 p. 4-6)
D2C = _matrix_map(T_AL_INV)  # dual -> conventional


def write(name, case, source, **sidecar):
    (HERE / f"{name}.json").write_text(json.dumps(case, indent=1) + "\n")
    meta = {"generator": "vectors/fec/make_vectors.py", "seed": SEED, "source": source, **sidecar}
    (HERE / f"{name}.sidecar.json").write_text(json.dumps(meta, indent=1) + "\n")


def rs_cases(rng):
    import reedsolo

    for e, interleave, fill, n_err in ((16, 5, 0, 16), (16, 1, 0, 0), (16, 4, 10, 9), (8, 2, 39, 8), (8, 8, 200, 3)):
        codec = reedsolo.RSCodec(nsym=2 * e, nsize=255, fcr=128 - e, prim=0x187, generator=0xAD, c_exp=8)
        k = 255 - 2 * e
        data = rng.integers(0, 256, (k - fill) * interleave, dtype=np.uint8)
        block = np.zeros((255 - fill) * interleave, dtype=np.uint8)
        block[: data.size] = data
        for c in range(interleave):
            cw = codec.encode(bytes(D2C[data[c::interleave]]))
            block[c::interleave] = C2D[np.frombuffer(bytes(cw), np.uint8)]
        bad = block.copy()
        for c in range(interleave):
            pos = rng.choice(255 - fill, n_err, replace=False)
            bad[pos * interleave + c] ^= rng.integers(1, 256, n_err, dtype=np.uint8)
        write(
            f"rs_e{e}_i{interleave}_fill{fill}_err{n_err}",
            {
                "kind": "rs",
                "e": e,
                "interleave": interleave,
                "codeblock_hex": block.tobytes().hex(),
                "received_hex": bad.tobytes().hex(),
                "data_hex": data.tobytes().hex(),
                "corrected": [n_err] * interleave,
            },
            "reedsolo (PyPI) RSCodec(nsym=2E, fcr=128-E, prim=0x187, generator=0xAD) with the dual-basis "
            "matrices of CCSDS 131.0-B-2 sec. 4.3.9; errors at random positions",
        )


PATTERNS = {"1/2": ("1", "1"), "2/3": ("10", "11"), "3/4": ("101", "110"), "5/6": ("10101", "11010"),
            "7/8": ("1000101", "1111010")}


def commpy_encode(bits, rate):
    import commpy.channelcoding as cc

    trellis = cc.Trellis(np.array([6]), np.array([[0o117, 0o155]]))
    mother = np.asarray(cc.conv_encode(bits, trellis, termination="cont"), dtype=np.uint8)[: 2 * bits.size]
    mother[1::2] ^= 1
    c1, c2 = PATTERNS[rate]
    out = []
    for k in range(bits.size):
        col = k % len(c1)
        if c1[col] == "1":
            out.append(mother[2 * k])
        if c2[col] == "1":
            out.append(mother[2 * k + 1])
    return np.array(out, dtype=np.uint8)


def conv_cases(rng):
    for rate in PATTERNS:
        bits = rng.integers(0, 2, 280, dtype=np.uint8)
        sym = commpy_encode(bits, rate)
        write(
            f"conv_r{rate.replace('/', '')}_n280",
            {"kind": "conv", "rate": rate, "bits": "".join(map(str, bits)), "symbols": "".join(map(str, sym))},
            "scikit-commpy (PyPI) conv_encode, octals 117/155 (its bit order for 171/133), G2 inverted, "
            "punctured per CCSDS 131.0-B Table 3-2",
        )


def viterbi_cases(rng):
    for rate, ebn0_db in (("1/2", 5.0), ("3/4", 7.0), ("7/8", 8.0)):
        num, den = map(int, rate.split("/"))
        bits = rng.integers(0, 2, 240, dtype=np.uint8)
        sym = commpy_encode(bits, rate)
        sigma = np.sqrt(1 / (2 * num / den * 10 ** (ebn0_db / 10)))
        soft = np.clip(np.rint(40 * ((1 - 2 * sym.astype(float)) + sigma * rng.standard_normal(sym.size))), -127, 127)
        write(
            f"viterbi_r{rate.replace('/', '')}_n240",
            {"kind": "viterbi", "rate": rate, "soft_int8": soft.astype(int).tolist(), "initial_state": 0,
             "bits": "".join(map(str, bits))},
            f"the transmitted bits; channel symbols from scikit-commpy as conv_*, BPSK + AWGN at Eb/N0 = "
            f"{ebn0_db} dB scaled to int8 (+ = bit 0)",
            ebn0_db=ebn0_db,
        )


def pn_case():
    a = [1] * 8
    while len(a) < 255 * 8:
        k = len(a)
        a.append(a[k - 1] ^ a[k - 3] ^ a[k - 5] ^ a[k - 8])
    table = np.packbits(np.array(a, dtype=np.uint8))
    assert table[:5].tobytes().hex() == "ff480ec09a"  # 130.1-G-1 sec. 8.2, first 40 bits as printed
    write("pn_255", {"kind": "pn", "n": 255, "hex": table.tobytes().hex()},
          "LFSR h(x) = x^8+x^7+x^5+x^3+1, all-ones seed (CCSDS 130.1-G-1 sec. 8.2); first 40 bits as printed there")


def crc_cases(rng):
    from crccheck.crc import Crc16Ibm3740

    cases = [b"123456789", b"", rng.integers(0, 256, 1113, dtype=np.uint8).tobytes()]
    write("crc16_cases", {"kind": "crc16", "cases": [[c.hex(), Crc16Ibm3740.calc(c)] for c in cases]},
          "crccheck (PyPI) Crc16Ibm3740; 0x29B1 for '123456789' is the public CRC catalogue check value")


def main():
    rng = np.random.default_rng(SEED)
    rs_cases(rng)
    conv_cases(rng)
    viterbi_cases(rng)
    pn_case()
    crc_cases(rng)


if __name__ == "__main__":
    main()
