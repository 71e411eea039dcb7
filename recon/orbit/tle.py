"""Two-line element sets: format and checksum checks, SGP4 in TEME (the ``sgp4`` package, vectorised
``Satrec.sgp4_array``), and the orbit from a TLE rotated TEME -> ITRF (PEF, R3(GMST82)) -> GCRF.

TEME exists only here: every result leaves as an :class:`recon.orbit.state.OrbitState` in GCRF.

References
----------
Vallado, D. A., Crawford, P., Hujsak, R., Kelso, T. S. (2006), "Revisiting Spacetrack Report #3",
AIAA 2006-6753 (SGP4 and the TEME frame, Appendix C).
Hoots, F. R., Roehrich, R. L. (1980), Spacetrack Report No. 3 (the TLE format).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from sgp4.api import SGP4_ERRORS, Satrec
from sgp4.io import compute_checksum

from ..core import InputError, frames
from .state import OrbitState, checked_times, earth_orientation, make_state, rotate_back, spin

__all__ = ["tle_checksum", "parse_tle", "tle_teme", "orbit_from_tle", "state_from_teme"]

_TLE_TEMPLATE = {
    1: "1 NNNNNC NNNNNAAA NNNNN.NNNNNNNN +.NNNNNNNN +NNNNN-N +NNNNN-N N NNNNN",
    2: "2 NNNNN NNN.NNNN NNN.NNNN NNNNNNN NNN.NNNN NNN.NNNN NN.NNNNNNNNNNNNNN",
}
# 0-based columns that hold a blank or a '.' in each line (Hoots & Roehrich 1980, TLE format)
_TLE_BLANKS = {1: (1, 8, 17, 32, 43, 52, 61, 63), 2: (1, 7, 16, 25, 33, 42, 51)}
_TLE_DOTS = {1: (23,), 2: (11, 20, 37, 46, 54)}


def tle_checksum(line: str) -> int:
    """Modulo-10 checksum of a TLE line's first 68 columns: digits count, '-' counts 1
    (``sgp4.io.compute_checksum``)."""
    return int(compute_checksum(line))


def _tle_problem(line: str, k: int) -> str | None:
    if len(line) != 69:
        return f"69 columns, found {len(line)}"
    if line[0] != str(k):
        return f"'{k}' in column 1, found {line[0]!r}"
    for col in _TLE_BLANKS[k]:
        if line[col] != " ":
            return f"a blank in column {col + 1}, found {line[col]!r}"
    for col in _TLE_DOTS[k]:
        if line[col] != ".":
            return f"'.' in column {col + 1}, found {line[col]!r}"
    if not line[68].isdigit() or int(line[68]) != tle_checksum(line):
        return f"checksum {tle_checksum(line)} in column 69, found {line[68]!r}"
    return None


def parse_tle(line1: str, line2: str, *, file: str | Path | None = None, key: str | None = None) -> Satrec:
    """Check a TLE's format and checksums and return the sgp4 ``Satrec``.

    Raises
    ------
    InputError
        One line: the template of the expected line, what is wrong, and the user's line.
    """
    lines = {1: str(line1).rstrip(), 2: str(line2).rstrip()}
    for k, line in lines.items():
        problem = _tle_problem(line, k)
        if problem:
            raise InputError(f"expected a TLE line {k} like '{_TLE_TEMPLATE[k]}' ({problem}), got '{line}'",
                             file, key=key)
    if lines[1][2:7] != lines[2][2:7]:
        raise InputError(f"expected the same satellite number in both TLE lines, got {lines[1][2:7]!r} and "
                         f"{lines[2][2:7]!r}", file, key=key)
    try:
        sat = Satrec.twoline2rv(lines[1], lines[2])
    except ValueError as e:
        raise InputError(f"expected a TLE sgp4 can read, got '{lines[1]}' / '{lines[2]}' ({e})", file,
                         key=key) from None
    if sat.error != 0:
        raise InputError(f"expected valid TLE elements, sgp4 says {SGP4_ERRORS.get(sat.error, sat.error)}",
                         file, key=key)
    return sat


def tle_teme(sat: Satrec, time_utc: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SGP4 state in TEME at each instant.

    Parameters
    ----------
    sat : sgp4.api.Satrec
    time_utc : (N,) datetime64[ns], UTC

    Returns
    -------
    r_teme_km : (N, 3) array, km, TEME
    v_teme_km_s : (N, 3) array, km/s, TEME
    reason : (N,) array of str
        "" or the SGP4 error for that instant (its row is NaN).
    """
    t, reason = checked_times(time_utc)
    jd, fr = frames.utc_to_jd(np.where(np.isnat(t), np.datetime64(0, "ns"), t))
    err, r, v = sat.sgp4_array(jd, fr)
    r, v = np.asarray(r, dtype=float), np.asarray(v, dtype=float)
    for code in np.unique(err[err != 0]):
        bad = (err == code) & (reason == "")
        reason[bad] = f"sgp4 error {int(code)}: {SGP4_ERRORS.get(int(code), 'unknown')}"
    bad = reason != ""
    r[bad] = np.nan
    v[bad] = np.nan
    return r, v, reason


