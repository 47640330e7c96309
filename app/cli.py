"""The `quietlayer` command.

Exit codes: 0 success, 2 a bad scenario file or option (the message names the
field and the allowed range).
"""

from __future__ import annotations

import argparse
import sys
from importlib.metadata import PackageNotFoundError, version

CAUTION = ("Quietlayer estimates the numerical reflection of a simulation boundary. It certifies "
           "no RF-exposure, EMC or safety compliance; defer to local codes and licensed practice.")


def _version() -> str:
    try:
        return version("quietlayer")
    except PackageNotFoundError:  # a source tree that was never installed
        return "unknown"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="quietlayer",
        description="Choose and check the absorbing layer (CPML) at the edge of an FDTD grid.",
        epilog="examples:\n  quietlayer demo\n  quietlayer demo --scenario my_cell.toml\n\n" + CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"quietlayer {_version()}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")
    demo = commands.add_parser("demo", help="run the built-in demo scenario (or a file) and print its figures")
    demo.add_argument("--scenario", metavar="FILE.toml", help="a scenario file instead of the demo")
    return parser


def _run_demo(path: str | None) -> int:
    from quietlayer.assets import preset_path
    from quietlayer.engine import Scenario, ScenarioError, simulate

    try:
        text = open(path, encoding="utf-8").read() if path else preset_path("demo").read_text("utf-8")
        scenario = Scenario.from_toml(text)
    except OSError as exc:
        print(f"quietlayer: cannot read {path}: {exc.strerror}", file=sys.stderr)
        return 2
    except ScenarioError as exc:
        print(f"quietlayer: {path or 'demo'}: {exc}", file=sys.stderr)
        return 2
    result = simulate(scenario)
    nx, ny = result.grid.cells
    print(f"{scenario.title or path}")
    print(f"  grid {nx} x {ny} cells with layers, {scenario.steps} steps, dt = {scenario.dt * 1e12:.4g} ps, "
          f"{scenario.cells_per_wavelength:.1f} cells per wavelength at f_max")
    for name, series in result.probes.items():
        print(f"  probe {name!r}: peak |{result.quantity}| = {abs(series).max():.4g}")
    left = result.energy[-1] / result.energy.max()
    print(f"  energy left in the grid at the end: {left:.3g} of its peak")
    print(f"  run time {result.elapsed_s * 1e3:.1f} ms ({result.mcells_per_s:.0f} Mcells/s, "
          f"{result.threads} thread{'s' if result.threads > 1 else ''})")
    print(CAUTION)
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command == "demo":
        return _run_demo(args.scenario)
    parser.print_help()
    return 0


if __name__ == "__main__":
    sys.exit(main())
