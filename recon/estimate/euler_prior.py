"""The body rate through a run of clipped gyro samples, from Euler's equations.

While a gyro axis sits at full scale, the rate about it is beyond the range and the gyro says nothing
more. The body's dynamics still do: from the last unclipped sample before the run, Euler's equations

    J dw/dt = -w x J w + tau,    tau = (C i) x b    (the coils' torque in the measured field)

carry the whole rate vector forward; from the first unclipped sample after it, backward. The two are
combined by their covariances. The covariance of each comes from the inertia and the torque being
known only so well (each principal moment ``INERTIA_REL_SIGMA``, the coils' torque
``TORQUE_REL_SIGMA``, a residual dipole of ``RESIDUAL_DIPOLE_Am2`` per axis): the propagation is run
again with each of them moved by one sigma, and the spread taken (a first-order, finite-difference
propagation of their covariance). The rate at the run's ends is the gyro's, bias taken out, with its
white noise.

References
----------
Julier, S. J. and Uhlmann, J. K. (1997). A non-divergent estimation algorithm in the presence of unknown
correlations. Proc. American Control Conference, 2369-2373 (memory).
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (Euler's equations) (memory).
"""

from __future__ import annotations

import numpy as np

__all__ = ["euler_prior", "INERTIA_REL_SIGMA", "TORQUE_REL_SIGMA", "RESIDUAL_DIPOLE_Am2"]

# 1-sigma relative error of each principal moment of a small satellite's inertia from its CAD model
# (common practice, no source)
INERTIA_REL_SIGMA = 0.05
# 1-sigma relative error of the coils' torque (dipole per amp and current scale; common practice, no source)
TORQUE_REL_SIGMA = 0.05
# 1-sigma residual magnetic dipole per body axis of a small satellite, A m^2 (common practice, no source)
RESIDUAL_DIPOLE_Am2 = 0.005


def _wdot(w: np.ndarray, j: np.ndarray, jinv: np.ndarray, tau: np.ndarray) -> np.ndarray:
    """Euler's equations for a batch: w (P, 3), j and jinv (P, 3, 3), tau (P, 3)."""
    h = np.einsum("pij,pj->pi", j, w)
    return np.einsum("pij,pj->pi", jinv, tau - np.cross(w, h))


