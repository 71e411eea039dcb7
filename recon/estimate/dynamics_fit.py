"""Maximum likelihood of the rigid-body model's parameters around the dynamics-mode filter.

The filter-error method (Maine & Iliff 1981; Jategaonkar 2006 ch. 5): for parameters ``p`` the
forward filter gives the innovations ``nu_k`` of every magnetometer update and their covariance
``S_k``; the negative log-likelihood is ``1/2 sum (nu_k^T S_k^-1 nu_k + ln det S_k)`` plus the
prior's ``1/2 |L^-1 (p - p0)|^2``. The parameters (inertia shape, residual dipole, actuation
latency: :mod:`.dynamics_params`) act on the motion, hardly on ``S_k``, so as in the filter-error
method the ``ln det`` term is left out of the Gauss-Newton steps: the cost is the sum of squared
whitened innovations ``e_k = L_k^-1 nu_k`` (``S_k = L_k L_k^T``) and the whitened prior residual.
Levenberg-Marquardt steps with forward-difference sensitivities (one forward run per parameter) in
prior-whitened coordinates ``z = L^-1 (p - p0)``; the covariance of the estimate is ``L (G^T G)^-1
L^T`` with ``G`` the sensitivity of the stacked residuals to ``z`` (Cramer-Rao bound of the
Gauss-Newton approximation). The fitted model replaces the mission file's only when the
likelihood-ratio test says the data demand it (Wilks 1938).

The compiled update writes each ``e_k`` and ``ln det S_k`` from the predicted ``S_k`` it factors
(:mod:`.kernels.update`).

References
----------
Maine, R. E. and Iliff, K. W. (1981). Formulation and implementation of a practical algorithm for
parameter estimation with process and measurement noise. SIAM J. Appl. Math. 41(3), 558-579 (memory).
Jategaonkar, R. V. (2006). Flight Vehicle System Identification: A Time Domain Methodology. AIAA.
Ch. 5 (filter error method) (memory).
Wilks, S. S. (1938). The large-sample distribution of the likelihood ratio for testing composite
hypotheses. Ann. Math. Statist. 9(1), 60-62.
Marquardt, D. W. (1963). An algorithm for least-squares estimation of nonlinear parameters. J. SIAM
11(2), 431-441.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy.stats import chi2

from .coil_torque import CoilSchedule
from .dynamics_params import ModelLayout, ModelPrior
from .initial import InitialState
from .kernels import MODE_DYNAMICS, P_SIGF, N, forward_pass
from .run import filter_params
from .types import NoiseModel

__all__ = ["FitProblem", "ForwardRun", "ModelFit", "forward_run", "forward_only", "whitened_innovations", "fit_model",
           "neg_log_likelihood",
           "dynamics_inputs", "significant", "held_at_prior", "FIT_FALSE_ALARM"]

# Forward-difference step in prior-whitened units: small against every parameter's posterior spread
# (the tightest, the residual dipole, ends near 0.02 prior sigmas) yet far above rounding.
FD_STEP = 0.005
# Stop when a step is predicted to lower -2 ln L by less than this (one unit of chi-square is the
# resolution of a likelihood-ratio test; a tenth of it changes nothing; common practice, no source).
STOP_DECREASE = 0.1
MAX_ITERATIONS = 8
# False-alarm rate of the likelihood-ratio test that keeps a fitted model (1 %: a model change is
# taken only on clear evidence; common practice, no source).
FIT_FALSE_ALARM = 0.01


def dynamics_inputs(t: np.ndarray, m_steps: np.ndarray, r_km: np.ndarray) -> np.ndarray:
    """Per-step inputs of dynamics mode (K, 9): the mean dipole over the step (A m^2, body) and the
    position at both ends of it (km, GCRF; the last step repeats its own)."""
    u = np.zeros((len(t), 9))
    u[:, 0:3] = m_steps
    u[:, 3:6] = r_km
    u[:-1, 6:9] = r_km[1:]
    u[-1, 6:9] = r_km[-1]
    return u


@dataclass(frozen=True)
class FitProblem:
    """Everything the likelihood needs besides the parameters and the opening state.

    Attributes
    ----------
    t : (K,) s since the pass epoch; usable : (K,) bool, rows used for updates
    b_body_nT : (K, 3) nT (finite); b_ref_nT : (K, 3) nT GCRF (finite, gaps filled); r_km : (K, 3) km GCRF
    noise : NoiseModel with every level filled in
    prior : ModelPrior
    schedule : CoilSchedule or None (no coils)
    """

    t: np.ndarray
    usable: np.ndarray
    b_body_nT: np.ndarray
    b_ref_nT: np.ndarray
    r_km: np.ndarray
    noise: NoiseModel
    prior: ModelPrior
    schedule: CoilSchedule | None

    def decimated(self, step: int) -> FitProblem:
        """Every ``step``-th row (the first kept): a coarse grid on which a filter run costs ``step`` times less."""
        if step <= 1:
            return self
        rows = slice(None, None, step)
        return dataclasses.replace(self, t=np.ascontiguousarray(self.t[rows]),
                                   usable=np.ascontiguousarray(self.usable[rows]),
                                   b_body_nT=np.ascontiguousarray(self.b_body_nT[rows]),
                                   b_ref_nT=np.ascontiguousarray(self.b_ref_nT[rows]),
                                   r_km=np.ascontiguousarray(self.r_km[rows]))

    def model(self, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The filter parameters and the per-step inputs of model parameters ``p``."""
        prm = filter_params(self.noise, 0.0, self.prior.inertia(p))
        m = np.zeros((len(self.t), 3)) if self.schedule is None else \
            self.schedule.dipole_over_steps(self.t, self.prior.latency(p), self.prior.coil_gains(p))
        return prm, dynamics_inputs(self.t, m + self.prior.residual_dipole(p), self.r_km)


