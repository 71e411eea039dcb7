"""The pass report: one self-contained HTML file that reads top-down like an engineer's review.

``render_html`` turns the summary (the same dict that is written to summary.json) and a set of PNG
figures into HTML. Figures are embedded as data URIs: the page makes no external requests. Every
string that can come from input files (pass id, file and column names, evidence sentences) is escaped.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

__all__ = ["Figure", "render_html", "write_report"]

AXES = ("x", "y", "z")


@dataclass(frozen=True)
class Figure:
    """A PNG figure with the section it belongs to and a caption."""

    name: str
    section: str  # "quality" | "magnetometer" | "attitude" | "controller" | "track"
    caption: str
    png: bytes


def _e(x: Any) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _num(x: Any, fmt: str = ".3g") -> str:
    if x is None:
        return "&ndash;"
    if isinstance(x, bool):
        return _e(x)
    if isinstance(x, int) and fmt.endswith("g"):
        return _e(f"{x:,}")  # counts are shown whole
    if isinstance(x, int | float):
        return _e(format(x, fmt))
    return _e(x)


def _count(x: Any) -> str:
    if isinstance(x, list | tuple | dict):
        return _num(len(x), "d")
    return _num(x, "d") if isinstance(x, int) else _e(x if x is not None else "")


def _table(header: Sequence[str], rows: Sequence[Sequence[str]], cls: str = "") -> str:
    """A table whose cells are already-escaped HTML fragments."""
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>" for r in rows)
    return f'<table class="{cls}"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def _figures(figs: Sequence[Figure], section: str) -> str:
    out = []
    for f in figs:
        if f.section != section:
            continue
        data = base64.b64encode(f.png).decode("ascii")
        out.append(f'<figure><img alt="{_e(f.caption)}" src="data:image/png;base64,{data}">'
                   f"<figcaption>{_e(f.caption)}</figcaption></figure>")
    return "".join(out)


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2rem auto;max-width:70rem;color:#1b1b1b;
line-height:1.4;padding:0 1rem}
h1{font-size:1.5rem;margin-bottom:.2rem} h2{font-size:1.2rem;border-bottom:1px solid #999;margin-top:2rem}
.sub{color:#555;margin-top:0}
.verdict{padding:.8rem 1rem;border:2px solid;margin:1rem 0;font-size:1.1rem}
.v-as_intended{border-color:#2b6a2b;background:#eef6ee}
.v-not_as_intended{border-color:#9b1c1c;background:#fbeeee}
.v-undetermined{border-color:#8a6d00;background:#fbf6e6}
table{border-collapse:collapse;margin:.6rem 0;font-size:.9rem}
th,td{border:1px solid #bbb;padding:.25rem .5rem;text-align:left;vertical-align:top}
th{background:#f0f0f0} td.n{text-align:right;font-variant-numeric:tabular-nums}
.sev-critical{color:#9b1c1c;font-weight:bold} .sev-warning{color:#8a5a00} .sev-info{color:#555}
figure{margin:1rem 0} figure img{max-width:100%;border:1px solid #ddd} figcaption{font-size:.85rem;color:#444}
.caution{border-left:4px solid #8a6d00;padding:.5rem 1rem;background:#fbf6e6;margin-top:2rem}
.skip{color:#555;font-style:italic}
"""


def _anomaly_rows(anoms: Sequence[Mapping[str, Any]]) -> list[list[str]]:
    rows = []
    for a in anoms:
        sev = a.get("severity", "")
        rows.append([f'<span class="sev-{_e(sev)}">{_e(sev)}</span>', _e(a.get("code")), _e(a.get("axis") or ""),
                     _e(a.get("start_utc") or ""), _e(a.get("stop_utc") or ""), _e(a.get("evidence"))])
    return rows


def _skip_note(summary: Mapping[str, Any], stage: str) -> str:
    why = summary.get("skipped", {}).get(stage)
    return f'<p class="skip">Skipped: {_e(why)}.</p>' if why else ""


def _section_quality(s: Mapping[str, Any], figs: Sequence[Figure]) -> str:
    rows = []
    for name, f in s.get("inputs", {}).items():
        dropped = f.get("dropped", {}) or {}
        rows.append([_e(name), _e(f.get("file", "")), _num(f.get("rows_read"), "d"), _num(f.get("rows_kept"), "d"),
                     _e(", ".join(f"{k}: {v}" for k, v in dropped.items()) or "none"),
                     _count(f.get("gaps")), _count(f.get("saturated")),
                     _num(f.get("median_rate_hz"), ".3g")])
    t = _table(["log", "file", "rows read", "rows kept", "dropped by reason", "gaps", "saturated", "rate (Hz)"],
               rows)
    return (f"<h2>Data quality</h2><p>Every input line is kept or listed in ledger.csv with its file, line "
            f"number and reason.</p>{t}{_figures(figs, 'quality')}")


