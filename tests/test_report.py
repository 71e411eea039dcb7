"""The HTML report: structure, escaping of input strings, and a real render in headless Chromium."""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from recon.report import figures, render_html, write_report

HOSTILE = '<script>alert("x")</script><img src=x onerror=alert(1)>'


def _summary(pass_id="rpt-1", column="mx", evidence="coil y: dipole -1.46 +- 0.05 A m^2/A against +1.50"):
    return {
        "pass_id": pass_id, "tool_version": "0.1.0", "mission_file": "mission.toml",
        "inputs": {"magnetometer": {"file": f"mag.csv ({column})", "rows_read": 10, "rows_kept": 9,
                                    "dropped": {"malformed": 1}, "gaps": 0, "saturated": 0,
                                    "median_rate_hz": 10.0}},
        "calibration": {"bias_nT": [100.0, -50.0, 20.0], "bias_nT_sigma": [3.0, 3.0, 3.0],
                        "crosstalk_nT_per_A": [[1000.0, 0.0, 0.0], [0.0, 800.0, 0.0], [0.0, 0.0, None]],
                        "crosstalk_nT_per_A_sigma": [[10.0, 5.0, 5.0], [5.0, 10.0, 5.0], [5.0, 5.0, None]],
                        "residual_rms_nT": {"before": 900.0, "after": 140.0},
                        "undetermined": ["coil z never switched"]},
        "controller": {"verdict": "not_as_intended", "latency_s": 0.0, "rate_trend": "decreasing",
                       "axes": {"y": {"polarity": "inverted", "dipole_per_amp_estimated": -1.46,
                                      "dipole_per_amp_sigma": 0.05, "dipole_per_amp_nominal": 1.5}}},
        "skipped": {"estimate": "test"},
        "anomalies": [{"code": "coil_polarity_inverted", "severity": "critical", "axis": "y",
                       "start_utc": "2026-07-14T09:12:00.000Z", "stop_utc": "2026-07-14T09:42:00.000Z",
                       "evidence": evidence}],
        "caution": "estimates, not certainties",
    }


def _figs():
    t = np.datetime64("2026-07-14T09:12:00", "ns") + np.arange(60).astype("timedelta64[s]")
    return [figures.kinetic_energy(t, np.exp(-np.arange(60) / 30.0)),
            figures.ground_track(np.linspace(-60, 60, 60), np.linspace(170, 200, 60) % 360 - 180,
                                 [(0.0, 10.0, "coil_polarity_inverted")])]


def test_report_reads_top_down_verdict_first():
    page = render_html(_summary(), _figs())
    order = [page.index(s) for s in ("Verdict: not_as_intended", "Critical findings", "Data quality",
                                     "Magnetometer", "Attitude and rate", "Controller", "Caution")]
    assert order == sorted(order)
    assert "coil_polarity_inverted" in page and "-1.46" in page
    assert "undetermined" in page  # a None crosstalk entry is shown as undetermined, not a number
    assert page.count("data:image/png;base64,") == 2
    assert "http://" not in page and "https://" not in page  # self-contained: no external requests


@pytest.mark.parametrize("field", ["pass_id", "column", "evidence"])
def test_input_strings_are_escaped(field):
    page = render_html(_summary(**{field: HOSTILE}))
    assert "<script>" not in page
    assert "<img src=x" not in page
    assert "&lt;script&gt;" in page


def _chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser") or shutil.which("google-chrome")


PROBE = """
<script>
window.addEventListener('load', () => {
  const imgs = [...document.images];
  const v = document.getElementById('verdict').getBoundingClientRect();
  const t = document.querySelector('table.anomalies');
  const r = {images: imgs.length, decoded: imgs.filter(i => i.complete && i.naturalWidth > 0).length,
             verdict_visible: v.height > 0 && v.width > 0,
             anomaly_rows: t ? t.querySelectorAll('tbody tr').length : 0,
             anomaly_visible: t ? t.getBoundingClientRect().height > 0 : false};
  const pre = document.createElement('pre'); pre.id = 'probe'; pre.textContent = JSON.stringify(r);
  document.body.appendChild(pre);
});
</script>
"""


def _chromium_run(exe: str, args: list[str], tmp: Path) -> subprocess.CompletedProcess:
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--enable-logging=stderr", "--v=0", f"--user-data-dir={tmp / 'profile'}"]
    return subprocess.run([exe, *flags, *args], capture_output=True, text=True, timeout=120)


def render_in_browser(report: Path, tmp: Path, screenshot: Path | None = None) -> dict:
    """Load report.html in headless Chromium; return the probe's findings and console errors.

    The probe script is added to a copy of the page (the report itself runs no script and forbids it
    by its content security policy), which reports whether every image decoded and whether the
    verdict and the anomaly table have a size on the page.
    """
    exe = _chromium()
    page = report.read_text(encoding="utf-8")
    probed = tmp / "probed.html"
    probed.write_text(page.replace("default-src 'none'; img-src data:; style-src 'unsafe-inline'",
                                   "default-src 'none'; img-src data:; style-src 'unsafe-inline'; "
                                   "script-src 'unsafe-inline'").replace("</body>", PROBE + "</body>"))
    r = _chromium_run(exe, ["--dump-dom", "--virtual-time-budget=5000", probed.as_uri()], tmp)
    start = r.stdout.index('<pre id="probe">') + len('<pre id="probe">')
    probe = json.loads(r.stdout[start:r.stdout.index("</pre>", start)])
    # the unmodified page, for console errors and the screenshot
    r2 = _chromium_run(exe, ["--window-size=1200,2400", f"--screenshot={screenshot or tmp / 'shot.png'}",
                             report.as_uri()], tmp)
    console = [ln for ln in (r.stderr + r2.stderr).splitlines()
               if "CONSOLE" in ln and ("ERROR" in ln.upper() or "Uncaught" in ln)]
    probe["console_errors"] = console
    return probe


@pytest.mark.skipif(_chromium() is None, reason="Chromium is not installed (.ci/run installs it)")
def test_report_renders_in_headless_chromium(tmp_path, repo):
    out = tmp_path / "rep"
    report = write_report(out, _summary(), _figs())
    shot = tmp_path / "report.png"
    probe = render_in_browser(report, tmp_path, shot)
    assert probe["images"] == 2 and probe["decoded"] == 2
    assert probe["verdict_visible"]
    assert probe["anomaly_rows"] == 1 and probe["anomaly_visible"]
    assert probe["console_errors"] == []
    assert shot.is_file() and shot.stat().st_size > 10_000
