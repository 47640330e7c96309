"""Every key a scenario file accepts, with its type, unit, default and
allowed range: the one table the scenario's validation takes its ranges
and choices from, and the source of the reference page
assets/scenario-file.md (written by engine/scenario_reference.py).

`Range.text()` is the very phrase the validation puts in its refusal
("layer.right.cells = 900 is not allowed: a whole number from 1 to 500"),
so the page cannot say one range while the reader checks another; a test
compares the committed page with the generated one and tries every key
against the reader.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from .waveforms import WAVEFORMS

# limits shared with the validation (engine/scenario.py imports them from here)
MAX_STEPS = 2_000_000
MAX_GRID_NODES = 64_000_000  # about 1 GB of float32 fields and coefficients
MAX_INTERIOR_CELLS = 20_000  # along x or y
MAX_PROBES = 1000
MAX_BLOCKS = 200  # each block repaints the whole material grid
MAX_NAME_CHARS = 200  # titles, probe and block names
MAX_PROFILE_ROWS = 100_000
MAX_PROFILE_BYTES = 4 << 20  # a profile CSV file
MAX_NODE_INDEX = 1_000_000  # source and probe nodes, before they are checked against nx and ny

REQUIRED = "required"


def number_text(lo: float = -math.inf, hi: float = math.inf, lo_open: bool = False, hi_open: bool = False) -> str:
    """'a number >= 1 and <= 1000': the allowed range of a real number as the validation words it."""
    parts = []
    if lo > -math.inf:
        parts.append(f"{'>' if lo_open else '>='} {lo:g}")
    if hi < math.inf:
        parts.append(f"{'<' if hi_open else '<='} {hi:g}")
    return "a number " + " and ".join(parts) if parts else "a number"


def whole_text(lo: int, hi: int) -> str:
    """'a whole number from 1 to 500', as the validation words it."""
    return f"a whole number from {lo} to {hi}"


@dataclass(frozen=True)
class Range:
    """Bounds of a number; `whole` for whole numbers; `allow_inf` lets +-inf through."""

    lo: float = -math.inf
    hi: float = math.inf
    lo_open: bool = False
    hi_open: bool = False
    whole: bool = False
    allow_inf: bool = False

    def text(self) -> str:
        if self.whole:
            return whole_text(int(self.lo), int(self.hi))
        return number_text(self.lo, self.hi, self.lo_open, self.hi_open)

    def outside(self) -> list:
        """Values just beyond each finite bound (for tests and examples)."""
        values = []
        for bound, is_open, step in ((self.lo, self.lo_open, -1), (self.hi, self.hi_open, +1)):
            if math.isfinite(bound):
                if self.whole:
                    values.append(int(bound) + step)
                elif is_open:
                    values.append(bound)
                else:
                    values.append(bound + step * max(1.0, abs(bound)))
        return values


@dataclass(frozen=True)
class Key:
    """One key of a scenario file.

    table: where it is written ("" top level, "source", "probes", "blocks",
    "layer" for [layer] and [layer.left|right|bottom|top], "profile" for a
    side's inline profile); kind: how the value is written; default: the
    value when the key is absent: REQUIRED if it must be given, else None
    (the scenario's own dataclass default applies, which the page shows);
    default_note: words for a default no single value states; rule: how it relates to other keys;
    example: a valid value."""

    table: str
    name: str
    kind: str
    about: str
    example: Any
    unit: str = ""
    range: Range | None = None
    choices: tuple = ()
    default: Any = None
    default_note: str = ""
    rule: str = ""

    @property
    def path(self) -> str:
        return f"{self.table}.{self.name}" if self.table else self.name

    def allowed(self) -> str:
        """The allowed values, in the words of the validation."""
        if self.range is not None:
            return self.range.text()
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        return ""


LENGTH = "length: a number in m, or text with a unit: m, cm, mm, um (µm), nm, e.g. \"0.5 mm\""
FREQUENCY = "frequency: a number in Hz, or text with a unit: Hz, kHz, MHz, GHz, THz, e.g. \"15 GHz\""
NODE = Range(0, MAX_NODE_INDEX, whole=True)
PERMITTIVITY = Range(1.0, 1e4)
CONDUCTIVITY = Range(0.0, 1e8)
GRADING_ORDER = Range(0.0, 20.0)

KEYS: tuple[Key, ...] = (
    # --- top level ---------------------------------------------------------------
    Key("", "title", "text", "a name shown on the page and in reports", "My cell",
        rule=f"at most {MAX_NAME_CHARS} characters"),
    Key("", "dx", "length", "cell size along x", "0.5 mm", unit="m", range=Range(1e-12, 1e3), default=REQUIRED),
    Key("", "dy", "length", "cell size along y", 0.0005, unit="m", range=Range(1e-12, 1e3), default=REQUIRED),
    Key("", "nx", "whole number", "interior cells along x (the layers are added outside)", 60, unit="cells",
        range=Range(2, MAX_INTERIOR_CELLS, whole=True), default=REQUIRED,
        rule=f"the whole grid with its layers at most {MAX_GRID_NODES:,} nodes"),
    Key("", "ny", "whole number", "interior cells along y", 60, unit="cells",
        range=Range(2, MAX_INTERIOR_CELLS, whole=True), default=REQUIRED),
    Key("", "steps", "whole number", "time steps of the run", 500, unit="steps",
        range=Range(1, MAX_STEPS, whole=True),
        rule="the commands and the page refuse a run beyond their work budget, naming the largest that fits"),
    Key("", "courant", "number", "time step as a fraction of the 2D Courant limit "
        "1 / (c0 sqrt(1/dx^2 + 1/dy^2))", 0.9, range=Range(0.0, 1.0, lo_open=True),
        rule=f"large enough that the source pulse ends within {MAX_STEPS:,} steps"),
    Key("", "eps_r", "number", "relative permittivity of the host medium", 2.2, range=PERMITTIVITY),
    Key("", "sigma", "number", "conductivity of the host medium", 0.01, unit="S/m", range=CONDUCTIVITY),
    Key("", "polarization", "text", "TMz (Ez, Hx, Hy) or TEz (Hz, Ex, Ey)", "TEz", choices=("TMz", "TEz")),
    Key("", "precision", "text", "floating-point precision of the fields", "float64",
        choices=("float32", "float64")),
    # --- [source] ------------------------------------------------------------------
    Key("source", "x", "whole number", "interior node of the source along x", 30, unit="cells", range=NODE,
        default=REQUIRED, rule="an interior node 0..nx"),
    Key("source", "y", "whole number", "interior node of the source along y", 30, unit="cells", range=NODE,
        default=REQUIRED, rule="an interior node 0..ny"),
    Key("source", "f_max", "frequency", "highest frequency of interest: the pulse's spectrum is 20 dB down there",
        "12 GHz", unit="Hz", default=REQUIRED, rule="> 0 Hz"),
    Key("source", "f_min", "frequency", "lowest frequency of interest", "2 GHz", unit="Hz",
        rule="0 Hz <= f_min < f_max; > 0 Hz for a modulated Gaussian"),
    Key("source", "waveform", "text", "pulse shape, designed from f_min..f_max", "ricker",
        choices=WAVEFORMS),
    Key("source", "amplitude", "number", "source current (TMz); in TEz the magnetic current is eta0 times it",
        2.0, unit="A", range=Range(0.0, 1e12, lo_open=True)),
    Key("source", "line", "text", "\"\" a point source; \"y\" a line filling all y at x, \"x\" a line filling "
        "all x at y (a plane wave)", "", choices=("", "x", "y"),
        rule="\"y\" only when bottom and top are periodic, \"x\" only when left and right are"),
    # --- [[probes]] ------------------------------------------------------------------
    Key("probes", "name", "text", "the probe's name in legends and tables", "front", default=REQUIRED,
        rule=f"not empty, at most {MAX_NAME_CHARS} characters, one probe per name"),
    Key("probes", "x", "whole number", "interior node along x", 40, unit="cells", range=NODE, default=REQUIRED,
        rule="an interior node 0..nx"),
    Key("probes", "y", "whole number", "interior node along y", 40, unit="cells", range=NODE, default=REQUIRED,
        rule="an interior node 0..ny"),
    # --- [[blocks]] ------------------------------------------------------------------
    Key("blocks", "x0", "number", "left edge, in interior cells (may lie outside the interior; -inf: "
        "through the layer to the wall)", 2.5, unit="cells", range=Range(allow_inf=True), default=REQUIRED),
    Key("blocks", "x1", "number", "right edge", 20, unit="cells", range=Range(allow_inf=True), default=REQUIRED,
        rule="> x0"),
    Key("blocks", "y0", "number", "bottom edge", -math.inf, unit="cells", range=Range(allow_inf=True),
        default=REQUIRED),
    Key("blocks", "y1", "number", "top edge", 12, unit="cells", range=Range(allow_inf=True), default=REQUIRED,
        rule="> y0"),
    Key("blocks", "eps_r", "number", "relative permittivity of the block", 4.4, range=PERMITTIVITY),
    Key("blocks", "sigma", "number", "conductivity of the block", 0.02, unit="S/m", range=CONDUCTIVITY),
    Key("blocks", "name", "text", "a label", "substrate", rule=f"at most {MAX_NAME_CHARS} characters"),
    # --- [layer], [layer.left|right|bottom|top] ------------------------------------------
    Key("layer", "kind", "text", "\"cpml\" an absorbing layer backed by a wall; \"wall\" the outer field held "
        "at zero (electric wall in TMz, magnetic in TEz); \"periodic\" wraps to the opposite side", "wall",
        choices=("cpml", "wall", "periodic"), rule="periodic on both sides of an axis or on neither"),
    Key("layer", "cells", "whole number", "layer thickness", 8, unit="cells", range=Range(1, 500, whole=True)),
    Key("layer", "order", "number", "grading order m of sigma and kappa: sigma = sigma_max (rho/L)^m", 4.0,
        range=Range(0.0, 20.0, lo_open=True)),
    Key("layer", "sigma_ratio", "number", "sigma_max as a multiple of sigma_opt = 0.8 (m+1) / (eta0 d "
        "sqrt(eps_r)), d the cell size across the layer", 0.75, range=Range(0.0, 1000.0), default_note="1.0 when sigma_max is absent",
        rule="give sigma_ratio or sigma_max, not both"),
    Key("layer", "sigma_max", "number", "largest conductivity of the layer, at the wall", 12.5, unit="S/m",
        range=Range(0.0, 1e12), default_note="none (sigma_ratio applies)", rule="give sigma_ratio or sigma_max, not both"),
    Key("layer", "kappa_max", "number", "largest coordinate stretch: kappa = 1 + (kappa_max - 1)(rho/L)^m", 5.0,
        range=Range(1.0, 1000.0)),
    Key("layer", "alpha_max", "number", "CFS alpha at the inner face, graded to 0 at the wall", 0.05, unit="S/m",
        range=Range(0.0, 1e6)),
    Key("layer", "alpha_order", "number", "grading order of alpha: alpha = alpha_max ((L - rho)/L)^m_a", 2.0,
        range=GRADING_ORDER),
    Key("layer", "profile", "table", "the grading from your own code, inline: "
        "profile = {depth = [...], sigma = [...], kappa = [...], alpha = [...]} (keys below); "
        "order, sigma_* , kappa_max and alpha_* are then ignored",
        {"depth": [0.0, 0.01], "sigma": [0.0, 5.0], "kappa": [1.0, 1.0], "alpha": [0.0, 0.0]},
        default_note="none", rule="not together with profile_file"),
    Key("layer", "profile_file", "file name", "the same table as a CSV file with columns depth, sigma, kappa, "
        "alpha (units optional in brackets, e.g. \"depth (mm)\"), relative to the scenario file", "my_profile.csv",
        default_note="none", rule=f"a regular file of at most {MAX_PROFILE_BYTES >> 20} MiB in the scenario's folder or below it; only in a "
                             "scenario read from a file"),
    # --- profile = {...} -------------------------------------------------------------------
    Key("profile", "depth", "list of numbers", "depth from the inner face (0) towards the wall", [0.0, 0.004, 0.012],
        unit="m", default=REQUIRED, rule=f"2 to {MAX_PROFILE_ROWS:,} rows, strictly increasing, the first <= 0, "
                                         "the last >= the layer's thickness"),
    Key("profile", "sigma", "list of numbers", "conductivity at each depth", [0.0, 2.0, 6.0], unit="S/m",
        default=REQUIRED, rule="as many rows as depth, each >= 0"),
    Key("profile", "kappa", "list of numbers", "coordinate stretch at each depth", [1.0, 1.5, 2.0], default=REQUIRED,
        rule="as many rows as depth, each >= 1"),
    Key("profile", "alpha", "list of numbers", "CFS alpha at each depth", [0.05, 0.02, 0.0], unit="S/m",
        default=REQUIRED, rule="as many rows as depth, each >= 0"),
)

SECTIONS = {  # table -> (heading, how it is written, text before its keys)
    "": ("Top level", "key = value at the top of the file",
         "The problem: cell size, interior size, run length, time step and host medium."),
    "source": ("[source]", "[source]", "The pulse and where it is fired. Required."),
    "probes": ("[[probes]]", "[[probes]] entries, or probes = [{name = ..., x = ..., y = ...}, ...]",
               f"Interior nodes where the field is recorded every step; at most {MAX_PROBES:,}. "
               "Optional: without probes only the global error is scored."),
    "blocks": ("[[blocks]]", "[[blocks]] entries",
               f"Rectangles of other material in interior cell units, painted in order (later over earlier; "
               f"a cell cut by an edge gets the area-weighted mean); at most {MAX_BLOCKS}. Edges may be "
               "-inf or inf (written -inf and inf in TOML) so that a substrate runs on through the layer."),
    "layer": ("[layer] and [layer.left], [layer.right], [layer.bottom], [layer.top]",
              "[layer] for every side, [layer.SIDE] for one side",
              "What terminates each side: left is x low, right x high, bottom y low, top y high. A key in "
              "[layer] applies to every side; the same key in [layer.SIDE] overrides it for that side."),
    "profile": ("profile = {...}", "layer.SIDE.profile (or layer.profile for every side)",
                "A layer's grading tabulated by your own code; the engine interpolates linearly at the exact "
                "node positions, so tabulate at least every half cell."),
}

KEYS_BY_PATH = {k.path: k for k in KEYS}


def limits(path: str) -> Range:
    """The allowed range of a numeric key, e.g. limits('layer.cells')."""
    return KEYS_BY_PATH[path].range
