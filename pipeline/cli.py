"""The ``downlink`` command: every subcommand declared here, one boundary for errors and exit codes.

Each subcommand handler imports its implementation lazily so ``downlink --help`` stays fast and a
broken optional part cannot stop the others.  Errors from :mod:`pipeline.errors` become one
``Error: ...`` line on stderr and an exit code from :class:`ExitCode`; ``--traceback`` shows the
whole traceback instead.
"""

from __future__ import annotations

import argparse
import enum
import json
import logging
import os
import signal
import sys
import traceback
from collections.abc import Sequence
from pathlib import Path

from pipeline._version import __version__
from pipeline.errors import DataFileError, DownlinkError, OutputError, ProfileError, RecordingError, UsageError

__all__ = ["ExitCode", "build_parser", "main"]

log = logging.getLogger("pipeline")



class ExitCode(enum.IntEnum):
    """Process exit codes of ``downlink``."""

    OK = 0
    FAILED = 1  # the command ran but its check failed (verify: a vector failed)
    USAGE = 2  # bad command line (argparse)
    BAD_INPUT = 3  # recording or profile cannot be used
    BAD_OUTPUT = 4  # output folder exists / cannot be written
    INTERNAL = 70  # a bug: please report with --traceback
    INTERRUPTED = 130  # SIGINT
    TERMINATED = 143  # SIGTERM


class Terminated(BaseException):
    """Raised from the SIGTERM handler so that clean-up runs exactly as for Ctrl-C."""


def _on_sigterm(signum, frame):  # pragma: no cover - exercised in a subprocess test
    raise Terminated()


# ---- parser ------------------------------------------------------------------------------


def _add_recording_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("recording", help="x.sigmf-meta (or .sigmf-data), a two-channel .wav, or a raw file with --format")
    p.add_argument("--format", dest="datatype", choices=["cf32", "ci16", "ci8", "cu8"],
                   help="sample format of a raw recording (little-endian interleaved I/Q)")
    p.add_argument("--sample-rate", dest="sample_rate_hz", type=float, help="sample rate of a raw recording, Hz")
    p.add_argument("--start", help="UTC time of the first sample of a raw recording or symbol file "
                                   "(ISO-8601, e.g. 2026-03-14T09:30:00Z)")


