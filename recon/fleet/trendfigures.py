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
import matplotlib.dates as mdates  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from ..report import Figure  # noqa: E402
from .catalogue import FAMILIES  # noqa: E402
from .trend import DAYS_PER_YEAR, ParameterTrend, TrendReport  # noqa: E402

__all__ = ["trend_figures", "short_name"]

_NS_PER_YEAR = DAYS_PER_YEAR * 86400e9
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


def _times(texts: Sequence[str]) -> np.ndarray:
    return np.array([np.datetime64(t.rstrip("Z"), "ms") for t in texts])


def _panel(ax, t: ParameterTrend, epoch: np.datetime64) -> None:
    when = _times(t.time_utc)
    sig = np.array([np.nan if s is None else s for s in t.sigmas], float)
    bars = sig if np.isfinite(sig).any() and t.parameter.has_sigma else None
    ax.errorbar(when, t.values, yerr=bars, fmt="o", ms=3.5, color=_POINTS, ecolor="#8fb0d8", elinewidth=1, capsize=2)
    name = short_name(t.parameter.name, t.parameter.family)
    f = t.fit
    if f is None:
        ax.set_title(f"{name}: untestable", fontsize=9)
        return
    years = np.array([min(t.years), max(t.years)])
    line_t = epoch + (years * _NS_PER_YEAR).astype(np.int64).astype("timedelta64[ns]")
    colour = _DRIFT if t.drift_detected else _LINE
    ax.plot(line_t.astype("datetime64[ms]"), f.value_at(years), "-", color=colour, lw=2 if t.drift_detected else 1.2)
    flag = "DRIFT " if t.drift_detected else ""
    ax.set_title(f"{flag}{name}: {f.slope:+.3g} ± {f.slope_sigma:.2g} /yr, p = {f.p_value:.2g}", fontsize=9,
                 color=colour if t.drift_detected else "black")


def _family_figure(family: str, trends: Sequence[ParameterTrend], epoch: np.datetime64) -> Figure:
    n = len(trends)
    ncols = 3 if n >= 3 else n
    nrows = math.ceil(n / ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(4.2 * ncols, 2.7 * nrows), squeeze=False, sharex=True)
    for ax, t in zip(axes.ravel(), trends, strict=False):
        _panel(ax, t, epoch)
        ax.set_ylabel(t.parameter.unit, fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(alpha=0.3)
        loc = mdates.AutoDateLocator(maxticks=5)
        ax.xaxis.set_major_locator(loc)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(loc))
    for ax in axes.ravel()[n:]:
        ax.set_visible(False)
    fig.tight_layout()
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
    epoch = np.datetime64(report.epoch_utc.rstrip("Z"), "ns")
    out = []
    for family in FAMILIES:
        members = [t for t in report.trends if t.parameter.family == family]
        if members:
            out.append(_family_figure(family, members, epoch))
    return out
