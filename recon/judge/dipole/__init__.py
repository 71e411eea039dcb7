"""Identify each coil's effective dipole per amp from the satellite's motion.

Euler's equation ``J dw/dt + w x (J w) = (C i) x B + tau_gg + m_r x B + d``, integrated between
instants of the pass, is linear in the nine entries of the dipole-per-amp matrix C (m_body = C i),
in a residual dipole m_r, a constant disturbance torque d and, optionally, the knot values of a
slowly varying bias of the rate history. The modules:

- :mod:`.motion`: splines of the motion history (field, gyroscopic and gravity-gradient torques);
- :mod:`.design`: regressors of the integrated equation, segments, design matrix and whiteners;
- :mod:`.solve`: weighted least squares with one initial momentum per segment eliminated, outlier
  rejection, AR(1)-inflated and jackknifed variances, ``identify_dipole``, and Schwarz's criterion
  for the rate bias;
- :mod:`.classify`: a coil's polarity from its identified dipole, with the model floor.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer, sec. 3.3.5 (Euler's equations), 3.3.6 (gravity-gradient torque).
"""

from .classify import classify_coil, dipole_sigma_with_floor
from .design import rate_bias_knots_s
from .motion import MotionSplines, inertia_shape_basis, motion_splines
from .solve import DipoleFit, chi2_unit, identify_dipole, rate_bias_evidence

__all__ = [
    "DipoleFit", "identify_dipole", "rate_bias_evidence", "chi2_unit", "rate_bias_knots_s",
    "MotionSplines", "motion_splines", "inertia_shape_basis",
    "classify_coil", "dipole_sigma_with_floor",
]
