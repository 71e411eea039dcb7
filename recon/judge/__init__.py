"""Judge the magnetic controller of one pass: replay the law, identify the coils from the motion, verdict.

The judgement (:class:`ControllerJudgement`) carries one :class:`AxisJudgement` per coil and, in its
``diagnostics``, the typed figures behind it; every decision threshold is in ``THRESHOLDS``.
"""

from .judgement import judge_pass
from .thresholds import THRESHOLDS
from .types import (
    AxisJudgement,
    ControllerJudgement,
    CrosstalkFeedback,
    EffectAssessment,
    JudgementDiagnostics,
    LatencyProfile,
    RateBiasEvidence,
    Trend,
)

__all__ = [
    "AxisJudgement",
    "ControllerJudgement",
    "judge_pass",
    "THRESHOLDS",
    "JudgementDiagnostics",
    "LatencyProfile",
    "RateBiasEvidence",
    "EffectAssessment",
    "CrosstalkFeedback",
    "Trend",
]
