"""Accuracy and cost of the time, orbit and clock code (issue 17), against outside references.

Run: ``PYTHONPATH=.:tests python bench/bench_time.py``.  Prints, with the reference each figure is taken
against:

- the EME2000 and TEME rotations to the Earth-fixed frame against astropy (angle, arcsec);
- predicted light time and one-way Doppler from an invented element set against sgp4 positions and erfa's
  GMST propagated independently (the Doppler as the numerical derivative of the light time);
- the same for the invented lunar orbiter's ephemeris against astropy's GCRS station;
- Hermite interpolation of that ephemeris against the orbit that generated it, at 60 s and 600 s steps;
- clock correlation on the end-to-end pass of tests/test_clock.py (UTC(OBT) error at every sampled frame,
  drift error);
- the cost of ``format_utc``, ``parse_utc``, one ``OrbitPredictor.predict`` (TLE and OEM).

Not a test: nothing is asserted.  Needs astropy, erfa and sgp4 (the test extras).
"""

from __future__ import annotations

import math
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))


def _timeit(fn, n: int) -> float:
    fn()
    t0 = time.perf_counter()
    for _ in range(n):
        fn()
    return (time.perf_counter() - t0) / n


def main() -> None:
    from astropy.utils import iers

    iers.conf.auto_download = False
    # ---- frames
    import astropy.coordinates as coords
    import astropy.units as u
    import orbit_truth as truth
    import test_clock as tc
    import test_orbit as to
    from astropy.time import Time

    from pipeline.orbit import OrbitPredictor, inertial_to_earth_fixed
    from pipeline.timescales import NS_PER_S, format_utc, parse_utc

    worst = {"EME2000": 0.0, "TEME": 0.0}
    for text in ("2010-02-01T18:00:00", "2016-12-31T23:59:59.5", "2020-06-15T03:17:41.25"):
        t = Time(text, scale="utc")
        for frame in worst:
            m = inertial_to_earth_fixed(frame, parse_utc(text + "Z"), ut1_minus_utc_s=float(t.delta_ut1_utc))
            for vec in np.eye(3) * 7000.0:
                rep = coords.CartesianRepresentation(*(vec * u.km))
                src = coords.GCRS(rep, obstime=t) if frame == "EME2000" else coords.TEME(rep, obstime=t)
                ref = src.transform_to(coords.ITRS(obstime=t)).cartesian.xyz.to_value(u.km)
                worst[frame] = max(worst[frame], math.degrees(to._angle(m @ vec, ref)) * 3600)
    for frame, v in worst.items():
        print(f"{frame} -> Earth-fixed rotation vs astropy ITRS: worst {v:.3f} arcsec")

    # ---- TLE predictions vs independent sgp4 + erfa
    from sgp4.api import WGS72, Satrec

    tle = to._tle()
    times = to._pass_times(OrbitPredictor(tle, to.STATION, relativistic=False), tle.epoch_tai_ns)
    sat = Satrec.twoline2rv(tle.line1, tle.line2, WGS72)
    loc = coords.EarthLocation.from_geodetic(to.STATION.longitude_deg * u.deg, to.STATION.latitude_deg * u.deg,
                                             to.STATION.altitude_m * u.m, ellipsoid="WGS84")
    ecef = np.array([loc.x.to_value(u.km), loc.y.to_value(u.km), loc.z.to_value(u.km)])
    wt = wd = 0.0
    for t in times:
        dut1 = float(to._astropy_time(t, Time).delta_ut1_utc)
        p = OrbitPredictor(tle, to.STATION, ut1_minus_utc_s=dut1, relativistic=False).predict(t)

        def tau(dt_s, t=t, dut1=dut1):
            tt = t + int(dt_s * NS_PER_S)
            a = to._astropy_time(tt, Time).ut1
            return to._independent_light_time(sat, ecef, tt, (a.jd1, a.jd2), dut1)

        wt = max(wt, abs(p.light_time_s - tau(0.0)))
        ratio = 1.0 - (tau(0.02) - tau(-0.02)) / 0.04
        wd = max(wd, abs(p.doppler_hz(2.2e9) - 2.2e9 * (ratio - 1.0)))
    print(f"TLE pass ({len(times)} points, elevation > 15 deg) vs sgp4 + erfa: light time worst {wt * 1e9:.3f} ns, "
          f"Doppler worst {wd * 1e3:.2f} mHz at 2.2 GHz")

    # ---- lunar OEM vs astropy GCRS station
    eph = to._demo_oem()
    t0 = parse_utc(truth.DEMO_EPOCH_TEXT + "Z")

    def tau_truth(t_ns):
        pos, _ = loc.get_gcrs_posvel(to._astropy_time(t_ns, Time))
        rs = pos.xyz.to_value(u.km)
        x = 0.0
        for _ in range(8):
            x = float(np.linalg.norm(truth.tamarisk_state((t_ns - t0) / 1e9 - x)[0] - rs)) / to.C_KM_S
        return x

    wt = wd = 0.0
    for dt_s in np.linspace(-1500.0, 3400.0, 15):
        t = t0 + int(dt_s * NS_PER_S)
        dut1 = float(to._astropy_time(t, Time).delta_ut1_utc)
        p = OrbitPredictor(eph, to.STATION, ut1_minus_utc_s=dut1, relativistic=False).predict(t)
        wt = max(wt, abs(p.light_time_s - tau_truth(t)))
        ratio = 1.0 - (tau_truth(t + NS_PER_S // 2) - tau_truth(t - NS_PER_S // 2))
        wd = max(wd, abs(p.doppler_hz(8.45e9) - 8.45e9 * (ratio - 1.0)))
    print(f"lunar OEM (EME2000) vs astropy GCRS station: light time worst {wt * 1e9:.1f} ns, "
          f"Doppler worst {wd * 1e3:.1f} mHz at 8.45 GHz")

    # ---- Hermite interpolation
    for step in (60.0, 600.0):
        for deg in (3, 7):
            r, v = to._interpolation_errors(to._demo_oem(step, deg), n=500)
            print(f"OEM Hermite degree {deg}, {step:.0f} s step vs the generating orbit: position worst "
                  f"{r * 1e6:.3f} mm, velocity worst {v * 1e6:.4f} mm/s")

    # ---- clock correlation end to end
    from pipeline.tools._clock import run_clock

    with tempfile.TemporaryDirectory() as d:
        t_dec = time.perf_counter()
        prof, folder = tc.build_decoded_pass(Path(d))
        t_dec = time.perf_counter() - t_dec
        res = run_clock([folder], prof, light_time_s=float(tc.LIGHT_TIME_S), plot=False)
        t_ref = parse_utc(tc.START)
        errs = [abs(res.model.utc_tai_ns(round(tc._obt(i) * NS_PER_S)) - (t_ref + round(tc._departure(i) * NS_PER_S)))
                for i in range(0, tc.N_FRAMES - 2, tc.EVERY)]
        print(f"clock correlation ({res.model.pairs_used} pairs used, {res.model.pairs_rejected} rejected; decode "
              f"{t_dec:.1f} s): UTC(OBT) worst {max(errs):.0f} ns at {len(errs)} sampled frames, drift error "
              f"{abs(res.model.drift_s_per_s - 1e-6):.2e} s/s (+- {res.model.drift_uncertainty:.1e}), residual RMS "
              f"{res.model.residual_rms_s * 1e9:.1f} ns")

    # ---- cost
    tai = parse_utc("2026-03-14T09:30:00.123456789Z")
    print(f"format_utc {_timeit(lambda: format_utc(tai), 20000) * 1e6:.2f} us/call, parse_utc "
          f"{_timeit(lambda: parse_utc('2026-03-14T09:30:00.123456789Z'), 20000) * 1e6:.2f} us/call")
    pt = OrbitPredictor(tle, to.STATION)
    po = OrbitPredictor(eph, to.STATION)
    print(f"OrbitPredictor.predict: TLE {_timeit(lambda: pt.predict(times[0]), 500) * 1e3:.3f} ms/call, OEM "
          f"{_timeit(lambda: po.predict(t0), 500) * 1e3:.3f} ms/call")


if __name__ == "__main__":
    main()
