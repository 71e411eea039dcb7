"""The geometric prior on the crosstalk K: what a coil's dipole can put at the magnetometer.

A coil of dipole ``m`` (A m^2) at distance ``r`` from the magnetometer, in the direction ``u``, puts
there the field ``B = (mu0 / 4 pi) (3 (m . u) u - m) / r^3`` (Griffiths, Introduction to
Electrodynamics, sec. 5.4, the dipole field (memory)), from ``|m| / r^3`` across the axis to twice
that along it. Per amp, ``m`` is the coil's column of the nominal ``dipole_per_amp``; 1.6 A m^2/A gives
1,300-2,600 nT/A at 0.5 m and 20,000-40,000 nT/A at 0.2 m.

The distance is not known: the prior takes it uniform between ``DISTANCE_RANGE_m`` and the direction
uniform on the sphere. Each element of ``K`` (one sensor axis, one coil) then has mean zero and mean
square ``(2/3) (mu0/4pi)^2 |m|^2 E[r^-6]`` (the mean of ``|3 (m.u) u - m|^2 = |m|^2 (1 + 3 cos^2)``
over the sphere is ``2 |m|^2``, shared by three axes), with ``E[r^-6] = (r1^-5 - r2^-5) / (5 (r2 - r1))``.
The prior is the Gaussian with that variance: for 1.5 A m^2/A, 5,600 nT/A per element (1 sigma). The
harness adds the field of each coil's leads: two wires 2 mm apart at 5 cm give ``mu0 I s / (2 pi d^2)``
= 160 nT/A (common practice, no source), added in quadrature (it barely counts).

A direction of K whose variance the data do not shrink enough is held at this prior: value zero, its
prior variance carried into the calibrated field's noise at the currents that flowed.
"""

from __future__ import annotations

import numpy as np

__all__ = ["MU0_OVER_4PI_T_m_per_A", "DISTANCE_RANGE_m", "HARNESS_nT_per_A", "DEFAULT_DIPOLE_PER_AMP_Am2_per_A",
           "prior_sigma_nT_per_A", "prior_note"]

# mu0 / 4 pi, T m / A (1e-7 exactly before the 2019 SI; CODATA 2018 gives 1.00000000055e-7)
MU0_OVER_4PI_T_m_per_A = 1.0e-7
# Distance from a coil to the magnetometer on a small satellite; not in the mission file, so a range
# (common practice, no source)
DISTANCE_RANGE_m = (0.2, 0.5)
# The field of a coil's leads at the magnetometer: a pair 2 mm apart at 5 cm, mu0 I s / (2 pi d^2)
# (common practice, no source for the geometry)
HARNESS_nT_per_A = 2.0 * MU0_OVER_4PI_T_m_per_A * 0.002 / 0.05**2 * 1e9
# Used when no dipole_per_amp is given: a typical CubeSat magnetorquer (common practice, no source)
DEFAULT_DIPOLE_PER_AMP_Am2_per_A = 1.6


def prior_sigma_nT_per_A(dipole_per_amp: np.ndarray | None = None,
                         distance_m: tuple[float, float] = DISTANCE_RANGE_m) -> np.ndarray:
    """The prior 1-sigma of each element of K, per coil column (3,), nT per A.

    Parameters
    ----------
    dipole_per_amp : (3, 3) array, A m^2 per A, optional
        The nominal C (``m_body = C i``); column ``c`` is coil ``c``'s dipole per amp. Default: 1.6 A m^2/A
        on each coil.
    distance_m : (near, far), m
        The range of coil-to-magnetometer distances (uniform).

    Returns
    -------
    (3,) array, nT per A
    """
    c = (np.full(3, DEFAULT_DIPOLE_PER_AMP_Am2_per_A) if dipole_per_amp is None
         else np.linalg.norm(np.asarray(dipole_per_amp, dtype=float), axis=0))
    r1, r2 = (float(d) for d in distance_m)
    if not 0 < r1 <= r2:
        raise ValueError(f"Expected 0 < near <= far distance, got {distance_m!r}")
    mean_r_6 = r1**-6 if r1 == r2 else (r1**-5 - r2**-5) / (5.0 * (r2 - r1))
    coil = np.sqrt(2.0 / 3.0) * MU0_OVER_4PI_T_m_per_A * c * np.sqrt(mean_r_6) * 1e9
    return np.sqrt(coil**2 + HARNESS_nT_per_A**2)


def prior_note(sigma_nT_per_A: np.ndarray, distance_m: tuple[float, float] = DISTANCE_RANGE_m) -> str:
    """One line saying what the prior is and where it comes from."""
    return (f"crosstalk prior: zero +- {', '.join(f'{s:.0f}' for s in sigma_nT_per_A)} nT/A per element "
            f"(coils x, y, z): the dipole field of each coil's nominal dipole per amp at "
            f"{distance_m[0]:g}-{distance_m[1]:g} m (distance not known), random direction, plus its leads")
