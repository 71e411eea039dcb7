"""Noise levels from the data: the overlapping Allan deviation of gyro rate data and the noise terms
read from it, and the filter's noise model with every level left open filled in from the pass.

The overlapping Allan variance of rate samples ``w_k`` taken every ``tau0`` seconds, with the angle
``theta_k = tau0 * sum_{j<k} w_j`` (theta_0 = 0, N angles), at ``tau = m tau0`` is

    sigma^2(tau) = 1 / (2 tau^2 (N - 2m)) * sum_{k=0}^{N-2m-1} (theta_{k+2m} - 2 theta_{k+m} + theta_k)^2

(IEEE Std 952-1997 annex C; Riley 2008, NIST SP 1065, eq. 11). On a log-log plot of sigma(tau),
slope -1/2 is angle random walk with ``N = sigma(1 s)``, slope 0 is bias instability with
``B = sigma_min / 0.664`` (0.664 = sqrt(2 ln 2 / pi), IEEE Std 952-1997 annex C (memory)), slope +1/2
is rate random walk with ``K = sigma(3 s)``.

Units: rate in rad/s (or deg/s; the result is in the same unit); N in unit*sqrt(s) (= unit/sqrt(Hz)),
B in unit, K in unit/sqrt(s).

References
----------
IEEE Std 952-1997 (R2008), revised as IEEE Std 952-2020. IEEE Standard Specification Format Guide and
Test Procedure for Single-Axis Interferometric Fiber Optic Gyros. Annex C (Allan variance).
Riley, W. J. (2008). Handbook of Frequency Stability Analysis. NIST Special Publication 1065.
El-Sheimy, N., Hou, H. and Niu, X. (2008). Analysis and modeling of inertial sensors using Allan
variance. IEEE Trans. Instrum. Meas. 57(1), 140-149 (memory).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..core import local_slope, white_noise_from_differences
from .types import GyroAllanFigures, NoiseModel, NoiseSource

__all__ = ["field_model_from_residual", "overlapping_adev", "GyroNoiseFigures", "gyro_noise_from_adev",
           "gyro_noise_figures", "resolve_noise"]

FLICKER_FLOOR_FACTOR = 0.664  # sigma_min = 0.664 B for bias instability, sqrt(2 ln2 / pi) (memory)


def overlapping_adev(rate: np.ndarray, fs_hz: float, m: np.ndarray | None = None
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Overlapping Allan deviation of rate samples.

    Parameters
    ----------
    rate : (N,) or (N, k) rate samples, equally spaced (any unit; each column separately)
    fs_hz : float, sampling rate, Hz
    m : (M,) int averaging factors, optional
        Default: octaves 1, 2, 4, ... while at least one difference remains.

    Returns
    -------
    taus : (M,) s
    adev : (M,) or (M, k), same unit as ``rate``
    n_terms : (M,) int, number of second differences averaged
    """
    x = np.asarray(rate, dtype=float)
    one = x.ndim == 1
    x = x.reshape(len(x), -1)
    x = x - x.mean(axis=0)  # the mean rate does not change the result; removing it keeps precision
    tau0 = 1.0 / float(fs_hz)
    theta = np.vstack([np.zeros((1, x.shape[1])), np.cumsum(x, axis=0) * tau0])
    n = len(theta)
    if m is None:
        m = 2 ** np.arange(int(np.floor(np.log2(n))) + 1)
    m = np.asarray(m, dtype=np.int64)
    m = m[(m >= 1) & (n - 2 * m >= 1)]
    adev = np.empty((len(m), x.shape[1]))
    terms = n - 2 * m
    for i, mi in enumerate(m):
        d = theta[2 * mi:] - 2.0 * theta[mi:n - mi] + theta[:n - 2 * mi]
        tau = mi * tau0
        adev[i] = np.sqrt(np.sum(d * d, axis=0) / (2.0 * tau * tau * (n - 2 * mi)))
    return m * tau0, (adev[:, 0] if one else adev), terms


@dataclass(frozen=True)
class GyroNoiseFigures:
    """Noise terms read from an Allan deviation curve (one axis).

    Attributes
    ----------
    arw : float or None, N, unit*sqrt(s) (angle random walk; sigma(1 s) on the -1/2 line)
    bias_instability : float, B = sigma_min / 0.664, unit
    rrw : float or None, K, unit/sqrt(s) (rate random walk; sigma(3 s) on the +1/2 line)
    tau_min_s : float, where sigma is smallest
    """

    arw: float | None
    bias_instability: float
    rrw: float | None
    tau_min_s: float


