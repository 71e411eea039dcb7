"""``recon trend``: every archived parameter of one satellite against time, its trend, and the drifts.

Each parameter's passes get a weighted straight line (:func:`recon.fleet.fit_line`); a drift is raised
when the slope is significant at the settings' false-alarm rate *and* at least the family's threshold
per year (:class:`recon.fleet.TrendSettings`). Time is in Julian years from the middle of the first
archived pass. Recurring anomalies are counted per ISO week. Failed passes are listed, not trended.
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core import DAYS_PER_JULIAN_YEAR, InputError, utc_text
from .archive import Archive
from .catalogue import AXES, PARAMETERS, Parameter, PassRecord
from .linefit import LineFit, fit_line
from .settings import TrendSettings

__all__ = ["ParameterTrend", "WeeklyAnomalies", "TrendReport", "build_trend", "pass_times"]

_NS_PER_YEAR = DAYS_PER_JULIAN_YEAR * 86400e9


@dataclass(frozen=True)
class ParameterTrend:
    """One parameter across the passes: the points, the line, and the verdict on drift.

    ``untestable`` gives the reason when no test was made (then ``fit`` is None). ``threshold_per_year``
    is the family's materiality threshold in the parameter's unit per year.
    """

    parameter: Parameter
    pass_ids: tuple[str, ...]
    time_utc: tuple[str, ...]
    years: tuple[float, ...]
    values: tuple[float, ...]
    sigmas: tuple[float | None, ...]
    fit: LineFit | None
    untestable: str | None
    threshold_per_year: float | None
    significant: bool
    material: bool

    @property
    def drift_detected(self) -> bool:
        return self.significant and self.material


@dataclass(frozen=True)
class WeeklyAnomalies:
    """Anomaly counts per ISO week (weeks with at least one archived pass), per code."""

    weeks: tuple[str, ...]
    passes: tuple[int, ...]
    codes: tuple[str, ...]
    counts: tuple[tuple[int, ...], ...]  # one row per code, one column per week
    recurring: tuple[str, ...]  # codes seen in two or more weeks


@dataclass(frozen=True)
class TrendReport:
    """Everything trend.json and trend.html show."""

    satellite: str | None
    archive: str
    settings: TrendSettings
    passes: int
    epoch_utc: str | None  # t = 0 of the trend: the middle of the first archived pass
    first_utc: str | None
    last_utc: str | None
    trends: tuple[ParameterTrend, ...]
    weekly: WeeklyAnomalies
    polarity: tuple[tuple[str, tuple[tuple[str, int], ...]], ...]  # coil axis -> (polarity, passes)
    failed: tuple[tuple[str, str], ...]  # (pass id, error)

    @property
    def tested(self) -> int:
        return sum(t.fit is not None for t in self.trends)

    @property
    def page_false_alarm_bound(self) -> float:
        """Bonferroni bound on the chance of any significant trend on a page with no drift at all."""
        return min(1.0, self.tested * self.settings.false_alarm_per_parameter)

    @property
    def drifts(self) -> tuple[ParameterTrend, ...]:
        return tuple(t for t in self.trends if t.drift_detected)

    @property
    def drift_detected(self) -> bool:
        return bool(self.drifts)


def _utc(text: str) -> np.datetime64:
    return np.datetime64(text.rstrip("Zz"), "ns")


def pass_times(records: list[PassRecord]) -> np.ndarray:
    """The middle of each pass's span, datetime64[ns] UTC (NaT when unknown)."""
    out = np.full(len(records), np.datetime64("NaT", "ns"))
    for k, r in enumerate(records):
        if r.start_utc and r.stop_utc:
            a, b = _utc(r.start_utc), _utc(r.stop_utc)
            out[k] = a + (b - a) // 2
    return out


