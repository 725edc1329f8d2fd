"""``downlink verify``: run every known-answer vector through the pipeline and report pass/fail.

A vector is one ``.json`` case file (see ``vectors/make.py``, the one generator, for the format),
optionally with a ``.npz`` of arrays beside it; its ``source`` field names where the expected
values come from (standard and section, library and version, or what they were computed from), so
the vectors installed with the package are self-contained.  The runner feeds the case's input to
the pipeline function named by its ``kind`` and compares the result with the case's expected
output.  Any difference, any exception (an import that fails included) and any file the runner
cannot read is a failure: nothing is skipped.
"""

from __future__ import annotations

import json
import sys
import tempfile
import traceback
from collections.abc import Callable
from dataclasses import asdict, dataclass
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["CaseResult", "VectorCase", "default_vectors_dir", "load_cases", "run_case", "run_verify"]


@dataclass(frozen=True)
class VectorCase:
    """One known-answer case read from a vector folder."""

    name: str
    stage: str
    kind: str
    source: str
    path: Path
    data: dict

    @property
    def kat(self) -> bool:
        return bool(self.data.get("kat", True))


@dataclass(frozen=True)
class CaseResult:
    """The outcome of one case: ``passed`` and a one-line ``detail`` (what differed, or what was checked)."""

    name: str
    stage: str
    passed: bool
    source: str
    detail: str

    def as_dict(self) -> dict:
        return asdict(self)


def default_vectors_dir() -> Path:
    """The vectors shipped with the package, or the checkout's ``vectors/`` when run from a checkout.

    A checkout is recognised by ``vectors/make.py`` beside the package folder; it may hold vectors
    newer than the bundled copy (``pipeline/data/vectors``, refreshed by ``vectors/make.py``).
    """
    pkg = Path(str(resources.files("pipeline")))
    checkout = pkg.parent / "vectors"
    if (checkout / "make.py").is_file():
        return checkout
    return pkg / "data" / "vectors"


def load_cases(vectors_dir: str | Path) -> list[VectorCase]:
    """Every case under ``vectors_dir`` (recursively), sorted by path.

    Raises
    ------
    FileNotFoundError
        If ``vectors_dir`` is not a folder.
    """
    root = Path(vectors_dir)
    if not root.is_dir():
        raise FileNotFoundError(f"{root}: vector folder not found")
    cases: list[VectorCase] = []
    for path in sorted(root.rglob("*.json")):
        if path.name.startswith("."):
            continue
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            cases.append(VectorCase(path.stem, path.parent.name, "unreadable", "", path, {"error": str(exc)}))
            continue
        if isinstance(data, dict) and "kind" in data and "expected" in data and data.get("source"):
            cases.append(VectorCase(str(data.get("name", path.stem)), str(data.get("stage", path.parent.name)),
                                    str(data["kind"]), str(data["source"]), path, data))
        else:
            why = "no source" if isinstance(data, dict) and "kind" in data else "not a vector case"
            cases.append(VectorCase(path.stem, path.parent.name, "unknown_format", "", path, {"error": why}))
    return cases


# ---- helpers --------------------------------------------------------------------------------

def _hex(s: str) -> bytes:
    return bytes.fromhex(s)


def _bits(hex_str: str, n_bits: int) -> np.ndarray:
    return np.unpackbits(np.frombuffer(_hex(hex_str), np.uint8))[:n_bits]


def _first_diff(a: bytes, b: bytes) -> str:
    if len(a) != len(b):
        return f"length {len(a)} != expected {len(b)}"
    i = next(i for i in range(len(a)) if a[i] != b[i])
    return f"octet {i}: {a[i]:02X} != expected {b[i]:02X}"


def _cmp_bytes(got: bytes, want: bytes, what: str) -> tuple[bool, str]:
    got, want = bytes(got), bytes(want)
    if got == want:
        return True, f"{what}: {len(want)} octets match"
    return False, f"{what}: {_first_diff(got, want)}"


def _cmp_bits(got, want, what: str) -> tuple[bool, str]:
    got = np.asarray(got, dtype=np.uint8).ravel()
    want = np.asarray(want, dtype=np.uint8).ravel()
    if got.shape == want.shape and np.array_equal(got, want):
        return True, f"{what}: {len(want)} bits match"
    if got.shape != want.shape:
        return False, f"{what}: {len(got)} bits != expected {len(want)}"
    i = int(np.flatnonzero(got != want)[0])
    return False, f"{what}: {int(np.count_nonzero(got != want))} bits differ, first at {i}"


