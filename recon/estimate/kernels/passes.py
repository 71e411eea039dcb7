"""The two passes over a pass's steps: the forward MEKF and the Rauch-Tung-Striebel smoother.

The forward covariances are stored packed (upper triangle, row by row, NP numbers a step) for the
smoother, which runs backwards over them in error-state form.

References
----------
Crassidis, J. L. and Junkins, J. L. (2012). Optimal Estimation of Dynamic Systems, 2nd ed. CRC.
Ex. 5.1 (Rauch-Tung-Striebel smoother).
Rauch, H. E., Tung, F. and Striebel, C. T. (1965). Maximum likelihood estimates of linear dynamic
systems. AIAA J. 3(8), 1445-1450 (memory).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .algebra import cholesky_solve, rot_step_into
from .layout import N
from .propagation import predict_into
from .update import update_into


@njit(cache=True, error_model="numpy")
def forward_pass(mode, t, u, is_mag, z, r, prm, q0, v0, db0, p0,
                 q_out, v_out, db_out, p_out, nis_out, innov_out):
    """Forward MEKF over K steps. Step k sits at t[k]; propagation k-1 -> k uses u[k-1].

    Outputs (filled): q_out (K, 4), v_out (K, 3), db_out (K, 3), p_out (K, NP) the covariance after
    the update at each step, upper triangle row by row (see :func:`unpack_covariance`); nis_out (K,)
    and innov_out (K, 4) the whitened innovations (``L^-1 (z - h(x))``, S = L L^T) and log det S (each update's
    contribution to the likelihood), NaN where there is no update.
    """
    kk = t.shape[0]
    q, v, db, p = q0.copy(), v0.copy(), db0.copy(), p0.copy()
    q2, v2, db2, p2 = np.empty(4), np.empty(3), np.empty(3), np.empty((N, N))
    m = np.empty((N, N))
    blk = np.zeros((3, 6))
    w3 = np.empty(3)
    phi = np.zeros((N, N))
    qd = np.zeros((N, N))
    a3 = np.empty((3, 3))
    pht = np.empty((N, 3))
    kg = np.empty((N, 3))
    dx = np.empty(N)
    innov = np.empty(3)
    white = np.empty(4)
    for k in range(kk):
        if k > 0:
            predict_into(mode, k - 1, q, v, db, t, u, r, prm, p, q2, v2, db2, m, p2, blk, w3, phi, qd)
            q, q2 = q2, q
            v, v2 = v2, v
            db, db2 = db2, db
            p, p2 = p2, p
        if is_mag[k]:
            nis_out[k] = update_into(q, v, db, p, z[k], r[k], prm, innov, q2, v2, db2, a3, pht, kg, dx, white)
            q, q2 = q2, q
            v, v2 = v2, v
            db, db2 = db2, db
            innov_out[k, 0] = white[0]
            innov_out[k, 1] = white[1]
            innov_out[k, 2] = white[2]
            innov_out[k, 3] = white[3]
        else:
            nis_out[k] = np.nan
            innov_out[k, 0] = np.nan
            innov_out[k, 1] = np.nan
            innov_out[k, 2] = np.nan
            innov_out[k, 3] = np.nan
        for i in range(4):
            q_out[k, i] = q[i]
        for i in range(3):
            v_out[k, i] = v[i]
            db_out[k, i] = db[i]
        c = 0
        for i in range(N):
            for j in range(i, N):
                p_out[k, c] = p[i, j]
                c += 1
    return 0


@njit(cache=True, error_model="numpy")
def unpack_into(packed, out):
    c = 0
    for i in range(N):
        for j in range(i, N):
            out[i, j] = packed[c]
            out[j, i] = packed[c]
            c += 1


def unpack_covariance(packed: np.ndarray, size: int = N) -> np.ndarray:
    """(K, NP) packed upper triangles -> (K, size, size) symmetric blocks (the leading size x size)."""
    iu = np.triu_indices(N)
    full = np.empty((packed.shape[0], N, N))
    full[:, iu[0], iu[1]] = packed
    full[:, iu[1], iu[0]] = packed
    return np.ascontiguousarray(full[:, :size, :size])


@njit(cache=True, error_model="numpy")
def attitude_error_rotvec(ax, ay, az, aw, qm):
    """Rotation vector dtheta of the small rotation from the predicted quaternion qm to the smoothed one
    (ax, ay, az, aw), with ``q_s = q(-dtheta) (x) q-``: the attitude part of the smoother's state error.

    Scalars in and out, so the smoother's loop keeps no extra array references.
    """
    # qe = q_s (x) conj(q-): Hamilton product written out, then its rotation vector
    bx, by, bz, bw = -qm[0], -qm[1], -qm[2], qm[3]
    ex = aw * bx + bw * ax + ay * bz - az * by
    ey = aw * by + bw * ay + az * bx - ax * bz
    ez = aw * bz + bw * az + ax * by - ay * bx
    ew = aw * bw - ax * bx - ay * by - az * bz
    if ew < 0.0:
        ex, ey, ez, ew = -ex, -ey, -ez, -ew
    sn = np.sqrt(ex * ex + ey * ey + ez * ez)
    f = 2.0 / ew if sn < 1e-12 else 2.0 * np.arctan2(sn, ew) / sn
    return -f * ex, -f * ey, -f * ez


@njit(cache=True, error_model="numpy", inline="always")
def smoothed_covariance_into(ps, pk, pm, x, tmp):
    """ps = P_s,k = P+ - Ks (P- - P_s,k+1) Ks^T, with ps holding P_s,k+1 on entry, pk = P+_k, pm = P-_k+1
    (overwritten) and x = Ks^T; tmp is work space.

    Inlined into the smoother (``inline="always"``): there the 9 x 9 work arrays have sizes the
    compiler knows, which keeps these loops as fast as when they were written out in the loop.
    """
    # tmp = Ks D = x^T D (loops ordered for contiguous rows)
    for i in range(N):
        for j in range(N):
            pm[i, j] -= ps[i, j]
            tmp[i, j] = 0.0
    for c in range(N):
        for i in range(N):
            xci = x[c, i]
            for j in range(N):
                tmp[i, j] += xci * pm[c, j]
    for i in range(N):
        for j in range(i, N):
            ps[i, j] = pk[i, j]
        for c in range(N):
            tic = tmp[i, c]
            for j in range(i, N):
                ps[i, j] -= tic * x[c, j]
        for j in range(i + 1, N):
            ps[j, i] = ps[i, j]


@njit(cache=True, error_model="numpy")
def smoother_pass(mode, t, u, r, prm, q_f, v_f, db_f, p_f, out_idx,
                  q_s, v_s, db_s, p_s6, p_sfull):
    """Rauch-Tung-Striebel smoother in error-state form over the stored forward pass.

    ``Ks = P+_k Phi^T (P-_{k+1})^-1``; ``dx_k = Ks (x_s,k+1 [-] x-_{k+1})`` with the attitude part
    the small rotation from the predicted to the smoothed quaternion; ``P_s,k = P+_k - Ks (P-_{k+1} -
    P_s,k+1) Ks^T`` (Crassidis & Junkins 2012 ex. 5.1). The correction is applied multiplicatively
    to the forward quaternion. p_f (K, NP) holds the forward covariances packed as by
    :func:`forward_pass`. q_s, v_s, db_s (K, .) are filled for every step; p_s6 (M, 6, 6)
    receives the attitude/rate block at steps with out_idx[k] >= 0 (its row). When p_sfull has K
    rows the full smoothed covariance is stored too.
    Returns the number of steps where P- was not positive definite (smoother gain set to zero).
    """
    kk = t.shape[0]
    qm, vm, dbm = np.empty(4), np.empty(3), np.empty(3)
    m = np.empty((N, N))
    pm = np.empty((N, N))
    blk = np.zeros((3, 6))
    w3 = np.empty(3)
    phi = np.zeros((N, N))
    qd = np.zeros((N, N))
    pk = np.empty((N, N))
    ps = np.empty((N, N))
    lwork = np.zeros((N, N))
    x = np.zeros((N, N))
    tmp = np.zeros((N, N))
    dx1 = np.zeros(N)
    dxk = np.zeros(N)
    qc = np.empty(4)
    bad = 0
    # the last step: the smoothed estimate is the forward one
    unpack_into(p_f[kk - 1], ps)
    q_s[kk - 1, :] = q_f[kk - 1]
    v_s[kk - 1, :] = v_f[kk - 1]
    db_s[kk - 1, :] = db_f[kk - 1]
    store_full = p_sfull.shape[0] == kk
    if out_idx[kk - 1] >= 0:
        p_s6[out_idx[kk - 1], :, :] = ps[0:6, 0:6]
    if store_full:
        p_sfull[kk - 1, :, :] = ps
    for k in range(kk - 2, -1, -1):
        unpack_into(p_f[k], pk)
        predict_into(mode, k, q_f[k], v_f[k], db_f[k], t, u, r, prm, pk, qm, vm, dbm, m, pm, blk, w3, phi, qd)
        # error of the smoothed state at k+1 relative to the prediction
        ax, ay, az, aw = q_s[k + 1, 0], q_s[k + 1, 1], q_s[k + 1, 2], q_s[k + 1, 3]
        dx1[0], dx1[1], dx1[2] = attitude_error_rotvec(ax, ay, az, aw, qm)
        for i in range(3):
            dx1[3 + i] = v_s[k + 1, i] - vm[i]
            dx1[6 + i] = db_s[k + 1, i] - dbm[i]
        # Ks^T = (P-)^-1 (Phi P+)   (P symmetric), m = Phi P+; no smoothing where P- is not positive definite
        if not cholesky_solve(pm, m, lwork, x):
            bad += 1
            for i in range(N):
                for j in range(N):
                    x[i, j] = 0.0
        # dx_k = Ks dx1, applied multiplicatively to the forward attitude
        for i in range(N):
            dxk[i] = 0.0
        for c in range(N):
            d1 = dx1[c]
            for i in range(N):
                dxk[i] += x[c, i] * d1
        rot_step_into(-dxk[0], -dxk[1], -dxk[2], q_f[k], qc)
        for i in range(4):
            q_s[k, i] = qc[i]
        for i in range(3):
            v_s[k, i] = v_f[k, i] + dxk[3 + i]
            db_s[k, i] = db_f[k, i] + dxk[6 + i]
        smoothed_covariance_into(ps, pk, pm, x, tmp)
        if out_idx[k] >= 0:
            row = out_idx[k]
            for i in range(6):
                for j in range(6):
                    p_s6[row, i, j] = ps[i, j]
        if store_full:
            p_sfull[k, :, :] = ps
    return bad
