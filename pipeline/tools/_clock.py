"""``downlink clock``: correlate the spacecraft clock with UTC from decoded passes.

Common practice (no published source stored; issue 17): the spacecraft samples its clock when the leading
edge of the ASM of every *sampled* frame leaves the antenna (TM: master-channel frame count a multiple of
``[clock] sampled_every``; AOS: the virtual-channel count of ``sampled_vcid``), and reports the sample in
a time packet (``[clock] time_packet_apid``).  A time packet refers to the latest sampled frame at or before
the frame that carries its first octet.  Each pair gives

    UTC at the spacecraft = ERT(sampled frame) - one-way light time - [clock] onboard_delay_ns

against the onboard time (OBT) in the packet, and a robust least-squares fit gives
``UTC = utc_at_epoch + rate (OBT - epoch_obt_s) [+ quadratic (OBT - epoch_obt_s)^2]``.

Outputs in ``out``: ``clock.json`` (:data:`pipeline.packets.CLOCK_JSON_KEYS`), ``clock.csv``
(:data:`CLOCK_CSV_COLUMNS`, one row per time packet) and ``clock_residuals.png``.
"""

from __future__ import annotations

import bisect
import csv
import json
import math
import os
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.errors import DataFileError, ProfileError
from pipeline.packets import ClockModel, decode_obt_ns
from pipeline.profile import LinkProfile
from pipeline.timescales import NS_PER_S, check_expiry, format_utc, parse_utc

__all__ = ["CLOCK_CSV_COLUMNS", "REJECT_REASONS", "ClockPair", "ClockResult", "fit_clock", "pair_time_packets",
           "light_time_source", "run_clock"]

#: Columns of ``clock.csv``, in order.
CLOCK_CSV_COLUMNS = ("obt_s", "frame_ert", "utc_spacecraft", "utc_fit", "residual_s", "used")
#: Why a time packet gives no pair in the fit.
REJECT_REASONS = ("sampled_frame_not_received", "sampled_frame_failed", "time_code_unreadable", "no_light_time",
                  "outlier")
_GOOD = ("ok", "idle")
_F_TEST_P = 1e-3  # a quadratic term is kept when the F-test gives p below this
_OUTLIER_SIGMAS = 5.0
_VC_MODULUS = 1 << 24


@dataclass
class ClockPair:
    """One time packet and, when it could be paired, its sampled frame.

    Attributes
    ----------
    folder : str
        The decoded folder it came from.
    obt_ns : int
        Onboard time: the time code's count in ns.
    resolution_ns : float
        One step of the time code.
    frame_ert : str or None
        ERT of the sampled frame as written by the decode.
    frame_ert_tai_ns, utc_spacecraft_tai_ns : int or None
        That ERT and the UTC at the spacecraft, TAI ns.
    reason : str or None
        None for a pair, else one of :data:`REJECT_REASONS`.
    used : bool
        Whether the fit used it.
    utc_fit_tai_ns : int or None
    residual_s : float or None
        UTC at the spacecraft minus the fit.
    """

    folder: str
    obt_ns: int
    resolution_ns: float
    frame_ert: str | None = None
    frame_ert_tai_ns: int | None = None
    utc_spacecraft_tai_ns: int | None = None
    reason: str | None = None
    used: bool = False
    utc_fit_tai_ns: int | None = None
    residual_s: float | None = None


@dataclass
class ClockResult:
    """What :func:`run_clock` returns.

    Attributes
    ----------
    model : ClockModel
    pairs : list of ClockPair
    rejected : dict
        Count per reason (:data:`REJECT_REASONS`).
    out : Path or None
    """

    model: ClockModel
    pairs: list
    rejected: dict = field(default_factory=dict)
    out: Path | None = None

    def as_json(self) -> dict:
        """The ``clock.json`` object (what ``--json`` prints)."""
        return self.model.as_dict()


# ---- reading decoded folders --------------------------------------------------------------------

