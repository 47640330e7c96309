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
from contextlib import nullcontext
from dataclasses import replace
from functools import partial

import holoviews as hv
import numpy as np
import panel as pn

hv.extension("bokeh", logo=False)
pn.extension(notifications=False)

from quietlayer.assets import preset_names, preset_path
from quietlayer.engine import (Boundary, Profile, RunCancelled, Scenario, ScenarioError, Side,
                               parse_frequency, parse_length, sigma_opt)
from quietlayer.engine import backend
from quietlayer.engine.budget import VISITOR_BUDGET, check_work
from quietlayer.engine.defaults import angle_probes
from quietlayer.engine.measure import measure, late_time_check

from . import CAUTION
from .confirm3d_view import Confirm3DView
from .figures import KEYS as FIGURES, LiveFigures, best_frame, finite_or_dash
from .pick_view import PickView
from .sweep_view import SweepView
from .units import format_frequency, format_length, snap

PAGE_PARTS = frozenset({"probes", "spectra", "angles", "global", "snapshots"})
DRAG_PARTS = frozenset({"probes", "spectra"})  # while a slider is dragged: headline and spectrum only
HEADLINE_LEAD_MS = 40  # the headline's message leaves and is drawn before the figures' data follows
DRAG_SETTLE_MS = 400  # a mid-drag result with nothing newer after this long gets its full run
DRAG_COALESCE_MS = 25  # a key press sends value and value_throttled together: only the full run is made
LATE_CHECK_REST_S = 0.8  # the late-time check starts once the controls have rested this long: while the
                         # user tunes, both cores stay free for the runs they are waiting for
SIDE_NAMES = ["left", "right", "bottom", "top"]
SOURCE_GAP = 12  # cells between the source and the right face in the bench layout

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