def _cmp_fields(obj: Any, want: dict, what: str) -> tuple[bool, str]:
    """Compare the named attributes (or dict keys) of ``obj``; names are the pipeline's own."""
    for key, value in want.items():
        got = obj.get(key, _MISSING) if isinstance(obj, dict) else getattr(obj, key, _MISSING)
        if got is _MISSING:
            return False, f"{what}: no field {key!r}"
        if isinstance(value, bool):
            got = bool(got)
        if got != value:
            return False, f"{what}: {key} = {got!r}, expected {value!r}"
    return True, f"{what}: {len(want)} fields match"


_MISSING = object()


def _profile_for_frames(frames: dict):
    from pipeline.profile import profile_from_dict

    # link and packet cases carry bare frames: no channel coding around them
    return profile_from_dict({"link": {}, "frames": frames,
                              "coding": {"convolutional": "none", "reed_solomon": 0, "interleave": 1,
                                         "randomizer": False}}, source="<vector>")


def _decoded_frame(frame: bytes, index: int = 0):
    from pipeline.sync import Cadu, DecodedFrame

    cadu = Cadu(data=frame, position=float(index), asm_errors=0, inverted=False, flywheel=False, bit_index=index)
    return DecodedFrame(frame=frame, status="ok", rs_corrected=(), cadu=cadu)


# ---- one runner per kind ----------------------------------------------------------------------

