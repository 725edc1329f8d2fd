"""Recordings joined end to end (two passes, a recorder restart): the frame grid shifts at every join, and no real
frame may be lost there (FrameSync restarts its search after the last marker it found, not after its flywheel
CADUs).

The channel symbols come from the independent test transmitter (``tests/third_party_tx.py``: RS parity by
reedsolo, the randomizer and ASM of CCSDS 131.0-B-2 sec. 8 and 9) and are decoded by ``pipeline.decode``.
"""

from __future__ import annotations

import numpy as np
import third_party_tx as tx

from pipeline import decode
from pipeline.profile import profile_from_dict

START = "2026-03-14T09:30:00Z"


def test_sixteen_joined_repetitions_give_sixteen_times_the_packets(tmp_path):
    rng = np.random.default_rng(1601)
    packets = [tx.space_packet(100 + 100 * (i % 3), i // 3, bytes(rng.integers(0, 256, 30 + 41 * (i % 7),
                                                                             dtype=np.uint8)))
               for i in range(60)]
    frames = tx.tm_frames(packets, scid=77, vcid=2, length=223, ocf=False, fecf=False)
    prof = profile_from_dict({"name": "joined", "link": {"modulation": "bpsk", "symbol_rate": 48000.0},
                              "coding": {"convolutional": "none", "reed_solomon": 16, "interleave": 1},
                              "frames": {"kind": "tm", "length": 223, "ocf": False, "fecf": False,
                                         "spacecraft_id": 77}})
    # every repetition encoded on its own: its own random lead (so the frame grid shifts at each join) and tail
    reps = [tx.channel_bits(frames, rs_e=16, interleave=1, randomize=True, conv=False, nrz_m=False,
                            lead_bits=int(rng.integers(50, 4000)), seed=k) for k in range(16)]
    one = np.concatenate(reps[:1])
    joined = np.concatenate(reps)
    for name, bits in (("one", one), ("joined", joined)):
        soft = np.clip(np.rint(40.0 * ((1.0 - 2.0 * bits) + 0.35 * rng.standard_normal(bits.size))), -127, 127)
        (tmp_path / f"{name}.soft").write_bytes(soft.astype(np.int8).tobytes())
    single = decode(tmp_path / "one.soft", prof, input_kind="soft", start=START)
    assert [bytes.fromhex(p["hex"]) for p in single.packets_list] == packets
    res = decode(tmp_path / "joined.soft", prof, input_kind="soft", start=START)
    got = [bytes.fromhex(p["hex"]) for p in res.packets_list]
    assert got == packets * 16  # every packet of every repetition, in order
    ok = [f for f in res.frames_list if f["status"] == "ok"]
    assert len(ok) == 16 * len(frames)
    positions = [f["sample_position"] for f in res.frames_list]
    assert positions == sorted(positions)  # frames in stream order: withdrawn flywheel CADUs never overlap
