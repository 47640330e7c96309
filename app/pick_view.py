"""The "Pick for me" tab: the search of `quietlayer tune` as a page action.

    view = PickView(page)   # place view.panel as a tab; view.close() when the session ends

Two questions: the best layer for a thickness (`engine.search.tune_layer`), or
the thinnest layer that meets a target (`engine.search.thinnest_layer`).  The
search runs in the view's own worker thread on the scenario in the controls;
every run comes back through the page's `_call_soon` (throttled), and fills
two plain Bokeh figures in place: the score against the run number with the
best so far, and the tried points over two chosen parameters with the
optimiser's path.  Cancel keeps the best so far; "Load the result" puts the
found setting into the controls, which re-measure it.
"""

from __future__ import annotations

import math
import threading
import time
from typing import TYPE_CHECKING

import panel as pn
from bokeh.core.property.vectorization import value
from bokeh.models import (ColorBar, ColumnDataSource, HoverTool, Label, LabelSet, Legend, LegendItem,
                          LinearColorMapper, Range1d, Span)
from bokeh.palettes import Viridis256
from bokeh.plotting import figure

from quietlayer.engine import ScenarioError
from quietlayer.engine.search import (FREE_DEFAULT, MIN_BUDGET, PENALTY_DB, current_cells, default_bounds,
                                      layer_setting, max_thicknesses, start_point, thinnest_layer, tune_layer)
from quietlayer.engine.sweep import LocalPool, apply_point

from . import plots
from .background import BackgroundJob
from .commands.tune import DEFAULT_TARGET_RUNS, DEFAULT_TUNE_RUNS
from .confirm3d_view import _db
from .figures import PALETTE, _font
from .sweep_view import SCORE_OPTIONS, SWEEP_LABELS

if TYPE_CHECKING:
    from .page import QuietlayerPage

MODES = {"Best for a thickness": "tune", "Thinnest for a target": "thinnest"}
FREE_CHOICES = ("order", "sigma_ratio", "kappa_max", "alpha_max", "alpha_order")
MAX_RUNS = 500  # per thickness when looking for the thinnest
TARGET_RANGE = (-300.0, -1.0)  # dB, as the command's --target allows (less than 0)
PROGRESS_S = 0.15  # the status line moves at most this often, the figures at most every REDRAW_S:
REDRAW_S = 0.4     # runs of the demo take tens of ms, and a flood of updates would drown the Cancel click
STAGE_STYLE = {"sample": ("space-filling sample", PALETTE[0], "circle"),
               "refine": ("Nelder-Mead refinement", PALETTE[1], "diamond")}
NOT_MEASURED = "#999999"
NOTE = ("**What am I looking at.** Each run measures the scenario that was in the controls when the search "
        "started, with the free parameters set to the tried values (every CPML side alike). The search first "
        "measures a space-filling sample of the free parameters (blue), then refines the best of it with a "
        "bounded Nelder-Mead simplex (orange, joined in the order it went). Above: the score of each run and "
        "the best so far; below: the tried points over two parameters of your choice, coloured by the score, the "
        "best starred. A run that was invalid or diverged counts as 0 dB (grey). Looking for the thinnest "
        "layer tunes one thickness after another: thicknesses grow by about 1.5x until one meets the target, "
        "then halving the gap finds the thinnest; the lower plot shows the thickness being tuned, then the "
        "answer's. The search ranges are common practice (no source): m 1..6, sigma_max 0.05..3 sigma_opt, "
        "kappa_max 1..15, alpha_max up to the value whose CFS corner sits at f_min.")


def _seconds(s: float) -> str:
    return f"{s:.1f} s" if s < 60 else f"{int(s // 60)} min {int(round(s % 60))} s"


def point_text(point: dict) -> str:
    return ", ".join(f"{SWEEP_LABELS[n]} = {v:.4g}" for n, v in point.items())