def build_parser() -> argparse.ArgumentParser:
    from pipeline.report import CAUTION

    parser = argparse.ArgumentParser(
        prog="downlink",
        description="CCSDS telemetry decoding: IQ recording -> verified, time-tagged space packets. " + CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"downlink {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-v", "--verbose", action="count", default=0, help="log more (-vv for debug)")
    common.add_argument("-q", "--quiet", action="store_true", help="no progress bar and no summary line")
    common.add_argument("--traceback", action="store_true", help="show the full traceback on an error")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser("decode", parents=[common], help="decode a recording into packets, frames and a pass report",
                       description="Stream a recording through demodulation, decoding, frame sync, transfer frames "
                                   "and packet extraction. " + CAUTION)
    _add_recording_args(p)
    p.add_argument("--no-time", action="store_true",
                   help="decode an input that carries no start time without one: every ERT is null")
    p.add_argument("--profile", required=True, help="link profile (TOML)")
    p.add_argument("--out", required=True, help="output folder (created; refused if it exists)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--drop-duplicates", action="store_true",
                   help="suppress byte-identical copies of packets already delivered (a replay); by default they "
                        "are delivered and flagged count_anomaly=duplicate")
    p.add_argument("--clock", metavar="CLOCK_JSON",
                   help="a clock.json from 'downlink clock': packets carrying onboard time get utc_from_obt")
    orbit = p.add_mutually_exclusive_group()
    orbit.add_argument("--tle", metavar="FILE", help="a two-line element set: predicted Doppler and residuals in "
                                                     "doppler.csv (needs [station] with a position)")
    orbit.add_argument("--oem", metavar="FILE", help="a CCSDS Orbit Ephemeris Message (text): as --tle")
    p.add_argument("--ut1-utc", dest="ut1_minus_utc_s", type=float, default=0.0, metavar="S",
                   help="UT1 - UTC in seconds for the Earth's rotation in the prediction (default 0)")
    p.add_argument("--no-checksum", dest="verify_checksum", action="store_false",
                   help="do not verify the SigMF core:sha512 of the recording (it is checked while decoding)")
    p.add_argument("--follow", action="store_true",
                   help="write packets.jsonl and frames.jsonl into the output folder as they are decoded (a file "
                        "INCOMPLETE is there until the run ends); for live input from '-' or a pipe")
    p.add_argument("--packets-to-stdout", action="store_true",
                   help="also write each packet as a JSON line on standard output as it is decoded")
    p.add_argument("--cadus", action="store_true",
                   help="also write cadus.bin: every CADU as found (marker + codeblock, hard bits, still randomized)")
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="worker processes for an IQ recording (default 1); the output does not depend on N")
    p.add_argument("--threads", type=int, default=None, metavar="N", help=argparse.SUPPRESS)  # old name of --workers
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="decode the recording's segments as tasks on a Dask cluster: 'local' (a cluster of "
                        "--workers processes here) or a scheduler address such as tcp://host:8786; the output is "
                        "the same as without it")
    p.add_argument("--input", dest="input_kind", choices=["iq", "soft", "bits"], default="iq",
                   help="iq: complex samples (default); soft: int8 per channel symbol, + means bit 0; "
                        "bits: packed hard channel bits, MSB first")
    p.set_defaults(handler=_cmd_decode)

    p = sub.add_parser("demo", parents=[common], help="simulate the bundled demo pass and decode it",
                       description="Simulate about 10 s of the invented Tamarisk lunar relay orbiter as received at "
                                   "the invented Hollow Ridge station, then decode it and compare with the truth.")
    p.add_argument("--out", default="downlink-demo", help="output folder (default: ./downlink-demo)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--seconds", type=float, default=None, help="length of the simulated pass (default 10 s)")
    p.add_argument("--ebn0", dest="ebn0_db", type=float, default=None, help="Eb/N0 in dB (default: the profile's)")
    p.add_argument("--seed", type=int, default=None, help="random seed")
    p.set_defaults(handler=_cmd_demo)

    p = sub.add_parser("simulate", parents=[common], help="make a recording with known truth",
                       description="Simulate the transmitter and channel of a link profile and write a SigMF "
                                   "recording plus truth files listing every packet with its ERT.")
    p.add_argument("--profile", required=True, help="link profile (TOML)")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--ebn0", dest="ebn0_db", type=float, help="Eb/N0 in dB per information bit")
    p.add_argument("--seconds", type=float, help="duration in seconds")
    p.add_argument("--seed", type=int, help="random seed")
    p.add_argument("--carrier-offset", dest="carrier_offset_hz", type=float, help="carrier offset, Hz")
    p.add_argument("--doppler-rate", dest="doppler_rate_hz_per_s", type=float, help="Doppler rate, Hz/s")
    p.add_argument("--clock-offset", dest="clock_offset_ppm", type=float, help="sample-clock offset, ppm")
    p.add_argument("--timing-offset", dest="timing_offset", type=float, help="timing offset, fraction of a symbol")
    p.add_argument("--phase-noise", dest="phase_noise_rad", type=float, help="phase noise, rad rms")
    p.add_argument("--format", dest="format", choices=["cf32", "ci16", "ci8", "cu8"],
                   help="sample format of the recording (default: the profile's [simulate] format)")
    p.add_argument("--datatype", dest="old_datatype", choices=["cf32_le", "ci16_le"],
                   help=argparse.SUPPRESS)  # the old name of --format, kept for one release
    p.add_argument("--fade", action="append", default=[], metavar="START:DURATION:DEPTH_DB",
                   help="a fade (seconds, seconds, dB); repeat for several; a depth of 100 is a dropout")
    p.add_argument("--no-noise", dest="noise", action="store_false", help="no AWGN (for debugging)")
    p.add_argument("--write-bits", action="store_true", help="also write channel.bits (for --input bits)")
    p.add_argument("--write-soft", action="store_true", help="also write channel.soft (for --input soft)")
    p.set_defaults(handler=_cmd_simulate)

    p = sub.add_parser("inspect", parents=[common], help="spectrum, carrier, Es/N0 and lock of a recording",
                       description="Look at a recording without decoding it.")
    _add_recording_args(p)
    p.add_argument("--profile", help="link profile (TOML); adds carrier offset, drift, Es/N0, lock fraction")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--plot", metavar="DIR", help="write spectrum.png and constellation.png into DIR")
    p.add_argument("--seconds", type=float, default=None, help="look at the first SECONDS only")
    p.set_defaults(handler=_cmd_inspect)

    p = sub.add_parser("verify", parents=[common], help="run the known-answer vectors, pass/fail table",
                       description="Run every known-answer vector and print a pass/fail table.")
    p.add_argument("vectors", nargs="?", default=None, help="vector folder (default: the bundled vectors)")
    p.add_argument("--json", action="store_true", help="print one JSON object with a 'cases' list")
    p.set_defaults(handler=_cmd_verify)

    p = sub.add_parser("sweep", parents=[common], help="error-rate curves beside coding theory",
                       description="Monte-Carlo bit, frame and packet error rates against Eb/N0.")
    p.add_argument("--profile", required=True, help="link profile (TOML)")
    p.add_argument("--ebn0", required=True, metavar="A:B:STEP", help="Eb/N0 range in dB, e.g. 0:6:0.5")
    p.add_argument("--frames", type=int, default=200, help="frames per point at most (default 200)")
    p.add_argument("--errors", type=int, default=100,
                   help="stop a point after this many errors: bit errors, frame errors for turbo and LDPC links")
    p.add_argument("--stage", choices=["code", "chain"], default="code",
                   help="code: the codes alone on AWGN; chain: the full chain with carrier and timing recovery")
    p.add_argument("--seed", type=int, default=1, help="random seed")
    p.add_argument("--workers", type=int, default=None, help="processes (default: all cores)")
    p.add_argument("--out", default="sweep-out", help="folder for sweep.csv, sweep.json, sweep.png")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.set_defaults(handler=_cmd_sweep)

    p = sub.add_parser("bench", parents=[common], help="per-stage and end-to-end throughput",
                       description="Measure throughput of each stage and of the whole chain on the demo profile.")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--seconds", type=float, default=4.0, help="length of the end-to-end test recording")
    p.set_defaults(handler=_cmd_bench)

    p = sub.add_parser("clock", parents=[common], help="correlate the spacecraft clock with UTC from decoded passes",
                       description="Pair the onboard times in time packets with the ERT of the frames they sampled, "
                                   "take off the light time and the onboard delay, and fit UTC = a + b * OBT. "
                                   "Writes clock.json, clock.csv and clock_residuals.png.")
    p.add_argument("decoded", nargs="+", metavar="DECODED_DIR", help="folders written by 'downlink decode'")
    p.add_argument("--profile", required=True, help="link profile (TOML) with a [clock] section")
    light = p.add_mutually_exclusive_group(required=True)
    light.add_argument("--light-time", dest="light_time_s", type=float, metavar="SECONDS",
                       help="one-way light time, constant")
    light.add_argument("--range-km", type=float, metavar="KM", help="range to the spacecraft, constant")
    light.add_argument("--tle", metavar="FILE", help="a two-line element set (light time from the orbit)")
    light.add_argument("--oem", metavar="FILE", help="a CCSDS Orbit Ephemeris Message, text form")
    p.add_argument("--out", default=None, help="output folder (default: DECODED_DIR/clock of the first folder)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--quadratic", choices=["auto", "yes", "no"], default="auto",
                   help="fit a quadratic term: when the residuals call for it (auto), always, or never")
    p.add_argument("--ut1-utc", dest="ut1_minus_utc_s", type=float, default=0.0, metavar="S",
                   help="UT1 - UTC in seconds for the Earth's rotation (--tle/--oem)")
    p.add_argument("--json", action="store_true", help="print clock.json on stdout")
    p.set_defaults(handler=_cmd_clock)

    p = sub.add_parser("batch", parents=[common], help="decode many recordings on Dask",
                       description="Decode many recordings (a mission archive) in parallel with Dask.")
    p.add_argument("recordings", nargs="+", help="SigMF recordings (.sigmf-meta)")
    p.add_argument("--profile", required=True, help="link profile (TOML)")
    p.add_argument("--out", required=True, help="output folder: one sub-folder per recording (its path below the "
                                                "recordings' common folder) plus index.json")
    p.add_argument("--scheduler", default=None, help="dask.distributed scheduler address (default: a local cluster)")
    p.add_argument("--workers", type=int, default=None, help="local workers (default: cores)")
    p.set_defaults(handler=_cmd_batch)
    return parser


