"""recon: reconstruct one pass of a magnetically controlled small satellite from its downlinked logs.

The public API for notebooks; the CLI (``recon ...``) calls the same functions. Heavier stages are
imported on first use, so ``import recon`` stays quick.
"""

from .config import Mission, load_mission
from .core import Anomaly, InputError, __version__

__all__ = [
    "Anomaly", "InputError", "Mission", "load_mission", "__version__",
    "load_pass", "clean_pass", "reference_field", "orbit_at", "calibrate_pass", "estimate_attitude",
    "judge_pass", "run_pass", "inspect_pass", "simulate_pass", "write_aem", "read_aem",
    "run_batch", "build_trend", "simulate_season",
]

_LAZY = {
    "load_pass": "load", "clean_pass": "clean", "reference_field": "field", "orbit_at": "orbit",
    "calibrate_pass": "calibrate", "estimate_attitude": "estimate", "judge_pass": "judge",
    "run_pass": "pipeline", "inspect_pass": "pipeline", "simulate_pass": "simulate",
    "write_aem": "report", "read_aem": "report",
    "run_batch": "fleet", "build_trend": "fleet", "simulate_season": "simulate",
}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'recon' has no attribute {name!r}")
