"""The reference page of scenario files, written from the key table in
engine/scenario_keys.py and the scenario's own dataclass defaults.

    python -m quietlayer.engine.scenario_reference            # print the page
    python -m quietlayer.engine.scenario_reference --write    # rewrite assets/scenario-file.md
"""

from __future__ import annotations

import sys
from dataclasses import MISSING, fields
from pathlib import Path
from typing import Any

from .scenario import (MAX_KEY_PARTS, MAX_NESTING, MAX_NUMBER_DIGITS, MAX_TEXT_BYTES, Block, Probe, Scenario,
                       Side, Source)
from .scenario_keys import FREQUENCY, KEYS, LENGTH, REQUIRED, SECTIONS, Key

PAGE = Path(__file__).resolve().parents[1] / "assets" / "scenario-file.md"


def _dataclass_defaults() -> dict[str, Any]:
    """Defaults of the scenario's dataclasses, by key path (the validation's own defaults)."""
    out = {}
    for table, cls in (("", Scenario), ("source", Source), ("probes", Probe), ("blocks", Block), ("layer", Side)):
        for f in fields(cls):
            out[f"{table}.{f.name}" if table else f.name] = REQUIRED if f.default is MISSING else f.default
    return out


def default_of(k: Key) -> Any:
    """The value the reader uses when `k` is absent (REQUIRED if it must be given)."""
    if k.default is not None:
        return k.default
    return _dataclass_defaults().get(k.path)  # None: a key no dataclass field holds (profile_file)


def _shown_default(k: Key) -> str:
    if k.default_note:
        return k.default_note
    value = default_of(k)
    if value == REQUIRED:
        return "**required**"
    if value is None:
        return "none"
    if isinstance(value, str):
        return f'`"{value}"`'
    if isinstance(value, float) and value.is_integer():
        return f"`{value:.1f}`"
    return f"`{value:g}`" if isinstance(value, float) else f"`{value}`"


def _cell(text: str) -> str:
    return text.replace("|", "\\|")


def reference_page() -> str:
    """The reference of scenario files as Markdown (assets/scenario-file.md)."""
    lines = [
        "# Scenario files",
        "",
        "<!-- Written by `python -m quietlayer.engine.scenario_reference --write` from engine/scenario_keys.py;",
        "     edit that table, not this page (tests/test_scenario_keys.py keeps them equal). -->",
        "",
        "A scenario is a TOML file read by `quietlayer check|sweep|tune|export|demo --scenario` and by the",
        "page's upload. It describes one 2D FDTD problem and the layers that terminate it. Every key is",
        "listed below with its type, unit, default and allowed values; any other key is refused. A",
        "refused value gets one line naming the key, its line in the file and the allowed range, in the",
        "words of the \"allowed\" column, e.g.",
        "",
        "    my_cell.toml, line 12: layer.right.cells = 900 is not allowed: a whole number from 1 to 500",
        "",
        "See `assets/presets/demo.toml` for a complete file. Positions (source, probes, blocks) are in",
        "cells of the interior, whose nodes run 0..nx and 0..ny; x runs to the right, y up. Lengths and",
        "frequencies may be written with units:",
        "",
        f"- {LENGTH};",
        f"- {FREQUENCY}.",
        "",
        f"A file is read up to {MAX_TEXT_BYTES:,} bytes and refused before it is parsed when arrays and",
        f"tables nest more than {MAX_NESTING} deep, a dotted key has more than {MAX_KEY_PARTS} parts or a "
        f"number more than {MAX_NUMBER_DIGITS} digits.",
    ]
    for table, (heading, written, intro) in SECTIONS.items():
        lines += ["", f"## {heading}", "", f"Written as: {written}. {intro}", "",
                  "| key | type | unit | default | allowed | meaning |", "|---|---|---|---|---|---|"]
        for k in (k for k in KEYS if k.table == table):
            allowed = k.allowed()
            if k.range is not None and k.range.allow_inf:
                allowed = "a number, or -inf or inf"
            allowed = "; ".join(a for a in (allowed, k.rule) if a)
            lines.append(f"| `{k.name}` | {k.kind} | {k.unit} | {_cell(_shown_default(k))} | "
                         f"{_cell(allowed)} | {_cell(k.about)} |")
    lines += ["", "The tool estimates numerical reflection of a simulation boundary; it certifies no "
                  "RF-exposure, EMC or safety compliance.", ""]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv not in ([], ["--write"]):
        print("usage: python -m quietlayer.engine.scenario_reference [--write]", file=sys.stderr)
        return 2
    text = reference_page()
    if argv == ["--write"]:
        PAGE.write_text(text, encoding="utf-8")
        print(f"wrote {PAGE}")
    else:
        sys.stdout.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
