"""Gyro samples at full scale: a clipped axis is a bound, not a measurement.

Where an axis of the gyro sits at its full scale, the rate about it is known only to lie beyond it
(``|w + beta| >= full scale`` in sensor axes). The rate vector at such a sample is solved, in body
axes, by weighted least squares from what is still known there:

- the gyro's unclipped axes (each ``(M^T (w + beta))_j``, with the gyro's white noise);
- the measured field's kinematics: in body axes ``db/dt = -w x b + A db_ref/dt``, so
  ``[b x] w = db/dt - A db_ref/dt`` gives the two components of w across the field (the slope of the
  field over one second, with the magnetometer's noise);
- between samples, Euler's equations, with the coils' torque scale, a residual dipole and the gyro's
  bias estimated along (:mod:`.rate_smoother`: a Kalman smoother on the rate through each clipped
  run). Without an inertia, each sample is solved alone with the rate interpolated between the run's
  unclipped ends as a prior, its uncertainty growing with the distance to the nearer one at the
  pass's typical angular acceleration (a poorer stand-in: it cannot see a rate beyond the range).

The clipped components of the sample are replaced by the solution (held to the bound: a solution that
falls inside the range is set to the full scale); they are the rate plus the bias, read by no gyro,
so the gyro's scale correction leaves them alone (:func:`recon.estimate.nuisance.corrected_inputs`).
The solution's error is not white: it comes from the torque's and the bias's errors, the same over
the whole run, and from the field's slope over ``2 SLOPE_HALF_WIDTH_S`` seconds. An error of
variance ``s^2`` held for a time ``tau`` turns the attitude as much as white noise of density
``2 s^2 tau`` would over the same time, so each sample carries the density ``2 s^2 tau`` (``s^2`` the
largest eigenvalue of the solution's covariance, ``tau`` half the clipped run, at least the slope's
window) for the filter to add to its attitude process noise while it uses that sample. With no attitude yet
the field's own turn ``A db_ref/dt`` is left out (about 80 nT/s against the several thousand of a fast
tumble); the caller solves again with the filter's attitude and bias.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (kinematics) (memory).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy.spatial.transform import Rotation

from ..core import NS_PER_S, cross_matrices, local_slope, white_noise_from_differences
from .rate_smoother import smooth_clipped_rate
from .types import NoiseModel, PassInputs

__all__ = ["ClippedGyro", "reconstruct_clipped", "with_clipped_solved", "SLOPE_HALF_WIDTH_S"]

# Half width of the field's local slope, s (the field turns a few degrees in it at fast rates).
SLOPE_HALF_WIDTH_S = 0.5


@dataclass(frozen=True)
class ClippedGyro:
    """The gyro log with its clipped axes solved.

    Attributes
    ----------
    w_body_rad_s : (G, 3) the gyro (bias included, as logged) with clipped components replaced, body axes
    extra_psd_rad2_s : (G,) spectral density of each sample's rate error beyond the gyro's white noise
        (see the module docstring), rad^2/s; zero on unclipped samples
    clipped_samples : int; clipped_fraction : float, of the gyro samples
    note : str
    """

    w_body_rad_s: np.ndarray
    extra_psd_rad2_s: np.ndarray
    clipped_samples: int
    clipped_fraction: float
    note: str


def _bounds_prior(t: np.ndarray, w_true: np.ndarray, clipped_any: np.ndarray, accel_rms: float):
    """Rate interpolated between the unclipped samples around each clipped one, its variance, and the
    length of the clipped run each sample is in, s."""
    good = np.flatnonzero(~clipped_any)
    if len(good) < 2:
        return np.zeros_like(w_true), np.full(len(t), np.inf), np.full(len(t), float(t[-1] - t[0]))
    prior = np.column_stack([np.interp(t, t[good], w_true[good, a]) for a in range(3)])
    k = np.clip(np.searchsorted(t[good], t), 1, len(good) - 1)
    d = np.minimum(np.abs(t - t[good[k - 1]]), np.abs(t[good[k]] - t))
    return prior, (accel_rms * np.maximum(d, 1e-3)) ** 2, t[good[k]] - t[good[k - 1]]


def reconstruct_clipped(t_gyro_s: np.ndarray, w_gyro_body: np.ndarray, clipped_sensor: np.ndarray,
                        sensor_to_body: np.ndarray, full_scale_rad_s: float, t_mag_s: np.ndarray,
                        b_body_nT: np.ndarray, sigma_mag_nT: float, arw_rad_sqrt_s: float, accel_rms_rad_s2: float,
                        *, beta_body_rad_s: np.ndarray | None = None, q_body_from_gcrf: np.ndarray | None = None,
                        b_ref_gcrf_nT: np.ndarray | None = None, inertia_kg_m2: np.ndarray | None = None,
                        m_body_Am2: np.ndarray | None = None, gyro_scale_E: np.ndarray | None = None) -> ClippedGyro:
    """Solve the clipped axes of a gyro log (see the module docstring).

    Parameters
    ----------
    t_gyro_s : (G,) s; w_gyro_body : (G, 3) rad/s, body axes, as logged (bias included)
    clipped_sensor : (G, 3) bool, sensor axes at full scale; sensor_to_body : (3, 3) M
    full_scale_rad_s : float
    t_mag_s : (N,) s; b_body_nT : (N, 3) nT body axes (finite rows used); sigma_mag_nT : float
    arw_rad_sqrt_s : gyro angle random walk; accel_rms_rad_s2 : typical angular acceleration
    beta_body_rad_s : (G, 3) the gyro's bias at its samples (default zero)
    q_body_from_gcrf, b_ref_gcrf_nT : (N, 4), (N, 3) attitude and reference field at the magnetometer
        samples, for the field's own turn (left out without them)
    inertia_kg_m2 : (3, 3) nominal inertia, for Euler's equations through a clipped run (the bounds'
        interpolation without it); m_body_Am2 : (G, 3) the coils' dipole at the gyro samples (zero
        without it)
    gyro_scale_E : (3, 3) the gyro's scale and misalignment when known (the unclipped axes read
        ``(I + E)(w + beta)``); the clipped axes' values returned are the rate plus bias, unscaled

    Returns
    -------
    ClippedGyro
    """
    clipped_any = np.asarray(clipped_sensor, bool).any(axis=1)
    n = int(clipped_any.sum())
    if n == 0:
        return ClippedGyro(np.asarray(w_gyro_body, float), np.zeros(len(t_gyro_s)), 0, 0.0, "no clipped sample")
    m = np.asarray(sensor_to_body, float)
    beta = np.zeros((len(t_gyro_s), 3)) if beta_body_rad_s is None else np.asarray(beta_body_rad_s, float)
    w_true_logged = np.asarray(w_gyro_body, float) - beta
    dt = float(np.median(np.diff(t_gyro_s)))
    g_var = (arw_rad_sqrt_s or 1e-4) ** 2 / dt
    if inertia_kg_m2 is not None:
        w_hat, bias, cov, run_s = _smoothed(t_gyro_s, np.asarray(w_gyro_body, float), clipped_sensor, m, g_var,
                                            t_mag_s, b_body_nT, sigma_mag_nT, q_body_from_gcrf, b_ref_gcrf_nT,
                                            inertia_kg_m2, m_body_Am2, beta_body_rad_s, gyro_scale_E)
        # the filter takes its own bias out of what it is given: without one, the smoother's stands in
        beta = beta if beta_body_rad_s is not None else bias
    else:
        w_hat, cov, run_s = _per_sample(t_gyro_s, w_true_logged, clipped_sensor, m, g_var, t_mag_s, b_body_nT,
                                        sigma_mag_nT, q_body_from_gcrf, b_ref_gcrf_nT, accel_rms_rad_s2)
    idx = np.flatnonzero(clipped_any)
    w_out = np.asarray(w_gyro_body, float).copy()
    extra = np.zeros(len(t_gyro_s))
    w_sensor_logged = w_out @ m  # rows of M^T w
    for g in idx:
        w_sensor = (w_hat[g] + beta[g]) @ m
        for j in np.flatnonzero(clipped_sensor[g]):
            sign = np.sign(w_sensor_logged[g, j])
            w_sensor_logged[g, j] = sign * max(sign * w_sensor[j], full_scale_rad_s)
        w_out[g] = m @ w_sensor_logged[g]
        # the error is nearly the same over the run (its torque and inertia) or the slope's window
        extra[g] = 2.0 * float(np.max(np.linalg.eigvalsh(cov[g]))) * max(0.5 * run_s[g], 2.0 * SLOPE_HALF_WIDTH_S)
    frac = n / len(t_gyro_s)
    note = (f"{n} gyro samples ({100 * frac:.1f} %) had an axis at full scale "
            f"({np.degrees(full_scale_rad_s):.3g} deg/s); "
            f"their clipped axes were solved from the field's kinematics and the unclipped axes (median "
            f"rate error {np.degrees(np.sqrt(np.median(extra[idx]))):.3g} deg/sqrt(s))")
    return ClippedGyro(w_out, extra, n, frac, note)


def _smoothed(t, w_logged, clipped_sensor, m, g_var, t_mag_s, b_body_nT, sigma_mag_nT, q, b_ref, inertia, m_body,
              beta, gyro_scale_e):
    """The rate smoother's rate, gyro bias, rate covariance and run length at every sample
    (:mod:`.rate_smoother`)."""
    dt = float(np.median(np.diff(t)))
    every = max(int(round(2.0 * SLOPE_HALF_WIDTH_S / dt)), 1)
    at = np.arange(0, len(t), every)
    c, c_var = _field_constraint(t_mag_s, b_body_nT, sigma_mag_nT, t[at], q, b_ref)
    constraints = {int(g): cd for g, cd in zip(at, c, strict=True)
                   if np.all(np.isfinite(cd[0])) and np.all(np.isfinite(cd[1]))}
    m_at = np.zeros((len(t), 3)) if m_body is None else m_body
    rate = smooth_clipped_rate(t, w_logged, clipped_sensor, m, g_var, constraints,
                               float(c_var[0]) if len(c_var) else 1.0, inertia, m_at, _field_at(t, t_mag_s, b_body_nT),
                               beta, gyro_scale_e)
    return rate.w_rad_s, rate.bias_rad_s, rate.cov, rate.run_s


def _per_sample(t, w_true, clipped_sensor, m, g_var, t_mag_s, b_body_nT, sigma_mag_nT, q, b_ref, accel):
    """Without an inertia: each clipped sample solved alone from its unclipped axes, the field's slope
    and the rate interpolated between the run's ends (rate, covariance, run length)."""
    clipped_any = clipped_sensor.any(axis=1)
    prior, prior_var, run_s = _bounds_prior(t, w_true, clipped_any, accel)
    c, c_var = _field_constraint(t_mag_s, b_body_nT, sigma_mag_nT, t[clipped_any], q, b_ref)
    w_hat, cov = w_true.copy(), np.zeros((len(t), 3, 3))
    w_axes = w_true @ m
    for k, g in enumerate(np.flatnonzero(clipped_any)):
        info = np.eye(3) / prior_var[g] if np.isfinite(prior_var[g]) else np.zeros((3, 3))
        rhs = info @ prior[g]
        bx, d = c[k]
        if np.all(np.isfinite(bx)) and np.all(np.isfinite(d)):
            info += bx.T @ bx / c_var[k]
            rhs += bx.T @ d / c_var[k]
        for j in np.flatnonzero(~clipped_sensor[g]):
            info += np.outer(m[:, j], m[:, j]) / g_var
            rhs += m[:, j] * w_axes[g, j] / g_var
        cov[g] = np.linalg.inv(info)
        w_hat[g] = cov[g] @ rhs
    return w_hat, cov, run_s


