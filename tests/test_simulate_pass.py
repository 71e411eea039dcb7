"""Simulated passes: the files, the truth, determinism and what each fault scenario changes."""

import json

import numpy as np
import pandas as pd
import pytest
from sgp4.api import Satrec
from sgp4.io import compute_checksum

from recon.config import load_mission
from recon.core import GPS_EPOCH_UTC, InputError, MU_EARTH_km3_s2, WGS84_A_km, body_from_gcrf
from recon.simulate import list_scenarios, simulate_pass
from recon.simulate.dynamics import kinetic_energy_J
from recon.simulate.environment import build_environment, invented_tle, orbit_positions_km

DEG = np.pi / 180.0
NS = 1_000_000_000
SHORT_S = 240.0  # long enough for a few hundred control ticks, short enough for a fast suite


@pytest.fixture(scope="module")
def nominal(tmp_path_factory):
    return simulate_pass("nominal", seed=7, duration_s=SHORT_S, out_dir=tmp_path_factory.mktemp("nominal"))


def _flowing(sim):
    return np.any(sim.i_true_A != 0.0, axis=1)


# ----------------------------------------------------------------------------------- scenarios, orbit
def test_all_named_scenarios_exist():
    required = {"nominal", "coil_inverted", "coil_dead", "coil_gain", "latency", "gyro_dead", "gyro_bias_jump",
                "data_faults", "coils_on_chatter", "momentum", "quiet", "short"}
    assert required <= set(list_scenarios())
    assert all(isinstance(d, str) and d for d in list_scenarios().values())


def test_invented_tle_is_valid_and_sun_synchronous(nominal):
    l1, l2 = nominal.tle
    assert l1[2:7] == "99990" and l2[2:7] == "99990"
    assert int(l1[68]) == compute_checksum(l1) and int(l2[68]) == compute_checksum(l2)
    sat = Satrec.twoline2rv(l1, l2)
    assert sat.error == 0
    h_km = np.linalg.norm(nominal.r_gcrf_km, axis=1) - WGS84_A_km
    assert 480.0 < h_km.min() and h_km.max() < 540.0  # ~510 km near-circular
    # Sun-synchronous: J2 nodal regression -3/2 n J2 (R/a)^2 cos i / (1 - e^2)^2 equals the Sun's
    # mean motion 360 deg per 365.2422 days (formula and J2 = 1.08263e-3, R = 6378.137 km: memory).
    n_rad_s = sat.no_kozai / 60.0
    a_km = (MU_EARTH_km3_s2 / n_rad_s ** 2) ** (1.0 / 3.0)
    omega_sun = 2 * np.pi / (365.2422 * 86400.0)
    cos_i = -omega_sun / (1.5 * n_rad_s * 1.08263e-3 * (WGS84_A_km / a_km) ** 2) * (1 - sat.ecco ** 2) ** 2
    assert np.degrees(np.arccos(cos_i)) == pytest.approx(np.degrees(sat.inclo), abs=0.15)


# --------------------------------------------------------------------------------- files and truth
def test_mission_file_loads_and_describes_the_truth(nominal):
    m = load_mission(nominal.paths["mission.toml"])
    t = nominal.truth
    np.testing.assert_allclose(m.magnetometer.sensor_to_body, t["magnetometer"]["sensor_to_body"], atol=1e-15)
    np.testing.assert_allclose(m.gyro.sensor_to_body, t["gyro"]["sensor_to_body"], atol=1e-15)
    np.testing.assert_allclose(m.coils.dipole_per_amp, t["coils"]["C_A_m2_per_A_nominal"], atol=0)
    np.testing.assert_allclose(m.inertia_kg_m2, t["spacecraft"]["inertia_kg_m2"], atol=0)
    assert m.orbit.tle == tuple(t["orbit"]["tle"])
    assert m.magnetometer.noise == pytest.approx(0.1)  # 100 nT in the file's uT
    assert m.coils.mag_sampling == "windowed" and m.coils.off_window_s == (0.05, 0.05)
    assert m.controller.law == "bdot" and m.controller.first_tick == nominal.tick_time_utc[0]
    assert m.gyro.time.format == "ticks" and m.gyro.time.rollover_bits == 32
    assert json.loads(nominal.paths["truth/truth.json"].read_text()) == json.loads(json.dumps(t))


