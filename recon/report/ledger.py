"""The ledger file and the ``recon inspect`` table: every input line accounted for, in plain text."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from ..core import utc_texts

__all__ = ["format_inspect_table", "write_ledger"]


def format_inspect_table(cleaned) -> str:
    """Per-log plain-text table: lines read, kept, dropped (and by reason), flagged, gaps,
    saturated samples, time span and median rate."""
    summ = cleaned.inputs_summary()
    head = ["sensor", "file", "read", "kept", "dropped", "flagged", "gaps", "saturated",
            "first sample (UTC)", "last sample (UTC)", "rate (Hz)"]
    rows = []
    for name, s in summ.items():
        rate = s["median_rate_hz"]
        rows.append([name, s["file"], f"{s['rows_read']:,}", f"{s['rows_kept']:,}",
                     f"{sum(s['dropped'].values()):,}", f"{sum(s['flagged'].values()):,}", f"{s['gaps']:,}",
                     f"{s['saturated']:,}", s["start_utc"] or "-", s["stop_utc"] or "-",
                     f"{rate:.4g}" if rate is not None else "-"])
    width = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(head)]
    left = {0, 1, 8, 9}

    def fmt(cells):
        padded = (c.ljust(w) if i in left else c.rjust(w)
                  for i, (c, w) in enumerate(zip(cells, width, strict=True)))
        return "  ".join(padded)

    lines = [f"pass {cleaned.mission.pass_id}", fmt(head), fmt(["-" * w for w in width])]
    for r, s in zip(rows, summ.values(), strict=True):
        lines.append(fmt(r))
        if s["dropped"]:
            lines.append("    dropped: " + ", ".join(f"{k} {v:,}" for k, v in s["dropped"].items()))
        if s["flagged"]:
            lines.append("    flagged: " + ", ".join(f"{k} {v:,}" for k, v in s["flagged"].items()))
    return "\n".join(lines)


def write_ledger(path: Path | str, ledger: pd.DataFrame) -> None:
    """Write the ledger as CSV, sorted by file then line (then sensor): byte-for-byte repeatable.

    Times are ISO 8601 UTC to the microsecond with a "Z"; an unreadable time is left empty.
    """
    df = ledger.sort_values(["file", "line", "sensor", "action", "reason"], kind="stable").copy()
    t = df["time_utc"].to_numpy(dtype="datetime64[ns]")
    txt = utc_texts(t, unit="us")
    df["time_utc"] = txt.astype(object)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    df.to_csv(path, index=False, lineterminator="\n")

