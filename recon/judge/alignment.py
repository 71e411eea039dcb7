"""Which control tick each row of the coil log belongs to: the lag search of the command replay.

A coil log is often written once per control period, at some phase of the period, not at the tick
whose command it holds. Read against the replayed law, every lag within one period then maps the
rows to the same ticks and fits exactly as well: the log cannot tell those lags apart. What it does
tell is the *mapping*: which tick's command each row holds, hence the lag in whole periods from the
law's tick to the row that shows its command.

The search tries lags L on a grid from -1 to ``max_lag_periods`` periods (steps of
``step_fraction`` of a period); under L a row stamped s holds the command of the latest tick at or
before ``s - L``. The score of a mapping is the correlation of the logged and replayed commands,
each axis scaled by its current limit. The lags that tie with the best form an interval; its middle
is the mapping used everywhere after the search (the comparison, the commands per tick, the
timing of the currents), so the comparison never reads a row one period stale. The lag reported is
the whole number of periods between the tick a row holds the command of and the tick the row was
written after.

Without a replay to match (no law, or too few informative commands) every row is taken to hold the
command of the latest tick at or before its stamp: a log is written after the command it records.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["CommandAlignment", "align_commands", "commands_at_ticks", "LAG_SCORE_TIE"]

# Scores of lags that map the rows to the same ticks are equal to rounding; lags closer than this in
# correlation to the best one are taken as ties (a different mapping changes the correlation of
# hundreds of commands by far more).
LAG_SCORE_TIE = 1e-9


@dataclass(frozen=True)
class CommandAlignment:
    """The tick each coil-log row belongs to.

    Attributes
    ----------
    tick_index : (M,) int, index into the ticks of the command each log row holds (-1: none, a row
        before the first tick or beyond 1.5 periods of the last)
    lag_periods : int or None, whole periods from the law's tick to the row that holds its command
        (None: not matched against a replay)
    lag_interval_s : (lo, hi) or None, the lags from tick to log stamp that map the rows the same way
        (the log cannot tell them apart), s
    lag_s : float, the lag used for the mapping (the middle of that interval; 0 without a replay), s
    score : float or None, correlation of logged and replayed commands under the mapping
    method : "replay" (matched against the replayed law) or "stamps" (latest tick at or before the stamp)
    """

    tick_index: np.ndarray
    lag_periods: int | None
    lag_interval_s: tuple[float, float] | None
    lag_s: float
    score: float | None
    method: str


def _mapping(ticks: np.ndarray, t_log: np.ndarray, lag_s: float, period_s: float) -> np.ndarray:
    """Under lag L, the tick whose command each row holds: the latest tick at or before ``t - L``
    (-1 before the first tick or more than 1.5 periods after the last)."""
    k = np.searchsorted(ticks, t_log - lag_s + 1e-9, side="right") - 1
    kc = np.clip(k, 0, len(ticks) - 1)
    return np.where((k < 0) | (t_log - lag_s - ticks[kc] > 1.5 * period_s), -1, k)


def _score(k: np.ndarray, rep: np.ndarray, logged: np.ndarray, scale: np.ndarray) -> float:
    """Correlation of the stacked, per-axis-scaled commands of the mapped rows (-inf with fewer than 3)."""
    ok = k >= 0
    pred = rep[np.where(ok, k, 0)]
    ok &= np.all(np.isfinite(pred), axis=1) & np.all(np.isfinite(logged), axis=1)
    if ok.sum() < 3:
        return -np.inf
    x = (pred[ok] / scale).ravel()
    y = (logged[ok] / scale).ravel()
    x = x - x.mean()
    y = y - y.mean()
    d = np.sqrt((x @ x) * (y @ y))
    return float(x @ y / d) if d > 0 else -np.inf


def align_commands(ticks_s: np.ndarray, i_replay_A: np.ndarray | None, t_coil_s: np.ndarray, i_coil_A: np.ndarray,
                   max_current_A: np.ndarray, period_s: float, *, max_lag_periods: int = 5,
                   step_fraction: float = 0.05) -> CommandAlignment:
    """Map every coil-log row to the tick whose command it holds (see the module docstring).

    Parameters
    ----------
    ticks_s : (K,) sorted tick times, s
    i_replay_A : (K, 3) replayed commands, A (NaN where unknown), or None (no law)
    t_coil_s : (M,) sorted times of the coil log, s; i_coil_A : (M, 3) logged commands, A
    max_current_A : (3,) A; period_s : control period, s

    Returns
    -------
    CommandAlignment
    """
    ticks = np.asarray(ticks_s, float)
    t_log = np.asarray(t_coil_s, float)
    logged = np.asarray(i_coil_A, float)
    own = _mapping(ticks, t_log, 0.0, period_s) if len(ticks) else np.full(len(t_log), -1)
    stamps = CommandAlignment(own, None, None, 0.0, None, "stamps")
    if i_replay_A is None or len(ticks) < 3 or len(t_log) < 3:
        return stamps
    rep = np.asarray(i_replay_A, float)
    imax = np.asarray(max_current_A, float)
    finite = np.all(np.isfinite(rep), axis=1)
    if np.sum(finite & (np.max(np.abs(np.where(finite[:, None], rep, 0.0)) / imax, axis=1) > 1e-3)) < 3:
        return stamps
    grid = period_s * np.arange(-1.0, max_lag_periods + 1e-9, step_fraction)
    scores = np.array([_score(_mapping(ticks, t_log, L, period_s), rep, logged, imax) for L in grid])
    if not np.isfinite(scores.max()):
        return stamps
    best = int(np.argmax(scores))
    tie = scores >= scores[best] - LAG_SCORE_TIE
    lo = hi = best
    while lo > 0 and tie[lo - 1]:
        lo -= 1
    while hi < len(grid) - 1 and tie[hi + 1]:
        hi += 1
    lag = round(0.5 * float(grid[lo] + grid[hi]), 9)
    k = _mapping(ticks, t_log, lag, period_s)
    used = (k >= 0) & (own >= 0)
    n = int(np.round(np.median(own[used] - k[used]))) if used.any() else None
    return CommandAlignment(k, n, (float(grid[lo]), float(grid[hi])), lag, float(scores[best]), "replay")


def commands_at_ticks(alignment: CommandAlignment, ticks_s: np.ndarray, t_coil_s: np.ndarray,
                      i_coil_A: np.ndarray, period_s: float) -> np.ndarray:
    """The logged command of each tick under an alignment, (K, 3) A, NaN where no row holds it.

    When several rows hold the same tick's command (a log faster than the ticks), the one written
    nearest the middle of that command's period (after the alignment's lag) stands for it.
    """
    ticks = np.asarray(ticks_s, float)
    i_log = np.asarray(i_coil_A, float)
    out = np.full((len(ticks), 3), np.nan)
    k = alignment.tick_index
    rows = np.nonzero(k >= 0)[0]
    if not len(rows):
        return out
    off = np.abs(np.asarray(t_coil_s, float)[rows] - alignment.lag_s - ticks[k[rows]] - 0.5 * period_s)
    order = np.lexsort((off, k[rows]))      # by tick, then nearest the middle first
    r = rows[order]
    _, first = np.unique(k[r], return_index=True)
    out[k[r[first]]] = i_log[r[first]]
    return out
