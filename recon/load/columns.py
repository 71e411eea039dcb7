"""The configured columns of one log: find them in the header, read them, and parse their values and
times, with a reason for every row that cannot be used.

Only the well-formed lines of the byte scan (:mod:`recon.load.csvscan`) are read, by the pandas C
parser with float columns; only when it meets a field that is not a number are the columns read
again as text to find which rows fail. ISO times are read from the bytes directly
(:func:`recon.load.timescales.iso_bytes_to_utc`), without a Python string per row.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import CoilSpec, SensorSpec, TimeSpec
from ..core import InputError
from . import timescales as ts
from .csvscan import Scan
from .ledger import REASON_BAD_TIME, REASON_MISSING, REASON_NON_FINITE, REASON_NON_NUMERIC

__all__ = [
    "CODE_OK", "CODE_MISSING", "CODE_NON_NUMERIC", "CODE_NON_FINITE", "CODE_BAD_TIME", "CODE_REASON",
    "Fields", "RowFaults", "column_index", "read_columns", "read_fields", "numbers", "column_times",
    "expected_time_text", "parse_values", "parse_times",
]

# Why a row cannot be used, as a small code per row (0: usable); the ledger gets the reason text
CODE_OK, CODE_MISSING, CODE_NON_NUMERIC, CODE_NON_FINITE, CODE_BAD_TIME = 0, 1, 2, 3, 4
CODE_REASON = {CODE_MISSING: REASON_MISSING, CODE_NON_NUMERIC: REASON_NON_NUMERIC,
               CODE_NON_FINITE: REASON_NON_FINITE, CODE_BAD_TIME: REASON_BAD_TIME}


@dataclass(frozen=True)
class RowFaults:
    """Per row of the well-formed lines: a code (``CODE_*``, 0 when usable) and, for the rows that
    cannot be used, the ledger's detail text keyed by row index."""

    code: np.ndarray
    detail: dict[int, str]

    def outranked_by(self, other: RowFaults) -> RowFaults:
        """These faults, replaced by ``other``'s on every row where ``other`` has one."""
        code = np.where(other.code > 0, other.code, self.code).astype(np.int8)
        return RowFaults(code, {**self.detail, **other.detail})


@dataclass(frozen=True)
class Fields:
    """The well-formed lines of one log and their configured columns.

    Attributes
    ----------
    scan : Scan
    rows : (n,) int64 array
        Indices of the well-formed lines into ``scan.starts``.
    cols : dict of int to (n,) array
        Header index -> column (float64, or object where some field is not a number, or text).
    i_time : int
        Header index of the time column.
    i_values : list of 3 int
        Header indices of the value columns.
    time_iso : (n,) datetime64[ns] array or None
        The ISO times, read from the bytes (then the time column is not in ``cols``).
    """

    scan: Scan
    rows: np.ndarray
    cols: dict
    i_time: int
    i_values: list[int]
    time_iso: np.ndarray | None

    @property
    def line(self) -> np.ndarray:
        """1-based file line of each row (the header is line 1)."""
        return self.rows + 2


def column_index(header: list[str], name: str, path: Path, what: str) -> int:
    """Index of the column ``name`` in the header; it must be there exactly once."""
    hits = [i for i, h in enumerate(header) if h == name]
    if not hits:
        shown = ", ".join(repr(h) for h in header[:40]) + (", ..." if len(header) > 40 else "")
        raise InputError(f"expected a column {name!r} in the {what} log's header, found only {shown}",
                         path, line=1, key=name)
    if len(hits) > 1:
        raise InputError(f"expected the column {name!r} once in the header, found it {len(hits)} times "
                         f"(fields {', '.join(str(i + 1) for i in hits)})", path, line=1, key=name)
    return hits[0]


def read_columns(body: bytes, usecols: list[int], float_cols: list[int], n_rows: int):
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


def read_fields(scan: Scan, spec: SensorSpec | CoilSpec, path: Path, what: str) -> Fields:
    """Find the configured columns in the header and read them from the well-formed lines."""
    i_time = column_index(scan.header, spec.time.column, path, what)
    i_val = [column_index(scan.header, c, path, what) for c in spec.columns]
    body, good_idx = scan.good_body()
    n = good_idx.size
    t_iso = None
    if spec.time.format == "iso" and n:
        # ISO times straight from the bytes (no Python string per row); values through pandas
        buf = np.frombuffer(scan.data, dtype=np.uint8)
        t_iso = ts.iso_bytes_to_utc(buf, *scan.field_span(good_idx, i_time))
    usecols = sorted(set(i_val) | (set() if t_iso is not None else {i_time}))
    float_cols = [c for c in usecols if not (c == i_time and spec.time.format == "iso")]
    cols = read_columns(body, usecols, float_cols, n)
    return Fields(scan=scan, rows=good_idx, cols=cols, i_time=i_time, i_values=i_val, time_iso=t_iso)


