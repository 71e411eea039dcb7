"""The actuation latency from the motion: the latency scan and what its profile says.

The coils' identification is repeated with the applied current delayed by trial latencies; the
weighted residual sums of the trials form a profile whose minimum is the latency that best explains
the motion, and whose shape, in chi-square units, gives its range and tests the time tags.

References
----------
Bayley, G. V. and Hammersley, J. M. (1946). The "effective" number of independent observations in
an autocorrelated time series. J. R. Stat. Soc. Suppl. 8(2), 184-197 (AR(1) variance inflation of
the chi-square unit).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .dipole import DipoleFit, chi2_unit, identify_dipole, motion_splines
from .thresholds import LATENCY_DELTA_CHI2, LATENCY_DETERMINED_PERIODS, LATENCY_FIT_RATIO
from .types import LatencyProfile

__all__ = ["LatencyScan", "scan_actuation_latency", "latency_profile"]


@dataclass(frozen=True)
class LatencyScan:
    """The trials of one latency scan (see :func:`scan_actuation_latency`).

    Attributes
    ----------
    best : DipoleFit or None
        The best fit among the trials of zero or positive latency.
    latencies_s : (L,) trial latencies, s, sorted (negative ones included)
    wrss : (L,) weighted residual sum of squares of each trial (NaN where the fit failed)
    """

    best: DipoleFit | None
    latencies_s: np.ndarray
    wrss: np.ndarray


def scan_actuation_latency(t_s, w_body_rad_s, b_body_nT, inertia_kg_m2, t_coil_s, i_coil_A, t_eval_s,
                           period_s: float, *, max_latency_periods: int = 5, r_body_km=None,
                           w_cov_rad2_s2=None, gate=None, max_hold_s: float = 2.5,
                           rate_bias_knot_s: float | None = None, inertia_shape: bool = False
                           ) -> LatencyScan:
    """Find the actuation latency that best explains the motion (profile least squares).

    The fit of :func:`identify_dipole` is repeated with the applied current delayed by trial
    latencies: whole control periods from -1 to ``max_latency_periods``, then quarter periods
    within one period of the best, then tenths within a fifth of a period of the best. All trials
    use the same instants (those valid for every trial) and no outlier rejection, so their weighted
    residual sums of squares compare directly.

    A current cannot flow before it is commanded, so the latency is sought among the trials of zero
    and more. The negative trials (down to one period) are a check on the time tags: they are
    refined the same way when one of them fits best, and a profile whose minimum lies there says
    that the coil log's times, or the rate history's, are in error (see :func:`latency_profile`).

    Returns
    -------
    LatencyScan
    """
    J = np.asarray(inertia_kg_m2, float)
    mot = motion_splines(t_s, w_body_rad_s, b_body_nT, J, r_body_km, w_cov_rad2_s2)
    lo, hi = -period_s, max_latency_periods * period_s
    instants = _instants_for_every_trial(t_eval_s, t_coil_s, lo, hi, max_hold_s)
    if instants is None:
        return LatencyScan(None, np.zeros(0), np.zeros(0))

    def fit(L: float) -> DipoleFit | None:
        return identify_dipole(t_s, w_body_rad_s, b_body_nT, J, t_coil_s, i_coil_A, instants, latency_s=L,
                               gate=gate, max_hold_s=max_hold_s, reject_outliers=False, jackknife_blocks=0,
                               rate_bias_knot_s=rate_bias_knot_s, inertia_shape=inertia_shape, motion=mot)

    trials = {round(float(L), 9): fit(round(float(L), 9)) for L in period_s * np.arange(-1, max_latency_periods + 1)}
    # the profile can be shallow and bumpy between whole periods: search the two periods around the
    # best whole-period trial in quarter periods, then the best of those in tenths; the best causal
    # trial always, the best acausal one too when it beats it
    for half_width, step in ((1.0, 0.25), (0.2, 0.1)):
        steps_s = period_s * np.arange(-half_width, half_width + 1e-9, step)
        trials = {**trials, **_refined(trials, _best_trial(trials, True) + steps_s, lo, hi, fit)}
        if _score(trials[_best_trial(trials, False)]) < _score(trials[_best_trial(trials, True)]):
            trials = {**trials, **_refined(trials, _best_trial(trials, False) + steps_s, lo, hi, fit)}
    lat = np.array(sorted(trials))
    wr = np.array([_score(trials[L]) for L in lat])
    wr[~np.isfinite(wr)] = np.nan
    best = _best_trial(trials, True)
    if not np.isfinite(_score(trials[best])):
        return LatencyScan(None, lat, wr)
    return LatencyScan(trials[best], lat, wr)


def _instants_for_every_trial(t_eval_s, t_coil_s, lo: float, hi: float, max_hold_s: float) -> np.ndarray | None:
    """The evaluation instants whose current is known under every trial latency from ``lo`` to
    ``hi`` (s), or None when fewer than three are."""
    bounds = np.asarray(t_eval_s, float)
    t_coil = np.asarray(t_coil_s, float)
    if len(t_coil) == 0 or len(bounds) < 3:
        return None
    first_ok = t_coil[0] + hi
    last_ok = t_coil[-1] + lo + max_hold_s
    sel = (bounds >= first_ok) & (bounds <= last_ok)
    b2 = bounds[sel]
    if len(b2) < 3:
        return None
    return b2


def _score(f: DipoleFit | None) -> float:
    return np.inf if f is None else f.wrss


def _best_trial(trials: dict[float, DipoleFit | None], causal: bool) -> float:
    """The trial latency (zero or more when ``causal``, negative otherwise) with the smallest sum."""
    return min((L for L in trials if (L >= -1e-9) == causal), key=lambda L: _score(trials[L]))


def _refined(trials: dict[float, DipoleFit | None], latencies_s: np.ndarray, lo: float, hi: float,
             fit: Callable[[float], DipoleFit | None]) -> dict[float, DipoleFit | None]:
    """The new trials at ``latencies_s`` (clipped to [lo, hi], s, rounded to the nanosecond), skipping
    latencies already tried."""
    new: dict[float, DipoleFit | None] = {}
    for L in latencies_s:
        L = round(float(np.clip(L, lo, hi)), 9)
        if not any(abs(L - x) < 1e-9 for x in (*trials, *new)):
            new[L] = fit(L)
    return new


def latency_profile(scan_fit: DipoleFit | None, lat: np.ndarray, wrss: np.ndarray, period_s: float,
                    expected_unit: float | None = None) -> LatencyProfile | None:
    """Best latency of zero or more, its 3-sigma range (profile chi-square within 9 of the best
    causal trial; the 1-sigma one within 1), the chi-square excess of zero latency, the check of
    causality, and whether the profile determines the latency at all; all in units of the best fit's
    scaled residual variance.

    A current cannot act before its command, so the latency is bounded below by zero and its range
    is the bounded profile's. The negative trials test the time tags instead: when the best of them
    beats the best causal trial by ``LATENCY_DELTA_CHI2`` or more, the motion says, at 3 sigma, that
    the torque came before the logged command, and the latency is left undetermined ("acausal").

    The latency is determined only when all of these hold (otherwise the reason says which failed):

    - an interior minimum: the best trial lies inside the scanned range, and the profile rises by
      ``LATENCY_DELTA_CHI2`` or more on both sides of it (a profile that falls steadily to the end of
      the range, or a flat one, says nothing about the latency);
    - a model that fits: the best fit's chi-square unit (its residual variance with the AR(1)
      inflation) is at most ``LATENCY_FIT_RATIO`` times the one the rate history's stated noise leads
      to (``expected_unit``; the test is skipped without it): a motion model that leaves far more
      than the noise can trade its error against the latency;
    - a narrow range: the 3-sigma set spans at most ``LATENCY_DETERMINED_PERIODS`` periods.

    Parameters
    ----------
    scan_fit : the best causal fit of the scan (its ``ar1``, ``chi2_per_dof`` and ``latency_s``)
    lat : (L,) trial latencies, s, sorted; wrss : (L,) their weighted residual sums (NaN: failed)
    period_s : control period, s
    expected_unit : the chi-square unit the stated rate noise leads to, or None

    Returns
    -------
    LatencyProfile, or None when no causal trial was fitted
    """
    causal = lat >= -1e-9
    if scan_fit is None or len(lat) == 0 or not np.any(np.isfinite(wrss[causal])):
        return None
    unit = chi2_unit(scan_fit)
    d = (wrss - np.nanmin(wrss[causal])) / unit
    dd = np.where(causal, np.nan_to_num(d, nan=np.inf), np.inf)
    inside = lat[dd <= 1.0]
    wide = lat[dd <= LATENCY_DELTA_CHI2]
    d0 = d[np.argmin(np.abs(lat))] if np.min(np.abs(lat)) < 1e-9 else np.nan
    lo, hi = float(wide.min()), float(wide.max())
    # chi-square gained by letting the torque come before its command, and where it is best
    neg = ~causal & np.isfinite(d)
    gain = float(max(-np.min(d[neg]), 0.0)) if neg.any() else 0.0
    acausal = gain >= LATENCY_DELTA_CHI2
    best = float(scan_fit.latency_s)
    fin = np.isfinite(d)
    rise_before = float(np.max(d[fin & (lat < best - 1e-9)], initial=0.0))
    rise_after = float(np.max(d[fin & (lat > best + 1e-9)], initial=0.0))
    ratio = None if not expected_unit else float(unit / expected_unit)
    reason = _undetermined_reason(acausal, best, float(lat.max()), rise_before, rise_after, ratio, hi - lo, period_s)
    return LatencyProfile(
        latency_s=best, interval_s=(lo, hi), delta_chi2_zero=float(d0),
        interval_1sigma_s=(float(inside.min()), float(inside.max())),
        acausal=acausal, acausal_delta_chi2=gain,
        acausal_latency_s=float(lat[neg][np.argmin(d[neg])]) if neg.any() else None,
        determined=reason is None, rise_before=rise_before, rise_after=rise_after, fit_ratio=ratio, reason=reason)


def _undetermined_reason(acausal: bool, best: float, top: float, rise_before: float, rise_after: float,
                         ratio: float | None, width: float, period_s: float) -> str | None:
    """Why the profile does not determine the latency, or None when it does."""
    if acausal:
        return "the motion prefers the torque before its command (time tags in error)"
    if best >= top - 1e-9:
        return (f"the profile falls to the end of the range searched ({top:.1f} s) without a minimum inside it")
    if min(rise_before, rise_after) < LATENCY_DELTA_CHI2:
        return (f"the profile is flat: it rises by {rise_before:.1f} below and {rise_after:.1f} above its minimum at "
                f"{best:.2f} s, {LATENCY_DELTA_CHI2:.0f} needed on both sides")
    if ratio is not None and ratio > LATENCY_FIT_RATIO:
        return (f"the motion model does not fit: its residual is {ratio:.1f} times what the rate history's stated "
                f"noise allows (limit {LATENCY_FIT_RATIO:.0f})")
    if width > LATENCY_DETERMINED_PERIODS * period_s + 1e-9:
        return f"its 3-sigma range spans {width:.1f} s, more than {LATENCY_DETERMINED_PERIODS:.0f} control periods"
    return None