def _matrix_rows(k: Any, sig: Any, fmt: str = ".1f") -> list[list[str]]:
    rows = []
    for r, ax in enumerate(AXES):
        cells = [_e(f"mag {ax}")]
        for c in range(3):
            val = None if k is None else k[r][c]
            sd = None if sig is None else sig[r][c]
            cells.append("undetermined" if val is None else f"{_num(val, fmt)} &plusmn; {_num(sd, fmt)}")
        rows.append(cells)
    return rows


def _section_magnetometer(s: Mapping[str, Any], figs: Sequence[Figure]) -> str:
    cal = s.get("calibration")
    if not cal:
        return "<h2>Magnetometer</h2>" + _skip_note(s, "calibration")
    head_k, head_s = "crosstalk_nT_per_A", "crosstalk_nT_per_A_sigma"
    if cal.get("crosstalk_combined_nT_per_A") is not None:
        head_k, head_s = "crosstalk_combined_nT_per_A", "crosstalk_combined_nT_per_A_sigma"
    parts = ["<h2>Magnetometer</h2>",
             "<p>Coil crosstalk K (nT per A, magnetometer axes; one column per coil), with 1-sigma. "
             "This is the estimate removed from the field before the attitude is estimated.</p>",
             _table(["", "coil x", "coil y", "coil z"], _matrix_rows(cal.get(head_k), cal.get(head_s), ".0f"))]
    detail = []
    for key, what in (("crosstalk_nT_per_A", "from the field-magnitude fit against the reference field"),
                      ("crosstalk_step_nT_per_A", "from the magnetometer steps at coil switching")):
        if cal.get(key) is not None and key != head_k:
            detail.append(f"<p>{_e(what)}:</p>" + _table(["", "coil x", "coil y", "coil z"],
                                                          _matrix_rows(cal.get(key), cal.get(key + "_sigma"), ".0f")))
    if detail:
        parts.append("<details><summary>The two independent estimates</summary>" + "".join(detail) + "</details>")
    full = cal.get("contamination_full_current_nT")
    if full is not None:
        parts.append("<p>Contamination at full current, per magnetometer axis (nT): "
                     + ", ".join(f"{ax} {_num(v, '.0f')}" for ax, v in zip(AXES, full, strict=False)) + "</p>")
    bias = cal.get("bias_nT")
    if bias is not None:
        parts.append("<p>Bias (nT): " + _pm(bias, cal.get("bias_nT_sigma") or None, ".0f") + "</p>")
    res = cal.get("residual_rms_nT") or {}
    if res:
        parts.append(f"<p>|b| against the reference field, RMS: before {_num(res.get('before'), '.0f')} nT, "
                     f"after {_num(res.get('after'), '.0f')} nT.</p>")
    agree = cal.get("crosstalk_agreement") or {}
    if isinstance(agree, Mapping) and agree.get("agree") is not None:
        parts.append(f"<p>The two independent crosstalk estimates {'agree' if agree['agree'] else 'do NOT agree'}"
                     f" within their uncertainty (p = {_num(agree.get('p_value'), '.2g')}).</p>")
    parts.append(_alignment_part(cal))
    und = cal.get("undetermined") or {}
    items = und.items() if isinstance(und, Mapping) else ((None, r) for r in und)
    for name, reason in items:
        parts.append(f'<p class="skip">Undetermined{" " + _e(name) if name else ""}: {_e(reason)}</p>')
    parts.append(_figures(figs, "magnetometer"))
    return "".join(parts)


def _pm(values: Any, sigmas: Any, spec: str = ".3f") -> str:
    """'a ± s' per axis (x, y, z) or one 'a ± s'."""
    if isinstance(values, list | tuple):
        sigmas = sigmas if isinstance(sigmas, list | tuple) else [None] * len(values)
        return ", ".join(f"{ax} {_num(v, spec)} &plusmn; {_num(sd, '.2g')}"
                         for ax, v, sd in zip(AXES, values, sigmas, strict=False))
    return f"{_num(values, spec)} &plusmn; {_num(sigmas, '.2g')}"


