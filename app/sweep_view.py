"""The Sweep tab: two parameters, their ranges and a score.  The sweep runs
in its own worker thread on the scenario in the controls, and its map fills
in as points come back; a cell clicked on the map is loaded into the controls."""

from __future__ import annotations

import io
import math
import threading
import time
from dataclasses import dataclass, replace
from functools import partial
from typing import TYPE_CHECKING

import holoviews as hv
import panel as pn

from quietlayer.engine import Scenario, ScenarioError, parse_length
from quietlayer.engine.sweep import (LAYER_PARAMETERS, Axis, LocalPool, SweepTable, apply_point, grid_points,
                                     parse_vary, run_sweep)

from . import plots
from .background import BackgroundJob
from .units import format_length, snap

if TYPE_CHECKING:
    from .page import QuietlayerPage

SIDE_NAMES = ["left", "right", "bottom", "top"]
SWEEP_NOTE = ("**What am I looking at.** Each cell is one measurement of the scenario that was in the controls "
             "when the sweep started, with the two parameters set to the cell's values; its colour is the chosen "
             "score in dB (darker is quieter). White lines: contours of the score; star: the lowest score; "
             "orange outline: the setting now in the controls. Grey cells were invalid, pink ones diverged, "
             "red ones failed, white ones are still to come: hover for the values and the reason. "
             "**Click a cell** to load its setting into the controls: the headline and figures re-measure it.")


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


class SweepView(BackgroundJob):
    """The sweep tab: two parameters, their ranges and a score; the sweep runs
    in its own worker thread on the scenario in the controls, and its map
    fills in as points come back.  A newer sweep makes the older one stop and
    its results are dropped (a generation counter, as for the live run)."""

    def __init__(self, page: QuietlayerPage):
        super().__init__("ql-sweep")
        self.page = page
        self.table: SweepTable | None = None
        self.base: Scenario | None = None  # the scenario the table was measured on
        self.names = ("order", "sigma_ratio")  # the table's x and y parameters
        self.chosen: int | None = None  # index of the point loaded into the controls
        self.note = ""  # what the last click did, kept under the sweep's progress
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
        figure = pn.Column(self.pane, pn.pane.Markdown(SWEEP_NOTE, sizing_mode="stretch_width",
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
                d = parse_length("cell size", self.page.controls.w_cell.value)
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
        stop = self._new_job()
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
        if self._ask_stop():
            self.w_cancel.disabled = True
            self._show_status("Cancelling: the points already running finish first…")

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
