"""Progress of the long stages, shown on a terminal."""

from __future__ import annotations

__all__ = ["ProgressBar", "say"]


class ProgressBar:
    """A one-line progress bar on stderr, for terminals only."""

    def __init__(self, stream):
        self.stream, self.last = stream, None

    def __call__(self, stage: str, fraction: float) -> None:
        pct = int(round(100 * min(max(fraction, 0.0), 1.0)))
        if (stage, pct) == self.last:
            return
        self.last = (stage, pct)
        bar = "#" * (pct // 4) + "." * (25 - pct // 4)
        end = "\n" if pct >= 100 else ""
        self.stream.write(f"\r{stage[:40]:<40} [{bar}] {pct:3d}%{end}")
        self.stream.flush()


def say(progress, stage: str, fraction: float) -> None:
    if progress is not None:
        progress(stage, fraction)
