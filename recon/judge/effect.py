"""The physical effect of the magnetic controller: energy and momentum trends, torque power.

Kinetic energy ``E = w . J w / 2`` changes only through the work of external torques,
``dE/dt = w . tau`` (the gyroscopic term ``w x J w`` does no work), so under B-dot its trend shows
directly whether the coils damp the motion. The magnetic torque's power ``w . (m x B)`` is negative
when it damps.

For B-dot, ``m = -k dB/dt`` and, with the field fixed in inertial space, ``dB/dt = -w x B`` in body
axes, so ``m = k w x B`` and the torque is ``-k |B|^2 (w - (w . b) b)``: the law of Avanzini and
Giulietti (2012) with ``k_w = k |B|^2``. Averaged over directions of w relative to b,
``<|w - (w . b) b|^2> = 2/3 |w|^2``, so for a body with mean inertia J the energy decays at
``(4/3) k |B|^2 / J`` (this module's derivation; used only as a cross-check). The decision figure is
the decay the configured law should have produced along the observed trajectory: the replayed
command's power divided by the energy, integrated in time (see :func:`expected_log_trend`).

References
----------
Avanzini, G. and Giulietti, F. (2012). Magnetic detumbling of a rigid spacecraft. J. Guidance,
Control, and Dynamics 35(4), 1326-1334, doi:10.2514/1.53074 (near-optimal gain
``k_w = 2 n (1 + sin xi_m) J_min``).
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer, sec. 7.5 (B-dot cannot damp the rate below about twice the orbital rate, the
field's own rotation).
Wertz, J. R. (ed.) (1978). Spacecraft Attitude Determination and Control. Reidel, sec. 5.1 (the
geomagnetic field as a tilted dipole).
"""

from __future__ import annotations

import numpy as np

from ..core import MU_EARTH_km3_s2, MU_EARTH_m3_s2
from .thresholds import TREND_MIN_CHANGE, TREND_SIGMAS
from .types import EffectAssessment, Trend

__all__ = ["assess_effect", "kinetic_energy_J", "magnetic_power_W", "block_log_trend", "expected_log_trend",
           "trend_label", "mean_motion_rad_s", "geomagnetic_inclination_rad", "near_optimal_gain_Nms",
           "N_BLOCKS"]

# Block means remove the sample-to-sample correlation of a smooth history; ten blocks leave eight
# degrees of freedom for the slope's uncertainty.
N_BLOCKS = 10


def kinetic_energy_J(w_body_rad_s: np.ndarray, inertia_kg_m2: np.ndarray) -> np.ndarray:
    """Rotational kinetic energy ``w . J w / 2``, J, for (N, 3) rates in rad/s."""
    w = np.asarray(w_body_rad_s, float)
    return 0.5 * np.einsum("ni,ij,nj->n", w, np.asarray(inertia_kg_m2, float), w)


def magnetic_power_W(w_body_rad_s: np.ndarray, m_body_Am2: np.ndarray, b_body_nT: np.ndarray) -> np.ndarray:
    """Power of the magnetic torque, ``w . (m x B)``, W (negative: damping), (N,)."""
    tau = np.cross(np.asarray(m_body_Am2, float), np.asarray(b_body_nT, float) * 1e-9)
    return np.einsum("ni,ni->n", np.asarray(w_body_rad_s, float), tau)


def block_log_trend(t_s: np.ndarray, x: np.ndarray, n_blocks: int = N_BLOCKS) -> Trend | None:
    """Slope of ln x against time from the means of ``n_blocks`` equal time blocks.

    The slope's sigma is the ordinary least-squares one from the block residuals; residual
    curvature (a decay that slows near its floor) enlarges it, which keeps the call conservative.

    Parameters
    ----------
    t_s : (N,) s; x : (N,) positive values (non-positive and NaN values are skipped)

    Returns
    -------
    Trend, or None with fewer than four populated blocks
    """
    t = np.asarray(t_s, float)
    x = np.asarray(x, float)
    ok = np.isfinite(t) & np.isfinite(x) & (x > 0)
    t, lx = t[ok], np.log(x[ok])
    if len(t) < 8:
        return None
    edges = np.linspace(t[0], t[-1], n_blocks + 1)
    idx = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, n_blocks - 1)
    cnt = np.bincount(idx, minlength=n_blocks)
    use = cnt > 0
    if use.sum() < 4:
        return None
    tb = np.bincount(idx, t, n_blocks)[use] / cnt[use]
    yb = np.bincount(idx, lx, n_blocks)[use] / cnt[use]
    X = np.column_stack([np.ones_like(tb), tb - tb.mean()])
    coef, *_ = np.linalg.lstsq(X, yb, rcond=None)
    res = yb - X @ coef
    dof = len(tb) - 2
    s2 = float(res @ res / dof)
    sig = float(np.sqrt(s2 / np.sum((tb - tb.mean()) ** 2)))
    return Trend(float(coef[1]), sig, float(t[-1] - t[0]), int(use.sum()))


