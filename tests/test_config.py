"""The mission file: a valid one loads; each kind of mistake gives a one-line error naming the key."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from recon.config import load_mission, parse_utc
from recon.core import InputError


def test_valid_mission_loads(mission_dir):
    m = load_mission(mission_dir / "mission.toml")
    assert m.pass_id == "unit-test-pass"
    assert m.magnetometer.unit == "uT"
    assert m.magnetometer.file == (mission_dir / "mag.csv").resolve()
    np.testing.assert_allclose(m.magnetometer.sensor_to_body, [[0, 1, 0], [-1, 0, 0], [0, 0, 1]], atol=1e-15)
    assert m.gyro.time.format == "ticks" and m.gyro.time.rollover_bits == 32
    assert m.gyro.time.epoch == np.datetime64("2026-07-01T00:00:00", "ns")
    assert m.coils.off_window_s == (0.05, 0.05)
    assert m.controller.law == "bdot" and m.controller.gain == 40000.0
    assert m.controller.first_tick == np.datetime64("2026-07-14T09:12:00", "ns")
    assert m.orbit.kind == "tle" and m.orbit.tle[0].startswith("1 99990U")
    assert m.estimator.mode == "auto"


def test_shipped_example_mission_parses_structurally(repo, tmp_path):
    """The example in the docs must stay loadable (its CSVs are made up here as empty stand-ins)."""
    from conftest import EXAMPLE_MISSION

    (tmp_path / "mission.toml").write_text(EXAMPLE_MISSION.replace("unit-test-pass", "x"))
    for f in ("mag.csv", "gyro.csv", "coils.csv"):
        (tmp_path / f).write_text("a\n")
    assert load_mission(tmp_path / "mission.toml").pass_id == "x"


def _edit(mission_dir, old, new):
    p = mission_dir / "mission.toml"
    text = p.read_text()
    assert old in text, old
    p.write_text(text.replace(old, new, 1))
    return p


@pytest.mark.parametrize(
    ("old", "new", "pattern"),
    [
        ('unit = "uT"', "", r"key 'magnetometer.unit': expected this key, it is missing"),
        ('unit = "uT"', 'unit = "microtesla"', r"magnetometer.unit': expected one of 'nT', 'uT'.*got 'microtesla'"),
        ("sensor_to_body = [[0, 1, 0], [-1, 0, 0], [0, 0, 1]]", "sensor_to_body = [[0, 1, 0], [-1, 0, 0]]",
         r"magnetometer.sensor_to_body': expected a 3x3 matrix .*got 2x3"),
        ("sensor_to_body = [[0, 1, 0], [-1, 0, 0], [0, 0, 1]]", "sensor_to_body = [[0, 1, 0], [1, 0, 0], [0, 0, 1]]",
         r"expected a rotation matrix .*det = -1"),
        ('file = "mag.csv"', 'file = "nope.csv"', r"magnetometer.file': expected an existing file, got 'nope.csv'"),
        ('format = "iso"', 'format = "julian"', r"magnetometer.time.format': expected one of 'iso'"),
        ("rate_hz = 256, ", "", r"gyro.time.rate_hz': expected this key"),
        ("max_current_A = [0.12, 0.12, 0.12]", "max_current_A = [0.12, -0.12, 0.12]",
         r"coils.max_current_A': expected numbers > 0"),
        ('mag_sampling = "windowed"', 'mag_sampling = "sometimes"', r"coils.mag_sampling': expected one of"),
        ("gain = 40000.0", 'gain = "high"', r"controller.gain': expected a finite number, got 'high'"),
        ('law = "bdot"', 'law = "pid"', r"controller.law': expected one of 'bdot', 'cross_product', 'none'"),
        ('first_tick = "2026-07-14T09:12:00Z"', 'first_tick = "yesterday"',
         r"controller.first_tick': expected a UTC time"),
        ("[[0.021, 0.0004, 0.0]", "[[-0.021, 0.0004, 0.0]", r"spacecraft.inertia_kg_m2': expected a positive-definite"),
        ('id = "unit-test-pass"', 'id = "a/b"', r"pass.id': expected a name usable as a folder"),
        ("[pass]", "[passes]\nx=1\n[pass]", r"key 'passes': expected only the sections"),
        ("0  9997", "0  9998", None),  # checksum is the orbit stage's business, not the parser's
    ],
)
def test_bad_mission_file_names_the_problem(mission_dir, old, new, pattern):
    p = _edit(mission_dir, old, new)
    if pattern is None:
        load_mission(p)
        return
    with pytest.raises(InputError, match=pattern) as e:
        load_mission(p)
    msg = str(e.value)
    assert "\n" not in msg
    assert msg.startswith(str(p.resolve())) or msg.startswith(str(p))


def test_toml_syntax_error_names_line(mission_dir):
    p = _edit(mission_dir, "[spacecraft]", "[spacecraft")
    with pytest.raises(InputError, match=r"expected valid TOML: .*line \d+"):
        load_mission(p)


def test_optional_sections_may_be_absent(mission_dir):
    p = mission_dir / "mission.toml"
    text = p.read_text()
    for section in ("[orbit]", "[gyro]", "[coils]", "[controller]"):
        start = text.index(section)
        end = text.find("\n[", start + 1)
        text = text[:start] + (text[end + 1:] if end != -1 else "")
    p.write_text(text)
    m = load_mission(p)
    assert m.orbit is None and m.gyro is None and m.coils is None and m.controller is None


def test_controller_needs_coils(mission_dir):
    p = mission_dir / "mission.toml"
    text = p.read_text()
    start = text.index("[coils]")
    end = text.index("[controller]")
    p.write_text(text[:start] + text[end:])
    with pytest.raises(InputError, match=r"expected a \[coils\] section"):
        load_mission(p)


def test_parse_utc_forms():
    want = np.datetime64("2026-07-14T09:12:00.250", "ns")
    assert parse_utc("2026-07-14T09:12:00.25Z") == want
    assert parse_utc("2026-07-14T09:12:00.25+00:00") == want
    with pytest.raises(InputError, match="expected a UTC time"):
        parse_utc("14/07/2026")


@pytest.mark.parametrize(
    ("old", "new", "fragment"),
    [
        ('unit = "uT"', "", "magnetometer.unit"),
        ('unit = "uT"', 'unit = "Gauss"', "got 'Gauss'"),
        ("sensor_to_body = [[0, 1, 0], [-1, 0, 0], [0, 0, 1]]", "sensor_to_body = [[0, 1, 0], [-1, 0, 0]]", "3x3"),
        ('file = "mag.csv"', 'file = "missing.csv"', "missing.csv"),
    ],
)
def test_cli_bad_mission_exits_2_with_one_line(mission_dir, old, new, fragment):
    p = _edit(mission_dir, old, new)
    r = subprocess.run([sys.executable, "-m", "recon", "run", str(p), "--out", str(mission_dir / "out")],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2
    assert r.stdout == ""
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith("recon: error: ") and fragment in lines[0]
    assert "Traceback" not in r.stderr


def test_cli_missing_mission_file(tmp_path):
    r = subprocess.run([sys.executable, "-m", "recon", "inspect", str(tmp_path / "none.toml")],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and "none.toml: expected a mission file" in r.stderr


def test_cli_usage_error_is_one_line():
    r = subprocess.run([sys.executable, "-m", "recon", "frobnicate"], capture_output=True, text=True, timeout=120)
    assert r.returncode == 2
    assert len(r.stderr.strip().splitlines()) == 1


def test_public_api_names_resolve():
    import recon

    for name in recon.__all__:
        assert getattr(recon, name) is not None, name