def test_same_seed_gives_identical_bytes(tmp_path, nominal):
    again = simulate_pass("nominal", seed=7, duration_s=SHORT_S, out_dir=tmp_path / "again")
    assert set(again.paths) == set(nominal.paths)
    for name, p in nominal.paths.items():
        assert again.paths[name].read_bytes() == p.read_bytes(), name
    other = simulate_pass("nominal", seed=8, duration_s=SHORT_S)
    assert other.texts["mag.csv"] != nominal.texts["mag.csv"]


def test_logs_carry_the_simulated_readings(nominal):
    mag = pd.read_csv(nominal.paths["mag.csv"])
    assert list(mag.columns) == ["utc", "mx", "my", "mz"]
    np.testing.assert_array_equal(pd.to_datetime(mag["utc"]).dt.tz_localize(None).to_numpy(), nominal.time_utc)
    np.testing.assert_allclose(mag[["mx", "my", "mz"]].to_numpy() * 1000.0, nominal.b_meas_sensor_nT, atol=1e-6)
    coils = pd.read_csv(nominal.paths["coils.csv"])
    unix_ns = np.round(coils["t"].to_numpy() * 1e3).astype(np.int64) * 1_000_000
    np.testing.assert_array_equal(unix_ns, nominal.tick_time_utc.astype(np.int64))
    np.testing.assert_allclose(coils[["ix_mA", "iy_mA", "iz_mA"]].to_numpy() / 1e3, nominal.i_cmd_A, atol=1e-12)
    gyro = pd.read_csv(nominal.paths["gyro.csv"])
    np.testing.assert_allclose(gyro[["wx", "wy", "wz"]].to_numpy() * DEG, nominal.w_gyro_meas_sensor_rad_s,
                               atol=0.51e-6 * DEG)  # written to 1e-6 deg/s


def test_gyro_counter_wraps_once_mid_pass(nominal):
    counts = pd.read_csv(nominal.paths["gyro.csv"])["obt"].to_numpy().astype(np.int64)
    steps = np.diff(counts)
    wraps = np.flatnonzero(steps != 1)
    assert len(wraps) == 1 and steps[wraps[0]] == 1 - 2 ** 32  # 4294967295 -> 0
    m = load_mission(nominal.paths["mission.toml"])
    unwrapped = counts + np.where(np.arange(len(counts)) > wraps[0], 2 ** 32, 0)
    t = m.gyro.time.epoch + np.round(unwrapped / m.gyro.time.rate_hz * NS).astype("timedelta64[ns]")
    np.testing.assert_array_equal(t, nominal.gyro_time_utc)
    wrap_utc = np.datetime64(nominal.truth["gyro"]["rollover_utc"].rstrip("Z"), "ns")
    assert t[wraps[0] + 1] == wrap_utc
    assert 0.3 * SHORT_S < (wrap_utc - nominal.time_utc[0]) / np.timedelta64(1, "s") < 0.7 * SHORT_S


def test_truth_csv_matches_the_arrays(nominal):
    truth = pd.read_csv(nominal.paths["truth/truth.csv"])
    assert len(truth) == len(nominal.time_utc)
    np.testing.assert_allclose(truth[["qx", "qy", "qz", "qw"]].to_numpy(), nominal.q_body_from_gcrf, atol=1e-12)
    np.testing.assert_allclose(truth[[f"b_body_{a}_nT" for a in "xyz"]].to_numpy(), nominal.b_body_nT, atol=1e-4)
    np.testing.assert_allclose(truth[[f"i_true_{a}_A" for a in "xyz"]].to_numpy(), nominal.i_true_A, atol=1e-9)
    np.testing.assert_allclose(truth[["wx_rad_s", "wy_rad_s", "wz_rad_s"]].to_numpy(), nominal.w_body_rad_s,
                               rtol=1e-11, atol=0)


