"""What the clean stage reports: its anomalies (the ``recon inspect`` table and the ledger file are
written by :mod:`recon.report.ledger`)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..core import NT_PER_UNIT, Anomaly
from .rows import GAP_FACTOR

__all__ = [
    "LEO_FIELD_MIN_nT", "LEO_FIELD_MAX_nT", "ROWS_DROPPED_WARN_FRACTION", "STUCK_MIN_SAMPLES",
    "STUCK_MIN_FRACTION", "mag_unit_anomaly", "stuck_anomalies", "stage_anomalies",
]

# Field magnitude a magnetometer in low Earth orbit can see. IGRF-14 (Alken et al. 2025, Earth
# Planets Space 77:79) gives 18.3 uT to 52.2 uT at 500 km altitude (computed with ppigrf on a
# 1-degree grid, 2025-01-01); the bounds widen that for lower orbits (the field grows ~3 % per
# 100 km inward), higher orbits and an uncalibrated bias of a few uT.
LEO_FIELD_MIN_nT = 15_000.0
LEO_FIELD_MAX_nT = 65_000.0

# A log that loses more than this fraction of its lines is worth a warning. Common practice, no source.
ROWS_DROPPED_WARN_FRACTION = 0.01

# A value held exactly for this many consecutive samples, and this fraction of the log, is called
# stuck (a live sensor's noise moves its last digit). Common practice, no source.
STUCK_MIN_SAMPLES = 50
STUCK_MIN_FRACTION = 0.05

_AXES = "xyz"


def _body_axis(log, mission, a: int) -> str | None:
    """Body axis letter that sensor axis ``a`` lies along (coils: coil ``a`` is axis ``a``)."""
    if log.name == "coils":
        return _AXES[a]
    m = np.asarray(getattr(mission, log.name).sensor_to_body, dtype=float)
    col = np.abs(m[:, a])
    k = int(np.argmax(col))
    return _AXES[k] if col[k] > 0.999 else None


def _factor_text(f: float) -> str:
    return f"{f:.0f}" if f >= 1 else f"1/{1 / f:.0f}"


def mag_unit_anomaly(log, spec) -> Anomaly | None:
    """``mag_unit_suspect`` (critical) when the median field magnitude is not a LEO field.

    The evidence names the power-of-ten factor that brings the median into the LEO range and the
    unit that factor corresponds to (e.g. factor 1000: data in nT, file says uT).
    """
    if len(log) == 0:
        return None
    with np.errstate(over="ignore", invalid="ignore"):
        med = float(np.median(np.linalg.norm(log.values, axis=1)))
    if LEO_FIELD_MIN_nT <= med <= LEO_FIELD_MAX_nT:
        return None
    unit = spec.unit
    where = (f"median |B| = {med:.4g} nT from unit '{unit}'"
             + (f" and scale {spec.scale:g}" if spec.scale != 1.0 else "")
             + f" in {log.label}, outside the {LEO_FIELD_MIN_nT:,.0f}-{LEO_FIELD_MAX_nT:,.0f} nT "
               "a magnetometer sees in low Earth orbit")
    mid = math.sqrt(LEO_FIELD_MIN_nT * LEO_FIELD_MAX_nT)
    value = None
    if med > 0 and math.isfinite(med):
        factor = 10.0 ** round(math.log10(med / mid))
        fixed = med / factor
        if LEO_FIELD_MIN_nT <= fixed <= LEO_FIELD_MAX_nT:
            value = factor
            needed = NT_PER_UNIT[unit] / factor
            match = [u for u, f in NT_PER_UNIT.items() if abs(f / needed - 1) < 1e-9]
            op = f"divided by {_factor_text(factor)}" if factor >= 1 else f"multiplied by {1 / factor:.0f}"
            fix = (f"; {op} it is {fixed:,.0f} nT: factor {_factor_text(factor)}"
                   + (f", the data look like '{match[0]}' while the file says '{unit}'" if match else "")
                   + (f" (or scale {spec.scale / factor:g} instead of {spec.scale:g})"
                      if spec.scale != 1.0 or not match else ""))
        else:
            fix = "; no power of ten brings it into range: check scale, offset and unit"
    else:
        fix = "; check scale, offset and unit"
    return Anomaly("mag_unit_suspect", "critical", where + fix, start_utc=log.time_utc[0],
                   stop_utc=log.time_utc[-1], value=value)


def stuck_anomalies(log, mission) -> list[Anomaly]:
    """``stuck_signal`` (info): an axis that holds one exact value for a long run.

    Runs at a physical limit (saturated sensor, coil at zero or at its maximum current) are states,
    not faults, and are left out.
    """
    n = len(log)
    out = []
    if n < STUCK_MIN_SAMPLES:
        return out
    spec = getattr(mission, log.name)
    v = log.values_sensor
    for a in range(3):
        x = v[:, a]
        start = np.flatnonzero(np.r_[True, x[1:] != x[:-1]])
        length = np.diff(np.r_[start, n])
        val = x[start]
        if log.name == "coils":
            amps = np.abs(log.values[start, a])
            limit = float(spec.max_current_A[a])
            benign = (val == 0) | (amps >= limit * (1 - 1e-9))
        else:
            fs = getattr(spec, "full_scale", None)
            benign = np.abs(val) >= fs if fs is not None else np.zeros(val.size, dtype=bool)
        long_ = (length >= max(STUCK_MIN_SAMPLES, STUCK_MIN_FRACTION * n)) & ~benign
        if not long_.any():
            continue
        k = int(np.flatnonzero(long_)[np.argmax(length[long_])])
        i0, i1 = start[k], start[k] + length[k] - 1
        out.append(Anomaly(
            "stuck_signal", "info",
            f"column {log.columns[a]!r} of {log.label} holds {val[k]:.6g} {log.unit} for {length[k]} "
            f"consecutive samples ({100.0 * length[k] / n:.0f} % of the log, lines {log.line[i0]}-"
            f"{log.line[i1]}); a live signal's noise would move it",
            start_utc=log.time_utc[i0], stop_utc=log.time_utc[i1], axis=_body_axis(log, mission, a),
            value=float(length[k])))
    return out


def stage_anomalies(logs, ledger: pd.DataFrame, mission, loaded) -> list[Anomaly]:
    """All anomalies of the load and clean stages, log by log."""
    out: list[Anomaly] = []
    for g in logs:
        starts = g.gaps["start_utc"].to_numpy(dtype="datetime64[ns]")
        stops = g.gaps["stop_utc"].to_numpy(dtype="datetime64[ns]")
        for t0, t1, dur in zip(starts, stops, g.gaps["duration_s"].to_numpy(dtype=float), strict=True):
            out.append(Anomaly(
                "telemetry_gap", "warning",
                f"no {g.name} samples for {dur:.6g} s in {g.label} (gap threshold {GAP_FACTOR:g} x the "
                f"median spacing {g.median_period_s:.6g} s)",
                start_utc=t0, stop_utc=t1, value=float(dur)))
        mine = ledger[(ledger["sensor"] == g.name) & (ledger["action"] == "dropped")]
        frac = len(mine) / g.rows_read if g.rows_read else 0.0
        if frac > ROWS_DROPPED_WARN_FRACTION:
            counts = ", ".join(f"{r} {c}" for r, c in mine["reason"].value_counts().sort_index().items())
            out.append(Anomaly(
                "rows_dropped", "warning",
                f"{len(mine)} of {g.rows_read} lines of {g.label} dropped ({100 * frac:.2f} %, above "
                f"{100 * ROWS_DROPPED_WARN_FRACTION:g} %): {counts}",
                start_utc=g.time_utc[0], stop_utc=g.time_utc[-1], value=frac))
        for a in range(3):
            s = g.saturated[:, a]
            if s.any():
                idx = np.flatnonzero(s)
                runs = 1 + int(np.count_nonzero(np.diff(idx) > 1))
                out.append(Anomaly(
                    "sensor_saturated", "warning",
                    f"column {g.columns[a]!r} of {g.label} at or beyond full scale "
                    f"{getattr(mission, g.name).full_scale:g} {g.unit} in {idx.size} samples "
                    f"({runs} stretch{'es' if runs > 1 else ''})",
                    start_utc=g.time_utc[idx[0]], stop_utc=g.time_utc[idx[-1]],
                    axis=_body_axis(g, mission, a), value=float(idx.size)))
        if g.wrap_line.size:
            out.append(Anomaly(
                "clock_rollover", "info",
                f"the tick counter of {g.label} wrapped {g.wrap_line.size} time(s) (first at line "
                f"{g.wrap_line[0]}, {mission_bits(mission, g.name)}-bit counter); unwrapped into one timeline",
                start_utc=_wrap_time(g, 0), stop_utc=_wrap_time(g, -1), value=float(g.wrap_line.size)))
        for note in g.notes:
            out.append(Anomaly("spike_test_skipped", "info", note, start_utc=g.time_utc[0], stop_utc=g.time_utc[-1]))
        out.extend(stuck_anomalies(g, mission))
        if g.name == "magnetometer":
            a = mag_unit_anomaly(g, mission.magnetometer)
            if a is not None:
                out.append(a)
    return out


def mission_bits(mission, name: str):
    return getattr(mission, name).time.rollover_bits


def _wrap_time(g, k: int):
    hit = np.flatnonzero(np.isin(g.line, g.wrap_line))
    return g.time_utc[hit[k]] if hit.size else None
