"""Simulated passes with known truth: demo data and test data for every stage of recon.

An invented 3U-class satellite (catalogue 99990, 510 km sun-synchronous orbit, epoch mid-2026)
flies through IGRF-14 plus an unmodelled field, turns under magnetic, gravity-gradient and random
disturbance torques, and runs an onboard magnetic controller on its own noisy magnetometer (and
gyro) samples. Hardware faults (coil polarity, dead coil, coil gain, command latency, dead gyro, gyro
bias jump) and data faults in the logs (gaps, duplicates, out-of-order rows, spikes, blank and
malformed lines, saturation) can be injected; every one is recorded in the truth.

>>> from recon.simulate import simulate_pass, list_scenarios
>>> sim = simulate_pass("coil_inverted", seed=3, out_dir="demo/")   # doctest: +SKIP
"""

from .api import SimulatedPass, simulate_pass
from .imperfections import IMPERFECTION_NAMES, Imperfections
from .scenarios import Fault, SimConfig, list_scenarios
from .season import Season, SeasonDrift, simulate_season

__all__ = ["simulate_pass", "list_scenarios", "SimulatedPass", "SimConfig", "Fault", "Imperfections",
           "IMPERFECTION_NAMES", "simulate_season", "Season", "SeasonDrift"]
