"""Where the satellite was: position and velocity at any set of UTC instants, in GCRF and ITRF.

Three sources, as the mission file's ``[orbit]`` section names them:

- a two-line element set, propagated with SGP4 (the ``sgp4`` package, vectorised
  ``Satrec.sgp4_array``) in TEME, then rotated TEME -> ITRF (PEF, R3(GMST82)) -> GCRF;
- a position log (CSV, ITRF or GCRF, km or m), interpolated with a cubic spline per gap-free run;
- a CCSDS OEM file, interpolated as the file says (see :mod:`recon.oem`).

Samples that cannot be had become NaN rows with a reason (an SGP4 error code, a gap in a log);
times outside what a log or OEM file covers, and malformed inputs, raise
:class:`recon.errors.InputError`.

References
----------
Vallado, D. A., Crawford, P., Hujsak, R., Kelso, T. S. (2006), "Revisiting Spacetrack Report #3",
AIAA 2006-6753 (SGP4 and the TEME frame, Appendix C).
Hoots, F. R., Roehrich, R. L. (1980), Spacetrack Report No. 3 (the TLE format).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import erfa
import numpy as np
import pandas as pd
from scipy.interpolate import CubicSpline
from sgp4.api import SGP4_ERRORS, Satrec

from ..config import OrbitSpec, PositionsSpec, TimeSpec
from ..core import GPS_EPOCH_UTC, InputError, OMEGA_EARTH_rad_s, frames
from .oem import hermite_interpolate, lagrange_interpolate, read_oem, write_oem

__all__ = [
    "OrbitState", "orbit_at", "orbit_from_tle", "orbit_from_positions", "orbit_from_oem", "parse_tle",
    "tle_checksum", "tle_teme", "state_from_teme", "read_positions", "itrf_to_gcrf_matrix_fast",
    "itrf_to_gcrf", "gcrf_to_itrf", "write_oem", "MAX_GAP_s", "state_from_gcrf_nodes",
]

# Longest gap a position log may have and still be interpolated across. A cubic's error over a step h
# is about h^4 |r''''| / 384 with |r''''| ~ n^4 |r| ~ 1e-5 m/s^4 in LEO (n = 1.1e-3 rad/s,
# |r| = 6,900 km): 120 s gives ~5 m, ~0.1 nT of field at 20 nT/km.
MAX_GAP_s = 120.0
# Node spacing for the interpolated celestial-to-intermediate matrix: the largest short-period
# nutation term (0.23", 13.7 d, IERS Conventions 2010 table 5.3a) bends by A w^2 h^2 / 8 = 3e-7" (1.5e-12
# rad) over 10 minutes, far below anything recon resolves.
CIO_NODE_STEP_s = 600.0

_TLE_TEMPLATE = {
    1: "1 NNNNNC NNNNNAAA NNNNN.NNNNNNNN +.NNNNNNNN +NNNNN-N +NNNNN-N N NNNNN",
    2: "2 NNNNN NNN.NNNN NNN.NNNN NNNNNNN NNN.NNNN NNN.NNNN NN.NNNNNNNNNNNNNN",
}
# 0-based columns that hold a blank or a '.' in each line (Hoots & Roehrich 1980, TLE format)
_TLE_BLANKS = {1: (1, 8, 17, 32, 43, 52, 61, 63), 2: (1, 7, 16, 25, 33, 42, 51)}
_TLE_DOTS = {1: (23,), 2: (11, 20, 37, 46, 54)}


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
    """Matrices M (N, 3, 3) with r_gcrf = M @ r_itrf, as :func:`recon.frames.itrf_to_gcrf_matrix`.

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
    q, angle = _earth_orientation(time_utc, dut1_s, node_step_s)
    return np.swapaxes(frames._r3(angle) @ q, -1, -2)


