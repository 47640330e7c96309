"""Option parsing shared by the commands: one-line errors, ranged numbers,
the score and executor options."""

from __future__ import annotations

import argparse
import math

from .common import EXIT_BAD_INPUT

FORMATTER = argparse.RawDescriptionHelpFormatter
SCENARIO_HELP = ("scenario file (TOML); a side may name a profile table of your own with "
                 "profile_file = \"name.csv\" (columns depth, sigma, kappa, alpha; relative to the file)")


class Parser(argparse.ArgumentParser):
    """argparse with one-line errors (and exit 2)."""

    def error(self, message):
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


class RenamedOption(argparse.Action):
    """An option that was renamed: given, it stops the parse with one line naming
    the new option (exit 2), whatever value follows it."""

    def __init__(self, option_strings, dest, new_name: str, **kwargs):
        self.new_name = new_name
        super().__init__(option_strings, dest, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        parser.error(f"{option_string} is not an option of this command any more: use {self.new_name} "
                     f"(e.g. {self.new_name} 40)")


def ranged(kind, lo, hi, what: str):
    def convert(text: str):
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not allowed: {what}") from None
        if not (isinstance(value, int) or math.isfinite(value)) or not lo <= value <= hi:
            raise argparse.ArgumentTypeError(f"{text!r} is not allowed: {what}")
        return value
    return convert


decibels = ranged(float, -300.0, 0.0, "a number of dB from -300 to 0")
worker_count = ranged(int, 1, 256, "a whole number of workers from 1 to 256")


def dask_address(text: str) -> str:
    if text.startswith("local:"):
        count = text[len("local:"):]
        if not (count.isdigit() and 1 <= int(count) <= 256):
            raise argparse.ArgumentTypeError(f"{text!r} is not allowed: 'local:N' with N worker processes "
                                             "from 1 to 256")
    elif ":" not in text:
        raise argparse.ArgumentTypeError(f"{text!r} is not allowed: 'local:N' or a scheduler address "
                                         "such as tcp://host:8786")
    return text


SCORE_CHOICES = ("worst_peak_db", "global_db", "worst_band_db")  # engine.sweep.SCORES, without importing the engine for --help


def add_score_option(parser, purpose: str) -> None:
    parser.add_argument("--score", choices=SCORE_CHOICES, default="worst_peak_db",
                        help=f"{purpose} (default worst_peak_db)")


def add_executor_options(parser) -> None:
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--workers", type=worker_count, metavar="N",
                       help="workers on this machine (default: one per core; threads for small sweeps, "
                            "processes from 64 points)")
    where.add_argument("--dask", metavar="ADDRESS", type=dask_address,
                       help="run on Dask: 'local:N' starts N worker processes here, "
                            "'tcp://host:8786' uses a running scheduler")


def paragraph(text: str) -> str:
    import textwrap
    return textwrap.fill(text, 88)

