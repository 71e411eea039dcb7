"""estimate_attitude on passes from recon.simulate (IGRF-14 field plus ~100 nT unmodelled, SGP4 orbit,
B-dot detumble from 4 deg/s, 10 Hz magnetometer with 100 nT noise, 20 Hz gyro, coil gain errors).

The magnetometer is calibrated here with the simulator's own hardware truth (bias, soft iron and coil
field removed exactly), so these tests judge the estimator alone. Thresholds as in test_estimate.py
(common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from test_estimate_truth import attitude_error_rad

from recon.core import current_log_with_off_windows
from recon.estimate import NoiseModel, estimate_attitude
from recon.estimate.initial import initial_state_with_gyro
from recon.simulate import simulate_pass

DEG = np.pi / 180.0
DURATION_S = 1800.0


def _inputs(sp):
    mag = sp.magnetometer
    b_sensor = np.linalg.solve(mag.S, (sp.b_meas_sensor_nT - mag.bias_nT - sp.b_coil_sensor_nT).T).T
    b_body = b_sensor @ mag.sensor_to_body.T
    w_body = sp.w_gyro_meas_sensor_rad_s @ sp.gyro.sensor_to_body.T
    cfg = sp.config
    tc, ic = current_log_with_off_windows(sp.tick_time_utc, sp.i_cmd_A, *cfg.off_window_s)
    noise = NoiseModel(mag_nT=mag.noise_nT, gyro_arw_rad_sqrt_s=sp.gyro.arw_rad_sqrt_s,
                       gyro_bias_walk_rad_s_sqrt_s=sp.gyro.rrw_rad_s_sqrt_s)
    return dict(b_body_nT=b_body, b_ref_gcrf_nT=sp.b_igrf_gcrf_nT, gyro_t_utc=sp.gyro_time_utc,
                w_gyro_body_rad_s=w_body, noise=noise, inertia_kg_m2=sp.inertia_kg_m2, coil_t_utc=tc,
                i_coil_A=ic, dipole_per_amp=sp.C_nominal, r_gcrf_km=sp.r_gcrf_km)


def _errors(track, sp, sel):
    ang = np.rad2deg(np.linalg.norm(attitude_error_rad(track.q_body_from_gcrf[sel], sp.q_body_from_gcrf[sel]), axis=1))
    rate = np.rad2deg(np.linalg.norm(track.w_body_rad_s[sel] - sp.w_body_rad_s[sel], axis=1))
    return float(np.sqrt(np.mean(ang ** 2))), float(np.sqrt(np.mean(rate ** 2)))


@pytest.fixture(scope="module")
def nominal_runs():
    out = []
    for seed in (1, 2):
        sp = simulate_pass("nominal", seed, None, duration_s=DURATION_S)
        out.append((sp, estimate_attitude(sp.time_utc, **_inputs(sp))))
    return out


def test_nominal_pass_accuracy_and_consistency(nominal_runs):
    """Measured: seed 1 forward 0.22, smoothed 0.22 deg RMS, rate 0.010 deg/s; seed 2 forward 0.30,
    smoothed 0.22 deg, rate 0.010 deg/s; NIS fraction inside the 95 % interval 0.95 (mean 3.0-3.1)."""
    for sp, h in nominal_runs:
        assert h.mode == "gyro"
        after = sp.t_s > 600.0
        att_f, _ = _errors(h.forward, sp, after)
        att_s, rate_s = _errors(h.smoothed, sp, after)
        assert att_f <= 1.0 and att_s <= 0.6 and rate_s <= 0.02, (att_f, att_s, rate_s)
        assert 0.90 <= h.nis_fraction_inside() <= 0.99
        assert h.anomalies == ()
        # gyro bias estimated to a few thousandths of a deg/s
        berr = np.rad2deg(h.gyro_bias_rad_s[after] - sp.gyro_bias_body_rad_s[after])
        assert np.sqrt(np.mean(berr ** 2)) < 0.005


def test_nominal_passes_nees_inside_chi_square_bounds(nominal_runs):
    """Average NEES of [attitude, gyro bias] over the two runs inside chi2.ppf([0.025, 0.975], 12) / 2
    = [2.2, 11.7] (Bar-Shalom, Li & Kirubarajan 2001, ch. 5 (memory); each run counted once, as in
    test_estimate.py). Measured: forward 5.1 and 6.5 (mean 5.8), smoothed 6.0 and 5.7 (mean 5.8)."""
    m = len(nominal_runs)
    lo, hi = stats.chi2.ppf([0.025, 0.975], 6 * m) / m
    for which in ("forward", "smoothed"):
        per_run = []
        for sp, h in nominal_runs:
            tk = getattr(h, which)
            e = np.hstack([attitude_error_rad(tk.q_body_from_gcrf, sp.q_body_from_gcrf),
                           tk.gyro_bias_rad_s - sp.gyro_bias_body_rad_s])
            nees = np.einsum("ni,ni->n", e, np.linalg.solve(tk.covariance, e[:, :, None])[:, :, 0])
            per_run.append(nees[sp.t_s > 600.0].mean())
        assert lo <= np.mean(per_run) <= hi, (which, per_run, (lo, hi))


def test_dead_gyro_pass_uses_dynamics_mode():
    """Scenario gyro_dead: the output drops to zero 40 % into the pass. Measured (seed 1): smoothed
    0.21 deg and 0.0014 deg/s RMS after 20 minutes (forward 0.21 deg, 0.003 deg/s); 0.15 deg with the
    mission file's model taken as exact, before the model fit (which passes its likelihood-ratio test here)."""
    sp = simulate_pass("gyro_dead", 1, None, duration_s=DURATION_S)
    h = estimate_attitude(sp.time_utc, **_inputs(sp))
    assert h.mode == "dynamics"
    dead = [a for a in h.anomalies if a.code == "gyro_dead"]
    assert len(dead) == 1
    assert abs((dead[0].start_utc - sp.time_utc[0]) / np.timedelta64(1, "s") - 0.4 * DURATION_S) < 1.0
    after = sp.t_s > 1200.0
    att, rate = _errors(h.smoothed, sp, after)
    assert att <= 3.0 and rate <= 0.1, (att, rate)


