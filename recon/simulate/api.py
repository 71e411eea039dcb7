"""``simulate_pass``: one simulated pass with known truth, in memory and optionally on disk."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..core import NS_PER_S, __version__, utc_text
from .engine import run_simulation
from .environment import Environment
from .scenarios import SimConfig, scenario_config
from .sensors import GyroNoise, MagnetometerHardware
from .writer import FileFacts, render, write_files

__all__ = ["SimulatedPass", "simulate_pass"]



@dataclass(frozen=True, eq=False)
class SimulatedPass:
    """A simulated pass: the truth, what the sensors reported, and the written files.

    Arrays at the magnetometer instants ``time_utc`` (N,) unless said otherwise; all before any data
    fault (data faults exist only in the files and are listed in ``data_faults``).

    Attributes
    ----------
    scenario, seed, config, pass_id
    time_utc : (N,) datetime64[ns], UTC; ``t_s`` (N,) seconds since the pass epoch
    q_body_from_gcrf : (N, 4) scalar last; w_body_rad_s : (N, 3) body frame
    gyro_bias_body_rad_s : (N, 3) body axes
    b_igrf_gcrf_nT, b_unmodelled_gcrf_nT : (N, 3) GCRF; b_body_nT : (N, 3) true total field, body
    b_meas_sensor_nT : (N, 3) what the magnetometer reported (sensor frame, quantised, clipped)
    i_true_A, i_logged_A : (N, 3) current flowing / latest logged command
    b_coil_sensor_nT : (N, 3) coil field in the magnetometer reading (K i_true, zero when the
        coils are gated at every sample, "coils_off"), sensor frame; m_body_Am2 : (N, 3)
    tau_dist_body_Nm : (N, 3); r_gcrf_km : (N, 3)
    gyro_time_utc : (G,) ; w_gyro_true_body_rad_s : (G, 3); w_gyro_meas_sensor_rad_s : (G, 3) before
        file rounding; gyro_beta_sensor_rad_s : (G + 1, 3) the bias path beta_0..beta_G
    tick_time_utc : (K,) control ticks; i_cmd_A : (K, 3) commanded (= logged) currents
    magnetometer : MagnetometerHardware (S, bias, K in the sensor frame); gyro : GyroNoise
    C_nominal, C_hardware : (3, 3) A m^2 per A; C_effective, K_effective_nT_per_A : per logged amp
        while the coil faults are active; inertia_kg_m2 : (3, 3)
    environment : Environment; tle : (str, str)
    faults : list of dict; data_faults : list of dict (file, 1-based line, kind, ...)
    truth : dict, the content of truth/truth.json
    texts : dict name -> file text; paths : dict name -> Path (empty unless written)
    """

    scenario: str
    seed: int
    config: SimConfig
    pass_id: str
    time_utc: np.ndarray
    t_s: np.ndarray
    q_body_from_gcrf: np.ndarray
    w_body_rad_s: np.ndarray
    gyro_bias_body_rad_s: np.ndarray
    b_igrf_gcrf_nT: np.ndarray
    b_unmodelled_gcrf_nT: np.ndarray
    b_body_nT: np.ndarray
    b_meas_sensor_nT: np.ndarray
    i_true_A: np.ndarray
    i_logged_A: np.ndarray
    b_coil_sensor_nT: np.ndarray
    m_body_Am2: np.ndarray
    tau_dist_body_Nm: np.ndarray
    r_gcrf_km: np.ndarray
    gyro_time_utc: np.ndarray
    w_gyro_true_body_rad_s: np.ndarray
    w_gyro_meas_sensor_rad_s: np.ndarray
    gyro_beta_sensor_rad_s: np.ndarray
    tick_time_utc: np.ndarray
    i_cmd_A: np.ndarray
    magnetometer: MagnetometerHardware
    gyro: GyroNoise
    C_nominal: np.ndarray
    C_hardware: np.ndarray
    C_effective: np.ndarray
    K_effective_nT_per_A: np.ndarray
    inertia_kg_m2: np.ndarray
    environment: Environment
    tle: tuple[str, str]
    faults: list
    data_faults: list
    truth: dict
    texts: dict = field(repr=False)
    paths: dict = field(default_factory=dict)


def _fault_records(cfg: SimConfig, t0: np.datetime64) -> list[dict]:
    notes = {
        "coil_polarity_inverted": "current (so dipole and crosstalk) of this coil reversed; log unchanged",
        "coil_dead": "no current flows in this coil whatever is commanded; log unchanged",
        "coil_gain_off": "this coil carries value x the commanded current; log unchanged",
        "command_latency": "currents flow value seconds after the logged command time",
        "gyro_dead": "gyro output held at value rad/s (null: stuck at its last good output)",
        "gyro_bias_jump": "gyro bias (sensor frame) of this axis steps by value rad/s",
    }
    out = []
    for f in cfg.faults:
        start = t0 + np.timedelta64(int(round((f.start_s or 0.0) * NS_PER_S)), "ns")
        stop = t0 + np.timedelta64(int(round((cfg.duration_s if f.stop_s is None else f.stop_s) * NS_PER_S)), "ns")
        out.append({"kind": f.kind, "axis": None if f.axis is None else "xyz"[f.axis],
                    "frame": "sensor" if f.kind.startswith("gyro") else "body",
                    "start_utc": utc_text(start), "stop_utc": utc_text(stop), "value": f.value, "note": notes[f.kind]})
    return out


def _effective(C_hw: np.ndarray, K: np.ndarray, cfg: SimConfig) -> tuple[np.ndarray, np.ndarray, list]:
    g = np.ones(3)
    for f in cfg.faults:
        factor = {"coil_polarity_inverted": -1.0, "coil_dead": 0.0, "coil_gain_off": f.value}.get(f.kind)
        if factor is None:
            continue
        for ax in ([0, 1, 2] if f.axis is None else [f.axis]):
            g[ax] *= factor
    return C_hw * g, K * g, g.tolist()


def simulate_pass(scenario: str = "nominal", seed: int = 0, out_dir: str | Path | None = None,
                  duration_s: float | None = None, **overrides: Any) -> SimulatedPass:
    """Simulate one pass of the invented demo satellite with known truth.

    Parameters
    ----------
    scenario : str
        A name from :func:`list_scenarios`.
    seed : int
        Seeds every random draw: the same seed gives byte-identical files.
    out_dir : str or Path, optional
        Where to write mission.toml, the logs and truth/ (created if needed).
    duration_s : float, optional
        Pass length, s (scenario default otherwise).
    **overrides
        Any :class:`SimConfig` setting, e.g. ``mag_noise_nT=0.0``, ``gravity_gradient=False``,
        ``faults=[{"kind": "coil_dead", "axis": 0}]``.

    Returns
    -------
    SimulatedPass

    Raises
    ------
    InputError
        Unknown scenario or setting, or settings the simulator cannot honour.
    """
    cfg = scenario_config(scenario, duration_s, **overrides)
    seed = int(seed)
    sim = run_simulation(cfg, seed)
    pass_id = f"sim-{scenario}-seed{seed}"
    texts, ledger, facts = render(sim, cfg, scenario, seed, pass_id)
    t0 = sim.t0_utc
    mag: MagnetometerHardware = sim.mag
    gyro: GyroNoise = sim.gyro
    C_eff, K_eff, gains = _effective(sim.C_hw, mag.K_nT_per_A, cfg)
    faults = _fault_records(cfg, t0)
    truth = _truth_record(cfg, sim, scenario, seed, pass_id, facts, faults, ledger, texts, (C_eff, K_eff, gains))
    t_mag = t0 + sim.t_mag_ns.astype("timedelta64[ns]")
    result = SimulatedPass(
        scenario=scenario, seed=seed, config=cfg, pass_id=pass_id, time_utc=t_mag, t_s=sim.t_mag_ns / NS_PER_S,
        q_body_from_gcrf=sim.q, w_body_rad_s=sim.w, gyro_bias_body_rad_s=sim.gyro_bias_body_rad_s,
        b_igrf_gcrf_nT=sim.b_igrf_gcrf_nT, b_unmodelled_gcrf_nT=sim.b_unmodelled_gcrf_nT,
        b_body_nT=sim.b_body_nT, b_meas_sensor_nT=sim.b_meas_nT, i_true_A=sim.i_true_A,
        i_logged_A=sim.i_logged_A, b_coil_sensor_nT=sim.b_coil_sensor_nT, m_body_Am2=sim.m_body_Am2,
        tau_dist_body_Nm=sim.tau_dist_Nm, r_gcrf_km=sim.r_gcrf_km,
        gyro_time_utc=t0 + sim.t_gyro_ns.astype("timedelta64[ns]"),
        w_gyro_true_body_rad_s=sim.w_gyro_true, w_gyro_meas_sensor_rad_s=sim.w_meas_rad_s,
        gyro_beta_sensor_rad_s=sim.gyro_beta, tick_time_utc=t0 + sim.ticks_ns.astype("timedelta64[ns]"),
        i_cmd_A=sim.i_cmd_A, magnetometer=mag, gyro=gyro, C_nominal=sim.C_nominal, C_hardware=sim.C_hw,
        C_effective=C_eff, K_effective_nT_per_A=K_eff, inertia_kg_m2=sim.inertia, environment=sim.env,
        tle=sim.tle, faults=faults, data_faults=ledger, truth=truth, texts=texts)
    if out_dir is not None:
        paths = write_files(texts, truth, out_dir)
        result = dataclasses.replace(result, paths=paths)
    return result


def _truth_record(cfg: SimConfig, sim, scenario: str, seed: int, pass_id: str, facts: FileFacts, faults: list,
                  ledger: list, texts: dict, effective: tuple) -> dict:
    """The content of truth/truth.json."""
    C_eff, K_eff, gains = effective
    t0 = sim.t0_utc
    return {
        "scenario": scenario, "seed": seed, "description": cfg.description, "pass_id": pass_id,
        "generator": f"recon.simulate (recon {__version__})",
        "pass_epoch_utc": utc_text(t0), "duration_s": cfg.duration_s,
        "conventions": {
            "quaternion": "q_body_from_gcrf, scalar last [x, y, z, w]: A(q) v_gcrf = v_body",
            "magnetometer": "b_meas = S (M^T b_body) + bias + K i_true + noise, all in the magnetometer "
                            "sensor frame; M = sensor_to_body (v_body = M v_sensor); quantised, clipped",
            "gyro": "w_meas = M^T w_body + (beta_k + beta_k+1)/2 + white noise, sensor frame (Reynolds 2003)",
            "coils": "m_body = C_hardware i_true; i_true = current flowing; C_effective and K_effective "
                     "are per logged amp while the coil faults are active",
        },
        "spacecraft": {"inertia_kg_m2": np.asarray(cfg.inertia_kg_m2).tolist(),
                       "inertia_true_kg_m2": sim.inertia.tolist(),
                       "residual_dipole_Am2": sim.imperfections.residual_dipole_Am2.tolist()},
        "imperfections": {"flight_like": cfg.imperfections is not None, **sim.imperfections.to_truth()},
        "orbit": {"source": cfg.orbit_source, "tle": list(sim.tle), "tle_in_mission_file": list(sim.mission_tle),
                  "positions_noise_m": cfg.positions_noise_m if cfg.orbit_source == "positions" else None,
                  **({"gps_minus_utc_s": facts.gps_minus_utc_s} if facts.gps_minus_utc_s is not None else {})},
        "environment": {"field_model": "IGRF-14 (ppigrf), coefficients at the pass epoch",
                        "unmodelled_rms_nT": cfg.unmodelled_rms_nT,
                        "unmodelled_terms_gcrf": sim.env.unmodelled_terms,
                        "gravity_gradient": cfg.gravity_gradient,
                        "disturbance_sigma_Nm": cfg.disturbance_sigma_Nm,
                        "disturbance_correlation_s": cfg.disturbance_correlation_s},
        "initial_state": {"q_body_from_gcrf": sim.q0.tolist(), "w_body_rad_s": sim.w0.tolist()},
        "magnetometer": {"frame": "sensor", "sensor_to_body": sim.mag.sensor_to_body.tolist(),
                         "S": sim.mag.S.tolist(), "S_full": sim.mag.S_full.tolist(),
                         "misalignment_body_deg": np.rad2deg(sim.imperfections.mag_misalignment_rad).tolist(),
                         "time_offset_s": sim.imperfections.mag_time_offset_s,
                         "bias_nT": sim.mag.bias_nT.tolist(), "K_nT_per_A": K_eff.tolist(),
                         "K_nT_per_A_hardware": sim.mag.K_nT_per_A.tolist(), "noise_nT": sim.mag.noise_nT,
                         "lsb_nT": sim.mag.lsb_nT, "full_scale_nT": sim.mag.full_scale_nT,
                         "rate_hz": cfg.mag_rate_hz,
                         "unit_in_file": cfg.mag_unit},
        "gyro": None if not cfg.gyro else {
            "frame": "sensor", "sensor_to_body": sim.gyro.sensor_to_body.tolist(),
            "arw_rad_sqrt_s": sim.gyro.arw_rad_sqrt_s, "bias_walk_rad_s_sqrt_s": sim.gyro.rrw_rad_s_sqrt_s,
            "initial_bias_sensor_rad_s": sim.gyro.bias0_rad_s.tolist(),
            "full_scale_rad_s": sim.gyro.full_scale_rad_s,
            "rate_hz": cfg.gyro_rate_hz, "tick_epoch_utc": facts.gyro_tick_epoch_utc,
            "rollover_utc": facts.gyro_rollover_utc, "file_resolution_deg_s": 1e-6,
            "scale_misalignment": sim.imperfections.gyro_scale_misalignment.tolist()},
        "coils": {"C_A_m2_per_A_nominal": sim.C_nominal.tolist(), "C_A_m2_per_A_true": C_eff.tolist(),
                  "C_A_m2_per_A_hardware": sim.C_hw.tolist(), "current_factor_per_axis": gains,
                  "max_current_A": list(cfg.coil_max_current_A), "mag_sampling": cfg.mag_sampling,
                  "off_window_s": list(cfg.off_window_s) if cfg.mag_sampling == "windowed" else None,
                  "latency_s": sim.latency_ns / NS_PER_S, "command_resolution_A": 1e-6,
                  "log_phase_s": sim.imperfections.coil_log_phase_s},
        "controller": {"law": cfg.law, "gain": cfg.gain, "period_s": cfg.period_s,
                       "first_tick_utc": utc_text(t0 + np.timedelta64(int(round(cfg.first_tick_offset_s * NS_PER_S)),
                                                                      "ns")),
                       "target_momentum_Nms": sim.target_momentum_Nms.tolist() if cfg.law == "cross_product" else None,
                       "onboard": "raw readings turned to body axes with the nominal mounting only; "
                                  "B-dot differences consecutive tick samples"},
        "faults": faults,
        "data_faults": ledger,
        "file_lines": {name: text.count("\n") for name, text in texts.items()},
    }
