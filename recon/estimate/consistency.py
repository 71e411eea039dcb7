"""Is the filter consistent? The normalised innovation squared (NIS) of the magnetometer updates against
its chi-square distribution.

References
----------
Bar-Shalom, Y., Li, X. R. and Kirubarajan, T. (2001). Estimation with Applications to Tracking and
Navigation. Wiley. Sec. 5.4 (NIS and NEES consistency tests).
"""

from __future__ import annotations

import numpy as np

from ..core import NS_PER_S, Anomaly
from .types import AttitudeHistory

__all__ = ["consistency_anomaly"]


def consistency_anomaly(hist: AttitudeHistory, min_fraction: float = 0.85,
                        window_s: float = 60.0) -> Anomaly | None:
    """filter_inconsistent when the NIS disagrees with its chi-square distribution.

    Rule (common practice, no source): the fraction of NIS values inside their two-sided 95 %
    interval is below ``min_fraction`` (0.95 expected), or the mean NIS is outside [dof/2, 2 dof].
    The evidence names the worst ``window_s`` window (largest mean NIS).
    """
    if len(hist.nis) < 10:
        return None
    frac = hist.nis_fraction_inside()
    mean = float(np.mean(hist.nis))
    dof = hist.nis_dof
    if frac >= min_fraction and dof / 2 <= mean <= 2 * dof:
        return None
    t = (hist.nis_time_utc - hist.nis_time_utc[0]).astype(np.int64) / NS_PER_S
    edges = np.arange(0.0, t[-1] + window_s, window_s)
    which = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, len(edges) - 1)
    sums = np.bincount(which, hist.nis, len(edges))
    counts = np.bincount(which, None, len(edges))
    means = np.where(counts > 0, sums / np.maximum(counts, 1), -np.inf)
    w = int(np.argmax(means))
    start = hist.nis_time_utc[0] + np.timedelta64(int(edges[w] * NS_PER_S), "ns")
    lo, hi = hist.nis_interval()
    return Anomaly("filter_inconsistent", "warning",
                   f"{100 * frac:.0f} % of {len(hist.nis)} magnetometer innovations fall inside their 95 % "
                   f"chi-square interval [{lo:.2f}, {hi:.2f}] (expected 95 %, flagged below "
                   f"{100 * min_fraction:.0f} %); mean NIS {mean:.2f} for {dof} degrees of freedom; worst "
                   f"{window_s:.0f} s window mean {means[w]:.1f}. The stated attitude uncertainty is not "
                   f"trustworthy: check calibration, time tags and noise levels.",
                   start, start + np.timedelta64(int(window_s * NS_PER_S), "ns"), value=frac)
