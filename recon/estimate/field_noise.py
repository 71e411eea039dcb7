"""The unmodelled field's level and correlation time, fitted by maximum likelihood around the filter.

The filter carries the field the reference model omits as a first-order Gauss-Markov vector in GCRF
(:mod:`.kernels.propagation`): per-axis sigma ``sigma_f / sqrt(3)``, correlation time ``tau_f``. The
mission file gives a level for quiet days; a disturbed day can carry several times that, and a level
set too low makes the filter trust the field direction more than it deserves, so the stated attitude
sigma comes out too small. The magnitude residual of the calibration sees only the part of that field
along the field direction and less what the bias absorbed, so it is a floor, not an estimate.

The fitted model never goes below the model the filter was given (the mission file's, or the floor
the calibration's residual set), neither in level ``sigma_f`` nor in drift rate ``sigma_f^2 / tau_f``:
one pass's likelihood sees the slow part of the unmodelled field poorly, as the alignment and the
attitude absorb some of it, and on quiet simulated passes it came out at half the true level, or at
the true level with a correlation time five times too long (a drift five times too slow, which made
the stated attitude sigma 1.5 times too small on four seeded passes); the given model is the reference
model's documented accuracy, a floor the pass can raise but not lower.

The two numbers are fitted here by maximising the likelihood of the magnetometer updates, computed
from the forward filter's innovations (prediction-error decomposition: ``-2 log L = sum (NIS + log
det S)`` up to a constant; Schweppe 1965): for each correlation time on a short ladder, the level by a
bounded search in ``log sigma_f``, and the best pair kept. Only the slow part of the innovations
carries information on ``sigma_f``, and the likelihood ridge runs along roughly constant
``sigma_f^2 / tau_f`` (the field error's drift rate), so the ladder is coarse and the level is what
matters. The interval is where ``-2 log L`` rises by one above its minimum along the level (a profile
likelihood interval, 68 %).

References
----------
Schweppe, F. C. (1965). Evaluation of likelihood functions for Gaussian signals. IEEE Trans. Inform.
Theory 11(1), 61-70 (memory).
Mehra, R. K. (1970). On the identification of variances and adaptive Kalman filtering. IEEE Trans.
Automat. Control 15(2), 175-184 (memory).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize_scalar

__all__ = ["FieldNoiseFit", "fit_field_noise", "TAU_LADDER_S", "SIGMA_BOUNDS_nT"]

# correlation times tried, s: from a few minutes (small-scale currents crossed at orbital speed) to a
# good part of an orbit (the main field's model error) (common practice, no source)
TAU_LADDER_S = (150.0, 500.0, 1500.0)
# the level is searched between these, nT (vector rms): below the magnetometer noise of small
# satellites' sensors to a strongly disturbed day at low altitude (common practice, no source)
SIGMA_BOUNDS_nT = (20.0, 5000.0)


@dataclass(frozen=True)
class FieldNoiseFit:
    """The fitted unmodelled-field model.

    Attributes
    ----------
    sigma_nT : float, vector rms of the unmodelled field (the filter uses sigma_nT / sqrt(3) per axis):
        the likelihood's best level, or the given level where that is lower
    fitted_nT : float, the likelihood's best level
    tau_s : float, the correlation time used, s: the likelihood's best, shortened where needed so that
        the drift rate ``sigma_nT^2 / tau_s`` is not below the given model's
    fitted_tau_s : float, the likelihood's best correlation time, s
    interval_nT : (lo, hi), the 68 % profile-likelihood interval of sigma_nT at tau_s
    neg2_log_l : float, -2 log-likelihood at the fit (no constant)
    gain : float, how much -2 log L fell from the level the filter was given
    evaluations : int, filter runs made
    """

    sigma_nT: float
    fitted_nT: float
    tau_s: float
    fitted_tau_s: float
    interval_nT: tuple[float, float]
    neg2_log_l: float
    gain: float
    evaluations: int


def _level_at(neg2_log_l: Callable[[float], float]) -> tuple[float, float]:
    lo, hi = np.log(SIGMA_BOUNDS_nT[0]), np.log(SIGMA_BOUNDS_nT[1])
    res = minimize_scalar(lambda x: neg2_log_l(float(np.exp(x))), bounds=(lo, hi), method="bounded",
                          options={"xatol": 0.05})
    return float(np.exp(res.x)), float(res.fun)


def _interval(neg2_log_l: Callable[[float], float], best: float, at_best: float) -> tuple[float, float]:
    """Where -2 log L is one above its minimum, along the level (log-spaced bisection, 6 steps a side)."""
    out = []
    for far in (SIGMA_BOUNDS_nT[0], SIGMA_BOUNDS_nT[1]):
        a, b = np.log(best), np.log(far)
        if neg2_log_l(float(np.exp(b))) - at_best < 1.0:
            out.append(far)
            continue
        for _ in range(6):
            m = 0.5 * (a + b)
            a, b = (m, b) if neg2_log_l(float(np.exp(m))) - at_best < 1.0 else (a, m)
        out.append(float(np.exp(0.5 * (a + b))))
    return out[0], out[1]


def fit_field_noise(neg2_log_l: Callable[[float, float], float], given_nT: float, given_tau_s: float,
                    interval: bool = True) -> FieldNoiseFit:
    """Maximum-likelihood level and correlation time of the unmodelled field.

    Parameters
    ----------
    neg2_log_l : callable (sigma_nT, tau_s) -> -2 log-likelihood of the pass's magnetometer updates
        under the filter with that field model (one forward run)
    given_nT, given_tau_s : the model the filter had (its likelihood is the reference for ``gain``)
    interval : bool, find the 68 % interval too (otherwise it is (nan, nan))
    """
    calls = [0]

    def counted(s: float, tau: float) -> float:
        calls[0] += 1
        return neg2_log_l(s, tau)

    given = counted(given_nT, given_tau_s)
    best = None
    for tau in TAU_LADDER_S:
        s, v = _level_at(lambda x, tau=tau: counted(x, tau))
        if best is None or v < best[2]:
            best = (s, tau, v)
    s, tau, v = best
    lo, hi = _interval(lambda x: counted(x, tau), s, v) if interval else (np.nan, np.nan)
    used = max(s, given_nT)
    tau_used = min(tau, used ** 2 * given_tau_s / given_nT ** 2)
    return FieldNoiseFit(used, s, tau_used, tau, (lo, hi), v, given - v, calls[0])
