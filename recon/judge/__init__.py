"""Judge the magnetic controller of one pass: replay the law, identify the coils from the motion, verdict."""

from .judgement import AxisJudgement, ControllerJudgement, judge_pass
from .thresholds import THRESHOLDS

__all__ = [
    "AxisJudgement",
    "ControllerJudgement",
    "judge_pass",
    "THRESHOLDS",
]
