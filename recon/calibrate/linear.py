"""Linear, attitude-independent first guess of magnetometer bias, soft iron and coil crosstalk.

The centred linear step of TWOSTEP (Alonso & Shuster 2002), extended with coil-current terms. All
quantities are in the magnetometer's own (sensor) axes.

Model
-----
``m_k = S b_k + beta_k + n_k`` with ``beta_k = b0 + K i_k``: ``m_k`` the measured field (nT),
``b_k`` the true field (nT), ``S`` symmetric positive definite (soft iron, scale and skew), ``b0``
the bias (nT), ``K`` the crosstalk (nT per A, one column per coil) and ``i_k`` the coil currents (A)
that sample saw. The true field is ``b_k = P (m_k - beta_k)`` with ``P = S^-1`` and, whatever the
attitude, ``|b_k| = h_k``, the magnitude of the reference field.

Derivation of the linear form
-----------------------------
With ``Q = P^2 = I + E`` (so ``P = I + D``, ``E = 2 D + D^2`` in Alonso & Shuster's notation),
squaring ``|P (m_k - beta_k)|^2 = h_k^2`` gives

    z_k = |m_k|^2 - h_k^2 = -m_k^T E m_k + 2 m_k^T Q beta_k - beta_k^T Q beta_k.

Without currents this is Alonso & Shuster's eq. for ``z_k``: ``2 m_k^T c - |b|^2`` with
``c = Q b0`` and ``|b|^2 = b0^T Q b0 = c^T Q^-1 c``, the squared bias after the soft-iron correction
(constant over the pass). With currents, ``beta_k = b0 + K i_k`` and

    2 m_k^T Q beta_k     = 2 m_k^T c + 2 m_k^T G i_k,                 G = Q K,
    beta_k^T Q beta_k    = kappa + a^T i_k + i_k^T F i_k,             kappa = b0^T Q b0,
                                                                      a = 2 K^T Q b0, F = K^T Q K.

``z_k`` is therefore linear in the combination ``theta = (E, c, G, a, F, kappa)``: 6 + 3 + 9 + 3 + 6 +
1 = 28 numbers, whose regressors are ``m_j m_l``, ``m_j``, ``m_j i_l``, ``i_l``, ``i_l i_m`` and 1.
The nonlinear ties between them (``a`` and ``F`` are functions of ``E``, ``c`` and ``G``) are
dropped: ``a``, ``F`` and ``kappa`` become free nuisance parameters. That is what makes the step
linear, at the price of a few degrees of freedom; the nonlinear refinement that follows restores the
exact model. ``kappa`` (and any constant noise mean of ``z_k``) is removed by centring, as in
TWOSTEP: subtract the weighted mean of ``z`` and of every regressor. From the estimate,
``Q = I + E`` gives ``P = U diag(sqrt(s_i)) U^T`` (``Q = U diag(s_i) U^T``; TWOSTEP's
``D = U diag(-1 + sqrt(1 + e_i)) U^T``), ``S = P^-1``, ``b0 = Q^-1 c`` and ``K = Q^-1 G``.

Without noise the linear form is exact, so the step recovers the parameters to rounding error
whenever the regressors are not collinear.

Weights follow TWOSTEP: the variance of ``z_k`` for isotropic noise of variance ``sigma^2`` per axis
is ``4 sigma^2 |b_k|^2 + 6 sigma^4``, with ``|m_k|`` standing in for ``|b_k|``.

References
----------
Alonso, R. and Shuster, M. D. (2002). TWOSTEP: a fast robust algorithm for attitude-independent
magnetometer-bias determination. Journal of the Astronautical Sciences 50(4), 433-452.
Alonso, R. and Shuster, M. D. (2002). Complete linear attitude-independent magnetometer calibration.
Journal of the Astronautical Sciences 50(4), 477-490.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .model import SYM_INDEX

__all__ = ["LinearCalibration", "linear_calibration"]

@dataclass(frozen=True)
class LinearCalibration:
    """Result of the centred linear step.

    Attributes
    ----------
    bias_nT : (3,) array, nT, sensor axes
    soft_iron : (3, 3) array, dimensionless, sensor axes (S, symmetric)
    crosstalk_nT_per_A : (3, 3) array, nT per A; column l is coil l
    q_eigenvalues : (3,) array
        Eigenvalues of ``Q = I + E``; all must be positive for ``S`` to exist. Non-positive values
        (possible with very noisy or degenerate data) are clipped and ``positive_definite`` is False.
    positive_definite : bool
    rank : int
        Numerical rank of the centred, weighted design matrix.
    n_columns : int
        Number of unknowns in the linear problem (after centring).
    """

    bias_nT: np.ndarray
    soft_iron: np.ndarray
    crosstalk_nT_per_A: np.ndarray
    q_eigenvalues: np.ndarray
    positive_definite: bool
    rank: int
    n_columns: int


def _design(m_nT: np.ndarray, i_A: np.ndarray, coils: np.ndarray) -> tuple[np.ndarray, list[str]]:
    """Regressors of z_k (without the constant): columns for E, c, G, a, F."""
    cols, names = [], []
    for a, b in SYM_INDEX:
        cols.append(-m_nT[:, a] * m_nT[:, b] * (1.0 if a == b else 2.0))
        names.append(f"E{a}{b}")
    for j in range(3):
        cols.append(2.0 * m_nT[:, j])
        names.append(f"c{j}")
    used = [c for c in range(3) if coils[c]]
    for j in range(3):
        for c in used:
            cols.append(2.0 * m_nT[:, j] * i_A[:, c])
            names.append(f"G{j}{c}")
    for c in used:
        cols.append(-i_A[:, c])
        names.append(f"a{c}")
    for n, c in enumerate(used):
        for d in used[n:]:
            cols.append(-i_A[:, c] * i_A[:, d] * (1.0 if c == d else 2.0))
            names.append(f"F{c}{d}")
    return np.column_stack(cols), names


def linear_calibration(m_sensor_nT: np.ndarray, h_nT: np.ndarray, i_coil_A: np.ndarray | None = None,
                       *, coils: np.ndarray | None = None, sigma_nT: float = 1.0,
                       rcond: float = 1e-12) -> LinearCalibration:
    """Centred linear (TWOSTEP first step) estimate of bias, soft iron and crosstalk.

    Parameters
    ----------
    m_sensor_nT : (N, 3) array, nT, sensor axes
        Measured field, finite rows only.
    h_nT : (N,) array, nT
        Magnitude of the reference field at the same instants.
    i_coil_A : (N, 3) array, A, optional
        Effective coil currents each sample saw (finite). None: no coil terms.
    coils : (3,) bool array, optional
        Which coils' crosstalk columns to estimate; the others are fixed at zero (a coil whose
        current never varies cannot be told apart from the bias). Default: all, if currents given.
    sigma_nT : float
        Magnetometer noise, 1 sigma per axis, nT; sets the TWOSTEP weights (its overall scale does
        not change the estimate).
    rcond : float
        Relative cut-off for small singular values of the column-normalised design matrix.

    Returns
    -------
    LinearCalibration

    References
    ----------
    Alonso & Shuster (2002), TWOSTEP, J. Astronaut. Sci. 50(4):433-452, the centred estimate.
    """
    m = np.asarray(m_sensor_nT, dtype=float)
    h = np.asarray(h_nT, dtype=float)
    n = len(m)
    i = np.zeros((n, 3)) if i_coil_A is None else np.asarray(i_coil_A, dtype=float)
    if coils is None:
        coils = np.full(3, i_coil_A is not None)
    coils = np.asarray(coils, dtype=bool)

    z = np.sum(m * m, axis=1) - h * h
    x, names = _design(m, i, coils)
    # TWOSTEP weights 1 / sigma_z^2 with sigma_z^2 = 4 sigma^2 |B|^2 + 6 sigma^4.
    w = 1.0 / (4.0 * sigma_nT**2 * np.sum(m * m, axis=1) + 6.0 * sigma_nT**4)
    w = w / w.sum()
    # Centring removes kappa = |b|^2 and any constant mean of the noise in z.
    x = x - w @ x
    z = z - w @ z
    sw = np.sqrt(w)
    xw = x * sw[:, None]
    zw = z * sw
    scale = np.linalg.norm(xw, axis=0)
    scale[scale == 0] = 1.0
    theta, _, rank, _ = np.linalg.lstsq(xw / scale, zw, rcond=rcond)
    theta = theta / scale
    est = dict(zip(names, theta, strict=True))

    e = np.zeros((3, 3))
    for a, b in SYM_INDEX:
        e[a, b] = e[b, a] = est[f"E{a}{b}"]
    c = np.array([est[f"c{j}"] for j in range(3)])
    g = np.zeros((3, 3))
    for j in range(3):
        for col in range(3):
            g[j, col] = est.get(f"G{j}{col}", 0.0)

    q = np.eye(3) + e
    s_q, u = np.linalg.eigh(q)
    positive = bool(np.all(s_q > 0))
    s_clip = np.clip(s_q, 1e-6, None)
    q_inv = (u / s_clip) @ u.T
    soft_iron = (u / np.sqrt(s_clip)) @ u.T
    soft_iron = 0.5 * (soft_iron + soft_iron.T)
    return LinearCalibration(
        bias_nT=q_inv @ c,
        soft_iron=soft_iron,
        crosstalk_nT_per_A=q_inv @ g,
        q_eigenvalues=s_q,
        positive_definite=positive,
        rank=int(rank),
        n_columns=x.shape[1],
    )
