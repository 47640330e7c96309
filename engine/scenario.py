"""The problem as data: a validated, immutable description of one 2D run.

Coordinates: x to the right, y up.  Positions of sources, probes and material
blocks are given in cells of the interior, whose nodes run 0..nx and 0..ny;
layers are added outside the interior, so the interior is the same whatever
the layer.  Every invalid value raises ScenarioError naming the field.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import stat
import tomllib
import warnings
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import tomli_w

from .errors import ResolutionWarning, ScenarioError
from .scenario_keys import (MAX_BLOCKS, MAX_GRID_NODES, MAX_INTERIOR_CELLS, MAX_NAME_CHARS,  # noqa: F401
                            MAX_PROBES, MAX_PROFILE_BYTES, MAX_PROFILE_ROWS, MAX_STEPS, KEYS_BY_PATH, limits,
                            number_text, whole_text)
from .units import C0, parse_frequency, parse_length
from .waveforms import WAVEFORMS, Pulse, design_pulse

# the keys, their choices and ranges: engine/scenario_keys.py (also the source of assets/scenario-file.md)
POLARIZATIONS = KEYS_BY_PATH["polarization"].choices
PRECISIONS = KEYS_BY_PATH["precision"].choices
SIDE_KINDS = KEYS_BY_PATH["layer.kind"].choices
SIDES = ("left", "right", "bottom", "top")
LINE_AXES = KEYS_BY_PATH["source.line"].choices
MIN_CELLS_PER_WAVELENGTH = 10  # common practice, no source
# limits on scenario text, checked before it is parsed: a hostile file must be
# refused in milliseconds, not parsed for minutes (a dotted key of a million
# parts) or until the parser runs out of stack (inline tables nested thousands deep)
MAX_TEXT_BYTES = 1 << 20  # 1 MiB: a 10,000-row inline profile fits
MAX_NESTING = 16  # levels of [ ] and { }; a scenario needs 3
MAX_KEY_PARTS = 8  # parts of a dotted key; a scenario needs 4 (layer.right.profile.depth)
MAX_NUMBER_DIGITS = 40


# --- small validators -------------------------------------------------------

def _number(name: str, value, lo: float = -math.inf, hi: float = math.inf,
            lo_open: bool = False, hi_open: bool = False, allow_inf: bool = False) -> float:
    allowed = number_text(lo, hi, lo_open, hi_open)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ScenarioError(name, value, allowed)
    try:
        v = float(value)
    except OverflowError:  # an integer beyond any float
        raise ScenarioError(name, value, allowed + " (finite)") from None
    if math.isnan(v) or (math.isinf(v) and not allow_inf):
        raise ScenarioError(name, value, allowed + " (finite)")
    if (v < lo) or (v > hi) or (lo_open and v == lo) or (hi_open and v == hi):
        raise ScenarioError(name, value, allowed)
    return v


def _integer(name: str, value, lo: int, hi: int) -> int:
    allowed = whole_text(lo, hi)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ScenarioError(name, value, allowed)
    if isinstance(value, float) and not (math.isfinite(value) and value.is_integer()):
        raise ScenarioError(name, value, allowed)
    v = int(value)
    if not lo <= v <= hi:
        raise ScenarioError(name, value, allowed)
    return v


def _ranged(path: str, name: str, value):
    """`value` checked against the range of key `path` of the key table; `name` is
    the field the message names (e.g. path 'layer.cells', name 'layer.right.cells')."""
    r = limits(path)
    if r.whole:
        return _integer(name, value, int(r.lo), int(r.hi))
    return _number(name, value, r.lo, r.hi, lo_open=r.lo_open, hi_open=r.hi_open, allow_inf=r.allow_inf)


def _choice(name: str, value, choices) -> str:
    if value not in choices:
        shown = ", ".join(repr(c) for c in choices)
        raise ScenarioError(name, value, f"one of {shown}")
    return value


def _set(obj, name: str, value) -> None:
    object.__setattr__(obj, name, value)


def _check_keys(name: str, data: dict, allowed) -> None:
    if not isinstance(data, dict):
        raise ScenarioError(name, data, "a table of keys")
    for key in data:
        if key not in allowed:
            raise ScenarioError(f"{name}.{key}" if name else key, data[key],
                                f"a known key ({', '.join(sorted(allowed))})")


# --- parts ------------------------------------------------------------------

@dataclass(frozen=True)
class Source:
    """A soft current source: a z-directed line current (TMz) or its dual
    magnetic current (TEz), with the pulse designed from f_min..f_max.

    x, y: interior node; line: "" for a point, "y" for a column filling all y
    at x, "x" for a row filling all x at y: a plane wave, so the axis along
    the line must be periodic.
    amplitude: current in A (TMz); in TEz the magnetic current is eta0 times it
    in V, which makes the two polarizations exact duals.
    """

    x: int
    y: int
    f_max: float
    f_min: float = 0.0
    waveform: str = "diff_gaussian"
    amplitude: float = 1.0
    line: str = ""

    def __post_init__(self):
        _set(self, "x", _ranged("source.x", "source.x", self.x))
        _set(self, "y", _ranged("source.y", "source.y", self.y))
        _set(self, "f_max", parse_frequency("source.f_max", self.f_max))
        _set(self, "f_min", parse_frequency("source.f_min", self.f_min))
        _choice("source.waveform", self.waveform, WAVEFORMS)
        _set(self, "amplitude", _ranged("source.amplitude", "source.amplitude", self.amplitude))
        _choice("source.line", self.line, LINE_AXES)
        design_pulse(self.waveform, self.f_min, self.f_max)  # validates the band

    @property
    def pulse(self) -> Pulse:
        return design_pulse(self.waveform, self.f_min, self.f_max)


@dataclass(frozen=True)
class Probe:
    """A named interior node where the field is recorded every step."""

    name: str
    x: int
    y: int

    def __post_init__(self):
        if not isinstance(self.name, str) or not self.name.strip() or len(self.name) > MAX_NAME_CHARS:
            raise ScenarioError("probe.name", self.name, f"a non-empty text of at most {MAX_NAME_CHARS} characters")
        _set(self, "x", _ranged("probes.x", f"probe[{self.name}].x", self.x))
        _set(self, "y", _ranged("probes.y", f"probe[{self.name}].y", self.y))


@dataclass(frozen=True)
class Block:
    """A rectangle of other material, in interior cell units.

    Edges may lie outside the interior, or at +-inf, so that a substrate or a
    guide runs on through the layer to the outer wall.  Later blocks are
    painted over earlier ones; cells cut by an edge get the area-weighted mean.
    """

    x0: float
    x1: float
    y0: float
    y1: float
    eps_r: float = 1.0
    sigma: float = 0.0
    name: str = ""

    def __post_init__(self):
        label = f"block[{self.name}]" if isinstance(self.name, str) and 0 < len(self.name) <= MAX_NAME_CHARS else "block"
        for key in ("x0", "x1", "y0", "y1"):
            _set(self, key, _ranged(f"blocks.{key}", f"{label}.{key}", getattr(self, key)))
        if not self.x0 < self.x1:
            raise ScenarioError(f"{label}.x1", self.x1, f"> x0 = {self.x0:g}")
        if not self.y0 < self.y1:
            raise ScenarioError(f"{label}.y1", self.y1, f"> y0 = {self.y0:g}")
        _set(self, "eps_r", _ranged("blocks.eps_r", f"{label}.eps_r", self.eps_r))
        _set(self, "sigma", _ranged("blocks.sigma", f"{label}.sigma", self.sigma))
        if not isinstance(self.name, str) or len(self.name) > MAX_NAME_CHARS:
            raise ScenarioError(f"{label}.name", self.name, f"a text of at most {MAX_NAME_CHARS} characters")


@dataclass(frozen=True)
class Profile:
    """A layer profile from the user's own code: sigma (S/m), kappa, alpha (S/m)
    tabulated against depth (m) from the inner face (0) to the wall; the engine
    interpolates linearly at the exact node positions."""

    depth: tuple
    sigma: tuple
    kappa: tuple
    alpha: tuple

    def __post_init__(self):
        columns = {}
        for key in ("depth", "sigma", "kappa", "alpha"):
            raw = getattr(self, key)
            try:
                if isinstance(raw, (str, bytes, dict)) or any(isinstance(v, bool) for v in raw):
                    raise TypeError
                values = tuple(float(v) for v in raw)
            except (TypeError, ValueError, OverflowError):
                raise ScenarioError(f"profile.{key}", raw, "a list of numbers") from None
            if any(not math.isfinite(v) for v in values):
                raise ScenarioError(f"profile.{key}", raw, "finite numbers only")
            columns[key] = values
            _set(self, key, values)
        n = len(columns["depth"])
        if n < 2:
            raise ScenarioError("profile.depth", self.depth, "at least 2 rows")
        if n > MAX_PROFILE_ROWS:
            raise ScenarioError("profile.depth", f"{n:,} rows", f"at most {MAX_PROFILE_ROWS:,} rows")
        for key in ("sigma", "kappa", "alpha"):
            if len(columns[key]) != n:
                raise ScenarioError(f"profile.{key}", len(columns[key]), f"{n} rows, as many as depth")
        d = columns["depth"]
        if any(b <= a for a, b in zip(d, d[1:])):
            raise ScenarioError("profile.depth", self.depth, "strictly increasing depths")
        if d[0] > 0.0:
            raise ScenarioError("profile.depth", d[0], "a first depth <= 0 m (the inner face)")
        if min(columns["sigma"]) < 0:
            raise ScenarioError("profile.sigma", min(columns["sigma"]), "values >= 0 S/m")
        if min(columns["kappa"]) < 1:
            raise ScenarioError("profile.kappa", min(columns["kappa"]), "values >= 1")
        if min(columns["alpha"]) < 0:
            raise ScenarioError("profile.alpha", min(columns["alpha"]), "values >= 0 S/m")


@dataclass(frozen=True)
class Side:
    """What terminates one side of the grid.

    kind "cpml": a CFS-CPML of `cells` cells backed by a wall; sigma_max in S/m
    or sigma_ratio times sigma_opt (give one; the ratio 1.0 is the default);
    grading order m = `order`; kappa_max >= 1; alpha_max in S/m, largest at the
    inner face, graded with `alpha_order`; or a `profile` of your own.
    kind "wall": the outermost Ez (TMz) or Hz (TEz) nodes are held at zero: an
    electric wall in TMz, a magnetic wall in TEz; either reflects totally.
    kind "periodic": wraps to the opposite side, which must be periodic too.
    """

    kind: str = "cpml"
    cells: int = 10
    order: float = 3.0
    sigma_ratio: float | None = None
    sigma_max: float | None = None
    kappa_max: float = 1.0
    alpha_max: float = 0.0
    alpha_order: float = 1.0
    profile: Profile | None = None
    label: str = field(default="layer", compare=False, repr=False)

    def __post_init__(self):
        p = self.label
        _choice(f"{p}.kind", self.kind, SIDE_KINDS)
        _set(self, "cells", _ranged("layer.cells", f"{p}.cells", self.cells))
        _set(self, "order", _ranged("layer.order", f"{p}.order", self.order))
        if self.sigma_ratio is not None and self.sigma_max is not None:
            raise ScenarioError(f"{p}.sigma_max", self.sigma_max,
                                "absent when sigma_ratio is given (give one of the two)")
        if self.sigma_ratio is not None:
            _set(self, "sigma_ratio", _ranged("layer.sigma_ratio", f"{p}.sigma_ratio", self.sigma_ratio))
        if self.sigma_max is not None:
            _set(self, "sigma_max", _ranged("layer.sigma_max", f"{p}.sigma_max", self.sigma_max))
        if self.sigma_ratio is None and self.sigma_max is None:
            _set(self, "sigma_ratio", 1.0)
        for name in ("kappa_max", "alpha_max", "alpha_order"):
            _set(self, name, _ranged(f"layer.{name}", f"{p}.{name}", getattr(self, name)))
        if self.profile is not None and not isinstance(self.profile, Profile):
            raise ScenarioError(f"{p}.profile", self.profile, "a Profile table")

    @property
    def layer_cells(self) -> int:
        """Cells this side adds to the grid (0 unless it is a CPML)."""
        return self.cells if self.kind == "cpml" else 0


@dataclass(frozen=True)
class Boundary:
    """The four sides: left (x low), right (x high), bottom (y low), top (y high)."""

    left: Side = Side()
    right: Side = Side()
    bottom: Side = Side()
    top: Side = Side()

    def __post_init__(self):
        for name in SIDES:
            side = getattr(self, name)
            if not isinstance(side, Side):
                raise ScenarioError(f"layer.{name}", side, "a Side")
            if side.label != f"layer.{name}":
                _set(self, name, replace(side, label=f"layer.{name}"))
        for a, b in (("left", "right"), ("bottom", "top")):
            pa, pb = getattr(self, a).kind == "periodic", getattr(self, b).kind == "periodic"
            if pa != pb:
                raise ScenarioError(f"layer.{b}.kind", getattr(self, b).kind,
                                    f"'periodic' exactly when layer.{a}.kind is 'periodic'")

    @classmethod
    def all_sides(cls, side: Side) -> "Boundary":
        return cls(left=side, right=side, bottom=side, top=side)

    @property
    def periodic_x(self) -> bool:
        return self.left.kind == "periodic"

    @property
    def periodic_y(self) -> bool:
        return self.bottom.kind == "periodic"


# --- the scenario -----------------------------------------------------------

@dataclass(frozen=True)
class Scenario:
    """One 2D FDTD problem and the boundary that terminates it.

    dx, dy: cell size (m, or text such as '0.5 mm'); nx, ny: interior cells;
    courant: time step as a fraction of the 2D stability limit (0 < c <= 1);
    eps_r, sigma: host medium; steps: run length.
    """

    dx: float
    dy: float
    nx: int
    ny: int
    source: Source
    steps: int = 1000
    courant: float = 0.99
    eps_r: float = 1.0
    sigma: float = 0.0
    polarization: str = "TMz"
    precision: str = "float32"
    probes: tuple = ()
    blocks: tuple = ()
    boundary: Boundary = Boundary()
    title: str = field(default="", compare=False)

    def __post_init__(self):
        _set(self, "dx", parse_length("dx", self.dx))
        _set(self, "dy", parse_length("dy", self.dy))
        for name in ("dx", "dy"):
            _ranged(name, name, getattr(self, name))
        for name in ("nx", "ny", "steps", "courant", "eps_r", "sigma"):
            _set(self, name, _ranged(name, name, getattr(self, name)))
        _choice("polarization", self.polarization, POLARIZATIONS)
        _choice("precision", self.precision, PRECISIONS)
        if not isinstance(self.title, str) or len(self.title) > MAX_NAME_CHARS:
            raise ScenarioError("title", self.title, f"a text of at most {MAX_NAME_CHARS} characters")
        if not isinstance(self.source, Source):
            raise ScenarioError("source", self.source, "a Source")
        if not isinstance(self.boundary, Boundary):
            raise ScenarioError("layer", self.boundary, "a Boundary")
        _set(self, "probes", tuple(self.probes))
        _set(self, "blocks", tuple(self.blocks))
        if len(self.probes) > MAX_PROBES:
            raise ScenarioError("probes", f"{len(self.probes)} probes", f"at most {MAX_PROBES}")
        if len(self.blocks) > MAX_BLOCKS:
            raise ScenarioError("blocks", f"{len(self.blocks)} blocks", f"at most {MAX_BLOCKS}")
        for b in self.blocks:
            if not isinstance(b, Block):
                raise ScenarioError("blocks", b, "Block entries")
        names = set()
        for p in self.probes:
            if not isinstance(p, Probe):
                raise ScenarioError("probes", p, "Probe entries")
            if p.name in names:
                raise ScenarioError("probe.name", p.name, "a name used by one probe only")
            names.add(p.name)
            self._check_inside(f"probe[{p.name}]", p.x, p.y)
        self._check_inside("source", self.source.x, self.source.y)
        if self.source.line == "y" and not self.boundary.periodic_y:
            raise ScenarioError("source.line", "y", "'y' only when bottom and top are periodic (a plane wave)")
        if self.source.line == "x" and not self.boundary.periodic_x:
            raise ScenarioError("source.line", "x", "'x' only when left and right are periodic (a plane wave)")
        self._check_time_step()
        nodes = (self.total_cells_x + 1) * (self.total_cells_y + 1)
        if nodes > MAX_GRID_NODES:
            raise ScenarioError("nx", self.nx, f"a grid of at most {MAX_GRID_NODES:,} nodes "
                                f"with its layers (this one has {nodes:,})")
        for name in SIDES:
            side = getattr(self.boundary, name)
            if side.profile is not None:
                depth = side.cells * (self.dx if name in ("left", "right") else self.dy)
                if side.profile.depth[-1] < depth * (1 - 1e-9):
                    raise ScenarioError(f"layer.{name}.profile.depth", side.profile.depth[-1],
                                        f"a last depth >= the layer thickness {depth:g} m")
        cpw = self.cells_per_wavelength
        if cpw < MIN_CELLS_PER_WAVELENGTH:
            warnings.warn(f"only {cpw:.1f} cells per wavelength at f_max = {self.source.f_max:g} Hz "
                          f"(at least {MIN_CELLS_PER_WAVELENGTH} recommended): numerical dispersion "
                          "will dominate", ResolutionWarning, stacklevel=3)

    def _check_time_step(self) -> None:
        """The pulse must be over within MAX_STEPS steps: a Courant number so small
        that it is not (5e-324 makes dt underflow to 0) is refused here, before
        anything divides by dt."""
        per_second = C0 * math.sqrt(1.0 / self.dx**2 + 1.0 / self.dy**2)  # steps per second at courant 1
        lowest = self.source.pulse.end_time * per_second / MAX_STEPS
        if self.courant < lowest or self.dt <= 0.0:
            raise ScenarioError("courant", self.courant,
                                f"a number >= {lowest:.3g} and <= 1 (a smaller time step makes the source "
                                f"pulse, {self.source.pulse.end_time:.3g} s long, last more than "
                                f"{MAX_STEPS:,} steps)")

    def _check_inside(self, name: str, x: int, y: int) -> None:
        if not 0 <= x <= self.nx:
            raise ScenarioError(f"{name}.x", x, f"an interior node 0..{self.nx}")
        if not 0 <= y <= self.ny:
            raise ScenarioError(f"{name}.y", y, f"an interior node 0..{self.ny}")

    # derived quantities
    @property
    def dt(self) -> float:
        """Time step, s: courant x the 2D limit 1 / (c0 sqrt(1/dx^2 + 1/dy^2))."""
        return self.courant / (C0 * math.sqrt(1.0 / self.dx**2 + 1.0 / self.dy**2))

    @property
    def max_eps_r(self) -> float:
        return max([self.eps_r] + [b.eps_r for b in self.blocks])

    @property
    def cells_per_wavelength(self) -> float:
        """Cells per shortest wavelength at f_max, in the densest material."""
        wavelength = C0 / (self.source.f_max * math.sqrt(self.max_eps_r))
        return wavelength / max(self.dx, self.dy)

    @property
    def total_cells_x(self) -> int:
        return self.nx + self.boundary.left.layer_cells + self.boundary.right.layer_cells

    @property
    def total_cells_y(self) -> int:
        return self.ny + self.boundary.bottom.layer_cells + self.boundary.top.layer_cells

    @property
    def offset(self) -> tuple[int, int]:
        """Grid node of the interior node (0, 0)."""
        return self.boundary.left.layer_cells, self.boundary.bottom.layer_cells

    def with_changes(self, **changes) -> "Scenario":
        """A validated copy with some fields replaced."""
        return replace(self, **changes)

    # serialisation
    def to_dict(self) -> dict[str, Any]:
        return scenario_to_dict(self)

    @classmethod
    def from_dict(cls, data: dict, base_dir=None) -> "Scenario":
        """base_dir: the folder relative `profile_file` names start from; without
        it a `profile_file` is an error (the text did not come from a file)."""
        return scenario_from_dict(data, base_dir)

    def to_toml(self) -> str:
        return tomli_w.dumps(self.to_dict())

    @classmethod
    def from_toml(cls, text: str, base_dir=None) -> "Scenario":
        try:
            data = parse_toml(text)
        except tomllib.TOMLDecodeError as exc:
            raise ScenarioError("file", "TOML", f"valid TOML ({exc})") from None
        return cls.from_dict(data, base_dir)

    def key(self) -> str:
        """Stable hash of everything that affects the fields (not the title)."""
        data = self.to_dict()
        data.pop("title", None)
        return _digest(data)

    def reference_key(self) -> str:
        """Stable hash of the problem without the layer settings (periodicity kept)."""
        data = self.to_dict()
        data.pop("title", None)
        data["layer"] = {"periodic_x": self.boundary.periodic_x, "periodic_y": self.boundary.periodic_y}
        return _digest(data)


def _digest(data: dict) -> str:
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), allow_nan=True)
    return hashlib.sha256(text.encode()).hexdigest()


# --- dict / TOML form -------------------------------------------------------

class ScenarioTextError(ScenarioError):
    """Scenario text refused before or while parsing it; `line` where (or None)."""

    def __init__(self, field: str, value, allowed: str, line: int | None = None):
        super().__init__(field, value, allowed)
        self.line = line


# strings and comments, so that brackets, dots and digits inside them are not counted
_STRING_OR_COMMENT = re.compile(r'"""[\s\S]*?"""|\'\'\'[\s\S]*?\'\'\'|"(?:[^"\\\n]|\\.)*"|\'[^\'\n]*\'|#[^\n]*')
_BRACKET = re.compile(r"[\[\]{}]")
# possessive runs and a start only where a run starts: linear time on a megabyte of digits
_LONG_DOTTED_KEY = re.compile(r"(?<![A-Za-z0-9_-])[A-Za-z0-9_-]++(?:[ \t]*+\.[ \t]*+[A-Za-z0-9_-]++){%d,}"
                              % MAX_KEY_PARTS)
_LONG_NUMBER = re.compile(r"(?<![0-9_])[0-9](?:_?[0-9]){%d,}" % MAX_NUMBER_DIGITS)


def _blank_strings(text: str) -> str:
    """`text` with every string and comment replaced by one bare-key character
    (newlines kept, so line numbers stay)."""
    return _STRING_OR_COMMENT.sub(lambda m: "_" + "\n" * m.group().count("\n"), text)


def check_toml_limits(text: str) -> None:
    """Refuse scenario text that is too large, nested too deep, or has a dotted
    key or a number too long to be a scenario's (ScenarioTextError with the line)."""
    if not isinstance(text, str):
        raise ScenarioTextError("file", type(text).__name__, "TOML text")
    size = len(text.encode("utf-8", "surrogatepass")) if len(text) * 4 > MAX_TEXT_BYTES else len(text)
    if size > MAX_TEXT_BYTES:
        raise ScenarioTextError("file", f"{size:,} bytes", f"at most {MAX_TEXT_BYTES:,} bytes of TOML")
    bare = _blank_strings(text)
    depth = 0
    for match in _BRACKET.finditer(bare):
        depth = depth + 1 if match.group() in "[{" else max(0, depth - 1)
        if depth > MAX_NESTING:
            line = bare.count("\n", 0, match.start()) + 1
            raise ScenarioTextError("file", f"{depth} levels of nesting",
                                    f"arrays and tables nested at most {MAX_NESTING} deep", line)
    for pattern, what, allowed in (
            (_LONG_DOTTED_KEY, "a dotted key", f"keys of at most {MAX_KEY_PARTS} parts"),
            (_LONG_NUMBER, "a number", f"numbers of at most {MAX_NUMBER_DIGITS} digits")):
        match = pattern.search(bare)
        if match:
            line = bare.count("\n", 0, match.start()) + 1
            start = " ".join(match.group()[:24].split())
            raise ScenarioTextError("file", f"{what} of {len(match.group()):,} characters ({start}...)", allowed,
                                    line)


