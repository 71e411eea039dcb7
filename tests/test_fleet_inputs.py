"""What a batch reads before it runs anything: the [pass] satellite keys, the mission files under a folder,
the input hash, and the fleet file's [trend] settings. Each mistake gives a one-line error naming the key."""

from __future__ import annotations

import pytest

from recon.cli import main
from recon.config import load_mission
from recon.core import InputError
from recon.fleet import PassRecord, PassTask, TrendSettings, find_missions, input_hash, load_fleet_file, plan_pass


def _edit(mission_dir, old, new):
    p = mission_dir / "mission.toml"
    text = p.read_text()
    assert old in text, old
    p.write_text(text.replace(old, new, 1))
    return p


def test_pass_satellite_keys_are_optional_and_read(mission_dir):
    assert load_mission(mission_dir / "mission.toml").satellite is None
    p = _edit(mission_dir, 'id = "unit-test-pass"', 'id = "unit-test-pass"\nsatellite = "sat-a"\nobject_id = "99990"')
    m = load_mission(p)
    assert (m.satellite, m.object_id) == ("sat-a", "99990")


@pytest.mark.parametrize(("line", "pattern"), [
    ('satellite = ""', r"key 'pass.satellite': expected a non-empty string, got ''"),
    ("satellite = 7", r"key 'pass.satellite': expected a non-empty string, got 7"),
    ('object_id = ["a"]', r"key 'pass.object_id': expected a non-empty string"),
    ('satellite = " sat-a"', r"key 'pass.satellite': expected a name on one line without leading or trailing"),
    ('object_id = """a\nb"""', r"key 'pass.object_id': expected a name on one line"),
])
def test_bad_pass_satellite_keys_name_the_key(mission_dir, line, pattern):
    p = _edit(mission_dir, 'id = "unit-test-pass"', f'id = "unit-test-pass"\n{line}')
    with pytest.raises(InputError, match=pattern) as e:
        load_mission(p)
    assert "\n" not in str(e.value) and str(p.name) in str(e.value)


def test_find_missions_takes_toml_with_a_pass_table(mission_dir, tmp_path_factory):
    root = tmp_path_factory.mktemp("root")
    (root / "a").mkdir()
    (root / "a" / "mission.toml").write_text((mission_dir / "mission.toml").read_text())
    (root / "fleet.toml").write_text("[trend]\nmin_passes = 6\n")  # not a mission file
    (root / "broken.toml").write_text("[pass\n")  # not TOML: reported as a failed pass
    (root / ".hidden").mkdir()
    (root / ".hidden" / "mission.toml").write_text((mission_dir / "mission.toml").read_text())
    found = find_missions(root)
    assert [p.relative_to(root).as_posix() for p in found] == ["a/mission.toml", "broken.toml"]
    with pytest.raises(InputError, match="expected a folder of mission files"):
        find_missions(root / "none")


def test_input_hash_covers_every_named_file(mission_dir):
    base = input_hash(load_mission(mission_dir / "mission.toml"))
    assert len(base) == 64 and base == input_hash(load_mission(mission_dir / "mission.toml"))
    for name in ("mag.csv", "gyro.csv", "coils.csv", "mission.toml"):
        p = mission_dir / name
        original = p.read_bytes()
        p.write_bytes(original + b"\n")
        assert input_hash(load_mission(mission_dir / "mission.toml")) != base, name
        p.write_bytes(original)
    assert input_hash(load_mission(mission_dir / "mission.toml")) == base


def test_plan_pass_turns_a_bad_mission_file_into_a_failed_record(mission_dir):
    ok = plan_pass(mission_dir / "mission.toml", mission_dir, mission_dir / "out")
    assert isinstance(ok, PassTask) and ok.pass_id == "unit-test-pass"
    _edit(mission_dir, 'id = "unit-test-pass"', 'id = "unit-test-pass"\nsatellite = "sat-a"')
    p = _edit(mission_dir, 'file = "mag.csv"', 'file = "gone.csv"')
    bad = plan_pass(p, mission_dir, mission_dir / "out")
    assert isinstance(bad, PassRecord) and bad.status == "failed"
    assert (bad.pass_id, bad.satellite) == ("unit-test-pass", "sat-a")  # still read from the file
    assert "magnetometer.file" in bad.error and "\n" not in bad.error
    (mission_dir / "mission.toml").write_text("[pass\n")
    worse = plan_pass(mission_dir / "mission.toml", mission_dir, mission_dir / "out")
    assert worse.pass_id == "file:mission.toml" and "expected valid TOML" in worse.error


def test_fleet_file_sets_the_trend_thresholds(tmp_path):
    assert load_fleet_file(None) == TrendSettings()
    p = tmp_path / "fleet.toml"
    p.write_text("[trend]\nbias_nT_per_year = 250\nmin_passes = 8\nfalse_alarm_per_parameter = 0.01\n")
    s = load_fleet_file(p)
    assert (s.bias_nT_per_year, s.min_passes, s.false_alarm_per_parameter) == (250.0, 8, 0.01)
    assert s.threshold_per_year("dipole_per_amp", -1.5) == pytest.approx(0.075)  # 5 % of the level


@pytest.mark.parametrize(("text", "pattern"), [
    ("[trend]\nbias_nT_per_yr = 1\n", r"key 'trend.bias_nT_per_yr': expected one of false_alarm_per_parameter"),
    ("[trend]\nbias_nT_per_year = -1\n", r"key 'trend.bias_nT_per_year': expected a finite number > 0, got -1"),
    ("[trend]\nmin_passes = 4.5\n", r"key 'trend.min_passes': expected a whole number > 0, got 4.5"),
    ("[trend]\nmin_passes = 2\n", r"key 'trend.min_passes': expected at least 3 passes"),
    ("[trend]\nfalse_alarm_per_parameter = 0.7\n", r"false_alarm_per_parameter': expected a false-alarm rate below"),
    ("[trends]\n", r"key 'trends': expected only the section \[trend\]"),
    ("[trend\n", r"expected a readable TOML file"),
])
def test_bad_fleet_file_names_the_key(tmp_path, text, pattern):
    p = tmp_path / "fleet.toml"
    p.write_text(text)
    with pytest.raises(InputError, match=pattern) as e:
        load_fleet_file(p)
    assert "\n" not in str(e.value) and "fleet.toml" in str(e.value)


def test_cli_bad_inputs_exit_2_with_one_line(tmp_path, capsys):
    for args in (["batch", str(tmp_path / "none")], ["trend", str(tmp_path / "none.sqlite")],
                 ["demo", "--season", "0", "--out", str(tmp_path / "s")], ["batch", str(tmp_path), "--workers", "0"],
                 ["batch", str(tmp_path)], ["demo", "--no-drift"],
                 ["demo", "--season", "2", "--scenario", "coil_dead"]):
        assert main(args) == 2, args
        lines = capsys.readouterr().err.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("recon: error: "), (args, lines)
