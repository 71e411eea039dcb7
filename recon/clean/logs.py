"""Clean the loaded logs of one pass: order, de-duplicate, drop spikes, find gaps and saturation.

Every decision is written into the ledger (file, line, time, reason, action, detail, sensor). For
every log: lines read = rows kept + ledger rows with action "dropped". Saturated samples are kept,
marked in a mask and given a ledger row with action "flagged".

Steps, per log (each sees only the rows that survived the ones before):

1. ``time_jump``: a row whose time jumps away from both file neighbours and back (a corrupt time
   word; the neighbours agree with each other) is dropped.
2. ``outside_window``: rows outside ``[pass] start/stop`` are dropped.
3. Sort by time (stable: file order among equal times).
4. ``duplicate_line``: a line byte-identical to an earlier one is dropped.
5. ``time_conflict``: among rows that share a time but differ, the one closest to its neighbours is
   kept (the first in the file on a tie) and the others dropped.
6. ``out_of_range``: a value no instrument of that configuration can report (beyond 1.5 x full
   scale; coil current beyond 1.5 x max_current_A) is a corrupt word and is dropped.
7. ``spike`` (magnetometer and gyro): the Hampel identifier on each axis, on each axis's rate of
   change and on the rate of change of the vector's magnitude (see :mod:`recon._hampel`), in
   stretches between gaps. Rows with a saturated axis are not tested. Samples taken with the coils
   switched off (``mag_sampling = "windowed"``) are tested apart from those taken with them on. A
   log sampled so sparsely that a window spans more than ``SPIKE_WINDOW_MAX_S`` is not tested, and
   an info anomaly says so. Coil currents are left alone: they step at every control tick by
   design, and a step is no spike; their only test is the physical bound of step 6.
8. ``saturated``: a value at or beyond full scale on any axis is flagged (kept).

Then gaps (spacing over 3 x the median period) and the anomalies of this stage.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
import pandas as pd

from ..config import Mission
from ..core import Anomaly, utc_text
from ..load import LEDGER_COLUMNS, LoadedPass, SensorLog, empty_ledger, ledger_frame
from . import hampel as _hampel
from .findings import format_inspect_table, stage_anomalies, write_ledger

__all__ = [
    "CleanedLog", "CleanedPass", "clean_pass", "clean_log", "find_gaps", "format_inspect_table",
    "write_ledger", "GAP_FACTOR", "RANGE_MARGIN",
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

# The spike tests compare a sample with its neighbours within a window of 2 K + 1 samples; they need
# the signal to change smoothly over that window. Over 60 s a LEO orbit moves ~4 degrees and the field
# magnitude a few per cent at most, while frames tens of seconds apart catch a turning satellite at
# unrelated attitudes, where a neighbour predicts nothing. Logs whose window spans more than this are
# not tested (and say so). Common practice, no source.
SPIKE_WINDOW_MAX_S = 60.0

_NAT = np.datetime64("NaT", "ns")


@dataclass(frozen=True)
class CleanedLog(SensorLog):
    """A cleaned log: the :class:`recon.load.SensorLog` fields, sorted by strictly increasing time,
    plus

    Attributes
    ----------
    saturated : (N, 3) bool array
        True where that axis is at or beyond full scale (sensor axes; all False for coils or when no
        full scale is configured).
    gaps : DataFrame
        Columns start_utc, stop_utc (the samples either side), duration_s.
    median_period_s : float
        Median spacing of the kept samples (NaN with fewer than two).
    notes : tuple of str
        Checks that could not be run on this log, and why.
    """

    saturated: np.ndarray
    gaps: pd.DataFrame
    median_period_s: float
    notes: tuple[str, ...] = ()


@dataclass(frozen=True)
class CleanedPass:
    """The cleaned logs of one pass, the ledger, the gaps and this stage's anomalies."""

    mission: Mission
    magnetometer: CleanedLog
    gyro: CleanedLog | None
    coils: CleanedLog | None
    ledger: pd.DataFrame
    anomalies: list[Anomaly]

    def logs(self) -> list[CleanedLog]:
        return [g for g in (self.magnetometer, self.gyro, self.coils) if g is not None]

    @property
    def gaps(self) -> dict[str, pd.DataFrame]:
        """Gaps per log name."""
        return {g.name: g.gaps for g in self.logs()}

    def inputs_summary(self) -> dict:
        """Per log (keyed "magnetometer", "gyro", "coils"): file, rows_read, rows_kept, dropped and
        flagged counts by reason, gaps, saturated samples, time span and median rate (JSON-ready)."""
        out = {}
        for g in self.logs():
            mine = self.ledger[self.ledger["sensor"] == g.name]
            dropped = mine[mine["action"] == "dropped"]["reason"].value_counts()
            flagged = mine[mine["action"] == "flagged"]["reason"].value_counts()
            out[g.name] = {
                "file": g.label,
                "rows_read": int(g.rows_read),
                "rows_kept": int(len(g)),
                "dropped": {str(k): int(v) for k, v in sorted(dropped.items())},
                "flagged": {str(k): int(v) for k, v in sorted(flagged.items())},
                "gaps": int(len(g.gaps)),
                "saturated": int(g.saturated.any(axis=1).sum()),
                "start_utc": utc_text(g.time_utc[0]) if len(g) else None,
                "stop_utc": utc_text(g.time_utc[-1]) if len(g) else None,
                "median_rate_hz": (float(1.0 / g.median_period_s)
                                   if np.isfinite(g.median_period_s) and g.median_period_s > 0 else None),
            }
        return out


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
class _Book:
    """Per-row decisions for one log, in file order."""

    def __init__(self, log: SensorLog):
        self.log = log
        n = len(log)
        self.alive = np.ones(n, dtype=bool)
        self.reason = np.full(n, "", dtype=object)
        self.detail = np.full(n, "", dtype=object)

    def drop(self, idx, reason: str, detail) -> None:
        idx = np.asarray(idx, dtype=np.int64)
        idx_live = self.alive[idx]
        self.alive[idx[idx_live]] = False
        self.reason[idx[idx_live]] = reason
        d = np.broadcast_to(np.asarray(detail, dtype=object), idx.shape)
        self.detail[idx[idx_live]] = d[idx_live]

    def ledger(self) -> pd.DataFrame:
        gone = np.flatnonzero(~self.alive)
        lg = self.log
        return ledger_frame(lg.label, lg.name, lg.line[gone], lg.time_utc[gone], self.reason[gone],
                            "dropped", self.detail[gone])


