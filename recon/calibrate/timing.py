"""The magnetometer's time-tag offset, found from the onboard control law.

At every control tick the onboard computer reads the magnetometer sample taken at the tick and
commands the coils from it (B-dot from two consecutive tick samples, cross-product from one with the
gyro). The logged commands are a deterministic function of those samples, so the law replayed from
the right samples reproduces them to the drive's rounding, and from any other sample it does not.
When the magnetometer's stamps are late (or early) by a constant, the samples that reproduce the
commands carry stamps ``tick + offset``: the offset is read off them.

Each candidate offset picks, for every tick, the sample stamped nearest to ``tick + offset``; the
candidate whose samples reproduce the most informative commands (above 1 % and below 99 % of the
current limit) wins, and the offset is the mean of those samples' stamps minus their ticks. Its
1-sigma is their scatter over the square root of their number, at least the stamps' resolution (at
most 1 ms) over sqrt(12). The search needs the tick instants (``controller.first_tick``) and a law; without them, or
when no candidate reproduces most commands, the offset is undetermined and the reason says why.

References
----------
Stickler, A. C. and Alfriend, K. T. (1974). An elementary magnetic attitude control system. AIAA
paper 74-923 (B-dot).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import (
    NS_PER_S,
    Anomaly,
    bdot_dipole,
    control_ticks,
    cross_product_dipole,
    currents_from_dipole,
    held_values,
    seconds_since,
)

__all__ = ["TimeOffset", "time_offset_from_replay", "mag_time_offset", "MAX_OFFSET_S", "MATCH_FRACTION",
           "SIGNIFICANT_OFFSET_S"]

# Offsets searched, s: onboard stamping latencies of a few tenths of a second are common, a second is
# generous (common practice, no source).
MAX_OFFSET_S = 1.0
# The winning candidate must reproduce at least this fraction of the informative commands: a healthy
# law matches every one of them (to the drive's rounding); a noisy copy of the data does not.
MATCH_FRACTION = 0.8
# A command reproduces when it agrees to this (A) plus this fraction of itself: the drive rounds to
# micro-amps and the log to its unit (mA with 3 decimals here).
MATCH_ABS_A = 2e-6
MATCH_REL = 1e-3
# An offset is reported as a finding when it is beyond 3 sigma and at least this large, s: at the
# rates of a detumble (several deg/s) 10 ms is 0.05 deg of attitude (common practice, no source).
SIGNIFICANT_OFFSET_S = 0.01


@dataclass(frozen=True)
class TimeOffset:
    """The magnetometer's time-tag offset (stamp minus true sampling instant).

    Attributes
    ----------
    offset_s, sigma_s : float or None (None when undetermined)
    method : "command replay" or "none"
    matched : int, informative commands reproduced at the chosen offset
    informative : int, informative commands (unsaturated, above 1 % of the limit)
    runner_up_matched : int, commands reproduced at the best other candidate
    reason : str, how it was determined or why not
    """

    offset_s: float | None
    sigma_s: float | None
    method: str
    matched: int
    informative: int
    runner_up_matched: int
    reason: str

    @property
    def determined(self) -> bool:
        return self.offset_s is not None

    @property
    def significant(self) -> bool:
        return (self.determined and abs(self.offset_s) >= SIGNIFICANT_OFFSET_S
                and abs(self.offset_s) > 3.0 * self.sigma_s)

    def to_summary(self) -> dict:
        """The time-tag entries of summary.json's calibration block."""
        return {"time_offset_s": self.offset_s, "time_offset_s_sigma": self.sigma_s,
                "time_offset_method": self.method, "time_offset_note": self.reason}

    def anomaly(self, start_utc, stop_utc) -> Anomaly | None:
        """``mag_time_offset`` (warning) when the offset is significant."""
        if not self.significant:
            return None
        late = "late" if self.offset_s > 0 else "early"
        return Anomaly("mag_time_offset", "warning",
                       f"magnetometer time tags are {abs(self.offset_s):.3f} +- {self.sigma_s:.3f} s {late}: the law "
                       f"replayed from the samples stamped that far from each tick reproduces {self.matched} of "
                       f"{self.informative} informative commands (the next best offset {self.runner_up_matched}); "
                       "recon corrected the stamps before calibrating, but the onboard stamping deserves a check",
                       start_utc, stop_utc, value=self.offset_s)


