"""Compiled inner loops of the attitude filter: propagation, vector update, forward pass, RTS smoother.

Plain float arrays in, plain float arrays out; every function is a pure function of its arguments
(the output arrays are filled in place and are the only thing written). Units: s, rad, rad/s, nT,
A m^2, N m, m^3/s^2; frames as in :mod:`recon.core.frames`.

Quaternions are scalar-last and follow scipy's convention (see :mod:`.algebra`).

Error state (the multiplicative EKF of Lefferts, Markley & Shuster 1982): ``dx = [dtheta, dv, db]``
with ``A_true = (I - [dtheta x]) A_est`` (the attitude error in body axes, as in Markley & Crassidis
2014 ch. 6), ``dv`` the error of the gyro bias (gyro mode) or of the body rate (dynamics mode),
and ``db`` the error of the estimated field-model error (GCRF, nT). The error state always has N = 9
components (constant loop bounds let the compiler unroll the small matrix products).

Modules, by job: :mod:`.layout` (index constants), :mod:`.algebra` (quaternions, cross products,
Cholesky), :mod:`.propagation` (gyro and rigid-body propagation, Jacobians, process noise),
:mod:`.update` (magnetometer update), :mod:`.passes` (forward pass, smoother).

References
----------
Lefferts, E. J., Markley, F. L. and Shuster, M. D. (1982). Kalman filtering for spacecraft attitude
estimation. J. Guidance 5(5), 417-429.
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Ch. 6.
"""

from .algebra import attitude_matrix, qmul, qnormalize, quat_from_rotvec, rotvec_from_quat
from .layout import (
    MODE_DYNAMICS,
    MODE_GYRO,
    N_PRM,
    NP,
    P_ACC,
    P_HNOM,
    P_J,
    P_JINV,
    P_MU,
    P_SIGF,
    P_SIGM,
    P_SIGTAU,
    P_SU,
    P_SV,
    P_TAUF,
    P_TAUREL,
    N,
)
from .passes import forward_pass, smoother_pass, unpack_covariance
from .propagation import dynamics_jacobian, gyro_transition, propagate_dynamics, propagate_gyro, rk4_rigid_body
from .update import vector_update

__all__ = [
    "MODE_DYNAMICS", "MODE_GYRO", "N", "N_PRM", "NP",
    "P_ACC", "P_HNOM", "P_J", "P_JINV", "P_MU", "P_SIGF", "P_SIGM", "P_SIGTAU", "P_SU", "P_SV", "P_TAUF",
    "P_TAUREL",
    "attitude_matrix", "qmul", "qnormalize", "quat_from_rotvec", "rotvec_from_quat",
    "dynamics_jacobian", "gyro_transition", "propagate_dynamics", "propagate_gyro", "rk4_rigid_body",
    "vector_update", "forward_pass", "smoother_pass", "unpack_covariance",
]
