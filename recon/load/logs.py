"""Load the logs of one pass: read each CSV, map its columns, convert units and time bases.

Every line after the header is accounted for. A line that cannot be used (blank, not text, wrong
number of fields, unreadable time, a value that is not a finite number) does not stop the load: it
becomes a ledger row with its file, 1-based line number (the header is line 1) and reason, action
"dropped". Only problems with a whole file raise :class:`recon.core.InputError`: missing or
unreadable, empty, no header, a configured column absent from the header, no usable data row.

Units: values are converted once, here, into recon's internal units (nT, rad/s, A) and rotated from
sensor to body axes (``v_body = sensor_to_body @ v_sensor``). The values in the file's own unit and
sensor axes (after ``raw * scale + offset``) are kept beside them for saturation checks and
calibration. Coil values are per-coil currents in A and are not rotated; a "duty" unit means
``current = duty * max_current_A`` for each coil.

Speed: the file is scanned once as bytes (line boundaries, field counts, bytes that are not text:
:mod:`recon.load.csvscan`), and only well-formed lines reach the pandas C parser
(:mod:`recon.load.columns`).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import CoilSpec, Mission, SensorSpec
from ..core import A_PER_UNIT, NT_PER_UNIT, RAD_S_PER_UNIT, InputError
from .columns import CODE_NON_FINITE, CODE_REASON, RowFaults, parse_times, parse_values, read_fields
from .csvscan import Scan, read_log_bytes, scan_bytes
from .ledger import empty_ledger, ledger_frame

__all__ = ["SensorLog", "LoadedPass", "load_pass", "load_log", "amps_per_file_unit"]

@dataclass(frozen=True)
class SensorLog:
    """The usable rows of one log, in file order.

    Attributes
    ----------
    name : str
        "magnetometer", "gyro" or "coils".
    file : Path
        The log file.
    label : str
        The file as named in the ledger (relative to the mission file where possible).
    time_utc : (N,) datetime64[ns], UTC
    values : (N, 3) float array
        Internal units: nT or rad/s in the body frame; for coils, A per coil (coil order).
    values_sensor : (N, 3) float array
        The file's unit after ``raw * scale + offset``, sensor axes (coils: coil order).
    line : (N,) int64 array
        1-based line number of each row in the file (header = line 1).
    rows_read : int
        Lines read after the header, blank ones included.
    content_id : (N,) int64 array
        Index of the first row (in this log) whose line is byte-identical to this one; its own index
        when there is none.
    wrap_line : (W,) int64 array
        For tick clocks: line of the first row after each counter wrap (empty otherwise).
    columns : tuple of 3 str
        The value columns, as configured.
    unit : str
        The file's unit, as configured.
    """

    name: str
    file: Path
    label: str
    time_utc: np.ndarray
    values: np.ndarray
    values_sensor: np.ndarray
    line: np.ndarray
    rows_read: int
    content_id: np.ndarray
    wrap_line: np.ndarray
    columns: tuple[str, str, str]
    unit: str

    def __len__(self) -> int:
        return int(self.line.size)


@dataclass(frozen=True)
class LoadedPass:
    """All logs of one pass as loaded, with the ledger of lines that could not be used."""

    mission: Mission
    magnetometer: SensorLog
    gyro: SensorLog | None
    coils: SensorLog | None
    ledger: pd.DataFrame

    def logs(self) -> list[SensorLog]:
        return [g for g in (self.magnetometer, self.gyro, self.coils) if g is not None]


def load_log(spec: SensorSpec | CoilSpec, name: str, label: str | None = None) -> tuple[SensorLog, pd.DataFrame]:
    """Read one log and convert it to internal units.

    Parameters
    ----------
    spec : SensorSpec or CoilSpec
        From the mission file.
    name : str
        "magnetometer", "gyro" or "coils" (chooses the unit conversion).
    label : str, optional
        How the file is named in the ledger (default: its file name).

    Returns
    -------
    log : SensorLog
    ledger : DataFrame
        One row per line that could not be used (action "dropped").

    Raises
    ------
    InputError
        For problems with the whole file (see the module docstring).
    """
    path = Path(spec.file)
    label = label or path.name
    scan = scan_bytes(read_log_bytes(path, name), path)
    if scan.n_lines == 0:
        raise InputError(f"expected data rows after the header, found none in the {name} log", path)
    fields = read_fields(scan, spec, path, name)

    # values: raw -> file unit -> internal unit
    raw, faults = parse_values(fields, spec.columns)
    with np.errstate(over="ignore", invalid="ignore"):
        file_unit = raw * spec.scale + spec.offset
        values = _to_internal(file_unit, spec, name)
    faults = faults.outranked_by(_conversion_faults(values, faults))
    # time (a bad time outranks a bad value in the ledger)
    t, wraps, time_faults = parse_times(fields, spec.time)
    faults = faults.outranked_by(time_faults)

    ledger = _ledger(label, name, scan, fields.line, t, faults)
    keep = faults.code == 0
    rows = np.flatnonzero(keep)
    if rows.size == 0:
        counts = ledger["reason"].value_counts()
        why = ", ".join(f"{r} {c}" for r, c in counts.items())
        raise InputError(f"expected at least one usable data row in the {name} log, found none of "
                         f"{scan.n_lines} lines ({why})", path)
    line_kept = fields.line[rows]
    t_keep = t[rows]
    wrap_rows = np.searchsorted(rows, wraps[keep[wraps]])
    log = SensorLog(
        name=name, file=path, label=label, time_utc=t_keep,
        values=values[rows], values_sensor=file_unit[rows], line=line_kept.astype(np.int64),
        rows_read=scan.n_lines,
        content_id=_content_ids(scan, fields.rows[rows], t_keep.astype(np.int64)),
        wrap_line=line_kept[wrap_rows].astype(np.int64),
        columns=tuple(spec.columns), unit=spec.unit,
    )
    return log, ledger


def _conversion_faults(values: np.ndarray, faults: RowFaults) -> RowFaults:
    """Rows still usable whose values are not finite after scale, offset and unit conversion."""
    code = np.zeros(faults.code.shape, dtype=np.int8)
    over = np.flatnonzero((faults.code == 0) & ~np.all(np.isfinite(values), axis=1))
    code[over] = CODE_NON_FINITE
    return RowFaults(code, {int(i): "value out of range after scale, offset and unit conversion" for i in over})


def _ledger(label: str, name: str, scan: Scan, line: np.ndarray, t: np.ndarray, faults: RowFaults) -> pd.DataFrame:
    """Ledger rows for the lines the byte scan set aside, then for the rows that cannot be used."""
    parts = []
    if scan.bad.size:
        parts.append(ledger_frame(label, name, scan.bad + 2, np.datetime64("NaT", "ns"),
                                  np.asarray(scan.bad_reason, dtype=object), "dropped",
                                  np.asarray(scan.bad_detail, dtype=object)))
    gone = np.flatnonzero(faults.code != 0)
    if gone.size:
        reasons = np.array([CODE_REASON[int(c)] for c in faults.code[gone]], dtype=object)
        parts.append(ledger_frame(label, name, line[gone], t[gone], reasons, "dropped",
                                  np.array([faults.detail[int(i)] for i in gone], dtype=object)))
    return pd.concat(parts, ignore_index=True) if parts else empty_ledger()


def _content_ids(scan: Scan, rows_line_idx: np.ndarray, t_ns: np.ndarray) -> np.ndarray:
    """Index of the first row with byte-identical line content (only rows sharing a time can)."""
    n = rows_line_idx.size
    ids = np.arange(n, dtype=np.int64)
    if n < 2 or np.all(np.diff(t_ns) > 0):  # strictly increasing: no two rows share a time
        return ids
    order = np.argsort(t_ns, kind="stable")
    same = t_ns[order][1:] == t_ns[order][:-1]
    if not same.any():
        return ids
    cand = np.unique(np.concatenate((order[1:][same], order[:-1][same])))
    first: dict[bytes, int] = {}
    for i in cand:  # ascending index = file order
        key = scan.line_bytes(int(rows_line_idx[i]))
        ids[i] = first.setdefault(key, int(i))
    return ids


def _label(path: Path, mission: Mission | None) -> str:
    """The file as the ledger names it: relative to the mission file where possible."""
    if mission is None:
        return path.name
    try:
        rel = os.path.relpath(path, mission.path.parent)
    except ValueError:  # other drive on Windows
        return str(path)
    return str(path) if rel.startswith("..") else rel.replace(os.sep, "/")


def amps_per_file_unit(spec: CoilSpec) -> np.ndarray:
    """(3,) A per file unit for each coil: ``max_current_A`` for a "duty" log, else the unit factor."""
    if spec.unit == "duty":
        return np.asarray(spec.max_current_A, dtype=float)
    return np.full(3, A_PER_UNIT[spec.unit])


def _to_internal(file_unit: np.ndarray, spec: SensorSpec | CoilSpec, name: str) -> np.ndarray:
    """File unit, sensor axes -> internal unit, body axes (coils: A per coil, no rotation)."""
    if name == "coils":
        return file_unit * amps_per_file_unit(spec)[None, :]
    factor = NT_PER_UNIT[spec.unit] if name == "magnetometer" else RAD_S_PER_UNIT[spec.unit]
    m = np.asarray(spec.sensor_to_body, dtype=float) * factor
    # v_body = M @ v_sensor row by row, written out: a (N, 3) x (3, 3) product through BLAS pays
    # for thread start-up, and more so on a busy machine
    return file_unit[:, 0:1] * m[:, 0] + file_unit[:, 1:2] * m[:, 1] + file_unit[:, 2:3] * m[:, 2]


def load_pass(mission: Mission) -> LoadedPass:
    """Load every log the mission file names.

    Parameters
    ----------
    mission : Mission
        From :func:`recon.config.load_mission`.

    Returns
    -------
    LoadedPass
        The magnetometer, gyro (or None) and coil (or None) logs, and the ledger of unusable lines.

    Raises
    ------
    InputError
        For problems with a whole file.
    """
    logs, parts = {}, []
    for name in ("magnetometer", "gyro", "coils"):
        spec = getattr(mission, name)
        if spec is None:
            logs[name] = None
            continue
        log, ledger = load_log(spec, name, _label(Path(spec.file), mission))
        logs[name] = log
        if len(ledger):
            parts.append(ledger)
    ledger = pd.concat(parts, ignore_index=True) if parts else empty_ledger()
    return LoadedPass(mission=mission, magnetometer=logs["magnetometer"], gyro=logs["gyro"],
                      coils=logs["coils"], ledger=ledger)