def _undetermined(reason: str, informative: int = 0) -> TimeOffset:
    return TimeOffset(None, None, "none", 0, informative, 0, reason)


def _logged_per_tick(ticks: np.ndarray, t_coil: np.ndarray, i_coil: np.ndarray, period: float) -> np.ndarray:
    """The command logged for each tick: the last log row within one period after it."""
    return held_values(t_coil, i_coil, ticks + 0.999 * period, tol=1e-9, max_age=period)


def _replayed(law, idx, b_body, ticks, w_tick, gain, C, imax, inertia, target) -> np.ndarray:
    """The law's commands from the samples ``idx`` (one per tick; -1 where none)."""
    ok = idx >= 0
    b = np.where(ok[:, None], b_body[np.maximum(idx, 0)], np.nan)
    out = np.full(b.shape, np.nan)
    if law == "bdot":
        m = bdot_dipole(b[1:], b[:-1], np.diff(ticks), gain)
        good = np.all(np.isfinite(m), axis=1)
        out[1:][good] = currents_from_dipole(m[good], C, imax)
    else:
        h_err = w_tick @ np.asarray(inertia, float).T - target
        good = np.all(np.isfinite(b), axis=1) & np.all(np.isfinite(h_err), axis=1)
        out[good] = currents_from_dipole(cross_product_dipole(h_err[good], b[good], gain), C, imax)
    return out


def time_offset_from_replay(t_mag_s: np.ndarray, b_mag_body_nT: np.ndarray, ticks_s: np.ndarray,
                            t_coil_s: np.ndarray, i_coil_A: np.ndarray, *, law: str, gain: float,
                            period_s: float, dipole_per_amp: np.ndarray, max_current_A: np.ndarray,
                            inertia_kg_m2: np.ndarray | None = None, target_momentum_Nms: np.ndarray | None = None,
                            t_gyro_s: np.ndarray | None = None, w_gyro_body_rad_s: np.ndarray | None = None,
                            max_offset_s: float = MAX_OFFSET_S) -> TimeOffset:
    """The magnetometer's time-tag offset from the law's replay (see the module docstring).

    Parameters
    ----------
    t_mag_s : (N,) magnetometer stamps, s (any epoch shared with the other times); b_mag_body_nT : (N, 3)
        raw readings in body axes with the nominal mounting, nT
    ticks_s : (K,) control tick instants, s; t_coil_s : (M,) s; i_coil_A : (M, 3) logged commands, A
    law : "bdot" | "cross_product"; gain : the law's gain; period_s : control period, s
    dipole_per_amp : (3, 3) nominal C; max_current_A : (3,)
    inertia_kg_m2, target_momentum_Nms, t_gyro_s, w_gyro_body_rad_s : for the cross-product law

    Returns
    -------
    TimeOffset
    """
    t_mag = np.asarray(t_mag_s, float)
    ticks = np.asarray(ticks_s, float)
    imax = np.asarray(max_current_A, float)
    if law not in ("bdot", "cross_product") or len(ticks) < 3 or len(t_mag) < 3:
        return _undetermined(f"no law to replay (law {law!r}, {len(ticks)} ticks)")
    w_tick = None
    if law == "cross_product":
        if t_gyro_s is None or w_gyro_body_rad_s is None or len(t_gyro_s) < 2:
            return _undetermined("the cross-product law needs the gyro to be replayed")
        w_tick = held_values(np.asarray(t_gyro_s, float), w_gyro_body_rad_s, ticks, tol=1e-9)
    logged = _logged_per_tick(ticks, np.asarray(t_coil_s, float), np.asarray(i_coil_A, float), period_s)
    informative = np.isfinite(logged).all(axis=1) & (np.max(np.abs(np.nan_to_num(logged)) / imax, axis=1) > 0.01) \
        & (np.max(np.abs(np.nan_to_num(logged)) / imax, axis=1) < 0.99)
    n_inf = int(informative.sum())
    if n_inf < 10:
        return _undetermined(f"only {n_inf} informative commands (unsaturated, above 1 % of the limit)", n_inf)
    spacing = float(np.median(np.diff(t_mag)))
    step = max(spacing / 2.0, 1e-3)
    candidates = np.arange(-max_offset_s, max_offset_s + step / 2, step)
    b = np.asarray(b_mag_body_nT, float)
    target = np.zeros(3) if target_momentum_Nms is None else np.asarray(target_momentum_Nms, float)

    def pick(offset: float) -> np.ndarray:
        j = np.clip(np.searchsorted(t_mag, ticks + offset), 1, len(t_mag) - 1)
        j = np.where(np.abs(t_mag[j - 1] - ticks - offset) <= np.abs(t_mag[j] - ticks - offset), j - 1, j)
        return np.where(np.abs(t_mag[j] - ticks - offset) <= spacing / 2 + 1e-9, j, -1)

    def matches(idx: np.ndarray) -> np.ndarray:
        rep = _replayed(law, idx, b, ticks, w_tick, gain, dipole_per_amp, imax, inertia_kg_m2, target)
        close = np.abs(rep - logged) <= MATCH_ABS_A + MATCH_REL * np.abs(logged)
        return informative & np.all(close, axis=1)

    picks = [pick(d) for d in candidates]
    counts = np.array([int(matches(idx).sum()) for idx in picks])
    best = int(np.argmax(counts))
    # the runner-up must pick other samples (neighbouring candidates often pick the same ones)
    others = [c for k, c in enumerate(counts) if not np.array_equal(picks[k], picks[best])]
    runner = int(max(others)) if others else 0
    if counts[best] < MATCH_FRACTION * n_inf:
        return TimeOffset(None, None, "none", int(counts[best]), n_inf, runner,
                          f"no offset within +-{max_offset_s:g} s reproduces most commands (best {counts[best]} of "
                          f"{n_inf}): the commands do not follow the configured law from the logged samples")
    hit = matches(picks[best])
    d = t_mag[picks[best][hit]] - ticks[hit]
    resolution = _stamp_resolution(t_mag)
    sigma = float(max(np.std(d) / np.sqrt(len(d)), resolution / np.sqrt(12.0)))
    return TimeOffset(float(np.mean(d)), sigma, "command replay", int(counts[best]), n_inf, runner,
                      f"the samples stamped {np.mean(d):+.3f} s from each tick reproduce {counts[best]} of {n_inf} "
                      f"informative commands")


