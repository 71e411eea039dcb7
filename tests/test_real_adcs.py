"""Real telemetry that no one here wrote: 315 ADCS frames of a 1U CubeSat, June 2017, raw counts.

The data set and its provenance are described in shared/data/real-adcs-2017/README.md (beside the
repository, not in it). No scale factors are published, so the mission file uses placeholders and
these tests check the plumbing: every row accounted for, the contact windows found as gaps, the
frozen coil register and constant columns reported, nothing dropped or crashed.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from recon.clean import clean_pass
from recon.cli import main
from recon.config import load_mission
from recon.load import load_pass

_HERE = Path(__file__).resolve()
_CANDIDATES = [_HERE.parents[2] / "shared", _HERE.parents[1] / "shared"]
DATA = next((p / "data" / "real-adcs-2017" for p in _CANDIDATES if (p / "data" / "real-adcs-2017").is_dir()),
            None)

pytestmark = pytest.mark.skipif(
    DATA is None, reason=f"real telemetry not found: looked for data/real-adcs-2017 under {_CANDIDATES}")

N_FRAMES = 315  # README: 315 rows, one per ADCS frame

MISSION = """\
[pass]
id = "real-adcs-2017"

[spacecraft]
inertia_kg_m2 = [[0.0017, 0.0, 0.0], [0.0, 0.0017, 0.0], [0.0, 0.0, 0.0017]]   # placeholder (1U)

[magnetometer]
file = "{csv}"
time = {{ column = "{mag_time}", format = "{mag_fmt}" }}
columns = ["mag1_x", "mag1_y", "mag1_z"]
unit = "nT"
scale = {mag_scale}            # placeholder: no scale is published
sensor_to_body = [[1, 0, 0], [0, 1, 0], [0, 0, 1]]

[gyro]
file = "{csv}"
time = {{ column = "time_unix", format = "unix" }}
columns = {gyro_cols}
unit = "deg/s"
scale = 0.01             # placeholder
sensor_to_body = [[1, 0, 0], [0, 1, 0], [0, 0, 1]]