def _parameter_trend(p: Parameter, records: list[PassRecord], t_utc: np.ndarray, t0: np.datetime64,
                     settings: TrendSettings) -> ParameterTrend | None:
    ms = [(r, t, r.measurement(p.name)) for r, t in zip(records, t_utc, strict=True)]
    ms = [(r, t, m) for r, t, m in ms if m.value is not None and np.isfinite(m.value) and not np.isnat(t)]
    if not ms:
        return None  # not archived for this satellite (a figure the summaries do not carry): not shown
    years = np.array([(t - t0).astype(np.int64) / _NS_PER_YEAR for _, t, _ in ms])
    values = np.array([m.value for _, _, m in ms])
    sig = [m.sigma for _, _, m in ms]
    weighted = p.has_sigma and all(s is not None and np.isfinite(s) and s > 0 for s in sig)
    fit, why = None, None
    if len(ms) < settings.min_passes:
        why = f"{len(ms)} pass(es) with this figure; a trend needs {settings.min_passes}"
    else:
        fit = fit_line(years, values, np.array(sig, float) if weighted else None)
        why = None if fit is not None else "all passes at one time"
    threshold = significant = material = None
    if fit is not None:
        threshold = settings.threshold_per_year(p.family, fit.level)
        significant = fit.p_value < settings.false_alarm_per_parameter
        material = abs(fit.slope) >= threshold
    return ParameterTrend(p, tuple(r.pass_id for r, _, _ in ms), tuple(utc_text(t) for _, t, _ in ms),
                          tuple(years.tolist()), tuple(values.tolist()), tuple(sig), fit, why, threshold,
                          bool(significant), bool(material))


def _week(t: np.datetime64) -> str:
    y, w, _ = dt.datetime.fromisoformat(str(np.datetime64(t, "s"))).isocalendar()
    return f"{y}-W{w:02d}"


def _weekly(records: list[PassRecord], t_utc: np.ndarray) -> WeeklyAnomalies:
    weeks = [_week(t) for t in t_utc]
    order = sorted(set(weeks))
    per_code: dict[str, Counter] = {}
    for r, w in zip(records, weeks, strict=True):
        for a in r.anomalies:
            per_code.setdefault(a.code, Counter())[w] += 1
    codes = tuple(sorted(per_code, key=lambda c: (-len(per_code[c]), c)))
    counts = tuple(tuple(per_code[c][w] for w in order) for c in codes)
    passes = Counter(weeks)
    return WeeklyAnomalies(tuple(order), tuple(passes[w] for w in order), codes, counts,
                           tuple(c for c in codes if len(per_code[c]) >= 2))


def _polarity(records: list[PassRecord]) -> tuple:
    out = []
    for k, a in enumerate(AXES):
        c = Counter(r.polarity[k] or "undetermined" for r in records)
        out.append((a, tuple(sorted(c.items()))))
    return tuple(out)


def _choose_satellite(db: Archive, satellite: str | None) -> str | None:
    names = db.satellites()
    if not names:
        raise InputError("expected an archive with at least one pass, got an empty one", db.path)
    if satellite is not None:
        if satellite not in names:
            listed = ", ".join(repr(n) for n in names if n is not None) or "none named"
            raise InputError(f"expected a satellite in the archive ({listed}), got {satellite!r}", key="--satellite")
        return satellite
    ran = db.satellites(with_ok_pass=True)  # a satellite with failed passes only has no trend to show
    if len(ran) == 1:
        return ran[0]
    if len(names) > 1:
        listed = ", ".join("(unnamed)" if n is None else repr(n) for n in (ran or names))
        raise InputError(f"expected one satellite, the archive holds {len(ran or names)} ({listed}): choose one "
                         f"with --satellite", key="--satellite")
    return names[0]


def build_trend(archive: str | Path, satellite: str | None = None,
                settings: TrendSettings | None = None) -> TrendReport:
    """The trend of every archived parameter of one satellite (the only one when ``satellite`` is None)."""
    settings = settings or TrendSettings()
    with Archive(archive, create=False) as db:
        name = _choose_satellite(db, satellite)
        records = db.records(name)
    ok = [r for r in records if r.status == "ok" and r.start_utc and r.stop_utc]
    failed = tuple((r.pass_id, r.error or "") for r in records if r.status != "ok")
    t_utc = pass_times(ok)
    trends, t0 = [], None
    if ok:
        t0 = t_utc.min()
        trends = [t for p in PARAMETERS if (t := _parameter_trend(p, ok, t_utc, t0, settings)) is not None]
    return TrendReport(
        satellite=name, archive=str(archive), settings=settings, passes=len(ok), epoch_utc=utc_text(t0),
        first_utc=min((r.start_utc for r in ok), default=None), last_utc=max((r.stop_utc for r in ok), default=None),
        trends=tuple(trends), weekly=_weekly(ok, t_utc), polarity=_polarity(ok), failed=failed)
