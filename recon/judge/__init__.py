"""Judge the magnetic controller of one pass: replay the law, identify the coils from the motion, verdict."""

from .judgement import judge_pass
from .thresholds import THRESHOLDS
from .types import AxisJudgement, ControllerJudgement

__all__ = [
    "AxisJudgement",
    "ControllerJudgement",
    "judge_pass",
    "THRESHOLDS",
]
