"""The reconstruction with a live gyro: gyro mode.

Every gyro sample is held until the next one and every magnetometer sample is used at its own time
stamp (no resampling), so the filter steps over the union of both logs' time stamps; in a gap of the
gyro log the last sample is held and the attitude variance grows (see :mod:`.kernels.propagation`), so
a gap is bridged, never filled in. The opening attitude and gyro bias come from :mod:`.initial`. When
:mod:`.bias_step` finds a step in the gyro bias, the filter is rerun with the bias free to move where
it stepped.

References
----------
Lefferts, E. J., Markley, F. L. and Shuster, M. D. (1982). Kalman filtering for spacecraft attitude
estimation. J. Guidance 5(5), 417-429.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..core import DEG_PER_RAD, NS_PER_S, held_mean, utc_text
from .alignment import AlignmentFit, AlignmentPrior, AlignmentResult, fit_alignment, sym_from_six
from .bias_step import BiasStep, find_bias_step
from .clipping import with_clipped_solved
from .field_noise import FieldNoiseFit, fit_field_noise
from .initial import InitialState, carry_back_with_gyro, initial_state_with_gyro
from .iterate import iterate_smoothing, state_at
from .kernels import MODE_GYRO, P_SIGF, P_TAUF
from .noise import resolve_noise
from .nuisance import Corrections, consider_covariance, corrected_inputs, with_consider
from .run import FilterRun, extract_track, filter_params, forward_innovations, forward_log_likelihood, run_filter
from .step_grid import StepGrid, bias_step_inputs, step_grid
from .types import AttitudeHistory, FilterStart, NoiseModel, PassInputs

__all__ = ["estimate_gyro", "GyroSolution"]


def _opening(grid: StepGrid, inputs: PassInputs, noise: NoiseModel, init_window_s: float) -> InitialState:
    """Opening attitude and gyro bias, solved at the first usable row and carried back to the start."""
    usable = inputs.usable[grid.first_row:]
    t_mag_s = grid.t_s[grid.mag_pos][usable]
    sig_vec = float(np.hypot(noise.mag_nT, noise.field_model_nT / np.sqrt(3.0)))
    init = initial_state_with_gyro(t_mag_s, inputs.b_body_nT[grid.first_row:][usable],
                                   inputs.b_ref_gcrf_nT[grid.first_row:][usable], grid.t_gyro_s,
                                   inputs.w_gyro_body_rad_s, sigma_vec_nT=sig_vec,
                                   sigma_bias0_rad_s=noise.gyro_bias0_rad_s, window_s=init_window_s)
    # the opening is solved at the first usable row; the filter starts at t = 0
    return carry_back_with_gyro(init, float(t_mag_s[0]), 0.0, grid.t_gyro_s, inputs.w_gyro_body_rad_s,
                                noise.gyro_arw_rad_sqrt_s)


def _run_allowing_bias_step(grid: StepGrid, inputs: PassInputs, noise: NoiseModel, prm: np.ndarray,
                            init: InitialState, report: Callable[[str, float], None]
                            ) -> tuple[FilterRun, BiasStep | None]:
    """Filter and smoother; if a step in the gyro bias shows, rerun with the bias free to move there.

    Returns the last run and the step found (None: no step).
    """
    usable = inputs.usable[grid.first_row:]
    out_idx = np.full(len(grid.t_s), -1, np.int64)
    out_idx[grid.mag_pos] = np.arange(len(grid.mag_pos))

    def run(u: np.ndarray) -> FilterRun:
        return run_filter(MODE_GYRO, grid.t_s, u, grid.is_mag, grid.z, grid.r, prm, init, out_idx,
                          len(grid.mag_pos))

    # the clipped axes' solved values are no gyro readings: samples at full scale are left out
    clip = inputs.gyro_clipping

    def find_step(run_: FilterRun) -> BiasStep | None:
        return find_bias_step(grid.t_s[grid.mag_pos][usable], inputs.b_body_nT[grid.first_row:][usable],
                              inputs.b_ref_gcrf_nT[grid.first_row:][usable], run_.q_s[grid.mag_pos][usable],
                              grid.t_gyro_s, inputs.w_gyro_body_rad_s, noise.gyro_bias_walk_rad_s_sqrt_s,
                              full_scale_rad_s=None if clip is None else clip.full_scale_rad_s)

    result = run(grid.u)
    step = find_step(result)
    if step is None:
        return result, None
    report("rerun after gyro bias jump", 0.5)
    result = run(bias_step_inputs(grid.t_s, grid.u, step))
    # the first run's attitude drifts after an unmodelled step, and that attitude enters the
    # kinematic bias through A db_ref/dt: measure the step again on the rerun's attitude
    again = find_step(result)
    if again is None:
        return result, step
    if not step.t_lo_s <= again.t_s <= step.t_hi_s:
        report("rerun after gyro bias jump", 0.75)
        result = run(bias_step_inputs(grid.t_s, grid.u, again))
    return result, again


@dataclass(frozen=True)
class GyroSolution:
    """One gyro-mode solution: the corrected inputs, their step grid, the opening, the run and the
    gyro bias step found (None: none)."""

    inputs: PassInputs
    grid: StepGrid
    init: InitialState
    run: FilterRun
    step: BiasStep | None


def _solve(inputs: PassInputs, corr: Corrections, noise: NoiseModel, prm: np.ndarray, init_window_s: float,
           report: Callable[[str, float], None]) -> GyroSolution:
    """Opening, filter and smoother on the inputs with the corrections applied, solved again from the
    far end of its smoothed track until it settles (:mod:`recon.estimate.iterate`); the solution's
    ``init`` is then the smoothed start, where a forward run of the same pass is best begun."""
    fixed = corrected_inputs(inputs, corr)
    grid = step_grid(fixed)
    init = _opening(grid, fixed, noise, init_window_s)
    run, step = _run_allowing_bias_step(grid, fixed, noise, prm, init, report)
    out_idx = np.full(len(grid.t_s), -1, np.int64)
    out_idx[grid.mag_pos] = np.arange(len(grid.mag_pos))
    run, runs, _ = iterate_smoothing(run, grid.t_s, _step_u(grid, step), grid.is_mag, grid.z, grid.r, prm, out_idx,
                                     len(grid.mag_pos))
    if runs > 1:
        start = state_at(run, int(grid.mag_pos[0]), 0, False, init.method)
        # never held tighter than the opening was: the likelihood of the alignment fit and the consider
        # runs start here, and a start held tight at a wrong track pulls the fit to absorb it
        init = dataclasses.replace(init, q_body_from_gcrf=start.q_body_from_gcrf, v=start.v,
                                   sigma_att_rad=np.maximum(start.sigma_att_rad, init.sigma_att_rad),
                                   sigma_v=np.maximum(start.sigma_v, init.sigma_v))
    return GyroSolution(fixed, grid, init, run, step)


def _corrections(params: dict) -> Corrections:
    """Corrections from a parameter dict of the alignment fit (absent blocks are zero)."""
    return Corrections(np.asarray(params["theta"], float),
                       sym_from_six(params["scale"]) if "scale" in params else np.zeros((3, 3)),
                       float(params["time"][0]) if "time" in params else 0.0,
                       np.asarray(params["field"], float) if "field" in params else np.zeros(3))


def _likelihood(inputs: PassInputs, sol: GyroSolution, prm: np.ndarray) -> Callable[[dict], np.ndarray]:
    """The filter's whitened innovations (stacked, the updates of the first solution) as a function of
    the alignment parameters, from the first solution's opening and bias step."""
    n_mag = len(inputs.t_mag_ns)

    def per_row(g: StepGrid) -> np.ndarray:
        white = forward_innovations(MODE_GYRO, g.t_s, _step_u(g, sol.step), g.is_mag, g.z, g.r, prm, sol.init)
        return _by_row(g, white[g.mag_pos], n_mag)

    keep = np.isfinite(per_row(sol.grid)).all(axis=1)

    def evaluate(params: dict) -> np.ndarray:
        white = per_row(step_grid(corrected_inputs(inputs, _corrections(params))))
        return np.nan_to_num(white[keep]).ravel()

    return evaluate


