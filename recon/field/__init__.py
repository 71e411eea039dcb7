"""The reference magnetic field: IGRF-14 (ppigrf) along the orbit, in GCRF."""

from .along_orbit import GRID_STEP_s, ReferenceField, field_along_orbit, field_for_orbit, reference_field
from .igrf import IGRF14_START_UTC, IGRF14_STOP_UTC, igrf_gcrf_nT, igrf_itrf_nT

__all__ = [
    "ReferenceField",
    "reference_field",
    "field_along_orbit",
    "field_for_orbit",
    "igrf_itrf_nT",
    "igrf_gcrf_nT",
    "IGRF14_START_UTC",
    "IGRF14_STOP_UTC",
    "GRID_STEP_s",
]
