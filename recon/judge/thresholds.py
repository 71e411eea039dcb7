"""Every decision threshold of the controller judgement, each with its reason, and ``THRESHOLDS``.

The contributor guide lists them with their reasons; the modules that decide import them from here.
"""

from __future__ import annotations

__all__ = [
    "SATURATION_LEVEL", "NEAR_LIMIT_LEVEL", "INFORMATIVE_LEVEL",
    "COMMAND_GAIN_TOLERANCE", "COMMAND_MIN_CORRELATION", "COMMAND_MIN_TICKS", "SATURATION_FRACTION_LIMIT",
    "CHATTER_FRACTION_LIMIT", "CHATTER_ROTATION_FACTOR", "LOOP_GAIN_LIMIT",
    "COIL_GAIN_TOLERANCE", "COIL_GAIN_SIGMAS", "POLARITY_DELTA_CHI2", "NO_RESPONSE_RATIO", "MODEL_FLOOR_FRACTION",
    "OUTLIER_PROBABILITY", "RATE_BIAS_KNOT_S",
    "LATENCY_LIMIT_PERIODS", "LATENCY_DELTA_CHI2", "LATENCY_DETERMINED_PERIODS", "LATENCY_FIT_RATIO",
    "DETUMBLE_SLOW_FACTOR", "EXPECTED_MIN_CHANGE", "TREND_SIGMAS", "TREND_MIN_CHANGE",
    "SEGMENT_POINTS", "MIN_SEGMENTS", "MAX_LATENCY_PERIODS",
    "THRESHOLDS",
]

# ---------------------------------------------------------------------------------- command replay
# A logged current counts as "at the limit" from 99 % of max_current_A: the drive rounds commands to
# its resolution (micro-amps) and the log to its unit, so an exact-equality test would miss samples
# (common practice, no source).
SATURATION_LEVEL = 0.99
# A flip between consecutive commands counts as limit-to-limit chatter when both ends are at 90 % of
# the limit or more (common practice, no source): a linear controller crossing zero passes through
# small currents; a feedback oscillation jumps from one rail to the other.
NEAR_LIMIT_LEVEL = 0.90
# A replayed command counts towards the gain ratio from 1 % of the limit: a thousand times the
# drive's micro-amp resolution, so rounding cannot move the ratio by more than 0.1 %.
INFORMATIVE_LEVEL = 0.01
# The replay uses the very samples the onboard computer used, so a healthy law matches its log to
# the drive's rounding (gain ratio 1.000, correlation 1.000 on B-dot); the cross-product replay uses
# the gyro as logged, so its match is a little looser. A 20 % band equals the coil-gain band below;
# correlation below 0.8 means the log follows some other law.
COMMAND_GAIN_TOLERANCE = 0.2
COMMAND_MIN_CORRELATION = 0.8
COMMAND_MIN_TICKS = 20          # unsaturated ticks above 1 % of the limit needed to judge an axis
# Time at the current limit above which the controller is reported as saturated: beyond half the
# pass the law is no longer the linear one its gain describes (common practice, no source).
SATURATION_FRACTION_LIMIT = 0.5
# Chatter: limit-to-limit sign flips on at least a quarter of the ticks, and at least three times the
# flips the body's rotation alone would cause (a component of the body-frame field changes sign
# twice per turn, i.e. on |w| T / pi of the ticks). A quarter corresponds to a rotation of 45 deg
# per tick, beyond what a sampled B-dot can follow (common practice, no source).
CHATTER_FRACTION_LIMIT = 0.25
CHATTER_ROTATION_FACTOR = 3.0
LOOP_GAIN_LIMIT = 1.0           # >= 1: the coil-field loop oscillates (see feedback.crosstalk_loop_gain)

# ------------------------------------------------------------------------------------------ coils
# Coil gain: flagged when the whole 3-sigma interval of |C_jj / C_nominal_jj| lies outside
# 1 +- 0.2 ("off by more than 20 % at high confidence").
COIL_GAIN_TOLERANCE = 0.2
COIL_GAIN_SIGMAS = 3.0
# Polarity (see dipole.classify): a coil responds when r = C_jj / C_nominal_jj = 0 is rejected at a chi-square
# of 9 (3 sigma), its sign then from the likelihood ratio of nominal (r = +1) against inverted (r = -1);
# "no response" when half the nominal dipole is rejected by as much while zero is not. A nominal coil
# is called inverted only when r falls 3 sigma below zero (measured rates in the contributor guide).
POLARITY_DELTA_CHI2 = 9.0
NO_RESPONSE_RATIO = 0.5
# Systematic floor on each estimated dipole, as a fraction of the nominal diagonal: an attitude
# error of ~3 deg turns the modelled torque by sin(3 deg) = 0.05 of itself, and the reference field
# leaves out ~100 nT of 20,000-50,000 nT (IGRF-14, Alken et al. 2025); the floor keeps such
# model errors from passing for a sign or a dead coil (common practice, no source).
MODEL_FLOOR_FRACTION = 0.05
# Intervals whose whitened residual has chi-square(3) tail probability below this are dropped once.
OUTLIER_PROBABILITY = 1e-4
# Knot spacing of the rate history's optional bias (see dipole.identify_dipole), s. The bias a
# smoother leaves in a gyro-based rate moves with the gyro's bias walk and with how fast the field
# direction turns in body axes, over minutes rather than seconds; knots ten 30-s segments apart keep
# its unknowns from competing with the per-segment initial momenta. On simulated passes knots every
# 150 s, 300 s, 600 s and a single straight line over the pass gave the same latencies and
# polarities (common practice, no source).
RATE_BIAS_KNOT_S = 300.0

