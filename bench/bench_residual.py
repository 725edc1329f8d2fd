"""Throughput and implementation loss of the residual-carrier / Bi-phase-L demodulator.

Run: ``python bench/bench_residual.py [--seconds S] [--repeat N]``.  Fixed seeds; the first call
(JIT compile) is outside the timed part.  One row per configuration: throughput in Msample/s and
ksym/s on one core, and the implementation loss at Es/N0 = 5 dB (measured BER turned into the Es/N0
of theory, ``Pb = Q(sqrt(2 Es/N0))``, and subtracted from 5 dB).
"""

from __future__ import annotations

import argparse
import math
import time
from types import SimpleNamespace

import numpy as np
from scipy.special import erfcinv

from pipeline.demod.residual import ResidualCarrierDemodulator
from pipeline.profile import LinkSection, ReceiverSection
from pipeline.sim import Channel, make_modulator, noise_variance_per_sample

FS = 200_000.0
CONFIGS = {
    "pcm-psk-pm square 2 ksym/s on 16 kHz": dict(modulation="pcm-psk-pm", symbol_rate_baud=2000.0,
                                                subcarrier_hz=16_000.0, subcarrier_wave="square"),
    "pcm-psk-pm sine 2 ksym/s on 16 kHz": dict(modulation="pcm-psk-pm", symbol_rate_baud=2000.0,
                                              subcarrier_hz=16_000.0, subcarrier_wave="sine"),
    "pcm-pm bi-phase-l 10 ksym/s": dict(modulation="pcm-pm", symbol_rate_baud=10_000.0, line_code="bi-phase-l"),
    "pcm-pm nrz-l 10 ksym/s": dict(modulation="pcm-pm", symbol_rate_baud=10_000.0),
    "bpsk bi-phase-l 10 ksym/s": dict(modulation="bpsk", symbol_rate_baud=10_000.0, line_code="bi-phase-l"),
}


def _signal(link: LinkSection, seconds: float, esn0_db: float, seed: int):
    nbits = int(seconds * link.symbol_rate_baud)
    bits = np.random.default_rng(seed).integers(0, 2, nbits).astype(np.uint8)
    mod = make_modulator(link=link, sample_rate_hz=FS, timing_offset=0.37, clock_offset_ppm=20.0)
    x = np.concatenate([mod.process(bits).samples, mod.flush().samples])
    var = noise_variance_per_sample(signal_power=mod.data_power_fraction, symbol_period_samples=mod.period,
                                    esn0_db=esn0_db)
    offset = 300.0 if link.modulation == "bpsk" else 1500.0
    ch = Channel(sample_rate_hz=FS, noise_variance=var, carrier_offset_hz=offset, phase0_rad=0.4, seed=seed)
    return bits, mod, ch.process(x).astype(np.complex64)


def _run(link: LinkSection, y: np.ndarray, chunk: int = 1 << 18):
    d = ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=FS)
    out = [d.process(SimpleNamespace(samples=y[a:a + chunk], start=a, nonfinite=0)) for a in range(0, y.size, chunk)]
    out.append(d.flush())
    return np.concatenate([b.soft for b in out]), np.concatenate([b.position for b in out])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--seconds", type=float, default=10.0, help="signal length at 200 ksample/s")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    print(f"{'configuration':<40} {'Msample/s':>10} {'ksym/s':>9} {'BER @5dB':>10} {'loss dB':>8}")
    for name, kw in CONFIGS.items():
        link = LinkSection(pulse="rect", modulation_index_rad=1.1, **kw)
        bits, mod, y = _signal(link, args.seconds, 5.0, seed=11)
        _run(link, y[:100_000])  # compile outside the timed part
        best = math.inf
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            soft, pos = _run(link, y)
            best = min(best, time.perf_counter() - t0)
        k = np.rint((pos - mod.p0) / mod.period).astype(np.int64)
        ok = (k >= 1000) & (k < bits.size)
        err = int(np.count_nonzero((soft[ok] < 0).astype(np.uint8) != bits[k[ok]]))
        err = min(err, int(ok.sum()) - err)
        ber = err / max(int(ok.sum()), 1)
        loss = 5.0 - 10.0 * math.log10(erfcinv(2.0 * ber) ** 2) if ber > 0 else float("nan")
        print(f"{name:<40} {y.size / best / 1e6:10.2f} {soft.size / best / 1e3:9.0f} {ber:10.2e} {loss:8.2f}")


if __name__ == "__main__":
    main()
