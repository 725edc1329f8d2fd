"""Passes from the independent test transmitter, written as SigMF by hand (no pipeline code).

The bits come from ``tests/third_party_tx.py`` (CCSDS TM frames, Reed-Solomon, randomizer,
NRZ-M, rate-1/2 convolutional code), the waveform from ``tests/demod_signals.py`` (closed-form
pulses at exact sample times), the channel (carrier offset, Doppler ramp, lead-in of noise, DC
offset, spectral inversion, AWGN) and the SigMF metadata (SigMF specification: global
``core:datatype``, ``core:sample_rate``, ``core:version``; captures with ``core:sample_start`` and
``core:datetime``) are written here, so the receiver and the transmitter cannot share a mistake.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import demod_signals as ds
import numpy as np
import third_party_tx as tx

__all__ = ["Pass", "demo_link_pass", "write_sigmf", "START"]

START = "2026-03-14T09:30:00Z"


@dataclass
class Pass:
    """A written recording and its truth."""

    meta: Path
    packets: list[bytes]  # sent, in order
    packet_frames: list[tuple[int, int]]  # first and last frame index carrying each packet
    asm_position: np.ndarray  # per frame: sample position of the pulse peak of its ASM's first channel symbol
    onset: int  # first sample of the signal (after the noise lead-in)
    sample_rate_hz: float
    symbol_rate_baud: float

    def packets_after(self, position: float) -> list[bytes]:
        """The packets carried only by frames whose ASM lies at or after ``position``."""
        first = int(np.searchsorted(self.asm_position, position))
        return [p for p, (a, _) in zip(self.packets, self.packet_frames) if a >= first]


def write_sigmf(base: Path, samples: np.ndarray, sample_rate_hz: float) -> Path:
    """``base.sigmf-data`` (cf32_le) and ``base.sigmf-meta``; returns the metadata path."""
    Path(str(base) + ".sigmf-data").write_bytes(np.asarray(samples, dtype="<c8").tobytes())
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": float(sample_rate_hz), "core:version": "1.2.0"},
            "captures": [{"core:sample_start": 0, "core:datetime": START}], "annotations": []}
    path = Path(str(base) + ".sigmf-meta")
    path.write_text(json.dumps(meta))
    return path


def demo_packets(rng: np.random.Generator, n: int) -> list[bytes]:
    """``n`` space packets of the demo's APIDs (100, 200, 300) with random contents and lengths."""
    out = []
    for i in range(n):
        apid = (100, 200, 300)[i % 3]
        length = int(rng.integers(60, 400))
        out.append(tx.space_packet(apid, i // 3, bytes(rng.integers(0, 256, length, dtype=np.uint8))))
    return out


def demo_link_pass(folder: Path, name: str, *, seconds: float, ebn0_db: float, modulation: str = "bpsk",
                   sample_rate_hz: float = 1e6, symbol_rate_baud: float = 240e3, offset_hz: float = 0.0,
                   rate_hz_per_s: float = 0.0, lead_s: float = 0.0, dc: complex = 0j, conjugate: bool = False,
                   swap_iq: bool = False, phase_rad: float = 0.7, frame_octets: int = 1115, interleave: int = 5,
                   seed: int = 1, waveform_cache: dict | None = None) -> Pass:
    """A pass of the demo link (BPSK, QPSK or OQPSK, r=1/2 + RS(255,223) x ``interleave``, NRZ-M, TM frames of
    ``frame_octets`` octets with an OCF, spacecraft 499) lasting about ``seconds`` after ``lead_s`` of noise alone.

    ``Es/N0 = Eb/N0 + 10 log10(1/2 x frame / codeblock x bits per symbol)`` (../shared/DESIGN.md).  The carrier
    phase is ``2 pi (offset t + rate t^2 / 2)`` from the first sample.  ``conjugate`` / ``swap_iq`` turn the
    recording into a spectrally inverted one (``swap_iq`` is ``j conj(x)``: inversion and a 90-degree turn).
    ``waveform_cache`` (a dict) keeps noise-free waveforms between calls with the same link and seed.
    """
    rng = np.random.default_rng(seed)
    bps = 1 if modulation == "bpsk" else 2
    codeblock = frame_octets + 32 * interleave  # CCSDS 131.0-B-2 sec. 4: 2 E I parity octets, E = 16
    cadu_bits = 32 + 8 * codeblock
    field_octets = frame_octets - 6 - 4  # primary header, OCF
    key = (modulation, sample_rate_hz, symbol_rate_baud, seconds, seed, frame_octets, interleave)
    cached = waveform_cache.get(key) if waveform_cache is not None else None
    if cached is None:
        n_frames = max(2, int(seconds * symbol_rate_baud * bps / (2 * cadu_bits)))
        packets = demo_packets(rng, max(2, 3 * n_frames * field_octets // 800))  # about n_frames - 1 frames full
        frames = tx.tm_frames(packets, scid=499, vcid=0, length=frame_octets, ocf=True, fecf=False)
        lead_bits = 317
        bits = tx.channel_bits(frames, rs_e=16, interleave=interleave, randomize=True, conv=True, nrz_m=True,
                               lead_bits=lead_bits, seed=seed)
        bits = bits[: bits.size // 2 * 2]
        sym_bits = (bits, np.zeros_like(bits)) if bps == 1 else (bits[0::2], bits[1::2])  # I first
        wave = ds.modulate(sym_bits[0].size, modulation=modulation, sample_rate_hz=sample_rate_hz,
                           symbol_rate_baud=symbol_rate_baud, timing_offset=0.31, clock_offset_ppm=15.0,
                           esn0_db=None, rng=rng, bits=sym_bits, lead_symbols=64)
        starts = np.cumsum([0] + [len(p) for p in packets[:-1]])
        packet_frames = [(int(s) // field_octets, int(s + len(p) - 1) // field_octets) for s, p in zip(starts, packets)]
        asm_bits = 2 * (lead_bits + np.arange(len(frames)) * cadu_bits)  # r = 1/2: two channel bits per bit
        asm_peak = wave.peak_position[asm_bits // bps]
        cached = (wave, packets, packet_frames, asm_peak)
        if waveform_cache is not None:
            waveform_cache[key] = cached
    wave, packets, packet_frames, asm_peak = cached
    onset = int(round(lead_s * sample_rate_hz))
    s = np.concatenate([np.zeros(onset), wave.samples.astype(np.complex128)])
    t = np.arange(s.size) / sample_rate_hz
    s *= np.exp(2j * math.pi * (offset_hz * t + 0.5 * rate_hz_per_s * t * t) + 1j * phase_rad)
    esn0_db = ebn0_db + 10 * math.log10(0.5 * frame_octets / codeblock * bps)
    sigma2 = wave.pulse_energy / 10 ** (esn0_db / 10)  # Es = pulse energy x E|a|^2 (= 1), as demod_signals
    s += math.sqrt(sigma2 / 2) * (rng.standard_normal(s.size) + 1j * rng.standard_normal(s.size))
    s += dc
    if conjugate:
        s = np.conj(s)
    if swap_iq:
        s = s.imag + 1j * s.real
    meta = write_sigmf(Path(folder) / name, s.astype(np.complex64), sample_rate_hz)
    return Pass(meta, packets, packet_frames, asm_peak + onset, onset, sample_rate_hz, symbol_rate_baud)
