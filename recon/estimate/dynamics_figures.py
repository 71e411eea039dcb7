"""Dynamics mode's rigid-body model of one pass as reported: the fitted (or kept) inertia, residual
dipole, coil gains and actuation latency with their 1-sigma (the "dynamics_model" block of
summary.json)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["DynamicsModel"]


@dataclass(frozen=True)
class DynamicsModel:
    """Dynamics mode's rigid-body model of the pass (the "dynamics_model" block of summary.json).

    Attributes
    ----------
    fitted : bool, True when the fit passed its likelihood-ratio test and is used; False when the
        mission file's model was kept (the sigmas are then the fit's: how far the data allow the model
        to be from the mission file's, which the stated attitude covariance carries)
    likelihood_ratio : float, the test's statistic (on the coarse grid the opening search fits on; the
        refit on all rows that follows an accepted fit only refines it); threshold : float, its
        chi-square threshold (1 % false alarm); free : int, parameters fitted
    inertia_kg_m2, inertia_sigma_kg_m2 : (3, 3), at the mission file's trace (the overall scale trades
        against the coil scale and is not estimated)
    residual_dipole_Am2, residual_dipole_sigma_Am2 : (3,), body frame
    coil_gain, coil_gain_sigma : (3,) or None, each coil's dipole per amp over the mission file's
    latency_s, latency_sigma_s : float or None, actuation latency after the control tick
    openings : int, opening candidates tried
    """

    fitted: bool
    likelihood_ratio: float
    threshold: float
    free: int
    inertia_kg_m2: np.ndarray
    inertia_sigma_kg_m2: np.ndarray
    residual_dipole_Am2: np.ndarray
    residual_dipole_sigma_Am2: np.ndarray
    coil_gain: np.ndarray | None
    coil_gain_sigma: np.ndarray | None
    latency_s: float | None
    latency_sigma_s: float | None
    openings: int

    def to_summary(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "source": ("fitted on this pass" if self.fitted else
                       "mission file (the fit was not significant at 1 % false alarm)"),
            "likelihood_ratio": float(self.likelihood_ratio), "likelihood_ratio_threshold": float(self.threshold),
            "parameters_free": int(self.free),
            "inertia_kg_m2": np.asarray(self.inertia_kg_m2, float).tolist(),
            "inertia_kg_m2_sigma": np.asarray(self.inertia_sigma_kg_m2, float).tolist(),
            "residual_dipole_Am2": np.asarray(self.residual_dipole_Am2, float).tolist(),
            "residual_dipole_Am2_sigma": np.asarray(self.residual_dipole_sigma_Am2, float).tolist(),
            "openings_tried": int(self.openings),
        }
        if self.coil_gain is not None:
            out["coil_gain"] = np.asarray(self.coil_gain, float).tolist()
            out["coil_gain_sigma"] = np.asarray(self.coil_gain_sigma, float).tolist()
        if self.latency_s is not None:
            out["latency_s"] = float(self.latency_s)
            out["latency_s_sigma"] = float(self.latency_sigma_s)
        return out
