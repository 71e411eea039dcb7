"""The estimates one calibration forms from its inputs: the crosstalk from the current steps and from
synchronous detection (both with the gyro, no reference field), and the attitude-independent fit,
first with the crosstalk free, then with it held at the value the calibration applies."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .fusion import CrosstalkFusion
from .inputs import CalibrationInputs, seconds_since
from .magfit import fit_magnetometer
from .model import N_PARAMS, PARAM_NAMES, ParamIndex, matrices_from_params, nominal_params
from .steps import StepFit, fit_crosstalk_steps
from .synchronous import SETTLE_s, STAMP_TOLERANCE_s, SynchronousFit, fit_crosstalk_synchronous

__all__ = ["MIN_SAMPLES", "GyroRates", "gyro_rates", "step_estimate", "synchronous_estimate", "MagnitudeFit",
           "magnitude_fit", "reported"]

# Fewer usable samples than this and no attitude-independent fit is attempted (18 unknowns; common
# practice, no source).
MIN_SAMPLES = 100


@dataclass(frozen=True)
class GyroRates:
    """The gyro's rate in the magnetometer's sensor axes: ``t_s`` (G,) s since the inputs' origin and
    ``w_sensor_rad_s`` (G, 3) rad/s (``M^T w_body``; NaN where the gyro clipped)."""

    t_s: np.ndarray
    w_sensor_rad_s: np.ndarray


def gyro_rates(inputs: CalibrationInputs, gyro_time_utc, w_gyro_body_rad_s) -> tuple[GyroRates | None, tuple[str, ...]]:
    """The gyro's rates for the gyro-based estimates, or None (with a note) without coils or gyro."""
    if not inputs.coils:
        return None, ()
    if gyro_time_utc is None or w_gyro_body_rad_s is None or len(gyro_time_utc) < 2:
        return None, ("no gyro: the step-response and synchronous crosstalk estimates need the body rate; "
                      "skipped",)
    w_sensor = np.asarray(w_gyro_body_rad_s, dtype=float) @ inputs.sensor_to_body  # M^T w_body, row form
    return GyroRates(seconds_since(gyro_time_utc, inputs.t0_ns), w_sensor), ()


def step_estimate(inputs: CalibrationInputs, gyro: GyroRates | None, controller_read) -> StepFit | None:
    """The step-response estimate of the crosstalk, or None without coils or gyro. Besides the
    samples the controller read, the pairs bridge those taken less than ``SETTLE_s`` after a tick,
    when the ticks are known (the drive may not yet carry the new command)."""
    if gyro is None:
        return None
    m_step = np.where((~inputs.exclude)[:, None], inputs.m_sensor_nT, np.nan)
    skip = np.zeros(len(inputs.t_s), bool) if controller_read is None else np.asarray(controller_read, bool).copy()
    if inputs.ticks_s is not None and len(inputs.ticks_s):
        k = np.searchsorted(inputs.ticks_s, inputs.t_s, side="right") - 1
        since = inputs.t_s - inputs.ticks_s[np.maximum(k, 0)]
        skip |= (k >= 0) & (since > 0) & (since < SETTLE_s - STAMP_TOLERANCE_s)
    return fit_crosstalk_steps(inputs.t_s, m_step, inputs.i_fit_A, gyro.t_s, gyro.w_sensor_rad_s,
                               inputs.max_current_A, skip=skip)


def synchronous_estimate(inputs: CalibrationInputs, gyro: GyroRates | None) -> SynchronousFit | None:
    """The synchronous-detection estimate, or None unless the sampling is windowed with known ticks
    and there is a gyro."""
    if gyro is None or inputs.coils_off is None or inputs.ticks_s is None:
        return None
    m = np.where((~inputs.exclude)[:, None], inputs.m_sensor_nT, np.nan)
    return fit_crosstalk_synchronous(inputs.t_s, m, inputs.i_fit_A, inputs.coils_off, inputs.ticks_s, gyro.t_s,
                                     gyro.w_sensor_rad_s)


