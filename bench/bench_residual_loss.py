"""Implementation loss of the residual-carrier receiver (carrier + subcarrier + symbol tracking) against ideal
coherent detection, Es/N0 = -8 to 0 dB (issue 16), and the table phasor against the exact one (issue 19).

Run: ``python bench/bench_residual_loss.py [--symbols 200000] [--esn0 -8,-6,-4,-2,0] [--waves square,sine,biphase,nrz]
[--rates 1000,100000] [--seed 1]``.

Recordings come from ``tests/residual_signals.py`` (an independent PCM/PM and PCM/PSK/PM transmitter, no pipeline
code): modulation index 1.2 rad, 64 samples per symbol, a subcarrier of 4 x the symbol rate (16 samples per cycle),
a 30 ppm clock offset shared by subcarrier and symbol clock, the carrier 5 kHz off with a 1 Hz/s Doppler rate at
1 ksym/s, 50 kHz off and 100 Hz/s at 100 ksym/s.  Es/N0 per channel symbol on the data power (sin^2 m, or 2 J1(m)^2
for a sine subcarrier).  Each point prints the bit error rate of the receiver, of a genie receiver told the true
carrier, subcarrier and symbol intervals on the same noise (ideal coherent detection), and of theory,
``Q(sqrt(2 Es/N0))`` (Proakis & Salehi, 5th ed., sec. 4.2); the loss is the difference of the Es/N0 that theory
needs for each error rate, with its standard error from the discordant decisions (paired, same noise).  "all" counts
every symbol the receiver put out (acquisition, loop settling included), "steady" the last 70 %.  The last column is
the loss of the table phasor against ``cos``/``sin`` of the exact phase on the same recording (issue 19: within
0.05 dB).
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import sys
import time
from types import SimpleNamespace

import numpy as np
from scipy.special import erfcinv

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))

import residual_signals as rs  # noqa: E402

from pipeline.demod.residual import ResidualCarrierDemodulator  # noqa: E402
from pipeline.profile import LinkSection, ReceiverSection  # noqa: E402

SPS = 64
WAVES = {"square": ("pcm-psk-pm", "square", "nrz-l"), "sine": ("pcm-psk-pm", "sine", "nrz-l"),
         "biphase": ("pcm-pm", "square", "bi-phase-l"), "nrz": ("pcm-pm", "square", "nrz-l")}


def esn0_of_ber(p: float) -> float:
    return 10.0 * math.log10(erfcinv(2.0 * p) ** 2) if 0.0 < p < 0.5 else float("nan")


def slope(esn0_db: float) -> float:
    e = 10.0 ** (esn0_db / 10.0)
    return math.exp(-e) / (2.0 * math.sqrt(math.pi * e)) * e * math.log(10.0) / 10.0


def demodulate(sig, link, phasor):
    d = ResidualCarrierDemodulator(link=link, receiver=ReceiverSection(), sample_rate_hz=sig.sample_rate_hz,
                                   phasor=phasor)
    y = sig.samples
    step = 1 << 18
    out = [d.process(SimpleNamespace(samples=y[a:a + step], start=a, nonfinite=0)) for a in range(0, y.size, step)]
    out.append(d.flush())
    soft = np.concatenate([b.soft for b in out])
    pos = np.concatenate([b.position for b in out])
    return soft, pos, [t for b in out for t in b.track]


def decisions(sig, soft, pos, kg, sg, first):
    k = sig.symbol_index(pos)
    both = np.intersect1d(k[k >= first], kg[kg >= first])
    mine = soft[np.searchsorted(k, both)] < 0
    truth = sig.bits[both].astype(bool)
    wrong = mine != truth
    if wrong.mean() > 0.5:  # the subcarrier's half-cycle ambiguity (resolved by the frame synchronizer)
        wrong = ~wrong
    g_wrong = (sg[np.searchsorted(kg, both)] < 0) != truth
    return wrong, g_wrong


def loss(wrong, g_wrong):
    n = wrong.size
    p, pg = wrong.mean(), g_wrong.mean()
    value = esn0_of_ber(pg) - esn0_of_ber(p)
    se = math.sqrt(np.count_nonzero(wrong != g_wrong)) / n / slope(esn0_of_ber(pg))
    return p, pg, value, se


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--symbols", type=int, default=200_000)
    ap.add_argument("--esn0", default="-8,-6,-4,-2,0")
    ap.add_argument("--waves", default="square,sine,biphase,nrz")
    ap.add_argument("--rates", default="1000,100000")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()
    print(f"# {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}, {platform.processor() or platform.machine()}, "
          f"Python {platform.python_version()}, load average {os.getloadavg()[0]:.2f}, {args.symbols} symbols a point")
    print("| wave | Rs (sym/s) | Es/N0 (dB) | BER | BER genie | BER theory | loss all (dB) | loss steady (dB) "
          "| genie - theory (dB) | symbol lock | table - exact (dB) |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    for wave in args.waves.split(","):
        modulation, sc_wave, line = WAVES[wave]
        for rate in (float(r) for r in args.rates.split(",")):
            carrier, doppler = (5000.0, 1.0) if rate < 10_000 else (50_000.0, 100.0)
            for esn0 in (float(e) for e in args.esn0.split(",")):
                sc = 4.0 * rate
                link = LinkSection(modulation=modulation, symbol_rate_baud=rate, line_code=line, pulse="rect",
                                   modulation_index_rad=1.2, subcarrier_hz=sc if modulation == "pcm-psk-pm" else 0.0,
                                   subcarrier_wave=sc_wave)
                sig = rs.transmit(args.symbols, wave=wave, sample_rate_hz=rate * SPS, symbol_rate_baud=rate,
                                  subcarrier_hz=sc, esn0_db=esn0, carrier_hz=carrier, rate_hz_per_s=doppler,
                                  clock_ppm=30.0, seed=args.seed)
                kg, sg = rs.genie_symbols(sig)
                runs = {ph: demodulate(sig, link, ph) for ph in ("table", "exact")}
                soft, pos, track = runs["table"]
                w_all, g_all = decisions(sig, soft, pos, kg, sg, 0)
                w_st, g_st = decisions(sig, soft, pos, kg, sg, int(0.3 * args.symbols))
                p, pg, l_all, se_all = loss(w_all, g_all)
                _, _, l_st, se_st = loss(w_st, g_st)
                we, _ = decisions(sig, *runs["exact"][:2], kg, sg, int(0.3 * args.symbols))
                d_te = esn0_of_ber(we.mean()) - esn0_of_ber(w_st.mean())
                se_te = math.sqrt(np.count_nonzero(we != w_st)) / we.size / slope(esn0)
                p_th = rs.bit_error_rate_theory(esn0)
                lock = np.mean([t.symbol_locked for t in track if t.position > 0.3 * sig.samples.size])
                print(f"| {wave} | {rate:.0f} | {esn0:+.1f} | {p:.4f} | {pg:.4f} | {p_th:.4f} | "
                      f"{l_all:+.2f} +- {se_all:.2f} | {l_st:+.2f} +- {se_st:.2f} | "
                      f"{esn0 - esn0_of_ber(pg):+.2f} | {lock:.2f} | {d_te:+.3f} +- {se_te:.3f} |", flush=True)


if __name__ == "__main__":
    main()
