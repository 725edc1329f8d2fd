"""README.md is the user's manual: what it tells a user to type must be accepted, what it names must exist.

* Every ``downlink`` command line in README's code blocks (a line that runs ``downlink``, after a shell pipe or
  ``&&`` too, with the indented ``[...]`` lines under it as its continuation) and every inline code span that
  starts with ``downlink`` is read as a synopsis: ``[...]`` optional (taken), ``(a | b)`` and ``[a | b]`` one
  of, ``code|chain`` one of the values, ``...`` an elided value or the rest of the command, ``N``/``S``/``DB``
  (upper-case words) placeholders.  Each reading goes through the parser :func:`pipeline.cli.build_parser`
  builds, so an option README names that the command does not have, a value its choices refuse, or a required
  option a whole command leaves out fails, naming the README line.  Inline spans are fragments (a command
  named in the text): their options and values are checked, the required ones they leave out are not.
* Every key README lists for report.json's ``pass`` is one ``pipeline.report`` writes, and every field it
  lists for packets.jsonl and frames.jsonl is one the decoder writes (short simulated passes decoded through
  the public API: the demo link with a dropout and a clock model, an AOS LDPC link; the AOS FHEC field from
  the frame parser, since the simulator makes no FHEC).  The frame statuses README lists are
  :data:`pipeline.link.FRAME_STATUSES`.
* README's example profile loads as written, and every key its comments and its ``[receiver]`` table name is
  one :mod:`pipeline.profile` knows in that table (the validator refuses unknown keys by name).
"""

from __future__ import annotations

import argparse
import contextlib
import copy
import io
import itertools
import json
import re
from pathlib import Path
from types import SimpleNamespace
from typing import get_args

import numpy as np
import pytest

from pipeline import decode, load_profile, simulate
from pipeline.cli import build_parser
from pipeline.demod import DemodStats
from pipeline.errors import ProfileError
from pipeline.link import FRAME_STATUSES, CountAnomaly, FrameParser
from pipeline.packets import ClockModel
from pipeline.profile import demo_profile_path, profile_from_dict, tomllib  # stdlib's, or tomli before 3.11
from pipeline.report import RunFacts, build_report
from pipeline.timescales import parse_utc

README = Path(__file__).resolve().parent.parent / "README.md"

# ---- README, read as text ----------------------------------------------------------------------------

_FENCE = re.compile(r"^```(\w*)\s*$")
_SHELL_LANGS = ("", "sh", "bash", "shell", "console")
_COMMAND_START = re.compile(r"(?:^|[|;&]\s*)(downlink\s+\S.*)")  # "downlink" alone is a name
_PLACEHOLDER = re.compile(r"^[A-Z][A-Z0-9_]*(\.\.\.)?$")
_IDENT = re.compile(r"^[a-z][a-z0-9_]*$")


def readme_commands(text: str) -> list[tuple[int, str, bool]]:
    """``(line number, command from 'downlink' on, is_fragment)`` for every command README shows.

    Code blocks of a shell kind (no language, sh, bash, console) give whole commands: a line running
    ``downlink`` (a trailing ``# comment`` and what follows a ``&&`` or ``;`` taken off), joined with the
    indented lines under it that start with ``[``, ``(`` or ``-``.  Inline code spans outside code blocks that
    start with ``downlink`` (or run it after ``&&``) give fragments.
    """
    found: list[tuple[int, str, bool]] = []
    lang = None  # None: outside a code block
    current: list | None = None
    for number, line in enumerate(text.splitlines(), start=1):
        fence = _FENCE.match(line)
        if fence:
            lang = fence.group(1) if lang is None else None
            current = None
            continue
        if lang is None:
            for span in re.findall(r"`([^`\n]+)`", line):
                m = _COMMAND_START.search(span)
                if m:
                    found.append((number, _shell_cut(m.group(1)), True))
            continue
        if lang not in _SHELL_LANGS:
            continue
        body = re.split(r"\s#(?:\s|$)", line, maxsplit=1)[0].rstrip()
        m = _COMMAND_START.search(body)
        if m:
            current = [number, _shell_cut(m.group(1)), False]
            found.append(current)
        elif current is not None and body[:1].isspace() and body.lstrip()[:1] in ("[", "(", "-"):
            current[1] += " " + body.strip()
        else:
            current = None
    return [tuple(c) for c in found]


def _shell_cut(command: str) -> str:
    """The command up to a following ``&&``, ``;`` or background ``&`` of the shell line."""
    return re.split(r"\s*(?:&&|;|&\s*$)", command, maxsplit=1)[0].strip()


