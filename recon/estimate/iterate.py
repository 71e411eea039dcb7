"""Iterated smoothing: relinearise the filter about its own smoothed track, in both directions of time.

A filter started far from the truth (an opening attitude tens of degrees off: a slow pass whose field
hardly turns in the opening window, or a fast one whose gyro clips there) linearises about a poor
track, and the smoother inherits that. So the pass is solved again, alternately backwards and forwards
in time, each run starting from where the previous smoothed track is best known: its other end. A
run backwards in time is the same filter on the time-reversed pass: the body turns at -w, so the gyro
reads -(w + beta) and the bias it estimates is -beta. The iteration stops when the smoothed attitude
moves by less than a tenth of its own sigma anywhere (or after ``MAX_RUNS`` runs). The run kept is a
run forwards in time, so that its filter track is the causal one (what was known at each instant from
the data before it): when the last run went backwards, one more forward run is made from its smoothed
start.

References
----------
Bell, B. M. (1994). The iterated Kalman smoother as a Gauss-Newton method. SIAM J. Optim. 4(3),
626-636 (relinearisation about the smoothed track) (memory).
Fraser, D. C. and Potter, J. E. (1969). The optimum linear smoother as a combination of two optimum
linear filters. IEEE Trans. Automat. Control 14(4), 387-390 (a filter backwards in time) (memory).
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy.spatial.transform import Rotation

from .initial import InitialState
from .kernels import MODE_GYRO
from .run import FilterRun, run_filter

__all__ = ["iterate_smoothing", "state_at", "MAX_RUNS", "SETTLED_SIGMAS"]

MAX_RUNS = 4
# The smoothed attitude counts as settled when no sample moved by more than this many of its sigmas.
SETTLED_SIGMAS = 0.1


def state_at(run: FilterRun, step: int, row: int, flip: bool, method: str) -> InitialState:
    """The smoothed state at ``step`` (output row ``row``) as a start for another run; the bias sign
    flipped for a run in the other direction of time."""
    q = run.q_s[step]
    cov = run.p_s6[row]
    sa = np.sqrt(np.clip(np.diag(cov)[:3], 0.0, None))
    sv = np.sqrt(np.clip(np.diag(cov)[3:6], 0.0, None))
    v = -run.v_s[step] if flip else run.v_s[step]
    # twice the smoothed sigma: the start must not be held tighter than the previous run knew it
    return InitialState(q.copy(), v.copy(), 2.0 * sa + 1e-6, 2.0 * sv + 1e-9, method, 0.0)


def _reverse(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a[::-1])


def _run_reversed(t, u, is_mag, z, r, prm, init: InitialState, out_idx, n_out) -> FilterRun:
    """The filter and smoother on the time-reversed pass, returned in forward time (bias sign restored)."""
    k = len(t)
    t_r = t[-1] - t[::-1]
    u_r = np.empty_like(u)
    u_r[:-1] = u[-2::-1]
    u_r[-1] = u[0]
    u_r[:, :3] *= -1.0
    rows = out_idx[::-1].copy()
    sel = rows >= 0
    rows[sel] = n_out - 1 - rows[sel]
    run = run_filter(MODE_GYRO, t_r, u_r, _reverse(is_mag), _reverse(z), _reverse(r), prm, init, rows, n_out)
    flip = np.diag([1.0, 1.0, 1.0, -1.0, -1.0, -1.0])
    p_s6 = flip @ run.p_s6[::-1] @ flip
    return FilterRun(t, _reverse(run.q_f), -_reverse(run.v_f), _reverse(run.db_f), _reverse(run.p_f),
                     _reverse(run.nis), _reverse(run.q_s), -_reverse(run.v_s), _reverse(run.db_s), p_s6,
                     run.smoother_bad) if k else run


def _moved(a: FilterRun, b: FilterRun, sel: np.ndarray) -> float:
    """Largest attitude change between two smoothed tracks, in units of b's own sigma."""
    d = (Rotation.from_quat(b.q_s[sel]) * Rotation.from_quat(a.q_s[sel]).inv()).as_rotvec()
    sig = np.sqrt(np.clip(np.diagonal(b.p_s6[:, :3, :3], axis1=1, axis2=2), 1e-30, None))
    return float(np.max(np.abs(d) / sig))


def iterate_smoothing(first: FilterRun, t: np.ndarray, u: np.ndarray, is_mag: np.ndarray, z: np.ndarray,
                      r: np.ndarray, prm: np.ndarray, out_idx: np.ndarray, n_out: int
                      ) -> tuple[FilterRun, int, float]:
    """Solve the pass again from the far end of the last smoothed track until it settles.

    Parameters
    ----------
    first : the first forward run; t, u, is_mag, z, r, prm, out_idx, n_out : as for
        :func:`recon.estimate.run.run_filter` (gyro mode)

    Returns
    -------
    run : the last run, in forward time; runs : runs made in all (the first included); moved : the
        last change in sigmas
    """
    sel = np.flatnonzero(out_idx >= 0)
    run, runs, moved, backwards = first, 1, np.inf, True
    while runs < MAX_RUNS:
        if backwards:
            start = state_at(run, sel[-1], n_out - 1, True, "smoothed end of the previous run")
            nxt = _run_reversed(t, u, is_mag, z, r, prm, start, out_idx, n_out)
        else:
            start = state_at(run, sel[0], 0, False, "smoothed start of the previous run")
            nxt = run_filter(MODE_GYRO, t, u, is_mag, z, r, prm, start, out_idx, n_out)
        moved = _moved(run, nxt, sel)
        run, runs, backwards = nxt, runs + 1, not backwards
        if moved <= SETTLED_SIGMAS:
            break
    if not backwards:  # the last run went backwards in time: its filter track is not the causal one
        start = state_at(run, sel[0], 0, False, "smoothed start of the previous run")
        run, runs = run_filter(MODE_GYRO, t, u, is_mag, z, r, prm, start, out_idx, n_out), runs + 1
    return dataclasses.replace(run), runs, moved
