"""Load the logs of one pass: read each CSV, map its columns, convert units and time bases.

Every line after the header is accounted for. A line that cannot be used (blank, not text, wrong
number of fields, unreadable time, a value that is not a finite number) does not stop the load: it
becomes a ledger row with its file, 1-based line number (the header is line 1) and reason, action
"dropped". Only problems with a whole file raise :class:`recon.errors.InputError`: missing or
unreadable, empty, no header, a configured column absent from the header, no usable data row.

Units: values are converted once, here, into recon's internal units (nT, rad/s, A) and rotated from
sensor to body axes (``v_body = sensor_to_body @ v_sensor``). The values in the file's own unit and
sensor axes (after ``raw * scale + offset``) are kept beside them for saturation checks and
calibration. Coil values are per-coil currents in A and are not rotated; a "duty" unit means
``current = duty * max_current_A`` for each coil.

Speed: the file is scanned once as bytes (line boundaries, field counts, bytes that are not text),
and only well-formed lines reach the pandas C parser, with float columns; only when it meets a
field that is not a number are the columns read again as text to find which rows fail. ISO times
are read from the bytes directly (:func:`recon._timescales.iso_bytes_to_utc`), without a Python
string per row.
"""

from __future__ import annotations

import csv
import io
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import CoilSpec, Mission, SensorSpec, TimeSpec
from ..core import A_PER_UNIT, NT_PER_UNIT, RAD_S_PER_UNIT, InputError
from . import timescales as ts
from .csvscan import Scan, read_log_bytes, scan_bytes

__all__ = [
    "LEDGER_COLUMNS", "SensorLog", "LoadedPass", "load_pass", "load_log", "ledger_frame", "empty_ledger",
    "REASON_BAD_TIME", "REASON_MISSING", "REASON_NON_NUMERIC", "REASON_NON_FINITE",
]

# The ledger: one row per input line that was dropped, repaired or flagged. "sensor" names the log
# (two logs may share one file, each with its own view of a line).
LEDGER_COLUMNS = ["file", "line", "time_utc", "reason", "action", "detail", "sensor"]

REASON_BAD_TIME = "bad_time"
REASON_MISSING = "missing_value"
REASON_NON_NUMERIC = "non_numeric"
REASON_NON_FINITE = "non_finite"

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


# ---------------------------------------------------------------------------------------- ledger
def ledger_frame(label: str, sensor: str, line, time_utc, reason, action: str, detail) -> pd.DataFrame:
    """Ledger rows for one log (vectorised: ``line``, ``time_utc``, ``reason``, ``detail`` may be
    arrays or scalars broadcast to the length of ``line``)."""
    line = np.asarray(line, dtype=np.int64).ravel()
    n = line.size
    t = np.asarray(time_utc, dtype="datetime64[ns]")
    t = np.broadcast_to(t, (n,)) if t.ndim == 0 else t.ravel()
    return pd.DataFrame({
        "file": np.full(n, label, dtype=object),
        "line": line,
        "time_utc": t,
        "reason": np.broadcast_to(np.asarray(reason, dtype=object), (n,)).copy(),
        "action": np.full(n, action, dtype=object),
        "detail": np.broadcast_to(np.asarray(detail, dtype=object), (n,)).copy(),
        "sensor": np.full(n, sensor, dtype=object),
    })


def empty_ledger() -> pd.DataFrame:
    return ledger_frame("", "", np.zeros(0, dtype=np.int64), np.datetime64("NaT", "ns"), "", "", "")


# ---------------------------------------------------------------------------------------- parsing
def _column_index(header: list[str], name: str, path: Path, what: str) -> int:
    hits = [i for i, h in enumerate(header) if h == name]
    if not hits:
        shown = ", ".join(repr(h) for h in header[:40]) + (", ..." if len(header) > 40 else "")
        raise InputError(f"expected a column {name!r} in the {what} log's header, found only {shown}",
                         path, line=1, key=name)
    if len(hits) > 1:
        raise InputError(f"expected the column {name!r} once in the header, found it {len(hits)} times "
                         f"(fields {', '.join(str(i + 1) for i in hits)})", path, line=1, key=name)
    return hits[0]