def test_body_field_is_the_attitude_applied_to_the_inertial_field(nominal):
    b_gcrf = nominal.b_igrf_gcrf_nT + nominal.b_unmodelled_gcrf_nT
    np.testing.assert_allclose(body_from_gcrf(nominal.q_body_from_gcrf, b_gcrf), nominal.b_body_nT, atol=1e-6)
    np.testing.assert_allclose(np.linalg.norm(nominal.q_body_from_gcrf, axis=1), 1.0, atol=1e-12)


def test_field_magnitudes_are_those_of_leo():
    """|B| of IGRF-14 at 500 km lies between 18.3 uT and 52.2 uT (computed with ppigrf, 1-deg grid,
    2025-01-01); the unmodelled field has the configured 100 nT rms."""
    env = build_environment(invented_tle(), np.datetime64("2026-07-14T09:12:00", "ns"), 3000.0,
                            np.random.default_rng(3), unmodelled_rms_nT=100.0)
    b = np.linalg.norm(env.b_igrf_gcrf_nT, axis=1)
    assert 18_000.0 < b.min() and b.max() < 52_500.0
    assert b.max() - b.min() > 10_000.0  # half an orbit spans a good part of that range
    rms = np.sqrt(np.mean(np.sum(env.b_unmodelled_gcrf_nT ** 2, axis=1)))
    assert rms == pytest.approx(100.0, rel=1e-12)
    # the integrator's Hermite interpolation is the cubic spline of the grid values
    t = np.linspace(0.0, 2999.0, 777)
    b_interp, _ = env.interpolate(t)
    igrf, unmodelled = env.components(t)
    np.testing.assert_allclose(b_interp, igrf + unmodelled, rtol=0, atol=1e-6)


def test_magnetometer_residual_has_the_configured_noise(nominal):
    hw = nominal.magnetometer
    model = (nominal.b_body_nT @ hw.sensor_to_body @ hw.S.T + hw.bias_nT + nominal.i_true_A @ hw.K_nT_per_A.T)
    resid = nominal.b_meas_sensor_nT - model
    n = len(resid)
    expected = np.sqrt(100.0 ** 2 + 10.0 ** 2 / 12.0)  # noise and the 10 nT quantisation step
    np.testing.assert_allclose(resid.std(axis=0, ddof=1), expected, rtol=5 * np.sqrt(1 / (2 * n)))
    np.testing.assert_allclose(resid.mean(axis=0), 0.0, atol=5 * 100.0 / np.sqrt(n))
    np.testing.assert_allclose(nominal.b_coil_sensor_nT, nominal.i_true_A @ hw.K_nT_per_A.T, atol=1e-9)


def test_coils_off_sampling_hides_the_coils_from_every_sample():
    def residual_std(sampling):
        sim = simulate_pass("nominal", seed=7, duration_s=120.0, mag_sampling=sampling)
        hw = sim.magnetometer
        resid = sim.b_meas_sensor_nT - (sim.b_body_nT @ hw.sensor_to_body @ hw.S.T + hw.bias_nT)
        return sim, resid.std()

    sim, std_off = residual_std("coils_off")
    assert np.abs(sim.i_true_A).max() > 1e-3  # the coils do carry current
    np.testing.assert_array_equal(sim.b_coil_sensor_nT, 0.0)
    five_sigma = 100.0 * (1.0 + 5.0 / np.sqrt(2 * 3600))  # std of 3600 N(0, 100 nT) values
    assert std_off < five_sigma  # noise only (measured 98.8 nT)
    _, std_on = residual_std("coils_on")
    assert std_on > five_sigma  # the same pass with the coils seen (measured 119.6 nT)


def test_windowed_sampling_shields_the_tick_samples(nominal):
    at_tick = np.isin(nominal.time_utc, nominal.tick_time_utc)
    assert at_tick.sum() == len(nominal.tick_time_utc)
    np.testing.assert_array_equal(nominal.i_true_A[at_tick], 0.0)
    assert np.abs(nominal.b_coil_sensor_nT[~at_tick]).max() > 10.0  # other samples see the coils


