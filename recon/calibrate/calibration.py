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

References
----------
Alonso, R. and Shuster, M. D. (2002). TWOSTEP: a fast robust algorithm for attitude-independent
magnetometer-bias determination. J. Astronaut. Sci. 50(4), 433-452.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..core import NS_PER_S, NT_PER_UNIT, Anomaly, controller_samples, effective_current
from .agreement import CrosstalkAgreement, combine_crosstalk, compare_crosstalk
from .magfit import MagFit, fit_magnetometer
from .model import AXES, PARAM_NAMES, matrices_from_params, nominal_params
from .steps import StepFit, fit_crosstalk_steps
from .summary import summary_block

__all__ = ["Calibration", "calibrate_pass", "calibrate_arrays"]

# Crosstalk is called significant when an element is beyond 3 sigma of zero AND its field at full
# current exceeds 5 x the magnetometer noise (common practice, no source).
SIGNIFICANCE_SIGMA = 3.0
CONTAMINATION_NOISE_FACTOR = 5.0
# Bias above this fraction of the mean field magnitude: a magnetised part near the sensor or a wrong
# offset in the mission file; a few per cent is usual for a calibrated sensor on a small satellite
# (common practice, no source). recon removes the bias from its calibrated field, but onboard software
# that uses raw readings does not: info above the first level, warning above the second (where the
# field direction an uncorrected onboard estimate sees is off by up to ~6 deg).
BIAS_FRACTION_LARGE = 0.05
BIAS_FRACTION_WARNING = 0.10
# Fewer usable samples than this and no calibration is attempted (18 unknowns; common practice).
MIN_SAMPLES = 100
# Default magnetometer noise when the mission file gives none: the middle of 10-100 nT rms for COTS
# magnetoresistive sensors (common practice, no source).
DEFAULT_NOISE_nT = 50.0


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


# ------------------------------------------------------------------------------------------ helpers
def _seconds(t, t0) -> np.ndarray:
    return (np.asarray(t, dtype="datetime64[ns]").astype(np.int64) - np.int64(t0)).astype(float) / NS_PER_S


def _reference_magnitude(reference, time_utc: np.ndarray) -> np.ndarray:
    """|b_ref| (nT) at ``time_utc`` from a ReferenceField-like object (``time_utc``, ``b_gcrf_nT``,
    optional ``valid``) or an (N, 3) array at ``time_utc``; NaN where the reference has no value."""
    if reference is None:
        return np.full(len(time_utc), np.nan)
    if isinstance(reference, np.ndarray):
        b = np.asarray(reference, dtype=float)
        return np.linalg.norm(b, axis=1)
    b = np.asarray(reference.b_gcrf_nT, dtype=float)
    h = np.linalg.norm(b, axis=1)
    valid = np.asarray(getattr(reference, "valid", np.ones(len(h), bool)), dtype=bool) & np.isfinite(h)
    h = np.where(valid, h, np.nan)
    t_ref = np.asarray(reference.time_utc, dtype="datetime64[ns]")
    t_q = np.asarray(time_utc, dtype="datetime64[ns]")
    if len(t_ref) == len(t_q) and np.array_equal(t_ref, t_q):
        return h
    t0 = t_q[0] if len(t_q) else np.datetime64(0, "ns")
    x_ref, x_q = _seconds(t_ref, t0.astype(np.int64)), _seconds(t_q, t0.astype(np.int64))
    ok = np.isfinite(h)
    if ok.sum() < 2:
        return np.full(len(t_q), np.nan)
    out = np.interp(x_q, x_ref[ok], h[ok], left=np.nan, right=np.nan)
    # no interpolation across a hole in the reference: a query must have valid neighbours both sides
    j = np.searchsorted(x_ref, x_q)
    jl, jr = np.clip(j - 1, 0, len(x_ref) - 1), np.clip(j, 0, len(x_ref) - 1)
    exact = x_ref[jr] == x_q
    out[~exact & ~(ok[jl] & ok[jr])] = np.nan
    return out


