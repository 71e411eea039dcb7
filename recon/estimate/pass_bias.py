"""The pass's gyro model from the lengths of the field's motion: one bias, or two (a step).

A gyro ``w_g = (I + E) w + beta`` leaves, at each independent slope i of the field
(:mod:`.kinematics`), the residual ``e_i = P db/dt + (w_g - beta - E w_g) x b`` whose length has the
Rice mean and spread of ``rho_i`` and ``sigma_i``. Nonlinear least squares on the standardised
lengths ``(|e_i| - mean_i) / sd_i`` fits beta (constant, or one value before and one after a step
time) and E (six symmetric elements: scale and non-orthogonality; three of a small rotation between
the gyro's and the magnetometer's axes), E with a prior of a few percent (a body that hardly changes
its rate then leaves E at zero instead of trading it against the bias). The sum of squares is the
test's chi-square, with the samples less the determined unknowns as degrees of freedom.

A step: the split time with the largest chi-square gain over one bias is tested against
chi-square(3) at ``alpha / splits`` (Bonferroni over the splits tried); its time is refined to the
sample between the two candidate splits beside it.

References
----------
Rice, S. O. (1945). Mathematical analysis of random noise. Bell Syst. Tech. J. 24(1), 46-156.
Basseville, M. and Nikiforov, I. V. (1993). Detection of Abrupt Changes: Theory and Application.
Prentice Hall. Ch. 2 (one change point by maximising a likelihood ratio over its position) (memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.optimize import brentq, least_squares

from ..core import RAD_PER_DEG, cross_matrices
from .kinematics import FIELD_TURN_NT_S_AT_1S, SLOPE_HALF_WIDTHS_S, FieldMotion, length_moments

__all__ = ["LengthFit", "StepEvidence", "fit_lengths", "find_step", "noise_of_level", "SCALE_PRIOR",
           "ALIGNMENT_PRIOR_RAD", "NOISE_SCALE_MAX", "WORST_LEVEL", "STEP_GRID_S", "MIN_SIDE_S"]

# 1-sigma priors of the gyro's scale and non-orthogonality (MEMS: a few percent) and of the rotation
# between the gyro's and the magnetometer's axes (a degree) (common practice, no source).
SCALE_PRIOR = 0.05
ALIGNMENT_PRIOR_RAD = 0.02
_PRIOR = np.r_[np.full(6, SCALE_PRIOR), np.full(3, ALIGNMENT_PRIOR_RAD)]
# The noise of a slope (magnetometer noise from second differences, gyro noise, the slope's own model)
# may be off by this factor as a whole: short slopes over coil steps measured 10 % more scatter than
# their noise model, a corrupted calibration can halve the second-difference estimate (common
# practice, no source).
NOISE_SCALE_MAX = 1.5
WORST_LEVEL = 2.0
# Step times tried, s apart, and the least stretch of data on each side, s: five minutes hold about 30
# independent slopes (10 s apart at the longest), enough that a side's bias is not fitted to a handful
# of lengths with one of their several minima (common practice, no source).
STEP_GRID_S = 60.0
MIN_SIDE_S = 300.0
FINE_GRID_S = 5.0
# A step must change the bias on some axis by at least this, rad/s (0.05 deg/s turns the attitude by
# 3 deg a minute; smaller changes are the filter's bias walk to follow), and by this factor times the
# bias random walk's spread over the pass (common practice, no source).
MIN_STEP_RAD_S = 0.05 * RAD_PER_DEG
STEP_WALK_FACTOR = 5.0
_HALF_MAX = max(SLOPE_HALF_WIDTHS_S)


@dataclass(frozen=True)
class LengthFit:
    """One fit of the gyro model to the lengths.

    Attributes
    ----------
    beta : (3,) rad/s, body axes (before the step for a two-bias fit); beta_after : (3,) or None
    split_s : float or None, the step time of a two-bias fit, s
    scale_misalignment : (3, 3) E
    cov : (p, p) covariance of the unknowns (beta, beta_after, then the nine elements of E)
    chi2 : float; dof : int; p_value : float; n : int, samples
    noise_level : the noise level the lengths were standardised with (:func:`noise_of_level`)
    """

    beta: np.ndarray
    beta_after: np.ndarray | None
    split_s: float | None
    scale_misalignment: np.ndarray
    cov: np.ndarray
    chi2: float
    dof: int
    p_value: float
    n: int
    noise_level: float


@dataclass(frozen=True)
class StepEvidence:
    """A step in the gyro bias.

    Attributes
    ----------
    t_s, t_lo_s, t_hi_s : the step time and the interval of times that fit nearly as well, s
    before_rad_s, after_rad_s : (3,) bias each side, rad/s; cov_before, cov_after : (3, 3) their covariances
    delta_chi2 : chi-square gained by the step over one bias; p_value : of the two-bias fit
    """

    t_s: float
    t_lo_s: float
    t_hi_s: float
    before_rad_s: np.ndarray
    after_rad_s: np.ndarray
    cov_before: np.ndarray
    cov_after: np.ndarray
    delta_chi2: float
    p_value: float


def _scale_regressor(w: np.ndarray) -> np.ndarray:
    """(n, 3, 9) R with ``E w = R e`` for E = [[e0, e3 - e8, e4 + e7], [e3 + e8, e1, e5 - e6],
    [e4 - e7, e5 + e6, e2]]: six symmetric elements and a small rotation (e6, e7, e8)."""
    z = np.zeros(len(w))
    x, y, q = w[:, 0], w[:, 1], w[:, 2]
    return np.stack([np.stack([x, z, z, y, q, z, z, q, -y], axis=1),
                     np.stack([z, y, z, x, z, q, -q, z, x], axis=1),
                     np.stack([z, z, q, z, x, y, y, -x, z], axis=1)], axis=1)


def _scale_matrix(e: np.ndarray) -> np.ndarray:
    return np.array([[e[0], e[3] - e[8], e[4] + e[7]], [e[3] + e[8], e[1], e[5] - e[6]],
                     [e[4] - e[7], e[5] + e[6], e[2]]])


def _scale_vector(E: np.ndarray) -> np.ndarray:
    """The nine elements of E (inverse of :func:`_scale_matrix`)."""
    sym = 0.5 * (E + E.T)
    rot = 0.5 * (E - E.T)
    return np.array([sym[0, 0], sym[1, 1], sym[2, 2], sym[0, 1], sym[0, 2], sym[1, 2], rot[2, 1], rot[0, 2], rot[1, 0]])


def _unpack(theta: np.ndarray, two: bool) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    nb = 6 if two else 3
    return theta[0:3], (theta[3:6] if two else None), theta[nb:nb + 9]


def fit_lengths(fm: FieldMotion, *, split_s: float | None = None, w_gyro_rad_s: np.ndarray | None = None,
                noise_level: float | None = None, starts: tuple = ()) -> LengthFit:
    """Least squares of the gyro model on the standardised lengths (see the module docstring).

    Parameters
    ----------
    fm : the field's motion; split_s : step time for a two-bias fit, or None
    w_gyro_rad_s : (n, 3) gyro readings to use instead of ``fm``'s (the power computation)
    noise_level : the noise level (:func:`noise_of_level`); None: estimated from the data (the level
        at which the chi-square equals its degrees of freedom), at most ``WORST_LEVEL`` (the worst
        storm and the noise model off by ``NOISE_SCALE_MAX``), so only a misfit beyond both tests high

    starts : further starting biases, (3,) each (or (6,) for a two-bias fit); the least squares on
        lengths can have several minima where the field hardly turns in body axes, and the lowest is
        kept

    Each bias starts from the least-squares fit of e = 0 on its own samples, and from ``starts``.
    """
    model = _LengthModel(fm, split_s, w_gyro_rad_s)
    level = WORST_LEVEL if noise_level is None else noise_level
    theta = model.solve(level, starts)
    if noise_level is None:
        chi2_at = lambda lam: model.chi2(theta, lam)  # noqa: E731
        if chi2_at(WORST_LEVEL) < model.dof:
            level = float(brentq(lambda lam: chi2_at(lam) - model.dof, 0.0, WORST_LEVEL, xtol=1e-3)) \
                if chi2_at(0.0) > model.dof else 0.0
            theta = model.solve(level, (*starts, theta[:model.nb]))
    return model.result(theta, level)


def noise_of_level(level: float) -> tuple[float, float]:
    """(field turn over 1 s slopes, nT/s; scale of the whole noise) of a noise level in [0, 2]: from 0
    to 1 the unmodelled field's turn grows to ``FIELD_TURN_NT_S_AT_1S``; from 1 to 2 the whole noise
    grows by up to ``NOISE_SCALE_MAX``."""
    return (FIELD_TURN_NT_S_AT_1S * min(level, 1.0), 1.0 + (NOISE_SCALE_MAX - 1.0) * max(level - 1.0, 0.0))


class _LengthModel:
    """The residual lengths of one gyro model, standardised with a given field-turn level."""

    def __init__(self, fm: FieldMotion, split_s: float | None, w_gyro_rad_s: np.ndarray | None):
        self.fm, self.split_s = fm, split_s
        w = fm.w_gyro_rad_s if w_gyro_rad_s is None else np.asarray(w_gyro_rad_s, float)
        self.w = w
        self.bx = cross_matrices(fm.b_body_nT)                      # [b x]
        self.base = fm.bdot_perp_nT_s + np.cross(w, fm.b_body_nT)   # e = base + b x (beta + E w)
        self.R = _scale_regressor(w)
        self.two = split_s is not None
        self.after = (fm.t_s >= split_s) if self.two else np.zeros(len(fm.t_s), bool)
        self.nb = 6 if self.two else 3
        self.n = len(fm.t_s)
        # lengths where the field's own turn stands out of the noise, vectors elsewhere (see residuals)
        self.vector = fm.rho_nT_s < fm.sigma0_nT_s
        self.dof = max(int(np.sum(~self.vector)) + 2 * int(np.sum(self.vector)) - self.nb, 1)

    def residuals(self, theta: np.ndarray, level: float) -> tuple[np.ndarray, np.ndarray]:
        """Standardised residuals and their Jacobian: the length of e where the field's own turn
        stands out of the noise (rho >= sigma), the vector e itself elsewhere, its noise then
        including the turn's unknown direction (rho^2 / 2 per axis across the field)."""
        b1, b2, e = _unpack(theta, self.two)
        nb, after, vec = self.nb, self.after, self.vector
        sigma = self.fm.sigma(*noise_of_level(level))
        beta = np.where(after[:, None], b2 if self.two else b1, b1)
        v = beta + np.einsum("nij,j->ni", self.R, e)
        res = self.base + np.einsum("nij,nj->ni", self.bx, v)
        # d res / d theta, (n, 3, p)
        D = np.zeros((self.n, 3, nb + 9))
        D[:, :, 0:3] = np.where(after[:, None, None], 0.0, self.bx)
        if self.two:
            D[:, :, 3:6] = np.where(after[:, None, None], self.bx, 0.0)
        D[:, :, nb:] = self.bx @ self.R
        ln = ~vec
        mean, sd = length_moments(self.fm.rho_nT_s[ln], sigma[ln])
        a = np.maximum(np.linalg.norm(res[ln], axis=1), 1e-12)
        r_len = (a - mean) / sd
        J_len = np.einsum("ni,nip->np", res[ln] / a[:, None], D[ln]) / sd[:, None]
        s_vec = np.sqrt(sigma[vec] ** 2 + 0.5 * self.fm.rho_nT_s[vec] ** 2)
        r_vec = (res[vec] / s_vec[:, None]).ravel()
        J_vec = (D[vec] / s_vec[:, None, None]).reshape(-1, nb + 9)
        r = np.r_[r_len, r_vec, theta[nb:] / _PRIOR]
        J = np.vstack([J_len, J_vec, np.hstack([np.zeros((9, nb)), np.diag(1.0 / _PRIOR)])])
        return r, J

    def chi2(self, theta: np.ndarray, level: float) -> float:
        r = self.residuals(theta, level)[0]
        return float(r @ r)

    def solve(self, level: float, starts: tuple = ()) -> np.ndarray:
        """The unknowns at the lowest minimum reached from the linear start and ``starts``."""
        first = np.zeros(self.nb)
        first[0:3] = _linear_start(self.fm.take(~self.after), self.w[~self.after])
        if self.two:
            first[3:6] = _linear_start(self.fm.take(self.after), self.w[self.after])
        best = None
        for b0 in (first, *starts):
            b0 = np.asarray(b0, float)
            start = np.r_[np.tile(b0, self.nb // len(b0)), np.zeros(9)]
            sol = least_squares(lambda th: self.residuals(th, level)[0], start,
                                jac=lambda th: self.residuals(th, level)[1], method="lm", xtol=1e-12, ftol=1e-12,
                                max_nfev=200)
            c = self.chi2(sol.x, level)
            if best is None or c < best[0]:
                best = (c, sol.x)
        return best[1]

    def result(self, theta: np.ndarray, level: float) -> LengthFit:
        r, J = self.residuals(theta, level)
        chi2 = float(r @ r)
        cov = np.linalg.pinv(J.T @ J, rcond=1e-12, hermitian=True)
        b1, b2, e = _unpack(theta, self.two)
        return LengthFit(b1, b2, self.split_s, _scale_matrix(e), cov, chi2, self.dof,
                         float(stats.chi2.sf(chi2, self.dof)), self.n, level)


def _linear_start(fm: FieldMotion, w: np.ndarray) -> np.ndarray:
    """Least squares of e = 0 for one bias: close to the answer (off by at most rho / |b|)."""
    y = (fm.bdot_perp_nT_s + np.cross(w, fm.b_body_nT)).ravel()
    beta, *_ = np.linalg.lstsq(cross_matrices(fm.b_body_nT).reshape(-1, 3), -y, rcond=None)
    return beta


def find_step(fm: FieldMotion, one: LengthFit, alpha: float, dense: FieldMotion | None = None,
              bias_walk_rad_s_sqrt_s: float = 0.0) -> StepEvidence | None:
    """The step time where two biases fit and one does not (None: no such time).

    Split times every ``STEP_GRID_S`` with ``MIN_SIDE_S`` of data on each side are tried; the best is
    refined between its neighbours on the grid with ``dense`` (slopes at every sample, when given),
    and both models are fitted again without the slopes that reach into the step's interval (they
    belong to neither bias). The chi-square gain must pass chi-square(3) at ``alpha / splits`` and the
    two-bias fit must pass at ``alpha``; and the change must be a step, not the bias's random walk: on
    some axis at least ``MIN_STEP_RAD_S``, ``STEP_WALK_FACTOR`` times the walk's spread over the pass and
    3 sigma of its own uncertainty.
    """
    grid = np.arange(fm.t_s[0] + MIN_SIDE_S, fm.t_s[-1] - MIN_SIDE_S + 1e-9, STEP_GRID_S)
    if not len(grid):
        return None
    worst = WORST_LEVEL
    ref = fit_lengths(fm, noise_level=worst, starts=(one.beta,)).chi2
    gains = np.array([ref - fit_lengths(fm, split_s=float(t), noise_level=worst, starts=(one.beta,)).chi2
                      for t in grid])
    k = int(np.argmax(gains))
    lo, hi = grid[max(k - 1, 0)], grid[min(k + 1, len(grid) - 1)]
    t_fine, fine = _refine_split(fm, one, float(lo), float(hi))
    t, t_lo, t_hi = (_refine_time(dense, fine, t_fine - FINE_GRID_S, t_fine + FINE_GRID_S) if dense is not None
                     else (t_fine, t_fine - FINE_GRID_S, t_fine + FINE_GRID_S))
    clear = fm.take((fm.t_s + _HALF_MAX < t_lo) | (fm.t_s - _HALF_MAX > t_hi))
    two = fit_lengths(clear, split_s=t, starts=(one.beta,))
    # the two models compared at the noise level the two-bias model leaves (its own estimate), the one
    # bias also started from either side's (the lowest of the minima)
    gain = fit_lengths(clear, noise_level=two.noise_level, starts=(one.beta, two.beta, two.beta_after)).chi2 - two.chi2
    if gain < stats.chi2.isf(alpha / len(grid), 3) or two.p_value < alpha:
        return None
    delta = two.beta_after - two.beta
    sigma = np.sqrt(np.clip(np.diag(two.cov[0:3, 0:3]) + np.diag(two.cov[3:6, 3:6]), 0.0, None))
    walk = STEP_WALK_FACTOR * bias_walk_rad_s_sqrt_s * np.sqrt(float(fm.t_s[-1] - fm.t_s[0]))
    if not np.any((np.abs(delta) >= max(MIN_STEP_RAD_S, walk)) & (np.abs(delta) >= 3.0 * sigma)):
        return None
    return StepEvidence(t, t_lo, t_hi, two.beta, two.beta_after, two.cov[0:3, 0:3], two.cov[3:6, 3:6], float(gain),
                        two.p_value)


def _refine_split(fm: FieldMotion, one: LengthFit, lo: float, hi: float) -> tuple[float, LengthFit]:
    """The split time in [lo, hi] on a ``FINE_GRID_S`` grid with the lowest two-bias chi-square, each
    tried without the slopes that span it, and that fit."""
    best = None
    for t in np.arange(lo, hi + 1e-9, FINE_GRID_S):
        clear = fm.take(np.abs(fm.t_s - t) > fm.half_width_s)
        f = fit_lengths(clear, split_s=float(t), noise_level=WORST_LEVEL, starts=(one.beta,))
        if best is None or f.chi2 - f.dof < best[0]:
            best = (f.chi2 - f.dof, float(t), f)
    return best[1], best[2]


def _refine_time(fm: FieldMotion, fit: LengthFit, lo: float, hi: float) -> tuple[float, float, float]:
    """The instant in [lo, hi] that best splits the samples between the two biases (cumulative sums of
    each sample's standardised squared residual under either bias), and the interval of instants within
    ``4 m`` of it (m: the samples one slope spans, since neighbouring slopes share them; about two
    sigma), never narrower than the slope's half width either side."""
    sel = (fm.t_s >= lo) & (fm.t_s < hi)
    if sel.sum() < 4:
        return 0.5 * (lo + hi), lo, hi
    part = fm.take(sel)
    per = []
    for beta in (fit.beta, fit.beta_after):
        model = _LengthModel(part, None, None)
        theta = np.r_[beta, _scale_vector(fit.scale_misalignment)]
        r = model.residuals(theta, fit.noise_level)[0][:-9]
        sq = np.zeros(model.n)
        sq[~model.vector] = r[:int(np.sum(~model.vector))] ** 2
        sq[model.vector] = np.sum(r[int(np.sum(~model.vector)):].reshape(-1, 3) ** 2, axis=1)
        per.append(sq)
    r0, r1 = per
    s = np.r_[0.0, np.cumsum(r0)] + np.r_[np.cumsum(r1[::-1])[::-1], 0.0]
    i = int(np.argmin(s))
    t_at = np.r_[part.t_s, part.t_s[-1]]
    half = 1.0
    m = max(1.0, 2.0 * half / float(np.median(np.diff(part.t_s))))
    near = np.nonzero(s - s[i] <= 4.0 * m)[0]
    t_step = float(t_at[i])
    return t_step, min(float(t_at[near.min()]), t_step - half), max(float(t_at[near.max()]), t_step + half)
