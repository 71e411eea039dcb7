"""The arrays the calibration works on: from the caller's arrays (:class:`CalibrationInputs`) and,
for a pass, from the mission and the cleaned logs (reference magnitude, coil currents, gyro rate)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import NS_PER_S, controller_samples, effective_current

__all__ = ["DEFAULT_NOISE_nT", "CalibrationInputs", "prepare_inputs", "seconds_since", "reference_magnitude",
           "CoilCurrents", "coil_currents", "gyro_rate_body"]

# Default magnetometer noise when the mission file gives none: the middle of 10-100 nT rms for COTS
# magnetoresistive sensors (common practice, no source).
DEFAULT_NOISE_nT = 50.0


def seconds_since(t, t0_ns) -> np.ndarray:
    """Seconds of the datetime64 times ``t`` since ``t0_ns`` (int64 nanoseconds since 1970, UTC)."""
    return (np.asarray(t, dtype="datetime64[ns]").astype(np.int64) - np.int64(t0_ns)).astype(float) / NS_PER_S


@dataclass(frozen=True)
class CalibrationInputs:
    """The arrays of one calibration, in the magnetometer's sensor axes (see ``calibrate_arrays``).

    Attributes
    ----------
    time_utc : (N,) datetime64[ns], UTC
    t0_ns : int64
        The first sample time, ns since 1970 (0 without samples); the origin of ``t_s``.
    t_s : (N,) array, s since ``t0_ns``
    m_sensor_nT : (N, 3) array, nT, sensor axes
    h_nT : (N,) array, nT (NaN: no reference)
    sensor_to_body : (3, 3) array (M, v_body = M v_sensor)
    noise_nT : float
    i_fit_A, i_apply_A : (N, 3) arrays, A, or None (no coils)
    max_current_A : (3,) array, A, or None (no coils)
    exclude : (N,) bool array
    notes : tuple of str
        What was assumed, and why.
    """

    time_utc: np.ndarray
    t0_ns: np.int64
    t_s: np.ndarray
    m_sensor_nT: np.ndarray
    h_nT: np.ndarray
    sensor_to_body: np.ndarray
    noise_nT: float
    i_fit_A: np.ndarray | None
    i_apply_A: np.ndarray | None
    max_current_A: np.ndarray | None
    exclude: np.ndarray
    notes: tuple[str, ...]

    @property
    def coils(self) -> bool:
        """Whether there are coil currents (and so a crosstalk to estimate)."""
        return self.i_fit_A is not None

    @property
    def span(self) -> tuple:
        """(first, last) sample time, UTC; (None, None) without samples."""
        return (self.time_utc[0], self.time_utc[-1]) if len(self.time_utc) else (None, None)


def prepare_inputs(time_utc, m_sensor_nT, h_nT, i_fit_A, sensor_to_body, max_current_A, noise_nT,
                   i_apply_A, exclude) -> CalibrationInputs:
    """The caller's arrays as :class:`CalibrationInputs`, with defaults for what is not given (and a
    note for each default assumed)."""
    t = np.asarray(time_utc, dtype="datetime64[ns]")
    n = len(t)
    notes: list[str] = []
    noise = float(noise_nT) if noise_nT else DEFAULT_NOISE_nT
    if noise_nT is None:
        notes.append(f"magnetometer noise not given; {noise:g} nT assumed (common practice, no source)")
    coils = i_fit_A is not None
    i_fit = np.asarray(i_fit_A, dtype=float).reshape(n, 3) if coils else None
    i_apply = (np.asarray(i_apply_A, dtype=float).reshape(n, 3) if i_apply_A is not None else i_fit)
    imax = None if max_current_A is None else np.asarray(max_current_A, dtype=float)
    if coils and imax is None:
        imax = np.nanmax(np.abs(i_fit), axis=0) if n else np.ones(3)
        imax = np.where(np.isfinite(imax) & (imax > 0), imax, 1.0)
        notes.append("max_current_A not given; the largest logged |current| stands in")
    t0 = t[0].astype(np.int64) if n else np.int64(0)
    return CalibrationInputs(
        time_utc=t, t0_ns=t0, t_s=seconds_since(t, t0),
        m_sensor_nT=np.asarray(m_sensor_nT, dtype=float).reshape(n, 3),
        h_nT=np.asarray(h_nT, dtype=float).reshape(n),
        sensor_to_body=np.eye(3) if sensor_to_body is None else np.asarray(sensor_to_body, dtype=float),
        noise_nT=noise, i_fit_A=i_fit, i_apply_A=i_apply, max_current_A=imax,
        exclude=np.zeros(n, bool) if exclude is None else np.asarray(exclude, dtype=bool), notes=tuple(notes))


def reference_magnitude(reference, time_utc: np.ndarray) -> np.ndarray:
    """|b_ref| (nT) at ``time_utc`` from a ReferenceField-like object (``time_utc``, ``b_gcrf_nT``,
    optional ``valid``) or an (N, 3) array at ``time_utc``; NaN where the reference has no value."""
    if reference is None:
        return np.full(len(time_utc), np.nan)
    if isinstance(reference, np.ndarray):
        b = np.asarray(reference, dtype=float)
        return np.linalg.norm(b, axis=1)
    b = np.asarray(reference.b_gcrf_nT, dtype=float)
    h = np.linalg.norm(b, axis=1)
    valid = np.asarray(getattr(reference, "valid", np.ones(len(h), bool)), dtype=bool) & np.isfinite(h)
    h = np.where(valid, h, np.nan)
    t_ref = np.asarray(reference.time_utc, dtype="datetime64[ns]")
    t_q = np.asarray(time_utc, dtype="datetime64[ns]")
    if len(t_ref) == len(t_q) and np.array_equal(t_ref, t_q):
        return h
    t0 = t_q[0] if len(t_q) else np.datetime64(0, "ns")
    x_ref, x_q = seconds_since(t_ref, t0.astype(np.int64)), seconds_since(t_q, t0.astype(np.int64))
    ok = np.isfinite(h)
    if ok.sum() < 2:
        return np.full(len(t_q), np.nan)
    out = np.interp(x_q, x_ref[ok], h[ok], left=np.nan, right=np.nan)
    # no interpolation across a hole in the reference: a query must have valid neighbours both sides
    j = np.searchsorted(x_ref, x_q)
    jl, jr = np.clip(j - 1, 0, len(x_ref) - 1), np.clip(j, 0, len(x_ref) - 1)
    exact = x_ref[jr] == x_q
    out[~exact & ~(ok[jl] & ok[jr])] = np.nan
    return out


@dataclass(frozen=True)
class CoilCurrents:
    """The coil currents of a pass at the magnetometer samples (all None without a coil log).

    Attributes
    ----------
    i_fit_A, i_apply_A : (N, 3) arrays, A
        The currents to fit K against and to remove with it (see ``calibrate_arrays``).
    max_current_A : (3,) array, A
    mag_sampling : str
    controller_read : (N,) bool array
        Samples the onboard controller read for its commands.
    """

    i_fit_A: np.ndarray | None = None
    i_apply_A: np.ndarray | None = None
    max_current_A: np.ndarray | None = None
    mag_sampling: str | None = None
    controller_read: np.ndarray | None = None


def coil_currents(mission, coils_log, time_utc: np.ndarray) -> CoilCurrents:
    """The currents each magnetometer sample at ``time_utc`` saw, from the cleaned coil log: the
    effective current, or for ``mag_sampling = "coils_off"`` the held logged current (a test of the
    duty cycle)."""
    if mission.coils is None or coils_log is None or not len(coils_log.time_utc):
        return CoilCurrents()
    spec = mission.coils
    ctl = mission.controller
    sampling = spec.mag_sampling
    tc, ic = coils_log.time_utc, np.asarray(coils_log.values, dtype=float)
    timing = {"period_s": None if ctl is None else ctl.period_s,
              "first_tick": None if ctl is None else ctl.first_tick, "off_window_s": spec.off_window_s}
    if sampling == "coils_off":
        i_fit = effective_current(time_utc, tc, ic, "coils_on")
    else:
        i_fit = effective_current(time_utc, tc, ic, sampling, **timing)
    return CoilCurrents(i_fit_A=i_fit, i_apply_A=i_fit, max_current_A=np.asarray(spec.max_current_A, dtype=float),
                        mag_sampling=sampling, controller_read=controller_samples(time_utc, tc, ic, sampling, **timing))


def gyro_rate_body(gyro) -> np.ndarray | None:
    """The gyro's body rate (G, 3), rad/s, NaN where the gyro clipped (a clipped rate would turn the
    field by the wrong angle); None without a gyro log."""
    if gyro is None:
        return None
    w_body = np.array(gyro.values, dtype=float)
    g_sat = getattr(gyro, "saturated", None)
    if g_sat is not None:
        w_body[np.asarray(g_sat, bool).reshape(len(w_body), -1).any(axis=1)] = np.nan
    return w_body