def _read_jsonl(path: Path) -> list[dict]:
    try:
        with open(path, encoding="utf-8") as f:
            out = []
            for lineno, line in enumerate(f, 1):
                if line.strip():
                    obj = json.loads(line)
                    if not isinstance(obj, dict):
                        raise DataFileError(f"{path}: line {lineno} is not a JSON object")
                    out.append(obj)
            return out
    except FileNotFoundError:
        raise DataFileError(f"{path}: not found (is {path.parent} a decoded folder?)") from None
    except json.JSONDecodeError as exc:
        raise DataFileError(f"{path}: line {exc.lineno} is not JSON ({exc.msg})") from None
    except (UnicodeDecodeError, OSError) as exc:
        raise DataFileError(f"{path}: cannot read ({exc})") from None


def _field(obj: dict, key: str, kind, where: str):
    v = obj.get(key)
    if kind is float and isinstance(v, int) and not isinstance(v, bool):
        v = float(v)
    if not isinstance(v, kind) or isinstance(v, bool):
        raise DataFileError(f"{where}: {key!r} must be {kind.__name__}, not {v!r}")
    return v


# ---- pairing --------------------------------------------------------------------------------------

def _frame_period(frames: list[dict]) -> float | None:
    """Median sample (or symbol) positions per master-channel count step between good TM frames."""
    steps = []
    for a, b in zip(frames, frames[1:]):
        if a.get("status") in _GOOD and b.get("status") in _GOOD and isinstance(a.get("mcfc"), int) \
                and isinstance(b.get("mcfc"), int):
            d = (b["mcfc"] - a["mcfc"]) % 256
            if 1 <= d <= 4:
                steps.append((b["sample_position"] - a["sample_position"]) / d)
    return float(np.median(steps)) if steps else None


def pair_time_packets(frames: list[dict], packets: list[dict], profile: LinkProfile, *,
                      folder: str = "") -> list[ClockPair]:
    """Pair each time packet of one decoded pass with its sampled frame (no light time applied yet).

    Parameters
    ----------
    frames, packets : list of dict
        The objects of ``frames.jsonl`` and ``packets.jsonl`` (``position``, ``status``, ``scid``,
        ``vcid``, ``mcfc``, ``vcfc``, ``ert``; packets ``apid``, ``hex``, ``position``, ``mcfc``, ``vcfc``).
    profile : LinkProfile
        With a ``[clock]`` section.

    Returns
    -------
    list of ClockPair
        One per time packet whose time code could be read; ``reason`` says why one has no frame.

    Notes
    -----
    TM: the packet's first frame has master-channel count ``M``; the sampled frame has count
    ``M - M mod N`` and lies ``(M mod N)`` frame periods earlier (period = median position step per
    count), so an outage of 256 frames or more cannot alias it; a frame found there with a failed status
    rejects the pair as failed, none as not received.  AOS: the last good frame of ``sampled_vcid`` at or
    before the packet gives ``V``; the sampled count is ``V - V mod N``; if the frames of that channel lost
    between ``V`` and the next good one include a sampled count, the latest sampled frame is unknown and
    the pair is rejected.  O((frames + packets) log frames).
    """
    c = profile.clock
    if c is None:
        raise ProfileError(f"{profile.source}: the profile has no [clock] section (time packet APID, time code, "
                           f"sampled frames)")
    scid = profile.frames.spacecraft_id
    frames = sorted((f for f in frames if f.get("scid") in (None, scid) or f.get("status") not in _GOOD),
                    key=lambda f: float(f.get("sample_position", 0.0)))
    for i, f in enumerate(frames):
        _field(f, "sample_position", float, f"{folder}/frames.jsonl frame {i}")
    positions = [float(f["sample_position"]) for f in frames]
    n = c.sampled_every
    period = _frame_period(frames) if profile.frames.kind == "tm" else None
    vc = [f for f in frames if f.get("vcid") == c.sampled_vcid and f.get("status") in _GOOD] \
        if profile.frames.kind == "aos" else []
    vc_pos = [float(f["sample_position"]) for f in vc]
    out = []
    for i, p in enumerate(packets):
        if p.get("apid") != c.time_packet_apid:
            continue
        where = f"{folder}/packets.jsonl packet {i}"
        data = bytes.fromhex(_field(p, "hex", str, where))
        try:
            obt = decode_obt_ns(data[6 + c.time_field_offset:], code=c.code, pfield=c.pfield)
        except ValueError:
            out.append(ClockPair(folder, 0, 0.0, reason="time_code_unreadable"))
            continue
        pair = ClockPair(folder, obt.ns, obt.resolution_ns)
        pos = _field(p, "sample_position", float, where)
        if profile.frames.kind == "tm":
            frame, pair.reason = _tm_sampled_frame(frames, positions, pos, _field(p, "mcfc", int, where), n, period)
        else:
            frame, pair.reason = _aos_sampled_frame(vc, vc_pos, pos, n)
        if frame is not None:
            ert = frame.get("ert")
            if not isinstance(ert, str):
                raise DataFileError(f"{folder}/frames.jsonl: frames have no ERT (decoded with --no-time?); the "
                                    f"clock needs a decode with a start time")
            try:
                pair.frame_ert, pair.frame_ert_tai_ns = ert, parse_utc(ert)
            except ValueError as exc:
                raise DataFileError(f"{folder}/frames.jsonl: {exc}") from None
        out.append(pair)
    return out


