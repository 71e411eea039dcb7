"""The reference magnetic field along the orbit: IGRF-14 (ppigrf, :mod:`recon.field.igrf`) in GCRF
at every sample, from a dense orbit path and a coarse grid of model evaluations.

Along an orbit the field is smooth in time, so :func:`reference_field` evaluates the model on a
coarse grid (``grid_step_s``, 20 s by default) and interpolates the GCRF components with a cubic
spline: at 500 km the interpolation error stays below 0.1 nT (tests check < 1 nT against evaluating
at every sample) while the model is evaluated ~100x less often.

When the samples are dense, the orbit itself is evaluated on nodes ``ORBIT_NODE_STEP_s`` apart and
interpolated (cubic Hermite on the nodes' positions and velocities) before the field is.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.interpolate import CubicHermiteSpline, CubicSpline

from ..core import DEG_PER_RAD, InputError
from ..orbit import OrbitState, orbit_at, state_from_gcrf_nodes
from .igrf import check_igrf_span, igrf_gcrf_nT

__all__ = ["ReferenceField", "reference_field", "field_along_orbit", "field_for_orbit", "dense_orbit", "GRID_STEP_s",
           "ORBIT_NODE_STEP_s"]

GRID_STEP_s = 20.0
# Node spacing of the orbit when many samples share a node (cubic Hermite on the nodes' positions and
# velocities). The Hermite remainder h^4/384 max|d4r/dt4| ~ h^4 n^4 r / 384 is about 0.3 mm at 10 s in
# LEO; SGP4's velocity differs from the derivative of its position by ~2e-5 km/s, which adds about
# 2e-5 * h / 4 ~ 5 cm. Both are far below what moves the field by 0.01 nT (about 1 km gives 20 nT).
ORBIT_NODE_STEP_s = 10.0


@dataclass(frozen=True)
class ReferenceField:
    """The model field and the sub-satellite point at each sample.

    Attributes
    ----------
    time_utc : (N,) datetime64[ns], UTC
    b_gcrf_nT : (N, 3) array, nT, GCRF
    r_gcrf_km : (N, 3) array, km, GCRF
    r_itrf_km : (N, 3) array, km, ITRF
    lat_deg, lon_deg : (N,) arrays, deg, WGS-84 geodetic (sub-satellite point)
    h_km : (N,) array, km, height above the WGS-84 ellipsoid
    reason : (N,) array of str
        "" where valid; otherwise why the row is NaN (from the orbit).
    model : str
    """

    time_utc: np.ndarray
    b_gcrf_nT: np.ndarray
    r_gcrf_km: np.ndarray
    r_itrf_km: np.ndarray
    lat_deg: np.ndarray
    lon_deg: np.ndarray
    h_km: np.ndarray
    reason: np.ndarray
    model: str = "IGRF-14 (ppigrf)"

    @property
    def valid(self) -> np.ndarray:
        """(N,) bool: rows with a field value."""
        return self.reason == ""


def field_along_orbit(orbit_spec, time_utc: np.ndarray, *, grid_step_s: float = GRID_STEP_s,
                      dut1_s: float = 0.0, source: str | Path | None = None) -> ReferenceField:
    """IGRF-14 in GCRF along the orbit an ``[orbit]`` section describes.

    The model is evaluated on a grid no coarser than ``grid_step_s`` spanning the samples and
    splined (not-a-knot cubic, per GCRF component) to the samples; runs of the grid broken by invalid
    orbit rows are splined separately, and samples no run covers are evaluated directly. With fewer
    samples than grid points everything is evaluated directly. Instants outside a position log's or
    an OEM file's coverage are NaN rows with the reason (an error only when no instant is covered).

    Parameters
    ----------
    orbit_spec : recon.config.OrbitSpec
    time_utc : (N,) datetime64[ns], UTC
    grid_step_s : float
        Largest grid step, s.
    dut1_s : float
        UT1 - UTC, s.
    source : str or Path, optional
        The mission file, for error messages.

    Returns
    -------
    ReferenceField
    """
    t = np.atleast_1d(np.asarray(time_utc, dtype="datetime64[ns]"))
    check_igrf_span(t, source)
    orb = dense_orbit(orbit_spec, t, dut1_s, source)
    if orb is None:
        orb = orbit_at(orbit_spec, t, dut1_s=dut1_s, source=source, outside="nan")
    return field_for_orbit(orbit_spec, orb, grid_step_s=grid_step_s, dut1_s=dut1_s, source=source)


def dense_orbit(orbit_spec, t: np.ndarray, dut1_s: float, source) -> OrbitState | None:
    """The orbit at densely spaced samples from nodes ``ORBIT_NODE_STEP_s`` apart (cubic Hermite in
    GCRF with the nodes' velocities), or None when that does not apply (few samples per node,
    unsorted times, or any node without a position: then every sample is evaluated directly)."""
    ns = t.astype(np.int64)
    if len(t) < 2 or np.any(np.diff(ns) <= 0):
        return None
    n_nodes = int(np.ceil((ns[-1] - ns[0]) / (ORBIT_NODE_STEP_s * 1e9))) + 1
    if n_nodes < 4 or 4 * n_nodes > len(t):
        return None
    nodes = np.linspace(ns[0], ns[-1], n_nodes).round().astype(np.int64)
    g = orbit_at(orbit_spec, nodes.astype("datetime64[ns]"), dut1_s=dut1_s, source=source, outside="nan")
    if not np.all(g.valid):
        return None
    xg, x = (nodes - ns[0]) / 1e9, (ns - ns[0]) / 1e9
    spline = CubicHermiteSpline(xg, g.r_gcrf_km, g.v_gcrf_km_s, axis=0)
    reason = np.full(len(t), "", dtype=g.reason.dtype)
    return state_from_gcrf_nodes(t, reason, spline(x), spline(x, 1), dut1_s, g.source)


def field_for_orbit(orbit_spec, orb, *, grid_step_s: float = GRID_STEP_s, dut1_s: float = 0.0,
                    source: str | Path | None = None) -> ReferenceField:
    """The field step of :func:`field_along_orbit` for an orbit already evaluated at the samples.

    Parameters
    ----------
    orbit_spec : recon.config.OrbitSpec
        The same orbit, evaluated again on the coarse grid.
    orb : recon.orbit.OrbitState
        The orbit at the samples.
    """
    t = orb.time_utc
    check_igrf_span(t, source)
    b = np.full((len(t), 3), np.nan)
    valid = orb.valid
    ns = t.astype(np.int64)
    if np.any(valid):
        t0, t1 = ns[valid].min(), ns[valid].max()
        n_grid = int(np.ceil((t1 - t0) / (grid_step_s * 1e9))) + 1
        todo = valid.copy()
        if n_grid >= 4 and n_grid < np.count_nonzero(valid):
            grid = np.linspace(t0, t1, n_grid).round().astype(np.int64).astype("datetime64[ns]")
            g = orbit_at(orbit_spec, grid, dut1_s=dut1_s, source=source, outside="nan")
            b_grid = igrf_gcrf_nT(grid, g.r_itrf_km, dut1_s=dut1_s, source=source)
            xg = (grid.astype(np.int64) - t0) / 1e9
            x = (ns - t0) / 1e9
            good = g.valid
            edges = np.flatnonzero(np.diff(np.concatenate([[0], good.astype(int), [0]])))
            for a, z in zip(edges[::2], edges[1::2] - 1, strict=True):
                if z - a < 3:
                    continue  # too short for a cubic: leave its samples to direct evaluation
                inside = todo & (x >= xg[a]) & (x <= xg[z])
                if np.any(inside):
                    b[inside] = CubicSpline(xg[a:z + 1], b_grid[a:z + 1], axis=0)(x[inside])
                    todo &= ~inside
        if np.any(todo):
            b[todo] = igrf_gcrf_nT(t[todo], orb.r_itrf_km[todo], dut1_s=dut1_s, source=source)
    return ReferenceField(time_utc=t, b_gcrf_nT=b, r_gcrf_km=orb.r_gcrf_km, r_itrf_km=orb.r_itrf_km,
                          lat_deg=orb.lat_rad * DEG_PER_RAD, lon_deg=orb.lon_rad * DEG_PER_RAD, h_km=orb.h_km,
                          reason=orb.reason)


def reference_field(mission, time_utc: np.ndarray, *, grid_step_s: float = GRID_STEP_s,
                    dut1_s: float = 0.0) -> ReferenceField:
    """IGRF-14 in GCRF at the given instants along the mission's orbit.

    Parameters
    ----------
    mission : recon.config.Mission
        Must have an ``[orbit]`` section.
    time_utc : (N,) datetime64[ns], UTC

    Returns
    -------
    ReferenceField
    """
    if mission.orbit is None:
        raise InputError("expected an [orbit] section to compute the reference field, it is missing",
                         mission.path, key="orbit")
    return field_along_orbit(mission.orbit, time_utc, grid_step_s=grid_step_s, dut1_s=dut1_s,
                             source=mission.path)
