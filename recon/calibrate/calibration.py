"""Magnetometer calibration and coil crosstalk for one pass.

Model, in the magnetometer's own axes (as logged)::

    b_meas_sensor = S @ b_true_sensor + bias + K @ i + noise,     b_true_sensor = M^T @ b_body

``M`` = ``[magnetometer] sensor_to_body``; ``S`` symmetric (soft iron, scale and skew); ``bias`` in
nT; ``K`` in nT per A, one column per coil; ``i`` the effective current each sample saw
(:func:`effective_current`). The calibrated body field is ``M @ S^-1 (b_meas - bias - K i)``.

Two independent estimates of ``K``:

1. attitude-independent: ``|S^-1 (b_meas - bias - K i)| = |b_ref|`` with the reference field's
   magnitude, a centred linear first guess extended from TWOSTEP (:mod:`recon.calibrate.linear`) refined by
   robust nonlinear least squares (:mod:`recon.calibrate.magfit`);
2. from the steps of the reading when a coil current switches, with the gyro removing the turn of
   the field between the two samples; no reference field (:mod:`recon.calibrate.steps`).

Their difference is tested against the combined covariance (chi-square). A parameter the data cannot
determine is reported as undetermined, with the reason, instead of a number.

:func:`calibrate_arrays` runs these as named steps: the step estimate; the magnitude fit, with the
step values held where the magnitude is blind; the comparison and combination of the two
(:func:`recon.calibrate.agreement.reconcile_crosstalk`); and what to apply, with the anomalies
(:mod:`recon.calibrate.findings`). :func:`calibrate_pass` first forms its arrays from the mission and
the cleaned logs (:mod:`recon.calibrate.inputs`).

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
from .agreement import CombinedCrosstalk, CrosstalkAgreement, reconcile_crosstalk
from .findings import crosstalk_estimates_disagree, crosstalk_significant, mag_bias_large
from .inputs import (
    CalibrationInputs,
    DEFAULT_NOISE_nT,
    coil_currents,
    gyro_rate_body,
    prepare_inputs,
    reference_magnitude,
    seconds_since,
)
from .magfit import fit_magnetometer
from .model import N_PARAMS, PARAM_NAMES, ParamIndex, matrices_from_params, nominal_params
from .steps import StepFit, fit_crosstalk_steps
from .summary import summary_block

__all__ = ["Calibration", "calibrate_pass", "calibrate_arrays", "MIN_SAMPLES"]

# Fewer usable samples than this and no calibration is attempted (18 unknowns; common practice).
MIN_SAMPLES = 100


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
        column: coil); NaN where undetermined
    crosstalk_step_nT_per_A, crosstalk_step_nT_per_A_sigma : (3, 3) arrays or None
        The step-response estimate (None when no gyro or no coils).
    crosstalk_combined_nT_per_A, crosstalk_combined_nT_per_A_sigma : (3, 3) arrays
        The two combined by their covariances (:func:`combine_crosstalk`) when they agree; when they
        disagree, the magnitude estimate, with the step estimate only where the magnitude says
        nothing. This is the crosstalk removed from the calibrated field.
    agreement : CrosstalkAgreement
        Comparison of the two crosstalk estimates (see :func:`compare_crosstalk`).
    residual_rms_nT : dict
        ``{"before": ..., "after": ...}``: RMS of ``|b| - |b_ref|`` raw and calibrated.
    undetermined : dict
        Parameter name (``bias_x``, ``soft_iron_xy``, ``crosstalk_x_coil_y``, ...) -> reason.
    anomalies : list of Anomaly
    b_body_calibrated_nT : (N, 3) array, nT, body frame
        Calibrated field for the estimator; NaN where it cannot be formed (saturated sample, unknown
        current on a coil with crosstalk).
    bias_applied_nT, soft_iron_applied, crosstalk_applied_nT_per_A : arrays
        The values used to form ``b_body_calibrated_nT`` (nominal values stand in for undetermined ones).
    covariance : (18, 18) array
        Of (bias, soft-iron xx yy zz xy xz yz, K row-major), NaN rows for undetermined entries.
    mag_sampling : str or None
    max_current_A : (3,) array or None
    noise_nT : float
        Magnetometer noise used (1 sigma per axis).
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
    crosstalk_step_nT_per_A: np.ndarray | None
    crosstalk_step_nT_per_A_sigma: np.ndarray | None
    crosstalk_combined_nT_per_A: np.ndarray
    crosstalk_combined_nT_per_A_sigma: np.ndarray
    agreement: CrosstalkAgreement
    residual_rms_nT: dict[str, float | None]
    undetermined: dict[str, str]
    anomalies: list[Anomaly]
    b_body_calibrated_nT: np.ndarray = field(repr=False)
    bias_applied_nT: np.ndarray = field(repr=False, default=None)
    soft_iron_applied: np.ndarray = field(repr=False, default=None)
    crosstalk_applied_nT_per_A: np.ndarray = field(repr=False, default=None)
    covariance: np.ndarray = field(repr=False, default=None)
    mag_sampling: str | None = None
    max_current_A: np.ndarray | None = None
    noise_nT: float = DEFAULT_NOISE_nT
    n_used: int = 0
    notes: tuple[str, ...] = ()

    def to_summary(self) -> dict[str, Any]:
        """The ``calibration`` block of summary.json (undetermined values are None)."""
        return summary_block(self)


@dataclass(frozen=True)
class _MagnitudeFit:
    """The attitude-independent fit as the calibration uses it: ``params`` (18,) with nominal values
    (or the step estimate's crosstalk) where the fit says nothing, its ``covariance`` (18, 18),
    ``undetermined`` (name -> reason), the usable ``rows`` (N,) bool, whether the fit ran, the
    ``residual_rms_nT`` before and after, and ``notes``."""

    params: np.ndarray
    covariance: np.ndarray
    undetermined: dict[str, str]
    rows: np.ndarray
    fitted: bool
    residual_rms_nT: dict[str, float | None]
    notes: tuple[str, ...]


def calibrate_arrays(time_utc: np.ndarray, m_sensor_nT: np.ndarray, h_nT: np.ndarray,
                     i_fit_A: np.ndarray | None, *, sensor_to_body: np.ndarray | None = None,
                     max_current_A: np.ndarray | None = None, noise_nT: float | None = None,
                     mag_sampling: str | None = "coils_on", i_apply_A: np.ndarray | None = None,
                     gyro_time_utc: np.ndarray | None = None, w_gyro_body_rad_s: np.ndarray | None = None,
                     exclude: np.ndarray | None = None, controller_read: np.ndarray | None = None) -> Calibration:
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
        Currents to fit K against: the effective currents, or for ``mag_sampling = "coils_off"`` the
        held logged currents (a test of the duty cycle). None: no coils.
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
        For the step-response estimate.
    exclude : (N,) bool array, optional
        Samples to leave out (saturated, flagged); their calibrated field is NaN.
    controller_read : (N,) bool array, optional
        Samples the onboard controller read for its commands; the step-response estimate bridges
        them (their noise drives the next current step).

    Returns
    -------
    Calibration
    """
    inputs = prepare_inputs(time_utc, m_sensor_nT, h_nT, i_fit_A, sensor_to_body, max_current_A, noise_nT,
                            i_apply_A, exclude)
    step, step_notes = _step_estimate(inputs, gyro_time_utc, w_gyro_body_rad_s, controller_read)
    fit = _magnitude_fit(inputs, step)
    (bias, soft, k_fit), (bias_s, soft_s, k_fit_s) = _reported(fit)
    k_step, c_step = ((step.crosstalk_nT_per_A, step.covariance) if step is not None
                      else (np.full((3, 3), np.nan), np.full((9, 9), np.nan)))
    combined = reconcile_crosstalk(k_fit, fit.covariance[ParamIndex.CROSSTALK, ParamIndex.CROSSTALK], k_step, c_step)
    applied, anomalies = _what_to_apply(inputs, fit, combined, mag_sampling)
    if fit.fitted:
        anomalies += mag_bias_large(bias, bias_s, inputs.h_nT[fit.rows], inputs.span)
    return Calibration(
        time_utc=inputs.time_utc, bias_nT=bias, bias_nT_sigma=bias_s, soft_iron=soft, soft_iron_sigma=soft_s,
        crosstalk_nT_per_A=k_fit, crosstalk_nT_per_A_sigma=k_fit_s,
        crosstalk_step_nT_per_A=None if step is None else step.crosstalk_nT_per_A,
        crosstalk_step_nT_per_A_sigma=None if step is None else step.sigma_nT_per_A,
        crosstalk_combined_nT_per_A=combined.crosstalk_nT_per_A,
        crosstalk_combined_nT_per_A_sigma=combined.sigma_nT_per_A,
        agreement=combined.agreement, residual_rms_nT=fit.residual_rms_nT,
        undetermined=fit.undetermined, anomalies=anomalies,
        b_body_calibrated_nT=_calibrated_body_field(inputs, *applied),
        bias_applied_nT=applied[0], soft_iron_applied=applied[1], crosstalk_applied_nT_per_A=applied[2],
        covariance=fit.covariance, mag_sampling=mag_sampling if inputs.coils else None,
        max_current_A=inputs.max_current_A, noise_nT=inputs.noise_nT,
        n_used=int(fit.rows.sum()) if fit.fitted else 0,
        notes=inputs.notes + step_notes + fit.notes + (() if step is None else tuple(
            f"step estimate: {why}" for why in sorted(set(step.undetermined.values())))),
    )


def _step_estimate(inputs: CalibrationInputs, gyro_time_utc, w_gyro_body_rad_s,
                   controller_read) -> tuple[StepFit | None, tuple[str, ...]]:
    """The step-response estimate of the crosstalk (no reference field), or None without coils or
    gyro (with a note saying so)."""
    if not inputs.coils:
        return None, ()
    if gyro_time_utc is None or w_gyro_body_rad_s is None or len(gyro_time_utc) < 2:
        return None, ("no gyro: the step-response crosstalk estimate needs the body rate; skipped",)
    m_step = np.where((~inputs.exclude)[:, None], inputs.m_sensor_nT, np.nan)
    w_sensor = np.asarray(w_gyro_body_rad_s, dtype=float) @ inputs.sensor_to_body  # M^T w_body, row form
    step = fit_crosstalk_steps(inputs.t_s, m_step, inputs.i_fit_A, seconds_since(gyro_time_utc, inputs.t0_ns),
                               w_sensor, inputs.max_current_A, skip=controller_read)
    return step, ()


def _magnitude_fit(inputs: CalibrationInputs, step: StepFit | None) -> _MagnitudeFit:
    """The attitude-independent fit over the usable samples, with the step values held where the
    magnitude is blind; skipped (nominal values) with too few samples."""
    m, h, i_fit = inputs.m_sensor_nT, inputs.h_nT, inputs.i_fit_A
    rows = ~inputs.exclude & np.all(np.isfinite(m), axis=1) & np.isfinite(h)
    if inputs.coils:
        rows &= np.all(np.isfinite(i_fit), axis=1)
    if rows.sum() < MIN_SAMPLES:
        return _skipped_fit(h, rows, step)
    args = (m[rows], h[rows], i_fit[rows] if inputs.coils else None)
    kw = {"t_s": inputs.t_s[rows], "max_current_A": inputs.max_current_A, "noise_nT": inputs.noise_nT}
    fit = fit_magnetometer(*args, **kw)
    undetermined = dict(fit.undetermined)
    if step is not None:
        # crosstalk the magnitude cannot see but the steps can: hold it at the step value and refit
        # (fixing some may leave others unseen: repeat while that happens)
        k_step = step.crosstalk_nT_per_A.ravel()
        take: dict[str, float] = {}
        for _ in range(3):
            more = {PARAM_NAMES[ParamIndex.CROSSTALK_START + q]: float(k_step[q]) for q in range(9)
                    if PARAM_NAMES[ParamIndex.CROSSTALK_START + q] in fit.undetermined and np.isfinite(k_step[q])}
            if not more:
                break
            take.update(more)
            fit = fit_magnetometer(*args, **kw, fixed=take)
            undetermined.update(fit.undetermined)
        for name in take:
            undetermined[name] += "; the step-response value is applied instead"
    return _MagnitudeFit(fit.params, fit.covariance, undetermined, rows, True,
                         {"before": fit.residual_rms_before_nT, "after": fit.residual_rms_after_nT}, ())


def _skipped_fit(h: np.ndarray, rows: np.ndarray, step: StepFit | None) -> _MagnitudeFit:
    """No attitude-independent fit: every parameter undetermined, nominal values (the crosstalk of
    the steps when there is one: it is still worth removing)."""
    why = (f"{int(np.isfinite(h).sum())} samples with a reference field magnitude "
           f"(at least {MIN_SAMPLES} needed)" if np.isfinite(h).sum() < MIN_SAMPLES
           else f"{int(rows.sum())} usable samples (at least {MIN_SAMPLES} needed)")
    params = nominal_params()
    if step is not None:
        params[ParamIndex.CROSSTALK] = np.nan_to_num(step.crosstalk_nT_per_A.ravel())
    return _MagnitudeFit(params, np.full((N_PARAMS, N_PARAMS), np.nan), {name: why for name in PARAM_NAMES}, rows,
                         False, {"before": None, "after": None}, (f"attitude-independent calibration skipped: {why}",))


def _reported(fit: _MagnitudeFit):
    """((bias, soft iron, crosstalk), (their 1-sigma)) as reported: NaN where undetermined."""
    est = fit.params.copy()
    for k, name in enumerate(PARAM_NAMES):
        if name in fit.undetermined:
            est[k] = np.nan
    return matrices_from_params(est), matrices_from_params(np.sqrt(np.diag(fit.covariance)))


def _what_to_apply(inputs: CalibrationInputs, fit: _MagnitudeFit, combined: CombinedCrosstalk,
                   mag_sampling) -> tuple[tuple[np.ndarray, np.ndarray, np.ndarray], list[Anomaly]]:
    """The (bias, soft iron, crosstalk) removed from the readings (nominal values stand in for
    undetermined ones; no crosstalk for coils_off when none is seen), and the anomalies of the
    crosstalk: crosstalk_estimates_disagree, crosstalk_significant."""
    anomalies: list[Anomaly] = []
    if combined.agreement.agree is False:
        anomalies.append(crosstalk_estimates_disagree(combined.agreement, inputs.span))
    b_apply, s_apply, k_apply = matrices_from_params(fit.params)
    if inputs.coils:
        k_comb = combined.crosstalk_nT_per_A
        k_apply = np.where(np.isfinite(k_comb), k_comb, k_apply)
        significant = crosstalk_significant(k_comb, combined.sigma_nT_per_A, inputs.max_current_A, inputs.noise_nT,
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
        The model field; None skips the attitude-independent fit (only the step estimate remains).

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
        exclude=exclude, controller_read=currents.controller_read)
    extra = []
    if mission.coils is None or coils_log is None:
        extra.append("no coil log: crosstalk not estimated")
    if reference is None:
        extra.append("no reference field (no [orbit]): attitude-independent calibration skipped")
    if extra:
        cal = replace(cal, notes=cal.notes + tuple(extra))
    return cal