def orbit_from_tle(line1: str, line2: str, time_utc: np.ndarray, *, dut1_s: float = 0.0,
                   file: str | Path | None = None, key: str | None = "orbit.tle") -> OrbitState:
    """SGP4 orbit from a TLE, rotated TEME -> ITRF (R3(GMST82), Vallado et al. 2006) -> GCRF.

    ``v_gcrf_km_s`` is the TEME velocity rotated to GCRF (both frames are quasi-inertial: the
    matrix turns by < 1e-10 rad/s).
    """
    sat = parse_tle(line1, line2, file=file, key=key)
    t, _ = checked_times(time_utc)
    r_teme, v_teme, reason = tle_teme(sat, t)
    return state_from_teme(t, r_teme, v_teme, dut1_s=dut1_s, reason=reason, source="tle")


def state_from_teme(time_utc: np.ndarray, r_teme_km: np.ndarray, v_teme_km_s: np.ndarray, *,
                    dut1_s: float = 0.0, reason: np.ndarray | None = None, source: str = "teme") -> OrbitState:
    """An :class:`OrbitState` from TEME states: r_itrf = R3(GMST82) r_teme (Vallado et al. 2006,
    App. C; polar motion neglected, so ITRF here is PEF), r_gcrf = M r_itrf with M from
    :func:`recon.orbit.state.itrf_to_gcrf_matrix_fast`, and v_gcrf = M R3(GMST82) v_teme (TEME and GCRF are both
    quasi-inertial: the product turns by < 1e-10 rad/s).

    Parameters
    ----------
    time_utc : (N,) datetime64[ns], UTC
    r_teme_km : (N, 3) array, km, TEME
    v_teme_km_s : (N, 3) array, km/s, TEME
    reason : (N,) array of str, optional
        Rows already known to be invalid.
    """
    t, r0 = checked_times(time_utc)
    reason = r0 if reason is None else np.where(r0 != "", r0, np.asarray(reason, dtype=object))
    r_teme = np.atleast_2d(np.asarray(r_teme_km, dtype=float))
    v_teme = np.atleast_2d(np.asarray(v_teme_km_s, dtype=float))
    reason[(reason == "") & ~(np.all(np.isfinite(r_teme), axis=1) & np.all(np.isfinite(v_teme), axis=1))] = \
        "no TEME state"
    gmst = frames.gmst82_rad(np.where(np.isnat(t), np.datetime64(0, "ns"), t), dut1_s)
    q, angle = earth_orientation(t, dut1_s)
    r_itrf = spin(gmst, np.nan_to_num(r_teme))
    # GCRF = c2i^T R3(-(ERA + s')) R3(GMST) TEME: one turn by GMST - ERA - s', then c2i^T
    r_gcrf = rotate_back(q, spin(gmst - angle, np.nan_to_num(r_teme)))
    v_gcrf = rotate_back(q, spin(gmst - angle, np.nan_to_num(v_teme)))
    return make_state(t, r_gcrf, v_gcrf, r_itrf, reason.astype(object), source)
