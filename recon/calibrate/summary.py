"""Text and JSON views of a :class:`recon.calibrate.Calibration` (summary block, crosstalk table)."""

from __future__ import annotations

from typing import Any

import numpy as np

from .agreement import CrosstalkAgreement
from .model import AXES

__all__ = ["summary_block", "agreement_block", "determined_block", "format_crosstalk_table", "contamination_nT"]


def _val(x) -> float | None:
    return None if x is None or not np.isfinite(x) else float(x)


def _list(a) -> Any:
    if a is None:
        return None
    a = np.asarray(a, dtype=float)
    if a.ndim == 1:
        return [_val(v) for v in a]
    return [_list(r) for r in a]


def contamination_nT(k_nT_per_A: np.ndarray, max_current_A: np.ndarray) -> np.ndarray:
    """Worst-case coil field per sensor axis with every coil at full current, signs adding, nT:
    ``sum_l |K_jl| imax_l`` (NaN when an element is undetermined)."""
    return np.sum(np.abs(np.asarray(k_nT_per_A, float)) * np.asarray(max_current_A, float)[None, :], axis=1)


def summary_block(cal) -> dict[str, Any]:
    """The ``calibration`` block of summary.json for a Calibration (undetermined values are None).

    ``crosstalk_nT_per_A`` is the crosstalk removed from the field (with its sigma and 9x9 covariance);
    the separate estimates keep their own keys (``crosstalk_magnitude_``, ``crosstalk_step_``,
    ``crosstalk_synchronous_``), ``crosstalk_combined_`` is their combination with the prior, and
    ``crosstalk_determined`` says which directions of K the data determine."""
    imax = cal.max_current_A
    fusion = cal.crosstalk
    out: dict[str, Any] = {
        "frame": "magnetometer sensor axes (b_meas = S b_true + bias + K i)",
        "bias_nT": _list(cal.bias_nT),
        "bias_nT_sigma": _list(cal.bias_nT_sigma),
        "soft_iron": _list(cal.soft_iron),
        "soft_iron_sigma": _list(cal.soft_iron_sigma),
        "crosstalk_nT_per_A": _list(cal.crosstalk_nT_per_A),
        "crosstalk_nT_per_A_sigma": _list(cal.crosstalk_nT_per_A_sigma),
        "crosstalk_covariance_nT2_per_A2": None if fusion is None else _list(fusion.covariance),
        "crosstalk_magnitude_nT_per_A": _list(cal.crosstalk_magnitude_nT_per_A),
        "crosstalk_magnitude_nT_per_A_sigma": _list(cal.crosstalk_magnitude_nT_per_A_sigma),
        "crosstalk_step_nT_per_A": _list(cal.crosstalk_step_nT_per_A),
        "crosstalk_step_nT_per_A_sigma": _list(cal.crosstalk_step_nT_per_A_sigma),
        "crosstalk_synchronous_nT_per_A": _list(cal.crosstalk_synchronous_nT_per_A),
        "crosstalk_synchronous_nT_per_A_sigma": _list(cal.crosstalk_synchronous_nT_per_A_sigma),
        "crosstalk_combined_nT_per_A": _list(cal.crosstalk_combined_nT_per_A),
        "crosstalk_combined_nT_per_A_sigma": _list(cal.crosstalk_combined_nT_per_A_sigma),
        "crosstalk_prior_sigma_nT_per_A": None if fusion is None else _list(fusion.prior_sigma_nT_per_A),
        "crosstalk_determined": None if fusion is None else determined_block(fusion),
        "crosstalk_agreement": agreement_block(cal.agreement, None if fusion is None else fusion.scale_factor),
        "contamination_full_current_nT": (None if imax is None
                                          else _list(contamination_nT(cal.crosstalk_nT_per_A, imax))),
        "residual_rms_nT": {"before": _val(cal.residual_rms_nT.get("before")),
                            "after": _val(cal.residual_rms_nT.get("after"))},
        "mag_sampling": cal.mag_sampling,
        "noise_nT": _val(cal.noise_nT),
        "sensor_noise_nT": _val(cal.sensor_noise_nT),
        "samples_used": int(cal.n_used),
        "undetermined": dict(cal.undetermined),
        "notes": list(cal.notes),
    }
    return out


def determined_block(fusion) -> dict[str, Any]:
    """The ``crosstalk_determined`` entry: how many directions of K are determined, the rule, which
    elements, and every direction (unit 3x3 matrix, its sigma and how much the data shrink its prior
    variance)."""
    return {"directions": fusion.n_determined, "of": 9, "min_variance_shrink": fusion.min_variance_shrink,
            "elements": [[bool(v) for v in row] for row in fusion.elements_determined],
            "estimates": list(fusion.estimates),
            "each": [{"direction": _list(d.direction), "sigma_nT_per_A": _val(d.sigma_nT_per_A),
                      "variance_shrink": _val(d.variance_shrink), "determined": d.determined}
                     for d in fusion.directions]}


