"""A spectrally inverted QPSK recording gives its carrier offsets with the true sign.

Swapping a receiver's I and Q (or taking the lower sideband) conjugates the recording, and conjugation
mirrors the spectrum: x*(t) has the transform X*(-f) (the Fourier transform's conjugation property, e.g.
A. V. Oppenheim, A. S. Willsky, *Signals and Systems*, 2nd ed., 1997, its table of Fourier transform
properties; the table's number from memory, not confirmed), so a carrier offset f
reads as -f.  BPSK cannot tell (it is its own mirror image), but a QPSK constellation's mirror image is
another constellation, which the branch synchronizer recognises by the code (``[receiver]
spectrum_inverted = "auto"``).  The Doppler rows (doppler.csv, doppler.tdm, the Doppler check) are
the one product where the sign matters; the front end gives them with the sign the branch synchronizer
found.

The recordings are made without any pipeline code: channel bits by tests/third_party_tx.py, samples by
tests/demod_signals.py, SigMF metadata written by hand.
"""

from __future__ import annotations

import csv
import json

import demod_signals as ds
import numpy as np
import third_party_tx as tx

from pipeline import decode
from pipeline.profile import profile_from_dict

SYMBOL_RATE = 48_000.0
SAMPLE_RATE = 200_000.0
OFFSET_HZ = 1500.0  # the transmitter's carrier offset (the Doppler the rows must show)


def _profile(modulation: str, receiver: dict | None = None):
    return profile_from_dict({
        "name": f"mirror-{modulation}",
        "link": {"modulation": modulation, "symbol_rate": SYMBOL_RATE, "pulse": "rrc", "rolloff": 0.5,
                 "line_code": "nrz-l"},
        "coding": {"convolutional": "1/2", "reed_solomon": 16, "interleave": 1, "randomizer": True},
        "frames": {"kind": "tm", "length": 223, "fecf": False, "ocf": True, "spacecraft_id": 77},
        **({"receiver": receiver} if receiver else {}),
    })


