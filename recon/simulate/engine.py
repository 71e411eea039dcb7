"""The closed-loop pass simulation: dynamics, sensors, onboard controller and coils, tick by tick.

At tick k the controller reads the tick sample (B-dot: with the previous tick sample; cross-product:
with the latest gyro sample) and commands currents. Those flow from ``t_k + latency`` until the next
command takes over, except inside the coil-off windows ``[t_j - before, t_j + after]`` of
``mag_sampling = "windowed"``. With ``"coils_off"`` only the magnetometer samples are shielded from
the coil field (the millisecond gating does not change the torque); with ``"coils_on"`` every sample
sees it. A sample at instant t sees the commands issued strictly before ``t - latency``. The clock
and the segments between events are in :mod:`recon.simulate.timeline`.

Coil faults act on the current actually flowing: polarity inverted (x -1), dead (x 0) and gain off
(x value) on one axis within their window, so the dipole ``C_hw i`` and the crosstalk ``K i`` follow
the same current.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy.spatial.transform import Rotation

from ..core import NS_PER_S, RAD_PER_DEG, InputError, body_from_gcrf, in_off_window, q_from_rotation
from .controller import bdot_dipole_Am2, cross_product_dipole_Am2, currents_from_dipole_A
from .dynamics import propagate
from .environment import Environment, aged_tle, build_environment, invented_tle, orbit_positions_km
from .imperfections import DrawnImperfections, draw_imperfections, ideal_imperfections
from .sensors import (
    GyroNoise,
    MagnetometerHardware,
    draw_magnetometer,
    gyro_bias_path,
    gyro_reading_rad_s,
    magnetometer_reading_nT,
)
from .timeline import Segments, Timeline, coil_gain, fault_window_ns, on_window_s, segments, step_ns, timeline

__all__ = ["SimulationRun", "run_simulation"]


@dataclass(frozen=True)
class SimulationRun:
    """Everything one simulated pass produced, before it is written to files.

    Arrays are at the magnetometer instants ``t_mag_ns`` (N,) unless said otherwise.

    Attributes
    ----------
    t0_utc : datetime64[ns], the pass epoch; tle : (str, str); env : Environment
    mag : MagnetometerHardware; gyro : GyroNoise; C_nominal, C_hw : (3, 3) A m^2 per A; inertia : (3, 3)
    q0 : (4,), w0 : (3,) initial state
    t_mag_ns, t_gyro_ns, ticks_ns : int64 instants since the epoch; latency_ns : int
    q : (N, 4); w : (N, 3); w_gyro_true : (G, 3) true rate at the gyro instants
    b_body_nT, b_meas_nT : (N, 3) true body field and the reading (sensor frame)
    i_true_A, i_logged_A : (N, 3); i_cmd_A : (K, 3) commands; b_coil_sensor_nT, m_body_Am2 : (N, 3)
    tau_dist_Nm : (N, 3); b_igrf_gcrf_nT, b_unmodelled_gcrf_nT, r_gcrf_km : (N, 3)
    w_meas_rad_s : (G, 3) gyro output (sensor frame); gyro_beta : (G + 1, 3) its bias path
    gyro_bias_body_rad_s : (N, 3); positions : (t_ns, r_itrf_m) of a position log, or None
    rng_data : the random stream reserved for data faults
    t_events_ns : (E,), states_events : (E, 7) the integrated state at every event
    imperfections : DrawnImperfections of this pass
    mission_tle : (str, str), the element set written to the mission file (older than ``tle`` when the
        TLE-age imperfection is on)
    coil_log_ns : (K,) instants the coil log is written, ns since the epoch
    target_momentum_Nms : (3,) the cross-product law's target in this pass, body frame
    """

    t0_utc: np.datetime64
    tle: tuple[str, str]
    env: Environment
    mag: MagnetometerHardware
    gyro: GyroNoise
    C_nominal: np.ndarray
    C_hw: np.ndarray
    inertia: np.ndarray
    q0: np.ndarray
    w0: np.ndarray
    t_mag_ns: np.ndarray
    t_gyro_ns: np.ndarray
    ticks_ns: np.ndarray
    latency_ns: int
    q: np.ndarray
    w: np.ndarray
    w_gyro_true: np.ndarray
    b_body_nT: np.ndarray
    b_meas_nT: np.ndarray
    i_true_A: np.ndarray
    i_logged_A: np.ndarray
    i_cmd_A: np.ndarray
    b_coil_sensor_nT: np.ndarray
    m_body_Am2: np.ndarray
    tau_dist_Nm: np.ndarray
    b_igrf_gcrf_nT: np.ndarray
    b_unmodelled_gcrf_nT: np.ndarray
    r_gcrf_km: np.ndarray
    w_meas_rad_s: np.ndarray
    gyro_beta: np.ndarray
    gyro_bias_body_rad_s: np.ndarray
    positions: tuple[np.ndarray, np.ndarray] | None
    rng_data: np.random.Generator
    t_events_ns: np.ndarray
    states_events: np.ndarray
    imperfections: DrawnImperfections
    mission_tle: tuple[str, str]
    coil_log_ns: np.ndarray
    target_momentum_Nms: np.ndarray


def _hardware(cfg, rng: np.random.Generator, drawn: DrawnImperfections):
    M_mag = np.asarray(cfg.mag_sensor_to_body, float)
    diag = cfg.mag_crosstalk_body_diag_nT_per_A
    mag = draw_magnetometer(rng, M_mag, noise_nT=cfg.mag_noise_nT, lsb_nT=cfg.mag_lsb_nT,
                            full_scale_nT=cfg.mag_full_scale_nT, soft_iron_sigma=cfg.mag_soft_iron_sigma,
                            bias_range_nT=tuple(cfg.mag_bias_range_nT),
                            crosstalk_range_nT_per_A=tuple(cfg.mag_crosstalk_range_nT_per_A),
                            crosstalk_body_diag_nT_per_A=None if diag is None else np.asarray(diag, float))
    if np.any(drawn.mag_misalignment_rad):
        mag = dataclasses.replace(mag, misalignment_body=Rotation.from_rotvec(drawn.mag_misalignment_rad).as_matrix())
    if cfg.mag_bias_nT is not None:
        bias = np.asarray(cfg.mag_bias_nT, float)
        if bias.shape != (3,) or not np.all(np.isfinite(bias)):
            raise InputError(f"expected 3 finite numbers (nT), got {cfg.mag_bias_nT!r}", key="mag_bias_nT")
        mag = dataclasses.replace(mag, bias_nT=bias)
    C_nom = np.asarray(cfg.coil_dipole_per_amp_nominal, float)
    tilt = Rotation.from_rotvec(rng.normal(0.0, cfg.coil_misalignment_sigma_rad, 3)).as_matrix()
    C_hw = tilt @ C_nom @ np.diag(1.0 + rng.normal(0.0, cfg.coil_gain_error_sigma, 3))
    gyro = GyroNoise(np.asarray(cfg.gyro_sensor_to_body, float), cfg.gyro_arw_deg_sqrt_s * RAD_PER_DEG,
                     cfg.gyro_bias_walk_deg_s_sqrt_s * RAD_PER_DEG,
                     rng.normal(0.0, cfg.gyro_bias0_sigma_deg_s * RAD_PER_DEG, 3),
                     cfg.gyro_full_scale_deg_s * RAD_PER_DEG,
                     drawn.gyro_scale_misalignment if np.any(drawn.gyro_scale_misalignment) else None)
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


def _initial_state(cfg, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Attitude (random unless given), body rate and the cross-product target momentum.

    The rate is ``tumble_deg_s`` (or drawn in ``tumble_range_deg_s``) in a random direction unless
    given; with ``target_rate_range_deg_s`` the target is a spin about the axis of largest nominal
    inertia and the pass starts off it by a drawn fraction of its rate, in a random direction.
    """
    rot0 = Rotation.random(random_state=rng)
    direction = rng.normal(size=3)
    q0 = (np.asarray(cfg.q0_body_from_gcrf, float) if cfg.q0_body_from_gcrf is not None
          else q_from_rotation(rot0))
    rate = cfg.tumble_deg_s if cfg.tumble_range_deg_s is None else rng.uniform(*cfg.tumble_range_deg_s)
    w0 = (np.asarray(cfg.w0_body_deg_s, float) * RAD_PER_DEG if cfg.w0_body_deg_s is not None
          else direction / np.linalg.norm(direction) * rate * RAD_PER_DEG)
    target = np.asarray(cfg.target_momentum_Nms, float)
    if cfg.target_rate_range_deg_s is not None:
        J = np.asarray(cfg.inertia_kg_m2, float)
        lam, vec = np.linalg.eigh(J)
        spin = vec[:, -1] * rng.uniform(*cfg.target_rate_range_deg_s) * rng.choice([-1.0, 1.0]) * RAD_PER_DEG
        target = J @ spin
        offset = rng.normal(size=3)
        w0 = spin + offset / np.linalg.norm(offset) * rng.uniform(*cfg.target_offset_fraction) * np.linalg.norm(spin)
    return q0, w0, target


