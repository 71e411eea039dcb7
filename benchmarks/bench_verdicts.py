"""The scorecard: recon's verdicts and accuracy over many random flight-like simulated passes.

For each family (a flight-like regime, healthy or with one injected fault) it draws N passes with
fresh seeds, simulates each (recon.simulate, every imperfection drawn at random), runs the whole
pipeline on it (``run_pass``, no report) and scores what recon said against the truth:

- a confusion table: per family, the verdicts and how often each finding appeared;
- the false-alarm rate per healthy pass (a ``not_as_intended`` verdict, or any finding that accuses
  the controller, a coil or the gyro), with its 95 % Clopper-Pearson interval;
- the detection rate per fault family (the right finding, on the right axis for a coil);
- the latency error on the actuation-delay family;
- the smoothed attitude's RMS error against the truth and its ratio to the stated 1-sigma (about 1
  when the sigmas are honest), and the RMS body-rate error;
- the crosstalk error (relative Frobenius norm) where recon called every entry determined, and the
  chi-square of its stated sigmas.

It writes the same figures (and every pass's record) as JSON; ``--compare OLD.json`` prints the figures
of an earlier run beside today's. This is a benchmark, not a test: it asserts nothing.

Run: ``python benchmarks/bench_verdicts.py [--n N] [--families a,b] [--seed-base S] [--workers W]
[--out FILE] [--compare FILE]``. The default (N = 4, all families, 2 workers) takes about ten minutes on
a 2-core machine.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
import traceback
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.spatial.transform import Rotation, Slerp
from scipy.stats import beta

os.environ.setdefault("OMP_NUM_THREADS", "1")  # one BLAS thread per worker on a small machine
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

# Findings that accuse the spacecraft (controller, coils, gyro): on a healthy pass each is a false alarm.
FAULT_CODES = ("coil_polarity_inverted", "coil_no_response", "coil_gain_off", "command_latency",
               "command_mismatch", "crosstalk_feedback", "rate_increasing", "detumble_slow",
               "momentum_error_increasing", "momentum_dump_slow", "gyro_dead", "gyro_bias_jump")
SHOWN_CODES = FAULT_CODES + ("actuation_before_command", "controller_saturated", "filter_inconsistent",
                             "crosstalk_estimates_disagree", "rate_history_biased")


@dataclass(frozen=True)
class Family:
    """A kind of pass: a regime, an optional fault drawn per seed, and what a right answer is."""

    name: str
    regime: str
    healthy: bool
    expect: str | None = None          # the finding that detects the fault
    axis_matters: bool = False          # the finding must name the faulty coil's axis
    quiet: bool = False                 # information is lacking: "undetermined" is a right answer
    overrides: dict = field(default_factory=dict)


FAMILIES = {f.name: f for f in (
    Family("healthy_detumble", "detumble", True),
    Family("healthy_momentum", "momentum_orbit", True),
    Family("healthy_fast_tumble", "fast_tumble", True),
    Family("quiet_pointing", "pointing", True, quiet=True),
    Family("coil_inverted", "detumble", False, "coil_polarity_inverted", True),
    Family("coil_open", "detumble", False, "coil_no_response", True),
    Family("coil_half_gain", "detumble", False, "coil_gain_off", True),
    Family("actuation_delay", "detumble", False, "command_latency"),
    Family("gyro_dead_stuck", "detumble", False, "gyro_dead"),
    Family("gyro_dead_zero", "detumble", False, "gyro_dead"),
    Family("gyro_bias_step", "detumble", False, "gyro_bias_jump"),
    Family("chatter", "detumble", False, "crosstalk_feedback",
           overrides={"mag_sampling": "coils_on", "mag_crosstalk_body_diag_nT_per_A": (40_000.0, 40_000.0, 30_000.0)}),
)}


def draw_faults(family: Family, seed: int, duration_s: float, period_s: float) -> list[dict]:
    """The fault of one pass of a family, drawn from the seed (axis, size, start)."""
    rng = np.random.default_rng([seed, 977])
    axis = int(rng.integers(3))
    start = float(np.round(duration_s * rng.uniform(0.3, 0.6)))
    if family.name == "coil_inverted":
        return [{"kind": "coil_polarity_inverted", "axis": axis}]
    if family.name == "coil_open":
        return [{"kind": "coil_dead", "axis": axis}]
    if family.name == "coil_half_gain":
        return [{"kind": "coil_gain_off", "axis": axis, "value": 0.5}]
    if family.name == "actuation_delay":
        return [{"kind": "command_latency", "value": float(np.round(rng.uniform(1.0, 3.0) * period_s, 3))}]
    if family.name == "gyro_dead_stuck":
        return [{"kind": "gyro_dead", "start_s": start, "value": None}]
    if family.name == "gyro_dead_zero":
        return [{"kind": "gyro_dead", "start_s": start, "value": 0.0}]
    if family.name == "gyro_bias_step":
        size = float(np.deg2rad(rng.uniform(0.2, 1.0)) * rng.choice([-1.0, 1.0]))
        return [{"kind": "gyro_bias_jump", "axis": axis, "start_s": start, "value": size}]
    return []


# ---------------------------------------------------------------------------------- one pass
def _utc(col: pd.Series) -> np.ndarray:
    return col.str.rstrip("Z").to_numpy().astype("datetime64[ns]")


def attitude_scores(rep: Path, truth_dir: Path) -> dict:
    """Attitude and rate error of the smoothed history against the truth, at the history's own stamps.

    The truth is interpolated (slerp) to the instants recon states; its stated 1-sigma per body axis
    comes from attitude.csv. ``error_over_sigma`` is the RMS error over the RMS of the stated error's
    length (sqrt(sx^2 + sy^2 + sz^2)): about 1 when the sigmas are honest; ``nees_per_axis`` the mean of
    (e_i / s_i)^2 (expected 1).
    """
    att = pd.read_csv(rep / "attitude.csv")
    tr = pd.read_csv(truth_dir / "truth.csv")
    ta, tt = _utc(att["time_utc"]).astype(np.int64), _utc(tr["time_utc"]).astype(np.int64)
    inside = (ta >= tt[0]) & (ta <= tt[-1])
    slerp = Slerp(tt / 1e9, Rotation.from_quat(tr[["qx", "qy", "qz", "qw"]].to_numpy()))
    q_true = slerp(ta[inside] / 1e9)
    q_est = Rotation.from_quat(att[["qx", "qy", "qz", "qw"]].to_numpy()[inside])
    e = np.rad2deg((q_est * q_true.inv()).as_rotvec())
    s = att[["sigma_x_deg", "sigma_y_deg", "sigma_z_deg"]].to_numpy()[inside]
    w_true = np.column_stack([np.interp(ta[inside], tt, tr[c]) for c in ("wx_rad_s", "wy_rad_s", "wz_rad_s")])
    w_est = np.deg2rad(att[["rate_x_dps", "rate_y_dps", "rate_z_dps"]].to_numpy()[inside])
    rms = float(np.sqrt(np.mean(np.sum(e ** 2, axis=1))))
    return {"attitude_rms_deg": rms,
            "attitude_sigma_rms_deg": float(np.sqrt(np.mean(np.sum(s ** 2, axis=1)))),
            "error_over_sigma": rms / float(np.sqrt(np.mean(np.sum(s ** 2, axis=1)))),
            "nees_per_axis": float(np.mean((e / s) ** 2)),
            "rate_rms_dps": float(np.rad2deg(np.sqrt(np.mean(np.sum((w_est - w_true) ** 2, axis=1)))))}


def crosstalk_scores(summary: dict, truth: dict) -> dict:
    """Relative Frobenius error of the applied crosstalk where recon gives all nine entries, and the
    chi-square of the errors over their stated sigmas (9 degrees of freedom when honest)."""
    cal = summary.get("calibration") or {}
    k = cal.get("crosstalk_nT_per_A")
    ks = cal.get("crosstalk_nT_per_A_sigma")
    if k is None or any(v is None for row in k for v in row):
        return {"crosstalk_determined": False}
    k = np.asarray(k, float)
    k_true = np.asarray(truth["magnetometer"]["K_nT_per_A"], float)
    out = {"crosstalk_determined": True,
           "crosstalk_rel_error": float(np.linalg.norm(k - k_true) / np.linalg.norm(k_true))}
    if ks is not None and all(v is not None and v > 0 for row in ks for v in row):
        out["crosstalk_chi2"] = float(np.sum(((k - k_true) / np.asarray(ks, float)) ** 2))
    return out


def alignment_scores(summary: dict, truth: dict) -> dict:
    """The magnetometer's estimated misalignment (small angles, body from magnetometer) and time-tag
    offset against the simulator's: error and its chi-square against the stated sigma."""
    cal, mag = summary.get("calibration") or {}, truth["magnetometer"]
    out: dict = {}
    est, sig = cal.get("misalignment_deg"), cal.get("misalignment_deg_sigma")
    if est is not None and mag.get("misalignment_body_deg") is not None:
        d = np.asarray(est, float) - np.asarray(mag["misalignment_body_deg"], float)
        out["misalignment_error_deg"] = float(np.linalg.norm(d))
        out["misalignment_source"] = cal.get("misalignment_source")
        if sig is not None and all(v > 0 for v in sig):
            out["misalignment_chi2"] = float(np.sum((d / np.asarray(sig, float)) ** 2))
    if cal.get("time_offset_s") is not None and mag.get("time_offset_s") is not None:
        out["time_offset_error_s"] = float(cal["time_offset_s"] - mag["time_offset_s"])
        out["time_offset_method"] = cal.get("time_offset_method")
    return out


