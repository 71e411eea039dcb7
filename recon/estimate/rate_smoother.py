"""The body rate through runs of clipped gyro samples: a Kalman smoother on the rate alone.

While a gyro axis sits at full scale the rate about it is beyond the range; what is still known there
is, at each sample, the gyro's unclipped axes and, across the measured field, the field's kinematics
(``[b x] w = db/dt - A db_ref/dt``, from the field's local slope); and between samples, Euler's
equations ``J dw/dt = tau - w x J w``. Neither alone gives the rate about the field in a tumble, and
a propagation of Euler's equations across a long run from its ends drifts with the torque's error.
So the rate is estimated as the state of a Kalman filter and Rauch-Tung-Striebel smoother through
each clipped run (and a margin of unclipped samples on each side, where the gyro ties it down):

- state: the rate (body), the coils' torque scale error ``s``, a residual dipole ``d`` (A m^2), so
  that the torque is ``((1 + s) m + d) x b``, and the gyro's bias ``beta`` (body): the last three are
  constant over a run and estimated with it, where a drift they cause would otherwise be taken for a
  turn, and a bias taken as known would put its error into the rate (and from there into the
  attitude filter's own bias);
- process: Euler's equations (fourth-order Runge-Kutta over each step) with the nominal inertia; its
  error (each principal moment ``INERTIA_REL_SIGMA``) enters as process noise on the rate: the
  spread of ``dw/dt`` over the moved inertias, held for ``MODEL_HOLD_S`` (an error held for a time
  ``T`` moves the rate as much as white noise of density ``sigma^2 T``);
- measurements: the unclipped gyro axes (``(M^T (w + beta))_j``, white noise) at every sample; the
  field's slope once per
  slope window (``2 SLOPE_HALF_WIDTH_S``: the slopes of overlapping windows share their noise).

The field's own turn ``A db_ref/dt`` needs the attitude; the caller gives it when it has one.

References
----------
Rauch, H. E., Tung, F. and Striebel, C. T. (1965). Maximum likelihood estimates of linear dynamic
systems. AIAA Journal 3(8), 1445-1450.
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (Euler's equations) (memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ClippedRate", "smooth_clipped_rate", "MARGIN_S", "MODEL_HOLD_S", "INERTIA_REL_SIGMA", "TORQUE_REL_SIGMA",
           "RESIDUAL_DIPOLE_Am2", "BIAS_PRIOR_RAD_S"]

# 1-sigma relative error of each principal moment of a small satellite's inertia from its CAD model
# (common practice, no source)
INERTIA_REL_SIGMA = 0.05
# 1-sigma relative error of the coils' torque (dipole per amp and current scale; common practice, no source)
TORQUE_REL_SIGMA = 0.05
# 1-sigma residual magnetic dipole per body axis of a small satellite, A m^2 (common practice, no source)
RESIDUAL_DIPOLE_Am2 = 0.005

# Unclipped gyro samples kept on each side of a clipped run, s: they tie the run's ends to the gyro.
MARGIN_S = 5.0
# Time for which an error of the inertia is taken as held when it is turned into process noise, s:
# about the time the field takes to turn a radian in the body at the rates that clip a small
# satellite's gyro (common practice, no source).
MODEL_HOLD_S = 10.0
# Floor of the rate's process noise, (rad/s)^2 per s: unmodelled torques of 1e-7 N m on 0.01 kg m^2
# (common practice, no source).
RATE_NOISE_FLOOR = 1e-10

# 1-sigma of the gyro's bias before the run, per axis, rad/s (0.5 deg/s: a MEMS gyro's turn-on bias,
# common practice, no source); the caller's bias, when it has one, is the prior's mean
BIAS_PRIOR_RAD_S = np.radians(0.5)

_N = 10  # rate (3), torque scale error (1), residual dipole (3), gyro bias (3)


@dataclass(frozen=True)
class ClippedRate:
    """The smoothed rate at every gyro sample of the clipped runs.

    Attributes
    ----------
    w_rad_s : (G, 3) body, bias taken out (the input's rate outside the runs)
    bias_rad_s : (G, 3) the gyro's bias estimated with it (the input's bias outside the runs)
    cov : (G, 3, 3) (rad/s)^2, the smoothed rate's covariance (zero outside the runs)
    run_s : (G,) s, length of the clipped run each sample is in (zero outside)
    torque_scale : list of (value, sigma) per run, the coils' torque scale error estimated
    """

    w_rad_s: np.ndarray
    bias_rad_s: np.ndarray
    cov: np.ndarray
    run_s: np.ndarray
    torque_scale: list


def _cross(v: np.ndarray) -> np.ndarray:
    return np.array([[0.0, -v[2], v[1]], [v[2], 0.0, -v[0]], [-v[1], v[0], 0.0]])


def _moved_inertias(inertia: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each principal moment moved by minus and by plus one sigma: (6, 3, 3) and their inverses."""
    vals, vecs = np.linalg.eigh(inertia)
    js = []
    for sign in (-1.0, 1.0):
        for k in range(3):
            v = vals.copy()
            v[k] *= 1.0 + sign * INERTIA_REL_SIGMA
            js.append(vecs @ np.diag(v) @ vecs.T)
    j = np.array(js)
    return j, np.linalg.inv(j)


