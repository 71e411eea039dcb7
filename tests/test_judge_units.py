"""The judge's building blocks on hand-derivable cases (no simulator)."""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from recon.config import CoilSpec, ControllerSpec, TimeSpec
from recon.core import InputError, MU_EARTH_km3_s2
from recon.judge import EffectAssessment, JudgementDiagnostics, feedback
from recon.judge import dipole as dip
from recon.judge import effect as eff
from recon.judge import replay as rep
from recon.judge.findings import findings
from recon.judge.judgement import judge_pass
from recon.judge.latency import latency_profile
from recon.judge.thresholds import MODEL_FLOOR_FRACTION, TREND_SIGMAS
from recon.judge.types import PassContext

C_NOM = np.diag([1.5, 1.5, 1.1])
IMAX = np.array([0.12, 0.12, 0.12])
# Loop gains come from a bisection on the spectral radius carried to ~1e-15 relative width; the
# only error left is the eigenvalue solver's, far below this.
LOOP_GAIN_TOL = 1e-6


# ---------------------------------------------------------------------------------- crosstalk loop
def _K_for_coupling(g: float, k: float = 40_000.0, T: float = 1.0) -> np.ndarray:
    """K_body (nT/A) that makes G = (k/T) 1e-9 C^-1 K_body = g I."""
    return g * C_NOM * T / (k * 1e-9)


@pytest.mark.parametrize("g", [0.1, 0.3, 0.5, 0.8, 1.07])
def test_loop_gain_positive_coupling_is_twice_coupling(g):
    # Derivation (Franklin, Powell & Workman 1998, ch. 7, roots of the characteristic equation):
    # i_k = -g (i_{k-1} - i_{k-2}) has z^2 + g z - g = 0, a root at z = -1 when g = 1/2, so the
    # gain margin is 1 / (2 g): loop gain 2 g.
    lg, coupling = feedback.crosstalk_loop_gain(_K_for_coupling(g), C_NOM, 40_000.0, 1.0)
    assert coupling == pytest.approx(g, rel=1e-12)
    assert lg == pytest.approx(2 * g, rel=LOOP_GAIN_TOL)


@pytest.mark.parametrize("g", [-0.4, -0.9, -1.5])
def test_loop_gain_negative_coupling_is_coupling(g):
    # z^2 - h z + h = 0 with h = -g has complex roots of modulus sqrt(h): unstable from h = 1.
    lg, _ = feedback.crosstalk_loop_gain(_K_for_coupling(g), C_NOM, 40_000.0, 1.0)
    assert lg == pytest.approx(abs(g), rel=LOOP_GAIN_TOL)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("delay", [0, 1])
def test_loop_gain_threshold_matches_iterated_recurrence(seed, delay):
    # Invariant: a loop gain below 1 decays, above 1 grows, when the recurrence is iterated.
    rng = np.random.default_rng(seed)
    K = rng.normal(0, 20_000.0, (3, 3))
    lg, _ = feedback.crosstalk_loop_gain(K, C_NOM, 40_000.0, 1.0, delay_ticks=delay)
    G0 = 40_000.0 * 1e-9 * np.linalg.solve(C_NOM, K)
    for factor, grows in ((0.9, False), (1.1, True)):
        G = G0 * factor / lg
        hist = [rng.normal(size=3) for _ in range(delay + 2)]
        for _ in range(3000):
            hist.append(-G @ (hist[-1 - delay] - hist[-2 - delay]))
        assert (np.linalg.norm(hist[-1]) > 1.0) == grows


def test_loop_gain_zero_crosstalk():
    assert feedback.crosstalk_loop_gain(np.zeros((3, 3)), C_NOM, 40_000.0, 1.0) == (0.0, 0.0)


# ------------------------------------------------------------------------------------------ replay
def test_bdot_replay_hand_computed():
    # m = -k dB/dt (Stickler & Alfriend 1974): dB/dt = (+1000, -500, 0) nT/s -> (1e-6, -5e-7, 0) T/s;
    # k = 40,000 -> m = (-0.04, +0.02, 0) A m^2 -> i = m / 1.5 = (-26.667, +13.333, 0) mA.
    b = np.array([[20_000.0, 5_000.0, -30_000.0], [21_000.0, 4_500.0, -30_000.0]])
    i = rep.replay_bdot_A(np.array([0.0, 1.0]), b, 40_000.0, C_NOM, IMAX)
    assert np.all(np.isnan(i[0]))
    np.testing.assert_allclose(i[1], [-0.04 / 1.5, 0.02 / 1.5, 0.0], atol=1e-15)
    # ten times the change saturates x at the limit, keeps the sign
    b[1, 0] = 30_000.0
    i = rep.replay_bdot_A(np.array([0.0, 1.0]), b, 40_000.0, C_NOM, IMAX)
    assert i[1, 0] == -0.12


