"""The outputs of one pass: summary.json, report.html with its figures, the CCSDS AEM, progress on a terminal."""

from . import figures
from .aem import (
    ATTITUDE_TYPES,
    Aem,
    AemSegment,
    format_aem,
    read_aem,
    write_aem,
)
from .attitude_csv import write_attitude_csv
from .figure_set import pass_figures
from .html import (
    Figure,
    render_html,
    write_report,
)
from .ledger import format_inspect_table, write_ledger
from .progress import ProgressBar, say
from .summary import CAUTION, jsonable, settings_block, write_json

__all__ = [
    "figures",
    "write_attitude_csv",
    "pass_figures",
    "format_inspect_table",
    "write_ledger",
    "ProgressBar",
    "say",
    "CAUTION",
    "jsonable",
    "settings_block",
    "write_json",
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
