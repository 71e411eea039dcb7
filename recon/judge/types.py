"""The judgement's result types: per coil, per pass, and the typed diagnostics behind them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..core import Anomaly

__all__ = ["AXES", "AxisJudgement", "ControllerJudgement", "finite_or_none", "LatencyProfile", "RateBiasEvidence",
           "Trend", "EffectAssessment", "CrosstalkFeedback", "PassContext",
           "JudgementDiagnostics"]

AXES = ("x", "y", "z")


def finite_or_none(x) -> float | None:
    """A finite number as a plain float (``+ 0.0``: never "-0.0" in the summary), otherwise None."""
    return None if x is None or not np.isfinite(x) else float(x) + 0.0


@dataclass(frozen=True)
class AxisJudgement:
    """What recon concludes about one coil (body axis).

    Attributes
    ----------
    axis : "x" | "y" | "z"
    polarity : "nominal" | "inverted" | "no_response" | "undetermined" (see ``classify_coil``)
    polarity_confidence : sigmas from zero (nominal, inverted), from nominal (no_response)
    dipole_per_amp_estimated, dipole_per_amp_sigma : C_jj identified from the motion and its total
        1-sigma (statistical with the model floor), A m^2 per A
    dipole_per_amp_nominal : C_jj of the mission file, A m^2 per A
    gain_ratio, gain_ratio_sigma : C_jj / nominal and its 1-sigma
    command_gain_ratio, correlation : logged against replayed commands (unsaturated ticks / all)
    saturation_fraction : fraction of control ticks at the current limit
    chatter_fraction : fraction of tick pairs flipping from one current limit to the other
    rms_current_A : rms current flowing during the pass, A
    """

    axis: str
    polarity: str
    polarity_confidence: float | None
    dipole_per_amp_estimated: float | None
    dipole_per_amp_sigma: float | None
    dipole_per_amp_nominal: float
    gain_ratio: float | None
    gain_ratio_sigma: float | None
    command_gain_ratio: float | None
    correlation: float | None
    saturation_fraction: float | None
    chatter_fraction: float | None
    rms_current_A: float | None

    def to_dict(self) -> dict[str, Any]:
        return {"polarity": self.polarity, "polarity_confidence": self.polarity_confidence,
                "dipole_per_amp_estimated": self.dipole_per_amp_estimated,
                "dipole_per_amp_sigma": self.dipole_per_amp_sigma,
                "dipole_per_amp_nominal": self.dipole_per_amp_nominal, "gain_ratio": self.gain_ratio,
                "gain_ratio_sigma": self.gain_ratio_sigma, "command_gain_ratio": self.command_gain_ratio,
                "correlation": self.correlation, "saturation_fraction": self.saturation_fraction,
                "chatter_fraction": self.chatter_fraction, "rms_current_A": self.rms_current_A}


@dataclass(frozen=True)
class ControllerJudgement:
    """The controller judgement of one pass (see :func:`judge_pass`); ``to_summary()`` gives the
    summary.json "controller" block.

    Attributes
    ----------
    law : the configured law; axes : three AxisJudgement (x, y, z)
    verdict : "as_intended" | "not_as_intended" | "undetermined"
    reasons : why parts could not be judged (non-empty whenever the verdict is "undetermined")
    anomalies : Anomaly records, each with an evidence sentence carrying its numbers
    latency_s : tick to torque, s: command_lag_s (tick to logged command, from the replay) plus
        actuation_latency_s (logged command to torque, from the motion); None where undetermined
    actuation_latency_interval_s : 3-sigma range of the actuation latency, s
    rate_trend : "decreasing" | "steady" | "increasing" (kinetic energy)
    energy_time_constant_s : e-folding time of the kinetic energy (the rate's is twice it), s;
        negative for a rise. energy_time_constant_expected_s: what the replayed law should have
        given along the observed trajectory, s
    momentum_error_trend, momentum_error_time_constant_s(_expected_s) : cross-product law only
    magnetic_power_mean_W : mean of w . (m x B) with the identified dipoles, W (negative damps)
    damping_fraction : fraction of the time that power is negative
    loop_gain : coil-field feedback loop gain (>= 1 oscillates), crosstalk_coupling : spectral
        radius of (k/T) 1e-9 C^-1 K_body; chatter_fraction_without_coil_field : chatter of the law
        replayed with the coils' field taken out of its samples
    bdot_equivalent_gain_Nms : k <|B|^2>, near_optimal_gain_Nms : 2 n (1 + sin xi_m) J_min
        (Avanzini and Giulietti 2012), rate_floor_rad_s : 2 n
    dipole_per_amp_matrix, dipole_per_amp_matrix_sigma : identified C (3, 3) and its 1-sigma
    residual_dipole_Am2 : (3,) constant dipole identified alongside C
    replay_time_utc : (K,) datetime64[ns] control ticks; replay_i_A : (K, 3) the replayed commands, A
        (NaN where the law could not be replayed)
    diagnostics : JudgementDiagnostics, not part of the summary: the latency trials and their profile,
        the rate-bias evidence, the effect and the crosstalk-feedback figures, the ticks and segments
    """

    law: str
    axes: tuple[AxisJudgement, ...]
    verdict: str
    reasons: tuple[str, ...]
    anomalies: tuple[Anomaly, ...]
    latency_s: float | None = None
    command_lag_s: float | None = None
    actuation_latency_s: float | None = None
    actuation_latency_interval_s: tuple[float, float] | None = None
    rate_trend: str = "steady"
    energy_time_constant_s: float | None = None
    energy_time_constant_expected_s: float | None = None
    momentum_error_trend: str | None = None
    momentum_error_time_constant_s: float | None = None
    momentum_error_time_constant_expected_s: float | None = None
    magnetic_power_mean_W: float | None = None
    damping_fraction: float | None = None
    loop_gain: float | None = None
    crosstalk_coupling: float | None = None
    chatter_fraction_without_coil_field: float | None = None
    bdot_equivalent_gain_Nms: float | None = None
    near_optimal_gain_Nms: float | None = None
    rate_floor_rad_s: float | None = None
    dipole_per_amp_matrix: np.ndarray | None = None
    dipole_per_amp_matrix_sigma: np.ndarray | None = None
    residual_dipole_Am2: np.ndarray | None = None
    replay_time_utc: np.ndarray | None = None
    replay_i_A: np.ndarray | None = None
    diagnostics: JudgementDiagnostics | None = None

    def to_summary(self) -> dict[str, Any]:
        """The "controller" block of summary.json (floats, lists, strings, None)."""
        f = finite_or_none
        out: dict[str, Any] = {"law": self.law}
        for a in self.axes:
            out[a.axis] = {k: (f(v) if isinstance(v, float | np.floating) else v) for k, v in a.to_dict().items()}
        out.update({
            "latency_s": f(self.latency_s), "command_lag_s": f(self.command_lag_s),
            "actuation_latency_s": f(self.actuation_latency_s),
            "rate_trend": self.rate_trend,
            "energy_time_constant_s": f(self.energy_time_constant_s),
            "energy_time_constant_expected_s": f(self.energy_time_constant_expected_s),
            "momentum_error_trend": self.momentum_error_trend,
            "momentum_error_time_constant_s": f(self.momentum_error_time_constant_s),
            "momentum_error_time_constant_expected_s": f(self.momentum_error_time_constant_expected_s),
            "magnetic_power_mean_W": f(self.magnetic_power_mean_W),
            "damping_fraction": f(self.damping_fraction),
            "loop_gain": f(self.loop_gain), "crosstalk_coupling": f(self.crosstalk_coupling),
            "bdot_equivalent_gain_Nms": f(self.bdot_equivalent_gain_Nms),
            "near_optimal_gain_Nms": f(self.near_optimal_gain_Nms),
            "rate_floor_rad_s": f(self.rate_floor_rad_s),
            "dipole_per_amp_matrix": None if self.dipole_per_amp_matrix is None
            else np.asarray(self.dipole_per_amp_matrix).tolist(),
            "dipole_per_amp_matrix_sigma": None if self.dipole_per_amp_matrix_sigma is None
            else [[f(v) for v in row] for row in np.asarray(self.dipole_per_amp_matrix_sigma)],
            "verdict": self.verdict, "reasons": list(self.reasons),
            "anomalies": [a.to_dict() for a in self.anomalies],
        })
        return out


@dataclass(frozen=True)
class LatencyProfile:
    """What the latency profile says (see :func:`.latency.latency_profile`); chi-square figures in units
    of the best fit's scaled residual variance.

    Attributes
    ----------
    latency_s : best trial latency of zero or more, s
    interval_s : (lo, hi) 3-sigma range of the latency (profile chi-square within 9 of the best causal
        trial), s
    interval_1sigma_s : (lo, hi) 1-sigma range (within 1), s
    delta_chi2_zero : profile chi-square of zero latency above the best causal trial (NaN: no zero trial)
    acausal : the motion prefers the torque before its command, at 3 sigma
    acausal_delta_chi2 : chi-square gained by the best negative trial over the best causal one (>= 0)
    acausal_latency_s : that negative trial latency, s, or None (no negative trial)
    determined : an interior minimum of a fitting model, causal at 3 sigma, known to within about one
        control period (see :func:`.latency.latency_profile`)
    rise_before, rise_after : profile chi-square rise below and above the best trial
    fit_ratio : the best fit's chi-square unit over the one the stated rate noise leads to (None: no
        stated noise)
    reason : why the latency is not determined (None when it is)
    """

    latency_s: float
    interval_s: tuple[float, float]
    delta_chi2_zero: float
    interval_1sigma_s: tuple[float, float]
    acausal: bool
    acausal_delta_chi2: float
    acausal_latency_s: float | None
    determined: bool
    rise_before: float = float("nan")
    rise_after: float = float("nan")
    fit_ratio: float | None = None
    reason: str | None = None


@dataclass(frozen=True)
class RateBiasEvidence:
    """Whether the identification needed a slowly varying bias of the rate history (Schwarz's criterion).

    Attributes
    ----------
    used : the bias was estimated in the fit the judgement rests on
    delta_chi2 : chi-square gained by the bias unknowns (NaN when a fit is missing)
    penalty : Schwarz's penalty k ln(m) (NaN when a fit is missing)
    knots_s : (K,) knots of the piecewise-linear bias, s, when used
    rad_s : (K, 3) the bias at the knots (history minus motion), rad/s, body frame, when used
    sigma_rad_s : (K, 3) its 1-sigma, rad/s, when used
    """

    used: bool
    delta_chi2: float
    penalty: float
    knots_s: np.ndarray | None = None
    rad_s: np.ndarray | None = None
    sigma_rad_s: np.ndarray | None = None


@dataclass(frozen=True)
class Trend:
    """Straight-line fit of ln x against time on block means.

    Attributes
    ----------
    slope_per_s : float, d ln x / dt, 1/s
    sigma_per_s : float, 1-sigma of the slope, 1/s
    duration_s : float, span of the data, s
    n_blocks : int
    """

    slope_per_s: float
    sigma_per_s: float
    duration_s: float
    n_blocks: int

    @property
    def time_constant_s(self) -> float:
        """-1 / slope: the e-folding time of a decrease (negative for an increase), s."""
        return float(-1.0 / self.slope_per_s) if self.slope_per_s != 0 else float("inf")


@dataclass(frozen=True)
class EffectAssessment:
    """The physical effect of the controller over one pass (see :func:`.effect.assess_effect`).

    Attributes
    ----------
    rate_trend : "decreasing" | "steady" | "increasing", of the kinetic energy
    energy_fit : Trend of ln E observed, or None (too few samples)
    energy_time_constant_s : its -1 / slope, s, or None
    mean_rate_rad_s : mean |w|, rad/s
    magnetic_power_mean_W : mean of w . (m x B) with the coils' best-known dipoles, W (negative damps)
    damping_fraction : fraction of the time that power is negative (None: no torque at all)
    magnetic_power_axis_W : (3,) the same mean power per coil, W
    energy_expected, energy_time_constant_expected_s : B-dot only: the trend of ln E the replayed law
        should have produced along the observed trajectory, and its time constant, s
    bdot_equivalent_gain_Nms : B-dot only: k <|B|^2>, N m s
    momentum_error_trend : cross-product only: the label of |h - h_target|'s trend
    momentum_error_fit, momentum_error_expected : cross-product only: its Trend observed and expected
    momentum_error_time_constant_s, momentum_error_time_constant_expected_s : their time constants, s
    efficiency : observed over expected slope (of ln E for B-dot, of ln |h_err| for cross-product)
    rate_floor_rad_s : 2 n, the rate B-dot cannot damp below, rad/s (with orbit positions)
    geomagnetic_inclination_rad : xi_m (with orbit positions and the reference field)
    near_optimal_gain_Nms : 2 n (1 + sin xi_m) J_min (Avanzini and Giulietti 2012), N m s
    """

    rate_trend: str
    energy_fit: Trend | None
    energy_time_constant_s: float | None
    mean_rate_rad_s: float
    magnetic_power_mean_W: float
    damping_fraction: float | None
    magnetic_power_axis_W: np.ndarray
    energy_expected: Trend | None = None
    energy_time_constant_expected_s: float | None = None
    bdot_equivalent_gain_Nms: float | None = None
    momentum_error_trend: str | None = None
    momentum_error_fit: Trend | None = None
    momentum_error_expected: Trend | None = None
    momentum_error_time_constant_s: float | None = None
    momentum_error_time_constant_expected_s: float | None = None
    efficiency: float | None = None
    rate_floor_rad_s: float | None = None
    geomagnetic_inclination_rad: float | None = None
    near_optimal_gain_Nms: float | None = None


@dataclass(frozen=True)
class CrosstalkFeedback:
    """The coil-field feedback of B-dot (see :func:`.feedback.assess_crosstalk_feedback`).

    Attributes
    ----------
    loop_gain : reciprocal gain margin of the coil-field loop (>= 1 oscillates)
    coupling : spectral radius of (k/T) 1e-9 C^-1 K_body, the single-step coil-field coupling
    K_body_nT_per_A : (3, 3) crosstalk in body axes, nT per A
    chatter_without : (3,) chatter fraction of the law replayed with ``K_body i`` removed from its samples
    """

    loop_gain: float
    coupling: float
    K_body_nT_per_A: np.ndarray
    chatter_without: np.ndarray


@dataclass(frozen=True)
class PassContext:
    """The setting of one judged pass that every finding refers to.

    Attributes
    ----------
    law : "bdot" | "cross_product" | "none"; period_s : control period, s
    C_nominal : (3, 3) the design's dipole per amp, A m^2 per A; max_current_A : (3,) A
    span : (start, end) datetime64[ns] UTC of the judged stretch (the anomalies' time range)
    mag_sampling : "coils_off" | "coils_on" | "windowed"
    gyro_health : the estimator's verdict on the gyro ("ok" | "dead" | "bias_step" | "untestable"), or None
    rate_source : how the rate history was reconstructed ("gyro" | "dynamics"), or None
    """

    law: str
    period_s: float
    C_nominal: np.ndarray
    max_current_A: np.ndarray
    span: tuple[np.datetime64, np.datetime64]
    mag_sampling: str
    gyro_health: str | None = None
    rate_source: str | None = None


@dataclass(frozen=True)
class JudgementDiagnostics:
    """The figures behind a :class:`ControllerJudgement`, not part of the summary.

    Attributes
    ----------
    latency_trials_s : (L,) trial latencies of the scan the judgement rests on, s (empty: not scanned)
    latency_trials_wrss : (L,) their weighted residual sums of squares (NaN where the fit failed)
    latency : LatencyProfile or None: best causal latency, ranges, causality check
    rate_bias : RateBiasEvidence or None: whether the rate history's bias was estimated, its
        chi-square gain and penalty, knot values
    effect : EffectAssessment: trends, time constants, magnetic power, gains
    feedback : CrosstalkFeedback or None: the coil-field loop (B-dot with a crosstalk estimate)
    n_ticks : control ticks judged; n_segments : segments available to the identification
    """

    latency_trials_s: np.ndarray
    latency_trials_wrss: np.ndarray
    latency: LatencyProfile | None
    rate_bias: RateBiasEvidence | None
    effect: EffectAssessment
    feedback: CrosstalkFeedback | None
    n_ticks: int
    n_segments: int