def _tm_sampled_frame(frames, positions, pos, mcfc, n, period):
    k = mcfc % n
    target = (mcfc - k) % 256
    if period is None:  # too few frames for a period: take the latest frame with that count
        j = bisect.bisect_right(positions, pos) - 1
        for f in reversed(frames[max(0, j - 256):j + 1]):
            if f.get("mcfc") == target and f.get("status") in _GOOD:
                return f, None
        return None, "sampled_frame_not_received"
    expected = pos - k * period
    lo = bisect.bisect_left(positions, expected - 0.5 * period)
    hi = bisect.bisect_right(positions, expected + 0.5 * period)
    near = frames[lo:hi]
    for f in near:
        if f.get("status") in _GOOD and f.get("mcfc") == target:
            return f, None
    return None, ("sampled_frame_failed" if near else "sampled_frame_not_received")


def _aos_sampled_frame(vc, vc_pos, pos, n):
    j = bisect.bisect_right(vc_pos, pos) - 1
    if j < 0:
        return None, "sampled_frame_not_received"
    v = vc[j]["vcfc"]
    if j + 1 < len(vc):
        gap = (vc[j + 1]["vcfc"] - v) % _VC_MODULUS
        if any((v + d) % n == 0 for d in range(1, min(gap, n + 1))):
            return None, "sampled_frame_not_received"  # a lost sampled count may precede the packet
    target = (v - v % n) % _VC_MODULUS
    for f in reversed(vc[max(0, j - n):j + 1]):
        if f["vcfc"] == target:
            return f, None
    return None, "sampled_frame_not_received"


# ---- the fit ----------------------------------------------------------------------------------------

def _lstsq(x: np.ndarray, y: np.ndarray, degree: int) -> tuple[np.ndarray, np.ndarray]:
    a = np.vander(x, degree + 1, increasing=True)
    coef, *_ = np.linalg.lstsq(a, y, rcond=None)
    return coef, a