def _perturbations(inertia: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The nominal model, then each error moved by minus and by plus one sigma (inertia principal
    moments, torque scale, residual dipole): inertias (P, 3, 3), their inverses, torque scales (P,) and
    residual dipoles (P, 3), P = 1 + 2 * 7."""
    vals, vecs = np.linalg.eigh(inertia)
    js, scale, dip = [inertia], [1.0], [np.zeros(3)]
    for sign in (-1.0, 1.0):
        for k in range(3):
            v = vals.copy()
            v[k] *= 1.0 + sign * INERTIA_REL_SIGMA
            js.append(vecs @ np.diag(v) @ vecs.T)
            scale.append(1.0)
            dip.append(np.zeros(3))
        js.append(inertia)
        scale.append(1.0 + sign * TORQUE_REL_SIGMA)
        dip.append(np.zeros(3))
        for k in range(3):
            js.append(inertia)
            scale.append(1.0)
            dip.append(sign * np.eye(3)[k] * RESIDUAL_DIPOLE_Am2)
    j = np.array(js)
    return j, np.linalg.inv(j), np.array(scale), np.array(dip)


def _propagate(t: np.ndarray, w0: np.ndarray, m_body: np.ndarray, b_body_T: np.ndarray, inertia: np.ndarray
               ) -> np.ndarray:
    """Rate at the times t (from t[0], either direction) for the nominal and moved models: (P, n, 3).
    m_body, b_body_T : (n, 3), the coils' dipole and the field at those times (held over each step)."""
    j, jinv, scale, dip = _perturbations(inertia)
    p = len(j)
    out = np.empty((p, len(t), 3))
    w = np.repeat(w0[None, :], p, axis=0)
    out[:, 0] = w
    for k in range(len(t) - 1):
        dt = t[k + 1] - t[k]
        tau = np.cross(scale[:, None] * m_body[k][None, :] + dip, b_body_T[k][None, :])
        k1 = _wdot(w, j, jinv, tau)
        k2 = _wdot(w + 0.5 * dt * k1, j, jinv, tau)
        k3 = _wdot(w + 0.5 * dt * k2, j, jinv, tau)
        k4 = _wdot(w + dt * k3, j, jinv, tau)
        w = w + dt / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
        out[:, k + 1] = w
    return out


def _side(t: np.ndarray, w_start: np.ndarray, m_body: np.ndarray, b_body_T: np.ndarray,
          inertia: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One side's propagated rate (n, 3) and its moves (P-1, n, 3) for each model error moved by minus
    and by plus one sigma, scaled by 1/sqrt(2) so that their outer products sum to the covariance
    (central differences: a 20 s run of a fast tumble is not linear in a 5 % inertia error, and the
    one-sided difference made the stated sigma a third of the error there)."""
    runs = _propagate(t, w_start, m_body, b_body_T, inertia)
    return runs[0], (runs[1:] - runs[0][None]) / np.sqrt(2.0)


def _combine(w_f: np.ndarray, c_f: np.ndarray, w_b: np.ndarray, c_b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Covariance intersection of the forward and backward propagations (Julier and Uhlmann 1997):
    consistent whatever the correlation of their errors, which share the same inertia and torque errors
    by an amount a linearisation over a long tumble does not give reliably. The weight minimises the
    trace of the result, per sample, over a grid of 21 weights: (n, 3) and (n, 3, 3)."""
    jitter = 1e-18 * np.eye(3)
    a, b = np.linalg.inv(c_f + jitter), np.linalg.inv(c_b + jitter)
    best_w, best_c = w_f.copy(), c_f.copy()
    best_tr = np.trace(c_f, axis1=1, axis2=2)
    for om in np.linspace(0.0, 1.0, 21)[1:]:
        cov = np.linalg.inv(om * a + (1.0 - om) * b)
        info_w = om * np.einsum("nij,nj->ni", a, w_f) + (1.0 - om) * np.einsum("nij,nj->ni", b, w_b)
        w = np.einsum("nij,nj->ni", cov, info_w)
        tr = np.trace(cov, axis1=1, axis2=2)
        better = tr < best_tr
        best_w[better], best_c[better], best_tr[better] = w[better], cov[better], tr[better]
    return best_w, best_c


def euler_prior(t_gyro_s: np.ndarray, w_true: np.ndarray, clipped_any: np.ndarray, inertia_kg_m2: np.ndarray,
                m_body_Am2: np.ndarray, b_body_nT: np.ndarray, start_var: float
                ) -> tuple[np.ndarray, np.ndarray]:
    """The rate at each clipped gyro sample from Euler's equations, and its covariance.

    Parameters
    ----------
    t_gyro_s : (G,) s; w_true : (G, 3) rad/s, body axes, bias taken out (used at unclipped samples)
    clipped_any : (G,) bool, samples with an axis at full scale
    inertia_kg_m2 : (3, 3) nominal
    m_body_Am2 : (G, 3) the coils' dipole at each sample (zero where unknown); b_body_nT : (G, 3) the
        measured field at each sample
    start_var : float, variance of an unclipped sample's rate per axis, (rad/s)^2

    Returns
    -------
    prior : (G, 3) rad/s (zero on unclipped samples); cov : (G, 3, 3) (rad/s)^2 (inf on the diagonal
        where no unclipped sample bounds the run on either side)
    """
    g = len(t_gyro_s)
    prior = np.zeros((g, 3))
    cov = np.zeros((g, 3, 3))
    b_t = np.nan_to_num(np.asarray(b_body_nT, float)) * 1e-9
    m = np.nan_to_num(np.asarray(m_body_Am2, float))
    idx = np.flatnonzero(clipped_any)
    if len(idx) == 0:
        return prior, cov
    breaks = np.flatnonzero(np.diff(idx) > 1)
    for run in np.split(idx, breaks + 1):
        a, b, n = run[0] - 1, run[-1] + 1, len(run)
        sides = []
        if a >= 0:
            sl = np.arange(a, min(b + 1, g))
            w, d = _side(t_gyro_s[sl], w_true[a], m[sl], b_t[sl], inertia_kg_m2)
            sides.append((w[1:n + 1], d[:, 1:n + 1]))
        if b < g:
            sl = np.arange(b, a - 1 if a >= 0 else -1, -1)
            w, d = _side(t_gyro_s[sl], w_true[b], m[sl], b_t[sl], inertia_kg_m2)
            sides.append((w[1:n + 1][::-1], d[:, 1:n + 1][:, ::-1]))
        if not sides:
            cov[run] = np.diag(np.full(3, np.inf))
        else:
            parts = [(w, np.einsum("pni,pnj->nij", d, d) + start_var * np.eye(3)[None]) for w, d in sides]
            prior[run], cov[run] = parts[0] if len(parts) == 1 else _combine(*parts[0], *parts[1])
    return prior, cov
