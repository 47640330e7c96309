"""The `quietlayer` command: the dashboard, and checks, sweeps, tuning and
exports of a scenario file from the terminal.

    quietlayer serve
    quietlayer check my_cell.toml --budget -60
    quietlayer sweep my_cell.toml --vary order=2:5:4 --vary sigma_ratio=0.25:2:8 --out sweep.csv
    quietlayer tune my_cell.toml --thickness 8 --write tuned.toml
    quietlayer tune my_cell.toml --target -60
    quietlayer export my_cell.toml --out handover

Each command is a module of quietlayer.app.commands with `add_parser(commands)`
and `run(args)`; `serve` lives in quietlayer.app.serve.

Exit codes:
  0    done (check: the layer is within the budget)
  1    check: the worst peak error is above the budget, the run diverged or
       the late-time check found growing energy; tune --target: no thickness
       in the range meets the target; sweep: no point could be measured;
       export: the measurement diverged (the tables are still written)
  2    a bad scenario file or option: one line on stderr naming the key, its
       line in the file and the allowed values
  130  interrupted (Ctrl-C): sweep writes the points already measured, tune
       reports (and writes) the best setting found so far
  143  the same after SIGTERM (e.g. a batch queue's time limit)
"""

from __future__ import annotations

import argparse
import sys
from importlib.metadata import PackageNotFoundError, version

from quietlayer.app import CAUTION
from quietlayer.engine.errors import ScenarioError

from .commands import check, demo, export, sweep, tune
from .commands.check import DEFAULT_BUDGET_DB  # noqa: F401 - part of this module's interface
from .commands.common import (EXIT_BAD_INPUT, EXIT_CODES, EXIT_FAILED, EXIT_INTERRUPTED, EXIT_OK,  # noqa: F401
                              EXIT_TERMINATED, BadInput, console, warnings_on_console)
from .commands.options import FORMATTER, Parser

COMMANDS = {"demo": demo, "check": check, "sweep": sweep, "tune": tune, "export": export}


def _version() -> str:
    try:
        return version("quietlayer")
    except PackageNotFoundError:  # a source tree that was never installed
        return "unknown"


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(
        prog="quietlayer",
        description="Choose and check the absorbing layer (CPML) at the edge of an FDTD grid.",
        epilog="examples:\n"
               "  quietlayer serve\n"
               "  quietlayer serve --port 8080 --no-show\n"
               "  quietlayer demo --scenario my_cell.toml\n"
               "  quietlayer check my_cell.toml --budget -60\n"
               "  quietlayer sweep my_cell.toml --vary order=2:5:4 --vary sigma_ratio=0.25:2:8 --out sweep.csv\n"
               "  quietlayer tune my_cell.toml --thickness 8 --write tuned.toml\n"
               "  quietlayer tune my_cell.toml --target -60\n"
               "  quietlayer export my_cell.toml --out handover\n\n"
               "Run 'quietlayer COMMAND --help' for each command's options.\n\n"
               f"{EXIT_CODES}\n\n{CAUTION}",
        formatter_class=FORMATTER,
    )
    parser.add_argument("--version", action="version", version=f"quietlayer {_version()}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")

    serve = commands.add_parser("serve", help="start the dashboard on the built-in demo scenario")
    serve.add_argument("--port", type=int, default=5006, help="port to listen on (default 5006; 0 picks a free one)")
    serve.add_argument("--address", default="127.0.0.1",
                       help="address to listen on (default 127.0.0.1: this machine only); give another on purpose "
                            "to let other machines in")
    serve.add_argument("--no-show", action="store_true", help="do not open a browser")
    serve.add_argument("--preset", default="demo", help="preset scenario to open (default demo)")
    for module in COMMANDS.values():
        module.add_parser(commands)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command == "serve":
        from .serve import serve
        return serve(port=args.port, address=args.address, show=not args.no_show, preset=args.preset)
    if args.command not in COMMANDS:
        parser.print_help()
        return EXIT_OK
    try:
        with warnings_on_console():
            return COMMANDS[args.command].run(args)
    except (ScenarioError, BadInput) as exc:
        console.clear()
        print(f"quietlayer: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        console.clear()
        print("quietlayer: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:  # e.g. piped into `head`: nothing more to say
        sys.stderr.close()
        return EXIT_FAILED


if __name__ == "__main__":
    sys.exit(main())