# ---- handlers ----------------------------------------------------------------------------


def _load_profile(path: str):
    from pipeline.profile import load_profile

    return load_profile(path)


def _workers(args) -> int:
    """``--workers`` (or its deprecated alias ``--threads``), checked."""
    if args.threads is not None:
        if args.workers is not None:
            raise UsageError("--threads is the old name of --workers: give one of them")
        log.warning("--threads is deprecated and will be removed: use --workers (it starts processes)")
    n = args.workers if args.workers is not None else (args.threads if args.threads is not None else 1)
    if not 1 <= n <= 64:
        raise UsageError(f"--workers must be 1..64, not {n}")
    return n


def _compile_notice(args) -> None:
    """One line on stderr when the kernels will be compiled first (an empty numba cache)."""
    from pipeline.chain import kernel_cache_cold

    if not args.quiet and kernel_cache_cold():
        print("compiling kernels (first run only: this takes a minute or less, later runs start at once) ...",
              file=sys.stderr, flush=True)


def _cmd_decode(args) -> int:
    workers = _workers(args)
    profile = _load_profile(args.profile)
    from pipeline.chain import TimeProducts, decode_to_folder, is_stream

    _compile_notice(args)
    if is_stream(args.recording):
        # a live run ends normally on Ctrl-C or a service manager's SIGTERM: the report is written
        try:
            signal.signal(signal.SIGTERM, signal.default_int_handler)
        except ValueError:  # not the main thread
            pass

    summary = decode_to_folder(
        args.recording,
        profile,
        args.out,
        overwrite=args.overwrite,
        input_kind=args.input_kind,
        datatype=args.datatype,
        sample_rate_hz=args.sample_rate_hz,
        start=args.start,
        no_time=args.no_time,
        cadus=args.cadus,
        scheduler=args.scheduler,
        drop_duplicates=args.drop_duplicates,
        verify_checksum=args.verify_checksum,
        follow=args.follow,
        packets_to=sys.stdout if args.packets_to_stdout else None,
        products=TimeProducts(clock=args.clock, tle=args.tle, oem=args.oem, ut1_minus_utc_s=args.ut1_minus_utc_s),
        verbose=args.verbose > 0,
        progress=not args.quiet,
        workers=workers,
    )
    if summary.no_lock is not None:  # said even with --quiet: the run found nothing to decode
        print(f"downlink: {summary.no_lock}", file=sys.stderr)
    doppler_note = (summary.report.get("doppler_check") or {}).get("note")
    if doppler_note:  # said even with --quiet: every Doppler figure of the run has the wrong sign
        print(f"downlink: Doppler check: {doppler_note}", file=sys.stderr)
    if not args.quiet:
        print(summary.line(), file=sys.stderr)
    # standard output carries the packets with --packets-to-stdout; the report's path then goes to stderr
    print(str(Path(args.out) / "report.html"), file=sys.stderr if args.packets_to_stdout else sys.stdout)
    return ExitCode.OK


