"""The command line: parses arguments and calls the pipeline, the simulator and the fleet. Nothing else lives here.

Exit status: 0 ok; 1 anomalies of severity critical found (``run``), a pass failed or had a critical
anomaly (``batch``), a drift detected (``trend``); 2 bad input (one-line message).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .core import InputError, __version__

__all__ = ["main", "EXIT_OK", "EXIT_CRITICAL", "EXIT_BAD_INPUT"]

EXIT_OK, EXIT_CRITICAL, EXIT_BAD_INPUT, EXIT_INTERNAL = 0, 1, 2, 3


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors in one line with exit status 2."""

    def error(self, message):  # noqa: D401 - argparse API
        raise InputError(f"{message} (see 'recon {self.prog.split()[-1]} --help')"
                         if " " in self.prog else f"{message} (see 'recon --help')")


def _parser() -> argparse.ArgumentParser:
    from .core import __version__

    p = _Parser(prog="recon", description="Reconstruct one pass of a magnetically controlled small "
                                          "satellite from its downlinked logs.")
    p.add_argument("--version", action="version", version=f"recon {__version__}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    r = sub.add_parser("run", help="every stage on one pass; writes reports/<pass id>/")
    r.add_argument("mission", type=Path, help="mission file (TOML)")
    r.add_argument("--out", type=Path, default=Path("reports"), help="folder for reports (default: reports)")

    i = sub.add_parser("inspect", help="load and clean only: per-file table and the ledger")
    i.add_argument("mission", type=Path)
    i.add_argument("--out", type=Path, default=Path("reports"))

    c = sub.add_parser("crosstalk", help="magnetometer calibration and coil crosstalk table")
    c.add_argument("mission", type=Path)
    c.add_argument("--out", type=Path, default=Path("reports"))

    d = sub.add_parser("demo", help="write a simulated pass (or a season of passes) with its truth")
    d.add_argument("--scenario", default=None, help="scenario name (see --list; default nominal)")
    d.add_argument("--seed", type=int, default=0)
    d.add_argument("--out", type=Path, default=None,
                   help="folder to write (default: demo-<scenario>-<seed>, or demo-season-<seed>)")
    d.add_argument("--duration", type=float, default=None, help="pass length in seconds")
    d.add_argument("--list", action="store_true", help="list the scenarios and exit")
    d.add_argument("--season", type=int, default=None, metavar="N",
                   help="write N nominal passes of one spacecraft spread over months, its magnetometer bias "
                        "drifting and one coil weakening at rates recorded in season.json")
    d.add_argument("--no-drift", action="store_true", help="with --season: nothing drifts")
    d.add_argument("--spacing-days", type=float, default=18.0, help="with --season: days between passes")
    _add_fleet_commands(sub)
    return p


def _add_fleet_commands(sub) -> None:
    b = sub.add_parser("batch", help="run every pass under a folder and archive each (SQLite)")
    b.add_argument("dir", type=Path, help="folder searched for mission files")
    b.add_argument("--archive", type=Path, default=Path("reports") / "archive.sqlite",
                   help="the archive (default: reports/archive.sqlite)")
    b.add_argument("--out", type=Path, default=Path("reports"), help="folder for the pass reports (default: reports)")
    b.add_argument("--workers", type=int, default=None, help="local worker processes (default: one per CPU)")
    b.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run on an existing Dask distributed cluster (scheduler address, e.g. tcp://host:8786)")
    b.add_argument("--rerun", action="store_true", help="run passes already archived with the same inputs too")

    t = sub.add_parser("trend", help="trends of one satellite's archived passes: trend.html and trend.json")
    t.add_argument("archive", type=Path, help="archive written by 'recon batch'")
    t.add_argument("--satellite", default=None, help="which satellite (needed when the archive holds several)")
    t.add_argument("--out", type=Path, default=Path("reports") / "trend", help="folder (default: reports/trend)")
    t.add_argument("--fleet", type=Path, default=None, help="fleet file whose [trend] section sets the thresholds")


def _cmd_run(a) -> int:
    from .pipeline import run_pass

    result = run_pass(a.mission, a.out, progress=sys.stderr.isatty())
    print(result.describe())
    return EXIT_CRITICAL if result.has_critical else EXIT_OK


def _cmd_inspect(a) -> int:
    from .pipeline import inspect_pass

    result = inspect_pass(a.mission, a.out)
    print(result.table)
    print(f"ledger: {result.ledger_path}")
    return EXIT_OK


def _cmd_crosstalk(a) -> int:
    from .pipeline import crosstalk_pass

    print(crosstalk_pass(a.mission, a.out))
    return EXIT_OK


def _cmd_season(a) -> int:
    from .simulate import simulate_season

    if a.scenario not in (None, "nominal"):
        raise InputError(f"expected no --scenario with --season (a season is nominal passes), got {a.scenario!r}",
                         key="--scenario")
    out = a.out if a.out is not None else Path(f"demo-season-{a.seed}")
    season = simulate_season(a.season, out, seed=a.seed, drift=not a.no_drift, spacing_days=a.spacing_days,
                             duration_s=a.duration)
    print(f"wrote {len(season.mission_paths)} passes of {season.truth['satellite']} under {out} "
          f"(truth in {out / 'season.json'})")
    return EXIT_OK


def _cmd_demo(a) -> int:
    from .simulate import list_scenarios, simulate_pass

    if a.season is not None and not a.list:
        return _cmd_season(a)
    if a.no_drift:
        raise InputError("expected --no-drift only with --season", key="--no-drift")
    scenarios = list_scenarios()
    if a.list:
        width = max(map(len, scenarios))
        print("\n".join(f"{name:<{width}}  {what}" for name, what in scenarios.items()))
        return EXIT_OK
    a.scenario = a.scenario or "nominal"
    if a.scenario not in scenarios:
        raise InputError(f"expected one of {', '.join(scenarios)}, got {a.scenario!r}", key="--scenario")
    out = a.out if a.out is not None else Path(f"demo-{a.scenario}-{a.seed}")
    kwargs = {} if a.duration is None else {"duration_s": a.duration}
    simulate_pass(a.scenario, seed=a.seed, out_dir=out, **kwargs)
    print(f"wrote {out / 'mission.toml'} (truth in {out / 'truth'})")
    return EXIT_OK


def _cmd_batch(a) -> int:
    from .fleet import record_line, run_batch
    from .report import ProgressBar

    if a.workers is not None and a.scheduler:
        raise InputError("expected --workers or --scheduler, not both", key="--workers")
    bar = ProgressBar(sys.stderr) if sys.stderr.isatty() else None

    def show(record, done: int, total: int) -> None:
        if bar is not None:
            bar(f"batch: {done} of {total} passes", done / total)
        else:
            print(record_line(record, done, total), flush=True)

    result = run_batch(a.dir, a.archive, out_root=a.out, workers=a.workers, scheduler=a.scheduler, rerun=a.rerun,
                       on_record=show)
    print(result.describe())
    for r in result.failed:
        print(f"  FAILED {r.pass_id}: {r.error}")
    return EXIT_CRITICAL if result.failed or result.critical else EXIT_OK


def _cmd_trend(a) -> int:
    from .fleet import build_trend, load_fleet_file, write_trend

    report = build_trend(a.archive, a.satellite, load_fleet_file(a.fleet))
    page, data = write_trend(report, a.out)
    drifts = ", ".join(t.parameter.name for t in report.drifts) or "none"
    print(f"trend of {report.satellite or '(unnamed satellite)'}: {report.passes} pass(es), {report.tested} "
          f"parameter(s) tested; drift detected: {drifts}")
    print(f"wrote {page} and {data}")
    return EXIT_CRITICAL if report.drift_detected else EXIT_OK


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``recon`` command; returns the exit status."""
    try:
        a = _parser().parse_args(argv)
        return {"run": _cmd_run, "inspect": _cmd_inspect, "crosstalk": _cmd_crosstalk,
                "demo": _cmd_demo, "batch": _cmd_batch, "trend": _cmd_trend}[a.command](a)
    except InputError as e:
        print(f"recon: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("recon: interrupted", file=sys.stderr)
        return 130
    except Exception as e:  # a fault of recon itself: one line, never a traceback, never exit 1
        where = e.__traceback__
        while where is not None and where.tb_next is not None:
            where = where.tb_next
        at = "" if where is None else f" at {Path(where.tb_frame.f_code.co_filename).name}:{where.tb_lineno}"
        print(f"recon: internal error: {type(e).__name__}: {' '.join(str(e).split())}{at} (recon {__version__}); "
              "this is a fault in recon, not in your data or spacecraft: please report it with the mission file "
              "and the logs", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
