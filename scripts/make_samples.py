"""Regenerate sample_telemetry/: simulated passes of recon's invented demo satellite, with truth.

    python scripts/make_samples.py            # rewrite sample_telemetry/
    python scripts/make_samples.py --check    # regenerate in a temporary folder, compare bytes

Every pass comes from :func:`recon.simulate.simulate_pass` with a fixed seed, so the output is
byte-for-byte reproducible on the same software versions.
"""

from __future__ import annotations

import argparse
import filecmp
import shutil
import sys
import tempfile
from pathlib import Path

from recon.simulate import simulate_pass

ROOT = Path(__file__).resolve().parent.parent

# Smaller than the simulator's defaults so that each pass stays well under 3 MB: magnetometer at
# 5 Hz, gyro at 10 Hz, truth every 5th magnetometer sample (1 Hz); ticks 0.6 s after each whole
# second so that the 1 Hz truth rows fall while the coils are on.
COMMON = {"mag_rate_hz": 5.0, "gyro_rate_hz": 10.0, "truth_stride": 5, "first_tick_offset_s": 0.6}
PASSES = [
    ("nominal", "nominal", 0, 1500.0),
    ("coil_inverted", "coil_inverted", 0, 1500.0),
    ("data_faults", "data_faults", 0, 600.0),
    ("momentum_orbit", "momentum_orbit", 0, 5700.0),
    ("fast_tumble", "fast_tumble", 0, 1500.0),
]
# Per-pass settings on top of COMMON. The whole-orbit momentum pass samples more slowly (magnetometer
# at 2 Hz, gyro at 5 Hz, truth every 5 s) to stay under 3 MB, and holds a spin of 0.05 deg/s.
EXTRA = {
    "momentum_orbit": {"mag_rate_hz": 2.0, "gyro_rate_hz": 5.0, "truth_stride": 10, "first_tick_offset_s": 0.5,
                       "target_rate_range_deg_s": (0.05, 0.05)},
}


def _readme() -> str:
    lines = [
        "# Sample telemetry (simulated)",
        "",
        "Every pass here is **simulated**. The satellite is recon's invented demo satellite (catalogue",
        "number 99990, an invented 510 km sun-synchronous orbit with epoch 2026-07-14); no real mission,",
        "spacecraft or downlink is involved. Each folder holds what a ground station would have after a",
        "pass (`mission.toml`, `mag.csv`, `gyro.csv`, `coils.csv`) and, in `truth/`, what really happened:",
        "`truth.csv` (attitude, rates, gyro bias, reference and unmodelled field, coil currents and",
        "dipole, disturbance torque, position, at 1 Hz) and `truth.json` (magnetometer bias, soft iron and",
        "crosstalk in the sensor frame, true and nominal coil dipole per amp, noise levels, inertia,",
        "the injected faults with their time windows and the ledger of injected data faults with file and",
        "1-based line numbers). The column list is in the docstring of `recon/simulate/writer.py`.",
        "",
        "Regenerate (byte-identical) with:",
        "",
        "    python scripts/make_samples.py",
        "",
        "and check the committed copies with `python scripts/make_samples.py --check`.",
        "",
        "| folder | scenario | seed | duration | what to look for |",
        "|---|---|---|---|---|",
    ]
    what = {
        "nominal": "B-dot detumble from 4 deg/s; the 32-bit gyro counter wraps half-way through",
        "coil_inverted": "the y coil is wired backwards: the detumble stalls",
        "data_faults": "every kind of data fault (gaps, duplicates, out-of-order rows, spikes, blank "
                       "and malformed lines, saturation), listed in truth.json",
        "momentum_orbit": "flight-like (every imperfection drawn, see truth.json \"imperfections\"): "
                          "cross-product momentum management holding a 0.05 deg/s spin for a whole orbit",
        "fast_tumble": "flight-like: B-dot from a 10-15 deg/s tumble; the gyro's 8 deg/s range clips",
    }
    for folder, scenario, seed, duration in PASSES:
        lines.append(f"| `{folder}/` | {scenario} | {seed} | {duration:.0f} s | {what[scenario]} |")
    settings = ", ".join(f"{k}={v!r}" for k, v in COMMON.items())
    lines += ["", "Each pass is the Python call", "",
              f"    simulate_pass(scenario, seed=seed, out_dir=folder, duration_s=duration, {settings})", ""]
    for folder, extra in EXTRA.items():
        lines += [f"with, for `{folder}/`, " + ", ".join(f"{k}={v!r}" for k, v in extra.items()) + " instead.", ""]
    return "\n".join(lines)


def make(out: Path) -> None:
    out.mkdir(parents=True, exist_ok=True)
    for folder, scenario, seed, duration in PASSES:
        target = out / folder
        if target.exists():
            shutil.rmtree(target)
        simulate_pass(scenario, seed=seed, out_dir=target, duration_s=duration, **{**COMMON, **EXTRA.get(folder, {})})
    (out / "README.md").write_bytes(_readme().encode("utf-8"))


def _same_tree(a: Path, b: Path) -> list[str]:
    files_a = sorted(p.relative_to(a) for p in a.rglob("*") if p.is_file())
    files_b = sorted(p.relative_to(b) for p in b.rglob("*") if p.is_file())
    bad = [str(p) for p in set(files_a) ^ set(files_b)]
    bad += [str(p) for p in files_a if p in files_b and not filecmp.cmp(a / p, b / p, shallow=False)]
    return sorted(bad)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=ROOT / "sample_telemetry")
    ap.add_argument("--check", action="store_true", help="compare a fresh run with the files in --out")
    args = ap.parse_args(argv)
    if not args.check:
        make(args.out)
        return 0
    with tempfile.TemporaryDirectory() as tmp:
        make(Path(tmp))
        differ = _same_tree(Path(tmp), args.out)
    for name in differ:
        print(f"differs: {name}")
    return 1 if differ else 0


if __name__ == "__main__":
    sys.exit(main())