def _alignment_part(cal: Mapping[str, Any]) -> str:
    """The magnetometer's alignment to the body, its time-tag offset and the gyro's scale, as
    estimated on the pass (with 1-sigma) or taken from the mission file."""
    rows = []
    if cal.get("misalignment_deg") is not None:
        rows.append(["Magnetometer misalignment to the body (deg, small angles about body x, y, z)",
                     _pm(cal["misalignment_deg"], cal.get("misalignment_deg_sigma")),
                     _e(cal.get("misalignment_source", ""))])
    if cal.get("time_offset_s") is not None:
        rows.append(["Magnetometer time-tag offset (s, positive: stamped late)",
                     _pm(cal["time_offset_s"], cal.get("time_offset_s_sigma")),
                     _e(f"{cal.get('time_offset_method', '')}: {cal.get('time_offset_note', '')}".strip(": "))])
    if cal.get("gyro_scale") is not None:
        diag = [row[i] for i, row in enumerate(cal["gyro_scale"])]
        sd = cal.get("gyro_scale_sigma")
        rows.append(["Gyro scale-factor error (diagonal of the scale and skew matrix)",
                     _pm(diag, None if sd is None else [row[i] for i, row in enumerate(sd)], ".4f"),
                     _e(cal.get("gyro_scale_note", ""))])
    elif cal.get("gyro_scale_note"):
        rows.append(["Gyro scale factor and skew", "not estimated", _e(cal["gyro_scale_note"])])
    if not rows:
        return ""
    return "<p>Alignment and timing, with 1-sigma:</p>" + _table(["quantity", "value", "source"], rows)


def _model_part(est: Mapping[str, Any]) -> str:
    """The unmodelled field's level and, in dynamics mode, the rigid-body model, with 1-sigma."""
    rows = []
    noise, src = est.get("noise") or {}, est.get("noise_source") or {}
    if noise.get("field_model_nT") is not None:
        iv = src.get("field_model_nT_interval_68")
        rows.append(["Unmodelled field, level used (nT per axis)", _num(noise["field_model_nT"], ".0f"),
                     _e(src.get("field_model_nT", "")) + ("" if iv is None else
                                                           f"; 68 % interval of the fit {_num(iv[0], '.0f')}"
                                                           f"&ndash;{_num(iv[1], '.0f')} nT")])
    dm = est.get("dynamics_model")
    if isinstance(dm, Mapping):
        src_txt = _e(dm.get("source", "")) + (f" (likelihood ratio {_num(dm.get('likelihood_ratio'), '.1f')}"
                                              f" against {_num(dm.get('likelihood_ratio_threshold'), '.1f')})")
        j, js = dm.get("inertia_kg_m2"), dm.get("inertia_kg_m2_sigma")
        if j is not None:
            rows.append(["Principal-axis inertia terms Jxx, Jyy, Jzz (kg m², at the mission file's trace)",
                         _pm([j[i][i] for i in range(3)], None if js is None else [js[i][i] for i in range(3)],
                             ".5f"), src_txt])
        rows.append(["Residual dipole (A m², body)", _pm(dm.get("residual_dipole_Am2"),
                                                         dm.get("residual_dipole_Am2_sigma"), ".4f"), src_txt])
        if dm.get("coil_gain") is not None:
            rows.append(["Coil dipole per amp over the mission file's", _pm(dm["coil_gain"], dm.get("coil_gain_sigma")),
                         src_txt])
        if dm.get("latency_s") is not None:
            rows.append(["Actuation latency after the control tick (s)",
                         _pm(dm["latency_s"], dm.get("latency_s_sigma")), src_txt])
    if not rows:
        return ""
    return "<p>Models estimated on this pass, with 1-sigma:</p>" + _table(["quantity", "value", "source"], rows)


def _flatten(d: Mapping[str, Any], prefix: str = "") -> list[tuple[str, Any]]:
    rows: list[tuple[str, Any]] = []
    for k, v in d.items():
        name = f"{prefix}{k}".replace("_", " ")
        if isinstance(v, Mapping):
            rows += _flatten(v, f"{prefix}{k} / ")
        else:
            rows.append((name, v))
    return rows


def _value(v: Any) -> str:
    if isinstance(v, list | tuple):
        return ", ".join(_num(x) for x in v)
    return _num(v)


def _section_attitude(s: Mapping[str, Any], figs: Sequence[Figure]) -> str:
    est = s.get("estimate")
    if not est:
        return "<h2>Attitude and rate</h2>" + _skip_note(s, "estimate")
    head = (f"<p>Mode: {_e(est.get('mode'))}. {_e(est.get('mode_reason', ''))}</p>")
    main = {k: est[k] for k in ("accuracy", "consistency") if isinstance(est.get(k), Mapping)}
    rows = [[_e(k), _value(v)] for k, v in _flatten(main)]
    rest = {k: v for k, v in est.items() if k not in ("mode", "mode_reason", "accuracy", "consistency")}
    detail = "".join(f"<tr><td>{_e(k)}</td><td>{_value(v)}</td></tr>" for k, v in _flatten(rest))
    return ("<h2>Attitude and rate</h2>" + head + _table(["figure", "value"], rows) + _model_part(est)
            + _figures(figs, "attitude")
            + f"<details><summary>Filter settings and start-up</summary><table>{detail}</table></details>")


