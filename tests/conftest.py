"""Shared test fixtures: a small valid mission folder written from scratch."""

from __future__ import annotations

import os

# One BLAS thread per test process: the suite's small matrices gain nothing from threads, and on a
# 2-core CI machine competing OpenBLAS threads made tests 2-3x slower (measured). Set before numpy loads.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import shutil  # noqa: E402
from pathlib import Path  # noqa: E402

import pytest  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
EXAMPLE_MISSION = """\
[pass]
id = "unit-test-pass"

[spacecraft]
inertia_kg_m2 = [[0.021, 0.0004, 0.0], [0.0004, 0.023, 0.0002], [0.0, 0.0002, 0.0071]]

[orbit]
tle = ["1 99990U 26001A   26195.37500000  .00001200  00000-0  61000-4 0  9997",
       "2 99990  97.4100  83.2000 0012000 141.0000 219.2000 15.19000000 28506"]

[magnetometer]
file = "mag.csv"
time = { column = "utc", format = "iso" }
columns = ["mx", "my", "mz"]
unit = "uT"
sensor_to_body = [[0, 1, 0], [-1, 0, 0], [0, 0, 1]]
full_scale = 200.0
noise = 0.08

[gyro]
file = "gyro.csv"
time = { column = "obt", format = "ticks", epoch = "2026-07-01T00:00:00Z", rate_hz = 256, rollover_bits = 32 }
columns = ["wx", "wy", "wz"]
unit = "deg/s"
sensor_to_body = [[1, 0, 0], [0, 1, 0], [0, 0, 1]]
full_scale = 250.0
noise = 0.004
bias_walk = 0.0002

[coils]
file = "coils.csv"
time = { column = "t", format = "unix" }
columns = ["ix_mA", "iy_mA", "iz_mA"]
unit = "mA"
max_current_A = [0.12, 0.12, 0.12]
dipole_per_amp = [[1.5, 0, 0], [0, 1.5, 0], [0, 0, 1.1]]
mag_sampling = "windowed"
off_window_s = [0.05, 0.05]

[controller]
law = "bdot"
gain = 40000.0
period_s = 1.0
first_tick = "2026-07-14T09:12:00Z"
"""


@pytest.fixture
def mission_dir(tmp_path: Path) -> Path:
    """A folder with a valid mission.toml and tiny CSV logs (values are not physical)."""
    (tmp_path / "mission.toml").write_text(EXAMPLE_MISSION)
    (tmp_path / "mag.csv").write_text(
        "utc,mx,my,mz\n2026-07-14T09:12:00.0Z,20.0,-10.0,30.0\n2026-07-14T09:12:00.1Z,20.1,-10.0,30.0\n")
    (tmp_path / "gyro.csv").write_text("obt,wx,wy,wz\n100,0.1,0.2,0.3\n125.6,0.1,0.2,0.3\n")
    (tmp_path / "coils.csv").write_text("t,ix_mA,iy_mA,iz_mA\n1784020320.0,10,20,30\n")
    return tmp_path


@pytest.fixture
def repo() -> Path:
    return REPO


def copy_mission(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst / "mission.toml"
