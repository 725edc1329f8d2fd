"""Make the known-answer vectors of ``downlink verify`` from outside references only.

Run from the repository root::

    python vectors/make.py            # writes vectors/<kind>/ and the bundled copy pipeline/data/vectors/<kind>/
    python vectors/make.py --check    # regenerate in memory and compare with the files on disk

This is the one generator and the one format of the project's vectors.  Nothing here imports
``pipeline``: the vectors are an independent check of it.  The references are

* the CCSDS books' values as collected in ../shared/REFERENCES.md (randomizer first 40 bits,
  dual-basis matrices, puncturing patterns, G2 inversion, marker bit strings, worked examples);
* ``reedsolo`` (PyPI) for Reed-Solomon parity and decoding, configured for the CCSDS code, with the
  dual-basis tables computed from the printed matrices;
* ``scikit-commpy`` (PyPI) for the K=7 mother code; the CCSDS puncturing table is applied here;
* ``crccheck`` (PyPI) ``Crc16CcittFalse`` for the FECF;
* the frame, CLCW, packet and time-code bit layouts (from memory in REFERENCES.md, not confirmed);
* the LDPC encoder check values of REFERENCES.md sec. 13.1 and 13.2 (first parity octets and SHA-256 of the
  sent codeword) and the turbo interleaver values of sec. 13.3, transcribed; turbo codewords from the plain
  shift-register encoder of the test suite's independent transmitter (``tests/third_party_tx.py``, which
  shares no code with ``pipeline`` either).

Format: one case per ``.json`` file, parameters in its name.  Fields: ``name``, ``stage`` (the
pipeline stage under test), ``kind`` (what the runner calls), ``params``, ``input``, ``expected``,
``source``, ``generator`` (this script), ``seed`` (null when not random), ``kat`` (small enough
for plain-Python kernels).  Bytes are hex strings.  Arrays too large for JSON sit in a ``.npz``
of the same stem (``data_file``), read with ``allow_pickle=False``.

``source`` is self-contained text (issue 18): the standard and its section, the library and the
version the value was computed with, or "computed from ..." with what it was computed from.  It
never names a file the user of an installed package does not have; :func:`render` refuses one
that does.
"""

from __future__ import annotations

import argparse
import hashlib
import io
import json
import sys
import zlib
from pathlib import Path

import numpy as np

GENERATOR = "vectors/make.py"
ROOT = Path(__file__).resolve().parent
BUNDLED = ROOT.parent / "pipeline" / "data" / "vectors"

# The reference libraries (PyPI) the vectors were computed with; their versions are written into the
# sources, and writing new vectors with other versions installed is refused (update these first).
LIBRARIES = {"reedsolo": "1.7.0", "scikit-commpy": "0.8.0", "crccheck": "1.3.1", "galois": "0.4.11"}
REEDSOLO = f"reedsolo {LIBRARIES['reedsolo']} (PyPI)"
COMMPY = f"scikit-commpy {LIBRARIES['scikit-commpy']} (PyPI)"
CRCCHECK = f"crccheck {LIBRARIES['crccheck']} (PyPI) Crc16CcittFalse"

# Source texts used by several cases.
SRC_RS_CODE = ("the CCSDS Reed-Solomon code of CCSDS 131.0-B-2 sec. 4.3 (field polynomial x^8+x^7+x^2+x+1, "
               "generator roots alpha^(11 j), j = 128-E .. 127+E) in the dual basis of sec. 4.3.9 (the two "
               "matrices printed on p. 4-6)")
SRC_RS = f"computed with {REEDSOLO} for {SRC_RS_CODE}"
SRC_PN = ("the TM pseudo-randomizer of CCSDS 131.0-B-2 sec. 9: h(x) = x^8+x^7+x^5+x^3+1, all-ones seed, "
          "restarted at every ASM; its first 40 bits as printed in CCSDS 130.1-G-1 sec. 8.2")
SRC_CRC = ("the FECF of CCSDS 132.0-B sec. 4.1.6: G(X) = X^16+X^12+X^5+1, register preset to all ones "
           "(the catalogue CRC-16/IBM-3740, check value 0x29B1 for '123456789')")
SRC_CONV_HALF = ("the rate-1/2 code of CCSDS 131.0-B-2 sec. 3.3: K = 7, G1 = 171, G2 = 133 octal, "
                 "C1 first, G2 output inverted (sec. 3.3.1(5): \"Symbol inversion: On output path of G2\")")
SRC_CONV_PUNCT = ("the punctured codes of CCSDS 131.0-B sec. 3.4: the same G1 = 171, G2 = 133 octal mother "
                  "code with no G2 inversion (the punctured encoder of CCSDS 130.1-G sec. 4.3, Fig. 4-2, has "
                  "no inverter), punctured with the sec. 3.4 Table 3-2 pattern, C1 first in each column")
SRC_LAYOUT = "bit layouts from memory, not confirmed against the Blue Book"

# ---- outside references ----------------------------------------------------------------------

# Conventional -> dual basis (T_alpha_l) and back, REFERENCES.md sec. 10.2 (computed there from the
# CCSDS 131.0-B-2 p. 4-6 matrices).
TAL = bytes.fromhex(
    "007BAFD499E2364DFA81552E6318CCB786FD29521F64B0CB7C07D3A8E59E4A31"
    "EC974338750EDAA1166DB9C28FF4205B6A11C5BEF3885C2790EB3F440972A6DD"
    "EF94403B760DD9A2156EBAC18CF723586912C6BDF08B5F2493E83C470A71A5DE"
    "0378ACD79AE1354EF982562D601BCFB485FE2A511C67B3C87F04D0ABE69D4932"
    "8DF62259146FBBC0770CD8A3EE95413A0B70A4DF92E93D46F18A5E256813C7BC"
    "611ACEB5F883572C9BE0344F0279ADD6E79C48337E05D1AA1D66B2C984FF2B50"
    "6219CDB6FB80542F98E3374C017AAED5E49F4B307D06D2A91E65B1CA87FC2853"
    "8EF5215A176CB8C3740FDBA0ED9642390873A7DC91EA3E45F2895D266B10C4BF"
)
TAL_INV = bytes(TAL.index(x) for x in range(256))
# REFERENCES.md sec. 10.2 / pitfall 10: tal_inv[1] = 0xCC, and the table printed there starts 00 CC AC 60
assert TAL_INV[:4] == bytes.fromhex("00CCAC60") and TAL[1] == 0x7B

# REFERENCES.md sec. 10.1: the 255-octet randomizer period, its SHA-256 and byte sum.
PN_SHA256 = "6dac31e6759a382430c80ad84bcd698011f21961ab21318b310a85ef85c7246e"
PN_FIRST40 = "FF480EC09A"  # CCSDS 130.1-G-1 sec. 8.2 (p. 8-2)

ASM = "1ACFFC1D"  # CCSDS 131.0-B-2 sec. 8 / REFERENCES.md sec. 1.1
PUNCTURE = {  # REFERENCES.md sec. 1.2 (C1 row, C2 row); symbols go out column by column, C1 first
    "1/2": ("1", "1"),
    "2/3": ("10", "11"),
    "3/4": ("101", "110"),
    "5/6": ("10101", "11010"),
    "7/8": ("1000101", "1111010"),
}
RS_K = {16: 223, 8: 239}


def pn_bytes(n: int) -> bytes:
    """TM randomizer: a_k = a_{k-1} ^ a_{k-3} ^ a_{k-5} ^ a_{k-8}, a_0..a_7 = 1, MSB first (REFERENCES.md 10.1)."""
    a = [1] * 8  # a[-1] is the newest
    bits = []
    for _ in range(8 * n):
        bits.append(a[0])
        a = a[1:] + [a[7] ^ a[5] ^ a[3] ^ a[0]]
    return np.packbits(np.array(bits, dtype=np.uint8)).tobytes()


_PN_PERIOD = pn_bytes(255)
assert _PN_PERIOD[:5].hex().upper() == PN_FIRST40
assert hashlib.sha256(_PN_PERIOD).hexdigest() == PN_SHA256 and sum(_PN_PERIOD) == 32640


