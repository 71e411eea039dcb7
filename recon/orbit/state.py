"""The orbit state at a set of instants and the Earth's orientation that turns it between ITRF and
GCRF: the one place where a GCRF position and velocity become an :class:`OrbitState`.

References
----------
IERS Conventions (2010), IERS Technical Note 36, ch. 5 (eq. 5.1: GCRS = Q(t) R(t) W(t) ITRS).
"""

from __future__ import annotations

from dataclasses import dataclass

import erfa
import numpy as np

from ..core import OMEGA_EARTH_rad_s, frames

__all__ = [
    "CIO_NODE_STEP_s", "OrbitState", "itrf_to_gcrf_matrix_fast", "earth_orientation", "spin", "rotate",
    "rotate_back", "itrf_to_gcrf", "gcrf_to_itrf", "checked_times", "make_state", "state_from_gcrf_nodes",
    "itrf_state_to_gcrf",
]

# Node spacing for the interpolated celestial-to-intermediate matrix: the largest short-period
# nutation term (0.23", 13.7 d, IERS Conventions 2010 table 5.3a) bends by A w^2 h^2 / 8 = 3e-7" (1.5e-12
# rad) over 10 minutes, far below anything recon resolves.
CIO_NODE_STEP_s = 600.0


@dataclass(frozen=True)
class OrbitState:
    """Position and velocity at a set of instants.

    Attributes
    ----------
    time_utc : (N,) datetime64[ns], UTC
    r_gcrf_km : (N, 3) array, km, GCRF
    v_gcrf_km_s : (N, 3) array, km/s, GCRF
    r_itrf_km : (N, 3) array, km, ITRF (polar motion neglected)
    lat_rad, lon_rad : (N,) arrays, rad, WGS-84 geodetic
    h_km : (N,) array, km, height above the WGS-84 ellipsoid
    reason : (N,) array of str
        "" where the row is valid; otherwise why it is NaN.
    source : str
        "tle", "positions" or "oem".
    """

    time_utc: np.ndarray
    r_gcrf_km: np.ndarray
    v_gcrf_km_s: np.ndarray
    r_itrf_km: np.ndarray
    lat_rad: np.ndarray
    lon_rad: np.ndarray
    h_km: np.ndarray
    reason: np.ndarray
    source: str

    @property
    def valid(self) -> np.ndarray:
        """(N,) bool: rows with a position."""
        return self.reason == ""


# ------------------------------------------------------------------------------------- frames
def itrf_to_gcrf_matrix_fast(time_utc: np.ndarray, dut1_s: float = 0.0,
                             node_step_s: float = CIO_NODE_STEP_s) -> np.ndarray:
    """Matrices M (N, 3, 3) with r_gcrf = M @ r_itrf, as :func:`recon.core.frames.itrf_to_gcrf_matrix`.

    The IAU 2006/2000A celestial-to-intermediate matrix (pyerfa ``c2i06a``) changes slowly, so it is
    evaluated on nodes ``node_step_s`` apart and interpolated linearly element by element; the Earth
    rotation angle (``era00``) is evaluated at every instant. Agrees with the direct evaluation to
    a few 1e-12 rad and is ~100x faster for long series. NaT instants give NaN matrices.

    Parameters
    ----------
    time_utc : (N,) datetime64[ns], UTC
    dut1_s : float
        UT1 - UTC, s.

    References
    ----------
    IERS Conventions (2010), IERS Technical Note 36, ch. 5 (eq. 5.1: GCRS = Q(t) R(t) W(t) ITRS).
    """
    q, angle = earth_orientation(time_utc, dut1_s, node_step_s)
    c2t = np.stack([spin(angle, q[:, :, j]) for j in range(3)], axis=-1)  # R3(ERA + s') @ c2i, column by column
    return np.swapaxes(c2t, -1, -2)