def _gyro_jumps(cfg, t_gyro: np.ndarray) -> list[tuple[int, int, float]]:
    return [(int(np.searchsorted(t_gyro, int(round((f.start_s or 0.0) * NS_PER_S)))), ax, f.value)
            for f in cfg.faults if f.kind == "gyro_bias_jump"
            for ax in ([0, 1, 2] if f.axis is None else [f.axis])]


class _ClosedLoop:
    """The pass advanced tick by tick: integrate to the tick, sample the sensors up to it, command."""

    def __init__(self, cfg, tl: Timeline, seg: Segments, env: Environment, hardware, tau_dist: np.ndarray,
                 state0: np.ndarray, draws: tuple[np.ndarray, np.ndarray, np.ndarray],
                 drawn: DrawnImperfections, target_momentum_Nms: np.ndarray):
        self.cfg, self.tl, self.seg, self.env, self.tau_dist = cfg, tl, seg, env, tau_dist
        self.mag, self.C_nom, self.C_hw, self.gyro = hardware
        self.J_nominal = np.asarray(cfg.inertia_kg_m2, float)  # what the onboard software believes
        self.J = drawn.inertia_true_kg_m2                       # what flies
        self.m_residual = drawn.residual_dipole_Am2
        self.drawn, self.drawn_phase_s = drawn, drawn.coil_log_phase_s
        self.target = np.asarray(target_momentum_Nms, float)
        self.imax = np.asarray(cfg.coil_max_current_A, float)
        noise_mag, walk, white = draws
        self.noise_mag, self.white = noise_mag, white
        self.dt_g = tl.gyro_step / NS_PER_S
        self.beta = (gyro_bias_path(self.gyro, len(tl.t_gyro), self.dt_g, walk, _gyro_jumps(cfg, tl.t_gyro))
                     if cfg.gyro else np.zeros((1, 3)))
        ev = seg.ev
        self.ev_mag, self.ev_gyro = np.searchsorted(ev, tl.t_mag), np.searchsorted(ev, tl.t_gyro)
        self.ev_tick = np.searchsorted(ev, tl.ticks)
        self.tick_mag = np.searchsorted(tl.t_mag, tl.ticks)  # the tick sample (ticks lie on the mag grid)
        self.states = np.empty((len(ev), 7))
        self.states[0] = state0
        self.seg_m = np.zeros((len(seg.mid), 3))
        self.seg_tau = tau_dist[np.minimum(seg.tau_index, len(tau_dist) - 1)]
        # the current at each magnetometer instant (commands issued strictly before t - latency)
        self.i_idx = np.searchsorted(tl.ticks + tl.latency, tl.t_mag, side="left") - 1
        self.i_gain = coil_gain(tl.t_mag, cfg.faults, tl.duration_ns)
        if tl.windowed:
            self.i_gain = self.i_gain * (~in_off_window(tl.t_mag, tl.ticks, tl.before, tl.after))[:, None]
        self.seen_factor = 0.0 if cfg.mag_sampling == "coils_off" else 1.0
        self.b_true_gcrf_nT, self.r_gcrf_km = env.interpolate(tl.t_mag / NS_PER_S)
        self.cmd = np.zeros((len(tl.ticks), 3))
        n, g = len(tl.t_mag), len(tl.t_gyro)
        self.b_body, self.b_meas, self.i_true = np.zeros((n, 3)), np.zeros((n, 3)), np.zeros((n, 3))
        self.w_meas = np.zeros((g, 3))
        self.done_ev = self.done_mag = self.done_gyro = 0

    def run(self) -> None:
        for k in range(len(self.tl.ticks) + 1):
            last = k == len(self.tl.ticks)
            self._integrate_to(len(self.seg.ev) - 1 if last else int(self.ev_tick[k]))
            self._sample_magnetometer()
            self._sample_gyro()
            if last:
                break
            self.cmd[k] = self._command(k)

    def _integrate_to(self, stop_ev: int) -> None:
        a = self.done_ev
        if stop_ev <= a:
            return
        sl = slice(a, stop_ev)
        c = self.seg.cmd[sl]
        current = np.where(c[:, None] >= 0, self.cmd[np.maximum(c, 0)], 0.0) * self.seg.gain[sl]
        self.seg_m[sl] = current @ self.C_hw.T + self.m_residual
        q, w = propagate(self.states[a, :4], self.states[a, 4:], self.J, self.seg.ev[a:stop_ev + 1] / NS_PER_S,
                         self.seg_m[sl], self.seg_tau[sl], self.env, self.cfg.gravity_gradient, self.cfg.max_step_s)
        self.states[a + 1:stop_ev + 1, :4] = q[1:]
        self.states[a + 1:stop_ev + 1, 4:] = w[1:]
        self.done_ev = stop_ev

    def _sample_magnetometer(self) -> None:
        nm = int(np.searchsorted(self.tl.t_mag, self.seg.ev[self.done_ev], side="right"))
        if nm <= self.done_mag:
            return
        sl = slice(self.done_mag, nm)
        st = self.states[self.ev_mag[sl]]
        self.b_body[sl] = body_from_gcrf(st[:, :4], self.b_true_gcrf_nT[sl])
        c = np.where(self.i_idx[sl, None] >= 0, self.cmd[np.maximum(self.i_idx[sl], 0)], 0.0)
        self.i_true[sl] = c * self.i_gain[sl]
        self.b_meas[sl] = magnetometer_reading_nT(self.mag, self.b_body[sl], self.seen_factor * self.i_true[sl],
                                                  self.noise_mag[sl])
        self.done_mag = nm

    def _sample_gyro(self) -> None:
        t_gyro = self.tl.t_gyro
        ng = int(np.searchsorted(t_gyro, self.seg.ev[self.done_ev], side="right"))
        if ng <= self.done_gyro:
            return
        a = self.done_gyro
        self.w_meas[a:ng] = gyro_reading_rad_s(self.gyro, self.states[self.ev_gyro[a:ng], 4:], self.beta[a:ng + 1],
                                               self.dt_g, self.white[a:ng])
        for f in (f for f in self.cfg.faults if f.kind == "gyro_dead"):
            lo, hi = fault_window_ns(f, self.tl.duration_ns)
            idx = np.arange(a, ng)
            hit = idx[(t_gyro[idx] >= lo) & (t_gyro[idx] < hi)]
            if len(hit):
                k0 = int(np.searchsorted(t_gyro, lo))
                stuck = self.w_meas[k0 - 1] if (f.value is None and k0 > 0) else np.zeros(3)
                value = stuck if f.value is None else np.full(3, f.value)
                axes = [0, 1, 2] if f.axis is None else [f.axis]
                self.w_meas[np.ix_(hit, axes)] = value[axes]
        self.done_gyro = ng

    def _command(self, k: int) -> np.ndarray:
        """The onboard controller at tick k: the law on the raw readings, in nominal body axes."""
        cfg, t_mag = self.cfg, self.tl.t_mag
        j = self.tick_mag[k]
        b_now = self.mag.sensor_to_body @ self.b_meas[j]
        if cfg.law == "bdot" and k > 0:
            jp = self.tick_mag[k - 1]
            m = bdot_dipole_Am2(b_now, self.mag.sensor_to_body @ self.b_meas[jp], (t_mag[j] - t_mag[jp]) / NS_PER_S,
                                cfg.gain)
        elif cfg.law == "cross_product" and self.done_gyro > 0:
            w_onboard = self.gyro.sensor_to_body @ self.w_meas[self.done_gyro - 1]
            m = cross_product_dipole_Am2(self.J_nominal @ w_onboard, self.target, b_now, cfg.gain)
        else:
            m = np.zeros(3)
        return currents_from_dipole_A(m, self.C_nom, self.imax)


