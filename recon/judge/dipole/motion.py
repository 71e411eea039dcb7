"""Splines of one pass's motion history, built once and shared by every fit of the pass.

The identification integrates the field, the gyroscopic term ``w x J w``, the gravity-gradient
torque, the rate and ``t w`` between arbitrary instants; each is a cubic spline through the history
and its antiderivative, so an integral is the difference of two spline values.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer, sec. 3.3.6 (gravity-gradient torque).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline

from ...core import MU_EARTH_m3_s2

__all__ = ["MotionSplines", "motion_splines", "inertia_shape_basis", "symmetric_basis"]


def symmetric_basis() -> np.ndarray:
    """The six symmetric 3 x 3 matrices (6, 3, 3) orthonormal in the Frobenius product."""
    out = []
    for i in range(3):
        for j in range(i, 3):
            e = np.zeros((3, 3))
            e[i, j] = e[j, i] = 1.0 if i == j else np.sqrt(0.5)
            out.append(e)
    return np.array(out)


def inertia_shape_basis(inertia: np.ndarray) -> np.ndarray:
    """Five symmetric matrices (5, 3, 3), orthonormal in the Frobenius product and orthogonal to J.

    A change of the inertia along J itself only rescales Euler's equation (J, the coil dipoles, the
    residual dipole and the disturbance all scale together), so from the motion with unknown dipoles
    only the inertia's *shape* can be estimated: its changes in the five directions perpendicular to J.
    """
    J = np.asarray(inertia, float)
    S = symmetric_basis().reshape(6, 9).T              # (9, 6), orthonormal columns
    u = J.ravel() / np.linalg.norm(J)
    P = S - np.outer(u, u @ S)                         # projected off J
    U, sv, _ = np.linalg.svd(P, full_matrices=False)
    return U[:, :5].T.reshape(5, 3, 3)


@dataclass(frozen=True)
class MotionSplines:
    """Splines of the motion history, built once per pass and shared by all latency trials.

    Attributes
    ----------
    w : the rate, rad/s, body frame
    F_B : antiderivative of the field B in body axes, T s
    F_gyro : antiderivative of w x J w, N m s
    F_gg : antiderivative of the gravity-gradient torque, N m s, or None (no positions given)
    F_w : antiderivative of w, rad
    F_tw : antiderivative of t w, rad s
    t_s : (N,) the history's times, s
    P : (N, 3, 3) rate covariance, (rad/s)^2, or None
    shape_basis : (5, 3, 3) the inertia-shape directions (see :func:`inertia_shape_basis`)
    F_shape : antiderivative of ``w x E_k w - tau_gg(E_k)`` for each shape direction E_k, (5, 3)
        columns flattened to 15, N m s per kg m^2
    """

    w: CubicSpline
    F_B: CubicSpline
    F_gyro: CubicSpline
    F_gg: CubicSpline | None
    F_w: CubicSpline
    F_tw: CubicSpline
    t_s: np.ndarray
    P: np.ndarray | None
    shape_basis: np.ndarray | None = None
    F_shape: CubicSpline | None = None


def motion_splines(t_s: np.ndarray, w_body_rad_s: np.ndarray, b_body_nT: np.ndarray, inertia: np.ndarray,
                   r_body_km: np.ndarray | None, w_cov: np.ndarray | None) -> MotionSplines:
    """The splines of one motion history (see :class:`MotionSplines`).

    Parameters
    ----------
    t_s : (N,) sorted times, s; w_body_rad_s : (N, 3) rad/s, body frame; b_body_nT : (N, 3) nT, body axes
    inertia : (3, 3) kg m^2
    r_body_km : (N, 3) position from the Earth's centre in body axes, km, or None (no gravity gradient)
    w_cov : (N, 3, 3) rate covariance, (rad/s)^2, or None
    """
    t = np.asarray(t_s, float)
    w = np.asarray(w_body_rad_s, float)
    b_T = np.asarray(b_body_nT, float) * 1e-9
    gyro = np.cross(w, w @ inertia.T)
    basis = inertia_shape_basis(inertia)
    shape = np.stack([np.cross(w, w @ E.T) for E in basis], axis=1)          # (N, 5, 3)
    F_gg = None
    if r_body_km is not None:
        r = np.asarray(r_body_km, float) * 1e3
        rn = np.linalg.norm(r, axis=1, keepdims=True)
        gg = 3.0 * MU_EARTH_m3_s2 / rn ** 5
        tau_gg = gg * np.cross(r, r @ inertia.T)
        F_gg = CubicSpline(t, tau_gg).antiderivative()
        shape -= np.stack([gg * np.cross(r, r @ E.T) for E in basis], axis=1)
    w_spline = CubicSpline(t, w)
    return MotionSplines(w_spline, CubicSpline(t, b_T).antiderivative(), CubicSpline(t, gyro).antiderivative(),
                         F_gg, w_spline.antiderivative(), CubicSpline(t, t[:, None] * w).antiderivative(), t, w_cov,
                         basis, CubicSpline(t, shape.reshape(len(t), 15)).antiderivative())
