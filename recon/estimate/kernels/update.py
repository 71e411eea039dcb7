"""The magnetometer update of the filter: one body-frame field vector against the reference field.

The measurement is ``z = A(q) (b_ref + db) + v``: v the magnetometer's white noise, db the field the
reference model omits (estimated in the state, see :mod:`.propagation`). The error state is the one
of the multiplicative EKF (Lefferts, Markley & Shuster 1982; Markley & Crassidis 2014 ch. 6).

References
----------
Lefferts, E. J., Markley, F. L. and Shuster, M. D. (1982). Kalman filtering for spacecraft attitude
estimation. J. Guidance 5(5), 417-429.
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Ch. 6.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .algebra import attitude_matrix_into, rot_step_into
from .layout import P_SIGM, N


@njit(cache=True, error_model="numpy")
def _whiten(innov, s00, s01, s02, s11, s12, s22, white):
    """white[:3] = L^-1 innov with S = L L^T (the Cholesky factor of the symmetric 3x3 S, lower);
    white[3] = log det S = 2 log(l00 l11 l22)."""
    l00 = np.sqrt(s00)
    l10 = s01 / l00
    l20 = s02 / l00
    l11 = np.sqrt(s11 - l10 * l10)
    l21 = (s12 - l20 * l10) / l11
    l22 = np.sqrt(s22 - l20 * l20 - l21 * l21)
    white[0] = innov[0] / l00
    white[1] = (innov[1] - l10 * white[0]) / l11
    white[2] = (innov[2] - l20 * white[0] - l21 * white[1]) / l22
    white[3] = 2.0 * np.log(l00 * l11 * l22)


@njit(cache=True, error_model="numpy")
def _no_update(q, v, db, qn, vn, dbn, white):
    """The state carried through unchanged and the whitened innovation marked NaN; returns NaN (no NIS)."""
    for i in range(4):
        qn[i] = q[i]
        white[i] = np.nan
    for i in range(3):
        vn[i] = v[i]
        dbn[i] = db[i]
    return np.nan


@njit(cache=True, error_model="numpy")
def update_into(q, v, db, p, z, b_ref, prm, innov, qn, vn, dbn, a, pht, kg, dx, white):
    """Vector update in place (work arrays a (3, 3), pht (N, 3), kg (N, 3), dx (N,)); returns NIS.

    ``innov`` receives the innovation ``z - h(x)`` (nT) and ``white`` (4,) the whitened innovation
    ``L^-1 (z - h(x))`` with ``S = L L^T`` (Cholesky), whose squared length is the NIS, then
    ``log det S`` (S in nT^2): the two terms of the update's contribution to -2 log-likelihood.

    ``h(x) = A(q) (b_ref + db)``, ``H = [[h x], 0, A]``, ``R = sig_m^2 I``. Joseph's covariance update
    ``(I - K H) P (I - K H)^T + K R K^T``, multiplied out as ``P - K (H P) - (K (H P))^T + K S K^T``
    (valid for any gain K, a third of the cost). An S that is not positive definite: no update, NaN."""
    attitude_matrix_into(q, a)
    r0, r1, r2 = b_ref[0] + db[0], b_ref[1] + db[1], b_ref[2] + db[2]
    h0 = a[0, 0] * r0 + a[0, 1] * r1 + a[0, 2] * r2
    h1 = a[1, 0] * r0 + a[1, 1] * r1 + a[1, 2] * r2
    h2 = a[2, 0] * r0 + a[2, 1] * r1 + a[2, 2] * r2
    r = prm[P_SIGM] * prm[P_SIGM]
    innov[0] = z[0] - h0
    innov[1] = z[1] - h1
    innov[2] = z[2] - h2
    # P H^T: the attitude block of H is [h x] (so column c of P H^T is P[:, 0:3] . row c of [h x]),
    # the field block is A
    for i in range(N):
        p0, p1, p2 = p[i, 0], p[i, 1], p[i, 2]
        pht[i, 0] = -h2 * p1 + h1 * p2
        pht[i, 1] = h2 * p0 - h0 * p2
        pht[i, 2] = -h1 * p0 + h0 * p1
        f0, f1, f2 = p[i, 6], p[i, 7], p[i, 8]
        pht[i, 0] += a[0, 0] * f0 + a[0, 1] * f1 + a[0, 2] * f2
        pht[i, 1] += a[1, 0] * f0 + a[1, 1] * f1 + a[1, 2] * f2
        pht[i, 2] += a[2, 0] * f0 + a[2, 1] * f1 + a[2, 2] * f2
    # S = H P H^T + R (rows of H applied to the columns of P H^T)
    s00 = -h2 * pht[1, 0] + h1 * pht[2, 0]
    s01 = -h2 * pht[1, 1] + h1 * pht[2, 1]
    s02 = -h2 * pht[1, 2] + h1 * pht[2, 2]
    s11 = h2 * pht[0, 1] - h0 * pht[2, 1]
    s12 = h2 * pht[0, 2] - h0 * pht[2, 2]
    s22 = -h1 * pht[0, 2] + h0 * pht[1, 2]
    s00 += a[0, 0] * pht[6, 0] + a[0, 1] * pht[7, 0] + a[0, 2] * pht[8, 0]
    s01 += a[0, 0] * pht[6, 1] + a[0, 1] * pht[7, 1] + a[0, 2] * pht[8, 1]
    s02 += a[0, 0] * pht[6, 2] + a[0, 1] * pht[7, 2] + a[0, 2] * pht[8, 2]
    s11 += a[1, 0] * pht[6, 1] + a[1, 1] * pht[7, 1] + a[1, 2] * pht[8, 1]
    s12 += a[1, 0] * pht[6, 2] + a[1, 1] * pht[7, 2] + a[1, 2] * pht[8, 2]
    s22 += a[2, 0] * pht[6, 2] + a[2, 1] * pht[7, 2] + a[2, 2] * pht[8, 2]
    s00 += r
    s11 += r
    s22 += r
    # inverse of the symmetric 3x3 S by cofactors
    c00 = s11 * s22 - s12 * s12
    c01 = s02 * s12 - s01 * s22
    c02 = s01 * s12 - s02 * s11
    det = s00 * c00 + s01 * c01 + s02 * c02
    if not det > 0.0:  # a diverged state
        return _no_update(q, v, db, qn, vn, dbn, white)
    i00 = c00 / det
    i01 = c01 / det
    i02 = c02 / det
    i11 = (s00 * s22 - s02 * s02) / det
    i12 = (s02 * s01 - s00 * s12) / det
    i22 = (s00 * s11 - s01 * s01) / det
    nis = (innov[0] * (i00 * innov[0] + i01 * innov[1] + i02 * innov[2])
           + innov[1] * (i01 * innov[0] + i11 * innov[1] + i12 * innov[2])
           + innov[2] * (i02 * innov[0] + i12 * innov[1] + i22 * innov[2]))
    _whiten(innov, s00, s01, s02, s11, s12, s22, white)
    for i in range(N):
        e0, e1, e2 = pht[i, 0], pht[i, 1], pht[i, 2]
        k0 = e0 * i00 + e1 * i01 + e2 * i02
        k1 = e0 * i01 + e1 * i11 + e2 * i12
        k2 = e0 * i02 + e1 * i12 + e2 * i22
        kg[i, 0] = k0
        kg[i, 1] = k1
        kg[i, 2] = k2
        dx[i] = k0 * innov[0] + k1 * innov[1] + k2 * innov[2]
    # Joseph form multiplied out: P - K (H P) - (K (H P))^T + K S K^T, with H P = (P H^T)^T
    for i in range(N):
        k0, k1, k2 = kg[i, 0], kg[i, 1], kg[i, 2]
        ks0 = k0 * s00 + k1 * s01 + k2 * s02
        ks1 = k0 * s01 + k1 * s11 + k2 * s12
        ks2 = k0 * s02 + k1 * s12 + k2 * s22
        for j in range(i, N):
            val = (p[i, j] - (k0 * pht[j, 0] + k1 * pht[j, 1] + k2 * pht[j, 2])
                   - (kg[j, 0] * pht[i, 0] + kg[j, 1] * pht[i, 1] + kg[j, 2] * pht[i, 2])
                   + ks0 * kg[j, 0] + ks1 * kg[j, 1] + ks2 * kg[j, 2])
            p[i, j] = val
            p[j, i] = val
    rot_step_into(-dx[0], -dx[1], -dx[2], q, qn)
    for i in range(3):
        vn[i] = v[i] + dx[3 + i]
        dbn[i] = db[i] + dx[6 + i]
    return nis


@njit(cache=True, error_model="numpy")
def vector_update(q, v, db, p, z, b_ref, prm, innov):
    """Update with one body-frame field measurement z (nT) against the GCRF reference b_ref (nT).

    P (N x N) is updated in place; returns (q, v, db, nis); ``innov`` (3,) receives z - h(x). The
    allocating form of :func:`update_into`, which the passes use.
    """
    qn = np.empty(4)
    vn = np.empty(3)
    dbn = np.empty(3)
    nis = update_into(q, v, db, p, z, b_ref, prm, innov, qn, vn, dbn, np.empty((3, 3)), np.empty((N, 3)),
                       np.empty((N, 3)), np.empty(N), np.empty(4))
    return qn, vn, dbn, nis