def _cmd_demo(args) -> int:
    from pipeline.tools._demo import run_demo

    _compile_notice(args)
    return run_demo(out=args.out, overwrite=args.overwrite, seconds=args.seconds, ebn0_db=args.ebn0_db,
                    seed=args.seed, quiet=args.quiet)


def _parse_fades(items: list[str]) -> tuple[tuple[float, float, float], ...]:
    fades = []
    for item in items:
        parts = item.split(":")
        try:
            if len(parts) != 3:
                raise ValueError
            start, dur, depth = (float(x) for x in parts)
        except ValueError:
            raise UsageError(f"--fade {item!r}: expected START:DURATION:DEPTH_DB, e.g. 3.0:0.1:100") from None
        if dur <= 0 or start < 0 or depth < 0:
            raise UsageError(f"--fade {item!r}: start and depth must be >= 0 and duration > 0")
        fades.append((start, dur, depth))
    return tuple(fades)


def _simulate_format(args) -> str | None:
    """``--format`` (or its old name ``--datatype``, with a warning)."""
    if args.old_datatype is None:
        return args.format
    if args.format is not None:
        raise UsageError("--datatype is the old name of --format: give one of them")
    log.warning("--datatype is deprecated and will be removed: use --format %s", args.old_datatype[:4])
    return args.old_datatype[:4]