def fit_clock(pairs: list[ClockPair], *, quadratic: bool | None = None, light_time_source: str = "",
              rejected_before: int = 0) -> ClockModel:
    """Robust fit of UTC at the spacecraft against onboard time; marks ``used``, ``utc_fit``, ``residual_s``.

    Parameters
    ----------
    pairs : list of ClockPair
        Those with ``utc_spacecraft_tai_ns`` set take part.
    quadratic : bool or None
        Force (True) or refuse (False) the quadratic term; None chooses it by an F-test on the residuals
        (kept when p < 0.001).
    light_time_source : str
        Written into the model.
    rejected_before : int
        Time packets already rejected (no sampled frame, unreadable, no light time).

    Returns
    -------
    ClockModel

    Raises
    ------
    DataFileError
        Fewer than 3 usable pairs (4 with the quadratic term).

    Notes
    -----
    ``x = (OBT - epoch) / 1 s`` with the epoch the median OBT rounded to a whole second, and
    ``y = (UTC - UTC_ref) / 1 s - x`` (small numbers, so float64 keeps 1e-15 s); least squares of
    ``y = a + (rate - 1) x [+ q x^2]``, then repeatedly: residual scale ``s = 1.4826 MAD``, pairs beyond
    ``max(5 s, one time-code step, 1 ns)`` are outliers, refit on the others until the set is stable.
    The drift uncertainty is the standard error of ``rate`` from the fit (``sigma^2 (A^T A)^-1``) divided
    by ``rate^2``.  O(n) per iteration.

    References
    ----------
    F. R. Hampel, "The influence curve and its role in robust estimation", JASA 69 (1974) (the MAD scale);
    the F-test for an added regression term (any regression text, e.g. Draper and Smith, ch. 6).
    """
    from scipy.stats import f as f_dist

    good = [p for p in pairs if p.utc_spacecraft_tai_ns is not None]
    if len(good) < 3:
        raise DataFileError(f"only {len(good)} time packet(s) paired with a sampled frame; at least 3 are needed "
                            f"to fit the clock")
    obt = np.array([p.obt_ns for p in good], dtype=object)
    epoch_s = int(round(float(np.median([p.obt_ns for p in good])) / NS_PER_S))
    epoch_ns = epoch_s * NS_PER_S
    mid = min(good, key=lambda p: abs(p.obt_ns - epoch_ns))
    ref = mid.utc_spacecraft_tai_ns
    x = np.array([(int(o) - epoch_ns) / NS_PER_S for o in obt])
    y = np.array([(p.utc_spacecraft_tai_ns - ref) / NS_PER_S for p in good]) - x
    floor = max(max(p.resolution_ns for p in good) * 1e-9, 1e-9)

    def robust(degree: int) -> tuple[np.ndarray, np.ndarray]:
        used = np.ones(len(good), dtype=bool)
        for _ in range(50):
            if used.sum() < degree + 2:
                raise DataFileError(f"only {int(used.sum())} pairs agree with each other; the clock cannot be fitted")
            coef, a = _lstsq(x[used], y[used], degree)
            r = y - np.vander(x, degree + 1, increasing=True) @ coef
            ru = r[used]
            s = 1.4826 * float(np.median(np.abs(ru - np.median(ru))))
            new = np.abs(r) <= max(_OUTLIER_SIGMAS * s, floor)
            if np.array_equal(new, used):
                break
            used = new
        return coef, used

    coef, used = robust(1)
    degree = 1
    if quadratic is None and used.sum() >= 5:
        c1, _ = _lstsq(x[used], y[used], 1)
        c2, a2 = _lstsq(x[used], y[used], 2)
        rss1 = float(np.sum((y[used] - np.vander(x[used], 2, increasing=True) @ c1) ** 2))
        rss2 = float(np.sum((y[used] - a2 @ c2) ** 2))
        k = int(used.sum())
        if rss2 <= 0.0:
            take = rss1 > 0.0
        else:
            take = f_dist.sf((rss1 - rss2) / (rss2 / (k - 3)), 1, k - 3) < _F_TEST_P
        if take:
            degree = 2
    elif quadratic:
        degree = 2
    if degree == 2:
        coef, used = robust(2)
    a_used = np.vander(x[used], degree + 1, increasing=True)
    resid = y[used] - a_used @ coef
    k = int(used.sum())
    sigma2 = float(resid @ resid) / max(k - degree - 1, 1)
    cov = sigma2 * np.linalg.inv(a_used.T @ a_used)
    rate = 1.0 + float(coef[1])
    model = ClockModel(
        epoch_obt_s=float(epoch_s), utc_at_epoch_tai_ns=ref + round(float(coef[0]) * NS_PER_S), rate=rate,
        quadratic=float(coef[2]) if degree == 2 else None, drift_s_per_s=1.0 / rate - 1.0,
        drift_uncertainty=math.sqrt(float(cov[1, 1])) / rate ** 2,
        residual_rms_s=math.sqrt(float(resid @ resid) / k),
        pairs_used=k, pairs_rejected=rejected_before + (len(good) - k), light_time_source=light_time_source)
    for p, u in zip(good, used):
        p.used = bool(u)
        p.utc_fit_tai_ns = model.utc_tai_ns(p.obt_ns)
        p.residual_s = (p.utc_spacecraft_tai_ns - p.utc_fit_tai_ns) / NS_PER_S
        if not u:
            p.reason = "outlier"
    return model


# ---- light time -------------------------------------------------------------------------------------