def oracle_scores(sim, mission_path: Path) -> dict:
    """The same filter given the truth of what recon estimates: the magnetometer calibrated with the
    true bias, soft iron, crosstalk and misalignment, stamped at the true instants; the gyro with its
    true scale and misalignment taken out; the true inertia. Its attitude error against the truth is
    the floor recon's own estimates are measured against."""
    from scipy.spatial.transform import Rotation

    from recon.config import load_mission
    from recon.estimate import AlignmentPrior, NoiseModel, estimate_attitude
    from recon.field import reference_field

    mission = load_mission(mission_path)
    hw = sim.magnetometer
    clean = sim.b_meas_sensor_nT - hw.bias_nT - sim.b_coil_sensor_nT
    b_body = np.linalg.solve(hw.S, clean.T).T @ hw.sensor_to_body.T
    if hw.misalignment_body is not None:
        b_body = b_body @ hw.misalignment_body.T
    ref = reference_field(mission, sim.time_utc)
    kw = {}
    if sim.config.gyro:
        g = sim.gyro
        e = np.eye(3) if g.scale_misalignment is None else np.eye(3) + g.scale_misalignment
        # a sample at full scale is a bound for the oracle too: clipping is not a nuisance it is given
        kw = {"gyro_t_utc": sim.gyro_time_utc,
              "w_gyro_body_rad_s": np.linalg.solve(e, sim.w_gyro_meas_sensor_rad_s.T).T @ g.sensor_to_body.T,
              "gyro_clipped": np.abs(sim.w_gyro_meas_sensor_rad_s) >= 0.999 * g.full_scale_rad_s,
              "gyro_sensor_to_body": g.sensor_to_body, "gyro_full_scale_rad_s": g.full_scale_rad_s}
    # the alignment and the gyro's scale are given (taken out above): held at zero, not fitted
    given = AlignmentPrior(np.zeros(3), 1e-9, scale_sigma=1e-9, skew_sigma=1e-9)
    hist = estimate_attitude(sim.time_utc, b_body, ref.b_gcrf_nT, noise=NoiseModel.from_mission(mission),
                             alignment_prior=given,
                             mode=mission.estimator.mode, inertia_kg_m2=sim.inertia_kg_m2,
                             coil_t_utc=sim.tick_time_utc, i_coil_A=sim.i_cmd_A,
                             dipole_per_amp=mission.coils.dipole_per_amp, r_gcrf_km=ref.r_gcrf_km,
                             coil_timing=_coil_timing(mission), **kw)
    k = np.searchsorted(sim.time_utc, hist.time_utc)
    e = np.rad2deg((Rotation.from_quat(hist.q_body_from_gcrf) * Rotation.from_quat(sim.q_body_from_gcrf[k]).inv())
                   .as_rotvec())
    s = np.rad2deg(hist.sigma_att_rad)
    rms = float(np.sqrt(np.mean(np.sum(e ** 2, axis=1))))
    return {"oracle_attitude_rms_deg": rms, "oracle_mode": hist.mode,
            "oracle_error_over_sigma": rms / float(np.sqrt(np.mean(np.sum(s ** 2, axis=1))))}


