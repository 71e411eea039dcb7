"""The coil current at any instant: control ticks, coil-off windows, held, applied and effective current.

One implementation of each idea, for every stage that needs it:

- the control ticks ``first_tick + k period_s`` and their phase read from time stamps;
- the coil-off windows ``[tick - before, tick + after]`` of windowed magnetometer sampling;
- a logged value held from its time stamp to the next (zero-order hold), with a longest hold;
- the *applied* current: the logged command held from ``t_log + latency``, zero inside the off
  windows (what produces torque);
- the *effective* current: what each magnetometer sample saw (what corrupts the reading).

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
from scipy.stats import circmean

from .constants import NS_PER_S
from .errors import InputError
from .signal import held_integral

__all__ = ["HOLD_INTERVALS", "control_ticks", "tick_phase", "infer_first_tick", "in_off_window",
           "in_off_window_utc", "held_values", "applied_current", "effective_current", "controller_samples",
           "current_log_with_off_windows", "mean_dipole_over_steps"]

# A logged current is held for at most this many median log intervals; past that the log has a gap
# and the current is unknown (common practice, no source).
HOLD_INTERVALS = 3.0


def _ns(t) -> np.ndarray:
    return np.asarray(t, dtype="datetime64[ns]").astype(np.int64)


# ------------------------------------------------------------------------------------------ ticks
def control_ticks(t_start_s: float, t_stop_s: float, period_s: float, first_tick_s: float) -> np.ndarray:
    """Control tick instants ``first_tick + k period`` inside ``[t_start, t_stop]``, s (K,)."""
    k0 = int(np.ceil((t_start_s - first_tick_s) / period_s - 1e-9))
    k1 = int(np.floor((t_stop_s - first_tick_s) / period_s + 1e-9))
    if k1 < k0:
        return np.zeros(0)
    return first_tick_s + period_s * np.arange(k0, k1 + 1, dtype=float)


def tick_phase(t: np.ndarray, period: float) -> float:
    """Phase of a set of instants on the tick circle: their circular mean modulo ``period``, in
    ``[0, period)`` (same unit as ``t``). Instants spread within a period around a tick average to
    that tick even when they straddle it."""
    return float(circmean(np.mod(np.asarray(t, float), period), high=period, low=0.0))


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
    period_ns = period_s * NS_PER_S
    if not np.any(change):
        return np.datetime64(int(t[0]), "ns")
    phase = tick_phase((t[change] - t[0]).astype(float), period_ns)
    first = t[0] + int(round(phase)) - int(round(period_ns))
    return np.datetime64(int(first), "ns")


# ------------------------------------------------------------------------------------ off windows
def in_off_window(t: np.ndarray, ticks: np.ndarray, before: float, after: float, *, edge: float = 0.0) -> np.ndarray:
    """True where an instant lies in a coil-off window ``[tick - before, tick + after]`` of some tick.

    Parameters
    ----------
    t : (N,) instants; ticks : (K,) sorted ticks, same time base (float s or int ns)
    before, after : window extent around each tick, same unit; windows must not overlap
    edge : tolerance added on both sides (an instant within ``edge`` of a window counts as inside)

    Returns
    -------
    (N,) bool array
    """
    t = np.asarray(t)
    if len(ticks) == 0:
        return np.zeros(t.shape, bool)
    # the first tick whose window ends at or after t: the only window that can hold t
    k = np.minimum(np.searchsorted(ticks, t - after - edge, side="left"), len(ticks) - 1)
    tick = ticks[k]
    return (t >= tick - before - edge) & (t <= tick + after + edge)


def in_off_window_utc(mag_time_utc: np.ndarray, first_tick: np.datetime64, period_s: float,
                      off_window_s: tuple[float, float]) -> np.ndarray:
    """:func:`in_off_window` for UTC instants and the tick grid ``first_tick + k period_s``, k >= 0; an
    instant within 1 ns of a window's edge counts as inside (time stamps are ns).

    Parameters
    ----------
    mag_time_utc : (N,) datetime64[ns], UTC; first_tick : datetime64, UTC; period_s : float, s;
    off_window_s : (before, after), s

    Returns
    -------
    (N,) bool array
    """
    x = _ns(mag_time_utc) - _ns(first_tick)
    period_ns = int(round(period_s * NS_PER_S))
    before, after = (int(round(float(w) * NS_PER_S)) for w in off_window_s)
    last = int(x.max()) if len(x) else 0
    ticks = period_ns * np.arange(0, max(last, 0) // period_ns + 2, dtype=np.int64)
    return in_off_window(x, ticks, before, after, edge=1)


# ----------------------------------------------------------------------------- held and applied
def held_values(t_log: np.ndarray, values: np.ndarray, t_query: np.ndarray, *, strictly_before: bool = False,
                tol: float = 0.0, max_age: float | None = None) -> np.ndarray:
    """Zero-order hold: the last logged value at or before each query time.

    Parameters
    ----------
    t_log : (M,) sorted sample times; values : (M, ...) logged values; t_query : (Q,) query times
    strictly_before : take the last sample strictly before the query (a sample stamped at the query
        instant is not yet seen)
    tol : a sample up to ``tol`` after the query still counts as at it (float time stamps)
    max_age : NaN where the last sample is older than this (a gap in the log)

    Returns
    -------
    (Q, ...) float array, NaN before the first sample
    """
    t_log = np.asarray(t_log)
    values = np.asarray(values, float)
    t_query = np.asarray(t_query)
    if len(t_log) == 0:
        return np.full((len(t_query), *values.shape[1:]), np.nan)
    if strictly_before:
        idx = np.searchsorted(t_log, t_query, side="left") - 1
    else:
        idx = np.searchsorted(t_log, t_query + tol, side="right") - 1
    ic = np.clip(idx, 0, len(values) - 1)
    out = values[ic].copy()
    bad = idx < 0
    if max_age is not None:
        bad |= (t_query - t_log[ic]) > max_age
    out[bad] = np.nan
    return out


def applied_current(t_s: np.ndarray, t_coil_s: np.ndarray, i_coil_A: np.ndarray, *, latency_s: float = 0.0,
                    gate: tuple[np.ndarray, float, float] | None = None, max_hold_s: float = 2.5,
                    tol_s: float = 1e-9) -> np.ndarray:
    """The current flowing at instants ``t_s``: the logged command held from ``t_log + latency``,
    zero inside coil-off windows, NaN where the log has no value younger than ``max_hold_s``.

    Parameters
    ----------
    t_s : (N,) s; t_coil_s : (M,) s sorted; i_coil_A : (M, 3) A
    latency_s : the command acts this long after its log time stamp
    gate : (ticks_s, before_s, after_s) of windowed sampling, or None
    max_hold_s : longest hold of a logged command, s
    tol_s : a command stamped up to this after an instant already acts at it

    Returns
    -------
    (N, 3) array, A
    """
    t = np.asarray(t_s, float)
    t_on = np.asarray(t_coil_s, float) + latency_s
    out = held_values(t_on, i_coil_A, t, tol=tol_s, max_age=max_hold_s).reshape(len(t), -1)
    if gate is not None:
        out[in_off_window(t, *gate)] = 0.0
    return out


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
            med = float(np.median(np.diff(tc))) / NS_PER_S if len(tc) > 1 else np.inf
            max_hold_s = max(HOLD_INTERVALS * med, period_s or 0.0)
        # strictly before: a sample stamped with the same instant as a command was read before it
        # (a flight loop reads its sensors at the tick, then commands)
        out = held_values(tc, ic, tm, strictly_before=True, max_age=max_hold_s * NS_PER_S)
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
        out[in_off_window_utc(mag_time_utc, first_tick, period_s, off_window_s)] = 0.0
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
        return in_off_window_utc(mag_time_utc, first_tick, period_s, off_window_s)
    if len(tc) < 2:
        return out
    d = np.diff(ic, axis=0)
    change = np.r_[False, np.any((d != 0) & np.isfinite(d), axis=1)]
    j = np.searchsorted(tm, tc[change], side="right") - 1
    out[j[j >= 0]] = True
    return out


# ------------------------------------------------------------------------- profiles over steps
def current_log_with_off_windows(tick_utc: np.ndarray, i_cmd_A: np.ndarray, before_s: float,
                                 after_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Coil current as a held-value log when the coils are off around every control tick.

    With windowed magnetometer sampling the command of tick k flows from ``tick_k + after`` to
    ``tick_k+1 - before`` and nothing flows inside ``[tick - before, tick + after]``. The result
    lists (time, current) rows whose held values reproduce that profile.

    Parameters
    ----------
    tick_utc : (K,) datetime64[ns]; i_cmd_A : (K, 3) A; before_s, after_s : s

    Returns
    -------
    t_utc : (2K,) datetime64[ns]; i_A : (2K, 3) A
    """
    ticks = _ns(tick_utc)
    i = np.asarray(i_cmd_A, float)
    t = np.empty(2 * len(ticks), np.int64)
    t[0::2] = ticks - int(round(before_s * NS_PER_S))
    t[1::2] = ticks + int(round(after_s * NS_PER_S))
    out = np.zeros((2 * len(ticks), 3))
    out[1::2] = i
    return t.astype("datetime64[ns]"), out


def mean_dipole_over_steps(t_steps: np.ndarray, t_coil: np.ndarray | None, i_coil_A: np.ndarray | None,
                           dipole_per_amp: np.ndarray | None) -> np.ndarray:
    """Mean coil dipole over each step [t_k, t_k+1], body frame, A m^2, (K, 3).

    Each logged current is held until the next log row (zero before the first); the dipole is
    ``m = C i``. The last step repeats the one before it.
    """
    k = len(t_steps)
    if t_coil is None or i_coil_A is None or dipole_per_amp is None or len(t_coil) == 0:
        return np.zeros((k, 3))
    m = np.nan_to_num(np.asarray(i_coil_A, float)) @ np.asarray(dipole_per_amp, float).T
    ints = held_integral(t_coil, m, np.asarray(t_steps, float), before_first="zero")
    out = np.zeros((k, 3))
    h = np.diff(t_steps)
    out[:-1] = (ints[1:] - ints[:-1]) / h[:, None]
    out[-1] = out[-2] if k > 1 else 0.0
    return out
