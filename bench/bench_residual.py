"""Throughput of the residual-carrier / Bi-phase-L demodulator: the table phasor against cos/sin, the carrier search.

Run: ``python bench/bench_residual.py [--seconds S] [--repeat N]``.  Fixed seeds; the first call (JIT compile) is
outside the timed part; every figure is the best of ``--repeat`` runs, the two variants of a comparison alternating
in one loop so that both see the same machine load (the 1-minute load average is printed before and after).

1. Whole demodulator per configuration (one core): Msample/s with the carrier phasor read from the 4096-entry table
   (the default) and with ``cos``/``sin`` of the exact phase (``phasor="exact"``, the former per-sample cost), and
   the bit error rate at Es/N0 = 5 dB of each (the simulator's recordings) against ``Q(sqrt(2 Es/N0))``.
2. ``track_carrier`` alone, ns per sample, table against exact (PCM/PSK/PM: square and sine subcarrier).
3. The carrier search per block while no carrier is held: the former whole-block search (``spectral_line``: one
   Hann-windowed FFT of twice the block in double precision) against ``ResidualCarrierSearch.add`` + ``detect``
   (single precision, no padding, rate hypotheses as accumulated sums), at 256 symbols per block and 100, 1024 and
   4096 samples per symbol; beside the demodulator's own time for a block.
4. The search while nothing is found, with a predicted carrier 40 kHz off and ``acquisition_range_hz`` 3 kHz and
   30 kHz: the whole demodulator per block on noise alone (it never finds a carrier, so it searches every block)
   with ``spectrum_inverted = false`` (the upright dwell only) against ``"auto"`` (the mirrored dwell too:
   PCM/PM accumulates a second periodogram per block; Bi-phase-L BPSK searches each block again conjugated).
"""

from __future__ import annotations

import argparse
import math
import os
import time
from types import SimpleNamespace

import numpy as np
from scipy.special import erfc

from pipeline.demod import CarrierPrediction
from pipeline.demod._acquire import spectral_line
from pipeline.demod.residual import ResidualCarrierDemodulator
from pipeline.demod.residual._kernels import CARRIER_PARAMS, CARRIER_STATE, phasor_table, track_carrier
from pipeline.demod.residual._search import ResidualCarrierSearch
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


def _run(link: LinkSection, y: np.ndarray, phasor: str, chunk: int = 1 << 18):
    d = ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=FS, phasor=phasor)
    out = [d.process(SimpleNamespace(samples=y[a:a + chunk], start=a, nonfinite=0)) for a in range(0, y.size, chunk)]
    out.append(d.flush())
    return np.concatenate([b.soft for b in out]), np.concatenate([b.position for b in out])


def _ber(bits, mod, soft, pos) -> float:
    k = np.rint((pos - mod.p0) / mod.period).astype(np.int64)
    ok = (k >= 1000) & (k < bits.size)
    err = int(np.count_nonzero((soft[ok] < 0).astype(np.uint8) != bits[k[ok]]))
    return min(err, int(ok.sum()) - err) / max(int(ok.sum()), 1)


def _best(fns: dict, repeat: int) -> dict:
    """Best time of each callable, the variants alternating within each repeat."""
    best = dict.fromkeys(fns, math.inf)
    for _ in range(repeat):
        for name, fn in fns.items():
            t0 = time.perf_counter()
            fn()
            best[name] = min(best[name], time.perf_counter() - t0)
    return best


def demodulators(seconds: float, repeat: int) -> None:
    print(f"{'configuration':<40} {'table Ms/s':>11} {'exact Ms/s':>11} {'ratio':>6} {'BER table':>10} "
          f"{'BER exact':>10} {'theory':>8}")
    theory = 0.5 * erfc(math.sqrt(10 ** 0.5))
    for name, kw in CONFIGS.items():
        link = LinkSection(pulse="rect", modulation_index_rad=1.1, **kw)
        bits, mod, y = _signal(link, seconds, 5.0, seed=11)
        for ph in ("table", "exact"):
            _run(link, y[:100_000], ph)  # compile outside the timed part
        t = _best({ph: (lambda ph=ph, link=link, y=y: _run(link, y, ph)) for ph in ("table", "exact")}, repeat)
        ber = {ph: _ber(bits, mod, *_run(link, y, ph)) for ph in ("table", "exact")}
        print(f"{name:<40} {y.size / t['table'] / 1e6:11.2f} {y.size / t['exact'] / 1e6:11.2f} "
              f"{t['exact'] / t['table']:6.2f} {ber['table']:10.2e} {ber['exact']:10.2e} {theory:8.2e}")


