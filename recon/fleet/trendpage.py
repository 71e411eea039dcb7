"""trend.html: one self-contained page per satellite, drifts first, like the pass report.

Figures are embedded as data URIs and the page forbids every external request and every script by its
content security policy. Every string that can come from input files (satellite, pass ids, errors,
anomaly codes) is escaped.
"""

from __future__ import annotations

import base64
import html
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from ..core import __version__
from ..report import CAUTION, Figure, write_json
from .catalogue import FAMILIES
from .trend import ParameterTrend, TrendReport
from .trendfigures import trend_figures
from .trendjson import TEST_STATEMENT, trend_summary

__all__ = ["render_trend_html", "write_trend"]

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2rem auto;max-width:72rem;color:#1b1b1b;
line-height:1.4;padding:0 1rem}
h1{font-size:1.5rem;margin-bottom:.2rem} h2{font-size:1.2rem;border-bottom:1px solid #999;margin-top:2rem}
h3{font-size:1rem;margin-bottom:.2rem} .sub{color:#555;margin-top:0}
.verdict{padding:.8rem 1rem;border:2px solid;margin:1rem 0;font-size:1.1rem}
.v-drift{border-color:#9b1c1c;background:#fbeeee} .v-none{border-color:#2b6a2b;background:#eef6ee}
table{border-collapse:collapse;margin:.6rem 0;font-size:.88rem}
th,td{border:1px solid #bbb;padding:.25rem .5rem;text-align:left;vertical-align:top}
th{background:#f0f0f0} td.n{text-align:right;font-variant-numeric:tabular-nums}
tr.drift td{background:#fbeeee;font-weight:bold}
figure{margin:1rem 0} figure img{max-width:100%;border:1px solid #ddd} figcaption{font-size:.85rem;color:#444}
.caution{border-left:4px solid #8a6d00;padding:.5rem 1rem;background:#fbf6e6;margin-top:2rem}
.note{color:#555;font-style:italic}
"""


def _e(x: Any) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _g(x: float | None, fmt: str = ".3g") -> str:
    return "&ndash;" if x is None else _e(format(x, fmt))


def _pm(value: float, sigma: float) -> str:
    """``value &plusmn; sigma`` with sigma to two significant digits and value to the same decimal place."""
    if not (sigma > 0 and math.isfinite(sigma)):
        return f"{_g(value)} &plusmn; {_g(sigma)}"
    place = math.floor(math.log10(sigma)) - 1
    if place < -6 or place > 6:
        return f"{_e(format(value, '.3g'))} &plusmn; {_e(format(sigma, '.2g'))}"
    fmt = f".{max(0, -place)}f"
    return f"{_e(format(round(value, -place), fmt))} &plusmn; {_e(format(round(sigma, -place), fmt))}"


def _table(header: Sequence[str], rows: Sequence[Sequence[str]], cls: str = "", row_cls: Sequence[str] = ()) -> str:
    """A table whose cells are already-escaped HTML fragments."""
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join(f'<tr class="{row_cls[k] if k < len(row_cls) else ""}">' + "".join(f"<td>{c}</td>" for c in r)
                   + "</tr>" for k, r in enumerate(rows))
    return f'<table class="{cls}"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def _verdict(r: TrendReport) -> str:
    if r.drift_detected:
        names = ", ".join(t.parameter.name for t in r.drifts)
        text = f"<strong>Drift detected</strong> in {len(r.drifts)} parameter(s): {_e(names)}."
    else:
        text = ("<strong>No drift detected</strong>: no parameter has a trend both significant and large enough "
                "to matter.")
    cls = "v-drift" if r.drift_detected else "v-none"
    return f'<div class="verdict {cls}" id="drift">{text}</div>'


def _test(r: TrendReport) -> str:
    s = r.settings
    statement = TEST_STATEMENT[0].upper() + TEST_STATEMENT[1:]
    return (f"<p><strong>The test.</strong> {_e(statement)} Per-parameter false-alarm rate "
            f"{_g(s.false_alarm_per_parameter)}; "
            f"{r.tested} parameter(s) tested, so the chance of a significant trend anywhere on this page when "
            f"nothing drifts is at most {_g(r.page_false_alarm_bound)} (Bonferroni). A trend needs "
            f"{s.min_passes} passes. Rates are per Julian year from {_e(r.epoch_utc)}.</p>")


def _status(t: ParameterTrend) -> str:
    if t.fit is None:
        return _e(f"untestable: {t.untestable}")
    if t.drift_detected:
        return "DRIFT"
    if t.significant:
        return "significant, below the threshold"
    return "no significant trend"


def _trend_rows(trends: Sequence[ParameterTrend]) -> tuple[list[list[str]], list[str]]:
    order = sorted(trends, key=lambda t: (not t.drift_detected, not t.significant))
    rows, classes = [], []
    for t in order:
        f = t.fit
        rows.append([_e(t.parameter.name), _e(t.parameter.unit), str(len(t.values)),
                     "&ndash;" if f is None else _pm(f.slope, f.slope_sigma),
                     "&ndash;" if f is None else _g(f.t_stat, ".2f"), "&ndash;" if f is None else _g(f.p_value, ".2g"),
                     "&ndash;" if f is None or not f.weighted else _g(f.birge_ratio, ".2f"),
                     _g(t.threshold_per_year), _status(t)])
        classes.append("drift" if t.drift_detected else "")
    return rows, classes


def _figures(figs: Sequence[Figure]) -> str:
    out = []
    for f in figs:
        data = base64.b64encode(f.png).decode("ascii")
        out.append(f"<h3>{_e(FAMILIES.get(f.section, f.section))}</h3><figure><img alt=\"{_e(f.caption)}\" "
                   f"src=\"data:image/png;base64,{data}\"><figcaption>{_e(f.caption)}</figcaption></figure>")
    return "".join(out)


def _weekly(r: TrendReport) -> str:
    w = r.weekly
    if not w.codes:
        return "<h2>Anomalies per week</h2><p>No anomaly in the archived passes.</p>"
    rows = [[_e(wk), str(n), *[str(w.counts[c][k]) if w.counts[c][k] else "" for c in range(len(w.codes))]]
            for k, (wk, n) in enumerate(zip(w.weeks, w.passes, strict=True))]
    rec = ", ".join(w.recurring) or "none"
    return ("<h2>Anomalies per week</h2><p>Anomalies of each code per ISO week (UTC), with the passes archived "
            f"that week. Recurring (seen in two or more weeks): {_e(rec)}.</p>"
            + _table(["week", "passes", *w.codes], rows, "weekly"))


def _polarity_and_failed(r: TrendReport) -> str:
    names = sorted({p for _, counts in r.polarity for p, _ in counts})
    rows = [[_e(axis), *[str(dict(counts).get(p, 0)) for p in names]] for axis, counts in r.polarity]
    out = "<h2>Coil polarity</h2><p>Passes per polarity found by the judge.</p>" + _table(["coil", *names], rows)
    if r.failed:
        out += ("<h2>Failed passes</h2><p>Archived as failed; not in the trends.</p>"
                + _table(["pass", "error"], [[_e(p), _e(e)] for p, e in r.failed], "failed"))
    return out


def render_trend_html(report: TrendReport, figures: Sequence[Figure] = ()) -> str:
    """The trend page as one HTML string."""
    name = report.satellite or "(unnamed satellite)"
    header = ["parameter", "unit", "passes", "rate per year (1-sigma)", "t", "p", "Birge ratio", "threshold per year",
              "finding"]
    rows, classes = _trend_rows(report.trends)
    found_rows, found_classes = _trend_rows([t for t in report.trends if t.significant])
    body = "".join([
        f"<h1>Trend: {_e(name)}</h1>",
        f'<p class="sub">{report.passes} pass(es) from {_e(report.first_utc)} to {_e(report.last_utc)} &middot; '
        f"archive {_e(report.archive)} &middot; recon {_e(__version__)}</p>",
        _verdict(report),
        _table(header, found_rows, "findings", found_classes) if found_rows
        else "<p>No parameter has a significant trend.</p>",
        _test(report),
        "<h2>Figures</h2>", _figures(figures),
        "<h2>All parameters</h2>",
        _table(header, rows, "trends", classes) if rows else '<p class="note">No archived pass with figures.</p>',
        _weekly(report), _polarity_and_failed(report),
        f'<div class="caution"><strong>Caution.</strong> {_e(CAUTION)}</div>',
    ])
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; img-src data:; "
            "style-src 'unsafe-inline'\">"
            f"<title>recon trend {_e(name)}</title><style>{_CSS}</style></head><body>{body}</body></html>\n")


def write_trend(report: TrendReport, out_dir: str | Path) -> tuple[Path, Path]:
    """Write trend.html and trend.json into ``out_dir``; return their paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    page = out / "trend.html"
    page.write_text(render_trend_html(report, trend_figures(report)), encoding="utf-8")
    data = out / "trend.json"
    write_json(data, trend_summary(report))
    return page, data
