"""A weighted straight line through one parameter's passes, and the t test of its slope.

Model: ``y_i = level + slope * (t_i - t_mid) + e_i`` with independent Gaussian errors
``e_i ~ N(0, (s * sigma_i)^2)``: each pass's stated 1-sigma is right up to one common factor ``s``,
which is estimated from the scatter about the line (the Birge ratio, ``R = sqrt(chi2 / (n - 2))``).
The slope's standard error is ``R / sqrt(S_tt)`` with ``S_tt = sum w_i (t_i - t_mid)^2`` and
``w_i = 1 / sigma_i^2``; then ``slope / se`` follows Student's t with ``n - 2`` degrees of freedom when
the true slope is zero, whatever ``s`` is. The test is two-sided; its false-alarm rate is exactly the
chosen alpha under this model. Without sigmas (all ``sigma_i = 1``) this is ordinary least squares.

Scaling by R both ways matters: recon's per-pass sigmas include model floors (the 5 % floor of the
dipole identification), so the points often scatter less than their sigmas, and a fixed scale would
throw that precision away; when they scatter more (a model error the sigmas leave out), R widens the
slope's error instead of raising a false alarm.

References
----------
Birge, R. T. (1932). The calculation of errors by the method of least squares. Phys. Rev. 40, 207-227
(the ratio of the observed to the expected scatter).
Draper, N. R. and Smith, H. (1998). Applied Regression Analysis, 3rd ed., Wiley, sections 3.2 and 9.2
(the t test of a regression slope; weighted least squares) (memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = ["LineFit", "fit_line"]


@dataclass(frozen=True)
class LineFit:
    """A straight line fitted through one parameter's passes.

    Attributes
    ----------
    n, dof : points used, and n - 2
    slope, slope_sigma : per unit of t (per year in the trend), the latter scaled by the Birge ratio
    level : fitted value at ``t_mid`` (the weighted mean time)
    t_mid : weighted mean of t
    t_stat, p_value : slope / slope_sigma and its two-sided p-value from Student's t with ``dof``
    birge_ratio : sqrt(chi2 / dof) about the line (1 when the sigmas describe the scatter); without
        sigmas, the residual rms about the line, in the unit of y
    weighted : whether per-pass sigmas weighted the fit
    """

    n: int
    dof: int
    slope: float
    slope_sigma: float
    level: float
    t_mid: float
    t_stat: float
    p_value: float
    birge_ratio: float
    weighted: bool

    def value_at(self, t: np.ndarray) -> np.ndarray:
        """The fitted line at times ``t`` (same unit as the fit's)."""
        return self.level + self.slope * (np.asarray(t, float) - self.t_mid)


def fit_line(t: np.ndarray, y: np.ndarray, sigma: np.ndarray | None = None) -> LineFit | None:
    """Weighted least-squares line and the t test of its slope (see the module docstring).

    Parameters
    ----------
    t : (n,) times (years in the trend); y : (n,) values
    sigma : (n,) per-point 1-sigma (> 0), or None for equal weights

    Returns
    -------
    LineFit, or None when fewer than 3 points or all at one time (no slope can be tested).
    """
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    n = t.size
    if n < 3 or np.ptp(t) == 0:
        return None
    w = np.ones(n) if sigma is None else 1.0 / np.asarray(sigma, float) ** 2
    t_mid = float(np.sum(w * t) / np.sum(w))
    y_mid = float(np.sum(w * y) / np.sum(w))
    dt = t - t_mid
    s_tt = float(np.sum(w * dt * dt))
    slope = float(np.sum(w * dt * (y - y_mid)) / s_tt)
    chi2 = float(np.sum(w * (y - y_mid - slope * dt) ** 2))
    dof = n - 2
    birge = float(np.sqrt(chi2 / dof))
    se = birge / np.sqrt(s_tt)
    if se > 0:
        t_stat = slope / se
    else:  # the points lie exactly on the line: no scatter to judge the slope against
        t_stat = 0.0 if slope == 0 else float(np.copysign(np.inf, slope))
    p = float(2.0 * stats.t.sf(abs(t_stat), dof))
    return LineFit(n, dof, slope, float(se), y_mid, t_mid, float(t_stat), p, birge, sigma is not None)