def test_cross_product_replay_torque_is_minus_k_h_perp():
    # Markley & Crassidis (2014) sec. 7.5: m = k (h x B)/|B|^2 gives tau = m x B = -k (h - (h.b) b).
    rng = np.random.default_rng(4)
    J = np.diag([0.021, 0.023, 0.0071])
    w = rng.normal(0, 0.001, (5, 3))
    b_nT = rng.normal(0, 30_000.0, (5, 3))
    k = 0.005
    i = rep.replay_cross_product_A(b_nT, w, J, np.zeros(3), k, C_NOM, np.full(3, 10.0))
    tau = np.cross(i @ C_NOM.T, b_nT * 1e-9)
    h = w @ J.T
    bh = b_nT / np.linalg.norm(b_nT, axis=1, keepdims=True)
    expected = -k * (h - np.sum(h * bh, axis=1, keepdims=True) * bh)
    np.testing.assert_allclose(tau, expected, rtol=1e-12, atol=1e-20)


def test_tick_samples_take_the_sample_at_the_tick_inside_the_window():
    t = np.arange(0.0, 5.0, 0.1)
    b = np.column_stack([t, -t, 2 * t])
    ticks = np.array([1.0, 2.0, 7.0])
    out = rep.tick_samples_nT(t, b, ticks, sampling="windowed", off_window_s=(0.05, 0.05))
    np.testing.assert_allclose(out[:2], b[[10, 20]])
    assert np.all(np.isnan(out[2]))


