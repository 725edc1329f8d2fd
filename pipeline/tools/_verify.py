"""``downlink verify``: run every known-answer vector through the pipeline and report pass/fail.

A vector is one ``.json`` case file (see ``vectors/make.py`` for the format), optionally with a
``.npz`` of arrays beside it.  The runner feeds the case's input to the pipeline function named
by its ``kind`` and compares the result with the case's expected output.  Any difference, any
exception and any file the runner cannot read is a failure: nothing is skipped silently.

Vectors written by the fec engineer (``vectors/fec/``) use their own layout; the reader for them
is :func:`_fec_vector_cases`.
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

__all__ = ["NOT_AVAILABLE", "CaseResult", "VectorCase", "default_vectors_dir", "load_cases", "run_case", "run_verify"]


#: Start of ``CaseResult.detail`` when the pipeline function a case needs cannot be imported.
NOT_AVAILABLE = "pipeline function not available"


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
        if path.name.startswith(".") or path.name.endswith(".sidecar.json"):
            continue
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            cases.append(VectorCase(path.stem, path.parent.name, "unreadable", "", path, {"error": str(exc)}))
            continue
        if isinstance(data, dict) and "kind" in data and "expected" in data:
            cases.append(VectorCase(str(data.get("name", path.stem)), str(data.get("stage", path.parent.name)),
                                    str(data["kind"]), str(data.get("source", "")), path, data))
        else:
            cases.extend(_fec_vector_cases(path, data))
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


def _attr(obj: Any, *names: str, default: Any = None) -> Any:
    """The first attribute (or dict key, or ``as_dict()`` key) of ``obj`` among ``names``."""
    d = None
    for name in names:
        if isinstance(obj, dict):
            if name in obj:
                return obj[name]
            continue
        if hasattr(obj, name):
            return getattr(obj, name)
        if d is None:
            as_dict = getattr(obj, "as_dict", None)
            d = as_dict() if callable(as_dict) else {}
        if name in d:
            return d[name]
    return default


# Names the parsers may use for a header field (ours first, then the obvious alternatives).
_FIELD_ALIASES = {
    "scid": ("scid", "spacecraft_id"),
    "vcid": ("vcid", "virtual_channel_id"),
    "mcfc": ("mcfc", "master_channel_frame_count"),
    "vcfc": ("vcfc", "virtual_channel_frame_count", "vc_frame_count"),
    "fhp": ("fhp", "first_header_pointer"),
    "ocf_flag": ("ocf_flag", "ocf_present"),
    "version": ("version", "tfvn", "transfer_frame_version"),
    "secondary_header_flag": ("secondary_header_flag", "sec_header_flag"),
    "sync_flag": ("sync_flag", "synchronization_flag"),
    "replay": ("replay", "replay_flag"),
    "status_field": ("status_field", "status"),
    "cop_in_effect": ("cop_in_effect", "cop"),
    "no_rf_available": ("no_rf_available", "no_rf"),
    "no_bit_lock": ("no_bit_lock", "no_bitlock"),
    "farm_b_counter": ("farm_b_counter", "farm_b"),
    "report_value": ("report_value", "vr", "v_r"),
    "lockout": ("lockout",),
    "wait": ("wait",),
    "retransmit": ("retransmit",),
}


def _cmp_fields(obj: Any, want: dict, what: str) -> tuple[bool, str]:
    for key, value in want.items():
        got = _attr(obj, *_FIELD_ALIASES.get(key, (key,)), default=_MISSING)
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
    return profile_from_dict({"frames": frames, "coding": {"convolutional": "none", "reed_solomon": 0,
                                                            "interleave": 1, "randomizer": False}},
                             source="<vector>")


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
    enc = ConvEncoder(rate=p["rate"], initial_state=int(p.get("prior_state", 0)))
    got = enc.process(_bits(inp["hex"], inp["n_bits"]))
    return _cmp_bits(got, _bits(want["hex"], want["n_bits"]), f"rate {p['rate']} symbols")


def _run_viterbi(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import viterbi_decode

    p, want = case.data["params"], case.data["expected"]
    soft = np.asarray(case.data["input"]["soft"], dtype=np.float32)
    got = np.asarray(viterbi_decode(soft, p["rate"]), dtype=np.uint8)
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
    status = _attr(rec, "status")
    if status != want["status"]:
        return False, f"status {status!r}, expected {want['status']!r}"
    checked = [f"status {status}"]
    if "fields" in want:
        ok, detail = _cmp_fields(rec, want["fields"], "header")
        if not ok:
            return ok, detail
        checked.append(detail)
    if "clcw" in want:
        clcw = _attr(rec, "clcw")
        if clcw is None:
            return False, "no CLCW decoded"
        ok, detail = _cmp_fields(clcw, want["clcw"], "CLCW")
        if not ok:
            return ok, detail
        checked.append(detail)
    if "data_field" in want:
        ok, detail = _cmp_bytes(bytes(_attr(rec, "data_field", "data")), _hex(want["data_field"]), "data field")
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
        got.extend(extractor.process(rec) or ())
    flush = getattr(extractor, "flush", None)
    if callable(flush):
        got.extend(flush() or ())
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
}


def _fec_vector_cases(path: Path, data: Any) -> list[VectorCase]:
    """Cases from a file in the fec engineer's layout (``vectors/fec/``).

    That layout is one ``NAME.json`` holding ``kind`` (``conv``, ``viterbi``, ``rs``, ``pn``,
    ``crc16``) and the case's fields at the top level, with ``NAME.sidecar.json`` beside it naming
    ``generator``, ``seed`` and ``source``.  Anything else is an ``unknown_format`` case (a failure).
    """
    meta: dict = {}
    sidecar = path.with_name(path.stem + ".sidecar.json")
    if sidecar.is_file():
        try:
            meta = json.loads(sidecar.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            meta = {}
    kind = data.get("kind") if isinstance(data, dict) else None
    known = {"conv": "fec_conv", "viterbi": "fec_viterbi", "rs": "fec_rs", "pn": "fec_pn", "crc16": "fec_crc16"}
    source = str(meta.get("source", ""))
    if kind in known and source:
        merged = {**data, "generator": meta.get("generator"), "seed": meta.get("seed"), "kat": True}
        return [VectorCase(path.stem, "fec", known[kind], source, path, merged)]
    why = {"value": data, "reason": "no sidecar with a source" if kind in known else "unknown layout"}
    return [VectorCase(path.stem, path.parent.name, "unknown_format", source, path, why)]


def _run_fec_conv(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import conv_encode

    d = case.data
    bits = np.array([int(ch) for ch in d["bits"]], dtype=np.uint8)
    want = np.array([int(ch) for ch in d["symbols"]], dtype=np.uint8)
    return _cmp_bits(conv_encode(bits, d["rate"]), want, f"rate {d['rate']} symbols")


def _run_fec_viterbi(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import viterbi_decode

    d = case.data
    soft = np.asarray(d["soft_int8"], dtype=np.float32)
    want = np.array([int(ch) for ch in d["bits"]], dtype=np.uint8)
    got = np.asarray(viterbi_decode(soft, d["rate"], initial_state=d.get("initial_state")), dtype=np.uint8)
    return _cmp_bits(got[: len(want)], want, f"rate {d['rate']} decoded")


def _run_fec_rs(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import rs_decode, rs_encode

    d = case.data
    data = _hex(d["data_hex"])
    ok, detail = _cmp_bytes(bytes(rs_encode(data, d["e"], d["interleave"])), _hex(d["codeblock_hex"]), "codeblock")
    if not ok:
        return ok, detail
    got, corrected = rs_decode(_hex(d["received_hex"]), d["e"], d["interleave"])
    corrected = [int(c) for c in np.asarray(corrected).ravel()]
    if corrected != list(d["corrected"]):
        return False, f"corrected = {corrected}, expected {d['corrected']}"
    ok, detail2 = _cmp_bytes(bytes(got)[: len(data)], data, "decoded frame")
    return ok, f"{detail}; {detail2}, {sum(corrected)} symbols corrected"


def _run_fec_pn(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import pn_sequence

    d = case.data
    return _cmp_bytes(np.asarray(pn_sequence(int(d["n"])), dtype=np.uint8).tobytes(), _hex(d["hex"]), "pn_sequence")


def _run_fec_crc16(case: VectorCase) -> tuple[bool, str]:
    from pipeline.fec import crc16

    for data_hex, want in case.data["cases"]:
        got = int(crc16(_hex(data_hex)))
        if got != int(want):
            return False, f"crc16 of {len(data_hex) // 2} octets = {got:#06x}, expected {int(want):#06x}"
    return True, f"{len(case.data['cases'])} CRCs match"


_RUNNERS.update({
    "fec_conv": _run_fec_conv,
    "fec_viterbi": _run_fec_viterbi,
    "fec_rs": _run_fec_rs,
    "fec_pn": _run_fec_pn,
    "fec_crc16": _run_fec_crc16,
})


def run_case(case: VectorCase) -> CaseResult:
    """Run one case; an exception or an unknown kind is a failure with the reason in ``detail``."""
    runner = _RUNNERS.get(case.kind)
    if runner is None:
        detail = (f"cannot read vector file: {case.data.get('error')}" if case.kind == "unreadable"
                  else f"unknown vector kind {case.kind!r} in {case.path.name}")
        return CaseResult(case.name, case.stage, False, case.source, detail)
    try:
        passed, detail = runner(case)
    except ImportError as exc:
        passed, detail = False, f"{NOT_AVAILABLE}: {exc}"
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
