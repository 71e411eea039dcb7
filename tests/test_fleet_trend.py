"""The trend: the line fit against scipy, the test's false-alarm rate, drift findings on a synthetic
archive with known slopes, weekly anomaly counts, and trend.html rendered in headless Chromium."""

from __future__ import annotations

import dataclasses
import json
import shutil
import subprocess

import numpy as np
import pytest
from scipy import optimize, stats
from test_fleet_archive import synthetic_record

from recon.cli import main
from recon.core import InputError
from recon.fleet import (
    Archive,
    TrendSettings,
    build_trend,
    fit_line,
    render_trend_html,
    trend_figures,
    trend_summary,
    write_trend,
)
from recon.report import write_json

HOSTILE = '<script>alert("x")</script><img src=x onerror=alert(1)>'


def test_unweighted_fit_matches_scipy_linregress():
    rng = np.random.default_rng(1)
    t = np.sort(rng.uniform(0, 2, 15))
    y = 3.0 - 0.7 * t + rng.normal(0, 0.2, 15)
    f = fit_line(t, y)
    ref = stats.linregress(t, y)  # scipy's ordinary least squares: slope, its stderr, two-sided p
    assert f.slope == pytest.approx(ref.slope, rel=1e-12)
    assert f.slope_sigma == pytest.approx(ref.stderr, rel=1e-10)
    assert f.p_value == pytest.approx(ref.pvalue, rel=1e-8)
    assert f.value_at(np.array([0.0]))[0] == pytest.approx(ref.intercept, rel=1e-12)


def test_weighted_fit_matches_scipy_curve_fit():
    rng = np.random.default_rng(2)
    t = np.sort(rng.uniform(0, 1, 12))
    sigma = rng.uniform(0.5, 3.0, 12)
    y = 10.0 + 4.0 * t + rng.normal(0, 1, 12) * sigma * 1.7
    f = fit_line(t, y, sigma)
    # scipy's curve_fit with absolute_sigma=False scales the covariance by chi2/dof: the Birge-scaled error
    popt, pcov = optimize.curve_fit(lambda x, a, b: a + b * x, t, y, sigma=sigma, absolute_sigma=False)
    # curve_fit iterates (Levenberg-Marquardt) to its default tolerances: agreement to 1e-6, not to rounding
    assert f.slope == pytest.approx(popt[1], rel=1e-6)
    assert f.slope_sigma == pytest.approx(np.sqrt(pcov[1, 1]), rel=1e-6)
    chi2 = np.sum(((y - popt[0] - popt[1] * t) / sigma) ** 2)
    assert f.birge_ratio == pytest.approx(np.sqrt(chi2 / 10), rel=1e-8)


def test_false_alarm_rate_is_the_stated_one():
    """No slope, per-point sigmas right only up to an unknown factor (3): the rejection rate at alpha = 0.01
    over 20,000 seeded lines of 20 points must be 1 % within binomial scatter (4 sigma: 0.86-1.14 %), and
    the slope's errors divided by their sigmas must have Student t(18)'s spread (sqrt(18/16) = 1.061)."""
    rng = np.random.default_rng(3)
    t = np.sort(rng.uniform(0, 1, 20))
    sigma = rng.uniform(0.2, 2.0, 20)
    trials, reject, z = 20_000, 0, []
    for _ in range(trials):
        f = fit_line(t, 5.0 + 3.0 * sigma * rng.standard_normal(20), sigma)
        reject += f.p_value < 0.01
        z.append(f.slope / f.slope_sigma)
    assert abs(reject / trials - 0.01) < 4 * np.sqrt(0.01 * 0.99 / trials)
    assert np.std(z) == pytest.approx(np.sqrt(18 / 16), rel=0.03)


def test_degenerate_lines():
    assert fit_line([1.0, 2.0], [1.0, 2.0]) is None  # no scatter left to judge a slope by
    assert fit_line([1.0, 1.0, 1.0], [1.0, 2.0, 3.0]) is None  # one instant
    flat = fit_line([0.0, 1.0, 2.0, 3.0], [2.0, 2.0, 2.0, 2.0])
    assert flat.slope == 0 and flat.p_value == 1.0
    exact = fit_line([0.0, 1.0, 2.0, 3.0], [0.0, 1.0, 2.0, 3.0])
    assert exact.t_stat == np.inf and exact.p_value == 0.0


