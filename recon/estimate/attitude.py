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
from dataclasses import dataclass

import numpy as np

from ..core import NS_PER_S, InputError, white_noise_from_differences
from .alignment import AlignmentPrior
from .clipping import with_clipped_solved
from .coil_torque import CoilTiming, coil_schedule
from .consistency import consistency_anomaly
from .dynamics_mode import estimate_dynamics
from .gyro_check import GyroCheck, check_gyro
from .gyro_mode import estimate_gyro
from .noise import field_model_from_residual
from .types import AttitudeHistory, GyroClipping, NoiseModel, PassInputs

__all__ = ["estimate_attitude", "ModeChoice", "choose_mode"]


def estimate_attitude(t_mag_utc: np.ndarray, b_body_nT: np.ndarray, b_ref_gcrf_nT: np.ndarray, *,
                      gyro_t_utc: np.ndarray | None = None, w_gyro_body_rad_s: np.ndarray | None = None,
                      noise: NoiseModel | None = None, mode: str = "auto",
                      inertia_kg_m2: np.ndarray | None = None, coil_t_utc: np.ndarray | None = None,
                      i_coil_A: np.ndarray | None = None, dipole_per_amp: np.ndarray | None = None,
                      r_gcrf_km: np.ndarray | None = None, init_window_s: float = 120.0,
                      rate_window_s: float = 0.5, alignment_prior: AlignmentPrior | None = None,
                      field_residual_rms_nT: float | None = None, gyro_clipped: np.ndarray | None = None,
                      gyro_sensor_to_body: np.ndarray | None = None, gyro_full_scale_rad_s: float | None = None,
                      coil_timing: CoilTiming | None = None,
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
        equations in dynamics mode); ``init.carried_back_s`` says how far.
    gyro_t_utc : (G,) datetime64[ns], optional
    w_gyro_body_rad_s : (G, 3) rad/s, body frame, optional
        Gyro rate (sensor-to-body rotation applied); non-finite rows are treated as missing.
    noise : NoiseModel, optional
        Noise levels; ``None`` fields are estimated from the data.
    mode : "auto", "gyro" or "dynamics"
        "auto" uses the gyro when it is present and alive (see :func:`recon.estimate.gyro_check.check_gyro`).
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
    gyro_clipped : (G, 3) bool, optional
        Gyro samples whose sensor axis is at full scale (the clean stage's saturation flags); with
        ``gyro_sensor_to_body`` (3, 3) and ``gyro_full_scale_rad_s`` their axes are solved from the
        field's kinematics (:mod:`recon.estimate.clipping`) instead of being read as rates.
    field_residual_rms_nT : float, optional
        rms of the calibrated |b| against |b_ref|, nT: the field-model error level is raised to what it
        shows (see :func:`recon.estimate.noise.field_model_from_residual`).
    alignment_prior : AlignmentPrior, optional
        Gyro mode: what is known of the magnetometer's misalignment, the gyro's scale and the
        time-tag offset before the pass (see :mod:`recon.estimate.alignment`); default: misalignment
        zero +- 1 deg, scale +- 3 %, skew +- 1 %, time tags known.
    coil_timing : CoilTiming, optional
        Dynamics mode: the control ticks, the coil-off window and the magnetometer's sampling, so the
        coil log is placed on the instants its commands switch and the actuation latency is estimated
        from the tick (:func:`recon.estimate.coil_torque.coil_schedule`); default: the log's own
        stamps are the switching instants.
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
    t_mag_ns = _times_ns(t_mag_utc, "t_mag_utc")
    b_body_nT = _vectors(b_body_nT, len(t_mag_ns), "b_body_nT")
    b_ref_gcrf_nT = _vectors(b_ref_gcrf_nT, len(t_mag_ns), "b_ref_gcrf_nT")
    t_gyro_ns, w_gyro, clipped = _gyro_log(gyro_t_utc, w_gyro_body_rad_s, gyro_clipped)
    if mode == "gyro" and t_gyro_ns is None:
        raise InputError("expected gyro time stamps and rates for mode 'gyro', got none", key="mode")
    if mode != "gyro" and inertia_kg_m2 is not None:
        inertia_kg_m2 = _inertia(inertia_kg_m2)
    if r_gcrf_km is not None:
        r_gcrf_km = _vectors(r_gcrf_km, len(t_mag_ns), "r_gcrf_km")
    inputs = PassInputs(t_mag_ns, b_body_nT, b_ref_gcrf_nT, _usable_rows(b_body_nT, b_ref_gcrf_nT), t_gyro_ns,
                        w_gyro)
    if clipped is not None and clipped.any() and gyro_sensor_to_body is not None and gyro_full_scale_rad_s:
        inputs = with_clipped_solved(dataclasses.replace(inputs, gyro_clipping=GyroClipping(
            w_gyro, clipped, np.asarray(gyro_sensor_to_body, float), float(gyro_full_scale_rad_s),
            inertia_kg_m2=None if inertia_kg_m2 is None else _inertia(inertia_kg_m2),
            m_body_Am2=_coil_dipole_at(t_gyro_ns, t_mag_ns[0], coil_t_utc, i_coil_A, dipole_per_amp,
                                        coil_timing))), noise)
    if noise.mag_nT is None and field_residual_rms_nT is not None:
        noise = dataclasses.replace(noise, mag_nT=white_noise_from_differences(b_body_nT[inputs.usable]))
    noise, raised = field_model_from_residual(noise, field_residual_rms_nT)
    choice = choose_mode(inputs, mode, noise)
    if not choice.use_gyro and inertia_kg_m2 is None:
        raise InputError("expected inertia_kg_m2 for dynamics mode (gyro absent or dead), got none",
                         key="inertia_kg_m2")
    report("set-up", 0.0)
    if choice.use_gyro:
        hist = estimate_gyro(inputs, noise, init_window_s, rate_window_s, report, alignment_prior)
    else:
        hist = estimate_dynamics(inputs, noise, inertia_kg_m2, coil_t_utc, i_coil_A, dipole_per_amp, r_gcrf_km,
                                 init_window_s, report, check=choice.check, timing=coil_timing)
    hist = dataclasses.replace(hist, mode_reason=choice.reason, anomalies=choice.anomalies + tuple(hist.anomalies))
    if raised and hist.noise_source.field_model_nT in (None, "given"):  # not fitted on the pass
        hist = dataclasses.replace(hist, noise_source=dataclasses.replace(hist.noise_source,
                                                                          field_model_nT="calibration |b| residual"))
    inconsistent = consistency_anomaly(hist)
    if inconsistent is not None:
        hist = dataclasses.replace(hist, anomalies=hist.anomalies + (inconsistent,))
    report("done", 1.0)
    return hist


def _coil_dipole_at(t_ns: np.ndarray, t_epoch_ns: int, coil_t_utc, i_coil_A, dipole_per_amp,
                    timing: CoilTiming | None) -> np.ndarray | None:
    """The coils' applied dipole over each step between the given times (the applied-current profile:
    latency, off windows; :mod:`.coil_torque`), A m^2; None without a coil log. Without a tick grid
    the log's stamps stand for the switching instants."""
    if coil_t_utc is None or i_coil_A is None or dipole_per_amp is None:
        return None
    t_s = (t_ns - t_epoch_ns) / NS_PER_S
    sched = coil_schedule(t_epoch_ns, float(t_s[-1]), coil_t_utc, np.asarray(i_coil_A, float), dipole_per_amp, timing)
    return sched.dipole_over_steps(t_s, sched.latency_prior_s[0])


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


def _gyro_log(gyro_t_utc, w_gyro_body_rad_s, clipped) -> tuple[np.ndarray | None, np.ndarray | None,
                                                                np.ndarray | None]:
    """Gyro time stamps (int64 ns), rates and clipped flags of the finite rows; Nones without two rows."""
    if gyro_t_utc is None or w_gyro_body_rad_s is None:
        return None, None, None
    t_ns = _times_ns(gyro_t_utc, "gyro_t_utc")
    w = _vectors(w_gyro_body_rad_s, len(t_ns), "w_gyro_body_rad_s")
    keep = np.all(np.isfinite(w), axis=1)
    if keep.sum() < 2:
        return None, None, None
    flags = None if clipped is None else np.asarray(clipped, bool).reshape(len(t_ns), 3)[keep]
    return t_ns[keep], w[keep], flags


def _inertia(inertia_kg_m2) -> np.ndarray:
    a = np.asarray(inertia_kg_m2, float)
    if a.shape != (3, 3):
        raise InputError(f"expected a 3x3 inertia, got shape {a.shape}", key="inertia_kg_m2")
    return a


def _usable_rows(b_body_nT: np.ndarray, b_ref_gcrf_nT: np.ndarray) -> np.ndarray:
    """Rows used for updates: both the field and its reference finite (a reference row is NaN where the
    orbit has no position); at least 10 of them."""
    usable = np.all(np.isfinite(b_body_nT), axis=1) & np.all(np.isfinite(b_ref_gcrf_nT), axis=1)
    if usable.sum() < 10:
        raise InputError(f"expected at least 10 magnetometer rows with a finite field and reference field, got "
                         f"{int(usable.sum())}", key="b_body_nT")
    return usable


@dataclass(frozen=True)
class ModeChoice:
    """Gyro or dynamics mode, and why.

    Attributes
    ----------
    use_gyro : bool
    reason : str, one sentence (the gyro check's verdict, or why there was no choice)
    check : GyroCheck or None (no gyro)
    anomalies : tuple of Anomaly (``gyro_dead`` when the check failed)
    """

    use_gyro: bool
    reason: str
    check: GyroCheck | None
    anomalies: tuple


def choose_mode(inputs: PassInputs, mode: str, noise: NoiseModel) -> ModeChoice:
    """Gyro mode when the gyro is present and alive (or requested), dynamics mode otherwise.

    The gyro is checked whenever there is one (also when dynamics mode is requested), and a dead gyro
    is reported as an anomaly either way. Mode "gyro" without a gyro is refused before this.
    """
    if inputs.t_gyro_ns is None:
        return ModeChoice(False, "gyro absent", None, ())
    t_epoch = inputs.t_mag_ns[0]
    ok = inputs.usable
    check = check_gyro((inputs.t_gyro_ns - t_epoch) / NS_PER_S, inputs.w_gyro_body_rad_s,
                       (inputs.t_mag_ns[ok] - t_epoch) / NS_PER_S, inputs.b_body_nT[ok], noise.gyro_arw_rad_sqrt_s)
    use_gyro = mode != "dynamics"
    anomalies = ()
    if not check.usable:
        use_gyro = mode == "gyro"
        anomalies = (check.anomaly(t_epoch, dynamics_used=not use_gyro),)
    if use_gyro:
        reason = check.reason or "gyro requested"
    else:
        reason = check.reason if mode == "auto" else "dynamics mode requested"
    return ModeChoice(use_gyro, reason, check, anomalies)