def test_nominal_bdot_detumbles(nominal):
    rate = np.linalg.norm(nominal.w_body_rad_s, axis=1) / DEG
    assert rate[0] == pytest.approx(4.0)
    minute_means = rate[: 2400].reshape(4, 600).mean(axis=1)
    assert np.all(np.diff(minute_means) < 0)
    # B-dot at about the gain of Avanzini & Giulietti (2012) damps with a time constant of several
    # hundred seconds here: measured 3.78 -> 2.70 deg/s over three minutes
    assert minute_means[-1] < 0.8 * minute_means[0]


# ------------------------------------------------------------------------------------- coil faults
def test_inverted_coil_reverses_current_and_spoils_detumbling():
    good = simulate_pass("nominal", seed=0, duration_s=600.0)
    bad = simulate_pass("coil_inverted", seed=0, duration_s=600.0)
    np.testing.assert_allclose(bad.C_effective[:, 1], -bad.C_hardware[:, 1], atol=0)
    np.testing.assert_allclose(bad.C_effective[:, [0, 2]], bad.C_hardware[:, [0, 2]], atol=0)
    np.testing.assert_allclose(bad.truth["coils"]["C_A_m2_per_A_true"], bad.C_effective, atol=0)
    on = _flowing(bad)
    np.testing.assert_array_equal(bad.i_true_A[on, 1], -bad.i_logged_A[on, 1])
    np.testing.assert_array_equal(bad.i_true_A[on, 0], bad.i_logged_A[on, 0])
    t_good = kinetic_energy_J(good.w_body_rad_s, good.inertia_kg_m2)
    t_bad = kinetic_energy_J(bad.w_body_rad_s, bad.inertia_kg_m2)
    assert t_bad[-1] / t_bad[0] > 3 * t_good[-1] / t_good[0]  # measured 0.39 against 0.04


def test_dead_coil_carries_no_current():
    sim = simulate_pass("coil_dead", seed=1, duration_s=SHORT_S)
    assert np.abs(sim.i_logged_A[:, 2]).max() > 1e-3
    np.testing.assert_array_equal(sim.i_true_A[:, 2], 0.0)
    np.testing.assert_array_equal(sim.C_effective[:, 2], 0.0)
    np.testing.assert_array_equal(sim.K_effective_nT_per_A[:, 2], 0.0)
    np.testing.assert_array_equal(sim.m_body_Am2, sim.i_true_A @ sim.C_hardware.T)


def test_coil_gain_fault_halves_the_current():
    sim = simulate_pass("coil_gain", seed=1, duration_s=SHORT_S)
    on = _flowing(sim)
    np.testing.assert_allclose(sim.i_true_A[on, 0], 0.5 * sim.i_logged_A[on, 0], rtol=0, atol=1e-15)
    np.testing.assert_allclose(sim.C_effective[:, 0], 0.5 * sim.C_hardware[:, 0], rtol=1e-15)


def test_latency_delays_the_current_by_two_seconds():
    sim = simulate_pass("latency", seed=1, duration_s=SHORT_S)
    assert sim.truth["coils"]["latency_s"] == 2.0
    ticks = sim.tick_time_utc
    k = np.searchsorted(ticks, sim.time_utc - np.timedelta64(2, "s"), side="left") - 1
    expected = np.where(k[:, None] >= 0, sim.i_cmd_A[np.maximum(k, 0)], 0.0)
    on = _flowing(sim)
    assert on.mean() > 0.5
    np.testing.assert_array_equal(sim.i_true_A[on], expected[on])
    # and it is not simply the logged current
    assert np.abs(sim.i_true_A[on] - sim.i_logged_A[on]).max() > 1e-3


def test_crosstalk_feedback_makes_bdot_chatter():
    chatter = simulate_pass("coils_on_chatter", seed=3, duration_s=120.0)
    calm = simulate_pass("coils_on_chatter", seed=3, duration_s=120.0, mag_sampling="windowed")
    def flips(sim):
        c = sim.i_cmd_A[20:]
        return (np.sign(c[1:]) * np.sign(c[:-1]) < 0).mean()
    assert flips(chatter) > 0.9 and np.all(np.abs(chatter.i_cmd_A[20:]) == 0.12)  # bang-bang at the limit
    assert flips(calm) < 0.3 and np.abs(calm.i_cmd_A).max() < 0.12
    np.testing.assert_array_equal(chatter.K_effective_nT_per_A, calm.K_effective_nT_per_A)