def _time_jumps(book: _Book) -> None:
    t = book.log.time_utc.astype(np.int64)
    if t.size < 3:
        return
    d = np.diff(t) / 1e9
    step = np.abs(d[np.abs(d) > 0])
    if step.size == 0:
        return
    p = float(np.median(step))
    jump = max(JUMP_PERIODS * p, JUMP_MIN_S)
    bridge = np.abs(t[2:] - t[:-2]) / 1e9
    hit = (np.abs(d[:-1]) > jump) & (np.abs(d[1:]) > jump) & (bridge <= BRIDGE_PERIODS * p)
    i = np.flatnonzero(hit) + 1
    if i.size:
        lines = book.log.line
        det = [f"time jumps {d[k - 1]:+.6g} s from line {lines[k - 1]} and {d[k]:+.6g} s to line {lines[k + 1]}"
               for k in i]
        book.drop(i, "time_jump", np.asarray(det, dtype=object))


def _window(book: _Book, mission: Mission) -> None:
    t = book.log.time_utc
    out = np.zeros(t.size, dtype=bool)
    if mission.start is not None:
        out |= t < np.datetime64(mission.start, "ns")
    if mission.stop is not None:
        out |= t > np.datetime64(mission.stop, "ns")
    if out.any():
        win = f"[{utc_text(mission.start) if mission.start is not None else '...'}, " \
              f"{utc_text(mission.stop) if mission.stop is not None else '...'}]"
        book.drop(np.flatnonzero(out), "outside_window", f"outside the pass window {win}")


def _duplicates(book: _Book) -> None:
    cid = book.log.content_id
    dup = np.flatnonzero((cid != np.arange(cid.size)) & book.alive)
    if dup.size:
        det = [f"same content as line {book.log.line[cid[k]]}" for k in dup]
        book.drop(dup, "duplicate_line", np.asarray(det, dtype=object))