def _by_row(g: StepGrid, x_at_mag: np.ndarray, n_rows: int) -> np.ndarray:
    """Values at the grid's magnetometer steps placed by magnetometer row, NaN on the rows before the
    grid's first. Runs with different corrections are compared by row, not by step: a time-tag shift
    can move a row onto a gyro stamp (the steps merge), off one, or out of the gyro's span, which
    changes the number of steps and the first row used."""
    out = np.full((n_rows,) + x_at_mag.shape[1:], np.nan)
    out[g.first_row + np.arange(len(g.mag_pos))] = x_at_mag
    return out


def _step_u(grid: StepGrid, step: BiasStep | None) -> np.ndarray:
    return grid.u if step is None else bias_step_inputs(grid.t_s, grid.u, step)


def _rates(sol: GyroSolution, rate_window_s: float) -> tuple[np.ndarray, float]:
    """The mean gyro rate over the rate window at each output row, and the white-noise window width."""
    g = sol.grid
    width = max(float(rate_window_s), g.dt_gyro_s)
    return held_mean(g.t_gyro_s, sol.inputs.w_gyro_body_rad_s, g.t_s[g.mag_pos], width), width


def _perturbed(sol: GyroSolution, inputs: PassInputs, corr: Corrections,
               blocks: list[tuple[tuple[str, ...], np.ndarray]], prm: np.ndarray,
               rate_window_s: float) -> tuple[tuple[np.ndarray, np.ndarray], list[tuple[np.ndarray, np.ndarray]]]:
    """The smoothed attitude and rate of one run with the corrections as they are (the nominal), and of
    one run with the corrections moved by each column of the Cholesky factor of each block's covariance.
    Every run starts from the solution's start with its bias step, so the runs differ only by the
    corrections (not by where the iterated solution happened to start)."""

    n_mag = len(inputs.t_mag_ns)

    def one(c: Corrections) -> tuple[np.ndarray, np.ndarray]:
        fixed = corrected_inputs(inputs, c)
        g = step_grid(fixed)
        out_idx = np.full(len(g.t_s), -1, np.int64)
        out_idx[g.mag_pos] = np.arange(len(g.mag_pos))
        run = run_filter(MODE_GYRO, g.t_s, _step_u(g, sol.step), g.is_mag, g.z, g.r, prm, sol.init, out_idx,
                         len(g.mag_pos))
        w_out, _ = _rates(GyroSolution(fixed, g, sol.init, run, sol.step), rate_window_s)
        q = run.q_s[g.mag_pos]
        return _by_row(g, np.where(q[:, 3:4] < 0, -q, q), n_mag), _by_row(g, w_out - run.v_s[g.mag_pos], n_mag)

    q0, w0 = one(corr)
    keep = np.isfinite(q0).all(axis=1)
    out = []
    for layout, cov in blocks:
        chol = np.linalg.cholesky(cov + 1e-30 * np.eye(len(cov)))
        for j in range(len(cov)):
            q, w = one(corr.moved(chol[:, j], layout))
            missing = ~np.isfinite(q).all(axis=1)  # rows this run did not reach: no change counted
            q[missing], w[missing] = q0[missing], w0[missing]
            out.append((q[keep], w[keep]))
    return (q0[keep], w0[keep]), out


