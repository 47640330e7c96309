"""The `quietlayer` command.

Exit codes: 0 success, 2 a bad scenario file or option (the message names the
field and the allowed range).
"""

from __future__ import annotations

import argparse
import sys
from importlib.metadata import PackageNotFoundError, version

from quietlayer.app import CAUTION



def _version() -> str:
    try:
        return version("quietlayer")
    except PackageNotFoundError:  # a source tree that was never installed
        return "unknown"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="quietlayer",
        description="Choose and check the absorbing layer (CPML) at the edge of an FDTD grid.",
        epilog="examples:\n  quietlayer serve\n  quietlayer serve --port 8080 --no-show\n  quietlayer demo\n"
               "  quietlayer demo --scenario my_cell.toml\n\nexit codes: 0 done, 2 a bad scenario file or option\n\n"
               + CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
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
    demo = commands.add_parser("demo", help="measure the layer of the built-in demo scenario (or a file)")
    demo.add_argument("--scenario", metavar="FILE.toml", help="a scenario file instead of the demo")
    return parser


def _run_demo(path: str | None) -> int:
    from quietlayer.assets import preset_path
    from quietlayer.engine import Scenario, ScenarioError
    from quietlayer.engine.measure import measure

    try:
        text = open(path, encoding="utf-8").read() if path else preset_path("demo").read_text("utf-8")
        scenario = Scenario.from_toml(text)
    except OSError as exc:
        print(f"quietlayer: cannot read {path}: {exc.strerror}", file=sys.stderr)
        return 2
    except ScenarioError as exc:
        print(f"quietlayer: {path or 'demo'}: {exc}", file=sys.stderr)
        return 2
    result = measure(scenario)
    s = result.scenario
    print(s.title or path)
    print(f"  {s.nx} x {s.ny} interior cells, {s.steps} steps, dt = {s.dt * 1e12:.4g} ps, "
          f"{s.cells_per_wavelength:.1f} cells per wavelength at f_max, {s.polarization}, {s.precision}")
    print(f"  {'probe':<16}{'peak error':>12}")
    for name, value in result.peak_db.items():
        print(f"  {name:<16}{value:>9.1f} dB")
    print(f"  worst peak error {result.worst_peak_db:.1f} dB ({result.worst_probe}); "
          f"global error {result.global_db:.1f} dB")
    if result.late is not None:
        print(f"  late-time check ({result.late.steps} steps): {result.late.status}, {result.late.message}")
    source = "cached" if result.reference_cached else f"computed in {result.reference_s * 1e3:.0f} ms"
    print(f"  test run {result.test_s * 1e3:.0f} ms, reference {source}, all {result.elapsed_s:.2f} s")
    print(CAUTION)
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command == "demo":
        return _run_demo(args.scenario)
    if args.command == "serve":
        from .serve import serve
        return serve(port=args.port, address=args.address, show=not args.no_show, preset=args.preset)
    parser.print_help()
    return 0


if __name__ == "__main__":
    sys.exit(main())