@dataclass(frozen=True)
class MagnitudeFit:
    """The attitude-independent fit as the calibration uses it.

    Attributes
    ----------
    params : (18,) array
        Nominal values (or the held crosstalk) where the fit says nothing.
    covariance : (18, 18) array
    undetermined : dict
        Parameter name -> reason.
    rows : (N,) bool array
        The usable samples.
    fitted : bool
        Whether the fit ran.
    residual_rms_nT : dict
        ``{"before": ..., "after": ...}``, nT (None when the fit did not run).
    notes : tuple of str
    """

    params: np.ndarray
    covariance: np.ndarray
    undetermined: dict[str, str]
    rows: np.ndarray
    fitted: bool
    residual_rms_nT: dict[str, float | None]
    notes: tuple[str, ...]


def magnitude_fit(inputs: CalibrationInputs, crosstalk: CrosstalkFusion | None = None) -> MagnitudeFit:
    """The attitude-independent fit over the usable samples: with the crosstalk free, or held at
    ``crosstalk`` (its covariance carried into the others' as a consider term); skipped (nominal
    values) with too few samples."""
    m, h, i_fit = inputs.m_sensor_nT, inputs.h_nT, inputs.i_fit_A
    rows = ~inputs.exclude & np.all(np.isfinite(m), axis=1) & np.isfinite(h)
    if inputs.coils:
        rows &= np.all(np.isfinite(i_fit), axis=1)
    if rows.sum() < MIN_SAMPLES:
        return _skipped_fit(h, rows, crosstalk)
    fixed, fixed_cov = None, None
    if crosstalk is not None:
        k = crosstalk.crosstalk_nT_per_A.ravel()
        fixed = {PARAM_NAMES[ParamIndex.CROSSTALK_START + q]: float(k[q]) for q in range(9)}
        fixed_cov = np.zeros((N_PARAMS, N_PARAMS))
        fixed_cov[ParamIndex.CROSSTALK, ParamIndex.CROSSTALK] = crosstalk.covariance
    fit = fit_magnetometer(m[rows], h[rows], i_fit[rows] if inputs.coils else None, t_s=inputs.t_s[rows],
                           max_current_A=inputs.max_current_A, noise_nT=inputs.noise_nT, fixed=fixed,
                           fixed_covariance=fixed_cov)
    return MagnitudeFit(fit.params, fit.covariance, dict(fit.undetermined), rows, True,
                        {"before": fit.residual_rms_before_nT, "after": fit.residual_rms_after_nT}, ())


def _skipped_fit(h: np.ndarray, rows: np.ndarray, crosstalk: CrosstalkFusion | None) -> MagnitudeFit:
    """No attitude-independent fit: every parameter undetermined, nominal values (the held crosstalk
    when there is one: it is still worth removing)."""
    why = (f"{int(np.isfinite(h).sum())} samples with a reference field magnitude "
           f"(at least {MIN_SAMPLES} needed)" if np.isfinite(h).sum() < MIN_SAMPLES
           else f"{int(rows.sum())} usable samples (at least {MIN_SAMPLES} needed)")
    params = nominal_params()
    if crosstalk is not None:
        params[ParamIndex.CROSSTALK] = crosstalk.crosstalk_nT_per_A.ravel()
    return MagnitudeFit(params, np.full((N_PARAMS, N_PARAMS), np.nan), {name: why for name in PARAM_NAMES}, rows,
                        False, {"before": None, "after": None}, (f"attitude-independent calibration skipped: {why}",))


def reported(fit: MagnitudeFit):
    """((bias, soft iron, crosstalk), (their 1-sigma)) as reported: NaN where undetermined."""
    est = fit.params.copy()
    for k, name in enumerate(PARAM_NAMES):
        if name in fit.undetermined:
            est[k] = np.nan
    return matrices_from_params(est), matrices_from_params(np.sqrt(np.diag(fit.covariance)))
