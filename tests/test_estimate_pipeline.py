"""The estimator behind the whole pipeline: simulated pass -> recon.pipeline.run_pass (load, clean,
orbit, IGRF-14, magnetometer calibration from the data, estimate), judged against the simulator's truth.

Scenario "gyro_bias_jump": the gyro x bias steps by +0.5 deg/s half-way through a 30-minute B-dot
detumble. The step must be reported once, on body x, with its size and time, and the rerun with the
bias free there must leave the filter consistent. Scenario "nominal": no step may be reported and the
filter must stay consistent. Both: attitude within 2 deg RMS after the first 10 minutes (a degree or
a few degrees is typical for magnetometer plus gyro on small satellites: common practice, no source).

The fast tests run the seeds that failed before the detector pooled its windows by information and
the opening attitude was searched from several starts: gyro_bias_jump 11 (no jump, filter_inconsistent,
15 deg RMS) and 14 (no jump and no warning at all, 72 deg RMS), nominal 11 and 19 (18 and 60 deg RMS,
no warning). The slow test runs seeds 11-20 of both scenarios.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.transform import Rotation

from recon.config import load_mission
from recon.pipeline import run_pass
from recon.simulate import simulate_pass

STEP_SIZE_TOL_DPS = 0.03    # the pooled step's 1-sigma is 0.006-0.008 deg/s (61-91 sigma for 0.5 deg/s): 4-5 sigma
STEP_INTERVAL_MAX_S = 4.0   # the reported interval is t +- 1 s (the slope and gyro-mean half width) or wider
ATT_RMS_MAX_DEG = 2.0       # see the module docstring
NIS_INSIDE = (0.93, 0.97)   # fraction of NIS inside its 95 % interval; measured 0.947-0.952 on all 20 passes


def _utc(text: str) -> np.datetime64:
    return np.datetime64(text.rstrip("Z"), "ns")


def _attitude_rms_deg(rep_dir, truth_dir, after_s: float) -> float:
    att = pd.read_csv(next(rep_dir.glob("*/attitude.csv")))
    tr = pd.read_csv(truth_dir / "truth.csv")
    ta = att["time_utc"].map(_utc).to_numpy().astype("datetime64[ns]").astype(np.int64)
    tt = tr["time_utc"].map(_utc).to_numpy().astype("datetime64[ns]").astype(np.int64)
    j = np.clip(np.searchsorted(tt, ta), 0, len(tt) - 1)
    same = tt[j] == ta
    q_est = att[["qx", "qy", "qz", "qw"]].to_numpy()[same]
    q_true = tr[["qx", "qy", "qz", "qw"]].to_numpy()[j[same]]
    err = np.rad2deg((Rotation.from_quat(q_est) * Rotation.from_quat(q_true).inv()).magnitude())
    late = (ta[same] - ta[0]) / 1e9 > after_s
    return float(np.sqrt(np.mean(err[late] ** 2)))


def _check_pass(scenario: str, seed: int, tmp_path) -> None:
    simulate_pass(scenario, seed=seed, out_dir=tmp_path / "pass")
    mission_path = tmp_path / "pass" / "mission.toml"
    res = run_pass(mission_path, tmp_path / "rep", report=False)
    truth = json.loads((tmp_path / "pass" / "truth" / "truth.json").read_text())
    est = res.summary["estimate"]
    assert est["mode"] == "gyro"
    anomalies = res.summary["anomalies"]
    codes = [a["code"] for a in anomalies]
    assert "filter_inconsistent" not in codes, anomalies
    lo, hi = NIS_INSIDE
    assert lo <= est["consistency"]["nis_fraction_inside_95"] <= hi
    jumps = [a for a in anomalies if a["code"] == "gyro_bias_jump"]
    faults = [f for f in truth["faults"] if f["kind"] == "gyro_bias_jump"]
    if not faults:
        assert jumps == [], jumps
    else:
        (fault,) = faults
        # the simulator states the step in gyro sensor axes: carry it into body axes
        m_stb = load_mission(mission_path).gyro.sensor_to_body
        s_ax = "xyz".index(fault["axis"])
        b_ax = int(np.argmax(np.abs(m_stb[:, s_ax])))
        size_dps = np.rad2deg(fault["value"]) * m_stb[b_ax, s_ax]
        assert len(jumps) == 1, jumps
        (jump,) = jumps
        assert jump["axis"] == "xyz"[b_ax]
        assert jump["value"] == pytest.approx(size_dps, abs=STEP_SIZE_TOL_DPS)
        t_true = _utc(fault["start_utc"])
        start, stop = _utc(jump["start_utc"]), _utc(jump["stop_utc"])
        assert start <= t_true <= stop, (jump["start_utc"], jump["stop_utc"], fault["start_utc"])
        assert (stop - start) / np.timedelta64(1, "s") <= STEP_INTERVAL_MAX_S
    att = _attitude_rms_deg(tmp_path / "rep", tmp_path / "pass" / "truth", 600.0)
    assert att <= ATT_RMS_MAX_DEG, att


@pytest.mark.parametrize("scenario, seed", [("gyro_bias_jump", 11), ("gyro_bias_jump", 14),
                                            ("nominal", 11), ("nominal", 19)])
def test_pipeline_bias_jump_and_nominal(scenario, seed, tmp_path):
    """Measured: jump 11 +0.510 deg/s in [898.6, 900.6] s, 0.50 deg RMS; jump 14 +0.499 deg/s in
    [899.6, 901.6] s, 0.30 deg RMS; nominal 11 0.53 deg and nominal 19 0.45 deg RMS, no anomaly from the
    estimator; NIS inside 0.950-0.952."""
    _check_pass(scenario, seed, tmp_path)


@pytest.mark.slow
@pytest.mark.parametrize("scenario", ["gyro_bias_jump", "nominal"])
@pytest.mark.parametrize("seed", range(11, 21))
def test_pipeline_bias_jump_and_nominal_ten_seeds(scenario, seed, tmp_path):
    """Measured on seeds 11-20: every jump on x, +0.491 to +0.511 deg/s, found at 899.6-900.6 s (true
    900 s) inside its reported interval; attitude 0.29-1.15 deg RMS after 10 min in both scenarios; NIS
    inside 0.947-0.952; no gyro_bias_jump or filter_inconsistent on any nominal pass. Before: jumps
    missed on seeds 11, 14 and 20, sizes 0.428-0.503, attitude 15-72 deg RMS on four of the twenty."""
    _check_pass(scenario, seed, tmp_path)