# ------------------------------------------------------------------------------------------ core
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
    t = np.asarray(time_utc, dtype="datetime64[ns]")
    n = len(t)
    m = np.asarray(m_sensor_nT, dtype=float).reshape(n, 3)
    h = np.asarray(h_nT, dtype=float).reshape(n)
    mm = np.eye(3) if sensor_to_body is None else np.asarray(sensor_to_body, dtype=float)
    noise = float(noise_nT) if noise_nT else DEFAULT_NOISE_nT
    notes: list[str] = []
    if noise_nT is None:
        notes.append(f"magnetometer noise not given; {noise:g} nT assumed (common practice, no source)")
    coils = i_fit_A is not None
    i_fit = np.asarray(i_fit_A, dtype=float).reshape(n, 3) if coils else None
    i_apply = (np.asarray(i_apply_A, dtype=float).reshape(n, 3) if i_apply_A is not None else i_fit)
    imax = None if max_current_A is None else np.asarray(max_current_A, dtype=float)
    if coils and imax is None:
        imax = np.nanmax(np.abs(i_fit), axis=0) if n else np.ones(3)
        imax = np.where(np.isfinite(imax) & (imax > 0), imax, 1.0)
        notes.append("max_current_A not given; the largest logged |current| stands in")
    bad = np.zeros(n, bool) if exclude is None else np.asarray(exclude, dtype=bool)
    t0 = t[0].astype(np.int64) if n else np.int64(0)
    t_s = _seconds(t, t0)

    # -------- the step-response estimate (no reference field)
    step: StepFit | None = None
    if coils and gyro_time_utc is not None and w_gyro_body_rad_s is not None and len(gyro_time_utc) >= 2:
        m_step = np.where((~bad)[:, None], m, np.nan)
        w_sensor = np.asarray(w_gyro_body_rad_s, dtype=float) @ mm  # M^T w_body, row form
        step = fit_crosstalk_steps(t_s, m_step, i_fit, _seconds(gyro_time_utc, t0), w_sensor, imax,
                                   skip=controller_read)
    elif coils:
        notes.append("no gyro: the step-response crosstalk estimate needs the body rate; skipped")

    # -------- the attitude-independent fit
    rows = ~bad & np.all(np.isfinite(m), axis=1) & np.isfinite(h)
    if coils:
        rows &= np.all(np.isfinite(i_fit), axis=1)
    fit: MagFit | None = None
    undetermined: dict[str, str] = {}
    if rows.sum() >= MIN_SAMPLES:
        args = (m[rows], h[rows], i_fit[rows] if coils else None)
        kw = {"t_s": t_s[rows], "max_current_A": imax, "noise_nT": noise}
        fit = fit_magnetometer(*args, **kw)
        undetermined.update(fit.undetermined)
        if step is not None:
            # crosstalk the magnitude cannot see but the steps can: hold it at the step value and refit
            # (fixing some may leave others unseen: repeat while that happens)
            k_step = step.crosstalk_nT_per_A.ravel()
            take: dict[str, float] = {}
            for _ in range(3):
                more = {PARAM_NAMES[9 + q]: float(k_step[q]) for q in range(9)
                        if PARAM_NAMES[9 + q] in fit.undetermined and np.isfinite(k_step[q])}
                if not more:
                    break
                take.update(more)
                fit = fit_magnetometer(*args, **kw, fixed=take)
                undetermined.update(fit.undetermined)
            for name in take:
                undetermined[name] += "; the step-response value is applied instead"
        params, cov = fit.params, fit.covariance
        before, after = fit.residual_rms_before_nT, fit.residual_rms_after_nT
    else:
        why = (f"{int(np.isfinite(h).sum())} samples with a reference field magnitude "
               f"(at least {MIN_SAMPLES} needed)" if np.isfinite(h).sum() < MIN_SAMPLES
               else f"{int(rows.sum())} usable samples (at least {MIN_SAMPLES} needed)")
        for name in PARAM_NAMES:
            undetermined[name] = why
        params, cov = nominal_params(), np.full((18, 18), np.nan)
        if step is not None:  # the crosstalk of the steps is still worth removing
            params[9:] = np.nan_to_num(step.crosstalk_nT_per_A.ravel())
        before = after = None
        notes.append(f"attitude-independent calibration skipped: {why}")

    est = params.copy()
    for k, name in enumerate(PARAM_NAMES):
        if name in undetermined:
            est[k] = np.nan
    sig = np.sqrt(np.diag(cov))
    bias, soft, k_fit = matrices_from_params(est)
    bias_s, soft_s, k_fit_s = matrices_from_params(sig)

    k_cov = cov[9:, 9:]
    k_step, c_step = ((step.crosstalk_nT_per_A, step.covariance) if step is not None
                      else (np.full((3, 3), np.nan), np.full((9, 9), np.nan)))
    agreement = compare_crosstalk(k_fit, k_cov, k_step, c_step)
    span = (t[0], t[-1]) if n else (None, None)
    anomalies: list[Anomaly] = []
    if agreement.agree is False:
        # two unbiased estimates of one quantity that differ: at least one model is wrong
        k_comb, c_comb = combine_crosstalk(k_fit, k_cov, np.full((3, 3), np.nan), np.full((9, 9), np.nan))
        take_step = ~np.isfinite(k_comb) & np.isfinite(k_step)
        k_comb[take_step] = k_step[take_step]
        c_comb[np.ix_(take_step.ravel(), take_step.ravel())] = c_step[np.ix_(take_step.ravel(),
                                                                            take_step.ravel())]
        anomalies.append(Anomaly(
            "crosstalk_estimates_disagree", "warning",
            f"the crosstalk from the field magnitude and from the current steps differ: chi-square "
            f"{agreement.chi2:.1f} for {agreement.dof} elements (p = {agreement.p_value:.2g}); "
            f"beyond 3 sigma: {', '.join(agreement.elements_beyond_3_sigma) or 'none singly'}; "
            f"a wrong coil-log time base or latency, a wrong mag_sampling, or a poor reference field can "
            f"cause it; the magnitude estimate is applied", span[0], span[1]))
    else:
        k_comb, c_comb = combine_crosstalk(k_fit, k_cov, k_step, c_step)
    k_comb_s = np.sqrt(np.abs(np.diag(c_comb))).reshape(3, 3)

    # -------- anomalies, and what to apply (nominal values stand in for undetermined ones)
    b_apply, s_apply, k_apply = matrices_from_params(params)
    if coils:
        known = np.isfinite(k_comb)
        k_apply = np.where(known, k_comb, k_apply)
        sig_anom, k_keep = _crosstalk_anomaly(k_comb, k_comb_s, imax, noise, mag_sampling, span)
        anomalies += sig_anom
        if not k_keep:
            k_apply = np.zeros((3, 3))
    if fit is not None:
        anomalies += _bias_anomaly(bias, bias_s, h[rows], span)
    b_sensor = _apply(m, b_apply, s_apply, k_apply, i_apply)
    b_sensor[bad] = np.nan
    b_body = b_sensor @ mm.T

    return Calibration(
        time_utc=t, bias_nT=bias, bias_nT_sigma=bias_s, soft_iron=soft, soft_iron_sigma=soft_s,
        crosstalk_nT_per_A=k_fit, crosstalk_nT_per_A_sigma=k_fit_s,
        crosstalk_step_nT_per_A=None if step is None else step.crosstalk_nT_per_A,
        crosstalk_step_nT_per_A_sigma=None if step is None else step.sigma_nT_per_A,
        crosstalk_combined_nT_per_A=k_comb, crosstalk_combined_nT_per_A_sigma=k_comb_s,
        agreement=agreement, residual_rms_nT={"before": before, "after": after},
        undetermined=undetermined, anomalies=anomalies, b_body_calibrated_nT=b_body,
        bias_applied_nT=b_apply, soft_iron_applied=s_apply, crosstalk_applied_nT_per_A=k_apply,
        covariance=cov, mag_sampling=mag_sampling if coils else None, max_current_A=imax,
        noise_nT=noise, n_used=int(rows.sum()) if fit is not None else 0,
        notes=tuple(notes) + (() if step is None else tuple(
            f"step estimate: {why}" for why in sorted(set(step.undetermined.values())))),
    )