def setting_lines(s, row: dict, score: str) -> list[str]:
    """The layer of scenario `s` and its scores, in words (one Markdown line each)."""
    t = layer_setting(s)
    label = plots.SWEEP_SCORE_LABELS[score].replace(" (dB)", "")
    lines = [f"thickness **{t['cells']} cells**",
             f"grading order m **{t['order']:.4g}**",
             f"sigma_max **{t['sigma_ratio']:.4g} × sigma_opt = {t['sigma_max']:.4g} S/m** "
             f"(sigma_opt {t['sigma_opt']:.4g} S/m)",
             f"kappa_max **{t['kappa_max']:.4g}**",
             f"alpha_max **{t['alpha_max']:.4g} S/m** (alpha order {t['alpha_order']:.4g})",
             f"{label}: **{_db(row.get(score))}**"]
    others = [f"{plots.SWEEP_SCORE_LABELS[k].replace(' (dB)', '')} {_db(row.get(k))}"
              for k in plots.SWEEP_SCORE_LABELS if k != score]
    return lines + [", ".join(others)]


class PickView(BackgroundJob):
    """Form, progress, the two path figures and the result of one search."""

    def __init__(self, page: QuietlayerPage):
        super().__init__("ql-pick")
        self.page = page
        self.rows: list[dict] = []  # every run so far: engine rows with 'stage', 'run', 'cells', 'seq'
        self.outcome = None  # the last search's result (TuneResult or ThinnestResult)
        self.loadable = None  # (scenario, description) that "Load the result" puts into the controls
        self.request: dict = {}  # what the running or last search was asked
        self.following = {}  # field -> True while it follows its control (until the user edits it)
        self._make_widgets()
        self._make_figures()
        self._layout()

    # --- widgets --------------------------------------------------------------------
    def _make_widgets(self):
        w, p = pn.widgets, self.page
        self.w_mode = w.RadioButtonGroup(name="What to find", options=MODES, value="tune", button_type="primary",
                                         button_style="outline", sizing_mode="stretch_width")
        self.cells_range = (int(p.controls.w_cells.start), int(p.controls.w_cells.end))  # what the thickness control can show
        lo, hi = self.cells_range
        # no start/end on the inputs: the browser would clamp a typed value silently; the form's
        # check names the field and its range instead (shown in the hint under the runs)
        self.w_cells = w.IntInput(name="Thickness (cells)", value=int(p.controls.w_cells.value), width=140)
        self.w_target = w.FloatInput(name="Target (dB)", value=float(p.controls.w_budget.value), step=1.0, width=140)
        self.w_min_cells = w.IntInput(name="Thinnest tried", value=4, width=140)
        self.w_max_cells = w.IntInput(name="Thickest tried", value=hi, width=140)
        self.w_runs = w.IntInput(name="Runs", value=DEFAULT_TUNE_RUNS, width=140)
        self.runs_hint = pn.pane.Markdown("", margin=(-6, 10, 0, 10), styles={"font-size": "0.8em"})
        self.w_free = w.CheckButtonGroup(name="Free parameters", options={SWEEP_LABELS[n]: n for n in FREE_CHOICES},
                                         value=list(FREE_DEFAULT), button_type="primary", button_style="outline",
                                         orientation="vertical", sizing_mode="stretch_width")
        self.w_score = w.Select(name="Score to minimise", options=SCORE_OPTIONS, value="worst_peak_db",
                                sizing_mode="stretch_width")
        shown = {SWEEP_LABELS[n]: n for n in FREE_CHOICES}
        self.w_x = w.Select(name="Plot across", options=shown, value="sigma_ratio", width=190)
        self.w_y = w.Select(name="and", options=shown, value="kappa_max", width=190)
        self.w_run = w.Button(name="Pick for me", button_type="primary")
        self.w_cancel = w.Button(name="Cancel", disabled=True)
        self.w_load = w.Button(name="Load the result", disabled=True, button_type="success",
                               sizing_mode="stretch_width")
        self.progress = pn.indicators.Progress(value=0, max=1, bar_color="primary", sizing_mode="stretch_width",
                                               height=14, margin=(6, 10))
        self.status = pn.pane.Markdown("No search yet: choose what to find, then press “Pick for me”.",
                                       sizing_mode="stretch_width", styles={"font-size": "0.85em"},
                                       css_classes=["ql-pick-status"])
        self.message = pn.pane.Alert("", alert_type="danger", visible=False, sizing_mode="stretch_width")
        self.result = pn.pane.Markdown("", sizing_mode="stretch_width", css_classes=["ql-pick-result"],
                                       styles={"font-size": "0.9em"})
        self.w_mode.param.watch(self._mode_changed, "value")
        for widget in (self.w_min_cells, self.w_max_cells):
            widget.param.watch(lambda *_: self._show_mode(), "value")
        # the thickness and the target start at the controls' thickness and the verdict's budget,
        # and follow them until the user edits them
        self._follow(self.page.controls.w_cells, self.w_cells, int)
        self._follow(self.page.controls.w_budget, self.w_target, float)
        # Bokeh models change only inside the document's lock, as the page's callbacks hold it;
        # a widget's watcher runs outside it
        self.page.w_present.param.watch(lambda *_: self.page._call_soon(self._set_fontscale), "value")
        for widget in (self.w_x, self.w_y):
            widget.param.watch(lambda *_: self.page._call_soon(self._redraw), "value")
        self.w_run.on_click(self.start)
        self.w_cancel.on_click(self.cancel)
        self.w_load.on_click(self.load_result)
        self._show_mode()

    def _layout(self):
        goal = pn.Column(self.w_cells, pn.Row(self.w_target), pn.Row(self.w_min_cells, self.w_max_cells),
                         sizing_mode="stretch_width", margin=0)
        self.goal = goal
        controls = pn.Column(pn.pane.Markdown("**What to find**", margin=(8, 10, -8, 10)), self.w_mode, goal,
                             self.w_runs, self.runs_hint,
                             pn.pane.Markdown("**Free parameters** (the others keep the controls' values)",
                                              margin=(8, 10, -8, 10)),
                             self.w_free, self.w_score, self.message, pn.Row(self.w_run, self.w_cancel),
                             self.progress, self.status, self.w_load, width=330)
        figures = pn.Column(self.result, pn.Row(self.w_x, self.w_y),
                            pn.pane.Bokeh(self.fig_runs, sizing_mode="stretch_width"),
                            pn.pane.Bokeh(self.fig_points, sizing_mode="stretch_width"),
                            pn.pane.Markdown(NOTE, sizing_mode="stretch_width", styles={"font-size": "0.85em"}),
                            sizing_mode="stretch_width")
        self.panel = pn.Row(controls, figures, sizing_mode="stretch_width")

    def _show_mode(self):
        tune = self.w_mode.value == "tune"
        self.w_cells.visible = tune
        self.w_target.visible = self.w_min_cells.visible = self.w_max_cells.visible = not tune
        self.w_runs.name = "Runs" if tune else "Runs per thickness"
        lo, hi = self.cells_range
        hint = f"Runs: allowed {MIN_BUDGET} to {MAX_RUNS}."
        if tune:
            hint += f" Thickness: {lo} to {hi} cells (default: the controls')."
        else:
            first, last = self.w_min_cells.value, self.w_max_cells.value
            if isinstance(first, int) and isinstance(last, int) and lo <= first <= last <= hi:
                hint += f" {first} to {last} cells: at most {max_thicknesses((first, last))} thicknesses tuned."
            hint += (f" Thicknesses: {lo} to {hi} cells; target: {TARGET_RANGE[0]:g} to {TARGET_RANGE[1]:g} dB "
                     "on the chosen score.")
        self.runs_hint.object = hint

    def _mode_changed(self, event):
        self.w_runs.value = DEFAULT_TUNE_RUNS if event.new == "tune" else DEFAULT_TARGET_RUNS
        self._show_mode()

    def _follow(self, control, field, cast) -> None:
        """`field` takes the page control's value whenever it changes, until the user edits `field`."""
        self.following[field] = True
        setting = [False]

        def edited(event):
            if not setting[0]:
                self.following[field] = event.new == control.value

        def moved(event):
            if self.following[field] and event.new is not None:
                setting[0] = True
                try:
                    field.value = cast(event.new)
                finally:
                    setting[0] = False

        field.param.watch(edited, "value")
        control.param.watch(moved, "value")

    # --- what to search ---------------------------------------------------------------
    def request_from_form(self) -> dict:
        """The search the form asks for; ScenarioError names the bad field and its range."""
        lo, hi = self.cells_range
        mode = self.w_mode.value

        def whole(widget, first, last, what):
            value = widget.value
            if value is None or isinstance(value, bool) or not first <= value <= last:
                raise ScenarioError(widget.name, value, f"a whole number of {what} from {first} to {last}")
            return int(value)

        runs = whole(self.w_runs, MIN_BUDGET, MAX_RUNS, "runs")
        free = [n for n in FREE_CHOICES if n in self.w_free.value]
        if not free:
            raise ScenarioError("Free parameters", "none", "at least one of " + ", ".join(
                SWEEP_LABELS[n] for n in FREE_CHOICES))
        asked = {"mode": mode, "runs": runs, "free": tuple(free), "score": self.w_score.value}
        if mode == "tune":
            asked["cells"] = whole(self.w_cells, lo, hi, "cells")
            return asked
        target = self.w_target.value
        if target is None or not (isinstance(target, (int, float)) and math.isfinite(target)
                                  and TARGET_RANGE[0] <= target <= TARGET_RANGE[1]):
            raise ScenarioError("Target (dB)", target, f"a number of dB from {TARGET_RANGE[0]:g} to "
                                                       f"{TARGET_RANGE[1]:g}")
        first = whole(self.w_min_cells, lo, hi, "cells")
        last = whole(self.w_max_cells, lo, hi, "cells")
        if first > last:
            raise ScenarioError("Thinnest tried", first, f"at most the thickest tried ({last} cells)")
        asked.update(target=float(target), cells_range=(first, last))
        return asked

    def scenario_for_search(self):
        """The controls' scenario, if its layer can be searched."""
        s = self.page.scenario_from_controls()
        if self.page.profile is not None:
            raise ScenarioError("layer", "profile file", "the graded layer: the search sets the grading "
                                                         "('Use the graded profile' first)")
        current_cells(s)  # at least one side carries a layer
        return s

    # --- running ----------------------------------------------------------------------
    def start(self, *_):
        """Start the search the form describes on the controls' scenario; a running one stops."""
        try:
            asked = self.request_from_form()
            base = self.scenario_for_search()
        except ScenarioError as exc:
            self.message.object = f"Pick for me: {exc}"
            self.message.visible = True
            return
        self.message.visible = False
        stop = self._new_job()
        asked["bounds"] = {b.name: (b.lo, b.hi) for b in default_bounds(base, asked["free"])}
        self.request, self.rows, self.outcome, self.loadable = asked, [], None, None
        self.progress.max, self.progress.value = asked["runs"], 0
        self.w_cancel.disabled, self.w_load.disabled = False, True
        self.result.object = ""
        self.status.object = "Starting the search…"
        self.page._call_soon(self._redraw)
        self.pool.submit(self._work, self.generation, base, asked, stop)

    def _work(self, generation: int, base, asked: dict, stop: threading.Event):
        """Worker thread: the search, with the runs sent back to the page now and then."""
        rows: list[dict] = []
        started = time.monotonic()
        state = {"cells": None, "offset": 0, "runs": 0, "since": started, "sent": 0.0, "drawn": 0.0,
                 "tried": {}}

        def each_run(cells, runs, budget, row):
            now = time.monotonic()
            if cells != state["cells"]:  # a new thickness: its runs follow the last one's
                state.update(cells=cells, offset=state["offset"] + state["runs"], since=now)
            state["runs"] = runs
            rows.append(dict(row, cells=cells, seq=state["offset"] + row["run"]))
            if now - state["sent"] >= PROGRESS_S or runs == budget:
                state["sent"] = now
                redraw = now - state["drawn"] >= REDRAW_S
                if redraw:
                    state["drawn"] = now
                info = dict(cells=cells, runs=runs, budget=budget, total=len(rows), elapsed=now - started,
                            thickness_elapsed=now - state["since"], tried=dict(state["tried"]))
                self.page._call_soon(self._progress, generation, list(rows) if redraw else None, info)
            return not stop.is_set()

        def each_thickness(cells, tuned):
            state["tried"][cells] = tuned.value
            return not stop.is_set()

        failure, outcome = None, None
        try:
            if asked["mode"] == "tune":
                s = apply_point(base, {"cells": asked["cells"]})
                outcome = tune_layer(base, asked["cells"], budget=asked["runs"], score=asked["score"],
                                     free=asked["free"], executor=LocalPool(), start=start_point(s, asked["free"]),
                                     progress=lambda runs, budget, row: each_run(asked["cells"], runs, budget, row))
            else:
                outcome = thinnest_layer(base, asked["target"], cells_range=asked["cells_range"],
                                         budget=asked["runs"], score=asked["score"], free=asked["free"],
                                         executor=LocalPool(), progress=each_thickness, run_progress=each_run)
        except Exception as exc:  # the runs done so far are still shown
            failure = f"The search stopped: {type(exc).__name__}: {exc}"
        self.page._call_soon(self._finished, generation, outcome, list(rows), time.monotonic() - started,
                             stop.is_set(), failure)

    def _progress(self, generation: int, rows: list | None, info: dict):
        if generation != self.generation:
            return
        with self.page._batched():
            self.progress.max, self.progress.value = info["budget"], info["runs"]
            if rows is not None:
                self.rows = rows
                self._draw()
            if self.stop is not None and not self.stop.is_set():  # else it keeps saying it is cancelling
                self.status.object = self._running_text(info)

    def _running_text(self, info: dict) -> str:
        per_run = info["thickness_elapsed"] / max(1, info["runs"])
        left = per_run * (info["budget"] - info["runs"])
        best = min((r[self.request["score"]] for r in self.rows if r["status"] == "ok"
                    and r["cells"] == info["cells"] and math.isfinite(r.get(self.request["score"], math.nan))),
                   default=math.nan)
        runs = f"run {info['runs']} of at most {info['budget']}"
        eta = f"about {_seconds(left)} left at most" if info["runs"] < info["budget"] else "finishing"
        if self.request["mode"] == "tune":
            return f"Searching {info['cells']} cells: {runs} · best so far {_db(best)} · {eta}."
        tried = ", ".join(f"{c} cells {_db(v)} ({'meets' if v <= self.request['target'] else 'misses'})"
                          for c, v in sorted(info["tried"].items()))
        bound = max_thicknesses(self.request["cells_range"])
        return (f"Tuning {info['cells']} cells (thickness {len(info['tried']) + 1} of at most {bound}): {runs} · "
                f"best at this thickness {_db(best)} · {eta} for this thickness · {info['total']} runs in "
                f"{_seconds(info['elapsed'])} so far." + (f" Tried: {tried}." if tried else ""))

    def _finished(self, generation: int, outcome, rows: list, elapsed: float, cancelled: bool,
                  failure: str | None):
        if generation != self.generation:
            return
        # runs are numbered as they stand in the search's path; a cancel drops the runs still going,
        # and the path closes the gaps they leave: so do the figures
        rows = [dict(r, seq=k + 1) for k, r in enumerate(rows_by_seq(rows))]
        with self.page._batched():
            self.stop = None
            self.rows, self.outcome = rows, outcome
            self.w_cancel.disabled = True
            self._draw()
            if outcome is None:
                self.status.object = failure or "The search ended without a result."
                return
            done = "Cancelled" if cancelled else "Done"
            runs = sum(1 for _ in rows)
            self.progress.value = self.progress.max if not cancelled else self.progress.value
            self.status.object = (f"{done}: {runs} runs in {_seconds(elapsed)}"
                                  + (" (the best so far is kept)." if cancelled else "."))
            self.result.object = self._result_text(outcome, cancelled)
            self.w_load.disabled = self.loadable is None

    def _result_text(self, outcome, cancelled: bool) -> str:
        score = self.request["score"]
        stopped = " before the search was cancelled" if cancelled else ""
        if self.request["mode"] == "tune":
            self.loadable = (outcome.scenario, f"the best {outcome.cells}-cell layer")
            lines = setting_lines(outcome.scenario, outcome.row, score)
            own = next((r for r in outcome.path if r["run"] == 1), None)
            text = (f"**Best setting for {outcome.cells} cells{stopped}** "
                    f"(run {outcome.row['run']} of {outcome.runs}):\n\n" + "\n".join(f"- {l}" for l in lines))
            if own is not None and own["run"] != outcome.row["run"]:
                text += (f"\n\nThe controls' own grading at {outcome.cells} cells (run 1, clipped into the search "
                         f"ranges) scored {_db(own.get(score)) if own['status'] == 'ok' else own['status']}.")
            return text
        target = self.request["target"]
        tried = ", ".join(f"{c} cells {_db(t.value)} ({'meets' if t.value <= target else 'misses'})"
                          for c, t in outcome.tried.items())
        if outcome.met:
            self.loadable = (outcome.tune.scenario, f"the {outcome.cells}-cell layer")
            lines = setting_lines(outcome.tune.scenario, outcome.tune.row, score)
            return (f"**Thinnest layer meeting {target:g} dB{stopped}: {outcome.cells} cells**\n\n"
                    + "\n".join(f"- {l}" for l in lines) + f"\n\nThicknesses tuned: {tried}.")
        if not outcome.tried:
            return f"No thickness was tuned{stopped}."
        best_cells, best = min(outcome.tried.items(), key=lambda item: item[1].value)
        self.loadable = (best.scenario, f"the best try ({best_cells} cells)")
        lo, hi = self.request["cells_range"]
        return (f"**No layer of {lo} to {hi} cells met {target:g} dB{stopped}.** The lowest score was "
                f"{_db(best.value)} at {best_cells} cells (“Load the result” loads that one).\n\n"
                f"Thicknesses tuned: {tried}.")

    def cancel(self, *_):
        """Stop after the runs in progress; the best so far is kept."""
        if self._ask_stop():
            self.w_cancel.disabled = True
            self.status.object = "Cancelling: the runs in progress finish first…"

    # --- loading the result --------------------------------------------------------------
    def load_result(self, *_):
        """Put the found setting into the controls; the page re-measures it."""
        if self.loadable is None:
            return
        scenario, what = self.loadable
        self.following[self.w_cells] = True
        self.page.load_scenario(scenario)
        self.status.object += f"\n\nLoaded {what} into the controls; the headline and figures re-measure it."
        # a control that cannot hold the value (outside its range) measures what it shows
        p, found = self.page, layer_setting(scenario)
        c = p.controls
        held = {"cells": c.w_cells, "order": c.w_order, "sigma_ratio": c.w_ratio, "kappa_max": c.w_kappa,
                "alpha_max": c.w_alpha, "alpha_order": c.w_alpha_order}
        moved = [f"{SWEEP_LABELS[k]} {w.value:.4g} for {found[k]:.4g}" for k, w in held.items()
                 if not math.isclose(w.value, found[k], rel_tol=1e-9, abs_tol=1e-12)]
        if moved:
            self.status.object += (" The controls hold " + ", ".join(moved) + ", so the headline measures "
                                   "that setting, not exactly the one found.")

    # --- the figures ---------------------------------------------------------------------
    def _make_figures(self):
        tools = "pan,wheel_zoom,box_zoom,reset,save"
        self.fig_runs = figure(title="score of each run", height=320, sizing_mode="stretch_width", tools=tools,
                               toolbar_location="above", x_axis_label="run", y_axis_label="score (dB)")
        self.src_stage = {}
        hover = [("run", "@seq"), ("thickness", "@cells cells"), ("score", "@score_text"), ("", "@what")]
        renderers, items = [], []
        for stage, (label, color, marker) in STAGE_STYLE.items():
            self.src_stage[stage] = ColumnDataSource(self._empty_points())
            renderers.append(self.fig_runs.scatter("seq", "score", source=self.src_stage[stage], marker=marker,
                                                   size=8, color=color))
            items.append(LegendItem(label=value(label.split()[-1]), renderers=[renderers[-1]], visible=False))
        self.src_bad = ColumnDataSource(self._empty_points())
        renderers.append(self.fig_runs.scatter("seq", "score", source=self.src_bad, marker="x", size=9,
                                               color=NOT_MEASURED, line_width=2))
        items.append(LegendItem(label=value("not measured"), renderers=[renderers[-1]], visible=False))
        self.legend_items = dict(zip(list(STAGE_STYLE) + ["bad"], items))  # shown once they have a run
        self.src_best = ColumnDataSource({"x": [], "y": []})
        best = self.fig_runs.step("x", "y", source=self.src_best, mode="after", color="black", line_width=1.5)
        items.append(LegendItem(label=value("best so far"), renderers=[best]))
        # below the plot, so it never hides a run
        self.fig_runs.add_layout(Legend(items=items, orientation="horizontal", click_policy="hide", spacing=6,
                                        padding=2, margin=4), "below")
        self.target_line = Span(dimension="width", location=0, line_dash="dashed", line_color=PALETTE[2],
                                line_width=1.5, visible=False)
        self.fig_runs.add_layout(self.target_line)
        self.src_thickness = ColumnDataSource({"x": [], "y": [], "text": []})
        self.fig_runs.add_layout(LabelSet(x="x", y="y", text="text", source=self.src_thickness, y_units="screen",
                                          text_font_size="11px", text_color="#444", x_offset=2))
        self.fig_runs.add_tools(HoverTool(renderers=renderers, tooltips=hover))

        self.mapper = LinearColorMapper(palette=Viridis256, low=-80.0, high=-20.0)
        self.fig_points = figure(title="tried points", height=320, sizing_mode="stretch_width", tools=tools,
                                 toolbar_location="above", x_range=Range1d(0, 1), y_range=Range1d(0, 1))
        self.src_path = ColumnDataSource({"xs": [], "ys": []})
        self.fig_points.multi_line("xs", "ys", source=self.src_path, color=PALETTE[1], line_width=1.5, alpha=0.8)
        self.src_points = ColumnDataSource(self._empty_points())
        dots = self.fig_points.scatter("px", "py", source=self.src_points, size=9, marker="marker",
                                       fill_color={"field": "score", "transform": self.mapper}, line_color="black")
        self.src_bad_points = ColumnDataSource(self._empty_points())
        bad = self.fig_points.scatter("px", "py", source=self.src_bad_points, size=9, marker="x",
                                      color=NOT_MEASURED)
        self.src_star = ColumnDataSource({"px": [], "py": []})
        self.fig_points.scatter("px", "py", source=self.src_star, marker="star", size=20, fill_color="#E69F00",
                                line_color="black")
        self.fig_points.add_tools(HoverTool(renderers=[dots, bad], tooltips=hover))
        self.fig_points.add_layout(ColorBar(color_mapper=self.mapper, title="score (dB)", width=12), "right")
        self.empty_label = Label(x=10, y=10, x_units="screen", y_units="screen", text="", text_color="#666",
                                 text_font_size="12px")
        self.fig_points.add_layout(self.empty_label)
        for fig in (self.fig_runs, self.fig_points):
            fig.toolbar.logo = None
        self._set_fontscale()

    @staticmethod
    def _empty_points() -> dict:
        return {k: [] for k in ("seq", "score", "score_text", "what", "cells", "px", "py", "marker")}

    def _set_fontscale(self):
        for fig in (self.fig_runs, self.fig_points):
            _font(fig, self.page.fontscale if self.page.w_present.value else 1.0)

    def _redraw(self):
        with self.page._batched():
            self._fit_axes()
            self._draw()

    def _fit_axes(self):
        """The plotted parameters' search ranges (the form's choice while no search has run)."""
        bounds = self.request.get("bounds", {})
        for axis, rng, name in ((self.fig_points.xaxis, self.fig_points.x_range, self.w_x.value),
                                (self.fig_points.yaxis, self.fig_points.y_range, self.w_y.value)):
            lo, hi = bounds.get(name, (0.0, 1.0))
            pad = 0.04 * (hi - lo) or 0.5
            rng.start, rng.end = lo - pad, hi + pad
            axis.axis_label = SWEEP_LABELS[name] + ("" if name in bounds or not bounds else " (not searched)")

    def _draw(self):
        """Feed the runs so far into both figures (their sources' data only)."""
        score = self.request.get("score", self.w_score.value)
        rows = self.rows
        x_name, y_name = self.w_x.value, self.w_y.value
        measured = lambda r: r["status"] == "ok" and math.isfinite(r.get(score, math.nan))
        ok = [r for r in rows if measured(r)]

        def columns(subset, px=None, py=None):
            return {"seq": [r["seq"] for r in subset],
                    "score": [r[score] if measured(r) else PENALTY_DB for r in subset],
                    "score_text": [_db(r[score]) if measured(r) else f"{r['status']}: {r['reason']}"
                                   for r in subset],
                    "what": [f"{r['stage']}: {point_text(r['point'])}" for r in subset],
                    "cells": [r["cells"] for r in subset],
                    "px": px if px is not None else [0.0] * len(subset),
                    "py": py if py is not None else [0.0] * len(subset),
                    "marker": [STAGE_STYLE[r["stage"]][2] for r in subset]}

        for stage in STAGE_STYLE:
            self.src_stage[stage].data = columns([r for r in ok if r["stage"] == stage])
        bad = [r for r in rows if not measured(r)]
        self.src_bad.data = columns(bad)
        for key, item in self.legend_items.items():
            has = bool(bad) if key == "bad" else any(r["stage"] == key for r in ok)
            if item.visible != has:
                item.visible = has
        # best so far, one line per thickness (a gap where the thickness changes)
        xs, ys, labels = [], [], {"x": [], "y": [], "text": []}
        best, cells = math.inf, None
        for r in rows_by_seq(rows):
            if r["cells"] != cells:
                if cells is not None:
                    xs.append(r["seq"] - 0.5)
                    ys.append(math.nan)
                best, cells = math.inf, r["cells"]
                labels["x"].append(r["seq"])
                labels["y"].append(4)
                labels["text"].append(f"{cells} cells")
            best = min(best, r[score] if measured(r) else PENALTY_DB)
            xs.append(r["seq"])
            ys.append(best)
        self.src_best.data = {"x": xs, "y": ys}
        thinnest = self.request.get("mode") == "thinnest"
        self.src_thickness.data = labels if thinnest else {"x": [], "y": [], "text": []}
        self.target_line.visible = thinnest
        if thinnest:
            self.target_line.location = self.request["target"]
        label = plots.SWEEP_SCORE_LABELS[score]
        self.fig_runs.yaxis.axis_label = label
        self.fig_runs.title.text = (f"{label.replace(' (dB)', '')} of each run"
                                    + (" (dashed: target)" if thinnest else ""))

        # the tried points of one thickness: the one being tuned, or the answer's
        shown = self._shown_cells()
        here = [r for r in rows_by_seq(rows) if r["cells"] == shown]
        fixed = self.request.get("free", ())
        value = lambda r, name: r["point"].get(name, math.nan)
        good = [r for r in here if measured(r)]
        self.src_points.data = columns(good, [value(r, x_name) for r in good], [value(r, y_name) for r in good])
        poor = [r for r in here if not measured(r)]
        self.src_bad_points.data = columns(poor, [value(r, x_name) for r in poor], [value(r, y_name) for r in poor])
        refine = [r for r in here if r["stage"] == "refine"]
        self.src_path.data = {"xs": [[value(r, x_name) for r in refine]], "ys": [[value(r, y_name) for r in refine]]}
        best_row = min(good, key=lambda r: r[score], default=None)
        self.src_star.data = ({"px": [value(best_row, x_name)], "py": [value(best_row, y_name)]}
                              if best_row is not None else {"px": [], "py": []})
        if good:
            scores = [r[score] for r in good]
            low, high = min(scores), max(scores)
            self.mapper.low, self.mapper.high = low, max(high, low + 1.0)
        missing = [n for n in (x_name, y_name) if fixed and n not in fixed]
        self.empty_label.text = (f"{' and '.join(SWEEP_LABELS[n] for n in missing)} not searched: choose free "
                                 f"parameters to plot" if missing else "")
        self.fig_points.title.text = ("tried points" + (f" at {shown} cells" if shown is not None else "")
                                      + " (star: best; line: refinement)")

    def _shown_cells(self):
        if getattr(self.outcome, "met", False):
            return self.outcome.cells
        return self.rows[-1]["cells"] if self.rows else None


def rows_by_seq(rows: list[dict]) -> list[dict]:
    """Runs in the order of their numbers (they arrive in the order they finish)."""
    return sorted(rows, key=lambda r: r["seq"])
