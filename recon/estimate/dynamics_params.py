"""The uncertain parts of the rigid-body model of dynamics mode, as one parameter vector with a prior.

- Inertia shape, five parameters. The mission file's inertia ``J0 = V diag(l0) V^T`` (principal
  moments ``l0`` ascending, axes ``V``) becomes ``J = c R(theta) V diag(l0 * exp([r1, r2, 0])) V^T
  R(theta)^T``: ``r1, r2`` the log-ratios of the two smaller moments to the largest, relative to the
  mission file's, and ``theta`` a small rotation of the principal axes (body axes, rad). The scale
  ``c`` keeps the trace of J0: the overall scale of J trades exactly against the scale of the coil
  dipole (and the gravity-gradient torque scales with J), so the motion cannot tell it.
- Residual dipole of the spacecraft, three parameters, A m^2, body frame: a constant dipole on top of
  the coils'.
- Coil gains, three parameters: the log of each coil's dipole per amp relative to the mission file's
  (``m = C diag(exp(g)) i``). With the trace of J held, these carry the overall scale too: what the
  motion sees is the coil torque over the inertia.
- Actuation latency, one parameter, s: the delay from a command's tick (or log stamp) to the current
  flowing (:mod:`.coil_torque`).

Prior (common practice for a magnetically controlled small satellite, no source): each principal
moment 3 % (1 sigma; the rms of an error spread over 1-5 %), so each log-ratio has variance
``2 s^2`` and the two share ``s^2``; the principal axes 1 deg per axis (a tilt of up to 2 deg); the
residual dipole 5 mA m^2 per axis (1-5 mA m^2 is usual); each coil gain 5 % (a coil's dipole per
amp is typically known to a few percent, and the inertia's overall scale adds its own); the latency
from :mod:`.coil_torque`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial.transform import Rotation

from ..core import RAD_PER_DEG

__all__ = ["ModelLayout", "ModelPrior", "model_prior", "INERTIA_MOMENT_SIGMA", "INERTIA_TILT_SIGMA_RAD",
           "RESIDUAL_DIPOLE_SIGMA_Am2", "COIL_GAIN_SIGMA"]

INERTIA_MOMENT_SIGMA = 0.03
INERTIA_TILT_SIGMA_RAD = 1.0 * RAD_PER_DEG
RESIDUAL_DIPOLE_SIGMA_Am2 = 0.005
COIL_GAIN_SIGMA = 0.05


class ModelLayout:
    """Index layout of the model parameter vector (length ``SIZE``)."""

    MOMENTS = slice(0, 2)   # log-ratios of the two smaller principal moments to the largest
    TILT = slice(2, 5)      # rotation of the principal axes, rad, body axes
    DIPOLE = slice(5, 8)    # residual dipole, A m^2, body frame
    COIL_GAIN = slice(8, 11)  # log of each coil's dipole per amp relative to the mission file's
    LATENCY = 11            # actuation latency, s
    SIZE = 12
    COILS = (8, 9, 10, 11)  # the parameters that act only through the coils
    NAMES = ("moment_ratio_1", "moment_ratio_2", "axes_tilt_x_rad", "axes_tilt_y_rad", "axes_tilt_z_rad",
             "residual_dipole_x_Am2", "residual_dipole_y_Am2", "residual_dipole_z_Am2", "coil_gain_x",
             "coil_gain_y", "coil_gain_z", "latency_s")


@dataclass(frozen=True)
class ModelPrior:
    """The mission file's model and the prior of the parameters around it.

    Attributes
    ----------
    inertia0_kg_m2 : (3, 3) the mission file's inertia
    mean : (SIZE,) prior mean (zero shape change and dipole; the latency prior's mean)
    sqrt_cov : (SIZE, SIZE) lower-triangular L with prior covariance L L^T
    """

    inertia0_kg_m2: np.ndarray
    mean: np.ndarray
    sqrt_cov: np.ndarray

    def inertia(self, p: np.ndarray) -> np.ndarray:
        """The inertia of parameters ``p``, kg m^2, with the trace of the mission file's."""
        j0 = self.inertia0_kg_m2
        lam, vec = np.linalg.eigh(j0)
        lam = lam * np.exp(np.r_[p[ModelLayout.MOMENTS], 0.0])
        axes = Rotation.from_rotvec(p[ModelLayout.TILT]).as_matrix() @ vec
        j = axes @ np.diag(lam) @ axes.T
        return 0.5 * (j + j.T) * (np.trace(j0) / np.trace(j))

    @staticmethod
    def residual_dipole(p: np.ndarray) -> np.ndarray:
        return np.asarray(p[ModelLayout.DIPOLE], float)

    @staticmethod
    def coil_gains(p: np.ndarray) -> np.ndarray:
        """Each coil's dipole per amp relative to the mission file's (3,)."""
        return np.exp(p[ModelLayout.COIL_GAIN])

    @staticmethod
    def latency(p: np.ndarray) -> float:
        return float(p[ModelLayout.LATENCY])

    def params(self, z: np.ndarray) -> np.ndarray:
        """Parameters from prior-whitened coordinates ``z`` (``p = mean + L z``)."""
        return self.mean + self.sqrt_cov @ z


def model_prior(inertia_kg_m2: np.ndarray, latency_prior_s: tuple[float, float], *,
                moment_sigma: float = INERTIA_MOMENT_SIGMA, tilt_sigma_rad: float = INERTIA_TILT_SIGMA_RAD,
                dipole_sigma_Am2: float = RESIDUAL_DIPOLE_SIGMA_Am2, coil_gain_sigma: float = COIL_GAIN_SIGMA
                ) -> ModelPrior:
    """The prior of the model parameters around the mission file's inertia (see the module's notes).

    Parameters
    ----------
    inertia_kg_m2 : (3, 3) the mission file's inertia
    latency_prior_s : (mean, sigma) of the actuation latency, s
    moment_sigma : relative 1-sigma of each principal moment
    tilt_sigma_rad : 1-sigma of each small rotation of the principal axes, rad
    dipole_sigma_Am2 : 1-sigma of each component of the residual dipole, A m^2
    coil_gain_sigma : 1-sigma of the log of each coil's gain
    """
    lay = ModelLayout
    root = np.zeros((lay.SIZE, lay.SIZE))  # block by block; a zero sigma fixes its parameter
    root[lay.MOMENTS, lay.MOMENTS] = moment_sigma * np.linalg.cholesky(np.array([[2.0, 1.0], [1.0, 2.0]]))
    root[lay.TILT, lay.TILT] = np.eye(3) * tilt_sigma_rad
    root[lay.DIPOLE, lay.DIPOLE] = np.eye(3) * dipole_sigma_Am2
    root[lay.COIL_GAIN, lay.COIL_GAIN] = np.eye(3) * coil_gain_sigma
    root[lay.LATENCY, lay.LATENCY] = latency_prior_s[1]
    mean = np.zeros(lay.SIZE)
    mean[lay.LATENCY] = latency_prior_s[0]
    return ModelPrior(np.asarray(inertia_kg_m2, float), mean, root)
