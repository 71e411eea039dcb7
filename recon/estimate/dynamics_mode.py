"""The reconstruction without a gyro (gyro absent or dead): dynamics mode.

Attitude and body rate are propagated with Euler's equations under the coil dipole, a residual dipole
and the gravity-gradient torque, corrected by the magnetometer only, as in Psiaki, Martel & Pal
(1990). In named steps:

1. the coil log placed on its control ticks: the applied-current profile (:mod:`.coil_torque`);
2. the opening candidates (:mod:`.dynamics_start`): from the gyro's live part when it died later in
   the pass, else every distinct minimum of the magnetometer-only opening fits over windows of
   several lengths;
3. on a coarse grid (:mod:`.dynamics_search`), each candidate relinearised once (the filter restarted
   from its smoothed first state with the opening's own uncertainty), its model fitted, and the
   candidate of largest likelihood kept;
4. the inertia shape, residual dipole, coil gains and actuation latency by maximum likelihood around
   the filter (:mod:`.dynamics_fit`), kept only when a likelihood-ratio test says the data demand
   them (else the mission file's model, with the fit's covariance for step 6); a kept fit is refined
   on all rows;
5. the final run (:mod:`.dynamics_smooth`): the filter on all rows, a filter backwards in time from its
   final state, and the forward filter and smoother restarted from the backward filter's first state;
6. the uncertainty of the fitted parameters carried into the stated covariance as a consider term:
   the smoother is rerun with the parameters moved along each column of the square root of their
   covariance, and the outer products of the changes in attitude and rate are added (Schmidt's
   consider covariance, evaluated by finite differences).

References
----------
Psiaki, M. L., Martel, F. and Pal, P. K. (1990). Three-axis attitude determination via Kalman
filtering of magnetometer data. J. Guidance 13(3), 506-514.
Schmidt, S. F. (1966). Application of state-space methods to navigation problems. Advances in
Control Systems 3, 293-340 (the consider covariance) (memory).
Tapley, B. D., Schutz, B. E. and Born, G. H. (2004). Statistical Orbit Determination. Elsevier.
Sec. 6.3 (consider covariance analysis) (memory).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.stats import chi2

from ..core import NS_PER_S
from .coil_torque import CoilSchedule, CoilTiming, coil_schedule
from .dynamics_fit import FIT_FALSE_ALARM, FilterDiverged, FitProblem, ModelFit, fit_model, held_at_prior, significant
from .dynamics_params import ModelLayout, ModelPrior, model_prior
from .dynamics_search import OPENING_WINDOWS, choose_opening
from .dynamics_smooth import consider_changes, smoothed_run, with_consider
from .dynamics_start import carry_back_with_dynamics, distinct_openings, gyro_seeded_start, opening_candidates
from .gyro_check import GyroCheck
from .initial import InitialState
from .kernels import MODE_DYNAMICS
from .noise import resolve_noise
from .run import extract_track
from .types import AttitudeHistory, DynamicsModel, FilterStart, NoiseModel, PassInputs

__all__ = ["DynamicsResult", "reconstruct_dynamics", "estimate_dynamics"]

# Relinearisations (restarts from the smoothed first state) of the final run before its backward filter.
RESTARTS_AFTER_FIT = 0
# Refine the coarse grid's model fit on all rows before the final run.
REFIT_ON_ALL_ROWS = True


@dataclass(frozen=True)
class DynamicsResult:
    """Dynamics mode's attitude history and what it estimated of the model on the way.

    Attributes
    ----------
    history : AttitudeHistory (its covariances include the consider term)
    fit : ModelFit or None (not fitted)
    schedule : CoilSchedule or None (no coil log)
    candidates : int, opening candidates tried
    """

    history: AttitudeHistory
    fit: ModelFit | None
    schedule: CoilSchedule | None
    candidates: int


def _fill_rows(t: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Copy of x (N, 3) with non-finite rows linearly interpolated in t (held beyond the ends)."""
    good = np.all(np.isfinite(x), axis=1)
    if good.all() or not good.any():
        return x.copy()
    out = x.copy()
    for ax in range(x.shape[1]):
        out[~good, ax] = np.interp(t[~good], t[good], x[good, ax])
    return out


