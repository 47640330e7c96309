"""The live tuning page: one instance per browser session (see create_page).

Moving a control rebuilds the scenario, and the measurement runs in a worker
thread (the numba kernels release the GIL) so the page stays responsive.  A
burst of changes is coalesced: while a run is going, further changes only
bump a generation counter; when the run ends the newest parameters are run
next, and a result whose generation is stale is never shown.  The 20,000-step
late-time check follows each shown result in a second worker and is cancelled
when the parameters change again.
"""

from __future__ import annotations

import io
import math
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from functools import partial

import holoviews as hv
import numpy as np
import panel as pn

hv.extension("bokeh", logo=False)
pn.extension(notifications=False)

from quietlayer.assets import preset_names, preset_path
from quietlayer.engine import (Boundary, Profile, RunCancelled, Scenario, ScenarioError, Side,
                               parse_frequency, parse_length, sigma_opt)
from quietlayer.engine.defaults import angle_probes
from quietlayer.engine.measure import measure, late_time_check
from quietlayer.engine.sweep import (LAYER_PARAMETERS, Axis, LocalPool, SweepTable, apply_point, grid_points,
                                     parse_vary, run_sweep)

from . import CAUTION, plots
from .confirm3d_view import Confirm3DView
from .units import format_frequency, format_length

PAGE_PARTS = frozenset({"probes", "spectra", "angles", "global", "snapshots"})
SIDE_NAMES = ["left", "right", "bottom", "top"]
SOURCE_GAP = 12  # cells between the source and the right face in the bench layout
FIGURE_GAP_MS = 15  # between figure updates: the previous changes reach the browser first

NOTES = {
    "fields": "**What am I looking at.** Left: |field| over the whole grid in dB of the largest incident "
              "field; the dashed box is the interior, the layer lies outside it. Right: the layer's echo alone "
              "(test run minus the reflection-free reference) over the interior. Star: source; dots: probes.",
    "spectrum": "**What am I looking at.** How much of each frequency comes back at a few probes (solid), "
                "beside the continuous theory of the graded layer at that probe's incidence angle (dashed). "
                "Where solid lies above dashed the grid, not the absorption, limits the layer.",
    "error": "**What am I looking at.** The echo at the probes over time, in dB of the probe's largest "
             "reference field. Late humps that do not die out hint at slow, low-frequency reflection.",
    "angle": "**What am I looking at.** Band-averaged reflection per probe against its specular incidence "
             "angle on the nearest face. The dashed theory is for a plane wave; near a face a cylindrical "
             "wave can do better than it at grazing angles.",
    "profile": "**What am I looking at.** The layer's grading against depth from its inner face: "
               "conductivity sigma and CFS alpha, the stretch kappa, and the psi update coefficients b and c.",
    "sweep": "**What am I looking at.** Each cell is one measurement of the scenario that was in the controls "
             "when the sweep started, with the two parameters set to the cell's values; its colour is the chosen "
             "score in dB (darker is quieter). White lines: contours of the score; star: the lowest score; "
             "orange outline: the setting now in the controls. Grey cells were invalid, pink ones diverged, "
             "red ones failed, white ones are still to come: hover for the values and the reason. "
             "**Click a cell** to load its setting into the controls: the headline and figures re-measure it.",
}

STYLE = """
:host { --ql-accent: #0072B2; }
.ql-card { border: 1px solid #d0d7de; border-radius: 6px; padding: 6px 10px; min-width: 150px; background: #fafbfc; }
.ql-card .ql-label { font-size: 0.8em; color: #444; }
.ql-card .ql-value { font-size: 1.45em; font-weight: 600; color: #111; }
.ql-card .ql-sub { font-size: 0.75em; color: #555; }
.ql-present .ql-card .ql-value { font-size: 2.2em; }
.ql-present .ql-card { min-width: 210px; }
.ql-present .ql-card .ql-label, .ql-present .ql-card .ql-sub { font-size: 1.1em; }
.ql-caution { font-size: 0.85em; color: #5a3b00; background: #fff6e0; border-left: 4px solid #E69F00; padding: 4px 8px; }
"""


def _card(label: str, value: str, sub: str, key: str) -> str:
    return (f'<div class="ql-card" data-key="{key}"><div class="ql-label">{label}</div>'
            f'<div class="ql-value" data-value="{key}">{value}</div><div class="ql-sub">{sub}</div></div>')


def load_preset(name: str) -> Scenario:
    return Scenario.from_toml(preset_path(name).read_text("utf-8"))


def snap(value: float, step: float) -> float:
    """`value` on a control's grid of `step`, as a clean decimal (0.35, not 0.35000000000000003)."""
    return float(f"{round(value / step) * step:.12g}")