def _coil_timing(mission):
    """When the coil commands switch, as the mission file says (the same the pipeline gives the estimator)."""
    from recon.estimate import CoilTiming

    ctl, coils = mission.controller, mission.coils
    if ctl is None or coils is None:
        return None
    return CoilTiming(period_s=ctl.period_s, first_tick_utc=ctl.first_tick, off_window_s=coils.off_window_s,
                      mag_sampling=coils.mag_sampling)


def score_pass(family: Family, seed: int, duration_s: float | None, oracle: bool = False) -> dict:
    """Simulate one pass, run recon on it and score the result (a record for the JSON file)."""
    from recon.pipeline import run_pass
    from recon.simulate import simulate_pass
    from recon.simulate.scenarios import scenario_config

    rec = {"family": family.name, "seed": seed}
    t0 = time.perf_counter()
    try:
        cfg = scenario_config(family.regime, duration_s, **family.overrides)
        faults = draw_faults(family, seed, cfg.duration_s, cfg.period_s)
        with tempfile.TemporaryDirectory() as tmp:
            d = Path(tmp)
            sim = simulate_pass(family.regime, seed=seed, out_dir=d / "pass", duration_s=duration_s, faults=faults,
                                **family.overrides)
            truth = json.loads((d / "pass" / "truth" / "truth.json").read_text())
            res = run_pass(d / "pass" / "mission.toml", d / "rep", report=False)
            s = res.summary
            rec.update(_findings(s, truth))
            if s.get("estimate") is not None:
                rec.update(attitude_scores(res.out_dir, d / "pass" / "truth"))
            rec.update(crosstalk_scores(s, truth))
            rec.update(alignment_scores(s, truth))
            if oracle:
                rec.update(oracle_scores(sim, d / "pass" / "mission.toml"))
    except Exception as exc:  # a crash is a result too: it is counted, not hidden
        rec["error"] = f"{type(exc).__name__}: {exc}"
        rec["traceback"] = traceback.format_exc(limit=3)
    rec["seconds"] = time.perf_counter() - t0
    return rec