def light_time_source(profile: LinkProfile, *, light_time_s: float | None = None, range_km: float | None = None,
                      tle: str | os.PathLike | None = None, oem: str | os.PathLike | None = None,
                      ut1_minus_utc_s: float = 0.0):
    """The light-time provider of ``--light-time`` | ``--range-km`` | ``--tle`` | ``--oem`` (exactly one).

    Raises
    ------
    ValueError
        Not exactly one given, or a constant out of range.
    ProfileError
        An orbit file given but the profile's ``[station]`` has no position.
    DataFileError
        The element set or ephemeris cannot be read.
    """
    from pipeline.chain import TimeProducts
    from pipeline.orbit import ConstantLightTime

    given = [k for k, v in (("light_time_s", light_time_s), ("range_km", range_km), ("tle", tle), ("oem", oem))
             if v is not None]
    if len(given) != 1:
        raise ValueError(f"Give exactly one of light_time_s, range_km, tle, oem (--light-time, --range-km, --tle, "
                         f"--oem), not {given or 'none'}.")
    if light_time_s is not None:
        return ConstantLightTime(light_time_s, description=f"constant light time {float(light_time_s):.9f} s "
                                                            f"(--light-time)")
    if range_km is not None:
        return ConstantLightTime.from_range_km(range_km)
    return TimeProducts(tle=None if tle is None else os.fspath(tle), oem=None if oem is None else os.fspath(oem),
                        ut1_minus_utc_s=ut1_minus_utc_s).orbit_predictor(profile)


# ---- the command ------------------------------------------------------------------------------------

def run_clock(decoded_dirs, profile: LinkProfile, *, light_time_s: float | None = None,
              range_km: float | None = None, tle: str | os.PathLike | None = None,
              oem: str | os.PathLike | None = None, out: str | os.PathLike | None = None, overwrite: bool = False,
              quadratic: bool | None = None, ut1_minus_utc_s: float = 0.0, plot: bool = True) -> ClockResult:
    """``downlink clock``: pair, fit and write ``clock.json``, ``clock.csv`` and ``clock_residuals.png``.

    Parameters
    ----------
    decoded_dirs : path or list of paths
        Folders written by ``downlink decode`` (``packets.jsonl``, ``frames.jsonl``), one pass each.
    profile : LinkProfile
        With ``[clock]`` (and ``[station]`` for ``tle``/``oem``).
    light_time_s, range_km, tle, oem :
        Exactly one light-time source (:func:`light_time_source`).
    out : path, optional
        Output folder (default: ``clock`` inside the first decoded folder); it appears only when complete
        and an existing one needs ``overwrite``.
    quadratic : bool or None
        See :func:`fit_clock`.
    ut1_minus_utc_s : float
        For orbit files (Earth rotation).
    plot : bool
        Draw ``clock_residuals.png``.

    Returns
    -------
    ClockResult

    Examples
    --------
    >>> import json, os, tempfile
    >>> from pipeline.profile import profile_from_dict
    >>> prof = profile_from_dict({"link": {}, "frames": {"length": 64}, "coding": {"reed_solomon": 0},
    ...                           "clock": {"time_packet_apid": 127, "pfield": 0x2F, "sampled_every": 4}})
    >>> frames, packets = [], []
    >>> for k in range(16):   # one frame a second; a time packet in frame 4j + 1 names frame 4j
    ...     frames.append({"sample_position": 1000.0 * k, "status": "ok", "scid": 499, "vcid": 0, "mcfc": k,
    ...                    "vcfc": k, "ert": f"2026-03-14T09:30:{k + 1:02d}.281700000Z"})
    ...     if k % 4 == 1:
    ...         obt = (10 + k - 1) * 2**24   # the onboard clock reads 10 s at the first sampled frame
    ...         packets.append({"apid": 127, "sample_position": 1000.0 * k, "mcfc": k, "vcfc": k,
    ...                         "hex": "087fc0000006" + obt.to_bytes(7, "big").hex()})
    >>> with tempfile.TemporaryDirectory() as d:
    ...     for name, rows in (("frames.jsonl", frames), ("packets.jsonl", packets)):
    ...         _ = open(os.path.join(d, name), "w").write("".join(json.dumps(r) + "\\n" for r in rows))
    ...     res = run_clock([d], prof, light_time_s=1.2817, plot=False)
    >>> res.as_json()["epoch_obt_s"], res.as_json()["utc_at_epoch"], res.model.pairs_used
    (16.0, '2026-03-14T09:30:06.000000000Z', 4)
    >>> abs(res.model.drift_s_per_s) < 1e-12
    True
    """
    if isinstance(decoded_dirs, (str, os.PathLike)):
        decoded_dirs = [decoded_dirs]
    folders = [Path(os.fspath(d)) for d in decoded_dirs]
    if not folders:
        raise ValueError("Argument 'decoded_dirs' must name at least one decoded folder.")
    if not isinstance(profile, LinkProfile):
        raise TypeError(f"Argument 'profile' must be a LinkProfile, not {type(profile).__name__}.")
    source = light_time_source(profile, light_time_s=light_time_s, range_km=range_km, tle=tle, oem=oem,
                               ut1_minus_utc_s=ut1_minus_utc_s)
    delay_ns = profile.clock.onboard_delay_ns if profile.clock is not None else 0
    pairs: list[ClockPair] = []
    for d in folders:
        if not d.is_dir():
            raise DataFileError(f"{d}: not a decoded folder")
        pairs += pair_time_packets(_read_jsonl(d / "frames.jsonl"), _read_jsonl(d / "packets.jsonl"), profile,
                                   folder=str(d))
    for p in pairs:
        if p.frame_ert_tai_ns is None:
            continue
        check_expiry(p.frame_ert_tai_ns)
        tau = source.light_time_s(p.frame_ert_tai_ns)
        if tau is None:
            p.reason = "no_light_time"
            continue
        p.utc_spacecraft_tai_ns = p.frame_ert_tai_ns - round(tau * NS_PER_S) - delay_ns
    rejected_before = sum(1 for p in pairs if p.reason is not None)
    model = fit_clock(pairs, quadratic=quadratic, light_time_source=source.description,
                      rejected_before=rejected_before)
    counts = Counter(p.reason for p in pairs if p.reason is not None)
    result = ClockResult(model=model, pairs=pairs, rejected={r: counts.get(r, 0) for r in REJECT_REASONS})
    if out is None and not plot:
        return result
    from pipeline.chain import OutputFolder

    target = Path(os.fspath(out)) if out is not None else folders[0] / "clock"
    with OutputFolder(target, overwrite=overwrite) as tmp:
        (tmp / "clock.json").write_text(json.dumps(model.as_dict(), indent=2) + "\n", encoding="utf-8")
        _write_csv(tmp / "clock.csv", pairs)
        if plot:
            _plot(tmp / "clock_residuals.png", pairs, model)
    result.out = target
    return result


