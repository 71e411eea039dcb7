"""Turning a simulated pass into the files a ground station would hold, plus the truth.

Logs (each with its own clock, rate and units):

- ``mag.csv``: ``utc,mx,my,mz``; ISO 8601 UTC strings (ms), field in the sensor frame in
  ``mag_unit`` (uT by default), quantised to the sensor's step;
- ``gyro.csv``: ``obt,wx,wy,wz``; the onboard counter ``(t - epoch) * rate_hz`` modulo 2^32, rate
  in the sensor frame, deg/s;
- ``coils.csv``: ``t,ix_mA,iy_mA,iz_mA``; Unix seconds, the currents commanded at each control tick,
  mA;
- ``positions.csv`` (when the orbit comes as a position log): ``gps_s,x_m,y_m,z_m``; seconds since
  1980-01-06 on the GPS time scale, ITRF, metres.

``mission.toml`` describes them in recon's mission-file format. ``truth/truth.csv`` holds, at the
magnetometer instants (every ``truth_stride``-th):

====================================  =====================================================
``time_utc``, ``t_s``                 instant (ISO, UTC) and seconds since the pass epoch
``qx, qy, qz, qw``                    q_body_from_gcrf, scalar last
``wx_rad_s .. wz_rad_s``              body rate relative to GCRF, body frame
``gyro_bias_{x,y,z}_rad_s``           gyro bias in body axes (the bias term of the gyro
                                      sample, (beta_k + beta_k+1)/2, interpolated)
``b_igrf_gcrf_{x,y,z}_nT``            IGRF-14 main field, GCRF
``b_unmodelled_gcrf_{x,y,z}_nT``      the field left out of IGRF, GCRF
``b_body_{x,y,z}_nT``                 true total field (IGRF + unmodelled) in body axes
``i_true_{x,y,z}_A``                  current actually flowing in each coil
``i_logged_{x,y,z}_A``                latest logged command
``b_coil_sensor_{x,y,z}_nT``          coil field in the magnetometer reading (K i_true; zero
                                      with mag_sampling = "coils_off"), sensor frame
``m_body_{x,y,z}_Am2``                coil dipole, body frame
``tau_dist_body_{x,y,z}_Nm``          random disturbance torque, body frame
``r_gcrf_{x,y,z}_km``                 position, GCRF
====================================  =====================================================

``truth/truth.json`` holds the models (S, bias, K in the magnetometer frame; C), noise levels,
inertia, initial state, the fault list with windows and the ledger of injected data faults.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import erfa
import numpy as np

from ..core import GPS_EPOCH_UTC, NS_PER_S, NT_PER_UNIT, utc_texts
from .datafaults import inject

__all__ = ["render", "write_files", "TRUTH_COLUMNS", "FileFacts"]

DEG = math.pi / 180.0
TRUTH_COLUMNS = (["time_utc", "t_s", "qx", "qy", "qz", "qw", "wx_rad_s", "wy_rad_s", "wz_rad_s"]
                 + [f"gyro_bias_{a}_rad_s" for a in "xyz"] + [f"b_igrf_gcrf_{a}_nT" for a in "xyz"]
                 + [f"b_unmodelled_gcrf_{a}_nT" for a in "xyz"] + [f"b_body_{a}_nT" for a in "xyz"]
                 + [f"i_true_{a}_A" for a in "xyz"] + [f"i_logged_{a}_A" for a in "xyz"]
                 + [f"b_coil_sensor_{a}_nT" for a in "xyz"] + [f"m_body_{a}_Am2" for a in "xyz"]
                 + [f"tau_dist_body_{a}_Nm" for a in "xyz"] + [f"r_gcrf_{a}_km" for a in "xyz"])
_TRUTH_FMT = ",".join(["%s", "%.3f"] + ["%.12f"] * 4 + ["%.12e"] * 6 + ["%.4f"] * 9 + ["%.9f"] * 6
                      + ["%.4f"] * 3 + ["%.9f"] * 3 + ["%.6e"] * 3 + ["%.6f"] * 3)


def _seconds_text(ns: np.ndarray) -> list[str]:
    """Integer nanoseconds as seconds with 3 decimals, exactly (the instants lie on whole ms)."""
    s, r = np.divmod(np.asarray(ns, np.int64), NS_PER_S)
    return [f"{a}.{b // 1_000_000:03d}" for a, b in zip(s.tolist(), r.tolist(), strict=True)]


def _num(x) -> str:
    return repr(float(x))


def _mat(m) -> str:
    return "[" + ", ".join("[" + ", ".join(_num(v) for v in row) + "]" for row in np.asarray(m)) + "]"


def _vec(v) -> str:
    return "[" + ", ".join(_num(x) for x in np.asarray(v).ravel()) + "]"


def _decimals(lsb: float) -> int:
    return 3 if lsb <= 0 else max(0, math.ceil(-math.log10(lsb) - 1e-9))


def gyro_tick_epoch(cfg, t0: np.datetime64, step_ns: int) -> tuple[np.datetime64, int | None]:
    """Counter epoch; with ``gyro_rollover_mid_pass`` chosen so the 32-bit counter wraps half-way
    through the pass (the wrap instant is returned as ns since the pass epoch), else the first day of
    the pass's month. Both lie on whole seconds."""
    if cfg.gyro_rollover_mid_pass:
        span = (2 ** 32) * step_ns
        t_wrap = int(cfg.duration_s // 2) * NS_PER_S + span % NS_PER_S
        return t0 + np.timedelta64(t_wrap - span, "ns"), t_wrap
    return np.datetime64(np.datetime64(t0, "M"), "ns"), None


@dataclass
class FileFacts:
    """What writing the files decided that the truth must record.

    Attributes
    ----------
    gyro_tick_epoch_utc : str or None, the gyro counter's epoch (UTC text)
    gyro_rollover_utc : str or None, when the counter wraps (UTC text)
    gps_minus_utc_s : float or None, GPS - UTC of a position log's stamps, s
    """

    gyro_tick_epoch_utc: str | None = None
    gyro_rollover_utc: str | None = None
    gps_minus_utc_s: float | None = None


def render(sim, cfg, scenario: str, seed: int, pass_id: str) -> tuple[dict[str, str], list[dict], dict]:
    """File texts (name -> text), the data-fault ledger and the facts of the files for truth.json."""
    t0 = sim.t0_utc
    rng = sim.rng_data
    plan = cfg.data_faults or {}
    texts, ledger, facts = {}, [], FileFacts()
    t_mag_utc = t0 + sim.t_mag_ns.astype("timedelta64[ns]")
    # the magnetometer's stamps are late (or early) by its time-tag offset; the truth keeps true instants
    offset = np.timedelta64(int(round(sim.imperfections.mag_time_offset_s * NS_PER_S)), "ns")

    # magnetometer
    f = NT_PER_UNIT[cfg.mag_unit]
    dec = _decimals(cfg.mag_lsb_nT / f)

    def fmt_mag(t, v):
        return f"{t},{v[0] + 0.0:.{dec}f},{v[1] + 0.0:.{dec}f},{v[2] + 0.0:.{dec}f}"

    lines, led = inject("mag.csv", "utc,mx,my,mz", utc_texts(t_mag_utc + offset), sim.b_meas_nT / f, fmt_mag,
                        plan.get("mag.csv", {}), rng, columns=("mx", "my", "mz"),
                        full_scale=cfg.mag_full_scale_nT / f, spike_size=20_000.0 / f, time_utc=t_mag_utc + offset)
    texts["mag.csv"], ledger = "\n".join(lines) + "\n", ledger + led

    # gyro
    if cfg.gyro:
        step = int(round(NS_PER_S / cfg.gyro_rate_hz))
        epoch, t_wrap = gyro_tick_epoch(cfg, t0, step)
        t_g = sim.t_gyro_ns
        counts = ((t0 - epoch).astype("timedelta64[ns]").astype(np.int64) + t_g) // step % (2 ** 32)
        keep = [] if t_wrap is None else [int(np.searchsorted(t_g, t_wrap))]
        facts.gyro_tick_epoch_utc = np.datetime_as_string(epoch, unit="s") + "Z"
        facts.gyro_rollover_utc = (None if t_wrap is None else
                                      np.datetime_as_string(t0 + np.timedelta64(t_wrap, "ns"), unit="ms") + "Z")

        def fmt_gyro(t, v):
            return f"{t},{v[0] + 0.0:.6f},{v[1] + 0.0:.6f},{v[2] + 0.0:.6f}"

        lines, led = inject("gyro.csv", "obt,wx,wy,wz", [str(c) for c in counts.tolist()],
                            sim.w_meas_rad_s / DEG, fmt_gyro, plan.get("gyro.csv", {}), rng,
                            columns=("wx", "wy", "wz"), full_scale=cfg.gyro_full_scale_deg_s, spike_size=30.0,
                            time_utc=t0 + t_g.astype("timedelta64[ns]"), keep_out=keep)
        texts["gyro.csv"], ledger = "\n".join(lines) + "\n", ledger + led

    # coils
    unix_ns = (t0 + sim.coil_log_ns.astype("timedelta64[ns]")).astype("datetime64[ns]").astype(np.int64)

    def fmt_coil(t, v):
        return f"{t},{v[0] + 0.0:.3f},{v[1] + 0.0:.3f},{v[2] + 0.0:.3f}"

    lines, led = inject("coils.csv", "t,ix_mA,iy_mA,iz_mA", _seconds_text(unix_ns), sim.i_cmd_A * 1e3,
                        fmt_coil, plan.get("coils.csv", {}), rng, columns=("ix_mA", "iy_mA", "iz_mA"),
                        time_utc=t0 + sim.coil_log_ns.astype("timedelta64[ns]"))
    texts["coils.csv"], ledger = "\n".join(lines) + "\n", ledger + led

    # positions
    if sim.positions is not None:
        t_pos, r_m = sim.positions
        utc = t0 + t_pos.astype("timedelta64[ns]")
        d = str(np.datetime64(t0, "D")).split("-")
        tai_utc = float(erfa.dat(int(d[0]), int(d[1]), int(d[2]), 0.0))  # leap seconds (IERS table)
        gps_ns = (utc - np.datetime64(GPS_EPOCH_UTC, "ns")).astype(np.int64) + int(round((tai_utc - 19.0) * NS_PER_S))
        rows = [f"{t},{x:.2f},{y:.2f},{z:.2f}" for t, (x, y, z) in zip(_seconds_text(gps_ns), r_m.tolist(),
                                                                          strict=True)]
        texts["positions.csv"] = "gps_s,x_m,y_m,z_m\n" + "\n".join(rows) + "\n"
        facts.gps_minus_utc_s = tai_utc - 19.0

    texts["mission.toml"] = _mission(sim, cfg, scenario, seed, pass_id, facts)
    stride = max(1, int(cfg.truth_stride))
    texts["truth/truth.csv"] = _truth_csv(sim, t_mag_utc, stride)
    ledger.sort(key=lambda e: (e["file"], e["line"]))
    return texts, ledger, facts


def _mission(sim, cfg, scenario, seed, pass_id, facts) -> str:
    f = NT_PER_UNIT[cfg.mag_unit]
    out = [f"# Simulated pass of recon's invented demo satellite (scenario {scenario!r}, seed {seed}).",
           "# Written by recon.simulate; the truth behind it is in truth/.", "",
           "[pass]", f'id = "{pass_id}"', "",
           "[spacecraft]", f"inertia_kg_m2 = {_mat(cfg.inertia_kg_m2)}", "", "[orbit]"]
    if sim.positions is None:
        out.append(f'tle = ["{sim.mission_tle[0]}",\n       "{sim.mission_tle[1]}"]')
    else:
        out.append('positions = { file = "positions.csv", time = { column = "gps_s", format = "gps" }, '
                   'columns = ["x_m", "y_m", "z_m"], frame = "itrf", unit = "m" }')
    out += ["", "[magnetometer]", 'file = "mag.csv"', 'time = { column = "utc", format = "iso" }',
            'columns = ["mx", "my", "mz"]', f'unit = "{cfg.mag_unit}"',
            f"sensor_to_body = {_mat(cfg.mag_sensor_to_body)}", f"full_scale = {_num(cfg.mag_full_scale_nT / f)}",
            f"noise = {_num(cfg.mag_noise_nT / f)}"]
    if cfg.gyro:
        out += ["", "[gyro]", 'file = "gyro.csv"',
                f'time = {{ column = "obt", format = "ticks", epoch = "{facts.gyro_tick_epoch_utc}", '
                f"rate_hz = {_num(cfg.gyro_rate_hz)}, rollover_bits = 32 }}",
                'columns = ["wx", "wy", "wz"]', 'unit = "deg/s"',
                f"sensor_to_body = {_mat(cfg.gyro_sensor_to_body)}",
                f"full_scale = {_num(cfg.gyro_full_scale_deg_s)}",
                f"noise = {_num(cfg.gyro_arw_deg_sqrt_s)}          # angle random walk, deg/s per sqrt(Hz)",
                f"bias_walk = {_num(cfg.gyro_bias_walk_deg_s_sqrt_s)}     # deg/s per sqrt(s)"]
    out += ["", "[coils]", 'file = "coils.csv"', 'time = { column = "t", format = "unix" }',
            'columns = ["ix_mA", "iy_mA", "iz_mA"]', 'unit = "mA"',
            f"max_current_A = {_vec(cfg.coil_max_current_A)}",
            f"dipole_per_amp = {_mat(cfg.coil_dipole_per_amp_nominal)}   # A m^2 per A, nominal",
            f'mag_sampling = "{cfg.mag_sampling}"']
    if cfg.mag_sampling == "windowed":
        out.append(f"off_window_s = {_vec(cfg.off_window_s)}")
    first = sim.t0_utc + np.timedelta64(int(round(cfg.first_tick_offset_s * NS_PER_S)), "ns")
    out += ["", "[controller]", f'law = "{cfg.law}"', f"gain = {_num(cfg.gain)}",
            f"period_s = {_num(cfg.period_s)}", f'first_tick = "{np.datetime_as_string(first, unit="ms")}Z"']
    if cfg.law == "cross_product":
        out.append(f"target_momentum_Nms = {_vec(sim.target_momentum_Nms)}")
    return "\n".join(out) + "\n"


def _truth_csv(sim, t_mag_utc, stride: int) -> str:
    sl = slice(None, None, stride)
    cols = [sim.t_mag_ns[sl] / NS_PER_S, sim.q[sl], sim.w[sl], sim.gyro_bias_body_rad_s[sl],
            sim.b_igrf_gcrf_nT[sl], sim.b_unmodelled_gcrf_nT[sl], sim.b_body_nT[sl],
            sim.i_true_A[sl], sim.i_logged_A[sl], sim.b_coil_sensor_nT[sl], sim.m_body_Am2[sl],
            sim.tau_dist_Nm[sl], sim.r_gcrf_km[sl]]
    arr = np.column_stack(cols) + 0.0
    times = utc_texts(t_mag_utc[sl])
    rows = [_TRUTH_FMT % (t, *row) for t, row in zip(times, arr.tolist(), strict=True)]
    return ",".join(TRUTH_COLUMNS) + "\n" + "\n".join(rows) + "\n"


def _json(obj, indent: int = 0) -> str:
    """JSON with one key per line; vectors, matrices and ledger rows each on one line."""
    pad = " " * (indent + 1)
    if isinstance(obj, dict) and obj:
        items = [f"{pad}{json.dumps(k)}: {_json(v, indent + 1)}" for k, v in obj.items()]
        return "{\n" + ",\n".join(items) + "\n" + " " * indent + "}"
    if isinstance(obj, list) and obj and all(isinstance(v, dict) for v in obj):
        return "[\n" + ",\n".join(pad + json.dumps(v) for v in obj) + "\n" + " " * indent + "]"
    return json.dumps(obj)


def write_files(texts: dict[str, str], truth: dict, out_dir: str | Path) -> dict[str, Path]:
    """Write every text and truth/truth.json under ``out_dir``; returns name -> path."""
    out = Path(out_dir)
    (out / "truth").mkdir(parents=True, exist_ok=True)
    paths = {}
    for name, text in texts.items():
        p = out / name
        p.write_bytes(text.encode("utf-8"))
        paths[name] = p
    p = out / "truth" / "truth.json"
    p.write_bytes((_json(truth) + "\n").encode("utf-8"))
    paths["truth/truth.json"] = p
    return paths
