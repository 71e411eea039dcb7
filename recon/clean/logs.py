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
   change and on the rate of change of the vector's magnitude (see :mod:`recon.clean.spikes`), in
   stretches between gaps. Rows with a saturated axis are not tested. Samples taken with the coils
   switched off (``mag_sampling = "windowed"``) are tested apart from those taken with them on. A
   log sampled so sparsely that a window spans more than ``SPIKE_WINDOW_MAX_S`` is not tested, and
   an info anomaly says so. Coil currents are left alone: they step at every control tick by
   design, and a step is no spike; their only test is the physical bound of step 6.
8. ``saturated``: a value at or beyond full scale on any axis is flagged (kept).

Then gaps (spacing over 3 x the median period) and the anomalies of this stage. The row steps are
in :mod:`recon.clean.rows`, the spike step in :mod:`recon.clean.spikes`, the anomalies in
:mod:`recon.clean.findings`.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import numpy as np
import pandas as pd

from ..config import Mission
from ..core import NS_PER_S, Anomaly, InputError, utc_text
from ..load import LEDGER_COLUMNS, LoadedPass, SensorLog, amps_per_file_unit, empty_ledger, ledger_frame
from .findings import stage_anomalies
from .rows import RowBook, duplicates, find_gaps, out_of_range, outside_window, time_conflicts, time_jumps
from .spikes import sample_noise, sampling_groups, spike_drops

__all__ = ["CleanedLog", "CleanedPass", "clean_pass", "clean_log"]

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

    def with_magnetometer_time_shifted(self, shift_s: float) -> CleanedPass:
        """The same pass with every magnetometer time (and gap bound) moved by ``shift_s`` seconds, as
        when a stamping latency is taken out of the stamps (the ledger keeps the times as logged)."""
        shift = np.timedelta64(int(round(shift_s * NS_PER_S)), "ns")
        if shift == np.timedelta64(0, "ns"):
            return self
        mag = self.magnetometer
        gaps = mag.gaps.copy()
        for col in ("start_utc", "stop_utc"):
            if col in gaps:
                gaps[col] = gaps[col] + shift
        return replace(self, magnetometer=replace(mag, time_utc=mag.time_utc + shift, gaps=gaps))

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
    book = RowBook(log)
    book.drop(time_jumps(log))
    book.drop(outside_window(log, mission))
    alive = np.flatnonzero(book.alive)
    order = alive[np.argsort(log.time_utc[alive], kind="stable")]
    book.drop(duplicates(log, book.alive))
    order = book.alive_in(order)
    book.drop(time_conflicts(log, order))
    order = book.alive_in(order)

    spec = getattr(mission, log.name)
    full_scale = getattr(spec, "full_scale", None)
    if log.name == "coils":
        book.drop(out_of_range(log, order, np.asarray(spec.max_current_A, dtype=float) /
                               amps_per_file_unit(spec), "max current"))
        order = book.alive_in(order)
    elif full_scale is not None:
        book.drop(out_of_range(log, order, np.full(3, float(full_scale)), "full scale"))
        order = book.alive_in(order)

    notes: list[str] = []
    if log.name in ("magnetometer", "gyro") and order.size >= 3:
        drops, notes = spike_drops(log, order, sample_noise(log, spec, order), _saturation(log, order, full_scale),
                                   sampling_groups(log, order, mission))
        book.drop(drops)
        order = book.alive_in(order)

    sat = _saturation(log, order, full_scale)
    parts = [book.ledger(), _saturation_ledger(log, order, sat, full_scale)]
    gaps, period = find_gaps(log.time_utc[order])
    base = {f.name: getattr(log, f.name) for f in fields(SensorLog)}
    base.update(time_utc=log.time_utc[order], values=log.values[order], values_sensor=log.values_sensor[order],
                line=log.line[order], content_id=np.arange(order.size, dtype=np.int64))
    cleaned = CleanedLog(**base, saturated=sat, gaps=gaps, median_period_s=period, notes=tuple(dict.fromkeys(notes)))
    ledger = pd.concat([p for p in parts if len(p)], ignore_index=True) if any(len(p) for p in parts) \
        else empty_ledger()
    return cleaned, ledger


def _saturation(log: SensorLog, rows: np.ndarray, full_scale: float | None) -> np.ndarray:
    """(M, 3) bool: axes at or beyond full scale on the given rows (never for coils)."""
    if log.name == "coils" or full_scale is None:
        return np.zeros((rows.size, 3), dtype=bool)
    return np.abs(log.values_sensor[rows]) >= float(full_scale)


def _saturation_ledger(log: SensorLog, order: np.ndarray, sat: np.ndarray, full_scale: float | None) -> pd.DataFrame:
    """``saturated`` ledger rows (action "flagged": the samples are kept)."""
    sat_rows = np.flatnonzero(sat.any(axis=1))
    if sat_rows.size == 0:
        return empty_ledger()
    det = [", ".join(f"column {log.columns[a]!r} = {log.values_sensor[order[r], a]:.6g}"
                     for a in np.flatnonzero(sat[r])) + f" at or beyond full scale {full_scale:g} {log.unit}"
           for r in sat_rows]
    return ledger_frame(log.label, log.name, log.line[order[sat_rows]], log.time_utc[order[sat_rows]],
                        "saturated", "flagged", np.asarray(det, dtype=object))


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