def _candidates(problem: FitProblem, inputs: PassInputs, check: GyroCheck | None, noise: NoiseModel,
                init_window_s: float, seeded: bool = True) -> list[InitialState]:
    """The opening candidates at t[0]: the gyro-seeded start when the gyro died later in the pass (and
    ``seeded``), else the distinct minima of the magnetometer-only opening fits over windows of several
    lengths."""
    t, usable = problem.t, problem.usable
    prm, u = problem.model(problem.prior.mean)
    m_steps = u[:, 0:3]
    sig_vec = float(np.hypot(noise.mag_nT, noise.field_model_nT / np.sqrt(3.0)))
    seed = None
    if seeded and inputs.t_gyro_ns is not None:
        seed = gyro_seeded_start(t, inputs, check, noise, sig_vec, init_window_s)
    # the gyro-seeded start competes with the magnetometer-only openings on the likelihood: the gyro's
    # scale error, integrated over the seed's window, can put it tens of degrees off (a 3 % scale at
    # 3.4 deg/s over 424 s: 43 deg, scorecard seed 65000)
    found = ([] if seed is None else [seed]) + distinct_openings(opening_candidates(
        t[usable], inputs.b_body_nT[usable], inputs.b_ref_gcrf_nT[usable], m_steps[usable], problem.r_km[usable],
        prm, sig_vec, windows_s=tuple(f * init_window_s for f in OPENING_WINDOWS)))
    # each is solved at the first usable row; the filter starts at t[0]
    k0 = int(np.argmax(usable))
    return [carry_back_with_dynamics(c, t, k0, m_steps, problem.b_ref_nT, problem.r_km, prm) for c in found]


def _problem(inputs: PassInputs, noise: NoiseModel, inertia: np.ndarray, schedule: CoilSchedule | None,
             r_gcrf_km: np.ndarray | None, prior: ModelPrior | None) -> FitProblem:
    """The likelihood's fixed inputs. Rows without a reference (no orbit position) are not used for
    updates; for the torque in the propagation their field and position are interpolated."""
    t = (inputs.t_mag_ns - inputs.t_mag_ns[0]) / NS_PER_S
    r_km = np.zeros((len(t), 3)) if r_gcrf_km is None else np.nan_to_num(_fill_rows(t, np.asarray(r_gcrf_km, float)))
    if prior is None:
        prior = model_prior(inertia, (0.0, 0.0) if schedule is None else schedule.latency_prior_s)
    return FitProblem(t, inputs.usable, np.nan_to_num(inputs.b_body_nT), _fill_rows(t, inputs.b_ref_gcrf_nT), r_km,
                      noise, prior, schedule)


def reconstruct_dynamics(inputs: PassInputs, noise: NoiseModel, inertia: np.ndarray, coil_t_utc: np.ndarray | None,
                         i_coil_A: np.ndarray | None, dipole_per_amp: np.ndarray | None,
                         r_gcrf_km: np.ndarray | None, init_window_s: float, report: Callable[[str, float], None],
                         check: GyroCheck | None = None, timing: CoilTiming | None = None,
                         prior: ModelPrior | None = None, fit_model_parameters: bool = True) -> DynamicsResult:
    """Dynamics-mode reconstruction on the magnetometer time stamps, in the steps of the module's notes.

    Parameters as in :func:`recon.estimate.estimate_attitude` (inertia in kg m^2); ``timing`` places
    the coil log on its control ticks (None: the log's stamps are the switching instants); ``prior``
    replaces the default prior of the model parameters around ``inertia``
    (:func:`recon.estimate.dynamics_params.model_prior`); ``fit_model_parameters=False`` takes the
    prior's mean as exact (no fit, no consider term).
    """
    t_mag_ns, usable = inputs.t_mag_ns, inputs.usable
    noise, source = resolve_noise(noise, inputs.b_body_nT[usable], None, None)
    t = (t_mag_ns - t_mag_ns[0]) / NS_PER_S
    schedule = coil_schedule(int(t_mag_ns[0]), float(t[-1]), coil_t_utc, i_coil_A, dipole_per_amp, timing)
    problem = _problem(inputs, noise, inertia, schedule, r_gcrf_km, prior)
    report("initialisation", 0.05)
    candidates = _candidates(problem, inputs, check, noise, init_window_s)
    free = np.array([i for i in range(ModelLayout.SIZE) if schedule is not None or i not in ModelLayout.COILS])
    report("opening and model on a coarse grid", 0.1)
    try:
        choice = choose_opening(problem, candidates, free, fit=fit_model_parameters)
    except FilterDiverged:
        if inputs.t_gyro_ns is None:
            raise
        # the gyro-seeded opening lost the track (the gyro's last rates were already wrong): open from
        # the magnetometer alone
        candidates = _candidates(problem, inputs, check, noise, init_window_s, seeded=False)
        choice = choose_opening(problem, candidates, free, fit=fit_model_parameters)
    fit, p = choice.fit, problem.prior.mean
    if fit is not None and not significant(fit, len(free)):
        fit = held_at_prior(fit)
    elif fit is not None and REFIT_ON_ALL_ROWS:
        report("model fit on all rows", 0.5)
        # the refit starts from the coarse fit, so its own ratio measures the refinement, not the model
        # against the mission file's: the test's statistic stays the one the decision was made on
        decision = fit.likelihood_ratio
        fit = dataclasses.replace(fit_model(problem, choice.init, free=free, start=fit.whitened),
                                  likelihood_ratio=decision)
    if fit is not None:
        p = fit.params
    report("forward filter and smoother", 0.8)
    run, init_final = smoothed_run(problem, p, choice.init, RESTARTS_AFTER_FIT)
    sel = np.arange(len(t))
    smoothed = extract_track(run, True, sel, MODE_DYNAMICS, None, 0.0)
    forward = extract_track(run, False, sel, MODE_DYNAMICS, None, 0.0)
    if fit is not None:
        report("consider term", 0.9)
        d_s, d_f = consider_changes(problem, fit, init_final, run, free)
        smoothed, forward = with_consider(smoothed, d_s), with_consider(forward, d_f)
    init = choice.init
    start = FilterStart(init.method, init.window_s, np.rad2deg(init.sigma_att_rad).tolist(), run.smoother_bad,
                        init.fit, init.carried_back_s, rate0_dps=np.rad2deg(init.v).tolist())
    model = None if fit is None else model_figures(fit, free, schedule is not None, choice.candidates)
    hist = AttitudeHistory(t_mag_ns.astype("datetime64[ns]"), smoothed, forward, run.nis[usable],
                           t_mag_ns[usable].astype("datetime64[ns]"), "dynamics", "", (), noise, source, start,
                           model=model)
    return DynamicsResult(hist, fit, schedule, choice.candidates)