def expected_log_trend(t_s: np.ndarray, rate_of_ln_per_s: np.ndarray, n_blocks: int = N_BLOCKS) -> Trend | None:
    """The trend ln x would have followed given its instantaneous rate of change (1/s).

    ``ln x_pred(t) = int rate dt`` (trapezoid) is fitted the same way as the observation, so the
    two slopes compare like with like.
    """
    t = np.asarray(t_s, float)
    r = np.asarray(rate_of_ln_per_s, float)
    ok = np.isfinite(t) & np.isfinite(r)
    t, r = t[ok], r[ok]
    if len(t) < 8:
        return None
    lx = np.concatenate([[0.0], np.cumsum(0.5 * (r[1:] + r[:-1]) * np.diff(t))])
    return block_log_trend(t, np.exp(lx), n_blocks)


def trend_label(trend: Trend | None, *, sigmas: float = TREND_SIGMAS, min_change: float = TREND_MIN_CHANGE) -> str:
    """"decreasing" | "steady" | "increasing" (``"steady"`` also when there is no trend to fit)."""
    if trend is None:
        return "steady"
    big = abs(trend.slope_per_s) * trend.duration_s >= min_change
    sure = abs(trend.slope_per_s) > sigmas * trend.sigma_per_s
    if big and sure:
        return "decreasing" if trend.slope_per_s < 0 else "increasing"
    return "steady"


def mean_motion_rad_s(r_km: np.ndarray) -> float:
    """Orbital mean motion ``sqrt(mu / a^3)`` with a the mean orbit radius (near-circular orbits)."""
    a = float(np.mean(np.linalg.norm(np.asarray(r_km, float), axis=1)))
    return float(np.sqrt(MU_EARTH_km3_s2 / a ** 3))


def geomagnetic_inclination_rad(t_s: np.ndarray, r_gcrf_km: np.ndarray, b_gcrf_nT: np.ndarray) -> float:
    """Inclination xi_m of the orbit plane to the geomagnetic equator during the pass.

    The geomagnetic dipole axis m is the least-squares tilted dipole through the reference field
    along the orbit, ``B |r|^3 ~ (3 r_hat r_hat^T - I) m`` (Wertz 1978, sec. 5.1); the orbit normal is
    the mean of ``r x v`` with v from finite differences; ``xi_m = arccos |n . m_hat|`` in [0, pi/2].

    Parameters
    ----------
    t_s : (N,) s; r_gcrf_km : (N, 3) km, GCRF; b_gcrf_nT : (N, 3) nT, GCRF
    """
    t = np.asarray(t_s, float)
    r = np.asarray(r_gcrf_km, float)
    b = np.asarray(b_gcrf_nT, float)
    rn = np.linalg.norm(r, axis=1)
    rh = r / rn[:, None]
    A = 3.0 * rh[:, :, None] * rh[:, None, :] - np.eye(3)
    y = b * (rn ** 3)[:, None]
    m, *_ = np.linalg.lstsq(A.reshape(-1, 3), y.ravel(), rcond=None)
    v = np.gradient(r, t, axis=0)
    n = np.cross(r, v).mean(axis=0)
    c = abs(float(n @ m) / (np.linalg.norm(n) * np.linalg.norm(m)))
    return float(np.arccos(min(c, 1.0)))