def _conflicts(book: _Book, order: np.ndarray) -> np.ndarray:
    """Resolve rows sharing a time; return the surviving sorted order."""
    t = book.log.time_utc.astype(np.int64)[order]
    same = np.flatnonzero(t[1:] == t[:-1])
    if same.size == 0:
        return order
    v = book.log.values_sensor
    starts = np.flatnonzero(np.r_[True, t[1:] != t[:-1]])
    ends = np.r_[starts[1:], t.size]
    multi = np.flatnonzero(ends - starts > 1)
    first_of_group = starts  # representative row per distinct time, for the neighbour reference
    for g in multi:
        rows = order[starts[g]:ends[g]]
        # reference: median of the nearest distinct-time rows either side (up to 3 each)
        nb = [order[first_of_group[h]] for h in range(max(g - 3, 0), min(g + 4, starts.size))
              if h != g and ends[h] - starts[h] == 1]
        if nb:
            ref = np.median(v[nb], axis=0)
            spread = np.maximum(np.abs(v[nb] - ref).max(axis=0), 1e-300)
            with np.errstate(over="ignore", invalid="ignore"):
                cost = np.nanmax(np.abs(v[rows] - ref) / spread, axis=1)
            best = int(np.flatnonzero(cost == cost.min())[0]) if np.isfinite(cost).any() else 0
        else:
            best = 0
        keep_row = rows[best]
        others = np.delete(rows, best)
        book.drop(others, "time_conflict",
                  f"same time as line {book.log.line[keep_row]} (kept, closer to its neighbours), values differ")
    return order[book.alive[order]]


def _out_of_range(book: _Book, order: np.ndarray, bound: np.ndarray, what: str) -> np.ndarray:
    v = np.abs(book.log.values_sensor[order])
    with np.errstate(invalid="ignore"):
        over = v > RANGE_MARGIN * bound[None, :]
    rows = np.flatnonzero(over.any(axis=1))
    if rows.size:
        cols = book.log.columns
        det = []
        for r in rows:
            a = int(np.flatnonzero(over[r])[0])
            det.append(f"column {cols[a]!r}: {book.log.values_sensor[order[r], a]:.6g} is beyond "
                       f"{RANGE_MARGIN:g} x {what} {bound[a]:.6g} ({book.log.unit})")
        book.drop(order[rows], "out_of_range", np.asarray(det, dtype=object))
    return order[book.alive[order]]


def _quantum(x: np.ndarray) -> float:
    """Smallest nonzero step between consecutive samples: the quantisation step of a quiet quantised
    signal (where most steps are 0 or 1 count), never less than it; 0 if the signal never moves."""
    d = np.abs(np.diff(x))
    d = d[d > 0]
    return float(d.min()) if d.size else 0.0


def _sample_noise(log: SensorLog, spec, order: np.ndarray) -> float | None:
    """The stated noise as a per-sample standard deviation in the file's unit: the magnetometer's
    ``noise`` is one already; the gyro's is an angle random walk N (unit/sqrt(Hz)), whose Allan
    deviation is N / sqrt(tau) (IEEE Std 952-1997), so N sqrt(f) per sample at sample rate f."""
    noise = getattr(spec, "noise", None)
    if noise is None or log.name != "gyro":
        return noise
    _, period = find_gaps(log.time_utc[order])
    return float(noise / np.sqrt(period)) if np.isfinite(period) and period > 0 else None