def _earth_orientation(time_utc: np.ndarray, dut1_s: float = 0.0,
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


def _spin(angle: np.ndarray, v: np.ndarray) -> np.ndarray:
    """R3(angle) @ v for each row: (N,) rad, (N, 3) -> (N, 3) (frame rotation about z)."""
    c, s = np.cos(angle), np.sin(angle)
    return np.stack([c * v[:, 0] + s * v[:, 1], -s * v[:, 0] + c * v[:, 1], v[:, 2]], axis=-1)


def _apply(m: np.ndarray, v: np.ndarray) -> np.ndarray:
    return np.einsum("nij,nj->ni", m, v)


def _apply_t(m: np.ndarray, v: np.ndarray) -> np.ndarray:
    return np.einsum("nji,nj->ni", m, v)


def itrf_to_gcrf(time_utc: np.ndarray, v_itrf: np.ndarray, dut1_s: float = 0.0) -> np.ndarray:
    """GCRF components (N, 3) of vectors given in ITRF components (N, 3) at each instant (no Earth-rate
    term: for positions and field vectors, not velocities). Same rotation as
    :func:`itrf_to_gcrf_matrix_fast`, applied without forming the matrices."""
    q, angle = _earth_orientation(time_utc, dut1_s)
    return _apply_t(q, _spin(-angle, np.asarray(v_itrf, dtype=float)))


def gcrf_to_itrf(time_utc: np.ndarray, v_gcrf: np.ndarray, dut1_s: float = 0.0) -> np.ndarray:
    """ITRF components (N, 3) of vectors given in GCRF components (N, 3); inverse of :func:`itrf_to_gcrf`."""
    q, angle = _earth_orientation(time_utc, dut1_s)
    return _spin(angle, _apply(q, np.asarray(v_gcrf, dtype=float)))


def _state(time_utc, r_gcrf, v_gcrf, r_itrf, reason, source) -> OrbitState:
    n = len(time_utc)
    lat, lon, h = (np.full(n, np.nan) for _ in range(3))
    ok = reason == ""
    if np.any(ok):
        lat[ok], lon[ok], h[ok] = frames.itrf_to_geodetic(r_itrf[ok])
    for a in (r_gcrf, v_gcrf, r_itrf):
        a[~ok] = np.nan
    return OrbitState(time_utc, r_gcrf, v_gcrf, r_itrf, lat, lon, h, reason, source)


def _times(time_utc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    t = np.atleast_1d(np.asarray(time_utc, dtype="datetime64[ns]"))
    if t.ndim != 1:
        raise ValueError(f"Expected time_utc of shape (N,), got {t.shape}")
    reason = np.full(t.shape, "", dtype=object)
    reason[np.isnat(t)] = "time is NaT"
    return t, reason


def state_from_gcrf_nodes(t, reason, r_gcrf, v_gcrf, dut1_s, source) -> OrbitState:
    q, angle = _earth_orientation(t, dut1_s)
    r_itrf = _spin(angle, _apply(q, np.where(np.isfinite(r_gcrf), r_gcrf, 0.0)))
    return _state(t, r_gcrf, v_gcrf, r_itrf, reason, source)


def _itrf_to_gcrf_state(t, r_itrf_km, v_itrf_km_s, dut1_s):
    """GCRF position and velocity of ITRF states: v_gcrf = M (v_itrf + w x r_itrf)."""
    q, angle = _earth_orientation(t, dut1_s)
    w = np.array([0.0, 0.0, OMEGA_EARTH_rad_s])
    return (_apply_t(q, _spin(-angle, r_itrf_km)),
            _apply_t(q, _spin(-angle, v_itrf_km_s + np.cross(w, r_itrf_km))))


# ---------------------------------------------------------------------------------------- TLE
def tle_checksum(line: str) -> int:
    """Modulo-10 checksum of a TLE line's first 68 columns: digits count, '-' counts 1."""
    return sum(int(c) if c.isdigit() else (1 if c == "-" else 0) for c in line[:68]) % 10


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
    t, reason = _times(time_utc)
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
    t, _ = _times(time_utc)
    r_teme, v_teme, reason = tle_teme(sat, t)
    return state_from_teme(t, r_teme, v_teme, dut1_s=dut1_s, reason=reason, source="tle")


def state_from_teme(time_utc: np.ndarray, r_teme_km: np.ndarray, v_teme_km_s: np.ndarray, *,
                    dut1_s: float = 0.0, reason: np.ndarray | None = None, source: str = "teme") -> OrbitState:
    """An :class:`OrbitState` from TEME states: r_itrf = R3(GMST82) r_teme (Vallado et al. 2006,
    App. C; polar motion neglected, so ITRF here is PEF), r_gcrf = M r_itrf with M from
    :func:`itrf_to_gcrf_matrix_fast`, and v_gcrf = M R3(GMST82) v_teme (TEME and GCRF are both
    quasi-inertial: the product turns by < 1e-10 rad/s).

    Parameters
    ----------
    time_utc : (N,) datetime64[ns], UTC
    r_teme_km : (N, 3) array, km, TEME
    v_teme_km_s : (N, 3) array, km/s, TEME
    reason : (N,) array of str, optional
        Rows already known to be invalid.
    """
    t, r0 = _times(time_utc)
    reason = r0 if reason is None else np.where(r0 != "", r0, np.asarray(reason, dtype=object))
    r_teme = np.atleast_2d(np.asarray(r_teme_km, dtype=float))
    v_teme = np.atleast_2d(np.asarray(v_teme_km_s, dtype=float))
    reason[(reason == "") & ~(np.all(np.isfinite(r_teme), axis=1) & np.all(np.isfinite(v_teme), axis=1))] = \
        "no TEME state"
    gmst = frames.gmst82_rad(np.where(np.isnat(t), np.datetime64(0, "ns"), t), dut1_s)
    q, angle = _earth_orientation(t, dut1_s)
    r_itrf = _spin(gmst, np.nan_to_num(r_teme))
    # GCRF = c2i^T R3(-(ERA + s')) R3(GMST) TEME: one turn by GMST - ERA - s', then c2i^T
    r_gcrf = _apply_t(q, _spin(gmst - angle, np.nan_to_num(r_teme)))
    v_gcrf = _apply_t(q, _spin(gmst - angle, np.nan_to_num(v_teme)))
    return _state(t, r_gcrf, v_gcrf, r_itrf, reason.astype(object), source)


# ------------------------------------------------------------------------------- position log
def _column_times_utc(values: pd.Series, spec: TimeSpec, path: Path) -> np.ndarray:
    """UTC datetime64[ns] of a log's time column, per the mission file's time spec."""

    def bad(i: int, what: str) -> InputError:
        return InputError(f"expected {what} in column {spec.column!r}, got {values.iloc[i]!r}", path,
                          line=i + 2, key=spec.column)

    if spec.format == "iso":
        t = pd.to_datetime(values, utc=True, format="ISO8601", errors="coerce")
        if t.isna().any():
            raise bad(int(np.argmax(t.isna().to_numpy())), "an ISO 8601 UTC time")
        return t.dt.tz_localize(None).to_numpy(dtype="datetime64[ns]")
    x = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
    if not np.all(np.isfinite(x)):
        raise bad(int(np.argmax(~np.isfinite(x))), "a number")
    if spec.format == "unix":
        return (np.round(x * 1e9).astype(np.int64)).astype("datetime64[ns]")
    if spec.format == "gps":
        gps = np.datetime64(GPS_EPOCH_UTC, "ns") + np.round(x * 1e9).astype(np.int64).astype("timedelta64[ns]")
        # GPS - UTC = (TAI - UTC) - 19 s (ICD-GPS-200), from pyerfa's leap-second table
        approx = gps - np.timedelta64(18, "s")
        iy, im, iday, fd = erfa.jd2cal(*frames.utc_to_jd(approx))
        gps_minus_utc_s = erfa.dat(iy, im, iday, fd) - 19.0
        return gps - np.round(gps_minus_utc_s * 1e9).astype(np.int64).astype("timedelta64[ns]")
    # ticks: epoch + count / rate_hz, unwrapping a counter that rolls over at 2**rollover_bits
    count = x.copy()
    if spec.rollover_bits is not None:
        span = float(2 ** spec.rollover_bits)
        jumps = np.concatenate([[0.0], np.cumsum(np.where(np.diff(count) < -span / 2, span, 0.0))])
        count = count + jumps
    return np.datetime64(spec.epoch, "ns") + np.round(count / spec.rate_hz * 1e9).astype(np.int64).astype(
        "timedelta64[ns]")


def read_positions(spec: PositionsSpec) -> tuple[np.ndarray, np.ndarray]:
    """Read a position log: UTC times (M,) sorted and unique, and positions (M, 3) in km, in the
    log's frame (``spec.frame``)."""
    path = Path(spec.file)
    try:
        df = pd.read_csv(path)
    except (OSError, pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as e:
        raise InputError(f"expected a CSV position log, could not read it ({' '.join(str(e).split())})",
                         path) from None
    for col in (spec.time.column, *spec.columns):
        if col not in df.columns:
            raise InputError(f"expected a column {col!r}, got columns {list(df.columns)}", path, line=1,
                             key=col)
    if len(df) < 2:
        raise InputError(f"expected at least 2 rows of positions, got {len(df)}", path)
    t = _column_times_utc(df[spec.time.column], spec.time, path)
    xyz = np.empty((len(df), 3))
    for k, col in enumerate(spec.columns):
        v = pd.to_numeric(df[col], errors="coerce").to_numpy(dtype=float)
        if not np.all(np.isfinite(v)):
            i = int(np.argmax(~np.isfinite(v)))
            raise InputError(f"expected a finite number in column {col!r}, got {df[col].iloc[i]!r}", path,
                             line=i + 2, key=col)
        xyz[:, k] = v
    if spec.unit == "m":
        xyz = xyz * 1e-3
    order = np.argsort(t, kind="stable")
    t, xyz = t[order], xyz[order]
    keep = np.concatenate([[True], np.diff(t.astype(np.int64)) > 0])  # first row of repeated times
    return t[keep], xyz[keep]


def _coverage(path: Path, t: np.ndarray, lo: np.datetime64, hi: np.datetime64, what: str,
              outside: str = "raise") -> np.ndarray:
    """(N,) bool: instants outside [lo, hi]. With ``outside="raise"`` any such instant raises; with
    ``"nan"`` only a set of instants none of which is covered raises (the rows become NaN rows)."""
    ok = ~np.isnat(t)
    out = ok & ((t < lo) | (t > hi))
    if np.any(out) and (outside == "raise" or not np.any(ok & ~out)):
        tt = t[ok]
        raise InputError(f"expected times within the {what}'s coverage {lo} to {hi} UTC, got times from "
                         f"{tt.min()} to {tt.max()}", path)
    return out


def orbit_from_positions(spec: PositionsSpec, time_utc: np.ndarray, *, dut1_s: float = 0.0,
                         max_gap_s: float = MAX_GAP_s, outside: str = "raise") -> OrbitState:
    """Orbit from a position log (ITRF or GCRF), interpolated in GCRF.

    The log's positions are rotated to GCRF at their own times, then each run without a gap longer
    than ``max_gap_s`` is interpolated with a not-a-knot cubic spline (scipy ``CubicSpline``); the
    velocity is the spline's derivative. Instants inside a longer gap are NaN rows with a reason.

    ``outside="nan"`` makes instants before the first or after the last logged position NaN rows
    with a reason instead of an error (as long as some instant is covered).

    Raises
    ------
    InputError
        On a malformed log, or an instant before the first or after the last logged position.
    """
    t, reason = _times(time_utc)
    t_log, p_log = read_positions(spec)
    out = _coverage(Path(spec.file), t, t_log[0], t_log[-1], "position log", outside)
    reason[out] = f"outside the position log's coverage {t_log[0]} to {t_log[-1]} UTC"
    if spec.frame == "itrf":
        q, angle = _earth_orientation(t_log, dut1_s)
        p_log = _apply_t(q, _spin(-angle, p_log))
    r = np.full((len(t), 3), np.nan)
    v = np.full((len(t), 3), np.nan)
    x_log = (t_log - t_log[0]).astype(np.int64) / 1e9
    x = np.where(np.isnat(t), np.nan, (t - t_log[0]).astype(np.int64) / 1e9)
    breaks = np.flatnonzero(np.diff(x_log) > max_gap_s)
    starts = np.concatenate([[0], breaks + 1])
    stops = np.concatenate([breaks, [len(x_log) - 1]])
    covered = np.zeros(len(t), dtype=bool)
    for a, b in zip(starts, stops, strict=True):
        inside = (x >= x_log[a]) & (x <= x_log[b])
        if b == a or not np.any(inside):
            continue
        spline = CubicSpline(x_log[a:b + 1], p_log[a:b + 1], axis=0)
        r[inside] = spline(x[inside])
        v[inside] = spline(x[inside], 1)
        covered |= inside
    gap = ~covered & (reason == "")
    reason[gap] = f"in a gap longer than {max_gap_s:g} s of the position log"
    return state_from_gcrf_nodes(t, reason, r, v, dut1_s, "positions")


# ---------------------------------------------------------------------------------------- OEM
def orbit_from_oem(path: str | Path, time_utc: np.ndarray, *, dut1_s: float = 0.0,
                   outside: str = "raise") -> OrbitState:
    """Orbit from a CCSDS OEM file, interpolated per segment as the file names (see :mod:`recon.oem`).

    Each segment's states are first expressed in GCRF (Earth-fixed ones with
    v_gcrf = M (v_itrf + w x r_itrf)), then interpolated there. An instant covered by no segment
    but inside the file's overall span is a NaN row with a reason.

    Raises
    ------
    InputError
        On a malformed file or an unsupported frame (naming the line), or instants outside the span.
    """
    path = Path(path)
    t, reason = _times(time_utc)
    segments = read_oem(path)
    lo = min(s.start_utc for s in segments)
    hi = max(s.stop_utc for s in segments)
    out = _coverage(path, t, lo, hi, "OEM file", outside)
    reason[out] = f"outside the OEM file's coverage {lo} to {hi} UTC"
    r = np.full((len(t), 3), np.nan)
    v = np.full((len(t), 3), np.nan)
    done = np.isnat(t) | out
    for seg in segments:
        inside = ~done & (t >= seg.start_utc) & (t <= seg.stop_utc)
        if not np.any(inside):
            continue
        if seg.frame == "itrf":
            r_n, v_n = _itrf_to_gcrf_state(seg.time_utc, seg.r_km, seg.v_km_s, dut1_s)
        elif seg.frame == "teme":
            m = frames.teme_to_gcrf_matrix(seg.time_utc, dut1_s)
            r_n, v_n = _apply(m, seg.r_km), _apply(m, seg.v_km_s)
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


# ------------------------------------------------------------------------------------ dispatch
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
