"""The page's "Confirm in 3D" panel: the current setting run on a small 3D box.

    view = Confirm3DView(current_scenario, call_soon, current_2d)
    ... place view.panel; call view.scenario_changed() after each new 2D result;
    view.close() when the session ends.

current_scenario() returns the page's current Scenario; call_soon(function,
*args) runs a function on the document's event loop; current_2d() returns the
page's latest 2D Measurement (or None), whose scores are shown beside the 3D
ones.  The run goes in the view's own worker thread; progress comes back at
most every PROGRESS_S; Cancel (or a new run, or close) stops it at the next
progress report, and a generation counter drops an older run's results.
"""

from __future__ import annotations

import math
import threading
import time
from concurrent.futures import ThreadPoolExecutor

import holoviews as hv
import holoviews.plotting.bokeh  # noqa: F401  (the figure options need the Bokeh renderer)
import panel as pn

from quietlayer.engine.confirm3d import confirm_3d
from quietlayer.engine.errors import DivergenceError, RunCancelled, ScenarioError
from quietlayer.engine.grid3d import box_from_scenario
from quietlayer.engine.measure import to_db

from .figures import PALETTE
from .units import frequency_unit

PROGRESS_S = 0.2
STAGES = {"reference": ("reference (cached after the first run)", 0), "test": ("test run", 1),
          "late": ("late-time check", 2)}
NOTE = ("**What am I looking at.** The setting in the controls, run on a small 3D box with the same cell, "
        "time step (as a fraction of the 3D limit), host, band and layers; a dipole fires the pulse, and probes "
        "near the centre of a face, an edge and a corner score the layer's echo against a reflection-free "
        "reference, as in 2D. Edges and corners, where two or three layers overlap, are where a layer first "
        "fails in 3D. The spectrum shows how much of each frequency comes back at the three probes.")


def _db(value) -> str:
    return f"{value:.1f} dB" if isinstance(value, (int, float)) and math.isfinite(value) else "—"