class QuietlayerPage:
    """Widgets, plots and the compute loop of one session."""

    def __init__(self, preset: str = "demo"):
        self.base = load_preset(preset)
        self.profile: Profile | None = None
        self.result = None
        self.pinned = None
        self.generation = 0
        self.want_full = True  # what the newest request asks for (see request)
        self._drag_token = 0  # bumped by each slider move; a pending mid-drag run checks it
        self.complete = True  # the result on show has every figure (not a mid-drag one)
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
        self.pick = PickView(self)
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
        self.engine_note = pn.pane.Alert("", alert_type="info", visible=False, sizing_mode="stretch_width")
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
    def _check_control_ranges(self):
        """A link (or a file) may set a number no control could: refuse it by the control's name."""
        for widget in self._url_widgets().values():
            lo, hi, value = getattr(widget, "start", None), getattr(widget, "end", None), widget.value
            if isinstance(lo, (int, float)) and isinstance(hi, (int, float)) and isinstance(value, (int, float)) \
                    and not lo <= value <= hi:  # NaN fails too
                raise ScenarioError(widget.name, value, f"a number from {lo:g} to {hi:g}")

    def scenario_from_controls(self) -> Scenario:
        """The scenario the controls describe; ScenarioError names a bad field."""
        self._check_control_ranges()
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
        s = b.with_changes(dx=d, dy=d, nx=nx, ny=ny, steps=int(self.w_steps.value),
                           courant=self.w_courant.value, eps_r=self.w_eps.value, sigma=self.w_sigma_host.value,
                           polarization=self.w_pol.value, precision=self.w_precision.value,
                           source=source, probes=probes, boundary=Boundary(**sides))
        check_work(s, VISITOR_BUDGET)  # any visitor may ask (controls, link, upload): refuse what one change cannot afford
        return s

    # --- figures -------------------------------------------------------------
    def _make_plots(self):
        """Bokeh figures built once per session; a result only replaces their data."""
        self.figures = LiveFigures(self.fontscale)
        self.panes = {}
        for key in FIGURES:
            fixed = key in ("total", "reflected")  # the pane takes the image's own size
            self.panes[key] = pn.pane.Bokeh(self.figures.figures[key],
                                            sizing_mode="fixed" if fixed else "stretch_width")

    def _redraw(self):
        """Show the current result in every figure (pin, presentation)."""
        if self.result is not None:
            self.figures.show(self.result, self.pinned)

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
                            ("Sweep", self.sweep.panel), ("Pick for me", self.pick.panel),
                            ("Confirm in 3D", self.confirm3d.panel),
                            dynamic=False, sizing_mode="stretch_width")
        self.main = pn.Column(top, self.engine_note, self.message, self.headline, self.status, self.tabs, caution,
                              sizing_mode="stretch_width", stylesheets=[STYLE])
        self.root = pn.Row(self.controls, self.main, sizing_mode="stretch_width")

    # --- events ---------------------------------------------------------------
    def _watch(self):
        layer = [self.w_cells, self.w_order, self.w_ratio, self.w_kappa, self.w_alpha, self.w_alpha_order]
        for widget in layer:  # the headline and spectrum follow a drag; the full set comes on release
            widget.param.watch(self._dragged, "value")
        for widget in layer + [self.w_courant]:  # a new Courant number needs a new reference: on release
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
            with self._batched():
                self.figures.show_frame(event.new)

    def _changed(self, *_):
        if not self._suspend:
            self.request()

    def _dragged(self, *_):
        """A slider moves: ask for the headline and spectrum, unless the release (or a
        key press, which sends both at once) asks for everything straight after."""
        if self._suspend:
            return
        self._drag_token += 1
        self._call_soon(self._drag_request, self._drag_token, delay_ms=DRAG_COALESCE_MS)

    def _drag_request(self, token: int):
        if token == self._drag_token:
            self.request(full=False)

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
        self.figures.set_fontscale(self.fontscale)
        self.sweep.draw()
        self._show_headline()

    def _pin(self, *_):
        if self.result is not None:
            self.pinned = self.result
            self.w_unpin.disabled = False
            self._redraw()
            self._show_headline()

    def _unpin(self, *_):
        self.pinned = None
        self.w_unpin.disabled = True
        self._redraw()
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
        if self.result is None:  # e.g. a link whose values are refused: nothing has been measured
            self.message.object = text + " — nothing is measured until the setting is valid."
            self.headline.object = _card("worst peak error", "–", "no valid setting yet", "worst")
            self.spinner.value = False
        else:
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

    def request(self, full: bool = True):
        """Ask for a run with the current controls; bursts are coalesced, and the
        newest request says whether every figure (full) or only the headline and
        the spectrum (a slider being dragged) is wanted."""
        if full:
            self._drag_token += 1  # a pending mid-drag request is overtaken
        with self._lock:
            self.generation += 1
            self.want_full = full
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
            with self._lock:
                generation, full = self.generation, self.want_full
            try:
                s = self.scenario_from_controls()
                result = measure(s, parts=PAGE_PARTS if full else DRAG_PARTS)
            except ScenarioError as exc:
                self._call_soon(self._show_error, str(exc))
                result = None
            except Exception as exc:  # a run that fails says why and keeps the last figures
                self._call_soon(self._show_error, f"The run failed: {exc}")
                result = None
            with self._lock:
                newest = generation == self.generation
                if newest:
                    self.running = False
            if newest:  # outside the lock: without a server the delivery runs right here
                if result is not None:
                    self._call_soon(self._deliver, result, s, generation, full)
                else:
                    self._call_soon(setattr, self.spinner, "value", False)
                return
            # newer parameters arrived while this ran: run those instead

    def _batched(self):
        """Changes made inside leave as one message: Bokeh would otherwise send one per
        changed property, and serialise each against every model of the page."""
        return pn.io.hold(self.doc) if self.doc is not None else nullcontext()

    def _deliver(self, result, s: Scenario, generation: int, full: bool = True):
        """Event loop: show a fresh result, the headline first (its message leaves
        at the end of this turn), the figures a moment later."""
        if generation != self.generation:
            return
        with self._batched():
            self._deliver_now(result, s, generation, full)

    def _deliver_now(self, result, s: Scenario, generation: int, full: bool):
        self.result = result
        self.last_good = s
        self.spinner.value = self.running
        self.late = None
        self.complete = full
        self._show_headline()
        if full:
            self.confirm3d.scenario_changed()
            self._start_late_check(s, generation)
            self._call_soon(self._show_figures, generation, delay_ms=HEADLINE_LEAD_MS)
        else:
            self.figures.show(result, self.pinned, keys=("spectrum",))
            # no release seen (a value set from a link, a lost mouse-up): complete it anyway
            self._call_soon(self._complete_after_drag, generation, delay_ms=DRAG_SETTLE_MS)

    def _complete_after_drag(self, generation: int):
        if generation == self.generation and not self.complete:
            self.request()

    def _show_figures(self, generation: int):
        if generation != self.generation:
            return  # a newer setting is on its way
        with self._batched():
            self._show_figures_now()

    def _show_figures_now(self):
        m = self.result
        frames = m.frame_steps.size if m.frame_steps is not None else 0
        first = self.figures.measurement is None
        # open on the frame where the echo is strongest; later keep the user's frame
        frame = best_frame(m) if first else min(self.w_player.value, max(0, frames - 1))
        self._placing_player = True
        try:
            self.w_player.end = max(1, frames - 1)  # the range first: the slider redraws on a value change
            self.w_player.value = frame
        finally:
            self._placing_player = False
        self.figures.show(m, self.pinned, frame)

    def _start_late_check(self, s: Scenario, generation: int):
        """The 20,000-step stability run, in its own worker; cancelled by the next change."""
        def still_wanted(step, total):
            return generation == self.generation

        def work():
            time.sleep(LATE_CHECK_REST_S)  # the controls must rest first
            while not backend.compiled() and still_wanted(0, 0):  # 20,000 steps want the compiled engine
                time.sleep(0.25)
            if not still_wanted(0, 0):
                return
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

    def show_engine_state(self) -> bool:
        """The note above the headline while the engine is compiled for this machine;
        False once the compiled engine is in use (the periodic call then stops)."""
        status = backend.compile_status()
        if status is None:
            if self.engine_note.visible:
                self.engine_note.visible = False
                if self.result is not None and self.result.engine != "compiled":
                    self.request()  # the same setting again, now at full speed
            return False
        left = max(0.0, status.expected_s - status.elapsed_s)
        self.engine_note.object = (
            f"**First start on this machine:** the engine is being compiled for it ({status.what}, stage "
            f"{status.stage + 1} of {status.stages}, {status.elapsed_s:.0f} s so far, usually about "
            f"{left:.0f} s more). Meanwhile every result comes from a slower NumPy version of the same loops: "
            "the same numbers, each change just takes a few seconds."
            + (f" ({status.failed}; compiling here instead.)" if status.failed else ""))
        self.engine_note.visible = True
        return True

    def _show_headline(self):
        m = self.result
        if m is None:
            self.headline.object = _card("worst peak error", "…", "computing", "worst")
            return
        s = m.scenario
        late = getattr(self, "late", None)
        if late is None:
            late_value, late_sub = (("…", "after the slider is released") if not self.complete else
                                    ("waiting…", "starts once the engine is compiled") if not backend.compiled() else
                                    ("checking…", "20,000 steps in the background"))
        else:
            late_value = late.status
            late_sub = (f"{late.growth_db_per_1000:+.1f} dB / 1000 steps" if late.status != "diverged"
                        else late.message)
        delta = ""
        if self.pinned is not None and math.isfinite(self.pinned.worst_peak_db):
            delta = _card("difference to A", f"{m.worst_peak_db - self.pinned.worst_peak_db:+.1f} dB",
                          f"A: {self.pinned.worst_peak_db:.1f} dB", "delta")
        cards = [
            _card("worst peak error", f"{finite_or_dash(m.worst_peak_db)} dB", f"at probe “{m.worst_probe}”",
                  "worst"),
            _card("global error", f"{finite_or_dash(m.global_db)} dB", "interior, whole run", "global")
            if self.complete else _card("global error", "…", "when the slider is released", "global"),
            _card("late-time check", late_value, late_sub, "late"),
            _card("run time", f"{(m.test_s + m.reference_s) * 1e3:.0f} ms",
                  ("NumPy loops: first start" if m.engine != "compiled" else
                   "reference cached" if m.reference_cached else "reference computed"), "runtime"),
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
        self.pick.close()
        self.confirm3d.close()
        self.measure_pool.shutdown(wait=False, cancel_futures=True)
        self.late_pool.shutdown(wait=False, cancel_futures=True)


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
    if page.show_engine_state():  # first start: say what the page waits for, until the engine is compiled
        def tick():
            if not page.show_engine_state():
                callback.stop()
        callback = pn.state.add_periodic_callback(tick, period=1000)
    pn.state.on_session_destroyed(lambda ctx: page.close())
    return page.view()