class _Model:
    """Euler's equations with the torque's scale and residual dipole as parameters."""

    def __init__(self, inertia: np.ndarray):
        self.j = np.asarray(inertia, float)
        self.ji = np.linalg.inv(self.j)
        self.jm, self.jmi = _moved_inertias(self.j)

    def wdot(self, w: np.ndarray, s: float, d: np.ndarray, m: np.ndarray, b: np.ndarray) -> np.ndarray:
        return self.ji @ (np.cross((1.0 + s) * m + d, b) - np.cross(w, self.j @ w))

    def step(self, x: np.ndarray, m: np.ndarray, b: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The state after h seconds, its transition matrix and the process noise over the step."""
        w, s, d = x[:3], x[3], x[4:7]
        k1 = self.wdot(w, s, d, m, b)
        k2 = self.wdot(w + 0.5 * h * k1, s, d, m, b)
        k3 = self.wdot(w + 0.5 * h * k2, s, d, m, b)
        k4 = self.wdot(w + h * k3, s, d, m, b)
        xn = x.copy()
        xn[:3] = w + h / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
        a = np.zeros((_N, _N))
        a[:3, :3] = self.ji @ (_cross(self.j @ w) - _cross(w) @ self.j)
        a[:3, 3] = self.ji @ np.cross(m, b)
        a[:3, 4:7] = -self.ji @ _cross(b)
        f = np.eye(_N) + h * a
        tau = np.cross((1.0 + s) * m + d, b)
        moved = np.einsum("pij,pj->pi", self.jmi, tau[None] - np.cross(w[None], np.einsum("pij,j->pi", self.jm, w)))
        spread = (moved - self.wdot(w, s, d, m, b)[None]) / np.sqrt(2.0)
        q = np.zeros((_N, _N))
        q[:3, :3] = (spread.T @ spread * MODEL_HOLD_S + RATE_NOISE_FLOOR * np.eye(3)) * h
        return xn, f, q


def _runs(clipped_any: np.ndarray, t: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """Each clipped run's samples with their margins, and the run's own samples."""
    idx = np.flatnonzero(clipped_any)
    if len(idx) == 0:
        return []
    out = []
    for run in np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1):
        lo = int(np.searchsorted(t, t[run[0]] - MARGIN_S, side="left"))
        hi = int(np.searchsorted(t, t[run[-1]] + MARGIN_S, side="right"))
        out.append((np.arange(lo, hi), run))
    # runs whose margins overlap are smoothed together
    merged: list[tuple[np.ndarray, list]] = []
    for span, run in out:
        if merged and span[0] <= merged[-1][0][-1] + 1:
            merged[-1] = (np.arange(merged[-1][0][0], max(span[-1], merged[-1][0][-1]) + 1), merged[-1][1] + [run])
        else:
            merged.append((span, [run]))
    return [(span, np.concatenate(runs)) for span, runs in merged]


def _measurements(g: int, clipped_row: np.ndarray, w_axes: np.ndarray, m_s2b: np.ndarray, g_var: float,
                  constraint: tuple | None, c_var: float) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """H, z, R of one sample: its unclipped gyro axes (rate plus bias) and, when given, the field's slope."""
    rows, z, r = [], [], []
    for j in np.flatnonzero(~clipped_row):
        h = np.zeros(_N)
        h[:3] = m_s2b[:, j]
        h[7:] = m_s2b[:, j]
        rows.append(h)
        z.append(w_axes[j])
        r.append(g_var)
    if constraint is not None:
        bx, d = constraint
        h = np.zeros((3, _N))
        h[:, :3] = bx
        rows.extend(h)
        z.extend(d)
        r.extend([c_var] * 3)
    if not rows:
        return None
    return np.array(rows), np.array(z), np.array(r)


def _smooth_span(model: _Model, t, span, clipped_sensor, w_axes, m_s2b, g_var, constraints, c_var, m_body, b_T,
                 x0: np.ndarray, bias_sigma: float) -> tuple[np.ndarray, np.ndarray]:
    """Forward filter and RTS smoother over one span: smoothed states (n, 7) and covariances (n, 7, 7)."""
    n = len(span)
    xf, pf = np.zeros((n, _N)), np.zeros((n, _N, _N))
    xp, pp, fs = np.zeros((n, _N)), np.zeros((n, _N, _N)), np.zeros((n, _N, _N))
    x = x0.copy()
    p = np.diag([1.0, 1.0, 1.0, TORQUE_REL_SIGMA ** 2] + [RESIDUAL_DIPOLE_Am2 ** 2] * 3 + [bias_sigma ** 2] * 3)
    for i, g in enumerate(span):
        if i > 0:
            k0 = span[i - 1]
            x, f, q = model.step(x, m_body[k0], b_T[k0], t[g] - t[k0])
            p = f @ p @ f.T + q
            fs[i] = f
        xp[i], pp[i] = x, p
        meas = _measurements(g, clipped_sensor[g], w_axes[g], m_s2b, g_var, constraints.get(g), c_var)
        if meas is not None:
            h, z, r = meas
            s = h @ p @ h.T + np.diag(r)
            k = np.linalg.solve(s, h @ p).T
            x = x + k @ (z - h @ x)
            ikh = np.eye(_N) - k @ h
            p = ikh @ p @ ikh.T + (k * r) @ k.T  # Joseph form
        xf[i], pf[i] = x, p
    xs, ps = xf.copy(), pf.copy()
    for i in range(n - 2, -1, -1):
        c = np.linalg.solve(pp[i + 1], fs[i + 1] @ pf[i]).T
        xs[i] = xf[i] + c @ (xs[i + 1] - xp[i + 1])
        ps[i] = pf[i] + c @ (ps[i + 1] - pp[i + 1]) @ c.T
    return xs, ps


def smooth_clipped_rate(t_s: np.ndarray, w_logged_body: np.ndarray, clipped_sensor: np.ndarray,
                        sensor_to_body: np.ndarray, g_var: float, constraints: dict, c_var: float,
                        inertia_kg_m2: np.ndarray, m_body_Am2: np.ndarray, b_body_nT: np.ndarray,
                        beta_body_rad_s: np.ndarray | None = None, gyro_scale_E: np.ndarray | None = None
                        ) -> ClippedRate:
    """Smooth the rate through every clipped run of a gyro log.

    Parameters
    ----------
    t_s : (G,) s; w_logged_body : (G, 3) rad/s, body, as logged (bias included, clipped axes at the bound)
    clipped_sensor : (G, 3) bool, sensor axes at full scale; sensor_to_body : (3, 3) M
    g_var : float, variance of one gyro sample per axis, (rad/s)^2
    constraints : dict sample index -> ([b x] (3, 3) nT, db/dt - A db_ref/dt (3,) nT/s), the field's slope
        at the samples where it is used; c_var : its variance per component, (nT/s)^2
    inertia_kg_m2 : (3, 3) nominal; m_body_Am2 : (G, 3) the coils' applied dipole over each step;
    b_body_nT : (G, 3) the measured field at the samples
    beta_body_rad_s : (G, 3) the gyro's bias as known (the prior's mean; zero, with
        ``BIAS_PRIOR_RAD_S``, without it)
    gyro_scale_E : (3, 3) the gyro's scale and misalignment, body axes, when known: the gyro reads
        ``(I + E)(w + beta)``

    Returns
    -------
    ClippedRate
    """
    t = np.asarray(t_s, float)
    w = np.asarray(w_logged_body, float)
    beta = np.zeros((len(t), 3)) if beta_body_rad_s is None else np.asarray(beta_body_rad_s, float)
    m_s2b = np.asarray(sensor_to_body, float)
    w_axes = w @ m_s2b  # each sample's axes in the sensor frame: (M^T w)_j
    # what each gyro axis reads of the body's rate plus bias: (M^T (I + E))_j, a column here
    m_read = m_s2b if gyro_scale_E is None else (np.eye(3) + np.asarray(gyro_scale_E, float)).T @ m_s2b
    b_T = np.nan_to_num(np.asarray(b_body_nT, float)) * 1e-9
    m_body = np.nan_to_num(np.asarray(m_body_Am2, float))
    model = _Model(inertia_kg_m2)
    out_w, out_b = w - beta, beta.copy()
    out_cov, run_s = np.zeros((len(t), 3, 3)), np.zeros(len(t))
    scales = []
    for span, run in _runs(np.asarray(clipped_sensor, bool).any(axis=1), t):
        x0 = np.zeros(_N)
        x0[:3] = w[span[0]] - beta[span[0]]
        x0[7:] = beta[span[0]]
        xs, ps = _smooth_span(model, t, span, clipped_sensor, w_axes, m_read, g_var, constraints, c_var, m_body, b_T,
                              x0, BIAS_PRIOR_RAD_S)
        out_w[span], out_b[span] = xs[:, :3], xs[:, 7:]
        out_cov[span] = ps[:, :3, :3]
        run_s[run] = t[run[-1]] - t[run[0]] + (t[1] - t[0] if len(t) > 1 else 0.0)
        scales.append((float(xs[0, 3]), float(np.sqrt(ps[0, 3, 3]))))
    return ClippedRate(out_w, out_b, out_cov, run_s, scales)