def test_bias_jump_pass():
    """Scenario gyro_bias_jump: +0.5 deg/s on the gyro x axis (body x here) half-way. Measured (seed 1):
    found as +0.492 deg/s, interval [899.0, 901.0] s; smoothed 0.26 deg RMS after 10 minutes."""
    sp = simulate_pass("gyro_bias_jump", 1, None, duration_s=DURATION_S)
    h = estimate_attitude(sp.time_utc, **_inputs(sp))
    jumps = [a for a in h.anomalies if a.code == "gyro_bias_jump"]
    assert len(jumps) == 1 and jumps[0].axis == "x"
    assert jumps[0].value == pytest.approx(0.5, abs=0.05)
    start, stop = ((t - sp.time_utc[0]) / np.timedelta64(1, "s") for t in (jumps[0].start_utc, jumps[0].stop_utc))
    assert start <= 0.5 * DURATION_S <= stop and stop - start <= 4.0
    att, _ = _errors(h.smoothed, sp, sp.t_s > 600.0)
    assert att <= 0.6


def test_no_gyro_cold_start_on_a_detumbling_pass():
    """The same B-dot pass without any gyro: magnetometer-only start and dynamics mode with the logged,
    gated coil currents. Measured (seed 3): smoothed 0.51 deg, 0.002 deg/s RMS after 20 minutes
    (forward 0.54 deg, 0.004 deg/s); the model fit does not pass its likelihood-ratio test here, so the
    mission file's model is kept, and the error is 0.59 times the stated sigma (1.2 in the version without
    the fit and its consider term)."""
    sp = simulate_pass("nominal", 3, None, duration_s=DURATION_S)
    kw = _inputs(sp)
    kw.pop("gyro_t_utc")
    kw.pop("w_gyro_body_rad_s")
    h = estimate_attitude(sp.time_utc, **kw)
    assert h.mode == "dynamics" and h.mode_reason == "gyro absent"
    att, rate = _errors(h.smoothed, sp, sp.t_s > 1200.0)
    assert att <= 3.0 and rate <= 0.1, (att, rate)


def test_opening_attitude_found_from_several_starts_about_the_field():
    """The opening least squares on (attitude, gyro bias) has more than one minimum. On these three
    openings one start ends 116-133 deg off (residual 130-520 nT); eight starts about the field find
    the right one. Measured: 0.14, 0.48 and 0.55 deg, bias within 0.0021 deg/s, residual 102-105 nT.
    Tolerance 2 deg: inside the 3 deg floor of the filter's starting sigma (a start within it is in
    the filter's linear range); the 30 deg bar for one start is far outside it. The window is the
    shorter one the opening used to take (15 deg of turn, at most 600 s): the default now waits for
    45 deg of turn, which by itself takes these openings out of the wrong minimum."""
    for seed in (6, 9, 19):
        sp = simulate_pass("nominal", seed, None, duration_s=200.0)
        kw = _inputs(sp)
        t0 = sp.time_utc[0]
        t_mag = (sp.time_utc - t0) / np.timedelta64(1, "s")
        t_gyro = (sp.gyro_time_utc - t0) / np.timedelta64(1, "s")
        sig_vec = float(np.hypot(100.0, 100.0 / np.sqrt(3)))  # sensor noise and field-model error, nT
        errs = []
        for n in (1, 8):
            init = initial_state_with_gyro(t_mag, kw["b_body_nT"], kw["b_ref_gcrf_nT"], t_gyro,
                                           kw["w_gyro_body_rad_s"], sigma_vec_nT=sig_vec,
                                           sigma_bias0_rad_s=0.5 * DEG, n_starts=n, max_window_s=600.0,
                                           min_turn_deg=15.0)
            err = attitude_error_rad(init.q_body_from_gcrf[None], sp.q_body_from_gcrf[:1])[0]
            errs.append(np.rad2deg(np.linalg.norm(err)))
            if n == 8:
                bias_err = np.rad2deg(np.abs(init.v - sp.gyro_bias_body_rad_s[0])).max()
                assert bias_err < 0.01, (seed, bias_err)
                assert init.fit.starts_at_best >= 2
        assert errs[0] > 30.0 and errs[1] < 2.0, (seed, errs)
