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
from .bias_step import BiasStep, find_bias_step
from .initial import InitialState, carry_back_with_gyro, initial_state_with_gyro
from .kernels import MODE_GYRO
from .noise import resolve_noise
from .run import FilterRun, extract_track, filter_params, run_filter
from .types import AttitudeHistory, FilterStart, NoiseModel, PassInputs

__all__ = ["StepGrid", "step_grid", "bias_step_inputs", "estimate_gyro"]


@dataclass(frozen=True)
class StepGrid:
    """The gyro-mode step grid: every gyro and every magnetometer time stamp from the filter's start on.

    Attributes
    ----------
    t_epoch_ns : int, the filter's start (a magnetometer time stamp), ns since 1970 (UTC)
    first_row : int, magnetometer rows before this one come before the gyro log and are not used
    t_s : (K,) s since the epoch, the steps
    u : (K, 5) per-step gyro inputs: held gyro sample (rad/s, body), time since it was taken (s),
        extra bias variance ((rad/s)^2, zero here)
    is_mag : (K,) bool, steps with a magnetometer update
    z : (K, 3) nT body; r : (K, 3) nT GCRF, measured and reference field at the magnetometer steps
    mag_pos : (M,) step of each magnetometer row from first_row on
    t_gyro_s : (G,) s since the epoch, gyro time stamps
    dt_gyro_s : float, median gyro interval, s
    """

    t_epoch_ns: int
    first_row: int
    t_s: np.ndarray
    u: np.ndarray
    is_mag: np.ndarray
    z: np.ndarray
    r: np.ndarray
    mag_pos: np.ndarray
    t_gyro_s: np.ndarray
    dt_gyro_s: float


def step_grid(inputs: PassInputs) -> StepGrid:
    """Steps at every gyro and every magnetometer time stamp in [start, last magnetometer row].

    The filter starts at the first magnetometer row that has a gyro sample within two gyro intervals
    (before it, the first gyro sample is held backwards); earlier magnetometer rows are not used.
    """
    t_mag_ns, t_gyro_ns, w_gyro = inputs.t_mag_ns, inputs.t_gyro_ns, inputs.w_gyro_body_rad_s
    dt_g_ns = int(np.median(np.diff(t_gyro_ns)))
    first = int(np.searchsorted(t_mag_ns, t_gyro_ns[0] - 2 * dt_g_ns))
    t_epoch = t_mag_ns[first]
    t_mag_used = t_mag_ns[first:]
    t_gyro_in = t_gyro_ns[(t_gyro_ns >= t_epoch) & (t_gyro_ns <= t_mag_used[-1])]
    steps = np.union1d(t_gyro_in, t_mag_used)
    t = (steps - t_epoch) / NS_PER_S
    mag_pos = np.searchsorted(steps, t_mag_used)
    is_mag = np.zeros(len(steps), bool)
    is_mag[mag_pos[inputs.usable[first:]]] = True
    z = np.zeros((len(steps), 3))
    r = np.zeros((len(steps), 3))
    z[mag_pos] = np.nan_to_num(inputs.b_body_nT[first:])
    r[mag_pos] = np.nan_to_num(inputs.b_ref_gcrf_nT[first:])
    t_gyro_s = (t_gyro_ns - t_epoch) / NS_PER_S
    j = np.clip(np.searchsorted(t_gyro_ns, steps, side="right") - 1, 0, len(t_gyro_ns) - 1)
    u = np.zeros((len(steps), 5))
    u[:, :3] = w_gyro[j]
    u[:, 3] = t - t_gyro_s[j]
    return StepGrid(t_epoch, first, t, u, is_mag, z, r, mag_pos, t_gyro_s, dt_g_ns / NS_PER_S)


