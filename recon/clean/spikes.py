"""Spikes in a 3-axis log: the Hampel identifier on each axis, on each axis's rate of change and on
the rate of change of the vector's magnitude; and the clean step that drops the spikes of a log.

A spike on a fast-moving signal can hide inside the local MAD of the signal (see
:mod:`recon.clean.hampel`); it cannot hide in the rate of change: the rate ``(x[i+1] - x[i]) / dt``
jumps out and back, so the two rates either side of sample i are both outliers of the rate series,
with opposite signs. A genuine step in the signal (a coil switching) gives only one outlying rate.
The same out-and-back test runs on the vector's magnitude, which a rotation leaves unchanged, so
that a spike shows even when the vector turns so fast between samples that each axis changes more
than the spike's size. (Not the value test: with the coils on, the magnitude steps at each coil
switch and then drifts as the coil field turns against the Earth's, and the first sample of such a
sloping plateau would stand out from a window median.) All windows stay inside one segment (no
window spans a telemetry gap) and are symmetric about their sample, shrinking on both sides near a
segment end: a one-sided window would call the samples next to a genuine step (a coil switching on
just before a gap) spikes. So the first and last sample of each segment are never tested.

References
----------
Hampel, F. R. (1974), "The influence curve and its role in robust estimation", J. Amer. Statist.
Assoc. 69(346):383-393.
Pearson, R. K., Neuvo, Y., Astola, J. & Gabbouj, M. (2016), "Generalized Hampel filters", EURASIP J.
Adv. Signal Process. 2016:87.
IEEE Std 952-1997, IEEE Standard Specification Format Guide and Test Procedure for Single-Axis
Interferometric Fiber Optic Gyros (angle random walk and the Allan deviation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from ..config import Mission
from ..load import SensorLog
from .hampel import HALF_WIDTH, hampel_flags, hampel_threshold, noise_sigma, window_bounds
from .rows import GAP_FACTOR, Drops, find_gaps

__all__ = ["SPIKE_WINDOW_MAX_S", "SpikeFlags", "spike_flags", "sample_noise", "sampling_groups", "spike_drops"]

# The spike tests compare a sample with its neighbours within a window of 2 K + 1 samples; they need
# the signal to change smoothly over that window. Over 60 s a LEO orbit moves ~4 degrees and the field
# magnitude a few per cent at most, while frames tens of seconds apart catch a turning satellite at
# unrelated attitudes, where a neighbour predicts nothing. Logs whose window spans more than this are
# not tested (and say so). Common practice, no source.
SPIKE_WINDOW_MAX_S = 60.0


def _rate_flags(x: np.ndarray, t_s: np.ndarray, seg_start: np.ndarray, sigma: float, t: float,
                half_width: int) -> np.ndarray:
    """Samples whose rates in and out are both Hampel outliers of the rate series, opposite in sign.

    Two passes. The first finds candidates from the rates between consecutive samples. A spike next
    to a genuine step (a coil switching) makes the step's sample look like a spike too, since its
    rate in is the spike's return and its rate out the step. So the second pass re-tests each
    candidate against its nearest neighbours that are not candidates themselves: the step's sample,
    measured from the sample before the spike, no longer jumps out and back, while a spike (or each
    sample of a two-sample burst) still does.
    """
    n = x.size
    cut = np.zeros(n, dtype=bool)
    cut[seg_start[seg_start > 0]] = True  # pair (j-1, j) crosses a gap when j starts a segment
    j = np.flatnonzero(~cut[1:])
    if j.size < 3:
        return np.zeros(n, dtype=bool)
    dt = np.diff(t_s)[j]
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        rate = np.diff(x)[j] / dt
        # white noise of std sigma on x gives rate noise sqrt(2) sigma / dt on each pair
        floor = np.sqrt(2.0) * sigma / dt
    rate = np.nan_to_num(rate, nan=0.0, posinf=0.0, neginf=0.0)
    rseg = np.flatnonzero(np.diff(j) != 1) + 1
    rlo, rhi = window_bounds(np.concatenate(([0], rseg)), j.size, half_width, symmetric=True)
    r_flag, r_resid, r_scale = hampel_flags(rate, rlo, rhi, t, floor)
    return _out_and_back(np.ascontiguousarray(x, dtype=np.float64), np.ascontiguousarray(t_s, dtype=np.float64),
                         j, np.cumsum(cut), r_flag, r_resid, r_scale, rate - r_resid, float(t))


@numba.njit(cache=True, nogil=True)
def _out_and_back(x, t_s, j, seg_id, r_flag, r_resid, r_scale, r_med, t):  # pragma: no cover - compiled
    """Both passes of the out-and-back test (see :func:`_rate_flags`) over the pair series ``j``."""
    n = x.size
    into = np.full(n, -1, dtype=np.int64)
    outof = np.full(n, -1, dtype=np.int64)
    for k in range(j.size):
        outof[j[k]] = k
        into[j[k] + 1] = k
    cand = np.zeros(n, dtype=np.bool_)
    for i in range(n):
        a, b = into[i], outof[i]
        if a >= 0 and b >= 0 and r_flag[a] and r_flag[b] and (
                (r_resid[a] > 0 and r_resid[b] < 0) or (r_resid[a] < 0 and r_resid[b] > 0)):
            cand[i] = True
    # nearest non-candidate before and after each sample
    prev = np.full(n, -1, dtype=np.int64)
    nxt = np.full(n, n, dtype=np.int64)
    last = -1
    for i in range(n):
        prev[i] = last
        if not cand[i]:
            last = i
    last = n
    for i in range(n - 1, -1, -1):
        nxt[i] = last
        if not cand[i]:
            last = i
    out = np.zeros(n, dtype=np.bool_)
    for i in range(n):
        if not cand[i]:
            continue
        p, q = prev[i], nxt[i]
        if p < 0 or q >= n or seg_id[p] != seg_id[i] or seg_id[q] != seg_id[i]:
            continue
        a, b = into[i], outof[i]
        e_in = (x[i] - x[p]) / (t_s[i] - t_s[p]) - r_med[a]
        e_out = (x[q] - x[i]) / (t_s[q] - t_s[i]) - r_med[b]
        if (abs(e_in) > t * r_scale[a] and abs(e_out) > t * r_scale[b]
                and ((e_in > 0 and e_out < 0) or (e_in < 0 and e_out > 0))):
            out[i] = True
    return out


@dataclass(frozen=True)
class SpikeFlags:
    """Which test flagged which sample: ``value`` and ``rate`` per axis (N, 3), ``norm`` (N,)."""

    value: np.ndarray
    rate: np.ndarray
    norm: np.ndarray
    threshold: float

    @property
    def any(self) -> np.ndarray:
        return self.value.any(axis=1) | self.rate.any(axis=1) | self.norm


def spike_flags(v: np.ndarray, t_s: np.ndarray, segment_start: np.ndarray, floor: np.ndarray,
                t: float | None = None, half_width: int = HALF_WIDTH) -> SpikeFlags:
    """Spikes in a 3-axis log: Hampel tests on each axis, on each axis's rate of change, and on the
    rate of change of the vector's magnitude.

    Parameters
    ----------
    v : (N, 3) float array, sorted by time (sensor axes, file unit); the same windows serve all tests
    t_s : (N,) float array, s, strictly increasing
    segment_start : (S,) int array, first sample of each stretch without a gap (starts with 0)
    floor : (3,) float array, least scale per axis (stated noise or quantisation step), unit of v
    t : float, optional, threshold; default :func:`hampel_threshold` over the 7 N tests

    Returns
    -------
    SpikeFlags
    """
    v = np.asarray(v, dtype=float)
    n = v.shape[0]
    z3 = np.zeros((n, 3), dtype=bool)
    if n < 3:
        return SpikeFlags(z3, z3.copy(), np.zeros(n, dtype=bool), float("nan"))
    if t is None:
        t = hampel_threshold(7 * n)
    seg = np.asarray(segment_start, dtype=np.int64)
    lo, hi = window_bounds(seg, n, half_width, symmetric=True)
    by_value = z3.copy()
    by_rate = z3.copy()
    floor = np.broadcast_to(np.asarray(floor, dtype=float), (3,))
    for a in range(3):
        x = np.ascontiguousarray(v[:, a])
        sigma = max(noise_sigma(x, seg), floor[a])
        by_value[:, a], _, _ = hampel_flags(x, lo, hi, t, sigma)
        by_rate[:, a] = _rate_flags(x, t_s, seg, sigma, t, half_width)
    with np.errstate(over="ignore", invalid="ignore"):
        mag = np.sqrt(np.einsum("ij,ij->i", v, v))
    mag = np.nan_to_num(mag, nan=0.0, posinf=np.finfo(float).max)
    sigma_m = max(noise_sigma(mag, seg), float(floor.max()))
    by_norm = _rate_flags(mag, t_s, seg, sigma_m, t, half_width)
    return SpikeFlags(by_value, by_rate, by_norm, float(t))


# ------------------------------------------------------------------------------ the clean step
def _quantum(x: np.ndarray) -> float:
    """Smallest nonzero step between consecutive samples: the quantisation step of a quiet quantised
    signal (where most steps are 0 or 1 count), never less than it; 0 if the signal never moves."""
    d = np.abs(np.diff(x))
    d = d[d > 0]
    return float(d.min()) if d.size else 0.0


def sample_noise(log: SensorLog, spec, order: np.ndarray) -> float | None:
    """The stated noise as a per-sample standard deviation in the file's unit: the magnetometer's
    ``noise`` is one already; the gyro's is an angle random walk N (unit/sqrt(Hz)), whose Allan
    deviation is N / sqrt(tau) (IEEE Std 952-1997), so N sqrt(f) per sample at sample rate f."""
    noise = getattr(spec, "noise", None)
    if noise is None or log.name != "gyro":
        return noise
    _, period = find_gaps(log.time_utc[order])
    return float(noise / np.sqrt(period)) if np.isfinite(period) and period > 0 else None


def sampling_groups(log: SensorLog, order: np.ndarray, mission: Mission) -> list[np.ndarray]:
    """Split the magnetometer into samples taken with the coils switched off and with them on when
    the mission says the coils are switched off in a window around each control tick: the two sets
    see different fields, and a lone coils-off sample among coils-on ones is no spike."""
    c, ctl = mission.coils, mission.controller
    idx = np.arange(order.size)
    if (log.name != "magnetometer" or c is None or c.mag_sampling != "windowed" or ctl is None
            or ctl.first_tick is None or c.off_window_s is None):
        return [idx]
    before, after = c.off_window_s
    t0 = np.datetime64(ctl.first_tick, "ns").astype(np.int64)
    phase = np.mod((log.time_utc[order].astype(np.int64) - t0) / 1e9, ctl.period_s)
    off = (phase <= after) | (phase >= ctl.period_s - before)
    return [np.flatnonzero(off), np.flatnonzero(~off)]


def _spike_text(f: SpikeFlags, k: int, x: np.ndarray, cols: tuple[str, ...], unit: str, t_thr: float) -> str:
    """The ledger's detail for sample k of a group: which test flagged it, on which column."""
    if f.value[k].any() or f.rate[k].any():
        a = int(np.flatnonzero(f.value[k] | f.rate[k])[0])
        test = "value" if f.value[k, a] else "rate of change"
        what = f"column {cols[a]!r} = {x[k, a]:.6g} {unit}"
    else:
        test = "rate of change of the magnitude"
        what = f"|{', '.join(cols)}| = {np.linalg.norm(x[k]):.6g} {unit}"
    return f"{what} departs from its neighbours (Hampel test on the {test}, t = {t_thr:.2f})"