def parse_toml(text: str) -> dict:
    """The table in scenario text, after `check_toml_limits`.  Raises
    tomllib.TOMLDecodeError for malformed TOML, ScenarioTextError otherwise."""
    check_toml_limits(text)
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        raise
    except (ValueError, RecursionError, MemoryError) as exc:  # the limits above should leave none
        raise ScenarioTextError("file", "TOML", f"a scenario the reader can take ({type(exc).__name__})") from None


_SCALAR_KEYS = ("title", "dx", "dy", "nx", "ny", "steps", "courant", "eps_r", "sigma",
                "polarization", "precision")
_SIDE_KEYS = {f.name for f in fields(Side)} - {"label"}


def _side_to_dict(side: Side) -> dict:
    out = {k: v for k, v in asdict(side).items() if k in _SIDE_KEYS and v is not None}
    out.pop("profile", None)
    if side.profile is not None:
        out["profile"] = {k: list(getattr(side.profile, k)) for k in ("depth", "sigma", "kappa", "alpha")}
    return out


def scenario_to_dict(s: Scenario) -> dict[str, Any]:
    data: dict[str, Any] = {k: getattr(s, k) for k in _SCALAR_KEYS}
    if not data["title"]:
        data.pop("title")
    src = asdict(s.source)
    data["source"] = src
    if s.probes:
        data["probes"] = [asdict(p) for p in s.probes]
    if s.blocks:
        data["blocks"] = [asdict(b) for b in s.blocks]
    data["layer"] = {name: _side_to_dict(getattr(s.boundary, name)) for name in SIDES}
    return data