def _spikes(book: _Book, order: np.ndarray, noise: float | None, saturated: np.ndarray,
            groups: list[np.ndarray], notes: list[str]) -> np.ndarray:
    """Hampel tests on values, rates and magnitude, per sampling group. Rows with a saturated axis
    are left out of the tests (they are flagged, not dropped, and their clipped values would bend
    the windows of their neighbours)."""
    vs = book.log.values_sensor[order]
    t_ns = book.log.time_utc[order].astype(np.int64)
    spike = np.zeros(order.size, dtype=bool)
    how = np.full(order.size, "", dtype=object)
    t_thr = _hampel.hampel_threshold(7 * order.size)
    cols, unit = book.log.columns, book.log.unit
    unsat = ~saturated.any(axis=1)
    for grp in groups:
        grp = grp[unsat[grp]]
        if grp.size < 3:
            continue
        tg = t_ns[grp]
        _, period = find_gaps(tg.astype("datetime64[ns]"))
        seg = (np.r_[0, np.flatnonzero(np.diff(tg) / 1e9 > GAP_FACTOR * period) + 1]
               if np.isfinite(period) else np.array([0]))
        if 2 * _hampel.HALF_WIDTH * period > SPIKE_WINDOW_MAX_S:
            span = 2 * _hampel.HALF_WIDTH * period
            notes.append(f"spike test not run on the {book.log.name} log {book.log.label}: a window of "
                         f"{2 * _hampel.HALF_WIDTH + 1} samples spans {span:.0f} s at the median spacing "
                         f"{period:.3g} s, longer than {SPIKE_WINDOW_MAX_S:g} s: neighbours this far apart "
                         "cannot tell a corrupt value from a genuine one")
            continue
        x = vs[grp]
        floor = np.array([max(noise or 0.0, _quantum(x[:, a])) for a in range(3)])
        f = _hampel.spike_flags(x, (tg - tg[0]) / 1e9, seg, floor, t=t_thr)
        for k in np.flatnonzero(f.any):
            if f.value[k].any() or f.rate[k].any():
                a = int(np.flatnonzero(f.value[k] | f.rate[k])[0])
                test = "value" if f.value[k, a] else "rate of change"
                what = f"column {cols[a]!r} = {x[k, a]:.6g} {unit}"
            else:
                test = "rate of change of the magnitude"
                what = f"|{', '.join(cols)}| = {np.linalg.norm(x[k]):.6g} {unit}"
            how[grp[k]] = f"{what} departs from its neighbours (Hampel test on the {test}, t = {t_thr:.2f})"
        spike[grp[f.any]] = True
    rows = np.flatnonzero(spike)
    if rows.size:
        book.drop(order[rows], "spike", how[rows])
    return order[book.alive[order]]


def _sampling_groups(log: SensorLog, order: np.ndarray, mission: Mission) -> list[np.ndarray]:
    """Split the magnetometer into samples taken with the coils switched off and with them on when
    the mission says the coils are switched off in a window around each control tick: the two sets
    see different fields, and a lone coils-off sample among coils-on ones is no spike."""
    c, ctl = mission.coils, mission.controller
    idx = np.arange(order.size)
    if (log.name != "magnetometer" or c is None or c.mag_sampling != "windowed" or ctl is None
            or ctl.first_tick is None or c.off_window_s is None):
        return [idx]
    before, after = c.off_window_s
    t0 = np.datetime64(ctl.first_tick, "ns").astype(np.int64)
    phase = np.mod((log.time_utc[order].astype(np.int64) - t0) / 1e9, ctl.period_s)
    off = (phase <= after) | (phase >= ctl.period_s - before)
    return [np.flatnonzero(off), np.flatnonzero(~off)]


def clean_log(log: SensorLog, mission: Mission) -> tuple[CleanedLog, pd.DataFrame]:
    """Clean one loaded log (see the module docstring for the steps).

    Returns
    -------
    cleaned : CleanedLog
    ledger : DataFrame, rows for the lines dropped or flagged here
    """
    # corrupt words near the float limit (1e308) overflow in squares and differences; the tests then
    # see inf, which they handle, and must not stop on the floating-point warning
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        return _clean_log(log, mission)


