"""The judgement's findings and verdict: what the evidence says, as anomaly records and reasons.

Each function looks at one line of evidence (coils, commands, latency, effect, crosstalk feedback,
rate bias) and returns its :class:`Findings`: anomaly records carrying their numbers in an evidence
sentence, and the reasons why a part could not be judged. The thresholds are in :mod:`.thresholds`.

References
----------
Avanzini, G. and Giulietti, F. (2012). Magnetic detumbling of a rigid spacecraft. J. Guidance,
Control, and Dynamics 35(4), 1326-1334, doi:10.2514/1.53074 (near-optimal gain, quoted in
``detumble_slow``).
Schwarz, G. (1978). Estimating the dimension of a model. Ann. Statist. 6(2), 461-464.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import Anomaly
from .effect import trend_label
from .replay import CommandComparison
from .thresholds import (
    CHATTER_FRACTION_LIMIT,
    CHATTER_ROTATION_FACTOR,
    COIL_GAIN_SIGMAS,
    COIL_GAIN_TOLERANCE,
    COMMAND_GAIN_TOLERANCE,
    COMMAND_MIN_CORRELATION,
    COMMAND_MIN_TICKS,
    DETUMBLE_SLOW_FACTOR,
    EXPECTED_MIN_CHANGE,
    LATENCY_DELTA_CHI2,
    LATENCY_LIMIT_PERIODS,
    LOOP_GAIN_LIMIT,
    MIN_SEGMENTS,
    NO_RESPONSE_RATIO,
    SATURATION_FRACTION_LIMIT,
    SEGMENT_POINTS,
    TREND_SIGMAS,
)
from .types import (
    AXES,
    AxisJudgement,
    CrosstalkFeedback,
    EffectAssessment,
    LatencyProfile,
    PassContext,
    RateBiasEvidence,
    Trend,
    finite_or_none,
)

__all__ = ["Findings", "findings", "verdict"]


@dataclass(frozen=True)
class Findings:
    """Anomaly records and the reasons why parts could not be judged, in the order they were found."""

    anomalies: tuple[Anomaly, ...] = ()
    reasons: tuple[str, ...] = ()

    def __add__(self, other: Findings) -> Findings:
        return Findings(self.anomalies + other.anomalies, self.reasons + other.reasons)


def findings(ctx: PassContext, *, axes: tuple[AxisJudgement, ...], identified: bool,
             comparison: CommandComparison | None, latency: LatencyProfile | None, effect: EffectAssessment,
             feedback: CrosstalkFeedback | None, chatter: np.ndarray, n_segments: int, n_ticks: int,
             rate_bias: RateBiasEvidence | None) -> Findings:
    """Every finding of one pass: the law, the coils, the commands, the latency, the effect, the
    crosstalk feedback and the rate bias, in that order.

    Parameters
    ----------
    ctx : the pass's setting; axes : the three coils' judgements
    identified : whether the coils were identified from the motion at all
    comparison : logged against replayed commands (None: no law)
    latency : the latency profile (None: not scanned)
    effect : the physical effect; feedback : the crosstalk feedback (None: not assessed)
    chatter : (3,) chatter fraction of the logged commands per axis
    n_segments, n_ticks : segments and control ticks of the pass
    rate_bias : the rate-bias evidence (None: not scanned)
    """
    law = Findings()
    if ctx.law == "none":
        law = Findings(reasons=('no control law is configured (controller.law = "none"): there is no intended '
                                "behaviour to check the coils against",))
    return (law + _estimator_findings(ctx) + _coil_findings(ctx, axes, identified, n_segments, n_ticks)
            + _command_findings(ctx, axes, comparison) + _latency_findings(ctx, latency)
            + _effect_findings(ctx, effect) + _feedback_findings(ctx, effect, feedback, chatter)
            + _rate_bias_findings(ctx, rate_bias))


def verdict(ctx: PassContext, axes: tuple[AxisJudgement, ...], anomalies: tuple[Anomaly, ...],
            comparison: CommandComparison | None, latency: LatencyProfile | None) -> str:
    """"not_as_intended" on any critical or warning finding other than saturation (an operating
    regime, not a fault), or when the cross-product law read a gyro the estimator found dead or with a
    bias step (the law then regulated a wrong rate); otherwise "as_intended" only when every coil's
    polarity and every axis's commands were checked, the motion's timing is causal and the rate
    history did not come from the dynamics model (which assumes the nominal coils); "undetermined"
    (with the reasons) when anything could not be."""
    if any(a.severity in ("critical", "warning") and a.code != "controller_saturated" for a in anomalies):
        return "not_as_intended"
    if ctx.law == "cross_product" and ctx.gyro_health in ("dead", "bias_step"):
        return "not_as_intended"
    if ctx.law == "none" or any(ax.polarity == "undetermined" for ax in axes) or ctx.rate_source == "dynamics":
        return "undetermined"
    if latency is not None and latency.acausal:
        return "undetermined"
    if not all(_command_verified(comparison, a) for a in range(3)):
        return "undetermined"
    return "as_intended"


def _estimator_findings(ctx: PassContext) -> Findings:
    """What the estimator's verdict on the gyro changes in the judgement (its own anomaly reports the
    gyro): the reasons the verdict cannot rest on the usual evidence."""
    reasons = []
    if ctx.law == "cross_product" and ctx.gyro_health in ("dead", "bias_step"):
        reasons.append(f"the cross-product law reads the gyro, which the estimator found "
                       f"{'dead' if ctx.gyro_health == 'dead' else 'with a bias step'}: the law regulated a wrong rate")
    if ctx.rate_source == "dynamics":
        reasons.append("the rate history was reconstructed without the gyro, from Euler's equations with the nominal "
                       "coil dipoles: the motion cannot confirm the coils independently")
    return Findings(reasons=tuple(reasons))


def _an(ctx: PassContext, code: str, severity: str, evidence: str, axis: str | None = None,
        value: float | None = None) -> Anomaly:
    return Anomaly(code, severity, evidence, ctx.span[0], ctx.span[1], axis,
                   finite_or_none(value) if value is not None else None)


def _command_verified(cmp_: CommandComparison | None, a: int) -> bool:
    if cmp_ is None or not np.isfinite(cmp_.correlation[a]) or cmp_.correlation[a] < COMMAND_MIN_CORRELATION:
        return False
    if cmp_.n_informative[a] >= COMMAND_MIN_TICKS:
        return bool(abs(cmp_.gain_ratio[a] - 1.0) <= COMMAND_GAIN_TOLERANCE)
    return True


def _coil_findings(ctx: PassContext, axes, identified: bool, n_seg: int, n_ticks: int) -> Findings:
    if not identified:
        if n_seg < MIN_SEGMENTS:
            return Findings(reasons=(f"pass too short to identify the coils from the motion: {n_ticks} control ticks "
                                     f"({n_ticks * ctx.period_s:.0f} s) make {n_seg} segments of {SEGMENT_POINTS - 1} "
                                     f"periods, {MIN_SEGMENTS} are needed",))
        return Findings(reasons=("the coils could not be identified from the motion: too few usable instants "
                                 "(gaps in the coil log or the rate history)",))
    return sum((_coil_axis_findings(ctx, a, ax) for a, ax in enumerate(axes)), Findings())


def _coil_axis_findings(ctx: PassContext, a: int, ax: AxisJudgement) -> Findings:
    est, sig, c0, r, rs = (ax.dipole_per_amp_estimated, ax.dipole_per_amp_sigma, ax.dipole_per_amp_nominal,
                           ax.gain_ratio, ax.gain_ratio_sigma)
    if est is None or sig is None:
        head = f"coil {ax.axis}: no dipole estimate (nominal {c0:+.2f} A m^2/A)"
    else:
        head = f"coil {ax.axis}: estimated dipole {est:+.2f} +- {sig:.2f} A m^2/A against nominal {c0:+.2f}"
    rms = f"{(ax.rms_current_A or 0.0) * 1e3:.1f} mA rms"
    out, reasons = [], []
    if ax.polarity == "inverted":
        why = ""
        if ax.command_gain_ratio is not None and abs(ax.command_gain_ratio - 1) <= COMMAND_GAIN_TOLERANCE:
            why = (f"; the logged commands follow the law (command gain ratio {ax.command_gain_ratio:.2f}), "
                   "so the reversal is in the coil or its wiring")
        out.append(_an(ctx, "coil_polarity_inverted", "critical",
                       f"{head}: polarity inverted ({ax.polarity_confidence:.0f} sigma from zero; log-likelihood ratio "
                       f"of inverted to nominal {-2.0 * r / rs ** 2:.0f}){why}", ax.axis, est))
    elif ax.polarity == "no_response":
        out.append(_an(ctx, "coil_no_response", "critical",
                       f"{head}: no response ({ax.polarity_confidence:.0f} sigma below nominal) while "
                       f"commanded at {rms}", ax.axis, est))
    elif ax.polarity == "undetermined":
        if not ax.rms_current_A:
            reasons.append(f"{head}: the coil carried no current during the pass")
        else:
            reasons.append(f"{head}: cannot be told from nominal or from zero at 3 sigma "
                           f"(current {rms}, {100 * ax.rms_current_A / ctx.max_current_A[a]:.0f} % of the limit; "
                           f"Fisher information on the dipole ratio {1.0 / rs ** 2:.0f}: nominal and inverted lie "
                           f"{2.0 / rs:.1f} sigma apart, no response and half gain {NO_RESPONSE_RATIO / rs:.1f})")
    if ax.polarity in ("nominal", "inverted"):
        lo, hi = abs(r) - COIL_GAIN_SIGMAS * rs, abs(r) + COIL_GAIN_SIGMAS * rs
        if lo > 1 + COIL_GAIN_TOLERANCE or hi < 1 - COIL_GAIN_TOLERANCE:
            out.append(_an(ctx, "coil_gain_off", "warning",
                           f"coil {ax.axis}: dipole {abs(est):.2f} +- {sig:.2f} A m^2/A is {abs(r):.2f} of nominal "
                           f"{abs(c0):.2f} (3-sigma interval {lo:.2f} to {hi:.2f}, outside "
                           f"{1 - COIL_GAIN_TOLERANCE:.2f} to {1 + COIL_GAIN_TOLERANCE:.2f})", ax.axis, r))
    return Findings(tuple(out), tuple(reasons))


def _command_findings(ctx: PassContext, axes, cmp_: CommandComparison | None) -> Findings:
    """Logged commands against the replayed law: mismatch or unchecked per axis, saturation, lag."""
    if cmp_ is None:
        return Findings()
    T = ctx.period_s
    out, reasons = [], []
    for a, ax in enumerate(axes):
        cg, cc, n = cmp_.gain_ratio[a], cmp_.correlation[a], int(cmp_.n_informative[a])
        bad_gain = n >= COMMAND_MIN_TICKS and abs(cg - 1.0) > COMMAND_GAIN_TOLERANCE
        bad_corr = np.isfinite(cc) and cc < COMMAND_MIN_CORRELATION and n >= COMMAND_MIN_TICKS
        if bad_gain or bad_corr:
            sev = "critical" if (np.isfinite(cg) and cg < 0) else "warning"
            out.append(_an(ctx, "command_mismatch", sev,
                           f"axis {ax.axis}: logged commands are {cg:.2f} times the replayed {ctx.law} law "
                           f"(correlation {cc:.2f} over {n} unsaturated ticks); a healthy law gives 1.00 within "
                           f"{COMMAND_GAIN_TOLERANCE:.2f} and correlation above {COMMAND_MIN_CORRELATION}",
                           ax.axis, cg))
        elif not _command_verified(cmp_, a):
            reasons.append(f"axis {ax.axis}: the logged commands could not be checked against the law "
                           f"({n} informative ticks, correlation {cc:.2f})")
        sf = cmp_.saturation_fraction[a]
        if np.isfinite(sf) and sf > SATURATION_FRACTION_LIMIT:
            out.append(_an(ctx, "controller_saturated", "warning",
                           f"axis {ax.axis}: at the current limit ({ctx.max_current_A[a] * 1e3:.0f} mA) on "
                           f"{100 * sf:.0f} % of control ticks (more than {100 * SATURATION_FRACTION_LIMIT:.0f} %): "
                           "the law acts as bang-bang there, not at its configured gain", ax.axis, sf))
    if cmp_.lag_s is not None and abs(cmp_.lag_s) >= LATENCY_LIMIT_PERIODS * T:
        out.append(_an(ctx, "command_latency", "warning",
                       f"logged commands appear {cmp_.lag_s:.2f} s after the replayed law's tick "
                       f"({cmp_.lag_s / T:.1f} control periods)", value=cmp_.lag_s))
    return Findings(tuple(out), tuple(reasons))


def _latency_findings(ctx: PassContext, lat_info: LatencyProfile | None) -> Findings:
    """Torque before its command (time tags in error), a latency the motion puts beyond half a control
    period at 3 sigma, or the reason the latency is undetermined."""
    if lat_info is None:
        return Findings()
    T = ctx.period_s
    if lat_info.acausal:
        La, g = lat_info.acausal_latency_s, lat_info.acausal_delta_chi2
        text = (f"the motion is best explained with the coil currents acting {-La:.2f} s before their logged "
                f"command time (profile chi-square {g:.0f} below the best delay of zero or more, 3 sigma at "
                f"{LATENCY_DELTA_CHI2:.0f}); a current cannot flow before it is commanded, so the time tags of the "
                "coil log or of the rate history are in error, and the actuation latency is not judged")
        return Findings((_an(ctx, "actuation_before_command", "info", text, value=La),), (text,))
    L, (lo, hi), d0 = lat_info.latency_s, lat_info.interval_s, lat_info.delta_chi2_zero
    if not lat_info.determined:
        return Findings(reasons=(f"actuation latency undetermined: {lat_info.reason}",))
    if lo > LATENCY_LIMIT_PERIODS * T + 1e-9:
        return Findings((_an(ctx, "command_latency", "warning",
                             f"coil currents act {L:.2f} s after their control tick (3-sigma range {lo:.2f} to "
                             f"{hi:.2f} s), {L / T:.1f} control periods; the motion rejects every latency up to "
                             f"{LATENCY_LIMIT_PERIODS:.1f} period at 3 sigma (profile chi-square +{d0:.0f} at zero "
                             f"delay; the profile rises {lat_info.rise_before:.0f} below and {lat_info.rise_after:.0f} "
                             "above its minimum)", value=L),))
    return Findings()


def _effect_findings(ctx: PassContext, effect: EffectAssessment) -> Findings:
    """The kinetic energy (B-dot) or momentum error (cross-product) rising, or falling too slowly."""
    if ctx.law == "bdot":
        tr, tre = effect.energy_fit, effect.energy_expected
        code_up, code_slow, what = "rate_increasing", "detumble_slow", "kinetic energy"
    elif ctx.law == "cross_product":
        tr, tre = effect.momentum_error_fit, effect.momentum_error_expected
        code_up, code_slow, what = "momentum_error_increasing", "momentum_dump_slow", "momentum error |h - h_target|"
    else:
        return Findings()
    if tr is None:
        return Findings(reasons=(f"the {what} trend could not be fitted (too few rate samples)",))
    tau_exp = tre.time_constant_s if tre is not None else float("nan")
    # the shortfall against what the replayed law predicts, in sigmas of the two slopes together: only a
    # significant one is a finding (a rise the law itself predicts is not a fault)
    z_short = _shortfall_sigmas(tr, tre)
    if trend_label(tr) == "increasing" and z_short > TREND_SIGMAS:
        if tre is None:
            against = "judged against no change (no expected trend could be replayed)"
        else:
            against = (f"where the configured law along this trajectory predicts ln slope {tre.slope_per_s:+.2e} "
                       f"+- {tre.sigma_per_s:.1e} per s")
        return Findings((_an(ctx, code_up, "critical",
                             f"{what} rose over the pass (ln slope {tr.slope_per_s:+.2e} +- {tr.sigma_per_s:.1e} "
                             f"per s, {np.expm1(tr.slope_per_s * tr.duration_s):+.0%} over {tr.duration_s:.0f} s) "
                             f"{against}: {z_short:.1f} sigma above it, limit {TREND_SIGMAS:.0f}; mean magnetic "
                             f"power {effect.magnetic_power_mean_W:+.2e} W (positive pumps energy in)",
                             value=tr.slope_per_s),))
    if tre is None or tre.slope_per_s >= 0 or abs(tre.slope_per_s) * tre.duration_s < EXPECTED_MIN_CHANGE:
        return Findings()
    ratio = effect.efficiency if effect.efficiency is not None else float("nan")
    if not (np.isfinite(ratio) and ratio < 1.0 / DETUMBLE_SLOW_FACTOR and z_short > TREND_SIGMAS):
        return Findings()
    obs = f"{tr.time_constant_s:.0f} s" if tr.slope_per_s < 0 else "no measurable decay"
    extra = ""
    k_eq, k_ag = effect.bdot_equivalent_gain_Nms, effect.near_optimal_gain_Nms
    if ctx.law == "bdot" and k_eq and k_ag:
        extra = (f"; B-dot equivalent gain k <|B|^2> = {k_eq:.2e} N m s, "
                 f"{k_eq / k_ag:.1f} times the near-optimal {k_ag:.2e} N m s "
                 "(Avanzini and Giulietti 2012)")
    return Findings((_an(ctx, code_slow, "warning",
                         f"{what} time constant {obs} against {tau_exp:.0f} s expected from the configured law along "
                         f"this trajectory (achieved {max(ratio, 0):.2f} of the expected decay rate, limit "
                         f"1/{DETUMBLE_SLOW_FACTOR:.0f}; shortfall {z_short:.1f} sigma){extra}", value=ratio),))


def _shortfall_sigmas(observed: Trend, expected: Trend | None) -> float:
    """How far the observed slope of ln x lies above the expected one, in sigmas of the two together.

    ``z = (s_obs - s_exp) / hypot(sigma_obs, sigma_exp)``; without an expectation the observed slope is
    set against zero (``z = s_obs / sigma_obs``). Positive: x fell more slowly (or rose faster) than the
    replayed law predicts. A difference with no stated scatter at all is infinitely significant (its
    sign kept); no difference is 0.
    """
    s_exp, sig_exp = (expected.slope_per_s, expected.sigma_per_s) if expected is not None else (0.0, 0.0)
    diff = float(observed.slope_per_s - s_exp)
    sig = float(np.hypot(observed.sigma_per_s, sig_exp))
    if not np.isfinite(diff) or np.isnan(sig):
        return 0.0
    if sig > 0:
        return diff / sig
    return float(np.sign(diff) * np.inf) if diff != 0 else 0.0


def _feedback_findings(ctx: PassContext, effect: EffectAssessment, loop: CrosstalkFeedback | None,
                       chatter: np.ndarray) -> Findings:
    """B-dot's limit-to-limit chatter, explained by the coil-field loop or not, or a loop that would
    oscillate although this pass did not chatter."""
    if ctx.law != "bdot" or not np.any(np.isfinite(chatter)):
        return Findings()
    rot = effect.mean_rate_rad_s * ctx.period_s / np.pi
    a = int(np.nanargmax(chatter))
    cf = float(chatter[a])
    lg = loop.loop_gain if loop is not None else None
    detected = cf >= CHATTER_FRACTION_LIMIT and cf >= CHATTER_ROTATION_FACTOR * rot
    rate_txt = f"{np.degrees(effect.mean_rate_rad_s):.1f} deg/s"
    if detected:
        head = (f"coil commands flip between the current limits on {100 * cf:.0f} % of ticks (axis {AXES[a]}); the "
                f"body's rotation ({rate_txt}) alone would flip about {100 * rot:.1f} %")
        if lg is not None and lg >= LOOP_GAIN_LIMIT:
            cw = loop.chatter_without
            cw_txt = f"{100 * float(np.nanmax(cw)):.0f} %" if np.any(np.isfinite(cw)) else "n/a"
            kmax = float(np.max(np.abs(loop.K_body_nT_per_A)))
            return Findings((_an(ctx, "crosstalk_feedback", "critical",
                                 f"{head}; the coil-field loop gain is {lg:.2f} (>= {LOOP_GAIN_LIMIT:.0f} oscillates; "
                                 f"crosstalk up to {kmax:.0f} nT/A) and the law replayed with the coils' field "
                                 f"removed from its samples flips on {cw_txt} of ticks: the coils' own field, seen "
                                 f"by the magnetometer (mag_sampling = {ctx.mag_sampling}), feeds back through dB/dt",
                                 AXES[a], lg),))
        lg_txt = f"loop gain {lg:.2f} < {LOOP_GAIN_LIMIT:.0f}" if lg is not None else "no crosstalk estimate"
        return Findings((_an(ctx, "crosstalk_feedback", "warning",
                             f"{head}; {lg_txt}: the coils' field does not explain it", AXES[a], cf),))
    if lg is not None and lg >= LOOP_GAIN_LIMIT and ctx.mag_sampling == "coils_on":
        return Findings((_an(ctx, "crosstalk_feedback", "warning",
                             f"the coil-field loop gain is {lg:.2f} (>= {LOOP_GAIN_LIMIT:.0f} oscillates) with the "
                             "magnetometer sampled while the coils are on, although commands flipped on only "
                             f"{100 * cf:.0f} % of ticks in this pass", value=lg),))
    return Findings()


def _rate_bias_findings(ctx: PassContext, rate_bias: RateBiasEvidence | None) -> Findings:
    """An info record when the identification needed a bias in the rate history: the rate other
    tools read from this pass (attitude.csv) carries it too. Only the collective evidence is quoted:
    the bias is well determined where the body turns fast (the gyroscopic term is proportional to
    the rate) and poorly where it has slowed, so single knot values would mislead."""
    if rate_bias is None or not rate_bias.used:
        return Findings()
    n = int(np.size(rate_bias.rad_s))
    return Findings((_an(
        ctx, "rate_history_biased", "info",
        f"the motion is explained better when the rate history may carry a slowly varying bias (chi-square "
        f"gain {rate_bias.delta_chi2:.0f} for {n} unknowns, against the Schwarz penalty "
        f"{rate_bias.penalty:.0f}): the reconstructed rate and gyro bias deserve a check; the coils and "
        "the latency were judged with that bias estimated alongside", value=rate_bias.delta_chi2),))
