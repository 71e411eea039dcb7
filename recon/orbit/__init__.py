"""Where the satellite was: position and velocity at any UTC instants, in GCRF and ITRF, from a TLE
(SGP4), a position log or a CCSDS OEM file.
"""

from .interpolate import hermite_interpolate, lagrange_interpolate
from .oem import (
    OemSegment,
    parse_ccsds_time,
    read_oem,
    write_oem,
)
from .positions import MAX_GAP_s, orbit_from_positions, read_positions
from .sources import orbit_at, orbit_from_oem
from .state import (
    OrbitState,
    gcrf_to_itrf,
    itrf_to_gcrf,
    itrf_to_gcrf_matrix_fast,
    state_from_gcrf_nodes,
)
from .tle import orbit_from_tle, parse_tle, state_from_teme, tle_checksum, tle_teme

__all__ = [
    "OrbitState",
    "orbit_at",
    "orbit_from_tle",
    "orbit_from_positions",
    "orbit_from_oem",
    "parse_tle",
    "tle_checksum",
    "tle_teme",
    "state_from_teme",
    "read_positions",
    "itrf_to_gcrf_matrix_fast",
    "itrf_to_gcrf",
    "gcrf_to_itrf",
    "MAX_GAP_s",
    "state_from_gcrf_nodes",
    "OemSegment",
    "read_oem",
    "write_oem",
    "parse_ccsds_time",
    "lagrange_interpolate",
    "hermite_interpolate",
]
