"""The crosstalk on simulated flight-like passes, through the files recon reads: the synchronous
estimate (windowed sampling), the current each sample saw, and what is applied, against the
simulator's truth. Each pass carries only the imperfection under test
(``Imperfections().only(...)``; recon.simulate draws every other one as zero).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from recon.calibrate import calibrate_pass
from recon.calibrate.inputs import coil_currents
from recon.clean import clean_pass
from recon.config import load_mission
from recon.core import effective_current
from recon.field import reference_field
from recon.load import load_pass
from recon.simulate import Imperfections, simulate_pass

# A 4-sigma fence on each of nine elements: a healthy estimate crosses it on fewer than 1 pass in
# 1,000 (2 x 9 x 3.2e-5, the normal tail beyond 4; Abramowitz & Stegun 26.2.17 (memory))
Z_FENCE = 4.0
# chi-square of nine errors over their full covariance: 99.9 % point (scipy.stats.chi2.ppf(0.999, 9))
CHI2_9_999 = stats.chi2.ppf(0.999, 9)


def _calibrated(tmp_path_factory, regime, seed, only, duration_s, **overrides):
    out = tmp_path_factory.mktemp(f"{regime}-{seed}")
    sim = simulate_pass(regime, seed=seed, out_dir=out, duration_s=duration_s,
                        imperfections=Imperfections().only(*only), **overrides)
    mission = load_mission(out / "mission.toml")
    cleaned = clean_pass(load_pass(mission), mission)
    cal = calibrate_pass(mission, cleaned, reference_field(mission, cleaned.magnetometer.time_utc))
    return sim, mission, cleaned, cal


def _currents(mission, cleaned):
    """The currents the calibration removed K at (its period rule, recon.calibrate.inputs)."""
    return coil_currents(mission, cleaned.coils, cleaned.magnetometer.time_utc).i_apply_A


def _truth_k(sim):
    return np.array(sim.truth["magnetometer"]["K_nT_per_A"])


def _rel(k, k_true):
    return float(np.linalg.norm(k - k_true) / np.linalg.norm(k_true))


def _chi2(cal, k_true):
    e = (cal.crosstalk_nT_per_A - k_true).ravel()
    return float(e @ np.linalg.pinv(cal.crosstalk.covariance) @ e)


@pytest.fixture(scope="module")
def detumble(tmp_path_factory):
    """B-dot detumble, 30 min, windowed sampling, 100 nT noise, no imperfection but the crosstalk."""
    return _calibrated(tmp_path_factory, "detumble", 1, (), 1800.0)


def test_synchronous_estimate_on_a_detumble_pass(detumble):
    sim, _, _, cal = detumble
    k = _truth_k(sim)
    sync, sigma = cal.crosstalk_synchronous_nT_per_A, cal.crosstalk_synchronous_nT_per_A_sigma
    assert np.all(np.isfinite(sync))
    assert np.abs((sync - k) / sigma).max() < Z_FENCE  # measured max 1.4
    # noise-limited: one off sample per period is the reference, currents 8-25 mA rms; measured 15 %
    assert _rel(sync, k) < 0.25
    # all three estimates combined with the prior: every direction determined, the error within its
    # stated covariance (measured chi-square 6.0 for 9) and within 25 % (measured 13.5 %): the stated
    # covariance itself puts the expected error at sqrt(trace)/|K| = 16.5 % (141 nT/A per element
    # against |K| = 2,900 nT/A), so 10 % would fail on noise alone; the chi-square is the real check
    assert cal.crosstalk.n_determined == 9
    assert _chi2(cal, k) < CHI2_9_999
    assert _rel(cal.crosstalk_nT_per_A, k) < 0.25


def test_calibrated_field_noise_carries_the_crosstalk_uncertainty(detumble):
    sim, mission, cleaned, cal = detumble
    sensor = sim.truth["magnetometer"]["noise_nT"]
    assert cal.sensor_noise_nT == pytest.approx(sensor)
    # the per-sample variance is the sensor's plus K's uncertainty at the currents that flowed
    extra = cal.b_body_sigma_nT**2 - sensor**2
    np.testing.assert_allclose(extra, np.einsum("naa->na", cal.b_body_crosstalk_cov_nT2), rtol=1e-9, atol=1e-6)
    i = _currents(mission, cleaned)
    off = np.all(i == 0, axis=1)  # inside the off windows
    assert off.sum() > 1000 and np.allclose(extra[off], 0.0)  # no current, no crosstalk uncertainty
    assert np.all(extra[~off & np.all(np.isfinite(i), axis=1)] > 0)
    assert cal.noise_nT > sensor


@pytest.mark.parametrize("only", [("coil_log_phase",), ("actuation_latency",), ("gyro_scale", "mag_misalignment"),
                                  ("unmodelled_field",)])
def test_synchronous_estimate_with_one_imperfection(tmp_path_factory, only):
    """Each imperfection the synchronous estimate must cope with, alone on a 15-minute detumble: the
    coil log written inside the period, not at the command (the sample's period fixes its current);
    the drive's latency (the samples just after a tick are left out); the gyro's scale and axis errors
    and the magnetometer's misalignment (nuisance columns); a disturbed unmodelled field (the
    straight line through the off samples)."""
    sim, _, _, cal = _calibrated(tmp_path_factory, "detumble", 2, only, 900.0)
    k = _truth_k(sim)
    z = (cal.crosstalk_synchronous_nT_per_A - k) / cal.crosstalk_synchronous_nT_per_A_sigma
    assert np.abs(z).max() < Z_FENCE  # measured 1.6
    assert _chi2(cal, k) < CHI2_9_999  # measured 14.5-15.8 (all nine determined, 21-23 %)


def test_each_sample_gets_its_periods_command_when_the_log_is_written_late(tmp_path_factory):
    # the coil log is written 20-80 % into the on-window: held logged values give the samples between
    # the tick and the log row the previous command; the period rule gives every sample its own
    sim, mission, cleaned, _ = _calibrated(tmp_path_factory, "detumble", 3, ("coil_log_phase",), 300.0)
    assert sim.truth["imperfections"]["coil_log_phase_s"] > 0.1
    t = cleaned.magnetometer.time_utc
    idx = np.searchsorted(sim.time_utc, t)
    truth = sim.i_true_A[idx]
    mine = coil_currents(mission, cleaned.coils, t).i_fit_A
    held = effective_current(t, cleaned.coils.time_utc, cleaned.coils.values, "windowed",
                             mission.controller.period_s, mission.controller.first_tick, mission.coils.off_window_s)
    ok = np.all(np.isfinite(mine), axis=1) & np.all(np.isfinite(held), axis=1)
    # the log holds mA with three decimals: 1 uA
    assert np.mean(np.all(np.abs(mine[ok] - truth[ok]) < 1.5e-6, axis=1)) > 0.999
    assert np.mean(np.all(np.abs(held[ok] - truth[ok]) < 1.5e-6, axis=1)) < 0.9


def test_pointing_pass_holds_crosstalk_at_the_prior(tmp_path_factory):
    """Coils at a few mA: the data shrink no direction's prior variance 100 times, so K is held at the
    prior (zero) and its sigma is the prior's, which covers the truth; the field noise it leaves at
    a few mA is a few nT."""
    sim, mission, cleaned, cal = _calibrated(tmp_path_factory, "pointing", 1, (), 900.0)
    k = _truth_k(sim)
    assert np.sqrt(np.mean(sim.i_true_A**2)) < 0.005  # the regime's premise: a few mA
    f = cal.crosstalk
    assert f.n_determined <= 3  # measured 0
    assert _chi2(cal, k) < CHI2_9_999  # measured 0.36: the prior is wide for this K
    if f.n_determined == 0:
        np.testing.assert_array_equal(cal.crosstalk_nT_per_A, 0.0)
        np.testing.assert_allclose(cal.crosstalk_nT_per_A_sigma, np.tile(f.prior_sigma_nT_per_A, (3, 1)))
    # the crosstalk term of the noise: sigma_p^2 sum_c i_c^2 per sensor axis, with S^-1 and M near
    # rotations (soft iron within a few per cent): compare the RMS over the pass to 10 %
    i = np.nan_to_num(_currents(mission, cleaned))
    expect = np.sqrt(np.mean(np.sum((f.prior_sigma_nT_per_A * i) ** 2, axis=1)))
    got = np.sqrt(np.mean(np.einsum("naa->n", cal.b_body_crosstalk_cov_nT2) / 3.0))
    if f.n_determined == 0:
        assert got == pytest.approx(expect, rel=0.1)
    assert got < 30.0  # nT: a few mA of crosstalk uncertainty


def test_chatter_pass_large_crosstalk_widens_the_prior(tmp_path_factory):
    """Magnetometer sampled with the coils on next to them (40,000 nT/A along the coil axes, seven
    times the geometric prior's sigma): the step estimate sees it plainly in most directions, the
    prior is widened to its size, and what the chattering currents leave unseen is held at that wider
    prior, whose sigma covers it."""
    sim, _, _, cal = _calibrated(tmp_path_factory, "coils_on_chatter", 6, (), 900.0)
    k = _truth_k(sim)
    f = cal.crosstalk
    assert f.prior_widening > 3.0  # measured 4.0
    assert f.n_determined >= 6  # measured 6: three directions shrunk only ~40 times
    assert _rel_determined(cal, k) < 0.10  # measured 0.85 %
    assert _chi2(cal, k) < CHI2_9_999  # measured 16.9


def test_an_estimate_whose_model_misfits_is_left_out(tmp_path_factory):
    """Stamps 0.24 s early and not corrected: a 10 Hz sample stamped before a tick was taken after it,
    so one step per period is attributed to the wrong pair. The fence hides those rows from the fit,
    but they are 14 % of them (599 of 4,197): the step estimate is left out rather than applied with a
    sigma that does not hold (its error is 100 % of K, 38 sigma). Nothing else sees K on a pass whose
    coils never switch off, so every direction is held at the prior."""
    sim, _, _, cal = _calibrated(tmp_path_factory, "coils_on_chatter", 2, ("mag_time_offset",), 600.0)
    assert sim.truth["magnetometer"]["time_offset_s"] == pytest.approx(-0.243)
    assert any(n.startswith("step estimate left out") for n in cal.notes)
    assert "step" not in cal.crosstalk.estimates
    assert cal.crosstalk.n_determined == 0
    assert np.all(cal.crosstalk_nT_per_A == 0.0)  # the prior's mean


@pytest.mark.xfail(strict=True, reason="known gap: with the step estimate left out, nothing widens the "
                   "geometric prior (5,600 nT/A) to this pass's 40,000 nT/A; the cure is to correct the "
                   "stamps by the time offset before windowing (issue 13, point 2), which the command "
                   "replay cannot find here (the commands are saturated: 3 informative)")
def test_the_held_prior_covers_a_crosstalk_left_unseen(tmp_path_factory):
    sim, _, _, cal = _calibrated(tmp_path_factory, "coils_on_chatter", 2, ("mag_time_offset",), 600.0)
    assert _chi2(cal, _truth_k(sim)) < CHI2_9_999  # measured 157


def _rel_determined(cal, k_true):
    """Relative Frobenius error of K in the determined directions (orthonormal in the prior's units)."""
    f = cal.crosstalk
    d = np.tile(f.prior_sigma_nT_per_A, 3)
    lam, u = np.linalg.eigh(f.covariance / np.outer(d, d))
    det = lam <= (1.0 + 1e-9) / f.min_variance_shrink
    e = (cal.crosstalk_nT_per_A - k_true).ravel() / d
    return float(np.linalg.norm(d * (u[:, det] @ (u[:, det].T @ e))) / np.linalg.norm(k_true))