@dataclass(frozen=True)
class ForwardRun:
    """The forward filter's output: updated attitude, rate, field error, packed P+, NIS and innovations,
    and the filter parameters it ran with."""

    q: np.ndarray
    v: np.ndarray
    db: np.ndarray
    p_packed: np.ndarray
    nis: np.ndarray
    innov: np.ndarray
    prm: np.ndarray


def forward_only(t: np.ndarray, u: np.ndarray, usable: np.ndarray, b_body_nT: np.ndarray, b_ref_nT: np.ndarray,
                 prm: np.ndarray, init: InitialState) -> ForwardRun:
    """The forward filter alone (no smoother) in dynamics mode on plain arrays (see :func:`run_filter`)."""
    kk = len(t)
    p0 = np.zeros((N, N))
    p0[:3, :3] = np.diag(init.sigma_att_rad ** 2)
    p0[3:6, 3:6] = np.diag(init.sigma_v ** 2)
    p0[6:, 6:] = np.eye(3) * prm[P_SIGF] ** 2
    q, v, db = np.empty((kk, 4)), np.empty((kk, 3)), np.empty((kk, 3))
    packed, nis, innov = np.empty((kk, N * (N + 1) // 2)), np.empty(kk), np.empty((kk, 4))
    forward_pass(MODE_DYNAMICS, t, u, usable, b_body_nT, b_ref_nT, prm, np.asarray(init.q_body_from_gcrf, float),
                 np.asarray(init.v, float).copy(), np.zeros(3), p0, q, v, db, packed, nis, innov)
    return ForwardRun(q, v, db, packed, nis, innov, prm)


class FilterDiverged(ArithmeticError):
    """The dynamics-mode filter lost its track: an update's innovation or covariance is not finite
    (an opening rate far from the truth on steps too coarse for it, or model parameters far off)."""


def forward_run(problem: FitProblem, p: np.ndarray, init: InitialState) -> ForwardRun:
    """The forward filter alone (no smoother) for model parameters ``p`` from the opening ``init``.

    Raises
    ------
    FilterDiverged
        Any update's whitened innovation is not finite.
    """
    prm, u = problem.model(p)
    run = forward_only(problem.t, u, problem.usable, problem.b_body_nT, problem.b_ref_nT, prm, init)
    if not np.isfinite(run.innov[problem.usable, :3]).all():
        raise FilterDiverged("the dynamics-mode filter diverged (non-finite innovation)")
    return run


def whitened_innovations(innov: np.ndarray, use: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The forward pass's whitened innovations ``L_k^-1 nu_k`` (``S_k = L_k L_k^T``, the predicted
    innovation covariance), (K, 3), and ``ln det S_k`` (K,), as the compiled update writes them; rows
    without an update are zero."""
    out = np.where(use[:, None], np.nan_to_num(innov[:, :3]), 0.0)
    return out, np.where(use, np.nan_to_num(innov[:, 3]), 0.0)


def neg_log_likelihood(problem: FitProblem, run: ForwardRun) -> float:
    """``sum (NIS_k + ln det S_k)`` over the updates (twice the negative log-likelihood less a constant);
    the first updates, where S cannot be recovered, count with their NIS alone."""
    _, logdet = whitened_innovations(run.innov, problem.usable)
    use = problem.usable
    return float(np.sum(run.nis[use]) + np.sum(logdet[use]))


def _residuals(problem: FitProblem, z: np.ndarray, init: InitialState) -> np.ndarray:
    """Stacked whitened innovations of the updates and the whitened prior residual ``z``."""
    run = forward_run(problem, problem.prior.params(z), init)
    e, _ = whitened_innovations(run.innov, problem.usable)
    return np.r_[e[problem.usable].ravel(), z]


@dataclass(frozen=True)
class ModelFit:
    """The estimated model parameters of one pass.

    Attributes
    ----------
    params : (SIZE,) estimate (layout :class:`recon.estimate.dynamics_params.ModelLayout`)
    whitened : (SIZE,) the same in prior-whitened coordinates ``z = L^-1 (p - p0)``
    covariance : (SIZE, SIZE) its covariance
    prior : ModelPrior
    inertia_kg_m2 : (3, 3) the estimated inertia (trace of the mission file's)
    iterations : int; filter_runs : int, forward runs spent
    cost_start, cost : float, sum of squared whitened residuals at the first iterate and at the estimate
    likelihood_ratio : float, decrease of ``-2 ln L`` of the data (the prior's term left out) from the
        first iterate to the estimate: with the first iterate at the prior mean, the likelihood-ratio
        statistic of the mission file's model against the fitted one
    accepted : bool, False when the fit did not pass the likelihood-ratio test (:func:`held_at_prior`):
        ``params`` are then the prior mean and ``covariance`` the fit's
    """

    params: np.ndarray
    whitened: np.ndarray
    covariance: np.ndarray
    prior: ModelPrior
    inertia_kg_m2: np.ndarray
    iterations: int
    filter_runs: int
    cost_start: float
    cost: float
    likelihood_ratio: float
    accepted: bool = True

    @property
    def sigma(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.covariance), 0.0, None))


def significant(fit: ModelFit, n_free: int) -> bool:
    """Whether the fitted model explains the data better than the mission file's by more than chance.

    Under the mission file's model the likelihood ratio is chi-square with one degree of freedom per
    free parameter (Wilks 1938); the fit is kept when it exceeds the ``1 - FIT_FALSE_ALARM`` quantile.
    A fit that does not pass moves the model by noise: on a slow bench momentum pass whose model is
    the mission file's but for coil gains 1-3 % off, the fitted model gave 1.2 deg RMS, the mission
    file's 0.37 deg (likelihood ratio 7.7 against 26.2 for twelve parameters).
    """
    return fit.likelihood_ratio > float(chi2.ppf(1.0 - FIT_FALSE_ALARM, n_free))


def held_at_prior(fit: ModelFit) -> ModelFit:
    """The fit with the prior mean as its estimate and its covariance kept (not significant, but the
    data still bound how far the parameters can be from the prior mean: the consider term uses it)."""
    mean = fit.prior.mean.copy()
    return dataclasses.replace(fit, params=mean, whitened=np.zeros_like(fit.whitened),
                               inertia_kg_m2=fit.prior.inertia(mean), accepted=False)


def _sensitivity(problem: FitProblem, z: np.ndarray, r0: np.ndarray, init: InitialState,
                 free: np.ndarray) -> np.ndarray:
    g = np.empty((len(r0), len(free)))
    for col, i in enumerate(free):
        dz = np.zeros(len(z))
        dz[i] = FD_STEP
        g[:, col] = (_residuals(problem, z + dz, init) - r0) / FD_STEP
    return g


def fit_model(problem: FitProblem, init: InitialState, *, free: np.ndarray | None = None,
              start: np.ndarray | None = None, max_iterations: int = MAX_ITERATIONS) -> ModelFit:
    """Levenberg-Marquardt on the whitened innovations from the prior mean (see the module's notes).

    Each iteration spends one forward run per free parameter for the sensitivities and one or more
    for the trial step; the damping shrinks after a step that lowers the cost and grows tenfold after
    one that does not. Parameters not in ``free`` (indices; default all) stay at the prior, with the
    prior's covariance. ``start`` (prior-whitened, as ``ModelFit.whitened``) replaces the prior mean
    as the first iterate.
    """
    size = ModelLayout.SIZE
    free = np.arange(size) if free is None else np.asarray(free, int)
    z = np.zeros(size) if start is None else np.asarray(start, float).copy()
    r = _residuals(problem, z, init)
    cost0 = cost = float(r @ r)
    lam, iterations = 1e-3, 0
    g = _sensitivity(problem, z, r, init, free)
    runs = 1 + len(free)
    while iterations < max_iterations:
        iterations += 1
        h, grad = g.T @ g, g.T @ r
        accepted = False
        while lam < 1e8:
            step = np.zeros(size)
            step[free] = -np.linalg.solve(h + lam * np.diag(np.diag(h)), grad)
            runs += 1
            try:
                r_new = _residuals(problem, z + step, init)
                c_new = float(r_new @ r_new)
            except FilterDiverged:  # a step too long: treated as one that does not lower the cost
                c_new = np.inf
            if c_new < cost:
                accepted = True
                break
            lam *= 10.0
        if not accepted:
            break
        predicted = -(2.0 * grad @ step[free] + step[free] @ h @ step[free])
        z, r, cost, lam = z + step, r_new, c_new, max(lam / 10.0, 1e-6)
        g = _sensitivity(problem, z, r, init, free)
        runs += len(free)
        if predicted < STOP_DECREASE:
            break
    cov_z = np.eye(size)
    cov_z[np.ix_(free, free)] = np.linalg.inv(g.T @ g)
    l_prior = problem.prior.sqrt_cov
    p = problem.prior.params(z)
    z0 = np.zeros(size) if start is None else np.asarray(start, float)
    ratio = (cost0 - z0 @ z0) - (cost - z @ z)
    return ModelFit(p, z, l_prior @ cov_z @ l_prior.T, problem.prior, problem.prior.inertia(p), iterations, runs,
                    cost0, cost, float(ratio))