def _season_archive(path, n=12, *, bias_rate=0.0, dipole_rate=0.0, small_rate=0.0, seed=0, satellite="sat-a"):
    """An archive of ``n`` weekly passes: bias_x drifts at ``bias_rate`` nT/yr (sigma 20 nT), dipole_y at
    ``dipole_rate`` A m^2/A per yr (sigma 0.02, level 1.5), soft_iron_xx at ``small_rate`` per yr (sigma
    1e-5), everything else constant with noise at its sigma."""
    rng = np.random.default_rng(seed)
    with Archive(path) as a:
        for k in range(n):
            years = 7 * k / 365.25
            day = np.datetime64("2026-01-05T08:00:00", "ms") + np.timedelta64(7 * k, "D")
            noise = rng.standard_normal(4)
            values = {"bias_x_nT": (1000.0 + bias_rate * years + 20 * noise[0], 20.0),
                      "dipole_per_amp_y": (1.5 + dipole_rate * years + 0.02 * noise[1], 0.02),
                      "soft_iron_xx": (1.0 + small_rate * years + 1e-5 * noise[2], 1e-5)}
            rec = synthetic_record(f"{satellite}-{k:02d}", str(day) + "Z", n_anomalies=1 + k % 2, values=values,
                                   satellite=satellite)
            # the other parameters scatter at their sigma around their level
            jitter = tuple(m if m.name in values or m.sigma is None else
                           dataclasses.replace(m, value=m.value + m.sigma * rng.standard_normal())
                           for m in rec.measurements)
            a.write(dataclasses.replace(rec, measurements=jitter))


def test_trend_finds_the_drifts_it_should_and_no_other(tmp_path):
    path = tmp_path / "archive.sqlite"
    # 12 weekly passes (0.21 yr): bias +2000 nT/yr (20 nT sigma: slope sigma ~ 30 nT/yr), dipole y -1.0 A m^2/A
    # per yr (sigma ~0.03/yr), soft iron xx +0.001 per yr: significant (sigma ~1.5e-5/yr) but under 0.002/yr
    _season_archive(path, bias_rate=2000.0, dipole_rate=-1.0, small_rate=0.001)
    r = build_trend(path)
    found = {t.parameter.name: t for t in r.trends}
    assert {t.parameter.name for t in r.drifts} == {"bias_x_nT", "dipole_per_amp_y"}
    assert found["bias_x_nT"].fit.slope == pytest.approx(2000.0, abs=4 * found["bias_x_nT"].fit.slope_sigma)
    assert found["dipole_per_amp_y"].fit.slope < 0
    small = found["soft_iron_xx"]
    assert small.significant and not small.material and not small.drift_detected
    assert r.tested == len(r.trends) == 33 and r.page_false_alarm_bound == pytest.approx(0.033)
    # the same archive with a materiality threshold under the soft-iron rate: now that is a drift too
    r2 = build_trend(path, settings=TrendSettings(soft_iron_per_year=0.0005))
    assert "soft_iron_xx" in {t.parameter.name for t in r2.drifts}


def test_no_drift_no_finding(tmp_path):
    path = tmp_path / "archive.sqlite"
    _season_archive(path, n=20, seed=5)
    r = build_trend(path)
    assert not r.drift_detected and r.tested == 33


def test_weekly_anomalies_and_untestable_parameters(tmp_path):
    path = tmp_path / "archive.sqlite"
    _season_archive(path, n=4)
    r = build_trend(path)
    assert r.tested == 0 and all(t.untestable == "4 pass(es) with this figure; a trend needs 5" for t in r.trends)
    w = r.weekly
    assert w.weeks == ("2026-W02", "2026-W03", "2026-W04", "2026-W05") and w.passes == (1, 1, 1, 1)
    # passes alternate 1 and 2 anomalies: telemetry_gap in every pass, mag_bias_large in every other one
    assert dict(zip(w.codes, w.counts, strict=True)) == {"telemetry_gap": (1, 1, 1, 1), "mag_bias_large": (0, 1, 0, 1)}
    assert w.recurring == ("telemetry_gap", "mag_bias_large")


def test_satellite_choice(tmp_path):
    path = tmp_path / "archive.sqlite"
    _season_archive(path, n=5, satellite="sat-a")
    _season_archive(path, n=5, satellite="sat-b")
    with pytest.raises(InputError, match=r"expected one satellite, the archive holds 2 \('sat-a', 'sat-b'\)"):
        build_trend(path)
    with pytest.raises(InputError, match=r"expected a satellite in the archive \('sat-a', 'sat-b'\), got 'sat-c'"):
        build_trend(path, "sat-c")
    assert build_trend(path, "sat-b").passes == 5
    one = tmp_path / "one.sqlite"
    _season_archive(one, n=5, satellite="sat-a")
    with Archive(one) as a:  # a pass that failed before its satellite could be read
        a.write(synthetic_record("file:broken/mission.toml", satellite=None, status="failed"))
    assert build_trend(one).satellite == "sat-a"  # the only satellite with passes that ran


