"""summary.json: written deterministically (the same input gives the same bytes), and its fixed parts."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["CAUTION", "write_json", "jsonable", "settings_block"]

CAUTION = ("recon gives estimates with the uncertainty stated, not certainties. Check any command sent "
           "to the spacecraft under the mission's own operating procedures.")


def write_json(path: Path, data: Any) -> None:
    """Write JSON deterministically: fixed key order as built, fixed float formatting, LF endings."""
    path.write_text(json.dumps(jsonable(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")


def jsonable(x: Any) -> Any:
    """Plain JSON values: arrays and numpy scalars become lists and floats (10 significant digits),
    non-finite floats None, paths text."""
    if isinstance(x, dict):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return jsonable(x.tolist())
    if isinstance(x, np.generic):
        return jsonable(x.item())
    if isinstance(x, float):
        if not np.isfinite(x):
            return None
        return float(f"{x:.10g}")
    if isinstance(x, Path):
        return x.as_posix()
    return x


def settings_block(mission) -> dict[str, Any]:
    """The "settings" block: which logs, units, sampling, law and orbit source this pass used."""
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
