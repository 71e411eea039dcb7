"""Regressions from the scorecard: passes on which the estimator crashed instead of answering.

- A fitted magnetometer time-tag offset moves its stamps onto or off the gyro's; the alignment fit's
  likelihood must keep one innovation per magnetometer row (it indexed by filter step, whose count
  changes when stamps merge or part).
- A dynamics-mode opening far from the truth makes the filter diverge on the coarse grid; the
  innovation covariance then stops being positive definite. The update must not divide by zero, the
  opening search must drop that opening, and a pass where every opening diverges says so.
- The alignment fit's Gauss-Newton search stays inside the physical range: a pass whose crosstalk
  feedback fills the field with switching steps drove the time-tag offset to -5 and -9.5 s.
- The judge joins the rate history to the reference field by the nearest row, since the estimator
  reports the instants corrected by the time-tag offset it fitted.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from test_estimate_truth import INERTIA, make_truth

from recon.calibrate import MAX_OFFSET_S
from recon.core import nearest_rows
from recon.estimate import FilterDiverged, NoiseModel
from recon.estimate.alignment import AlignmentPrior, AlignmentResult, fit_alignment
from recon.estimate.dynamics_fit import forward_run
from recon.estimate.dynamics_mode import _problem
from recon.estimate.gyro_mode import _likelihood, _solve
from recon.estimate.initial import InitialState
from recon.estimate.kernels import P_SIGM, N, vector_update
from recon.estimate.nuisance import Corrections
from recon.estimate.run import filter_params
from recon.estimate.step_grid import step_grid
from recon.estimate.types import PassInputs

DEG = np.pi / 180.0
NOISE = NoiseModel(mag_nT=100.0, gyro_arw_rad_sqrt_s=0.004 * DEG, gyro_bias_walk_rad_s_sqrt_s=1e-4 * DEG,
                   field_model_nT=100.0)


def _inputs(tr) -> PassInputs:
    t_mag = tr.t_mag_utc.astype("datetime64[ns]").astype(np.int64)
    t_gyro = tr.t_gyro_utc.astype("datetime64[ns]").astype(np.int64)
    return PassInputs(t_mag, tr.b_body_nT, tr.b_ref_gcrf_nT, np.ones(len(t_mag), bool), t_gyro, tr.w_gyro)


def test_alignment_likelihood_keeps_one_innovation_per_row_when_stamps_merge():
    # gyro at 20 Hz on the magnetometer's own stamps (no offset): every magnetometer step merges
    # with a gyro step; a 0.21 s time-tag offset parts them and the filter has half again as many steps
    tr = make_truth(3, 300.0, gyro_offset_s=0.0)
    inputs = _inputs(tr)
    grid = step_grid(inputs)
    prm = filter_params(NOISE, grid.dt_gyro_s, None)
    sol = _solve(inputs, Corrections(np.zeros(3), np.zeros((3, 3)), 0.0), NOISE, prm, 60.0,
                 lambda stage, f: None)
    evaluate = _likelihood(inputs, sol, prm)
    base = evaluate({"theta": np.zeros(3)})
    shifted = evaluate({"theta": np.zeros(3), "time": [0.21]})
    assert len(step_grid(dataclass_shifted(inputs, 0.21)).t_s) > len(grid.t_s)  # the steps did part
    assert base.shape == shifted.shape
    assert np.isfinite(shifted).all()
    # the truth has no offset: a 0.21 s offset fits worse (the likelihood can tell)
    assert shifted @ shifted > base @ base


def dataclass_shifted(inputs: PassInputs, offset_s: float) -> PassInputs:
    return dataclasses.replace(inputs, t_mag_ns=inputs.t_mag_ns - int(round(offset_s * 1e9)))


def test_update_with_a_degenerate_covariance_returns_nan_not_an_error():
    q = np.array([0.0, 0.0, 0.0, 1.0])
    v, db = np.zeros(3), np.zeros(3)
    p = np.zeros((N, N))  # with R = 0 below, S = 0: not positive definite
    prm = filter_params(NoiseModel(mag_nT=100.0), 0.05, None)
    prm = prm.copy()
    prm[P_SIGM] = 0.0
    innov = np.empty(3)
    qn, vn, dbn, nis = vector_update(q, v, db, p, np.array([1.0, 2.0, 3.0]), np.array([1.0, 0.0, 0.0]), prm, innov)
    assert np.isnan(nis)
    np.testing.assert_array_equal(qn, q)  # no update: the state is kept
    np.testing.assert_array_equal(vn, v)


def test_dynamics_filter_from_a_wild_opening_raises_filter_diverged():
    tr = make_truth(0, 300.0, bdot=True)
    t_ns = tr.t_mag_utc.astype("datetime64[ns]").astype(np.int64)
    inputs = PassInputs(t_ns, tr.b_body_nT, tr.b_ref_gcrf_nT, np.ones(len(t_ns), bool))
    problem = _problem(inputs, NoiseModel(mag_nT=100.0, field_model_nT=100.0), INERTIA, None, None, None)
    coarse = problem.decimated(10)  # 1 s steps
    # 140 deg/s about a skew axis on 1 s steps, against a 3 deg/s truth (the scorecard met 70 deg/s from
    # a gyro-seeded opening on a flight-like pass; on this smoother pass 70 deg/s does not yet diverge)
    q0 = np.array([0.8184, -0.2188, 0.5305, 0.0294])
    wild = InitialState(q0 / np.linalg.norm(q0), 2.0 * np.array([-1.2016, 0.7449, -0.6778]), np.full(3, 0.82),
                        np.array([0.2, 0.03, 0.02]), "test", 0.0)
    with pytest.raises(FilterDiverged):
        forward_run(coarse, problem.prior.mean, wild)


def test_nearest_rows_join_within_half_an_interval():
    # the judge joins the rate history to the reference field this way
    ref = np.datetime64("2026-07-14T09:12:00", "ns") + np.arange(5) * np.timedelta64(100, "ms")
    t = ref + np.timedelta64(10, "ms")
    k, near = nearest_rows(ref, np.r_[t, ref[-1] + np.timedelta64(80, "ms")])
    np.testing.assert_array_equal(k, [0, 1, 2, 3, 4, 4])
    np.testing.assert_array_equal(near, [True] * 5 + [False])


@pytest.mark.slow
@pytest.mark.parametrize("seed", [72000, 72001])
def test_chatter_passes_of_the_scorecard_run_to_a_verdict(tmp_path, seed):
    """The two chatter passes (seeds 72000, 72001 of the scorecard's chatter family) that crashed the
    run: the first on the alignment fit's time offset (stamps merging), the second in dynamics mode
    (a diverging opening; then, in gyro mode, on the consider runs' row count). Both now end with the
    chatter found and the gyro not called dead. Slow: 30 s and 1 min."""
    from recon.pipeline import run_pass
    from recon.simulate import simulate_pass

    simulate_pass("detumble", seed=seed, out_dir=tmp_path / "pass", faults=[], mag_sampling="coils_on",
                  mag_crosstalk_body_diag_nT_per_A=(40_000.0, 40_000.0, 30_000.0))
    s = run_pass(tmp_path / "pass" / "mission.toml", tmp_path / "rep", report=False).summary
    assert s["estimate"] is not None
    assert s["controller"]["verdict"] == "not_as_intended"
    codes = {a["code"] for a in s["anomalies"]}
    assert "crosstalk_feedback" in codes
    # the crosstalk left in the field spoils the gyro's kinematic test, but the gyro still carries the
    # turn in every part of the pass: untestable, not dead (seed 72001 was called dead before)
    assert "gyro_dead" not in codes


def _attitude_error_deg(rep_dir, truth_csv) -> tuple[float, float]:
    """RMS attitude error against the simulator's truth, and the RMS of the stated 1-sigma (deg)."""
    import pandas as pd
    from scipy.spatial.transform import Rotation

    tr, es = pd.read_csv(truth_csv), pd.read_csv(rep_dir / "attitude.csv")
    tt = np.array(tr.time_utc.str.rstrip("Z"), dtype="datetime64[ns]")
    te = np.array(es.time_utc.str.rstrip("Z"), dtype="datetime64[ns]")
    k, near = nearest_rows(tt, te)
    q_true = Rotation.from_quat(tr[["qx", "qy", "qz", "qw"]].to_numpy()[k[near]])
    q_est = Rotation.from_quat(es[["qx", "qy", "qz", "qw"]].to_numpy()[near])
    err = np.rad2deg((q_true.inv() * q_est).magnitude())
    sig = np.linalg.norm(es[["sigma_x_deg", "sigma_y_deg", "sigma_z_deg"]].to_numpy()[near], axis=1)
    return float(np.sqrt(np.mean(err ** 2))), float(np.sqrt(np.mean(sig ** 2)))


@pytest.mark.slow
def test_a_gyro_that_dies_mid_pass_does_not_seed_a_wrong_opening(tmp_path):
    """Scorecard pass gyro_dead_stuck seed 65000: the gyro sticks at 798 s and reads 3 % low on z
    before. The opening seeded from the live gyro integrated that scale error over a 424 s window (43
    deg at 3.4 deg/s) with a sigma of 1 deg, and dynamics mode followed it: 26.9 deg RMS at 18 times
    its stated sigma. The seed now competes with the magnetometer-only openings on the likelihood.
    Measured: 1.41 deg RMS. Bound: the issue's gyro-less target, 1.5 deg, and an error within twice
    the stated sigma. Slow: about a minute."""
    from recon.pipeline import run_pass
    from recon.simulate import simulate_pass

    simulate_pass("detumble", seed=65000, out_dir=tmp_path / "pass",
                  faults=[{"kind": "gyro_dead", "start_s": 798.0, "value": None}])
    res = run_pass(tmp_path / "pass" / "mission.toml", tmp_path / "rep", report=False)
    assert res.summary["estimate"]["mode"] == "dynamics"
    rms, sigma = _attitude_error_deg(res.out_dir, tmp_path / "pass" / "truth" / "truth.csv")
    assert rms < 1.5 and rms < 2.0 * sigma, (rms, sigma)


def _linear_innovations(theta_true, time_true, sigma=0.05):
    """Whitened innovations of a linear model in (theta, time): a stand-in for the filter run whose
    minimum sits where the caller puts it (rad, s)."""
    rng = np.random.default_rng(5)
    a = rng.normal(size=(600, 3)) * 2000.0  # 1/rad: well observed
    g = rng.normal(size=600) * 10.0  # 1/s
    noise = rng.normal(size=600) * sigma

    def evaluate(params):
        return a @ (params["theta"] - theta_true) + g * (params["time"][0] - time_true) + noise
    return evaluate


def test_alignment_fit_finds_a_well_observed_misalignment_and_offset():
    """The guard on each Gauss-Newton step does not stop a fit the data determine."""
    theta_true = np.deg2rad([0.6, -0.4, 0.8])
    fit = fit_alignment(_linear_innovations(theta_true, 0.21), AlignmentPrior(time_offset_sigma_s=0.3))
    assert np.allclose(fit.theta_rad, theta_true, atol=np.deg2rad(0.01))
    assert fit.time_offset_s == pytest.approx(0.21, abs=0.01)


def test_alignment_fit_keeps_the_time_offset_inside_the_search_range():
    """A likelihood pulling the offset to -9 s (the chatter passes' innovations did): the offset stops
    at the control law's search range and the misalignment within five prior sigmas."""
    theta_true = np.deg2rad([9.0, 0.0, 0.0])
    fit = fit_alignment(_linear_innovations(theta_true, -9.0), AlignmentPrior(time_offset_sigma_s=0.3))
    assert fit.time_offset_s == pytest.approx(-MAX_OFFSET_S)
    assert abs(fit.theta_rad[0]) <= 5 * np.deg2rad(1.0) + 1e-12
    # pinned at the edge: the sigma spans the range and the summary says the data do not tell
    result = AlignmentResult.from_fit(fit, AlignmentPrior(time_offset_sigma_s=0.3))
    assert result.time_offset_sigma_s >= MAX_OFFSET_S and "edge" in result.to_summary()["time_offset_note"]