def _cmd_simulate(args) -> int:
    profile = _load_profile(args.profile)
    fades = _parse_fades(args.fade)
    from pipeline.chain import OutputFolder
    from pipeline.sim import simulate

    with OutputFolder(args.out, overwrite=args.overwrite) as tmp:
        result = simulate(
            profile, tmp, seconds=args.seconds, ebn0_db=args.ebn0_db, seed=args.seed,
            carrier_offset_hz=args.carrier_offset_hz, doppler_rate_hz_per_s=args.doppler_rate_hz_per_s,
            clock_offset_ppm=args.clock_offset_ppm, timing_offset=args.timing_offset,
            phase_noise_rad=args.phase_noise_rad, format=_simulate_format(args), fades=fades, noise=args.noise,
            write_bits=args.write_bits, write_soft=args.write_soft,
        )
    if not args.quiet:
        print(f"simulated {result.seconds:g} s: {result.num_samples} samples, {result.num_frames} frames, "
              f"{result.num_packets} packets, Es/N0 {result.esn0_db:.2f} dB (simulated data)", file=sys.stderr)
    print(str(Path(args.out) / Path(result.meta_path).name))
    return ExitCode.OK


def _cmd_inspect(args) -> int:
    from pipeline.demod import inspect_recording, write_inspect_plots
    from pipeline.recording import open_recording

    profile = _load_profile(args.profile) if args.profile else None
    rec = open_recording(args.recording, format=args.datatype, sample_rate_hz=args.sample_rate_hz,
                         start=args.start)
    result = inspect_recording(rec, profile=profile, max_seconds=args.seconds)
    nominal = (profile.link.downlink_frequency_hz if profile else None) or rec.frequency_hz
    if nominal and result.get("carrier_offset_hz") is not None:
        from pipeline.demod.residual import range_rate_from_doppler

        tuning = float(rec.frequency_hz) - float(nominal) if rec.frequency_hz else 0.0
        f_d = float(result["carrier_offset_hz"]) + tuning
        result["downlink_frequency_hz"] = float(nominal)
        result["range_rate_m_per_s"] = range_rate_from_doppler(f_d, float(nominal))
    if args.plot:
        Path(args.plot).mkdir(parents=True, exist_ok=True)
        write_inspect_plots(result, args.plot)
    shown = {k: v for k, v in result.items() if k != "plots"}
    if args.json:
        from pipeline.report import jsonable

        print(json.dumps(jsonable(shown), indent=None))
    else:
        width = max(len(k) for k in shown)
        for key, value in shown.items():
            if isinstance(value, float):
                value = f"{value:.6g}"
            print(f"{key:<{width}}  {value}")
    return ExitCode.OK