def _tokens(command: str) -> list[str]:
    return re.findall(r"[\[\]()]|[^\s\[\]()]+", command)


def _parse_alt(tokens: list[str], i: int, closer: str | None):
    """``a b | c d`` up to ``closer``: a list of sequences; an item is a word, ("one_of", words) or a group."""
    alts, seq = [], []
    while i < len(tokens):
        tok = tokens[i]
        if tok == closer:
            return alts + [seq], i + 1
        if tok in "])" and len(tok) == 1:
            raise ValueError(f"unbalanced {tok!r}")
        if tok in ("[", "("):
            inner, i = _parse_alt(tokens, i + 1, "]" if tok == "[" else ")")
            seq.append(("group", inner))
            continue
        if tok == "|":
            if closer is None:  # a shell pipe after the command: the command ends here
                break
            alts.append(seq)
            seq = []
        elif "|" in tok:  # code|chain: one of these values
            seq.append(("one_of", tok.split("|")))
        else:
            seq.append(tok)
        i += 1
    if closer is not None:
        raise ValueError(f"no closing {closer!r}")
    return alts + [seq], i


def _expand_seq(seq) -> list[list[str]]:
    out = [[]]
    for item in seq:
        if isinstance(item, str):
            choices = [[item]]
        elif item[0] == "one_of":
            choices = [[w] for w in item[1]]
        else:  # an optional part is taken, so its options are checked; alternatives one at a time
            choices = [words for s in item[1] for words in _expand_seq(s)]
        out = [a + b for a, b in itertools.product(out, choices)]
    return out


def readings(command: str) -> list[list[str]]:
    """The argument lists a synopsis line stands for (after ``downlink``), one per choice of alternatives."""
    alts, _ = _parse_alt(_tokens(command), 0, None)
    out = [words for s in alts for words in _expand_seq(s)]
    assert all(w[:1] == ["downlink"] for w in out), command
    return [w[1:] for w in out]


# ---- the CLI's own parser ------------------------------------------------------------------------------


def _subparsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


def _placeholder(action: argparse.Action, word: str) -> str:
    """A value of the action's type for a README placeholder (``N``, ``S``, ``...``); other words as written."""
    if word != "..." and not _PLACEHOLDER.match(word):
        return word
    if action.choices:
        return str(next(iter(action.choices)))
    if action.type is int:
        return "1"
    if action.type is float:
        return "1.0"
    return "VALUE"


def check_command(parser: argparse.ArgumentParser, argv: list[str], *, fragment: bool) -> str | None:
    """None when the parser accepts ``argv`` read as README means it, else why not (one line)."""
    if not argv:
        return "no subcommand"
    subs = _subparsers(parser)
    if argv[0] not in subs:
        return f"no subcommand {argv[0]!r} (there are {', '.join(subs)})"
    sub = subs[argv[0]]
    options = sub._option_string_actions
    args: list[str] = [argv[0]]
    positionals = 0
    elided = fragment
    words = iter(argv[1:])
    for word in words:
        if word.startswith("-") and word != "-":
            name = word.split("=", 1)[0]
            if name not in options:  # exact names only: argparse would also take an abbreviation
                return f"'downlink {argv[0]}' has no option {name}"
            args.append(word)
            action = options[name]
            if action.nargs != 0 and "=" not in word:
                value = next(words, None)
                if value is None:
                    return f"{name} needs a value"
                args.append(_placeholder(action, value))
        elif word == "...":
            elided = True  # "and the rest": the options README does not repeat here
        else:
            args.append(word)
            positionals += 1
    if elided:
        args += _required_left_out(sub, args[1:], positionals)
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        try:
            parser.parse_args(args)
        except SystemExit:
            return err.getvalue().strip().splitlines()[-1]
    return None


def _required_left_out(sub: argparse.ArgumentParser, given: list[str], positionals: int) -> list[str]:
    """Placeholders for the required options, option groups and positionals ``given`` does not have."""
    extra: list[str] = []
    for group in sub._mutually_exclusive_groups:
        if group.required and not any(s in given for a in group._group_actions for s in a.option_strings):
            action = group._group_actions[0]
            extra += [action.option_strings[0], _placeholder(action, "...")]
    for action in sub._actions:
        if action.required and action.option_strings and not any(s in given for s in action.option_strings):
            extra += [action.option_strings[0], _placeholder(action, "...")]
    if not positionals and any(not a.option_strings and a.nargs in (None, "+") for a in sub._actions):
        extra.append("PATH")
    return extra


