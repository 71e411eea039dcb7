"""Signal helpers shared by the stages: local slopes, window and held-value means, robust scales.

All times are float seconds (or any one numeric time base) and increasing; values are (N,) or (N, k).

References
----------
Savitzky, A. and Golay, M. J. E. (1964). Smoothing and differentiation of data by simplified least
squares procedures. Anal. Chem. 36(8), 1627-1639 (the local-slope derivative) (memory).
Rousseeuw, P. J. and Croux, C. (1993). Alternatives to the median absolute deviation. J. Amer.
Statist. Assoc. 88(424), 1273-1283 (the normal-consistent MAD scale).
"""

from __future__ import annotations

import numpy as np
from scipy.stats import median_abs_deviation

__all__ = ["local_slope", "window_mean", "held_integral", "held_mean", "robust_scale",
           "white_noise_from_differences", "nearest_rows"]


def local_slope(t: np.ndarray, x: np.ndarray, half_width_s: float) -> np.ndarray:
    """Least-squares slope of x over [t - h, t + h] at every sample (first-order Savitzky-Golay).

    Parameters
    ----------
    t : (N,) s increasing; x : (N, k); half_width_s : h, s

    Returns
    -------
    (N, k) slope per second; NaN where the window holds fewer than two distinct times
    """
    x = np.asarray(x, float).reshape(len(t), -1)
    lo = np.searchsorted(t, t - half_width_s, side="left")
    hi = np.searchsorted(t, t + half_width_s, side="right")
    c1 = np.r_[0.0, np.cumsum(t)]
    c2 = np.r_[0.0, np.cumsum(t * t)]
    cx = np.vstack([np.zeros((1, x.shape[1])), np.cumsum(x, axis=0)])
    ctx = np.vstack([np.zeros((1, x.shape[1])), np.cumsum(t[:, None] * x, axis=0)])
    n = (hi - lo).astype(float)
    st = c1[hi] - c1[lo]
    stt = c2[hi] - c2[lo]
    sx = cx[hi] - cx[lo]
    stx = ctx[hi] - ctx[lo]
    den = n * stt - st * st
    with np.errstate(invalid="ignore", divide="ignore"):
        slope = (n[:, None] * stx - st[:, None] * sx) / den[:, None]
    return np.where((den > 0)[:, None], slope, np.nan)


