"""The closed-loop pass simulation: dynamics, sensors, onboard controller and coils, tick by tick.

Timing
------
All instants are integer nanoseconds since the pass epoch, so that sample, tick and window times
compare exactly. The magnetometer samples every ``1/mag_rate_hz`` from the epoch, the gyro every
``1/gyro_rate_hz``; control ticks fall at ``first_tick + k period_s`` and each has a magnetometer
sample at the tick itself (the "tick sample" the controller uses).

At tick k the controller reads the tick sample (B-dot: with the previous tick sample; cross-product:
with the latest gyro sample) and commands currents. Those flow from ``t_k + latency`` until the next
command takes over, except inside the coil-off windows ``[t_j - before, t_j + after]`` of
``mag_sampling = "windowed"``. With ``"coils_off"`` only the magnetometer samples are shielded from
the coil field (the millisecond gating does not change the torque); with ``"coils_on"`` every sample
sees it. A sample at instant t sees the commands issued strictly before ``t - latency``.

Coil faults act on the current actually flowing: polarity inverted (x -1), dead (x 0) and gain off
(x value) on one axis within their window, so the dipole ``C_hw i`` and the crosstalk ``K i`` follow
the same current.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial.transform import Rotation

from ..core import NS_PER_S, InputError, body_from_gcrf, in_off_window, q_from_rotation
from .controller import bdot_dipole_Am2, cross_product_dipole_Am2, currents_from_dipole_A
from .dynamics import propagate
from .environment import build_environment, invented_tle, orbit_positions_km
from .sensors import GyroNoise, draw_magnetometer, gyro_bias_path, gyro_reading_rad_s, magnetometer_reading_nT

__all__ = ["run_simulation"]

DEG = np.pi / 180.0
COIL_FAULTS = ("coil_polarity_inverted", "coil_dead", "coil_gain_off")


def _step_ns(rate_hz: float, key: str) -> int:
    step = NS_PER_S / rate_hz
    if not rate_hz > 0 or abs(step - round(step)) > 1e-6:
        raise InputError(f"expected a rate giving a whole number of nanoseconds per sample, got {rate_hz!r}",
                         key=key)
    return int(round(step))


def _window_ns(f, dur_ns: int) -> tuple[int, int]:
    a = 0 if f.start_s is None else int(round(f.start_s * NS_PER_S))
    b = dur_ns + 1 if f.stop_s is None else int(round(f.stop_s * NS_PER_S))
    return a, b


def _coil_gain(t_ns: np.ndarray, faults, dur_ns: int) -> np.ndarray:
    """Factor on each coil's current (N, 3) from the coil faults active at each instant."""
    g = np.ones((len(t_ns), 3))
    for f in faults:
        if f.kind not in COIL_FAULTS:
            continue
        a, b = _window_ns(f, dur_ns)
        on = (t_ns >= a) & (t_ns < b)
        factor = {"coil_polarity_inverted": -1.0, "coil_dead": 0.0}.get(f.kind, f.value)
        axes = [0, 1, 2] if f.axis is None else [f.axis]
        for ax in axes:
            g[on, ax] *= factor
    return g


def _hardware(cfg, rng: np.random.Generator):
    M_mag = np.asarray(cfg.mag_sensor_to_body, float)
    diag = cfg.mag_crosstalk_body_diag_nT_per_A
    mag = draw_magnetometer(rng, M_mag, noise_nT=cfg.mag_noise_nT, lsb_nT=cfg.mag_lsb_nT,
                            full_scale_nT=cfg.mag_full_scale_nT, soft_iron_sigma=cfg.mag_soft_iron_sigma,
                            bias_range_nT=tuple(cfg.mag_bias_range_nT),
                            crosstalk_range_nT_per_A=tuple(cfg.mag_crosstalk_range_nT_per_A),
                            crosstalk_body_diag_nT_per_A=None if diag is None else np.asarray(diag, float))
    C_nom = np.asarray(cfg.coil_dipole_per_amp_nominal, float)
    tilt = Rotation.from_rotvec(rng.normal(0.0, cfg.coil_misalignment_sigma_rad, 3)).as_matrix()
    C_hw = tilt @ C_nom @ np.diag(1.0 + rng.normal(0.0, cfg.coil_gain_error_sigma, 3))
    gyro = GyroNoise(np.asarray(cfg.gyro_sensor_to_body, float), cfg.gyro_arw_deg_sqrt_s * DEG,
                     cfg.gyro_bias_walk_deg_s_sqrt_s * DEG, rng.normal(0.0, cfg.gyro_bias0_sigma_deg_s * DEG, 3),
                     cfg.gyro_full_scale_deg_s * DEG)
    return mag, C_nom, C_hw, gyro