def near_optimal_gain_Nms(mean_motion: float, xi_m_rad: float, inertia_kg_m2: np.ndarray) -> float:
    """Avanzini and Giulietti (2012) near-optimal detumbling gain ``k_w = 2 n (1 + sin xi_m) J_min``, N m s.

    J_min is the smallest principal moment of inertia.
    """
    j_min = float(np.min(np.linalg.eigvalsh(np.asarray(inertia_kg_m2, float))))
    return float(2.0 * mean_motion * (1.0 + np.sin(xi_m_rad)) * j_min)


def assess_effect(law: str, gain: float, t_s: np.ndarray, w_body_rad_s: np.ndarray, b_body_nT: np.ndarray,
                  inertia_kg_m2: np.ndarray, i_applied_A: np.ndarray, i_replay_applied_A: np.ndarray,
                  C_used: np.ndarray, C_nominal: np.ndarray, *, target_momentum_Nms: np.ndarray | None = None,
                  r_gcrf_km: np.ndarray | None = None, b_gcrf_nT: np.ndarray | None = None,
                  w_seen_rad_s: np.ndarray | None = None, residual_dipole_Am2: np.ndarray | None = None,
                  r_body_km: np.ndarray | None = None) -> EffectAssessment:
    """Trends and torque power of one pass, observed and as the configured law should have produced.

    The expected trends use the full torque model: the replayed command through the nominal dipoles,
    the identified residual dipole and the gravity gradient. The cross-product law regulates the
    momentum error the onboard computer computes from its gyro, bias included; that error (from
    ``w_seen_rad_s``) is the one judged, observed and expected.

    Parameters
    ----------
    law : "bdot" | "cross_product" | "none"; gain : the law's gain
    t_s : (N,) s; w_body_rad_s : (N, 3) rad/s body; b_body_nT : (N, 3) nT body
    inertia_kg_m2 : (3, 3)
    i_applied_A : (N, 3) current flowing (logged, held, gated, delayed), A
    i_replay_applied_A : (N, 3) the replayed command as the design applies it, A
    C_used : (3, 3) best knowledge of the coils' dipole per amp (identified where determined)
    C_nominal : (3, 3) the design's dipole per amp
    target_momentum_Nms : (3,) body axes, cross-product only
    r_gcrf_km, b_gcrf_nT : (N, 3), optional: mean motion, rate floor and near-optimal gain
    w_seen_rad_s : (N, 3) the rate the onboard computer read (its raw gyro), or None (the history)
    residual_dipole_Am2 : (3,) identified residual dipole, or None; r_body_km : (N, 3) position in body
        axes (gravity gradient), or None

    Returns
    -------
    EffectAssessment (the B-dot figures for B-dot, the momentum-error ones for cross-product, the
    orbit's where positions are given)
    """
    t = np.asarray(t_s, float)
    w = np.asarray(w_body_rad_s, float)
    b = np.asarray(b_body_nT, float)
    J = np.asarray(inertia_kg_m2, float)
    E = kinetic_energy_J(w, J)
    tr = block_log_trend(t, E)
    ia = np.nan_to_num(np.asarray(i_applied_A, float))
    P = magnetic_power_W(w, ia @ np.asarray(C_used).T, b)
    active = np.abs(P) > 0
    power_axis = np.array([np.mean(magnetic_power_W(w, np.outer(ia[:, j], np.asarray(C_used)[:, j]), b))
                           for j in range(3)])
    ir = np.nan_to_num(np.asarray(i_replay_applied_A, float))
    tau_other = _other_torques(b, J, residual_dipole_Am2, r_body_km)
    bdot = law == "bdot"
    cross = law == "cross_product"
    tre = None
    if bdot:
        tau_exp = np.cross(ir @ np.asarray(C_nominal).T, b * 1e-9) + tau_other
        tre = expected_log_trend(t, np.einsum("ni,ni->n", w, tau_exp) / np.maximum(E, 1e-300))
    w_seen = w if w_seen_rad_s is None else np.asarray(w_seen_rad_s, float)
    trh, trhe = (_momentum_error_trends(t, w, w_seen, b, J, ir, C_nominal, target_momentum_Nms, tau_other)
                 if cross else (None, None))
    floor, xi, k_ag = _orbit_figures(t, J, r_gcrf_km, b_gcrf_nT)
    return EffectAssessment(
        rate_trend=trend_label(tr), energy_fit=tr, energy_time_constant_s=_time_constant(tr),
        mean_rate_rad_s=float(np.mean(np.linalg.norm(w, axis=1))), magnetic_power_mean_W=float(np.mean(P)),
        damping_fraction=float(np.mean(P[active] < 0)) if active.any() else None, magnetic_power_axis_W=power_axis,
        energy_expected=tre, energy_time_constant_expected_s=_time_constant(tre),
        bdot_equivalent_gain_Nms=float(gain * np.mean(np.sum((b * 1e-9) ** 2, axis=1))) if bdot else None,
        momentum_error_trend=trend_label(trh) if cross else None, momentum_error_fit=trh,
        momentum_error_expected=trhe, momentum_error_time_constant_s=_time_constant(trh),
        momentum_error_time_constant_expected_s=_time_constant(trhe),
        efficiency=_efficiency(tr, tre) if bdot else _efficiency(trh, trhe) if cross else None,
        rate_floor_rad_s=floor, geomagnetic_inclination_rad=xi, near_optimal_gain_Nms=k_ag)


