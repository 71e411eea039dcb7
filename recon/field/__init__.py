"""The reference magnetic field: IGRF-14 (ppigrf) along the orbit, in GCRF."""

from .along_orbit import (
    IGRF14_START_UTC,
    IGRF14_STOP_UTC,
    ReferenceField,
    field_along_orbit,
    field_for_orbit,
    igrf_gcrf_nT,
    igrf_itrf_nT,
    reference_field,
)

__all__ = [
    "ReferenceField",
    "reference_field",
    "field_along_orbit",
    "field_for_orbit",
    "igrf_itrf_nT",
    "igrf_gcrf_nT",
    "IGRF14_START_UTC",
    "IGRF14_STOP_UTC",
]
