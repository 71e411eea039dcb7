"""The set of figures of one pass report, drawn from the stages' results."""

from __future__ import annotations

import numpy as np

from . import figures as F
from .html import Figure

__all__ = ["pass_figures"]


def _quality(cleaned) -> Figure:
    """The data-quality timeline: each log's span, gaps, dropped rows and saturated samples."""
    logs = {g.name: g.time_utc for g in cleaned.logs()}
    t0 = min(t[0] for t in logs.values() if len(t))
    led = cleaned.ledger
    dropped, saturated, gaps = {}, {}, {}
    for g in cleaned.logs():
        mine = led[(led["sensor"] == g.name) & (led["action"] == "dropped")]
        tt = np.asarray(mine["time_utc"].dropna().to_numpy(), dtype="datetime64[ns]") if len(mine) else []
        dropped[g.name] = tt
        saturated[g.name] = g.time_utc[g.saturated.any(axis=1)]
        gaps[g.name] = [(np.datetime64(a, "ns"), np.datetime64(b, "ns"))
                        for a, b in zip(g.gaps["start_utc"], g.gaps["stop_utc"], strict=True)]
    return F.quality_timeline(t0, logs, gaps, dropped, saturated)


def _attitude(mission, hist) -> list[Figure]:
    """Attitude uncertainty, body rate, gyro bias (gyro mode) and kinetic energy."""
    figs = [F.attitude_uncertainty(hist.time_utc, hist.sigma_att_rad),
            F.rates(hist.time_utc, hist.w_body_rad_s, hist.smoothed.sigma_rate_rad_s)]
    if hist.mode == "gyro":
        sb = np.sqrt(np.maximum(np.diagonal(hist.covariance[:, 3:6, 3:6], axis1=1, axis2=2), 0.0))
        figs.append(F.gyro_bias(hist.time_utc, hist.gyro_bias_rad_s, sb))
    w = hist.w_body_rad_s
    energy = 0.5 * np.einsum("ni,ij,nj->n", w, mission.inertia_kg_m2, w)
    figs.append(F.kinetic_energy(hist.time_utc, energy))
    return figs


def _track(ref, anomalies) -> Figure:
    """The ground track, with the start of each warning and critical finding marked (at most 12)."""
    marks = []
    for a in anomalies:
        if a.start_utc is None or a.severity == "info":
            continue
        k = int(np.clip(np.searchsorted(ref.time_utc, np.datetime64(a.start_utc, "ns")), 0, len(ref.time_utc) - 1))
        if np.isfinite(ref.lat_deg[k]):
            marks.append((float(ref.lat_deg[k]), float(ref.lon_deg[k]), a.code))
    return F.ground_track(ref.lat_deg, ref.lon_deg, marks[:12])


def pass_figures(mission, cleaned, cal, ref, hist, judgement, anomalies) -> list[Figure]:
    """Every figure of the pass report, from what the stages produced (an absent stage draws nothing)."""
    figs = [_quality(cleaned)]
    if ref is not None and cal is not None:
        mag = cleaned.magnetometer
        figs.append(F.field_magnitude(mag.time_utc, ref.b_gcrf_nT, mag.values, cal.b_body_calibrated_nT))
    if hist is not None:
        figs += _attitude(mission, hist)
    if judgement is not None and getattr(judgement, "replay_time_utc", None) is not None:
        figs.append(F.commands(cleaned.coils.time_utc, cleaned.coils.values, judgement.replay_time_utc,
                               judgement.replay_i_A))
    if ref is not None:
        figs.append(_track(ref, anomalies))
    return figs