def test_quiet_pass_never_switches_the_coils():
    sim = simulate_pass("quiet", seed=2, duration_s=120.0)
    np.testing.assert_array_equal(sim.i_cmd_A, 0.0)
    np.testing.assert_array_equal(sim.b_coil_sensor_nT, 0.0)
    assert "law = \"none\"" in sim.texts["mission.toml"]


def test_momentum_management_reduces_the_momentum_error():
    sim = simulate_pass("momentum", seed=4, duration_s=900.0)
    target = np.asarray(sim.config.target_momentum_Nms)
    h_err = np.linalg.norm(sim.w_body_rad_s @ sim.inertia_kg_m2.T - target, axis=1)
    assert h_err[-100:].mean() < 0.6 * h_err[:100].mean()
    m = sim.texts["mission.toml"]
    assert 'law = "cross_product"' in m and "target_momentum_Nms = [0.0, 0.0, 5e-05]" in m


# ------------------------------------------------------------------------------------- gyro faults
def test_dead_gyro_outputs_zero_from_the_fault_on():
    sim = simulate_pass("gyro_dead", seed=5, duration_s=SHORT_S)
    t_s = (sim.gyro_time_utc - sim.gyro_time_utc[0]) / np.timedelta64(1, "s")
    after = t_s >= round(0.4 * SHORT_S)
    np.testing.assert_array_equal(sim.w_gyro_meas_sensor_rad_s[after], 0.0)
    assert np.all(np.abs(sim.w_gyro_meas_sensor_rad_s[~after]).max(axis=0) > 1e-3)
    assert sim.faults[0]["kind"] == "gyro_dead" and sim.faults[0]["start_utc"].endswith("09:13:36.000Z")


def test_stuck_gyro_repeats_its_last_good_output():
    sim = simulate_pass("gyro_dead", seed=5, duration_s=60.0,
                        faults=[{"kind": "gyro_dead", "start_s": 30.0, "value": None}])
    k = int(np.searchsorted(sim.gyro_time_utc, sim.gyro_time_utc[0] + np.timedelta64(30, "s")))
    w = sim.w_gyro_meas_sensor_rad_s
    np.testing.assert_array_equal(w[k:], np.tile(w[k - 1], (len(w) - k, 1)))
    assert np.all(np.abs(np.diff(w[:k], axis=0)).max(axis=0) > 0)


def test_gyro_bias_jump_steps_the_bias():
    sim = simulate_pass("gyro_bias_jump", seed=6, duration_s=SHORT_S)
    k = int(np.searchsorted(sim.gyro_time_utc, sim.gyro_time_utc[0] + np.timedelta64(120, "s")))
    step = np.diff(sim.gyro_beta_sensor_rad_s, axis=0)
    walk_sigma = sim.gyro.rrw_rad_s_sqrt_s * np.sqrt(0.05)
    assert step[k - 1, 0] == pytest.approx(0.5 * DEG, abs=6 * walk_sigma)
    others = np.delete(step[:, 0], k - 1)
    assert np.abs(others).max() < 6 * walk_sigma
    # the truth column (body axes; gyro x is body x here) shows the same step
    b = sim.gyro_bias_body_rad_s[:, 0]
    assert b[-1] - b[0] == pytest.approx(0.5 * DEG, abs=0.2 * DEG)


