"""Flight-like simulated passes: each imperfection on its own, drawn, recorded in truth.json, and applied.

Each test draws a short pass with only one imperfection switched on
(``Imperfections().only(name)``), reads the drawn value back from truth.json and checks that the
simulator applied it: the sensor or dynamics model reproduces the truth with it and does not without
it. The regimes are checked for what they promise (rates, currents, clipping).
"""

import json

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.transform import Rotation

from recon.config import load_mission
from recon.core import RAD_PER_DEG, body_from_gcrf
from recon.simulate import Imperfections, list_scenarios, simulate_pass
from recon.simulate.dynamics import inertial_momentum_Nms
from recon.simulate.environment import orbit_positions_km
from recon.simulate.scenarios import scenario_config

NS = 1_000_000_000
SHORT_S = 300.0
# a pass with nothing but the imperfection under test: no coils, no disturbance, no gravity gradient
QUIET = {"law": "none", "gain": 0.0, "disturbance_sigma_Nm": 0.0, "gravity_gradient": False}


def _only(name: str, seed: int = 3, **kw):
    return simulate_pass("detumble", seed=seed, duration_s=kw.pop("duration_s", SHORT_S),
                         imperfections=Imperfections().only(name), **kw)


def test_flight_regimes_are_listed():
    names = list_scenarios()
    assert {"detumble", "momentum_orbit", "pointing", "fast_tumble"} <= set(names)


def test_only_switches_every_other_imperfection_off():
    sim = _only("mag_time_offset", seed=5)
    imp = sim.truth["imperfections"]
    assert imp["flight_like"] is True and imp["mag_time_offset_s"] != 0.0
    assert imp["mag_misalignment_angle_deg"] == 0.0 and imp["residual_dipole_Am2"] == [0.0, 0.0, 0.0]
    assert imp["tle_along_track_km"] == 0.0 and imp["coil_log_phase_s"] == 0.0
    assert imp["actuation_latency_s"] == 0.0 and not np.any(imp["gyro_scale_misalignment"])
    with pytest.raises(ValueError, match="Expected imperfections"):
        Imperfections().only("gyro_sclae")


def test_inertia_differs_from_the_mission_file_and_is_what_flies(tmp_path):
    sim = _only("inertia", out_dir=tmp_path, **QUIET)
    nominal = np.asarray(sim.truth["spacecraft"]["inertia_kg_m2"])
    true = np.asarray(sim.truth["spacecraft"]["inertia_true_kg_m2"])
    lam0, lam1 = np.linalg.eigvalsh(nominal), np.linalg.eigvalsh(true)
    rel = np.abs(lam1 / lam0 - 1.0)
    # drawn 1-5 % per principal moment (the tilt of the axes does not change the moments)
    assert np.all((rel >= 0.01 - 1e-12) & (rel <= 0.05 + 1e-12)), rel
    assert np.abs(true - nominal).max() > 1e-6 and np.allclose(true, true.T)
    # torque-free: the inertial angular momentum is conserved with the true inertia, not the nominal one
    h_true = inertial_momentum_Nms(sim.q_body_from_gcrf, sim.w_body_rad_s, true)
    h_nom = inertial_momentum_Nms(sim.q_body_from_gcrf, sim.w_body_rad_s, nominal)
    drift_true = np.abs(h_true - h_true[0]).max() / np.linalg.norm(h_true[0])
    drift_nom = np.abs(h_nom - h_nom[0]).max() / np.linalg.norm(h_nom[0])
    assert drift_true < 1e-9 < 1e-3 < drift_nom, (drift_true, drift_nom)
    # the mission file keeps the nominal (CAD) inertia
    np.testing.assert_array_equal(load_mission(tmp_path / "mission.toml").inertia_kg_m2, nominal)


