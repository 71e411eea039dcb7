"""Where the satellite was: position and velocity at any UTC instants, in GCRF and ITRF, from a TLE
(SGP4), a position log or a CCSDS OEM file.
"""

from .oem import (
    OemSegment,
    parse_ccsds_time,
    read_oem,
    write_oem,
)
from .sources import (
    MAX_GAP_s,
    OrbitState,
    gcrf_to_itrf,
    itrf_to_gcrf,
    itrf_to_gcrf_matrix_fast,
    orbit_at,
    orbit_from_oem,
    orbit_from_positions,
    orbit_from_tle,
    parse_tle,
    read_positions,
    state_from_gcrf_nodes,
    state_from_teme,
    tle_checksum,
    tle_teme,
)

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
]