def _read_columns(body: bytes, usecols: list[int], float_cols: list[int], n_rows: int):
    """Read the chosen columns of well-formed lines; numbers as float64 when every field parses.

    Returns a dict column index -> array: float64, or object (text) for a number column in which
    some field did not parse (the caller then finds which rows fail), and for ``text`` columns.
    """
    common = dict(header=None, engine="c", quoting=csv.QUOTE_NONE, na_filter=False, skip_blank_lines=False,
                  encoding="utf-8", index_col=False)
    text_cols = [c for c in usecols if c not in float_cols]
    if n_rows == 0:
        return {c: np.zeros(0, dtype=float if c in float_cols else object) for c in usecols}

    def read(cols, dtype):
        df = pd.read_csv(io.BytesIO(body), usecols=cols, dtype={c: dtype for c in cols}, **common)
        if len(df) != n_rows:  # cannot happen for lines that passed the scan; keep the ledger honest
            raise RuntimeError(f"parser returned {len(df)} rows for {n_rows} well-formed lines")
        return {c: df[c].to_numpy() for c in cols}

    out = read(text_cols, object) if text_cols else {}
    try:
        out.update(read(float_cols, np.float64))
    except ValueError:  # some field is not a number: find the column(s), read only those as text
        for c in float_cols:
            try:
                out.update(read([c], np.float64))
            except ValueError:
                out.update(read([c], object))
    return out


