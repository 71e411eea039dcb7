"""The estimate stage's result types: the noise levels, one estimated track, the attitude history of a
pass, and the typed records of where the noise levels came from and how the filter was started.

``AttitudeHistory.to_summary()`` gives the "estimate" block of summary.json.

References
----------
Bar-Shalom, Y., Li, X. R. and Kirubarajan, T. (2001). Estimation with Applications to Tracking and
Navigation. Wiley. Sec. 5.4 (NIS and NEES consistency tests).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from ..core import NT_PER_UNIT, RAD_S_PER_UNIT, InputError, utc_text
from .alignment import AlignmentResult
from .dynamics_figures import DynamicsModel

__all__ = ["NoiseModel", "Track", "PassInputs", "GyroClipping", "GyroAllanFigures", "NoiseSource", "OpeningFit",
           "FilterStart", "AttitudeHistory"]


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
class PassInputs:
    """The inputs of one reconstruction after the checks of :func:`recon.estimate.estimate_attitude`.

    Attributes
    ----------
    t_mag_ns : (N,) int64, magnetometer time stamps, ns since 1970 (UTC), strictly increasing
    b_body_nT : (N, 3) nT, body frame; b_ref_gcrf_nT : (N, 3) nT, GCRF
    usable : (N,) bool, rows whose field and reference field are both finite (used for updates)
    t_gyro_ns : (G,) int64 or None, gyro time stamps of the finite gyro rows
    w_gyro_body_rad_s : (G, 3) rad/s, body frame, or None
    gyro_extra_psd : (G,) rad^2/s or None, spectral density of each gyro sample's rate error beyond its
        white noise (a clipped axis solved from the field, an error correlated over a time tau_c counted
        as a density 2 sigma^2 tau_c; see :mod:`recon.estimate.clipping`)
    gyro_clipping : GyroClipping or None, what is needed to solve the clipped axes again
    """

    t_mag_ns: np.ndarray
    b_body_nT: np.ndarray
    b_ref_gcrf_nT: np.ndarray
    usable: np.ndarray
    t_gyro_ns: np.ndarray | None = None
    w_gyro_body_rad_s: np.ndarray | None = None
    gyro_extra_psd: np.ndarray | None = None
    gyro_clipping: GyroClipping | None = None


@dataclass(frozen=True)
class GyroClipping:
    """The gyro's clipped samples, as logged.

    Attributes
    ----------
    w_logged_body_rad_s : (G, 3) the gyro as logged, body axes; clipped_sensor : (G, 3) bool, sensor axes
        at full scale; sensor_to_body : (3, 3); full_scale_rad_s : float; note : str, what was done
    inertia_kg_m2 : (3, 3) or None, nominal inertia (Euler's equations through a clipped run)
    m_body_Am2 : (G, 3) or None, the coils' dipole at the gyro samples
    """

    w_logged_body_rad_s: np.ndarray
    clipped_sensor: np.ndarray
    sensor_to_body: np.ndarray
    full_scale_rad_s: float
    note: str = ""
    inertia_kg_m2: np.ndarray | None = None
    m_body_Am2: np.ndarray | None = None


@dataclass(frozen=True)
class GyroAllanFigures:
    """Gyro noise read from the overlapping Allan deviation of the three gyro axes, rad/s units.

    Attributes
    ----------
    arw_rad_sqrt_s : float, angle random walk, rms over the axes, rad/sqrt(s)
    arw_per_axis : list of 3 floats, rad/sqrt(s)
    bias_instability_rad_s : list of 3 floats, rad/s
    rrw_rad_s_sqrt_s : list of 3 floats or None (None: no +1/2 slope on that axis), rad/s/sqrt(s)
    """

    arw_rad_sqrt_s: float
    arw_per_axis: list
    bias_instability_rad_s: list
    rrw_rad_s_sqrt_s: list

    def to_summary(self) -> dict[str, Any]:
        return {"arw_rad_sqrt_s": self.arw_rad_sqrt_s, "arw_per_axis": list(self.arw_per_axis),
                "bias_instability_rad_s": list(self.bias_instability_rad_s),
                "rrw_rad_s_sqrt_s": list(self.rrw_rad_s_sqrt_s)}


@dataclass(frozen=True)
class NoiseSource:
    """Where each noise level of the filter came from: "given", "data" or "data (Allan deviation)".

    A level that does not apply (no gyro; the field-model level in dynamics mode, where it is not
    recorded) is None and left out of the summary.
    """

    mag_nT: str
    gyro_arw_rad_sqrt_s: str | None = None
    gyro_allan: GyroAllanFigures | None = None
    rate_hold_accel_rad_s2: str | None = None
    field_model_nT: str | None = None
    field_model_interval_nT: tuple[float, float] | None = None

    def to_summary(self) -> dict[str, Any]:
        out: dict[str, Any] = {"mag_nT": self.mag_nT}
        if self.gyro_arw_rad_sqrt_s is not None:
            out["gyro_arw_rad_sqrt_s"] = self.gyro_arw_rad_sqrt_s
        if self.gyro_allan is not None:
            out["gyro_allan"] = self.gyro_allan.to_summary()
        if self.rate_hold_accel_rad_s2 is not None:
            out["rate_hold_accel_rad_s2"] = self.rate_hold_accel_rad_s2
        if self.field_model_nT is not None:
            out["field_model_nT"] = self.field_model_nT
        if self.field_model_interval_nT is not None:
            out["field_model_nT_interval_68"] = [float(x) for x in self.field_model_interval_nT]
        return out


@dataclass(frozen=True)
class OpeningFit:
    """Figures of the least-squares fit that found the opening state.

    Attributes
    ----------
    vectors : int, field vectors fitted
    residual_rms_nT : float, rms fit residual, nT
    starts : int, starts tried about the field direction
    starts_at_best : int or None, starts that ended at the best cost (gyro fit only)
    field_turn_deg : float or None, how far the reference field turned in GCRF over the window (gyro fit only)
    """

    vectors: int
    residual_rms_nT: float
    starts: int
    starts_at_best: int | None = None
    field_turn_deg: float | None = None

    def to_summary(self) -> dict[str, Any]:
        out: dict[str, Any] = {"vectors": self.vectors, "residual_rms_nT": self.residual_rms_nT,
                               "starts": self.starts}
        if self.starts_at_best is not None:
            out["starts_at_best"] = self.starts_at_best
        if self.field_turn_deg is not None:
            out["field_turn_deg"] = self.field_turn_deg
        return out


@dataclass(frozen=True)
class FilterStart:
    """How the filter was started (the "init" block of summary.json). Fields of the other mode are None.

    Attributes
    ----------
    method : str, how the opening state was found
    window_s : float, length of the opening window, s
    sigma_att0_deg : list of 3 floats, 1-sigma attitude error per body axis at the start, deg
    smoother_steps_not_pd : int, steps where the smoother's P- was not positive definite
    fit : OpeningFit or None
    carried_back_s : float or None, how far the opening was carried back to the filter's start, s
    t0_utc : str or None, gyro mode: the filter's first time stamp
    bias0_dps : list of 3 floats or None, gyro mode: opening gyro bias, deg/s
    magnetometer_rows_before_gyro : int or None, gyro mode: leading magnetometer rows left out
    rate0_dps : list of 3 floats or None, dynamics mode: opening body rate, deg/s
    """

    method: str
    window_s: float
    sigma_att0_deg: list
    smoother_steps_not_pd: int
    fit: OpeningFit | None = None
    carried_back_s: float | None = None
    t0_utc: str | None = None
    bias0_dps: list | None = None
    magnetometer_rows_before_gyro: int | None = None
    rate0_dps: list | None = None

    def to_summary(self) -> dict[str, Any]:
        head = {"method": self.method, "window_s": self.window_s, "t0_utc": self.t0_utc,
                "bias0_dps": self.bias0_dps, "rate0_dps": self.rate0_dps, "sigma_att0_deg": self.sigma_att0_deg,
                "magnetometer_rows_before_gyro": self.magnetometer_rows_before_gyro,
                "smoother_steps_not_pd": self.smoother_steps_not_pd}
        out = {k: (float(v) if isinstance(v, np.floating) else v) for k, v in head.items() if v is not None}
        if self.fit is not None:
            out.update(self.fit.to_summary())
        if self.carried_back_s is not None:
            out["carried_back_s"] = float(self.carried_back_s)
        return out


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
    noise_source : NoiseSource, where each level came from
    init : FilterStart, how the filter was started
    alignment : AlignmentResult or None, the sensors' alignment found in gyro mode
    model : DynamicsModel or None, the rigid-body model dynamics mode used (fitted or the mission file's)
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
    noise_source: NoiseSource
    init: FilterStart
    nis_dof: int = 3
    alignment: AlignmentResult | None = None
    model: DynamicsModel | None = None

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
            "noise_source": self.noise_source.to_summary(),
            "init": self.init.to_summary(),
            **({} if self.model is None else {"dynamics_model": self.model.to_summary()}),
        }