def _consider_blocks(fit: AlignmentFit, prior: AlignmentPrior) -> list[tuple[tuple[str, ...], np.ndarray]]:
    """Whose uncertainty the consider term carries: the fitted parameters with their covariance; the
    gyro's scale, when the pass did not show it, with what the pass says about it (its covariance in the
    fit that had it: the prior's where the pass cannot see it, far less where it could and found
    nothing); and the unmodelled field's part that stays put over the pass (a constant GCRF vector of
    the fitted level, which the filter's decaying field state does not hold)."""
    blocks = [(fit.blocks, fit.cov)]
    if not fit.scale_kept:
        blocks.append((("scale",), fit.scale_cov_fitted))
    blocks.append((("field",), np.diag(prior.block("field")[1] ** 2)))
    return blocks


def estimate_gyro(inputs: PassInputs, noise: NoiseModel, init_window_s: float, rate_window_s: float,
                  report: Callable[[str, float], None], prior: AlignmentPrior | None = None) -> AttitudeHistory:
    """Gyro-mode reconstruction on the magnetometer time stamps from the filter's start on.

    A first run gives the opening and any gyro bias step (clipped gyro axes are solved again with its
    bias and attitude, and the pass run again). Then, by maximum likelihood around the filter: the
    unmodelled field's level (:mod:`recon.estimate.field_noise`), the magnetometer's misalignment and
    the gyro's scale (and the time-tag offset when the prior says it is not known;
    :mod:`recon.estimate.alignment`), and the field's level again with those corrections; the inputs
    are corrected and the filter run again. The uncertainty of the corrections, and of the field's
    part that stays put over the pass, enters the smoothed attitude's covariance as a consider term.
    Other parameters as in :func:`recon.estimate.estimate_attitude`; the anomaly ``gyro_bias_jump`` is
    raised when a step in the gyro bias was found.
    """
    prior = prior or AlignmentPrior()
    grid0 = step_grid(inputs)
    first, t_gyro_ns = grid0.first_row, inputs.t_gyro_ns
    usable = inputs.usable[first:]
    noise, source = resolve_noise(noise, inputs.b_body_nT[first:][usable], inputs.w_gyro_body_rad_s,
                                  (t_gyro_ns - t_gyro_ns[0]) / NS_PER_S)
    prm = filter_params(noise, grid0.dt_gyro_s, None)
    report("initialisation", 0.05)
    corr0 = Corrections(np.asarray(prior.misalignment_rad, float), np.zeros((3, 3)), 0.0)
    sol = _solve(inputs, corr0, noise, prm, init_window_s, report)
    if inputs.gyro_clipping is not None:
        # solve the clipped axes again with the filter's bias and attitude, and run again
        inputs = _clipped_again(inputs, sol, noise)
        sol = _solve(inputs, corr0, noise, prm, init_window_s, report)
    # the unmodelled field's level first: with the mission file's (quiet-day) level the alignment fit
    # would take a disturbed field for a misalignment; then the alignment; then the level again
    report("unmodelled field (maximum likelihood)", 0.25)
    given_field_nT = noise.field_model_nT
    noise, prm, _ = _with_field_fit(inputs, sol, corr0, noise, prm, grid0.dt_gyro_s, False, given_field_nT)
    report("sensor alignment (maximum likelihood)", 0.35)
    fit = fit_alignment(_likelihood(inputs, sol, prm), prior)
    corr = Corrections(fit.theta_rad, fit.E, fit.time_offset_s, fit.field_offset_nT)
    if inputs.gyro_clipping is not None:
        # the clipped axes once more, in the corrected field and with the gyro's scale
        inputs = _clipped_again(inputs, _solve(inputs, corr, noise, prm, init_window_s, report), noise, corr)
    report("unmodelled field (maximum likelihood)", 0.6)
    noise, prm, field = _with_field_fit(inputs, sol, corr, noise, prm, grid0.dt_gyro_s, True, given_field_nT)
    source = dataclasses.replace(source, field_model_nT="maximum likelihood on this pass",
                                 field_model_interval_nT=field.interval_nT)
    prior = dataclasses.replace(prior, field_sigma_nT=field.sigma_nT / np.sqrt(3.0))
    report("final run and consider covariance", 0.75)
    sol = _solve(inputs, corr, noise, prm, init_window_s, report)
    w_out, width = _rates(sol, rate_window_s)
    extra = noise.gyro_arw_rad_sqrt_s ** 2 / width
    tracks = [extract_track(sol.run, smoothed, sol.grid.mag_pos, MODE_GYRO, w_out, extra) for smoothed in (True, False)]
    nominal, moved = _perturbed(sol, inputs, corr, _consider_blocks(fit, prior), prm, rate_window_s)
    p_att, var_rate = consider_covariance(*nominal, moved)
    return _history(sol, with_consider(tracks[0], p_att, var_rate), tracks[1], noise, source,
                    AlignmentResult.from_fit(fit, prior))


