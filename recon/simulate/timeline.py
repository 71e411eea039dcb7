"""The simulated pass's clock: sample grids, control ticks, and the segments between events.

All instants are integer nanoseconds since the pass epoch, so that sample, tick and window times
compare exactly. The magnetometer samples every ``1/mag_rate_hz`` from the epoch, the gyro every
``1/gyro_rate_hz``; control ticks fall at ``first_tick + k period_s`` and each has a magnetometer
sample at the tick itself (the "tick sample" the controller uses). Between consecutive events
(samples, ticks, the instants commands take effect, coil-off window edges, fault edges) the coil
dipole and the disturbance torque are constant: those are the segments the integrator crosses.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import NS_PER_S, InputError, in_off_window

__all__ = ["COIL_FAULTS", "Timeline", "Segments", "timeline", "segments", "on_window_s", "step_ns", "fault_window_ns",
           "coil_gain"]

COIL_FAULTS = ("coil_polarity_inverted", "coil_dead", "coil_gain_off")


@dataclass(frozen=True)
class Timeline:
    """Sample grids and ticks of one pass, ns since the pass epoch.

    Attributes
    ----------
    duration_ns : int; t_mag, t_gyro, ticks : (N,), (G,), (K,) int64; end : int, last sample instant
    mag_step, gyro_step, period : int, ns
    latency : int, ns from a tick to the moment its command takes effect
    windowed : bool; before, after : int, coil-off window around each tick, ns (0 unless windowed)
    """

    duration_ns: int
    t_mag: np.ndarray
    t_gyro: np.ndarray
    ticks: np.ndarray
    end: int
    mag_step: int
    gyro_step: int
    period: int
    latency: int
    windowed: bool
    before: int
    after: int


@dataclass(frozen=True)
class Segments:
    """The pieces of the pass between consecutive events.

    Attributes
    ----------
    ev : (E,) int64 event instants; mid : (E - 1,) segment midpoints
    cmd : (E - 1,) index of the tick whose command flows in each segment (-1: none yet)
    gain : (E - 1, 3) factor on each coil's commanded current (faults, off windows)
    tau_index : (E - 1,) control interval of each segment (for the disturbance torque)
    """

    ev: np.ndarray
    mid: np.ndarray
    cmd: np.ndarray
    gain: np.ndarray
    tau_index: np.ndarray


def step_ns(rate_hz: float, key: str) -> int:
    """Whole nanoseconds per sample at ``rate_hz`` (an error names ``key`` when the rate does not give them)."""
    step = NS_PER_S / rate_hz
    if not rate_hz > 0 or abs(step - round(step)) > 1e-6:
        raise InputError(f"expected a rate giving a whole number of nanoseconds per sample, got {rate_hz!r}",
                         key=key)
    return int(round(step))


def fault_window_ns(f, duration_ns: int) -> tuple[int, int]:
    """``[start, stop)`` of a fault, ns since the epoch (None ends mean the whole pass)."""
    a = 0 if f.start_s is None else int(round(f.start_s * NS_PER_S))
    b = duration_ns + 1 if f.stop_s is None else int(round(f.stop_s * NS_PER_S))
    return a, b


def coil_gain(t_ns: np.ndarray, faults, duration_ns: int) -> np.ndarray:
    """Factor on each coil's current (N, 3) from the coil faults active at each instant."""
    g = np.ones((len(t_ns), 3))
    for f in faults:
        if f.kind not in COIL_FAULTS:
            continue
        a, b = fault_window_ns(f, duration_ns)
        on = (t_ns >= a) & (t_ns < b)
        factor = {"coil_polarity_inverted": -1.0, "coil_dead": 0.0}.get(f.kind, f.value)
        axes = [0, 1, 2] if f.axis is None else [f.axis]
        for ax in axes:
            g[on, ax] *= factor
    return g


def timeline(cfg, healthy_latency_s: float = 0.0) -> Timeline:
    """The sample grids and ticks of a :class:`SimConfig`; commands take effect ``healthy_latency_s``
    after their tick, plus any injected command latency.

    Raises
    ------
    InputError
        Rates that do not give whole nanoseconds, or ticks off the magnetometer grid.
    """
    dur_ns = int(round(cfg.duration_s * NS_PER_S))
    mag_step = step_ns(cfg.mag_rate_hz, "mag_rate_hz")
    gyro_step = step_ns(cfg.gyro_rate_hz, "gyro_rate_hz")
    period = int(round(cfg.period_s * NS_PER_S))
    first = int(round(cfg.first_tick_offset_s * NS_PER_S))
    if period % mag_step or first % mag_step or period <= 0 or first < 0:
        raise InputError(f"expected period_s and first_tick_offset_s to be whole multiples of the "
                         f"magnetometer step {mag_step / NS_PER_S} s, got {cfg.period_s} and {cfg.first_tick_offset_s}",
                         key="period_s")
    if cfg.law == "cross_product" and not cfg.gyro:
        raise InputError("expected gyro = True with law = \"cross_product\" (the law needs the rate), "
                         "got gyro = False", key="gyro")
    t_mag = np.arange(0, dur_ns, mag_step, dtype=np.int64)
    t_gyro = np.arange(0, dur_ns, gyro_step, dtype=np.int64) if cfg.gyro else np.zeros(0, np.int64)
    ticks = np.arange(first, dur_ns, period, dtype=np.int64)
    end = int(max(t_mag[-1], t_gyro[-1] if len(t_gyro) else 0))
    latency = int(round(healthy_latency_s * NS_PER_S)) + sum(
        int(round(f.value * NS_PER_S)) for f in cfg.faults if f.kind == "command_latency")
    windowed = cfg.mag_sampling == "windowed"
    before, after = ((int(round(cfg.off_window_s[0] * NS_PER_S)), int(round(cfg.off_window_s[1] * NS_PER_S)))
                     if windowed else (0, 0))
    return Timeline(dur_ns, t_mag, t_gyro, ticks, end, mag_step, gyro_step, period, latency, windowed, before, after)


def on_window_s(cfg) -> tuple[float, float]:
    """Start and end of the coils' on-window after each tick, s (the whole period without windows)."""
    if cfg.mag_sampling == "windowed":
        return float(cfg.off_window_s[1]), float(cfg.period_s - cfg.off_window_s[0])
    return 0.0, float(cfg.period_s)


def segments(cfg, tl: Timeline) -> Segments:
    """The segments between events: which command flows, with what gain, in which control interval."""
    parts = [np.array([0, tl.end], np.int64), tl.t_mag, tl.t_gyro, tl.ticks, tl.ticks + tl.latency]
    if tl.windowed:
        parts += [tl.ticks - tl.before, tl.ticks + tl.after]
    for f in cfg.faults:
        if f.kind in COIL_FAULTS:
            parts.append(np.array(fault_window_ns(f, tl.duration_ns), np.int64))
    ev = np.unique(np.concatenate(parts))
    ev = ev[(ev >= 0) & (ev <= tl.end)]
    mid = (ev[:-1] + ev[1:]) // 2
    cmd = np.searchsorted(tl.ticks + tl.latency, mid, side="right") - 1
    on = ~in_off_window(mid, tl.ticks, tl.before, tl.after) if tl.windowed else np.ones(len(mid), bool)
    gain = coil_gain(mid, cfg.faults, tl.duration_ns) * on[:, None]
    tau_index = np.maximum(np.searchsorted(tl.ticks, ev[:-1], side="right") - 1, 0)
    return Segments(ev, mid, cmd, gain, tau_index)
