"""trend.json: the trend report as plain JSON (the same archive gives the same bytes)."""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from ..core import DAYS_PER_JULIAN_YEAR, __version__, utc_text
from .trend import ParameterTrend, TrendReport

__all__ = ["trend_summary", "TEST_STATEMENT"]

TEST_STATEMENT = ("weighted least-squares straight line per parameter (weights 1/sigma^2 from each pass; equal "
                  "weights when a figure has no sigma); the slope's standard error is scaled by the Birge ratio "
                  "sqrt(chi2/(n-2)); two-sided Student t test of slope = 0 with n-2 degrees of freedom. A drift is "
                  "detected when p < false_alarm_per_parameter and |slope| >= the family's threshold per year.")


def _years_to_utc(epoch_utc: str, years: float) -> str:
    t0 = np.datetime64(epoch_utc.rstrip("Z"), "ns")
    return utc_text(t0 + np.timedelta64(int(round(years * DAYS_PER_JULIAN_YEAR * 86400e9)), "ns"))


def _parameter(t: ParameterTrend, epoch_utc: str) -> dict[str, Any]:
    f = t.fit
    out = {"name": t.parameter.name, "family": t.parameter.family, "unit": t.parameter.unit,
           "passes": len(t.values), "untestable": t.untestable}
    if f is not None:
        out.update({
            "weighted": f.weighted, "slope_per_year": f.slope, "slope_sigma_per_year": f.slope_sigma,
            "level": f.level, "level_utc": _years_to_utc(epoch_utc, f.t_mid), "t_stat": f.t_stat, "dof": f.dof,
            "p_value": f.p_value, "birge_ratio": f.birge_ratio if f.weighted else None,
            "residual_rms": f.birge_ratio if not f.weighted else None, "threshold_per_year": t.threshold_per_year,
            "significant": t.significant, "material": t.material, "drift_detected": t.drift_detected})
    out["points"] = [{"pass_id": p, "time_utc": u, "value": v, "sigma": s}
                     for p, u, v, s in zip(t.pass_ids, t.time_utc, t.values, t.sigmas, strict=True)]
    return out


def trend_summary(report: TrendReport) -> dict[str, Any]:
    """The content of trend.json."""
    w = report.weekly
    return {
        "satellite": report.satellite,
        "archive": report.archive,
        "tool_version": __version__,
        "passes": report.passes,
        "first_utc": report.first_utc,
        "last_utc": report.last_utc,
        "epoch_utc": report.epoch_utc,
        "test": {"statistic": TEST_STATEMENT,
                 "false_alarm_per_parameter": report.settings.false_alarm_per_parameter,
                 "parameters_tested": report.tested,
                 "page_false_alarm_bound": report.page_false_alarm_bound,
                 "min_passes": report.settings.min_passes,
                 "year": f"Julian year ({DAYS_PER_JULIAN_YEAR} days), counted from epoch_utc"},
        "settings": dataclasses.asdict(report.settings),
        "drift_detected": report.drift_detected,
        "drifts": [t.parameter.name for t in report.drifts],
        "parameters": [_parameter(t, report.epoch_utc) for t in report.trends],
        "anomalies_per_week": {
            "weeks": [{"week": wk, "passes": n, "counts": {c: row[k] for c, row in zip(w.codes, w.counts, strict=True)
                                                           if row[k]}}
                      for k, (wk, n) in enumerate(zip(w.weeks, w.passes, strict=True))],
            "recurring": list(w.recurring)},
        "coil_polarity": {axis: dict(counts) for axis, counts in report.polarity},
        "failed_passes": [{"pass_id": p, "error": e} for p, e in report.failed],
    }