def _run_randomizer(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import pn_sequence

    got = np.asarray(pn_sequence(int(case.data["input"]["n"])), dtype=np.uint8).tobytes()
    return _cmp_bytes(got, _hex(case.data["expected"]["hex"]), "pn_sequence")


def _run_crc16(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import crc16

    got = int(crc16(_hex(case.data["input"]["hex"])))
    want = int(case.data["expected"]["crc"])
    return got == want, f"crc16 = {got:#06x}, expected {want:#06x}"


def _run_rs_encode(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import rs_encode

    p = case.data["params"]
    data = _hex(case.data["input"]["hex"])
    block = bytes(rs_encode(data, p["e"], p["interleave"]))
    ok, detail = _cmp_bytes(block[: len(data)], data, "systematic part")
    if not ok:
        return ok, detail
    return _cmp_bytes(block[len(data):], _hex(case.data["expected"]["parity"]), "check symbols")


def _run_rs_decode(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import rs_decode

    p, want = case.data["params"], case.data["expected"]
    data, corrected = rs_decode(_hex(case.data["input"]["hex"]), p["e"], p["interleave"])
    corrected = [(-1 if c is None else int(c)) for c in corrected]
    if want["ok"]:
        if corrected != list(want["corrected"]):
            return False, f"corrected = {corrected}, expected {want['corrected']}"
        ok, detail = _cmp_bytes(bytes(data), _hex(want["hex"]), "decoded frame")
        return ok, detail + f", {sum(corrected)} symbols corrected"
    failed = [i for i, c in enumerate(corrected) if c < 0]
    if failed != list(want["failed_codewords"]):
        return False, f"uncorrectable codewords {failed}, expected {want['failed_codewords']} (corrected {corrected})"
    return True, f"codewords {failed} reported uncorrectable"


def _run_conv_encode(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import ConvEncoder

    p, inp, want = case.data["params"], case.data["input"], case.data["expected"]
    enc = ConvEncoder(rate=p["rate"], initial_state=int(p["prior_state"]))  # the standard's G2 rule, by default
    if enc.g2_inverted != p["g2_inverted"]:
        return False, f"rate {p['rate']}: G2 inverted = {enc.g2_inverted}, the vector says {p['g2_inverted']}"
    got = enc.process(_bits(inp["hex"], inp["n_bits"]))
    ok, detail = _cmp_bits(got, _bits(want["hex"], want["n_bits"]), f"rate {p['rate']} symbols")
    return ok, detail + f" (G2 {'inverted' if enc.g2_inverted else 'not inverted'})"


def _run_viterbi(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import viterbi_decode

    p, want = case.data["params"], case.data["expected"]
    soft = np.asarray(case.data["input"]["soft"], dtype=np.float32)
    got = np.asarray(viterbi_decode(soft, p["rate"], initial_state=p.get("initial_state")), dtype=np.uint8)
    n = want["n_bits"]
    ok, detail = _cmp_bits(got[:n], _bits(want["hex"], n), f"rate {p['rate']} decoded")
    return ok, detail + f" ({p.get('hard_symbol_errors', '?')} hard symbol errors in the input)"


def _run_markers(case: VectorCase) -> tuple[bool, str]:
    import pipeline.fec as fec

    for name, value in case.data["expected"].items():
        got = getattr(fec, name, None)
        if got is None:
            return False, f"pipeline.fec has no {name}"
        if bytes(got) != _hex(value):
            return False, f"{name} = {bytes(got).hex().upper()}, expected {value}"
    return True, f"{len(case.data['expected'])} markers match"


def _run_frame_sync(case: VectorCase) -> tuple[bool, str]:
    from pipeline.sync import FrameSync

    p, inp = case.data["params"], case.data["input"]
    bits = _bits(inp["hex"], inp["n_bits"])
    soft = (1.0 - 2.0 * bits.astype(np.float32)).astype(np.float32)
    pos = np.arange(len(bits), dtype=np.float64)
    fs = FrameSync(frame_bits=p["frame_bits"], max_errors=p["max_errors"], flywheel=p["flywheel"])
    cadus = list(fs.process(soft, pos)) + list(fs.flush())
    found = [c for c in cadus if not c.flywheel]
    want = case.data["expected"]["cadus"]
    if len(found) != len(want):
        return False, f"{len(found)} CADUs found, expected {len(want)}"
    for k, (c, w) in enumerate(zip(found, want)):
        got = (int(c.bit_index), int(c.asm_errors), bool(c.inverted), bytes(c.data).hex())
        exp = (w["bit_index"], w["asm_errors"], w["inverted"], w["hex"])
        if got[:3] != exp[:3]:
            return False, f"CADU {k}: (bit_index, asm_errors, inverted) = {got[:3]}, expected {exp[:3]}"
        if got[3] != exp[3]:
            return False, f"CADU {k}: data differ ({_first_diff(bytes(c.data), _hex(w['hex']))})"
    return True, f"{len(want)} CADUs at the expected bits, ASM errors and polarity"


def _run_frame(case: VectorCase) -> tuple[bool, str]:
    from pipeline.link import FrameParser

    prof = _profile_for_frames(case.data["params"]["frames"])
    rec = FrameParser(frames=prof.frames).process(_decoded_frame(_hex(case.data["input"]["hex"])))
    want = case.data["expected"]
    status = rec.status
    if status != want["status"]:
        return False, f"status {status!r}, expected {want['status']!r}"
    checked = [f"status {status}"]
    if "fields" in want:
        ok, detail = _cmp_fields(rec, want["fields"], "header")
        if not ok:
            return ok, detail
        checked.append(detail)
    if "clcw" in want:
        clcw = rec.clcw
        if clcw is None:
            return False, "no CLCW decoded"
        ok, detail = _cmp_fields(clcw, want["clcw"], "CLCW")
        if not ok:
            return ok, detail
        checked.append(detail)
    if "data_field" in want:
        ok, detail = _cmp_bytes(bytes(rec.data_field), _hex(want["data_field"]), "data field")
        if not ok:
            return ok, detail
        checked.append(detail)
    return True, "; ".join(checked)


def _cmp_packets(got: list[dict], want: list[dict]) -> tuple[bool, str]:
    if len(got) != len(want):
        seen = [(g["apid"], g["seq_count"]) for g in got]
        return False, f"{len(got)} packets, expected {len(want)} (got apid/seq {seen[:8]})"
    for k, (g, w) in enumerate(zip(got, want)):
        for key in ("apid", "seq_count", "hex", "seq_flags", "packet_time", "ert"):
            if key in w and key in g and g[key] != w[key]:
                return False, f"packet {k}: {key} {g[key]!r} != expected {w[key]!r}"
            if key in w and key not in g:
                return False, f"packet {k}: no {key}"
    return True, f"{len(want)} packets match"


def _run_packets_from_frames(case: VectorCase) -> tuple[bool, str]:
    from pipeline.link import FrameParser
    from pipeline.packets import PacketExtractor

    prof = _profile_for_frames(case.data["params"]["frames"])
    parser = FrameParser(frames=prof.frames)
    extractor = PacketExtractor(profile=prof)
    got = []
    for i, fhex in enumerate(case.data["input"]["frames"]):
        rec = parser.process(_decoded_frame(_hex(fhex), i))
        got.extend(extractor.process(rec))
    got.extend(extractor.flush())
    rows = [{"apid": int(p.apid), "seq_count": int(p.seq_count), "hex": bytes(p.data).hex(),
             "seq_flags": int(p.seq_flags)} for p in got]
    return _cmp_packets(rows, case.data["expected"]["packets"])


def _run_timecode(case: VectorCase) -> tuple[bool, str]:
    from pipeline.packets import decode_cds, decode_cuc

    fn = decode_cuc if case.kind == "cuc" else decode_cds
    tai_ns, octets = fn(_hex(case.data["input"]["hex"]), pfield=case.data["params"]["pfield"])
    want = case.data["expected"]
    ok = int(tai_ns) == want["tai_ns_1958"] and int(octets) == want["octets"]
    return ok, f"TAI {tai_ns} ns since 1958 in {octets} octets, expected {want['tai_ns_1958']} in {want['octets']}"


def _run_ldpc_encode(case: VectorCase) -> tuple[bool, str]:
    import hashlib

    from pipeline.fec.ldpc import ldpc_code, ldpc_encode

    p, want = case.data["params"], case.data["expected"]
    code = ldpc_code(p["code"]) if p["code"] == "c2" else ldpc_code(p["code"], rate=p["rate"], k=p["k"])
    info = _hex(case.data["input"]["hex"])
    word = ldpc_encode(code, info).tobytes()
    ok, detail = _cmp_bytes(word[: len(info)], info, f"{code.name} systematic part")
    if not ok:
        return ok, detail
    ok, detail = _cmp_bytes(word[len(info): len(info) + 16], _hex(want["parity_first16"]), "first parity octets")
    if not ok:
        return ok, detail
    digest = hashlib.sha256(word).hexdigest()
    if digest != want["sha256"]:
        return False, (f"{code.name}: SHA-256 of the {len(word)}-octet codeword {digest[:16]}.., expected "
                       f"{want['sha256'][:16]}..")
    return True, f"{code.name}: {len(word)}-octet codeword, parity and SHA-256 match"


def _run_turbo_interleaver(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import turbo_interleaver

    k, want = case.data["params"]["k"], case.data["expected"]
    perm = np.asarray(turbo_interleaver(k), dtype=np.int64)
    if perm.shape != (k,) or not np.array_equal(np.sort(perm), np.arange(k)):
        return False, f"k = {k}: not a permutation of 0..{k - 1}"
    first = [int(v) + 1 for v in perm[: len(want["first_1_based"])]]
    if first != list(want["first_1_based"]) or int(perm[-1]) + 1 != want["last_1_based"]:
        return False, f"k = {k}: pi(1..) = {first}, pi(k) = {int(perm[-1]) + 1}; expected {want['first_1_based']}, " \
                      f"{want['last_1_based']}"
    return True, f"k = {k}: a permutation; pi(1..{len(first)}) and pi(k) match"


def _run_turbo_encode(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import turbo_encode

    rate, want = case.data["params"]["rate"], case.data["expected"]
    got = turbo_encode(_hex(case.data["input"]["hex"]), rate=rate)
    return _cmp_bits(got, _bits(want["hex"], want["n_bits"]), f"rate {rate} codeword")


def _run_whole_link(case: VectorCase) -> tuple[bool, str]:
    from pipeline.chain import decode
    from pipeline.profile import profile_from_dict

    p, want = case.data["params"], case.data["expected"]
    prof = profile_from_dict(p["profile"], source=str(case.path), name=case.name)
    with np.load(case.path.with_name(case.data["data_file"]), allow_pickle=False) as z:
        packed = np.asarray(z["channel_bits_packed"], dtype=np.uint8)
    with tempfile.TemporaryDirectory(prefix="downlink-verify-") as tmp:
        bits_path = Path(tmp) / f"{case.name}.bits"
        packed.tofile(bits_path)
        decoded = decode(bits_path, prof, input_kind="bits", start=p["start"])
    packets, frames = decoded.packets_list, decoded.frames_list
    statuses = [f.get("status") for f in frames]
    if "frame_statuses" in want and statuses != want["frame_statuses"]:
        return False, f"frame statuses {statuses}, expected {want['frame_statuses']}"
    if len(frames) != want["frames"]:
        return False, f"{len(frames)} frames, expected {want['frames']} (statuses {statuses})"
    n_ok, n_idle = statuses.count("ok"), statuses.count("idle")
    if n_ok != want["frames_ok"] or n_idle != want["frames_idle"]:
        return False, f"frame statuses {statuses}, expected {want['frames_ok']} ok and {want['frames_idle']} idle"
    ok, detail = _cmp_packets(packets, want["packets"])
    return ok, detail + (f", {len(frames)} frames" if ok else "")


_RUNNERS: dict[str, Callable[[VectorCase], tuple[bool, str]]] = {
    "randomizer": _run_randomizer,
    "crc16": _run_crc16,
    "rs_encode": _run_rs_encode,
    "rs_decode": _run_rs_decode,
    "conv_encode": _run_conv_encode,
    "viterbi_decode": _run_viterbi,
    "markers": _run_markers,
    "frame_sync": _run_frame_sync,
    "tm_frame": _run_frame,
    "aos_frame": _run_frame,
    "packets_from_frames": _run_packets_from_frames,
    "cuc": _run_timecode,
    "cds": _run_timecode,
    "whole_link": _run_whole_link,
    "ldpc_encode": _run_ldpc_encode,
    "turbo_interleaver": _run_turbo_interleaver,
    "turbo_encode": _run_turbo_encode,
}


def run_case(case: VectorCase) -> CaseResult:
    """Run one case; an exception or an unknown kind is a failure with the reason in ``detail``."""
    runner = _RUNNERS.get(case.kind)
    if runner is None:
        if case.kind == "unreadable":
            detail = f"cannot read vector file: {case.data.get('error')}"
        elif case.kind == "unknown_format":
            detail = f"not a vector case ({case.data.get('error')}): {case.path.name}"
        else:
            detail = f"unknown vector kind {case.kind!r} in {case.path.name}"
        return CaseResult(case.name, case.stage, False, case.source, detail)
    try:
        passed, detail = runner(case)
    except Exception as exc:  # noqa: BLE001 - every failure becomes a row of the table
        last = traceback.extract_tb(exc.__traceback__)[-1]
        passed, detail = False, f"{type(exc).__name__}: {exc} ({Path(last.filename).name}:{last.lineno})"
    return CaseResult(case.name, case.stage, bool(passed), case.source, detail)


def run_verify(vectors_dir: str | None, *, as_json: bool) -> int:
    """Run every vector in ``vectors_dir`` (default :func:`default_vectors_dir`); 0 if all pass, else 1.

    Prints a table (name, stage, PASS/FAIL, what was compared or what differed, source) or, with
    ``as_json``, one JSON object ``{"vectors_dir", "cases": [{name, stage, passed, source,
    detail}], "passed": n, "failed": n}`` on stdout.
    """
    from pipeline.errors import DownlinkError

    folder = Path(vectors_dir) if vectors_dir else default_vectors_dir()
    try:
        cases = load_cases(folder)
    except FileNotFoundError as exc:
        raise DownlinkError(str(exc)) from None
    if not cases:
        raise DownlinkError(f"{folder}: no vector files (*.json) found")
    results = [run_case(c) for c in cases]
    n_pass = sum(r.passed for r in results)
    n_fail = len(results) - n_pass
    if as_json:
        print(json.dumps({"vectors_dir": str(folder), "cases": [r.as_dict() for r in results],
                          "passed": n_pass, "failed": n_fail}, indent=1))
    else:
        _print_table(results, folder)
    return 0 if n_fail == 0 else 1


def _print_table(results: list[CaseResult], folder: Path, out=None) -> None:
    out = out or sys.stdout
    wn = max(len(r.name) for r in results)
    ws = max(len(r.stage) for r in results)
    wd = min(70, max(len(r.detail) for r in results))
    print(f"known-answer vectors in {folder}", file=out)
    print(f"{'case':<{wn}}  {'stage':<{ws}}  result  {'detail':<{wd}}  source", file=out)
    for r in results:
        detail = r.detail if len(r.detail) <= wd or not r.passed else r.detail[: wd - 3] + "..."
        print(f"{r.name:<{wn}}  {r.stage:<{ws}}  {'PASS' if r.passed else 'FAIL':<6}  {detail:<{wd}}  {r.source}",
              file=out)
    n_pass = sum(r.passed for r in results)
    print(f"{n_pass} of {len(results)} cases passed, {len(results) - n_pass} failed", file=out)
