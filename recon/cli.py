"""The command line: parses arguments and calls the pipeline. Nothing else lives here.

Exit status: 0 ok; 1 anomalies of severity critical found (``run``); 2 bad input (one-line message).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .core import InputError

__all__ = ["main", "EXIT_OK", "EXIT_CRITICAL", "EXIT_BAD_INPUT"]

EXIT_OK, EXIT_CRITICAL, EXIT_BAD_INPUT = 0, 1, 2


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

    d = sub.add_parser("demo", help="write a simulated pass with its truth")
    d.add_argument("--scenario", default="nominal", help="scenario name (see --list)")
    d.add_argument("--seed", type=int, default=0)
    d.add_argument("--out", type=Path, default=None, help="folder to write (default: demo-<scenario>-<seed>)")
    d.add_argument("--duration", type=float, default=None, help="pass length in seconds")
    d.add_argument("--list", action="store_true", help="list the scenarios and exit")
    return p


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


def _cmd_demo(a) -> int:
    from .simulate import list_scenarios, simulate_pass

    scenarios = list_scenarios()
    if a.list:
        width = max(map(len, scenarios))
        print("\n".join(f"{name:<{width}}  {what}" for name, what in scenarios.items()))
        return EXIT_OK
    if a.scenario not in scenarios:
        raise InputError(f"expected one of {', '.join(scenarios)}, got {a.scenario!r}", key="--scenario")
    out = a.out if a.out is not None else Path(f"demo-{a.scenario}-{a.seed}")
    kwargs = {} if a.duration is None else {"duration_s": a.duration}
    simulate_pass(a.scenario, seed=a.seed, out_dir=out, **kwargs)
    print(f"wrote {out / 'mission.toml'} (truth in {out / 'truth'})")
    return EXIT_OK


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``recon`` command; returns the exit status."""
    try:
        a = _parser().parse_args(argv)
        return {"run": _cmd_run, "inspect": _cmd_inspect, "crosstalk": _cmd_crosstalk,
                "demo": _cmd_demo}[a.command](a)
    except InputError as e:
        print(f"recon: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("recon: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
