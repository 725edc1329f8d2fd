"""Profiles of short simulated links whose decode writes ``doppler.tdm`` (tests of the Tracking Data Message).

Uncoded-inner RS(255,223) TM frames of spacecraft 499 over the demo's invented S-band assignment, received at
*Hollow Ridge* with a 1200 Hz carrier offset: BPSK (the suppressed-carrier demodulator) or PCM/PM (the
residual-carrier one).
"""

from __future__ import annotations

from pipeline.profile import profile_from_dict


def tdm_link_profile(*, modulation: str, symbol_rate: float, seconds: float, sample_rate_hz: float):
    """A :class:`~pipeline.profile.LinkProfile` named ``tdm-<modulation>``, simulated from 2026-03-14 09:30 UTC."""
    link = {"modulation": modulation, "symbol_rate": symbol_rate, "line_code": "nrz-l",
            "downlink_frequency_hz": 2.2455e9}  # the demo's invented S-band assignment
    if modulation == "pcm-pm":
        link.update({"pulse": "rect", "modulation_index": 1.1})
    else:
        link.update({"pulse": "rrc", "rolloff": 0.5})
    return profile_from_dict({
        "name": f"tdm-{modulation}",
        "link": link,
        "coding": {"convolutional": "none", "reed_solomon": 16, "interleave": 1, "randomizer": True},
        "frames": {"kind": "tm", "length": 223, "fecf": False, "ocf": False, "spacecraft_id": 499},
        "station": {"name": "HOLLOW RIDGE"},
        "simulate": {"start": "2026-03-14T09:30:00Z", "sample_rate_hz": sample_rate_hz, "seconds": seconds,
                     "ebn0_db": 9.0, "carrier_offset_hz": 1200.0, "doppler_rate_hz_per_s": 0.0, "timing_offset": 0.37,
                     "clock_offset_ppm": 20.0, "seed": 11,
                     "traffic": [{"apid": 100, "length": 120, "rate_hz": 10.0, "vcid": 0}]},
    })