def _apply(m, bias, soft, k, i) -> np.ndarray:
    """S^-1 (m - bias - K i), sensor axes; a NaN current matters only on a coil with crosstalk."""
    if i is None:
        y = m - bias
    else:
        used = np.any(k != 0, axis=0)
        ii = np.where(used[None, :], i, np.nan_to_num(i))
        y = m - bias - ii @ k.T
    return np.linalg.solve(soft, y.T).T


def _crosstalk_anomaly(k, k_s, imax, noise, mag_sampling, span) -> tuple[list[Anomaly], bool]:
    """crosstalk_significant, and whether K should be applied to the calibrated field."""
    contamination = np.abs(k) * imax[None, :]  # nT at full current, per sensor axis and coil
    sig = (np.abs(k) > SIGNIFICANCE_SIGMA * k_s) & (contamination > CONTAMINATION_NOISE_FACTOR * noise)
    sig &= np.isfinite(k)
    if not np.any(sig):
        # coils_off and nothing seen: the duty cycle works, apply no crosstalk
        return [], mag_sampling != "coils_off"
    j, c = np.unravel_index(np.nanargmax(np.where(sig, contamination, -np.inf)), (3, 3))
    worst = (f"sensor {AXES[j]} sees {k[j, c]:.0f} +- {k_s[j, c]:.0f} nT/A from coil {AXES[c]}, "
             f"{contamination[j, c]:.0f} nT at its full {imax[c]:.3g} A "
             f"({contamination[j, c] / noise:.1f} x the {noise:.0f} nT noise)")
    n_sig = int(sig.sum())
    thresholds = (f"{n_sig} of 9 elements beyond {SIGNIFICANCE_SIGMA:g} sigma and "
                  f"{CONTAMINATION_NOISE_FACTOR:g} x noise at full current")
    if mag_sampling == "coils_off":
        sev, head = "warning", ("the coils are meant to be off while the magnetometer samples, yet the "
                                "readings follow the logged currents: the duty cycle does not work; ")
    elif mag_sampling == "coils_on":
        sev, head = "warning", ("the magnetometer samples with the coils on, so the onboard controller "
                                "sees its own coil field; recon removes it from the calibrated field; ")
    else:
        sev, head = "info", ("samples outside the off windows see the coils; recon removes their field "
                             "from the calibrated field; ")
    a = Anomaly("crosstalk_significant", sev, head + worst + f"; {thresholds}.", span[0], span[1],
                axis=AXES[j], value=float(contamination[j, c]))
    return [a], True