class Confirm3DView:
    """Button, progress, 2D-beside-3D scores and a face/edge/corner spectrum."""

    def __init__(self, current_scenario, call_soon, current_2d=None):
        self.current_scenario = current_scenario
        self.call_soon = call_soon
        self.current_2d = current_2d or (lambda: None)
        self.generation = 0
        self.stop: threading.Event | None = None
        self.result = None
        self.result_key = None  # the scenario key the shown result was measured on
        self.pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ql-3d")
        w = pn.widgets
        self.w_run = w.Button(name="Confirm in 3D", button_type="primary")
        self.w_cancel = w.Button(name="Cancel", disabled=True)
        self.progress = pn.indicators.Progress(value=0, max=300, bar_color="primary", width=300, height=14,
                                               margin=(6, 10), css_classes=["ql-3d-progress"])
        self.status = pn.pane.Markdown("", sizing_mode="stretch_width", css_classes=["ql-3d-status"])
        self.box_line = pn.pane.Markdown("", sizing_mode="stretch_width", styles={"font-size": "0.85em"},
                                         css_classes=["ql-3d-box"])
        self.scores = pn.pane.HTML("", sizing_mode="stretch_width", css_classes=["ql-3d-scores"])
        # the figure is made with the first result: an empty one would only slow the page's first load
        self.plot = pn.Column(sizing_mode="stretch_width")
        self.w_run.on_click(self.start)
        self.w_cancel.on_click(self.cancel)
        controls = pn.Column(pn.Row(self.w_run, self.w_cancel), self.progress, self.status, self.box_line, width=330)
        self.panel = pn.Column(pn.Row(controls, self.scores, sizing_mode="stretch_width"), self.plot,
                               pn.pane.Markdown(NOTE, sizing_mode="stretch_width", styles={"font-size": "0.85em"}),
                               sizing_mode="stretch_width")
        self.scenario_changed()

    # --- the current setting ------------------------------------------------------
    def scenario_changed(self) -> None:
        """Show the box of the current setting; mark older 3D scores as such."""
        s = self.current_scenario()
        try:
            box = box_from_scenario(s)
        except ScenarioError as exc:
            self.box_line.object = f"No 3D box for this setting: {exc}"
            self.w_run.disabled = True
        else:
            notes = "".join(f" Note: {n}." for n in box.notes)
            self.box_line.object = f"3D box: {box.describe()}.{notes}"
            self.w_run.disabled = self.stop is not None
        self._show_scores()

    # --- running --------------------------------------------------------------------
    def start(self, *_) -> None:
        """Run the current setting in 3D; a run in progress stops first."""
        s = self.current_scenario()
        try:
            box = box_from_scenario(s)
        except ScenarioError as exc:
            self.status.object = f"Cannot confirm in 3D: {exc}"
            return
        self._stop_running()
        self.generation += 1
        stop = self.stop = threading.Event()
        self.progress.value = 0
        self.w_run.disabled, self.w_cancel.disabled = True, False
        self.status.object = "Starting the 3D run…"
        self.pool.submit(self._work, self.generation, s, box, stop)

    def _work(self, generation: int, s, box, stop: threading.Event) -> None:
        """Worker thread: the confirmation, with throttled progress back to the page."""
        last = [0.0]

        def progress(stage, done, total):
            now = time.monotonic()
            if now - last[0] >= PROGRESS_S or done == total:
                last[0] = now
                self.call_soon(self._progress, generation, stage, done, total)
            return not stop.is_set()

        try:
            result = confirm_3d(s, box=box, progress=progress)
        except RunCancelled:
            self.call_soon(self._finished, generation, None, "Cancelled: the 3D scores below are from before.")
            return
        except DivergenceError as exc:
            self.call_soon(self._finished, generation, None, f"The 3D test run {exc}: this layer fails in 3D.")
            return
        except Exception as exc:  # shown, never raised into the event loop
            self.call_soon(self._finished, generation, None, f"The 3D run failed: {type(exc).__name__}: {exc}")
            return
        self.call_soon(self._finished, generation, (result, s.key()), None)

    def _progress(self, generation: int, stage: str, done: int, total: int) -> None:
        if generation != self.generation:
            return
        label, index = STAGES[stage]
        self.progress.value = int(100 * index + 100 * done / max(total, 1))
        if self.stop is not None and not self.stop.is_set():
            self.status.object = f"3D {label}: step {done} of {total}"

    def _finished(self, generation: int, outcome, message: str | None) -> None:
        if generation != self.generation:
            return
        self.stop = None
        self.w_run.disabled, self.w_cancel.disabled = False, True
        if outcome is not None:
            self.result, self.result_key = outcome
            self.progress.value = self.progress.max
            c = self.result
            source = "cached" if c.reference_source != "computed" else f"{c.reference_s:.1f} s"
            self.status.object = (f"Done in {c.elapsed_s:.1f} s (reference {source}, test {c.test_s:.1f} s, "
                                  f"late-time {c.late_s:.1f} s).")
            figure = self._spectrum(c)
            if self.plot.objects:
                self.plot.objects[0].object = figure
            else:
                self.plot.objects = [pn.pane.HoloViews(figure, sizing_mode="stretch_width")]
        else:
            self.progress.value = 0
            self.status.object = message
        self._show_scores()

    def cancel(self, *_) -> None:
        if self.stop is not None:
            self.stop.set()
            self.w_cancel.disabled = True
            self.status.object = "Cancelling…"

    def _stop_running(self) -> None:
        if self.stop is not None:
            self.stop.set()
            self.stop = None

    def close(self) -> None:
        """The session has ended: stop the work."""
        self._stop_running()
        self.generation += 1
        self.pool.shutdown(wait=False, cancel_futures=True)

    # --- showing ------------------------------------------------------------------
    def _show_scores(self) -> None:
        """A table of the 2D scores beside the 3D ones."""
        m, c = self.current_2d(), self.result
        stale = c is not None and self.result_key != self.current_scenario().key()
        rows = []
        if m is not None:
            normal = min(m.probe_angles, key=m.probe_angles.get) if m.probe_angles else None
            corner_2d = m.peak_db.get("corner")
        else:
            normal = corner_2d = None
        probes = [n for n, _ in c.box.probes] if c is not None else [None, None, None]
        peak = (lambda name: c.peak_db.get(name)) if c is not None else (lambda name: None)
        rows.append(("worst peak error", _db(m.worst_peak_db) if m else "—", _db(c.worst_peak_db) if c else "—"))
        rows.append(("face centre (2D: normal incidence)", _db(m.peak_db.get(normal)) if normal else "—",
                     _db(peak(probes[0]))))
        rows.append(("edge (2D: none)", "—", _db(peak(probes[1]))))
        rows.append(("corner", _db(corner_2d), _db(peak(probes[2]))))
        rows.append(("global error", _db(m.global_db) if m else "—", _db(c.global_db) if c else "—"))
        band3 = max(c.band_worst_db.values()) if c is not None and c.band_worst_db else math.nan
        band2 = max(m.band_worst_db.values()) if m is not None and m.band_worst_db else math.nan
        rows.append(("band worst", _db(band2), _db(band3)))
        late = c.late.status if c is not None and c.late is not None else "—"
        rows.append(("late-time check (3D)", "", late))
        body = "".join(f"<tr><td>{a}</td><td style='text-align:right'>{b}</td><td style='text-align:right'>{d}</td></tr>"
                       for a, b, d in rows)
        head = "<tr><th></th><th>2D</th><th>3D</th></tr>"
        caption = ("3D scores of an earlier setting: run again for this one" if stale
                   else "" if c is not None else "No 3D run yet for this setting")
        self.scores.object = (f"<table class='ql-3d-table'>{head}{body}</table>"
                              + (f"<div style='font-size:0.85em;color:#5a3b00'>{caption}</div>" if caption else ""))

    @staticmethod
    def _spectrum(c):
        """Reflection spectra at the face, edge and corner probes."""
        scale, unit = frequency_unit(c.box.band[1])
        kdim, vdim = f"frequency ({unit})", "reflection (dB)"
        layers = []
        for k, (name, _) in enumerate(c.box.probes):
            have = c.freqs is not None and name in c.spectra
            x = c.freqs / scale if have else []
            y = to_db(c.spectra[name]) if have else []
            layers.append(hv.Curve((x, y), kdims=[kdim], vdims=[vdim], label=name.split(" (")[0]).opts(
                color=PALETTE[k], line_width=2))
        return hv.Overlay(layers).opts(title="3D reflection spectrum: face, edge, corner", responsive=True,
                                       height=270, show_grid=True, legend_position="right", tools=["hover"],
                                       toolbar="above")