def test_residual_dipole_torques_the_body():
    sim = _only("residual_dipole", **QUIET)
    m_r = np.asarray(sim.truth["spacecraft"]["residual_dipole_Am2"])
    assert np.all((np.abs(m_r) >= 0.001) & (np.abs(m_r) <= 0.005))
    # d(H_inertial)/dt = A^T (m_r x B_body): integrate the torque with the trapezoid rule
    J = np.asarray(sim.truth["spacecraft"]["inertia_true_kg_m2"])
    h = inertial_momentum_Nms(sim.q_body_from_gcrf, sim.w_body_rad_s, J)
    tau_body = np.cross(m_r, sim.b_body_nT * 1e-9)
    tau_gcrf = Rotation.from_quat(sim.q_body_from_gcrf).inv().apply(tau_body)
    dt = np.diff(sim.t_s)[:, None]
    dh = np.vstack([np.zeros(3), np.cumsum(0.5 * (tau_gcrf[1:] + tau_gcrf[:-1]) * dt, axis=0)])
    change = h - h[0]
    # the trapezoid on 0.1 s samples of a smooth torque: far below 1 % of the change
    assert np.linalg.norm(change[-1] - dh[-1]) < 0.01 * np.linalg.norm(change[-1])
    assert np.linalg.norm(change[-1]) > 1e-7  # and the dipole did change the momentum


def test_misaligned_magnetometer_sees_the_field_rotated_by_the_stated_angle():
    sim = _only("mag_misalignment", mag_noise_nT=0.0, mag_lsb_nT=0.0, **QUIET)
    mag = sim.truth["magnetometer"]
    theta = np.asarray(mag["misalignment_body_deg"]) * RAD_PER_DEG
    assert 0.3 <= np.degrees(np.linalg.norm(theta)) <= 1.0
    S_full = np.asarray(mag["S_full"])
    assert np.abs(S_full - S_full.T).max() > 1e-4  # no longer symmetric
    M = np.asarray(mag["sensor_to_body"])
    S = np.asarray(mag["S"])
    b_cal = (np.linalg.solve(S, (sim.b_meas_sensor_nT - mag["bias_nT"]).T).T) @ M.T
    # the nominally calibrated field is R(theta)^T b_body: rotated back by theta it is the true field
    back = Rotation.from_rotvec(theta).apply(b_cal)
    np.testing.assert_allclose(back, sim.b_body_nT, atol=1e-6)
    ang = np.degrees(np.arccos(np.clip(np.sum(b_cal * sim.b_body_nT, 1) / np.linalg.norm(b_cal, axis=1)
                                       / np.linalg.norm(sim.b_body_nT, axis=1), -1, 1)))
    assert ang.max() <= np.degrees(np.linalg.norm(theta)) + 1e-9 and ang.max() > 0.2


def test_magnetometer_stamps_are_offset_from_the_true_instants():
    sim = _only("mag_time_offset", seed=8)
    off = sim.truth["magnetometer"]["time_offset_s"]
    assert off != 0.0 and abs(off) <= 0.3
    stamps = pd.read_csv(pd.io.common.StringIO(sim.texts["mag.csv"]))["utc"].str.rstrip("Z")
    stamps = stamps.to_numpy().astype("datetime64[ns]")
    lag = (stamps - sim.time_utc).astype(np.int64) / NS
    np.testing.assert_allclose(lag, off, atol=1e-9)
    # the coil and gyro logs keep their own stamps
    coils = pd.read_csv(pd.io.common.StringIO(sim.texts["coils.csv"]))["t"].to_numpy()
    ticks = sim.tick_time_utc.astype("datetime64[ns]").astype(np.int64) / NS
    np.testing.assert_allclose(coils, ticks, atol=1e-6)


