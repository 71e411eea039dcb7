"""The Hampel identifier: moving median and MAD over windows inside segments, its threshold and
its noise floor.

The Hampel identifier (Hampel 1974; Pearson, Neuvo, Astola & Gabbouj 2016) flags sample i when it
lies more than t robust standard deviations from the median of a moving window centred on it, the
scale being the window's median absolute deviation (MAD) times 1.4826. Pearson et al. generalise the
location and scale estimates; here the scale is the larger of

- the local MAD scale (the identifier proper: it grows where the signal itself moves fast, which
  protects genuine samples of a quickly rotating field vector), and
- a noise floor: the white-noise level estimated robustly from second differences over the whole
  log, or the sensor's stated noise, or its quantisation step, whichever is largest. Without it a
  quiet stretch (MAD near 0 by chance, or exactly 0 on a quantised signal) would turn ordinary noise
  into spikes.

All windows stay inside one segment (no window spans a telemetry gap). Which tests run on a log,
and how their flags become spikes, is :mod:`recon.clean.spikes`' job.

References
----------
Hampel, F. R. (1974), "The influence curve and its role in robust estimation", J. Amer. Statist.
Assoc. 69(346):383-393.
Pearson, R. K., Neuvo, Y., Astola, J. & Gabbouj, M. (2016), "Generalized Hampel filters", EURASIP J.
Adv. Signal Process. 2016:87.
"""

from __future__ import annotations

import numba
import numpy as np
from scipy.stats import norm

from ..core import robust_scale

__all__ = [
    "MAD_TO_SIGMA", "HALF_WIDTH", "FALSE_ALARMS_PER_LOG", "T_MIN", "window_bounds", "moving_median_mad",
    "moving_median_mad_reference", "hampel_threshold", "hampel_flags", "noise_sigma",
]

# 1 / Phi^-1(3/4): makes the MAD a consistent estimate of a Gaussian standard deviation (Hampel 1974)
MAD_TO_SIGMA = 1.482602218505602

# Window half-width K (window 2K + 1 = 11 samples). Pearson et al. 2016 use K of a few samples; 5
# keeps a plateau of 6 samples (a coil command held for 6 samples) from being read as an outlier.
# Common practice, no source.
HALF_WIDTH = 5

# Expected number of good samples wrongly flagged per log under Gaussian noise: sets the threshold
# t by a Bonferroni bound over all samples and tests (t = 3 in Hampel's rule would flag 0.27 % of good
# samples, hundreds in a long pass). Set well below 1 because real residuals have heavier tails than
# Gaussian ones (signal curvature inside the window adds to the noise). Common practice, no source.
FALSE_ALARMS_PER_LOG = 1e-3

# Hampel's customary threshold, the least we use (Pearson et al. 2016, sec. 2)
T_MIN = 3.0


def window_bounds(segment_start: np.ndarray, n: int, half_width: int = HALF_WIDTH, *, symmetric: bool = False):
    """Per-sample window ``[lo, hi]`` (inclusive) of half-width K that stays inside its segment.

    Parameters
    ----------
    segment_start : (S,) int array, ascending, first index of each segment (``[0, ...]``)
    n : int, number of samples
    half_width : int, K
    symmetric : bool
        Near a segment end, shrink the window on both sides alike (``i - k .. i + k``) instead of
        cutting it on one side only. The median of a symmetric window of a straight line is its
        centre sample; the median of a one-sided window is not, so on a fast-turning vector a
        one-sided window would call the first samples after a gap spikes.

    Returns
    -------
    lo, hi : (n,) int64 arrays
    """
    starts = np.asarray(segment_start, dtype=np.int64)
    ends = np.append(starts[1:], n) - 1
    i = np.arange(n, dtype=np.int64)
    seg = np.repeat(np.arange(starts.size), ends - starts + 1)  # segment of each sample
    if symmetric:
        k = np.minimum(np.minimum(i - starts[seg], ends[seg] - i), half_width)
        return i - k, i + k
    lo = np.maximum(i - half_width, starts[seg])
    hi = np.minimum(i + half_width, ends[seg])
    return lo, hi


@numba.njit(cache=True, nogil=True)
def _insert(buf, m, v):  # pragma: no cover - compiled
    """Insert v into the sorted buf[:m] (binary search, then shift)."""
    lo, hi = 0, m
    while lo < hi:
        mid = (lo + hi) // 2
        if buf[mid] <= v:
            lo = mid + 1
        else:
            hi = mid
    for k in range(m, lo, -1):
        buf[k] = buf[k - 1]
    buf[lo] = v


@numba.njit(cache=True, nogil=True)
def _remove(buf, m, v):  # pragma: no cover - compiled
    """Remove one element equal to v from the sorted buf[:m]."""
    lo, hi = 0, m
    while lo < hi:
        mid = (lo + hi) // 2
        if buf[mid] < v:
            lo = mid + 1
        else:
            hi = mid
    for k in range(lo, m - 1):
        buf[k] = buf[k + 1]