def earth_orientation(time_utc: np.ndarray, dut1_s: float = 0.0,
                      node_step_s: float = CIO_NODE_STEP_s) -> tuple[np.ndarray, np.ndarray]:
    """c2i06a interpolated from nodes, (N, 3, 3), and ERA + s' (N,) rad: c2t06a = R3(ERA + s') c2i06a
    (pom00(0, 0, s') = R3(s') when xp = yp = 0). NaT instants give NaN."""
    t = np.atleast_1d(np.asarray(time_utc, dtype="datetime64[ns]"))
    q = np.full(t.shape + (3, 3), np.nan)
    angle = np.full(t.shape, np.nan)
    ok = ~np.isnat(t)
    if not np.any(ok):
        return q, angle
    ns = t[ok].astype(np.int64)
    t0, t1 = ns.min(), ns.max()
    step_ns = int(node_step_s * 1e9)
    n_nodes = max(int(np.ceil((t1 - t0) / step_ns)) + 1, 2)
    nodes_ns = t0 + np.arange(n_nodes, dtype=np.int64) * step_ns
    tt_nodes = frames.jd_tt(nodes_ns.astype("datetime64[ns]"))
    rc2i = erfa.c2i06a(*tt_nodes)  # (n_nodes, 3, 3)
    sp = erfa.sp00(*tt_nodes)  # TIO locator s', the only part of pom00 left when xp = yp = 0
    k = np.minimum((ns - t0) // step_ns, n_nodes - 2)
    w = ((ns - t0) - k * step_ns) / step_ns
    q[ok] = rc2i[k] + w[:, None, None] * (rc2i[k + 1] - rc2i[k])
    angle[ok] = erfa.era00(*frames.jd_ut1(t[ok], dut1_s)) + sp[k] + w * (sp[k + 1] - sp[k])
    return q, angle


def spin(angle: np.ndarray, v: np.ndarray) -> np.ndarray:
    """R3(angle) @ v for each row: (N,) rad, (N, 3) -> (N, 3) (frame rotation about z)."""
    c, s = np.cos(angle), np.sin(angle)
    return np.stack([c * v[:, 0] + s * v[:, 1], -s * v[:, 0] + c * v[:, 1], v[:, 2]], axis=-1)


def rotate(m: np.ndarray, v: np.ndarray) -> np.ndarray:
    """m @ v for each row: (N, 3, 3), (N, 3) -> (N, 3)."""
    return np.einsum("nij,nj->ni", m, v)


def rotate_back(m: np.ndarray, v: np.ndarray) -> np.ndarray:
    """m^T @ v for each row: (N, 3, 3), (N, 3) -> (N, 3)."""
    return np.einsum("nji,nj->ni", m, v)


def itrf_to_gcrf(time_utc: np.ndarray, v_itrf: np.ndarray, dut1_s: float = 0.0) -> np.ndarray:
    """GCRF components (N, 3) of vectors given in ITRF components (N, 3) at each instant (no Earth-rate
    term: for positions and field vectors, not velocities). Same rotation as
    :func:`itrf_to_gcrf_matrix_fast`, applied without forming the matrices."""
    q, angle = earth_orientation(time_utc, dut1_s)
    return rotate_back(q, spin(-angle, np.asarray(v_itrf, dtype=float)))


def gcrf_to_itrf(time_utc: np.ndarray, v_gcrf: np.ndarray, dut1_s: float = 0.0) -> np.ndarray:
    """ITRF components (N, 3) of vectors given in GCRF components (N, 3); inverse of :func:`itrf_to_gcrf`."""
    q, angle = earth_orientation(time_utc, dut1_s)
    return spin(angle, rotate(q, np.asarray(v_gcrf, dtype=float)))


def itrf_state_to_gcrf(t, r_itrf_km, v_itrf_km_s, dut1_s):
    """GCRF position and velocity of ITRF states: v_gcrf = M (v_itrf + w x r_itrf)."""
    q, angle = earth_orientation(t, dut1_s)
    w = np.array([0.0, 0.0, OMEGA_EARTH_rad_s])
    return (rotate_back(q, spin(-angle, r_itrf_km)),
            rotate_back(q, spin(-angle, v_itrf_km_s + np.cross(w, r_itrf_km))))


# -------------------------------------------------------------------------------------- states
def checked_times(time_utc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The instants as (N,) datetime64[ns] and a reason per instant ("time is NaT" or "")."""
    t = np.atleast_1d(np.asarray(time_utc, dtype="datetime64[ns]"))
    if t.ndim != 1:
        raise ValueError(f"Expected time_utc of shape (N,), got {t.shape}")
    reason = np.full(t.shape, "", dtype=object)
    reason[np.isnat(t)] = "time is NaT"
    return t, reason


def make_state(time_utc, r_gcrf, v_gcrf, r_itrf, reason, source) -> OrbitState:
    """An :class:`OrbitState` with the geodetic point of every valid row; invalid rows become NaN."""
    n = len(time_utc)
    lat, lon, h = (np.full(n, np.nan) for _ in range(3))
    ok = reason == ""
    if np.any(ok):
        lat[ok], lon[ok], h[ok] = frames.itrf_to_geodetic(r_itrf[ok])
    for a in (r_gcrf, v_gcrf, r_itrf):
        a[~ok] = np.nan
    return OrbitState(time_utc, r_gcrf, v_gcrf, r_itrf, lat, lon, h, reason, source)


def state_from_gcrf_nodes(t, reason, r_gcrf, v_gcrf, dut1_s, source) -> OrbitState:
    """An :class:`OrbitState` from GCRF positions and velocities at the instants ``t`` (the ITRF
    position follows from the Earth's orientation); rows with a ``reason`` become NaN."""
    q, angle = earth_orientation(t, dut1_s)
    r_itrf = spin(angle, rotate(q, np.where(np.isfinite(r_gcrf), r_gcrf, 0.0)))
    return make_state(t, r_gcrf, v_gcrf, r_itrf, reason, source)
