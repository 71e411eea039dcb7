"""The outputs of one pass: report.html with its figures, CCSDS AEM."""

from . import figures
from .aem import (
    ATTITUDE_TYPES,
    Aem,
    AemSegment,
    format_aem,
    read_aem,
    write_aem,
)
from .html import (
    Figure,
    render_html,
    write_report,
)

__all__ = [
    "figures",
    "Figure",
    "render_html",
    "write_report",
    "AemSegment",
    "Aem",
    "format_aem",
    "write_aem",
    "read_aem",
    "ATTITUDE_TYPES",
]
