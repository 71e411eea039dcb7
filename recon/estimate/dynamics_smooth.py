"""The filter runs of dynamics mode: relinearisation, the backward filter that restarts the forward
one, and the consider term of the model's uncertainty.

Without a gyro the opening attitude can be tens of degrees off, and an extended Kalman filter and
its Rauch-Tung-Striebel smoother linearised about such a start inherit the error for minutes: the
smoother corrects the forward track only to first order. The forward filter does converge once the
field has turned enough, so its final state is good; a filter run backwards in time from there
reaches the pass's first step converged. Euler's equations are unchanged under ``t -> -t`` with the
body rate reversed (``w x J w`` and the torques, which depend on the attitude only, keep their
sign), so the backward filter is the same compiled filter on the rows in reverse order with the rate
negated. The forward filter then restarts from the backward filter's first state, with twice its
covariance (that state has seen every measurement, which the forward filter will use again; doubling
the covariance halves their weight in the start, common practice, no source), and the smoother runs
about a track that is right from the start.

The consider term: the smoother rerun with the model parameters moved along each column of the
square root of their covariance; the outer products of the changes in attitude and rate are added
to the stated covariance (Schmidt's consider covariance, by finite differences).

References
----------
Fraser, D. C. and Potter, J. E. (1969). The optimum linear smoother as a combination of two optimum
linear filters. IEEE Trans. Automatic Control 14(4), 387-390 (the backward filter) (memory).
Schmidt, S. F. (1966). Application of state-space methods to navigation problems. Advances in
Control Systems 3, 293-340 (the consider covariance) (memory).
Tapley, B. D., Schutz, B. E. and Born, G. H. (2004). Statistical Orbit Determination. Elsevier.
Sec. 6.3 (consider covariance analysis) (memory).
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy.spatial.transform import Rotation

from .dynamics_fit import FilterDiverged, FitProblem, ModelFit, dynamics_inputs, forward_only
from .initial import InitialState
from .kernels import MODE_DYNAMICS, unpack_covariance
from .run import FilterRun, run_filter
from .types import Track

__all__ = ["filter_run", "relinearised", "backward_start", "smoothed_run", "consider_changes", "with_consider",
           "BACKWARD_COVARIANCE_FACTOR"]

BACKWARD_COVARIANCE_FACTOR = 2.0


def filter_run(problem: FitProblem, p: np.ndarray, init: InitialState) -> FilterRun:
    """Forward filter and smoother over all rows of ``problem`` for model parameters ``p``.

    Raises
    ------
    FilterDiverged
        The smoothed attitude or rate is not finite somewhere.
    """
    prm, u = problem.model(p)
    k = len(problem.t)
    run = run_filter(MODE_DYNAMICS, problem.t, u, problem.usable.copy(), problem.b_body_nT, problem.b_ref_nT, prm,
                     init, np.arange(k, dtype=np.int64), k)
    if not (np.isfinite(run.q_s).all() and np.isfinite(run.v_s).all()):
        raise FilterDiverged("the dynamics-mode filter diverged (non-finite smoothed state)")
    return run


def _positive(q: np.ndarray) -> np.ndarray:
    return (q if q[3] >= 0 else -q).copy()


def relinearised(problem: FitProblem, p: np.ndarray, init: InitialState, restarts: int
                 ) -> tuple[FilterRun, InitialState]:
    """The filter and smoother, restarted ``restarts`` times from the smoothed first state.

    The opening's sigmas are kept, so the restarted filter does not count the data twice; only the
    point it is linearised about moves.
    """
    run = filter_run(problem, p, init)
    for _ in range(restarts):
        init = dataclasses.replace(init, q_body_from_gcrf=_positive(run.q_s[0]), v=run.v_s[0].copy())
        run = filter_run(problem, p, init)
    return run, init


def backward_start(problem: FitProblem, p: np.ndarray, run: FilterRun, init: InitialState) -> InitialState:
    """The forward filter's start taken from a filter run backwards in time from its final state.

    The backward filter starts from the forward filter's final state and covariance (rate reversed)
    and runs over the rows in reverse order; its state at the first row, with its covariance times
    BACKWARD_COVARIANCE_FACTOR (diagonal), becomes the forward filter's start.
    """
    prm, u = problem.model(p)
    t_rev = problem.t[-1] - problem.t[::-1]
    m = u[:, 0:3]
    m_rev = np.empty_like(m)
    m_rev[:-1] = m[:-1][::-1]  # reversed step j covers the forward step K-2-j
    m_rev[-1] = m_rev[-2] if len(m) > 1 else m[-1]
    u_rev = dynamics_inputs(t_rev, m_rev, np.ascontiguousarray(problem.r_km[::-1]))
    p_end = np.diag(unpack_covariance(run.p_f[-1:], 6)[0])
    start = dataclasses.replace(init, q_body_from_gcrf=_positive(run.q_f[-1]), v=-run.v_f[-1],
                                sigma_att_rad=np.sqrt(p_end[:3]), sigma_v=np.sqrt(p_end[3:]))
    back = forward_only(t_rev, u_rev, np.ascontiguousarray(problem.usable[::-1]),
                        np.ascontiguousarray(problem.b_body_nT[::-1]), np.ascontiguousarray(problem.b_ref_nT[::-1]),
                        prm, start)
    p0 = np.diag(unpack_covariance(back.p_packed[-1:], 6)[0]) * BACKWARD_COVARIANCE_FACTOR
    return dataclasses.replace(init, q_body_from_gcrf=_positive(back.q[-1]), v=-back.v[-1],
                               sigma_att_rad=np.sqrt(p0[:3]), sigma_v=np.sqrt(p0[3:]))


def smoothed_run(problem: FitProblem, p: np.ndarray, init: InitialState, restarts: int
                 ) -> tuple[FilterRun, InitialState]:
    """The final run: ``restarts`` relinearisations, the backward filter, and the forward filter and
    smoother restarted from it. Returns the run and the start it used."""
    run, init = relinearised(problem, p, init, restarts)
    init = backward_start(problem, p, run, init)
    return filter_run(problem, p, init), init


def consider_changes(problem: FitProblem, fit: ModelFit, init: InitialState, base: FilterRun,
                     free: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Changes of the smoothed and forward [attitude (rad, body), rate (rad/s)] (K, 6, F) when the model
    parameters move along each column of the square root of their covariance (F free parameters);
    ``D D^T`` is the consider covariance at each step. The start ``init`` is held.
    """
    cov = fit.covariance[np.ix_(free, free)]
    root = np.linalg.cholesky(cov + np.eye(len(free)) * 1e-30)
    k = len(problem.t)
    d_s, d_f = np.empty((k, 6, len(free))), np.empty((k, 6, len(free)))
    rs0, rf0 = Rotation.from_quat(base.q_s), Rotation.from_quat(base.q_f)
    for col in range(len(free)):
        p = fit.params.copy()
        p[free] += root[:, col]
        run = filter_run(problem, p, init)
        d_s[:, :3, col] = (Rotation.from_quat(run.q_s) * rs0.inv()).as_rotvec()
        d_s[:, 3:, col] = run.v_s - base.v_s
        d_f[:, :3, col] = (Rotation.from_quat(run.q_f) * rf0.inv()).as_rotvec()
        d_f[:, 3:, col] = run.v_f - base.v_f
    return d_s, d_f


def with_consider(track: Track, d: np.ndarray) -> Track:
    """The track with ``D D^T`` added to its covariance and its sigmas updated."""
    cov = track.covariance + np.einsum("kif,kjf->kij", d, d)
    s = np.sqrt(np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None))
    return dataclasses.replace(track, covariance=cov, sigma_att_rad=s[:, :3], sigma_rate_rad_s=s[:, 3:])