def check_readme_text(text: str) -> list[str]:
    """Every README command line the parser refuses: ``README.md:LINE: command -> why``."""
    parser = build_parser()
    problems = []
    for number, command, fragment in readme_commands(text):
        try:
            argvs = readings(command)
        except ValueError as exc:
            problems.append(f"README.md:{number}: {command} -> cannot read the synopsis ({exc})")
            continue
        for argv in argvs:
            why = check_command(parser, argv, fragment=fragment)
            if why:
                problems.append(f"README.md:{number}: downlink {' '.join(argv)} -> {why}")
    return problems


_TEXT = README.read_text(encoding="utf-8")
_COMMANDS = readme_commands(_TEXT)


def test_readme_shows_commands():
    # the extraction finds the synopsis block and the inline spans (a README without any is a broken reader)
    whole = {c.split()[1] for _, c, frag in _COMMANDS if not frag and len(c.split()) > 1}
    assert whole >= {"decode", "demo"}, _COMMANDS
    assert any(frag for *_, frag in _COMMANDS)


@pytest.mark.parametrize("number,command,fragment", _COMMANDS, ids=[f"README.md:{n}" for n, *_ in _COMMANDS])
def test_readme_command_is_accepted_by_the_cli_parser(number, command, fragment):
    parser = build_parser()
    argvs = readings(command)
    assert argvs
    problems = [f"downlink {' '.join(a)} -> {why}" for a in argvs
                if (why := check_command(parser, a, fragment=fragment))]
    assert not problems, f"README.md:{number}: {command}\n" + "\n".join(problems)


def test_the_checker_fails_on_a_broken_readme():
    # a copy of README with a made-up option, a value the choices refuse, a renamed subcommand and a whole
    # command that leaves out a required option: each fails, naming its line; the real README passes
    fence = "```"
    broken = _TEXT + (f"\n{fence}\n"
                      "downlink decode REC.sigmf-meta --profile P.toml --out DIR --made-up-option\n"
                      "downlink sweep --profile P.toml --ebn0 0:6:0.5 [--stage code|fast]\n"
                      "downlink decrypt REC.sigmf-meta\n"
                      "downlink simulate --out DIR [--seconds S]\n"
                      f"{fence}\n"
                      "Run `downlink bench --jsn` for the figures.\n")
    first = _TEXT.count("\n") + 3  # the line of the first added command
    problems = check_readme_text(broken)
    expected = [(first, "has no option --made-up-option"), (first + 1, "--stage: invalid choice: 'fast'"),
                (first + 2, "no subcommand 'decrypt'"), (first + 3, "required: --profile"),
                (first + 5, "'downlink bench' has no option --jsn")]
    assert len(problems) == len(expected), problems
    for problem, (line, why) in zip(problems, expected):
        assert problem.startswith(f"README.md:{line}: downlink ") and why in problem, problem
    assert check_readme_text(_TEXT) == []


def test_synopsis_reading():
    # the notation README's command block uses, read as a user reads it
    assert readings("downlink decode R --out D [--overwrite] [--workers N | --scheduler ADDRESS]") == [
        ["decode", "R", "--out", "D", "--overwrite", "--workers", "N"],
        ["decode", "R", "--out", "D", "--overwrite", "--scheduler", "ADDRESS"]]
    assert readings("downlink x (--a 1 | --b) ...") == [["x", "--a", "1", "..."], ["x", "--b", "..."]]
    assert readings("downlink verify --json | head") == [["verify", "--json"]]  # a shell pipe ends it
    cmds = readme_commands("text `pip install . && downlink demo` and `python -m x`\n```\n"
                           "cat f | downlink decode - --follow   # live\n    [--cadus]\ndask worker &\n```\n")
    assert cmds == [(1, "downlink demo", True), (3, "downlink decode - --follow [--cadus]", False)]


# ---- names README lists for the output files ---------------------------------------------------------


def _section(text: str, start: str, end: str) -> str:
    i = text.index(start)
    return text[i:text.index(end, i + len(start))]


def _bullet(text: str, name: str) -> str:
    """The README bullet of ``What decode writes`` that starts with ``name``."""
    m = re.search(rf"^- `{re.escape(name)}`.*?(?=^- `|^\S|\Z)", text, re.M | re.S)
    assert m, f"README has no bullet for {name}"
    return m.group(0)


