"""Simulation settings, injectable faults and the named scenarios.

A scenario is a set of changes to :class:`SimConfig`'s defaults (an invented 3U-class satellite in a
510 km sun-synchronous orbit, detumbling with B-dot). Callers may change any setting by keyword.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

from ..core import InputError
from .imperfections import Imperfections

__all__ = ["Fault", "SimConfig", "FAULT_KINDS", "DATA_FAULT_KINDS", "ALL_DATA_FAULTS", "list_scenarios",
           "scenario_config"]

FAULT_KINDS = ("coil_polarity_inverted", "coil_dead", "coil_gain_off", "command_latency",
               "gyro_dead", "gyro_bias_jump")
DATA_FAULT_KINDS = ("gap", "duplicate", "out_of_order", "spike", "blank_line", "malformed", "saturation")

# every kind of data fault, in every log where it makes sense (count per file)
ALL_DATA_FAULTS: dict[str, dict[str, int]] = {
    "mag.csv": {"gap": 2, "duplicate": 3, "out_of_order": 2, "spike": 3, "blank_line": 2,
                "malformed": 3, "saturation": 1},
    "gyro.csv": {"gap": 1, "duplicate": 2, "out_of_order": 1, "spike": 2, "blank_line": 1, "malformed": 3},
    "coils.csv": {"gap": 1, "duplicate": 1, "blank_line": 1, "malformed": 1},
}


@dataclass(frozen=True)
class Fault:
    """One injected hardware or software fault.

    Attributes
    ----------
    kind : str
        One of ``FAULT_KINDS``.
    axis : int or None
        0, 1, 2 for x, y, z (body axis of a coil; sensor axis of the gyro), None for all.
    start_s, stop_s : float or None
        Window in seconds since the pass epoch; None means the start / end of the pass.
    value : float or None
        coil_gain_off: factor on the current (0.5 = half); command_latency: delay, s;
        gyro_bias_jump: step in rad/s; gyro_dead: output value, rad/s (0 for a dead gyro) or None
        for a gyro stuck at its last good output.
    """

    kind: str
    axis: int | None = None
    start_s: float | None = None
    stop_s: float | None = None
    value: float | None = None

    def __post_init__(self):
        if self.kind not in FAULT_KINDS:
            raise InputError(f"expected a fault kind among {list(FAULT_KINDS)}, got {self.kind!r}",
                             key="faults")
        if self.axis is not None and self.axis not in (0, 1, 2):
            raise InputError(f"expected fault axis 0, 1, 2 or None, got {self.axis!r}", key="faults")
        if self.kind == "command_latency" and (self.value is None or self.value < 0):
            raise InputError(f"expected a latency >= 0 s, got {self.value!r}", key="faults")


@dataclass(frozen=True)
class SimConfig:
    """Every setting of a simulated pass (units in the names; tuples for vectors and matrices)."""

    description: str = "B-dot detumble from a few deg/s, coils off around each magnetometer tick sample"
    start_utc: str = "2026-07-14T09:12:00"
    duration_s: float = 1800.0
    tle: tuple[str, str] | None = None  # None: recon's invented satellite (catalogue 99990)
    orbit_source: str = "tle"  # or "positions": a GNSS-like ITRF log with GPS time stamps
    positions_rate_hz: float = 1.0
    positions_noise_m: float = 5.0
    inertia_kg_m2: tuple = ((0.021, 0.0004, 0.0), (0.0004, 0.023, 0.0002), (0.0, 0.0002, 0.0071))
    tumble_deg_s: float = 4.0  # initial rate magnitude, random direction
    tumble_range_deg_s: tuple | None = None  # or drawn per pass, uniform in this range
    # cross-product regimes: the target is a spin about the axis of largest inertia at a rate drawn in
    # this range (random sign), and the pass starts off it by a fraction of that rate drawn in
    # target_offset_fraction (random direction); None keeps target_momentum_Nms and the tumble above
    target_rate_range_deg_s: tuple | None = None
    target_offset_fraction: tuple = (0.5, 1.0)
    w0_body_deg_s: tuple | None = None  # explicit initial rate instead
    q0_body_from_gcrf: tuple | None = None  # explicit initial attitude instead of a random one
    # magnetometer
    mag_rate_hz: float = 10.0
    mag_unit: str = "uT"
    mag_sensor_to_body: tuple = ((0.0, 1.0, 0.0), (-1.0, 0.0, 0.0), (0.0, 0.0, 1.0))
    mag_noise_nT: float = 100.0
    mag_lsb_nT: float = 10.0
    mag_full_scale_nT: float = 200_000.0
    mag_soft_iron_sigma: float = 0.015
    mag_bias_range_nT: tuple = (300.0, 3000.0)
    mag_bias_nT: tuple | None = None  # explicit bias (3,), sensor frame, instead of the drawn one (a season's drift)
    mag_crosstalk_range_nT_per_A: tuple = (800.0, 2500.0)
    mag_crosstalk_body_diag_nT_per_A: tuple | None = None
    # gyro
    gyro: bool = True
    gyro_rate_hz: float = 20.0
    gyro_sensor_to_body: tuple = ((1.0, 0.0, 0.0), (0.0, 0.0, -1.0), (0.0, 1.0, 0.0))
    gyro_arw_deg_sqrt_s: float = 0.004  # deg/s per sqrt(Hz)
    gyro_bias_walk_deg_s_sqrt_s: float = 0.0002
    gyro_bias0_sigma_deg_s: float = 0.2
    gyro_full_scale_deg_s: float = 250.0
    gyro_rollover_mid_pass: bool = False
    # coils and controller
    coil_max_current_A: tuple = (0.12, 0.12, 0.12)
    coil_dipole_per_amp_nominal: tuple = ((1.5, 0.0, 0.0), (0.0, 1.5, 0.0), (0.0, 0.0, 1.1))
    coil_gain_error_sigma: float = 0.03
    coil_misalignment_sigma_rad: float = 0.01
    mag_sampling: str = "windowed"
    off_window_s: tuple = (0.05, 0.05)
    law: str = "bdot"
    gain: float = 40_000.0
    period_s: float = 1.0
    first_tick_offset_s: float = 0.0
    target_momentum_Nms: tuple = (0.0, 0.0, 0.0)
    # environment and disturbances
    gravity_gradient: bool = True
    disturbance_sigma_Nm: float = 1e-8
    disturbance_correlation_s: float = 300.0
    unmodelled_rms_nT: float = 100.0
    # flight-like imperfections (None: the ideal hardware of the bench scenarios)
    imperfections: Imperfections | None = None
    # the seed of the hardware draws (magnetometer S, bias, K; coil tilt and gains; gyro initial bias); None:
    # the pass seed. Passes that share it fly the same spacecraft while their noise and motion differ.
    hardware_seed: int | None = None
    # faults
    faults: tuple = ()
    data_faults: dict = field(default_factory=dict)  # file -> {kind: count}; True: ALL_DATA_FAULTS
    # numerics and output
    max_step_s: float = 0.02
    truth_stride: int = 1


def _frac(duration_s: float, f: float) -> float:
    return round(duration_s * f)


# name -> (description, function of duration giving the changes)
_SCENARIOS: dict[str, tuple[str, Any]] = {
    "nominal": ("bench: B-dot detumble from 4 deg/s, windowed magnetometer sampling, gyro counter wraps mid-pass",
                lambda d: {"gyro_rollover_mid_pass": True}),
    "coil_inverted": ("bench: B-dot detumble with the y coil wired backwards (current and dipole reversed)",
                      lambda d: {"faults": (Fault("coil_polarity_inverted", axis=1),)}),
    "coil_dead": ("bench: B-dot detumble with the z coil open: no current flows, whatever is commanded",
                  lambda d: {"faults": (Fault("coil_dead", axis=2),)}),
    "coil_gain": ("bench: B-dot detumble with the x coil drive delivering half the commanded current",
                  lambda d: {"faults": (Fault("coil_gain_off", axis=0, value=0.5),)}),
    "latency": ("bench: B-dot detumble with coil currents applied 2 s after the logged command time",
                lambda d: {"faults": (Fault("command_latency", value=2.0),)}),
    "gyro_dead": ("bench: B-dot detumble; the gyro output drops to zero 40 % into the pass",
                  lambda d: {"faults": (Fault("gyro_dead", start_s=_frac(d, 0.4), value=0.0),)}),
    "gyro_bias_jump": ("bench: B-dot detumble; the gyro x bias steps by +0.5 deg/s half-way through",
                       lambda d: {"faults": (Fault("gyro_bias_jump", axis=0, start_s=_frac(d, 0.5),
                                                   value=0.5 * 3.141592653589793 / 180.0),)}),
    "data_faults": ("bench: nominal pass whose logs carry every kind of data fault (ledger in truth.json)",
                    lambda d: {"data_faults": ALL_DATA_FAULTS, "gyro_rollover_mid_pass": True}),
    "coils_on_chatter": ("bench: B-dot with the magnetometer sampled while the coils are on and a large "
                         "crosstalk: the coil field feeds back into dB/dt and the command chatters",
                         lambda d: {"mag_sampling": "coils_on",
                                    "mag_crosstalk_body_diag_nT_per_A": (40_000.0, 40_000.0, 30_000.0)}),
    "momentum": ("bench: cross-product momentum management from 1.5 deg/s towards a small z momentum",
                 lambda d: {"law": "cross_product", "gain": 0.005, "tumble_deg_s": 1.5,
                            "target_momentum_Nms": (0.0, 0.0, 5.0e-5)}),
    "quiet": ("bench: controller off: the coils never switch (crosstalk cannot be observed)",
              lambda d: {"law": "none", "gain": 0.0, "tumble_deg_s": 2.0}),
    "short": ("bench: a five-minute B-dot pass; the orbit comes as a GNSS position log with GPS time",
              lambda d: {"duration_s": 300.0, "orbit_source": "positions"}),
    # flight-like regimes: every imperfection of recon.simulate.imperfections drawn per pass
    "detumble": ("flight-like: B-dot detumble from 2-8 deg/s with every imperfection drawn (inertia, "
                 "residual dipole, magnetometer alignment and time tags, gyro scale, field, TLE age, coil log)",
                 lambda d: {"imperfections": Imperfections(), "tumble_range_deg_s": (2.0, 8.0)}),
    "momentum_orbit": ("flight-like: cross-product momentum management at 0.02-0.2 deg/s held for a whole orbit",
                       lambda d: {"imperfections": Imperfections(), "law": "cross_product", "gain": 0.005,
                                  "duration_s": 5700.0, "target_rate_range_deg_s": (0.02, 0.2)}),
    "pointing": ("flight-like: a slow spin held on its target by the cross-product law; the coils carry only "
                 "a few mA (too little to identify them)",
                 lambda d: {"imperfections": Imperfections(), "law": "cross_product", "gain": 0.005,
                            "target_rate_range_deg_s": (0.01, 0.03), "target_offset_fraction": (0.0, 0.05)}),
    "fast_tumble": ("flight-like: B-dot from a 10-15 deg/s tumble that exceeds the gyro's 8 deg/s range, so "
                    "its samples clip",
                    lambda d: {"imperfections": Imperfections(), "tumble_range_deg_s": (10.0, 15.0),
                               "gyro_full_scale_deg_s": 8.0}),
}


def list_scenarios() -> dict[str, str]:
    """Names of the built-in scenarios with a one-line description of each."""
    return {name: desc for name, (desc, _) in _SCENARIOS.items()}


def _coerce(name: str, value: Any, default: Any) -> Any:
    if name == "imperfections":
        return value if value is None or isinstance(value, Imperfections) else Imperfections(**value)
    if name == "data_faults" and isinstance(value, bool):
        return ALL_DATA_FAULTS if value else {}
    if name == "faults":
        out = []
        for f in value:
            out.append(f if isinstance(f, Fault) else Fault(**f))
        return tuple(out)
    if isinstance(default, tuple) or (default is None and isinstance(value, list)):
        return tuple(tuple(v) if isinstance(v, list) else v for v in value)
    return value


def scenario_config(scenario: str, duration_s: float | None = None, **overrides: Any) -> SimConfig:
    """The settings of a named scenario, with ``duration_s`` and any other setting replaced.

    Raises
    ------
    InputError
        For an unknown scenario or setting.
    """
    if scenario not in _SCENARIOS:
        raise InputError(f"expected a scenario among {list(_SCENARIOS)}, got {scenario!r}", key="scenario")
    fields = {f.name: f for f in dataclasses.fields(SimConfig)}
    unknown = sorted(set(overrides) - set(fields))
    if unknown:
        raise InputError(f"expected simulation settings among {sorted(fields)}, got unknown {unknown}",
                         key=unknown[0])
    desc, make = _SCENARIOS[scenario]
    base = SimConfig()
    d = float(duration_s) if duration_s is not None else overrides.get(
        "duration_s", make(base.duration_s).get("duration_s", base.duration_s))
    if not d > 0:
        raise InputError(f"expected a duration > 0 s, got {d!r}", key="duration_s")
    changes = {"description": desc, **make(d), **overrides, "duration_s": d}
    changes = {k: _coerce(k, v, getattr(base, k)) for k, v in changes.items()}
    return dataclasses.replace(base, **changes)
