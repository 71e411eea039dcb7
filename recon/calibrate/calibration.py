"""Magnetometer calibration and coil crosstalk for one pass.

Model, in the magnetometer's own axes (as logged)::

    b_meas_sensor = S @ b_true_sensor + bias + K @ i + noise,     b_true_sensor = M^T @ b_body

``M`` = ``[magnetometer] sensor_to_body``; ``S`` symmetric (soft iron, scale and skew); ``bias`` in
nT; ``K`` in nT per A, one column per coil; ``i`` the current each sample saw (its control period's
command, :mod:`recon.calibrate.inputs`). The calibrated body field is ``M @ S^-1 (b_meas - bias - K i)``.

Three independent estimates of ``K``:

1. attitude-independent: ``|S^-1 (b_meas - bias - K i)| = |b_ref|`` with the reference field's
   magnitude, a centred linear first guess extended from TWOSTEP (:mod:`recon.calibrate.linear`) refined by
   robust nonlinear least squares (:mod:`recon.calibrate.magfit`); blind to the part of K along the
   coil dipoles when the control keeps them across the field;
2. from the steps of the reading when a coil current switches, with the gyro removing the turn of
   the field between the two samples; no reference field (:mod:`recon.calibrate.steps`);
3. with windowed sampling, by synchronous detection: each sample with the coils on against the off
   sample after it (:mod:`recon.calibrate.synchronous`).

They are tested for consistency and combined by their covariances with a geometric prior
(:mod:`recon.calibrate.prior`, :mod:`recon.calibrate.fusion`); the directions of K the data do not
determine are held at the prior and their uncertainty, at the currents that flowed, is carried into
the calibrated field's noise. The attitude-independent fit is then repeated with K held at that value
for the bias and soft iron. A parameter the data cannot determine is reported as undetermined, with
the reason, instead of a number.

:func:`calibrate_arrays` runs these as named steps (:mod:`recon.calibrate.estimates`) and decides what
to apply, with the anomalies (:mod:`recon.calibrate.findings`). :func:`calibrate_pass` first forms its
arrays from the mission and the cleaned logs (:mod:`recon.calibrate.inputs`).

References
----------
Alonso, R. and Shuster, M. D. (2002). TWOSTEP: a fast robust algorithm for attitude-independent
magnetometer-bias determination. J. Astronaut. Sci. 50(4), 433-452.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from ..core import NT_PER_UNIT, Anomaly
from .agreement import CrosstalkAgreement
from .crosstalk import estimate_crosstalk, field_noise, undetermined_parameters
from .estimates import (
    MagnitudeFit,
    gyro_rates,
    magnitude_fit,
    reported,
)
from .findings import crosstalk_estimates_disagree, crosstalk_significant, mag_bias_large
from .fusion import CrosstalkFusion
from .inputs import (
    CalibrationInputs,
    DEFAULT_NOISE_nT,
    coil_currents,
    gyro_rate_body,
    prepare_inputs,
    reference_magnitude,
)
from .model import ParamIndex, matrices_from_params
from .summary import summary_block

__all__ = ["Calibration", "calibrate_pass", "calibrate_arrays"]

_NAN33 = np.full((3, 3), np.nan)


@dataclass(frozen=True)
class Calibration:
    """The calibration of one pass (sensor axes unless said otherwise).

    Attributes
    ----------
    time_utc : (N,) datetime64[ns], UTC
        Magnetometer sample times (all cleaned samples).
    bias_nT, bias_nT_sigma : (3,) arrays, nT; NaN where undetermined
    soft_iron, soft_iron_sigma : (3, 3) arrays; NaN where undetermined
    crosstalk_nT_per_A, crosstalk_nT_per_A_sigma : (3, 3) arrays, nT per A (row: sensor axis,
        column: coil)
        The crosstalk removed from the calibrated field, with its 1-sigma (the prior's in the
        directions the data do not determine); NaN without coils.
    crosstalk_magnitude_nT_per_A, crosstalk_magnitude_nT_per_A_sigma : (3, 3) arrays
        The attitude-independent fit's estimate; NaN where it is undetermined.
    crosstalk_step_nT_per_A, crosstalk_step_nT_per_A_sigma : (3, 3) arrays or None
        The step-response estimate (None when no gyro or no coils).
    crosstalk_synchronous_nT_per_A, crosstalk_synchronous_nT_per_A_sigma : (3, 3) arrays or None
        The synchronous-detection estimate (None unless windowed sampling with a gyro and known ticks).
    crosstalk_combined_nT_per_A, crosstalk_combined_nT_per_A_sigma : (3, 3) arrays
        The estimates and the prior combined by their covariances, the undetermined directions held at
        the prior (:func:`recon.calibrate.fusion.fuse_crosstalk`). This is what is removed, except with
        ``mag_sampling = "coils_off"`` when no crosstalk is significant (then nothing is).
    crosstalk : CrosstalkFusion or None
        The whole combination: covariance, directions, prior, consistency (None without coils).
    agreement : CrosstalkAgreement
        The consistency of the crosstalk estimates (see :func:`recon.calibrate.fusion.consistency`).
    residual_rms_nT : dict
        ``{"before": ..., "after": ...}``: RMS of ``|b| - |b_ref|`` raw and calibrated.
    undetermined : dict
        Parameter name (``bias_x``, ``soft_iron_xy``, ``crosstalk_x_coil_y``, ...) -> reason.
    anomalies : list of Anomaly
    b_body_calibrated_nT : (N, 3) array, nT, body frame
        Calibrated field for the estimator; NaN where it cannot be formed (saturated sample, unknown
        current on a coil with crosstalk).
    b_body_crosstalk_cov_nT2 : (N, 3, 3) array, nT^2, body frame, or None
        Covariance of the crosstalk left in each calibrated sample (the uncertainty of K at the currents
        that sample saw; a coil of unknown current counts at its maximum). None without coils.
    b_body_sigma_nT : (N, 3) array, nT, body frame
        Per-sample 1-sigma of the calibrated field per axis: the sensor noise and that crosstalk term.
    bias_applied_nT, soft_iron_applied, crosstalk_applied_nT_per_A : arrays
        The values used to form ``b_body_calibrated_nT`` (nominal values stand in for undetermined ones).
    covariance : (18, 18) array
        Of (bias, soft-iron xx yy zz xy xz yz, K row-major) from the fit with K held; the K block is the
        crosstalk's covariance; NaN rows for undetermined entries.
    mag_sampling : str or None
    max_current_A : (3,) array or None
    noise_nT : float
        The calibrated field's noise, 1 sigma per axis, RMS over the samples: the sensor's noise and the
        crosstalk uncertainty at the currents that flowed.
    sensor_noise_nT : float
        The magnetometer's own noise used (1 sigma per axis).
    n_used : int
        Samples in the attitude-independent fit.
    notes : tuple of str
        What was assumed or skipped, and why.
    """

    time_utc: np.ndarray
    bias_nT: np.ndarray
    bias_nT_sigma: np.ndarray
    soft_iron: np.ndarray
    soft_iron_sigma: np.ndarray
    crosstalk_nT_per_A: np.ndarray
    crosstalk_nT_per_A_sigma: np.ndarray
    crosstalk_magnitude_nT_per_A: np.ndarray
    crosstalk_magnitude_nT_per_A_sigma: np.ndarray
    crosstalk_step_nT_per_A: np.ndarray | None
    crosstalk_step_nT_per_A_sigma: np.ndarray | None
    crosstalk_synchronous_nT_per_A: np.ndarray | None
    crosstalk_synchronous_nT_per_A_sigma: np.ndarray | None
    crosstalk_combined_nT_per_A: np.ndarray
    crosstalk_combined_nT_per_A_sigma: np.ndarray
    crosstalk: CrosstalkFusion | None
    agreement: CrosstalkAgreement
    residual_rms_nT: dict[str, float | None]
    undetermined: dict[str, str]
    anomalies: list[Anomaly]
    b_body_calibrated_nT: np.ndarray = field(repr=False)
    b_body_crosstalk_cov_nT2: np.ndarray | None = field(repr=False, default=None)
    b_body_sigma_nT: np.ndarray = field(repr=False, default=None)
    bias_applied_nT: np.ndarray = field(repr=False, default=None)
    soft_iron_applied: np.ndarray = field(repr=False, default=None)
    crosstalk_applied_nT_per_A: np.ndarray = field(repr=False, default=None)
    covariance: np.ndarray = field(repr=False, default=None)
    mag_sampling: str | None = None
    max_current_A: np.ndarray | None = None
    noise_nT: float = DEFAULT_NOISE_nT
    sensor_noise_nT: float = DEFAULT_NOISE_nT
    n_used: int = 0
    notes: tuple[str, ...] = ()

    def to_summary(self) -> dict[str, Any]:
        """The ``calibration`` block of summary.json (undetermined values are None)."""
        return summary_block(self)


def calibrate_arrays(time_utc: np.ndarray, m_sensor_nT: np.ndarray, h_nT: np.ndarray,
                     i_fit_A: np.ndarray | None, *, sensor_to_body: np.ndarray | None = None,
                     max_current_A: np.ndarray | None = None, noise_nT: float | None = None,
                     mag_sampling: str | None = "coils_on", i_apply_A: np.ndarray | None = None,
                     gyro_time_utc: np.ndarray | None = None, w_gyro_body_rad_s: np.ndarray | None = None,
                     exclude: np.ndarray | None = None, controller_read: np.ndarray | None = None,
                     coils_off: np.ndarray | None = None, tick_time_utc: np.ndarray | None = None,
                     dipole_per_amp: np.ndarray | None = None,
                     prior_sigma_nT_per_A: np.ndarray | None = None) -> Calibration:
    """Calibrate from arrays (the core of :func:`calibrate_pass`, usable without files).

    Parameters
    ----------
    time_utc : (N,) datetime64[ns], UTC
        Magnetometer sample times, increasing.
    m_sensor_nT : (N, 3) array, nT, magnetometer sensor axes
    h_nT : (N,) array, nT
        Reference field magnitude at ``time_utc`` (NaN: no reference; the attitude-independent fit
        is then skipped).
    i_fit_A : (N, 3) array, A, or None
        Currents to fit K against: the currents each sample saw, or for ``mag_sampling = "coils_off"``
        the held logged currents (a test of the duty cycle). None: no coils.
    sensor_to_body : (3, 3) array
        ``M``, v_body = M v_sensor (default identity).
    max_current_A : (3,) array, A
    noise_nT : float
        Magnetometer noise, 1 sigma per axis (default 50 nT).
    mag_sampling : str or None
        "coils_on", "coils_off", "windowed", or None without coils.
    i_apply_A : (N, 3) array, A, optional
        The currents to remove with K when forming the calibrated field (default ``i_fit_A``).
    gyro_time_utc : (G,) datetime64[ns], optional; w_gyro_body_rad_s : (G, 3) rad/s, body frame
        For the step-response and synchronous estimates.
    exclude : (N,) bool array, optional
        Samples to leave out (saturated, flagged); their calibrated field is NaN.
    controller_read : (N,) bool array, optional
        Samples the onboard controller read for its commands; the step-response estimate bridges
        them (their noise drives the next current step).
    coils_off : (N,) bool array, optional
        Samples inside a coil-off window (windowed sampling): with ``tick_time_utc`` they allow the
        synchronous estimate.
    tick_time_utc : (K,) datetime64[ns], optional
        The control ticks over the pass.
    dipole_per_amp : (3, 3) array, A m^2 per A, optional
        The nominal coil dipoles, for the prior on K (default 1.6 A m^2/A per coil).
    prior_sigma_nT_per_A : (3,) array, nT per A, optional
        The prior 1-sigma per element of each coil's column, instead of the geometric one.

    Returns
    -------
    Calibration
    """
    inputs = prepare_inputs(time_utc, m_sensor_nT, h_nT, i_fit_A, sensor_to_body, max_current_A, noise_nT,
                            i_apply_A, exclude, coils_off, tick_time_utc)
    gyro, gyro_notes = gyro_rates(inputs, gyro_time_utc, w_gyro_body_rad_s)
    free = magnitude_fit(inputs)
    est = estimate_crosstalk(inputs, gyro, controller_read, free, dipole_per_amp, prior_sigma_nT_per_A)
    fusion = est.fusion
    fit = magnitude_fit(inputs, fusion) if fusion is not None and free.fitted else free
    (bias, soft, _), (bias_s, soft_s, _) = reported(fit)
    k_mag, k_mag_s = (reported(free)[j][2] for j in range(2))
    applied, anomalies = _what_to_apply(inputs, fit, fusion, mag_sampling)
    if fit.fitted:
        anomalies += mag_bias_large(bias, bias_s, inputs.h_nT[fit.rows], inputs.span)
    b_body = _calibrated_body_field(inputs, *applied)
    noise = field_noise(inputs, fusion, applied[1], b_body)
    covariance = fit.covariance.copy()
    if fusion is not None:
        covariance[ParamIndex.CROSSTALK, ParamIndex.CROSSTALK] = fusion.covariance
    return Calibration(
        time_utc=inputs.time_utc, bias_nT=bias, bias_nT_sigma=bias_s, soft_iron=soft, soft_iron_sigma=soft_s,
        crosstalk_nT_per_A=_NAN33 if fusion is None else applied[2],
        crosstalk_nT_per_A_sigma=_NAN33 if fusion is None else fusion.sigma_nT_per_A,
        crosstalk_magnitude_nT_per_A=k_mag, crosstalk_magnitude_nT_per_A_sigma=k_mag_s,
        crosstalk_step_nT_per_A=None if est.step is None else est.step.crosstalk_nT_per_A,
        crosstalk_step_nT_per_A_sigma=None if est.step is None else est.step.sigma_nT_per_A,
        crosstalk_synchronous_nT_per_A=None if est.synchronous is None else est.synchronous.crosstalk_nT_per_A,
        crosstalk_synchronous_nT_per_A_sigma=None if est.synchronous is None else est.synchronous.sigma_nT_per_A,
        crosstalk_combined_nT_per_A=_NAN33 if fusion is None else fusion.crosstalk_nT_per_A,
        crosstalk_combined_nT_per_A_sigma=_NAN33 if fusion is None else fusion.sigma_nT_per_A,
        crosstalk=fusion, agreement=est.agreement, residual_rms_nT=fit.residual_rms_nT,
        undetermined=undetermined_parameters(fit, free, est), anomalies=anomalies,
        b_body_calibrated_nT=b_body, b_body_crosstalk_cov_nT2=noise.crosstalk_cov_nT2,
        b_body_sigma_nT=noise.sigma_nT,
        bias_applied_nT=applied[0], soft_iron_applied=applied[1], crosstalk_applied_nT_per_A=applied[2],
        covariance=covariance, mag_sampling=mag_sampling if inputs.coils else None,
        max_current_A=inputs.max_current_A, noise_nT=noise.rms_nT, sensor_noise_nT=inputs.noise_nT,
        n_used=int(fit.rows.sum()) if fit.fitted else 0,
        notes=inputs.notes + gyro_notes + free.notes + est.notes,
    )


def _what_to_apply(inputs: CalibrationInputs, fit: MagnitudeFit, fusion: CrosstalkFusion | None,
                   mag_sampling) -> tuple[tuple[np.ndarray, np.ndarray, np.ndarray], list[Anomaly]]:
    """The (bias, soft iron, crosstalk) removed from the readings (nominal values stand in for
    undetermined ones; no crosstalk for coils_off when none is seen), and the anomalies of the
    crosstalk: crosstalk_estimates_disagree, crosstalk_significant."""
    anomalies: list[Anomaly] = []
    b_apply, s_apply, _ = matrices_from_params(fit.params)
    if fusion is None:
        return (b_apply, s_apply, np.zeros((3, 3))), anomalies
    if fusion.agreement.agree is False:
        anomalies.append(crosstalk_estimates_disagree(fusion.agreement, fusion.scale_factor, fusion.left_out,
                                                      inputs.span))
    k_apply = fusion.crosstalk_nT_per_A.copy()
    significant = crosstalk_significant(k_apply, fusion.sigma_nT_per_A, inputs.max_current_A, inputs.noise_nT,
                                        mag_sampling, inputs.span)
    anomalies += significant
    if not significant and mag_sampling == "coils_off":
        k_apply = np.zeros((3, 3))  # coils_off and nothing seen: the duty cycle works, apply no crosstalk
    return (b_apply, s_apply, k_apply), anomalies


def _calibrated_body_field(inputs: CalibrationInputs, bias, soft, k) -> np.ndarray:
    """M S^-1 (m - bias - K i), body frame, nT; NaN for the excluded samples."""
    b_sensor = _apply(inputs.m_sensor_nT, bias, soft, k, inputs.i_apply_A)
    b_sensor[inputs.exclude] = np.nan
    return b_sensor @ inputs.sensor_to_body.T


def _apply(m, bias, soft, k, i) -> np.ndarray:
    """S^-1 (m - bias - K i), sensor axes; a NaN current matters only on a coil with crosstalk."""
    if i is None:
        y = m - bias
    else:
        used = np.any(k != 0, axis=0)
        ii = np.where(used[None, :], i, np.nan_to_num(i))
        y = m - bias - ii @ k.T
    return np.linalg.solve(soft, y.T).T


# ------------------------------------------------------------------------------------------ pass level
def calibrate_pass(mission, cleaned, reference) -> Calibration:
    """Calibrate the magnetometer of one pass.

    Parameters
    ----------
    mission : recon.config.Mission
    cleaned : recon.clean.CleanedPass
        Uses ``magnetometer`` (``time_utc``, ``values`` in nT body frame, ``saturated``), ``gyro``
        (``time_utc``, ``values`` rad/s body frame) and ``coils`` (``time_utc``, ``values`` A).
    reference : recon.field.ReferenceField or None
        The model field; None skips the attitude-independent fit (the gyro-based estimates remain).

    Returns
    -------
    Calibration
    """
    mag = cleaned.magnetometer
    t = np.asarray(mag.time_utc, dtype="datetime64[ns]")
    mm = np.asarray(mission.magnetometer.sensor_to_body, dtype=float)
    m_sensor = np.asarray(mag.values, dtype=float) @ mm  # v_sensor = M^T v_body, row form
    noise = mission.magnetometer.noise
    noise_nT = None if noise is None else float(noise) * NT_PER_UNIT[mission.magnetometer.unit]
    sat = getattr(mag, "saturated", None)
    exclude = np.zeros(len(t), bool) if sat is None else np.asarray(sat, bool).reshape(len(t), -1).any(axis=1)
    coils_log = getattr(cleaned, "coils", None)
    currents = coil_currents(mission, coils_log, t)
    h = reference_magnitude(reference, t)
    gyro = getattr(cleaned, "gyro", None)
    cal = calibrate_arrays(
        t, m_sensor, h, currents.i_fit_A, sensor_to_body=mm, max_current_A=currents.max_current_A,
        noise_nT=noise_nT, mag_sampling=currents.mag_sampling, i_apply_A=currents.i_apply_A,
        gyro_time_utc=None if gyro is None else gyro.time_utc, w_gyro_body_rad_s=gyro_rate_body(gyro),
        exclude=exclude, controller_read=currents.controller_read, coils_off=currents.coils_off,
        tick_time_utc=currents.tick_time_utc,
        dipole_per_amp=None if mission.coils is None else mission.coils.dipole_per_amp)
    extra = []
    if mission.coils is None or coils_log is None:
        extra.append("no coil log: crosstalk not estimated")
    if reference is None:
        extra.append("no reference field (no [orbit]): attitude-independent calibration skipped")
    if extra:
        cal = replace(cal, notes=cal.notes + tuple(extra))
    return cal