def _names_at_top(bullet: str) -> set[str]:
    """Backticked identifiers outside parentheses (inside them README gives values and conditions)."""
    names, depth = set(), 0
    for piece in re.split(r"(`[^`]*`|[()])", bullet):
        if piece == "(":
            depth += 1
        elif piece == ")":
            depth -= 1
        elif piece.startswith("`") and depth == 0 and _IDENT.match(piece.strip("`")):
            names.add(piece.strip("`"))
    return names


def _values_of(bullet: str, field: str) -> set[str]:
    m = re.search(rf"`{field}` \(([^)]*)\)", bullet)
    assert m, f"README lists no values of {field}"
    return {v for v in re.findall(r"`([^`]+)`", m.group(1)) if _IDENT.match(v)}


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """Records and reports that a short demo pass, an AOS LDPC pass and the AOS FHEC parser write."""
    tmp = tmp_path_factory.mktemp("readme")
    demo = load_profile(demo_profile_path())
    # 1 s of the demo pass with a 10 ms dropout at 0.5 s: a frame fails Reed-Solomon (its header goes under
    # 'unverified'); a clock model (an invented one: onboard second 2.1e9 at 2024-07-18 UTC) gives utc_from_obt
    sim = simulate(demo, tmp / "demo", seconds=1.0, seed=1, fades=((0.5, 0.01, 100.0),))
    clock = ClockModel(epoch_obt_s=2.1e9, utc_at_epoch_tai_ns=parse_utc("2024-07-18T00:00:00Z"), rate=1.0)
    (tmp / "clock.json").write_text(json.dumps(clock.as_dict()))
    res = decode(sim.meta_path, demo, clock=tmp / "clock.json")
    # an AOS link with the LDPC C2 code (CCSDS 131.0-B sec. 7.3): the decoder's fields
    data = tomllib.loads(demo_profile_path().read_text(encoding="utf-8"))
    data["link"]["line_code"] = "nrz-l"
    data["coding"] = {"convolutional": "none", "reed_solomon": 0, "ldpc": "c2", "randomizer": True}
    data["frames"].update(kind="aos", length=892, ocf=False, fecf=False, spacecraft_id=199)
    aos = profile_from_dict(data, name="aos-ldpc")
    aos_res = decode(simulate(aos, tmp / "aos", seconds=0.3, seed=2).meta_path, aos)
    # the FHEC of an AOS header (CCSDS 732.0-B sec. 4.1.2.6): the frame parser, whose records frames.jsonl holds
    parser = FrameParser(frames=aos.with_changes(frames={"fhec": True}).frames)
    cadu = SimpleNamespace(position=0.0, asm_errors=0, inverted=False, flywheel=False)
    fhec = parser.process(SimpleNamespace(frame=bytes(892), status="ok", rs_corrected=(), cadu=cadu)).as_dict()
    # a residual-carrier track (Pc/N0) with jumps taken, a Doppler check that found the spectrum inverted, clipped
    # rails and frames enough for the symbol rate, through pipeline.report's own builder: the pass keys only such
    # runs have
    pos = np.arange(100.0, 3001.0, 100.0)
    track = {"position": pos, "esn0_db": np.full(pos.size, 3.0), "carrier_hz": np.full(pos.size, 10.0),
             "locked": np.ones(pos.size, bool), "cn0_dbhz": np.full(pos.size, 40.0)}
    facts = RunFacts(tool="downlink test", profile=demo, input_kind="iq", recording_info={}, duration_s=3.0,
                     elapsed_s=1.0, position_rate_hz=1000.0, track=track,
                     doppler_check={"note": "residuals flat only with the sign flipped", "rows": pos.size},
                     clip_checked=8192, clipped_values=2000,
                     # 20 verified frames 10 ppm further apart than the demo link's CADU: a symbol rate measured
                     frame_log={"position": 50.0 + np.arange(20) * demo.samples_per_cadu(1000.0) * (1 + 1e-5),
                                "statuses": ["ok"], "status": np.zeros(20, np.int8),
                                "rs_corrected": np.zeros(20, np.int16), "asm_errors": np.zeros(20, np.int8)},
                     demod_stats=DemodStats(tones_hz=[12345.6], iq_image_db=-13.3, timing_jumps=1, phase_jumps=2,
                                            carrier_moved=1))
    built, _ = build_report(facts)
    return SimpleNamespace(packets=res.packets_list + aos_res.packets_list,
                           frames=res.frames_list + aos_res.frames_list + [fhec],
                           passes=[res.report["pass"], aos_res.report["pass"], built["pass"]])


def _keys(objects) -> set[str]:
    return set().union(*(o.keys() for o in objects))


