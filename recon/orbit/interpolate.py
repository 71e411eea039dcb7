"""Piecewise Lagrange and Hermite interpolation on a moving window of nodes, as a CCSDS OEM's
``INTERPOLATION`` names them (``LINEAR`` is Lagrange of degree 1).

References
----------
Hildebrand, F. B. (1974), Introduction to Numerical Analysis, 2nd ed., sec. 8.2 (Hermite
interpolation).
"""

from __future__ import annotations

import numpy as np

__all__ = ["lagrange_interpolate", "hermite_interpolate"]


def _windows(t_nodes_s: np.ndarray, t_s: np.ndarray, m: int) -> np.ndarray:
    """Start index of the m-node window centred on each sample's interval, (K,) int."""
    n = len(t_nodes_s)
    i = np.clip(np.searchsorted(t_nodes_s, t_s, side="right") - 1, 0, max(n - 2, 0))
    return np.clip(i + 1 - m // 2, 0, n - m)


def _basis(tw: np.ndarray, x: np.ndarray, with_derivative: bool):
    """Lagrange basis L_j(x) (K, m) on nodes tw (K, m), and optionally dL_j/dx (K, m).

    Products of (x - t_l)/(t_j - t_l) over l != j: stable at and near the nodes.
    """
    k, m = tw.shape
    den = tw[:, :, None] - tw[:, None, :]  # t_j - t_l
    eye = np.eye(m, dtype=bool)
    den = np.where(eye, 1.0, den)
    ratio = np.where(eye, 1.0, (x[:, None, None] - tw[:, None, :]) / den)  # (K, j, l)
    basis = np.prod(ratio, axis=2)
    if not with_derivative:
        return basis, None
    d = np.zeros((k, m))
    for l_skip in range(m):
        r = ratio.copy()
        r[:, :, l_skip] = 1.0
        term = np.prod(r, axis=2) / den[:, :, l_skip]
        term[:, l_skip] = 0.0  # l_skip == j is not a term of the sum
        d += term
    return basis, d


def lagrange_interpolate(t_nodes_s: np.ndarray, y_nodes: np.ndarray, t_s: np.ndarray,
                         degree: int) -> np.ndarray:
    """Piecewise Lagrange interpolation on a moving window of ``degree + 1`` nodes.

    Parameters
    ----------
    t_nodes_s : (n,) array, s, strictly increasing
    y_nodes : (n, d) array
    t_s : (K,) array, s, inside [t_nodes_s[0], t_nodes_s[-1]]
    degree : int
        Polynomial degree; reduced to n - 1 when there are fewer nodes.

    Returns
    -------
    (K, d) array
    """
    t_nodes_s = np.asarray(t_nodes_s, dtype=float)
    y_nodes = np.asarray(y_nodes, dtype=float)
    t_s = np.asarray(t_s, dtype=float)
    m = min(degree + 1, len(t_nodes_s))
    start = _windows(t_nodes_s, t_s, m)
    idx = start[:, None] + np.arange(m)
    basis, _ = _basis(t_nodes_s[idx], t_s, False)
    return np.einsum("kj,kjd->kd", basis, y_nodes[idx])


def hermite_interpolate(t_nodes_s: np.ndarray, y_nodes: np.ndarray, dy_nodes: np.ndarray, t_s: np.ndarray,
                        degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Piecewise Hermite interpolation (values and first derivatives) on a moving window.

    A Hermite polynomial of degree ``degree`` matches values and derivatives at
    ``(degree + 1) // 2`` nodes (at least 2): H(x) = sum_j [(1 - 2 c_j (x - t_j)) y_j + (x - t_j) y'_j]
    L_j(x)^2 with c_j = L_j'(t_j) (Hildebrand, Introduction to Numerical Analysis, 2nd ed., 1974,
    sec. 8.2).

    Returns
    -------
    y : (K, d) array
    dy : (K, d) array
        The derivative of the same polynomial.
    """
    t_nodes_s = np.asarray(t_nodes_s, dtype=float)
    y_nodes = np.asarray(y_nodes, dtype=float)
    dy_nodes = np.asarray(dy_nodes, dtype=float)
    t_s = np.asarray(t_s, dtype=float)
    m = min(max((degree + 1) // 2, 2), len(t_nodes_s))
    start = _windows(t_nodes_s, t_s, m)
    idx = start[:, None] + np.arange(m)
    tw = t_nodes_s[idx]
    basis, dbasis = _basis(tw, t_s, True)
    den = tw[:, :, None] - tw[:, None, :]
    eye = np.eye(m, dtype=bool)
    c = np.sum(np.where(eye, 0.0, 1.0 / np.where(eye, 1.0, den)), axis=2)  # L_j'(t_j)
    dx = t_s[:, None] - tw
    l2 = basis * basis
    a = (1.0 - 2.0 * c * dx) * l2
    b = dx * l2
    da = -2.0 * c * l2 + (1.0 - 2.0 * c * dx) * 2.0 * basis * dbasis
    db = l2 + 2.0 * dx * basis * dbasis
    yw, dyw = y_nodes[idx], dy_nodes[idx]
    y = np.einsum("kj,kjd->kd", a, yw) + np.einsum("kj,kjd->kd", b, dyw)
    dy = np.einsum("kj,kjd->kd", da, yw) + np.einsum("kj,kjd->kd", db, dyw)
    return y, dy