@numba.njit(cache=True, nogil=True)
def moving_median_mad(x, lo, hi):  # pragma: no cover - compiled; checked against the reference
    """Median and median absolute deviation of ``x[lo[i] : hi[i] + 1]`` for every i.

    The window is kept sorted as it slides (one removal and one insertion per step, a rebuild when
    it jumps to a new segment); the MAD comes from merging the deviations on either side of the
    median, which are already in order. Windows must move forward: ``lo`` and ``hi`` nondecreasing.

    Parameters
    ----------
    x : (N,) float64 array, finite
    lo, hi : (N,) int64 arrays, inclusive window bounds

    Returns
    -------
    med, mad : (N,) float64 arrays
    """
    n = x.size
    med = np.empty(n)
    mad = np.empty(n)
    width = 1
    for i in range(n):
        width = max(width, hi[i] - lo[i] + 1)
    buf = np.empty(width + 1)
    m = 0
    cur_lo, cur_hi = 0, -1
    for i in range(n):
        a, b = lo[i], hi[i]
        if a > cur_hi or a < cur_lo or b < cur_hi:  # disjoint or moved back: start again
            m = 0
            for j in range(a, b + 1):
                _insert(buf, m, x[j])
                m += 1
        else:
            for j in range(cur_lo, a):
                _remove(buf, m, x[j])
                m -= 1
            for j in range(cur_hi + 1, b + 1):
                _insert(buf, m, x[j])
                m += 1
        cur_lo, cur_hi = a, b
        h = m // 2
        if m % 2 == 1:
            md = buf[h]
        else:
            md = 0.5 * (buf[h - 1] + buf[h])
        med[i] = md
        # deviations in increasing order: walk outward from the median
        if m % 2 == 1:
            left, right = h - 1, h + 1
            d_prev = 0.0
            count = 1  # the centre, deviation 0
        else:
            left, right = h - 1, h
            d_prev = 0.0
            count = 0
        d_cur = 0.0
        target = h  # 0-based index of the (upper) middle deviation
        while count <= target:
            dl = md - buf[left] if left >= 0 else np.inf
            dr = buf[right] - md if right < m else np.inf
            d_prev = d_cur
            if dl <= dr:
                d_cur = dl
                left -= 1
            else:
                d_cur = dr
                right += 1
            count += 1
        if m % 2 == 1:
            mad[i] = d_cur if m > 1 else 0.0
        else:
            mad[i] = 0.5 * (d_prev + d_cur)
    return med, mad


def moving_median_mad_reference(x: np.ndarray, lo: np.ndarray, hi: np.ndarray):
    """Plain numpy version of :func:`moving_median_mad` (slow; for tests)."""
    med = np.empty(x.size)
    mad = np.empty(x.size)
    for i in range(x.size):
        w = x[lo[i]:hi[i] + 1]
        med[i] = np.median(w)
        mad[i] = np.median(np.abs(w - med[i]))
    return med, mad


def hampel_threshold(n_tests: int, false_alarms: float = FALSE_ALARMS_PER_LOG) -> float:
    """Threshold t (in robust standard deviations) so that ``n_tests`` Gaussian samples give about
    ``false_alarms`` exceedances in all: two-sided Bonferroni, never below Hampel's t = 3."""
    n = max(int(n_tests), 1)
    return float(max(T_MIN, norm.isf(false_alarms / (2.0 * n))))


def noise_sigma(x: np.ndarray, segment_start: np.ndarray) -> float:
    """Robust white-noise standard deviation of x from its second differences inside segments.

    For white noise of standard deviation s the second difference ``x[i-1] - 2 x[i] + x[i+1]`` has
    standard deviation sqrt(6) s, while a straight-line trend cancels; the median absolute value
    (times 1.4826) ignores spikes and steps. A difference-based estimate in the manner of Gasser,
    Sroka & Jennen-Steinmetz (1986, Biometrika 73:625) (memory), made robust with the MAD.
    Unlike the MAD about a moving median it is not pulled to zero on a steadily trending signal
    (there the centre sample is the window median whatever its noise).
    """
    n = x.size
    if n < 3:
        return 0.0
    starts = np.asarray(segment_start, dtype=np.int64)
    brk = np.zeros(n, dtype=bool)
    brk[starts[starts > 0]] = True
    # triplet (i-1, i, i+1) is usable when neither i nor i+1 starts a segment
    ok = ~(brk[1:-1] | brk[2:])
    d2 = (x[:-2] - 2.0 * x[1:-1] + x[2:])[ok]
    if d2.size == 0:
        return 0.0
    return float(robust_scale(d2, about_zero=True) / np.sqrt(6.0))


def hampel_flags(x: np.ndarray, lo: np.ndarray, hi: np.ndarray, t: float, floor):
    """Hampel identifier with the scale ``max(local MAD scale, floor)``.

    Parameters
    ----------
    x : (N,) float array
    lo, hi : (N,) int64 window bounds
    t : float, threshold in robust standard deviations
    floor : float or (N,) float array, least scale (same unit as x): the noise level

    Returns
    -------
    flag : (N,) bool, outliers (windows of fewer than 3 samples are never flagged)
    resid : (N,) float, ``x - moving median``
    scale : (N,) float, the scale used
    """
    x = np.ascontiguousarray(x, dtype=np.float64)
    if x.size == 0:
        z = np.zeros(0)
        return np.zeros(0, dtype=bool), z, z
    floor = np.ascontiguousarray(np.broadcast_to(np.asarray(floor, dtype=np.float64), x.shape))
    med, mad = moving_median_mad(x, lo, hi)
    return _decide(x, med, mad, lo, hi, float(t), floor)


@numba.njit(cache=True, nogil=True)
def _decide(x, med, mad, lo, hi, t, floor):  # pragma: no cover - compiled
    """flag, resid, scale of the Hampel identifier in one pass (NaN or inf never flags)."""
    n = x.size
    flag = np.zeros(n, dtype=np.bool_)
    resid = np.empty(n)
    scale = np.empty(n)
    for i in range(n):
        r = x[i] - med[i]
        s = max(MAD_TO_SIGMA * mad[i], floor[i])
        resid[i] = r
        scale[i] = s
        flag[i] = (hi[i] - lo[i] >= 2) and abs(r) > t * s
    return flag, resid, scale
