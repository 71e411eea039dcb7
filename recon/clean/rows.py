"""The row steps of the clean stage: time jumps, the pass window, order, duplicate lines, rows that
share a time, values out of range, and gaps.

Each step looks at the rows still alive and returns the rows it drops as :class:`Drops` (one reason,
a detail per row); a :class:`RowBook` keeps the decisions, in file order, and writes them into the
ledger.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..config import Mission
from ..core import utc_text
from ..load import SensorLog, ledger_frame

__all__ = [
    "GAP_FACTOR", "RANGE_MARGIN", "JUMP_PERIODS", "JUMP_MIN_S", "BRIDGE_PERIODS", "Drops", "RowBook",
    "find_gaps", "time_jumps", "outside_window", "duplicates", "time_conflicts", "out_of_range",
]

# A gap is a spacing longer than this many median sample periods. Common practice, no source.
GAP_FACTOR = 3.0

# A reading beyond RANGE_MARGIN x full scale (or a coil current beyond RANGE_MARGIN x max_current_A)
# cannot come from the instrument: a saturated sensor reports about its full scale, and a coil
# driver cannot push more than its supply allows. The 50 % margin leaves room for scale and offset
# errors of the conversion. Common practice, no source.
RANGE_MARGIN = 1.5

# A time word is called a jump when it departs from both file neighbours by more than
# JUMP_PERIODS median periods (and at least JUMP_MIN_S) while the neighbours lie within
# BRIDGE_PERIODS periods of each other. Common practice, no source.
JUMP_PERIODS = 100.0
JUMP_MIN_S = 10.0
BRIDGE_PERIODS = 10.0


@dataclass(frozen=True)
class Drops:
    """Rows one step drops: indices into the log (file order), the reason, and the detail (one
    text for all, or one per row)."""

    rows: np.ndarray
    reason: str
    detail: np.ndarray | str


def _none(reason: str) -> Drops:
    return Drops(np.zeros(0, dtype=np.int64), reason, "")


class RowBook:
    """Per-row decisions for one log, in file order: which rows are alive, and why the others went.

    The first step to drop a row names its reason; a later step cannot drop it again.
    """

    def __init__(self, log: SensorLog):
        self.log = log
        n = len(log)
        self.alive = np.ones(n, dtype=bool)
        self.reason = np.full(n, "", dtype=object)
        self.detail = np.full(n, "", dtype=object)

    def drop(self, drops: Drops) -> None:
        idx = np.asarray(drops.rows, dtype=np.int64)
        idx_live = self.alive[idx]
        self.alive[idx[idx_live]] = False
        self.reason[idx[idx_live]] = drops.reason
        d = np.broadcast_to(np.asarray(drops.detail, dtype=object), idx.shape)
        self.detail[idx[idx_live]] = d[idx_live]

    def alive_in(self, order: np.ndarray) -> np.ndarray:
        """The rows of ``order`` still alive, in the same order."""
        return order[self.alive[order]]

    def ledger(self) -> pd.DataFrame:
        gone = np.flatnonzero(~self.alive)
        lg = self.log
        return ledger_frame(lg.label, lg.name, lg.line[gone], lg.time_utc[gone], self.reason[gone],
                            "dropped", self.detail[gone])


# ------------------------------------------------------------------------------------------ gaps
def find_gaps(time_utc: np.ndarray, factor: float = GAP_FACTOR) -> tuple[pd.DataFrame, float]:
    """Spacings longer than ``factor`` x the median spacing.

    Parameters
    ----------
    time_utc : (N,) datetime64[ns], sorted
    factor : float

    Returns
    -------
    gaps : DataFrame with start_utc, stop_utc (last sample before, first after), duration_s
    median_period_s : float (NaN with fewer than two samples)
    """
    t = np.asarray(time_utc, dtype="datetime64[ns]").astype(np.int64)
    if t.size < 2:
        return _gap_frame([], [], []), float("nan")
    dt = np.diff(t) / 1e9
    pos = dt[dt > 0]
    period = float(np.median(pos)) if pos.size else float("nan")
    if not np.isfinite(period):
        return _gap_frame([], [], []), period
    k = np.flatnonzero(dt > factor * period)
    ts = np.asarray(time_utc, dtype="datetime64[ns]")
    return _gap_frame(ts[k], ts[k + 1], dt[k]), period


def _gap_frame(start, stop, dur) -> pd.DataFrame:
    return pd.DataFrame({"start_utc": np.asarray(start, dtype="datetime64[ns]"),
                         "stop_utc": np.asarray(stop, dtype="datetime64[ns]"),
                         "duration_s": np.asarray(dur, dtype=float)})


# ------------------------------------------------------------------------------------------ steps
def time_jumps(log: SensorLog) -> Drops:
    """``time_jump``: rows whose time jumps away from both file neighbours and back."""
    t = log.time_utc.astype(np.int64)
    if t.size < 3:
        return _none("time_jump")
    d = np.diff(t) / 1e9
    step = np.abs(d[np.abs(d) > 0])
    if step.size == 0:
        return _none("time_jump")
    p = float(np.median(step))
    jump = max(JUMP_PERIODS * p, JUMP_MIN_S)
    bridge = np.abs(t[2:] - t[:-2]) / 1e9
    hit = (np.abs(d[:-1]) > jump) & (np.abs(d[1:]) > jump) & (bridge <= BRIDGE_PERIODS * p)
    i = np.flatnonzero(hit) + 1
    lines = log.line
    det = [f"time jumps {d[k - 1]:+.6g} s from line {lines[k - 1]} and {d[k]:+.6g} s to line {lines[k + 1]}"
           for k in i]
    return Drops(i, "time_jump", np.asarray(det, dtype=object))


def outside_window(log: SensorLog, mission: Mission) -> Drops:
    """``outside_window``: rows before ``[pass] start`` or after ``[pass] stop``."""
    t = log.time_utc
    out = np.zeros(t.size, dtype=bool)
    if mission.start is not None:
        out |= t < np.datetime64(mission.start, "ns")
    if mission.stop is not None:
        out |= t > np.datetime64(mission.stop, "ns")
    if not out.any():
        return _none("outside_window")
    win = f"[{utc_text(mission.start) if mission.start is not None else '...'}, " \
          f"{utc_text(mission.stop) if mission.stop is not None else '...'}]"
    return Drops(np.flatnonzero(out), "outside_window", f"outside the pass window {win}")


def duplicates(log: SensorLog, alive: np.ndarray) -> Drops:
    """``duplicate_line``: alive rows whose line is byte-identical to an earlier one."""
    cid = log.content_id
    dup = np.flatnonzero((cid != np.arange(cid.size)) & alive)
    det = [f"same content as line {log.line[cid[k]]}" for k in dup]
    return Drops(dup, "duplicate_line", np.asarray(det, dtype=object))


def time_conflicts(log: SensorLog, order: np.ndarray) -> Drops:
    """``time_conflict``: among rows of ``order`` (sorted by time) that share a time but differ, all
    but the one closest to its neighbours (the first in the file on a tie)."""
    t = log.time_utc.astype(np.int64)[order]
    same = np.flatnonzero(t[1:] == t[:-1])
    if same.size == 0:
        return _none("time_conflict")
    v = log.values_sensor
    starts = np.flatnonzero(np.r_[True, t[1:] != t[:-1]])
    ends = np.r_[starts[1:], t.size]
    multi = np.flatnonzero(ends - starts > 1)
    first_of_group = starts  # representative row per distinct time, for the neighbour reference
    rows, details = [], []
    for g in multi:
        group = order[starts[g]:ends[g]]
        # reference: median of the nearest distinct-time rows either side (up to 3 each)
        nb = [order[first_of_group[h]] for h in range(max(g - 3, 0), min(g + 4, starts.size))
              if h != g and ends[h] - starts[h] == 1]
        if nb:
            ref = np.median(v[nb], axis=0)
            spread = np.maximum(np.abs(v[nb] - ref).max(axis=0), 1e-300)
            with np.errstate(over="ignore", invalid="ignore"):
                cost = np.nanmax(np.abs(v[group] - ref) / spread, axis=1)
            best = int(np.flatnonzero(cost == cost.min())[0]) if np.isfinite(cost).any() else 0
        else:
            best = 0
        others = np.delete(group, best)
        rows.append(others)
        details += [f"same time as line {log.line[group[best]]} (kept, closer to its neighbours), values differ"
                    ] * others.size
    return Drops(np.concatenate(rows), "time_conflict", np.asarray(details, dtype=object))


def out_of_range(log: SensorLog, order: np.ndarray, bound: np.ndarray, what: str) -> Drops:
    """``out_of_range``: rows of ``order`` with a value beyond ``RANGE_MARGIN`` x ``bound`` (file unit)."""
    v = np.abs(log.values_sensor[order])
    with np.errstate(invalid="ignore"):
        over = v > RANGE_MARGIN * bound[None, :]
    rows = np.flatnonzero(over.any(axis=1))
    cols = log.columns
    det = []
    for r in rows:
        a = int(np.flatnonzero(over[r])[0])
        det.append(f"column {cols[a]!r}: {log.values_sensor[order[r], a]:.6g} is beyond "
                   f"{RANGE_MARGIN:g} x {what} {bound[a]:.6g} ({log.unit})")
    return Drops(order[rows], "out_of_range", np.asarray(det, dtype=object))
