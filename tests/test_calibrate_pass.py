"""Pass-level calibration: effective coil current, the two crosstalk estimates together, anomalies,
the summary block and the crosstalk table. Hand-built cases and seeded synthetic passes."""

from __future__ import annotations

import json

import numpy as np
import pytest
from test_calibrate_core import I_MAX_A, NOISE_nT, synthetic_pass

from recon.calibrate import (
    calibrate_arrays,
    combine_crosstalk,
    compare_crosstalk,
    format_crosstalk_table,
    prior_sigma_nT_per_A,
)
from recon.core import InputError, controller_samples, effective_current, infer_first_tick

T0 = np.datetime64("2026-07-14T09:12:00", "ns")


def _t(seconds) -> np.ndarray:
    return T0 + (np.asarray(seconds, dtype=float) * 1e9).astype("timedelta64[ns]")


COIL_T = _t([0.0, 1.0, 2.0])
COIL_I = np.array([[0.01, 0.02, 0.03], [-0.04, 0.05, -0.06], [0.07, -0.08, 0.09]])


# ---------------------------------------------------------------------------------------- effective current
def test_effective_current_coils_on_holds_the_last_command_strictly_before():
    mag = _t([-0.5, 0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 10.0])
    i = effective_current(mag, COIL_T, COIL_I, "coils_on")
    assert np.all(np.isnan(i[0])) and np.all(np.isnan(i[1]))  # nothing logged before
    np.testing.assert_array_equal(i[2], COIL_I[0])
    np.testing.assert_array_equal(i[3], COIL_I[0])  # stamped with the command: read before it
    np.testing.assert_array_equal(i[4], COIL_I[1])
    np.testing.assert_array_equal(i[5], COIL_I[1])
    np.testing.assert_array_equal(i[6], COIL_I[2])
    assert np.all(np.isnan(i[7]))  # 8 s after the last command: beyond 3 log intervals, unknown


def test_effective_current_windowed_and_off():
    mag = _t([-0.5, -0.02, 0.5, 0.98, 1.04, 1.06, 1.5])
    i = effective_current(mag, COIL_T, COIL_I, "windowed", period_s=1.0, first_tick=T0,
                          off_window_s=(0.05, 0.05))
    assert np.all(np.isnan(i[0]))  # before the first tick's window and before any command
    np.testing.assert_array_equal(i[1], 0.0)  # inside the first tick's window
    np.testing.assert_array_equal(i[2], COIL_I[0])
    np.testing.assert_array_equal(i[3], 0.0)  # 0.02 s before tick 1
    np.testing.assert_array_equal(i[4], 0.0)  # 0.04 s after tick 1
    np.testing.assert_array_equal(i[5], COIL_I[1])  # 0.06 s after: the new command
    np.testing.assert_array_equal(i[6], COIL_I[1])
    np.testing.assert_array_equal(effective_current(mag, COIL_T, COIL_I, "coils_off"), np.zeros((7, 3)))
    read = controller_samples(mag, COIL_T, COIL_I, "windowed", 1.0, T0, (0.05, 0.05))
    np.testing.assert_array_equal(read, [False, True, False, True, True, False, False])
    read_on = controller_samples(mag, COIL_T, COIL_I, "coils_on")
    np.testing.assert_array_equal(read_on, [False, False, False, True, False, False, True])


def test_effective_current_bad_settings_raise_input_error():
    mag = _t([0.5])
    with pytest.raises(InputError, match="controller.period_s"):
        effective_current(mag, COIL_T, COIL_I, "windowed", off_window_s=(0.05, 0.05))
    with pytest.raises(InputError, match="off_window_s"):
        effective_current(mag, COIL_T, COIL_I, "windowed", period_s=1.0)
    with pytest.raises(InputError, match="expected mag_sampling"):
        effective_current(mag, COIL_T, COIL_I, "sometimes")


def test_first_tick_inferred_from_current_changes():
    # a 10 Hz coil log whose commands change at 0.3 s past each second
    t = np.arange(0.0, 20.0, 0.1)
    i = np.repeat(np.arange(20.0)[:, None] * 0.001, 3, axis=1)[np.floor(t - 0.3).astype(int).clip(0)]
    tick = infer_first_tick(_t(t), i, 1.0)
    phase_s = ((tick - T0).astype(np.int64) / 1e9) % 1.0
    assert abs(phase_s - 0.3) < 1e-6
    assert tick <= _t([0.0])[0]