[coils]
file = "{csv}"
time = {{ column = "time_unix", format = "unix" }}
columns = ["coil_pwm_x", "coil_pwm_y", "coil_pwm_z"]
unit = "duty"
scale = 0.0003125        # placeholder: 3200 counts = full duty
max_current_A = [0.1, 0.1, 0.1]
dipole_per_amp = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]
mag_sampling = "coils_on"
"""


def write_mission(tmp_path: Path, *, mag_scale: float = 100.0, mag_time: str = "time_unix", mag_fmt: str = "unix",
                  gyro_cols: str = '["gyro_x", "gyro_y", "gyro_z"]') -> Path:
    # 100 nT per count puts the median |mag1| of 504 counts (README) at 50,400 nT, a LEO value
    path = tmp_path / "mission.toml"
    path.write_text(MISSION.format(csv=(DATA / "adcs.csv").as_posix(), mag_scale=mag_scale, mag_time=mag_time,
                                   mag_fmt=mag_fmt, gyro_cols=gyro_cols))
    return path


def cleaned(path: Path):
    m = load_mission(path)
    return clean_pass(load_pass(m), m)


def test_recon_inspect_accounts_for_every_frame(tmp_path, capsys):
    status = main(["inspect", str(write_mission(tmp_path)), "--out", str(tmp_path / "out")])
    out = capsys.readouterr().out
    assert status == 0
    rows = {ln.split()[0]: ln.split()[2:5] for ln in out.splitlines() if ln.split()[:1] in (
        ["magnetometer"], ["gyro"], ["coils"])}
    assert rows == {k: [str(N_FRAMES), str(N_FRAMES), "0"] for k in ("magnetometer", "gyro", "coils")}
    ledger = pd.read_csv(tmp_path / "out" / "real-adcs-2017" / "ledger.csv")
    assert len(ledger) == 0  # README: 315 decoded, 315 kept; nothing here is corrupt

    c = cleaned(write_mission(tmp_path))
    for g in c.logs():
        assert g.rows_read == len(g) == N_FRAMES
        np.testing.assert_array_equal(g.line, np.arange(2, N_FRAMES + 2))
    s = c.inputs_summary()
    assert {k: (v["rows_read"], v["rows_kept"], v["dropped"]) for k, v in s.items()} == {
        k: (N_FRAMES, N_FRAMES, {}) for k in ("magnetometer", "gyro", "coils")}


def test_unix_and_iso_time_columns_agree(tmp_path):
    a = cleaned(write_mission(tmp_path)).magnetometer.time_utc
    b = cleaned(write_mission(tmp_path, mag_time="time_utc", mag_fmt="iso")).magnetometer.time_utc
    np.testing.assert_array_equal(a, b)
    assert str(a[0]).startswith("2017-06-23T07:02:55") and str(a[-1]).startswith("2017-06-28T21:00:57")


def test_contact_windows_show_up_as_gaps(tmp_path):
    c = cleaned(write_mission(tmp_path))
    g = c.magnetometer.gaps["duration_s"].to_numpy()
    # README: median spacing 43 s, so a gap is anything over 3 x 43 = 129 s. The 36 contact windows
    # give 35 gaps between them, in three families (README "Gaps between passes"):
    assert c.magnetometer.median_period_s == pytest.approx(43.0, abs=1.0)
    assert np.count_nonzero((g >= 5036) & (g <= 5357)) == 24    # about one orbit
    assert np.count_nonzero((g >= 26877) & (g <= 27198)) == 6   # midday
    assert np.count_nonzero((g >= 35163) & (g <= 40743)) == 5   # overnight
    # ...and within a window the spacing runs to 174 s (README: 11-174 s), so the longest in-window
    # steps are over the 129 s threshold too: 5 of them here, 40 gaps in all
    inside = g[g < 600]
    assert inside.size == 5 and inside.min() > 3 * 43 and inside.max() <= 174
    assert len(c.magnetometer.gaps) == 40
    assert sum(a.code == "telemetry_gap" for a in c.anomalies) == 3 * 40  # one per gap per log


def test_frozen_coil_register_and_constant_columns_are_reported_not_fatal(tmp_path):
    c = cleaned(write_mission(tmp_path))
    stuck = [a for a in c.anomalies if a.code == "stuck_signal"]
    # README: coil_pwm frozen at (350, 150, -100) in the 181 mode-0 frames, from frame 135 (line 136)
    assert [(a.axis, a.value, a.severity) for a in stuck] == [("x", 181.0, "info"), ("y", 181.0, "info"),
                                                               ("z", 181.0, "info")]
    assert all("lines 136-316" in a.evidence for a in stuck)
    np.testing.assert_array_equal(c.coils.values_sensor[-1], np.array([350, 150, -100]) * 0.0003125)

    # the accelerometer columns are 0 in every frame (README): as a "gyro" they load, are kept and
    # are reported stuck on every axis
    c0 = cleaned(write_mission(tmp_path, gyro_cols='["accel_x", "accel_y", "accel_z"]'))
    assert len(c0.gyro) == N_FRAMES and not np.any(c0.gyro.values)
    zero = [a for a in c0.anomalies if a.code == "stuck_signal" and "accel" in a.evidence]
    assert [a.value for a in zero] == [315.0, 315.0, 315.0]


def test_sparse_frames_are_not_spike_tested_and_say_so(tmp_path):
    c = cleaned(write_mission(tmp_path))
    skipped = [a for a in c.anomalies if a.code == "spike_test_skipped"]
    assert [a.severity for a in skipped] == ["info", "info"]  # magnetometer and gyro
    assert "430 s" in skipped[0].evidence  # 11 samples x 43 s apart


def test_raw_counts_read_as_nt_raise_the_unit_question(tmp_path):
    # with scale 1 the counts are read as nT: median |B| 504 nT, far below any LEO field; the
    # nearest power of ten that brings it into range is 100 (i.e. ~100 nT per count)
    c = cleaned(write_mission(tmp_path, mag_scale=1.0))
    a = [x for x in c.anomalies if x.code == "mag_unit_suspect"]
    assert len(a) == 1 and a[0].severity == "critical" and a[0].value == pytest.approx(0.01)
    assert "multiplied by 100" in a[0].evidence