def spike_drops(log: SensorLog, order: np.ndarray, noise: float | None, saturated: np.ndarray,
                groups: list[np.ndarray]) -> tuple[Drops, list[str]]:
    """``spike``: Hampel tests on values, rates and magnitude, per sampling group, and the notes on
    groups too sparse to test. Rows with a saturated axis are left out of the tests (they are
    flagged, not dropped, and their clipped values would bend the windows of their neighbours).

    Parameters
    ----------
    log : SensorLog
    order : (M,) int array, alive rows of the log sorted by time
    noise : float or None, stated per-sample noise (file unit)
    saturated : (M, 3) bool array, per row of ``order``
    groups : list of int arrays, positions in ``order`` of each sampling group
    """
    vs = log.values_sensor[order]
    t_ns = log.time_utc[order].astype(np.int64)
    spike = np.zeros(order.size, dtype=bool)
    how = np.full(order.size, "", dtype=object)
    notes = []
    t_thr = hampel_threshold(7 * order.size)
    unsat = ~saturated.any(axis=1)
    for grp in groups:
        grp = grp[unsat[grp]]
        if grp.size < 3:
            continue
        tg = t_ns[grp]
        _, period = find_gaps(tg.astype("datetime64[ns]"))
        seg = (np.r_[0, np.flatnonzero(np.diff(tg) / 1e9 > GAP_FACTOR * period) + 1]
               if np.isfinite(period) else np.array([0]))
        if 2 * HALF_WIDTH * period > SPIKE_WINDOW_MAX_S:
            span = 2 * HALF_WIDTH * period
            notes.append(f"spike test not run on the {log.name} log {log.label}: a window of "
                         f"{2 * HALF_WIDTH + 1} samples spans {span:.0f} s at the median spacing "
                         f"{period:.3g} s, longer than {SPIKE_WINDOW_MAX_S:g} s: neighbours this far apart "
                         "cannot tell a corrupt value from a genuine one")
            continue
        x = vs[grp]
        floor = np.array([max(noise or 0.0, _quantum(x[:, a])) for a in range(3)])
        f = spike_flags(x, (tg - tg[0]) / 1e9, seg, floor, t=t_thr)
        for k in np.flatnonzero(f.any):
            how[grp[k]] = _spike_text(f, k, x, log.columns, log.unit, t_thr)
        spike[grp[f.any]] = True
    rows = np.flatnonzero(spike)
    return Drops(order[rows], "spike", how[rows]), notes