def test_report_pass_keys_in_readme_are_written(written):
    listed = _section(_TEXT, "as `pass`:", "; then")
    names = {n for n in re.findall(r"`([^`]+)`", listed) if _IDENT.match(n)} - {"pass"}
    assert names, "README lists no pass keys"
    missing = sorted(names - _keys(written.passes))
    assert not missing, f"README names report.json pass keys that pipeline.report does not write: {missing}"


@pytest.mark.parametrize("name,objects", [("packets.jsonl", "packets"), ("frames.jsonl", "frames")])
def test_record_fields_in_readme_are_written(written, name, objects):
    names = _names_at_top(_bullet(_TEXT, name))
    assert names, f"README lists no fields of {name}"
    missing = sorted(names - _keys(getattr(written, objects)))
    assert not missing, f"README names {name} fields that the decoder does not write: {missing}"


def test_record_values_in_readme_are_the_codes():
    frames = _bullet(_TEXT, "frames.jsonl")
    assert _values_of(frames, "status") == set(FRAME_STATUSES)  # pipeline.link.FRAME_STATUSES
    for bullet in (frames, _bullet(_TEXT, "packets.jsonl")):
        m = re.search(r"`count_anomaly` \(([^)]*)", bullet)
        if m:
            said = {v for v in re.findall(r"`([^`]+)`", m.group(1)) if _IDENT.match(v)}
            assert said <= set(get_args(CountAnomaly)), said


def test_the_name_checks_fail_on_a_broken_readme(written):
    # the same readers on a copy of README's packets bullet with a field renamed: the renamed field is named
    bullet = _bullet(_TEXT, "packets.jsonl").replace("`seq_count`", "`sequence_count`")
    assert sorted(_names_at_top(bullet) - _keys(written.packets)) == ["sequence_count"]
    frames = _bullet(_TEXT, "frames.jsonl").replace("`fecf_error`", "`crc_error`")
    assert _values_of(frames, "status") ^ set(FRAME_STATUSES) == {"crc_error", "fecf_error"}


# ---- profile keys README names -----------------------------------------------------------------------


def readme_profile_keys(text: str) -> tuple[str, list[tuple[str, str]]]:
    """README's example profile (the ``toml`` block) and the ``(table, key)`` pairs it names.

    A key is named by ``key = value`` in a comment (in the comment's table, or in the one a ``[table]`` before
    it in the same comment names) or by a row of the ``[receiver]`` keys table.
    """
    block = re.search(r"^```toml\n(.*?)^```", text, re.M | re.S)
    assert block, "README has no example profile"
    named, table = [], None
    for line in block.group(1).splitlines():
        head = re.match(r"^\[+([\w.]+)\]+", line)
        if head:
            table = head.group(1)
        if "#" not in line:
            continue
        pieces = re.split(r"\[(\w+)\]", line.split("#", 1)[1])  # text, table, text, ...
        for i, piece in enumerate(pieces):
            in_table = table if i == 0 else pieces[i - 1] if i % 2 == 0 else None
            if in_table is not None:
                named += [(in_table, key) for key in re.findall(r"\b([a-z_][a-z0-9_]*)\s*=(?!=)", piece)]
    rows = re.search(r"`\[receiver\]` keys.*?\n\n((?:\|.*\n)+)", text, re.S)
    assert rows, "README has no [receiver] keys table"
    named += [("receiver", key) for key in re.findall(r"^\| `(\w+)` \|", rows.group(1), re.M)]
    return block.group(1), named


def _unknown_key(data: dict, table: str, key: str) -> bool:
    """Whether the profile validator refuses ``key`` in ``table`` as unknown (a value it refuses is not that)."""
    data = copy.deepcopy(data)
    if table == "packets.time_code":
        data["packets"]["time_code"][0][key] = 0
    else:
        data.setdefault(table, {})[key] = 0
    try:
        profile_from_dict(data, source="README.md")
    except ProfileError as exc:
        return f"unknown key '{key}'" in str(exc)
    return False


def test_readme_profile_loads_and_names_known_keys():
    block, named = readme_profile_keys(_TEXT)
    data = tomllib.loads(block)
    profile_from_dict(data, source="README.md")  # the example as written is a valid profile
    assert ("receiver", "chunk_samples") in named and ("coding", "turbo_k") in named, named
    unknown = [f"[{t}] {k}" for t, k in named if _unknown_key(data, t, k)]
    assert not unknown, f"README names profile keys pipeline.profile does not know: {unknown}"
    # the same reader on a made-up key fails
    assert _unknown_key(data, "receiver", "carrier_loop_bandwith_hz")
