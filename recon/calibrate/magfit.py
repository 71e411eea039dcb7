"""Nonlinear, robust, attitude-independent magnetometer calibration with uncertainties.

Refines the linear first guess (:mod:`recon.calibrate.linear`) on the exact residual

    r_k = |S^-1 (m_k - b0 - K i_k)| - h_k            (nT)

with ``scipy.optimize.least_squares`` and a robust loss, as the second (Gauss-Newton) step of
TWOSTEP does on the same model (Alonso & Shuster 2002). Parameters are in sensor axes: bias ``b0``
(3, nT), the six elements of the symmetric soft-iron matrix ``S`` (xx, yy, zz, xy, xz, yz) and the
crosstalk ``K`` (3x3, nT per A, row = sensor axis, column = coil), 18 in all.

The residual, the parameter layout and the analytic Jacobian are in :mod:`recon.calibrate.model`.

The covariance of the solution (statistical, systematic from the unmodelled field, and consider
terms) is formed in :mod:`recon.calibrate.covariance`.

Observability (which parameters the data determine) is tested in :mod:`recon.calibrate.observability`;
the parameters it holds carry their plausible range into the covariance as a consider term.

References
----------
Alonso, R. and Shuster, M. D. (2002). TWOSTEP: a fast robust algorithm for attitude-independent
magnetometer-bias determination. J. Astronaut. Sci. 50(4), 433-452.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from ..core import robust_scale
from .covariance import (
    FitCovariance,
    UNMODELLED_FIELD_nT,
    UNMODELLED_TIME_s,
    consider_covariance,
    fit_covariance,
    fixed_covariance_block,
)
from .linear import linear_calibration
from .model import (
    N_PARAMS,
    PARAM_NAMES,
    ParamIndex,
    crosstalk_name,
    jacobian,
    matrices_from_params,
    nominal_params,
    params_from_matrices,
    residual_nT,
)
from .observability import (
    MAX_CONDITION,
    MAX_SIGMA_FRACTION,
    MIN_CURRENT_SPAN_FRACTION,
    coil_span,
    screen,
    sigma_bounds,
    sigma_reason,
)

__all__ = ["MagFit", "fit_magnetometer"]

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


@dataclass(frozen=True)
class _Problem:
    """The rows of one fit and how they are fitted: ``m`` (N, 3) nT sensor axes, ``h`` (N,) nT,
    ``i`` (N, 3) A, ``t_s`` (N,) s or None, the ``least_squares`` loss and its scale (nT), and the
    RMS (nT) and correlation time (s) of the unmodelled field."""

    m: np.ndarray
    h: np.ndarray
    i: np.ndarray
    t_s: np.ndarray | None
    loss: str
    f_scale: float
    unmodelled_nT: float
    unmodelled_time_s: float

    def covariance(self, p, free, consider):
        """The covariance of the fit at ``p`` over the ``free`` parameters (:func:`fit_covariance`)."""
        return fit_covariance(p, free, self.m, self.h, self.i, self.t_s, self.unmodelled_nT, self.unmodelled_time_s,
                              consider)


@dataclass(frozen=True)
class _Refined:
    """The solution after the observability checks, with its covariance (see :class:`MagFit`)."""

    params: np.ndarray
    fitted: FitCovariance
    condition_number: float
    converged: bool
    undetermined: dict[str, str]


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
    i = np.zeros((n, 3)) if i_coil_A is None else np.asarray(i_coil_A, dtype=float)
    coils = coil_span(None if i_coil_A is None else i, max_current_A, min_span_fraction)
    undetermined = dict(coils.undetermined)
    for name in fixed:
        undetermined.pop(name, None)

    rms_before = float(np.sqrt(np.mean((np.linalg.norm(m, axis=1) - h) ** 2)))
    hold = nominal_params()  # values of the parameters that are not estimated
    for name, v in fixed.items():
        hold[PARAM_NAMES.index(name)] = float(v)
    free = np.array([name not in undetermined and name not in fixed for name in PARAM_NAMES])
    p_lin, starts = _first_guesses(m, h, i, coils.switching, fixed, free, hold, noise_nT)
    f_scale = max(min(robust_scale(residual_nT(p0, m, h, i)) for p0 in starts), noise_nT or 0.0, 1e-3)
    problem = _Problem(m, h, i, t_s, loss, f_scale, unmodelled_nT, unmodelled_time_s)

    # screen at the first guess (nominal soft iron when the linear one is implausible), so that a
    # degenerate problem is cut down before the solver can wander along its flat directions
    held = _screen_until_conditioned(starts[-1], free, m, i, max_condition)
    undetermined.update(held)
    free &= np.array([name not in held for name in PARAM_NAMES])
    starts = [np.where(free, p0, hold) for p0 in starts]
    bound = sigma_bounds(float(np.mean(h)), coils.max_current_A, max_sigma_fraction)
    fixed_block = fixed_covariance_block(fixed, fixed_covariance)
    out = _refine(problem, starts, free, hold, undetermined, fixed_block, bound, coils.max_current_A,
                  max_condition)

    r = residual_nT(out.params, m, h, i)
    fitted = out.fitted
    sigma = np.sqrt(np.diag(fitted.covariance))
    return MagFit(params=out.params, sigma=sigma, covariance=fitted.covariance,
                  covariance_statistical=fitted.statistical,
                  undetermined=out.undetermined, linear_params=p_lin,
                  residual_rms_before_nT=rms_before,
                  residual_rms_after_nT=float(np.sqrt(np.mean(r**2))),
                  residual_sigma_nT=float(np.sqrt(fitted.residual_variance_nT2)),
                  condition_number=out.condition_number, n_used=n,
                  n_outliers=int((~fitted.inliers).sum()), converged=out.converged, inliers=fitted.inliers,
                  fixed=dict(fixed))


def _first_guesses(m, h, i, switching, fixed, free, hold, noise_nT) -> tuple[np.ndarray, list[np.ndarray]]:
    """The linear step, with the currents of the fixed crosstalk removed beforehand; returns its
    parameter vector and the starts of the nonlinear fit: the linear guess, and also the nominal
    sensor with the linear bias when the linear soft iron is implausible."""
    k_fixed = matrices_from_params(np.where(free, 0.0, hold))[2]
    k_fixed[:, ~switching] = 0.0
    coils_lin = switching & np.array([any(crosstalk_name(j, c) not in fixed for j in range(3))
                                      for c in range(3)])
    lin = linear_calibration(m - i @ k_fixed.T, h, i, coils=coils_lin, sigma_nT=noise_nT or 1.0)
    p_lin = params_from_matrices(lin.bias_nT, lin.soft_iron, lin.crosstalk_nT_per_A)
    starts = [np.where(free, p_lin, hold)]
    if not lin.positive_definite or np.abs(lin.soft_iron - np.eye(3)).max() > MAX_SOFT_IRON_DEVIATION:
        nominal = nominal_params()
        starts.append(np.where(free, np.r_[p_lin[ParamIndex.BIAS], nominal[ParamIndex.BIAS.stop:]], hold))
    return p_lin, starts


def _screen_until_conditioned(p, free, m, i, max_condition) -> dict[str, str]:
    """Parameter name -> reason for every parameter the observability screen holds at ``p``,
    repeating the screen over the remaining free ones until it holds no more."""
    free = free.copy()
    held: dict[str, str] = {}
    while True:
        hold = screen(p, free, m, i, max_condition).hold
        if not hold:
            return held
        for k, why in hold.items():
            held[PARAM_NAMES[k]] = why
            free[k] = False


def _refine(problem: _Problem, starts, free, hold, undetermined, fixed_block, bound, imax,
            max_condition) -> _Refined:
    """Solve from the best start, then alternate the observability screen, the covariance and the
    sigma test, holding one more parameter and refitting each time a test fails."""
    free = free.copy()
    undetermined = dict(undetermined)
    p, ok, p_start = _best_of(starts, free, problem)
    converged = True
    fitted = None
    cond = np.inf
    for _ in range(N_PARAMS + 1):
        converged = converged and ok
        checked = screen(p, free, problem.m, problem.i, max_condition)
        cond = checked.condition_number
        if checked.hold:
            for k, why in checked.hold.items():
                undetermined[PARAM_NAMES[k]] = why
                free[k] = False
            p, ok = _solve(np.where(free, p_start, hold), free, problem)
            continue
        fitted = problem.covariance(p, free, consider_covariance(undetermined, fixed_block, bound))
        cov = fitted.covariance
        # a parameter whose 1-sigma exceeds any plausible value is not determined by these data
        ratio = np.where(free, np.sqrt(np.diag(cov)) / bound, 0.0)
        k = int(np.argmax(ratio))
        if ratio[k] <= 1.0:
            break
        undetermined[PARAM_NAMES[k]] = sigma_reason(k, float(np.sqrt(cov[k, k])), bound[k], imax)
        free[k] = False
        p, ok = _solve(np.where(free, p_start, hold), free, problem)
    if fitted is None:
        fitted = problem.covariance(p, free, consider_covariance(undetermined, fixed_block, bound))
    return _Refined(p, fitted, cond, converged, undetermined)


def _best_of(starts, free, problem: _Problem):
    """Solve from each start; keep the solution of least robust cost (and the start it came from,
    from which refits after fixing a parameter begin)."""
    best = None
    for p0 in starts:
        p, ok = _solve(p0, free, problem)
        z = (residual_nT(p, problem.m, problem.h, problem.i) / problem.f_scale) ** 2
        cost = float(np.sum(2.0 * (np.sqrt(1.0 + z) - 1.0)))  # soft_l1, scale-free comparison
        if best is None or cost < best[2]:
            best = (p, ok, cost, p0)
    return best[0], best[1], best[3]


def _solve(p0, free, problem: _Problem):
    """Robust least squares over the free parameters; the others stay at their values in ``p0``."""
    if not np.any(free):
        return p0.copy(), True
    m, h, i = problem.m, problem.h, problem.i

    def fun(x):
        p = p0.copy()
        p[free] = x
        return residual_nT(p, m, h, i)

    def jac(x):
        p = p0.copy()
        p[free] = x
        return jacobian(p, m, i)[:, free]

    res = least_squares(fun, p0[free], jac=jac, loss=problem.loss, f_scale=problem.f_scale, x_scale="jac",
                        method="trf", xtol=1e-12, ftol=1e-12, gtol=1e-10, max_nfev=200)
    p = p0.copy()
    p[free] = res.x
    return p, bool(res.success)