def _bias_anomaly(bias, bias_s, h, span) -> list[Anomaly]:
    if not np.all(np.isfinite(bias)) or not len(h):
        return []
    mag = float(np.linalg.norm(bias))
    mean_h = float(np.mean(h))
    sigma = float(np.sqrt(np.sum(bias_s**2)))
    low = mag - SIGNIFICANCE_SIGMA * sigma  # the bias is at least this large (3 sigma)
    if low <= BIAS_FRACTION_LARGE * mean_h:
        return []
    warn = low > BIAS_FRACTION_WARNING * mean_h
    limit = BIAS_FRACTION_WARNING if warn else BIAS_FRACTION_LARGE
    return [Anomaly("mag_bias_large", "warning" if warn else "info",
                    f"magnetometer bias |b| = {mag:.0f} +- {sigma:.0f} nT "
                    f"({np.round(bias).astype(int).tolist()} nT, sensor axes) is {100 * mag / mean_h:.1f} % of "
                    f"the mean field {mean_h:.0f} nT, above {100 * limit:g} %: a magnetised part near the "
                    f"sensor or a wrong offset in the mission file; recon removes it from the calibrated "
                    f"field, onboard software using raw readings does not", span[0], span[1], value=mag)]


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
    i_fit = i_apply = imax = sampling = read = None
    if mission.coils is not None and coils_log is not None and len(coils_log.time_utc):
        spec = mission.coils
        ctl = mission.controller
        sampling = spec.mag_sampling
        imax = np.asarray(spec.max_current_A, dtype=float)
        tc, ic = coils_log.time_utc, np.asarray(coils_log.values, dtype=float)
        held = effective_current(t, tc, ic, "coils_on")
        timing = {"period_s": None if ctl is None else ctl.period_s,
                  "first_tick": None if ctl is None else ctl.first_tick, "off_window_s": spec.off_window_s}
        if sampling == "coils_off":
            i_fit, i_apply = held, held
        else:
            i_fit = effective_current(t, tc, ic, sampling, **timing)
            i_apply = i_fit
        read = controller_samples(t, tc, ic, sampling, **timing)
    h = _reference_magnitude(reference, t)
    gyro = getattr(cleaned, "gyro", None)
    w_body = None
    if gyro is not None:
        w_body = np.array(gyro.values, dtype=float)
        g_sat = getattr(gyro, "saturated", None)
        if g_sat is not None:  # a clipped rate would turn the field by the wrong angle
            w_body[np.asarray(g_sat, bool).reshape(len(w_body), -1).any(axis=1)] = np.nan
    cal = calibrate_arrays(
        t, m_sensor, h, i_fit, sensor_to_body=mm, max_current_A=imax, noise_nT=noise_nT,
        mag_sampling=sampling, i_apply_A=i_apply, gyro_time_utc=None if gyro is None else gyro.time_utc,
        w_gyro_body_rad_s=w_body, exclude=exclude, controller_read=read)
    extra = []
    if mission.coils is None or coils_log is None:
        extra.append("no coil log: crosstalk not estimated")
    if reference is None:
        extra.append("no reference field (no [orbit]): attitude-independent calibration skipped")
    if extra:
        from dataclasses import replace
        cal = replace(cal, notes=cal.notes + tuple(extra))
    return cal
