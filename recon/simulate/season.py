"""A season of simulated passes from one spacecraft, with slow drifts at stated rates (or none).

Every pass of a season flies the same hardware (one ``hardware_seed``: the same soft iron, crosstalk,
coil tilts and gains, gyro initial bias) while its noise, initial tumble and field draws come from its
own seed. The passes are the bench scenario ``"nominal"`` (ideal hardware, B-dot detumble), their
epochs ``spacing_days`` apart. Two things change slowly, both linear in time at the rates of
:class:`SeasonDrift`, and both recorded in ``season.json`` beside the passes:

- the magnetometer bias (sensor frame): ``bias(t) = bias0 + rate * years``;
- the current one coil carries per logged amp, ``factor(t) = 1 + rate * years`` (an ageing drive): the
  coil's dipole per logged amp and its crosstalk column fall with it, as they do in hardware, since
  both follow the current that flows.

Years are Julian years (365.25 days) counted from the first pass's epoch. A season with
``drift=False`` keeps the bias at ``bias0`` and the coil at its drawn gain.

>>> from recon.simulate import simulate_season
>>> season = simulate_season(20, "season/")      # doctest: +SKIP
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from ..core import DAYS_PER_JULIAN_YEAR, NS_PER_S, InputError, utc_text
from .api import simulate_pass
from .scenarios import Fault
from .writer import write_files

__all__ = ["SeasonDrift", "Season", "simulate_season", "SEASON_BIAS0_nT"]

# The bias of the season's first pass, sensor frame, nT: inside the simulator's usual 300-3000 nT per axis
SEASON_BIAS0_nT = (1200.0, -800.0, 500.0)


@dataclass(frozen=True)
class SeasonDrift:
    """The slow changes of a season, per Julian year.

    Attributes
    ----------
    bias_nT_per_year : (3,) magnetometer bias rate, sensor frame, nT per year
    coil_axis : 0, 1, 2 for the coil along body x, y, z whose drive weakens
    coil_gain_per_year : fractional change per year of the current that coil carries per logged amp
        (-0.25: it loses a quarter of its dipole per logged amp in a year)

    The default rates stand well above a season's pass-to-pass scatter: on ten 1800 s bench passes of
    one spacecraft the bias estimates scattered by 14-33 nT rms per axis and the dipoles per amp by
    0.8-2.2 % rms (measured), so 20 passes over 11 months give each rate to about 6 % (1 sigma).
    """

    bias_nT_per_year: tuple[float, float, float] = (600.0, -400.0, 300.0)
    coil_axis: int = 1
    coil_gain_per_year: float = -0.30


NO_DRIFT = SeasonDrift((0.0, 0.0, 0.0), 1, 0.0)


@dataclass(frozen=True)
class Season:
    """A written season: the mission file of every pass and the season's truth (``season.json``)."""

    out_dir: Path
    mission_paths: tuple[Path, ...]
    truth: dict


def _epochs(n_passes: int, first_utc: str, spacing_days: float) -> np.ndarray:
    t0 = np.datetime64(first_utc, "ns")
    step_ns = int(round(spacing_days * 86400 * NS_PER_S))
    return t0 + (np.arange(n_passes, dtype=np.int64) * step_ns).astype("timedelta64[ns]")


def _with_pass_keys(mission_text: str, old_id: str, pass_id: str, satellite: str, object_id: str) -> str:
    """The simulator's mission file with this season's pass id and the ``[pass]`` satellite keys."""
    old = f'id = "{old_id}"\n'
    if mission_text.count(old) != 1:
        raise InputError(f"expected one line {old.strip()!r} in the simulated mission file", key="[pass] id")
    return mission_text.replace(old, f'id = "{pass_id}"\nsatellite = "{satellite}"\nobject_id = "{object_id}"\n')


def _check(n_passes: int, spacing_days: float, drift: SeasonDrift) -> None:
    if isinstance(n_passes, bool) or not isinstance(n_passes, int | np.integer) or n_passes < 1:
        raise InputError(f"expected a whole number of passes >= 1, got {n_passes!r}", key="--season")
    if not spacing_days > 0:
        raise InputError(f"expected a spacing > 0 days, got {spacing_days!r}", key="spacing_days")
    if drift.coil_axis not in (0, 1, 2):
        raise InputError(f"expected a coil axis 0, 1 or 2, got {drift.coil_axis!r}", key="coil_axis")


