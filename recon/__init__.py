"""recon: reconstruct one pass of a magnetically controlled small satellite from its downlinked logs.

The public API for notebooks; the CLI (``recon ...``) calls the same functions.
"""

from .anomaly import Anomaly
from .config import Mission, load_mission
from .errors import InputError

__version__ = "0.1.0"

__all__ = ["Anomaly", "InputError", "Mission", "load_mission", "__version__"]