def _field_at(t_query: np.ndarray, t_mag_s: np.ndarray, b_body_nT: np.ndarray) -> np.ndarray:
    """The measured field interpolated to the query times (zero where there is none)."""
    ok = np.all(np.isfinite(b_body_nT), axis=1)
    if not ok.any():
        return np.zeros((len(t_query), 3))
    return np.column_stack([np.interp(t_query, t_mag_s[ok], b_body_nT[ok, a]) for a in range(3)])


def _field_unit(bx: np.ndarray) -> np.ndarray:
    """The field's unit vector from its cross-product matrix [b x]."""
    b = np.array([bx[2, 1], bx[0, 2], bx[1, 0]])
    n = float(np.linalg.norm(b))
    return b / n if n > 0 else np.zeros(3)


def _field_constraint(t_mag_s, b_body_nT, sigma_mag_nT, t_query, q, b_ref):
    """At each query time, ([b x] (3, 3), db/dt - A db_ref/dt (3,)) and the variance of the latter,
    from the field's local slope; NaN rows where the field has no slope there."""
    ok = np.all(np.isfinite(b_body_nT), axis=1)
    t, b = t_mag_s[ok], b_body_nT[ok]
    bdot = local_slope(t, b, SLOPE_HALF_WIDTH_S)
    if q is not None and b_ref is not None:
        rdot = local_slope(t, b_ref[ok], SLOPE_HALF_WIDTH_S)
        bdot = bdot - Rotation.from_quat(q[ok]).apply(np.nan_to_num(rdot))
    good = np.all(np.isfinite(bdot), axis=1)
    t, b, bdot = t[good], b[good], bdot[good]
    bq = np.column_stack([np.interp(t_query, t, b[:, a]) for a in range(3)])
    dq = np.column_stack([np.interp(t_query, t, bdot[:, a]) for a in range(3)])
    dt = float(np.median(np.diff(t)))
    n_win = max(int(round(2.0 * SLOPE_HALF_WIDTH_S / dt)) + 1, 2)
    slope_var = sigma_mag_nT ** 2 / (n_win * (n_win ** 2 - 1) * dt ** 2 / 12.0)
    out = [(bx, d) for bx, d in zip(cross_matrices(bq), dq, strict=True)]
    return out, np.full(len(t_query), slope_var)


