"""The magnetometer model's parameters: their layout in one vector, the |b| residual and its Jacobian.

Model, in the magnetometer's own (sensor) axes::

    m_k = S b_k + b0 + K i_k + n_k,        |b_k| = h_k

with ``m_k`` the measured field (nT), ``b_k`` the true field (nT) whose magnitude ``h_k`` the
reference field gives, ``S`` symmetric (soft iron, scale and skew), ``b0`` the bias (nT), ``K`` the
crosstalk (nT per A, row = sensor axis, column = coil) and ``i_k`` the coil currents (A) the sample
saw. The 18 parameters sit in one vector in the order of ``PARAM_NAMES``; ``ParamIndex`` names the
positions: the bias (3, nT), the six elements of ``S`` (xx, yy, zz, xy, xz, yz) and ``K`` row-major.

Residual: ``r_k = |S^-1 (m_k - b0 - K i_k)| - h_k`` (nT).

Jacobian (analytic): with ``P = S^-1``, ``u = P (m - b0 - K i)`` and ``w = P u / |u|``,
``dr/db0 = -w``, ``dr/dK_jl = -w_j i_l``, ``dr/dS_aa = -w_a u_a`` and
``dr/dS_ab = -(w_a u_b + w_b u_a)`` for a != b (from ``dP = -P dS P``).

References
----------
Alonso, R. and Shuster, M. D. (2002). TWOSTEP: a fast robust algorithm for attitude-independent
magnetometer-bias determination. J. Astronaut. Sci. 50(4), 433-452.
"""

from __future__ import annotations

import numpy as np

__all__ = ["AXES", "SYM_INDEX", "sym_from_six", "six_from_sym", "ParamIndex", "PARAM_NAMES", "N_PARAMS",
           "crosstalk_name", "nominal_params", "params_from_matrices", "matrices_from_params", "residual_nT",
           "jacobian"]

AXES = ("x", "y", "z")
# Order of the six independent elements of a symmetric 3x3 matrix: xx, yy, zz, xy, xz, yz.
SYM_INDEX = ((0, 0), (1, 1), (2, 2), (0, 1), (0, 2), (1, 2))


def sym_from_six(v: np.ndarray) -> np.ndarray:
    """Symmetric 3x3 matrix from its six elements in the order xx, yy, zz, xy, xz, yz."""
    m = np.empty((3, 3))
    for n, (a, b) in enumerate(SYM_INDEX):
        m[a, b] = m[b, a] = v[n]
    return m


def six_from_sym(m: np.ndarray) -> np.ndarray:
    """The six elements xx, yy, zz, xy, xz, yz of a symmetric 3x3 matrix."""
    return np.array([m[a, b] for a, b in SYM_INDEX])


class ParamIndex:
    """Positions in the 18-parameter vector (the order of ``PARAM_NAMES``)."""

    BIAS = slice(0, 3)  # b0, nT, sensor axes x, y, z
    SOFT_IRON = slice(3, 9)  # S, in the order of SYM_INDEX
    SOFT_IRON_DIAGONAL = slice(3, 6)
    CROSSTALK = slice(9, 18)  # K, nT per A, row-major: sensor axis, then coil
    CROSSTALK_START = 9
    SIZE = 18

    @staticmethod
    def crosstalk(axis: int, coil: int) -> int:
        """Position of ``K[axis, coil]``."""
        return ParamIndex.CROSSTALK_START + 3 * axis + coil


def crosstalk_name(axis: int, coil: int) -> str:
    """The name of ``K[axis, coil]``: ``crosstalk_<sensor axis>_coil_<coil>``."""
    return f"crosstalk_{AXES[axis]}_coil_{AXES[coil]}"


PARAM_NAMES = tuple(
    [f"bias_{a}" for a in AXES]
    + [f"soft_iron_{AXES[a]}{AXES[b]}" for a, b in SYM_INDEX]
    + [crosstalk_name(j, c) for j in range(3) for c in range(3)]
)
N_PARAMS = len(PARAM_NAMES)  # 18


def nominal_params() -> np.ndarray:
    """The parameter vector of a perfect sensor: zero bias, S = I, K = 0."""
    p = np.zeros(N_PARAMS)
    p[ParamIndex.SOFT_IRON_DIAGONAL] = 1.0
    return p


def params_from_matrices(bias_nT, soft_iron, crosstalk_nT_per_A) -> np.ndarray:
    """The 18-vector from bias_nT (3,), soft_iron (3, 3, symmetric) and crosstalk_nT_per_A (3, 3)."""
    return np.concatenate([np.asarray(bias_nT, float), six_from_sym(np.asarray(soft_iron, float)),
                           np.asarray(crosstalk_nT_per_A, float).ravel()])


def matrices_from_params(p: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(bias_nT (3,), soft_iron (3, 3), crosstalk_nT_per_A (3, 3)) from the 18-vector."""
    return (p[ParamIndex.BIAS].copy(), sym_from_six(p[ParamIndex.SOFT_IRON]),
            p[ParamIndex.CROSSTALK].reshape(3, 3).copy())


# Soft-iron matrices with an eigenvalue below this are not a sensor (the solver may step there while
# exploring a flat direction); they get the pseudo-inverse and a residual the solver will reject.
_MIN_EIGENVALUE = 1e-3


def _corrected_field(p, m, i):
    """``u = S^-1 (m - b0 - K i)`` (N, 3), its norm (N,) and ``w = S^-1 u / |u|`` (N, 3)."""
    bias, s, k = matrices_from_params(p)
    if np.linalg.eigvalsh(s)[0] < _MIN_EIGENVALUE:
        pinv = np.linalg.pinv(s) if np.all(np.isfinite(s)) else np.zeros((3, 3))
    else:
        pinv = np.linalg.inv(s)
    y = m - bias - i @ k.T
    u = y @ pinv.T
    nu = np.linalg.norm(u, axis=1)
    w = (u @ pinv.T) / np.where(nu > 0, nu, 1.0)[:, None]
    return u, nu, w


def residual_nT(p: np.ndarray, m_sensor_nT: np.ndarray, h_nT: np.ndarray, i_coil_A: np.ndarray) -> np.ndarray:
    """r_k = |S^-1 (m_k - b0 - K i_k)| - h_k, nT, for the 18-parameter vector ``p``."""
    _, nu, _ = _corrected_field(p, m_sensor_nT, i_coil_A)
    return nu - h_nT


def jacobian(p: np.ndarray, m_sensor_nT: np.ndarray, i_coil_A: np.ndarray) -> np.ndarray:
    """d r_k / d p (N, 18), analytic (see the module notes); ``r`` as in :func:`residual_nT`."""
    u, _, w = _corrected_field(p, m_sensor_nT, i_coil_A)
    j = np.empty((len(m_sensor_nT), N_PARAMS))
    j[:, ParamIndex.BIAS] = -w
    for n, (a, b) in enumerate(SYM_INDEX):
        j[:, ParamIndex.SOFT_IRON.start + n] = (-w[:, a] * u[:, a] if a == b
                                                else -(w[:, a] * u[:, b] + w[:, b] * u[:, a]))
    for axis in range(3):
        for coil in range(3):
            j[:, ParamIndex.crosstalk(axis, coil)] = -w[:, axis] * i_coil_A[:, coil]
    return j
