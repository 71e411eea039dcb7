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

from .anomaly import Anomaly
from .config import Mission, load_mission
from .errors import InputError

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


def crosstalk_pass(mission_path: Path | str, out_root: Path | str = "reports") -> str:
    """Calibrate the magnetometer of one pass and return the crosstalk table as text."""
    raise InputError("the crosstalk stage is not available in this version of recon", mission_path)


def _check_unit(cleaned) -> None:
    for a in cleaned.anomalies:
        if a.code == "mag_unit_suspect":
            raise InputError(a.evidence, key="magnetometer.unit")


def run_pass(mission_path: Path | str, out_root: Path | str = "reports", *, progress: bool = False) -> PassResult:
    """Run every available stage on one pass and write ``<out_root>/<pass id>/``.

    Parameters
    ----------
    mission_path : path to the mission file (TOML)
    out_root : folder under which ``<pass id>/`` is written
    progress : show progress bars on the terminal for long stages

    Returns
    -------
    PassResult
    """
    from . import __version__

    mission = load_mission(mission_path)
    from .clean import write_ledger

    out = _out_dir(mission, out_root)
    cleaned = _load_and_clean(mission)
    _check_unit(cleaned)
    write_ledger(out / "ledger.csv", cleaned.ledger)
    anomalies: list[Anomaly] = list(cleaned.anomalies)
    skipped: dict[str, str] = {}

    if mission.orbit is None:
        skipped["orbit"] = "the mission file has no [orbit] section"
    for stage in ("calibration", "estimate", "controller"):
        skipped.setdefault(stage, "stage not available in this version of recon")

    summary: dict[str, Any] = {
        "pass_id": mission.pass_id,
        "tool_version": __version__,
        "mission_file": mission.path.name,
        "inputs": cleaned.inputs_summary(),
        "skipped": skipped,
        "anomalies": [a.to_dict() for a in anomalies],
        "caution": CAUTION,
    }
    write_json(out / "summary.json", summary)
    return PassResult(mission.pass_id, out, summary, anomalies)
