"""Attitude and rate reconstruction: multiplicative EKF forward pass plus RTS smoother.

``estimate_attitude`` takes the calibrated body-frame field, the reference field in GCRF and, when
there is one, the gyro, and returns an :class:`AttitudeHistory` on the magnetometer's time stamps:
``q_body_from_gcrf``, body rate, gyro bias, 1-sigma attitude error per body axis, covariances,
forward and smoothed, the normalised innovation squared (NIS) of every update and the anomalies
found (``gyro_dead``, ``gyro_bias_jump``, ``filter_inconsistent``).

Model (details in :mod:`recon.estimate.kernels`):

- Gyro mode: ``w_meas = w + beta + eta_v``, ``d(beta)/dt = eta_u`` (Lefferts, Markley & Shuster
  1982); every gyro sample is held until the next one; every magnetometer sample is used at its own
  time stamp (no resampling); in a gap of the gyro log the last sample is held and the attitude
  variance grows as ``sv^2 s^2 / h + acc^2 s^4 / 4`` (s: time the sample has been held, h: nominal
  gyro interval, acc: rms angular acceleration of the pass), so a gap is bridged, never filled in.
- Dynamics mode (gyro absent or dead): body rate from Euler's equations with the logged coil dipole
  and gravity gradient (Psiaki, Martel & Pal 1990), white unmodelled torque.
- Measurement: the body field in nT, ``z = A(q) (b_ref + db) + v``; v is the magnetometer's white
  noise, db the field the reference model omits (crustal and external fields, about 100 nT in quiet
  conditions (memory)), a Gauss-Markov process per GCRF axis estimated with the attitude. Treating
  that error as white would make the filter claim far more accuracy than it has, because it is
  correlated over minutes.

References
----------
Lefferts, E. J., Markley, F. L. and Shuster, M. D. (1982). Kalman filtering for spacecraft attitude
estimation. J. Guidance 5(5), 417-429.
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Ch. 6.
Crassidis, J. L. and Junkins, J. L. (2012). Optimal Estimation of Dynamic Systems, 2nd ed. Ex. 5.1.
Psiaki, M. L., Martel, F. and Pal, P. K. (1990). Three-axis attitude determination via Kalman
filtering of magnetometer data. J. Guidance 13(3), 506-514.
Bar-Shalom, Y., Li, X. R. and Kirubarajan, T. (2001). Estimation with Applications to Tracking and
Navigation. Wiley. Sec. 5.4 (NIS and NEES consistency tests).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats

from ..core import (
    DEG_PER_RAD,
    NS_PER_S,
    NT_PER_UNIT,
    RAD_S_PER_UNIT,
    Anomaly,
    InputError,
    MU_EARTH_m3_s2,
    held_mean,
    local_slope,
    utc_text,
    white_noise_from_differences,
)
from . import dynamics_mode as dyn
from . import kernels as core
from .bias_step import BiasStep, find_bias_step
from .initial import InitialState, carry_back_with_gyro, initial_state_with_gyro
from .noise import gyro_noise_from_adev, overlapping_adev

__all__ = ["NoiseModel", "Track", "AttitudeHistory", "estimate_attitude", "write_attitude_csv", "gyro_noise_figures"]



@dataclass(frozen=True)
class NoiseModel:
    """Noise levels of the filter; ``None`` means "estimate from the data".

    Attributes
    ----------
    mag_nT : float or None
        Magnetometer white noise, 1 sigma per axis, nT.
    field_model_nT : float
        rms magnitude of the field the reference model leaves out, nT (about 100 nT for IGRF in
        quiet conditions (memory)); the per-axis sigma is this / sqrt(3).
    field_model_tau_s : float
        Correlation time of that error, s; 0 treats it as white noise (exactly the 6-state filter with
        the error's variance added to the measurement noise).
    gyro_arw_rad_sqrt_s : float or None
        Angle random walk sv, rad/sqrt(s) (= rad/s per sqrt(Hz)).
    gyro_bias_walk_rad_s_sqrt_s : float
        Rate random walk su of the bias, rad/s/sqrt(s).
    gyro_bias0_rad_s : float
        Prior 1-sigma of the turn-on bias, rad/s (MEMS: up to about 0.5 deg/s, common practice, no
        source).
    rate_hold_accel_rad_s2 : float or None
        Angular acceleration not known while a gyro sample is held (gap bridging), rad/s^2, 1 sigma
        per axis; from the data it is the rms rate of change of the gyro output (1 s slopes), so the
        uncertainty in a gap grows as fast as this pass's rate actually changes.
    torque_noise_Nm_sqrt_s : float
        Dynamics mode: white unmodelled torque (aerodynamic, residual dipole, solar), N m sqrt(s).
    coil_torque_rel_error : float
        Dynamics mode: relative error of the coil torque (dipole gain and alignment), 1 sigma.
    """

    mag_nT: float | None = None
    field_model_nT: float = 100.0
    field_model_tau_s: float = 300.0
    gyro_arw_rad_sqrt_s: float | None = None
    gyro_bias_walk_rad_s_sqrt_s: float = np.deg2rad(1e-4)
    gyro_bias0_rad_s: float = np.deg2rad(0.5)
    rate_hold_accel_rad_s2: float | None = None
    torque_noise_Nm_sqrt_s: float = 2e-7
    coil_torque_rel_error: float = 0.05

    @classmethod
    def from_mission(cls, mission) -> NoiseModel:
        """Noise levels from a :class:`recon.config.Mission` (``[magnetometer] noise``, ``[gyro]
        noise`` and ``bias_walk``, then ``[estimator]`` overrides named like these attributes)."""
        kw: dict[str, float] = {}
        mag = mission.magnetometer
        if mag.noise is not None:
            kw["mag_nT"] = mag.noise * NT_PER_UNIT[mag.unit]
        g = mission.gyro
        if g is not None:
            if g.noise is not None:
                kw["gyro_arw_rad_sqrt_s"] = g.noise * RAD_S_PER_UNIT[g.unit]
            if g.bias_walk is not None:
                kw["gyro_bias_walk_rad_s_sqrt_s"] = g.bias_walk * RAD_S_PER_UNIT[g.unit]
        names = {f.name for f in dataclasses.fields(cls)}
        for k, v in mission.estimator.overrides.items():
            if k not in names:
                raise InputError(f"expected an estimator setting among {sorted(names)}, got {k!r}",
                                 mission.path, key=f"estimator.{k}")
            kw[k] = float(v)
        return cls(**kw)


@dataclass(frozen=True)
class Track:
    """One estimate on the output time stamps (forward filter or smoother).

    Attributes
    ----------
    q_body_from_gcrf : (N, 4) scalar-last, scipy convention
    w_body_rad_s : (N, 3) body rate, rad/s, body frame
    gyro_bias_rad_s : (N, 3) gyro bias, rad/s, body frame (NaN in dynamics mode)
    sigma_att_rad : (N, 3) 1-sigma attitude error about each body axis, rad
    sigma_rate_rad_s : (N, 3) 1-sigma body-rate error, rad/s
    covariance : (N, 6, 6) error covariance of [attitude (rad, body), gyro bias or body rate (rad/s)]
    field_error_gcrf_nT : (N, 3) estimated field the reference model omits, nT, GCRF
    """

    q_body_from_gcrf: np.ndarray
    w_body_rad_s: np.ndarray
    gyro_bias_rad_s: np.ndarray
    sigma_att_rad: np.ndarray
    sigma_rate_rad_s: np.ndarray
    covariance: np.ndarray
    field_error_gcrf_nT: np.ndarray


@dataclass(frozen=True)
class AttitudeHistory:
    """Reconstructed attitude and rate of one pass. Top-level arrays are the smoothed estimate.

    Attributes
    ----------
    time_utc : (N,) datetime64[ns], UTC
    smoothed, forward : Track
    nis : (M,) normalised innovation squared of each magnetometer update (3 degrees of freedom)
    nis_time_utc : (M,) datetime64[ns]
    mode : "gyro" or "dynamics"
    mode_reason : str
    anomalies : tuple of Anomaly
    noise : NoiseModel actually used (all levels filled in)
    noise_source : dict, where each level came from ("given", "data", "default")
    init : dict, how the filter was started
    """

    time_utc: np.ndarray
    smoothed: Track
    forward: Track
    nis: np.ndarray
    nis_time_utc: np.ndarray
    mode: str
    mode_reason: str
    anomalies: tuple
    noise: NoiseModel
    noise_source: dict = field(default_factory=dict)
    init: dict = field(default_factory=dict)
    nis_dof: int = 3

    @property
    def q_body_from_gcrf(self) -> np.ndarray:
        return self.smoothed.q_body_from_gcrf

    @property
    def w_body_rad_s(self) -> np.ndarray:
        return self.smoothed.w_body_rad_s

    @property
    def gyro_bias_rad_s(self) -> np.ndarray:
        return self.smoothed.gyro_bias_rad_s

    @property
    def sigma_att_rad(self) -> np.ndarray:
        return self.smoothed.sigma_att_rad

    @property
    def covariance(self) -> np.ndarray:
        return self.smoothed.covariance

    def nis_interval(self, p: float = 0.95) -> tuple[float, float]:
        """Two-sided chi-square interval of one NIS value (Bar-Shalom et al. 2001, ch. 5 (memory))."""
        lo, hi = stats.chi2.ppf([(1 - p) / 2, (1 + p) / 2], self.nis_dof)
        return float(lo), float(hi)

    def nis_fraction_inside(self, p: float = 0.95) -> float:
        lo, hi = self.nis_interval(p)
        return float(np.mean((self.nis >= lo) & (self.nis <= hi))) if len(self.nis) else float("nan")

    def to_summary(self) -> dict[str, Any]:
        """The "estimate" block of summary.json.

        Accuracy figures are 3-sigma, from the smoothed covariance: per sample the largest of the
        three axes, then the median and maximum over the pass.
        """
        att3 = 3.0 * np.rad2deg(self.smoothed.sigma_att_rad.max(axis=1))
        rate3 = 3.0 * np.rad2deg(self.smoothed.sigma_rate_rad_s.max(axis=1))
        lo, hi = self.nis_interval()
        return {
            "mode": self.mode,
            "mode_reason": self.mode_reason,
            "samples": int(len(self.time_utc)),
            "start_utc": utc_text(self.time_utc[0], "us") if len(self.time_utc) else None,
            "stop_utc": utc_text(self.time_utc[-1], "us") if len(self.time_utc) else None,
            "accuracy": {
                "attitude_3sigma_deg_median": float(np.median(att3)),
                "attitude_3sigma_deg_max": float(np.max(att3)),
                "rate_3sigma_dps_median": float(np.median(rate3)),
                "rate_3sigma_dps_max": float(np.max(rate3)),
            },
            "consistency": {
                "nis_mean": float(np.mean(self.nis)) if len(self.nis) else None,
                "nis_dof": self.nis_dof,
                "nis_interval_95": [lo, hi],
                "nis_fraction_inside_95": self.nis_fraction_inside(),
                "updates": int(len(self.nis)),
            },
            "noise": {k: (None if v is None else float(v)) for k, v in dataclasses.asdict(self.noise).items()},
            "noise_source": dict(self.noise_source),
            "init": {k: (float(v) if isinstance(v, np.floating) else v) for k, v in self.init.items()},
        }


# ------------------------------------------------------------------------------------ input checks
def _times_ns(t, key: str) -> np.ndarray:
    try:
        a = np.asarray(t).astype("datetime64[ns]").astype(np.int64)
    except (TypeError, ValueError):
        raise InputError(f"expected datetime64 UTC time stamps, got {np.asarray(t).dtype}", key=key) from None
    if a.ndim != 1 or len(a) < 2:
        raise InputError(f"expected a 1-D array of at least 2 time stamps, got shape {a.shape}", key=key)
    bad = np.nonzero(np.diff(a) <= 0)[0]
    if len(bad):
        raise InputError(f"expected strictly increasing time stamps, got {np.datetime64(int(a[bad[0] + 1]), 'ns')} "
                         f"after {np.datetime64(int(a[bad[0]]), 'ns')} (row {bad[0] + 1})", key=key)
    return a


def _vectors(x, n: int, key: str) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    if a.shape != (n, 3):
        raise InputError(f"expected an array of shape ({n}, 3), got {a.shape}", key=key)
    return a


def _resolve_noise(noise: NoiseModel, b_body_nT: np.ndarray, w_gyro: np.ndarray | None,
                   t_gyro_s: np.ndarray | None) -> tuple[NoiseModel, dict]:
    src = {}
    kw = {}
    if noise.mag_nT is None:
        kw["mag_nT"] = white_noise_from_differences(b_body_nT)
        src["mag_nT"] = "data"
    else:
        src["mag_nT"] = "given"
    if noise.gyro_arw_rad_sqrt_s is None and w_gyro is not None:
        figs = gyro_noise_figures(t_gyro_s, w_gyro)
        kw["gyro_arw_rad_sqrt_s"] = figs["arw_rad_sqrt_s"]
        src["gyro_arw_rad_sqrt_s"] = "data (Allan deviation)"
        src["gyro_allan"] = figs
    elif w_gyro is not None:
        src["gyro_arw_rad_sqrt_s"] = "given"
    if w_gyro is not None:
        if noise.rate_hold_accel_rad_s2 is None:
            wdot = local_slope(t_gyro_s, w_gyro, 1.0)
            ok = np.all(np.isfinite(wdot), axis=1)
            kw["rate_hold_accel_rad_s2"] = max(float(np.sqrt(np.mean(wdot[ok] ** 2))), 1e-6)
            src["rate_hold_accel_rad_s2"] = "data"
        else:
            src["rate_hold_accel_rad_s2"] = "given"
    return dataclasses.replace(noise, **kw), src


def gyro_noise_figures(t_gyro_s: np.ndarray, w_gyro: np.ndarray, max_samples: int = 1 << 16) -> dict:
    """Gyro noise read from the overlapping Allan deviation of the gyro output (IEEE Std 952-1997).

    The satellite's own motion adds to the curve at long averaging times, so only the angle random
    walk (the -1/2 line at the shortest taus, where white noise dominates any magnetorquer-driven
    motion) is used by the filter; bias instability and rate random walk are reported for the record.
    Uses the first ``max_samples`` samples at the median spacing.

    Returns
    -------
    dict with arw_rad_sqrt_s (rms over axes) and per-axis arw, bias_instability, rrw (None if no
    +1/2 slope), in rad/s units
    """
    dt = float(np.median(np.diff(t_gyro_s)))
    taus, adev, _ = overlapping_adev(w_gyro[:max_samples], 1.0 / dt)
    figs = [gyro_noise_from_adev(taus, adev[:, i]) for i in range(3)]
    return {"arw_rad_sqrt_s": float(np.sqrt(np.mean([f.arw ** 2 for f in figs]))),
            "arw_per_axis": [f.arw for f in figs],
            "bias_instability_rad_s": [f.bias_instability for f in figs],
            "rrw_rad_s_sqrt_s": [f.rrw for f in figs]}


def _params(noise: NoiseModel, h_nom: float, inertia: np.ndarray | None) -> np.ndarray:
    prm = np.zeros(core.N_PRM)
    prm[core.P_SV] = noise.gyro_arw_rad_sqrt_s or 0.0
    prm[core.P_SU] = noise.gyro_bias_walk_rad_s_sqrt_s
    prm[core.P_ACC] = noise.rate_hold_accel_rad_s2 or 0.0
    prm[core.P_HNOM] = h_nom
    prm[core.P_TAUF] = noise.field_model_tau_s
    prm[core.P_SIGF] = noise.field_model_nT / np.sqrt(3.0)
    prm[core.P_SIGM] = noise.mag_nT
    prm[core.P_SIGTAU] = noise.torque_noise_Nm_sqrt_s
    prm[core.P_TAUREL] = noise.coil_torque_rel_error
    prm[core.P_MU] = MU_EARTH_m3_s2
    if inertia is not None:
        prm[core.P_J:core.P_J + 9] = np.asarray(inertia, float).ravel()
        prm[core.P_JINV:core.P_JINV + 9] = np.linalg.inv(inertia).ravel()
    return prm


# ------------------------------------------------------------------------------------ the passes
@dataclass
class _Run:
    """Everything one forward + backward run produced, on the step grid."""

    t: np.ndarray
    q_f: np.ndarray
    v_f: np.ndarray
    db_f: np.ndarray
    p_f: np.ndarray
    nis: np.ndarray
    q_s: np.ndarray
    v_s: np.ndarray
    db_s: np.ndarray
    p_s6: np.ndarray
    smoother_bad: int


def run_filter(mode: int, t: np.ndarray, u: np.ndarray, is_mag: np.ndarray, z: np.ndarray, r: np.ndarray,
               prm: np.ndarray, init: InitialState, out_idx: np.ndarray, n_out: int) -> _Run:
    """Forward MEKF and RTS smoother on plain arrays (the compiled core); see :mod:`recon.estimate.kernels`.

    Parameters
    ----------
    mode : 0 gyro, 1 dynamics
    t : (K,) s; u : (K, c) per-step inputs; is_mag : (K,) bool; z : (K, 3) nT body; r : (K, 3) nT GCRF
    prm : parameter vector; init : starting state at t[0]
    out_idx : (K,) row of each step in the output (-1: not output); n_out : number of output rows

    Notes
    -----
    Memory: the forward covariances are kept for the smoother, the upper triangle of K 9 x 9 matrices
    (360 bytes a step, 0.36 GB for a million steps), plus the 6 x 6 smoothed block of each output
    row (288 bytes, 0.29 GB).
    """
    n = core.N
    kk = len(t)
    p0 = np.zeros((n, n))
    p0[:3, :3] = np.diag(init.sigma_att_rad ** 2)
    p0[3:6, 3:6] = np.diag(init.sigma_v ** 2)
    p0[6:, 6:] = np.eye(3) * prm[core.P_SIGF] ** 2
    q_f = np.empty((kk, 4))
    v_f = np.empty((kk, 3))
    db_f = np.empty((kk, 3))
    p_f = np.empty((kk, core.NP))
    nis = np.empty(kk)
    innov = np.empty((kk, 3))
    core.forward_pass(mode, t, u, is_mag, z, r, prm, np.asarray(init.q_body_from_gcrf, float),
                      np.asarray(init.v, float), np.zeros(3), p0, q_f, v_f, db_f, p_f, nis, innov)
    q_s = np.empty((kk, 4))
    v_s = np.empty((kk, 3))
    db_s = np.empty((kk, 3))
    p_s6 = np.empty((n_out, 6, 6))
    bad = core.smoother_pass(mode, t, u, r, prm, q_f, v_f, db_f, p_f, out_idx, q_s, v_s, db_s, p_s6,
                             np.empty((0, n, n)))
    return _Run(t, q_f, v_f, db_f, p_f, nis, q_s, v_s, db_s, p_s6, int(bad))


def _track(run: _Run, smoothed: bool, sel: np.ndarray, mode: int, prm: np.ndarray,
           w_out: np.ndarray | None, rate_var_extra: float) -> Track:
    q = (run.q_s if smoothed else run.q_f)[sel]
    v = (run.v_s if smoothed else run.v_f)[sel]
    db = (run.db_s if smoothed else run.db_f)[sel]
    cov = run.p_s6 if smoothed else core.unpack_covariance(run.p_f[sel], 6)
    d = np.sqrt(np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None))
    if mode == core.MODE_GYRO:
        w = w_out - v
        bias = v
        s_rate = np.sqrt(d[:, 3:] ** 2 + rate_var_extra)
    else:
        w = v
        bias = np.full_like(v, np.nan)
        s_rate = d[:, 3:]
    q = np.where(q[:, 3:4] < 0, -q, q)
    return Track(q, w, bias, d[:, :3], s_rate, cov, db)


# --------------------------------------------------------------------------------- entry point
def estimate_attitude(t_mag_utc: np.ndarray, b_body_nT: np.ndarray, b_ref_gcrf_nT: np.ndarray, *,
                      gyro_t_utc: np.ndarray | None = None, w_gyro_body_rad_s: np.ndarray | None = None,
                      noise: NoiseModel | None = None, mode: str = "auto",
                      inertia_kg_m2: np.ndarray | None = None, coil_t_utc: np.ndarray | None = None,
                      i_coil_A: np.ndarray | None = None, dipole_per_amp: np.ndarray | None = None,
                      r_gcrf_km: np.ndarray | None = None, init_window_s: float = 120.0,
                      rate_window_s: float = 0.5,
                      progress: Callable[[str, float], None] | None = None) -> AttitudeHistory:
    """Reconstruct attitude, rate and gyro bias over one pass.

    Parameters
    ----------
    t_mag_utc : (N,) datetime64[ns], UTC, strictly increasing
        Magnetometer time stamps; the history is given on these.
    b_body_nT : (N, 3) nT, body frame
        Calibrated magnetometer (bias, soft iron and coil crosstalk removed). Non-finite rows are
        not used for updates.
    b_ref_gcrf_nT : (N, 3) nT, GCRF
        Reference (model) field at the magnetometer time stamps. Non-finite rows (no orbit position
        for that sample) are not used for updates either. The opening attitude is solved at the first
        row where both are finite and carried back to the filter's start along the gyro (or Euler's
        equations in dynamics mode); ``init["carried_back_s"]`` says how far.
    gyro_t_utc : (G,) datetime64[ns], optional
    w_gyro_body_rad_s : (G, 3) rad/s, body frame, optional
        Gyro rate (sensor-to-body rotation applied); non-finite rows are treated as missing.
    noise : NoiseModel, optional
        Noise levels; ``None`` fields are estimated from the data.
    mode : "auto", "gyro" or "dynamics"
        "auto" uses the gyro when it is present and alive (see :func:`recon._dynamics_filter.check_gyro`).
    inertia_kg_m2 : (3, 3), required for dynamics mode
    coil_t_utc : (C,) datetime64[ns]; i_coil_A : (C, 3) A, effective coil currents held from each
        time stamp to the next; dipole_per_amp : (3, 3) A m^2/A, nominal C (m_body = C i).
        Used by dynamics mode for the magnetic torque; absent coils mean zero dipole.
    r_gcrf_km : (N, 3) km, GCRF, optional
        Position at the magnetometer time stamps, for the gravity-gradient torque (dynamics mode);
        non-finite rows are interpolated from their neighbours.
    init_window_s : float
        Minimum length of the opening window for the attitude initialisation, s.
    rate_window_s : float
        Gyro mode: the body rate reported at a time stamp is the bias-corrected mean gyro rate over
        this window centred on it (at least one gyro interval), which divides the white-noise
        variance by the window length; 0.5 s changes a magnetorquer-driven rate by well under
        0.001 deg/s (angular accelerations of about 1e-4 rad/s^2, common practice, no source).
    progress : callable(stage: str, fraction: float), optional

    Returns
    -------
    AttitudeHistory

    Raises
    ------
    InputError
        Shapes, time stamps or mode requirements not met.
    """
    report = progress or (lambda stage, frac: None)
    noise = noise or NoiseModel()
    if mode not in ("auto", "gyro", "dynamics"):
        raise InputError(f"expected mode 'auto', 'gyro' or 'dynamics', got {mode!r}", key="mode")
    tm = _times_ns(t_mag_utc, "t_mag_utc")
    bb = _vectors(b_body_nT, len(tm), "b_body_nT")
    br = _vectors(b_ref_gcrf_nT, len(tm), "b_ref_gcrf_nT")
    have_gyro = gyro_t_utc is not None and w_gyro_body_rad_s is not None
    if have_gyro:
        tg = _times_ns(gyro_t_utc, "gyro_t_utc")
        wg = _vectors(w_gyro_body_rad_s, len(tg), "w_gyro_body_rad_s")
        keep = np.all(np.isfinite(wg), axis=1)
        tg, wg = tg[keep], wg[keep]
        have_gyro = len(tg) >= 2
    if mode == "gyro" and not have_gyro:
        raise InputError("expected gyro time stamps and rates for mode 'gyro', got none", key="mode")
    if mode != "gyro" and inertia_kg_m2 is not None:
        inertia_kg_m2 = np.asarray(inertia_kg_m2, float)
        if inertia_kg_m2.shape != (3, 3):
            raise InputError(f"expected a 3x3 inertia, got shape {inertia_kg_m2.shape}", key="inertia_kg_m2")

    if r_gcrf_km is not None:
        r_gcrf_km = _vectors(r_gcrf_km, len(tm), "r_gcrf_km")
    # a row is used for an update only when both its field and its reference field are finite (a
    # reference row is NaN where the orbit has no position)
    ok_rows = np.all(np.isfinite(bb), axis=1) & np.all(np.isfinite(br), axis=1)
    if ok_rows.sum() < 10:
        raise InputError(f"expected at least 10 magnetometer rows with a finite field and reference field, got "
                         f"{int(ok_rows.sum())}", key="b_body_nT")
    t_epoch = tm[0]
    anomalies: list[Anomaly] = []
    reason = ""
    use_gyro = have_gyro and mode != "dynamics"
    check = None
    if have_gyro:
        check = dyn.check_gyro((tg - t_epoch) / NS_PER_S, wg, (tm[ok_rows] - t_epoch) / NS_PER_S, bb[ok_rows],
                               noise.gyro_arw_rad_sqrt_s)
        if not check.usable:
            use_gyro = mode == "gyro"
            anomalies.append(check.anomaly(t_epoch, dynamics_used=not use_gyro))
        reason = check.reason
    if not use_gyro:
        if inertia_kg_m2 is None:
            raise InputError("expected inertia_kg_m2 for dynamics mode (gyro absent or dead), got none",
                             key="inertia_kg_m2")
        reason = reason if have_gyro and mode == "auto" else ("gyro absent" if not have_gyro else
                                                               "dynamics mode requested")
    else:
        reason = reason or "gyro requested"
    report("set-up", 0.0)
    if use_gyro:
        res = _estimate_gyro(tm, bb, br, ok_rows, tg, wg, noise, init_window_s, rate_window_s, report)
    else:
        res = dyn.estimate_dynamics(tm, bb, br, ok_rows, noise, inertia_kg_m2, coil_t_utc, i_coil_A,
                                    dipole_per_amp, r_gcrf_km, init_window_s, report,
                                    gyro=(tg, wg, check) if have_gyro else None)
    hist = dataclasses.replace(res, mode_reason=reason, anomalies=tuple(anomalies) + tuple(res.anomalies))
    incons = consistency_anomaly(hist)
    if incons is not None:
        hist = dataclasses.replace(hist, anomalies=hist.anomalies + (incons,))
    report("done", 1.0)
    return hist


def _estimate_gyro(tm, bb, br, ok_rows, tg, wg, noise: NoiseModel, init_window_s, rate_window_s,
                   report) -> AttitudeHistory:
    # start at the first magnetometer sample that has a gyro sample within two gyro intervals
    # (before it, the first gyro sample is held backwards); earlier magnetometer rows are not used
    dt_g_ns = int(np.median(np.diff(tg)))
    first = int(np.searchsorted(tm, tg[0] - 2 * dt_g_ns))
    t_epoch = tm[first]
    tm_u = tm[first:]
    bb_u, br_u, ok_u = bb[first:], br[first:], ok_rows[first:]
    dt_g = dt_g_ns / NS_PER_S
    noise, src = _resolve_noise(noise, bb_u[ok_u], wg, (tg - tg[0]) / NS_PER_S)
    prm = _params(noise, dt_g, None)
    # step grid: every gyro sample and every magnetometer sample in [t_epoch, last mag]
    tg_in = tg[(tg >= t_epoch) & (tg <= tm_u[-1])]
    steps = np.union1d(tg_in, tm_u)
    t = (steps - t_epoch) / NS_PER_S
    mag_pos = np.searchsorted(steps, tm_u)
    is_mag = np.zeros(len(steps), bool)
    is_mag[mag_pos[ok_u]] = True
    z = np.zeros((len(steps), 3))
    r = np.zeros((len(steps), 3))
    z[mag_pos] = np.nan_to_num(bb_u)
    r[mag_pos] = np.nan_to_num(br_u)
    tgs = (tg - t_epoch) / NS_PER_S
    j = np.clip(np.searchsorted(tg, steps, side="right") - 1, 0, len(tg) - 1)
    u = np.zeros((len(steps), 5))
    u[:, :3] = wg[j]
    u[:, 3] = t - tgs[j]
    out_idx = np.full(len(steps), -1, np.int64)
    out_idx[mag_pos] = np.arange(len(mag_pos))
    tms = t[mag_pos]
    sig_vec = float(np.hypot(noise.mag_nT, noise.field_model_nT / np.sqrt(3.0)))
    report("initialisation", 0.05)
    init = initial_state_with_gyro(tms[ok_u], bb_u[ok_u], br_u[ok_u], tgs, wg, sigma_vec_nT=sig_vec,
                                   sigma_bias0_rad_s=noise.gyro_bias0_rad_s, window_s=init_window_s)
    # the opening is solved at the first usable row; the filter starts at t = 0
    init = carry_back_with_gyro(init, float(tms[ok_u][0]), 0.0, tgs, wg, noise.gyro_arw_rad_sqrt_s)
    report("forward filter and smoother", 0.1)
    run = run_filter(core.MODE_GYRO, t, u, is_mag, z, r, prm, init, out_idx, len(mag_pos))
    anomalies = []
    # gyro bias jump: look for a step in the gyro-versus-field kinematic bias; if found, rerun with
    # the bias allowed to move where it stepped
    def find_step(run_):
        return find_bias_step(tms[ok_u], bb_u[ok_u], br_u[ok_u], run_.q_s[mag_pos][ok_u], tgs, wg,
                              noise.gyro_bias_walk_rad_s_sqrt_s)

    step = find_step(run)
    if step is not None:
        report("rerun after gyro bias jump", 0.5)
        run = run_filter(core.MODE_GYRO, t, bias_step_inputs(t, u, step), is_mag, z, r, prm, init, out_idx,
                         len(mag_pos))
        # the first run's attitude drifts after an unmodelled step, and that attitude enters the
        # kinematic bias through A db_ref/dt: measure the step again on the rerun's attitude
        again = find_step(run)
        if again is not None:
            if not step.t_lo_s <= again.t_s <= step.t_hi_s:
                report("rerun after gyro bias jump", 0.75)
                run = run_filter(core.MODE_GYRO, t, bias_step_inputs(t, u, again), is_mag, z, r, prm, init,
                                 out_idx, len(mag_pos))
            step = again
        anomalies.append(step.anomaly(t_epoch))
    width = max(float(rate_window_s), dt_g)
    w_out = held_mean(tgs, wg, tms, width)
    extra = noise.gyro_arw_rad_sqrt_s ** 2 / width
    sm = _track(run, True, mag_pos, core.MODE_GYRO, prm, w_out, extra)
    fw = _track(run, False, mag_pos, core.MODE_GYRO, prm, w_out, extra)
    nis = run.nis[mag_pos][ok_u]
    times = tm_u
    src.setdefault("field_model_nT", "given")
    return AttitudeHistory(times.astype("datetime64[ns]"), sm, fw, nis, tm_u[ok_u].astype("datetime64[ns]"),
                           "gyro", "", tuple(anomalies), noise, src,
                           {"method": init.method, "window_s": init.window_s,
                            "t0_utc": utc_text(np.datetime64(int(t_epoch), "ns"), "us"),
                            "bias0_dps": (init.v * DEG_PER_RAD).tolist(),
                            "sigma_att0_deg": (init.sigma_att_rad * DEG_PER_RAD).tolist(),
                            "magnetometer_rows_before_gyro": int(first),
                            "smoother_steps_not_pd": run.smoother_bad, **init.detail})


def bias_step_inputs(t: np.ndarray, u: np.ndarray, step: BiasStep) -> np.ndarray:
    """Per-step gyro inputs with the bias free to move over the step's time interval.

    The extra bias variance ``|2 delta|^2`` (rad/s)^2 per axis (twice the found change, so the filter
    is not held to the estimate) is spread over the propagation intervals that overlap
    ``[t_lo_s, t_hi_s]`` in proportion to the overlap, a random walk confined to the interval in
    which the step happened; an interval of zero length puts it all on the propagation that ends at
    the step.

    Parameters
    ----------
    t : (K,) s, step times; u : (K, 5) per-step gyro inputs (column 4: extra bias variance)
    step : BiasStep

    Returns
    -------
    (K, 5) copy of u with column 4 filled
    """
    out = u.copy()
    total = float(np.sum((2.0 * step.delta_rad_s) ** 2))
    overlap = np.clip(np.minimum(t[1:], step.t_hi_s) - np.maximum(t[:-1], step.t_lo_s), 0.0, None)
    if overlap.sum() > 1e-9:
        out[:-1, 4] += total * overlap / float(overlap.sum())
    else:
        k = int(np.clip(np.searchsorted(t, step.t_s), 1, len(t) - 1))
        out[k - 1, 4] += total
    return out


def consistency_anomaly(hist: AttitudeHistory, min_fraction: float = 0.85,
                        window_s: float = 60.0) -> Anomaly | None:
    """filter_inconsistent when the NIS disagrees with its chi-square distribution.

    Rule (common practice, no source): the fraction of NIS values inside their two-sided 95 %
    interval is below ``min_fraction`` (0.95 expected), or the mean NIS is outside [dof/2, 2 dof].
    The evidence names the worst ``window_s`` window (largest mean NIS).
    """
    if len(hist.nis) < 10:
        return None
    frac = hist.nis_fraction_inside()
    mean = float(np.mean(hist.nis))
    dof = hist.nis_dof
    if frac >= min_fraction and dof / 2 <= mean <= 2 * dof:
        return None
    t = (hist.nis_time_utc - hist.nis_time_utc[0]).astype(np.int64) / NS_PER_S
    edges = np.arange(0.0, t[-1] + window_s, window_s)
    which = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, len(edges) - 1)
    sums = np.bincount(which, hist.nis, len(edges))
    counts = np.bincount(which, None, len(edges))
    means = np.where(counts > 0, sums / np.maximum(counts, 1), -np.inf)
    w = int(np.argmax(means))
    start = hist.nis_time_utc[0] + np.timedelta64(int(edges[w] * NS_PER_S), "ns")
    lo, hi = hist.nis_interval()
    return Anomaly("filter_inconsistent", "warning",
                   f"{100 * frac:.0f} % of {len(hist.nis)} magnetometer innovations fall inside their 95 % "
                   f"chi-square interval [{lo:.2f}, {hi:.2f}] (expected 95 %, flagged below "
                   f"{100 * min_fraction:.0f} %); mean NIS {mean:.2f} for {dof} degrees of freedom; worst "
                   f"{window_s:.0f} s window mean {means[w]:.1f}. The stated attitude uncertainty is not "
                   f"trustworthy: check calibration, time tags and noise levels.",
                   start, start + np.timedelta64(int(window_s * NS_PER_S), "ns"), value=frac)


def write_attitude_csv(path: str | Path, hist: AttitudeHistory) -> Path:
    """Write attitude.csv: time_utc, qx, qy, qz, qw (q_body_from_gcrf), rate_x/y/z_dps (body),
    bias_x/y/z_dps, sigma_x/y/z_deg (1-sigma attitude error about each body axis), smoothed."""
    import pandas as pd

    path = Path(path)
    q = hist.q_body_from_gcrf
    w = np.rad2deg(hist.w_body_rad_s)
    b = np.rad2deg(hist.gyro_bias_rad_s)
    s = np.rad2deg(hist.sigma_att_rad)
    df = pd.DataFrame({
        "time_utc": np.datetime_as_string(hist.time_utc.astype("datetime64[us]"), unit="us"),
        "qx": q[:, 0], "qy": q[:, 1], "qz": q[:, 2], "qw": q[:, 3],
        "rate_x_dps": w[:, 0], "rate_y_dps": w[:, 1], "rate_z_dps": w[:, 2],
        "bias_x_dps": b[:, 0], "bias_y_dps": b[:, 1], "bias_z_dps": b[:, 2],
        "sigma_x_deg": s[:, 0], "sigma_y_deg": s[:, 1], "sigma_z_deg": s[:, 2],
    })
    df["time_utc"] = df["time_utc"] + "Z"
    df.to_csv(path, index=False, float_format="%.9g")
    return path
