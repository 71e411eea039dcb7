"""Nonlinear, robust, attitude-independent magnetometer calibration with uncertainties.

Refines the linear first guess (:mod:`recon.calibrate.linear`) on the exact residual

    r_k = |S^-1 (m_k - b0 - K i_k)| - h_k            (nT)

with ``scipy.optimize.least_squares`` and a robust loss, as the second (Gauss-Newton) step of
TWOSTEP does on the same model (Alonso & Shuster 2002). Parameters are in sensor axes: bias ``b0``
(3, nT), the six elements of the symmetric soft-iron matrix ``S`` (xx, yy, zz, xy, xz, yz) and the
crosstalk ``K`` (3x3, nT per A, row = sensor axis, column = coil), 18 in all.

The residual, the parameter layout and the analytic Jacobian are in :mod:`recon.calibrate.model`.

Uncertainty: the statistical part is ``s^2 (J^T J)^-1`` on the inlying samples, ``s^2`` their
residual variance (Seber & Wild 1989, Nonlinear Regression, sec. 2.1). It assumes independent
residuals, which the field the reference model leaves out (crustal and external, of the order of
100 nT, memory) breaks: that error is smooth along the orbit and, over a pass, acts like a slowly
drifting offset of ``h``. Its effect on the parameters is added as a systematic term
``A J^T Sigma_u J A`` (``A = (J^T J)^-1``), with ``Sigma_u`` the covariance of the magnitude error:
a Gaussian process with RMS ``unmodelled_nT / sqrt(3)`` (the component along the field of an
isotropic vector error) and a squared-exponential correlation of time scale ``unmodelled_time_s``
(the linearised error propagation of a least-squares estimator under a mis-specified error
covariance; Seber & Wild 1989 sec. 2.1; Rasmussen & Williams 2006, Gaussian Processes for Machine
Learning, eq. 2.31 for the kernel). On seeded synthetic passes with a smooth ~100 nT unmodelled
field the parameter errors divided by this sigma have an RMS near 1.

Observability: a parameter that the data cannot tell apart from others is *undetermined*. Three
tests: the span of each coil's current (a coil that never switches leaves its crosstalk column
indistinguishable from the bias); the singular values of the column-normalised Jacobian (Belsley,
Kuh & Welsch 1980, Regression Diagnostics, ch. 3: the condition number of the scaled design
matrix): while it is above the limit, the parameter that dominates the weakest direction is fixed at
its nominal value (0, or 1 on the soft-iron diagonal) and the fit repeated; and a 1-sigma larger
than any plausible value of the parameter, which catches the case magnetic control creates on
purpose: a dipole perpendicular to the field changes ``|b|`` only at second order, so the
crosstalk of such coils barely shows in the magnitude. An undetermined parameter is held at its nominal
value, but its plausible range (1-sigma = the same limit) is carried into the covariance of the
others as a consider term, so a bias that only looks determined because the soft iron was held at
identity is reported as undetermined too.

References
----------
Alonso, R. and Shuster, M. D. (2002). TWOSTEP: a fast robust algorithm for attitude-independent
magnetometer-bias determination. J. Astronaut. Sci. 50(4), 433-452.
Belsley, D. A., Kuh, E. and Welsch, R. E. (1980). Regression Diagnostics. Wiley, chapter 3.
Seber, G. A. F. and Wild, C. J. (1989). Nonlinear Regression. Wiley, section 2.1.
Rasmussen, C. E. and Williams, C. K. I. (2006). Gaussian Processes for Machine Learning. MIT Press.
Tapley, B. D., Schutz, B. E. and Born, G. H. (2004). Statistical Orbit Determination. Elsevier,
section 6.3 (consider covariance).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from ..core import robust_scale
from .linear import linear_calibration
from .model import (
    AXES,
    N_PARAMS,
    PARAM_NAMES,
    jacobian,
    matrices_from_params,
    nominal_params,
    params_from_matrices,
    residual_nT,
)

__all__ = ["MagFit", "fit_magnetometer"]

# A coil whose effective current spans less than this fraction of its maximum current is taken as
# never switching: its crosstalk column is undetermined (common practice, no source).
MIN_CURRENT_SPAN_FRACTION = 0.01
# Limit on the condition number of the column-normalised Jacobian. Above it, the weakest parameter
# combination is known 1e6 times less well than an orthogonal design would give: no trustworthy digit
# at the noise levels of a magnetometer (common practice, no source).
MAX_CONDITION = 1.0e6
# Robust outer fence: samples with |r - median| > 5 x (1.4826 MAD) are left out of the covariance
# (1.4826 MAD is the normal-consistent scale estimate; Rousseeuw & Croux 1993, JASA 88:1273).
OUTLIER_FENCE = 5.0
# The field IGRF leaves out: crustal and external fields of ~100 nT in quiet conditions (memory).
UNMODELLED_FIELD_nT = 100.0
# Its correlation time along a LEO track: features of ~1500 km at 7.6 km/s (common practice, no source).
UNMODELLED_TIME_s = 200.0
# A parameter whose 1-sigma exceeds this fraction of its plausible range (the mean field for the bias
# and for a coil at full current; 1 for the soft iron) is undetermined (common practice, no source).
MAX_SIGMA_FRACTION = 0.1
# A linear soft-iron estimate further than this from identity is implausible for a magnetometer on a
# small satellite (a few per cent is usual); the nonlinear fit then also starts from S = I
# (common practice, no source).
MAX_SOFT_IRON_DEVIATION = 0.2


@dataclass(frozen=True)
class MagFit:
    """Result of :func:`fit_magnetometer`.

    Attributes
    ----------
    params : (18,) array
        Fitted vector (undetermined entries hold their nominal value); names in ``PARAM_NAMES``.
    sigma : (18,) array
        1-sigma; NaN for undetermined entries.
    covariance : (18, 18) array
        Covariance (statistical + systematic); rows and columns of undetermined entries are NaN.
    covariance_statistical : (18, 18) array
        The statistical part alone, ``s^2 (J^T J)^-1``.
    undetermined : dict
        Parameter name -> reason, for each parameter the data cannot determine.
    linear_params : (18,) array
        The linear (TWOSTEP-like) first guess.
    residual_rms_before_nT, residual_rms_after_nT : float
        RMS of ``|m| - h`` (raw) and of the fitted residual, over all rows used.
    residual_sigma_nT : float
        Residual standard deviation of the inliers (with the degrees of freedom removed).
    condition_number : float
        Of the column-normalised Jacobian of the determined parameters, at the solution.
    n_used, n_outliers : int
    converged : bool
    inliers : (N,) bool array
        Rows inside the outlier fence.
    fixed : dict
        Parameters held at given values (name -> value).
    """

    params: np.ndarray
    sigma: np.ndarray
    covariance: np.ndarray
    covariance_statistical: np.ndarray
    undetermined: dict[str, str]
    linear_params: np.ndarray
    residual_rms_before_nT: float
    residual_rms_after_nT: float
    residual_sigma_nT: float
    condition_number: float
    n_used: int
    n_outliers: int
    converged: bool
    inliers: np.ndarray = field(repr=False, default=None)
    fixed: dict[str, float] = field(default_factory=dict)


def fit_magnetometer(m_sensor_nT: np.ndarray, h_nT: np.ndarray, i_coil_A: np.ndarray | None = None,
                     *, t_s: np.ndarray | None = None, max_current_A: np.ndarray | None = None,
                     noise_nT: float | None = None, fixed: dict[str, float] | None = None,
                     fixed_covariance: np.ndarray | None = None, loss: str = "soft_l1",
                     unmodelled_nT: float = UNMODELLED_FIELD_nT,
                     unmodelled_time_s: float = UNMODELLED_TIME_s, max_condition: float = MAX_CONDITION,
                     min_span_fraction: float = MIN_CURRENT_SPAN_FRACTION,
                     max_sigma_fraction: float = MAX_SIGMA_FRACTION) -> MagFit:
    """Attitude-independent calibration: bias, soft iron and crosstalk with 1-sigma.

    Parameters
    ----------
    m_sensor_nT : (N, 3) array, nT, sensor axes
        Measured field; rows must be finite.
    h_nT : (N,) array, nT
        Reference field magnitude at the same instants.
    i_coil_A : (N, 3) array, A, optional
        Effective coil currents each sample saw (finite). None: no coils, crosstalk undetermined.
    t_s : (N,) array, s, optional
        Sample times (any origin), for the systematic term of the covariance. None: that term is
        left out (the covariance is then the statistical part only).
    max_current_A : (3,) array, A, optional
        Each coil's maximum current, for the span test. Default: the largest |current| seen.
    noise_nT : float, optional
        Magnetometer noise, 1 sigma per axis; a floor for the robust loss scale.
    fixed : dict, optional
        Parameter name -> value held fixed (e.g. crosstalk from another estimate); their sigma is NaN.
    fixed_covariance : (18, 18) array, optional
        Covariance of the fixed values (parameter order of ``PARAM_NAMES``; other entries ignored),
        carried into the others' covariance as a consider term. Default: the fixed values are exact.
    loss : str
        ``least_squares`` loss ("soft_l1", "huber", "linear", ...).
    unmodelled_nT, unmodelled_time_s : float
        RMS (vector, nT) and correlation time (s) of the field the reference model leaves out; 0 nT
        turns the systematic term off.
    max_condition, min_span_fraction, max_sigma_fraction : float
        Observability limits (see module constants).

    Returns
    -------
    MagFit

    References
    ----------
    Alonso & Shuster (2002), TWOSTEP, J. Astronaut. Sci. 50(4):433-452 (second step).
    """
    m = np.asarray(m_sensor_nT, dtype=float)
    h = np.asarray(h_nT, dtype=float)
    n = len(m)
    fixed = dict(fixed or {})
    unknown = sorted(set(fixed) - set(PARAM_NAMES))
    if unknown:
        raise ValueError(f"Expected parameter names from PARAM_NAMES in fixed, got {unknown}")
    undetermined: dict[str, str] = {}
    imax = np.ones(3)
    if i_coil_A is None:
        i = np.zeros((n, 3))
        for j in range(3):
            for c in range(3):
                undetermined[PARAM_NAMES[9 + 3 * j + c]] = "no coil currents available"
        coils = np.zeros(3, bool)
    else:
        i = np.asarray(i_coil_A, dtype=float)
        span = np.ptp(i, axis=0) if n else np.zeros(3)
        imax = (np.max(np.abs(i), axis=0) if max_current_A is None
                else np.asarray(max_current_A, dtype=float))
        imax = np.where(imax > 0, imax, 1.0)
        coils = span >= min_span_fraction * imax
        for c in np.flatnonzero(~coils):
            why = (f"coil {AXES[c]} current spans {100 * span[c] / imax[c]:.2g} % of its range "
                   f"({span[c]:.3g} A of {imax[c]:.3g} A; at least {100 * min_span_fraction:g} % needed)")
            for j in range(3):
                undetermined[PARAM_NAMES[9 + 3 * j + c]] = why
    for name in fixed:
        undetermined.pop(name, None)

    rms_before = float(np.sqrt(np.mean((np.linalg.norm(m, axis=1) - h) ** 2)))
    nominal = nominal_params()
    hold = nominal.copy()  # values of the parameters that are not estimated
    for name, v in fixed.items():
        hold[PARAM_NAMES.index(name)] = float(v)
    free = np.array([name not in undetermined and name not in fixed for name in PARAM_NAMES])

    # first guess: the linear step, with the currents of the fixed crosstalk removed beforehand
    k_fixed = matrices_from_params(np.where(free, 0.0, hold))[2]
    k_fixed[:, ~coils] = 0.0
    coils_lin = coils & np.array([any(f"crosstalk_{AXES[j]}_coil_{AXES[c]}" not in fixed for j in range(3))
                                  for c in range(3)])
    lin = linear_calibration(m - i @ k_fixed.T, h, i, coils=coils_lin, sigma_nT=noise_nT or 1.0)
    p_lin = params_from_matrices(lin.bias_nT, lin.soft_iron, lin.crosstalk_nT_per_A)
    starts = [np.where(free, p_lin, hold)]
    if not lin.positive_definite or np.abs(lin.soft_iron - np.eye(3)).max() > MAX_SOFT_IRON_DEVIATION:
        # an implausible linear soft iron: start also from the nominal sensor with the linear bias
        starts.append(np.where(free, np.r_[p_lin[:3], nominal[3:]], hold))
    f_scale = max(min(robust_scale(residual_nT(p0, m, h, i)) for p0 in starts), noise_nT or 0.0, 1e-3)

    converged = True
    # screen at the first guess (nominal soft iron when the linear one is implausible), so that a
    # degenerate problem is cut down before the solver can wander along its flat directions
    screen_at = starts[-1]
    while _screen(screen_at, free, m, i, undetermined, max_condition)[1]:
        pass
    starts = [np.where(free, p0, hold) for p0 in starts]
    p, ok, p_start = _best_of(starts, free, m, h, i, loss, f_scale)
    cov = cov_stat = None
    bound = _sigma_bounds(float(np.mean(h)), imax, max_sigma_fraction)
    cond = np.inf
    for _ in range(N_PARAMS + 1):
        converged = converged and ok
        cond, changed = _screen(p, free, m, i, undetermined, max_condition)
        if changed:
            p, ok = _solve(np.where(free, p_start, hold), free, m, h, i, loss, f_scale)
            continue
        consider = _consider_cov(undetermined, fixed, fixed_covariance, bound)
        cov, cov_stat, s2, inliers = _covariance(p, free, m, h, i, t_s, unmodelled_nT, unmodelled_time_s,
                                                 consider)
        # a parameter whose 1-sigma exceeds any plausible value is not determined by these data
        ratio = np.where(free, np.sqrt(np.diag(cov)) / bound, 0.0)
        k = int(np.argmax(ratio))
        if ratio[k] <= 1.0:
            break
        undetermined[PARAM_NAMES[k]] = _sigma_reason(k, float(np.sqrt(cov[k, k])), bound[k], imax)
        free[k] = False
        p, ok = _solve(np.where(free, p_start, hold), free, m, h, i, loss, f_scale)

    r = residual_nT(p, m, h, i)
    if cov is None:
        consider = _consider_cov(undetermined, fixed, fixed_covariance, bound)
        cov, cov_stat, s2, inliers = _covariance(p, free, m, h, i, t_s, unmodelled_nT, unmodelled_time_s,
                                                 consider)
    sigma = np.sqrt(np.diag(cov))
    return MagFit(params=p, sigma=sigma, covariance=cov, covariance_statistical=cov_stat,
                  undetermined=undetermined, linear_params=p_lin,
                  residual_rms_before_nT=rms_before,
                  residual_rms_after_nT=float(np.sqrt(np.mean(r**2))),
                  residual_sigma_nT=float(np.sqrt(s2)), condition_number=cond, n_used=n,
                  n_outliers=int((~inliers).sum()), converged=converged, inliers=inliers,
                  fixed=dict(fixed))


def _screen(p, free, m, i, undetermined, max_condition) -> tuple[float, bool]:
    """One observability check of the Jacobian at ``p`` over the ``free`` parameters (updated in
    place): parameters with no sensitivity, else the one dominating the weakest direction when the
    column-normalised condition number exceeds ``max_condition``. Returns (condition number,
    whether a parameter was removed)."""
    if not np.any(free):
        return np.inf, False
    jac = jacobian(p, m, i)[:, free]
    norms = np.linalg.norm(jac, axis=0)
    zero = norms <= 1e-12 * max(float(norms.max(initial=0.0)), 1e-300)
    if np.any(zero):
        idx = np.flatnonzero(free)[zero]
        for k in idx:
            undetermined[PARAM_NAMES[k]] = "the data carry no information on it (zero sensitivity)"
        free[idx] = False
        return np.inf, True
    sv, vt = np.linalg.svd(jac / norms, full_matrices=False)[1:]
    cond = float(sv[0] / sv[-1]) if sv[-1] > 0 else np.inf
    if cond <= max_condition:
        return cond, False
    weakest = vt[-1]
    k_local = int(np.argmax(np.abs(weakest)))
    k = np.flatnonzero(free)[k_local]
    undetermined[PARAM_NAMES[k]] = (
        f"condition number {cond:.1e} of the normalised Jacobian (limit {max_condition:.0e}); "
        f"the weakest direction is {100.0 * weakest[k_local] ** 2:.0f} % this parameter")
    free[k] = False
    return cond, True


def _sigma_bounds(mean_field_nT: float, imax: np.ndarray, fraction: float) -> np.ndarray:
    """Largest plausible 1-sigma per parameter: ``fraction`` of the field for the bias and for a coil
    at full current, ``fraction`` (dimensionless) for the soft iron."""
    b = np.empty(N_PARAMS)
    b[0:3] = fraction * mean_field_nT
    b[3:9] = fraction
    b[9:18] = np.tile(fraction * mean_field_nT / imax, 3)
    return b


def _sigma_reason(k: int, sigma: float, bound: float, imax: np.ndarray) -> str:
    if k >= 9:
        c = (k - 9) % 3
        return (f"1-sigma {sigma:.3g} nT/A ({sigma * imax[c]:.0f} nT at the full {imax[c]:.3g} A) exceeds "
                f"{bound * imax[c]:.0f} nT: the field magnitude barely depends on it (a coil dipole held "
                f"perpendicular to the field, as magnetic control does, leaves |b| unchanged to first order)")
    unit = " nT" if k < 3 else ""
    return f"1-sigma {sigma:.3g}{unit} exceeds the plausible {bound:.3g}{unit}: the attitude does not vary enough"


def _consider_cov(undetermined, fixed, fixed_covariance, bound) -> np.ndarray:
    """Covariance (18x18) of the parameters that are held rather than estimated: an undetermined one
    may lie anywhere in its plausible range (1-sigma = ``bound``); a fixed one has the covariance it
    came with (zero when none)."""
    c = np.zeros((N_PARAMS, N_PARAMS))
    for name in undetermined:
        k = PARAM_NAMES.index(name)
        c[k, k] = bound[k] ** 2
    if fixed_covariance is not None and fixed:
        idx = [PARAM_NAMES.index(name) for name in fixed]
        sub = np.asarray(fixed_covariance, dtype=float)[np.ix_(idx, idx)]
        c[np.ix_(idx, idx)] = np.where(np.isfinite(sub), sub, 0.0)
    return c


def _covariance(p, free, m, h, i, t_s, unmodelled_nT, unmodelled_time_s, consider=None):
    """Statistical + systematic + consider covariance (18x18, NaN outside ``free``), s^2 and the
    inlier mask.

    The consider term carries the uncertainty of the parameters held fixed (``consider``, their
    covariance) into the estimated ones: ``G C_x G^T`` with ``G = (J_f^T J_f)^-1 J_f^T J_x``, the
    sensitivity of the least-squares estimate to an error in the held values (Tapley, Schutz & Born
    2004, Statistical Orbit Determination, sec. 6.3, consider covariance)."""
    r = residual_nT(p, m, h, i)
    med, scale = np.median(r), robust_scale(r)
    inliers = np.abs(r - med) <= OUTLIER_FENCE * max(scale, 1e-9)
    n_free = int(free.sum())
    dof = max(int(inliers.sum()) - n_free, 1)
    s2 = float(np.sum(r[inliers] ** 2) / dof)
    cov = np.full((N_PARAMS, N_PARAMS), np.nan)
    cov_stat = cov.copy()
    if n_free:
        jac = jacobian(p, m[inliers], i[inliers])[:, free]
        norms = np.linalg.norm(jac, axis=0)
        norms[norms == 0] = 1.0
        jn = jac / norms
        a_n = np.linalg.pinv(jn.T @ jn, hermitian=True)
        c_n = s2 * a_n
        cov_stat[np.ix_(free, free)] = c_n / np.outer(norms, norms)
        if t_s is not None and unmodelled_nT > 0:
            t = np.asarray(t_s, dtype=float)[inliers]
            c_n = c_n + _smooth_error_cov(jn, t, unmodelled_nT / np.sqrt(3.0), unmodelled_time_s, a_n)
        if consider is not None and np.any(consider[~free][:, ~free] != 0):
            jx = jacobian(p, m[inliers], i[inliers])[:, ~free]
            g = a_n @ (jn.T @ jx)
            c_n = c_n + g @ consider[np.ix_(~free, ~free)] @ g.T
        cov[np.ix_(free, free)] = c_n / np.outer(norms, norms)
    return cov, cov_stat, s2, inliers


def _best_of(starts, free, m, h, i, loss, f_scale):
    """Solve from each start; keep the solution of least robust cost (and the start it came from,
    from which refits after fixing a parameter begin)."""
    best = None
    for p0 in starts:
        p, ok = _solve(p0, free, m, h, i, loss, f_scale)
        z = (residual_nT(p, m, h, i) / f_scale) ** 2
        cost = float(np.sum(2.0 * (np.sqrt(1.0 + z) - 1.0)))  # soft_l1, scale-free comparison
        if best is None or cost < best[2]:
            best = (p, ok, cost, p0)
    return best[0], best[1], best[3]


def _smooth_error_cov(jn: np.ndarray, t_s: np.ndarray, sigma_nT: float, tau_s: float,
                      a_n: np.ndarray) -> np.ndarray:
    """``A J^T Sigma_u J A`` for a smooth magnitude error (squared-exponential, RMS ``sigma_nT``,
    time scale ``tau_s``). Rows of ``J`` are summed into bins of tau/10, over which the kernel is
    nearly constant (at most 0.5 % change between neighbouring bins)."""
    width = tau_s / 10.0
    b = np.floor((t_s - t_s.min()) / width).astype(int)
    nb = int(b.max()) + 1
    jb = np.zeros((nb, jn.shape[1]))
    np.add.at(jb, b, jn)
    tb = (np.arange(nb) + 0.5) * width
    kern = sigma_nT**2 * np.exp(-0.5 * ((tb[:, None] - tb[None, :]) / tau_s) ** 2)
    return a_n @ (jb.T @ kern @ jb) @ a_n


def _solve(p0, free, m, h, i, loss, f_scale):
    """Robust least squares over the free parameters; the others stay at their values in ``p0``."""
    if not np.any(free):
        return p0.copy(), True

    def fun(x):
        p = p0.copy()
        p[free] = x
        return residual_nT(p, m, h, i)

    def jac(x):
        p = p0.copy()
        p[free] = x
        return jacobian(p, m, i)[:, free]

    res = least_squares(fun, p0[free], jac=jac, loss=loss, f_scale=f_scale, x_scale="jac",
                        method="trf", xtol=1e-12, ftol=1e-12, gtol=1e-10, max_nfev=200)
    p = p0.copy()
    p[free] = res.x
    return p, bool(res.success)
