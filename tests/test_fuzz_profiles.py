"""Random profiles within the validator's ranges through every stage and a short decode (issue 13).

Whatever a profile that loads holds, building the chain and decoding a little noise raises nothing but the
project's own errors (and a profile the loader accepted raises none at all): the validator and the stages
agree by construction.
"""

from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.chain import DecodeChain
from pipeline.errors import DownlinkError, ProfileError
from pipeline.profile import profile_from_dict

_link = st.fixed_dictionaries({
    "modulation": st.sampled_from(["bpsk", "qpsk", "oqpsk", "pcm-pm", "pcm-psk-pm"]),
    "symbol_rate": st.sampled_from([1200.0, 9600.0, 64000.0, 240000.0]),
    "pulse": st.sampled_from(["rrc", "rect"]),
    "rolloff": st.sampled_from([0.25, 0.35, 0.5, 1.0]),
    "line_code": st.sampled_from(["nrz-l", "nrz-m", "bi-phase-l"]),
    "modulation_index": st.sampled_from([0.8, 1.2]),
    "subcarrier_hz": st.sampled_from([0.0, 16000.0, 256000.0, 1e6]),
    "subcarrier_wave": st.sampled_from(["square", "sine"]),
})
_coding = st.one_of(
    st.fixed_dictionaries({"convolutional": st.sampled_from(["none", "1/2", "2/3", "3/4", "5/6", "7/8"]),
                           "reed_solomon": st.sampled_from([0, 8, 16]), "interleave": st.integers(1, 8),
                           "randomizer": st.booleans()}),
    st.fixed_dictionaries({"convolutional": st.just("none"), "reed_solomon": st.just(0),
                           "turbo": st.sampled_from(["1/2", "1/3", "1/4", "1/6"]),
                           "turbo_k": st.sampled_from([1784, 3568]), "turbo_max_iterations": st.integers(1, 12)}),
    st.fixed_dictionaries({"convolutional": st.just("none"), "reed_solomon": st.just(0),
                           "ldpc": st.sampled_from(["c2", "ar4ja"]),
                           "ldpc_rate": st.sampled_from(["1/2", "2/3", "4/5"]),
                           "ldpc_k": st.just(1024), "ldpc_max_iterations": st.integers(1, 30)}),
)
_frames = st.fixed_dictionaries({
    "kind": st.sampled_from(["tm", "aos"]),
    "length": st.sampled_from([9, 64, 128, 223, 446, 892, 1115, 2048]),
    "fecf": st.booleans(), "ocf": st.booleans(), "spacecraft_id": st.integers(0, 255),
})
_receiver = st.fixed_dictionaries({}, optional={
    "timing_loop_bandwidth": st.sampled_from([1e-5, 0.001, 0.01, 0.05]),
    "carrier_loop_order": st.sampled_from([2, 3]),
    "asm_max_errors": st.integers(0, 10),
    "flywheel_frames": st.integers(0, 5),
})


@st.composite
def _consistent(draw):
    """Trees that mostly load: a block code usually gets its own frame length, FECF and line code."""
    link, coding, frames = draw(_link), draw(_coding), draw(_frames)
    if draw(st.integers(0, 3)):  # three in four: make the block code's rules hold
        if "turbo" in coding:
            frames = {**frames, "length": coding["turbo_k"] // 8, "fecf": True}
            link = {**link, "line_code": "nrz-l", "modulation": draw(st.sampled_from(["bpsk", "pcm-psk-pm"]))}
        elif "ldpc" in coding:
            frames = {**frames, "length": 892 if coding["ldpc"] == "c2" else 128}
            link = {**link, "line_code": "nrz-l"}
        if link["modulation"] == "pcm-psk-pm" and not link["subcarrier_hz"]:
            link = {**link, "subcarrier_hz": 4 * link["symbol_rate"]}
    return link, coding, frames


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(tree=_consistent(), receiver=_receiver, sps=st.sampled_from([2.5, 4.17, 9.0, 33.0]),
       seed=st.integers(0, 2**31))
def test_a_profile_that_loads_builds_and_decodes_noise(tree, receiver, sps, seed):
    link, coding, frames = tree
    try:
        prof = profile_from_dict({"link": link, "coding": coding, "frames": frames, "receiver": receiver},
                                 source="fuzz.toml")
    except ProfileError as exc:
        assert str(exc).startswith("fuzz.toml: ") and "\n" not in str(exc)
        return
    rng = np.random.default_rng(seed)
    # channel symbols: every stage after the demodulator
    chain = DecodeChain(prof, input_kind="soft")
    soft = rng.standard_normal(3000).astype(np.float32)
    chain.process_symbols(soft, np.arange(soft.size, dtype=np.float64))
    chain.finish()
    assert chain.back.packet_count == 0
    # samples: the demodulator too, at a sample rate the profile may or may not allow
    from pipeline.recording import Chunk

    fs = prof.link.symbol_rate_baud * sps
    if prof.link.modulation == "pcm-psk-pm":
        fs = max(fs, 8.0 * prof.link.subcarrier_hz)
    try:
        chain = DecodeChain(prof, input_kind="iq", sample_rate_hz=fs)
    except DownlinkError as exc:  # a sample rate this link cannot be received at: one clear line
        assert "\n" not in str(exc)
        return
    x = (rng.standard_normal(20000) + 1j * rng.standard_normal(20000)).astype(np.complex64)
    chain.process_chunk(Chunk(x, 0, 0))
    chain.finish()
    assert chain.back.packet_count == 0
