"""The left column of the page: the layer and problem controls, and the scenario they describe.

The controls show a scenario (`show`) and read one back (`scenario`).  Sliders
move on a grid of steps, but a scenario loaded from a file or a link keeps its
own values: as long as a control still shows the loaded value, the loaded
value (not the slider's rounding of it) is what is measured, and sides that a
file set apart stay apart until a layer control is moved.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import panel as pn

from quietlayer.assets import preset_names
from quietlayer.engine import (Boundary, Profile, Scenario, ScenarioError, Side, parse_frequency, parse_length,
                               sigma_opt)
from quietlayer.engine.budget import VISITOR_BUDGET, check_work
from quietlayer.engine.defaults import angle_probes
from quietlayer.engine.verdict import DEFAULT_BUDGET_DB

from .units import format_frequency, format_length

SIDE_NAMES = ["left", "right", "bottom", "top"]
SOURCE_GAP = 12  # cells between the source and the right face in the bench layout
CUSTOM = "custom (loaded file)"  # the preset box's entry for a scenario that came from a file
INVALID_STYLE = {"outline": "2px solid #d1242f", "border-radius": "4px"}

# which control a ScenarioError's field name belongs to
FIELD_CONTROL = {
    "cell size": "w_cell", "dx": "w_cell", "dy": "w_cell", "f_min": "w_fmin", "f_max": "w_fmax",
    "source.f_min": "w_fmin", "source.f_max": "w_fmax", "nx": "w_nx", "ny": "w_ny", "steps": "w_steps",
    "eps_r": "w_eps", "host conductivity": "w_sigma_host", "sigma": "w_sigma_host", "courant": "w_courant",
    "budget": "w_budget",
}


def first_layer(s: Scenario) -> Side | None:
    return next((getattr(s.boundary, n) for n in SIDE_NAMES if getattr(s.boundary, n).kind == "cpml"), None)


class Controls:
    """Widgets of the layer and problem, and the scenario they describe."""

    def __init__(self):
        w = pn.widgets
        self.w_preset = w.Select(label="Scenario preset", options=preset_names(), value="demo")
        self.w_cells = w.IntSlider(label="Layer thickness (cells)", start=2, end=40, value=10)
        self.w_order = w.FloatSlider(label="Grading order m", start=1.0, end=6.0, step=0.1, value=3.0)
        self.w_ratio = w.FloatSlider(label="sigma_max / sigma_opt", start=0.05, end=5.0, step=0.05, value=1.0)
        self.w_sigma_abs = pn.pane.Markdown("", margin=(-8, 10, 0, 10))
        self.w_kappa = w.FloatSlider(label="kappa_max", start=1.0, end=30.0, step=0.5, value=1.0)
        self.w_alpha = w.FloatSlider(label="alpha_max (S/m)", start=0.0, end=1.0, step=0.005, value=0.0)
        self.w_alpha_order = w.FloatSlider(label="alpha grading order", start=0.0, end=4.0, step=0.1, value=1.0)
        self.w_sides = w.CheckButtonGroup(label="Sides with the layer (others: wall)", options=SIDE_NAMES,
                                          value=list(SIDE_NAMES), button_type="primary", button_style="outline")
        self.w_cell = w.TextInput(label="Cell size (dx = dy)", value="1 mm")
        self.w_courant = w.FloatSlider(label="Courant number (x 2D limit)", start=0.1, end=1.0, step=0.01, value=0.99)
        self.w_eps = w.FloatInput(label="Host eps_r", value=1.0, start=1.0, end=100.0, step=0.1)
        self.w_sigma_host = w.FloatInput(label="Host conductivity (S/m)", value=0.0, start=0.0, end=100.0, step=0.001)
        self.w_pol = w.RadioButtonGroup(label="Polarization", options=["TMz", "TEz"], value="TMz")
        self.w_fmin = w.TextInput(label="f_min", value="1 GHz", width=145)
        self.w_fmax = w.TextInput(label="f_max", value="15 GHz", width=145)
        self.w_precision = w.RadioButtonGroup(label="Precision", options=["float32", "float64"], value="float32")
        self.w_nx = w.IntInput(label="Interior nx (cells)", value=80, start=30, end=600, width=145)
        self.w_ny = w.IntInput(label="Interior ny (cells)", value=200, start=30, end=600, width=145)
        self.w_steps = w.IntInput(label="Run length (steps)", value=600, start=50, end=6000, step=50)
        self.w_budget = w.FloatInput(label="Budget: worst peak error (dB)", value=DEFAULT_BUDGET_DB,
                                     start=-200.0, end=0.0, step=1.0)
        self.w_profile = w.FileInput(accept=".csv,.txt", multiple=False)
        self.w_profile_clear = w.Button(label="Use the graded profile", disabled=True)
        self.w_scenario_file = w.FileInput(accept=".toml", multiple=False)
        self.labels = {widget: widget.name for widget in self.url_widgets().values()}
        self.loaded: Scenario | None = None  # the scenario last shown, whose exact values are kept
        self.shown: dict = {}  # control -> the value it was given when `loaded` was shown

    def url_widgets(self) -> dict:
        """The controls a link carries, by their key in the address."""
        return {"preset": self.w_preset, "cells": self.w_cells, "m": self.w_order, "ratio": self.w_ratio,
                "kappa": self.w_kappa, "alpha": self.w_alpha, "ma": self.w_alpha_order, "sides": self.w_sides,
                "cell": self.w_cell, "courant": self.w_courant, "eps": self.w_eps, "sigma": self.w_sigma_host,
                "pol": self.w_pol, "fmin": self.w_fmin, "fmax": self.w_fmax, "prec": self.w_precision,
                "nx": self.w_nx, "ny": self.w_ny, "steps": self.w_steps, "budget": self.w_budget}

    def layer_widgets(self) -> list:
        return [self.w_cells, self.w_order, self.w_ratio, self.w_kappa, self.w_alpha, self.w_alpha_order]

    # --- scenario -> controls ---------------------------------------------------
    def show(self, s: Scenario) -> None:
        """Put `s` into the controls; its exact values are remembered (see the module note)."""
        side = first_layer(s) or Side()
        ratio = side.sigma_ratio if side.sigma_ratio is not None else \
            side.sigma_max / sigma_opt(side.order, s.dx, s.eps_r)
        values = {
            self.w_cells: int(np.clip(side.cells, self.w_cells.start, self.w_cells.end)),
            # a slider holds an off-step value as given (it draws it on its steps), so a link
            # written from the controls carries the loaded value
            self.w_order: float(np.clip(side.order, 1.0, 6.0)),
            self.w_ratio: float(np.clip(ratio, 0.05, 5.0)),
            self.w_kappa: float(np.clip(side.kappa_max, 1.0, 30.0)),
            self.w_alpha: float(np.clip(side.alpha_max, 0.0, 1.0)),
            self.w_alpha_order: float(np.clip(side.alpha_order, 0.0, 4.0)),
            self.w_sides: [n for n in SIDE_NAMES if getattr(s.boundary, n).kind == "cpml"],
            self.w_cell: format_length(s.dx),
            self.w_courant: float(np.clip(s.courant, 0.1, 1.0)),
            self.w_eps: float(s.eps_r),
            self.w_sigma_host: float(s.sigma),
            self.w_pol: s.polarization,
            self.w_fmin: format_frequency(s.source.f_min),
            self.w_fmax: format_frequency(s.source.f_max),
            self.w_precision: s.precision,
            self.w_nx: s.nx,
            self.w_ny: s.ny,
            self.w_steps: s.steps,
        }
        for widget, value in values.items():
            widget.value = value
        self.loaded, self.shown = s, values
        self.refresh_labels()

    def refresh_labels(self) -> None:
        """The cell-size label names a loaded non-square cell's dy while the loaded dx is shown
        (a cell size typed then sets dx = dy)."""
        s = self.loaded
        name = (f"Cell size dx (dy = {format_length(s.dy)} as loaded; a new value sets both)"
                if s is not None and s.dx != s.dy and self.untouched(self.w_cell) else self.labels[self.w_cell])
        if self.w_cell.name != name:
            self.w_cell.name = name

    def untouched(self, *widgets) -> bool:
        """True while every one of `widgets` still shows the loaded scenario's value."""
        return self.loaded is not None and all(w.value == self.shown.get(w) for w in widgets)

    # --- controls -> scenario ---------------------------------------------------
    def check_ranges(self) -> None:
        """A link (or a file) may set a number no control could: refuse it by the control's name."""
        for widget in self.url_widgets().values():
            lo, hi, value = getattr(widget, "start", None), getattr(widget, "end", None), widget.value
            if isinstance(lo, (int, float)) and isinstance(hi, (int, float)) and isinstance(value, (int, float)) \
                    and not lo <= value <= hi:  # NaN fails too
                raise ScenarioError(self.labels[widget], value, f"a number from {lo:g} to {hi:g}")

    def budget_db(self) -> float:
        value = self.w_budget.value
        if value is None or not -200.0 <= value <= 0.0:
            raise ScenarioError(self.labels[self.w_budget], value, "a number of dB from -200 to 0")
        return float(value)

    def scenario(self, base: Scenario, profile: Profile | None) -> Scenario:
        """The scenario the controls describe, built on `base`; ScenarioError names a bad field."""
        self.check_ranges()
        b = base
        d = self._cell_size(b)
        f_min = parse_frequency("f_min", self.w_fmin.value)
        f_max = parse_frequency("f_max", self.w_fmax.value)
        if self.untouched(self.w_fmin) and base is self.loaded:
            f_min = b.source.f_min
        if self.untouched(self.w_fmax) and base is self.loaded:
            f_max = b.source.f_max
        for name, widget in (("nx", self.w_nx), ("ny", self.w_ny), ("steps", self.w_steps),
                             ("eps_r", self.w_eps), ("host conductivity", self.w_sigma_host)):
            if widget.value is None:
                raise ScenarioError(name, None, "a number")
        sides = self._sides(b, profile)
        nx, ny = int(self.w_nx.value), int(self.w_ny.value)
        source = replace(b.source, f_min=f_min, f_max=f_max)
        probes = b.probes
        if (nx, ny) != (b.nx, b.ny):
            if nx <= SOURCE_GAP + 4:
                raise ScenarioError("nx", nx, f"more than {SOURCE_GAP + 4} cells for the bench layout")
            sx, sy = nx - SOURCE_GAP, min(b.source.y, ny // 3)
            source = replace(source, x=sx, y=sy)
            probes = angle_probes(nx, ny, sx, sy)
        courant = b.courant if self.untouched(self.w_courant) and base is self.loaded else self.w_courant.value
        s = b.with_changes(dx=d, dy=d if d != b.dx or b.dx == b.dy else b.dy, nx=nx, ny=ny,
                           steps=int(self.w_steps.value), courant=courant, eps_r=self.w_eps.value,
                           sigma=self.w_sigma_host.value, polarization=self.w_pol.value,
                           precision=self.w_precision.value, source=source, probes=probes,
                           boundary=Boundary(**sides))
        check_work(s, VISITOR_BUDGET)  # any visitor may ask (controls, link, upload): refuse what one change cannot afford
        return s

    def _cell_size(self, b: Scenario) -> float:
        if self.untouched(self.w_cell) and b is self.loaded:
            return b.dx  # the file's own value, not its printed form
        d = parse_length("cell size", self.w_cell.value)
        if not 1e-9 <= d <= 1.0:
            raise ScenarioError("cell size", self.w_cell.value, "a length from 1 nm to 1 m, e.g. '1 mm' or '20 nm'")
        return d

    def _sides(self, b: Scenario, profile: Profile | None) -> dict:
        loaded = b is self.loaded
        if loaded and self.untouched(*self.layer_widgets(), self.w_sides) and profile is first_profile(b):
            return {n: getattr(b.boundary, n) for n in SIDE_NAMES}  # exactly as loaded, sides kept apart
        exact = first_layer(b) if loaded else None

        def value(widget, attribute):
            if exact is not None and self.untouched(widget):
                return getattr(exact, attribute)
            return widget.value

        ratio = self.w_ratio.value
        sigma_max = None
        if exact is not None and self.untouched(self.w_ratio):
            ratio, sigma_max = exact.sigma_ratio, exact.sigma_max  # one of the two is set
        layer = Side(kind="cpml", cells=self.w_cells.value, order=value(self.w_order, "order"),
                     sigma_ratio=ratio, sigma_max=sigma_max, kappa_max=value(self.w_kappa, "kappa_max"),
                     alpha_max=value(self.w_alpha, "alpha_max"), alpha_order=value(self.w_alpha_order, "alpha_order"),
                     profile=profile)
        sides = {}
        for n in SIDE_NAMES:
            if getattr(b.boundary, n).kind == "periodic":
                sides[n] = getattr(b.boundary, n)
            else:
                sides[n] = layer if n in self.w_sides.value else Side(kind="wall")
        return sides

    # --- marks at the fields ------------------------------------------------------
    def mark_invalid(self, field: str | None) -> None:
        """Outline the control a refused value belongs to (and clear the others)."""
        target = None
        if field is not None:
            target = getattr(self, FIELD_CONTROL.get(field, ""), None)
            if target is None:
                target = next((w for w, label in self.labels.items() if label == field), None)
        for widget in self.labels:
            wanted = INVALID_STYLE if widget is target else {}
            if (widget.styles or {}) != wanted:
                widget.styles = wanted

    def sigma_text(self, s: Scenario) -> str:
        side = first_layer(s)
        if side is None:
            return "no side carries a layer"
        if side.profile is not None:
            return f"profile from file, {len(side.profile.depth)} rows (sliders for grading are ignored)"
        opt = sigma_opt(side.order, s.dx, s.eps_r)
        smax = side.sigma_max if side.sigma_max is not None else side.sigma_ratio * opt
        text = f"sigma_max = **{smax:.4g} S/m** (sigma_opt = {opt:.4g} S/m)"
        layered = [getattr(s.boundary, n) for n in SIDE_NAMES if getattr(s.boundary, n).kind == "cpml"]
        if any(other != side for other in layered):
            text += " — the sides differ (as loaded); moving a layer control sets them all alike"
        return text

    def panel(self, downloads: list) -> pn.Column:
        card = dict(sizing_mode="stretch_width", margin=(4, 4))
        layer_box = pn.Card(self.w_cells, self.w_order, self.w_ratio, self.w_sigma_abs, self.w_kappa,
                            self.w_alpha, self.w_alpha_order, pn.pane.Markdown("Sides with the layer (others: wall)"),
                            self.w_sides, pn.pane.Markdown("Profile from your own code (CSV: depth, sigma, kappa, alpha)"),
                            self.w_profile, self.w_profile_clear, title="Layer", collapsible=True, **card)
        problem_box = pn.Card(self.w_preset, self.w_cell, self.w_courant, self.w_eps, self.w_sigma_host,
                              pn.pane.Markdown("Polarization"), self.w_pol, pn.Row(self.w_fmin, self.w_fmax),
                              pn.pane.Markdown("Precision"), self.w_precision, pn.Row(self.w_nx, self.w_ny),
                              self.w_steps, pn.pane.Markdown("Load a scenario file (TOML)"), self.w_scenario_file,
                              title="Problem", collapsible=True, collapsed=False, **card)
        verdict_box = pn.Card(self.w_budget, pn.pane.Markdown(
            "The verdict passes when the worst peak error is at or below the budget and the late-time "
            "check finds no growing energy (the rule of `quietlayer check`)."),
            title="Verdict", collapsible=True, **card)
        take_box = pn.Card(*downloads, title="Take it away", collapsible=True, collapsed=True, **card)
        return pn.Column(layer_box, verdict_box, problem_box, take_box, width=330, scroll=True, height=None)


def first_profile(s: Scenario) -> Profile | None:
    side = first_layer(s)
    return side.profile if side is not None else None