def _smooth_commands(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = np.cumsum(rng.normal(0, 0.01, (n, 3)), axis=0)
    return np.clip(x - x.mean(axis=0), -0.12, 0.12)


def test_compare_commands_recovers_lag_gain_and_correlation():
    ticks = np.arange(0.0, 600.0, 1.0)
    cmd = _smooth_commands(len(ticks), 1)
    t_log = np.arange(0.0, 600.0, 0.1)
    # the log shows half of each command, 2.0 s late
    idx = np.searchsorted(ticks, t_log - 2.0 + 1e-9, side="right") - 1
    log = np.where(idx[:, None] >= 0, 0.5 * cmd[np.maximum(idx, 0)], 0.0)
    c = rep.compare_commands(ticks, cmd, t_log, log, IMAX, 1.0)
    assert c.lag_s == pytest.approx(2.0, abs=0.05 + 1e-9)   # one fine-scan step
    np.testing.assert_allclose(c.gain_ratio, 0.5, atol=1e-9)
    np.testing.assert_allclose(c.correlation, 1.0, atol=1e-9)


def test_chatter_fraction_limit_to_limit_only():
    alt = np.tile([[0.12, -0.12, 0.119], [-0.12, 0.12, -0.12]], (50, 1))
    np.testing.assert_allclose(rep.chatter_fraction(alt, IMAX), 1.0)
    smooth = 0.12 * np.sin(np.linspace(0, 20 * np.pi, 1000))[:, None] * np.ones(3)
    np.testing.assert_allclose(rep.chatter_fraction(smooth, IMAX), 0.0)


# ---------------------------------------------------------------------------------- classification
@pytest.mark.parametrize("est,sig,expect", [
    (1.52, 0.02, "nominal"), (-1.46, 0.05, "inverted"), (0.01, 0.03, "no_response"),
    (0.75, 0.02, "nominal"), (0.7, 0.5, "undetermined"), (0.3, 0.3, "undetermined"),
])
def test_classify_coil(est, sig, expect):
    pol, conf, r, s = dip.classify_coil(est, sig, 1.5)
    assert pol == expect
    assert r == pytest.approx(est / 1.5)
    assert s == pytest.approx(np.hypot(sig / 1.5, MODEL_FLOOR_FRACTION))
    if expect == "inverted":   # -1.46 +- 0.05 on 1.5: |r| / s = 0.973 / 0.0583 = 16.7 sigma from zero
        assert conf == pytest.approx(0.97333 / np.hypot(0.05 / 1.5, 0.05), rel=1e-4)


# ------------------------------------------------------------------------------------ latency profile
PROFILE_LAT_S = np.array([-1.0, -0.5, 0.0, 0.5, 1.0, 2.0, 3.0])


def _profile(chi2_units, ar1=0.0, chi2_per_dof=2.0, latency_s=1.0):
    """A hand-made latency profile: weighted residual sums ``base + unit * chi2_units`` with the unit
    the judge derives, chi2_per_dof (1 + ar1) / (1 - ar1)."""
    fit = SimpleNamespace(ar1=ar1, chi2_per_dof=chi2_per_dof, latency_s=latency_s)
    return fit, PROFILE_LAT_S, 1000.0 + chi2_per_dof * np.asarray(chi2_units, float)


def test_latency_profile_causal_minimum_and_ranges():
    # Minimum at +1 s; within 9 of it (3 sigma): 0.5, 1, 2 s; within 1: 1 s only; zero delay
    # sits 12 above. The negative trials lie above the causal minimum: nothing acausal.
    info = latency_profile(*_profile([30, 20, 12, 3, 0, 4, 40]), 1.0)
    assert info.latency_s == 1.0
    assert info.interval_s == (0.5, 2.0)
    assert info.interval_1sigma_s == (1.0, 1.0)
    assert info.delta_chi2_zero == pytest.approx(12.0, rel=1e-12)
    assert not info.acausal and info.acausal_delta_chi2 == 0.0
    assert info.determined


def test_latency_profile_torque_before_command_is_acausal():
    # The best trial is -1 s, 15 below the best causal one (zero delay): beyond the 3-sigma limit of
    # 9, so the latency is undetermined and the acausal trial is named. The causal range starts at
    # zero: a negative latency is never reported as the latency.
    info = latency_profile(*_profile([0, 5, 15, 25, 30, 40, 50], latency_s=0.0), 1.0)
    assert info.acausal and info.acausal_delta_chi2 == pytest.approx(15.0, rel=1e-12)
    assert info.acausal_latency_s == -1.0
    assert info.latency_s == 0.0 and info.interval_s == (0.0, 0.0)   # +0.5 s sits 10 above
    assert not info.determined


def test_latency_profile_ar1_inflation_weakens_the_evidence():
    # The same sums with correlated residuals (rho = 0.5: variance inflation (1 + rho)/(1 - rho) = 3,
    # Bayley and Hammersley 1946): the acausal gain is 15 / 3 = 5 < 9, not enough to reject causality.
    info = latency_profile(*_profile([0, 5, 15, 25, 30, 40, 50], ar1=0.5, latency_s=0.0), 1.0)
    assert info.acausal_delta_chi2 == pytest.approx(5.0, rel=1e-12)
    assert not info.acausal


# ---------------------------------------------------------------------------------------- effect
def test_energy_trend_recovers_exponential_time_constant():
    t = np.linspace(0, 1800, 1801)
    E = 3e-5 * np.exp(-t / 400.0)
    tr = eff.block_log_trend(t, E)
    assert tr.time_constant_s == pytest.approx(400.0, rel=1e-9)
    assert eff.trend_label(tr) == "decreasing"
    assert eff.trend_label(eff.block_log_trend(t, np.full_like(t, 3e-5) * (1 + 1e-3 * np.sin(t)))) == "steady"
    assert eff.trend_label(eff.block_log_trend(t, 3e-5 * np.exp(t / 900.0))) == "increasing"


def test_expected_trend_integrates_rate():
    t = np.linspace(0, 1000, 2001)
    tr = eff.expected_log_trend(t, np.full_like(t, -1 / 250.0))
    assert tr.time_constant_s == pytest.approx(250.0, rel=1e-9)


def _effect_codes(t, E_observed, expected_rate_of_lnE_per_s, law="bdot"):
    """The effect findings (code, severity) for an observed energy history and the replayed law's
    predicted d ln E / dt, with every other line of evidence absent."""
    tr = eff.block_log_trend(t, E_observed)
    tre = eff.expected_log_trend(t, expected_rate_of_lnE_per_s)
    effect = EffectAssessment(
        rate_trend=eff.trend_label(tr), energy_fit=tr, energy_time_constant_s=tr.time_constant_s,
        mean_rate_rad_s=0.05, magnetic_power_mean_W=0.0, damping_fraction=None,
        magnetic_power_axis_W=np.zeros(3), energy_expected=tre,
        energy_time_constant_expected_s=tre.time_constant_s, efficiency=tr.slope_per_s / tre.slope_per_s,
        momentum_error_fit=tr, momentum_error_expected=tre)
    t0 = np.datetime64("2024-03-01T00:00:00", "ns")
    ctx = PassContext(law=law, period_s=1.0, C_nominal=np.eye(3), max_current_A=np.ones(3),
                      span=(t0, t0 + np.timedelta64(int(t[-1]), "s")), mag_sampling="coils_off")
    f = findings(ctx, axes=(), identified=False, comparison=None, latency=None, effect=effect, feedback=None,
                 chatter=np.full(3, np.nan), n_segments=0, n_ticks=0, rate_bias=None)
    return {(a.code, a.severity) for a in f.anomalies}, tr, tre


def _noisy(t, slope_per_s, seed, scatter=0.02):
    return 3e-5 * np.exp(slope_per_s * t) * np.exp(np.random.default_rng(seed).normal(0, scatter, t.size))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_rise_the_law_predicts_is_not_a_finding_a_rise_beyond_it_is(seed):
    # the energy rises by e^2 over the pass in both cases (tau = +900 s, "increasing" on its own)
    t = np.linspace(0.0, 1800.0, 1801)
    E = _noisy(t, 1 / 900.0, seed)
    codes, tr, _ = _effect_codes(t, E, np.full_like(t, 1 / 900.0))
    assert eff.trend_label(tr) == "increasing"
    assert not codes                                   # the replayed law predicts this very rise
    codes, _, _ = _effect_codes(t, E, np.full_like(t, 1 / 1500.0))
    assert ("rate_increasing", "critical") in codes    # it predicts a rise, but far less
    codes, _, _ = _effect_codes(t, E, np.full_like(t, -1 / 400.0))
    assert ("rate_increasing", "critical") in codes    # it predicts a decay
    codes, _, _ = _effect_codes(t, E, np.full_like(t, 1 / 900.0), law="cross_product")
    assert not codes
    codes, _, _ = _effect_codes(t, E, np.full_like(t, -1 / 400.0), law="cross_product")
    assert ("momentum_error_increasing", "critical") in codes


def test_slow_decay_needs_a_significant_shortfall():
    t = np.linspace(0.0, 1800.0, 1801)
    # expected tau 100 s, observed 1000 s with 2 % scatter: a tenth of the expected rate, many sigmas
    codes, tr, tre = _effect_codes(t, _noisy(t, -1 / 1000.0, 4), np.full_like(t, -1 / 100.0))
    assert ("detumble_slow", "warning") in codes
    # the same tenth buried in scatter (ln E scatter 40 per sample): the ratio alone would flag it,
    # the shortfall is not significant, so no finding
    codes, tr, tre = _effect_codes(t, _noisy(t, -1 / 3000.0, 5, scatter=40.0), np.full_like(t, -1 / 300.0))
    z = (tr.slope_per_s - tre.slope_per_s) / np.hypot(tr.sigma_per_s, tre.sigma_per_s)
    assert tr.slope_per_s / tre.slope_per_s < 1 / 3 and z < TREND_SIGMAS
    assert not codes


def test_shortfall_false_alarm_rate_matches_student_t():
    # null: ln E follows the law's predicted slope plus white scatter. The one-sided rate of
    # z > TREND_SIGMAS should be P(t_8 > 3) = 0.0085 (scipy.stats.t.sf(3, 8): 10 block means, 2 parameters)
    stats = pytest.importorskip("scipy.stats")
    rng = np.random.default_rng(7)
    t = np.linspace(0.0, 1800.0, 1801)
    tre = eff.expected_log_trend(t, np.full_like(t, -1 / 400.0))
    n = 4000
    z = np.empty(n)
    for k in range(n):
        tr = eff.block_log_trend(t, np.exp(tre.slope_per_s * t + rng.normal(0, 0.3, t.size)))
        z[k] = (tr.slope_per_s - tre.slope_per_s) / np.hypot(tr.sigma_per_s, tre.sigma_per_s)
    p0 = float(stats.t.sf(TREND_SIGMAS, 8))
    rate = float(np.mean(z > TREND_SIGMAS))
    assert abs(rate - p0) < 4 * np.sqrt(p0 * (1 - p0) / n)
    assert rate <= 0.01 + 2 * np.sqrt(0.01 * 0.99 / n)   # the per-pass limit of 1 %


def test_near_optimal_gain_hand_value():
    # Avanzini & Giulietti (2012): k_w = 2 n (1 + sin xi_m) J_min. n = 1.1e-3 rad/s, xi_m = 30 deg,
    # J_min = 0.0071 -> 2 * 1.1e-3 * 1.5 * 0.0071 = 2.343e-5 N m s.
    J = np.diag([0.021, 0.023, 0.0071])
    assert eff.near_optimal_gain_Nms(1.1e-3, np.radians(30.0), J) == pytest.approx(2.343e-5, rel=1e-12)


def test_mean_motion_circular():
    r = np.column_stack([7000.0 * np.cos(np.linspace(0, 1, 50)), 7000.0 * np.sin(np.linspace(0, 1, 50)),
                         np.zeros(50)])
    assert eff.mean_motion_rad_s(r) == pytest.approx(np.sqrt(MU_EARTH_km3_s2 / 7000.0 ** 3), rel=1e-12)


@pytest.mark.parametrize("incl_deg", [0.0, 35.0, 90.0])
def test_geomagnetic_inclination_of_centred_dipole(incl_deg):
    # A centred dipole along GCRF z: the geomagnetic equator is the equator, so xi_m is the
    # inclination (Wertz 1978, sec. 5.1, dipole field B = (3 (m.r) r - m |r|^2) / |r|^5).
    t = np.linspace(0, 3000, 300)
    u = 2 * np.pi * t / 5700.0
    i = np.radians(incl_deg)
    r = 6900.0 * np.column_stack([np.cos(u), np.sin(u) * np.cos(i), np.sin(u) * np.sin(i)])
    m = np.array([0.0, 0.0, -8e15])
    rn = np.linalg.norm(r, axis=1, keepdims=True)
    b = (3 * (r @ m)[:, None] * r - m * rn ** 2) / rn ** 5
    assert np.degrees(eff.geomagnetic_inclination_rad(t, r, b)) == pytest.approx(incl_deg, abs=1e-6)


# ------------------------------------------------------------------------------------- input checks
def _specs():
    ctrl = ControllerSpec("bdot", 40_000.0, 1.0, None, None)
    coils = CoilSpec(Path("coils.csv"), TimeSpec("t", "unix"), ("a", "b", "c"), "A", IMAX, C_NOM,
                     "coils_off", None)
    return ctrl, coils


def _good_arrays(n=50):
    t = np.datetime64("2026-07-14T09:12:00", "ns") + (np.arange(n) * 1e9).astype("timedelta64[ns]")
    return dict(inertia_kg_m2=np.diag([0.021, 0.023, 0.0071]), mag_sensor_to_body=np.eye(3),
                time_mag_utc=t, b_mag_sensor_nT=np.ones((n, 3)), time_coil_utc=t, i_coil_A=np.zeros((n, 3)),
                time_utc=t, w_body_rad_s=np.zeros((n, 3)), b_body_nT=np.ones((n, 3)))


@pytest.mark.parametrize("key,bad,match", [
    ("w_body_rad_s", np.zeros((50, 2)), r"key 'w_body_rad_s': expected an array of shape \(50, 3\), got \(50, 2\)"),
    ("i_coil_A", np.zeros((49, 3)), r"key 'i_coil_A': expected an array of shape \(50, 3\)"),
    ("inertia_kg_m2", np.eye(2), r"key 'inertia_kg_m2'"),
])
def test_bad_shapes_raise_input_error(key, bad, match):
    ctrl, coils = _specs()
    args = _good_arrays()
    args[key] = bad
    with pytest.raises(InputError, match=match):
        judge_pass(controller=ctrl, coils=coils, **args)


def test_times_must_increase():
    ctrl, coils = _specs()
    args = _good_arrays()
    t = args["time_coil_utc"].copy()
    t[10] = t[9]
    args["time_coil_utc"] = t
    with pytest.raises(InputError, match=r"key 'time_coil_utc': expected strictly increasing times.*row 10"):
        judge_pass(controller=ctrl, coils=coils, **args)


def test_field_is_required():
    ctrl, coils = _specs()
    args = _good_arrays()
    del args["b_body_nT"]
    with pytest.raises(InputError, match="expected b_body_nT, or q_body_from_gcrf with b_gcrf_nT"):
        judge_pass(controller=ctrl, coils=coils, **args)


def test_short_pass_diagnostics_are_typed_and_say_why():
    # 50 control ticks make one segment of 30 periods (five are needed): no identification, so no
    # latency scan and no rate-bias evidence; no crosstalk given, so no feedback figures.
    ctrl, coils = _specs()
    j = judge_pass(controller=ctrl, coils=coils, **_good_arrays())
    dg = j.diagnostics
    assert isinstance(dg, JudgementDiagnostics) and isinstance(dg.effect, EffectAssessment)
    assert dg.n_ticks == len(j.replay_time_utc) and dg.n_segments == dg.n_ticks // 30 == 1
    assert dg.latency is None and dg.rate_bias is None and dg.feedback is None
    assert dg.latency_trials_s.size == 0 and dg.latency_trials_wrss.size == 0
    assert j.verdict == "undetermined"
    assert any(r.startswith("pass too short to identify the coils") for r in j.reasons)
