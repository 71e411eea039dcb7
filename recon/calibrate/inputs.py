"""The arrays the calibration works on: from the caller's arrays (:class:`CalibrationInputs`) and,
for a pass, from the mission and the cleaned logs (reference magnitude, coil currents, gyro rate).

The current each magnetometer sample saw, when the control ticks are known: the command of the tick
that starts the sample's period, which is the coil-log row written before the period ends (before the
next off window opens, or before the next tick without windows). A log written at some phase inside
the period, not at the tick, then still gives each sample its period's command; holding the last
logged value (:func:`recon.core.effective_current`) would give the samples between the tick and the
log row the previous command. A sample stamped with a tick's instant belongs to the period before it
(a flight loop reads its sensors at the tick, then commands). Without ``first_tick`` the ticks are
placed from the log's own changes (:func:`recon.core.infer_first_tick`), and the two rules agree."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import (
    HOLD_INTERVALS,
    NS_PER_S,
    control_ticks,
    controller_samples,
    effective_current,
    held_values,
    in_off_window,
    infer_first_tick,
    seconds_since,
)

__all__ = ["DEFAULT_NOISE_nT", "CalibrationInputs", "prepare_inputs", "seconds_since", "reference_magnitude",
           "CoilCurrents", "coil_currents", "period_current", "gyro_rate_body"]

# Default magnetometer noise when the mission file gives none: the middle of 10-100 nT rms for COTS
# magnetoresistive sensors (common practice, no source).
DEFAULT_NOISE_nT = 50.0


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
    coils_off : (N,) bool array or None
        Samples inside a coil-off window (windowed sampling); None otherwise.
    ticks_s : (K,) array, s since ``t0_ns``, or None
        The control ticks, when known.
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
    coils_off: np.ndarray | None
    ticks_s: np.ndarray | None
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
                   i_apply_A, exclude, coils_off=None, tick_time_utc=None) -> CalibrationInputs:
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
        exclude=np.zeros(n, bool) if exclude is None else np.asarray(exclude, dtype=bool),
        coils_off=None if coils_off is None else np.asarray(coils_off, dtype=bool).reshape(n),
        ticks_s=None if tick_time_utc is None else seconds_since(tick_time_utc, t0), notes=tuple(notes))


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
    coils_off : (N,) bool array or None
        Samples inside a coil-off window ("windowed" only).
    tick_time_utc : (K,) datetime64[ns] or None
        The control ticks over the samples, when the controller's period is known.
    """

    i_fit_A: np.ndarray | None = None
    i_apply_A: np.ndarray | None = None
    max_current_A: np.ndarray | None = None
    mag_sampling: str | None = None
    controller_read: np.ndarray | None = None
    coils_off: np.ndarray | None = None
    tick_time_utc: np.ndarray | None = None


def coil_currents(mission, coils_log, time_utc: np.ndarray) -> CoilCurrents:
    """The currents each magnetometer sample at ``time_utc`` saw, from the cleaned coil log: the
    command of the sample's control period when the ticks are known (:func:`period_current`), else
    the effective current; for ``mag_sampling = "coils_off"`` the held logged current (a test of the
    duty cycle)."""
    if mission.coils is None or coils_log is None or not len(coils_log.time_utc):
        return CoilCurrents()
    spec = mission.coils
    ctl = mission.controller
    sampling = spec.mag_sampling
    tc, ic = coils_log.time_utc, np.asarray(coils_log.values, dtype=float)
    period = None if ctl is None else ctl.period_s
    first = None if ctl is None else ctl.first_tick
    ticks = None
    if period and len(time_utc):
        first = infer_first_tick(tc, ic, period) if first is None else first
        ticks = _ticks_over(time_utc, first, period)
    timing = {"period_s": period, "first_tick": first, "off_window_s": spec.off_window_s}
    if sampling == "coils_off" or ticks is None:
        i_fit = effective_current(time_utc, tc, ic, "coils_on" if sampling == "coils_off" else sampling, **timing)
        read = controller_samples(time_utc, tc, ic, sampling, **timing)
        off = None
    else:
        before = spec.off_window_s[0] if sampling == "windowed" else 0.0
        i_fit, off = period_current(time_utc, tc, ic, ticks, before,
                                    spec.off_window_s[1] if sampling == "windowed" else None)
        read = off if sampling == "windowed" else _last_before(time_utc, ticks)
    return CoilCurrents(i_fit_A=i_fit, i_apply_A=i_fit, max_current_A=np.asarray(spec.max_current_A, dtype=float),
                        mag_sampling=sampling, controller_read=read, coils_off=off, tick_time_utc=ticks)