# ------------------------------------------------------------------------------------- data faults
def test_data_fault_ledger_points_at_the_right_lines(tmp_path):
    sim = simulate_pass("data_faults", seed=9, duration_s=300.0, out_dir=tmp_path)
    kinds = {e["kind"] for e in sim.data_faults}
    assert kinds == {"gap", "duplicate", "out_of_order", "spike", "blank_line", "malformed", "saturation"}
    lines = {name: (tmp_path / name).read_text().split("\n") for name in ("mag.csv", "gyro.csv", "coils.csv")}
    clean = simulate_pass("nominal", seed=9, duration_s=300.0, gyro_rollover_mid_pass=True)
    for e in sim.data_faults:
        text = lines[e["file"]]
        line = text[e["line"] - 1]  # 1-based, header is line 1
        prev = text[e["line"] - 2]
        if e["kind"] == "blank_line":
            assert line == ""
        elif e["kind"] == "duplicate":
            assert line == text[e["of_line"] - 1] == prev
        elif e["kind"] == "out_of_order":
            assert e["swapped_with_line"] == e["line"] - 1 and line.split(",")[0] < prev.split(",")[0] \
                or e["file"] == "gyro.csv" and int(line.split(",")[0]) < int(prev.split(",")[0])
        elif e["kind"] == "malformed":
            fields = line.split(",")
            assert len(fields) != 4 or "ERR" in fields
        elif e["kind"] == "saturation":
            assert float(line.split(",")[1 + "xyz".index(e["column"][-1])]) == abs(e["value"]) * np.sign(e["value"])
            assert abs(e["value"]) == 200.0
        elif e["kind"] == "spike":
            assert abs(e["offset"]) in (20.0, 30.0)
        elif e["kind"] == "gap":
            assert e["rows_removed"] >= 3
    # mag.csv: everything abnormal is in the ledger, and nothing else is abnormal
    led = {e["line"]: e for e in sim.data_faults if e["file"] == "mag.csv"}
    text = lines["mag.csv"]
    index = {t + "Z": j for j, t in enumerate(np.datetime_as_string(clean.time_utc, unit="ms"))}
    lost = {index[e["time_utc"]] for e in led.values() if e["kind"] == "malformed"}
    late = {index[e["time_utc"]] for e in led.values() if e["kind"] == "out_of_order"}
    last = -1
    for n, line in enumerate(text[1:-1], start=2):
        f = line.split(",")
        if len(f) != 4 or not all(x.replace(".", "", 1).lstrip("-").isdigit() for x in f[1:]):
            assert led[n]["kind"] in ("blank_line", "malformed")
            continue
        j = index[f[0]]
        if np.abs(np.array(f[1:], float) * 1000.0 - clean.b_meas_sensor_nT[j]).max() > 1e-6:
            assert led[n]["kind"] in ("spike", "saturation")
        if j <= last:
            assert led[n]["kind"] in ("duplicate", "out_of_order")
            continue
        missing = set(range(last + 1, j)) - lost - late
        if missing:
            assert led[n]["kind"] == "gap" and led[n]["rows_removed"] == len(missing)
        last = j
    assert text[-1] == ""  # the file ends with a newline


# ------------------------------------------------------------------------------------- orbit as positions
def test_short_pass_ships_a_gnss_position_log(tmp_path):
    sim = simulate_pass("short", seed=1, out_dir=tmp_path)
    m = load_mission(sim.paths["mission.toml"])
    assert m.orbit.kind == "positions" and m.orbit.positions.time.format == "gps"
    pos = pd.read_csv(sim.paths["positions.csv"])
    # GPS - UTC = 18 s since 2017-01-01 (IERS Bulletin C)
    utc0 = np.datetime64(GPS_EPOCH_UTC, "s") + np.timedelta64(int(round(pos["gps_s"][0] - 18.0)), "s")
    assert utc0 == sim.time_utc[0]
    _, r_itrf_km = orbit_positions_km(sim.tle, sim.time_utc[::10])
    err_m = pos[["x_m", "y_m", "z_m"]].to_numpy()[: len(r_itrf_km)] - r_itrf_km * 1e3
    assert 3.0 < err_m.std() < 7.0  # the 5 m receiver noise, nothing more


# ------------------------------------------------------------------------------------- bad input
def test_bad_requests_raise_input_error():
    with pytest.raises(InputError, match="expected a scenario"):
        simulate_pass("no_such_scenario")
    with pytest.raises(InputError, match="unknown \\['colour'\\]"):
        simulate_pass("nominal", duration_s=10.0, colour="red")
    with pytest.raises(InputError, match="whole multiples"):
        simulate_pass("nominal", duration_s=10.0, period_s=0.25)
    with pytest.raises(InputError, match="needs the rate"):
        simulate_pass("momentum", duration_s=10.0, gyro=False)
    with pytest.raises(InputError, match="fault kind"):
        simulate_pass("nominal", duration_s=10.0, faults=[{"kind": "coil_on_fire"}])