def _cmd_verify(args) -> int:
    from pipeline.tools._verify import run_verify

    return run_verify(args.vectors, as_json=args.json)


def _cmd_sweep(args) -> int:
    from pipeline.tools._sweep import run_sweep

    profile = _load_profile(args.profile)
    return run_sweep(profile, args.ebn0, frames=args.frames, errors=args.errors, stage=args.stage, seed=args.seed,
                     workers=args.workers, out=args.out, overwrite=args.overwrite, quiet=args.quiet)


def _cmd_bench(args) -> int:
    from pipeline.tools._bench import run_bench

    return run_bench(as_json=args.json, seconds=args.seconds)


def _cmd_clock(args) -> int:
    from pipeline.tools._clock import run_clock

    profile = _load_profile(args.profile)
    res = run_clock(args.decoded, profile, light_time_s=args.light_time_s, range_km=args.range_km, tle=args.tle,
                    oem=args.oem, out=args.out, overwrite=args.overwrite,
                    quadratic={"auto": None, "yes": True, "no": False}[args.quadratic],
                    ut1_minus_utc_s=args.ut1_minus_utc_s)
    doc = res.as_json()
    if args.json:
        print(json.dumps(doc))
    if not args.quiet:
        print(f"clock: {doc['pairs_used']} pairs used, {doc['pairs_rejected']} rejected; onboard clock drift "
              f"{doc['drift_s_per_s']:.3e} s/s, residual RMS {doc['residual_rms_s'] * 1e6:.3f} us; {res.out}",
              file=sys.stderr)
    return ExitCode.OK


def _cmd_batch(args) -> int:
    from pipeline.tools._batch import run_batch

    profile = _load_profile(args.profile)
    return run_batch(args.recordings, profile, args.profile, args.out, scheduler=args.scheduler,
                     workers=args.workers, quiet=args.quiet, verbose=args.verbose > 0)


# ---- entry point -------------------------------------------------------------------------


def main(argv: Sequence[str] | None = None) -> int:
    """Run ``downlink`` with ``argv`` (default: ``sys.argv[1:]``) and return the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: --help, --version, usage errors
        return int(exc.code or 0)
    level = logging.WARNING - 10 * getattr(args, "verbose", 0)
    logging.basicConfig(level=max(level, logging.DEBUG), format="%(levelname)s %(name)s: %(message)s")
    old_term = None
    try:
        old_term = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not in the main thread (tests, Dask workers)
        pass
    try:
        return int(args.handler(args))
    except UsageError as exc:
        return _report(args, exc, ExitCode.USAGE)
    except (RecordingError, ProfileError, DataFileError) as exc:
        return _report(args, exc, ExitCode.BAD_INPUT)
    except OutputError as exc:
        return _report(args, exc, ExitCode.BAD_OUTPUT)
    except DownlinkError as exc:
        return _report(args, exc, ExitCode.FAILED)
    except BrokenPipeError:  # the reader of stdout went away (`downlink verify --json | head`): stop quietly
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())  # so the interpreter's final flush cannot fail again
        except (OSError, ValueError):
            pass
        return ExitCode.OK
    except KeyboardInterrupt:
        print("Error: interrupted; no output was completed", file=sys.stderr)
        return ExitCode.INTERRUPTED
    except Terminated:
        print("Error: terminated; no output was completed", file=sys.stderr)
        return ExitCode.TERMINATED
    except Exception as exc:  # a bug
        if getattr(args, "traceback", False):
            traceback.print_exc()
        else:
            print(f"Error: internal error ({type(exc).__name__}: {exc}); rerun with --traceback and report it",
                  file=sys.stderr)
        return ExitCode.INTERNAL
    finally:
        if old_term is not None:
            try:
                signal.signal(signal.SIGTERM, old_term)
            except ValueError:
                pass


def _report(args, exc: BaseException, code: ExitCode) -> int:
    if getattr(args, "traceback", False):
        traceback.print_exc()
    else:
        print(f"Error: {exc}", file=sys.stderr)
    return code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