def _disturbance(cfg, n: int, rng: np.random.Generator) -> np.ndarray:
    """First-order Gauss-Markov torque per control interval, N m, body frame (n, 3)."""
    a = np.exp(-cfg.period_s / cfg.disturbance_correlation_s) if cfg.disturbance_correlation_s > 0 else 0.0
    z = rng.standard_normal((max(n, 1), 3))
    tau = np.empty_like(z)
    tau[0] = cfg.disturbance_sigma_Nm * z[0]
    for k in range(1, len(z)):
        tau[k] = a * tau[k - 1] + np.sqrt(1.0 - a * a) * cfg.disturbance_sigma_Nm * z[k]
    return tau


def run_simulation(cfg, seed: int) -> dict:
    """Simulate one pass; returns a dict of arrays and models (see :class:`SimulatedPass`)."""
    streams = np.random.SeedSequence(seed).spawn(8)
    rng_hw, rng_field, rng_init, rng_dist, rng_mag, rng_gyro, rng_pos, rng_data = (
        np.random.default_rng(s) for s in streams)
    t0 = np.datetime64(cfg.start_utc, "ns")
    dur_ns = int(round(cfg.duration_s * NS_PER_S))
    mag_step = _step_ns(cfg.mag_rate_hz, "mag_rate_hz")
    gyro_step = _step_ns(cfg.gyro_rate_hz, "gyro_rate_hz")
    period = int(round(cfg.period_s * NS_PER_S))
    first = int(round(cfg.first_tick_offset_s * NS_PER_S))
    if period % mag_step or first % mag_step or period <= 0 or first < 0:
        raise InputError(f"expected period_s and first_tick_offset_s to be whole multiples of the "
                         f"magnetometer step {mag_step / NS_PER_S} s, got {cfg.period_s} and {cfg.first_tick_offset_s}",
                         key="period_s")
    if cfg.law == "cross_product" and not cfg.gyro:
        raise InputError("expected gyro = True with law = \"cross_product\" (the law needs the rate), "
                         "got gyro = False", key="gyro")
    t_mag = np.arange(0, dur_ns, mag_step, dtype=np.int64)
    t_gyro = np.arange(0, dur_ns, gyro_step, dtype=np.int64) if cfg.gyro else np.zeros(0, np.int64)
    ticks = np.arange(first, dur_ns, period, dtype=np.int64)
    end = int(max(t_mag[-1], t_gyro[-1] if len(t_gyro) else 0))

    tle = tuple(cfg.tle) if cfg.tle is not None else invented_tle()
    env = build_environment(tle, t0, cfg.duration_s, rng_field, cfg.unmodelled_rms_nT)
    mag, C_nom, C_hw, gyro = _hardware(cfg, rng_hw)
    J = np.asarray(cfg.inertia_kg_m2, float)
    imax = np.asarray(cfg.coil_max_current_A, float)

    # initial state
    rot0 = Rotation.random(random_state=rng_init)
    direction = rng_init.normal(size=3)
    q0 = (np.asarray(cfg.q0_body_from_gcrf, float) if cfg.q0_body_from_gcrf is not None
          else q_from_rotation(rot0))
    w0 = (np.asarray(cfg.w0_body_deg_s, float) * DEG if cfg.w0_body_deg_s is not None
          else direction / np.linalg.norm(direction) * cfg.tumble_deg_s * DEG)

    # latency and windows
    latency = sum(int(round(f.value * NS_PER_S)) for f in cfg.faults if f.kind == "command_latency")
    windowed = cfg.mag_sampling == "windowed"
    before, after = (int(round(cfg.off_window_s[0] * NS_PER_S)), int(round(cfg.off_window_s[1] * NS_PER_S))) \
        if windowed else (0, 0)

    # event grid: samples, ticks, switch instants, fault edges
    parts = [np.array([0, end], np.int64), t_mag, t_gyro, ticks, ticks + latency]
    if windowed:
        parts += [ticks - before, ticks + after]
    for f in cfg.faults:
        if f.kind in COIL_FAULTS:
            parts.append(np.array(_window_ns(f, dur_ns), np.int64))
    ev = np.unique(np.concatenate(parts))
    ev = ev[(ev >= 0) & (ev <= end)]
    mid = (ev[:-1] + ev[1:]) // 2
    seg_cmd = np.searchsorted(ticks + latency, mid, side="right") - 1
    seg_on = ~in_off_window(mid, ticks, before, after) if windowed else np.ones(len(mid), bool)
    seg_gain = _coil_gain(mid, cfg.faults, dur_ns) * seg_on[:, None]
    seg_int = np.maximum(np.searchsorted(ticks, ev[:-1], side="right") - 1, 0)
    tau_dist = _disturbance(cfg, len(ticks), rng_dist)
    seg_tau = tau_dist[np.minimum(seg_int, len(tau_dist) - 1)]
    seg_m = np.zeros((len(mid), 3))

    # the current flowing at each magnetometer instant (commands issued strictly before t - latency)
    # and the part of it the magnetometer sees
    i_idx = np.searchsorted(ticks + latency, t_mag, side="left") - 1
    i_gain = _coil_gain(t_mag, cfg.faults, dur_ns)
    if windowed:
        i_gain = i_gain * (~in_off_window(t_mag, ticks, before, after))[:, None]
    seen_factor = 0.0 if cfg.mag_sampling == "coils_off" else 1.0

    b_true_gcrf_nT, r_gcrf_km_mag = env.interpolate(t_mag / NS_PER_S)
    noise_mag = rng_mag.standard_normal((len(t_mag), 3))
    walk = rng_gyro.standard_normal((len(t_gyro), 3))
    white = rng_gyro.standard_normal((len(t_gyro), 3))
    dt_g = gyro_step / NS_PER_S
    jumps = [(int(np.searchsorted(t_gyro, int(round((f.start_s or 0.0) * NS_PER_S)))), ax, f.value)
             for f in cfg.faults if f.kind == "gyro_bias_jump"
             for ax in ([0, 1, 2] if f.axis is None else [f.axis])]
    beta = gyro_bias_path(gyro, len(t_gyro), dt_g, walk, jumps) if cfg.gyro else np.zeros((1, 3))

    ev_mag = np.searchsorted(ev, t_mag)
    ev_gyro = np.searchsorted(ev, t_gyro)
    ev_tick = np.searchsorted(ev, ticks)
    tick_mag = np.searchsorted(t_mag, ticks)  # the tick sample (exists: ticks lie on the mag grid)
    states = np.empty((len(ev), 7))
    states[0] = np.concatenate([q0 / np.linalg.norm(q0), w0])
    cmd = np.zeros((len(ticks), 3))
    b_body = np.zeros((len(t_mag), 3))
    b_meas = np.zeros((len(t_mag), 3))
    i_true = np.zeros((len(t_mag), 3))
    w_meas = np.zeros((len(t_gyro), 3))
    done_ev, done_mag, done_gyro = 0, 0, 0
    dead = [f for f in cfg.faults if f.kind == "gyro_dead"]

    for k in range(len(ticks) + 1):
        stop_ev = ev_tick[k] if k < len(ticks) else len(ev) - 1
        if stop_ev > done_ev:
            sl = slice(done_ev, stop_ev)
            current = np.where(seg_cmd[sl, None] >= 0, cmd[np.maximum(seg_cmd[sl], 0)], 0.0) * seg_gain[sl]
            seg_m[sl] = current @ C_hw.T
            q, w = propagate(states[done_ev, :4], states[done_ev, 4:], J, ev[done_ev:stop_ev + 1] / NS_PER_S,
                             seg_m[sl], seg_tau[sl], env, cfg.gravity_gradient, cfg.max_step_s)
            states[done_ev + 1:stop_ev + 1, :4] = q[1:]
            states[done_ev + 1:stop_ev + 1, 4:] = w[1:]
            done_ev = stop_ev
        # sensors up to the instant reached
        nm = int(np.searchsorted(t_mag, ev[done_ev], side="right"))
        if nm > done_mag:
            sl = slice(done_mag, nm)
            st = states[ev_mag[sl]]
            b_body[sl] = body_from_gcrf(st[:, :4], b_true_gcrf_nT[sl])
            c = np.where(i_idx[sl, None] >= 0, cmd[np.maximum(i_idx[sl], 0)], 0.0)
            i_true[sl] = c * i_gain[sl]
            b_meas[sl] = magnetometer_reading_nT(mag, b_body[sl], seen_factor * i_true[sl], noise_mag[sl])
            done_mag = nm
        ng = int(np.searchsorted(t_gyro, ev[done_ev], side="right"))
        if ng > done_gyro:
            sl = slice(done_gyro, ng)
            w_meas[sl] = gyro_reading_rad_s(gyro, states[ev_gyro[sl], 4:], beta[done_gyro:ng + 1], dt_g,
                                            white[sl])
            for f in dead:
                a, b = _window_ns(f, dur_ns)
                idx = np.arange(done_gyro, ng)
                hit = idx[(t_gyro[idx] >= a) & (t_gyro[idx] < b)]
                if len(hit):
                    k0 = int(np.searchsorted(t_gyro, a))
                    stuck = w_meas[k0 - 1] if (f.value is None and k0 > 0) else np.zeros(3)
                    value = stuck if f.value is None else np.full(3, f.value)
                    axes = [0, 1, 2] if f.axis is None else [f.axis]
                    w_meas[np.ix_(hit, axes)] = value[axes]
            done_gyro = ng
        if k == len(ticks):
            break
        # onboard controller at tick k
        j = tick_mag[k]
        b_now = mag.sensor_to_body @ b_meas[j]
        if cfg.law == "bdot" and k > 0:
            jp = tick_mag[k - 1]
            m = bdot_dipole_Am2(b_now, mag.sensor_to_body @ b_meas[jp], (t_mag[j] - t_mag[jp]) / NS_PER_S, cfg.gain)
        elif cfg.law == "cross_product" and done_gyro > 0:
            w_onboard = gyro.sensor_to_body @ w_meas[done_gyro - 1]
            m = cross_product_dipole_Am2(J @ w_onboard, np.asarray(cfg.target_momentum_Nms, float), b_now,
                                         cfg.gain)
        else:
            m = np.zeros(3)
        cmd[k] = currents_from_dipole_A(m, C_nom, imax)

    # truth at the magnetometer instants
    g_eff = 0.5 * (beta[1:] + beta[:-1]) if cfg.gyro else np.zeros((0, 3))
    bias_body = (np.column_stack([np.interp(t_mag, t_gyro, g_eff[:, a]) for a in range(3)]) @ gyro.sensor_to_body.T
                 if cfg.gyro else np.zeros((len(t_mag), 3)))
    logged_idx = np.searchsorted(ticks, t_mag, side="right") - 1
    i_logged = np.where(logged_idx[:, None] >= 0, cmd[np.maximum(logged_idx, 0)], 0.0)
    b_igrf, b_unm = env.components(t_mag / NS_PER_S)
    tau_mag = tau_dist[np.minimum(np.maximum(np.searchsorted(ticks, t_mag, side="right") - 1, 0),
                                  len(tau_dist) - 1)]
    positions = None
    if cfg.orbit_source == "positions":
        t_pos = np.arange(0, dur_ns, _step_ns(cfg.positions_rate_hz, "positions_rate_hz"), dtype=np.int64)
        _, r_itrf = orbit_positions_km(tle, t0 + t_pos.astype("timedelta64[ns]"))
        positions = (t_pos, r_itrf * 1e3 + rng_pos.normal(0.0, cfg.positions_noise_m, r_itrf.shape))
    elif cfg.orbit_source != "tle":
        raise InputError(f"expected orbit_source 'tle' or 'positions', got {cfg.orbit_source!r}",
                         key="orbit_source")

    return dict(
        t0_utc=t0, tle=tle, env=env, mag=mag, gyro=gyro, C_nominal=C_nom, C_hw=C_hw, inertia=J,
        q0=states[0, :4].copy(), w0=w0, t_mag_ns=t_mag, t_gyro_ns=t_gyro, ticks_ns=ticks,
        latency_ns=latency, q=states[ev_mag, :4], w=states[ev_mag, 4:], w_gyro_true=states[ev_gyro, 4:],
        b_body_nT=b_body, b_meas_nT=b_meas, i_true_A=i_true, i_logged_A=i_logged, i_cmd_A=cmd,
        b_coil_sensor_nT=seen_factor * (i_true @ mag.K_nT_per_A.T), m_body_Am2=i_true @ C_hw.T, tau_dist_Nm=tau_mag,
        b_igrf_gcrf_nT=b_igrf, b_unmodelled_gcrf_nT=b_unm, r_gcrf_km=r_gcrf_km_mag,
        w_meas_rad_s=w_meas, gyro_beta=beta, gyro_bias_body_rad_s=bias_body, positions=positions,
        rng_data=rng_data, t_events_ns=ev, states_events=states,
    )