def gyro_noise_from_adev(taus: np.ndarray, adev: np.ndarray, slope_tolerance: float = 0.2) -> GyroNoiseFigures:
    """Angle random walk, bias instability and rate random walk from one Allan deviation curve.

    The -1/2 line is fitted (in log-log, slope fixed) through the run of points from the shortest tau
    whose local slope is within ``slope_tolerance`` of -1/2 (falling back to the shortest tau alone,
    where white noise dominates any real gyro); the +1/2 line through all points within the tolerance
    of +1/2, None if there are none.

    Parameters
    ----------
    taus : (M,) s, increasing; adev : (M,) same unit as the rate
    """
    t = np.asarray(taus, float)
    a = np.asarray(adev, float)
    lt, la = np.log(t), np.log(a)
    slope = np.gradient(la, lt) if len(t) > 2 else np.full(len(t), -0.5)
    arw_pts = np.abs(slope + 0.5) <= slope_tolerance
    rrw_pts = np.abs(slope - 0.5) <= slope_tolerance
    # the -1/2 line is the run of such points from the shortest tau on: further along, motion or
    # other terms can cross slope -1/2 by chance
    run = np.cumprod(arw_pts).astype(bool)
    if run.any():
        arw = float(np.exp(np.mean(la[run] + 0.5 * lt[run])))
    else:
        arw = float(a[0] * np.sqrt(t[0]))
    rrw = float(np.exp(np.mean(la[rrw_pts] - 0.5 * (lt[rrw_pts] - np.log(3.0))))) if rrw_pts.any() else None
    k = int(np.argmin(a))
    return GyroNoiseFigures(arw, float(a[k] / FLICKER_FLOOR_FACTOR), rrw, float(t[k]))


def gyro_noise_figures(t_gyro_s: np.ndarray, w_gyro: np.ndarray, max_samples: int = 1 << 16) -> GyroAllanFigures:
    """Gyro noise read from the overlapping Allan deviation of the gyro output (IEEE Std 952-1997).

    The satellite's own motion adds to the curve at long averaging times, so only the angle random
    walk (the -1/2 line at the shortest taus, where white noise dominates any magnetorquer-driven
    motion) is used by the filter; bias instability and rate random walk are reported for the record.
    Uses the first ``max_samples`` samples at the median spacing.

    Parameters
    ----------
    t_gyro_s : (G,) s; w_gyro : (G, 3) rad/s, body frame

    Returns
    -------
    GyroAllanFigures
    """
    dt = float(np.median(np.diff(t_gyro_s)))
    taus, adev, _ = overlapping_adev(w_gyro[:max_samples], 1.0 / dt)
    figs = [gyro_noise_from_adev(taus, adev[:, i]) for i in range(3)]
    return GyroAllanFigures(float(np.sqrt(np.mean([f.arw ** 2 for f in figs]))), [f.arw for f in figs],
                            [f.bias_instability for f in figs], [f.rrw for f in figs])


def resolve_noise(noise: NoiseModel, b_body_nT: np.ndarray, w_gyro: np.ndarray | None,
                  t_gyro_s: np.ndarray | None) -> tuple[NoiseModel, NoiseSource]:
    """The noise model with every level left as None filled in from the data, and where each came from.

    Magnetometer white noise from second differences of the field; gyro angle random walk from the
    Allan deviation (:func:`gyro_noise_figures`); the angular acceleration of gap bridging as the rms
    1 s slope of the gyro output.

    Parameters
    ----------
    noise : NoiseModel
    b_body_nT : (N, 3) nT body, the rows used for updates
    w_gyro : (G, 3) rad/s body, or None without a gyro; t_gyro_s : (G,) s, or None
    """
    kw = {}
    if noise.mag_nT is None:
        kw["mag_nT"] = white_noise_from_differences(b_body_nT)
    if w_gyro is None:
        return dataclasses.replace(noise, **kw), NoiseSource("data" if "mag_nT" in kw else "given")
    allan = None
    if noise.gyro_arw_rad_sqrt_s is None:
        allan = gyro_noise_figures(t_gyro_s, w_gyro)
        kw["gyro_arw_rad_sqrt_s"] = allan.arw_rad_sqrt_s
    if noise.rate_hold_accel_rad_s2 is None:
        wdot = local_slope(t_gyro_s, w_gyro, 1.0)
        ok = np.all(np.isfinite(wdot), axis=1)
        kw["rate_hold_accel_rad_s2"] = max(float(np.sqrt(np.mean(wdot[ok] ** 2))), 1e-6)
    source = NoiseSource("data" if "mag_nT" in kw else "given",
                         "given" if allan is None else "data (Allan deviation)", allan,
                         "data" if "rate_hold_accel_rad_s2" in kw else "given")
    return dataclasses.replace(noise, **kw), source


def field_model_from_residual(noise: NoiseModel, residual_rms_nT: float | None) -> tuple[NoiseModel, bool]:
    """The field-model error raised to what the calibration's |b| residual shows, and whether it was.

    After calibration, ``|b| - |b_ref|`` is the component along the field of what the reference model
    leaves out, plus the magnetometer's noise: with an error isotropic in direction, its rms is the
    per-axis sigma, so the vector's rms is ``sqrt(3 (rms^2 - sig_m^2))``. The fit absorbs part of that
    error into bias and soft iron, so this is a lower bound: it only ever raises the level (a disturbed
    field, 500 nT in a storm, against the 100 nT of quiet conditions (memory)).
    """
    if residual_rms_nT is None or not np.isfinite(residual_rms_nT):
        return noise, False
    mag = noise.mag_nT or 0.0  # unknown magnetometer noise: the whole residual counts
    level = float(np.sqrt(3.0 * max(residual_rms_nT ** 2 - mag ** 2, 0.0)))
    if level <= noise.field_model_nT:
        return noise, False
    return dataclasses.replace(noise, field_model_nT=level), True