# ---------------------------------------------------------------------------------------- comparing estimates
def test_compare_and_combine_hand_computed():
    k_a = np.full((3, 3), 1000.0)
    k_b = k_a.copy()
    k_b[0, 0] += 50.0
    cov = np.eye(9) * 100.0  # sigma 10 nT/A each
    ag = compare_crosstalk(k_a, cov, k_b, cov)
    # chi2 = 50^2 / (100 + 100) = 12.5 with 9 dof; p = 0.187 (scipy.stats.chi2.sf(12.5, 9))
    assert ag.chi2 == pytest.approx(12.5)
    assert ag.dof == 9
    assert ag.p_value == pytest.approx(0.1867, abs=1e-3)
    assert ag.agree is True
    assert ag.elements_beyond_3_sigma == ("crosstalk_x_coil_x",)  # 50 / sqrt(200) = 3.5 sigma
    k, c = combine_crosstalk(k_a, cov, k_b, cov)
    assert k[0, 0] == pytest.approx(1025.0)  # equal weights: the mean
    assert c[0, 0] == pytest.approx(50.0)  # half the variance
    k_nan = k_a.copy()
    k_nan[1, 2] = np.nan
    k2, c2 = combine_crosstalk(k_nan, cov, k_b, cov)
    assert k2[1, 2] == pytest.approx(1000.0) and c2[5, 5] == pytest.approx(100.0)  # from b alone
    assert compare_crosstalk(k_nan, cov, k_b, cov).dof == 8