def _stamp_resolution(t_s: np.ndarray) -> float:
    """The step the stamps are written in, s: the largest power of ten that divides every stamp's
    fraction of a second, at most 1 ms (a regular sampling grid says nothing finer about the clock)."""
    frac_ns = np.round(np.mod(t_s, 1.0) * NS_PER_S).astype(np.int64) % NS_PER_S
    step = 1_000_000  # 1 ms
    while step > 1 and np.any(frac_ns % step):
        step //= 10
    return step / NS_PER_S


def mag_time_offset(mission, cleaned) -> TimeOffset:
    """The magnetometer's time-tag offset of one pass, from its logs and mission file.

    Parameters
    ----------
    mission : recon.config.Mission; cleaned : recon.clean.CleanedPass

    Returns
    -------
    TimeOffset (undetermined, with the reason, when the pass has no law, no coil log or no first tick)
    """
    ctl, coils = mission.controller, mission.coils
    if ctl is None or coils is None or cleaned.coils is None or ctl.law == "none":
        return _undetermined("no control law and coil log to replay")
    if ctl.first_tick is None:
        return _undetermined("controller.first_tick is not given: the tick instants are unknown")
    mag = cleaned.magnetometer
    epoch = np.datetime64(ctl.first_tick, "ns")
    t_mag, t_coil = seconds_since(mag.time_utc, epoch), seconds_since(cleaned.coils.time_utc, epoch)
    lo, hi = max(t_mag[0], t_coil[0]), min(t_mag[-1], t_coil[-1])
    ticks = control_ticks(lo + MAX_OFFSET_S, hi - MAX_OFFSET_S, float(ctl.period_s), 0.0)
    gyro = cleaned.gyro
    return time_offset_from_replay(
        t_mag, mag.values, ticks, t_coil, cleaned.coils.values, law=ctl.law, gain=float(ctl.gain),
        period_s=float(ctl.period_s), dipole_per_amp=coils.dipole_per_amp, max_current_A=coils.max_current_A,
        inertia_kg_m2=mission.inertia_kg_m2, target_momentum_Nms=ctl.target_momentum_Nms,
        t_gyro_s=None if gyro is None else seconds_since(gyro.time_utc, epoch),
        w_gyro_body_rad_s=None if gyro is None else gyro.values)