def test_gyro_scale_and_misalignment_are_applied():
    sim = _only("gyro_scale", gyro_arw_deg_sqrt_s=0.0, gyro_bias_walk_deg_s_sqrt_s=0.0, seed=4)
    E = np.asarray(sim.truth["gyro"]["scale_misalignment"])
    assert np.abs(np.diag(E)).max() <= 0.03 and np.abs(np.diag(E)).max() > 0.0
    off = E - np.diag(np.diag(E))
    assert np.abs(off).max() <= 0.01 and np.abs(off).max() > 0.0
    np.testing.assert_array_equal(E, E.T)  # no rotation part: the gyro's axes are the body's
    M = np.asarray(sim.truth["gyro"]["sensor_to_body"])
    bias0 = np.asarray(sim.truth["gyro"]["initial_bias_sensor_rad_s"])
    model = sim.w_gyro_true_body_rad_s @ M @ (np.eye(3) + E).T + bias0
    np.testing.assert_allclose(sim.w_gyro_meas_sensor_rad_s, model, atol=1e-12)
    unscaled = sim.w_gyro_true_body_rad_s @ M + bias0
    assert np.abs(sim.w_gyro_meas_sensor_rad_s - unscaled).max() > 1e-4  # 1e-4 rad/s: the effect is visible


@pytest.mark.parametrize("disturbed", [False, True])
def test_unmodelled_field_level_and_correlation(disturbed):
    imp = Imperfections(disturbed_probability=1.0 if disturbed else 0.0).only("unmodelled_field")
    sim = simulate_pass("detumble", seed=2, duration_s=1800.0, imperfections=imp)
    rec = sim.truth["imperfections"]
    assert rec["field_condition"] == ("disturbed" if disturbed else "quiet")
    lo, hi = (400.0, 600.0) if disturbed else (80.0, 120.0)
    assert lo <= rec["unmodelled_rms_nT"] <= hi
    assert 120.0 <= rec["unmodelled_correlation_s"] <= 600.0
    b = sim.b_unmodelled_gcrf_nT
    rms = np.sqrt(np.mean(np.sum(b ** 2, axis=1)))
    # scaled on the environment grid, which spans the pass plus 5 s either side: a few per cent
    assert rms == pytest.approx(rec["unmodelled_rms_nT"], rel=0.05)
    # correlated over minutes: consecutive minutes agree far better than distant ones
    step = int(round(60.0 / (sim.t_s[1] - sim.t_s[0])))
    d60 = np.sqrt(np.mean(np.sum((b[step:] - b[:-step]) ** 2, axis=1)))
    assert d60 < 0.6 * rms, (d60, rms)


def test_mission_tle_is_older_by_several_km_along_track():
    sim = _only("tle_age", seed=6, duration_s=600.0)
    rec = sim.truth["imperfections"]
    assert 2.0 <= abs(rec["tle_along_track_km"]) <= 8.0
    true_tle, mission_tle = sim.truth["orbit"]["tle"], sim.truth["orbit"]["tle_in_mission_file"]
    assert true_tle != mission_tle
    t = sim.time_utc[::100]
    r1, _ = orbit_positions_km(tuple(true_tle), t)
    r2, _ = orbit_positions_km(tuple(mission_tle), t)
    v = np.gradient(r1, axis=0)
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    along = np.sum((r2 - r1) * v, axis=1)
    # the exporter keeps 1e-4 deg of mean anomaly (12 m); the pass epoch is the reference instant
    assert along[0] == pytest.approx(rec["tle_along_track_km"], abs=0.05)
    rate = rec["tle_drift_km_per_orbit"] / 5700.0
    assert along[-1] - along[0] == pytest.approx(rate * (t[-1] - t[0]).astype(np.int64) / NS, abs=0.05)


def test_coil_log_is_written_at_a_phase_inside_the_on_window():
    sim = _only("coil_log_phase", seed=9)
    phase = sim.truth["coils"]["log_phase_s"]
    before, after = sim.config.off_window_s
    assert after < phase < sim.config.period_s - before
    log = pd.read_csv(pd.io.common.StringIO(sim.texts["coils.csv"]))
    ticks = sim.tick_time_utc.astype("datetime64[ns]").astype(np.int64) / NS
    np.testing.assert_allclose(log["t"].to_numpy() - ticks, phase, atol=1e-6)
    np.testing.assert_allclose(log[["ix_mA", "iy_mA", "iz_mA"]].to_numpy() / 1e3, sim.i_cmd_A, atol=5e-7)


