"""Reference field along an orbit: recon's coarse grid + spline vs IGRF evaluated at every sample.

Not a test: prints rates, the speed-up and the largest difference, both ways run in this process
on the same samples. Run: ``python benchmarks/bench_field.py [N]`` (default N = 100,000 samples at
10 Hz along the invented demo orbit, ~520 km sun-synchronous).

Targets: recon's way at least 20x faster, max difference under 1 nT.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from recon import field, orbit
from recon.config import OrbitSpec

DEMO_TLE = ("1 99990U 26001A   26195.37500000  .00001200  00000-0  61000-4 0  9997",
            "2 99990  97.4100  83.2000 0012000 141.0000 219.2000 15.19000000 28506")


def best_of(fn, repeats: int) -> tuple[float, object]:
    best, out = np.inf, None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main(n: int = 100_000, rate_hz: float = 10.0) -> None:
    spec = OrbitSpec(tle=DEMO_TLE)
    t = np.datetime64("2026-07-14T09:00:00", "ns") + (np.arange(n) * (1e9 / rate_hz)).astype(np.int64).astype(
        "timedelta64[ns]")

    # the orbit at every sample, shared by both ways
    t_orbit, st = best_of(lambda: orbit.orbit_at(spec, t), 3)
    # the field step: recon's grid + spline vs IGRF at every sample (same rotation to GCRF)
    t_fast, ref = best_of(lambda: field.field_for_orbit(spec, st), 3)
    t_base, b_direct = best_of(lambda: field.igrf_gcrf_nT(t, st.r_itrf_km), 2)
    # end to end, orbit included
    t_fast_all, ref_all = best_of(lambda: field.field_along_orbit(spec, t), 3)

    err = np.linalg.norm(ref.b_gcrf_nT - b_direct, axis=1)
    err_all = np.linalg.norm(ref_all.b_gcrf_nT - b_direct, axis=1)
    pos_m = 1e3 * np.linalg.norm(ref_all.r_gcrf_km - st.r_gcrf_km, axis=1)
    span_s = (t[-1] - t[0]) / np.timedelta64(1, "s")
    print(f"samples: {n} at {rate_hz:g} Hz ({span_s:.0f} s of orbit), grid step {field.GRID_STEP_s:g} s")
    print(f"field step, recon (grid + spline):    {t_fast:8.3f} s  {n / t_fast:12,.0f} samples/s")
    print(f"field step, IGRF at every sample:     {t_base:8.3f} s  {n / t_base:12,.0f} samples/s")
    print(f"speed-up of the field step:           {t_base / t_fast:8.1f} x")
    print(f"orbit at every sample (both ways):    {t_orbit:8.3f} s")
    print(f"end to end, recon:                    {t_fast_all:8.3f} s")
    print(f"end to end, baseline (orbit + IGRF):  {t_orbit + t_base:8.3f} s")
    print(f"speed-up end to end:                  {(t_orbit + t_base) / t_fast_all:8.1f} x")
    print(f"max |B_recon - B_every_sample|:       {err.max():8.4f} nT (rms {np.sqrt(np.mean(err**2)):.4f} nT)")
    print(f"  end to end (orbit from nodes too):  {err_all.max():8.4f} nT; position {pos_m.max():.3f} m at most")
    ok = (t_orbit + t_base) / t_fast_all >= 20 and err_all.max() < 1.0
    print(f"target >= 20x end to end with max error < 1 nT: {'meets' if ok else 'MISSES'}")

if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100_000)