def with_clipped_solved(inputs: PassInputs, noise: NoiseModel, *, beta_gyro_body: np.ndarray | None = None,
                        q_mag: np.ndarray | None = None, gyro_scale_E: np.ndarray | None = None) -> PassInputs:
    """The pass's inputs with the gyro's clipped axes solved (``inputs.gyro_clipping`` holds the log as
    it was), given the gyro's bias at its samples and the attitude at the magnetometer's when known."""
    c = inputs.gyro_clipping
    t0 = inputs.t_mag_ns[0]
    t_g = (inputs.t_gyro_ns - t0) / NS_PER_S
    t_m = (inputs.t_mag_ns - t0) / NS_PER_S
    ok = inputs.usable
    sigma_mag = noise.mag_nT or white_noise_from_differences(inputs.b_body_nT[ok])
    dt = float(np.median(np.diff(t_g)))
    free = ~c.clipped_sensor.any(axis=1)
    arw = noise.gyro_arw_rad_sqrt_s or white_noise_from_differences(c.w_logged_body_rad_s[free]) * np.sqrt(dt)
    slope = local_slope(t_g, c.w_logged_body_rad_s, 1.0)[free]
    accel = float(np.sqrt(np.nanmean(np.sum(slope ** 2, axis=1) / 3.0))) if len(slope) else 1e-3
    rec = reconstruct_clipped(t_g, c.w_logged_body_rad_s, c.clipped_sensor, c.sensor_to_body, c.full_scale_rad_s,
                              t_m[ok], inputs.b_body_nT[ok], sigma_mag, arw, max(accel, 1e-4),
                              beta_body_rad_s=beta_gyro_body, q_body_from_gcrf=None if q_mag is None else q_mag[ok],
                              b_ref_gcrf_nT=None if q_mag is None else inputs.b_ref_gcrf_nT[ok],
                              inertia_kg_m2=c.inertia_kg_m2, m_body_Am2=c.m_body_Am2, gyro_scale_E=gyro_scale_E)
    return dataclasses.replace(inputs, w_gyro_body_rad_s=rec.w_body_rad_s, gyro_extra_psd=rec.extra_psd_rad2_s,
                               gyro_clipping=dataclasses.replace(c, note=rec.note))