def window_mean(t_sample: np.ndarray, x: np.ndarray, t: np.ndarray, half_width_s: float) -> np.ndarray:
    """Mean of the samples inside [t - h, t + h] at each query time (the nearest sample if none).

    Parameters
    ----------
    t_sample : (G,) increasing sample times; x : (G, 3) samples; t : (N,) query times; half_width_s : h
    """
    lo = np.searchsorted(t_sample, t - half_width_s, side="left")
    hi = np.searchsorted(t_sample, t + half_width_s, side="right")
    c = np.vstack([np.zeros((1, 3)), np.cumsum(x, axis=0)])
    n = hi - lo
    near = np.clip(np.searchsorted(t_sample, t), 0, len(t_sample) - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = (c[hi] - c[lo]) / n[:, None]
    return np.where((n > 0)[:, None], mean, x[near])


def held_integral(t_log: np.ndarray, x: np.ndarray, t: np.ndarray, *, before_first: str = "hold") -> np.ndarray:
    """Integral from ``t_log[0]`` to each ``t`` of a signal held from each log sample to the next.

    Parameters
    ----------
    t_log : (M,) increasing log times; x : (M, k) logged values; t : (N,) query times
    before_first : "hold" (the first sample extends backwards: the integral goes negative) or
        "zero" (nothing flows before the first sample: the integral is 0 there)

    Returns
    -------
    (N, k) integral, value unit times time unit
    """
    x = np.asarray(x, float)
    dt = np.diff(t_log)
    cum = np.vstack([np.zeros((1, x.shape[1])), np.cumsum(x[:-1] * dt[:, None], axis=0)])
    j = np.searchsorted(t_log, t, side="right") - 1
    jj = np.clip(j, 0, len(t_log) - 1)
    val = cum[jj] + x[jj] * (t - t_log[jj])[:, None]
    if before_first == "zero":
        return np.where((j >= 0)[:, None], val, 0.0)
    return val


def held_mean(t_log: np.ndarray, x: np.ndarray, t: np.ndarray, width: float) -> np.ndarray:
    """Mean over [t - width/2, t + width/2] of a signal held from each log sample to the next.

    The window is clipped to the log's span; where nothing of it remains, the sample held at ``t``.

    Parameters
    ----------
    t_log : (M,) increasing; x : (M, k); t : (N,) window centres; width : window length

    Returns
    -------
    (N, k)
    """
    lo = np.maximum(t - width / 2, t_log[0])
    hi = np.minimum(t + width / 2, t_log[-1])
    span = np.maximum(hi - lo, 1e-12)
    out = (held_integral(t_log, x, hi) - held_integral(t_log, x, lo)) / span[:, None]
    j = np.clip(np.searchsorted(t_log, t, side="right") - 1, 0, len(t_log) - 1)
    return np.where((hi - lo)[:, None] > 0, out, np.asarray(x, float)[j])


def robust_scale(x: np.ndarray, *, axis: int | None = None, about_zero: bool = False) -> np.ndarray | float:
    """Normal-consistent median absolute deviation: 1.4826 x median |x - median(x)|.

    ``about_zero`` takes the deviations about 0 instead of the median (for differences of a signal,
    whose centre is zero by construction). The factor is 1 / Phi^-1(3/4) (Rousseeuw and Croux 1993),
    as ``scipy.stats.median_abs_deviation(scale="normal")`` applies it.
    """
    if about_zero:
        return median_abs_deviation(x, axis=axis, center=_zero_center, scale="normal")
    return median_abs_deviation(x, axis=axis, scale="normal")


def _zero_center(x: np.ndarray, axis=None):
    """The centre 0, shaped as ``median_abs_deviation`` expects of its ``center`` callable."""
    return 0.0 if axis is None else np.zeros(np.delete(np.shape(x), axis))


def white_noise_from_differences(x: np.ndarray) -> float:
    """Per-sample white-noise sigma of a smooth signal plus white noise, from second differences.

    For white noise the second difference has variance 6 sigma^2; a smooth signal sampled fast
    contributes almost nothing. The spread is the normal-consistent MAD (:func:`robust_scale`), so
    spikes and steps do not inflate it. With several columns the result is the rms over columns.

    Parameters
    ----------
    x : (N,) or (N, k) samples (finite)
    """
    a = np.asarray(x, dtype=float)
    a = a.reshape(len(a), -1)
    d2 = a[2:] - 2.0 * a[1:-1] + a[:-2]
    s = robust_scale(d2, axis=0) / np.sqrt(6.0)
    return float(np.sqrt(np.mean(s ** 2)))


def nearest_rows(t_ref: np.ndarray, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index of the nearest row of ``t_ref`` for each of ``t``, and whether it lies within half of
    ``t_ref``'s median interval (times numeric, or datetime64 taken in ns; ``t_ref`` increasing).

    Returns
    -------
    (M,) int64 indices (0 where ``t_ref`` is empty); (M,) bool
    """
    def ticks(x):
        x = np.asarray(x)
        return x.astype("datetime64[ns]").astype(np.int64) if x.dtype.kind == "M" else x.astype(float)

    ref, x = ticks(t_ref), ticks(t)
    if len(ref) == 0:
        return np.zeros(len(x), np.int64), np.zeros(len(x), bool)
    hi = np.clip(np.searchsorted(ref, x), 0, len(ref) - 1)
    lo = np.clip(hi - 1, 0, len(ref) - 1)
    k = np.where(np.abs(ref[lo] - x) <= np.abs(ref[hi] - x), lo, hi)
    half = 0.5 * float(np.median(np.diff(ref))) if len(ref) > 1 else 0.0
    return k, np.abs(ref[k] - x) <= half
