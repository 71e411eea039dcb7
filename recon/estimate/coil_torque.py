"""The coil dipole that dynamics mode applies over each filter step: the applied-current profile.

The coil log says what was commanded, not when the current flowed. A flight loop reads its sensors at
each control tick ``first_tick + k period``, computes a command and writes the log some time later;
the current starts to flow an actuation latency after the tick and, with windowed magnetometer
sampling, is switched off inside ``[tick - before, tick + after]``. So each logged row is placed on
the last tick at or before its stamp, the current is held from ``tick + latency``, gated by the off
windows (:func:`recon.core.applied_current`, the one implementation of that profile), and averaged
over each step between two magnetometer samples. Without a tick grid (no ``first_tick``) the log's
own stamps stand for the switching instants and the latency is relative to them.

The latency is not known exactly: it is a parameter of the fit (:mod:`.dynamics_fit`) with the prior
given here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import HOLD_INTERVALS, NS_PER_S, InputError, applied_current, control_ticks, held_integral

__all__ = ["CoilTiming", "CoilSchedule", "coil_schedule", "LATENCY_PRIOR_S"]

# Actuation latency from the tick to the current flowing in a healthy drive: 20-150 ms, taken as a
# uniform spread (mean 85 ms, sigma 130 ms / sqrt(12)) (common practice, no source).
LATENCY_PRIOR_S = (0.085, 0.0375)


@dataclass(frozen=True)
class CoilTiming:
    """When the coil commands switch (the mission file's ``[controller]`` and ``[coils]`` settings).

    Attributes
    ----------
    period_s : float or None, control period, s
    first_tick_utc : datetime64 or None, a control tick (UTC); None: the tick grid is unknown
    off_window_s : (before, after) s or None, the coil-off window around each tick ("windowed" sampling)
    mag_sampling : "coils_on", "coils_off", "windowed" or None
    """

    period_s: float | None = None
    first_tick_utc: np.datetime64 | None = None
    off_window_s: tuple[float, float] | None = None
    mag_sampling: str | None = None


@dataclass(frozen=True)
class CoilSchedule:
    """The coil log placed on its switching instants, seconds since the pass epoch.

    Attributes
    ----------
    switch_s : (M,) s, the instant each logged row's command is issued (its tick, or its stamp)
    i_A : (M, 3) A, logged commands (non-finite rows count as zero current)
    dipole_per_amp : (3, 3) A m^2 per A, nominal (m_body = C i)
    gate : (ticks_s, before_s, after_s) or None, the coil-off windows
    max_hold_s : float, longest hold of a command, s
    latency_prior_s : (mean, sigma), s, the delay from ``switch_s`` to the current flowing
    on_ticks : bool, True when ``switch_s`` are control ticks (False: the log's stamps)
    """

    switch_s: np.ndarray
    i_A: np.ndarray
    dipole_per_amp: np.ndarray
    gate: tuple | None
    max_hold_s: float
    latency_prior_s: tuple[float, float]
    on_ticks: bool

    def dipole_over_steps(self, t_s: np.ndarray, latency_s: float, gains: np.ndarray | None = None) -> np.ndarray:
        """Mean coil dipole over each step [t_k, t_k+1], A m^2, body frame, (K, 3); the last step repeats.

        ``gains`` (3,) scales each coil's dipole per amp (``m = C diag(gains) i``; default 1).

        The applied current is piecewise constant between its switching instants and window edges, so
        it is evaluated once inside each such piece and integrated exactly over the steps.
        """
        t = np.asarray(t_s, float)
        t_on = self.switch_s + latency_s
        edges = [t[:1], t[-1:], t_on]
        if self.gate is not None:
            ticks, before, after = self.gate
            edges += [ticks - before, ticks + after]
        ev = np.unique(np.concatenate(edges))
        ev = ev[(ev >= t[0]) & (ev <= t[-1])]
        mid = 0.5 * (ev[:-1] + ev[1:])
        current = applied_current(mid, t_on, self.i_A, gate=self.gate, max_hold_s=self.max_hold_s)
        c = self.dipole_per_amp if gains is None else self.dipole_per_amp * np.asarray(gains, float)[None, :]
        m = np.nan_to_num(current) @ c.T
        integral = held_integral(ev[:-1], m, t, before_first="zero")
        out = np.zeros((len(t), 3))
        if len(t) > 1:
            out[:-1] = np.diff(integral, axis=0) / np.diff(t)[:, None]
            out[-1] = out[-2]
        return out


def coil_schedule(t_epoch_ns: int, t_stop_s: float, coil_t_utc: np.ndarray | None, i_coil_A: np.ndarray | None,
                  dipole_per_amp: np.ndarray | None, timing: CoilTiming | None) -> CoilSchedule | None:
    """Place the coil log on its control ticks; None without a coil log (no magnetic torque).

    Parameters
    ----------
    t_epoch_ns : int, the pass epoch (first magnetometer stamp), ns since 1970
    t_stop_s : float, end of the pass, s since the epoch
    coil_t_utc : (C,) datetime64[ns], increasing; i_coil_A : (C, 3) A; dipole_per_amp : (3, 3) A m^2/A
    timing : CoilTiming or None (nothing known: the log's stamps are the switching instants)

    Raises
    ------
    InputError
        Shapes that do not match, or "windowed" sampling without its off window.
    """
    if coil_t_utc is None or i_coil_A is None or dipole_per_amp is None or len(coil_t_utc) == 0:
        return None
    t_log = (np.asarray(coil_t_utc).astype("datetime64[ns]").astype(np.int64) - t_epoch_ns) / NS_PER_S
    i = np.asarray(i_coil_A, float)
    if i.shape != (len(t_log), 3):
        raise InputError(f"expected coil currents of shape ({len(t_log)}, 3), got {i.shape}", key="i_coil_A")
    timing = timing or CoilTiming()
    # the log's usual longest interval (90th percentile: a log written at the window edges alternates
    # short and long intervals, and its median is the short one)
    usual = float(np.percentile(np.diff(t_log), 90)) if len(t_log) > 1 else (timing.period_s or 1.0)
    period = timing.period_s or usual
    max_hold = HOLD_INTERVALS * max(usual, period)
    if timing.first_tick_utc is None or timing.period_s is None:
        # no tick grid: the stamps stand for the switching instants; the delay from them is unknown
        # within a period either way (common practice, no source)
        return CoilSchedule(t_log, i, np.asarray(dipole_per_amp, float), None, max_hold, (0.0, 0.5 * period), False)
    first = (np.datetime64(timing.first_tick_utc, "ns").astype(np.int64) - t_epoch_ns) / NS_PER_S
    # the command a row logs is the one of the last tick at or before its stamp (1 us tolerance: a
    # row stamped at its tick)
    k = np.floor((t_log - first) / period + 1e-6)
    switch = first + k * period
    gate = None
    if timing.mag_sampling == "windowed":
        if timing.off_window_s is None:
            raise InputError("expected coils.off_window_s = [before, after] for mag_sampling = \"windowed\", got none",
                             key="coils.off_window_s")
        before, after = (float(w) for w in timing.off_window_s)
        ticks = control_ticks(min(0.0, switch[0]) - period, max(t_stop_s, t_log[-1]) + period, period, first)
        gate = (ticks, before, after)
    return CoilSchedule(switch, i, np.asarray(dipole_per_amp, float), gate, max_hold, LATENCY_PRIOR_S, True)
