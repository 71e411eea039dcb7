"""The trend's settings: the ``[trend]`` section of a fleet file (TOML), or the defaults below.

A drift is raised only when a trend is both significant (the t test of :mod:`recon.fleet.linefit` at
``false_alarm_per_parameter``) and large enough to matter: its rate per Julian year at least the
family's threshold. Every default and its reason:

- ``false_alarm_per_parameter = 0.001``: two-sided, per parameter. A page tests about 30 parameters,
  so the chance that a satellite with no drift at all shows a significant trend anywhere on the page is
  at most 30 x 0.001 = 3 % (Bonferroni); the materiality thresholds lower it further.
- ``min_passes = 5``: fewer leaves at most 2 degrees of freedom (the 0.1 % t quantile is then 31.6),
  so no trend could be told from scatter; such parameters are shown as untestable.
- ``bias_nT_per_year = 100``: the field the reference model leaves out is about 100 nT rms (the level
  the calibration assumes); a bias that moves less than that in a year is lost in it, one that moves
  more makes a calibration loaded on board stale within the year.
- ``soft_iron_per_year = 0.002``: 0.2 % of a 50,000 nT field is the same 100 nT.
- ``misalignment_deg_per_year = 0.1``: 0.1 deg of a 50,000 nT field is 87 nT, the same level.
- ``time_offset_s_per_year = 0.01``: a tenth of a 10 Hz magnetometer's sample period (common practice,
  no source).
- ``crosstalk_nT_per_A_per_year = 800``: about 100 nT at 0.12 A, the demo satellite's full current,
  the same level as the bias.
- ``dipole_per_amp_fraction_per_year = 0.05`` (of the coil's archived mean): the judge flags a coil
  outside +-20 % of nominal; a coil losing 5 % a year gets there in four years, and should be seen
  long before.
- ``gyro_bias_dps_per_year = 0.05``: a tenth per year of the estimator's default initial gyro-bias
  sigma, 0.5 deg/s.
- ``latency_s_per_year = 0.1``: a tenth of a 1 s control period per year (common practice, no source).
- ``attitude_3sigma_deg_per_year = 0.5`` and ``rate_3sigma_dps_per_year = 0.01``: the estimate's
  accuracy degrading that fast would show in pointing within a year (common practice, no source).
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass
from pathlib import Path

from ..core import InputError

__all__ = ["TrendSettings", "load_fleet_file", "FAMILY_THRESHOLD"]


@dataclass(frozen=True)
class TrendSettings:
    """The test's false-alarm rate, the fewest passes for a trend, and each family's materiality
    threshold per Julian year (see the module docstring for the reasons)."""

    false_alarm_per_parameter: float = 0.001
    min_passes: int = 5
    bias_nT_per_year: float = 100.0
    soft_iron_per_year: float = 0.002
    misalignment_deg_per_year: float = 0.1
    time_offset_s_per_year: float = 0.01
    crosstalk_nT_per_A_per_year: float = 800.0
    dipole_per_amp_fraction_per_year: float = 0.05
    gyro_bias_dps_per_year: float = 0.05
    latency_s_per_year: float = 0.1
    attitude_3sigma_deg_per_year: float = 0.5
    rate_3sigma_dps_per_year: float = 0.01

    def threshold_per_year(self, family: str, level: float) -> float:
        """The rate that matters for a parameter of ``family`` whose fitted level is ``level``."""
        value = getattr(self, FAMILY_THRESHOLD[family])
        return value * abs(level) if family == "dipole_per_amp" else value


# parameter family -> the setting that holds its threshold
FAMILY_THRESHOLD = {
    "bias": "bias_nT_per_year", "soft_iron": "soft_iron_per_year", "misalignment": "misalignment_deg_per_year",
    "time_offset": "time_offset_s_per_year", "crosstalk": "crosstalk_nT_per_A_per_year",
    "dipole_per_amp": "dipole_per_amp_fraction_per_year", "gyro_bias": "gyro_bias_dps_per_year",
    "latency": "latency_s_per_year", "attitude_accuracy": "attitude_3sigma_deg_per_year",
    "rate_accuracy": "rate_3sigma_dps_per_year",
}


def _number(path: Path, key: str, v: object, *, integer: bool = False) -> float | int:
    ok = not isinstance(v, bool) and (isinstance(v, int) if integer else isinstance(v, int | float))
    if not ok or not v > 0 or v != v or v == float("inf"):
        kind = "a whole number" if integer else "a finite number"
        raise InputError(f"expected {kind} > 0, got {v!r}", path, key=f"trend.{key}")
    return v


def load_fleet_file(path: str | Path | None) -> TrendSettings:
    """The settings of a fleet file's ``[trend]`` section (the defaults when ``path`` is None).

    Raises
    ------
    InputError
        One line naming the file and the key, for an unreadable file, an unknown section or key, or a
        value out of range.
    """
    if path is None:
        return TrendSettings()
    path = Path(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("expected a fleet file (TOML), no such file", path) from None
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as e:
        raise InputError(f"expected a readable TOML file: {e}", path) from None
    unknown = sorted(set(raw) - {"trend"})
    if unknown:
        raise InputError(f"expected only the section [trend], got unknown {unknown}", path, key=unknown[0])
    trend = raw.get("trend", {})
    if not isinstance(trend, dict):
        raise InputError(f"expected a table, got {trend!r}", path, key="trend")
    names = [f.name for f in dataclasses.fields(TrendSettings)]
    values = {}
    for key, v in trend.items():
        if key not in names:
            raise InputError(f"expected one of {', '.join(names)}, got unknown key", path, key=f"trend.{key}")
        values[key] = _number(path, key, v, integer=key == "min_passes")
    alpha = values.get("false_alarm_per_parameter", TrendSettings.false_alarm_per_parameter)
    if not alpha < 0.5:
        raise InputError(f"expected a false-alarm rate below 0.5, got {alpha!r}", path,
                         key="trend.false_alarm_per_parameter")
    if values.get("min_passes", 5) < 3:
        raise InputError(f"expected at least 3 passes (a line and its scatter), got {values['min_passes']!r}",
                         path, key="trend.min_passes")
    return TrendSettings(**{k: (int(v) if k == "min_passes" else float(v)) for k, v in values.items()})