def _other_torques(b: np.ndarray, J: np.ndarray, residual_dipole_Am2: np.ndarray | None,
                   r_body_km: np.ndarray | None) -> np.ndarray:
    """The residual dipole's torque and the gravity gradient, N m, body axes (N, 3) (zero where unknown)."""
    tau = np.zeros_like(b)
    if residual_dipole_Am2 is not None and np.all(np.isfinite(residual_dipole_Am2)):
        tau += np.cross(np.asarray(residual_dipole_Am2, float), b * 1e-9)
    if r_body_km is not None:
        r = np.asarray(r_body_km, float) * 1e3
        rn = np.linalg.norm(r, axis=1, keepdims=True)
        tau += 3.0 * MU_EARTH_m3_s2 / rn ** 5 * np.cross(r, r @ J.T)
    return tau


def _time_constant(trend: Trend | None) -> float | None:
    return trend.time_constant_s if trend is not None else None


def _efficiency(observed: Trend | None, expected: Trend | None) -> float | None:
    """Observed over expected slope, None when either is missing or nothing was expected."""
    if observed is not None and expected is not None and expected.slope_per_s != 0:
        return observed.slope_per_s / expected.slope_per_s
    return None


def _momentum_error_trends(t: np.ndarray, w: np.ndarray, w_seen: np.ndarray, b: np.ndarray, J: np.ndarray,
                           i_replay: np.ndarray, C_nominal: np.ndarray, target_momentum_Nms: np.ndarray | None,
                           tau_other: np.ndarray) -> tuple[Trend | None, Trend | None]:
    """Trends of the momentum error the law regulates, ln |J w_seen - h_target|, observed and as the
    replayed cross-product law with the other torques should have driven it.

    The error the onboard computer sees moves with the true rate (its gyro bias is constant), so
    ``d h_seen / dt = J dw/dt = tau - w x J w`` with tau the replayed coils' torque plus the residual
    dipole's and the gravity gradient's."""
    h_t = np.zeros(3) if target_momentum_Nms is None else np.asarray(target_momentum_Nms, float)
    he = w_seen @ J.T - h_t
    hn = np.linalg.norm(he, axis=1)
    trh = block_log_trend(t, hn)
    tau_exp = np.cross(i_replay @ np.asarray(C_nominal).T, b * 1e-9) + tau_other - np.cross(w, w @ J.T)
    rate = np.einsum("ni,ni->n", he, tau_exp) / np.maximum(hn, 1e-300) ** 2
    return trh, expected_log_trend(t, rate)


def _orbit_figures(t: np.ndarray, J: np.ndarray, r_gcrf_km: np.ndarray | None, b_gcrf_nT: np.ndarray | None
                   ) -> tuple[float | None, float | None, float | None]:
    """Rate floor 2 n (rad/s), geomagnetic inclination xi_m (rad) and near-optimal gain (N m s), each
    None where the orbit positions (or, for the last two, the reference field) are missing."""
    if r_gcrf_km is None:
        return None, None, None
    n = mean_motion_rad_s(r_gcrf_km)
    if b_gcrf_nT is None:
        return 2.0 * n, None, None
    xi = geomagnetic_inclination_rad(t, r_gcrf_km, b_gcrf_nT)
    return 2.0 * n, xi, near_optimal_gain_Nms(n, xi, J)