def _profile_from_file(field: str, value, base_dir) -> Profile:
    """The Profile in the CSV file `value` names, relative to base_dir and
    inside it (a scenario from elsewhere must not make the reader open files
    of its choosing, nor wait on a pipe or a device)."""
    from .export import profile_from_csv  # export imports this module

    if base_dir is None:
        # text from elsewhere (a page upload) must not make the reader open files of its choosing
        raise ScenarioError(field, value, "only in a scenario read from a file (give the table inline "
                                          "as profile = {depth, sigma, kappa, alpha} instead)")
    what = "the name of a CSV file with columns depth, sigma, kappa, alpha, in the scenario's folder"
    if not isinstance(value, str) or not value.strip() or "\0" in value or len(value) > 1024:
        raise ScenarioError(field, value, what)
    folder = Path(base_dir)
    try:
        folder = folder.resolve()
        path = (folder / Path(value).expanduser()).resolve(strict=True)
    except (OSError, RuntimeError) as exc:  # missing, a symlink loop, a name too long
        reason = getattr(exc, "strerror", None) or str(exc)
        raise ScenarioError(field, value, f"a readable CSV file ({reason}: {folder / value})") from None
    if not path.is_relative_to(folder):
        raise ScenarioError(field, value, f"a file in the scenario's folder {folder} or below it "
                                          f"(this one is {path})")
    try:
        info = path.stat()
    except OSError as exc:
        raise ScenarioError(field, value, f"a readable CSV file ({exc.strerror or exc}: {path})") from None
    if not stat.S_ISREG(info.st_mode):
        raise ScenarioError(field, value, f"a regular file ({path} is a folder, a pipe or a device)")
    if info.st_size > MAX_PROFILE_BYTES:
        raise ScenarioError(field, value, f"a CSV file of at most {MAX_PROFILE_BYTES:,} bytes "
                                          f"({path.name} has {info.st_size:,})")
    try:
        with path.open("rb") as fh:
            raw = fh.read(MAX_PROFILE_BYTES + 1)  # the file may have grown since stat
        text = raw.decode("utf-8-sig")
    except OSError as exc:
        raise ScenarioError(field, value, f"a readable CSV file ({exc.strerror or exc}: {path})") from None
    except UnicodeDecodeError:
        raise ScenarioError(field, value, f"a UTF-8 text file ({path} is not)") from None
    if len(raw) > MAX_PROFILE_BYTES:
        raise ScenarioError(field, value, f"a CSV file of at most {MAX_PROFILE_BYTES:,} bytes")
    try:
        return profile_from_csv(text, source_name="profile")
    except ScenarioError as exc:
        raise ScenarioError(field, value, f"a valid profile table; in {path.name}: {exc}") from None


