"""Replay the onboard magnetic control law from telemetry and compare it with the logged commands.

The replay recomputes, tick by tick, what the onboard computer should have commanded from the data
it had: its raw magnetometer readings turned into body axes with the nominal mounting (bias, soft
iron and coil crosstalk still in them), its raw gyro for the cross-product law, the configured gain,
the nominal dipole-per-amp matrix and the per-axis current limit. Comparing that with the logged
commands tells a software or configuration error (wrong gain, sign, latency) apart from a hardware
one (which the dipole identification in :mod:`.dipole` sees).

All times here are float seconds since one epoch chosen by the caller (``t_s``); all currents A;
fields nT in body axes.

References
----------
Stickler, A. C. and Alfriend, K. T. (1974). An elementary magnetic attitude control system.
AIAA paper 74-923 (B-dot, m = -k dB/dt).
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer, sec. 7.5 (B-dot detumbling and cross-product momentum management).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import bdot_dipole, cross_product_dipole, currents_from_dipole, held_values
from .alignment import CommandAlignment, align_commands, commands_at_ticks
from .thresholds import INFORMATIVE_LEVEL, NEAR_LIMIT_LEVEL, SATURATION_LEVEL

__all__ = [
    "tick_samples_nT", "replay_bdot_A", "replay_cross_product_A", "onboard_rate",
    "CommandComparison", "compare_commands", "chatter_fraction",
]


def tick_samples_nT(t_mag_s: np.ndarray, b_mag_body_nT: np.ndarray, ticks_s: np.ndarray, *,
                    sampling: str, off_window_s: tuple[float, float] | None = None,
                    tolerance_s: float | None = None) -> np.ndarray:
    """The magnetometer reading the onboard controller uses at each tick: the sample at the tick.

    The sample nearest to the tick is taken if it lies within ``tolerance_s`` of it (default: half
    the median sample spacing); with ``sampling = "windowed"`` it must also lie inside the coil-off
    window ``[tick - before, tick + after]``.

    Parameters
    ----------
    t_mag_s : (N,) sorted sample times, s
    b_mag_body_nT : (N, 3) raw readings in body axes (nominal mounting only), nT
    ticks_s : (K,) tick times, s
    sampling : "coils_off" | "coils_on" | "windowed"
    off_window_s : (before, after), s, for "windowed"

    Returns
    -------
    (K, 3) array, nT, body axes; NaN where no usable sample exists
    """
    t = np.asarray(t_mag_s, float)
    b = np.asarray(b_mag_body_nT, float)
    ticks = np.asarray(ticks_s, float)
    out = np.full((len(ticks), 3), np.nan)
    if len(t) == 0 or len(ticks) == 0:
        return out
    if tolerance_s is None:
        tolerance_s = 0.5 * float(np.median(np.diff(t))) if len(t) > 1 else 0.5
    j = np.clip(np.searchsorted(t, ticks), 1, max(len(t) - 1, 1))
    j = np.where(np.abs(t[j - 1] - ticks) <= np.abs(t[np.minimum(j, len(t) - 1)] - ticks), j - 1, j)
    j = np.clip(j, 0, len(t) - 1)
    dt = t[j] - ticks
    ok = np.abs(dt) <= tolerance_s + 1e-9
    if sampling == "windowed" and off_window_s is not None:
        ok &= (dt >= -off_window_s[0] - 1e-9) & (dt <= off_window_s[1] + 1e-9)
    out[ok] = b[j[ok]]
    return out


def replay_bdot_A(ticks_s: np.ndarray, b_tick_body_nT: np.ndarray, gain_Am2_s_per_T: float,
                  C_nominal: np.ndarray, max_current_A: np.ndarray) -> np.ndarray:
    """Commanded currents of B-dot, ``i = clip(C^-1 (-k dB/dt))``, from consecutive tick samples.

    Parameters
    ----------
    ticks_s : (K,) tick times, s
    b_tick_body_nT : (K, 3) tick samples, nT, body axes (NaN where missing)
    gain_Am2_s_per_T : float, k
    C_nominal : (3, 3) A m^2 per A
    max_current_A : (3,) A

    Returns
    -------
    (K, 3) array, A; the first tick and ticks after a missing sample are NaN (no derivative)

    References
    ----------
    Stickler and Alfriend (1974), AIAA 74-923.
    """
    ticks = np.asarray(ticks_s, float)
    b = np.asarray(b_tick_body_nT, float)
    out = np.full((len(ticks), 3), np.nan)
    if len(ticks) < 2:
        return out
    m = bdot_dipole(b[1:], b[:-1], np.diff(ticks), gain_Am2_s_per_T)
    ok = np.all(np.isfinite(m), axis=1)
    out[1:][ok] = currents_from_dipole(m[ok], C_nominal, max_current_A)
    return out


def replay_cross_product_A(b_tick_body_nT: np.ndarray, w_tick_body_rad_s: np.ndarray,
                           inertia_kg_m2: np.ndarray, target_momentum_Nms: np.ndarray, gain_per_s: float,
                           C_nominal: np.ndarray, max_current_A: np.ndarray) -> np.ndarray:
    """Commanded currents of cross-product momentum management, ``m = k (h_err x B) / |B|^2``.

    Parameters
    ----------
    b_tick_body_nT : (K, 3) nT, body axes
    w_tick_body_rad_s : (K, 3) the rate the onboard computer used, rad/s, body axes
    inertia_kg_m2 : (3, 3)
    target_momentum_Nms : (3,) N m s, body axes
    gain_per_s : float, k, 1/s
    C_nominal : (3, 3); max_current_A : (3,)

    Returns
    -------
    (K, 3) array, A (NaN where an input is missing)

    References
    ----------
    Markley and Crassidis (2014), sec. 7.5: the torque is -k (h_err - (h_err . b) b).
    """
    b = np.asarray(b_tick_body_nT, float)
    h_err = np.asarray(w_tick_body_rad_s, float) @ np.asarray(inertia_kg_m2, float).T - target_momentum_Nms
    out = np.full(b.shape, np.nan)
    ok = np.all(np.isfinite(b), axis=1) & np.all(np.isfinite(h_err), axis=1) & (np.sum(b * b, axis=1) > 0)
    out[ok] = currents_from_dipole(cross_product_dipole(h_err[ok], b[ok], gain_per_s), C_nominal, max_current_A)
    return out


def onboard_rate(ticks_s: np.ndarray, gyro: tuple[np.ndarray, np.ndarray] | None, t_s: np.ndarray,
                 w_body_rad_s: np.ndarray) -> np.ndarray:
    """The rate the onboard computer used at each tick, rad/s body axes (K, 3): the raw gyro
    ``(times s, rates (Ng, 3))`` held at the tick, or without a gyro log the reconstructed rate
    ``w_body_rad_s`` at times ``t_s`` interpolated to it."""
    if gyro is not None:
        return held_values(gyro[0], gyro[1], ticks_s, tol=1e-9)
    return np.column_stack([np.interp(ticks_s, t_s, w_body_rad_s[:, a]) for a in range(3)])


@dataclass(frozen=True)
class CommandComparison:
    """Logged commands against the replayed law.

    Attributes
    ----------
    lag_s : float or None
        Whole control periods from the law's tick to the log row that holds its command, in s
        (``lag_periods`` times the period; None: no informative command to align on).
    gain_ratio : (3,) least-squares slope of logged on replayed currents, unsaturated ticks, per axis
    correlation : (3,) Pearson correlation of logged and replayed commands, per axis
    n_informative : (3,) ticks with an unsaturated command above ``INFORMATIVE_LEVEL`` of the limit
    saturation_fraction : (3,) fraction of ticks at the limit in the log, per axis
    logged_A : (K, 3) the logged command belonging to each tick under the alignment (NaN where none)
    alignment : CommandAlignment, the tick of each log row (the mapping the lag search found)
    """

    lag_s: float | None
    gain_ratio: np.ndarray
    correlation: np.ndarray
    n_informative: np.ndarray
    saturation_fraction: np.ndarray
    logged_A: np.ndarray
    alignment: CommandAlignment | None = None

    @property
    def lag_periods(self) -> int | None:
        return None if self.alignment is None else self.alignment.lag_periods

    @property
    def lag_interval_s(self) -> tuple[float, float] | None:
        return None if self.alignment is None else self.alignment.lag_interval_s


def compare_commands(ticks_s: np.ndarray, i_replay_A: np.ndarray, t_coil_s: np.ndarray, i_coil_A: np.ndarray,
                     max_current_A: np.ndarray, period_s: float, *, max_lag_periods: int = 5,
                     lag_step_fraction: float = 0.05) -> CommandComparison:
    """Compare logged coil commands with the replay: lag, gain ratio, correlation, saturation.

    The rows of the log are first mapped to the ticks whose commands they hold
    (:func:`.alignment.align_commands`: the lag search, whose ties a log written once per period
    cannot break); every per-axis figure then compares each tick's replayed command with the row
    that holds it under that same mapping.

    Parameters
    ----------
    ticks_s : (K,) tick times, s
    i_replay_A : (K, 3) replayed commands, A (NaN where unknown)
    t_coil_s : (M,) sorted times of the coil log, s
    i_coil_A : (M, 3) logged commands, A
    max_current_A : (3,) A
    period_s : float, control period, s

    Returns
    -------
    CommandComparison
    """
    ticks = np.asarray(ticks_s, float)
    rep = np.asarray(i_replay_A, float)
    t_log = np.asarray(t_coil_s, float)
    i_log = np.asarray(i_coil_A, float)
    imax = np.asarray(max_current_A, float)
    nan3 = np.full(3, np.nan)
    if len(ticks) < 3 or len(t_log) < 3:
        return CommandComparison(None, nan3, nan3, np.zeros(3, int), nan3, np.full((len(ticks), 3), np.nan))
    al = align_commands(ticks, rep, t_log, i_log, imax, period_s, max_lag_periods=max_lag_periods,
                        step_fraction=lag_step_fraction)
    logged = commands_at_ticks(al, ticks, t_log, i_log, period_s)
    lag = None if al.lag_periods is None else al.lag_periods * period_s
    both = np.isfinite(rep) & np.isfinite(logged)
    sat = (np.abs(logged) >= SATURATION_LEVEL * imax) | (np.abs(rep) >= SATURATION_LEVEL * imax)
    use = both & ~sat
    informative_ax = use & (np.abs(rep) > INFORMATIVE_LEVEL * imax)
    gain = np.full(3, np.nan)
    corr = np.full(3, np.nan)
    for a in range(3):
        x, y = rep[use[:, a], a], logged[use[:, a], a]
        if informative_ax[:, a].sum() >= 3 and x @ x > 0:
            gain[a] = float(x @ y / (x @ x))
        xb, yb = rep[both[:, a], a], logged[both[:, a], a]
        if len(xb) >= 3 and np.std(xb) > 0 and np.std(yb) > 0:
            corr[a] = float(np.corrcoef(xb, yb)[0, 1])
    logged_ok = np.isfinite(logged)
    satfrac = np.array([np.mean(np.abs(logged[logged_ok[:, a], a]) >= SATURATION_LEVEL * imax[a])
                        if logged_ok[:, a].any() else np.nan for a in range(3)])
    return CommandComparison(lag, gain, corr, informative_ax.sum(axis=0), satfrac, logged, al)


def chatter_fraction(i_tick_A: np.ndarray, max_current_A: np.ndarray) -> np.ndarray:
    """Fraction of consecutive tick pairs whose command flips sign from near one limit to the other.

    Parameters
    ----------
    i_tick_A : (K, 3) command per tick, A (NaN where unknown)
    max_current_A : (3,) A

    Returns
    -------
    (3,) fraction per axis (NaN with fewer than two valid consecutive ticks)
    """
    i = np.asarray(i_tick_A, float)
    imax = np.asarray(max_current_A, float)
    if len(i) < 2:
        return np.full(3, np.nan)
    a, b = i[:-1], i[1:]
    valid = np.isfinite(a) & np.isfinite(b)
    near = (np.abs(a) >= NEAR_LIMIT_LEVEL * imax) & (np.abs(b) >= NEAR_LIMIT_LEVEL * imax)
    flip = valid & near & (np.sign(a) * np.sign(b) < 0)
    n = valid.sum(axis=0)
    return np.where(n > 0, flip.sum(axis=0) / np.maximum(n, 1), np.nan)
