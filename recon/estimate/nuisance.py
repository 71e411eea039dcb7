"""What gyro mode estimates besides the attitude: the corrections it applies to its inputs, and the
consider covariance that carries their uncertainty into the attitude's.

- :class:`Corrections` holds the magnetometer's misalignment (theta, body axes: ``b = R(theta) b_c``),
  the gyro's scale and non-orthogonality (E: ``w = (I + E)^-1 w_g``) and the magnetometer's time-tag
  offset (stamps minus true instants) and the constant part of the unmodelled field over the pass
  (GCRF, added to the reference field); :func:`corrected_inputs` applies them.
- :func:`consider_covariance`: the filter does not carry these as states, so the uncertainty of their
  estimates is added to the smoothed attitude's covariance as a consider term,
  ``P_att += sum_j s_j s_j^T``, with ``s_j`` the change of the smoothed attitude when the corrections
  move by the j-th column of the Cholesky factor of their covariance (a finite-difference sensitivity
  times one sigma, direction by direction).

References
----------
Schmidt, S. F. (1966). Application of state-space methods to navigation problems. Adv. Control
Syst. 3, 293-340 (consider covariance) (memory).
Woodbury, D. and Junkins, J. L. (2010). On the consider Kalman filter. AIAA Guidance, Navigation, and
Control Conference, AIAA 2010-7752 (memory).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy.spatial.transform import Rotation

from ..core import NS_PER_S
from .types import PassInputs, Track

__all__ = ["Corrections", "corrected_inputs", "consider_covariance", "with_consider"]


@dataclass(frozen=True)
class Corrections:
    """Corrections applied to gyro mode's inputs.

    Attributes
    ----------
    theta_rad : (3,) magnetometer misalignment, body axes
    E : (3, 3) gyro scale factors and non-orthogonality (symmetric)
    time_offset_s : float, magnetometer stamps minus true instants
    field_nT : (3,) GCRF, the unmodelled field's constant part, added to the reference field
    """

    theta_rad: np.ndarray
    E: np.ndarray
    time_offset_s: float = 0.0
    field_nT: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(3))

    def moved(self, dx: np.ndarray, layout: tuple[str, ...]) -> Corrections:
        """These corrections moved by dx, whose blocks follow ``layout`` ("theta" 3, "scale" 6, "time" 1,
        "field" 3)."""
        th, e, dt, f = self.theta_rad.copy(), self.E.copy(), self.time_offset_s, np.asarray(self.field_nT, float)
        k = 0
        for name in layout:
            if name == "theta":
                th = th + dx[k:k + 3]
                k += 3
            elif name == "scale":
                v = dx[k:k + 6]
                e = e + np.array([[v[0], v[3], v[4]], [v[3], v[1], v[5]], [v[4], v[5], v[2]]])
                k += 6
            elif name == "time":
                dt = dt + float(dx[k])
                k += 1
            elif name == "field":
                f = f + dx[k:k + 3]
                k += 3
        return Corrections(th, e, dt, f)


def corrected_inputs(inputs: PassInputs, c: Corrections) -> PassInputs:
    """The pass's inputs with the corrections applied: the field rotated by R(theta), the gyro's scale
    taken out, the magnetometer's instants moved back by the time-tag offset (its reference field
    interpolated to them)."""
    b = inputs.b_body_nT if not np.any(c.theta_rad) else Rotation.from_rotvec(c.theta_rad).apply(inputs.b_body_nT)
    w = inputs.w_gyro_body_rad_s
    if w is not None and np.any(c.E):
        w = _scale_taken_out(w, c.E, inputs.gyro_clipping)
    t = inputs.t_mag_ns
    ref = inputs.b_ref_gcrf_nT
    if c.time_offset_s:
        shift = int(round(c.time_offset_s * NS_PER_S))
        t_new = t - shift
        x, x_new = (t - t[0]) / NS_PER_S, (t_new - t[0]) / NS_PER_S
        ref = np.column_stack([np.interp(x_new, x, ref[:, a]) for a in range(3)])
        t = t_new
    if np.any(c.field_nT):
        ref = ref + np.asarray(c.field_nT, float)[None, :]
    return dataclasses.replace(inputs, t_mag_ns=t, b_body_nT=b, w_gyro_body_rad_s=w, b_ref_gcrf_nT=ref)


def _scale_taken_out(w: np.ndarray, e: np.ndarray, clipping) -> np.ndarray:
    """The gyro with its scale and misalignment ``(I + E)`` taken out. A clipped axis's value was
    solved from the field and the body's dynamics (:mod:`.clipping`), not read by the gyro, so it
    carries no scale error: in sensor axes the corrected sample ``s`` keeps it and takes the gyro's
    own axes through ``(I + E_s) s = logged`` (``E_s = M^T E M``)."""
    out = np.linalg.solve(np.eye(3) + e, w.T).T
    if clipping is None or not clipping.clipped_sensor.any():
        return out
    m = clipping.sensor_to_body
    rows = np.flatnonzero(clipping.clipped_sensor.any(axis=1))
    flags = clipping.clipped_sensor[rows]
    a = np.where(flags[:, :, None], np.eye(3)[None], (np.eye(3) + m.T @ e @ m)[None])
    s = np.linalg.solve(a, (w[rows] @ m)[:, :, None])[:, :, 0]
    out[rows] = s @ m.T
    return out


def consider_covariance(q_nominal: np.ndarray, w_nominal: np.ndarray,
                        perturbed: list[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    """Consider covariance of the attitude (and the rate's variance) from one-sigma perturbations.

    Parameters
    ----------
    q_nominal : (M, 4) smoothed attitude; w_nominal : (M, 3) reported rate, rad/s
    perturbed : list of (q (M, 4), w (M, 3)): the same with the corrections moved by one column of the
        Cholesky factor of their covariance each

    Returns
    -------
    p_att : (M, 3, 3) rad^2, body axes; var_rate : (M, 3) (rad/s)^2
    """
    m = len(q_nominal)
    p_att = np.zeros((m, 3, 3))
    var_rate = np.zeros((m, 3))
    r0 = Rotation.from_quat(q_nominal)
    for q, w in perturbed:
        d = (Rotation.from_quat(q) * r0.inv()).as_rotvec()
        p_att += d[:, :, None] * d[:, None, :]
        var_rate += (w - w_nominal) ** 2
    return p_att, var_rate


def with_consider(track: Track, p_att: np.ndarray, var_rate: np.ndarray) -> Track:
    """The track with a consider covariance added to its attitude block and rate variance."""
    cov = track.covariance.copy()
    cov[:, :3, :3] += p_att
    sig_att = np.sqrt(np.clip(np.diagonal(cov[:, :3, :3], axis1=1, axis2=2), 0.0, None))
    return dataclasses.replace(track, covariance=cov, sigma_att_rad=sig_att,
                               sigma_rate_rad_s=np.sqrt(track.sigma_rate_rad_s ** 2 + var_rate))
