"""The gyro-mode step grid: the filter steps at every gyro and every magnetometer time stamp, the
gyro rate each step uses, and the bias freedom a found bias step adds."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import NS_PER_S
from .bias_step import BiasStep
from .types import PassInputs

__all__ = ["StepGrid", "step_grid", "step_rates", "bias_step_inputs"]


@dataclass(frozen=True)
class StepGrid:
    """The gyro-mode step grid: every gyro and every magnetometer time stamp from the filter's start on.

    Attributes
    ----------
    t_epoch_ns : int, the filter's start (a magnetometer time stamp), ns since 1970 (UTC)
    first_row : int, magnetometer rows before this one come before the gyro log and are not used
    t_s : (K,) s since the epoch, the steps
    u : (K, 6) per-step gyro inputs: the rate over the step (rad/s, body; see :func:`step_rates`),
        time since the last gyro sample (s), extra bias variance ((rad/s)^2, zero here), spectral
        density of the rate error beyond the gyro's white noise (rad^2/s, a clipped axis solved)
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
    u = np.zeros((len(steps), 6))
    u[:, :3] = step_rates(t_gyro_s, w_gyro, t, dt_g_ns / NS_PER_S)
    u[:, 3] = t - t_gyro_s[j]
    if inputs.gyro_extra_psd is not None:  # a clipped axis solved from the field: its own uncertainty
        extra = inputs.gyro_extra_psd
        u[:, 5] = np.maximum(extra[j], extra[np.minimum(j + 1, len(extra) - 1)])
    return StepGrid(t_epoch, first, t, u, is_mag, z, r, mag_pos, t_gyro_s, dt_g_ns / NS_PER_S)


def step_rates(t_gyro_s: np.ndarray, w_gyro: np.ndarray, t_steps_s: np.ndarray, dt_nominal_s: float) -> np.ndarray:
    """The gyro rate each propagation step uses: the gyro linearly interpolated to the step's midpoint
    (the trapezoid rule over the step: the mean of a rate that moves linearly between two samples),
    or the last sample held where the gyro log has a gap (consecutive samples more than two nominal
    intervals apart). The last step repeats the one before it.

    Parameters
    ----------
    t_gyro_s : (G,) s; w_gyro : (G, 3) rad/s; t_steps_s : (K,) s; dt_nominal_s : float, s

    Returns
    -------
    (K, 3) rad/s
    """
    mid = np.empty_like(t_steps_s)
    mid[:-1] = 0.5 * (t_steps_s[1:] + t_steps_s[:-1])
    mid[-1] = t_steps_s[-1]
    j = np.clip(np.searchsorted(t_gyro_s, mid, side="right") - 1, 0, len(t_gyro_s) - 1)
    j1 = np.minimum(j + 1, len(t_gyro_s) - 1)
    span = t_gyro_s[j1] - t_gyro_s[j]
    inside = (j1 > j) & (span <= 2.0 * dt_nominal_s) & (mid >= t_gyro_s[j])
    f = np.where(inside, (mid - t_gyro_s[j]) / np.where(span > 0, span, 1.0), 0.0)
    return w_gyro[j] + f[:, None] * (w_gyro[j1] - w_gyro[j])


def bias_step_inputs(t: np.ndarray, u: np.ndarray, step: BiasStep) -> np.ndarray:
    """Per-step gyro inputs with the bias free to move over the step's time interval.

    The extra bias variance ``|2 delta|^2`` (rad/s)^2 per axis (twice the found change, so the filter
    is not held to the estimate) is spread over the propagation intervals that overlap
    ``[t_lo_s, t_hi_s]`` in proportion to the overlap, a random walk confined to the interval in
    which the step happened; an interval of zero length puts it all on the propagation that ends at
    the step.

    Parameters
    ----------
    t : (K,) s, step times; u : (K, 6) per-step gyro inputs (column 4: extra bias variance)
    step : BiasStep

    Returns
    -------
    (K, 6) copy of u with column 4 filled
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