class QuietlayerPage:
    """Widgets, plots and the compute loop of one session."""

    def __init__(self, preset: str = "demo"):
        self.base = load_preset(preset)
        self.profile: Profile | None = None
        self.result = None
        self.pinned = None
        self.generation = 0
        self.running = False
        self.last_good: Scenario | None = None
        self.fontscale = 1.0
        self.measure_pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ql-measure")
        self.late_pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ql-late")
        self._suspend = False
        self._placing_player = False
        self._lock = threading.Lock()
        self.doc = None  # the session's document, set by create_page
        self._make_widgets()
        self._set_widgets_from(self.base)
        self._make_plots()
        self.sweep = SweepView(self)
        self.confirm3d = Confirm3DView(self._current, self._call_soon, lambda: self.result)
        self._layout()
        self._watch()
        self._show_headline()  # "computing" until the first result arrives

    # --- widgets ----------------------------------------------------------
    def _make_widgets(self):
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
        self.w_present = w.Toggle(label="Presentation mode", value=False, button_type="default")
        self.w_pin = w.Button(label="Pin as A", button_type="primary")
        self.w_unpin = w.Button(label="Clear A", disabled=True)
        self.w_profile = w.FileInput(accept=".csv,.txt", multiple=False)
        self.w_profile_clear = w.Button(label="Use the graded profile", disabled=True)
        self.w_scenario_file = w.FileInput(accept=".toml", multiple=False)
        self.w_player = w.Player(label="frame", start=0, end=1, value=0, interval=80, loop_policy="loop",
                                 show_loop_controls=False, width=330)
        self.d_toml = w.FileDownload(callback=self._toml_file, filename="scenario.toml", label="Scenario (TOML)",
                                     button_type="light", embed=False)
        self.d_csv = w.FileDownload(callback=self._csv_file, filename="coefficients.csv",
                                    label="Coefficients (CSV)", button_type="light", embed=False)
        self.d_json = w.FileDownload(callback=self._json_file, filename="coefficients.json",
                                     label="Coefficients (JSON)", button_type="light", embed=False)
        self.d_report = w.FileDownload(callback=self._report_file, filename="quietlayer-report.html",
                                       label="Report (HTML)", button_type="light", embed=False)
        self.message = pn.pane.Alert("", alert_type="danger", visible=False, sizing_mode="stretch_width")
        self.status = pn.pane.Markdown("", margin=(0, 10))
        self.spinner = pn.indicators.LoadingSpinner(value=False, size=26)
        self.headline = pn.pane.HTML("", sizing_mode="stretch_width", stylesheets=[STYLE])

    def _url_widgets(self):
        return {"preset": self.w_preset, "cells": self.w_cells, "m": self.w_order, "ratio": self.w_ratio,
                "kappa": self.w_kappa, "alpha": self.w_alpha, "ma": self.w_alpha_order, "sides": self.w_sides,
                "cell": self.w_cell, "courant": self.w_courant, "eps": self.w_eps, "sigma": self.w_sigma_host,
                "pol": self.w_pol, "fmin": self.w_fmin, "fmax": self.w_fmax, "prec": self.w_precision,
                "nx": self.w_nx, "ny": self.w_ny, "steps": self.w_steps, "present": self.w_present}

    def _set_widgets_from(self, s: Scenario):
        """Show scenario `s` in the controls (without triggering runs)."""
        self._suspend = True
        try:
            side = next((getattr(s.boundary, n) for n in SIDE_NAMES if getattr(s.boundary, n).kind == "cpml"), Side())
            self.w_cells.value = int(np.clip(side.cells, self.w_cells.start, self.w_cells.end))
            self.w_order.value = float(np.clip(side.order, 1.0, 6.0))
            ratio = side.sigma_ratio if side.sigma_ratio is not None else \
                side.sigma_max / sigma_opt(side.order, s.dx, s.eps_r)
            self.w_ratio.value = float(np.clip(snap(ratio, 0.05), 0.05, 5.0))
            self.w_kappa.value = float(np.clip(side.kappa_max, 1.0, 30.0))
            self.w_alpha.value = float(np.clip(side.alpha_max, 0.0, 1.0))
            self.w_alpha_order.value = float(np.clip(side.alpha_order, 0.0, 4.0))
            self.w_sides.value = [n for n in SIDE_NAMES if getattr(s.boundary, n).kind == "cpml"]
            self.w_cell.value = format_length(s.dx)
            self.w_courant.value = float(s.courant)
            self.w_eps.value = float(s.eps_r)
            self.w_sigma_host.value = float(s.sigma)
            self.w_pol.value = s.polarization
            self.w_fmin.value = format_frequency(s.source.f_min)
            self.w_fmax.value = format_frequency(s.source.f_max)
            self.w_precision.value = s.precision
            self.w_nx.value = s.nx
            self.w_ny.value = s.ny
            self.w_steps.value = s.steps
        finally:
            self._suspend = False

    # --- scenario from the controls ----------------------------------------
    def scenario_from_controls(self) -> Scenario:
        """The scenario the controls describe; ScenarioError names a bad field."""
        b = self.base
        d = parse_length("cell size", self.w_cell.value)
        if not 1e-9 <= d <= 1.0:
            raise ScenarioError("cell size", self.w_cell.value, "a length from 1 nm to 1 m, e.g. '1 mm' or '20 nm'")
        f_min = parse_frequency("f_min", self.w_fmin.value)
        f_max = parse_frequency("f_max", self.w_fmax.value)
        for name, widget in (("nx", self.w_nx), ("ny", self.w_ny), ("steps", self.w_steps),
                             ("eps_r", self.w_eps), ("host conductivity", self.w_sigma_host)):
            if widget.value is None:
                raise ScenarioError(name, None, "a number")
        layer = Side(kind="cpml", cells=self.w_cells.value, order=self.w_order.value,
                     sigma_ratio=self.w_ratio.value, kappa_max=self.w_kappa.value, alpha_max=self.w_alpha.value,
                     alpha_order=self.w_alpha_order.value, profile=self.profile)
        sides = {}
        for n in SIDE_NAMES:
            if getattr(b.boundary, n).kind == "periodic":
                sides[n] = getattr(b.boundary, n)
            else:
                sides[n] = layer if n in self.w_sides.value else Side(kind="wall")
        nx, ny = int(self.w_nx.value), int(self.w_ny.value)
        source = replace(b.source, f_min=f_min, f_max=f_max)
        probes = b.probes
        if (nx, ny) != (b.nx, b.ny):
            if nx <= SOURCE_GAP + 4:
                raise ScenarioError("nx", nx, f"more than {SOURCE_GAP + 4} cells for the bench layout")
            sx, sy = nx - SOURCE_GAP, min(b.source.y, ny // 3)
            source = replace(source, x=sx, y=sy)
            probes = angle_probes(nx, ny, sx, sy)
        return b.with_changes(dx=d, dy=d, nx=nx, ny=ny, steps=int(self.w_steps.value),
                              courant=self.w_courant.value, eps_r=self.w_eps.value, sigma=self.w_sigma_host.value,
                              polarization=self.w_pol.value, precision=self.w_precision.value,
                              source=source, probes=probes, boundary=Boundary(**sides))

    # --- plots ---------------------------------------------------------------
    FIGURES = ("spectrum", "angle", "total", "reflected", "error", "profile0", "profile1", "profile2")

    def _make_plots(self):
        self.frame_stream = hv.streams.Stream.define("Frame", frame=0)()
        self.pipes = {k: hv.streams.Pipe(data=None) for k in self.FIGURES}
        self.figure_units = None
        self.panes = {k: pn.pane.HoloViews(None, sizing_mode="stretch_width", linked_axes=False) for k in self.FIGURES}
        for k in ("total", "reflected"):  # fixed-size figures: the pane takes the figure's own size
            self.panes[k] = pn.pane.HoloViews(None, sizing_mode="fixed", linked_axes=False)

    def _figures_need_rebuild(self) -> bool:
        return plots.units_of(self.result) + (self.fontscale,) != self.figure_units

    def _rebuild_plots(self):
        """Show the current result in every figure at once (pin, presentation)."""
        if self.result is None:
            return
        if self._figures_need_rebuild():
            self._build_figures()
        for key in self.FIGURES:
            self.pipes[key].event(data=self.result)

    def _build_figures(self):
        """Figures keep one layer structure, so a new result streams into the
        existing Bokeh plots; they are built anew only when the display units,
        the probe angles or the font scale change."""
        m = self.result
        self.figure_units = plots.units_of(m) + (self.fontscale,)
        fs = self.fontscale
        page = self
        for pipe in self.pipes.values():
            pipe.update(data=m)
        maps = {
            "total": hv.DynamicMap(lambda data, frame: plots.field_image(data, frame, False, fs),
                                   streams=[self.pipes["total"], self.frame_stream]),
            "reflected": hv.DynamicMap(lambda data, frame: plots.field_image(data, frame, True, fs),
                                       streams=[self.pipes["reflected"], self.frame_stream]),
            "spectrum": hv.DynamicMap(lambda data: plots.spectrum_plot(data, page.pinned, fs),
                                      streams=[self.pipes["spectrum"]]),
            "error": hv.DynamicMap(lambda data: plots.error_plot(data, page.pinned, fs),
                                   streams=[self.pipes["error"]]),
            "angle": hv.DynamicMap(lambda data: plots.angle_plot(data, page.pinned, fs),
                                   streams=[self.pipes["angle"]]),
        }
        for k in range(3):
            maps[f"profile{k}"] = hv.DynamicMap(lambda data, k=k: plots.profile_plots(data, fs)[k],
                                                streams=[self.pipes[f"profile{k}"]])
        for key, dmap in maps.items():
            self.panes[key].object = dmap

    # --- layout ---------------------------------------------------------------
    def _layout(self):
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
        take_box = pn.Card(self.d_toml, self.d_csv, self.d_json, self.d_report, title="Take it away",
                           collapsible=True, collapsed=True, **card)
        self.controls = pn.Column(layer_box, problem_box, take_box, width=330, scroll=True, height=None)
        top = pn.Row(pn.pane.Markdown("## Quietlayer — how much does this absorbing layer reflect?", margin=(0, 10)),
                     pn.layout.HSpacer(), self.spinner, self.w_pin, self.w_unpin, self.w_present,
                     sizing_mode="stretch_width")
        caution = pn.pane.HTML(f'<div class="ql-caution">{CAUTION}</div>', stylesheets=[STYLE],
                               sizing_mode="stretch_width")
        note = lambda k: pn.pane.Markdown(NOTES[k], sizing_mode="stretch_width", styles={"font-size": "0.85em"})
        fields = pn.Column(pn.Row(self.panes["total"], pn.Spacer(width=20), self.panes["reflected"]),
                           pn.Row(self.w_player, pn.pane.Markdown("Time scrubber: play, pause or drag through "
                                                                  "the run.")),
                           note("fields"), sizing_mode="stretch_width")
        curves = pn.GridBox(pn.Column(self.panes["spectrum"], note("spectrum")),
                            pn.Column(self.panes["angle"], note("angle")),
                            pn.Column(self.panes["error"], note("error")),
                            pn.Column(self.panes["profile0"], note("profile")),
                            ncols=2, sizing_mode="stretch_width")
        profile_row = pn.Row(self.panes["profile1"], self.panes["profile2"], sizing_mode="stretch_width")
        # the headline stays above both tabs: a cell clicked on the sweep map is re-measured in view
        self.tabs = pn.Tabs(("Figures", pn.Column(fields, curves, profile_row, sizing_mode="stretch_width")),
                            ("Sweep", self.sweep.panel), ("Confirm in 3D", self.confirm3d.panel),
                            dynamic=False, sizing_mode="stretch_width")
        self.main = pn.Column(top, self.message, self.headline, self.status, self.tabs, caution,
                              sizing_mode="stretch_width", stylesheets=[STYLE])
        self.root = pn.Row(self.controls, self.main, sizing_mode="stretch_width")

    # --- events ---------------------------------------------------------------
    def _watch(self):
        live = [self.w_cells, self.w_order, self.w_ratio, self.w_kappa, self.w_alpha, self.w_alpha_order,
                self.w_courant]
        for widget in live:
            widget.param.watch(self._changed, "value_throttled")
        for widget in (self.w_sides, self.w_cell, self.w_eps, self.w_sigma_host, self.w_pol, self.w_fmin,
                       self.w_fmax, self.w_precision, self.w_nx, self.w_ny, self.w_steps):
            widget.param.watch(self._changed, "value")
        self.w_preset.param.watch(self._preset_changed, "value")
        self.w_present.param.watch(self._presentation, "value")
        self.w_pin.on_click(self._pin)
        self.w_unpin.on_click(self._unpin)
        self.w_profile.param.watch(self._profile_uploaded, "value")
        self.w_profile_clear.on_click(self._profile_cleared)
        self.w_scenario_file.param.watch(self._scenario_uploaded, "value")
        self.w_player.param.watch(self._frame_changed, "value")

    def _frame_changed(self, event):
        if not self._placing_player:
            self.frame_stream.event(frame=event.new)

    def _changed(self, *_):
        if not self._suspend:
            self.request()

    def _preset_changed(self, event):
        self.base = load_preset(event.new)
        self.profile = None
        if self._suspend:  # restoring from a link: the other controls come from the link too
            return
        self._set_widgets_from(self.base)
        self.request()

    def _presentation(self, event):
        self.controls.visible = not event.new
        self.main.css_classes = ["ql-present"] if event.new else []
        self.fontscale = 1.6 if event.new else 1.0
        self.figure_units = None
        self._rebuild_plots()
        self.sweep.draw()
        self._show_headline()

    def _pin(self, *_):
        if self.result is not None:
            self.pinned = self.result
            self.w_unpin.disabled = False
            self._rebuild_plots()
            self._show_headline()

    def _unpin(self, *_):
        self.pinned = None
        self.w_unpin.disabled = True
        self._rebuild_plots()
        self._show_headline()

    def _profile_uploaded(self, event):
        if not event.new:
            return
        from quietlayer.engine.export import profile_from_csv
        try:
            text = event.new.decode("utf-8") if isinstance(event.new, bytes) else str(event.new)
            self.profile = profile_from_csv(text, self.w_profile.filename or "profile")
        except (ScenarioError, UnicodeDecodeError) as exc:
            self._show_error(f"Profile file: {exc}")
            return
        self.w_profile_clear.disabled = False
        self.request()

    def _profile_cleared(self, *_):
        self.profile = None
        self.w_profile_clear.disabled = True
        self.request()

    def _scenario_uploaded(self, event):
        if not event.new:
            return
        try:
            s = Scenario.from_toml(event.new.decode("utf-8"))
        except (ScenarioError, UnicodeDecodeError) as exc:
            self._show_error(f"Scenario file: {exc}")
            return
        self.load_scenario(s)

    def load_scenario(self, s: Scenario):
        """Put scenario `s` into the controls (a file, a cell of the sweep map) and measure it."""
        self.base = s
        side = next((getattr(s.boundary, n) for n in SIDE_NAMES if getattr(s.boundary, n).kind == "cpml"), None)
        self.profile = side.profile if side is not None else None
        self.w_profile_clear.disabled = self.profile is None
        self._set_widgets_from(s)
        self.request()

    def _show_error(self, text: str):
        self.message.object = text + " — the figures below are from the last valid setting."
        self.message.visible = True

    # --- the compute loop --------------------------------------------------------
    def _call_soon(self, function, *args, delay_ms: int = 0):
        """Run `function` on the page's event loop with the document locked.

        The server sends a callback's changes from a later turn of the loop, so
        work that should follow them on screen is given a delay."""
        if self.doc is not None and self.doc.session_context is not None:
            callback = partial(function, *args)
            if delay_ms:
                self.doc.add_timeout_callback(callback, delay_ms)
            else:
                self.doc.add_next_tick_callback(callback)
        else:
            function(*args)

    def request(self):
        """Ask for a run with the current controls; bursts are coalesced."""
        with self._lock:
            self.generation += 1
        try:
            s = self.scenario_from_controls()
        except ScenarioError as exc:
            self._show_error(str(exc))
            return
        self.message.visible = False
        self._show_sigma(s)
        with self._lock:
            start = not self.running
            self.running = True
        if start:
            self.spinner.value = True
            self.measure_pool.submit(self._work)

    def _show_sigma(self, s: Scenario):
        side = next((getattr(s.boundary, n) for n in SIDE_NAMES if getattr(s.boundary, n).kind == "cpml"), None)
        if side is None:
            self.w_sigma_abs.object = "no side carries a layer"
            return
        opt = sigma_opt(side.order, s.dx, s.eps_r)
        text = f"sigma_max = **{side.sigma_ratio * opt:.4g} S/m** (sigma_opt = {opt:.4g} S/m)"
        if side.profile is not None:
            text = f"profile from file, {len(side.profile.depth)} rows (sliders for grading are ignored)"
        self.w_sigma_abs.object = text

    def _work(self):
        """Worker thread: measure the newest setting until no newer one is waiting."""
        while True:
            generation = self.generation
            try:
                s = self.scenario_from_controls()
                result = measure(s, parts=PAGE_PARTS)
            except ScenarioError as exc:
                self._call_soon(self._show_error, str(exc))
                result = None
            except Exception as exc:  # a run that fails says why and keeps the last figures
                self._call_soon(self._show_error, f"The run failed: {exc}")
                result = None
            with self._lock:
                if generation == self.generation:
                    self.running = False
                    if result is not None:
                        self._call_soon(self._deliver, result, s, generation)
                    else:
                        self._call_soon(setattr, self.spinner, "value", False)
                    return
            # newer parameters arrived while this ran: run those instead

    def _deliver(self, result, s: Scenario, generation: int):
        """Event loop: show a fresh result, headline first, then one figure per tick."""
        if generation != self.generation:
            return
        self.result = result
        self.last_good = s
        self.spinner.value = self.running
        self._show_result()
        self.confirm3d.scenario_changed()
        self._start_late_check(s, generation)
        if self._figures_need_rebuild():
            self._build_figures()
        self._call_soon(self._next_figure, generation, 0, delay_ms=FIGURE_GAP_MS)

    def _next_figure(self, generation: int, index: int):
        """One figure per event-loop turn: a slider moved meanwhile is handled at
        once, and the figures of a stale result are skipped."""
        if generation != self.generation or index >= len(self.FIGURES):
            return
        self.pipes[self.FIGURES[index]].event(data=self.result)
        self._call_soon(self._next_figure, generation, index + 1, delay_ms=FIGURE_GAP_MS)

    def _show_result(self):
        m = self.result
        self.late = None
        self._show_headline()  # the figures the user waits for first
        frames = m.frame_steps.size
        first = self.figure_units is None
        if first:  # open on the frame where the echo is strongest; later keep the user's frame
            frame = int(np.argmax([np.abs(f).max() for f in m.reflected_frames])) if frames else 0
        else:
            frame = min(self.w_player.value, max(0, frames - 1))
        self._placing_player = True  # the figures follow with the new result, not before it
        try:
            self.w_player.end = max(1, frames - 1)  # the range first: the slider redraws on a value change
            self.w_player.value = frame
        finally:
            self._placing_player = False
        self.frame_stream.update(frame=frame)

    def _start_late_check(self, s: Scenario, generation: int):
        """The 20,000-step stability run, in its own worker; cancelled by the next change."""
        def still_wanted(step, total):
            return generation == self.generation

        def work():
            try:
                late = late_time_check(s, progress=still_wanted)
            except RunCancelled:
                return
            except Exception as exc:
                self._call_soon(setattr, self.status, "object", f"late-time check failed: {exc}")
                return
            self._call_soon(self._deliver_late, late, generation)

        self.late_pool.submit(work)

    def _deliver_late(self, late, generation: int):
        if generation == self.generation:
            self.late = late
            self._show_headline()

    def _show_headline(self):
        m = self.result
        if m is None:
            self.headline.object = _card("worst peak error", "…", "computing", "worst")
            return
        s = m.scenario
        late = getattr(self, "late", None)
        if late is None:
            late_value, late_sub = "checking…", "20,000 steps in the background"
        else:
            late_value = late.status
            late_sub = (f"{late.growth_db_per_1000:+.1f} dB / 1000 steps" if late.status != "diverged"
                        else late.message)
        delta = ""
        if self.pinned is not None and math.isfinite(self.pinned.worst_peak_db):
            delta = _card("difference to A", f"{m.worst_peak_db - self.pinned.worst_peak_db:+.1f} dB",
                          f"A: {self.pinned.worst_peak_db:.1f} dB", "delta")
        cards = [
            _card("worst peak error", f"{plots.finite_or_dash(m.worst_peak_db)} dB", f"at probe “{m.worst_probe}”",
                  "worst"),
            _card("global error", f"{plots.finite_or_dash(m.global_db)} dB", "interior, whole run", "global"),
            _card("late-time check", late_value, late_sub, "late"),
            _card("run time", f"{(m.test_s + m.reference_s) * 1e3:.0f} ms",
                  "reference cached" if m.reference_cached else "reference computed", "runtime"),
            _card("cells per wavelength", f"{s.cells_per_wavelength:.1f}", f"at f_max = {format_frequency(s.source.f_max)}",
                  "cpw"),
            delta,
        ]
        present = " ql-present" if self.w_present.value else ""  # the cards live in their own shadow root
        self.headline.object = (f'<div class="ql-cards{present}" style="display:flex;gap:8px;flex-wrap:wrap">'
                                + "".join(cards) + "</div>")
        self.status.object = (f"{s.title or 'custom scenario'} · {s.nx} × {s.ny} interior cells · {s.steps} steps · "
                              f"{s.polarization} · {s.precision}")

    # --- downloads -------------------------------------------------------------
    def _current(self) -> Scenario:
        return self.last_good or self.base

    def _toml_file(self):
        return io.StringIO(self._current().to_toml())

    def _csv_file(self):
        from quietlayer.engine.export import coefficients_csv
        return io.StringIO(coefficients_csv(self._current()))

    def _json_file(self):
        from quietlayer.engine.export import coefficients_json
        return io.StringIO(coefficients_json(self._current()))

    def _report_file(self):
        from .report import report_html
        return io.StringIO(report_html(self.result, getattr(self, "late", None)))

    def view(self):
        return self.root

    def close(self):
        """The session has ended: stop every worker."""
        with self._lock:
            self.generation += 1  # a late-time check still running sees it and stops
        self.sweep.close()
        self.confirm3d.close()
        self.measure_pool.shutdown(wait=False, cancel_futures=True)
        self.late_pool.shutdown(wait=False, cancel_futures=True)


@dataclass(frozen=True)
class SweepChoice:
    """A parameter the sweep view offers: each maps onto one control, so a
    cell of the map can be loaded into the controls as measured.  lo..hi is
    the control's range and `step` its grid (swept values are put on it)."""

    label: str
    lo: float
    hi: float
    step: float | None
    start: str
    stop: str
    count: int
    length: bool = False  # values are lengths: text such as '0.5 mm'

    def allowed(self) -> str:
        lo, hi = (format_length(v) if self.length else f"{v:g}" for v in (self.lo, self.hi))
        return f"from {lo} to {hi}"

    def hint(self) -> str:
        grid = ("" if self.step is None else ", whole numbers" if self.step == 1
                else f", put on the control's {self.step:g} steps")
        return f"allowed {self.allowed()}{grid}" + (" (e.g. '0.5 mm')" if self.length else "")


SWEEP_CHOICES = {
    "order": SweepChoice("Grading order m", 1.0, 6.0, 0.1, "1", "6", 11),
    "sigma_ratio": SweepChoice("sigma_max / sigma_opt", 0.05, 5.0, 0.05, "0.25", "2", 8),
    "cells": SweepChoice("Layer thickness (cells)", 2, 40, 1, "4", "20", 9),
    "kappa_max": SweepChoice("kappa_max", 1.0, 30.0, 0.5, "1", "11", 11),
    "alpha_max": SweepChoice("alpha_max (S/m)", 0.0, 1.0, 0.005, "0", "0.2", 9),
    "alpha_order": SweepChoice("alpha grading order", 0.0, 4.0, 0.1, "0", "4", 9),
    "cell": SweepChoice("Cell size dx = dy", 1e-9, 1.0, None, "0.5 mm", "2 mm", 7, length=True),
    "courant": SweepChoice("Courant number (x 2D limit)", 0.1, 1.0, 0.01, "0.5", "0.99", 8),
    "eps_r": SweepChoice("Host eps_r", 1.0, 100.0, None, "1", "10", 10),
    "sigma": SweepChoice("Host conductivity (S/m)", 0.0, 100.0, None, "0", "0.1", 6),
}
SWEEP_LABELS = {name: choice.label for name, choice in SWEEP_CHOICES.items()}
SWEEP_MAX_COUNT = 40  # values per parameter: 40 x 40 = 1600 points, tens of seconds on two cores
SWEEP_REDRAW_S = 0.4  # the map is redrawn at most this often while points come in
SWEEP_STATUS_S = 0.15  # and the progress bar moved at most this often: a flood of updates would
                       # keep the page's event loop from hearing the Cancel button
SCORE_OPTIONS = {label.replace(" (dB)", ""): key for key, label in plots.SWEEP_SCORE_LABELS.items()}


def sweep_axis(name: str, start: str, stop: str, count, which: str = "x") -> Axis:
    """One sweep axis from the text of its fields; ScenarioError names the field
    ('x start', 'y count', ...) and the range its control allows."""
    if name not in SWEEP_CHOICES:
        raise ScenarioError(f"{which} parameter", name, "one of " + ", ".join(SWEEP_CHOICES))
    choice = SWEEP_CHOICES[name]
    values = []
    for field, text in (("start", start), ("stop", stop)):
        label = f"{which} {field}"
        try:
            value = parse_length(label, text) if choice.length else float(str(text).strip())
        except (ScenarioError, ValueError):
            value = math.nan
        if not (math.isfinite(value) and choice.lo <= value <= choice.hi):
            raise ScenarioError(label, text, f"{'a length' if choice.length else 'a number'} {choice.allowed()} "
                                             f"(the range of the '{choice.label}' control)")
        values.append(value)
    if count is None or isinstance(count, bool) or not 1 <= count <= SWEEP_MAX_COUNT:
        raise ScenarioError(f"{which} count", count, f"a whole number from 1 to {SWEEP_MAX_COUNT}")
    lo, hi = values
    if count > 1 and lo == hi:
        raise ScenarioError(f"{which} stop", stop, f"a value other than the start ({start}) for {count} values")
    raw = parse_vary(f"{name}={lo!r}:{hi!r}:{int(count)}").values
    if choice.step is not None:
        raw = [snap(v, choice.step) for v in raw]
    if choice.length:  # as the cell size box will show it, so a loaded cell measures the same grid
        raw = [parse_length("cell size", format_length(v)) for v in raw]
    kept = tuple(dict.fromkeys(int(v) if choice.step == 1 else float(v) for v in raw))
    return Axis(name, kept)


class SweepView:
    """The sweep tab: two parameters, their ranges and a score; the sweep runs
    in its own worker thread on the scenario in the controls, and its map
    fills in as points come back.  A newer sweep makes the older one stop and
    its results are dropped (a generation counter, as for the live run)."""

    def __init__(self, page: "QuietlayerPage"):
        self.page = page
        self.generation = 0
        self.stop: threading.Event | None = None  # set to stop the running sweep
        self.table: SweepTable | None = None
        self.base: Scenario | None = None  # the scenario the table was measured on
        self.names = ("order", "sigma_ratio")  # the table's x and y parameters
        self.chosen: int | None = None  # index of the point loaded into the controls
        self.note = ""  # what the last click did, kept under the sweep's progress
        self.pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ql-sweep")
        self.pipe = hv.streams.Pipe(data=None)
        self.tap: hv.streams.Tap | None = None
        self.figure_key = None
        self.draw_s = 0.0  # how long the last redraw of the map took
        self._make_widgets()
        self._layout()

    # --- widgets -------------------------------------------------------------
    def _make_widgets(self):
        w = pn.widgets
        layer = {c.label: n for n, c in SWEEP_CHOICES.items() if n in LAYER_PARAMETERS}
        problem = {c.label: n for n, c in SWEEP_CHOICES.items() if n not in LAYER_PARAMETERS}
        groups = {"Layer": layer, "Problem": problem}
        self.fields = {}
        for which, name in (("x", "order"), ("y", "sigma_ratio")):
            choice = SWEEP_CHOICES[name]
            self.fields[which] = {
                "name": w.Select(name=f"{which} parameter", groups=groups, value=name, sizing_mode="stretch_width"),
                "start": w.TextInput(name="start", value=choice.start, width=88),
                "stop": w.TextInput(name="stop", value=choice.stop, width=88),
                "count": w.IntInput(name="count", value=choice.count, start=1, end=SWEEP_MAX_COUNT, width=70),
                "hint": pn.pane.Markdown(self._hint(name), margin=(-6, 10, 0, 10), styles={"font-size": "0.8em"}),
            }
            self.fields[which]["name"].param.watch(partial(self._parameter_chosen, which), "value")
        self.w_score = w.Select(name="Score to map", options=SCORE_OPTIONS, value="worst_peak_db",
                                sizing_mode="stretch_width")
        self.w_run = w.Button(name="Run sweep", button_type="primary")
        self.w_cancel = w.Button(name="Cancel", disabled=True)
        self.w_best = w.Button(name="Load the best point", disabled=True, sizing_mode="stretch_width")
        self.d_csv = w.FileDownload(callback=self._csv_file, filename="sweep.csv", label="Sweep table (CSV)",
                                    button_type="light", embed=False, disabled=True, sizing_mode="stretch_width")
        self.progress = pn.indicators.Progress(value=0, max=1, bar_color="primary", sizing_mode="stretch_width",
                                               height=14, margin=(6, 10))
        self.status = pn.pane.Markdown("No sweep yet: pick two parameters and their ranges, then run.",
                                       sizing_mode="stretch_width", styles={"font-size": "0.85em"},
                                       css_classes=["ql-sweep-status"])
        self.message = pn.pane.Alert("", alert_type="danger", visible=False, sizing_mode="stretch_width")
        self.pane = pn.pane.HoloViews(None, sizing_mode="stretch_width", linked_axes=False)
        self.w_run.on_click(self.start)
        self.w_cancel.on_click(self.cancel)
        self.w_best.on_click(self.load_best)
        self.w_score.param.watch(self._score_changed, "value")

    def _layout(self):
        rows = []
        for which, title in (("x", "First parameter (x axis)"), ("y", "Second parameter (y axis)")):
            f = self.fields[which]
            rows += [pn.pane.Markdown(f"**{title}**", margin=(8, 10, -8, 10)), f["name"],
                     pn.Row(f["start"], f["stop"], f["count"]), f["hint"]]
        controls = pn.Column(*rows, self.w_score, self.message, pn.Row(self.w_run, self.w_cancel), self.progress,
                             self.status, self.w_best, self.d_csv, width=310)
        figure = pn.Column(self.pane, pn.pane.Markdown(NOTES["sweep"], sizing_mode="stretch_width",
                                                       styles={"font-size": "0.85em"}),
                           sizing_mode="stretch_width")
        self.panel = pn.Row(controls, figure, sizing_mode="stretch_width")

    @staticmethod
    def _hint(name: str) -> str:
        return SWEEP_CHOICES[name].hint()

    def _parameter_chosen(self, which: str, event):
        """A new parameter starts from its usual range (lengths: around the current cell size)."""
        choice = SWEEP_CHOICES[event.new]
        f = self.fields[which]
        start, stop = choice.start, choice.stop
        if choice.length:
            try:
                d = parse_length("cell size", self.page.w_cell.value)
                start, stop = format_length(max(choice.lo, d / 2)), format_length(min(choice.hi, 2 * d))
            except ScenarioError:
                pass
        f["start"].value, f["stop"].value, f["count"].value = start, stop, choice.count
        f["hint"].object = self._hint(event.new)

    # --- what to sweep -------------------------------------------------------------
    def axes_from_controls(self) -> list[Axis]:
        """The two axes the fields describe; ScenarioError names the bad field."""
        axes = []
        for which in ("x", "y"):
            f = self.fields[which]
            axes.append(sweep_axis(f["name"].value, f["start"].value, f["stop"].value, f["count"].value, which))
        if axes[0].name == axes[1].name:
            raise ScenarioError("y parameter", axes[1].name, f"a parameter other than the x parameter "
                                                             f"({SWEEP_LABELS[axes[0].name]})")
        return axes

    def scenario_for(self, axes: list[Axis]) -> Scenario:
        """The controls' scenario, if the axes can act on it."""
        s = self.page.scenario_from_controls()
        has_layer = any(getattr(s.boundary, n).kind == "cpml" for n in SIDE_NAMES)
        for which, axis in zip("xy", axes):
            if axis.name in LAYER_PARAMETERS and not has_layer:
                raise ScenarioError(f"{which} parameter", axis.name,
                                    "a problem parameter: no side carries a layer (see 'Sides with the layer')")
            if axis.name in LAYER_PARAMETERS and axis.name != "cells" and self.page.profile is not None:
                raise ScenarioError(f"{which} parameter", axis.name,
                                    "the layer thickness or a problem parameter while a profile file sets the "
                                    "grading ('Use the graded profile' to sweep the grading)")
        return s

    # --- running -----------------------------------------------------------------------
    def start(self, *_):
        """Start a sweep of the fields' ranges on the controls' scenario; an older one stops."""
        try:
            axes = self.axes_from_controls()
            base = self.scenario_for(axes)
        except ScenarioError as exc:
            self.message.object = f"Sweep: {exc}"
            self.message.visible = True
            return
        self.message.visible = False
        self._stop_running()
        self.generation += 1
        stop = self.stop = threading.Event()
        points = grid_points(axes)
        table = SweepTable(parameters=[a.name for a in axes], points=points)  # the worker's own
        self.table = replace(table, rows={})  # the page only ever reads copies
        self.base, self.names, self.chosen, self.note = base, (axes[0].name, axes[1].name), None, ""
        self.progress.max, self.progress.value = len(points), 0
        self.w_cancel.disabled = False
        self.w_best.disabled = True
        self.d_csv.disabled = True
        self._show_status(self._summary(table, running=True))
        self.draw()
        self.pool.submit(self._work, self.generation, base, points, table, stop)

    def _work(self, generation: int, base: Scenario, points: list, table: SweepTable, stop: threading.Event):
        """Worker thread: run the sweep, sending a copy of the table back now and then."""
        last = [time.monotonic()]
        last_status = [0.0]

        def progress(done, total, index, row):
            now = time.monotonic()
            copy = None
            # a big map takes a while to draw: redraw it less often, so the page stays quick
            if now - last[0] >= max(SWEEP_REDRAW_S, 4 * self.draw_s):
                last[0] = now
                copy = replace(table, rows=dict(table.rows))
            if copy is not None or now - last_status[0] >= SWEEP_STATUS_S:
                last_status[0] = now
                self.page._call_soon(self._progress, generation, done, copy)
            return not stop.is_set()

        try:
            run_sweep(base, points, LocalPool(), progress=progress, table=table)
        except Exception as exc:  # the points done so far are still shown
            self.page._call_soon(self._finished, generation, replace(table, rows=dict(table.rows)),
                                 f"The sweep stopped: {type(exc).__name__}: {exc}")
            return
        self.page._call_soon(self._finished, generation, replace(table, rows=dict(table.rows)), None)

    def _progress(self, generation: int, done: int, copy: SweepTable | None):
        if generation != self.generation:
            return
        self.progress.value = done
        if copy is not None:
            self.table = copy
            self.draw()
        if self.stop is None or not self.stop.is_set():  # else the line keeps saying it is cancelling
            self._show_status(self._summary(self.table, running=True, done=done))

    def _finished(self, generation: int, table: SweepTable, failure: str | None):
        if generation != self.generation:
            return
        self.table = table
        self.stop = None
        self.progress.value = table.done
        self.w_cancel.disabled = True
        self.d_csv.disabled = table.done == 0
        self.w_best.disabled = table.best(self.w_score.value) is None
        self.draw()
        self._show_status(failure or self._summary(table))

    def cancel(self, *_):
        """Stop after the points already running; those measured stay on the map."""
        if self.stop is not None:
            self.stop.set()
            self.w_cancel.disabled = True
            self._show_status("Cancelling: the points already running finish first…")

    def _stop_running(self):
        if self.stop is not None:
            self.stop.set()
            self.stop = None

    def close(self):
        """The session has ended: stop the work."""
        self._stop_running()
        self.generation += 1
        self.pool.shutdown(wait=False, cancel_futures=True)

    def _summary(self, table: SweepTable, running: bool = False, done: int | None = None) -> str:
        x, y = (SWEEP_LABELS[n] for n in self.names)
        total = len(table.points)
        done = table.done if done is None else done
        nx, ny = (len({p[n] for p in table.points}) for n in self.names)
        head = f"{x} × {y}: {nx} × {ny} points"
        if running:
            return f"{head}, {done} measured…"
        counts = {}
        for r in table.rows.values():
            counts[r["status"]] = counts.get(r["status"], 0) + 1
        others = ", ".join(f"{k} {counts[k]}" for k in ("invalid", "diverged", "failed") if counts.get(k))
        text = f"{head} in {table.elapsed_s:.1f} s" if table.complete else \
            f"{head}: cancelled after {done} of {total}; the map shows those measured"
        if others:
            text += f" ({others})"
        best = table.best(self.w_score.value)
        if best is not None:
            score = plots.SWEEP_SCORE_LABELS[self.w_score.value].replace(" (dB)", "")
            text += f". Lowest {score}: **{best[1][self.w_score.value]:.1f} dB** at {self._point_text(best[1]['point'])}"
        return text + "."

    def _show_status(self, text: str):
        self.status.object = text + (f"\n\n{self.note}" if self.note else "")

    def _csv_file(self):
        return io.StringIO(self.table.to_csv() if self.table is not None else "")

    def _point_text(self, point: dict) -> str:
        return ", ".join(f"{SWEEP_LABELS[n]} = {format_length(v) if SWEEP_CHOICES[n].length else f'{v:g}'}"
                         for n, v in point.items())

    # --- the map -------------------------------------------------------------------------
    def draw(self):
        """Show the table: the figure streams in, and is built anew only when its axes
        or the score change."""
        if self.table is None:
            return
        started = time.perf_counter()
        try:
            self._draw()
        finally:
            self.draw_s = time.perf_counter() - started

    def _draw(self):
        data = dict(table=self.table, x_name=self.names[0], y_name=self.names[1], score=self.w_score.value,
                    labels=SWEEP_LABELS, chosen=self.chosen, fontscale=self.page.fontscale)
        key = (self.names, self.w_score.value, self.page.fontscale,
               tuple(tuple(p.values()) for p in self.table.points))
        if key == self.figure_key:
            self.pipe.event(data=data)
            return
        self.figure_key = key
        self.pipe = hv.streams.Pipe(data=data)
        # the click stream belongs to the map itself: one attached by source to a map of
        # overlays is never wired to the figure
        self.tap = hv.streams.Tap(x=None, y=None)
        self.tap.add_subscriber(self._tapped)
        self.pane.object = hv.DynamicMap(lambda data, x, y: plots.sweep_heatmap(**data),
                                         streams=[self.pipe, self.tap])

    def _score_changed(self, *_):
        self.draw()
        if self.table is not None and self.stop is None:  # the best point follows the score
            self.w_best.disabled = self.table.best(self.w_score.value) is None
            self._show_status(self._summary(self.table))

    def _tapped(self, x=None, y=None):
        if x is None or y is None or self.table is None:
            return
        grid = plots.sweep_grid(self.table, *self.names, self.w_score.value)
        self.load_cell(*plots.nearest_cell(grid, x, y))

    # --- loading a point into the controls -------------------------------------------------
    def load_cell(self, i: int, j: int) -> bool:
        """Load the point at column i, row j of the map; False (with the reason shown)
        when it has no measurement to load."""
        grid = plots.sweep_grid(self.table, *self.names, self.w_score.value)
        index = int(grid.index[j, i])
        row = self.table.rows.get(index) if index >= 0 else None
        point = self.table.points[index] if index >= 0 else {}
        if row is None or row["status"] != "ok":
            self.note = (f"{self._point_text(point)} is not measured yet." if row is None else
                         f"{self._point_text(point)} was not measured ({row['status']}): {row['reason']}")
            self._show_status(self._summary(self.table, running=self.stop is not None))
            return False
        self.load_point(index)
        return True

    def load_best(self, *_):
        best = self.table.best(self.w_score.value) if self.table is not None else None
        if best is not None:
            self.load_point(best[0])

    def load_point(self, index: int):
        """Put the sweep's scenario with point `index` into the controls and re-measure."""
        point = self.table.points[index]
        self.page.load_scenario(apply_point(self.base, point))
        self.chosen = index
        self.draw()
        self.note = f"Loaded {self._point_text(point)} into the controls; the figures re-measure it."
        self._show_status(self._summary(self.table, running=self.stop is not None))


def create_page(preset: str = "demo"):
    """A fresh page for one browser session (never shared between sessions)."""
    page = QuietlayerPage(preset)
    page.doc = pn.state.curdoc
    if pn.state.location is not None:
        page._suspend = True  # values restored from the link must not reset each other
        try:
            for key, widget in page._url_widgets().items():
                pn.state.location.sync(widget, {"value": key})
        finally:
            page._suspend = False
    pn.state.onload(page.request)
    pn.state.on_session_destroyed(lambda ctx: page.close())
    return page.view()