# ---------------------------------------------------------------------------------------- pass level on arrays
M_SENSOR_TO_BODY = np.array([[0.0, 1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])


def _rotate_synthetic(seed, **kw):
    """Synthetic pass in body axes, then seen by a magnetometer mounted with M."""
    p = synthetic_pass(seed, **kw)
    # the core pass's axes are the sensor axes; body = M sensor (row form: v @ M^T)
    b_body = p["b_true"] @ M_SENSOR_TO_BODY.T
    w_body = p["w"] @ M_SENSOR_TO_BODY.T
    return p, p["m"], b_body, w_body


def test_calibrated_body_field_matches_truth():
    p, m, b_body, w_body = _rotate_synthetic(0)
    cal = calibrate_arrays(_t(p["t_s"]), m, p["h"], p["i"], sensor_to_body=M_SENSOR_TO_BODY,
                           max_current_A=np.full(3, I_MAX_A), noise_nT=NOISE_nT, mag_sampling="coils_on",
                           gyro_time_utc=_t(p["gyro_t_s"]), w_gyro_body_rad_s=w_body)
    err = cal.b_body_calibrated_nT - b_body
    rms = np.sqrt(np.mean(err**2, axis=0))
    assert np.all(rms < 1.5 * NOISE_nT)  # noise plus parameter error; measured 31-37 nT per axis
    assert cal.agreement.agree is True
    k_err = np.linalg.norm(cal.crosstalk_combined_nT_per_A - p["K"]) / np.linalg.norm(p["K"])
    assert k_err < 0.02  # measured 0.25 %
    assert cal.residual_rms_nT["after"] < cal.residual_rms_nT["before"] / 5
    assert [a.code for a in cal.anomalies] == ["crosstalk_significant"]  # 2500 nT/A x 3 at 0.12 A
    assert cal.anomalies[0].severity == "warning"  # coils on: the onboard loop sees its coil field


def test_coils_off_duty_cycle_checked():
    p, m, _, w_body = _rotate_synthetic(1)
    kw = dict(sensor_to_body=M_SENSOR_TO_BODY, max_current_A=np.full(3, I_MAX_A), noise_nT=NOISE_nT,
              mag_sampling="coils_off", gyro_time_utc=_t(p["gyro_t_s"]), w_gyro_body_rad_s=w_body)
    # the logged currents leak into the readings: the duty cycle does not work
    leak = calibrate_arrays(_t(p["t_s"]), m, p["h"], p["i"], **kw)
    codes = {a.code: a for a in leak.anomalies}
    assert codes["crosstalk_significant"].severity == "warning"
    assert "duty cycle does not work" in codes["crosstalk_significant"].evidence
    assert np.abs(leak.crosstalk_applied_nT_per_A).max() > 1000.0
    # the same pass with the coil field truly absent: no anomaly, no crosstalk applied
    clean = m - p["i"] @ p["K"].T
    ok = calibrate_arrays(_t(p["t_s"]), clean, p["h"], p["i"], **kw)
    assert "crosstalk_significant" not in {a.code for a in ok.anomalies}
    np.testing.assert_array_equal(ok.crosstalk_applied_nT_per_A, 0.0)
    assert np.nanmax(np.abs(ok.crosstalk_combined_nT_per_A / ok.crosstalk_combined_nT_per_A_sigma)) < 4.0


def test_large_bias_flagged_with_numbers():
    p, m, _, w_body = _rotate_synthetic(2)
    kw = dict(sensor_to_body=M_SENSOR_TO_BODY, max_current_A=np.full(3, I_MAX_A), noise_nT=NOISE_nT,
              mag_sampling="coils_on")

    def flagged(offset):
        cal = calibrate_arrays(_t(p["t_s"]), m + offset, p["h"], p["i"], **kw)
        return [a for a in cal.anomalies if a.code == "mag_bias_large"]

    offset = np.array([3000.0, -2500.0, 1000.0])  # |bias + offset| = 4,180 nT, 9.6 % of the field
    big = flagged(offset)
    assert len(big) == 1 and big[0].severity == "info"  # between 5 and 10 %
    assert big[0].value == pytest.approx(np.linalg.norm(p["bias"] + offset), abs=100.0)
    assert "9.6 % of the mean field 43811 nT" in big[0].evidence
    huge = flagged(2.0 * offset)  # 19 %
    assert len(huge) == 1 and huge[0].severity == "warning"
    assert flagged(np.zeros(3)) == []  # |bias| = 770 nT, 1.8 %


def test_quiet_pass_summary_and_table_say_undetermined():
    p, m, _, w_body = _rotate_synthetic(3, currents="none")
    cal = calibrate_arrays(_t(p["t_s"]), m, p["h"], p["i"], sensor_to_body=M_SENSOR_TO_BODY,
                           max_current_A=np.full(3, I_MAX_A), noise_nT=NOISE_nT, mag_sampling="windowed",
                           gyro_time_utc=_t(p["gyro_t_s"]), w_gyro_body_rad_s=w_body)
    summary = cal.to_summary()
    text = json.dumps(summary, allow_nan=False)  # JSON-ready: undetermined values are null
    # the estimates say nothing on K (null), so what is removed is the prior: zero, with the prior's sigma
    assert summary["crosstalk_magnitude_nT_per_A"] == [[None] * 3] * 3
    assert summary["crosstalk_step_nT_per_A"] == [[None] * 3] * 3
    assert summary["crosstalk_synchronous_nT_per_A"] is None  # no off-window mask given
    assert summary["crosstalk_nT_per_A"] == [[0.0] * 3] * 3
    assert summary["crosstalk_determined"]["directions"] == 0
    prior = prior_sigma_nT_per_A()  # 1.6 A m^2/A at 0.2-0.5 m (recon.calibrate.prior)
    np.testing.assert_allclose(summary["crosstalk_nT_per_A_sigma"], np.tile(prior, (3, 1)), rtol=1e-9)
    assert all(v is not None for v in summary["bias_nT"])
    assert "coil x current spans 0 % of its range" in summary["undetermined"]["crosstalk_x_coil_x"]
    assert summary["residual_rms_nT"]["after"] < summary["residual_rms_nT"]["before"]
    assert '"crosstalk_agreement"' in text
    table = format_crosstalk_table(cal, np.full(3, I_MAX_A))
    assert table.count("undetermined") >= 9
    assert "not tested" in table


def test_without_reference_field_the_step_estimate_is_applied():
    p, m, b_body, w_body = _rotate_synthetic(4)
    cal = calibrate_arrays(_t(p["t_s"]), m, np.full(len(m), np.nan), p["i"], sensor_to_body=M_SENSOR_TO_BODY,
                           max_current_A=np.full(3, I_MAX_A), noise_nT=NOISE_nT, mag_sampling="coils_on",
                           gyro_time_utc=_t(p["gyro_t_s"]), w_gyro_body_rad_s=w_body)
    assert all(np.isnan(cal.bias_nT))
    assert cal.residual_rms_nT == {"before": None, "after": None}
    k_err = np.linalg.norm(cal.crosstalk_applied_nT_per_A - p["K"]) / np.linalg.norm(p["K"])
    assert k_err < 0.05  # measured 0.4 %
    # bias (~400 nT) and soft iron (~2 %) stay uncorrected: the calibrated field is off by that much
    assert np.sqrt(np.mean((cal.b_body_calibrated_nT - b_body) ** 2)) > 200.0  # measured 303 nT
    assert any("skipped" in n for n in cal.notes)


def test_excluded_samples_are_nan_and_unknown_current_only_matters_with_crosstalk():
    p, m, _, w_body = _rotate_synthetic(5, n=1500)
    exclude = np.zeros(len(m), bool)
    exclude[100:110] = True
    i = p["i"].copy()
    i[:5] = np.nan  # before the first logged current
    cal = calibrate_arrays(_t(p["t_s"]), m, p["h"], i, sensor_to_body=M_SENSOR_TO_BODY,
                           max_current_A=np.full(3, I_MAX_A), noise_nT=NOISE_nT, mag_sampling="coils_on",
                           exclude=exclude)
    assert np.all(np.isnan(cal.b_body_calibrated_nT[100:110]))
    assert np.all(np.isnan(cal.b_body_calibrated_nT[:5]))
    assert np.all(np.isfinite(cal.b_body_calibrated_nT[5:100]))
