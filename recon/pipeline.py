"""The stages in order, for one pass: what ``recon run``, ``recon inspect`` and ``recon crosstalk`` do.

Each stage is a pure function of the one before (config -> load -> clean -> orbit/field -> calibrate ->
estimate -> judge -> report); this module only calls each stage's public face in order and hands one
stage's result to the next. A stage whose inputs are absent from the mission file is skipped, and the
summary says which and why.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .calibrate import calibrate_pass, format_crosstalk_table, mag_time_offset
from .clean import clean_pass
from .config import Mission, load_mission
from .core import RAD_S_PER_UNIT, Anomaly, InputError, __version__, nearest_rows
from .estimate import AlignmentPrior, CoilTiming, FilterDiverged, NoiseModel, estimate_attitude
from .field import reference_field
from .judge import judge_pass
from .load import load_pass
from .report import (
    CAUTION,
    ProgressBar,
    format_inspect_table,
    pass_figures,
    say,
    settings_block,
    write_aem,
    write_attitude_csv,
    write_json,
    write_ledger,
    write_report,
)

__all__ = ["PassResult", "InspectResult", "run_pass", "inspect_pass", "crosstalk_pass"]


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


def _out_dir(mission: Mission, out_root: Path | str) -> Path:
    out = Path(out_root) / mission.pass_id
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise InputError(f"expected a writable output folder, got {e.strerror}", out) from None
    return out


def _load_and_clean(mission: Mission):
    return clean_pass(load_pass(mission), mission)


def inspect_pass(mission_path: Path | str, out_root: Path | str = "reports") -> InspectResult:
    """Load and clean one pass; write ``<out_root>/<pass id>/ledger.csv``."""
    mission = load_mission(mission_path)
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
    say(progress, "reference field (IGRF-14)", 0.0)
    ref = reference_field(mission, cleaned.magnetometer.time_utc)
    say(progress, "reference field (IGRF-14)", 1.0)
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
    mission = load_mission(mission_path)
    cleaned = _load_and_clean(mission)
    _check_unit(cleaned)
    cleaned, timing, found = _time_tags(mission, cleaned)
    skipped: dict[str, str] = {}
    ref = _reference(mission, cleaned, skipped, None)
    cal = calibrate_pass(mission, cleaned, ref)
    out = _out_dir(mission, out_root)
    write_json(out / "calibration.json", {**cal.to_summary(), **timing.to_summary()})
    text = format_crosstalk_table(cal, None if mission.coils is None else mission.coils.max_current_A)
    notes = [f"{a.severity}: {a.code}: {a.evidence}" for a in [*found, *cal.anomalies]]
    notes += [f"note: {why}" for why in skipped.values()]
    return "\n".join([text, *notes])


def _check_unit(cleaned) -> None:
    for a in cleaned.anomalies:
        if a.code == "mag_unit_suspect":
            raise InputError(a.evidence, key="magnetometer.unit")


def _time_tags(mission: Mission, cleaned):
    """The magnetometer's time-tag offset, taken out of its stamps when it is determined; returns the
    pass with true sample instants, the offset and its finding (if significant)."""
    timing = mag_time_offset(mission, cleaned)
    if not timing.determined:
        return cleaned, timing, []
    t = cleaned.magnetometer.time_utc
    finding = timing.anomaly(t[0], t[-1])
    return cleaned.with_magnetometer_time_shifted(-timing.offset_s), timing, [] if finding is None else [finding]


def _estimate(mission: Mission, cleaned, cal, ref, timing, progress):
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
        r_gcrf_km=ref.r_gcrf_km, alignment_prior=AlignmentPrior.from_mission(mission, timing.determined),
        field_residual_rms_nT=cal.residual_rms_nT.get("after"),
        gyro_clipped=None if gyro is None else gyro.saturated,
        gyro_sensor_to_body=None if mission.gyro is None else mission.gyro.sensor_to_body,
        gyro_full_scale_rad_s=_gyro_full_scale(mission), coil_timing=_coil_timing(mission),
        progress=None if progress is None else (lambda stage, f: progress(f"attitude: {stage}", f)))


def _coil_timing(mission: Mission) -> CoilTiming | None:
    """When the coil commands switch, from the mission file's [controller] and [coils]."""
    ctl, coils = mission.controller, mission.coils
    if ctl is None or coils is None:
        return None
    return CoilTiming(period_s=ctl.period_s, first_tick_utc=ctl.first_tick, off_window_s=coils.off_window_s,
                      mag_sampling=coils.mag_sampling)


def _gyro_full_scale(mission: Mission) -> float | None:
    g = mission.gyro
    return None if g is None or g.full_scale is None else float(g.full_scale) * RAD_S_PER_UNIT[g.unit]