def _positions_log(cfg, tle, t0, tl: Timeline, rng: np.random.Generator):
    """A GNSS-like ITRF position log (m, with noise) for ``orbit_source = "positions"``, else None."""
    if cfg.orbit_source == "positions":
        t_pos = np.arange(0, tl.duration_ns, step_ns(cfg.positions_rate_hz, "positions_rate_hz"), dtype=np.int64)
        _, r_itrf = orbit_positions_km(tle, t0 + t_pos.astype("timedelta64[ns]"))
        return t_pos, r_itrf * 1e3 + rng.normal(0.0, cfg.positions_noise_m, r_itrf.shape)
    if cfg.orbit_source != "tle":
        raise InputError(f"expected orbit_source 'tle' or 'positions', got {cfg.orbit_source!r}",
                         key="orbit_source")
    return None


def run_simulation(cfg, seed: int) -> SimulationRun:
    """Simulate one pass (see :class:`SimulationRun`); every random draw comes from ``seed``."""
    streams = np.random.SeedSequence(seed).spawn(9)
    rng_hw, rng_field, rng_init, rng_dist, rng_mag, rng_gyro, rng_pos, rng_data, rng_imp = (
        np.random.default_rng(s) for s in streams)
    if cfg.hardware_seed is not None:  # the hardware of the pass simulated with seed hardware_seed
        rng_hw = np.random.default_rng(np.random.SeedSequence(int(cfg.hardware_seed)).spawn(9)[0])
    t0 = np.datetime64(cfg.start_utc, "ns")
    drawn = (draw_imperfections(cfg.imperfections, cfg.inertia_kg_m2, on_window_s(cfg), rng_imp)
             if cfg.imperfections is not None else ideal_imperfections(cfg.inertia_kg_m2, cfg.unmodelled_rms_nT))
    tl = timeline(cfg, drawn.actuation_latency_s)
    tle = tuple(cfg.tle) if cfg.tle is not None else invented_tle()
    env = build_environment(tle, t0, cfg.duration_s, rng_field, drawn.unmodelled_rms_nT,
                            correlated_fraction=drawn.unmodelled_correlated_fraction,
                            correlation_s=drawn.unmodelled_correlation_s or 300.0)
    hardware = _hardware(cfg, rng_hw, drawn)
    q0, w0, target = _initial_state(cfg, rng_init)
    seg = segments(cfg, tl)
    tau_dist = _disturbance(cfg, len(tl.ticks), rng_dist)
    draws = (rng_mag.standard_normal((len(tl.t_mag), 3)), rng_gyro.standard_normal((len(tl.t_gyro), 3)),
             rng_gyro.standard_normal((len(tl.t_gyro), 3)))
    loop = _ClosedLoop(cfg, tl, seg, env, hardware, tau_dist, np.concatenate([q0 / np.linalg.norm(q0), w0]), draws,
                       drawn, target)
    loop.run()
    mission_tle = aged_tle(tle, drawn.tle_along_track_km, drawn.tle_drift_km_per_orbit, t0) \
        if (drawn.tle_along_track_km or drawn.tle_drift_km_per_orbit) else tle
    return _assemble(cfg, t0, tle, env, tl, loop, w0, tau_dist, _positions_log(cfg, tle, t0, tl, rng_pos), rng_data,
                     mission_tle)