def _ticks_over(time_utc, first_tick, period_s) -> np.ndarray:
    """The ticks ``first_tick + k period_s`` (k >= 0) from one before the first sample to one after the
    last."""
    t0 = np.asarray(time_utc, dtype="datetime64[ns]")[0].astype(np.int64)
    x = seconds_since(time_utc, t0)
    f = float(seconds_since(np.array([first_tick], dtype="datetime64[ns]"), t0)[0])
    ticks = control_ticks(max(x[0] - period_s, f), x[-1] + period_s, period_s, f)
    return t0 + np.round(ticks * NS_PER_S).astype(np.int64).astype("timedelta64[ns]")


def period_current(time_utc: np.ndarray, coil_time_utc: np.ndarray, i_coil_A: np.ndarray,
                   tick_time_utc: np.ndarray, before_s: float,
                   after_s: float | None) -> tuple[np.ndarray, np.ndarray | None]:
    """The command of each sample's control period (see the module notes), and the coil-off mask.

    Parameters
    ----------
    time_utc : (N,) datetime64[ns]; coil_time_utc : (C,) datetime64[ns]; i_coil_A : (C, 3) A
    tick_time_utc : (K,) datetime64[ns], increasing, covering the samples
    before_s, after_s : float, s
        The off window around each tick (``after_s`` None: no windows, "coils_on"; ``before_s`` 0).

    Returns
    -------
    (N, 3) array, A (zero inside the off windows, NaN where the log has no recent row);
    (N,) bool array of the samples inside an off window, or None without windows
    """
    tm = np.asarray(time_utc, dtype="datetime64[ns]").astype(np.int64)
    ticks = np.asarray(tick_time_utc, dtype="datetime64[ns]").astype(np.int64)
    tc = np.asarray(coil_time_utc, dtype="datetime64[ns]").astype(np.int64)
    # the period's end: the first tick at or after the sample (a sample at a tick ends the period before)
    end = ticks[np.clip(np.searchsorted(ticks, tm, side="left"), 0, len(ticks) - 1)]
    med = float(np.median(np.diff(tc))) / NS_PER_S if len(tc) > 1 else np.inf
    period_s = float(np.median(np.diff(ticks))) / NS_PER_S if len(ticks) > 1 else 0.0
    max_hold_ns = max(HOLD_INTERVALS * med, 2.0 * period_s) * NS_PER_S
    query = end - int(round(before_s * NS_PER_S))
    i = held_values(tc, np.asarray(i_coil_A, float), query, strictly_before=True, max_age=max_hold_ns)
    if after_s is None:
        return i, None
    off = in_off_window(tm, ticks, int(round(before_s * NS_PER_S)), int(round(after_s * NS_PER_S)), edge=1)
    i[off] = 0.0
    return i, off


def _last_before(time_utc, tick_time_utc) -> np.ndarray:
    """The last sample at or before each tick (N,) bool: what a loop that reads its sensors at the tick
    reads."""
    tm = np.asarray(time_utc, dtype="datetime64[ns]").astype(np.int64)
    ticks = np.asarray(tick_time_utc, dtype="datetime64[ns]").astype(np.int64)
    j = np.searchsorted(tm, ticks, side="right") - 1
    out = np.zeros(len(tm), bool)
    out[j[(j >= 0) & (ticks >= tm[0]) & (ticks <= tm[-1])]] = True
    return out


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