def _clean_log(log: SensorLog, mission: Mission) -> tuple[CleanedLog, pd.DataFrame]:
    book = _Book(log)
    notes: list[str] = []
    _time_jumps(book)
    _window(book, mission)
    alive = np.flatnonzero(book.alive)
    order = alive[np.argsort(log.time_utc[alive], kind="stable")]
    _duplicates(book)
    order = order[book.alive[order]]
    order = _conflicts(book, order)

    spec = getattr(mission, log.name)
    full_scale = getattr(spec, "full_scale", None)
    if log.name == "coils":
        order = _out_of_range(book, order, np.asarray(spec.max_current_A, dtype=float) /
                              _amps_per_file_unit(spec), "max current")
    elif full_scale is not None:
        order = _out_of_range(book, order, np.full(3, float(full_scale)), "full scale")

    def saturation(rows):
        if log.name == "coils" or full_scale is None:
            return np.zeros((rows.size, 3), dtype=bool)
        return np.abs(log.values_sensor[rows]) >= float(full_scale)

    if log.name in ("magnetometer", "gyro") and order.size >= 3:
        groups = _sampling_groups(log, order, mission)
        order = _spikes(book, order, _sample_noise(log, spec, order), saturation(order), groups, notes)

    sat = saturation(order)
    parts = [book.ledger()]
    sat_rows = np.flatnonzero(sat.any(axis=1))
    if sat_rows.size:
        det = [", ".join(f"column {log.columns[a]!r} = {log.values_sensor[order[r], a]:.6g}"
                         for a in np.flatnonzero(sat[r])) + f" at or beyond full scale {full_scale:g} {log.unit}"
               for r in sat_rows]
        parts.append(ledger_frame(log.label, log.name, log.line[order[sat_rows]], log.time_utc[order[sat_rows]],
                                  "saturated", "flagged", np.asarray(det, dtype=object)))
    gaps, period = find_gaps(log.time_utc[order])
    base = {f.name: getattr(log, f.name) for f in fields(SensorLog)}
    base.update(time_utc=log.time_utc[order], values=log.values[order], values_sensor=log.values_sensor[order],
                line=log.line[order], content_id=np.arange(order.size, dtype=np.int64))
    cleaned = CleanedLog(**base, saturated=sat, gaps=gaps, median_period_s=period, notes=tuple(dict.fromkeys(notes)))
    ledger = pd.concat([p for p in parts if len(p)], ignore_index=True) if any(len(p) for p in parts) \
        else empty_ledger()
    return cleaned, ledger


def _amps_per_file_unit(spec) -> np.ndarray:
    """A per file unit for each coil (duty: max_current_A; A or mA: the unit factor)."""
    from ..core import A_PER_UNIT

    if spec.unit == "duty":
        return np.asarray(spec.max_current_A, dtype=float)
    return np.full(3, A_PER_UNIT[spec.unit])


def clean_pass(loaded: LoadedPass, mission: Mission) -> CleanedPass:
    """Clean every log of a loaded pass and gather the ledger and this stage's anomalies.

    Parameters
    ----------
    loaded : LoadedPass, from :func:`recon.load.load_pass`
    mission : Mission

    Returns
    -------
    CleanedPass

    Raises
    ------
    InputError
        When cleaning leaves a log with no rows (for example a pass window that misses the data).
    """
    from ..core import InputError

    cleaned: dict[str, CleanedLog | None] = {"magnetometer": None, "gyro": None, "coils": None}
    parts = [loaded.ledger] if len(loaded.ledger) else []
    for log in loaded.logs():
        c, lg = clean_log(log, mission)
        if len(c) == 0:
            mine = pd.concat([loaded.ledger[loaded.ledger["sensor"] == log.name], lg])
            why = ", ".join(f"{r} {n}" for r, n in mine[mine["action"] == "dropped"]["reason"]
                            .value_counts().items())
            raise InputError(f"expected usable rows in the {log.name} log after cleaning, none of "
                             f"{log.rows_read} lines is left ({why})", log.file)
        cleaned[log.name] = c
        if len(lg):
            parts.append(lg)
    ledger = pd.concat(parts, ignore_index=True) if parts else empty_ledger()
    ledger = ledger.sort_values(["file", "line", "sensor", "action"], kind="stable").reset_index(drop=True)
    ledger = ledger[LEDGER_COLUMNS]
    logs = [g for g in cleaned.values() if g is not None]
    _check_accounting(logs, ledger)
    anomalies = stage_anomalies(logs, ledger, mission, loaded)
    return CleanedPass(mission=mission, magnetometer=cleaned["magnetometer"], gyro=cleaned["gyro"],
                       coils=cleaned["coils"], ledger=ledger, anomalies=anomalies)


def _check_accounting(logs: list[CleanedLog], ledger: pd.DataFrame) -> None:
    """Lines read = rows kept + rows dropped, for every log (a failure here is a bug in recon)."""
    dropped = ledger[ledger["action"] == "dropped"].groupby("sensor").size()
    for g in logs:
        n_drop = int(dropped.get(g.name, 0))
        if g.rows_read != len(g) + n_drop:
            raise RuntimeError(f"ledger accounting broken for {g.label} ({g.name}): read {g.rows_read}, "
                               f"kept {len(g)}, dropped {n_drop}")

