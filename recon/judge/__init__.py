"""Judge the magnetic controller of one pass: replay the law, identify the coils from the motion, verdict."""

from .judgement import (
    THRESHOLDS,
    AxisJudgement,
    ControllerJudgement,
    judge_pass,
)

__all__ = [
    "AxisJudgement",
    "ControllerJudgement",
    "judge_pass",
    "THRESHOLDS",
]