def model_figures(fit: ModelFit, free: np.ndarray, coils: bool, openings: int) -> DynamicsModel:
    """The fitted model's figures with their 1-sigma (first-order propagation of the fit's covariance;
    the inertia's by central differences of the inertia in the shape parameters)."""
    lay, p, cov = ModelLayout, fit.params, fit.covariance
    sig = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    shape = list(range(lay.MOMENTS.start, lay.TILT.stop))
    jac = np.empty((9, len(shape)))
    for col, i in enumerate(shape):
        h = 1e-6
        up, dn = p.copy(), p.copy()
        up[i] += h
        dn[i] -= h
        jac[:, col] = (fit.prior.inertia(up) - fit.prior.inertia(dn)).ravel() / (2.0 * h)
    j_var = np.einsum("ij,jk,ik->i", jac, cov[np.ix_(shape, shape)], jac)
    gains = ModelPrior.coil_gains(p) if coils else None
    return DynamicsModel(
        fitted=bool(fit.accepted), likelihood_ratio=float(fit.likelihood_ratio),
        threshold=float(chi2.ppf(1.0 - FIT_FALSE_ALARM, len(free))), free=int(len(free)),
        inertia_kg_m2=fit.prior.inertia(p), inertia_sigma_kg_m2=np.sqrt(np.clip(j_var, 0.0, None)).reshape(3, 3),
        residual_dipole_Am2=ModelPrior.residual_dipole(p), residual_dipole_sigma_Am2=sig[lay.DIPOLE].copy(),
        coil_gain=gains, coil_gain_sigma=None if gains is None else gains * sig[lay.COIL_GAIN],
        latency_s=ModelPrior.latency(p) if coils else None, latency_sigma_s=float(sig[lay.LATENCY]) if coils else None,
        openings=int(openings))


def estimate_dynamics(inputs: PassInputs, noise: NoiseModel, inertia: np.ndarray, coil_t_utc: np.ndarray | None,
                      i_coil_A: np.ndarray | None, dipole_per_amp: np.ndarray | None, r_gcrf_km: np.ndarray | None,
                      init_window_s: float, report: Callable[[str, float], None],
                      check: GyroCheck | None = None, timing: CoilTiming | None = None) -> AttitudeHistory:
    """:func:`reconstruct_dynamics`'s attitude history (the form :func:`recon.estimate.estimate_attitude` uses)."""
    return reconstruct_dynamics(inputs, noise, inertia, coil_t_utc, i_coil_A, dipole_per_amp, r_gcrf_km,
                                init_window_s, report, check=check, timing=timing).history
