"""Small algebra for the compiled filter: quaternions, attitude matrices, cross-product matrices and a
Cholesky solve, on plain float arrays with no allocation where the passes call them.

Quaternions are scalar-last and follow scipy's convention (Hamilton product, ``A(q) v_gcrf =
v_body``); the kinematics is ``dA/dt = -[w x] A``, so one step with a constant body rate w is
``q(t + dt) = q(-w dt) (x) q(t)``, with ``q(v)`` the quaternion of rotation vector v.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .layout import N


@njit(cache=True, error_model="numpy")
def qmul(p, q):
    """Hamilton product p (x) q, scalar-last (scipy: ``(P * Q).as_quat()``)."""
    out = np.empty(4)
    out[0] = p[3] * q[0] + q[3] * p[0] + p[1] * q[2] - p[2] * q[1]
    out[1] = p[3] * q[1] + q[3] * p[1] + p[2] * q[0] - p[0] * q[2]
    out[2] = p[3] * q[2] + q[3] * p[2] + p[0] * q[1] - p[1] * q[0]
    out[3] = p[3] * q[3] - p[0] * q[0] - p[1] * q[1] - p[2] * q[2]
    return out


@njit(cache=True, error_model="numpy")
def quat_from_rotvec(v0, v1, v2):
    """Quaternion of the rotation vector (v0, v1, v2) (scipy ``from_rotvec``)."""
    th = np.sqrt(v0 * v0 + v1 * v1 + v2 * v2)
    out = np.empty(4)
    if th < 1e-8:
        s = 0.5 - th * th / 48.0
    else:
        s = np.sin(0.5 * th) / th
    out[0] = s * v0
    out[1] = s * v1
    out[2] = s * v2
    out[3] = np.cos(0.5 * th)
    return out


@njit(cache=True, error_model="numpy")
def rotvec_from_quat(q):
    """Rotation vector of q (shortest rotation, sign of q irrelevant)."""
    x, y, z, w = q[0], q[1], q[2], q[3]
    if w < 0.0:
        x, y, z, w = -x, -y, -z, -w
    s = np.sqrt(x * x + y * y + z * z)
    out = np.empty(3)
    if s < 1e-12:
        f = 2.0 / w
    else:
        f = 2.0 * np.arctan2(s, w) / s
    out[0] = f * x
    out[1] = f * y
    out[2] = f * z
    return out


@njit(cache=True, error_model="numpy")
def qnormalize(q):
    n = np.sqrt(q[0] * q[0] + q[1] * q[1] + q[2] * q[2] + q[3] * q[3])
    return q / n


@njit(cache=True, error_model="numpy")
def rot_step_into(v0, v1, v2, q, out):
    """out = normalised q(v) (x) q for the rotation vector v: one step of the kinematics, no allocation."""
    th = np.sqrt(v0 * v0 + v1 * v1 + v2 * v2)
    if th < 1e-8:
        sc = 0.5 - th * th / 48.0
    else:
        sc = np.sin(0.5 * th) / th
    px, py, pz, pw = sc * v0, sc * v1, sc * v2, np.cos(0.5 * th)
    x = pw * q[0] + q[3] * px + py * q[2] - pz * q[1]
    y = pw * q[1] + q[3] * py + pz * q[0] - px * q[2]
    z = pw * q[2] + q[3] * pz + px * q[1] - py * q[0]
    w = pw * q[3] - px * q[0] - py * q[1] - pz * q[2]
    nn = np.sqrt(x * x + y * y + z * z + w * w)
    out[0] = x / nn
    out[1] = y / nn
    out[2] = z / nn
    out[3] = w / nn


@njit(cache=True, error_model="numpy")
def attitude_matrix_into(q, a):
    """Write A(q) into the (3, 3) array ``a`` (see :func:`attitude_matrix`)."""
    x, y, z, w = q[0], q[1], q[2], q[3]
    a[0, 0] = w * w + x * x - y * y - z * z
    a[0, 1] = 2.0 * (x * y - z * w)
    a[0, 2] = 2.0 * (x * z + y * w)
    a[1, 0] = 2.0 * (x * y + z * w)
    a[1, 1] = w * w - x * x + y * y - z * z
    a[1, 2] = 2.0 * (y * z - x * w)
    a[2, 0] = 2.0 * (x * z - y * w)
    a[2, 1] = 2.0 * (y * z + x * w)
    a[2, 2] = w * w - x * x - y * y + z * z


@njit(cache=True, error_model="numpy")
def attitude_matrix(q):
    """A(q) with ``A @ v_gcrf = v_body`` (scipy ``as_matrix``)."""
    a = np.empty((3, 3))
    attitude_matrix_into(q, a)
    return a


@njit(cache=True, error_model="numpy")
def _skew_into(v, out, r0, c0, scale):
    """out[r0:r0+3, c0:c0+3] = scale * [v x]."""
    out[r0 + 0, c0 + 0] = 0.0
    out[r0 + 0, c0 + 1] = -scale * v[2]
    out[r0 + 0, c0 + 2] = scale * v[1]
    out[r0 + 1, c0 + 0] = scale * v[2]
    out[r0 + 1, c0 + 1] = 0.0
    out[r0 + 1, c0 + 2] = -scale * v[0]
    out[r0 + 2, c0 + 0] = -scale * v[1]
    out[r0 + 2, c0 + 1] = scale * v[0]
    out[r0 + 2, c0 + 2] = 0.0


@njit(cache=True, error_model="numpy")
def skew(v):
    s = np.empty((3, 3))
    _skew_into(v, s, 0, 0, 1.0)
    return s


@njit(cache=True, error_model="numpy")
def cross(a, b):
    out = np.empty(3)
    out[0] = a[1] * b[2] - a[2] * b[1]
    out[1] = a[2] * b[0] - a[0] * b[2]
    out[2] = a[0] * b[1] - a[1] * b[0]
    return out


@njit(cache=True, error_model="numpy")
def cholesky_solve(a, b, lwork, out):
    """Solve a x = b for symmetric positive-definite a (N x N), b (N x N). Returns False if not SPD.

    ``lwork`` receives the Cholesky factor L (row i, column j <= i); its diagonal holds 1 / L_ii.
    Rows of all right-hand sides are processed together so the inner loops run over contiguous memory.
    """
    for i in range(N):
        for j in range(i + 1):
            s = a[i, j]
            for k in range(j):
                s -= lwork[i, k] * lwork[j, k]
            if i == j:
                if s <= 0.0:
                    return False
                lwork[i, i] = 1.0 / np.sqrt(s)
            else:
                lwork[i, j] = s * lwork[j, j]
    for i in range(N):
        for c in range(N):
            out[i, c] = b[i, c]
        for k in range(i):
            lik = lwork[i, k]
            for c in range(N):
                out[i, c] -= lik * out[k, c]
        d = lwork[i, i]
        for c in range(N):
            out[i, c] *= d
    for i in range(N - 1, -1, -1):
        for k in range(i + 1, N):
            lki = lwork[k, i]
            for c in range(N):
                out[i, c] -= lki * out[k, c]
        d = lwork[i, i]
        for c in range(N):
            out[i, c] *= d
    return True

