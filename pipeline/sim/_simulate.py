"""``simulate``: the whole transmitter and channel, streamed into a SigMF recording plus truth files.

Timing of the traffic: the transmitter sends frames back to back.  Before frame ``j`` is built, the
packets generated before the time its ASM goes out are queued, so the queues follow real time.  The
first three CADU periods carry no packets (idle frames a receiver can acquire on), and every frame
that starts in the last three CADU periods (plus the pulse span) is an idle frame, so the recording
ends in idle frames too and the last frame with data is followed by enough signal for a receiver to
finish it.  A packet whose last octets would have gone out in that tail is not complete in the
recording and is not in the truth.  Only frames whose last channel symbol lies wholly inside the
recording are in the truth, and only packets whose every octet is in such frames.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from pipeline.errors import ProfileError
from pipeline.profile import LinkProfile
from pipeline.sim._channel import Channel, DopplerPass, Fade, noise_variance_per_sample
from pipeline.sim._coding import ChannelCoder, NrzmPosition
from pipeline.sim._frames import AosFrameBuilder, IdleMode, TmFrameBuilder
from pipeline.sim._modulator import make_modulator
from pipeline.sim._packets import PacketSource
from pipeline.sim._time import format_tai_ns_as_utc, parse_utc_ns, tai_ns_from_utc_ns

__all__ = ["SimulationResult", "simulate", "soft_channel_symbols", "SOFT_SCALE"]

#: int8 soft value of a noiseless channel bit 0 in ``channel.soft`` (bit 1 is ``-SOFT_SCALE``).
SOFT_SCALE = 32.0

# RMS full-scale fraction of signal plus noise: leaves > 3.5 sigma of headroom per component for ci16.
_TOTAL_RMS = 0.35

_LEAD_CADUS = 3
_TAIL_CADUS = 3


@dataclass(frozen=True)
class SimulationResult:
    """What :func:`simulate` wrote.

    Attributes
    ----------
    meta_path, data_path, truth_path, truth_frames_path : Path
        The SigMF pair and the truth files.
    bits_path, soft_path : Path or None
        ``channel.bits`` / ``channel.soft`` when asked for.
    num_samples, num_frames, num_packets : int
        Samples in the recording; frames and packets in the truth files.
    num_channel_bits : int
        Channel bits whose symbol lies in the recording (the length of ``channel.soft``).
    esn0_db, ebn0_db : float
        Es/N0 per modulation symbol and Eb/N0 per information bit of the unfaded signal.
    seconds : float
        Duration of the recording.
    symbol_period_samples : float
        ``T``, samples per modulation symbol (clock offset included).
    first_symbol_position : float
        ``p_0``, peak position of modulation symbol 0 (samples).
    clipped : int
        Components that saturated in an integer datatype.
    """

    meta_path: Path
    data_path: Path
    truth_path: Path
    truth_frames_path: Path
    bits_path: Path | None
    soft_path: Path | None
    num_samples: int
    num_frames: int
    num_packets: int
    num_channel_bits: int
    esn0_db: float
    ebn0_db: float
    seconds: float
    symbol_period_samples: float
    first_symbol_position: float
    clipped: int


def soft_channel_symbols(bits: np.ndarray, gains: np.ndarray, *, esn0_db: float, bits_per_symbol: int,
                         rng: np.random.Generator | None) -> np.ndarray:
    """int8 soft channel symbols: ``round(SOFT_SCALE (g (1 - 2 b) + n))``, clipped to +-127.

    Notes
    -----
    After a matched filter normalised to +-1, each channel bit sees real Gaussian noise of variance
    ``sigma^2 = bits_per_symbol / (2 Es/N0)`` (each bit of a QPSK symbol carries Es/2), as in
    Proakis & Salehi, Digital Communications, 5th ed., sec. 4.3.  ``g`` is the fade gain.
    """
    levels = gains * (1.0 - 2.0 * bits.astype(np.float64))
    if rng is not None:
        sigma = math.sqrt(bits_per_symbol / (2.0 * 10.0 ** (esn0_db / 10.0)))
        levels = levels + sigma * rng.standard_normal(bits.size)
    return np.clip(np.rint(levels * SOFT_SCALE), -127, 127).astype(np.int8)


def _sample_format_name(name) -> str:
    """The SigMF datatype for a user's format name (``cf32`` -> ``cf32_le``); SigMF names pass."""
    from pipeline.recording import FORMAT_CHOICES, sample_format

    try:
        return sample_format(name).name
    except (TypeError, ValueError):
        raise ValueError(f"Argument 'format' must be {FORMAT_CHOICES.replace('|', ' | ')}, not {name!r}.") from None


