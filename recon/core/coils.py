"""The coil current each magnetometer sample saw (the *effective* current).

Three ways a satellite can sample its magnetometer (``[coils] mag_sampling``):

- ``"coils_on"``: the magnetometer samples whenever it likes; each sample sees the current last
  logged strictly before it (zero-order hold of the coil log; a sample stamped with the same instant
  as a command was taken before it: a flight loop reads its sensors at the tick, then commands).
- ``"coils_off"``: the coils are switched off whenever the magnetometer samples: every sample sees
  zero current.
- ``"windowed"``: the coils are off from ``before`` seconds ahead of each control tick to ``after``
  seconds past it (ticks at ``first_tick + k period_s``, k = 0, 1, ...); samples inside a window see
  zero, the others the held logged current.

A sample before the first logged current, or further than ``max_hold_s`` after the last logged
current before it, saw an unknown current: NaN.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError

__all__ = ["effective_current", "in_off_window", "infer_first_tick", "controller_samples"]

_NS = 1_000_000_000
# A logged current is held for at most this many median log intervals; past that the log has a gap
# and the current is unknown (common practice, no source).
HOLD_INTERVALS = 3.0
# Tolerance on window edges: a sample within 1 ns of an edge counts as inside (time stamps are ns).
_EDGE_s = 1e-9


def _ns(t) -> np.ndarray:
    return np.asarray(t, dtype="datetime64[ns]").astype(np.int64)


def in_off_window(mag_time_utc: np.ndarray, first_tick: np.datetime64, period_s: float,
                  off_window_s: tuple[float, float]) -> np.ndarray:
    """True for samples inside an off window ``[tick - before, tick + after]``, ticks k >= 0.

    Parameters
    ----------
    mag_time_utc : (N,) datetime64[ns], UTC
    first_tick : datetime64, UTC
    period_s : float, s
    off_window_s : (before, after), s

    Returns
    -------
    (N,) bool array
    """
    before, after = (float(off_window_s[0]), float(off_window_s[1]))
    x = (_ns(mag_time_utc) - _ns(first_tick)).astype(float) / _NS  # s since the first tick
    k_hi = np.floor((x + before + _EDGE_s) / period_s)  # last tick not after t + before
    k_lo = np.ceil((x - after - _EDGE_s) / period_s)  # first tick not before t - after
    return (k_hi >= np.maximum(k_lo, 0.0)) & (k_hi >= 0)


def infer_first_tick(coil_time_utc: np.ndarray, i_coil_A: np.ndarray, period_s: float) -> np.datetime64:
    """Place the control-tick grid from the instants the logged current changes.

    The phase of the changes modulo the period is averaged on the circle (a command changes at a tick;
    a log slower than the ticks or sampled between them puts the change up to one log interval late,
    and the estimate with it). Without any change, the first log time is taken as a tick.

    Returns
    -------
    datetime64[ns]: a tick at or before the first logged current.
    """
    t = _ns(coil_time_utc)
    i = np.asarray(i_coil_A, dtype=float)
    if len(t) == 0:
        raise InputError("expected coil-current rows to place the control ticks, got none", key="coils.file")
    change = np.r_[False, np.any(np.diff(i, axis=0) != 0, axis=1)] if len(t) > 1 else np.zeros(1, bool)
    period_ns = period_s * _NS
    if not np.any(change):
        return np.datetime64(int(t[0]), "ns")
    rel = (t[change] - t[0]).astype(float)
    ang = 2 * np.pi * np.mod(rel, period_ns) / period_ns
    phase = np.mod(np.arctan2(np.sin(ang).mean(), np.cos(ang).mean()), 2 * np.pi) / (2 * np.pi) * period_ns
    first = t[0] + int(round(phase)) - int(round(period_ns))
    return np.datetime64(int(first), "ns")


def effective_current(mag_time_utc: np.ndarray, coil_time_utc: np.ndarray, i_coil_A: np.ndarray,
                      mag_sampling: str, period_s: float | None = None,
                      first_tick: np.datetime64 | None = None,
                      off_window_s: tuple[float, float] | None = None, *,
                      max_hold_s: float | None = None) -> np.ndarray:
    """Coil current seen by each magnetometer sample.

    Parameters
    ----------
    mag_time_utc : (N,) datetime64[ns], UTC
        Magnetometer sample times.
    coil_time_utc : (C,) datetime64[ns], UTC, increasing
        Coil-log times.
    i_coil_A : (C, 3) array, A
        Logged currents, one column per coil.
    mag_sampling : {"coils_on", "coils_off", "windowed"}
    period_s : float, s
        Control period (required for "windowed").
    first_tick : datetime64, UTC, optional
        First control tick ("windowed"); None: placed by :func:`infer_first_tick`.
    off_window_s : (before, after), s
        Off window around each tick (required for "windowed").
    max_hold_s : float, s, optional
        Longest hold of a logged current; default 3 median log intervals (and at least one control
        period when given).

    Returns
    -------
    (N, 3) array, A
        NaN where the current is unknown (before the first logged current or across a log gap).

    Raises
    ------
    InputError
        Unknown ``mag_sampling`` or a missing window setting.
    """
    tm = _ns(mag_time_utc)
    n = len(tm)
    if mag_sampling == "coils_off":
        return np.zeros((n, 3))
    if mag_sampling not in ("coils_on", "windowed"):
        raise InputError(f"expected mag_sampling 'coils_on', 'coils_off' or 'windowed', got {mag_sampling!r}",
                         key="coils.mag_sampling")
    tc = _ns(coil_time_utc)
    ic = np.asarray(i_coil_A, dtype=float).reshape(-1, 3)
    if len(tc) != len(ic):
        raise InputError(f"expected one coil-current row per coil time, got {len(ic)} rows for {len(tc)} times",
                         key="coils.file")
    out = np.full((n, 3), np.nan)
    if len(tc):
        if max_hold_s is None:
            med = float(np.median(np.diff(tc))) / _NS if len(tc) > 1 else np.inf
            max_hold_s = max(HOLD_INTERVALS * med, period_s or 0.0)
        # strictly before: a sample stamped with the same instant as a command was read before it
        # (a flight loop reads its sensors at the tick, then commands)
        j = np.searchsorted(tc, tm, side="left") - 1
        known = j >= 0
        jj = np.clip(j, 0, None)
        known &= (tm - tc[jj]).astype(float) / _NS <= max_hold_s
        out[known] = ic[jj[known]]
    if mag_sampling == "windowed":
        if period_s is None or not period_s > 0:
            raise InputError(f"expected controller.period_s > 0 for mag_sampling = \"windowed\", got {period_s!r}",
                             key="controller.period_s")
        if off_window_s is None:
            raise InputError("expected coils.off_window_s = [before, after] for mag_sampling = \"windowed\", "
                             "got none", key="coils.off_window_s")
        if first_tick is None:
            if not len(tc):
                return out
            first_tick = infer_first_tick(coil_time_utc, ic, period_s)
        out[in_off_window(mag_time_utc, first_tick, period_s, off_window_s)] = 0.0
    return out


def controller_samples(mag_time_utc: np.ndarray, coil_time_utc: np.ndarray, i_coil_A: np.ndarray,
                       mag_sampling: str, period_s: float | None = None,
                       first_tick: np.datetime64 | None = None,
                       off_window_s: tuple[float, float] | None = None) -> np.ndarray:
    """The magnetometer samples the onboard controller most likely read to compute its commands.

    With ``"windowed"`` sampling, the samples inside the off windows (taken for the controller while
    the coils are off); otherwise the last sample at or before each change of the logged current.
    Their noise drives the command that follows, which matters to the step-response estimate.

    Returns
    -------
    (N,) bool array
    """
    tm = _ns(mag_time_utc)
    out = np.zeros(len(tm), bool)
    tc = _ns(coil_time_utc)
    ic = np.asarray(i_coil_A, dtype=float).reshape(-1, 3)
    if mag_sampling == "windowed" and period_s and off_window_s is not None:
        if first_tick is None:
            if not len(tc):
                return out
            first_tick = infer_first_tick(coil_time_utc, ic, period_s)
        return in_off_window(mag_time_utc, first_tick, period_s, off_window_s)
    if len(tc) < 2:
        return out
    d = np.diff(ic, axis=0)
    change = np.r_[False, np.any((d != 0) & np.isfinite(d), axis=1)]
    j = np.searchsorted(tm, tc[change], side="right") - 1
    out[j[j >= 0]] = True
    return out
