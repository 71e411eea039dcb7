"""Judge the magnetic controller of one pass: did the coils and the control law do what was designed?

Four independent lines of evidence, each from plain arrays:

1. Command replay (:mod:`.replay`): the configured law recomputed from the raw telemetry the
   onboard computer saw, against the logged commands (gain ratio, correlation, lag, saturation,
   limit-to-limit chatter).
2. Dipole identification (:mod:`.dipole`, :mod:`.latency`): each coil's effective dipole per amp from the
   motion (Euler's equation, least squares), hence polarity, response and gain, plus the actuation
   latency that best explains the motion. The latency is sought from zero up (a current cannot flow
   before its command; a motion that insists on a negative one points to wrong time tags), and a
   slowly varying bias of the rate history is estimated alongside where Schwarz's criterion asks
   for it (a wrong gyro bias mimics a torque through the gyroscopic term, and a latency can imitate
   part of that torque).
3. Physical effect (:mod:`.effect`): the kinetic-energy (B-dot) or momentum-error
   (cross-product) trend against what the configured law should have achieved along the same
   trajectory, and the sign of the magnetic torque's power.
4. Crosstalk feedback (:mod:`.feedback`): the loop gain of the coils' own field through B-dot's
   derivative, and a replay with that field removed from the samples.

:func:`judge_pass` takes these as named steps on the checked inputs (:mod:`.inputs`), then turns the
evidence into findings and a verdict (:mod:`.findings`).

The decision thresholds are in :mod:`.thresholds`, each with its reason. A finding needs its own
evidence at the stated confidence; where the data cannot decide (a short pass, coils that hardly
switched, no law configured) the verdict is "undetermined" and says why.

References
----------
Stickler, A. C. and Alfriend, K. T. (1974). An elementary magnetic attitude control system. AIAA
paper 74-923.
Avanzini, G. and Giulietti, F. (2012). Magnetic detumbling of a rigid spacecraft. J. Guidance,
Control, and Dynamics 35(4), 1326-1334, doi:10.2514/1.53074.
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer, sec. 3.3 and 7.5.
Schwarz, G. (1978). Estimating the dimension of a model. Ann. Statist. 6(2), 461-464.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ..config import CoilSpec, ControllerSpec
from ..core import applied_current, control_ticks, tick_phase, window_mean
from . import replay as rep
from .alignment import align_commands, commands_at_ticks
from .dipole import DipoleFit, classify_coil, dipole_sigma_with_floor, identify_dipole, rate_bias_evidence
from .effect import assess_effect
from .feedback import assess_crosstalk_feedback
from .findings import findings, verdict
from .inputs import PassArrays, check_pass_inputs, checked_array, raw_gyro
from .latency import latency_profile, scan_actuation_latency
from .replay import CommandComparison
from .thresholds import MAX_LATENCY_PERIODS, MIN_SEGMENTS, RATE_BIAS_KNOT_S, SEGMENT_POINTS
from .types import (
    AXES,
    AxisJudgement,
    ControllerJudgement,
    CrosstalkFeedback,
    EffectAssessment,
    JudgementDiagnostics,
    LatencyProfile,
    PassContext,
    RateBiasEvidence,
    finite_or_none,
)

__all__ = ["judge_pass"]


def judge_pass(*, controller: ControllerSpec, coils: CoilSpec, inertia_kg_m2: np.ndarray,
               mag_sensor_to_body: np.ndarray, time_mag_utc: np.ndarray, b_mag_sensor_nT: np.ndarray,
               time_coil_utc: np.ndarray, i_coil_A: np.ndarray,
               time_utc: np.ndarray, w_body_rad_s: np.ndarray,
               q_body_from_gcrf: np.ndarray | None = None, b_gcrf_nT: np.ndarray | None = None,
               b_body_nT: np.ndarray | None = None, r_gcrf_km: np.ndarray | None = None,
               w_cov_rad2_s2: np.ndarray | None = None, time_gyro_utc: np.ndarray | None = None,
               w_gyro_body_rad_s: np.ndarray | None = None,
               K_nT_per_A: np.ndarray | None = None, gyro_health: str | None = None, rate_source: str | None = None,
               rate_sigma_rad_s: np.ndarray | None = None) -> ControllerJudgement:
    """Judge the magnetic controller of one pass.

    Parameters
    ----------
    controller : ControllerSpec
        The configured law ("bdot", "cross_product" or "none"), gain, period and first tick.
    coils : CoilSpec
        Nominal dipole per amp C (m_body = C i), max_current_A, mag_sampling and off_window_s.
    inertia_kg_m2 : (3, 3)
    mag_sensor_to_body : (3, 3) the magnetometer's nominal mounting M (v_body = M v_sensor)
    time_mag_utc : (Nm,) datetime64[ns] UTC; b_mag_sensor_nT : (Nm, 3) nT, sensor frame
        The raw magnetometer readings (unit-converted, not calibrated: bias, soft iron and coil
        crosstalk still in them), as the onboard computer saw them.
    time_coil_utc : (Nc,) datetime64[ns] UTC; i_coil_A : (Nc, 3) A
        The logged coil commands, body coil axes.
    time_utc : (N,) datetime64[ns] UTC; w_body_rad_s : (N, 3) rad/s, body frame
        The reconstructed rate history (body relative to GCRF).
    q_body_from_gcrf : (N, 4), optional; b_gcrf_nT : (N, 3) nT, GCRF, optional
        Attitude and reference field, for the field in body axes (needed unless ``b_body_nT``).
    b_body_nT : (N, 3) nT, body frame, optional
        The field in body axes directly (for example the calibrated magnetometer).
    r_gcrf_km : (N, 3) km, GCRF, optional
        Orbit positions: gravity-gradient torque (with q), mean motion and the near-optimal gain.
    w_cov_rad2_s2 : (N, 3, 3), optional
        Rate covariance, weights of the dipole identification.
    time_gyro_utc : (Ng,), w_gyro_body_rad_s : (Ng, 3) rad/s body axes, optional
        The raw gyro as the onboard computer used it (cross-product replay); the reconstructed rate
        is used without it.
    K_nT_per_A : (3, 3) nT per A, sensor axes (row: sensor axis, column: coil), optional
        Estimated coil crosstalk, for the coil-field loop gain; NaN entries (undetermined) count as
        zero.
    gyro_health : "ok" | "dead" | "bias_step" | "untestable", optional
        The estimator's verdict on the gyro. A dead gyro changes what can be judged: the cross-product
        law read it, and a rate history reconstructed without it rests on the nominal coils.
    rate_source : "gyro" | "dynamics", optional
        How the rate history was reconstructed; "dynamics" (Euler's equations with the nominal coil
        dipoles) cannot test the coils independently, so the verdict cannot be "as_intended".
    rate_sigma_rad_s : (N, 3) rad/s, optional
        The rate history's stated 1-sigma per axis (without ``w_cov_rad2_s2``): what a motion model
        that fits leaves as residual, for the latency profile's fit test. It is not used as a weight:
        a gyro-based rate is about equally noisy all along the pass.

    Returns
    -------
    ControllerJudgement (its ``diagnostics`` hold the latency profile, the rate-bias evidence, the
    effect and the crosstalk-feedback figures behind it)

    Raises
    ------
    InputError
        Arrays of the wrong shape or time stamps that are not strictly increasing.
    """
    data = check_pass_inputs(inertia_kg_m2=inertia_kg_m2, mag_sensor_to_body=mag_sensor_to_body,
                             time_mag_utc=time_mag_utc, b_mag_sensor_nT=b_mag_sensor_nT, time_coil_utc=time_coil_utc,
                             i_coil_A=i_coil_A, time_utc=time_utc, w_body_rad_s=w_body_rad_s,
                             q_body_from_gcrf=q_body_from_gcrf, b_gcrf_nT=b_gcrf_nT, b_body_nT=b_body_nT,
                             r_gcrf_km=r_gcrf_km, w_cov_rad2_s2=w_cov_rad2_s2, K_nT_per_A=K_nT_per_A)
    setting = _setting(controller, coils, data, rate_sigma_rad_s, gyro_health, rate_source)
    replayed = _replay(controller, data, setting, time_gyro_utc, w_gyro_body_rad_s)
    ident = _identification(data, setting, replayed)
    effect = _effect(controller, data, setting, replayed, ident)
    feedback = _feedback(controller, data, setting, replayed, ident)
    return _judgement(data, setting, replayed, ident, effect, feedback)


@dataclass(frozen=True)
class _Setting:
    """The pass's setting (for the findings) and its control ticks, s since the data's epoch; ``gate``
    is (ticks, before, after) of the coil-off windows of windowed sampling, else None; ``scan_cov`` the
    rate covariance (N, 3, 3) that weights the latency scan; ``expected_unit`` the chi-square unit of
    a motion model that fits there (None: no stated rate noise)."""

    ctx: PassContext
    ticks_s: np.ndarray
    gate: tuple[np.ndarray, float, float] | None
    off_window_s: tuple[float, float] | None
    max_hold_s: float
    scan_cov: np.ndarray | None = None
    expected_unit: float | None = None


def _setting(controller: ControllerSpec, coils: CoilSpec, data: PassArrays, rate_sigma_rad_s,
             gyro_health: str | None, rate_source: str | None) -> _Setting:
    """The control ticks where the rate history and the coil log overlap, and the pass's setting.

    The latency scan is weighted by the rate covariance: the one given, or else an isotropic one (a
    gyro's noise is alike on its axes), ``sigma^2 I`` from the stated 1-sigma averaged over the pass (1
    without one; the weights' scale then does not matter). Weighted so, the torque equation of a body
    with a small moment counts as much as the others, and a motion model that fits has a chi-square
    unit of 1. The dipoles themselves are fitted with the given covariance only: an unweighted fit
    keeps the slow model errors (attitude, field) from leaning on one axis."""
    t, t_coil, epoch = data.t_s, data.t_coil_s, data.epoch
    T = float(controller.period_s)
    window = coils.off_window_s if coils.mag_sampling == "windowed" else None
    if controller.first_tick is not None:
        first = float((np.datetime64(controller.first_tick, "ns") - epoch).astype(np.int64) / 1e9)
    else:  # the tick phase from the coil log's own time stamps (circular mean)
        first = tick_phase(t_coil, T)
    lo, hi = max(t[0], t_coil[0]), min(t[-1], t_coil[-1] + T)
    ticks = control_ticks(lo, hi, T, first)
    gate = (control_ticks(lo - T, hi + T, T, first), *window) if window is not None else None
    span = (epoch + np.timedelta64(int(lo * 1e9), "ns"), epoch + np.timedelta64(int(hi * 1e9), "ns"))
    ctx = PassContext(controller.law, T, np.asarray(coils.dipole_per_amp, float),
                      np.asarray(coils.max_current_A, float), span, coils.mag_sampling, gyro_health, rate_source)
    cov, expected = data.w_cov_rad2_s2, 1.0
    if cov is None:
        var = 1.0
        if rate_sigma_rad_s is not None:
            var = float(np.nanmean(checked_array("rate_sigma_rad_s", rate_sigma_rad_s, (3,), len(t)) ** 2))
        else:
            expected = None
        cov = np.broadcast_to(var * np.eye(3), (len(t), 3, 3))
    return _Setting(ctx, ticks, gate, window, 2.5 * T, cov, expected)


@dataclass(frozen=True)
class _Replay:
    """The law replayed at each tick: the magnetometer samples it used (K, 3) nT body axes, the
    replayed commands (K, 3) A (NaN where unknown), their comparison with the log (None: no law), the
    logged commands' chatter fraction (3,), the logged command of each tick under the alignment of
    the log with the ticks (K, 3) A (NaN where no row holds it), and the rate the onboard computer read
    at the history's instants (N, 3) rad/s (its raw gyro; None without a gyro log)."""

    b_tick_body_nT: np.ndarray
    i_replay_A: np.ndarray
    comparison: CommandComparison | None
    chatter: np.ndarray
    i_tick_A: np.ndarray
    w_seen_rad_s: np.ndarray | None


def _replay(controller: ControllerSpec, data: PassArrays, setting: _Setting, time_gyro_utc,
            w_gyro_body_rad_s) -> _Replay:
    """Step 1: the configured law recomputed from the raw samples, against the logged commands."""
    ctx, ticks = setting.ctx, setting.ticks_s
    law, T, C_nom, imax = ctx.law, ctx.period_s, ctx.C_nominal, ctx.max_current_A
    b_tick = rep.tick_samples_nT(data.t_mag_s, data.b_mag_body_nT, ticks, sampling=ctx.mag_sampling,
                                 off_window_s=setting.off_window_s)
    i_rep = np.full((len(ticks), 3), np.nan)
    gyro = raw_gyro(data.epoch, time_gyro_utc, w_gyro_body_rad_s)
    if law == "bdot":
        i_rep = rep.replay_bdot_A(ticks, b_tick, controller.gain, C_nom, imax)
    elif law == "cross_product":
        w_tick = rep.onboard_rate(ticks, gyro, data.t_s, data.w_body_rad_s)
        target = np.zeros(3) if controller.target_momentum_Nms is None else np.asarray(controller.target_momentum_Nms)
        i_rep = rep.replay_cross_product_A(b_tick, w_tick, data.inertia_kg_m2, target, controller.gain, C_nom, imax)
    cmp_ = rep.compare_commands(ticks, i_rep, data.t_coil_s, data.i_coil_A, imax, T) if law != "none" else None
    if cmp_ is not None and cmp_.alignment is not None:
        logged_tick = cmp_.logged_A
    else:   # no law to align on: a row holds the command of the latest tick at or before its stamp
        al = align_commands(ticks, None, data.t_coil_s, data.i_coil_A, imax, T)
        logged_tick = commands_at_ticks(al, ticks, data.t_coil_s, data.i_coil_A, T)
    seen = None if gyro is None else window_mean(gyro[0], gyro[1], data.t_s, 0.5 * setting.ctx.period_s)
    return _Replay(b_tick, i_rep, cmp_, rep.chatter_fraction(logged_tick, imax), logged_tick, seen)


@dataclass(frozen=True)
class _Identification:
    """The coils identified from the motion: the fit (None: not identified), the latency trials and
    their profile, the rate-bias evidence, the segments, the applied current (N, 3) A and the axes."""

    fit: DipoleFit | None
    latency_trials_s: np.ndarray
    latency_trials_wrss: np.ndarray
    latency: LatencyProfile | None
    rate_bias: RateBiasEvidence | None
    n_segments: int
    i_applied_A: np.ndarray
    axes: tuple[AxisJudgement, ...]


def _identification(data: PassArrays, setting: _Setting, replayed: _Replay) -> _Identification:
    """Step 2: each coil's dipole per amp and the actuation latency from the motion."""
    ticks, T, gate = setting.ticks_s, setting.ctx.period_s, setting.gate
    t, w, b_body, J = data.t_s, data.w_body_rad_s, data.b_body_nT, data.inertia_kg_m2
    i_cmd = replayed.i_tick_A   # each command acts from its own tick (plus the latency), not from its log stamp
    n_seg = int(len(ticks) // (SEGMENT_POINTS - 1))
    fit, lat_trials, lat_wrss = None, np.zeros(0), np.zeros(0)
    lat_info, rate_bias = None, None
    if n_seg >= MIN_SEGMENTS:
        # The rate history may carry a slowly varying bias (a gyro bias the estimator got wrong); through
        # the gyroscopic term it mimics a torque, which a latency can partly imitate. Both models are
        # scanned, and the bias one is kept only where Schwarz's criterion asks for it.
        scans = {kn: scan_actuation_latency(
            t, w, b_body, J, ticks, i_cmd, ticks, T, max_latency_periods=MAX_LATENCY_PERIODS,
            r_body_km=data.r_body_km, w_cov_rad2_s2=setting.scan_cov, gate=gate, max_hold_s=setting.max_hold_s,
            rate_bias_knot_s=kn, inertia_shape=True) for kn in (None, RATE_BIAS_KNOT_S)}
        used, gain, penalty = rate_bias_evidence(scans[None].best, scans[RATE_BIAS_KNOT_S].best)
        knot = RATE_BIAS_KNOT_S if used else None
        scan_fit, lat_trials, lat_wrss = scans[knot].best, scans[knot].latencies_s, scans[knot].wrss
        lat_info = latency_profile(scan_fit, lat_trials, lat_wrss, T, expected_unit=setting.expected_unit)
        # an undetermined latency (a flat profile) is not used: the design's zero delay is assumed
        L_use = lat_info.latency_s if lat_info is not None and lat_info.determined else 0.0
        fit, i_applied, axes = _coils(data, setting, replayed, L_use, knot)
        if lat_info is not None and all(ax.polarity == "undetermined" for ax in axes):
            # no coil identified: the motion says nothing about timing, in either direction, so its
            # latency is not used either (the coil-field loop and the effect assume the design's zero)
            lat_info = replace(lat_info, determined=False, acausal=False,
                               reason="no coil was identified from the motion, so it says nothing about timing")
            if L_use != 0.0:
                fit, i_applied, axes = _coils(data, setting, replayed, 0.0, knot)
        rate_bias = RateBiasEvidence(used and fit is not None and fit.rate_bias_rad_s is not None, gain, penalty)
        if rate_bias.used:
            rate_bias = replace(rate_bias, knots_s=fit.rate_bias_knots_s, rad_s=fit.rate_bias_rad_s,
                                sigma_rad_s=fit.rate_bias_sigma_rad_s)
    else:
        i_applied = applied_current(t, ticks, i_cmd, gate=gate, max_hold_s=setting.max_hold_s)
        axes = _axes(setting.ctx, None, replayed.comparison, replayed.chatter, i_applied)
    return _Identification(fit, lat_trials, lat_wrss, lat_info, rate_bias, n_seg, i_applied, axes)


def _coils(data: PassArrays, setting: _Setting, replayed: _Replay, latency_s: float, knot: float | None):
    """The dipole fit with the commands acting ``latency_s`` after their ticks, the applied current
    (N, 3) A it implies, and each coil's judgement."""
    ticks, gate, i_cmd = setting.ticks_s, setting.gate, replayed.i_tick_A
    fit = identify_dipole(data.t_s, data.w_body_rad_s, data.b_body_nT, data.inertia_kg_m2, ticks, i_cmd, ticks,
                          r_body_km=data.r_body_km, w_cov_rad2_s2=data.w_cov_rad2_s2, latency_s=latency_s, gate=gate,
                          max_hold_s=setting.max_hold_s, segment_points=SEGMENT_POINTS, rate_bias_knot_s=knot,
                          inertia_shape=True)
    i_applied = applied_current(data.t_s, ticks, i_cmd, latency_s=fit.latency_s if fit else 0.0, gate=gate,
                                max_hold_s=setting.max_hold_s)
    return fit, i_applied, _axes(setting.ctx, fit, replayed.comparison, replayed.chatter, i_applied)


def _axes(ctx: PassContext, fit: DipoleFit | None, cmp_: CommandComparison | None, chatter: np.ndarray,
          i_applied: np.ndarray) -> tuple[AxisJudgement, ...]:
    """Each coil's judgement: polarity and gain from the fit, command figures from the replay."""
    out = []
    f = finite_or_none
    for a, name in enumerate(AXES):
        c0 = float(ctx.C_nominal[a, a])
        rms = float(np.sqrt(np.nanmean(i_applied[:, a] ** 2))) if np.any(np.isfinite(i_applied[:, a])) else None
        if fit is not None and np.isfinite(fit.C_sigma[a, a]):
            pol, conf, r, rs = classify_coil(fit.C[a, a], fit.C_sigma[a, a], c0)
            est, sig = float(fit.C[a, a]), dipole_sigma_with_floor(fit.C_sigma[a, a], c0)
        else:  # not identified, or the coil never carried current
            pol, conf, r, rs, est, sig = "undetermined", None, None, None, None, None
        out.append(AxisJudgement(
            axis=name, polarity=pol, polarity_confidence=f(conf), dipole_per_amp_estimated=f(est),
            dipole_per_amp_sigma=f(sig), dipole_per_amp_nominal=c0, gain_ratio=f(r), gain_ratio_sigma=f(rs),
            command_gain_ratio=f(cmp_.gain_ratio[a]) if cmp_ is not None else None,
            correlation=f(cmp_.correlation[a]) if cmp_ is not None else None,
            saturation_fraction=f(cmp_.saturation_fraction[a]) if cmp_ is not None else None,
            chatter_fraction=f(chatter[a]), rms_current_A=f(rms)))
    return tuple(out)


def _effect(controller: ControllerSpec, data: PassArrays, setting: _Setting, replayed: _Replay,
            ident: _Identification) -> EffectAssessment:
    """Step 3: the physical effect, with the identified dipoles where the coils were identified."""
    C_nom, fit = setting.ctx.C_nominal, ident.fit
    C_used = C_nom.copy()
    for a, ax in enumerate(ident.axes):
        if fit is not None and ax.polarity != "undetermined":
            C_used[:, a] = fit.C[:, a]
    i_rep_applied = applied_current(data.t_s, setting.ticks_s, np.nan_to_num(replayed.i_replay_A), gate=setting.gate,
                                    max_hold_s=setting.max_hold_s)
    target = None if controller.target_momentum_Nms is None else np.asarray(controller.target_momentum_Nms)
    return assess_effect(controller.law, controller.gain, data.t_s, data.w_body_rad_s, data.b_body_nT,
                         data.inertia_kg_m2, ident.i_applied_A, i_rep_applied, C_used, C_nom,
                         target_momentum_Nms=target, r_gcrf_km=data.r_gcrf_km, b_gcrf_nT=data.b_gcrf_nT,
                         w_seen_rad_s=replayed.w_seen_rad_s,
                         residual_dipole_Am2=None if fit is None else fit.residual_dipole_Am2, r_body_km=data.r_body_km)


def _feedback(controller: ControllerSpec, data: PassArrays, setting: _Setting, replayed: _Replay,
              ident: _Identification) -> CrosstalkFeedback | None:
    """Step 4: the coil-field feedback of B-dot, where the crosstalk is known (None otherwise)."""
    if controller.law != "bdot" or data.K_nT_per_A is None:
        return None
    ctx, ticks, T = setting.ctx, setting.ticks_s, setting.ctx.period_s
    L_act = ident.fit.latency_s if ident.fit is not None else 0.0
    seen = (np.zeros((len(ticks), 3)) if ctx.mag_sampling == "coils_off" else
            applied_current(ticks - 1e-6, ticks, replayed.i_tick_A, latency_s=L_act, gate=setting.gate,
                            max_hold_s=setting.max_hold_s))
    return assess_crosstalk_feedback(data.K_nT_per_A, data.mag_sensor_to_body, ctx.C_nominal, controller.gain, T,
                                     ticks_s=ticks, b_tick_body_nT=replayed.b_tick_body_nT, i_seen_at_tick_A=seen,
                                     max_current_A=ctx.max_current_A,
                                     delay_ticks=max(int(np.floor(L_act / T + 1e-9)), 0))


def _judgement(data: PassArrays, setting: _Setting, replayed: _Replay, ident: _Identification,
               effect: EffectAssessment, loop: CrosstalkFeedback | None) -> ControllerJudgement:
    """Step 5: findings and verdict, and the judgement that carries them with the figures behind them."""
    ctx, ticks, fit, cmp_, lat_info = setting.ctx, setting.ticks_s, ident.fit, replayed.comparison, ident.latency
    found = findings(ctx, axes=ident.axes, identified=fit is not None, comparison=cmp_, latency=lat_info,
                     effect=effect, feedback=loop, chatter=replayed.chatter, n_segments=ident.n_segments,
                     n_ticks=len(ticks), rate_bias=ident.rate_bias)
    lag = cmp_.lag_s if cmp_ is not None else None
    # the commands are timed from their own ticks, so the motion's latency is already tick to torque
    act = lat_info.latency_s if lat_info is not None and lat_info.determined else None
    return ControllerJudgement(
        law=ctx.law, axes=ident.axes, verdict=verdict(ctx, ident.axes, found.anomalies, cmp_, lat_info),
        reasons=found.reasons, anomalies=found.anomalies,
        latency_s=act, command_lag_s=lag, actuation_latency_s=act,
        actuation_latency_interval_s=lat_info.interval_s if lat_info is not None else None,
        rate_trend=effect.rate_trend, energy_time_constant_s=effect.energy_time_constant_s,
        energy_time_constant_expected_s=effect.energy_time_constant_expected_s,
        momentum_error_trend=effect.momentum_error_trend,
        momentum_error_time_constant_s=effect.momentum_error_time_constant_s,
        momentum_error_time_constant_expected_s=effect.momentum_error_time_constant_expected_s,
        magnetic_power_mean_W=effect.magnetic_power_mean_W, damping_fraction=effect.damping_fraction,
        loop_gain=loop.loop_gain if loop is not None else None,
        crosstalk_coupling=loop.coupling if loop is not None else None,
        chatter_fraction_without_coil_field=(finite_or_none(float(np.nanmax(loop.chatter_without)))
                                             if loop is not None else None),
        bdot_equivalent_gain_Nms=effect.bdot_equivalent_gain_Nms, near_optimal_gain_Nms=effect.near_optimal_gain_Nms,
        rate_floor_rad_s=effect.rate_floor_rad_s, dipole_per_amp_matrix=None if fit is None else fit.C,
        dipole_per_amp_matrix_sigma=None if fit is None else fit.C_sigma,
        residual_dipole_Am2=None if fit is None else fit.residual_dipole_Am2,
        replay_time_utc=data.epoch + np.round(ticks * 1e9).astype(np.int64).astype("timedelta64[ns]"),
        replay_i_A=replayed.i_replay_A,
        diagnostics=JudgementDiagnostics(ident.latency_trials_s, ident.latency_trials_wrss, lat_info, ident.rate_bias,
                                         effect, loop, int(len(ticks)), ident.n_segments),
    )