def numbers(col: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """float64 values of a column and a code per row: ``CODE_OK``, ``CODE_MISSING``,
    ``CODE_NON_NUMERIC`` or ``CODE_NON_FINITE``."""
    if col.dtype == object:
        v = pd.to_numeric(pd.Series(col, dtype=object), errors="coerce").to_numpy(dtype=float)
    else:
        v = col.astype(float, copy=False)
    code = np.zeros(v.shape, dtype=np.int8)
    bad = np.flatnonzero(~np.isfinite(v))
    if bad.size == 0:
        return v, code
    if col.dtype != object:
        code[bad] = CODE_NON_FINITE
        return v, code
    text = pd.Series(col[bad], dtype=object).astype(str).str.strip().str.lower()
    looks_numeric = text.str.fullmatch(r"[+-]?(nan|inf|infinity|[0-9.]+(e[+-]?[0-9]+)?)").to_numpy(dtype=bool)
    code[bad] = np.where(text.to_numpy(dtype=object) == "", CODE_MISSING,
                         np.where(looks_numeric, CODE_NON_FINITE, CODE_NON_NUMERIC))
    return v, code


def column_times(col: np.ndarray, spec: TimeSpec) -> tuple[np.ndarray, np.ndarray]:
    """UTC times of one time column in file order (NaT where unreadable) and the indices of rows
    that follow a counter wrap."""
    if spec.format == "iso":
        return ts.iso_to_utc(col), np.zeros(0, dtype=np.int64)
    v, code = numbers(col)
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


def expected_time_text(spec: TimeSpec) -> str:
    """What a readable time of this format looks like, for error and ledger texts."""
    return {"iso": "an ISO 8601 UTC time", "unix": "UNIX seconds", "gps": "GPS seconds >= 0",
            "ticks": "a whole tick count" + (f" below 2**{spec.rollover_bits}" if spec.rollover_bits else ""),
            }[spec.format]


def parse_values(fields: Fields, names: tuple[str, ...]) -> tuple[np.ndarray, RowFaults]:
    """The raw values (n, 3) of the value columns and the rows where one is not a finite number
    (the first failing column of a row names the reason)."""
    n = fields.rows.size
    code = np.zeros(n, dtype=np.int8)
    detail: dict[int, str] = {}
    raw = np.empty((n, 3))
    for k, (c, cname) in enumerate(zip(fields.i_values, names, strict=True)):
        v, vcode = numbers(fields.cols[c])
        raw[:, k] = v
        for i in np.flatnonzero((vcode > 0) & (code == 0)):  # only the failing rows
            code[i] = vcode[i]
            detail[int(i)] = f"column {cname!r}: expected a finite number, got {_shown(fields.cols[c][i])}"
    return raw, RowFaults(code, detail)


def parse_times(fields: Fields, spec: TimeSpec) -> tuple[np.ndarray, np.ndarray, RowFaults]:
    """UTC times (NaT where unreadable), the rows that follow a counter wrap, and the rows whose
    time cannot be read."""
    if fields.time_iso is not None:
        t, wraps = fields.time_iso, np.zeros(0, dtype=np.int64)
    else:
        t, wraps = column_times(fields.cols[fields.i_time], spec)
    code = np.zeros(fields.rows.size, dtype=np.int8)
    bad_t = np.flatnonzero(np.isnat(t))
    if bad_t.size == 0:
        return t, wraps, RowFaults(code, {})
    if fields.time_iso is not None:
        a, b = fields.scan.field_span(fields.rows[bad_t], fields.i_time)
        data = fields.scan.data
        shown = [data[x:y].decode("utf-8", "replace") for x, y in zip(a, b, strict=True)]
    else:
        shown = list(fields.cols[fields.i_time][bad_t])
    code[bad_t] = CODE_BAD_TIME
    detail = {int(i): f"column {spec.column!r}: expected {expected_time_text(spec)}, got {_shown(text)}"
              for i, text in zip(bad_t, shown, strict=True)}
    return t, wraps, RowFaults(code, detail)
