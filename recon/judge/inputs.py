"""The judge's input checks: array shapes, strictly increasing UTC times, and the arrays of one pass.

Every check raises recon's ``InputError`` naming the argument, what was expected and what was found.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..core import InputError, body_from_gcrf, seconds_since

__all__ = ["PassArrays", "checked_array", "checked_seconds", "check_pass_inputs", "raw_gyro"]


def checked_array(name: str, a: Any, tail: tuple[int, ...], n: int | None = None,
                  allow_none: bool = False) -> np.ndarray | None:
    """``a`` as a float array of shape (N, *tail) (N = ``n`` when given); None passes when ``allow_none``."""
    if a is None:
        if allow_none:
            return None
        raise InputError(f"expected an array of shape (N, {', '.join(map(str, tail))}), got None", key=name)
    x = np.asarray(a, float)
    if x.ndim != 1 + len(tail) or x.shape[1:] != tail or (n is not None and len(x) != n):
        want = f"({n if n is not None else 'N'}{''.join(', ' + str(t) for t in tail)})"
        raise InputError(f"expected an array of shape {want}, got {x.shape}", key=name)
    return x


def checked_seconds(name: str, t: Any, epoch: np.datetime64) -> np.ndarray:
    """UTC times (datetime64[ns], strictly increasing) as float seconds since ``epoch``."""
    try:
        tt = np.asarray(t, dtype="datetime64[ns]")
    except (TypeError, ValueError):
        raise InputError(f"expected UTC times (datetime64[ns]), got {np.asarray(t).dtype}", key=name) from None
    if tt.ndim != 1:
        raise InputError(f"expected a 1-D array of times, got shape {tt.shape}", key=name)
    s = seconds_since(tt, epoch)
    if len(s) > 1 and np.any(np.diff(s) <= 0):
        raise InputError("expected strictly increasing times (clean the log first), got a step back or a "
                         f"repeat at row {int(np.argmax(np.diff(s) <= 0)) + 1}", key=name)
    return s


@dataclass(frozen=True)
class PassArrays:
    """The checked arrays of one pass, times as float seconds since ``epoch`` (the first rate sample).

    Attributes
    ----------
    epoch : datetime64[ns] UTC
    inertia_kg_m2 : (3, 3); mag_sensor_to_body : (3, 3) M, v_body = M v_sensor
    t_s : (N,) s; w_body_rad_s : (N, 3) rad/s, body frame: the reconstructed rate history
    t_mag_s : (Nm,) s; b_mag_body_nT : (Nm, 3) raw magnetometer in body axes (nominal mounting), nT
    t_coil_s : (Nc,) s; i_coil_A : (Nc, 3) logged coil commands, A
    b_body_nT : (N, 3) the field in body axes, nT
    r_gcrf_km : (N, 3) km, GCRF, or None; r_body_km : (N, 3) km, body axes, or None
    b_gcrf_nT : (N, 3) nT, GCRF, or None (as given, for the geomagnetic inclination)
    w_cov_rad2_s2 : (N, 3, 3) or None
    K_nT_per_A : (3, 3) crosstalk, sensor axes, undetermined entries zero, or None
    """

    epoch: np.datetime64
    inertia_kg_m2: np.ndarray
    mag_sensor_to_body: np.ndarray
    t_s: np.ndarray
    w_body_rad_s: np.ndarray
    t_mag_s: np.ndarray
    b_mag_body_nT: np.ndarray
    t_coil_s: np.ndarray
    i_coil_A: np.ndarray
    b_body_nT: np.ndarray
    r_gcrf_km: np.ndarray | None
    r_body_km: np.ndarray | None
    b_gcrf_nT: np.ndarray | None
    w_cov_rad2_s2: np.ndarray | None
    K_nT_per_A: np.ndarray | None


def check_pass_inputs(*, inertia_kg_m2, mag_sensor_to_body, time_mag_utc, b_mag_sensor_nT, time_coil_utc, i_coil_A,
                      time_utc, w_body_rad_s, q_body_from_gcrf=None, b_gcrf_nT=None, b_body_nT=None,
                      r_gcrf_km=None, w_cov_rad2_s2=None, K_nT_per_A=None) -> PassArrays:
    """Check the arrays of :func:`judge_pass` (same names and meanings) and convert the times.

    Raises
    ------
    InputError
        Arrays of the wrong shape, time stamps that are not strictly increasing, no field in body
        axes, or fewer than 3 rate samples or 2 coil-log rows.
    """
    J = checked_array("inertia_kg_m2", inertia_kg_m2, (3,))
    if J.shape != (3, 3):
        raise InputError(f"expected a 3x3 inertia matrix, got shape {J.shape}", key="inertia_kg_m2")
    M = checked_array("mag_sensor_to_body", mag_sensor_to_body, (3,))
    epoch = np.asarray(time_utc, dtype="datetime64[ns]")[0]
    t = checked_seconds("time_utc", time_utc, epoch)
    w = checked_array("w_body_rad_s", w_body_rad_s, (3,), len(t))
    t_mag = checked_seconds("time_mag_utc", time_mag_utc, epoch)
    b_mag_body = checked_array("b_mag_sensor_nT", b_mag_sensor_nT, (3,), len(t_mag)) @ M.T
    t_coil = checked_seconds("time_coil_utc", time_coil_utc, epoch)
    i_coil = checked_array("i_coil_A", i_coil_A, (3,), len(t_coil))
    q = checked_array("q_body_from_gcrf", q_body_from_gcrf, (4,), len(t), allow_none=True)
    if b_body_nT is not None:
        b_body = checked_array("b_body_nT", b_body_nT, (3,), len(t))
    elif q is not None and b_gcrf_nT is not None:
        b_body = body_from_gcrf(q, checked_array("b_gcrf_nT", b_gcrf_nT, (3,), len(t)))
    else:
        raise InputError("expected b_body_nT, or q_body_from_gcrf with b_gcrf_nT, got neither", key="b_body_nT")
    r_gcrf = checked_array("r_gcrf_km", r_gcrf_km, (3,), len(t), allow_none=True)
    r_body = body_from_gcrf(q, r_gcrf) if (r_gcrf is not None and q is not None) else None
    P = checked_array("w_cov_rad2_s2", w_cov_rad2_s2, (3, 3), len(t), allow_none=True)
    K = checked_array("K_nT_per_A", K_nT_per_A, (3,), 3, allow_none=True)
    if K is not None and not np.all(np.isfinite(K)):
        K = np.nan_to_num(K, nan=0.0)  # undetermined entries (a coil that never switched) count as none
    if len(t) < 3 or len(t_coil) < 2:
        raise InputError(f"expected at least 3 rate samples and 2 coil-log rows, got {len(t)} and {len(t_coil)}",
                         key="time_utc")
    return PassArrays(epoch, J, M, t, w, t_mag, b_mag_body, t_coil, i_coil, b_body, r_gcrf, r_body,
                      None if b_gcrf_nT is None else np.asarray(b_gcrf_nT, float), P, K)


def raw_gyro(epoch: np.datetime64, time_gyro_utc, w_gyro_body_rad_s) -> tuple[np.ndarray, np.ndarray] | None:
    """The raw gyro log as (s since ``epoch``, rad/s body axes (Ng, 3)), or None without one."""
    if time_gyro_utc is None or w_gyro_body_rad_s is None:
        return None
    tg = checked_seconds("time_gyro_utc", time_gyro_utc, epoch)
    return tg, checked_array("w_gyro_body_rad_s", w_gyro_body_rad_s, (3,), len(tg))
