"""Where the satellite was: position and velocity at any set of UTC instants, in GCRF and ITRF.

Three sources, as the mission file's ``[orbit]`` section names them:

- a two-line element set, propagated with SGP4 in TEME, then rotated TEME -> ITRF (PEF,
  R3(GMST82)) -> GCRF (:mod:`recon.orbit.tle`);
- a position log (CSV, ITRF or GCRF, km or m), interpolated with a cubic spline per gap-free run
  (:mod:`recon.orbit.positions`);
- a CCSDS OEM file, interpolated as the file says (:mod:`recon.orbit.oem`,
  :mod:`recon.orbit.interpolate`).

Samples that cannot be had become NaN rows with a reason (an SGP4 error code, a gap in a log);
times outside what a log or OEM file covers, and malformed inputs, raise
:class:`recon.core.InputError`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..config import OrbitSpec
from ..core import InputError, frames
from .interpolate import hermite_interpolate, lagrange_interpolate
from .oem import read_oem
from .positions import orbit_from_positions, outside_coverage
from .state import OrbitState, checked_times, itrf_state_to_gcrf, rotate, state_from_gcrf_nodes
from .tle import orbit_from_tle

__all__ = ["orbit_at", "orbit_from_oem"]


def orbit_from_oem(path: str | Path, time_utc: np.ndarray, *, dut1_s: float = 0.0,
                   outside: str = "raise") -> OrbitState:
    """Orbit from a CCSDS OEM file, interpolated per segment as the file names (see :mod:`recon.orbit.oem`).

    Each segment's states are first expressed in GCRF (Earth-fixed ones with
    v_gcrf = M (v_itrf + w x r_itrf)), then interpolated there. An instant covered by no segment
    but inside the file's overall span is a NaN row with a reason.

    Raises
    ------
    InputError
        On a malformed file or an unsupported frame (naming the line), or instants outside the span.
    """
    path = Path(path)
    t, reason = checked_times(time_utc)
    segments = read_oem(path)
    lo = min(s.start_utc for s in segments)
    hi = max(s.stop_utc for s in segments)
    out = outside_coverage(path, t, lo, hi, "OEM file", outside)
    reason[out] = f"outside the OEM file's coverage {lo} to {hi} UTC"
    r = np.full((len(t), 3), np.nan)
    v = np.full((len(t), 3), np.nan)
    done = np.isnat(t) | out
    for seg in segments:
        inside = ~done & (t >= seg.start_utc) & (t <= seg.stop_utc)
        if not np.any(inside):
            continue
        if seg.frame == "itrf":
            r_n, v_n = itrf_state_to_gcrf(seg.time_utc, seg.r_km, seg.v_km_s, dut1_s)
        elif seg.frame == "teme":
            m = frames.teme_to_gcrf_matrix(seg.time_utc, dut1_s)
            r_n, v_n = rotate(m, seg.r_km), rotate(m, seg.v_km_s)
        else:
            r_n, v_n = seg.r_km, seg.v_km_s
        x_n = (seg.time_utc - seg.time_utc[0]).astype(np.int64) / 1e9
        x = (t[inside] - seg.time_utc[0]).astype(np.int64) / 1e9
        if seg.method == "HERMITE":
            r[inside], v[inside] = hermite_interpolate(x_n, r_n, v_n, x, seg.degree)
        else:
            r[inside] = lagrange_interpolate(x_n, r_n, x, seg.degree)
            v[inside] = lagrange_interpolate(x_n, v_n, x, seg.degree)
        done |= inside
    reason[~done & (reason == "")] = "between OEM segments (no ephemeris)"
    return state_from_gcrf_nodes(t, reason, r, v, dut1_s, "oem")


def orbit_at(spec: OrbitSpec, time_utc: np.ndarray, *, dut1_s: float = 0.0,
             source: str | Path | None = None, outside: str = "raise") -> OrbitState:
    """The orbit at the given instants, from whichever source the mission file names.

    Parameters
    ----------
    spec : recon.config.OrbitSpec
        The mission's ``[orbit]`` section.
    time_utc : (N,) datetime64[ns], UTC
    dut1_s : float
        UT1 - UTC in s (0 without Earth orientation data: at most 0.9 s of Earth rotation).
    source : str or Path, optional
        The mission file, named in errors about an inline TLE.
    outside : "raise" or "nan"
        For a position log or an OEM file: what an instant outside its coverage gives, an error or
        a NaN row with a reason ("nan" still raises when no instant at all is covered).

    Returns
    -------
    OrbitState
    """
    if spec.tle is not None:
        return orbit_from_tle(spec.tle[0], spec.tle[1], time_utc, dut1_s=dut1_s, file=source)
    if spec.positions is not None:
        return orbit_from_positions(spec.positions, time_utc, dut1_s=dut1_s, outside=outside)
    if spec.oem is not None:
        return orbit_from_oem(spec.oem, time_utc, dut1_s=dut1_s, outside=outside)
    raise InputError("expected one of tle, tle_file, positions, oem in [orbit], got none", source,
                     key="orbit")
