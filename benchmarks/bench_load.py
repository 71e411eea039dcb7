"""Speed of load + clean on a generated magnetometer log, against plain pandas.read_csv.

Writes a 10 Hz magnetometer-like log (ISO UTC times, three uT columns with 0.01 uT resolution, a field
tumbling at 10 deg/s with noise) of N rows into a temporary folder, then times, in this process:

- baseline: ``pandas.read_csv(path)`` of the same file (all columns, default options);
- recon: ``recon.load.load_pass`` + ``recon.clean.clean_pass`` end to end (time parsing, unit
  conversion, rotation, ledger, sort, duplicates, Hampel spike tests, gaps, anomalies);
- the same on a copy of the log with 0.01 % of its lines corrupted (blank, wrong field count, text in
  a number), which sends the parser down its slower text path.

Prints rows/s (best of REPEATS runs: the machine may be shared), the ratio to the baseline, and
peak memory: the tracemalloc peak of each step, measured in a separate run because tracing slows
every allocation (badly so for pandas' text columns), and the process's maximum resident set size.
Target: at least 300,000 rows/s end to end.

Usage: python benchmarks/bench_load.py [N_ROWS]    (default 1,000,000)
"""

from __future__ import annotations

import resource
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd

from recon.clean import clean_pass
from recon.config import load_mission
from recon.load import load_pass

SEED = 20260714
TARGET_ROWS_PER_S = 300_000

MISSION = """\
[pass]
id = "bench"
[spacecraft]
inertia_kg_m2 = [[0.021, 0.0, 0.0], [0.0, 0.023, 0.0], [0.0, 0.0, 0.0071]]
[magnetometer]
file = "{name}"
time = {{ column = "utc", format = "iso" }}
columns = ["mx", "my", "mz"]
unit = "uT"
sensor_to_body = [[0, 1, 0], [-1, 0, 0], [0, 0, 1]]
full_scale = 200.0
noise = 0.1
"""


def make_log(path: Path, n: int, rng: np.random.Generator) -> None:
    from scipy.spatial.transform import Rotation

    t_s = np.arange(n) / 10.0
    axis = rng.normal(size=3)
    axis /= np.linalg.norm(axis)
    b0 = np.array([20.0, -30.0, 15.0])
    b = Rotation.from_rotvec(np.outer(np.deg2rad(10.0) * t_s, axis)).apply(b0)
    b += rng.normal(0.0, 0.1, b.shape)
    t = np.datetime64("2026-07-14T09:12:00", "ns") + (t_s * 1e9).astype("timedelta64[ns]")
    df = pd.DataFrame({"utc": np.char.add(np.datetime_as_string(t, unit="ms"), "Z"),
                       "mx": b[:, 0], "my": b[:, 1], "mz": b[:, 2]})
    df.to_csv(path, index=False, float_format="%.2f", lineterminator="\n")


def corrupt_copy(src: Path, dst: Path, fraction: float, rng: np.random.Generator) -> int:
    lines = src.read_bytes().split(b"\n")
    n = len(lines) - 2
    rows = rng.choice(np.arange(2, n), max(1, int(fraction * n)), replace=False)
    for k, r in enumerate(rows):
        lines[r] = [b"", lines[r][:20], lines[r].replace(b",", b",x", 1)][k % 3]
    dst.write_bytes(b"\n".join(lines))
    return rows.size


REPEATS = 2


def timed(fn):
    """Result, best wall and CPU times of REPEATS runs, and the tracemalloc peak of one more (traced)
    run. CPU time (this process) is the steadier figure when other jobs share the machine."""
    wall = cpu = float("inf")
    for _ in range(REPEATS):
        t0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        wall = min(wall, time.perf_counter() - t0)
        cpu = min(cpu, time.process_time() - c0)
        del out
    tracemalloc.start()
    out = fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return out, wall, cpu, peak


def main(n: int) -> None:
    rng = np.random.default_rng(SEED)
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        make_log(d / "mag.csv", n, rng)
        n_bad = corrupt_copy(d / "mag.csv", d / "mag_bad.csv", 1e-4, rng)
        (d / "mission.toml").write_text(MISSION.format(name="mag.csv"))
        (d / "mission_bad.toml").write_text(MISSION.format(name="mag_bad.csv"))
        size_mb = (d / "mag.csv").stat().st_size / 1e6

        # warm-up on a small file: numba compiles (or loads from its cache) the Hampel kernel once
        make_log(d / "small.csv", 2000, rng)
        (d / "mission_small.toml").write_text(MISSION.format(name="small.csv"))
        ms = load_mission(d / "mission_small.toml")
        t0 = time.perf_counter()
        clean_pass(load_pass(ms), ms)
        warm = time.perf_counter() - t0

        _, w_base, c_base, m_base = timed(lambda: pd.read_csv(d / "mag.csv"))
        m = load_mission(d / "mission.toml")
        c, w_recon, c_recon, m_recon = timed(lambda: clean_pass(load_pass(m), m))
        mb = load_mission(d / "mission_bad.toml")
        cb, w_bad, c_bad, m_bad = timed(lambda: clean_pass(load_pass(mb), mb))
        rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux

    print(f"log: {n:,} rows, {size_mb:.1f} MB; warm-up (numba compile or cache load + small pass): {warm:.2f} s")
    print(f"{'step':<42} {'wall s':>7} {'rows/s':>11} {'cpu s':>6} {'rows/s':>11} {'x base':>7} {'peak MB':>8}")
    for label, w, cpu, mem in (("baseline: pandas.read_csv", w_base, c_base, m_base),
                               ("recon load + clean", w_recon, c_recon, m_recon),
                               (f"recon load + clean, {n_bad} corrupted lines", w_bad, c_bad, m_bad)):
        print(f"{label:<42} {w:7.2f} {n / w:11,.0f} {cpu:6.2f} {n / cpu:11,.0f} {w / w_base:7.2f} {mem / 1e6:8.0f}")
    print(f"process max RSS: {rss_mb:.0f} MB")
    print(f"kept {len(c.magnetometer):,} of {c.magnetometer.rows_read:,} (clean log), "
          f"{len(cb.magnetometer):,} of {cb.magnetometer.rows_read:,} (corrupted: {n_bad} in the ledger: "
          f"{int((cb.ledger['action'] == 'dropped').sum())})")
    rate = n / w_recon
    verdict = "meets" if rate >= TARGET_ROWS_PER_S else "MISSES"
    print(f"target {TARGET_ROWS_PER_S:,} rows/s end to end (wall): {verdict} ({rate:,.0f} rows/s)")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000)