def _side_from_dict(name: str, shared: dict, own: dict, base_dir=None) -> Side:
    merged = {**shared, **own}
    _check_keys(f"layer.{name}", merged, _SIDE_KEYS | {"profile_file"})
    if "profile_file" in merged:
        # a side's own entry overrides a shared one of the other form
        if "profile" in own and "profile_file" not in own:
            merged.pop("profile_file")
        elif "profile_file" in own and "profile" not in own:
            merged.pop("profile", None)
        if "profile" in merged and "profile_file" in merged:
            raise ScenarioError(f"layer.{name}.profile_file", merged["profile_file"],
                                "absent when an inline profile table is given (give one of the two)")
    profile_file = merged.pop("profile_file", None)
    if profile_file is not None:
        return Side(**merged, profile=_profile_from_file(f"layer.{name}.profile_file", profile_file, base_dir),
                    label=f"layer.{name}")
    profile = merged.pop("profile", None)
    if profile is not None:
        _check_keys(f"layer.{name}.profile", profile, ("depth", "sigma", "kappa", "alpha"))
        missing = [k for k in ("depth", "sigma", "kappa", "alpha") if k not in profile]
        if missing:
            raise ScenarioError(f"layer.{name}.profile.{missing[0]}", None, "a list of numbers")
        profile = Profile(**profile)
    return Side(**merged, profile=profile, label=f"layer.{name}")