def test_commanded_current_starts_a_fixed_latency_after_the_tick():
    sim = _only("actuation_latency", seed=10, mag_sampling="coils_on")
    lat = sim.truth["coils"]["latency_s"]
    assert 0.02 <= lat <= 0.15 and sim.truth["imperfections"]["actuation_latency_s"] == lat
    t = sim.t_s
    ticks = (sim.tick_time_utc - sim.time_utc[0]).astype(np.int64) / NS
    # a sample sees the command of the last tick strictly before t - latency
    k = np.searchsorted(ticks, t - lat, side="left") - 1
    expected = np.where(k[:, None] >= 0, sim.i_cmd_A[np.maximum(k, 0)], 0.0)
    np.testing.assert_array_equal(sim.i_true_A, expected)
    k0 = np.searchsorted(ticks, t, side="left") - 1   # without the latency the samples just after a tick differ
    assert np.any(np.where(k0[:, None] >= 0, sim.i_cmd_A[np.maximum(k0, 0)], 0.0) != sim.i_true_A)


def test_detumble_regime_draws_its_rate_in_range():
    rates = [np.degrees(np.linalg.norm(simulate_pass("detumble", seed=s, duration_s=60.0).w_body_rad_s[0]))
             for s in range(4)]
    assert all(2.0 <= r <= 8.0 for r in rates) and np.ptp(rates) > 0.5


def test_momentum_regime_holds_a_slow_spin_for_an_orbit():
    sim = simulate_pass("momentum_orbit", seed=1, duration_s=1200.0)
    assert sim.config.law == "cross_product"
    h_target = np.asarray(sim.truth["controller"]["target_momentum_Nms"])
    J = np.asarray(sim.truth["spacecraft"]["inertia_kg_m2"])
    rate = np.degrees(np.linalg.norm(np.linalg.solve(J, h_target)))
    assert 0.02 <= rate <= 0.2
    assert scenario_config("momentum_orbit").duration_s == 5700.0  # a whole orbit by default


def test_pointing_regime_coils_carry_only_a_few_mA():
    sim = simulate_pass("pointing", seed=2, duration_s=900.0)
    rms_mA = 1e3 * np.sqrt(np.mean(sim.i_true_A ** 2, axis=0))
    assert np.all(rms_mA < 10.0), rms_mA


def test_fast_tumble_clips_the_gyro():
    sim = simulate_pass("fast_tumble", seed=3, duration_s=120.0)
    fs = sim.gyro.full_scale_rad_s
    assert fs == pytest.approx(8.0 * RAD_PER_DEG)
    clipped = np.abs(sim.w_gyro_meas_sensor_rad_s) >= fs - 1e-15
    assert clipped.mean() > 0.02
    # a clipped axis is a bound: the true rate there (plus bias) lies beyond full scale
    M = sim.gyro.sensor_to_body
    w_s = sim.w_gyro_true_body_rad_s @ M
    assert np.all(np.abs(w_s[clipped]) > fs - 0.02)
    assert json.loads(json.dumps(sim.truth["gyro"]))["full_scale_rad_s"] == pytest.approx(fs)


def test_flight_like_pass_loads_and_its_body_field_matches(tmp_path):
    sim = simulate_pass("detumble", seed=12, duration_s=120.0, out_dir=tmp_path)
    m = load_mission(tmp_path / "mission.toml")
    np.testing.assert_array_equal(m.inertia_kg_m2, np.asarray(sim.config.inertia_kg_m2))
    np.testing.assert_allclose(sim.b_body_nT, body_from_gcrf(sim.q_body_from_gcrf, sim.b_igrf_gcrf_nT
                                                             + sim.b_unmodelled_gcrf_nT), atol=1e-6)
