"""Position logs: a CSV of positions (ITRF or GCRF, km or m) with a time column, read and
interpolated in GCRF with a cubic spline per gap-free run.

The time column is converted by the loader's one conversion of a time column
(:func:`recon.load.column_times`: ISO, UNIX, GPS with the leap-second table, onboard ticks with
rollover), the same as for the sensor logs.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.interpolate import CubicSpline

from ..config import PositionsSpec, TimeSpec
from ..core import InputError
from ..load import column_times, expected_time_text
from .state import OrbitState, checked_times, itrf_to_gcrf, state_from_gcrf_nodes

__all__ = ["MAX_GAP_s", "read_positions", "outside_coverage", "orbit_from_positions"]

# Longest gap a position log may have and still be interpolated across. A cubic's error over a step h
# is about h^4 |r''''| / 384 with |r''''| ~ n^4 |r| ~ 1e-5 m/s^4 in LEO (n = 1.1e-3 rad/s,
# |r| = 6,900 km): 120 s gives ~5 m, ~0.1 nT of field at 20 nT/km.
MAX_GAP_s = 120.0


def _log_times(values: pd.Series, spec: TimeSpec, path: Path) -> np.ndarray:
    """UTC datetime64[ns] of a log's time column, per the mission file's time spec; the first
    unreadable time raises, naming its line."""
    t, _ = column_times(values.to_numpy(), spec)
    bad = np.isnat(t)
    if np.any(bad):
        i = int(np.argmax(bad))
        raise InputError(f"expected {expected_time_text(spec)} in column {spec.column!r}, got {str(values.iloc[i])!r}",
                         path, line=i + 2, key=spec.column)
    return t


def read_positions(spec: PositionsSpec) -> tuple[np.ndarray, np.ndarray]:
    """Read a position log: UTC times (M,) sorted and unique, and positions (M, 3) in km, in the
    log's frame (``spec.frame``)."""
    path = Path(spec.file)
    try:
        df = pd.read_csv(path)
    except (OSError, pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as e:
        raise InputError(f"expected a CSV position log, could not read it ({' '.join(str(e).split())})",
                         path) from None
    for col in (spec.time.column, *spec.columns):
        if col not in df.columns:
            raise InputError(f"expected a column {col!r}, got columns {list(df.columns)}", path, line=1,
                             key=col)
    if len(df) < 2:
        raise InputError(f"expected at least 2 rows of positions, got {len(df)}", path)
    t = _log_times(df[spec.time.column], spec.time, path)
    xyz = np.empty((len(df), 3))
    for k, col in enumerate(spec.columns):
        v = pd.to_numeric(df[col], errors="coerce").to_numpy(dtype=float)
        if not np.all(np.isfinite(v)):
            i = int(np.argmax(~np.isfinite(v)))
            raise InputError(f"expected a finite number in column {col!r}, got {df[col].iloc[i]!r}", path,
                             line=i + 2, key=col)
        xyz[:, k] = v
    if spec.unit == "m":
        xyz = xyz * 1e-3
    order = np.argsort(t, kind="stable")
    t, xyz = t[order], xyz[order]
    keep = np.concatenate([[True], np.diff(t.astype(np.int64)) > 0])  # first row of repeated times
    return t[keep], xyz[keep]


def outside_coverage(path: Path, t: np.ndarray, lo: np.datetime64, hi: np.datetime64, what: str,
                     outside: str = "raise") -> np.ndarray:
    """(N,) bool: instants outside [lo, hi]. With ``outside="raise"`` any such instant raises; with
    ``"nan"`` only a set of instants none of which is covered raises (the rows become NaN rows)."""
    ok = ~np.isnat(t)
    out = ok & ((t < lo) | (t > hi))
    if np.any(out) and (outside == "raise" or not np.any(ok & ~out)):
        tt = t[ok]
        raise InputError(f"expected times within the {what}'s coverage {lo} to {hi} UTC, got times from "
                         f"{tt.min()} to {tt.max()}", path)
    return out


def orbit_from_positions(spec: PositionsSpec, time_utc: np.ndarray, *, dut1_s: float = 0.0,
                         max_gap_s: float = MAX_GAP_s, outside: str = "raise") -> OrbitState:
    """Orbit from a position log (ITRF or GCRF), interpolated in GCRF.

    The log's positions are rotated to GCRF at their own times, then each run without a gap longer
    than ``max_gap_s`` is interpolated with a not-a-knot cubic spline (scipy ``CubicSpline``); the
    velocity is the spline's derivative. Instants inside a longer gap are NaN rows with a reason.

    ``outside="nan"`` makes instants before the first or after the last logged position NaN rows
    with a reason instead of an error (as long as some instant is covered).

    Raises
    ------
    InputError
        On a malformed log, or an instant before the first or after the last logged position.
    """
    t, reason = checked_times(time_utc)
    t_log, p_log = read_positions(spec)
    out = outside_coverage(Path(spec.file), t, t_log[0], t_log[-1], "position log", outside)
    reason[out] = f"outside the position log's coverage {t_log[0]} to {t_log[-1]} UTC"
    if spec.frame == "itrf":
        p_log = itrf_to_gcrf(t_log, p_log, dut1_s)
    r = np.full((len(t), 3), np.nan)
    v = np.full((len(t), 3), np.nan)
    x_log = (t_log - t_log[0]).astype(np.int64) / 1e9
    x = np.where(np.isnat(t), np.nan, (t - t_log[0]).astype(np.int64) / 1e9)
    breaks = np.flatnonzero(np.diff(x_log) > max_gap_s)
    starts = np.concatenate([[0], breaks + 1])
    stops = np.concatenate([breaks, [len(x_log) - 1]])
    covered = np.zeros(len(t), dtype=bool)
    for a, b in zip(starts, stops, strict=True):
        inside = (x >= x_log[a]) & (x <= x_log[b])
        if b == a or not np.any(inside):
            continue
        spline = CubicSpline(x_log[a:b + 1], p_log[a:b + 1], axis=0)
        r[inside] = spline(x[inside])
        v[inside] = spline(x[inside], 1)
        covered |= inside
    gap = ~covered & (reason == "")
    reason[gap] = f"in a gap longer than {max_gap_s:g} s of the position log"
    return state_from_gcrf_nodes(t, reason, r, v, dut1_s, "positions")