def _with_field_fit(inputs: PassInputs, sol: GyroSolution, corr: Corrections, noise: NoiseModel,
                    prm: np.ndarray, dt_gyro_s: float, interval: bool, given_nT: float
                    ) -> tuple[NoiseModel, np.ndarray, FieldNoiseFit]:
    """The unmodelled field's level and correlation time by maximum likelihood on the corrected inputs,
    from the solution's start and bias step, not below ``given_nT`` (:mod:`recon.estimate.field_noise`);
    the noise model and filter parameters with them."""
    g = step_grid(corrected_inputs(inputs, corr))
    u = _step_u(g, sol.step)

    def neg2_log_l(sigma_nT: float, tau_s: float) -> float:
        p = prm.copy()
        p[P_SIGF], p[P_TAUF] = sigma_nT / np.sqrt(3.0), tau_s
        return forward_log_likelihood(MODE_GYRO, g.t_s, u, g.is_mag, g.z, g.r, p, sol.init)

    field = fit_field_noise(neg2_log_l, given_nT, noise.field_model_tau_s, interval=interval)
    noise = dataclasses.replace(noise, field_model_nT=field.sigma_nT, field_model_tau_s=field.tau_s)
    return noise, filter_params(noise, dt_gyro_s, None), field


def _clipped_again(inputs: PassInputs, sol: GyroSolution, noise: NoiseModel, corr: Corrections | None = None
                   ) -> PassInputs:
    """The gyro's clipped axes solved again with a solution's bias (at the gyro samples) and attitude,
    and with the corrections when known (the field rotated and re-stamped, the gyro's scale in its
    reading of the unclipped axes); the pass's inputs (uncorrected) with them."""
    g = sol.grid
    t_mag = g.t_s[g.mag_pos]
    beta = np.column_stack([np.interp(g.t_gyro_s, t_mag, sol.run.v_s[g.mag_pos][:, a]) for a in range(3)])
    q = np.full((len(inputs.t_mag_ns), 4), np.nan)
    q[g.first_row:] = sol.run.q_s[g.mag_pos]
    q[:g.first_row] = q[g.first_row]
    if corr is None:
        return with_clipped_solved(inputs, noise, beta_gyro_body=beta, q_mag=q)
    fixed = dataclasses.replace(corrected_inputs(inputs, corr), w_gyro_body_rad_s=inputs.w_gyro_body_rad_s)
    solved = with_clipped_solved(fixed, noise, beta_gyro_body=beta, q_mag=q, gyro_scale_E=corr.E)
    return dataclasses.replace(inputs, w_gyro_body_rad_s=solved.w_gyro_body_rad_s,
                               gyro_extra_psd=solved.gyro_extra_psd, gyro_clipping=solved.gyro_clipping)


def _history(sol: GyroSolution, smoothed, forward, noise, source, alignment) -> AttitudeHistory:
    g, first, init, run = sol.grid, sol.grid.first_row, sol.init, sol.run
    usable = sol.inputs.usable[first:]
    anomalies = () if sol.step is None else (sol.step.anomaly(g.t_epoch_ns),)
    t_mag_used = sol.inputs.t_mag_ns[first:]
    start = FilterStart(init.method, init.window_s, (init.sigma_att_rad * DEG_PER_RAD).tolist(), run.smoother_bad,
                        init.fit, init.carried_back_s, t0_utc=utc_text(np.datetime64(int(g.t_epoch_ns), "ns"), "us"),
                        bias0_dps=(init.v * DEG_PER_RAD).tolist(), magnetometer_rows_before_gyro=int(first))
    return AttitudeHistory(t_mag_used.astype("datetime64[ns]"), smoothed, forward, run.nis[g.mag_pos][usable],
                           t_mag_used[usable].astype("datetime64[ns]"), "gyro", "", anomalies, noise,
                           source, start, alignment=alignment)
