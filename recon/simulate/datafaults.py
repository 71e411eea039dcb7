"""Injecting data faults into a log's lines, with a ledger of each one's kind and 1-based line number.

The header is line 1. Kinds:

- ``gap``: a run of rows removed; recorded at the line of the first row after the hole, with the
  number of rows removed and the times of the first and last missing sample;
- ``duplicate``: a row written twice; recorded at the second copy, with ``of_line``;
- ``out_of_order``: two neighbouring rows swapped; recorded at the row whose time is earlier than the
  line before it, with ``swapped_with_line``;
- ``spike``: a large offset added to one value; recorded with the column and the offset (file units);
- ``blank_line``: an empty line inserted;
- ``malformed``: a row replaced by one with a field missing, an extra field or a non-numeric value;
- ``saturation``: a run of rows whose value in one column is set to the sensor's full scale; one
  record per line.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..core import InputError, utc_text
from .scenarios import DATA_FAULT_KINDS

__all__ = ["inject"]

_RUN = {"gap": (3, 12), "saturation": (4, 8)}  # rows per run, inclusive range
_MALFORMED = ("missing_field", "extra_field", "non_numeric")


def _positions(n_rows: int, n_faults: int, rng: np.random.Generator, keep_out: list[int]) -> np.ndarray:
    """One start row per fault: one per equal block of the file, away from its ends and ``keep_out``."""
    lo, hi = 10, n_rows - 20
    if n_faults == 0:
        return np.zeros(0, int)
    if hi - lo < 30 * n_faults:
        raise InputError(f"expected a log long enough for {n_faults} data faults (30 rows each), "
                         f"got {n_rows} rows", key="data_faults")
    edges = np.linspace(lo, hi, n_faults + 1).astype(int)
    out = []
    for a, b in zip(edges[:-1], edges[1:], strict=True):
        allowed = np.array([r for r in range(a + 2, b - 15) if all(abs(r - x) > 20 for x in keep_out)])
        if len(allowed) == 0:
            allowed = np.arange(a + 2, b - 15)
        out.append(int(rng.choice(allowed)))
    return np.asarray(out)


def _plan(kinds: list[str], starts: np.ndarray, vals: np.ndarray, rng: np.random.Generator,
          full_scale: float | None, spike_size: float) -> dict[int, tuple]:
    """What happens at each faulty row (start row -> action); spikes and saturation edit ``vals``."""
    action: dict[int, tuple] = {}
    for kind, r in zip(kinds, starts, strict=True):
        if kind == "gap":
            action[r] = ("gap", int(rng.integers(_RUN["gap"][0], _RUN["gap"][1] + 1)))
        elif kind == "saturation":
            n, ax = int(rng.integers(_RUN["saturation"][0], _RUN["saturation"][1] + 1)), int(rng.integers(3))
            sign = 1.0 if vals[r, ax] >= 0 else -1.0
            vals[r:r + n, ax] = sign * full_scale
            action[r] = ("saturation", n, ax, sign * full_scale)
        elif kind == "spike":
            ax = int(rng.integers(3))
            off = spike_size * (1.0 if rng.random() < 0.5 else -1.0)
            vals[r, ax] += off
            action[r] = ("spike", ax, off)
        elif kind == "malformed":
            action[r] = ("malformed", _MALFORMED[int(rng.integers(len(_MALFORMED)))], int(rng.integers(3)))
        else:
            action[r] = (kind,)
    return action


def _malformed(line: str, how: str, column: int) -> str:
    fields = line.split(",")
    if how == "missing_field":
        return ",".join(fields[:-1])
    if how == "extra_field":
        return line + "," + fields[-1]
    fields[1 + column] = "ERR"
    return ",".join(fields)


def inject(file_name: str, header: str, times: list[str], values: np.ndarray, fmt: Callable,
           plan: dict[str, int], rng: np.random.Generator, *, columns: tuple[str, ...],
           full_scale: float | None = None, spike_size: float = 0.0, time_utc: np.ndarray | None = None,
           keep_out: list[int] = ()) -> tuple[list[str], list[dict]]:
    """Lines of one log file with the planned faults, and the ledger.

    Parameters
    ----------
    file_name : str, for the ledger
    header : str, line 1
    times : list of str, the time field of each row (already formatted)
    values : (N, 3) array, the values in file units
    fmt : callable ``fmt(time_text, values_row) -> str`` making one line
    plan : dict kind -> count
    rng : numpy Generator
    columns : the three value column names (for the ledger)
    full_scale : float, the saturation value in file units
    spike_size : float, offset of a spike in file units
    time_utc : (N,) datetime64, the true instant of each row (for the ledger)
    keep_out : rows near which no fault is placed (e.g. a counter rollover)

    Returns
    -------
    lines : list of str (without newlines), header first
    ledger : list of dict with ``file``, ``line``, ``kind`` and details
    """
    unknown = set(plan) - set(DATA_FAULT_KINDS)
    if unknown:
        raise InputError(f"expected data fault kinds among {list(DATA_FAULT_KINDS)}, got {sorted(unknown)}",
                         key="data_faults")
    kinds = [k for k in DATA_FAULT_KINDS for _ in range(int(plan.get(k, 0)))]
    order = rng.permutation(len(kinds))
    kinds = [kinds[i] for i in order]
    starts = _positions(len(times), len(kinds), rng, list(keep_out))
    vals = np.array(values, dtype=float, copy=True)
    action = _plan(kinds, starts, vals, rng, full_scale, spike_size)
    return _write(file_name, header, times, vals, fmt, action, columns, time_utc)


def _write(file_name, header, times, vals, fmt, action, columns, time_utc) -> tuple[list[str], list[dict]]:
    """The lines and ledger rows: each faulty row written as its action says."""

    def when(r: int) -> str | None:
        return None if time_utc is None else utc_text(time_utc[r])

    lines, ledger = [header], []

    def record(kind: str, **extra) -> None:
        ledger.append({"file": file_name, "line": len(lines), "kind": kind, **extra})

    r = 0
    while r < len(times):
        a = action.get(r, (None,))
        kind, line, step = a[0], fmt(times[r], vals[r]), 1
        if kind is None:
            lines.append(line)
        elif kind == "gap":
            step = a[1]
            ledger.append({"file": file_name, "line": len(lines) + 1, "kind": "gap", "rows_removed": a[1],
                           "first_missing_utc": when(r), "last_missing_utc": when(r + a[1] - 1)})
        elif kind == "duplicate":
            lines += [line, line]
            record("duplicate", of_line=len(lines) - 1, time_utc=when(r))
        elif kind == "out_of_order":
            lines += [fmt(times[r + 1], vals[r + 1]), line]
            record("out_of_order", swapped_with_line=len(lines) - 1, time_utc=when(r))
            step = 2
        elif kind == "spike":
            lines.append(line)
            record("spike", column=columns[a[1]], offset=a[2], time_utc=when(r))
        elif kind == "blank_line":
            lines.append("")
            record("blank_line")
            lines.append(line)
        elif kind == "malformed":
            lines.append(_malformed(line, a[1], a[2]))
            record("malformed", detail=a[1], time_utc=when(r))
        elif kind == "saturation":
            for j in range(r, min(r + a[1], len(times))):
                lines.append(fmt(times[j], vals[j]))
                record("saturation", column=columns[a[2]], value=a[3], time_utc=when(j))
            step = a[1]
        r += step
    return lines, ledger
