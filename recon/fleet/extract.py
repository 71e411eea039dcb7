"""Read the archived figures of one pass from what ``run_pass`` wrote: summary.json's dict and attitude.csv.

Figures the summary does not hold (an undetermined coil, a skipped stage, the misalignment and time
offset that older summaries lack) are archived as None (NULL), never as a guess.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..core import robust_scale
from .catalogue import AXES, PARAMETERS, AnomalyRecord, Measurement, PassRecord

__all__ = ["record_from_summary", "gyro_bias_from_attitude"]

_SOFT_IRON = {"xx": (0, 0), "yy": (1, 1), "zz": (2, 2), "xy": (0, 1), "xz": (0, 2), "yz": (1, 2)}


def _float(x: Any) -> float | None:
    if isinstance(x, bool) or not isinstance(x, int | float) or not np.isfinite(x):
        return None
    return float(x)


def _at(x: Any, *index: int) -> Any:
    """``x[i][j]...`` or None when any level is missing."""
    for i in index:
        if not isinstance(x, Sequence) or isinstance(x, str) or len(x) <= i:
            return None
        x = x[i]
    return x


def _vector(cal: Mapping[str, Any], key: str, name: str) -> list[Measurement]:
    return [Measurement(name.format(a=a), _float(_at(cal.get(key), i)), _float(_at(cal.get(key + "_sigma"), i)))
            for i, a in enumerate(AXES)]


def _calibration(cal: Mapping[str, Any]) -> tuple[list[Measurement], str | None]:
    out = _vector(cal, "bias_nT", "bias_{a}_nT")
    out += [Measurement(f"soft_iron_{ij}", _float(_at(cal.get("soft_iron"), r, c)),
                        _float(_at(cal.get("soft_iron_sigma"), r, c))) for ij, (r, c) in _SOFT_IRON.items()]
    out += _vector(cal, "misalignment_deg", "misalignment_{a}_deg")
    out.append(Measurement("time_offset_s", _float(cal.get("time_offset_s")), _float(cal.get("time_offset_s_sigma"))))
    # the crosstalk that is applied: the combination of the two estimates when the summary has it,
    # otherwise the field-magnitude fit
    source, key = ("combined", "crosstalk_combined_nT_per_A") if cal.get("crosstalk_combined_nT_per_A") is not None \
        else ("field_fit", "crosstalk_nT_per_A")
    k, ks = cal.get(key), cal.get(key + "_sigma")
    out += [Measurement(f"crosstalk_{a}{b}_nT_per_A", _float(_at(k, r, c)), _float(_at(ks, r, c)))
            for r, a in enumerate(AXES) for c, b in enumerate(AXES)]
    return out, (source if k is not None else None)


def gyro_bias_from_attitude(path: Path) -> list[Measurement]:
    """The gyro bias of a pass from attitude.csv: per body axis, the median of the smoothed bias history
    and its spread over the pass (normal-consistent MAD), deg/s.

    summary.json does not carry the gyro bias yet; until it does, this is the archived figure. The
    spread is how much the bias estimate moved over the pass, not a sigma of the median: the trend
    uses it only as a relative weight (its scale is fitted, see :mod:`recon.fleet.linefit`).
    """
    if not path.is_file():
        return [Measurement(f"gyro_bias_{a}_dps", None, None) for a in AXES]
    cols = [f"bias_{a}_dps" for a in AXES]
    table = pd.read_csv(path, usecols=cols)
    out = []
    for a, col in zip(AXES, cols, strict=True):
        x = table[col].to_numpy(float)
        x = x[np.isfinite(x)]
        value = float(np.median(x)) if x.size else None
        spread = float(robust_scale(x)) if x.size > 1 else None
        out.append(Measurement(f"gyro_bias_{a}_dps", value, spread))
    return out


def _controller(ctl: Mapping[str, Any]) -> tuple[list[Measurement], tuple, tuple]:
    out, polarity, nominal = [], [], []
    for a in AXES:
        axis = ctl.get(a) or ctl.get("axes", {}).get(a) or {}
        out.append(Measurement(f"dipole_per_amp_{a}", _float(axis.get("dipole_per_amp_estimated")),
                               _float(axis.get("dipole_per_amp_sigma"))))
        polarity.append(axis.get("polarity"))
        nominal.append(_float(axis.get("dipole_per_amp_nominal")))
    out.append(Measurement("latency_s", _float(ctl.get("latency_s"))))
    return out, tuple(polarity), tuple(nominal)


def _accuracy(est: Mapping[str, Any] | None) -> list[Measurement]:
    acc = (est or {}).get("accuracy") or {}
    names = ("attitude_3sigma_deg_median", "attitude_3sigma_deg_max", "rate_3sigma_dps_median", "rate_3sigma_dps_max")
    return [Measurement(n, _float(acc.get(n))) for n in names]


def _span(inputs: Mapping[str, Any]) -> tuple[str | None, str | None]:
    starts = [f.get("start_utc") for f in inputs.values() if f.get("start_utc")]
    stops = [f.get("stop_utc") for f in inputs.values() if f.get("stop_utc")]
    return (min(starts) if starts else None), (max(stops) if stops else None)


def _anomalies(items: Sequence[Mapping[str, Any]]) -> tuple[AnomalyRecord, ...]:
    return tuple(AnomalyRecord(code=str(a.get("code")), severity=str(a.get("severity")), axis=a.get("axis"),
                               start_utc=a.get("start_utc"), stop_utc=a.get("stop_utc"), value=_float(a.get("value")),
                               evidence=str(a.get("evidence", ""))) for a in items)


def record_from_summary(summary: Mapping[str, Any], out_dir: Path, *, mission_file: str, input_hash: str,
                        satellite: str | None, object_id: str | None) -> PassRecord:
    """The archive record of a pass that ran: figures from ``summary`` (summary.json's content) and the
    gyro bias from ``out_dir/attitude.csv``."""
    cal_m, source = _calibration(summary.get("calibration") or {})
    ctl_m, polarity, nominal = _controller(summary.get("controller") or {})
    start, stop = _span(summary.get("inputs") or {})
    est = summary.get("estimate")
    found = {m.name: m for m in cal_m + ctl_m + gyro_bias_from_attitude(Path(out_dir) / "attitude.csv")
             + _accuracy(est)}
    measurements = [found.get(p.name, Measurement(p.name, None)) for p in PARAMETERS]
    return PassRecord(
        pass_id=str(summary["pass_id"]), mission_file=mission_file, input_hash=input_hash, status="ok",
        satellite=satellite, object_id=object_id, start_utc=start, stop_utc=stop,
        tool_version=summary.get("tool_version"), verdict=(summary.get("controller") or {}).get("verdict"),
        estimate_mode=(est or {}).get("mode"), crosstalk_source=source, polarity=polarity,
        dipole_per_amp_nominal=nominal, measurements=tuple(measurements),
        anomalies=_anomalies(summary.get("anomalies") or []))