def _write_csv(path: Path, pairs: list[ClockPair]) -> None:
    def text(t):
        return "" if t is None else format_utc(t)

    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(CLOCK_CSV_COLUMNS)
        for p in pairs:
            if p.reason == "time_code_unreadable":
                continue
            s, ns = divmod(p.obt_ns, NS_PER_S)
            w.writerow([f"{s}.{ns:09d}", p.frame_ert or "", text(p.utc_spacecraft_tai_ns), text(p.utc_fit_tai_ns),
                        "" if p.residual_s is None else f"{p.residual_s:.12f}", "true" if p.used else "false"])


def _plot(path: Path, pairs: list[ClockPair], model: ClockModel) -> None:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8.0, 4.0), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    ax.grid(True, alpha=0.3)
    for used, style, label in ((True, dict(marker=".", linestyle="none"), "used"),
                               (False, dict(marker="x", linestyle="none", color="tab:red"), "outlier")):
        sel = [p for p in pairs if p.residual_s is not None and p.used == used]
        if sel:
            ax.plot([p.obt_ns / NS_PER_S - model.epoch_obt_s for p in sel], [p.residual_s * 1e6 for p in sel],
                    label=f"{label} ({len(sel)})", **style)
    ax.set_xlabel(f"onboard time - {model.epoch_obt_s:.0f} s")
    ax.set_ylabel("UTC at spacecraft - fit (us)")
    ax.set_title(f"clock correlation: drift {model.drift_s_per_s:.3e} s/s, residual RMS "
                 f"{model.residual_rms_s * 1e6:.3f} us")
    ax.legend(loc="best")
    fig.savefig(path)
