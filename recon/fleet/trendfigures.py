"""The trend page's figures: one per parameter family, a panel per parameter, drawn with matplotlib's Agg
backend into PNG bytes (no windows).

Each panel shows the passes with their 1-sigma bars (the gyro bias: its spread over the pass), the
fitted line over the archived span, and in its title the rate per year with its 1-sigma and p-value;
a detected drift is drawn in red.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from ..core import DAYS_PER_JULIAN_YEAR  # noqa: E402
from ..report import Figure  # noqa: E402
from .catalogue import FAMILIES  # noqa: E402
from .trend import ParameterTrend, TrendReport  # noqa: E402

__all__ = ["trend_figures", "short_name"]

_POINTS, _LINE, _DRIFT = "#1f5fa8", "#555555", "#b01c1c"


def short_name(name: str, family: str) -> str:
    """A parameter's name within its family's figure (``bias_x_nT`` -> ``x``)."""
    stem = {"bias": "bias_", "soft_iron": "soft_iron_", "misalignment": "misalignment_", "crosstalk": "crosstalk_",
            "dipole_per_amp": "dipole_per_amp_", "gyro_bias": "gyro_bias_"}.get(family, "")
    out = name[len(stem):] if stem and name.startswith(stem) else name
    for unit in ("_nT_per_A", "_nT", "_deg", "_dps"):
        if family in ("bias", "misalignment", "crosstalk", "gyro_bias") and out.endswith(unit):
            out = out[: -len(unit)]
    if family == "crosstalk":
        out = f"mag {out[0]}, coil {out[1]}"
    return out


def _panel(ax, t: ParameterTrend) -> None:
    days = np.asarray(t.years) * DAYS_PER_JULIAN_YEAR
    sig = np.array([np.nan if s is None else s for s in t.sigmas], float)
    bars = sig if np.isfinite(sig).any() and t.parameter.has_sigma else None
    ax.errorbar(days, t.values, yerr=bars, fmt="o", ms=3.5, color=_POINTS, ecolor="#8fb0d8", elinewidth=1, capsize=2)
    name = short_name(t.parameter.name, t.parameter.family)
    f = t.fit
    if f is None:
        ax.set_title(f"{name}: untestable", fontsize=9)
        return
    years = np.array([min(t.years), max(t.years)])
    colour = _DRIFT if t.drift_detected else _LINE
    ax.plot(years * DAYS_PER_JULIAN_YEAR, f.value_at(years), "-", color=colour, lw=2 if t.drift_detected else 1.2)
    flag = "DRIFT " if t.drift_detected else ""
    ax.set_title(f"{flag}{name}: {f.slope:+.3g} ± {f.slope_sigma:.2g} /yr, p = {f.p_value:.2g}", fontsize=9,
                 color=colour if t.drift_detected else "black")


def _family_figure(family: str, trends: Sequence[ParameterTrend], epoch_utc: str) -> Figure:
    n = len(trends)
    ncols = 3 if n >= 3 else n
    nrows = math.ceil(n / ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(4.2 * ncols, 2.7 * nrows), squeeze=False, sharex=True)
    for ax, t in zip(axes.ravel(), trends, strict=False):
        _panel(ax, t)
        ax.set_ylabel(t.parameter.unit, fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(alpha=0.3)
    for ax in axes[-1]:
        ax.set_xlabel(f"days since {epoch_utc[:10]}", fontsize=8)
    for ax in axes.ravel()[n:]:
        ax.set_visible(False)
    # fixed margins (in inches) rather than tight_layout, which measures every tick label and costs as much
    # again as drawing the figure
    w, h = fig.get_size_inches()
    fig.subplots_adjust(left=0.75 / w, right=1 - 0.15 / w, bottom=0.55 / h, top=1 - 0.3 / h, wspace=0.38,
                        hspace=0.45 if nrows > 1 else 0.2)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=80, metadata={"Software": None})
    plt.close(fig)
    drifting = [short_name(t.parameter.name, family) for t in trends if t.drift_detected]
    caption = FAMILIES[family] + (f"; drift in {', '.join(drifting)}" if drifting else "; no drift")
    return Figure(f"trend_{family}", family, caption, buf.getvalue())


def trend_figures(report: TrendReport) -> list[Figure]:
    """One figure per family that has archived figures, in the order of :data:`FAMILIES`."""
    if report.epoch_utc is None:
        return []
    out = []
    for family in FAMILIES:
        members = [t for t in report.trends if t.parameter.family == family]
        if members:
            out.append(_family_figure(family, members, report.epoch_utc))
    return out