def agreement_block(agreement: CrosstalkAgreement, scale_factor: float | None = None) -> dict[str, Any]:
    """The ``crosstalk_agreement`` entry of the calibration block (values not compared are None);
    ``scale_factor``: the factor applied to the estimates' sigmas before they were combined."""
    return {"chi2": agreement.chi2, "dof": agreement.dof, "p_value": agreement.p_value, "agree": agreement.agree,
            "z": _list(agreement.z), "elements_beyond_3_sigma": list(agreement.elements_beyond_3_sigma),
            "test": agreement.test, "scale_factor": _val(scale_factor)}


def _cell(v, s, width=18) -> str:
    if v is None or not np.isfinite(v):
        return "undetermined".rjust(width)
    txt = f"{v:.0f} +- {s:.0f}" if s is not None and np.isfinite(s) else f"{v:.0f}"
    return txt.rjust(width)


def _k_table(k, k_s, imax) -> list[str]:
    lines = ["          " + "".join(f"coil {a}".rjust(18) for a in AXES) + "  at full current".rjust(18)]
    cont = contamination_nT(k, imax) if imax is not None else np.full(3, np.nan)
    for j in range(3):
        row = f"sensor {AXES[j]}  " + "".join(_cell(k[j, c], k_s[j, c]) for c in range(3))
        row += ("undetermined" if not np.isfinite(cont[j]) else f"{cont[j]:.0f} nT").rjust(18)
        lines.append(row)
    return lines


def format_crosstalk_table(cal, max_current_A=None) -> str:
    """The ``recon crosstalk`` table (anomalies are listed by the caller): K as removed with 1 sigma,
    each estimate, the coil field at full current per sensor axis (every coil at full current, signs
    adding), which directions are determined, the |b| residual before and after, and whether the
    estimates agree.

    Parameters
    ----------
    cal : recon.calibrate.Calibration
    max_current_A : (3,) array, A, optional
        Each coil's maximum current (default: the one the calibration used).
    """
    imax = cal.max_current_A if max_current_A is None else np.asarray(max_current_A, dtype=float)
    out = ["Coil crosstalk at the magnetometer, nT per A (+- 1 sigma), magnetometer sensor axes"]
    if cal.mag_sampling is None or cal.crosstalk is None:
        out.append("no coil log: crosstalk not estimated")
    else:
        out += _crosstalk_lines(cal, imax)
    r = cal.residual_rms_nT
    if r.get("before") is not None:
        out.append(f"|b| - |b_ref| RMS: before {r['before']:.0f} nT, after {r['after']:.0f} nT "
                   f"(magnetometer noise {cal.sensor_noise_nT:.0f} nT)")
    else:
        out.append("|b| - |b_ref| RMS: no reference field")
    out.append(f"calibrated field noise {cal.noise_nT:.0f} nT per axis (RMS over the samples: the sensor's "
               f"{cal.sensor_noise_nT:.0f} nT and the crosstalk's uncertainty at the currents that flowed)")
    reasons: dict[str, list[str]] = {}
    for name, why in cal.undetermined.items():
        reasons.setdefault(why, []).append(name)
    for why, names in reasons.items():
        out.append(f"undetermined {', '.join(names)}: {why}")
    return "\n".join(out)


def _crosstalk_lines(cal, imax) -> list[str]:
    fusion = cal.crosstalk
    out = [f"magnetometer sampling: {cal.mag_sampling}"
           + ("" if imax is None else "; max current " + ", ".join(f"{v:.3g}" for v in imax) + " A"), ""]
    out.append("removed from the calibrated field (the estimates and the prior combined; undetermined "
               "directions held at the prior, zero):")
    out += _k_table(cal.crosstalk_nT_per_A, cal.crosstalk_nT_per_A_sigma, imax)
    out.append(f"{fusion.n_determined} of 9 directions determined (prior variance shrunk at least "
               f"{fusion.min_variance_shrink:g} times); prior 1-sigma "
               + ", ".join(f"{v:.0f}" for v in fusion.prior_sigma_nT_per_A) + " nT/A for coils x, y, z")
    for title, k, k_s in (
            ("attitude-independent fit (|b| against the reference field)", cal.crosstalk_magnitude_nT_per_A,
             cal.crosstalk_magnitude_nT_per_A_sigma),
            ("step response at switching instants (gyro, no reference field)", cal.crosstalk_step_nT_per_A,
             cal.crosstalk_step_nT_per_A_sigma),
            ("synchronous detection, coils on against coils off (gyro, no reference field)",
             cal.crosstalk_synchronous_nT_per_A, cal.crosstalk_synchronous_nT_per_A_sigma)):
        out.append("")
        if k is None:
            out.append(f"{title}: not available")
        else:
            out.append(f"{title}:")
            out += _k_table(k, k_s, imax)
    out.append("")
    ag = cal.agreement
    if ag.agree is None:
        out.append("agreement of the estimates: not tested (fewer than two estimates of the same elements)")
    else:
        verdict = "agree" if ag.agree else "DISAGREE"
        out.append(f"agreement: chi-square {ag.chi2:.1f} for {ag.dof} degrees of freedom, p = {ag.p_value:.3g}: "
                   f"the estimates {verdict}"
                   + (f" (beyond 3 sigma: {', '.join(ag.elements_beyond_3_sigma)})"
                      if ag.elements_beyond_3_sigma else "")
                   + ("" if ag.agree else f"; their sigmas scaled by {fusion.scale_factor:.2g}"))
    return out
