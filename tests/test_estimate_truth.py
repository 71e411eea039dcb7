"""Synthetic truth for the estimator tests, and checks that the truth itself is right.

An invented satellite on a circular 510 km, 97.4 deg orbit; the reference field is a tilted dipole
turning with the Earth (24-48 uT at that height), the "real" field adds a smooth unmodelled part of
about 100 nT rms, the body tumbles under Euler's equations (optionally with a B-dot dipole held
over 1 s ticks and gravity gradient), integrated here with scipy's DOP853, independently of recon's
compiled propagator. The gyro follows the discrete model of Reynolds (2003), NASA CP-2003-212246,
with each sample the mean rate over the interval it is held for; the magnetometer adds white noise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp
from scipy.spatial.transform import Rotation

MU_km3_s2 = 398600.4418  # WGS-84 (NIMA TR8350.2 table 3.1)
R_ORBIT_km = 6378.137 + 510.0
EQ_FIELD_nT = 30000.0  # equatorial surface dipole field, round figure (memory: about 30 uT)
OMEGA_EARTH_rad_s = 7.292115e-5  # IERS Conventions 2010
INERTIA = np.array([[0.021, 0.0004, 0.0], [0.0004, 0.023, 0.0002], [0.0, 0.0002, 0.0071]])
T0_UTC = np.datetime64("2026-07-14T09:12:00", "ns")


@dataclass
class Truth:
    t_mag_utc: np.ndarray
    b_body_nT: np.ndarray       # measured, noisy
    b_ref_gcrf_nT: np.ndarray   # the model field recon is given
    b_true_gcrf_nT: np.ndarray  # model + unmodelled
    r_gcrf_km: np.ndarray
    q_true: np.ndarray          # at magnetometer times
    w_true: np.ndarray          # at magnetometer times, rad/s body
    t_gyro_utc: np.ndarray
    w_gyro: np.ndarray
    bias_at_mag: np.ndarray     # rad/s, at magnetometer times
    coil_t_utc: np.ndarray | None
    i_coil_A: np.ndarray | None
    dipole_per_amp: np.ndarray


def _orbit(t):
    n = np.sqrt(MU_km3_s2 / R_ORBIT_km ** 3)
    inc, raan = np.deg2rad(97.4), np.deg2rad(40.0)
    u = n * t + 0.3
    x = np.stack([np.cos(u), np.sin(u), np.zeros_like(u)], axis=-1)
    rot = Rotation.from_euler("ZX", [raan, inc])
    return R_ORBIT_km * rot.apply(x)


def _dipole(t, r_km):
    tilt = np.deg2rad(10.0)
    m0 = np.array([np.sin(tilt), 0.0, -np.cos(tilt)])
    ang = OMEGA_EARTH_rad_s * t + 1.1
    c, s = np.cos(ang), np.sin(ang)
    m = np.stack([c * m0[0] - s * m0[1], s * m0[0] + c * m0[1], np.full_like(t, m0[2])], axis=-1)
    rn = np.linalg.norm(r_km, axis=-1, keepdims=True)
    rh = r_km / rn
    k = EQ_FIELD_nT * (6371.2 / rn) ** 3
    return -k * (3.0 * np.sum(m * rh, axis=-1, keepdims=True) * rh - m)


def _unmodelled(t, rng, rms_nT):
    a = rng.normal(size=(4, 3))
    om = 2 * np.pi / rng.uniform(900.0, 3600.0, 4)
    ph = rng.uniform(0, 2 * np.pi, 4)
    b = np.sin(np.outer(t, om) + ph) @ a
    return b * (rms_nT / np.sqrt(np.mean(np.sum(b ** 2, axis=1))))


def _rhs_factory(inertia, dipole_fn, with_gg):
    jinv = np.linalg.inv(inertia)

    def rhs(t, y):
        q, w = y[:4], y[4:]
        a = Rotation.from_quat(q).as_matrix()
        tau = np.zeros(3)
        if dipole_fn is not None:
            r = _orbit(np.array([t]))[0]
            b_body_T = a @ _dipole(np.array([t]), r[None])[0] * 1e-9
            tau += np.cross(dipole_fn(t), b_body_T)
            if with_gg:
                rb = a @ r
                rn = np.linalg.norm(rb)
                tau += 3.0 * MU_km3_s2 * 1e9 / (rn * 1e3) ** 3 * np.cross(rb / rn, inertia @ (rb / rn))
        wdot = jinv @ (tau - np.cross(w, inertia @ w))
        x, yv, z, s = q
        # dq/dt = -1/2 (w, 0) (x) q, Hamilton, scalar last
        pw = -0.5 * w
        qdot = np.array([pw[0] * s + pw[1] * z - pw[2] * yv,
                         pw[1] * s + pw[2] * x - pw[0] * z,
                         pw[2] * s + pw[0] * yv - pw[1] * x,
                         -(pw[0] * x + pw[1] * yv + pw[2] * z)])
        return np.r_[qdot, wdot]

    return rhs


def make_truth(seed: int, duration_s: float = 1500.0, *, mag_hz: float = 10.0, gyro_hz: float = 20.0,
               w0_deg_s: float = 3.0, mag_noise_nT: float = 100.0, unmodelled_nT: float = 100.0,
               arw_deg_sqrt_s: float = 0.004, bias_walk_deg_s_sqrt_s: float = 1e-4,
               bias0_sigma_deg_s: float = 0.2, bdot: bool = False, gyro_gap: tuple | None = None,
               gyro_offset_s: float = 0.0125) -> Truth:
    """A seeded pass with known truth (see module docstring). ``bdot`` adds a B-dot dipole on 1 s ticks
    (gain 40000 A m^2 s/T, clipped at 0.18 A m^2, the coil log in A with C = 1.5 I) and gravity gradient;
    ``gyro_gap = (start_s, stop_s)`` removes gyro samples in that window."""
    rng = np.random.default_rng(seed)
    q0 = Rotation.random(random_state=rng).as_quat()
    w0 = rng.normal(size=3)
    w0 *= np.deg2rad(w0_deg_s) / np.linalg.norm(w0)
    c_nom = 1.5 * np.eye(3)
    ticks = np.arange(0.0, duration_s + 1.0, 1.0)
    t_dense = np.arange(0.0, duration_s + 2.0, 0.01)
    if bdot:
        # B-dot on ticks from the true body field: integrate tick by tick
        y = np.r_[q0, w0]
        dip = np.zeros((len(ticks), 3))
        sols = []
        b_prev = None
        for k, tk in enumerate(ticks[:-1]):
            a = Rotation.from_quat(y[:4]).as_matrix()
            b_now = a @ _dipole(np.array([tk]), _orbit(np.array([tk])))[0]
            if b_prev is not None:
                m = -40000.0 * (b_now - b_prev) * 1e-9 / 1.0
                dip[k] = np.clip(m, -0.18, 0.18)
            b_prev = b_now
            mk = dip[k].copy()
            sol = solve_ivp(_rhs_factory(INERTIA, lambda t, mk=mk: mk, True), (tk, tk + 1.0), y,
                            method="DOP853", rtol=1e-10, atol=1e-12, dense_output=True)
            y = sol.y[:, -1] / np.r_[np.full(4, np.linalg.norm(sol.y[:4, -1])), np.ones(3)]
            sols.append(sol)

        def state(t):
            k = np.clip(np.floor(t).astype(int), 0, len(sols) - 1)
            out = np.empty((len(t), 7))
            for kk in np.unique(k):
                sel = k == kk
                out[sel] = sols[kk].sol(t[sel]).T
            return out
        i_coil = dip @ np.linalg.inv(c_nom).T
        coil_t = T0_UTC + (ticks * 1e9).astype("timedelta64[ns]")
    else:
        sol = solve_ivp(_rhs_factory(INERTIA, None, False), (0.0, t_dense[-1]), np.r_[q0, w0], method="DOP853",
                        rtol=1e-11, atol=1e-13, dense_output=True)

        def state(t):
            return sol.sol(t).T
        i_coil, coil_t = None, None
    tm = np.arange(0.0, duration_s, 1.0 / mag_hz)
    st = state(tm)
    q_true = st[:, :4] / np.linalg.norm(st[:, :4], axis=1, keepdims=True)
    w_true = st[:, 4:]
    r = _orbit(tm)
    b_ref = _dipole(tm, r)
    b_true = b_ref + _unmodelled(tm, rng, unmodelled_nT)
    b_body = Rotation.from_quat(q_true).apply(b_true) + mag_noise_nT * rng.normal(size=(len(tm), 3))
    # gyro (Reynolds 2003): sample k is the mean rate over [t_k, t_k + dt] plus the mean bias and noise
    dt = 1.0 / gyro_hz
    tg = np.arange(gyro_offset_s, duration_s + 1.0, dt)
    qg = state(np.r_[tg, tg[-1] + dt])[:, :4]
    qg /= np.linalg.norm(qg, axis=1, keepdims=True)
    rg = Rotation.from_quat(qg)
    w_mean = -(rg[1:] * rg[:-1].inv()).as_rotvec() / dt
    sv, su = np.deg2rad(arw_deg_sqrt_s), np.deg2rad(bias_walk_deg_s_sqrt_s)
    beta = np.vstack([np.deg2rad(bias0_sigma_deg_s) * rng.normal(size=3),
                      su * np.sqrt(dt) * rng.normal(size=(len(tg), 3))]).cumsum(axis=0)
    w_gyro = w_mean + 0.5 * (beta[1:] + beta[:-1]) + np.sqrt(sv ** 2 / dt + su ** 2 * dt / 12) * rng.normal(
        size=(len(tg), 3))
    bias_at_mag = np.stack([np.interp(tm, tg + dt / 2, 0.5 * (beta[1:, i] + beta[:-1, i])) for i in range(3)], 1)
    if gyro_gap is not None:
        keep = (tg < gyro_gap[0]) | (tg >= gyro_gap[1])
        tg, w_gyro = tg[keep], w_gyro[keep]
    to_utc = lambda t: T0_UTC + np.round(t * 1e9).astype("timedelta64[ns]")  # noqa: E731
    return Truth(to_utc(tm), b_body, b_ref, b_true, r, q_true, w_true, to_utc(tg), w_gyro, bias_at_mag,
                 coil_t, i_coil, c_nom)


def attitude_error_rad(q_est: np.ndarray, q_true: np.ndarray) -> np.ndarray:
    """Error rotation vector dtheta with ``A_true = (I - [dtheta x]) A_est`` (recon's convention), (N, 3)."""
    return -(Rotation.from_quat(q_true) * Rotation.from_quat(q_est).inv()).as_rotvec()


# ------------------------------------------------------------------------------- truth self-checks
def test_truth_field_magnitude_is_leo_like():
    tr = make_truth(0, 600.0)
    mag = np.linalg.norm(tr.b_ref_gcrf_nT, axis=1)
    # a dipole at 510 km: 30000 (6371/6888)^3 = 23.7 uT at the magnetic equator, twice at the poles
    assert 20_000 < mag.min() and mag.max() < 50_000
    unmod = np.linalg.norm(tr.b_true_gcrf_nT - tr.b_ref_gcrf_nT, axis=1)
    assert abs(np.sqrt(np.mean(unmod ** 2)) - 100.0) < 1e-6


def test_truth_measurement_is_rotated_true_field():
    tr = make_truth(1, 300.0, mag_noise_nT=0.0)
    pred = Rotation.from_quat(tr.q_true).apply(tr.b_true_gcrf_nT)
    assert np.abs(pred - tr.b_body_nT).max() < 1e-6


def test_truth_gyro_integrates_to_true_attitude():
    """Integrating the noise-free gyro samples reproduces the true attitude (to integration error)."""
    tr = make_truth(2, 120.0, arw_deg_sqrt_s=0.0, bias_walk_deg_s_sqrt_s=0.0, bias0_sigma_deg_s=0.0)
    tg = (tr.t_gyro_utc - T0_UTC).astype(np.int64) / 1e9
    rot = Rotation.from_quat(tr.q_true[0])
    # propagate from t = 0 to the first gyro sample with the true rate, then with the samples
    rot = Rotation.from_rotvec(-tr.w_true[0] * tg[0]) * rot
    tm = (tr.t_mag_utc - T0_UTC).astype(np.int64) / 1e9
    # end on the gyro sample 12.5 ms after the last magnetometer sample, so the reference needs only
    # a 12.5 ms extrapolation (error |dw/dt| dt^2 / 2, about 1e-7 rad)
    k_end = int(np.searchsorted(tg, tm[-1] + 0.0125 - 1e-6))
    for k in range(k_end):
        rot = Rotation.from_rotvec(-tr.w_gyro[k] * (tg[k + 1] - tg[k])) * rot
    rest = tg[k_end] - tm[-1]
    ref = Rotation.from_rotvec(-tr.w_true[-1] * rest) * Rotation.from_quat(tr.q_true[-1])
    err = np.rad2deg((rot * ref.inv()).magnitude())
    assert err < 1e-4  # mean-rate samples are exact rotation increments (DOP853 at rtol 1e-11)