def _findings(summary: dict, truth: dict) -> dict:
    c = summary.get("controller") or {}
    fault_axes = [f["axis"] for f in truth["faults"] if f.get("axis")]
    return {"verdict": c.get("verdict", "undetermined"),
            "codes": sorted({a["code"] for a in summary["anomalies"]}),
            "code_axes": sorted({f"{a['code']}:{a.get('axis') or ''}" for a in summary["anomalies"]}),
            "fault_axis": fault_axes[0] if fault_axes else None,
            "truth_latency_s": truth["coils"]["latency_s"],
            "latency_s": c.get("latency_s"),
            "mode": (summary.get("estimate") or {}).get("mode"),
            "imperfections": {k: truth["imperfections"][k] for k in (
                "mag_misalignment_angle_deg", "mag_time_offset_s", "field_condition", "tle_along_track_km")}}


# ------------------------------------------------------------------------------------- figures
def clopper_pearson(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Exact binomial interval (Clopper and Pearson 1934, Biometrika 26(4), 404-413)."""
    a = 1.0 - level
    lo = 0.0 if k == 0 else float(beta.ppf(a / 2, k, n - k + 1))
    hi = 1.0 if k == n else float(beta.ppf(1 - a / 2, k + 1, n - k))
    return lo, hi


def detected(rec: dict, fam: Family) -> bool:
    if fam.expect is None or "error" in rec:
        return False
    if fam.axis_matters:
        return f"{fam.expect}:{rec['fault_axis']}" in rec["code_axes"]
    if fam.expect == "gyro_bias_jump" and "gyro_dead" in rec["codes"]:
        return False  # a step reported as a dead gyro is not told apart
    return fam.expect in rec["codes"]


def false_alarm(rec: dict) -> bool:
    return "error" in rec or rec["verdict"] == "not_as_intended" or any(c in FAULT_CODES for c in rec["codes"])


def figures(records: list[dict]) -> dict:
    """The scorecard's figures from the pass records."""
    out: dict = {"families": {}}
    healthy = [r for r in records if FAMILIES[r["family"]].healthy]
    k = sum(false_alarm(r) for r in healthy)
    out["false_alarm"] = {"passes": len(healthy), "alarms": k, "rate": k / len(healthy) if healthy else None,
                          "ci95": clopper_pearson(k, len(healthy)) if healthy else None}
    for name in FAMILIES:
        rs = [r for r in records if r["family"] == name]
        if not rs:
            continue
        fam = FAMILIES[name]
        f: dict = {"passes": len(rs), "errors": sum("error" in r for r in rs),
                   "verdicts": {v: sum(r.get("verdict") == v for r in rs)
                                for v in ("as_intended", "not_as_intended", "undetermined")},
                   "codes": {c: sum(c in r.get("codes", ()) for r in rs) for c in SHOWN_CODES}}
        if fam.expect:
            d = sum(detected(r, fam) for r in rs)
            f["detected"] = d
            f["detection_rate"] = d / len(rs)
            f["detection_ci95"] = clopper_pearson(d, len(rs))
        else:
            f["false_alarms"] = sum(false_alarm(r) for r in rs)
        if name == "actuation_delay":
            err = [abs(r["latency_s"] - r["truth_latency_s"]) for r in rs if r.get("latency_s") is not None]
            f["latency_abs_error_s"] = {"n": len(err), "median": float(np.median(err)) if err else None,
                                        "max": float(np.max(err)) if err else None}
        att = [r for r in rs if "attitude_rms_deg" in r]
        if att:
            f["attitude_rms_deg_median"] = float(np.median([r["attitude_rms_deg"] for r in att]))
            f["attitude_rms_deg_max"] = float(np.max([r["attitude_rms_deg"] for r in att]))
            f["error_over_sigma_median"] = float(np.median([r["error_over_sigma"] for r in att]))
            f["rate_rms_dps_median"] = float(np.median([r["rate_rms_dps"] for r in att]))
            orc = [r for r in att if "oracle_attitude_rms_deg" in r]
            if orc:
                f["oracle_attitude_rms_deg_median"] = float(np.median([r["oracle_attitude_rms_deg"] for r in orc]))
                f["attitude_over_oracle_median"] = float(np.median([r["attitude_rms_deg"] / r["oracle_attitude_rms_deg"]
                                                                    for r in orc]))
        mis = [r for r in rs if "misalignment_error_deg" in r]
        if mis:
            f["misalignment_error_deg_median"] = float(np.median([r["misalignment_error_deg"] for r in mis]))
            f["misalignment_error_deg_max"] = float(np.max([r["misalignment_error_deg"] for r in mis]))
            chi = [r["misalignment_chi2"] for r in mis if "misalignment_chi2" in r]
            if chi:
                f["misalignment_chi2_mean_per_dof"] = float(np.mean(chi) / 3.0)
        tof = [abs(r["time_offset_error_s"]) for r in rs if "time_offset_error_s" in r]
        if tof:
            f["time_offset_abs_error_s_median"] = float(np.median(tof))
            f["time_offset_abs_error_s_max"] = float(np.max(tof))
        kk = [r for r in rs if r.get("crosstalk_determined")]
        f["crosstalk_determined"] = len(kk)
        if kk:
            f["crosstalk_rel_error_median"] = float(np.median([r["crosstalk_rel_error"] for r in kk]))
            chi = [r["crosstalk_chi2"] for r in kk if "crosstalk_chi2" in r]
            if chi:
                f["crosstalk_chi2_mean_per_dof"] = float(np.mean(chi) / 9.0)
        f["seconds_mean"] = float(np.mean([r["seconds"] for r in rs]))
        out["families"][name] = f
    return out


def _fmt(x, spec: str = ".2f") -> str:
    return "-" if x is None else format(x, spec)


def print_figures(fig: dict, old: dict | None = None) -> None:
    fa = fig["false_alarm"]
    print("\nVerdicts and findings per family (counts of passes)")
    short = {"coil_polarity_inverted": "inv", "coil_no_response": "open", "coil_gain_off": "gain",
             "command_latency": "lat", "command_mismatch": "cmd", "crosstalk_feedback": "chat",
             "rate_increasing": "rate+", "detumble_slow": "slow", "momentum_error_increasing": "h+",
             "momentum_dump_slow": "hslow", "gyro_dead": "gdead", "gyro_bias_jump": "gstep",
             "actuation_before_command": "acaus", "controller_saturated": "sat", "filter_inconsistent": "nis",
             "crosstalk_estimates_disagree": "kdis", "rate_history_biased": "rbias"}
    head = f"{'family':<20}{'n':>3}{'err':>4}{'asI':>5}{'not':>5}{'und':>5} "
    head += "".join(f"{short[c]:>6}" for c in SHOWN_CODES)
    print(head)
    for name, f in fig["families"].items():
        v = f["verdicts"]
        print(f"{name:<20}{f['passes']:>3}{f['errors']:>4}{v['as_intended']:>5}{v['not_as_intended']:>5}"
              f"{v['undetermined']:>5} " + "".join(f"{f['codes'][c]:>6}" for c in SHOWN_CODES))
    print(f"\nFalse alarms on healthy passes: {fa['alarms']} of {fa['passes']} "
          f"(rate {_fmt(fa['rate'])}, 95 % interval {_fmt(fa['ci95'][0])}-{_fmt(fa['ci95'][1])})"
          if fa["passes"] else "\nNo healthy pass drawn.")
    print(f"\n{'family':<20}{'detect':>8}{'95% CI':>14}{'att rms':>9}{'err/sig':>8}{'oracle':>8}{'rate':>8}"
          f"{'K rel':>7}{'K chi2/9':>9}{'s/pass':>7}")
    for name, f in fig["families"].items():
        ci = f.get("detection_ci95")
        det = f"{f['detected']}/{f['passes']}" if "detected" in f else f"fa {f['false_alarms']}"
        print(f"{name:<20}{det:>8}{(_fmt(ci[0]) + '-' + _fmt(ci[1])) if ci else '':>14}"
              f"{_fmt(f.get('attitude_rms_deg_median')):>9}{_fmt(f.get('error_over_sigma_median')):>8}"
              f"{_fmt(f.get('oracle_attitude_rms_deg_median')):>8}{_fmt(f.get('rate_rms_dps_median'), '.3f'):>8}"
              f"{_fmt(f.get('crosstalk_rel_error_median')):>7}"
              f"{_fmt(f.get('crosstalk_chi2_mean_per_dof'), '.1f'):>9}{f['seconds_mean']:>7.0f}")
        if "misalignment_error_deg_median" in f or "time_offset_abs_error_s_median" in f:
            print(f"{'':<20}misalignment |error| median {_fmt(f.get('misalignment_error_deg_median'), '.3f')} deg"
                  f" (max {_fmt(f.get('misalignment_error_deg_max'), '.3f')}, chi2/3 "
                  f"{_fmt(f.get('misalignment_chi2_mean_per_dof'), '.1f')}); time offset |error| median "
                  f"{_fmt(f.get('time_offset_abs_error_s_median'), '.3f')} s "
                  f"(max {_fmt(f.get('time_offset_abs_error_s_max'), '.3f')})")
        if "latency_abs_error_s" in f:
            le = f["latency_abs_error_s"]
            print(f"{'':<20}latency |error| median {_fmt(le['median'])} s, max {_fmt(le['max'])} s over {le['n']}")
    if old:
        print("\nAgainst the earlier run:")
        ofa = old["false_alarm"]
        print(f"  false-alarm rate {_fmt(ofa.get('rate'))} -> {_fmt(fa.get('rate'))}")
        for name, f in fig["families"].items():
            o = old["families"].get(name)
            if not o:
                continue
            for key in ("detection_rate", "attitude_rms_deg_median", "error_over_sigma_median"):
                if key in f or key in o:
                    print(f"  {name:<20}{key:<26}{_fmt(o.get(key)):>8} -> {_fmt(f.get(key)):>8}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=4, help="passes per family (default 4)")
    ap.add_argument("--families", default=",".join(FAMILIES), help="comma-separated family names")
    ap.add_argument("--seed-base", type=int, default=int(time.time()) % 100_000,
                    help="first seed (default: fresh, from the clock); pass i of family f (its place in the list "
                         "of families) uses seed-base + 1000 f + i")
    ap.add_argument("--duration", type=float, default=None, help="pass length, s (regime default otherwise)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--out", type=Path, default=Path("reports/scorecard.json"))
    ap.add_argument("--compare", type=Path, default=None, help="an earlier scorecard JSON to print beside")
    ap.add_argument("--oracle", action="store_true",
                    help="also run the same filter given the true calibration, alignment, time tags and inertia")
    a = ap.parse_args(argv)
    names = [s for s in a.families.split(",") if s]
    unknown = sorted(set(names) - set(FAMILIES))
    if unknown:
        print(f"bench_verdicts: unknown families {unknown}; known: {', '.join(FAMILIES)}", file=sys.stderr)
        return 2
    # every family draws its own seeds (seed base + 1000 x its place in FAMILIES + i), so families differ
    order = list(FAMILIES)
    jobs = [(FAMILIES[n], a.seed_base + 1000 * order.index(n) + i, a.duration, a.oracle) for n in names
            for i in range(a.n)]
    t0 = time.perf_counter()
    print(f"scorecard: {len(jobs)} passes ({a.n} per family, seeds from {a.seed_base}), {a.workers} workers")
    records = []
    with ProcessPoolExecutor(max_workers=a.workers) as pool:
        futs = [pool.submit(score_pass, *job) for job in jobs]
        for i, fut in enumerate(futs, 1):
            r = fut.result()
            records.append(r)
            print(f"  [{i}/{len(jobs)}] {r['family']} seed {r['seed']}: "
                  f"{r.get('error') or r['verdict'] + ' ' + ','.join(r['codes'])} ({r['seconds']:.0f} s)", flush=True)
    fig = figures(records)
    fig["seed_base"], fig["n_per_family"], fig["wall_s"] = a.seed_base, a.n, time.perf_counter() - t0
    old = json.loads(a.compare.read_text())["figures"] if a.compare else None
    print_figures(fig, old)
    a.out.parent.mkdir(parents=True, exist_ok=True)
    a.out.write_text(json.dumps({"figures": fig, "passes": records}, indent=1, default=float) + "\n")
    print(f"\nwall time {fig['wall_s']:.0f} s; figures and every pass's record in {a.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