def _judge(mission: Mission, cleaned, cal, ref, hist):
    mag = cleaned.magnetometer
    m_stb = mission.magnetometer.sensor_to_body
    b_sensor = mag.values @ m_stb  # (M^T b_body^T)^T: raw readings back in sensor axes, nT
    gyro = cleaned.gyro
    # the history's rows are magnetometer instants (possibly fewer than the log's): align the reference
    # field by time, then judge the motion where the rate, the attitude and the reference all exist
    # (nearest row within half an interval: the estimator may have moved the instants by the residual
    # time-tag offset it fitted)
    k, near = nearest_rows(ref.time_utc, hist.time_utc)
    b_ref, r_ref = ref.b_gcrf_nT[k], ref.r_gcrf_km[k]
    sel = (near & np.isfinite(b_ref).all(axis=1) & np.isfinite(r_ref).all(axis=1)
           & np.isfinite(hist.w_body_rad_s).all(axis=1) & np.isfinite(hist.q_body_from_gcrf).all(axis=1))
    if not sel.any():
        return None
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


def _attitude_stage(mission, cleaned, cal, ref, timing, out, bar, skipped):
    """The attitude history and its files, or None with the reason in ``skipped``."""
    if ref is None:
        skipped["estimate"] = "no reference field (no orbit), so no attitude can be referred to GCRF"
        return None
    if not np.isfinite(cal.b_body_calibrated_nT).any():
        skipped["estimate"] = "no calibrated magnetometer sample is usable"
        return None
    try:
        hist = _estimate(mission, cleaned, cal, ref, timing, bar)
    except FilterDiverged as exc:
        skipped["estimate"] = f"{exc}; no attitude history could be formed"
        return None
    write_attitude_csv(out / "attitude.csv", hist)
    write_aem(out / "attitude.aem", hist.time_utc, hist.q_body_from_gcrf,
              creation_date=hist.time_utc[-1], originator="recon", object_name=mission.pass_id,
              object_id="UNKNOWN", w_body_rad_s=hist.w_body_rad_s)
    return hist


def _controller_stage(mission, cleaned, cal, ref, hist, bar, skipped):
    """The controller judgement, or None with the reason in ``skipped``."""
    if mission.controller is None or mission.coils is None:
        missing = [f"[{n}]" for n, v in (("controller", mission.controller), ("coils", mission.coils)) if v is None]
        skipped["controller"] = f"the mission file has no {' and no '.join(missing)} section"
    elif cleaned.coils is None or len(cleaned.coils.time_utc) == 0:
        skipped["controller"] = "no coil current sample survived cleaning"
    elif hist is None:
        skipped["controller"] = "no rate history to judge the controller from (see estimate)"
    else:
        say(bar, "judge the controller", 0.0)
        judgement = _judge(mission, cleaned, cal, ref, hist)
        say(bar, "judge the controller", 1.0)
        if judgement is None:
            skipped["controller"] = ("no row of the rate history has a finite rate, attitude and reference "
                                     "field to judge the controller from")
        return judgement
    return None


def _summary(mission, cleaned, cal, timing, hist, judgement, skipped, anomalies) -> dict[str, Any]:
    controller = judgement.to_summary() if judgement is not None else {
        "verdict": "undetermined", "reason": skipped.get("controller", "")}
    return {
        "pass_id": mission.pass_id,
        "tool_version": __version__,
        "mission_file": mission.path.name,
        "inputs": cleaned.inputs_summary(),
        "calibration": {**cal.to_summary(), **timing.to_summary(),
                        **(hist.alignment.to_summary() if hist is not None and hist.alignment is not None else {})},
        "estimate": hist.to_summary() if hist is not None else None,
        "controller": controller,
        "skipped": skipped,
        "settings": settings_block(mission),
        "anomalies": [a.to_dict() for a in anomalies],
        "caution": CAUTION,
    }


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
    bar = ProgressBar(sys.stderr) if progress else None
    mission = load_mission(mission_path)
    out = _out_dir(mission, out_root)
    say(bar, "load and clean", 0.0)
    cleaned = _load_and_clean(mission)
    say(bar, "load and clean", 1.0)
    _check_unit(cleaned)
    write_ledger(out / "ledger.csv", cleaned.ledger)
    anomalies: list[Anomaly] = list(cleaned.anomalies)
    skipped: dict[str, str] = {}
    cleaned, timing, found = _time_tags(mission, cleaned)
    anomalies += found

    ref = _reference(mission, cleaned, skipped, bar)
    if ref is not None:
        anomalies += _reference_anomalies(ref)
    say(bar, "calibrate magnetometer", 0.0)
    cal = calibrate_pass(mission, cleaned, ref)
    say(bar, "calibrate magnetometer", 1.0)
    anomalies += list(cal.anomalies)
    hist = _attitude_stage(mission, cleaned, cal, ref, timing, out, bar, skipped)
    if hist is not None:
        anomalies += list(hist.anomalies)
    judgement = _controller_stage(mission, cleaned, cal, ref, hist, bar, skipped)
    if judgement is not None:
        anomalies += list(judgement.anomalies)

    summary = _summary(mission, cleaned, cal, timing, hist, judgement, skipped, anomalies)
    write_json(out / "summary.json", summary)
    if report:
        say(bar, "report", 0.0)
        write_report(out, summary, pass_figures(mission, cleaned, cal, ref, hist, judgement, anomalies))
        say(bar, "report", 1.0)
    return PassResult(mission.pass_id, out, summary, anomalies)