def kernel(repeat: int) -> None:
    n = 1 << 20
    rng = np.random.default_rng(3)
    x = (np.exp(2j * np.pi * 0.0073 * np.arange(n)) + rng.standard_normal(n) + 1j * rng.standard_normal(n))
    x = x.astype(np.complex64)
    tables = phasor_table()
    print(f"\n{'track_carrier (2^20 samples)':<40} {'table ns':>9} {'exact ns':>9} {'ratio':>6}")
    for wave, mode in (("square subcarrier", 1), ("sine subcarrier", 2), ("no subcarrier", 0)):
        def call(table: int, mode=mode):
            p = np.zeros(1, dtype=CARRIER_PARAMS)
            st = np.zeros(1, dtype=CARRIER_STATE)
            p["table_phasor"], p["subcarrier_mode"], p["a_arm"], p["w_sq"], p["sc_norm"] = table, mode, 0.02, 0.06, 1.0
            p["kp_c"], p["ki_c"], p["a_amp"], p["amp_floor"], p["lock_interval"] = 1e-4, 1e-9, 1e-4, 0.1, 20000
            p["kp_s"], p["ki_s"] = 1e-6, 1e-12
            st["frequency"], st["sc_frequency"], st["amplitude"] = 2 * np.pi * 0.0073, 0.08, 1.0
            track_carrier(x, 1.0, p, st, *tables, np.zeros(0, np.int64), np.empty(n, np.float32),
                          np.empty(n if mode else 0, np.float32), np.empty(n, np.int8), np.empty(0))
        call(0)
        call(1)
        t = _best({"table": lambda: call(1), "exact": lambda: call(0)}, repeat)
        print(f"{wave:<40} {t['table'] / n * 1e9:9.1f} {t['exact'] / n * 1e9:9.1f} {t['exact'] / t['table']:6.2f}")


def _search_case(sps: int, repeat: int, rng) -> str:
    fs = 2000.0 * sps
    block = max(32768, 1 << int(math.ceil(math.log2(256 * sps))))
    x = ((rng.standard_normal(block) + 1j * rng.standard_normal(block)) / math.sqrt(2)).astype(np.complex64)
    s = ResidualCarrierSearch(sample_rate_hz=fs, block_samples=block, search_hz=fs / 2, max_blocks=4,
                              max_rate_hz_per_s=10.0)

    def former():
        y = x.astype(np.complex128)
        spectral_line(y - y.mean(), sample_rate_hz=fs, search_hz=fs / 2)

    def now():
        if s.blocks >= 4:
            s.restart()
        s.add(x, 1.0)
        s.detect()

    link = LinkSection(modulation="pcm-psk-pm", symbol_rate_baud=2000.0, subcarrier_hz=16_000.0, pulse="rect",
                       modulation_index_rad=1.2)
    d = ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=fs)
    n = np.arange(block)
    sig = np.exp(1j * (1.2 * np.sign(np.sin(2 * np.pi * 16_000.0 / fs * n)) + 2 * np.pi * 1500.0 / fs * n))
    sig = sig.astype(np.complex64)
    d.process(SimpleNamespace(samples=sig, start=0, nonfinite=0))  # acquired: the next blocks are tracked
    pos = [block]

    def demod():
        d.process(SimpleNamespace(samples=sig, start=pos[0], nonfinite=0))
        pos[0] += block

    former()
    now()
    demod()
    t = _best({"former": former, "now": now, "demod": demod}, repeat)
    return (f"{f'{sps} samples/symbol, block {block}':<40} {t['former'] * 1e3:10.1f} {t['now'] * 1e3:8.1f} "
            f"{t['former'] / t['now']:6.2f} {t['demod'] * 1e3:9.1f}")


def search(repeat: int) -> None:
    print(f"\n{'carrier search per block':<40} {'former ms':>10} {'now ms':>8} {'ratio':>6} {'demod ms':>9}")
    rng = np.random.default_rng(4)
    for sps in (100, 1024, 4096):
        print(_search_case(sps, repeat, rng))


def mirror(repeat: int, blocks: int = 16) -> None:
    print(f"\n{'search per block, prediction 40 kHz':<40} {'false ms':>9} {'auto ms':>8} {'ratio':>6}")
    rng = np.random.default_rng(5)
    table = CarrierPrediction(positions=[0.0], offsets_hz=[40_000.0])
    for name in ("pcm-pm nrz-l 10 ksym/s", "bpsk bi-phase-l 10 ksym/s"):
        link = LinkSection(pulse="rect", modulation_index_rad=1.1, **CONFIGS[name])
        for rng_hz in (3000.0, 30_000.0):
            demods = {inv: ResidualCarrierDemodulator(
                link=link, receiver=ReceiverSection(acquisition_range_hz=rng_hz, spectrum_inverted=inv),
                sample_rate_hz=FS, carrier_prediction=table) for inv in (False, "auto")}
            n = next(iter(demods.values())).block_samples * blocks
            x = ((rng.standard_normal(n) + 1j * rng.standard_normal(n)) / math.sqrt(2)).astype(np.complex64)

            def run(d, x=x):
                d.reset()
                d.process(SimpleNamespace(samples=x, start=0, nonfinite=0))
                assert d.stats.carrier_found == 0

            for d in demods.values():
                run(d)  # compile outside the timed part
            t = _best({inv: (lambda d=d: run(d)) for inv, d in demods.items()}, repeat)
            print(f"{f'{name}, +-{rng_hz / 1e3:g} kHz':<40} {t[False] / blocks * 1e3:9.2f} "
                  f"{t['auto'] / blocks * 1e3:8.2f} {t['auto'] / t[False]:6.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seconds", type=float, default=10.0, help="signal length at 200 ksample/s")
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    print(f"# load average before: {os.getloadavg()[0]:.2f}")
    demodulators(args.seconds, args.repeat)
    kernel(args.repeat)
    search(args.repeat)
    mirror(args.repeat)
    print(f"# load average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