def test_trend_outputs_and_cli(tmp_path, capsys):
    path = tmp_path / "archive.sqlite"
    _season_archive(path, bias_rate=2000.0)
    assert main(["trend", str(path), "--out", str(tmp_path / "t")]) == 1  # a drift: exit 1, for scripts
    assert "drift detected: bias_x_nT" in capsys.readouterr().out
    data = json.loads((tmp_path / "t" / "trend.json").read_text())
    assert data["drift_detected"] is True and data["drifts"] == ["bias_x_nT"]
    assert data["test"]["parameters_tested"] == 33 and data["test"]["false_alarm_per_parameter"] == 0.001
    p = {q["name"]: q for q in data["parameters"]}["bias_x_nT"]
    assert len(p["points"]) == 12 and p["drift_detected"] and p["threshold_per_year"] == 100.0
    write_json(tmp_path / "again.json", trend_summary(build_trend(path)))
    assert (tmp_path / "again.json").read_bytes() == (tmp_path / "t" / "trend.json").read_bytes()  # deterministic
    fleet = tmp_path / "fleet.toml"
    fleet.write_text("[trend]\nbias_nT_per_year = 1e6\n")
    assert main(["trend", str(path), "--out", str(tmp_path / "t2"), "--fleet", str(fleet)]) == 0


def test_trend_page_escapes_input_strings(tmp_path):
    path = tmp_path / "archive.sqlite"
    _season_archive(path, n=6, satellite=HOSTILE)
    page = render_trend_html(build_trend(path))
    assert "<script>" not in page and "<img src=x" not in page and "&lt;script&gt;" in page
    assert "http://" not in page and "https://" not in page


def _chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser") or shutil.which("google-chrome")


PROBE = """
<script>
window.addEventListener('load', () => {
  const imgs = [...document.images];
  const box = document.getElementById('drift').getBoundingClientRect();
  const t = document.querySelector('table.trends');
  const w = document.querySelector('table.weekly');
  const r = {images: imgs.length, decoded: imgs.filter(i => i.complete && i.naturalWidth > 0).length,
             drift_visible: box.height > 0 && box.width > 0,
             drift_text: document.getElementById('drift').textContent,
             trend_rows: t ? t.querySelectorAll('tbody tr').length : 0,
             drift_rows: t ? t.querySelectorAll('tbody tr.drift').length : 0,
             weekly_rows: w ? w.querySelectorAll('tbody tr').length : 0};
  const pre = document.createElement('pre'); pre.id = 'probe'; pre.textContent = JSON.stringify(r);
  document.body.appendChild(pre);
});
</script>
"""
CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


def _chromium_run(args: list[str], tmp) -> subprocess.CompletedProcess:
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--enable-logging=stderr", "--v=0", f"--user-data-dir={tmp / 'profile'}"]
    return subprocess.run([_chromium(), *flags, *args], capture_output=True, text=True, timeout=120)


def trend_page_in_browser(page_path, tmp, screenshot=None) -> dict:
    """Load trend.html in headless Chromium: a copy with a probe script (the page itself forbids scripts)
    reports what rendered; the unmodified page gives the console errors and the screenshot."""
    probed = tmp / "probed.html"
    probed.write_text(page_path.read_text(encoding="utf-8").replace(CSP, CSP + "; script-src 'unsafe-inline'")
                      .replace("</body>", PROBE + "</body>"))
    r = _chromium_run(["--dump-dom", "--virtual-time-budget=5000", probed.as_uri()], tmp)
    start = r.stdout.index('<pre id="probe">') + len('<pre id="probe">')
    probe = json.loads(r.stdout[start:r.stdout.index("</pre>", start)])
    r2 = _chromium_run(["--window-size=1200,2000", f"--screenshot={screenshot or tmp / 'shot.png'}",
                        page_path.as_uri()], tmp)
    probe["console_errors"] = [ln for ln in (r.stderr + r2.stderr).splitlines()
                               if "CONSOLE" in ln and ("ERROR" in ln.upper() or "Uncaught" in ln)]
    return probe


@pytest.mark.skipif(_chromium() is None, reason="Chromium is not installed (.ci/run installs it)")
def test_trend_page_renders_in_headless_chromium(tmp_path):
    path = tmp_path / "archive.sqlite"
    _season_archive(path, bias_rate=2000.0, dipole_rate=-1.0)
    report = build_trend(path)
    page, _ = write_trend(report, tmp_path / "t")
    shot = tmp_path / "trend.png"
    probe = trend_page_in_browser(page, tmp_path, shot)
    n_figures = len(trend_figures(report))
    assert n_figures == 10  # one per family
    assert probe["images"] == n_figures and probe["decoded"] == n_figures
    assert probe["drift_visible"] and "Drift detected in 2 parameter(s)" in probe["drift_text"]
    assert probe["trend_rows"] == 33 and probe["drift_rows"] == 2
    assert probe["weekly_rows"] == 12
    assert probe["console_errors"] == []
    assert shot.is_file() and shot.stat().st_size > 10_000
