"""The opening state and the rigid-body model chosen together, on a coarse grid.

Without a gyro the opening fit is limited by the model it propagates with: over a couple of minutes
an inertia a few percent off or a residual dipole of a few mA m^2 turns the body enough that the
best fit about the field direction can sit a hundred degrees from the truth, and the filter run with
the mission file's model can even prefer that wrong start. Only with the model fitted does the whole
pass tell the starts apart. So each distinct opening candidate (from windows of several lengths) gets
its own model fit, by maximum likelihood around the filter (:mod:`.dynamics_fit`), on a coarse grid
(about one magnetometer row a second, so a filter run costs a tenth), and the candidate with the
largest likelihood after its fit wins. Its fitted model is the first iterate of the fit on all rows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .dynamics_fit import FilterDiverged, FitProblem, ModelFit, fit_model, forward_run, neg_log_likelihood
from .dynamics_smooth import backward_start, relinearised
from .initial import InitialState

__all__ = ["OpeningChoice", "choose_opening", "coarse_step", "COARSE_INTERVAL_S",
           "OPENING_WINDOWS"]

# The coarse grid: one row about every second. Euler's equations are still integrated exactly enough
# there (RK4 at 1 s is accurate to ~(w dt)^5 = 5e-5 rad at 8 deg/s), and the coil profile is
# integrated over each coarse step, so only measurement information is given up.
COARSE_INTERVAL_S = 1.0
# Opening windows, as multiples of the requested opening window: shorter windows suffer less from the
# model error, longer ones see more of the field's turn in GCRF.
OPENING_WINDOWS = (0.5, 1.0, 2.0)


@dataclass(frozen=True)
class OpeningChoice:
    """The chosen opening and its coarse model fit.

    Attributes
    ----------
    init : InitialState at t[0] from the backward filter on the coarse grid (mean and covariance)
    fit : ModelFit or None (no fit), the coarse fit that chose it
    candidates : int, candidates tried
    neg_log_likelihood : (candidates,) twice the negative log-likelihood of each after its fit (coarse grid)
    """

    init: InitialState
    fit: ModelFit | None
    candidates: int
    neg_log_likelihood: np.ndarray


def coarse_step(t: np.ndarray) -> int:
    """Rows per coarse step: COARSE_INTERVAL_S over the median row interval, at least 1."""
    dt = float(np.median(np.diff(t))) if len(t) > 1 else COARSE_INTERVAL_S
    return max(1, int(round(COARSE_INTERVAL_S / max(dt, 1e-9))))


def choose_opening(problem: FitProblem, candidates: list[InitialState], free: np.ndarray,
                   fit: bool = True) -> OpeningChoice:
    """Each candidate relinearised and, with ``fit``, its model fitted on the coarse grid; the most likely wins.

    After its fit each candidate is relinearised once more and restarted from the backward filter
    (:func:`recon.estimate.dynamics_smooth.backward_start`), whose covariance replaces the opening fit's
    (tens of degrees about the field, which lets the filter on all rows wander from a good start).

    Parameters
    ----------
    problem : FitProblem on all rows; candidates : openings at t[0]; free : indices of the fitted parameters
    fit : False keeps the prior mean (the candidates are then compared under the mission file's model)
    """
    coarse = problem.decimated(coarse_step(problem.t))
    p0 = problem.prior.mean
    best, costs = None, []
    for cand in candidates:
        try:
            _, init = relinearised(coarse, p0, cand, 1)
            f = fit_model(coarse, init, free=free) if fit else None
            p = p0 if f is None else f.params
            run, init = relinearised(coarse, p, init, 1)
            init = backward_start(coarse, p, run, init)
            cost = neg_log_likelihood(coarse, forward_run(coarse, p, init))
        except FilterDiverged:  # this opening loses the track: it cannot be the most likely
            costs.append(np.inf)
            continue
        costs.append(cost)
        if best is None or cost < best[0]:
            best = (cost, init, f)
    if best is None:
        raise FilterDiverged(f"the dynamics-mode filter diverged from every one of {len(candidates)} openings")
    return OpeningChoice(best[1], best[2], len(candidates), np.asarray(costs))
