"""Is the gyro healthy? ``ok``, ``dead``, ``bias_step`` or ``untestable``, from the field's motion alone.

Two tests, neither needing an attitude:

1. Stuck output: one axis repeats exactly the same value for at least ``STUCK_MIN_S`` and
   ``STUCK_MIN_FRACTION`` of the log (a live gyro's noise never repeats that long). Values at the
   range limit are clipped, not stuck, and do not count.
2. Kinematics (:mod:`.kinematics`, :mod:`.pass_bias`): the length of the field's motion across
   itself, less the rotation the gyro reports, must equal the reference field's own turn (a rotation
   keeps lengths: no attitude is needed). A healthy gyro has one bias over the pass and a constant
   scale and alignment error; the least-squares fit of that model to the lengths, noise-weighted,
   gives a chi-square that tests it. A gyro that is dead (its output carries no rotation) fits no
   such model once the body turns: the lengths then carry the unreported rotation. A bias step fits
   two biases, one each side of one time, and a dead gyro fits none.

Power. Whether the test could see a dead gyro is computed from the data: the same fit with the gyro
replaced by a constant (its mean reading) gives the chi-square a dead gyro would produce here; its
excess over the degrees of freedom is the non-centrality of the test's statistic. When the power
against that alternative is below ``POWER_MIN`` the body turns too slowly for the field to tell, and
the answer is ``untestable`` (never ``dead``), with the power in the reason.

Every threshold is set for a false-alarm rate per pass (``ALPHA``); the contributor guide records the
null distributions measured on simulated healthy passes.

References
----------
Rice, S. O. (1945). Mathematical analysis of random noise. Bell Syst. Tech. J. 24(1), 46-156.
Basseville, M. and Nikiforov, I. V. (1993). Detection of Abrupt Changes: Theory and Application.
Prentice Hall. Ch. 2 (one change point by maximising a likelihood ratio over its position) (memory).
Lehmann, E. L. and Romano, J. P. (2005). Testing Statistical Hypotheses, 3rd ed. Springer. Sec. 3.2
(power of a chi-square test: the non-central chi-square) (memory).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from ..core import DEG_PER_RAD, white_noise_from_differences
from .kinematics import FieldMotion, field_motion
from .pass_bias import LengthFit, StepEvidence, find_step, fit_lengths

__all__ = ["GyroHealth", "StepEvidence", "assess_gyro", "clipped_samples", "stuck_run", "ALPHA", "POWER_MIN",
           "STUCK_MIN_S", "STUCK_MIN_FRACTION", "MIN_SAMPLES", "RATE_MODEL_ERROR"]

# Per-pass false-alarm rate of each kinematic test (constant-bias model, misfit, bias prior): the
# issue's budget is 1 % per pass for the whole verdict, shared with the other tests.
ALPHA = 1e-3
# Power the test must have against a gyro that reads a constant before a pass can be called "ok"
# (or "dead"): below it the field's motion cannot tell, and the answer is "untestable".
POWER_MIN = 0.99
# The bias's rate random walk when none is stated, rad/s/sqrt(s) (a MEMS gyro: 2e-4 deg/s/sqrt(s), common
# practice, no source).
BIAS_WALK_RAD_S_SQRT_S = 2e-4 / DEG_PER_RAD
# Independent slopes needed for the kinematic test (about five minutes of data).
MIN_SAMPLES = 30
# Parts of the pass in each of which a misfitting gyro must still carry the body's turn to be called
# alive rather than dead (a gyro dead over a quarter of the pass or more fails in that part).
SEGMENTS = 4
# Slopes each part needs: twice the fit's twelve unknowns (bias and scale-misalignment matrix).
PART_MIN_SAMPLES = 24
# Stuck output: a run of identical values this long and this share of the log (a live gyro's noise
# of 0.004 deg/s/sqrt(Hz) never repeats a value twice in a row at 20 Hz) (common practice, no source).
STUCK_MIN_S = 30.0
STUCK_MIN_FRACTION = 0.1
# What the fitted scale and alignment leave of the errors of the gyro and the calibrated magnetometer
# (soft iron and scale residuals of about a percent), as a fraction of |w| |b| per axis (common
# practice, no source; the null distributions in the contributor guide are measured with it).
RATE_MODEL_ERROR = 0.005


@dataclass(frozen=True)
class GyroHealth:
    """The verdict on the gyro of one pass, with the figures behind it.

    Attributes
    ----------
    health : "ok" | "dead" | "bias_step" | "untestable"
    reason : one sentence with the numbers
    bias_rad_s, bias_sigma_rad_s : (3,) the pass's constant bias and its 1-sigma, rad/s, body axes (None
        when not estimated)
    scale_misalignment : (3, 3) E of ``w_gyro = (I + E) w + beta`` as estimated, or None
    samples : int, independent slopes used
    chi2, dof, p_value : the one-bias model's chi-square on the lengths
    power : probability that the test flags a gyro reading a constant (None: not computed)
    step : StepEvidence or None
    dead_start_s, dead_stop_s : where the gyro is dead (s since the epoch), axis : int or None
    """

    health: str
    reason: str
    bias_rad_s: np.ndarray | None = None
    bias_sigma_rad_s: np.ndarray | None = None
    scale_misalignment: np.ndarray | None = None
    samples: int = 0
    chi2: float | None = None
    dof: int | None = None
    p_value: float | None = None
    power: float | None = None
    step: StepEvidence | None = None
    dead_start_s: float | None = None
    dead_stop_s: float | None = None
    axis: int | None = None

    def to_summary(self) -> dict[str, Any]:
        """The "gyro" block of summary.json."""
        def dps(x):
            return None if x is None else [float(v) * DEG_PER_RAD for v in x]
        out: dict[str, Any] = {
            "health": self.health, "reason": self.reason, "bias_dps": dps(self.bias_rad_s),
            "bias_sigma_dps": dps(self.bias_sigma_rad_s),
            "scale_misalignment": (None if self.scale_misalignment is None
                                   else np.asarray(self.scale_misalignment).tolist()),
            "samples": self.samples, "chi2": self.chi2, "dof": self.dof, "p_value": self.p_value,
            "power_against_dead": self.power,
            "false_alarm_rate": ALPHA}
        if self.step is not None:
            s = self.step
            out["step"] = {"t_s": s.t_s, "interval_s": [s.t_lo_s, s.t_hi_s], "before_dps": dps(s.before_rad_s),
                           "after_dps": dps(s.after_rad_s), "delta_chi2": s.delta_chi2, "p_value": s.p_value}
        if self.dead_start_s is not None:
            out["dead_interval_s"] = [self.dead_start_s, self.dead_stop_s]
        return out


# ------------------------------------------------------------------------------------ stuck output
def clipped_samples(w: np.ndarray, full_scale_rad_s: float | None = None) -> np.ndarray:
    """Samples at the range limit on some axis, (G,) bool: at 99.9 % of the full scale when it is
    known, otherwise at the axis's largest magnitude when that exact value recurs, on less than half
    the log (a clip repeats its limit; a live gyro's noise never repeats its extreme; an axis that sits
    at one value most of the time is stuck, not clipped)."""
    a = np.abs(np.asarray(w, float))
    if full_scale_rad_s:
        return np.any(a >= 0.999 * full_scale_rad_s, axis=1)
    top = a.max(axis=0)
    at = (a == top[None, :]) & (top[None, :] > 0)
    return np.any(at & ((at.sum(axis=0) >= 3) & (at.sum(axis=0) < len(a) // 2))[None, :], axis=1)


def stuck_run(t: np.ndarray, w: np.ndarray, clipped: np.ndarray) -> tuple[float, float, int]:
    """Longest time span over which one axis repeats exactly the same (unclipped) value:
    (start_s, stop_s, axis), axis -1 when no value repeats."""
    best = (0.0, 0.0, -1)
    for ax in range(w.shape[1]):
        same = (np.diff(w[:, ax]) == 0.0) & ~clipped[1:] & ~clipped[:-1]
        if not same.any():
            continue
        edges = np.diff(np.r_[0, same.astype(np.int8), 0])
        starts = np.nonzero(edges == 1)[0]
        stops = np.nonzero(edges == -1)[0]  # the run covers samples starts..stops (inclusive)
        span = t[stops] - t[starts]
        k = int(np.argmax(span))
        if span[k] > best[1] - best[0]:
            best = (float(t[starts[k]]), float(t[stops[k]]), ax)
    return best


def _stuck(t_gyro: np.ndarray, w: np.ndarray, clipped: np.ndarray) -> GyroHealth | None:
    span = float(t_gyro[-1] - t_gyro[0])
    s0, s1, ax = stuck_run(t_gyro, w, clipped)
    if ax < 0 or (s1 - s0) < max(STUCK_MIN_S, STUCK_MIN_FRACTION * span):
        return None
    value = float(w[np.searchsorted(t_gyro, s0), ax])
    return GyroHealth("dead", f"gyro axis {'xyz'[ax]} repeats the same output {value * DEG_PER_RAD:.4g} deg/s for "
                              f"{s1 - s0:.0f} s ({100 * (s1 - s0) / span:.0f} % of the log): stuck or dead.",
                      dead_start_s=s0, dead_stop_s=float(t_gyro[-1]) if s1 >= t_gyro[-1] - 1.0 else s1, axis=ax)


# ------------------------------------------------------------------------------------- kinematics
def _power(fm: FieldMotion, one: LengthFit) -> float:
    """Power of the one-bias test against a gyro reading a constant: the fit repeated with the gyro
    replaced by its mean reading; the chi-square beyond its degrees of freedom is the non-centrality."""
    dead = fit_lengths(fm, w_gyro_rad_s=np.broadcast_to(fm.w_gyro_rad_s.mean(axis=0), fm.w_gyro_rad_s.shape))
    crit = stats.chi2.isf(ALPHA, one.dof)
    return float(stats.ncx2.sf(crit, one.dof, max(dead.chi2 - dead.dof, 1e-9)))


def assess_gyro(t_gyro_s: np.ndarray, w_gyro_rad_s: np.ndarray, t_mag_s: np.ndarray, b_body_nT: np.ndarray,
                b_ref_nT: np.ndarray | None = None, *, mag_noise_nT: float | None = None,
                gyro_arw_rad_sqrt_s: float | None = None, bias0_sigma_rad_s: float = 0.5 / DEG_PER_RAD,
                full_scale_rad_s: float | None = None, field_steps_s: np.ndarray | None = None,
                bias_walk_rad_s_sqrt_s: float = BIAS_WALK_RAD_S_SQRT_S) -> GyroHealth:
    """The gyro's health over one pass (see the module docstring).

    Parameters
    ----------
    t_gyro_s : (G,) s; w_gyro_rad_s : (G, 3) rad/s, body axes (finite rows)
    t_mag_s : (N,) s; b_body_nT : (N, 3) nT, calibrated field, body axes
    b_ref_nT : (N, 3) nT, reference field at the magnetometer samples (any inertial frame), or None
    mag_noise_nT, gyro_arw_rad_sqrt_s : noise levels (None: from the data's second differences)
    bias0_sigma_rad_s : 1-sigma of the turn-on bias
    full_scale_rad_s : the gyro's range, or None
    field_steps_s : (S,) s, instants where the sensed field can jump (the control ticks when the
        magnetometer samples with the coils on), or None
    bias_walk_rad_s_sqrt_s : the bias's rate random walk (a step must stand out of it)

    Returns
    -------
    GyroHealth
    """
    tg = np.asarray(t_gyro_s, float)
    wg = np.asarray(w_gyro_rad_s, float)
    clipped = clipped_samples(wg, full_scale_rad_s)
    stuck = _stuck(tg, wg, clipped)
    if stuck is not None:
        return stuck
    b = np.asarray(b_body_nT, float)
    if mag_noise_nT is None:
        mag_noise_nT = white_noise_from_differences(b[np.all(np.isfinite(b), axis=1)])
    if gyro_arw_rad_sqrt_s is None:
        gyro_arw_rad_sqrt_s = white_noise_from_differences(wg[~clipped]) * np.sqrt(float(np.median(np.diff(tg))))
    kw = dict(mag_noise_nT=mag_noise_nT, gyro_arw_rad_sqrt_s=gyro_arw_rad_sqrt_s, gyro_bad=clipped,
              rate_model_error=RATE_MODEL_ERROR, field_steps_s=field_steps_s)
    fm = field_motion(t_mag_s, b, b_ref_nT, tg, wg, **kw)
    if len(fm.t_s) < MIN_SAMPLES:
        return GyroHealth("untestable", f"gyro not stuck; only {len(fm.t_s)} slopes of the field with an unclipped "
                                        f"gyro ({MIN_SAMPLES} needed) to test it against.", samples=len(fm.t_s))
    dense = field_motion(t_mag_s, b, b_ref_nT, tg, wg, every_sample=True, half_widths_s=(1.0,), **kw)
    return _decide(fm, dense, bias0_sigma_rad_s, bias_walk_rad_s_sqrt_s)


def _decide(fm: FieldMotion, dense: FieldMotion, bias0_sigma: float, bias_walk: float) -> GyroHealth:
    """One bias, one step, or none; with the power to tell."""
    one = fit_lengths(fm)
    power = _power(fm, one)
    cov_b = one.cov[:3, :3]
    prior = float(one.beta @ np.linalg.solve(cov_b + bias0_sigma ** 2 * np.eye(3), one.beta))
    p_prior = float(stats.chi2.sf(prior, 3))
    base = dict(bias_rad_s=one.beta, bias_sigma_rad_s=np.sqrt(np.diag(cov_b)),
                scale_misalignment=one.scale_misalignment, samples=one.n, chi2=one.chi2, dof=one.dof,
                p_value=one.p_value, power=power)
    figures = (f"chi-square {one.chi2:.0f} for {one.dof} degrees of freedom (p = {one.p_value:.2g}) over {one.n} "
               f"slopes of the field, power {power:.3f} against a gyro reading a constant")
    # the step is sought whatever the one-bias fit says: that fit's noise level, estimated from its own
    # residual, can swallow a step that two biases would leave as plain noise
    step = find_step(fm, one, ALPHA, dense, bias_walk) if p_prior >= ALPHA else None
    if step is not None:
        return GyroHealth("bias_step", f"gyro bias stepped by {_fmt_dps(step.after_rad_s - step.before_rad_s)} deg/s "
                                       f"at {step.t_s:.1f} s: two biases fit (p = {step.p_value:.2g}, chi-square gain "
                                       f"{step.delta_chi2:.0f} over one bias): {figures}.", step=step, **base)
    if one.p_value >= ALPHA and p_prior >= ALPHA:
        if power < POWER_MIN:
            return GyroHealth("untestable", "gyro consistent with the field's motion, but the body turns too slowly "
                                            f"for the field to tell a dead gyro: {figures}.", **base)
        return GyroHealth("ok", f"gyro consistent with the field's motion with one bias "
                                f"({_fmt_dps(one.beta)} deg/s): {figures}.", **base)
    if power < POWER_MIN:
        return GyroHealth("untestable", "gyro does not fit one bias, but the body turns too slowly for the field to "
                                        f"tell a dead gyro: {figures}.", **base)
    why = (f"a bias of {np.linalg.norm(one.beta) * DEG_PER_RAD:.2f} deg/s would be needed (turn-on bias 1-sigma "
           f"{bias0_sigma * DEG_PER_RAD:.2f} deg/s, p = {p_prior:.2g})" if p_prior < ALPHA else
           "neither one bias nor two fit")
    alive = _follows_the_turn(fm, one)
    if alive is not None:
        return GyroHealth("untestable", f"gyro does not fit the field's motion ({why}), yet in every part of the pass "
                                        f"it explains the field's turn far better than a constant reading would "
                                        f"({alive}): the field carries a disturbance the calibration left (coil "
                                        f"crosstalk sampled with the coils on, say), not a dead gyro; {figures}.",
                          **base)
    return GyroHealth("dead", f"gyro output does not follow the measured field's motion: {why}; {figures}.",
                      dead_start_s=float(fm.t_s[0]), dead_stop_s=float(fm.t_s[-1]), **base)


def _follows_the_turn(fm: FieldMotion, one: LengthFit) -> str | None:
    """Whether the gyro carries the body's turn in each of ``SEGMENTS`` consecutive parts of the pass
    although the model misfits: in each, the fit with the gyro against the same fit with the gyro
    replaced by its mean reading over that part, both at the whole pass's noise level. The gain in
    chi-square, in units of the gyro fit's own chi-square per degree of freedom (its misfit), must
    exceed the chi-square quantile of 3 degrees of freedom at ``ALPHA``. A dead gyro (zero or constant
    output) fits exactly as the constant does in the parts where it is dead, so it never passes.
    Returns the figures when it passes in every part, else None."""
    parts = np.array_split(np.arange(len(fm.t_s)), SEGMENTS)
    if min(len(p) for p in parts) < PART_MIN_SAMPLES:
        return None
    crit = float(stats.chi2.isf(ALPHA, 3))
    gains = []
    for idx in parts:
        seg = fm.take(idx)
        live = fit_lengths(seg, noise_level=one.noise_level)
        const = fit_lengths(seg, noise_level=one.noise_level,
                            w_gyro_rad_s=np.broadcast_to(seg.w_gyro_rad_s.mean(axis=0), seg.w_gyro_rad_s.shape))
        unit = max(live.chi2 / max(live.dof, 1), 1.0)
        gains.append((const.chi2 - live.chi2) / unit)
        if not gains[-1] > crit:
            return None
    return (f"scaled chi-square gain over a constant reading {', '.join(f'{g:.0f}' for g in gains)} in its "
            f"{SEGMENTS} parts, each above {crit:.1f}")


def _fmt_dps(v: np.ndarray) -> str:
    d = np.asarray(v) * DEG_PER_RAD
    return f"({d[0]:+.3f}, {d[1]:+.3f}, {d[2]:+.3f})"
