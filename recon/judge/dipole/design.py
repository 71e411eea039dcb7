"""The design of the integrated equation: regressors, segments, design matrix and whiteners.

Euler's equation ``J dw/dt + w x (J w) = (C i) x B + tau_gg + m_r x B + d`` integrated over an
interval ``[t1, t2]`` is linear in the nine entries of C::

    J (w(t2) - w(t1)) + int (w x J w) dt - int tau_gg dt = -int [B x] C i dt - int [B x] dt m_r + d (t2 - t1)

with ``[B x] C i = (i^T (x) [B x]) vec(C)`` (column-major vec, Kronecker product). The residual dipole
m_r (A m^2) and a constant disturbance torque d (N m) are optional extra unknowns.

Intervals. The evaluation instants (the control ticks) are grouped into short segments of about 30
instants. Within a segment starting at s, every instant t_j gives the equation over [s, t_j] with
J w(s) treated as one more unknown per segment, eliminated by demeaning within the segment
(Frisch-Waugh-Lovell, see :mod:`.solve`). Every pair of instants in a segment is then an interval
[t1, t2] of the integrated equation, while each rate sample enters once; with white rate errors this
is the efficient use of the data, and segments keep slow model errors (disturbances, inertia) from
accumulating.

Integrals. The applied current is piecewise constant: the logged command held from its log
instant (shifted by the actuation latency), switched off inside the coil-off windows of windowed
sampling. Between consecutive switching instants ``int [B x] C i dt = [(F(b) - F(a)) x] C i`` with F
the antiderivative of a cubic spline through the body-frame field, so the duty cycle and any latency
enter exactly; ``w x J w`` and the gravity-gradient torque are integrated through their own splines.

Rate bias. Optionally the rate history is allowed a slowly varying bias e(t), piecewise linear in
time (``rate_bias_knot_s``). With ``w = w_hist - e`` the gyroscopic term, to first order in e, moves
``J e(t_j) + int G(w_hist) e dt`` to the right-hand side (G the Jacobian of ``w x J w``), which is
linear in the knot values. A gyro bias left wrong by the attitude estimator enters the equation
exactly this way, and a latency could otherwise imitate part of it.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer, sec. 3.3.5 (Euler's equations), 3.3.6 (gravity-gradient torque).
Magnus, J. R. and Neudecker, H. (2019). Matrix Differential Calculus, 3rd ed., ch. 2
(vec(ABC) = (C^T (x) A) vec(B)).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...core import cross_matrices, held_values, in_off_window
from .motion import MotionSplines

__all__ = ["Design", "design", "whiteners", "rate_bias_knots_s"]


@dataclass(frozen=True)
class Design:
    """The levels form of the integrated equation at each evaluation instant (see :func:`design`).

    Attributes
    ----------
    y : (n, 3) left-hand side, N m s
    A : (n, 3, p) regressors of the unknowns (vec(C) column-major, then m_r, then d, then the rate
        bias's knot values)
    label : (n,) segment of each instant (-1: unused instant)
    """

    y: np.ndarray
    A: np.ndarray
    label: np.ndarray


def _regressors(mot: MotionSplines, bounds_s: np.ndarray, t_coil_s: np.ndarray, i_coil_A: np.ndarray,
                latency_s: float, gate: tuple[np.ndarray, float, float] | None, max_hold_s: float):
    """Per interval: the current-dipole regressor (n, 3, 9), the residual-dipole one (n, 3, 3) and
    a validity flag (current known over the whole interval)."""
    t_on = np.asarray(t_coil_s, float) + latency_s
    t0, t1 = bounds_s[0], bounds_s[-1]
    inside = t_on[(t_on > t0) & (t_on < t1)]
    parts = [bounds_s, inside]
    if gate is not None:
        ticks, before, after = gate
        sel = ticks[(ticks > t0 - before - after - 1) & (ticks < t1 + before + after + 1)]
        parts += [sel - before, sel + after]
    ev = np.unique(np.concatenate(parts))
    ev = ev[(ev >= t0) & (ev <= t1)]
    a, b = ev[:-1], ev[1:]
    mid = 0.5 * (a + b)
    cur = held_values(t_on, i_coil_A, mid, max_age=max_hold_s)
    unknown = ~np.all(np.isfinite(cur), 1)
    cur[unknown] = 0.0
    if gate is not None:
        cur[in_off_window(mid, *gate)] = 0.0
    dF = mot.F_B(b) - mot.F_B(a)                       # (cells, 3) T s
    cell_int = np.searchsorted(bounds_s, mid, side="right") - 1
    n = len(bounds_s) - 1
    X = cross_matrices(dF)                            # int [B x] dt over the cell
    # -int [B x] C i dt = -(i^T (x) int[B x] dt) vec(C)
    rows = -(cur[:, :, None, None] * X[:, None, :, :])  # (cells, 3 coils, 3, 3)
    rows = np.transpose(rows, (0, 2, 1, 3)).reshape(len(mid), 3, 9)
    # rows[:, r, 3 j + l] = -i_j [X]_{r l}: the coefficient of C[l, j], i.e. vec(C) column-major
    A_C = np.zeros((n, 3, 9))
    np.add.at(A_C, cell_int, rows)
    A_m = np.zeros((n, 3, 3))
    np.add.at(A_m, cell_int, -X)
    bad = np.zeros(n, bool)
    np.logical_or.at(bad, cell_int, unknown)
    return A_C, A_m, ~bad


def _interval_left_side(mot: MotionSplines, t_eval: np.ndarray) -> np.ndarray:
    """Per interval between consecutive evaluation instants: int (w x J w) dt - int tau_gg dt."""
    y = mot.F_gyro(t_eval[1:]) - mot.F_gyro(t_eval[:-1])
    if mot.F_gg is not None:
        y -= mot.F_gg(t_eval[1:]) - mot.F_gg(t_eval[:-1])
    return y


def rate_bias_knots_s(t0_s: float, t1_s: float, knot_spacing_s: float | None) -> np.ndarray | None:
    """Knots of the piecewise-linear rate bias: evenly spaced over ``[t0, t1]``, at most
    ``knot_spacing_s`` apart, at least two (a straight line); None when ``knot_spacing_s`` is None."""
    if knot_spacing_s is None:
        return None
    n = max(int(np.ceil((t1_s - t0_s) / knot_spacing_s - 1e-9)), 1) + 1
    return np.linspace(t0_s, t1_s, n)


def _rate_bias_regressors(mot: MotionSplines, t_eval: np.ndarray, inertia: np.ndarray, knots: np.ndarray):
    """Regressors of a piecewise-linear rate bias ``e(t) = sum_k phi_k(t) e_k`` (hat functions on
    ``knots``) in the levels form of the integrated equation.

    The rate history is ``w_hist = w + e``. Euler's equation in the true rate, expanded to first
    order in e (the gyroscopic term ``g(w) = w x J w`` has Jacobian ``G(w) = [w x] J - [(J w) x]``),
    moves the bias to the right-hand side as ``J e(t_j) + int_s^t_j G(w_hist) e dt``; with G linear
    in w, ``int G(w) phi_k dt = G(int phi_k w dt)``.

    Returns
    -------
    A_int : (n - 1, 3, 3 K) the integral part over each interval between evaluation instants
    A_lev : (n, 3, 3 K) the level part ``J phi_k(t_j)`` at each instant
    """
    nk = len(knots)
    inside = knots[(knots > t_eval[0]) & (knots < t_eval[-1])]
    ev = np.unique(np.concatenate([t_eval, inside]))
    a, b = ev[:-1], ev[1:]
    mid = 0.5 * (a + b)
    W0 = mot.F_w(b) - mot.F_w(a)                     # int w dt over the cell, rad
    W1 = mot.F_tw(b) - mot.F_tw(a)                   # int t w dt, rad s
    m = np.clip(np.searchsorted(knots, mid, side="right") - 1, 0, nk - 2)
    k0, k1 = knots[m], knots[m + 1]
    h = (k1 - k0)[:, None]
    Wk = ((k1[:, None] * W0 - W1) / h, (W1 - k0[:, None] * W0) / h)   # int phi_m w dt, int phi_m+1 w dt
    cell_int = np.searchsorted(t_eval, mid, side="right") - 1
    A_int = np.zeros((len(t_eval) - 1, 3, 3 * nk))
    for W, kk in zip(Wk, (m, m + 1), strict=True):
        G = cross_matrices(W) @ inertia - cross_matrices(W @ inertia.T)
        for c in range(3):
            np.add.at(A_int, (cell_int, slice(None), 3 * kk + c), G[:, :, c])
    phi = np.column_stack([np.interp(t_eval, knots, np.eye(nk)[k]) for k in range(nk)])   # (n, K)
    A_lev = (phi[:, :, None, None] * inertia[None, None, :, :]).transpose(0, 2, 1, 3).reshape(len(t_eval), 3, 3 * nk)
    return A_int, A_lev


def _segments(valid_interval: np.ndarray, segment_points: int) -> np.ndarray:
    """Segment label of each evaluation instant (-1: in no segment). A segment is a run of at most
    ``segment_points`` instants joined by valid intervals."""
    n = len(valid_interval) + 1
    label = np.full(n, -1)
    seg, count = -1, 0
    for k in range(n):
        joined = k > 0 and valid_interval[k - 1] and count < segment_points
        if joined:
            count += 1
        else:
            seg, count = seg + 1, 1
        label[k] = seg
    sizes = np.bincount(label)
    label[sizes[label] < 2] = -1
    _, label[label >= 0] = np.unique(label[label >= 0], return_inverse=True)
    return label


def _shape_regressors(mot: MotionSplines, t_eval: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Regressors of the inertia's shape ``J = J_0 + sum_k p_k E_k`` in the levels form.

    The left-hand side ``J w(t_j) + int (w x J w - tau_gg(J)) dt`` is linear in J; the part from
    ``p_k E_k`` moves to the right-hand side as ``-(E_k w(t_j) + int (w x E_k w - tau_gg(E_k)) dt)``.

    Returns
    -------
    A_int : (n - 1, 3, 5) the integral part over each interval between evaluation instants
    A_lev : (n, 3, 5) the level part at each instant
    """
    F = mot.F_shape(t_eval).reshape(len(t_eval), 5, 3)
    A_int = -np.transpose(F[1:] - F[:-1], (0, 2, 1))
    A_lev = -np.einsum("kij,nj->nik", mot.shape_basis, mot.w(t_eval))
    return A_int, A_lev


def design(mot: MotionSplines, t_eval: np.ndarray, inertia: np.ndarray, t_coil_s, i_coil_A, latency_s, gate,
           max_hold_s, residual_dipole, torque_bias, segment_points, knots=None, inertia_shape=False):
    """Levels form of the integrated equation within each segment (start instant s)::

        J w(t_j) + int_s^t_j (w x J w - tau_gg) dt = J w(s) + A_j theta + e_j

    The unknowns theta: vec(C), then m_r and d (when asked), then the five inertia-shape
    coefficients (``inertia_shape``), then the rate bias's knot values (``knots``).
    Returns the :class:`Design` (y, A and the segment label of each instant)."""
    A_C, A_m, ok = _regressors(mot, t_eval, t_coil_s, i_coil_A, latency_s, gate, max_hold_s)
    blocks = [A_C]
    if residual_dipole:
        blocks.append(A_m)
    if torque_bias:
        blocks.append(np.broadcast_to(np.eye(3) * np.diff(t_eval)[:, None, None], (len(t_eval) - 1, 3, 3)))
    levels = []
    if inertia_shape:
        A_s, A_s_lev = _shape_regressors(mot, t_eval)
        blocks.append(A_s)
        levels.append((sum(blk.shape[2] for blk in blocks[:-1]), A_s_lev))
    if knots is not None:
        A_e, A_e_lev = _rate_bias_regressors(mot, t_eval, inertia, knots)
        blocks.append(A_e)
        levels.append((sum(blk.shape[2] for blk in blocks[:-1]), A_e_lev))
    A_int = np.concatenate(blocks, axis=2)
    A_lev = None
    if levels:
        A_lev = np.zeros((len(t_eval), 3, A_int.shape[2]))
        for col, lev in levels:
            A_lev[:, :, col:col + lev.shape[2]] = lev
    g_int = _interval_left_side(mot, t_eval)
    ok &= np.all(np.isfinite(g_int), axis=1) & np.all(np.isfinite(A_int), axis=(1, 2))
    A_int = np.where(ok[:, None, None], A_int, 0.0)
    g_int = np.where(ok[:, None], g_int, 0.0)
    label = _segments(ok, segment_points)
    A_cum = np.concatenate([np.zeros((1,) + A_int.shape[1:]), np.cumsum(A_int, axis=0)])
    g_cum = np.concatenate([np.zeros((1, 3)), np.cumsum(g_int, axis=0)])
    first = np.zeros(len(t_eval), int)
    used = label >= 0
    starts = np.nonzero(used & np.r_[True, label[1:] != label[:-1]])[0]
    first[used] = starts[label[used]]
    A = A_cum - A_cum[first]
    if A_lev is not None:
        A = A + A_lev - A_lev[first]
    y = mot.w(t_eval) @ inertia.T + g_cum - g_cum[first]
    return Design(y, A, label)


def whiteners(mot: MotionSplines, t_eval: np.ndarray, inertia: np.ndarray) -> np.ndarray | None:
    """Inverse Cholesky factors (n, 3, 3) of J P J^T at each instant, or None (ordinary LS)."""
    if mot.P is None:
        return None
    idx = np.clip(np.searchsorted(mot.t_s, t_eval), 0, len(mot.t_s) - 1)
    S = inertia @ mot.P[idx] @ inertia.T
    S = 0.5 * (S + np.swapaxes(S, 1, 2))
    return np.linalg.inv(np.linalg.cholesky(S + 1e-30 * np.eye(3)))
