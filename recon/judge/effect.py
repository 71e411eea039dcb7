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

from dataclasses import dataclass

import numpy as np

from ..core import MU_EARTH_km3_s2
from .thresholds import TREND_MIN_CHANGE, TREND_SIGMAS

__all__ = ["Trend", "assess_effect", "kinetic_energy_J", "magnetic_power_W", "block_log_trend", "expected_log_trend",
           "trend_label", "mean_motion_rad_s", "geomagnetic_inclination_rad", "near_optimal_gain_Nms",
           "N_BLOCKS"]

# Block means remove the sample-to-sample correlation of a smooth history; ten blocks leave eight
# degrees of freedom for the slope's uncertainty.
N_BLOCKS = 10


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
                  r_gcrf_km: np.ndarray | None = None, b_gcrf_nT: np.ndarray | None = None) -> dict:
    """Trends and torque power of one pass, observed and as the configured law should have produced.

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

    Returns
    -------
    dict with, where computable: ``rate_trend``, ``energy_trend`` / ``energy_trend_expected`` (Trend),
    ``tau_E``, ``tau_E_exp`` (s), ``efficiency`` (observed / expected slope), ``power_W`` (mean
    magnetic power), ``damping_fraction`` (fraction of time the power is negative),
    ``power_axis_W`` (3,), ``k_eq``, ``k_ag`` (N m s), ``floor`` (rad/s), ``mean_rate_rad_s``; for
    cross-product also ``h_trend``, ``h_trend_obj``, ``h_trend_expected``, ``tau_h``, ``tau_h_exp``.
    """
    t = np.asarray(t_s, float)
    w = np.asarray(w_body_rad_s, float)
    b = np.asarray(b_body_nT, float)
    J = np.asarray(inertia_kg_m2, float)
    out: dict = {}
    E = kinetic_energy_J(w, J)
    tr = block_log_trend(t, E)
    out["energy_trend"] = tr
    out["rate_trend"] = trend_label(tr)
    out["tau_E"] = tr.time_constant_s if tr is not None else None
    out["mean_rate_rad_s"] = float(np.mean(np.linalg.norm(w, axis=1)))
    ia = np.nan_to_num(np.asarray(i_applied_A, float))
    P = magnetic_power_W(w, ia @ np.asarray(C_used).T, b)
    out["power_W"] = float(np.mean(P))
    active = np.abs(P) > 0
    out["damping_fraction"] = float(np.mean(P[active] < 0)) if active.any() else None
    out["power_axis_W"] = np.array([np.mean(magnetic_power_W(w, np.outer(ia[:, j], np.asarray(C_used)[:, j]), b))
                                    for j in range(3)])
    ir = np.nan_to_num(np.asarray(i_replay_applied_A, float))
    P_exp = magnetic_power_W(w, ir @ np.asarray(C_nominal).T, b)
    if law == "bdot":
        tre = expected_log_trend(t, P_exp / np.maximum(E, 1e-300))
        out["energy_trend_expected"] = tre
        out["tau_E_exp"] = tre.time_constant_s if tre is not None else None
        if tr is not None and tre is not None and tre.slope_per_s != 0:
            out["efficiency"] = tr.slope_per_s / tre.slope_per_s
        out["k_eq"] = float(gain * np.mean(np.sum((b * 1e-9) ** 2, axis=1)))
    if law == "cross_product":
        h_t = np.zeros(3) if target_momentum_Nms is None else np.asarray(target_momentum_Nms, float)
        h = w @ J.T
        he = h - h_t
        hn = np.linalg.norm(he, axis=1)
        trh = block_log_trend(t, hn)
        tau_exp = np.cross(ir @ np.asarray(C_nominal).T, b * 1e-9) - np.cross(w, h)
        rate = np.einsum("ni,ni->n", he, tau_exp) / np.maximum(hn, 1e-300) ** 2
        trhe = expected_log_trend(t, rate)
        out.update(h_trend=trend_label(trh), h_trend_obj=trh, h_trend_expected=trhe,
                   tau_h=trh.time_constant_s if trh is not None else None,
                   tau_h_exp=trhe.time_constant_s if trhe is not None else None)
        if trh is not None and trhe is not None and trhe.slope_per_s != 0:
            out["efficiency"] = trh.slope_per_s / trhe.slope_per_s
    if r_gcrf_km is not None:
        n = mean_motion_rad_s(r_gcrf_km)
        out["floor"] = 2.0 * n
        if b_gcrf_nT is not None:
            xi = geomagnetic_inclination_rad(t, r_gcrf_km, b_gcrf_nT)
            out["xi_m_rad"] = xi
            out["k_ag"] = near_optimal_gain_Nms(n, xi, J)
    return out