# ---------------------------------------------------------------------------------------- latency
# Latency from tick to torque flagged when the motion rejects every latency up to half a control
# period at 3 sigma (profile chi-square 9 or more above its minimum there): the law computes each
# command for the period it starts, and a torque half a period late acts on a state half a period
# old. A healthy drive acts within tens of milliseconds; the estimator's rate leaves the measured
# latency up to a few tenths of a second off (the measured null distribution is in the contributor
# guide) (common practice, no source).
LATENCY_LIMIT_PERIODS = 0.5
LATENCY_DELTA_CHI2 = 9.0
# The latency counts as determined when its 3-sigma set (profile chi-square within 9 of the best)
# spans at most two control periods, i.e. it is known to within about one period (common practice,
# no source).
LATENCY_DETERMINED_PERIODS = 2.0
# The motion model fits when its chi-square unit (residual variance with the AR(1) inflation) is at
# most this many times the one the rate history's stated noise leads to. Measured on simulated healthy
# and delayed passes (flight-like, the estimator's rate): 0.9-1.3 with the inertia's shape estimated;
# a missing torque or a wrong inertia gives tens (common practice for the margin, no source).
LATENCY_FIT_RATIO = 4.0

# ----------------------------------------------------------------------------------------- effect
# Effect: detumble_slow when the observed energy time constant exceeds this factor times the one the
# replayed law should have produced along the same trajectory, judged only when the expected decay
# over the pass is at least EXPECTED_MIN_CHANGE in ln E (40 %). Healthy coils within the 20 % gain
# band and the disturbance torques cannot account for a factor 3; missing or opposing torque can.
DETUMBLE_SLOW_FACTOR = 3.0
EXPECTED_MIN_CHANGE = 0.5
# A trend is called when its slope is both significant and large: |slope| > 3 sigma (about 1 %
# false-alarm rate for Student's t with 8 degrees of freedom) and a change of ln x over the pass
# of at least 0.1 (10 % in energy, 5 % in rate) (common practice, no source).
# The same 3 sigma bounds the shortfall that raises an effect finding (rate_increasing, detumble_slow
# and their cross-product kin): z = (s_obs - s_exp) / hypot(sigma_obs, sigma_exp), the observed slope
# of ln x against the one the replayed law predicts along the same trajectory. One-sided, its null is
# about Student's t with 8 degrees of freedom (10 block means, two parameters), P(t_8 > 3) = 0.0085
# (scipy.stats.t.sf(3, 8)), so under 1 % per pass and per law; a rise the law itself predicts gives
# z near 0 and is not a finding.
TREND_SIGMAS = 3.0
TREND_MIN_CHANGE = 0.1

# --------------------------------------------------------------------------------- identification
# Dipole identification needs at least this many independent segments (of ``SEGMENT_POINTS``
# ticks): fewer leave the residual variance and its autocorrelation, which set every sigma, resting
# on too few stretches of data.
SEGMENT_POINTS = 31
MIN_SEGMENTS = 5
MAX_LATENCY_PERIODS = 5

# Every decision threshold in one place (the contributor guide lists them with their reasons).
THRESHOLDS: dict[str, float] = {
    "COMMAND_GAIN_TOLERANCE": COMMAND_GAIN_TOLERANCE, "COMMAND_MIN_CORRELATION": COMMAND_MIN_CORRELATION,
    "COMMAND_MIN_TICKS": COMMAND_MIN_TICKS, "SATURATION_LEVEL": SATURATION_LEVEL,
    "SATURATION_FRACTION_LIMIT": SATURATION_FRACTION_LIMIT, "NEAR_LIMIT_LEVEL": NEAR_LIMIT_LEVEL,
    "INFORMATIVE_LEVEL": INFORMATIVE_LEVEL,
    "CHATTER_FRACTION_LIMIT": CHATTER_FRACTION_LIMIT, "CHATTER_ROTATION_FACTOR": CHATTER_ROTATION_FACTOR,
    "LOOP_GAIN_LIMIT": LOOP_GAIN_LIMIT, "COIL_GAIN_TOLERANCE": COIL_GAIN_TOLERANCE,
    "COIL_GAIN_SIGMAS": COIL_GAIN_SIGMAS, "MODEL_FLOOR_FRACTION": MODEL_FLOOR_FRACTION,
    "OUTLIER_PROBABILITY": OUTLIER_PROBABILITY, "LATENCY_LIMIT_PERIODS": LATENCY_LIMIT_PERIODS,
    "LATENCY_DELTA_CHI2": LATENCY_DELTA_CHI2, "DETUMBLE_SLOW_FACTOR": DETUMBLE_SLOW_FACTOR,
    "EXPECTED_MIN_CHANGE": EXPECTED_MIN_CHANGE, "TREND_SIGMAS": TREND_SIGMAS,
    "TREND_MIN_CHANGE": TREND_MIN_CHANGE, "SEGMENT_POINTS": SEGMENT_POINTS, "MIN_SEGMENTS": MIN_SEGMENTS,
    "MAX_LATENCY_PERIODS": MAX_LATENCY_PERIODS, "RATE_BIAS_KNOT_S": RATE_BIAS_KNOT_S,
    "POLARITY_DELTA_CHI2": POLARITY_DELTA_CHI2,
    "NO_RESPONSE_RATIO": NO_RESPONSE_RATIO,
    "LATENCY_DETERMINED_PERIODS": LATENCY_DETERMINED_PERIODS, "LATENCY_FIT_RATIO": LATENCY_FIT_RATIO,
}