def _recording(modulation: str, *, conjugate: bool, offset_hz: float = OFFSET_HZ, receiver: dict | None = None):
    """``(profile, packets, frames, samples)``: the transmitted pass, its samples conjugated when ``conjugate``."""
    profile = _profile(modulation, receiver)
    rng = np.random.default_rng(11)
    packets = [tx.space_packet(100, i, bytes(rng.integers(0, 256, 40 + 7 * (i % 5), dtype=np.uint8)))
               for i in range(60)]
    frames = tx.tm_frames(packets, scid=77, vcid=1, length=223, ocf=True, fecf=False)
    bits = tx.channel_bits(frames, rs_e=16, interleave=1, randomize=True, conv="1/2", nrz_m=False)
    if modulation == "qpsk":
        bits = bits[: len(bits) // 2 * 2]
        sym_bits = (bits[0::2], bits[1::2])
    else:
        sym_bits = (bits, np.zeros_like(bits))
    wave = ds.modulate(len(sym_bits[0]), modulation=modulation, sample_rate_hz=SAMPLE_RATE,
                       symbol_rate_baud=SYMBOL_RATE, timing_offset=0.3, carrier_offset_hz=offset_hz, phase_rad=0.7,
                       esn0_db=profile.esn0_from_ebn0(7.0), rng=rng, bits=sym_bits, lead_symbols=300)
    return profile, packets, frames, (np.conj(wave.samples) if conjugate else wave.samples)


def _decode(tmp_path, modulation: str, *, conjugate: bool):
    profile, packets, _, samples = _recording(modulation, conjugate=conjugate)
    name = f"{modulation}{'-inv' if conjugate else ''}"
    (tmp_path / f"{name}.sigmf-data").write_bytes(samples.astype("<c8").tobytes())
    # SigMF core fields written by hand (SigMF specification: global datatype / sample_rate / version)
    meta = {"global": {"core:datatype": "cf32_le", "core:sample_rate": SAMPLE_RATE, "core:version": "1.2.0"},
            "captures": [{"core:sample_start": 0, "core:datetime": "2026-03-14T09:30:00Z"}], "annotations": []}
    (tmp_path / f"{name}.sigmf-meta").write_text(json.dumps(meta))
    out = tmp_path / f"out-{name}"
    res = decode(tmp_path / f"{name}.sigmf-meta", profile, out)
    assert res.packets == len(packets)
    with open(out / "packets.jsonl") as f:
        assert [bytes.fromhex(json.loads(line)["hex"]) for line in f] == packets
    with open(out / "doppler.csv", newline="") as f:
        offsets = [float(r["carrier_offset_hz"]) for r in csv.DictReader(f) if r["locked"] == "True"]
    assert len(offsets) >= 5
    return np.array(offsets)


def test_an_inverted_qpsk_recording_gives_the_true_doppler_sign(tmp_path):
    upright = _decode(tmp_path, "qpsk", conjugate=False)
    inverted = _decode(tmp_path, "qpsk", conjugate=True)
    assert abs(float(np.median(upright)) - OFFSET_HZ) < 5.0
    # the mirror image's carrier reads at -1500 Hz in the demodulator; the rows give it as +1500 Hz
    assert abs(float(np.median(inverted)) - OFFSET_HZ) < 5.0
    assert len(inverted) == len(upright)


def test_bpsk_cannot_tell_and_keeps_the_sign_it_measures(tmp_path):
    # BPSK's mirror image is BPSK: nothing tells the branch synchronizer, so the rows show what the receiver saw
    # (a Doppler check against an orbit is what reveals it; tests/test_doppler_check.py)
    inverted = _decode(tmp_path, "bpsk", conjugate=True)
    assert abs(float(np.median(inverted)) + OFFSET_HZ) < 5.0


def test_an_inverted_qpsk_recording_is_found_at_the_mirrored_prediction(tmp_path):
    # a carrier 20 kHz off the nominal frequency, searched +-2 kHz around a prediction 300 Hz off it (an orbit's,
    # as --tle gives): the inverted recording's carrier lies at the mirror image of the prediction; under
    # spectrum_inverted = "auto" the demodulator finds it there and conjugates the samples, so the branch
    # synchronizer sees the upright constellation and the track points carry the true sign, negated once only
    from pipeline.chain import FrontEnd
    from pipeline.demod import CarrierPrediction

    offset = 20_000.0
    profile, _, frames, samples = _recording("qpsk", conjugate=True, offset_hz=offset,
                                             receiver={"acquisition_range_hz": 2000.0})
    table = CarrierPrediction(positions=[0.0], offsets_hz=[offset - 300.0])
    front = FrontEnd(profile, input_kind="iq", sample_rate_hz=SAMPLE_RATE, carrier_prediction=table)
    got, track = [], []
    chunk = 70_000
    for a in range(0, samples.size, chunk):
        part = samples[a:a + chunk].astype(np.complex64)
        out = front.process_chunk(type("Chunk", (), {"samples": part, "start": a, "nonfinite": 0})())
        got += out.frames
        track += out.track
    mirrored = front.branch.mirrored  # (the flush forgets the stream's hypothesis)
    out = front.finish()
    got += out.frames
    track += out.track
    assert [d.frame for d in got if d.status == "ok"] == frames
    assert front.demod.stats.carrier_found_mirrored >= 1 and mirrored is False
    locked = [tp.carrier_offset_hz for tp in track if tp.carrier_locked]
    assert len(locked) >= 5 and abs(float(np.median(locked)) - offset) < 5.0
    # spectrum_inverted = false: the mirror is not tried and nothing locks
    profile = _profile("qpsk", {"acquisition_range_hz": 2000.0, "spectrum_inverted": False})
    front = FrontEnd(profile, input_kind="iq", sample_rate_hz=SAMPLE_RATE, carrier_prediction=table)
    for a in range(0, samples.size, chunk):
        part = samples[a:a + chunk].astype(np.complex64)
        front.process_chunk(type("Chunk", (), {"samples": part, "start": a, "nonfinite": 0})())
    front.finish()
    assert front.demod.stats.carrier_found_mirrored == 0 and front.demod.stats.carrier_locked_symbols == 0