def _section_controller(s: Mapping[str, Any], figs: Sequence[Figure]) -> str:
    ctl = s.get("controller")
    if not ctl:
        return "<h2>Controller</h2>" + _skip_note(s, "controller")
    rows = []
    for ax in AXES:
        a = ctl.get("axes", {}).get(ax, ctl.get(ax, {})) or {}
        est = a.get("dipole_per_amp_estimated")
        sd = a.get("dipole_per_amp_sigma")
        rows.append([_e(ax), _e(a.get("polarity", "undetermined")),
                     "&ndash;" if est is None else f"{_num(est)} &plusmn; {_num(sd, '.2g')}",
                     _num(a.get("dipole_per_amp_nominal")), _num(a.get("gain_ratio")),
                     _num(a.get("command_gain_ratio")), _num(a.get("saturation_fraction"), ".1%")])
    t = _table(["coil", "polarity", "dipole per amp, estimated (A m²/A)", "nominal", "gain ratio",
                "command vs replay", "time saturated"], rows)
    extra = (f"<p>Latency {_num(ctl.get('latency_s'))} s; rate trend {_e(ctl.get('rate_trend', 'undetermined'))}."
             "</p>")
    return "<h2>Controller</h2>" + t + extra + _figures(figs, "controller")


def _section_inputs(s: Mapping[str, Any], figs: Sequence[Figure]) -> str:
    settings = s.get("settings", {})
    rows = [[_e(k), _e(v)] for k, v in settings.items()]
    parts = ["<h2>Ground track, inputs and settings</h2>", _figures(figs, "track")]
    if rows:
        parts.append(_table(["setting", "value"], rows))
    parts.append(f"<p>Mission file {_e(s.get('mission_file'))}; recon {_e(s.get('tool_version'))}.</p>")
    for stage, why in (s.get("skipped") or {}).items():
        parts.append(f'<p class="skip">Stage {_e(stage)} skipped: {_e(why)}.</p>')
    return "".join(parts)


def render_html(summary: Mapping[str, Any], figures: Sequence[Figure] = ()) -> str:
    """The report as one HTML string.

    Parameters
    ----------
    summary : the summary.json content (dict)
    figures : PNG figures, each placed in its section
    """
    pid = summary.get("pass_id", "")
    ctl = summary.get("controller") or {}
    verdict = ctl.get("verdict", "undetermined")
    anoms = summary.get("anomalies", [])
    crit = [a for a in anoms if a.get("severity") == "critical"]
    words = {"as_intended": "The magnetic controller behaved as intended.",
             "not_as_intended": "The magnetic controller did NOT behave as intended.",
             "undetermined": "Whether the magnetic controller behaved as intended could not be determined "
                             "from this pass."}
    head = (f'<div class="verdict v-{_e(verdict)}" id="verdict"><strong>Verdict: {_e(verdict)}</strong>. '
            f"{_e(words.get(verdict, ''))} {len(crit)} critical, "
            f"{sum(a.get('severity') == 'warning' for a in anoms)} warning, "
            f"{sum(a.get('severity') == 'info' for a in anoms)} info finding(s).</div>")
    crit_html = (_table(["severity", "code", "axis", "from (UTC)", "to (UTC)", "evidence"], _anomaly_rows(crit),
                        "anomalies critical") if crit else "<p>No critical finding.</p>")
    all_html = _table(["severity", "code", "axis", "from (UTC)", "to (UTC)", "evidence"], _anomaly_rows(anoms),
                      "anomalies") if anoms else "<p>No finding.</p>"
    caution = _e(summary.get("caution", ""))
    body = "".join([
        f"<h1>Pass {_e(pid)}</h1>",
        f'<p class="sub">recon {_e(summary.get("tool_version"))} &middot; mission file '
        f'{_e(summary.get("mission_file"))}</p>',
        head, "<h2>Critical findings</h2>", crit_html,
        _section_quality(summary, figures),
        _section_magnetometer(summary, figures),
        _section_attitude(summary, figures),
        _section_controller(summary, figures),
        "<h2>All findings</h2>", all_html,
        _section_inputs(summary, figures),
        f'<div class="caution"><strong>Caution.</strong> {caution}</div>',
    ])
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; img-src data:; "
            "style-src 'unsafe-inline'\">"
            f"<title>recon pass {_e(pid)}</title><style>{_CSS}</style></head><body>{body}</body></html>\n")


def write_report(out_dir: Path, summary: Mapping[str, Any], figures: Sequence[Figure] = ()) -> Path:
    """Write report.html and figures/<name>.png into ``out_dir``; return the report's path."""
    out_dir = Path(out_dir)
    fig_dir = out_dir / "figures"
    fig_dir.mkdir(parents=True, exist_ok=True)
    for f in figures:
        (fig_dir / f"{f.name}.png").write_bytes(f.png)
    path = out_dir / "report.html"
    path.write_text(render_html(summary, figures), encoding="utf-8")
    return path