def _assemble(cfg, t0, tle, env, tl: Timeline, loop: _ClosedLoop, w0, tau_dist, positions, rng_data,
              mission_tle) -> SimulationRun:
    """The truth at the magnetometer instants, from the loop's state and sensor arrays."""
    t_mag, t_gyro, ticks = tl.t_mag, tl.t_gyro, tl.ticks
    gyro, mag, beta = loop.gyro, loop.mag, loop.beta
    g_eff = 0.5 * (beta[1:] + beta[:-1]) if cfg.gyro else np.zeros((0, 3))
    bias_body = (np.column_stack([np.interp(t_mag, t_gyro, g_eff[:, a]) for a in range(3)]) @ gyro.sensor_to_body.T
                 if cfg.gyro else np.zeros((len(t_mag), 3)))
    coil_log = ticks + int(round(loop.drawn_phase_s * NS_PER_S))
    logged_idx = np.searchsorted(coil_log, t_mag, side="right") - 1
    i_logged = np.where(logged_idx[:, None] >= 0, loop.cmd[np.maximum(logged_idx, 0)], 0.0)
    b_igrf, b_unm = env.components(t_mag / NS_PER_S)
    tau_mag = tau_dist[np.minimum(np.maximum(np.searchsorted(ticks, t_mag, side="right") - 1, 0),
                                  len(tau_dist) - 1)]
    states, ev_mag = loop.states, loop.ev_mag
    return SimulationRun(
        t0_utc=t0, tle=tle, env=env, mag=mag, gyro=gyro, C_nominal=loop.C_nom, C_hw=loop.C_hw, inertia=loop.J,
        q0=states[0, :4].copy(), w0=w0, t_mag_ns=t_mag, t_gyro_ns=t_gyro, ticks_ns=ticks,
        latency_ns=tl.latency, q=states[ev_mag, :4], w=states[ev_mag, 4:], w_gyro_true=states[loop.ev_gyro, 4:],
        b_body_nT=loop.b_body, b_meas_nT=loop.b_meas, i_true_A=loop.i_true, i_logged_A=i_logged, i_cmd_A=loop.cmd,
        b_coil_sensor_nT=loop.seen_factor * (loop.i_true @ mag.K_nT_per_A.T), m_body_Am2=loop.i_true @ loop.C_hw.T,
        tau_dist_Nm=tau_mag, b_igrf_gcrf_nT=b_igrf, b_unmodelled_gcrf_nT=b_unm, r_gcrf_km=loop.r_gcrf_km,
        w_meas_rad_s=loop.w_meas, gyro_beta=beta, gyro_bias_body_rad_s=bias_body, positions=positions,
        rng_data=rng_data, t_events_ns=loop.seg.ev, states_events=states, imperfections=loop.drawn,
        mission_tle=mission_tle, coil_log_ns=coil_log, target_momentum_Nms=loop.target)