def simulate_season(n_passes: int, out_dir: str | Path, *, seed: int = 0, drift: bool | SeasonDrift = True,
                    spacing_days: float = 18.0, first_utc: str = "2026-01-12T09:12:00",
                    duration_s: float | None = None, satellite: str | None = None,
                    object_id: str = "99990") -> Season:
    """Write ``n_passes`` simulated passes of one spacecraft, ``spacing_days`` apart, with their truth.

    Parameters
    ----------
    n_passes : number of passes
    out_dir : folder; each pass goes to ``<out_dir>/<pass id>/`` and the season's truth to
        ``<out_dir>/season.json``
    seed : seeds the spacecraft (``hardware_seed = seed``) and every pass (``seed * 1000 + k``)
    drift : True for the default :class:`SeasonDrift`, False for none, or a :class:`SeasonDrift`
    spacing_days : days between consecutive pass epochs
    first_utc : epoch of the first pass (UTC)
    duration_s : length of each pass, s (default: the scenario's, 1800 s)
    satellite : the ``[pass] satellite`` name (default "demo-drift" or "demo-steady")
    object_id : the ``[pass] object_id`` (the invented satellite's catalogue number)

    Returns
    -------
    Season
    """
    rates = (SeasonDrift() if drift is True else NO_DRIFT if drift is False else drift)
    _check(n_passes, spacing_days, rates)
    steady = rates == NO_DRIFT or (not any(rates.bias_nT_per_year) and rates.coil_gain_per_year == 0.0)
    satellite = satellite or ("demo-steady" if steady else "demo-drift")
    out = Path(out_dir)
    epochs = _epochs(int(n_passes), first_utc, spacing_days)
    years = (epochs - epochs[0]).astype(np.int64) / NS_PER_S / 86400.0 / DAYS_PER_JULIAN_YEAR
    width = max(2, len(str(n_passes)))
    records, paths = [], []
    for k, (t_k, y_k) in enumerate(zip(epochs, years, strict=True)):
        pass_id = f"{satellite}-{k + 1:0{width}d}"
        bias = np.asarray(SEASON_BIAS0_nT) + np.asarray(rates.bias_nT_per_year, float) * y_k
        factor = 1.0 + rates.coil_gain_per_year * y_k
        faults = () if factor == 1.0 else (Fault("coil_gain_off", axis=rates.coil_axis, value=float(factor)),)
        sim = simulate_pass("nominal", seed=seed * 1000 + k, duration_s=duration_s,
                            start_utc=str(np.datetime64(t_k, "ms")), hardware_seed=seed,
                            mag_bias_nT=tuple(bias.tolist()), faults=faults, truth_stride=10)
        texts = dict(sim.texts)
        texts["mission.toml"] = _with_pass_keys(texts["mission.toml"], sim.pass_id, pass_id, satellite, object_id)
        truth = {**sim.truth, "pass_id": pass_id, "season": {"satellite": satellite, "pass": k + 1}}
        write_files(texts, truth, out / pass_id)
        paths.append(out / pass_id / "mission.toml")
        records.append({"pass_id": pass_id, "epoch_utc": utc_text(t_k), "years_since_first": float(y_k),
                        "seed": seed * 1000 + k, "bias_nT": bias.tolist(), "coil_current_factor": float(factor),
                        "dipole_per_amp_true": np.diag(sim.C_effective).tolist(),
                        "K_nT_per_A_true": sim.K_effective_nT_per_A.tolist()})
    truth = _season_truth(satellite, object_id, seed, rates, spacing_days, sim.config.duration_s, records)
    out.mkdir(parents=True, exist_ok=True)
    (out / "season.json").write_text(json.dumps(truth, indent=1) + "\n", encoding="utf-8")
    return Season(out, tuple(paths), truth)


def _season_truth(satellite: str, object_id: str, seed: int, rates: SeasonDrift, spacing_days: float,
                  duration_s: float, records: list[dict]) -> dict:
    """The content of season.json: the stated rates, and what they make of every pass."""
    axis = "xyz"[rates.coil_axis]
    first = records[0]["dipole_per_amp_true"][rates.coil_axis] / records[0]["coil_current_factor"]
    return {
        "satellite": satellite, "object_id": object_id, "scenario": "nominal", "hardware_seed": seed,
        "passes": len(records), "spacing_days": spacing_days, "duration_s": duration_s,
        "year": "Julian year, 365.25 days, counted from the first pass's epoch",
        "drift": {**asdict(rates), "coil": axis,
                  "dipole_per_amp_per_year": rates.coil_gain_per_year * first,
                  "note": "bias(t) = bias0 + bias_nT_per_year * years (sensor frame); the coil carries "
                          "1 + coil_gain_per_year * years of its logged current, so its dipole per logged amp "
                          "and its crosstalk column scale by that factor"},
        "bias0_nT": list(SEASON_BIAS0_nT),
        "pass_list": records,
    }
