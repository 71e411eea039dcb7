"""The simulated satellite's surroundings: its orbit (SGP4 from an invented TLE) and the magnetic field.

The truth field is the IGRF-14 main field (ppigrf) plus an unmodelled smooth field of about 100 nT
that stands for the crustal and external fields IGRF leaves out; recon is never told about the
second part. Both are computed on a uniform time grid and carried between grid points by a cubic
spline, whose node values and node derivatives feed the integrator's Hermite interpolation (a cubic
spline *is* the piecewise cubic Hermite interpolant of its own node derivatives, so the integrator
and the truth tables see exactly the same field).

References
----------
Vallado, D. A., Crawford, P., Hujsak, R. and Kelso, T. S. (2006). Revisiting Spacetrack Report #3.
AIAA 2006-6753 (SGP4 and the TEME frame).
Alken, P. et al. (2025). International Geomagnetic Reference Field: the fourteenth generation.
Earth, Planets and Space 77, 79.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.signal import lfilter
from sgp4.api import WGS72, Satrec
from sgp4.exporter import export_tle

from ..core import NS_PER_S, RAD_PER_DEG, InputError, MU_EARTH_km3_s2, itrf_to_gcrf_matrix, teme_to_itrf_matrix
from ..field import igrf_itrf_nT

# sgp4's element epoch counts days from 1949 December 31 00:00 UT (Vallado et al. 2006, AIAA 2006-6753)
_SGP4_EPOCH = np.datetime64("1949-12-31T00:00:00", "ns")
_SGP4_EPOCH_JD = 2433281.5

__all__ = ["Environment", "tle_from_elements", "invented_tle", "aged_tle", "orbit_positions_km",
           "igrf_gcrf_nT", "unmodelled_field_nT", "correlated_field_nT", "build_environment"]



def tle_from_elements(catalog: int, epoch_utc: np.datetime64, inclination_deg: float, raan_deg: float,
                      eccentricity: float, arg_perigee_deg: float, mean_anomaly_deg: float,
                      mean_motion_rev_day: float, bstar: float = 6.1e-5, ndot_rev_day2: float = 1.2e-5,
                      designator: str = "26001A", element_set: int = 999, rev_number: int = 2850) -> tuple[str, str]:
    """Two TLE lines (with valid checksums) for the given mean elements, written by sgp4's own exporter.

    Parameters
    ----------
    epoch_utc : datetime64
        Element epoch (UTC); written as two-digit year and fractional day of year.
    ndot_rev_day2 : float
        First derivative of mean motion divided by two, rev/day^2, as the TLE stores it.

    References
    ----------
    Hoots, F. R. and Roehrich, R. L. (1980). Spacetrack Report No. 3, element set format.
    """
    rad = RAD_PER_DEG
    epoch_days = (np.datetime64(epoch_utc, "ns") - _SGP4_EPOCH).astype(np.int64) / (86400.0 * NS_PER_S)
    minutes_per_day = 1440.0
    sat = Satrec()
    sat.sgp4init(WGS72, "i", int(catalog), epoch_days, bstar,
                 ndot_rev_day2 * 2.0 * np.pi / minutes_per_day ** 2, 0.0, eccentricity,
                 arg_perigee_deg * rad, inclination_deg * rad, mean_anomaly_deg * rad,
                 mean_motion_rev_day * 2.0 * np.pi / minutes_per_day, raan_deg * rad)
    sat.intldesg, sat.elnum, sat.revnum, sat.classification = designator, element_set, rev_number, "U"
    return export_tle(sat)


def invented_tle(epoch_utc: np.datetime64 | str = "2026-07-14T09:00:00") -> tuple[str, str]:
    """Elements of recon's invented demo satellite (catalogue 99990), epoch ``epoch_utc`` (UTC).

    A sun-synchronous near-circular orbit about 510 km high: 97.41 deg inclination (the
    sun-synchronous inclination at that height), 15.19 rev/day.
    """
    return tle_from_elements(99990, np.datetime64(epoch_utc, "ns"), 97.41, 83.2, 0.0012, 141.0, 219.2, 15.19)


def aged_tle(tle: tuple[str, str], along_track_km: float, drift_km_per_orbit: float,
             t_ref_utc: np.datetime64) -> tuple[str, str]:
    """An older element set of the same satellite: ``along_track_km`` ahead at ``t_ref_utc`` (behind if
    negative), the error growing by ``drift_km_per_orbit`` each orbit.

    Along track, an error in mean anomaly dM and in mean motion dn put the satellite ``a (dM + dn t)``
    away from where it is; both are set to give the stated figures (a from the mean motion, Kepler's
    third law). The other elements are kept, and the lines are written by sgp4's exporter.
    """
    sat = Satrec.twoline2rv(*tle)
    n_rad_s = sat.no_kozai / 60.0
    a_km = (MU_EARTH_km3_s2 / n_rad_s ** 2) ** (1.0 / 3.0)
    dn = drift_km_per_orbit / (a_km * 2.0 * np.pi / n_rad_s)
    epoch_days = sat.jdsatepoch + sat.jdsatepochF - _SGP4_EPOCH_JD
    t_from_epoch_s = float((np.datetime64(t_ref_utc, "ns") - _SGP4_EPOCH).astype(np.int64) / NS_PER_S
                           - epoch_days * 86400.0)
    dm = along_track_km / a_km - dn * t_from_epoch_s
    old = Satrec()
    old.sgp4init(WGS72, "i", sat.satnum, epoch_days, sat.bstar, sat.ndot, sat.nddot, sat.ecco, sat.argpo,
                 sat.inclo, float(np.mod(sat.mo + dm, 2.0 * np.pi)), (n_rad_s + dn) * 60.0, sat.nodeo)
    old.intldesg, old.elnum, old.revnum, old.classification = sat.intldesg, sat.elnum, sat.revnum, "U"
    return export_tle(old)


def orbit_positions_km(tle: tuple[str, str], time_utc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """GCRF and ITRF positions from SGP4.

    Parameters
    ----------
    tle : (str, str)
    time_utc : (N,) datetime64[ns], UTC

    Returns
    -------
    r_gcrf_km, r_itrf_km : (N, 3) arrays, km
    """
    sat = Satrec.twoline2rv(tle[0], tle[1])
    if sat.error:
        raise InputError(f"expected a valid TLE, sgp4 refused it with error code {sat.error}", key="tle")
    t = np.asarray(time_utc, dtype="datetime64[ns]")
    # sgp4 wants a two-part Julian date; split at midnight to keep precision
    ns = t.astype(np.int64)
    days, rem = np.divmod(ns, 86400 * NS_PER_S)
    jd = 2440587.5 + days.astype(float)
    fr = rem.astype(float) / (86400.0 * NS_PER_S)
    err, r_teme, _ = sat.sgp4_array(jd, fr)
    if np.any(err != 0):
        raise InputError(f"expected sgp4 to propagate the TLE over the pass, got error codes "
                         f"{sorted(set(err.tolist()) - {0})}", key="tle")
    r_itrf = np.einsum("nij,nj->ni", teme_to_itrf_matrix(t), r_teme)
    r_gcrf = np.einsum("nij,nj->ni", itrf_to_gcrf_matrix(t), r_itrf)
    return r_gcrf, r_itrf


def igrf_gcrf_nT(time_utc: np.ndarray, r_itrf_km: np.ndarray) -> np.ndarray:
    """IGRF-14 main field in GCRF at ITRF positions, nT, (N, 3).

    One coefficient date (the first instant) serves the whole pass: ppigrf broadcasts dates against
    points, and over a pass the secular variation (tens of nT per year) changes nothing.
    """
    t = np.asarray(time_utc, dtype="datetime64[ns]")
    b_itrf = igrf_itrf_nT(r_itrf_km, t[0].astype("datetime64[s]"))
    return np.einsum("nij,nj->ni", itrf_to_gcrf_matrix(t), b_itrf)


def unmodelled_field_nT(t_s: np.ndarray, r_gcrf_km: np.ndarray, rng: np.random.Generator,
                        rms_nT: float, n_terms: int = 4) -> tuple[np.ndarray, list[dict]]:
    """A smooth field the reference model leaves out: a few random sinusoids in position and time.

    ``b(t) = sum_j a_j sin(kappa_j . r_hat(t) + omega_j t + phi_j)`` in GCRF, scaled so that the rms
    of ``|b|`` over the given samples is ``rms_nT``. Spatial wavenumbers of 1-3 rad per unit of the
    position unit vector make features of 20-60 deg of arc, like low-order crustal/external terms.

    Returns
    -------
    b_gcrf_nT : (N, 3) array, nT, GCRF
    terms : list of dict
        The drawn amplitudes, wavenumbers, frequencies and phases (for the truth record).
    """
    r_hat = r_gcrf_km / np.linalg.norm(r_gcrf_km, axis=1, keepdims=True)
    a = rng.normal(size=(n_terms, 3))
    direction = rng.normal(size=(n_terms, 3))
    kappa = direction / np.linalg.norm(direction, axis=1, keepdims=True) * rng.uniform(1.0, 3.0, (n_terms, 1))
    omega = 2.0 * np.pi / rng.uniform(1200.0, 7200.0, n_terms)
    phi = rng.uniform(0.0, 2.0 * np.pi, n_terms)
    phase = r_hat @ kappa.T + np.outer(t_s, omega) + phi  # (N, n_terms)
    b = np.sin(phase) @ a
    rms = np.sqrt(np.mean(np.sum(b ** 2, axis=1)))
    scale = 0.0 if rms == 0 or rms_nT == 0 else rms_nT / rms
    b *= scale
    terms = [{"amplitude_gcrf_nT": (a[j] * scale).tolist(), "kappa": kappa[j].tolist(),
              "omega_rad_s": float(omega[j]), "phase_rad": float(phi[j])} for j in range(n_terms)]
    return b, terms


def correlated_field_nT(n: int, step_s: float, rng: np.random.Generator, rms_nT: float,
                        correlation_s: float) -> np.ndarray:
    """A smooth random field correlated over ``correlation_s``: white noise through two first-order
    Gauss-Markov stages in turn (a smooth, differentiable path), per GCRF axis, scaled so that the rms of
    ``|b|`` over the samples is ``rms_nT``.

    Returns
    -------
    (n, 3) array, nT, GCRF, on a grid of step ``step_s``
    """
    if rms_nT == 0.0 or n == 0:
        return np.zeros((n, 3))
    a = float(np.exp(-step_s / correlation_s))
    burn = int(np.ceil(5.0 * correlation_s / step_s))
    z = rng.standard_normal((burn + n, 3))
    c = np.sqrt(1.0 - a * a)
    x1 = lfilter([c], [1.0, -a], z, axis=0)   # x1_k = a x1_k-1 + c z_k, from rest (burnt in)
    b = lfilter([c], [1.0, -a], x1, axis=0)[burn:]
    return b * (rms_nT / np.sqrt(np.mean(np.sum(b ** 2, axis=1))))


@dataclass(frozen=True)
class Environment:
    """Orbit and field on a uniform grid of ``t_s`` (seconds since the pass epoch ``t0_utc``).

    Attributes
    ----------
    t0_utc : datetime64[ns]
    t_s : (N,) grid times, s
    r_gcrf_km, r_itrf_km : (N, 3) positions, km
    b_igrf_gcrf_nT, b_unmodelled_gcrf_nT : (N, 3) field, nT, GCRF
    hermite_y, hermite_dy : (N, 6) node values and time derivatives of [B_T (3), r_m (3)] in GCRF,
        for the integrator (tesla and metres)
    unmodelled_terms : list of dict
    """

    t0_utc: np.datetime64
    t_s: np.ndarray
    r_gcrf_km: np.ndarray
    r_itrf_km: np.ndarray
    b_igrf_gcrf_nT: np.ndarray
    b_unmodelled_gcrf_nT: np.ndarray
    hermite_y: np.ndarray
    hermite_dy: np.ndarray
    unmodelled_terms: list

    @property
    def step_s(self) -> float:
        return float(self.t_s[1] - self.t_s[0])

    def interpolate(self, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """True field (IGRF + unmodelled, nT) and position (km) in GCRF at times ``t_s`` (M,)."""
        from .dynamics import hermite_many

        y = hermite_many(np.asarray(t_s, dtype=float), self.t_s[0], self.step_s, self.hermite_y,
                         self.hermite_dy)
        return y[:, :3] * 1e9, y[:, 3:] / 1e3

    def components(self, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """IGRF and unmodelled parts separately (nT, GCRF) at ``t_s`` by cubic spline."""
        t = np.asarray(t_s, dtype=float)
        return (CubicSpline(self.t_s, self.b_igrf_gcrf_nT)(t),
                CubicSpline(self.t_s, self.b_unmodelled_gcrf_nT)(t))


def build_environment(tle: tuple[str, str], t0_utc: np.datetime64, duration_s: float,
                      rng: np.random.Generator, unmodelled_rms_nT: float = 100.0,
                      step_s: float = 1.0, margin_s: float = 5.0, correlated_fraction: float = 0.0,
                      correlation_s: float = 300.0) -> Environment:
    """Orbit and field over ``[-margin_s, duration_s + margin_s]`` around ``t0_utc`` every ``step_s``.

    Parameters
    ----------
    tle : (str, str)
    t0_utc : datetime64, UTC, the pass epoch (t_s = 0)
    duration_s : float
    rng : numpy Generator, draws the unmodelled field
    unmodelled_rms_nT : float, rms of the whole unmodelled field, nT
    correlated_fraction : float
        Share of its variance in a Gauss-Markov part correlated over ``correlation_s``
        (:func:`correlated_field_nT`); the rest is the large-scale part (:func:`unmodelled_field_nT`).
    step_s : float
        Grid step. At 1 s the cubic spline follows a field that turns at twice the orbital rate to
        far better than 1 nT.
    """
    n = int(np.ceil((duration_s + 2 * margin_s) / step_s)) + 1
    t_s = -margin_s + step_s * np.arange(n)
    t0 = np.datetime64(t0_utc, "ns")
    time_utc = t0 + np.round(t_s * NS_PER_S).astype("timedelta64[ns]")
    r_gcrf, r_itrf = orbit_positions_km(tle, time_utc)
    b_igrf = igrf_gcrf_nT(time_utc, r_itrf)
    b_unm, terms = unmodelled_field_nT(t_s, r_gcrf, rng, unmodelled_rms_nT * np.sqrt(1.0 - correlated_fraction))
    if correlated_fraction > 0.0:
        b_unm = b_unm + correlated_field_nT(n, step_s, rng, unmodelled_rms_nT * np.sqrt(correlated_fraction),
                                            correlation_s)
    y = np.hstack([(b_igrf + b_unm) * 1e-9, r_gcrf * 1e3])
    dy = CubicSpline(t_s, y).derivative()(t_s)
    return Environment(t0, t_s, r_gcrf, r_itrf, b_igrf, b_unm, np.ascontiguousarray(y),
                       np.ascontiguousarray(dy), terms)
