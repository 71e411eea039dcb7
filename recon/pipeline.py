"""The stages in order, for one pass: what ``recon run`` and ``recon inspect`` do.

Each stage is a pure function of the one before (config -> load -> clean -> orbit/field -> calibrate ->
estimate -> judge -> report). A stage whose inputs are absent from the mission file is skipped, and
the summary says which and why.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .config import Mission, load_mission
from .core import Anomaly, InputError

__all__ = ["PassResult", "InspectResult", "run_pass", "inspect_pass", "crosstalk_pass", "write_json"]

CAUTION = ("recon gives estimates with the uncertainty stated, not certainties. Check any command sent "
           "to the spacecraft under the mission's own operating procedures.")


@dataclass
class PassResult:
    """What ``run_pass`` produced: the summary dict, the anomalies and where the files are."""

    pass_id: str
    out_dir: Path
    summary: dict[str, Any]
    anomalies: list[Anomaly] = field(default_factory=list)

    @property
    def has_critical(self) -> bool:
        return any(a.severity == "critical" for a in self.anomalies)

    def describe(self) -> str:
        counts = {s: sum(a.severity == s for a in self.anomalies) for s in ("critical", "warning", "info")}
        verdict = self.summary.get("controller", {}).get("verdict", "undetermined")
        lines = [f"pass {self.pass_id}: controller verdict {verdict}; anomalies: "
                 f"{counts['critical']} critical, {counts['warning']} warning, {counts['info']} info",
                 f"reports in {self.out_dir}"]
        for a in self.anomalies:
            if a.severity == "critical":
                lines.append(f"  CRITICAL {a.code}{' axis ' + a.axis if a.axis else ''}: {a.evidence}")
        skipped = self.summary.get("skipped", {})
        for stage, why in skipped.items():
            lines.append(f"  skipped {stage}: {why}")
        return "\n".join(lines)


@dataclass
class InspectResult:
    mission: Mission
    cleaned: Any
    table: str
    ledger_path: Path


def write_json(path: Path, data: Any) -> None:
    """Write JSON deterministically: fixed key order as built, fixed float formatting, LF endings."""
    path.write_text(json.dumps(_jsonable(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")


def _jsonable(x: Any) -> Any:
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist())
    if isinstance(x, np.generic):
        return _jsonable(x.item())
    if isinstance(x, float):
        if not np.isfinite(x):
            return None
        return float(f"{x:.10g}")
    if isinstance(x, Path):
        return x.as_posix()
    return x


def _out_dir(mission: Mission, out_root: Path | str) -> Path:
    out = Path(out_root) / mission.pass_id
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise InputError(f"expected a writable output folder, got {e.strerror}", out) from None
    return out


def _load_and_clean(mission: Mission):
    from .clean import clean_pass
    from .load import load_pass

    return clean_pass(load_pass(mission), mission)


def inspect_pass(mission_path: Path | str, out_root: Path | str = "reports") -> InspectResult:
    """Load and clean one pass; write ``<out_root>/<pass id>/ledger.csv``."""
    mission = load_mission(mission_path)
    from .clean import format_inspect_table, write_ledger

    cleaned = _load_and_clean(mission)
    out = _out_dir(mission, out_root)
    ledger_path = out / "ledger.csv"
    write_ledger(ledger_path, cleaned.ledger)
    table = format_inspect_table(cleaned)
    notes = [f"{a.severity}: {a.code}: {a.evidence}" for a in cleaned.anomalies
             if a.code != "telemetry_gap"]
    if notes:
        table += "\n" + "\n".join(notes)
    return InspectResult(mission, cleaned, table, ledger_path)


def _reference(mission: Mission, cleaned, skipped: dict[str, str], progress) -> Any:
    if mission.orbit is None:
        skipped["orbit"] = ("the mission file has no [orbit] section: no reference field, so the "
                            "magnetometer is calibrated from current steps only and no attitude is estimated")
        return None
    from .field import reference_field

    _say(progress, "reference field (IGRF-14)", 0.0)
    ref = reference_field(mission, cleaned.magnetometer.time_utc)
    _say(progress, "reference field (IGRF-14)", 1.0)
    return ref


def _reference_anomalies(ref) -> list[Anomaly]:
    """A warning when some magnetometer samples have no reference field (outside the orbit's coverage
    or in its gaps): they are left out of the calibration fit and the attitude updates."""
    bad = ~np.isfinite(ref.b_gcrf_nT).all(axis=1)
    if not np.any(bad):
        return []
    reasons = sorted({str(r) for r in ref.reason[bad] if r})
    k = np.flatnonzero(bad)
    return [Anomaly("reference_incomplete", "warning",
                    f"{bad.sum()} of {len(bad)} magnetometer samples ({100 * bad.mean():.1f} %) have no reference "
                    f"field ({'; '.join(reasons) or 'no orbit position'}); they are not used for the calibration "
                    f"fit or the attitude updates", ref.time_utc[k[0]], ref.time_utc[k[-1]], value=float(bad.sum()))]


def crosstalk_pass(mission_path: Path | str, out_root: Path | str = "reports") -> str:
    """Calibrate the magnetometer of one pass and return the crosstalk table as text."""
    from .calibrate import calibrate_pass, format_crosstalk_table

    mission = load_mission(mission_path)
    cleaned = _load_and_clean(mission)
    _check_unit(cleaned)
    skipped: dict[str, str] = {}
    ref = _reference(mission, cleaned, skipped, None)
    cal = calibrate_pass(mission, cleaned, ref)
    out = _out_dir(mission, out_root)
    write_json(out / "calibration.json", cal.to_summary())
    text = format_crosstalk_table(cal, None if mission.coils is None else mission.coils.max_current_A)
    notes = [f"{a.severity}: {a.code}: {a.evidence}" for a in cal.anomalies]
    notes += [f"note: {why}" for why in skipped.values()]
    return "\n".join([text, *notes])


def _check_unit(cleaned) -> None:
    for a in cleaned.anomalies:
        if a.code == "mag_unit_suspect":
            raise InputError(a.evidence, key="magnetometer.unit")


class _Progress:
    """A one-line progress bar on stderr, for terminals only."""

    def __init__(self, stream):
        self.stream, self.last = stream, None

    def __call__(self, stage: str, fraction: float) -> None:
        pct = int(round(100 * min(max(fraction, 0.0), 1.0)))
        if (stage, pct) == self.last:
            return
        self.last = (stage, pct)
        bar = "#" * (pct // 4) + "." * (25 - pct // 4)
        end = "\n" if pct >= 100 else ""
        self.stream.write(f"\r{stage[:40]:<40} [{bar}] {pct:3d}%{end}")
        self.stream.flush()


def _say(progress, stage: str, fraction: float) -> None:
    if progress is not None:
        progress(stage, fraction)


def _settings(mission: Mission) -> dict[str, Any]:
    s: dict[str, Any] = {"magnetometer": f"{mission.magnetometer.file.name} ({mission.magnetometer.unit})"}
    if mission.gyro is not None:
        s["gyro"] = f"{mission.gyro.file.name} ({mission.gyro.unit})"
    if mission.coils is not None:
        s["coils"] = f"{mission.coils.file.name} ({mission.coils.unit}), sampling {mission.coils.mag_sampling}"
    if mission.controller is not None:
        s["control law"] = (f"{mission.controller.law}, gain {mission.controller.gain:g}, "
                            f"period {mission.controller.period_s:g} s")
    if mission.orbit is not None:
        s["orbit"] = mission.orbit.kind
    s["estimator mode"] = mission.estimator.mode
    return s


def _estimate(mission: Mission, cleaned, cal, ref, progress):
    from .estimate import NoiseModel, estimate_attitude

    gyro = cleaned.gyro
    coils = cleaned.coils
    return estimate_attitude(
        cleaned.magnetometer.time_utc, cal.b_body_calibrated_nT, ref.b_gcrf_nT,
        gyro_t_utc=None if gyro is None else gyro.time_utc,
        w_gyro_body_rad_s=None if gyro is None else gyro.values,
        noise=NoiseModel.from_mission(mission), mode=mission.estimator.mode,
        inertia_kg_m2=mission.inertia_kg_m2,
        coil_t_utc=None if coils is None else coils.time_utc,
        i_coil_A=None if coils is None else coils.values,
        dipole_per_amp=None if mission.coils is None else mission.coils.dipole_per_amp,
        r_gcrf_km=ref.r_gcrf_km,
        progress=None if progress is None else (lambda stage, f: progress(f"attitude: {stage}", f)))


def _judge(mission: Mission, cleaned, cal, ref, hist):
    from .judge import judge_pass

    mag = cleaned.magnetometer
    m_stb = mission.magnetometer.sensor_to_body
    b_sensor = mag.values @ m_stb  # (M^T b_body^T)^T: raw readings back in sensor axes, nT
    gyro = cleaned.gyro
    # the history's rows are magnetometer instants (possibly fewer than the log's): align the reference
    # field by time, then judge the motion where the rate, the attitude and the reference all exist
    k = np.clip(np.searchsorted(ref.time_utc, hist.time_utc), 0, len(ref.time_utc) - 1)
    b_ref, r_ref = ref.b_gcrf_nT[k], ref.r_gcrf_km[k]
    sel = ((ref.time_utc[k] == hist.time_utc) & np.isfinite(b_ref).all(axis=1) & np.isfinite(r_ref).all(axis=1)
           & np.isfinite(hist.w_body_rad_s).all(axis=1) & np.isfinite(hist.q_body_from_gcrf).all(axis=1))
    w_cov = hist.smoothed.covariance[sel, 3:6, 3:6] if hist.mode == "dynamics" else None
    return judge_pass(
        controller=mission.controller, coils=mission.coils, inertia_kg_m2=mission.inertia_kg_m2,
        mag_sensor_to_body=m_stb, time_mag_utc=mag.time_utc, b_mag_sensor_nT=b_sensor,
        time_coil_utc=cleaned.coils.time_utc, i_coil_A=cleaned.coils.values,
        time_utc=hist.time_utc[sel], w_body_rad_s=hist.w_body_rad_s[sel],
        q_body_from_gcrf=hist.q_body_from_gcrf[sel],
        b_gcrf_nT=b_ref[sel], r_gcrf_km=r_ref[sel], w_cov_rad2_s2=w_cov,
        time_gyro_utc=None if gyro is None else gyro.time_utc,
        w_gyro_body_rad_s=None if gyro is None else gyro.values,
        K_nT_per_A=cal.crosstalk_combined_nT_per_A)


def _figures(mission: Mission, cleaned, cal, ref, hist, judgement, anomalies) -> list:
    from .report import figures as F

    figs = []
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
    figs.append(F.quality_timeline(t0, logs, gaps, dropped, saturated))
    if ref is not None and cal is not None:
        mag = cleaned.magnetometer
        b_raw = mag.values
        figs.append(F.field_magnitude(mag.time_utc, ref.b_gcrf_nT, b_raw, cal.b_body_calibrated_nT))
    if hist is not None:
        figs.append(F.attitude_uncertainty(hist.time_utc, hist.sigma_att_rad))
        figs.append(F.rates(hist.time_utc, hist.w_body_rad_s, hist.smoothed.sigma_rate_rad_s))
        if hist.mode == "gyro":
            sb = np.sqrt(np.maximum(np.diagonal(hist.covariance[:, 3:6, 3:6], axis1=1, axis2=2), 0.0))
            figs.append(F.gyro_bias(hist.time_utc, hist.gyro_bias_rad_s, sb))
        w = hist.w_body_rad_s
        energy = 0.5 * np.einsum("ni,ij,nj->n", w, mission.inertia_kg_m2, w)
        figs.append(F.kinetic_energy(hist.time_utc, energy))
    if judgement is not None and getattr(judgement, "replay_time_utc", None) is not None:
        figs.append(F.commands(cleaned.coils.time_utc, cleaned.coils.values, judgement.replay_time_utc,
                               judgement.replay_i_A))
    if ref is not None:
        marks = []
        for a in anomalies:
            if a.start_utc is None or a.severity == "info":
                continue
            k = int(np.clip(np.searchsorted(ref.time_utc, np.datetime64(a.start_utc, "ns")), 0, len(ref.time_utc) - 1))
            if np.isfinite(ref.lat_deg[k]):
                marks.append((float(ref.lat_deg[k]), float(ref.lon_deg[k]), a.code))
        figs.append(F.ground_track(ref.lat_deg, ref.lon_deg, marks[:12]))
    return figs


def run_pass(mission_path: Path | str, out_root: Path | str = "reports", *, progress: bool = False,
             report: bool = True) -> PassResult:
    """Run every available stage on one pass and write ``<out_root>/<pass id>/``.

    Parameters
    ----------
    mission_path : path to the mission file (TOML)
    out_root : folder under which ``<pass id>/`` is written
    progress : show progress bars on stderr for long stages (for terminals)
    report : write report.html and figures (summary.json, ledger, attitude files are always written)

    Returns
    -------
    PassResult
    """
    import sys

    from .calibrate import calibrate_pass
    from .core import __version__

    bar = _Progress(sys.stderr) if progress else None
    mission = load_mission(mission_path)
    out = _out_dir(mission, out_root)
    _say(bar, "load and clean", 0.0)
    cleaned = _load_and_clean(mission)
    _say(bar, "load and clean", 1.0)
    _check_unit(cleaned)
    from .clean import write_ledger

    write_ledger(out / "ledger.csv", cleaned.ledger)
    anomalies: list[Anomaly] = list(cleaned.anomalies)
    skipped: dict[str, str] = {}

    ref = _reference(mission, cleaned, skipped, bar)
    if ref is not None:
        anomalies += _reference_anomalies(ref)
    _say(bar, "calibrate magnetometer", 0.0)
    cal = calibrate_pass(mission, cleaned, ref)
    _say(bar, "calibrate magnetometer", 1.0)
    anomalies += list(cal.anomalies)

    hist = None
    if ref is None:
        skipped["estimate"] = "no reference field (no orbit), so no attitude can be referred to GCRF"
    elif not np.isfinite(cal.b_body_calibrated_nT).any():
        skipped["estimate"] = "no calibrated magnetometer sample is usable"
    else:
        hist = _estimate(mission, cleaned, cal, ref, bar)
        anomalies += list(hist.anomalies)
        from .estimate import write_attitude_csv
        from .report import write_aem

        write_attitude_csv(out / "attitude.csv", hist)
        write_aem(out / "attitude.aem", hist.time_utc, hist.q_body_from_gcrf,
                  creation_date=hist.time_utc[-1], originator="recon", object_name=mission.pass_id,
                  object_id="UNKNOWN", w_body_rad_s=hist.w_body_rad_s)

    judgement = None
    if mission.controller is None or mission.coils is None:
        skipped["controller"] = "the mission file has no [controller] and [coils] sections"
    elif cleaned.coils is None or len(cleaned.coils.time_utc) == 0:
        skipped["controller"] = "no coil current sample survived cleaning"
    elif hist is None:
        skipped["controller"] = "no rate history to judge the controller from (see estimate)"
    else:
        _say(bar, "judge the controller", 0.0)
        judgement = _judge(mission, cleaned, cal, ref, hist)
        _say(bar, "judge the controller", 1.0)
        anomalies += list(judgement.anomalies)

    controller = judgement.to_summary() if judgement is not None else {
        "verdict": "undetermined", "reason": skipped.get("controller", "")}
    summary: dict[str, Any] = {
        "pass_id": mission.pass_id,
        "tool_version": __version__,
        "mission_file": mission.path.name,
        "inputs": cleaned.inputs_summary(),
        "calibration": cal.to_summary(),
        "estimate": hist.to_summary() if hist is not None else None,
        "controller": controller,
        "skipped": skipped,
        "settings": _settings(mission),
        "anomalies": [a.to_dict() for a in anomalies],
        "caution": CAUTION,
    }
    write_json(out / "summary.json", summary)
    if report:
        from .report import write_report

        _say(bar, "report", 0.0)
        write_report(out, summary, _figures(mission, cleaned, cal, ref, hist, judgement, anomalies))
        _say(bar, "report", 1.0)
    return PassResult(mission.pass_id, out, summary, anomalies)