def randomize(data: bytes) -> bytes:
    pn = (_PN_PERIOD * (len(data) // 255 + 1))[: len(data)]
    return bytes(a ^ b for a, b in zip(data, pn))


def _rs_codec(e: int):
    import reedsolo

    # REFERENCES.md sec. 10.2: generator is the field element alpha^11 = 0xAD, fcr = 128 - E.
    return reedsolo.RSCodec(nsym=2 * e, nsize=255, fcr=128 - e, prim=0x187, generator=0xAD, c_exp=8)


def rs_parity_dual(data_dual: bytes, e: int) -> bytes:
    """Check symbols (dual basis) of one codeword whose data (dual basis) may be shortened."""
    conv = bytes(TAL_INV[b] for b in data_dual)
    cw = _rs_codec(e).encode(bytearray(conv))
    return bytes(TAL[b] for b in cw[-2 * e:])


def rs_codeblock(frame: bytes, e: int, interleave: int) -> bytes:
    """Frame + interleaved check symbols (CCSDS 131.0-B sec. 4.4): codeword c owns positions c, c+I, ..."""
    assert len(frame) % interleave == 0
    words = [frame[c::interleave] for c in range(interleave)]
    pars = [rs_parity_dual(w, e) for w in words]
    check = bytes(pars[c][j] for j in range(2 * e) for c in range(interleave))
    return frame + check


# REFERENCES.md sec. 10.2 check vectors: reedsolo configured this way must reproduce them.
assert rs_parity_dual(bytes(range(223)), 16).hex().upper() == \
    "4FFB92DD557EC67F27FB8982CF58F8FD028AD117FCEF6B2793D0418826578651"
assert rs_parity_dual(bytes(range(239)), 8).hex().upper() == "9755133F2714A3FBE0101E8F0E0AC1D2"


def _commpy_trellis():
    from commpy.channelcoding import Trellis

    # commpy reads a generator's octal digits oldest register cell first, so CCSDS G1 = 171 and
    # G2 = 133 (input first, REFERENCES.md sec. 1.2) are given to it bit-reversed: 117 and 155.
    # The encoded-ASM check below (REFERENCES.md sec. 10.3) pins this.
    return Trellis(np.array([6]), np.array([[0o117, 0o155]]))


def g2_inverted(rate: str) -> bool:
    """CCSDS 131.0-B: the G2 output is inverted for the rate-1/2 code (sec. 3.3.1(5)) and not for the
    punctured codes (sec. 3.4; CCSDS 130.1-G sec. 4.3, Fig. 4-2 has no inverter)."""
    return rate == "1/2"


def conv_encode_ref(bits: np.ndarray, rate: str, prior: np.ndarray | None = None) -> np.ndarray:
    """CCSDS convolutional encoding: commpy mother code, G2 inverted at rate 1/2, then the puncturing table."""
    from commpy.channelcoding import conv_encode

    bits = np.asarray(bits, dtype=np.int64)
    lead = 0 if prior is None else len(prior)
    full = bits if prior is None else np.concatenate([np.asarray(prior, dtype=np.int64), bits])
    out = conv_encode(full, _commpy_trellis(), "cont").astype(np.uint8)[2 * lead:]
    if g2_inverted(rate):
        out[1::2] ^= 1
    c1, c2 = PUNCTURE[rate]
    period = len(c1)
    keep = []
    for k in range(len(bits)):
        col = k % period
        if c1[col] == "1":
            keep.append(2 * k)
        if c2[col] == "1":
            keep.append(2 * k + 1)
    return out[np.array(keep, dtype=np.int64)]


_asm_bits = np.unpackbits(np.frombuffer(bytes.fromhex(ASM), np.uint8))
assert np.packbits(conv_encode_ref(_asm_bits, "1/2")).tobytes().hex().upper() == "56081C971AA73D3E"
assert np.packbits(conv_encode_ref(_asm_bits, "1/2", np.ones(6, np.uint8))).tobytes().hex().upper() == \
    "70B81C971AA73D3E"


def crc16_ref(data: bytes) -> int:
    from crccheck.crc import Crc16CcittFalse

    return int(Crc16CcittFalse.calc(bytearray(data)))


assert crc16_ref(b"123456789") == 0x29B1  # REFERENCES.md sec. 10.4


# ---- headers from the REFERENCES.md layouts (secs. 3-6, from memory there) -------------------

def tm_header(*, scid, vcid, ocf, mcfc, vcfc, fhp, sec_hdr=False, sync=False, order=False, seg=3) -> bytes:
    w0 = (0 << 14) | (scid << 4) | (vcid << 1) | int(ocf)
    w2 = (int(sec_hdr) << 15) | (int(sync) << 14) | (int(order) << 13) | (seg << 11) | fhp
    return w0.to_bytes(2, "big") + bytes([mcfc & 0xFF, vcfc & 0xFF]) + w2.to_bytes(2, "big")


assert tm_header(scid=0x123, vcid=5, ocf=True, mcfc=0x45, vcfc=0x67, fhp=0).hex() == "123b45671800"


def aos_header(*, scid, vcid, vcfc, replay=False, usage=False, cycle=0) -> bytes:
    w0 = (1 << 14) | (scid << 6) | vcid
    sig = (int(replay) << 7) | (int(usage) << 6) | (cycle & 0xF)
    return w0.to_bytes(2, "big") + vcfc.to_bytes(3, "big") + bytes([sig])


assert aos_header(scid=0xAB, vcid=0x2A, vcfc=0x123456).hex() == "6aea12345600"


def clcw(*, vcid=0, status=0, cop=1, no_rf=False, no_bitlock=False, lockout=False, wait=False,
         retransmit=False, farm_b=0, report=0) -> bytes:
    w = (0 << 31) | (0 << 29) | (status << 26) | (cop << 24) | (vcid << 18)
    w |= (int(no_rf) << 15) | (int(no_bitlock) << 14) | (int(lockout) << 13) | (int(wait) << 12)
    w |= (int(retransmit) << 11) | ((farm_b & 3) << 9) | (report & 0xFF)
    return w.to_bytes(4, "big")


def space_packet(*, apid, seq_count, data: bytes, sec_hdr=False, ptype=0, flags=3) -> bytes:
    w0 = (0 << 13) | (ptype << 12) | (int(sec_hdr) << 11) | apid
    w1 = (flags << 14) | seq_count
    return w0.to_bytes(2, "big") + w1.to_bytes(2, "big") + (len(data) - 1).to_bytes(2, "big") + data


assert space_packet(apid=0x123, seq_count=0x1234, data=bytes(10), sec_hdr=True)[:6].hex() == "0923d2340009"

UNIX_TO_1958_S = 378_691_200  # REFERENCES.md sec. 6: 4383 days


def _unix_s(iso: str) -> int:
    from datetime import datetime, timezone

    return int(datetime.strptime(iso, "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc).timestamp())


def _iso_ns(unix_ns: int) -> str:
    from datetime import datetime, timezone

    s, ns = divmod(unix_ns, 1_000_000_000)
    return datetime.fromtimestamp(s, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%S") + f".{ns:09d}Z"


# ---- the cases ---------------------------------------------------------------------------------

def _case(name, stage, kind, *, params=None, inp=None, expected=None, source, seed=None, kat=True, arrays=None):
    return {
        "name": name, "stage": stage, "kind": kind, "params": params or {}, "input": inp or {},
        "expected": expected or {}, "source": source, "generator": GENERATOR, "seed": seed, "kat": kat,
        "_arrays": arrays,
    }


def randomizer_cases():
    yield _case("randomizer_first40bits", "fec", "randomizer", inp={"n": 5}, expected={"hex": PN_FIRST40},
                source="CCSDS 130.1-G-1 sec. 8.2 (the first 40 bits of the sequence, as printed there)")
    yield _case("randomizer_period255", "fec", "randomizer", inp={"n": 255},
                expected={"hex": _PN_PERIOD.hex().upper(), "sha256": PN_SHA256},
                source=f"computed from {SRC_PN}")
    yield _case("randomizer_n600_wraps", "fec", "randomizer", inp={"n": 600},
                expected={"hex": (_PN_PERIOD * 3)[:600].hex().upper()},
                source=f"computed from {SRC_PN}; the sequence repeats every 255 octets")


def crc_cases(rng):
    for name, data in (("ascii123456789", b"123456789"), ("empty", b""), ("zeros6", bytes(6))):
        yield _case(f"crc16_{name}", "fec", "crc16", inp={"hex": data.hex()},
                    expected={"crc": crc16_ref(data)},
                    source=f"computed with {CRCCHECK} for {SRC_CRC}")
    seed = 4101
    data = np.random.default_rng(seed).integers(0, 256, 1113, dtype=np.uint8).tobytes()
    crc = crc16_ref(data)
    yield _case("crc16_random_len1113", "fec", "crc16", inp={"hex": data.hex()}, expected={"crc": crc},
                source=f"computed with {CRCCHECK} for {SRC_CRC}", seed=seed)
    full = data + crc.to_bytes(2, "big")
    yield _case("crc16_residue_len1115", "fec", "crc16", inp={"hex": full.hex()}, expected={"crc": 0},
                source=f"{SRC_CRC}: the syndrome of a frame with its FECF is zero (132.0-B sec. 4.1.6.3); "
                       f"FECF computed with {CRCCHECK}", seed=seed)


def rs_cases():
    yield _case("rs_encode_e16_i1_ramp", "fec", "rs_encode", params={"e": 16, "interleave": 1},
                inp={"hex": bytes(range(223)).hex()},
                expected={"parity": "4FFB92DD557EC67F27FB8982CF58F8FD028AD117FCEF6B2793D0418826578651"},
                source=f"{SRC_RS}; data 00 01 .. DE")
    yield _case("rs_encode_e16_i1_impulse", "fec", "rs_encode", params={"e": 16, "interleave": 1},
                inp={"hex": (bytes(222) + b"\x01").hex()},
                expected={"parity": "660827F283411B8B28E61FAD2759C879C85927AD1FE6288B1B4183F227086601"},
                source=f"{SRC_RS}; 222 octets 00, then 01")
    yield _case("rs_encode_e8_i1_ramp", "fec", "rs_encode", params={"e": 8, "interleave": 1},
                inp={"hex": bytes(range(239)).hex()}, expected={"parity": "9755133F2714A3FBE0101E8F0E0AC1D2"},
                source=f"{SRC_RS}; data 00 01 .. EE")
    yield _case("rs_encode_e8_i1_impulse", "fec", "rs_encode", params={"e": 8, "interleave": 1},
                inp={"hex": (bytes(238) + b"\x01").hex()}, expected={"parity": "286D24C56C532D952D536CC5246D2801"},
                source=f"{SRC_RS}; 238 octets 00, then 01")
    for e in (16, 8):
        for interleave in (1, 2, 4, 5, 8):
            for fill in (0, 3 if interleave != 8 else 40):
                seed = 5000 + 100 * e + 10 * interleave + (1 if fill else 0)
                rng = np.random.default_rng(seed)
                n = (RS_K[e] - fill) * interleave
                frame = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
                block = rs_codeblock(frame, e, interleave)
                yield _case(f"rs_encode_e{e}_i{interleave}_fill{fill}", "fec", "rs_encode",
                            params={"e": e, "interleave": interleave, "virtual_fill_per_codeword": fill},
                            inp={"hex": frame.hex()}, expected={"parity": block[n:].hex().upper()},
                            source=f"{SRC_RS}; virtual fill per CCSDS 131.0-B-2 sec. 4.3.7, symbol "
                                   "interleaving per sec. 4.4.1", seed=seed)
    # decoding: E symbol errors in every codeword are corrected; E+1 in one codeword is not
    for e, interleave, fill in ((16, 5, 3), (8, 2, 0)):
        seed = 6000 + e + interleave
        rng = np.random.default_rng(seed)
        n = (RS_K[e] - fill) * interleave
        frame = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        block = bytearray(rs_codeblock(frame, e, interleave))
        rows = len(block) // interleave
        bad = bytearray(block)
        for c in range(interleave):
            for r in rng.choice(rows, e, replace=False):
                bad[r * interleave + c] ^= int(rng.integers(1, 256))
        yield _case(f"rs_decode_e{e}_i{interleave}_fill{fill}_t_errors", "fec", "rs_decode",
                    params={"e": e, "interleave": interleave},
                    inp={"hex": bytes(bad).hex()},
                    expected={"ok": True, "hex": frame.hex(), "corrected": [e] * interleave},
                    source=f"{SRC_RS}; E symbol errors per codeword are correctable (CCSDS 131.0-B-2 "
                           "sec. 4.3.1)", seed=seed)
        worse = bytearray(bad)
        c = 0
        hit = {r for r in range(rows) if bad[r * interleave + c] != block[r * interleave + c]}
        extra = next(r for r in range(rows) if r not in hit)
        worse[extra * interleave + c] ^= 0x5A
        import reedsolo

        conv = bytearray(TAL_INV[b] for b in worse[c::interleave])
        try:  # reedsolo must also refuse it, else the case is not a known answer
            _rs_codec(e).decode(conv)
            raise SystemExit(f"reedsolo decoded {e + 1} errors; pick another seed")
        except reedsolo.ReedSolomonError:
            pass
        yield _case(f"rs_decode_e{e}_i{interleave}_fill{fill}_too_many", "fec", "rs_decode",
                    params={"e": e, "interleave": interleave},
                    inp={"hex": bytes(worse).hex()},
                    expected={"ok": False, "failed_codewords": [0]},
                    source=f"{SRC_RS}; E+1 symbol errors in codeword 0, which {REEDSOLO} also refuses to "
                           "decode", seed=seed)

    # decoding with up to E errors per codeword over the range of interleavings and virtual fills
    for e, interleave, fill, n_err in ((16, 5, 0, 16), (16, 1, 0, 0), (16, 4, 10, 9), (8, 2, 39, 8), (8, 8, 200, 3)):
        seed = 6100 + 7 * e + 3 * interleave + fill + n_err
        rng = np.random.default_rng(seed)
        n = (RS_K[e] - fill) * interleave
        frame = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        block = bytearray(rs_codeblock(frame, e, interleave))
        rows = len(block) // interleave
        for c in range(interleave):
            for r in rng.choice(rows, n_err, replace=False):
                block[r * interleave + c] ^= int(rng.integers(1, 256))
        for c in range(interleave):  # reedsolo corrects the same codewords (known answer, not only ours)
            conv = bytearray(TAL_INV[b] for b in block[c::interleave])
            assert bytes(TAL[b] for b in _rs_codec(e).decode(conv)[0]) == frame[c::interleave]
        yield _case(f"rs_decode_e{e}_i{interleave}_fill{fill}_err{n_err}", "fec", "rs_decode",
                    params={"e": e, "interleave": interleave, "virtual_fill_per_codeword": fill},
                    inp={"hex": bytes(block).hex()},
                    expected={"ok": True, "hex": frame.hex(), "corrected": [n_err] * interleave},
                    source=f"{SRC_RS}; {n_err} symbol errors at random places in each codeword, corrected by "
                           f"{REEDSOLO} too", seed=seed)


def _conv_source(rate: str) -> str:
    return SRC_CONV_HALF if rate == "1/2" else SRC_CONV_PUNCT + f" (C1 {PUNCTURE[rate][0]}, C2 {PUNCTURE[rate][1]})"


def conv_cases():
    asm_src = (f"computed with the {COMMPY} K=7 encoder for {SRC_CONV_HALF}; the last 52 of the 64 symbols are "
               "the same for every prior state (the invariant part of CCSDS 130.1-G-1 sec. 8.3)")
    yield _case("conv_encode_asm_r12_zero_state", "fec", "conv_encode",
                params={"rate": "1/2", "prior_state": 0, "g2_inverted": True},
                inp={"hex": ASM, "n_bits": 32}, expected={"hex": "56081C971AA73D3E", "n_bits": 64},
                source=asm_src + "; ASM 1ACFFC1D, all-zero register before it")
    yield _case("conv_encode_asm_r12_ones_state", "fec", "conv_encode",
                params={"rate": "1/2", "prior_state": 63, "g2_inverted": True},
                inp={"hex": ASM, "n_bits": 32}, expected={"hex": "70B81C971AA73D3E", "n_bits": 64},
                source=asm_src + "; ASM 1ACFFC1D, all-ones register before it")
    yield _case("conv_encode_zeros8_r12", "fec", "conv_encode",
                params={"rate": "1/2", "prior_state": 0, "g2_inverted": True},
                inp={"hex": "00", "n_bits": 8}, expected={"hex": "5555", "n_bits": 16},
                source=f"computed from {SRC_CONV_HALF}: zero input gives C1 = 0 and the inverted G2 = 1")
    for rate in PUNCTURE:
        seed = 7000 + int(rate[0]) * 10 + int(rate[2])
        rng = np.random.default_rng(seed)
        n = 420  # a multiple of every puncturing period (2, 3, 5, 7)
        bits = rng.integers(0, 2, n, dtype=np.uint8)
        out = conv_encode_ref(bits, rate)
        yield _case(f"conv_encode_r{rate.replace('/', '')}_n{n}", "fec", "conv_encode",
                    params={"rate": rate, "prior_state": 0, "g2_inverted": g2_inverted(rate)},
                    inp={"hex": np.packbits(bits).tobytes().hex(), "n_bits": n},
                    expected={"hex": np.packbits(out).tobytes().hex(), "n_bits": int(len(out))},
                    source=f"computed with the {COMMPY} K=7 mother code for {_conv_source(rate)}", seed=seed)
    # Viterbi: noise on the encoded stream of random bits followed by 6 zero tail bits, at an Es/N0 that
    # leaves several hard symbol errors; the seed is the first one for which the maximum-likelihood path
    # (the plain reference decoder below, and commpy's at rate 1/2) is the transmitted one.
    for rate, esn0_db in (("1/2", 3.0), ("2/3", 3.5), ("3/4", 4.0), ("5/6", 4.5), ("7/8", 5.0)):
        n = 210
        for seed in range(7500 + 10 * int(rate[2]), 7600 + 10 * int(rate[2])):
            rng = np.random.default_rng(seed)
            bits = np.concatenate([rng.integers(0, 2, n - 6, dtype=np.uint8), np.zeros(6, np.uint8)])
            sym = conv_encode_ref(bits, rate)
            sigma = np.sqrt(1.0 / (2 * 10 ** (esn0_db / 10)))
            soft = np.round(((1.0 - 2.0 * sym) + sigma * rng.standard_normal(len(sym))).astype(np.float32), 4)
            hard_err = int(np.count_nonzero((soft < 0).astype(np.uint8) != sym))
            if hard_err >= 4 and np.array_equal(_reference_viterbi(soft, rate, n), bits):
                break
        else:
            raise SystemExit(f"no seed decodes at rate {rate}")
        if rate == "1/2":
            from commpy.channelcoding import viterbi_decode

            rx = soft.astype(np.float64)
            rx[1::2] = -rx[1::2]  # undo the G2 inversion for commpy's plain code
            # commpy 'unquantized' maps +1 to bit 1; our soft values have + = bit 0
            dec = viterbi_decode(-rx, _commpy_trellis(), tb_depth=42, decoding_type="unquantized")
            assert np.array_equal(dec[: n - 6].astype(np.uint8), bits[: n - 6]), "commpy disagrees"
        ml = "a plain Viterbi decoder in vectors/make.py" + (f" and {COMMPY}'s" if rate == "1/2" else "")
        yield _case(f"viterbi_r{rate.replace('/', '')}_esn0_{esn0_db:g}db_n{n}", "fec", "viterbi_decode",
                    params={"rate": rate, "esn0_db": esn0_db, "hard_symbol_errors": hard_err,
                            "g2_inverted": g2_inverted(rate)},
                    inp={"soft": [float(v) for v in soft]},
                    expected={"hex": np.packbits(bits).tobytes().hex(), "n_bits": n},
                    source=f"computed: {COMMPY} encoder for {_conv_source(rate)}; BPSK in Gaussian noise; the "
                           f"maximum-likelihood path (found by {ml}) is the transmitted one", seed=seed)
    # int8 soft symbols (+ = bit 0) from a known start state: the decoder's quantised input range
    for rate, ebn0_db in (("1/2", 5.0), ("3/4", 7.0), ("7/8", 8.0)):
        num, den = map(int, rate.split("/"))
        n = 240
        for seed in range(7700 + 10 * int(rate[2]), 7800 + 10 * int(rate[2])):
            rng = np.random.default_rng(seed)
            bits = rng.integers(0, 2, n, dtype=np.uint8)
            sym = conv_encode_ref(bits, rate)
            sigma = np.sqrt(1 / (2 * num / den * 10 ** (ebn0_db / 10)))
            soft = np.clip(np.rint(40 * ((1 - 2 * sym.astype(float)) + sigma * rng.standard_normal(sym.size))),
                           -127, 127).astype(np.int64)
            hard_err = int(np.count_nonzero((soft < 0).astype(np.uint8) != sym))
            if hard_err >= 2 and np.array_equal(_reference_viterbi(soft.astype(float), rate, n), bits):
                break
        else:
            raise SystemExit(f"no seed decodes at rate {rate}")
        yield _case(f"viterbi_r{rate.replace('/', '')}_int8_ebn0_{ebn0_db:g}db_n{n}", "fec", "viterbi_decode",
                    params={"rate": rate, "ebn0_db": ebn0_db, "hard_symbol_errors": hard_err, "initial_state": 0,
                            "g2_inverted": g2_inverted(rate)},
                    inp={"soft": [int(v) for v in soft]},
                    expected={"hex": np.packbits(bits).tobytes().hex(), "n_bits": n},
                    source=f"computed: {COMMPY} encoder for {_conv_source(rate)}; BPSK in Gaussian noise scaled to "
                           "int8; the maximum-likelihood path from the zero state (a plain Viterbi decoder in "
                           "vectors/make.py) is the transmitted one", seed=seed)


def _reference_viterbi(soft: np.ndarray, rate: str, n_bits: int) -> np.ndarray:
    """Plain soft Viterbi: depuncture with zeros, correlation metric, keep every survivor path whole."""
    c1, c2 = PUNCTURE[rate]
    period = len(c1)
    full = np.zeros(2 * n_bits)
    j = 0
    for k in range(n_bits):
        for branch, row in ((0, c1), (1, c2)):
            if row[k % period] == "1":
                full[2 * k + branch] = soft[j]
                j += 1
    # branch outputs from commpy's own trellis (generators as given to it), then the G2 inversion (rate 1/2)
    tr = _commpy_trellis()
    metric = {0: (0.0, [])}
    for k in range(n_bits):
        new = {}
        for state, (m, path) in metric.items():
            for u in (0, 1):
                ns = int(tr.next_state_table[state, u])
                out = int(tr.output_table[state, u])
                b1, b2 = (out >> 1) & 1, (out & 1) ^ int(g2_inverted(rate))
                mm = m + full[2 * k] * (1 - 2 * b1) + full[2 * k + 1] * (1 - 2 * b2)
                if ns not in new or mm > new[ns][0]:
                    new[ns] = (mm, path + [u])
        metric = new
    return np.array(max(metric.values(), key=lambda v: v[0])[1], dtype=np.uint8)


def sync_cases():
    yield _case("markers_asm_and_turbo", "sync", "markers",
                expected={"ASM": ASM, "ASM_INVERTED": "E53003E2",
                          "TURBO_ASM_R1_3": "25D5C0CE8990F6C9461BF79C",
                          "TURBO_ASM_R1_4": "034776C7272895B0FCB88938D8D76A4F",
                          "TURBO_ASM_R1_6": "25D5C0CE8990F6C9461BF79CDA2A3F31766F0936B9E40863"},
                source="CCSDS 131.0-B-2 sec. 8: the 32-bit ASM 1ACFFC1D (the hex value from memory, not confirmed "
                       "in a stored copy of the book; universal practice); the turbo markers as the bit strings of "
                       "Figs. 8-3 to 8-5 (rate 1/3, 1/4, 1/6), hex computed from them; the inverted ASM computed")
    # frame sync on hard bits: noise bits, then CADUs with a few ASM errors, one stretch inverted
    seed = 8100
    rng = np.random.default_rng(seed)
    frame_bytes = 64
    lead = 77
    asm = np.unpackbits(np.frombuffer(bytes.fromhex(ASM), np.uint8))
    bits = [rng.integers(0, 2, lead, dtype=np.uint8)]
    cadus = []
    pos = lead
    asm_err = [0, 2, 1, 0, 3, 0]
    inverted = [False, False, False, True, True, True]
    for k in range(6):
        data = rng.integers(0, 256, frame_bytes, dtype=np.uint8)
        m = asm.copy()
        flips = rng.choice(32, asm_err[k], replace=False)
        m[flips] ^= 1
        block = np.concatenate([m, np.unpackbits(data)])
        if inverted[k]:
            block = block ^ 1
        bits.append(block)
        cadus.append({"bit_index": int(pos), "asm_errors": asm_err[k], "inverted": inverted[k],
                      "hex": data.tobytes().hex()})
        pos += len(block)
    bits.append(rng.integers(0, 2, 40, dtype=np.uint8))
    allbits = np.concatenate(bits)
    yield _case(f"framesync_hard_{frame_bytes}B_6cadus", "sync", "frame_sync",
                params={"frame_bits": 8 * frame_bytes, "max_errors": 4, "flywheel": 3},
                inp={"hex": np.packbits(allbits).tobytes().hex(), "n_bits": int(len(allbits))},
                expected={"cadus": cadus},
                source="computed by vectors/make.py: random bits with CADUs of the ASM 1ACFFC1D (CCSDS 131.0-B-2 "
                       "sec. 8) with chosen bit errors, three of them complemented (the NRZ-L 180-degree ambiguity of "
                       "sec. 4.3.10)", seed=seed)


def link_cases():
    data_len = 100 - 6 - 4 - 2
    seed = 9100
    rng = np.random.default_rng(seed)
    body = rng.integers(0, 256, data_len, dtype=np.uint8).tobytes()
    word = clcw(vcid=7, status=0, no_rf=False, no_bitlock=True, lockout=False, wait=True, retransmit=False,
                farm_b=2, report=0x9C)
    hdr = tm_header(scid=0x123, vcid=5, ocf=True, mcfc=0x45, vcfc=0x67, fhp=0)
    frame = hdr + body + word
    frame += crc16_ref(frame).to_bytes(2, "big")
    frames = {"kind": "tm", "length": 100, "fecf": True, "ocf": True, "spacecraft_id": 0x123}
    fields = {"scid": 0x123, "vcid": 5, "mcfc": 0x45, "vcfc": 0x67, "fhp": 0, "ocf_flag": True,
              "version": 0, "sec_header_flag": False, "sync_flag": False}
    clcw_fields = {"vcid": 7, "status_field": 0, "cop_in_effect": 1, "no_rf_available": False,
                   "no_bit_lock": True, "lockout": False, "wait": True, "retransmit": False,
                   "farm_b_counter": 2, "report_value": 0x9C}
    src = ("computed by vectors/make.py: TM primary header, CCSDS 132.0-B sec. 4.1.2 (SCID 0x123, VCID 5, OCF, "
           "MCFC 0x45, VCFC 0x67, FHP 0 give 12 3B 45 67 18 00), CLCW of CCSDS 232.0-B sec. 4.2, " + SRC_LAYOUT +
           f"; FECF per CCSDS 132.0-B sec. 4.1.6 by {CRCCHECK}")
    yield _case("tm_frame_header_example_fecf_ocf", "link", "tm_frame", params={"frames": frames},
                inp={"hex": frame.hex()}, expected={"status": "ok", "fields": fields, "clcw": clcw_fields,
                                                     "data_field": body.hex()}, source=src, seed=seed)
    bad = bytearray(frame)
    bad[20] ^= 0x10
    yield _case("tm_frame_fecf_error", "link", "tm_frame", params={"frames": frames}, inp={"hex": bytes(bad).hex()},
                expected={"status": "fecf_error"}, source=src + "; one data bit flipped", seed=seed)
    other = tm_header(scid=0x124, vcid=5, ocf=True, mcfc=0x45, vcfc=0x67, fhp=0) + body + word
    other += crc16_ref(other).to_bytes(2, "big")
    yield _case("tm_frame_foreign_scid", "link", "tm_frame", params={"frames": frames}, inp={"hex": other.hex()},
                expected={"status": "foreign_scid"}, source=src + "; SCID 0x124 against a profile of 0x123", seed=seed)
    idle = tm_header(scid=0x123, vcid=7, ocf=True, mcfc=0x46, vcfc=0x00, fhp=0x7FE) + body + word
    idle += crc16_ref(idle).to_bytes(2, "big")
    yield _case("tm_frame_idle_fhp7fe", "link", "tm_frame", params={"frames": frames}, inp={"hex": idle.hex()},
                expected={"status": "idle", "fields": {"fhp": 0x7FE, "vcid": 7}},
                source="CCSDS 130.1-G-2 (only-idle-data frames: first header pointer 11111111110); TM header per "
                       "CCSDS 132.0-B sec. 4.1.2, " + SRC_LAYOUT, seed=seed)
    # AOS: REFERENCES.md sec. 4 example header, M_PDU header with FHP, no FHEC, no insert zone
    aos = aos_header(scid=0xAB, vcid=0x2A, vcfc=0x123456)
    mpdu = (0x0005).to_bytes(2, "big")
    aos_body = rng.integers(0, 256, 120 - 6 - 2, dtype=np.uint8).tobytes()
    aos_frame = aos + mpdu + aos_body
    yield _case("aos_frame_header_example", "link", "aos_frame",
                params={"frames": {"kind": "aos", "length": 120, "fecf": False, "ocf": False, "spacecraft_id": 0xAB}},
                inp={"hex": aos_frame.hex()},
                expected={"status": "ok", "fields": {"version": 1, "scid": 0xAB, "vcid": 0x2A, "vcfc": 0x123456,
                                                      "replay_flag": False, "fhp": 5}},
                source="computed by vectors/make.py: AOS primary header, CCSDS 732.0-B sec. 4.1.2 (SCID 0xAB, "
                       "VCID 0x2A, VC count 0x123456 give 6A EA 12 34 56 00), M_PDU header with first header "
                       "pointer 5, " + SRC_LAYOUT, seed=seed)
    yield from fhec_cases(rng)


def fhec_parity_ref(hdr6: bytes) -> int:
    """FHEC by galois (PyPI): RS(15,11) over GF(16) shortened to (10,6), roots alpha^6..alpha^9."""
    gf, rs = _galois_fhec()
    msg = gf([hdr6[0] >> 4, hdr6[0] & 15, hdr6[1] >> 4, hdr6[1] & 15, hdr6[5] >> 4, hdr6[5] & 15])
    par = [int(v) for v in rs.encode(msg)[6:]]
    return (par[0] << 12) | (par[1] << 8) | (par[2] << 4) | par[3]


def _galois_fhec():
    import galois

    gf = galois.GF(2**4, irreducible_poly="x^4 + x + 1", compile="python-calculate")
    return gf, galois.ReedSolomon(15, 11, field=gf, c=6)


def fhec_cases(rng):
    """AOS frames with a frame header error control field: clean, one and two nibbles corrupted (corrected),
    and three nibbles corrupted where galois finds no codeword within distance 2 (bad_header)."""
    gf, rs = _galois_fhec()
    frames = {"kind": "aos", "length": 64, "fecf": True, "ocf": False, "spacecraft_id": 0x5C, "fhec": True}
    hdr = aos_header(scid=0x5C, vcid=0x11, vcfc=0x00ABCD, replay=True)
    fhec = fhec_parity_ref(hdr)
    body = (0x0000).to_bytes(2, "big") + rng.integers(0, 256, 64 - 8 - 2 - 2, dtype=np.uint8).tobytes()
    good = hdr + fhec.to_bytes(2, "big") + body
    good += crc16_ref(good).to_bytes(2, "big")
    src = ("computed by vectors/make.py: the AOS frame header error control of CCSDS 732.0-B sec. 4.1.2.6, a "
           "Reed-Solomon (10,6) code over GF(16) (field polynomial x^4+x+1, generator roots alpha^6..alpha^9; "
           "code definition from memory, not confirmed), computed and decoded with galois "
           f"{LIBRARIES['galois']} (PyPI); FECF per CCSDS 132.0-B sec. 4.1.6 by {CRCCHECK} over the uncorrupted frame")
    fields = {"version": 1, "scid": 0x5C, "vcid": 0x11, "vcfc": 0x00ABCD, "replay_flag": True, "fhp": 0}

    def word_of(frame: bytes) -> list[int]:
        return [frame[0] >> 4, frame[0] & 15, frame[1] >> 4, frame[1] & 15, frame[5] >> 4, frame[5] & 15,
                frame[6] >> 4, frame[6] & 15, frame[7] >> 4, frame[7] & 15]

    def with_word(frame: bytes, w: list[int]) -> bytes:
        f = bytearray(frame)
        f[0], f[1], f[5] = (w[0] << 4) | w[1], (w[2] << 4) | w[3], (w[4] << 4) | w[5]
        f[6], f[7] = (w[6] << 4) | w[7], (w[8] << 4) | w[9]
        return bytes(f)

    yield _case("aos_fhec_clean", "link", "aos_frame", params={"frames": frames}, inp={"hex": good.hex()},
                expected={"status": "ok", "fields": {**fields, "fhec_corrected": 0}}, source=src)
    for name, flips in (("one_nibble", {1: 0x6}), ("two_nibbles", {3: 0x9, 8: 0x4})):
        w = word_of(good)
        for pos, v in flips.items():
            w[pos] ^= v
        bad = with_word(good, w)
        dec, n = rs.decode(gf(w), errors=True)
        assert int(n) == len(flips) and [int(x) for x in dec] == word_of(good)[:6]
        yield _case(f"aos_fhec_{name}_corrected", "link", "aos_frame", params={"frames": frames},
                    inp={"hex": bad.hex()},
                    expected={"status": "ok", "fields": {**fields, "fhec_corrected": len(flips)}},
                    source=src + f"; nibbles {sorted(flips)} of the ten code symbols corrupted")
    for seed in range(9400, 9500):
        r = np.random.default_rng(seed)
        w = word_of(good)
        for pos in r.choice(10, 3, replace=False):
            w[pos] ^= int(r.integers(1, 16))
        if int(rs.decode(gf(w), errors=True)[1]) == -1:
            break
    else:
        raise SystemExit("no uncorrectable FHEC pattern found")
    yield _case("aos_fhec_three_nibbles_uncorrectable", "link", "aos_frame", params={"frames": frames},
                inp={"hex": with_word(good, w).hex()}, expected={"status": "bad_header"},
                source=src + "; three nibbles corrupted, galois finds no codeword within distance 2", seed=seed)


def _packet_stream(rng, specs, t0_unix_s=None):
    """Space packets per (apid, data_len, count, with_cuc) spec, interleaved round-robin."""
    pkts = []
    counters = {}
    k = 0
    queue = [list(s) for s in specs]
    while any(q[2] > 0 for q in queue):
        for q in queue:
            apid, dlen, count, with_cuc = q
            if count <= 0:
                continue
            q[2] -= 1
            seq = counters.get(apid, 0)
            counters[apid] = (seq + 1) & 0x3FFF
            user = rng.integers(0, 256, dlen, dtype=np.uint8).tobytes()
            info = {"apid": apid, "seq_count": seq}
            if with_cuc:
                t = t0_unix_s + k
                tai = t + UNIX_TO_1958_S + 37  # REFERENCES.md sec. 6: TAI - UTC = 37 s since 2017
                fine = (k * 9000) & 0xFFFF
                cuc = tai.to_bytes(4, "big") + fine.to_bytes(2, "big")
                user = cuc + user
                frac_ns = (2 * fine * 1_000_000_000 + 65536) // (2 * 65536)
                info["tai_ns_1958"] = (tai * 1_000_000_000) + frac_ns
                info["packet_time"] = _iso_ns(t * 1_000_000_000 + frac_ns)
            pkt = space_packet(apid=apid, seq_count=seq, data=user, sec_hdr=with_cuc)
            info["hex"] = pkt.hex()
            pkts.append(info)
            k += 1
    return pkts


def _tm_frames(stream: bytes, *, length, scid, vcid, ocf, fecf, first_header_offsets, mcfc0=0, extra_idle=1,
               kind="tm"):
    """Cut a packet stream into TM (or AOS M_PDU) frames with FHPs; pad with an idle packet; add idle frames."""
    dfl = length - 6 - (4 if ocf else 0) - (2 if fecf else 0) - (2 if kind == "aos" else 0)
    stream = bytearray(stream)
    rem = (-len(stream)) % dfl
    if 0 < rem < 7:
        rem += dfl
    if rem:
        stream += space_packet(apid=0x7FF, seq_count=0, data=bytes([0x55]) * (rem - 6))
    starts = set(first_header_offsets) | ({len(stream) - rem} if rem else set())
    frames = []
    n = len(stream) // dfl
    for f in range(n + extra_idle):
        if f < n:
            chunk = bytes(stream[f * dfl:(f + 1) * dfl])
            inside = sorted(s - f * dfl for s in starts if f * dfl <= s < (f + 1) * dfl)
            fhp = inside[0] if inside else 0x7FF
        else:
            chunk = bytes([0x55]) * dfl
            fhp = 0x7FE
        if kind == "tm":
            hdr = tm_header(scid=scid, vcid=vcid if f < n else 7, ocf=ocf, mcfc=mcfc0 + f, vcfc=f if f < n else 0,
                            fhp=fhp)
        else:  # AOS: primary header, then the M_PDU header (5 spare bits, 11-bit FHP); idle frames on VC 63
            hdr = aos_header(scid=scid, vcid=vcid if f < n else 63, vcfc=f if f < n else 0) + fhp.to_bytes(2, "big")
        fr = hdr + chunk + (clcw(vcid=0, report=f) if ocf else b"")
        if fecf:
            fr += crc16_ref(fr).to_bytes(2, "big")
        frames.append(fr)
    return frames


def packet_cases():
    seed = 9300
    rng = np.random.default_rng(seed)
    pkts = _packet_stream(rng, [(100, 30, 3, False), (200, 75, 2, False)])
    stream = b"".join(bytes.fromhex(p["hex"]) for p in pkts)
    offsets, o = [], 0
    for p in pkts:
        offsets.append(o)
        o += len(p["hex"]) // 2
    frames = _tm_frames(stream, length=64, scid=499, vcid=1, ocf=False, fecf=False, first_header_offsets=offsets,
                        extra_idle=0)
    yield _case("packets_tm_spanning_frames_len64", "packets", "packets_from_frames",
                params={"frames": {"kind": "tm", "length": 64, "fecf": False, "ocf": False, "spacecraft_id": 499}},
                inp={"frames": [f.hex() for f in frames]},
                expected={"packets": [{"apid": p["apid"], "seq_count": p["seq_count"], "hex": p["hex"]}
                                      for p in pkts]},
                source="computed by vectors/make.py: space packets per CCSDS 133.0-B sec. 4.1 cut into TM frames "
                       "with first header pointers per CCSDS 132.0-B sec. 4.1.2.7 (" + SRC_LAYOUT + ")", seed=seed)
    pkt = space_packet(apid=0x123, seq_count=0x1234, data=bytes(range(10)), sec_hdr=True)
    frames = _tm_frames(pkt, length=40, scid=499, vcid=0, ocf=False, fecf=False, first_header_offsets=[0],
                        extra_idle=0)
    yield _case("packets_header_example_apid0x123", "packets", "packets_from_frames",
                params={"frames": {"kind": "tm", "length": 40, "fecf": False, "ocf": False, "spacecraft_id": 499}},
                inp={"frames": [f.hex() for f in frames]},
                expected={"packets": [{"apid": 0x123, "seq_count": 0x1234, "seq_flags": 3, "hex": pkt.hex()}],
                          "header": "0923D2340009"},
                source="computed by vectors/make.py: space packet primary header of CCSDS 133.0-B sec. 4.1.3 "
                       "(APID 0x123, telemetry, secondary header, unsegmented, count 0x1234, 10 data octets give "
                       "09 23 D2 34 00 09); the rest of the 40-octet frame is one idle packet (APID 0x7FF); "
                       + SRC_LAYOUT)


def timecode_cases():
    yield _case("cuc_1e_2000_01_01_tai", "packets", "cuc",
                params={"pfield": 0x1E}, inp={"hex": "4EFFA2000000"},
                expected={"tai_ns_1958": 1_325_376_000 * 10**9, "octets": 6},
                source="computed: CCSDS 301.0-B sec. 3.2 CUC with the implicit P-field 0x1E (level 1, 1958 TAI "
                       "epoch, 4 coarse + 2 fine octets; layout from memory, not confirmed); 2000-01-01T00:00:00 TAI "
                       "is 15340 days = 1325376000 s = 0x4EFFA200 after 1958-01-01")
    yield _case("cuc_explicit_1e_fine_half", "packets", "cuc",
                params={"pfield": None}, inp={"hex": "1E" + "4EFFA2008000"},
                expected={"tai_ns_1958": 1_325_376_000 * 10**9 + 500_000_000, "octets": 7},
                source="computed: CCSDS 301.0-B sec. 3.2 CUC with an explicit P-field 0x1E (level 1, 4 coarse + 2 "
                       "fine octets; layout from memory, not confirmed); fine 0x8000 = 0.5 s")
    day = 15340
    for name, tfield, utc_s in (("midnight", "3BEC00000000", 0), ("noon", "3BEC02932E00", 43200)):
        # 2000-01-01: TAI - UTC = 32 s (IERS; REFERENCES.md sec. 6 leap-second table, from memory)
        tai = (day * 86400 + utc_s + 32) * 10**9
        yield _case(f"cds_40_2000_01_01_{name}", "packets", "cds", params={"pfield": 0x40},
                    inp={"hex": tfield}, expected={"tai_ns_1958": tai, "octets": 6},
                    source="computed: CCSDS 301.0-B sec. 3.3 CDS with P-field 0x40 (1958 epoch, 16-bit day, no "
                           "sub-millisecond field; layout from memory, not confirmed); 2000-01-01 is day 15340 = "
                           "0x3BEC; TAI-UTC = 32 s in 2000 (IERS Bulletin C; from memory, not confirmed)")


# ---- whole links: channel bits with the packets they carry ----------------------------------

def _link_bits(profile: dict, frames: list[bytes], rng, *, lead_bits: int, flips: int,
               corrupt: tuple[int, int] | None = None) -> np.ndarray:
    coding, link = profile["coding"], profile["link"]
    e, interleave = coding["reed_solomon"], coding["interleave"]
    info = [rng.integers(0, 2, lead_bits, dtype=np.uint8)]
    for f, fr in enumerate(frames):
        block = rs_codeblock(fr, e, interleave) if e else fr
        if corrupt is not None and f == corrupt[0]:
            # more symbol errors in codeword 0 than E: the codeblock must be reported uncorrectable
            block = bytearray(block)
            rows = len(block) // interleave
            for r in rng.choice(rows, corrupt[1], replace=False):
                block[r * interleave] ^= int(rng.integers(1, 256))
            block = bytes(block)
        if coding["randomizer"]:
            block = randomize(block)
        info.append(np.unpackbits(np.frombuffer(bytes.fromhex(ASM) + block, np.uint8)))
    info.append(rng.integers(0, 2, 96, dtype=np.uint8))
    bits = np.concatenate(info)
    rate = coding["convolutional"]
    chan = conv_encode_ref(bits, rate) if rate != "none" else bits.copy()
    if flips:
        # isolated channel bit errors well inside the stream (each correctable alone)
        span = len(chan) - 2000
        where = np.sort(rng.choice(span // 200, flips, replace=False)) * 200 + 1000
        chan[where] ^= 1
    if link["line_code"] == "nrz-m":
        # NRZ-M: a 1 toggles the level, a 0 keeps it (CCSDS 131.0-B sec. 3.3.3 / 401.0-B)
        chan = (np.cumsum(chan) & 1).astype(np.uint8)
    return chan


def chain_cases():
    specs = [
        ("link_bpsk_conv12_rs16_i1_tm223_nrzl", {
            "link": {"modulation": "bpsk", "line_code": "nrz-l", "symbol_rate": 16000.0},
            "coding": {"convolutional": "1/2", "reed_solomon": 16, "interleave": 1, "randomizer": True},
            "frames": {"kind": "tm", "length": 223, "fecf": False, "ocf": True, "spacecraft_id": 499},
            "packets": {"time_code": [{"apid": 100, "code": "cuc", "pfield": 0x1E}]},
        }, [(100, 40, 4, True), (300, 150, 2, False)], 9, 6),
        ("link_bpsk_uncoded_rs8_i2_fill_tm400_nrzm_fecf", {
            "link": {"modulation": "bpsk", "line_code": "nrz-m", "symbol_rate": 16000.0},
            "coding": {"convolutional": "none", "reed_solomon": 8, "interleave": 2, "randomizer": True},
            "frames": {"kind": "tm", "length": 400, "fecf": True, "ocf": False, "spacecraft_id": 77},
        }, [(200, 300, 3, False), (201, 20, 3, False)], 5, 4),
        ("link_bpsk_conv34_no_rs_tm160_fecf", {
            "link": {"modulation": "bpsk", "line_code": "nrz-l", "symbol_rate": 16000.0},
            "coding": {"convolutional": "3/4", "reed_solomon": 0, "interleave": 1, "randomizer": True},
            "frames": {"kind": "tm", "length": 160, "fecf": True, "ocf": False, "spacecraft_id": 1000},
        }, [(42, 90, 4, False)], 0, 0),
        ("link_bpsk_conv12_rs16_i2_aos446", {
            "link": {"modulation": "bpsk", "line_code": "nrz-l", "symbol_rate": 16000.0},
            "coding": {"convolutional": "1/2", "reed_solomon": 16, "interleave": 2, "randomizer": True},
            "frames": {"kind": "aos", "length": 446, "fecf": False, "ocf": False, "spacecraft_id": 0xAB},
        }, [(512, 200, 3, False), (513, 33, 4, False)], 5, 2),
        ("link_bpsk_uncoded_rs8_i1_tm239_one_uncorrectable", {
            "link": {"modulation": "bpsk", "line_code": "nrz-l", "symbol_rate": 16000.0},
            "coding": {"convolutional": "none", "reed_solomon": 8, "interleave": 1, "randomizer": True},
            "frames": {"kind": "tm", "length": 239, "fecf": False, "ocf": False, "spacecraft_id": 3},
        }, [(10, 37, 12, False)], 0, 1),
    ]
    corrupt_frames = {"link_bpsk_uncoded_rs8_i1_tm239_one_uncorrectable": (1, 12)}
    for name, prof, traffic, flips, vcid in specs:
        seed = 9000 + zlib.crc32(name.encode()) % 1000
        rng = np.random.default_rng(seed)
        t0 = _unix_s("2026-03-14T09:30:00Z")
        pkts = _packet_stream(rng, traffic, t0)
        stream = b"".join(bytes.fromhex(p["hex"]) for p in pkts)
        offsets, o = [], 0
        for p in pkts:
            offsets.append(o)
            o += len(p["hex"]) // 2
        fr = prof["frames"]
        frames = _tm_frames(stream, length=fr["length"], scid=fr["spacecraft_id"], vcid=vcid, ocf=fr["ocf"],
                            fecf=fr["fecf"], first_header_offsets=offsets, kind=fr["kind"])
        lead = 48 if prof["coding"]["convolutional"] != "3/4" else 45
        corrupt = corrupt_frames.get(name)
        chan = _link_bits(prof, frames, rng, lead_bits=lead, flips=flips, corrupt=corrupt)
        # ERT of a packet = start + (channel symbol index of the first symbol of the ASM of the frame
        # holding its first octet) / channel bit rate (../shared/DESIGN.md data flow; symbol timebase)
        rs_e = prof["coding"]["reed_solomon"]
        block_len = len(rs_codeblock(frames[0], rs_e, prof["coding"]["interleave"])) if rs_e else len(frames[0])
        cadu_bits = 8 * (4 + block_len)
        rate = prof["coding"]["convolutional"]
        dfl = fr["length"] - 6 - (4 if fr["ocf"] else 0) - (2 if fr["fecf"] else 0) - (2 if fr["kind"] == "aos" else 0)
        for p, off in zip(pkts, offsets):
            bit = lead + (off // dfl) * cadu_bits
            if rate == "none":
                sym = bit
            else:
                c1, c2 = PUNCTURE[rate]
                per_col = [int(a) + int(b) for a, b in zip(c1, c2)]
                full, rest = divmod(bit, len(c1))
                sym = full * sum(per_col) + sum(per_col[:rest])
            p["ert"] = _iso_ns(t0 * 10**9 + (sym * 10**9 + 8000) // 16000)
        statuses = ["ok"] * (len(frames) - 1) + ["idle"]
        delivered = pkts
        if corrupt is not None:
            # a frame that fails RS is never passed on as good: every packet with an octet in its data
            # field is lost; the next frame's first header pointer resynchronizes the extractor
            statuses[corrupt[0]] = "rs_uncorrectable"
            lo, hi = corrupt[0] * dfl, (corrupt[0] + 1) * dfl
            delivered = []
            for p, off in zip(pkts, offsets):
                end = off + len(p["hex"]) // 2
                if not (off < hi and end > lo):
                    delivered.append(p)
        expected = {
            "packets": [dict(p) for p in delivered],
            "frames": len(frames),
            "frames_ok": statuses.count("ok"),
            "frames_idle": 1,
            "frame_statuses": statuses,
        }
        yield _case(name, "chain", "whole_link",
                    params={"profile": prof, "start": "2026-03-14T09:30:00Z", "channel_bit_errors": flips,
                            "uncorrectable_frame": None if corrupt is None else corrupt[0]},
                    inp={"channel_bits": int(len(chan))}, expected=expected,
                    source=f"computed by vectors/make.py: RS by {REEDSOLO} for {SRC_RS_CODE}; convolutional code by "
                           f"{COMMPY} (CCSDS 131.0-B sec. 3.3, G2 inverted at rate 1/2 only; sec. 3.4 puncturing); "
                           f"randomizer of sec. 9; FECF by {CRCCHECK}; frame, packet and CUC layouts of CCSDS "
                           f"132.0-B, 133.0-B and 301.0-B ({SRC_LAYOUT}); TAI-UTC = 37 s since 2017 (IERS "
                           "Bulletin C 54)",
                    seed=seed, kat=False, arrays={"channel_bits_packed": np.packbits(chan)})


# ---- LDPC and turbo encoders (CCSDS 131.0-B-2 sec. 6 and 7) ----------------------------------------------------

SRC_C2 = ("the (8160,7136) LDPC code of CCSDS 131.0-B-2 sec. 7.3: the circulants of Table 7-1, the systematic "
          "(8176,7154) subcode of sec. 7.3.4, shortened by its first 18 information bits and extended by two zero "
          "bits (CCSDS 130.1-G-2 sec. 8); the sent codeword is the 7136 information bits, the 1022 parity bits and "
          "the two zeros (1020 octets)")
SRC_AR4JA = ("the AR4JA (2048,1024), (1536,1024) and (1280,1024) codes of CCSDS 131.0-B-2 sec. 7.4: H from the "
             "theta and phi tables (131.0-B-5 Tables 7-3 and 7-4 as carried by a general-purpose LDPC design "
             "library; the 60 values printed on 131.0-B-2 p. 7-10 agree), G by the recipe of sec. 7.4.3, the "
             "last M codeword bits punctured (sec. 7.4.3.5)")
# (code params, info description, info octets, first 16 octets of the sent parity, SHA-256 of the sent codeword)
LDPC_CHECK_VALUES = (
    ({"code": "c2"}, "ones", b"\xff" * 892, "A4110585FE2461B17E33B4B72F8AD799",
     "1306abced50272d1b90caee85d95b197fa3b9263e387f531b9d089df85adf0fd"),
    ({"code": "c2"}, "first_bit", b"\x80" + bytes(891), "DD672ADFAB662A941EFF77F546467F82",
     "ffc70301fa99bde8b42c56ecfcf59d29893393a48cbf85c5fc7c871a57bc27d3"),
    ({"code": "c2"}, "ramp", bytes(i % 256 for i in range(892)), "7E4D270EFA46FC16ACEE8A556F935672",
     "728a37d9deb3b9926d415b3812c21932c95be4598f4dd177cbb7ad455feb9518"),
    ({"code": "ar4ja", "rate": "1/2", "k": 1024}, "first_bit", b"\x80" + bytes(127),
     "CFA794F49FA5A0D88BB31D8FCA7EA8BB", "609cdbd430248e229047f3572802799f791593b1e7912a63a0f2512cc7a64d60"),
    ({"code": "ar4ja", "rate": "1/2", "k": 1024}, "ramp", bytes(range(128)),
     "EEA9AAAF98D916CE6C2B282D1A5B944C", "7c5e6c22b8ec032effe5873b7e7786b968f10fd61d96131d6812e3be5f9705eb"),
    ({"code": "ar4ja", "rate": "2/3", "k": 1024}, "first_bit", b"\x80" + bytes(127),
     "51236781781D416AB0C8419FA21559A8", "ce6fbf5510aeceee8ea3ef43168cb072db6c9e78ba95a00d02c91daec543d721"),
    ({"code": "ar4ja", "rate": "2/3", "k": 1024}, "ramp", bytes(range(128)),
     "994D02175387C8DD422E4629066A026D", "345b48d3e8fd72b94cae5565022cdee0efd3257d54d54f80debe3c53619e5a20"),
    ({"code": "ar4ja", "rate": "4/5", "k": 1024}, "first_bit", b"\x80" + bytes(127),
     "678ECB51FE821D5CFA5F424BF55927AA", "788cdc40e3c1096c4080eed97467760874f1098056cdcde50dda96a13a4a45d6"),
    ({"code": "ar4ja", "rate": "4/5", "k": 1024}, "ramp", bytes(range(128)),
     "F168E07945E308AEEFD16856600A90FA", "002961b4d4e1e053e72323867c3c051c3a5142816ddcf4fd0dffaf2d0e371b3f"),
)
INFO_TEXT = {"ones": "every information bit 1", "first_bit": "the first information bit 1, the others 0",
             "ramp": "information octets 00 01 02 ... (i mod 256)"}

# pi(1..12) for every k and pi(k): computed from the sec. 6.3 formula in the project's research notes
TURBO_PI_FIRST = (4, 171, 300, 467, 596, 763, 892, 1059, 1188, 1355, 1484, 1651)
TURBO_PI_LAST = {1784: 1613, 3568: 3397, 7136: 6965, 8920: 8749}
SRC_TURBO = ("the turbo code of CCSDS 131.0-B-2 sec. 6.3: forward vectors G1 = 11011, G2 = 10101, G3 = 11111 (sec. "
             "6.3 h), feedback G0 = 10011 (from memory, not confirmed: the digits were not in the stored pages), the "
             "interleaver formula of sec. 6.3 step 2 (encoder b reads bit pi(s) at time s), four tail bit times with "
             "the feedback fed back in, the rate's multiplexing (rate 1/2: out0a out1a / out0a out1b alternately; 1/3: "
             "out0a out1a out1b; 1/4: out0a out2a out3a out1b; 1/6: out0a out1a out2a out3a out1b out3b)")


def _independent_transmitter():
    """The test suite's independent transmitter (tests/third_party_tx.py: plain shift registers and the interleaver
    formula typed in from the standard, no pipeline code): the one outside reference for the turbo encoder."""
    sys.path.insert(0, str(ROOT.parent / "tests"))
    try:
        import third_party_tx
    finally:
        sys.path.pop(0)
    return third_party_tx


def block_code_cases():
    for params, what, info, parity16, sha in LDPC_CHECK_VALUES:
        code = params["code"] if params["code"] == "c2" else f"ar4ja_r{params['rate'].replace('/', '')}_k1024"
        src = SRC_C2 if params["code"] == "c2" else SRC_AR4JA
        yield _case(f"ldpc_encode_{code}_{what}", "fec", "ldpc_encode", params=params,
                    inp={"hex": info.hex()}, expected={"parity_first16": parity16, "sha256": sha},
                    source=f"{src}; information: {INFO_TEXT[what]}; the first 16 octets of the sent parity and the "
                           "SHA-256 of the sent codeword octets, computed (numpy, GF(2)) from those tables in the "
                           "project's research notes and checked there against H")
    tx = _independent_transmitter()
    for k, last in TURBO_PI_LAST.items():
        pi = tx.interleaver_from_formula(k)
        assert tuple(pi[:12]) == TURBO_PI_FIRST and pi[-1] == last and sorted(pi) == list(range(1, k + 1))
        yield _case(f"turbo_interleaver_k{k}", "fec", "turbo_interleaver", params={"k": k},
                    expected={"first_1_based": list(TURBO_PI_FIRST), "last_1_based": last},
                    source="the interleaver formula of CCSDS 131.0-B-2 sec. 6.3 step 2 (k1 = 8, k2 = k/8, primes "
                           "31 37 43 47 53 59 61 67), s and pi(s) counted from 1, encoder b reading bit pi(s) at "
                           "time s: pi(1..12) and pi(k) computed from it in the project's research notes (and "
                           "recomputed one index at a time by the independent test transmitter); a permutation of "
                           "1..k")
    seed = 6300
    info = np.unpackbits(np.random.default_rng(seed).integers(0, 256, 223, dtype=np.uint8))
    for rate in ("1/2", "1/3", "1/4", "1/6"):
        cw, _ = tx.reference_encode(info, rate)
        yield _case(f"turbo_encode_r{rate.replace('/', '')}_k1784", "fec", "turbo_encode", params={"rate": rate},
                    inp={"hex": np.packbits(info).tobytes().hex()},
                    expected={"hex": np.packbits(cw).tobytes().hex(), "n_bits": int(cw.size)},
                    source=f"computed by a plain shift-register encoder (the test suite's independent transmitter) "
                           f"from {SRC_TURBO}; random information of 223 octets", seed=seed)


def all_cases():
    rng = np.random.default_rng(0)
    groups = {
        "randomizer": randomizer_cases(),
        "crc": crc_cases(rng),
        "reed_solomon": rs_cases(),
        "convolutional": conv_cases(),
        "sync": sync_cases(),
        "link": link_cases(),
        "packets": packet_cases(),
        "timecodes": timecode_cases(),
        "chain": chain_cases(),
        "block_codes": block_code_cases(),
    }
    for folder, cases in groups.items():
        for case in cases:
            yield folder, case


def _npz_bytes(arrays: dict) -> bytes:
    buf = io.BytesIO()
    np.savez_compressed(buf, **arrays)
    return buf.getvalue()


def render(case: dict) -> dict[str, bytes]:
    """File name -> content for one case (the .json and, if any, its .npz).

    Refuses a case whose source is empty or names a file (a user of the installed package has only the
    vector files themselves).
    """
    case = dict(case)
    src = case["source"]
    if not src or "REFERENCES" in src or ".md" in src:
        raise SystemExit(f"{case['name']}: the source must be self-contained text, not {src!r}")
    arrays = case.pop("_arrays")
    files = {}
    if arrays:
        case["data_file"] = case["name"] + ".npz"
        files[case["data_file"]] = _npz_bytes(arrays)
    files[case["name"] + ".json"] = (json.dumps(case, indent=1, sort_keys=False) + "\n").encode()
    return files


def _check_library_versions() -> None:
    """Writing vectors with other library versions than the sources name is refused."""
    from importlib.metadata import version

    wrong = {name: version(name) for name, want in LIBRARIES.items() if version(name) != want}
    if wrong:
        raise SystemExit(f"installed {wrong} differ from LIBRARIES {LIBRARIES}: the sources would name the wrong "
                         "versions; check the new versions and update LIBRARIES")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true", help="compare with the files on disk instead of writing")
    args = ap.parse_args(argv)
    if not args.check:
        _check_library_versions()
    mismatches = 0
    count = 0
    written = set()
    for folder, case in all_cases():
        count += 1
        for fname, content in render(case).items():
            for base in (ROOT, BUNDLED):
                path = base / folder / fname
                if args.check:
                    same = path.exists() and (path.read_bytes() == content or fname.endswith(".npz") and
                                              _same_npz(path.read_bytes(), content))
                    if not same:
                        print(f"differs: {path.relative_to(ROOT.parent)}")
                        mismatches += 1
                else:
                    path.parent.mkdir(parents=True, exist_ok=True)
                    path.write_bytes(content)
                written.add(path)
    # a file no case makes any more is stale (a renamed or removed case): reported, or removed when writing
    for base in (ROOT, BUNDLED):
        for path in sorted(base.rglob("*")):
            if path.suffix in (".json", ".npz") and path.is_file() and path not in written:
                if args.check:
                    print(f"not made by vectors/make.py: {path.relative_to(ROOT.parent)}")
                    mismatches += 1
                else:
                    path.unlink()
        for folder in sorted((d for d in base.rglob("*") if d.is_dir()), reverse=True):
            if not any(folder.iterdir()):
                folder.rmdir()  # a kind no case has any more
    print(f"{count} cases {'checked' if args.check else 'written'} to vectors/ and pipeline/data/vectors/")
    return 1 if mismatches else 0


def _same_npz(a: bytes, b: bytes) -> bool:
    with np.load(io.BytesIO(a), allow_pickle=False) as x, np.load(io.BytesIO(b), allow_pickle=False) as y:
        return set(x.files) == set(y.files) and all(np.array_equal(x[k], y[k]) for k in x.files)


if __name__ == "__main__":
    sys.exit(main())
