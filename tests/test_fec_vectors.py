"""Known-answer vectors in vectors/fec/: one test per file (sources in each .sidecar.json)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from pipeline.fec import conv_encode, crc16, pn_sequence, rs_decode, rs_encode, viterbi_decode

VECTOR_DIR = Path(__file__).resolve().parent.parent / "vectors" / "fec"
CASES = sorted(p for p in VECTOR_DIR.glob("*.json") if not p.name.endswith(".sidecar.json"))


def _bits(text):
    return np.array([int(c) for c in text], dtype=np.uint8)


def test_every_vector_has_a_sidecar():
    assert len(CASES) >= 10
    for path in CASES:
        meta = json.loads(path.with_name(path.stem + ".sidecar.json").read_text())
        assert meta["generator"] and meta["source"] and "seed" in meta


@pytest.mark.kat
@pytest.mark.parametrize("path", CASES, ids=[p.stem for p in CASES])
def test_vector(path):
    case = json.loads(path.read_text())
    kind = case["kind"]
    if kind == "rs":
        e, interleave = case["e"], case["interleave"]
        data = bytes.fromhex(case["data_hex"])
        assert rs_encode(data, e=e, interleave=interleave).hex() == case["codeblock_hex"]
        out, corrected = rs_decode(bytes.fromhex(case["received_hex"]), e=e, interleave=interleave)
        assert out == data and list(corrected) == case["corrected"]
    elif kind == "conv":
        assert "".join(map(str, conv_encode(_bits(case["bits"]), case["rate"]))) == case["symbols"]
    elif kind == "viterbi":
        soft = np.array(case["soft_int8"], dtype=np.float32)
        out = viterbi_decode(soft, case["rate"], initial_state=case["initial_state"])
        assert "".join(map(str, out)) == case["bits"]
    elif kind == "pn":
        assert pn_sequence(case["n"]).tobytes().hex() == case["hex"]
    elif kind == "crc16":
        for data_hex, value in case["cases"]:
            assert crc16(bytes.fromhex(data_hex)) == value
    else:  # pragma: no cover - a new kind must get a branch here
        pytest.fail(f"{path.name}: unknown vector kind {kind!r}")