def bias_step_inputs(t: np.ndarray, u: np.ndarray, step: BiasStep) -> np.ndarray:
    """Per-step gyro inputs with the bias free to move over the step's time interval.

    The extra bias variance ``|2 delta|^2`` (rad/s)^2 per axis (twice the found change, so the filter
    is not held to the estimate) is spread over the propagation intervals that overlap
    ``[t_lo_s, t_hi_s]`` in proportion to the overlap, a random walk confined to the interval in
    which the step happened; an interval of zero length puts it all on the propagation that ends at
    the step.

    Parameters
    ----------
    t : (K,) s, step times; u : (K, 5) per-step gyro inputs (column 4: extra bias variance)
    step : BiasStep

    Returns
    -------
    (K, 5) copy of u with column 4 filled
    """
    out = u.copy()
    total = float(np.sum((2.0 * step.delta_rad_s) ** 2))
    overlap = np.clip(np.minimum(t[1:], step.t_hi_s) - np.maximum(t[:-1], step.t_lo_s), 0.0, None)
    if overlap.sum() > 1e-9:
        out[:-1, 4] += total * overlap / float(overlap.sum())
    else:
        k = int(np.clip(np.searchsorted(t, step.t_s), 1, len(t) - 1))
        out[k - 1, 4] += total
    return out


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

    def find_step(run_: FilterRun) -> BiasStep | None:
        return find_bias_step(grid.t_s[grid.mag_pos][usable], inputs.b_body_nT[grid.first_row:][usable],
                              inputs.b_ref_gcrf_nT[grid.first_row:][usable], run_.q_s[grid.mag_pos][usable],
                              grid.t_gyro_s, inputs.w_gyro_body_rad_s, noise.gyro_bias_walk_rad_s_sqrt_s)

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


def estimate_gyro(inputs: PassInputs, noise: NoiseModel, init_window_s: float, rate_window_s: float,
                  report: Callable[[str, float], None]) -> AttitudeHistory:
    """Gyro-mode reconstruction on the magnetometer time stamps from the filter's start on.

    Parameters as in :func:`recon.estimate.estimate_attitude`; the anomaly ``gyro_bias_jump`` is
    raised when a step in the gyro bias was found.
    """
    grid = step_grid(inputs)
    first, t_gyro_ns, w_gyro = grid.first_row, inputs.t_gyro_ns, inputs.w_gyro_body_rad_s
    usable = inputs.usable[first:]
    noise, source = resolve_noise(noise, inputs.b_body_nT[first:][usable], w_gyro,
                                  (t_gyro_ns - t_gyro_ns[0]) / NS_PER_S)
    prm = filter_params(noise, grid.dt_gyro_s, None)
    report("initialisation", 0.05)
    init = _opening(grid, inputs, noise, init_window_s)
    report("forward filter and smoother", 0.1)
    run, step = _run_allowing_bias_step(grid, inputs, noise, prm, init, report)
    anomalies = () if step is None else (step.anomaly(grid.t_epoch_ns),)
    # the reported rate: the mean gyro rate over the rate window, less the estimated bias
    width = max(float(rate_window_s), grid.dt_gyro_s)
    w_out = held_mean(grid.t_gyro_s, w_gyro, grid.t_s[grid.mag_pos], width)
    extra = noise.gyro_arw_rad_sqrt_s ** 2 / width
    tracks = [extract_track(run, smoothed, grid.mag_pos, MODE_GYRO, w_out, extra) for smoothed in (True, False)]
    t_mag_used = inputs.t_mag_ns[first:]
    start = FilterStart(init.method, init.window_s, (init.sigma_att_rad * DEG_PER_RAD).tolist(), run.smoother_bad,
                        init.fit, init.carried_back_s, t0_utc=utc_text(np.datetime64(int(grid.t_epoch_ns), "ns"), "us"),
                        bias0_dps=(init.v * DEG_PER_RAD).tolist(), magnetometer_rows_before_gyro=int(first))
    return AttitudeHistory(t_mag_used.astype("datetime64[ns]"), tracks[0], tracks[1], run.nis[grid.mag_pos][usable],
                           t_mag_used[usable].astype("datetime64[ns]"), "gyro", "", anomalies, noise,
                           dataclasses.replace(source, field_model_nT="given"), start)