def _pick(value, default):
    return default if value is None else value


def _check_number(name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not math.isfinite(value):
        raise TypeError(f"Argument '{name}' must be a finite number, not {value!r}.")
    return float(value)


def _description(profile: LinkProfile, ebn0_db: float, esn0_db: float, seconds: float, extras: list[str]) -> str:
    L, C, F = profile.link, profile.coding, profile.frames
    coding = []
    if C.turbo != "none":
        coding.append(f"turbo r={C.turbo} k={C.turbo_k}")
    if C.ldpc != "none":
        coding.append("LDPC C2" if C.ldpc == "c2" else f"LDPC AR4JA r={C.ldpc_rate} k={C.ldpc_k}")
    if C.convolutional != "none":
        coding.append(f"convolutional r={C.convolutional}")
    if C.reed_solomon:
        coding.append(f"RS(255,{C.rs_k}) I={C.interleave}")
    coding_text = " + ".join(coding) if coding else "uncoded"
    if L.modulation in ("pcm-pm", "pcm-psk-pm"):
        shape = f"index {L.modulation_index_rad:g} rad"
        if L.modulation == "pcm-psk-pm":
            shape += f", {L.subcarrier_wave} subcarrier {L.subcarrier_hz:g} Hz"
    elif L.line_code == "bi-phase-l":
        shape = "rect"
    else:
        shape = f"{L.pulse}{f' {L.rolloff:g}' if L.pulse == 'rrc' else ''}"
    text = (f"SIMULATED recording (not a real reception) of link profile '{profile.name}', made by downlink's "
            f"simulator: {L.modulation.upper()} {L.symbol_rate_baud:g} baud, {shape}, "
            f"{L.line_code.upper()}, {coding_text}, "
            f"{F.kind.upper()} frames of {F.length} octets, SCID {F.spacecraft_id}; {seconds:g} s at "
            f"Eb/N0 {ebn0_db:.2f} dB (Es/N0 {esn0_db:.2f} dB)")
    if extras:
        text += "; " + ", ".join(extras)
    return text + ". Caution: simulated data, for testing only."


def simulate(profile: LinkProfile, out_dir, *, seconds: float | None = None, ebn0_db: float | None = None,
             seed: int | None = None, carrier_offset_hz: float | None = None,
             doppler_rate_hz_per_s: float | None = None, clock_offset_ppm: float | None = None,
             timing_offset: float | None = None, phase_noise_rad: float | None = None,
             format: str | None = None, fades: Iterable = (), noise: bool = True, write_bits: bool = False,
             write_soft: bool = False, name: str = "recording", doppler_pass: DopplerPass | None = None,
             phase_noise_bandwidth_hz: float = 100.0, nrzm_at: NrzmPosition = "encoder_input",
             idle: IdleMode = "oid", chunk_frames: int = 4, datatype: str | None = None) -> SimulationResult:
    """Simulate a pass of a link profile into ``out_dir``.

    Parameters
    ----------
    profile :
        The link profile; ``[simulate]`` gives the traffic and every default below (``None`` = the
        profile's value).
    out_dir :
        Folder to write into (created if missing).  Existing files of the same names are refused.
    seconds, ebn0_db, seed, carrier_offset_hz, doppler_rate_hz_per_s, clock_offset_ppm, timing_offset,
    phase_noise_rad, format :
        Override the ``[simulate]`` values.  ``format`` is the sample format of the recording,
        ``cf32 | ci16 | ci8 | cu8`` (``--format``; the metadata names it as SigMF does, ``cf32_le``).
        ``ebn0_db`` is per information bit of the codeblock (ASM excluded); ``timing_offset`` is the
        position of symbol 0 in symbol periods; ``phase_noise_rad`` the RMS of the phase noise.
    fades :
        ``(start_s, duration_s, depth_db)`` triples; ``depth_db = inf`` (or >= 100) is a dropout.
    noise :
        False leaves out the AWGN (the phase noise and fades stay).
    write_bits, write_soft :
        Also write ``channel.bits`` (packed hard channel bits, MSB first) and ``channel.soft``
        (int8 per channel bit, + means 0, noisy at the same Es/N0 with an independent noise draw).
    name :
        Base name of the SigMF pair.
    doppler_pass :
        A :class:`DopplerPass` added to the constant-rate Doppler.
    phase_noise_bandwidth_hz :
        Corner frequency of the phase noise.
    nrzm_at :
        NRZ-M at the convolutional encoder input (CCSDS 131.0-B-2 sec. 3.3.3, default) or on the
        channel symbols (see :class:`ChannelCoder`).
    idle :
        ``"oid"`` (Only-Idle-Data frames when there is nothing to send) or ``"packets"``.
    chunk_frames :
        Frames per processing step (memory is O(chunk_frames x frame samples)).
    datatype :
        Former name of ``format``.

    Returns
    -------
    SimulationResult

    Notes
    -----
    Files: ``<name>.sigmf-meta`` / ``.sigmf-data`` (via :class:`pipeline.recording.SigmfWriter`),
    ``truth.jsonl`` (one object per packet, in the order its last octet was sent: ``apid``,
    ``seq_count``, ``hex``, ``vcid``, ``scid``, ``mcfc``, ``vcfc``, ``ert``, ``position``,
    ``channel_bit``, ``generation``), ``truth_frames.jsonl`` (one object per frame: ``index``,
    ``scid``, ``vcid``, ``mcfc``, ``vcfc``, ``fhp``, ``idle``, ``ocf``, ``position``, ``ert``,
    ``channel_bit``, ``carrier_offset_hz``).  ``position`` is the sample position of the pulse peak of
    the modulation symbol carrying the first channel bit of the frame's ASM (its I-rail pulse on OQPSK,
    even when that bit is a Q bit; see :mod:`pipeline.sim._modulator`), ``ert`` =
    ``start + (position - T / 2) / sample_rate`` in integer nanoseconds (the symbol's leading edge, ``T`` the
    transmitted modulation symbol period in samples), ``channel_bit`` the index of that
    symbol in ``channel.bits`` / ``channel.soft``.  A packet's ERT is that of the frame holding its
    first octet.  Signal RMS: 0.35 of full scale with the noise included (less without it).
    """
    from pipeline.recording import SigmfWriter

    if not isinstance(profile, LinkProfile):
        raise TypeError(f"Argument 'profile' must be a LinkProfile, not {type(profile).__name__}.")
    if profile.frames.kind == "aos" and profile.frames.fhec:
        # a valid profile the simulator cannot make: the user's input, not a bug (the CLI's exit 3, not 70)
        raise ProfileError(f"{profile.source}: [frames] fhec = true: the simulator does not generate the AOS frame "
                           f"header error control (simulate the link with fhec = false)")
    S = profile.simulate
    seconds = _check_number("seconds", _pick(seconds, S.seconds))
    if seconds <= 0:
        raise ValueError(f"Argument 'seconds' must be > 0, not {seconds}.")
    ebn0_db = _check_number("ebn0_db", _pick(ebn0_db, S.ebn0_db))
    seed = _pick(seed, S.seed)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise TypeError(f"Argument 'seed' must be a non-negative integer, not {seed!r}.")
    seed = int(seed)
    carrier_offset_hz = _check_number("carrier_offset_hz", _pick(carrier_offset_hz, S.carrier_offset_hz))
    doppler_rate_hz_per_s = _check_number("doppler_rate_hz_per_s", _pick(doppler_rate_hz_per_s,
                                                                       S.doppler_rate_hz_per_s))
    clock_offset_ppm = _check_number("clock_offset_ppm", _pick(clock_offset_ppm, S.clock_offset_ppm))
    timing_offset = _check_number("timing_offset", _pick(timing_offset, S.timing_offset))
    phase_noise_rad = _check_number("phase_noise_rad", _pick(phase_noise_rad, S.phase_noise_rad))
    if datatype is not None:
        if format is not None and format != datatype:
            raise ValueError("Argument 'datatype' is the former name of 'format'; give only 'format'.")
        format = datatype
    datatype = _sample_format_name(_pick(format, S.datatype))
    if not isinstance(name, str) or not name or os.sep in name or name.startswith("."):
        raise ValueError(f"Argument 'name' must be a plain file name, not {name!r}.")
    if not isinstance(chunk_frames, int) or chunk_frames < 1:
        raise ValueError(f"Argument 'chunk_frames' must be an integer >= 1, not {chunk_frames!r}.")
    fade_list = []
    for f in fades:
        if isinstance(f, Fade):
            fade_list.append(f)
            continue
        try:
            start, dur, depth = f
        except (TypeError, ValueError):
            raise TypeError(f"Argument 'fades' must hold (start_s, duration_s, depth_db) triples, not {f!r}.") from None
        depth = float(depth)
        fade_list.append(Fade(float(start), float(dur), math.inf if depth >= 100.0 else depth))

    fs = S.sample_rate_hz
    start_ns = parse_utc_ns(S.start)
    start_tai_ns = tai_ns_from_utc_ns(start_ns)  # the samples run on SI seconds: times after a leap second
    num_samples = int(round(seconds * fs))
    esn0_db = profile.esn0_from_ebn0(ebn0_db)
    esn0 = 10.0 ** (esn0_db / 10.0)
    rng_master = np.random.SeedSequence([seed, 0xD0C])
    ch_seed, soft_seed, phase_seed = (int(s.generate_state(1)[0]) for s in rng_master.spawn(3))

    # ---- the stages ------------------------------------------------------------------------
    mod_probe = make_modulator(link=profile.link, sample_rate_hz=fs, timing_offset=timing_offset,
                               clock_offset_ppm=clock_offset_ppm)
    T = mod_probe.period
    # Es/N0 refers to the data power: all of it on suppressed-carrier links, sin^2(m) (or 2 J1(m)^2 for
    # a sine subcarrier) of the total on residual-carrier links (pipeline.sim.data_power_fraction)
    data_fraction = mod_probe.data_power_fraction
    noise_to_signal = data_fraction * T / esn0 if noise else 0.0
    amplitude = _TOTAL_RMS / math.sqrt(1.0 + noise_to_signal)
    modulator = make_modulator(link=profile.link, sample_rate_hz=fs, timing_offset=timing_offset,
                               clock_offset_ppm=clock_offset_ppm, amplitude=amplitude)
    bps = modulator.bits_per_symbol
    variance = noise_variance_per_sample(signal_power=data_fraction * amplitude ** 2, symbol_period_samples=T,
                                         esn0_db=esn0_db) if noise else 0.0
    phase0 = float(np.random.default_rng(phase_seed).uniform(0.0, 2.0 * math.pi))
    channel = Channel(sample_rate_hz=fs, noise_variance=variance, carrier_offset_hz=carrier_offset_hz,
                      doppler_rate_hz_per_s=doppler_rate_hz_per_s, doppler_pass=doppler_pass, phase0_rad=phase0,
                      phase_noise_rad=phase_noise_rad, phase_noise_bandwidth_hz=phase_noise_bandwidth_hz,
                      fades=fade_list, seed=ch_seed)
    coder_profile = profile
    if profile.link.line_code == "bi-phase-l":
        # Bi-phase-L is a waveform, made by the modulator: the channel coder sees NRZ-L bits
        coder_profile = replace(profile, link=replace(profile.link, line_code="nrz-l"))
    coder = ChannelCoder(coder_profile, nrzm_at=nrzm_at)
    if profile.frames.kind == "tm":
        builder = TmFrameBuilder(frames=profile.frames, idle=idle)
    else:
        builder = AosFrameBuilder(frames=profile.frames, idle=idle)
    cadu_channel_bits = coder.cadu_bits / coder.profile.coding.conv_rate
    cadu_s = cadu_channel_bits / bps * T / fs
    span_s = (modulator.half_span + 1) * T / fs
    traffic_start = _LEAD_CADUS * cadu_s
    tail_start_s = seconds - _TAIL_CADUS * cadu_s - span_s
    source = PacketSource(traffic=S.traffic, start_ns=start_ns, seed=seed, start_s=traffic_start,
                          stop_s=max(tail_start_s, traffic_start + 1e-9))

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    truth_path = out_dir / "truth.jsonl"
    frames_path = out_dir / "truth_frames.jsonl"
    bits_path = out_dir / "channel.bits" if write_bits else None
    soft_path = out_dir / "channel.soft" if write_soft else None
    from pipeline.errors import OutputError

    for p in (truth_path, frames_path, bits_path, soft_path):
        if p is not None and p.exists():
            raise OutputError(f"{p}: exists (the simulator never overwrites its output)")

    extras = []
    if carrier_offset_hz:
        extras.append(f"carrier offset {carrier_offset_hz:g} Hz")
    if doppler_rate_hz_per_s:
        extras.append(f"Doppler rate {doppler_rate_hz_per_s:g} Hz/s")
    if doppler_pass is not None:
        extras.append(f"pass Doppler +-{doppler_pass.peak_hz:g} Hz")
    if clock_offset_ppm:
        extras.append(f"clock offset {clock_offset_ppm:g} ppm")
    extras.append(f"timing offset {timing_offset:g} symbol")
    if phase_noise_rad:
        extras.append(f"phase noise {phase_noise_rad:g} rad rms")
    if fade_list:
        extras.append(f"{len(fade_list)} fade(s)")
    if not noise:
        extras.append("no noise")
    description = _description(profile, ebn0_db, esn0_db, seconds, extras)
    extra_global = {
        "downlink:simulated": True,
        "downlink:profile": profile.name,
        "downlink:ebn0_db": ebn0_db,
        "downlink:esn0_db": esn0_db,
        "downlink:seed": seed,
        "downlink:symbol_period_samples": T,
        "downlink:first_symbol_position": modulator.p0,
        "downlink:nrzm_at": nrzm_at,
    }
    if profile.link.modulation in ("pcm-pm", "pcm-psk-pm"):
        extra_global["downlink:modulation_index_rad"] = profile.link.modulation_index_rad
        extra_global["downlink:data_power_fraction"] = data_fraction
        if profile.link.modulation == "pcm-psk-pm":
            extra_global["downlink:subcarrier_hz"] = profile.link.subcarrier_hz
            extra_global["downlink:subcarrier_wave"] = profile.link.subcarrier_wave

    num_frames = 0
    num_packets = 0
    num_channel_bits = 0
    first_frame_of: dict[int, dict] = {}
    soft_rng = np.random.default_rng(soft_seed) if noise else None
    bits_rem = np.zeros(0, np.uint8)
    done = False

    writer = SigmfWriter(out_dir / name, sample_rate_hz=fs, datatype=datatype, datetime_ns=start_ns,
                         frequency_hz=profile.link.downlink_frequency_hz, description=description,
                         extra_global=extra_global)
    files = []
    try:
        ft = open(truth_path, "w", encoding="utf-8")
        files.append(ft)
        ff = open(frames_path, "w", encoding="utf-8")
        files.append(ff)
        fb = open(bits_path, "wb") if bits_path else None
        fsft = open(soft_path, "wb") if soft_path else None
        files += [f for f in (fb, fsft) if f is not None]
        for f in fade_list:
            s0 = int(round(f.start_s * fs))
            if s0 < num_samples:
                n = max(1, min(int(round(f.duration_s * fs)), num_samples - s0))
                what = f"fade of {f.depth_db:g} dB" if f.gain > 0 else "dropout"
                writer.annotate(s0, n, label="fade" if f.gain > 0 else "dropout", comment=f"simulated {what}")
        written = 0
        while written < num_samples:
            built = []
            for _ in range(chunk_frames):
                asm_bit = coder.channel_symbol_of_input_bit(coder.input_bits_done + coder.cadu_bits * len(built))
                now_s = modulator.bit_position(asm_bit) / fs
                built.append(builder.process(source.process(now_s), force_idle=now_s >= tail_start_s))
            coded = coder.process([b.data for b in built])
            ends = np.append(coded.asm_bits[1:], coded.first_bit + coded.bits.size) - 1
            for b, asm_bit, last_bit in zip(built, coded.asm_bits, ends):
                if done:
                    break
                last_pos = modulator.bit_position(int(last_bit))
                if last_pos + 0.5 * T > num_samples:
                    done = True  # this frame and all later ones are cut by the end of the recording
                    break
                # the instant a frame's time refers to: the (I-rail) peak of the symbol carrying the ASM's first bit
                pos = modulator.symbol_position(int(asm_bit) // bps)
                # ERT: the leading edge of the ASM's first channel symbol (its centre minus half a symbol)
                ert = format_tai_ns_as_utc(start_tai_ns + int(round((pos - 0.5 * T) * 1e9 / fs)))
                rec = {"index": num_frames, "scid": profile.frames.spacecraft_id, "vcid": b.vcid, "mcfc": b.mcfc,
                       "vcfc": b.vcfc, "fhp": b.fhp, "idle": b.idle, "ocf": b.ocf.hex() if b.ocf else None,
                       "position": pos, "ert": ert, "channel_bit": int(asm_bit),
                       "carrier_offset_hz": channel.frequency_hz(pos)}
                ff.write(json.dumps(rec) + "\n")
                num_frames += 1
                for p in b.started:
                    first_frame_of[id(p)] = rec
                for p in b.completed:
                    first = first_frame_of.pop(id(p))
                    ft.write(json.dumps({
                        "apid": p.apid, "seq_count": p.seq_count, "hex": p.data.hex(), "vcid": first["vcid"],
                        "scid": first["scid"], "mcfc": first["mcfc"], "vcfc": first["vcfc"], "ert": first["ert"],
                        "position": first["position"], "channel_bit": first["channel_bit"],
                        "generation": format_tai_ns_as_utc(p.generation_tai_ns if p.generation_tai_ns is not None
                                                           else tai_ns_from_utc_ns(p.generation_ns)),
                    }) + "\n")
                    num_packets += 1
            # channel bits whose symbol lies in the recording
            bit_idx = np.arange(coded.first_bit, coded.first_bit + coded.bits.size, dtype=np.int64)
            inside = coded.bits[modulator.bit_position(bit_idx) < num_samples] if coded.bits.size else coded.bits
            if inside.size:
                num_channel_bits += inside.size
                if fb is not None:
                    allbits = np.concatenate([bits_rem, inside])
                    nfull = allbits.size // 8 * 8
                    fb.write(np.packbits(allbits[:nfull]).tobytes())
                    bits_rem = allbits[nfull:]
                if fsft is not None:
                    gains = channel.gain(np.rint(modulator.bit_position(bit_idx[:inside.size])).astype(np.int64))
                    fsft.write(soft_channel_symbols(inside, gains, esn0_db=esn0_db, bits_per_symbol=bps,
                                                    rng=soft_rng).tobytes())
            out = modulator.process(coded.bits)
            samples = out.samples[: max(0, num_samples - written)]
            if samples.size:
                writer.write(channel.process(samples).astype(np.complex64))
                written += samples.size
        if fb is not None and bits_rem.size:
            fb.write(np.packbits(bits_rem).tobytes())  # the last octet padded with zeros
        writer.close()
    finally:
        for f in files:
            f.close()
        if not writer.closed:
            writer.abort()  # interrupted: leave no recording that looks complete
    return SimulationResult(
        meta_path=writer.meta_path, data_path=writer.data_path, truth_path=truth_path, truth_frames_path=frames_path,
        bits_path=bits_path, soft_path=soft_path, num_samples=num_samples, num_frames=num_frames,
        num_packets=num_packets, num_channel_bits=num_channel_bits, esn0_db=esn0_db, ebn0_db=ebn0_db,
        seconds=seconds, symbol_period_samples=T, first_symbol_position=modulator.p0, clipped=writer.clipped)
