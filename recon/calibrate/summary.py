"""Text and JSON views of a :class:`recon.calibrate.Calibration` (summary block, crosstalk table)."""

from __future__ import annotations

from typing import Any

import numpy as np

from .agreement import CrosstalkAgreement
from .model import AXES

__all__ = ["summary_block", "agreement_block", "format_crosstalk_table", "contamination_nT"]


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
    """The ``calibration`` block of summary.json for a Calibration (undetermined values are None)."""
    imax = cal.max_current_A
    out: dict[str, Any] = {
        "frame": "magnetometer sensor axes (b_meas = S b_true + bias + K i)",
        "bias_nT": _list(cal.bias_nT),
        "bias_nT_sigma": _list(cal.bias_nT_sigma),
        "soft_iron": _list(cal.soft_iron),
        "soft_iron_sigma": _list(cal.soft_iron_sigma),
        "crosstalk_nT_per_A": _list(cal.crosstalk_nT_per_A),
        "crosstalk_nT_per_A_sigma": _list(cal.crosstalk_nT_per_A_sigma),
        "crosstalk_step_nT_per_A": _list(cal.crosstalk_step_nT_per_A),
        "crosstalk_step_nT_per_A_sigma": _list(cal.crosstalk_step_nT_per_A_sigma),
        "crosstalk_combined_nT_per_A": _list(cal.crosstalk_combined_nT_per_A),
        "crosstalk_combined_nT_per_A_sigma": _list(cal.crosstalk_combined_nT_per_A_sigma),
        "crosstalk_agreement": agreement_block(cal.agreement),
        "contamination_full_current_nT": (None if imax is None
                                          else _list(contamination_nT(cal.crosstalk_combined_nT_per_A, imax))),
        "residual_rms_nT": {"before": _val(cal.residual_rms_nT.get("before")),
                            "after": _val(cal.residual_rms_nT.get("after"))},
        "mag_sampling": cal.mag_sampling,
        "noise_nT": _val(cal.noise_nT),
        "samples_used": int(cal.n_used),
        "undetermined": dict(cal.undetermined),
        "notes": list(cal.notes),
    }
    return out


def agreement_block(agreement: CrosstalkAgreement) -> dict[str, Any]:
    """The ``crosstalk_agreement`` entry of the calibration block (values not compared are None)."""
    return {"chi2": agreement.chi2, "dof": agreement.dof, "p_value": agreement.p_value, "agree": agreement.agree,
            "z": _list(agreement.z), "elements_beyond_3_sigma": list(agreement.elements_beyond_3_sigma),
            "test": agreement.test}


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
    """The ``recon crosstalk`` table (anomalies are listed by the caller): K with 1 sigma from both
    estimates and combined, the coil
    field at full current per sensor axis (every coil at full current, signs adding), the |b| residual before and after,
    and whether the estimates agree.

    Parameters
    ----------
    cal : recon.calibrate.Calibration
    max_current_A : (3,) array, A, optional
        Each coil's maximum current (default: the one the calibration used).
    """
    imax = cal.max_current_A if max_current_A is None else np.asarray(max_current_A, dtype=float)
    out = ["Coil crosstalk at the magnetometer, nT per A (+- 1 sigma), magnetometer sensor axes"]
    if cal.mag_sampling is None:
        out.append("no coil log: crosstalk not estimated")
    else:
        out.append(f"magnetometer sampling: {cal.mag_sampling}"
                   + ("" if imax is None else "; max current " + ", ".join(f"{v:.3g}" for v in imax) + " A"))
        out.append("")
        out.append("attitude-independent fit (|b| against the reference field):")
        out += _k_table(cal.crosstalk_nT_per_A, cal.crosstalk_nT_per_A_sigma, imax)
        out.append("")
        if cal.crosstalk_step_nT_per_A is None:
            out.append("step response (gyro, no reference field): not available")
        else:
            out.append("step response at switching instants (gyro, no reference field):")
            out += _k_table(cal.crosstalk_step_nT_per_A, cal.crosstalk_step_nT_per_A_sigma, imax)
        out.append("")
        out.append("combined (removed from the calibrated field):")
        out += _k_table(cal.crosstalk_combined_nT_per_A, cal.crosstalk_combined_nT_per_A_sigma, imax)
        out.append("")
        ag = cal.agreement
        if ag.agree is None:
            out.append("agreement of the two estimates: not tested (no element determined by both)")
        else:
            verdict = "agree" if ag.agree else "DISAGREE"
            out.append(f"agreement: chi-square {ag.chi2:.1f} for {ag.dof} elements, p = {ag.p_value:.3g}: "
                       f"the two estimates {verdict}"
                       + (f" (beyond 3 sigma: {', '.join(ag.elements_beyond_3_sigma)})"
                          if ag.elements_beyond_3_sigma else ""))
    r = cal.residual_rms_nT
    if r.get("before") is not None:
        out.append(f"|b| - |b_ref| RMS: before {r['before']:.0f} nT, after {r['after']:.0f} nT "
                   f"(magnetometer noise {cal.noise_nT:.0f} nT)")
    else:
        out.append("|b| - |b_ref| RMS: no reference field")
    reasons: dict[str, list[str]] = {}
    for name, why in cal.undetermined.items():
        reasons.setdefault(why, []).append(name)
    for why, names in reasons.items():
        out.append(f"undetermined {', '.join(names)}: {why}")
    return "\n".join(out)