def _numbers(col: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """float64 values of a column and a reason code per row: 0 ok, 1 missing, 2 non-numeric,
    3 non-finite."""
    if col.dtype == object:
        v = pd.to_numeric(pd.Series(col, dtype=object), errors="coerce").to_numpy(dtype=float)
    else:
        v = col.astype(float, copy=False)
    code = np.zeros(v.shape, dtype=np.int8)
    bad = np.flatnonzero(~np.isfinite(v))
    if bad.size == 0:
        return v, code
    if col.dtype != object:
        code[bad] = 3
        return v, code
    text = pd.Series(col[bad], dtype=object).astype(str).str.strip().str.lower()
    looks_numeric = text.str.fullmatch(r"[+-]?(nan|inf|infinity|[0-9.]+(e[+-]?[0-9]+)?)").to_numpy(dtype=bool)
    code[bad] = np.where(text.to_numpy(dtype=object) == "", 1, np.where(looks_numeric, 3, 2))
    return v, code


_CODE_REASON = {1: REASON_MISSING, 2: REASON_NON_NUMERIC, 3: REASON_NON_FINITE, 4: REASON_BAD_TIME}


def _times(col: np.ndarray, spec: TimeSpec) -> tuple[np.ndarray, np.ndarray]:
    """UTC times of one time column in file order (NaT where unreadable) and the indices of rows
    that follow a counter wrap."""
    if spec.format == "iso":
        return ts.iso_to_utc(col), np.zeros(0, dtype=np.int64)
    v, code = _numbers(col)
    if spec.format == "unix":
        return ts.unix_seconds_to_utc(np.where(code == 0, v, np.nan)), np.zeros(0, dtype=np.int64)
    if spec.format == "gps":
        return ts.gps_seconds_to_utc(np.where(code == 0, v, np.nan)), np.zeros(0, dtype=np.int64)
    # ticks: a counter is a whole number in [0, 2**bits)
    ok = (code == 0) & (v >= 0) & (v == np.floor(v))
    if spec.rollover_bits is not None:
        ok &= v < 2.0 ** spec.rollover_bits
    out = np.full(v.shape, np.datetime64("NaT", "ns"))
    idx = np.flatnonzero(ok)
    t_ok, wraps = ts.ticks_to_utc(v[idx], spec.epoch, spec.rate_hz, spec.rollover_bits)
    out[idx] = t_ok
    return out, idx[wraps]


def _shown(value, width: int = 32) -> str:
    text = str(value)
    return repr(text if len(text) <= width else text[:width] + "...")


def _time_detail(spec: TimeSpec) -> str:
    return {"iso": "an ISO 8601 UTC time", "unix": "UNIX seconds", "gps": "GPS seconds >= 0",
            "ticks": "a whole tick count" + (f" below 2**{spec.rollover_bits}" if spec.rollover_bits else ""),
            }[spec.format]


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
    if mission is None:
        return path.name
    try:
        rel = os.path.relpath(path, mission.path.parent)
    except ValueError:  # other drive on Windows
        return str(path)
    return str(path) if rel.startswith("..") else rel.replace(os.sep, "/")


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
    data = read_log_bytes(path, name)
    scan = scan_bytes(data, path)
    if scan.n_lines == 0:
        raise InputError(f"expected data rows after the header, found none in the {name} log", path)
    i_time = _column_index(scan.header, spec.time.column, path, name)
    i_val = [_column_index(scan.header, c, path, name) for c in spec.columns]

    body, good_idx = scan.good_body()
    n = good_idx.size
    buf = np.frombuffer(data, dtype=np.uint8)
    t_iso = None
    if spec.time.format == "iso" and n:
        # ISO times straight from the bytes (no Python string per row); values through pandas
        t_iso = ts.iso_bytes_to_utc(buf, *scan.field_span(good_idx, i_time))
    usecols = sorted(set(i_val) | (set() if t_iso is not None else {i_time}))
    float_cols = [c for c in usecols if not (c == i_time and spec.time.format == "iso")]
    cols = _read_columns(body, usecols, float_cols, n)
    line_good = good_idx + 2
    code = np.zeros(n, dtype=np.int8)  # 0 usable, else a key of _CODE_REASON
    detail: dict[int, str] = {}

    # values: raw -> file unit -> internal unit
    raw = np.empty((n, 3))
    for k, (c, cname) in enumerate(zip(i_val, spec.columns, strict=True)):
        v, vcode = _numbers(cols[c])
        raw[:, k] = v
        for i in np.flatnonzero((vcode > 0) & (code == 0)):  # only the failing rows
            code[i] = vcode[i]
            detail[int(i)] = f"column {cname!r}: expected a finite number, got {_shown(cols[c][i])}"
    with np.errstate(over="ignore", invalid="ignore"):
        file_unit = raw * spec.scale + spec.offset
        values = _to_internal(file_unit, spec, name)
    for i in np.flatnonzero((code == 0) & ~np.all(np.isfinite(values), axis=1)):
        code[i] = 3
        detail[int(i)] = "value out of range after scale, offset and unit conversion"

    # time (a bad time outranks a bad value in the ledger)
    if t_iso is not None:
        t, wraps = t_iso, np.zeros(0, dtype=np.int64)
    else:
        t, wraps = _times(cols[i_time], spec.time)
    bad_t = np.flatnonzero(np.isnat(t))
    if bad_t.size:
        if t_iso is not None:
            a, b = scan.field_span(good_idx[bad_t], i_time)
            shown = [data[x:y].decode("utf-8", "replace") for x, y in zip(a, b, strict=True)]
        else:
            shown = list(cols[i_time][bad_t])
        for i, text in zip(bad_t, shown, strict=True):
            code[i] = 4
            detail[int(i)] = f"column {spec.time.column!r}: expected {_time_detail(spec.time)}, got {_shown(text)}"

    keep = code == 0
    rows = np.flatnonzero(keep)
    wrap_rows = np.searchsorted(rows, wraps[keep[wraps]])
    ledger_parts = []
    if scan.bad.size:
        ledger_parts.append(ledger_frame(label, name, scan.bad + 2, np.datetime64("NaT", "ns"),
                                         np.asarray(scan.bad_reason, dtype=object), "dropped",
                                         np.asarray(scan.bad_detail, dtype=object)))
    gone = np.flatnonzero(~keep)
    if gone.size:
        ledger_parts.append(ledger_frame(
            label, name, line_good[gone], t[gone], np.array([_CODE_REASON[int(c)] for c in code[gone]], dtype=object),
            "dropped", np.array([detail[int(i)] for i in gone], dtype=object)))
    ledger = pd.concat(ledger_parts, ignore_index=True) if ledger_parts else empty_ledger()
    if rows.size == 0:
        counts = ledger["reason"].value_counts()
        why = ", ".join(f"{r} {c}" for r, c in counts.items())
        raise InputError(f"expected at least one usable data row in the {name} log, found none of "
                         f"{scan.n_lines} lines ({why})", path)

    t_keep = t[rows]
    log = SensorLog(
        name=name, file=path, label=label, time_utc=t_keep,
        values=values[rows], values_sensor=file_unit[rows], line=line_good[rows].astype(np.int64),
        rows_read=scan.n_lines,
        content_id=_content_ids(scan, good_idx[rows], t_keep.astype(np.int64)),
        wrap_line=line_good[rows][wrap_rows].astype(np.int64),
        columns=tuple(spec.columns), unit=spec.unit,
    )
    return log, ledger


def _to_internal(file_unit: np.ndarray, spec: SensorSpec | CoilSpec, name: str) -> np.ndarray:
    """File unit, sensor axes -> internal unit, body axes (coils: A per coil, no rotation)."""
    if name == "coils":
        if spec.unit == "duty":
            return file_unit * np.asarray(spec.max_current_A, dtype=float)[None, :]
        return file_unit * A_PER_UNIT[spec.unit]
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
