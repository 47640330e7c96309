"""The `quietlayer` command."""

from __future__ import annotations

import argparse
import sys
from importlib.metadata import PackageNotFoundError, version


def _version() -> str:
    try:
        return version("quietlayer")
    except PackageNotFoundError:  # running from a source tree without install
        return "unknown"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="quietlayer",
        description="Choose and check the absorbing layer (CPML) at the edge of an FDTD grid.",
        epilog="Quietlayer estimates the numerical reflection of a simulation boundary. It "
               "certifies no RF-exposure, EMC or safety compliance; defer to local codes and "
               "licensed practice.",
    )
    parser.add_argument("--version", action="version", version=f"quietlayer {_version()}")
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    parser.parse_args(argv)
    parser.print_help()
    return 0


if __name__ == "__main__":
    sys.exit(main())