def scenario_from_dict(data: dict, base_dir=None) -> Scenario:
    """Build a Scenario from its dict/TOML form; unknown keys are errors.

    The [layer] table may hold keys shared by all sides plus a sub-table per
    side (left, right, bottom, top) that overrides them.  A side's profile is
    an inline table `profile = {depth, sigma, kappa, alpha}` or
    `profile_file = "name.csv"` (read by export.profile_from_csv; a relative
    name starts from base_dir; without base_dir it is refused, so text from
    elsewhere cannot make the reader open files).
    """
    _check_keys("", data, set(_SCALAR_KEYS) | {"source", "probes", "blocks", "layer"})
    for key in ("dx", "dy", "nx", "ny", "source"):
        if key not in data:
            raise ScenarioError(key, None, "present (it has no default)")
    src = data["source"]
    _check_keys("source", src, {f.name for f in fields(Source)})
    for key in ("x", "y", "f_max"):
        if key not in src:
            raise ScenarioError(f"source.{key}", None, "present (it has no default)")
    for key in ("probes", "blocks"):
        if not isinstance(data.get(key, []), list):
            raise ScenarioError(key, data[key], f"an array of tables ([[{key}]] entries)")
    probes = []
    for i, p in enumerate(data.get("probes", [])):
        _check_keys(f"probes[{i}]", p, ("name", "x", "y"))
        for key in ("name", "x", "y"):
            if key not in p:
                raise ScenarioError(f"probes[{i}].{key}", None, "present")
        probes.append(Probe(**p))
    blocks = []
    for i, b in enumerate(data.get("blocks", [])):
        _check_keys(f"blocks[{i}]", b, {f.name for f in fields(Block)})
        for key in ("x0", "x1", "y0", "y1"):
            if key not in b:
                raise ScenarioError(f"blocks[{i}].{key}", None, "present")
        blocks.append(Block(**b))
    layer = data.get("layer", {})
    if not isinstance(layer, dict):
        raise ScenarioError("layer", layer, "a table")
    shared = {k: v for k, v in layer.items() if k not in SIDES}
    sides = {}
    for name in SIDES:
        own = layer.get(name, {})
        if not isinstance(own, dict):
            raise ScenarioError(f"layer.{name}", own, "a table")
        sides[name] = _side_from_dict(name, shared, own, base_dir)
    scalars = {k: data[k] for k in _SCALAR_KEYS if k in data}
    return Scenario(source=Source(**src), probes=tuple(probes), blocks=tuple(blocks),
                    boundary=Boundary(**sides), **scalars)
