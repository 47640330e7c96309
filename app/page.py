"""The live tuning page: one instance per browser session (see create_page).

Moving a control rebuilds the scenario, and the measurement runs in a worker
thread (the numba kernels release the GIL) so the page stays responsive.  A
burst of changes is coalesced: while a run is going, further changes only
bump a generation counter; a long run that a newer setting has overtaken is
cancelled at its next progress call, the newest parameters are run next, and
a result whose generation is stale is never shown.  Until a figure shows the
setting in the controls it is marked as the previous one.  The 20,000-step
late-time check and a run twice as long follow each shown result in a second
worker and are cancelled when the parameters change again.

The controls live in controls.py, the headline in headline.py, the figures in
figures.py, and each further tab in its own module.
"""

from __future__ import annotations

import io
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from contextlib import nullcontext
from functools import partial

import holoviews as hv
import panel as pn

hv.extension("bokeh", logo=False)
pn.extension(notifications=False)

from quietlayer.assets import preset_names, preset_path
from quietlayer.engine import RunCancelled, Scenario, ScenarioError
from quietlayer.engine import backend
from quietlayer.engine.budget import VISITOR_BUDGET, check_work
from quietlayer.engine.measure import late_time_check, measure
from quietlayer.engine.run_checks import lengthened, record_length
from quietlayer.engine.verdict import judge

from . import CAUTION
from .confirm3d_view import Confirm3DView
from .controls import CUSTOM, Controls, first_profile
from .figures import KEYS as FIGURES, LiveFigures, best_frame
from .headline import STYLE, HeadlineState, headline_html, status_text, waiting_html
from .pick_view import PickView
from .sweep_view import SweepView

PAGE_PARTS = frozenset({"probes", "spectra", "angles", "global", "snapshots"})
DRAG_PARTS = frozenset({"probes", "spectra"})  # while a slider is dragged: headline and spectrum only
HEADLINE_LEAD_MS = 40  # the headline's message leaves and is drawn before the figures' data follows
DRAG_SETTLE_MS = 400  # a mid-drag result with nothing newer after this long gets its full run
DRAG_COALESCE_MS = 25  # a key press sends value and value_throttled together: only the full run is made
LATE_CHECK_REST_S = 0.8  # the late-time check starts once the controls have rested this long: while the
                         # user tunes, both cores stay free for the runs they are waiting for
LENGTHEN_REST_S = 2.0  # ... and the run twice as long once they have rested this much longer: the
                       # user has most likely stopped tuning, and it does not compete with the next change
PROGRESS_AFTER_S = 1.0  # a run taking longer than this shows its progress, an estimate and Cancel
PROGRESS_EVERY_S = 0.25  # ... refreshed at most this often
OVERTAKEN_AFTER_S = 0.3  # a run a newer setting has overtaken stops once it has taken this long: a short
                         # one (a dragged slider's) is let finish, or a drag would never show a result
STALE_STYLE = {"opacity": "0.35", "filter": "grayscale(0.7)"}  # a figure still showing the previous setting
STALE_NOTE = "**Faded figures show the previous setting** until they are redrawn for the one in the controls."

NOTES = {
    "fields": "**What am I looking at.** Left: |field| over the whole grid in dB of the largest incident "
              "field; the dashed box is the interior, the layer lies outside it. Right: the layer's echo alone "
              "(test run minus the reflection-free reference) over the interior. Star: source; dots: probes; "
              "pink outlines: blocks (hover for the material).",
    "spectrum": "**What am I looking at.** How much of each frequency comes back at a few probes (solid), "
                "beside the continuous theory of the graded layer at that probe's incidence angle (dashed). "
                "Where solid lies above dashed the grid, not the absorption, limits the layer.",
    "error": "**What am I looking at.** The echo at the probes over time, in dB of the probe's largest "
             "reference field. Late humps that do not die out hint at slow, low-frequency reflection.",
    "angle": "**What am I looking at.** Band-averaged reflection per probe against its specular incidence "
             "angle on the nearest face. The dashed theory is for a plane wave; near a face a cylindrical "
             "wave can do better than it at grazing angles.",
    "profile": "**What am I looking at.** The layer's grading against depth from its inner face: "
               "conductivity sigma and CFS alpha, the stretch kappa, and the psi update coefficients b and c; "
               "one line per side with a layer (sides alike share one).",
}
NOTE_SIZE = {False: "0.85em", True: "1.25em"}  # the notes' text size, normal and in presentation mode


def load_preset(name: str) -> Scenario:
    return Scenario.from_toml(preset_path(name).read_text("utf-8"))


class QuietlayerPage:
    """Widgets, plots and the compute loop of one session."""

    def __init__(self, preset: str = "demo"):
        self.base = load_preset(preset)
        self.profile = None
        self.result = None
        self.pinned = None
        self.late = None
        self.longer = None  # the same setting run longer (run_checks.lengthened), once it is in
        self.generation = 0
        self.want_full = True  # what the newest request asks for (see request)
        self._drag_token = 0  # bumped by each slider move; a pending mid-drag run checks it
        self.complete = True  # the result on show has every figure (not a mid-drag one)
        self.running = False
        self.cancelled = -1  # the generation whose run the user cancelled
        self.stale: set = set()  # figure keys still showing a previous setting
        self.last_good: Scenario | None = None
        self.fontscale = 1.0
        self.measure_pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ql-measure")
        self.late_pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ql-late")
        self._suspend = False
        self._placing_player = False
        self._lock = threading.Lock()
        self.doc = None  # the session's document, set by create_page
        self.controls = Controls()
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
        self.w_present = w.Toggle(label="Presentation mode", value=False, button_type="default")
        self.w_pin = w.Button(label="Pin as A", button_type="primary")
        self.w_unpin = w.Button(label="Clear A", disabled=True)
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
        self.status = pn.pane.Markdown("", margin=(0, 10), styles={"font-size": NOTE_SIZE[False]})
        self.engine_note = pn.pane.Alert("", alert_type="info", visible=False, sizing_mode="stretch_width")
        self.spinner = pn.indicators.LoadingSpinner(value=False, size=26)
        self.headline = pn.pane.HTML("", sizing_mode="stretch_width", stylesheets=[STYLE])
        self.progress = pn.indicators.Progress(value=0, max=100, width=220, visible=False)
        self.progress_text = pn.pane.Markdown("", visible=False, margin=(0, 6))
        self.w_cancel = w.Button(label="Cancel the run", button_type="warning", visible=False, width=130)
        self.stale_note = pn.pane.Markdown("&nbsp;", height=26, margin=(0, 10), styles={"color": "#6b4e00"})

    def _url_widgets(self):
        return {**self.controls.url_widgets(), "present": self.w_present}

    def _set_widgets_from(self, s: Scenario):
        """Show scenario `s` in the controls (without triggering runs)."""
        self._suspend = True
        try:
            self.controls.show(s)
        finally:
            self._suspend = False

    def scenario_from_controls(self) -> Scenario:
        """The scenario the controls describe; ScenarioError names a bad field."""
        return self.controls.scenario(self.base, self.profile)

    # --- figures -------------------------------------------------------------
    def _make_plots(self):
        """Bokeh figures built once per session; a result only replaces their data."""
        self.figures = LiveFigures(self.fontscale)
        self.panes, self.frames = {}, {}
        for key in FIGURES:
            fixed = key in ("total", "reflected")  # the pane takes the image's own size
            self.panes[key] = pn.pane.Bokeh(self.figures.figures[key],
                                            sizing_mode="fixed" if fixed else "stretch_width")
            # faded through a frame around the figure: a style on the figure itself has the
            # browser lay out and redraw it
            self.frames[key] = pn.Column(self.panes[key], margin=0,
                                         sizing_mode=None if fixed else "stretch_width")

    def _redraw(self):
        """Show the current result in every figure (pin, presentation)."""
        if self.result is not None:
            self.figures.show(self.result, self.pinned)

    def _mark_stale(self, keys) -> None:
        """Fade the figures in `keys` (and say so) until they show the setting in the controls."""
        keys = set(keys) & set(self.panes) if self.result is not None else set()
        for key in keys - self.stale:
            self.frames[key].styles = STALE_STYLE
        for key in self.stale - keys:
            self.frames[key].styles = {}
        if bool(keys) != bool(self.stale):  # the note keeps its height: no figure moves
            self.stale_note.object = STALE_NOTE if keys else "&nbsp;"
        self.stale = keys

    # --- layout ---------------------------------------------------------------
    def _layout(self):
        self.controls_panel = self.controls.panel([self.d_toml, self.d_csv, self.d_json, self.d_report])
        top = pn.Row(pn.pane.Markdown("## Quietlayer — how much does this absorbing layer reflect?", margin=(0, 10)),
                     pn.layout.HSpacer(), self.spinner, self.w_pin, self.w_unpin, self.w_present,
                     sizing_mode="stretch_width")
        self.caution = pn.pane.HTML(f'<div class="ql-caution">{CAUTION}</div>', stylesheets=[STYLE],
                                    sizing_mode="stretch_width")
        self.notes = {k: pn.pane.Markdown(text, sizing_mode="stretch_width", styles={"font-size": NOTE_SIZE[False]})
                      for k, text in NOTES.items()}
        self.scrubber_text = pn.pane.Markdown("Time scrubber: play, pause or drag through the run.",
                                              styles={"font-size": NOTE_SIZE[False]})
        self.scrubber = pn.Row(self.w_player, self.scrubber_text)
        fields = pn.Column(pn.Row(self.frames["total"], pn.Spacer(width=20), self.frames["reflected"]),
                           self.scrubber, self.notes["fields"], sizing_mode="stretch_width")
        curves = pn.GridBox(pn.Column(self.frames["spectrum"], self.notes["spectrum"]),
                            pn.Column(self.frames["angle"], self.notes["angle"]),
                            pn.Column(self.frames["error"], self.notes["error"]),
                            pn.Column(self.frames["profile0"], self.notes["profile"]),
                            ncols=2, sizing_mode="stretch_width")
        profile_row = pn.Row(self.frames["profile1"], self.frames["profile2"], sizing_mode="stretch_width")
        # the headline stays above both tabs: a cell clicked on the sweep map is re-measured in view
        self.tabs = pn.Tabs(("Figures", pn.Column(self.stale_note, fields, curves, profile_row,
                                                  sizing_mode="stretch_width")),
                            ("Sweep", self.sweep.panel), ("Pick for me", self.pick.panel),
                            ("Confirm in 3D", self.confirm3d.panel),
                            dynamic=True, sizing_mode="stretch_width")
        run_row = pn.Row(self.progress, self.progress_text, self.w_cancel, sizing_mode="stretch_width")
        self.main = pn.Column(top, self.engine_note, self.message, self.headline, self.status, run_row, self.tabs,
                              self.caution, sizing_mode="stretch_width", stylesheets=[STYLE])
        self.root = pn.Row(self.controls_panel, self.main, sizing_mode="stretch_width")

    # --- events ---------------------------------------------------------------
    def _watch(self):
        c = self.controls
        layer = c.layer_widgets()
        for widget in layer:  # the headline and spectrum follow a drag; the full set comes on release
            widget.param.watch(self._dragged, "value")
        for widget in layer + [c.w_courant]:  # a new Courant number needs a new reference: on release
            widget.param.watch(self._changed, "value_throttled")
        for widget in (c.w_sides, c.w_cell, c.w_eps, c.w_sigma_host, c.w_pol, c.w_fmin,
                       c.w_fmax, c.w_precision, c.w_nx, c.w_ny, c.w_steps):
            widget.param.watch(self._changed, "value")
        c.w_budget.param.watch(self._budget_changed, "value")
        c.w_preset.param.watch(self._preset_changed, "value")
        self.w_present.param.watch(self._presentation, "value")
        self.w_pin.on_click(self._pin)
        self.w_unpin.on_click(self._unpin)
        self.w_cancel.on_click(self._cancel)
        c.w_profile.param.watch(self._profile_uploaded, "value")
        c.w_profile_clear.on_click(self._profile_cleared)
        c.w_scenario_file.param.watch(self._scenario_uploaded, "value")
        self.w_player.param.watch(self._frame_changed, "value")

    def _frame_changed(self, event):
        if not self._placing_player:
            with self._batched():
                self.figures.show_frame(event.new)

    def _changed(self, *_):
        if not self._suspend:
            self.request()

    def _budget_changed(self, *_):
        """The budget only changes the verdict: no run."""
        if self._suspend:
            return
        try:
            self.controls.budget_db()
        except ScenarioError as exc:
            self._show_error(str(exc), field=exc.field)
            return
        self.message.visible = False
        self.controls.mark_invalid(None)
        self._show_headline()

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
        if event.new == CUSTOM:
            return  # the loaded file stays the base
        self.base = load_preset(event.new)
        self.profile = None
        self.controls.w_profile_clear.disabled = True
        if CUSTOM in self.controls.w_preset.options and not self._suspend:
            self.controls.w_preset.options = preset_names()
        if self._suspend:  # restoring from a link: the other controls come from the link too
            return
        self._set_widgets_from(self.base)
        self.request()

    def _presentation(self, event):
        present = bool(event.new)
        with self._batched():
            self.controls_panel.visible = not present
            self.main.css_classes = ["ql-present"] if present else []
            self.fontscale = 1.6 if present else 1.0
            self.figures.set_fontscale(self.fontscale)
            size = {"font-size": NOTE_SIZE[present]}
            for pane in [*self.notes.values(), self.status, self.scrubber_text]:
                pane.styles = size
            self.w_player.width = 480 if present else 330
            self.scrubber.styles = {"zoom": "1.3"} if present else {}
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

    def _cancel(self, *_):
        """Stop the run in progress; the figures keep the last finished setting."""
        with self._lock:
            self.cancelled = self.generation

    def _profile_uploaded(self, event):
        if not event.new:
            return
        from quietlayer.engine.export import profile_from_csv
        try:
            text = event.new.decode("utf-8") if isinstance(event.new, bytes) else str(event.new)
            self.profile = profile_from_csv(text, self.controls.w_profile.filename or "profile")
        except (ScenarioError, UnicodeDecodeError) as exc:
            self._show_error(f"Profile file: {exc}")
            return
        self.controls.w_profile_clear.disabled = False
        self.request()

    def _profile_cleared(self, *_):
        self.profile = None
        self.controls.w_profile_clear.disabled = True
        self.request()

    def _scenario_uploaded(self, event):
        if not event.new:
            return
        try:
            s = Scenario.from_toml(event.new.decode("utf-8"))
            check_work(s, VISITOR_BUDGET)
        except (ScenarioError, UnicodeDecodeError) as exc:
            self._show_error(f"Scenario file: {exc}")
            return
        self._suspend = True
        try:  # the preset box says where the scenario came from
            self.controls.w_preset.options = [*preset_names(), CUSTOM]
            self.controls.w_preset.value = CUSTOM
        finally:
            self._suspend = False
        self.load_scenario(s)

    def load_scenario(self, s: Scenario):
        """Put scenario `s` into the controls (a file, a cell of the sweep map) and measure it."""
        self.base = s
        self.profile = first_profile(s)
        self.controls.w_profile_clear.disabled = self.profile is None
        self._set_widgets_from(s)
        self.request()

    def _show_error(self, text: str, field: str | None = None):
        self.controls.mark_invalid(field)
        if self.result is None:  # e.g. a link whose values are refused: nothing has been measured
            self.message.object = text + " — nothing is measured until the setting is valid."
            self.headline.object = waiting_html("no valid setting yet")
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
            try:
                if delay_ms:
                    self.doc.add_timeout_callback(callback, delay_ms)
                else:
                    self.doc.add_next_tick_callback(callback)
            except Exception:  # the session has ended meanwhile: nothing left to show it on
                pass
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
            self._show_error(str(exc), field=exc.field)
            return
        self.message.visible = False
        self.controls.mark_invalid(None)
        self.controls.refresh_labels()
        self.controls.w_sigma_abs.object = self.controls.sigma_text(s)
        with self._batched():  # a dragged slider's spectrum follows the handle: it is not faded meanwhile
            self._mark_stale(FIGURES if full else self.stale | (set(FIGURES) - {"spectrum"}))
        with self._lock:
            start = not self.running
            self.running = True
        if start:
            self.spinner.value = True
            self.measure_pool.submit(self._work)

    def _run_progress(self, generation: int):
        """progress() for one run: cancel it when it is overtaken or the user asks, and
        show how far a long run has got."""
        t0 = time.perf_counter()
        shown = [0.0]

        def progress(stage, step, total):
            now = time.perf_counter() - t0
            if self.cancelled == generation or (generation != self.generation and now > OVERTAKEN_AFTER_S):
                return False
            if now > PROGRESS_AFTER_S and now - shown[0] > PROGRESS_EVERY_S:
                shown[0] = now
                self._call_soon(self._show_progress, generation, stage, step, total, now)
            return True

        return progress

    def _show_progress(self, generation: int, stage: str, step: int, total: int, elapsed: float):
        if generation != self.generation or not self.running:
            return
        done = step / max(total, 1)
        # the reference (when computed) and the test run cost about the same per step
        fraction = done / 2 if stage == "reference" else (0.5 + done / 2 if self._reference_was_run else done)
        if stage == "reference":
            self._reference_was_run = True
        left = elapsed * (1 - fraction) / max(fraction, 1e-3)
        with self._batched():
            self.progress.value = int(100 * fraction)
            self.progress_text.object = (f"{'reference' if stage == 'reference' else 'test'} run: step {step} "
                                         f"of {total}, {elapsed:.0f} s so far, about {left:.0f} s left")
            for widget in (self.progress, self.progress_text, self.w_cancel):
                widget.visible = True

    def _hide_progress(self):
        for widget in (self.progress, self.progress_text, self.w_cancel):
            if widget.visible:
                widget.visible = False

    def _work(self):
        """Worker thread: measure the newest setting until no newer one is waiting."""
        while True:
            with self._lock:
                generation, full = self.generation, self.want_full
            self._reference_was_run = False
            cancelled = False
            try:
                s = self.scenario_from_controls()
                result = measure(s, parts=PAGE_PARTS if full else DRAG_PARTS,
                                 progress=self._run_progress(generation))
            except RunCancelled:
                result, cancelled = None, self.cancelled == generation
            except ScenarioError as exc:
                self._call_soon(self._show_error, str(exc), exc.field)
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
                    self._call_soon(self._run_ended, cancelled)
                return
            # newer parameters arrived while this ran: run those instead

    def _run_ended(self, cancelled: bool):
        with self._batched():
            self.spinner.value = False
            self._hide_progress()
            if cancelled:
                self.message.object = ("Run cancelled — the figures below are from the last finished setting "
                                       "(faded where the controls have moved on).")
                self.message.visible = True

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
        self._hide_progress()
        self.late = None
        self.longer = None
        self.complete = full
        self._show_headline()
        if full:
            self.confirm3d.scenario_changed()
            self._start_late_check(s, generation)
            self._call_soon(self._show_figures, generation, delay_ms=HEADLINE_LEAD_MS)
        else:
            self.figures.show(result, self.pinned, keys=("spectrum",))
            self._mark_stale(self.stale - {"spectrum"})
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
        self._mark_stale(())

    def _start_late_check(self, s: Scenario, generation: int):
        """The 20,000-step stability run, then the same setting run twice as long, in
        their own worker; both are cancelled by the next change."""
        def still_wanted(*_):
            return generation == self.generation

        def rested(seconds: float) -> bool:
            """Wait while the setting stays; False as soon as a newer one arrives (its check is queued)."""
            end = time.monotonic() + seconds
            while still_wanted() and time.monotonic() < end:
                time.sleep(0.05)
            return still_wanted()

        def work():
            if not rested(LATE_CHECK_REST_S):  # the controls must rest first
                return
            while not backend.compiled() and still_wanted():  # 20,000 steps want the compiled engine
                time.sleep(0.25)
            if not still_wanted():
                return
            try:
                late = late_time_check(s, progress=still_wanted)
                self._call_soon(self._deliver_late, late, generation)
                if late.status != "diverged" and rested(LENGTHEN_REST_S):
                    worst = self.result.worst_peak_db if self.result is not None else float("nan")
                    longer = lengthened(s, worst, progress=still_wanted, budget=VISITOR_BUDGET)
                    self._call_soon(self._deliver_longer, longer, generation)
            except RunCancelled:
                return
            except ScenarioError as exc:  # the longer run would not fit the page's budget
                self._call_soon(self._deliver_longer, str(exc), generation)
            except Exception as exc:
                self._call_soon(setattr, self.status, "object", f"late-time check failed: {exc}")

        self.late_pool.submit(work)

    def _deliver_late(self, late, generation: int):
        if generation == self.generation:
            self.late = late
            self._show_headline()

    def _deliver_longer(self, longer, generation: int):
        if generation == self.generation:
            self.longer = longer
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

    def _late_note(self) -> tuple[str, str]:
        if not self.complete:
            return "…", "after the slider is released"
        if not backend.compiled():
            return "waiting…", "starts once the engine is compiled"
        return "checking…", "20,000 steps in the background"

    def _show_headline(self):
        m = self.result
        if m is None:
            self.headline.object = waiting_html("computing")
            return
        try:
            budget = self.controls.budget_db()
        except ScenarioError:
            budget = float("nan")
        longer = self.longer if not isinstance(self.longer, str) else None
        longer_note = (self.longer if isinstance(self.longer, str) else
                       f"the same setting at {2 * m.scenario.steps} steps runs once the controls rest")
        state = HeadlineState(
            m=m, verdict=judge(m.worst_peak_db, m.worst_probe, budget, self.late), complete=self.complete,
            late=self.late, late_note=self._late_note(), pinned=self.pinned, record=record_length(m.scenario),
            longer=longer, longer_note=longer_note, present=bool(self.w_present.value))
        self.headline.object = headline_html(state)
        self.status.object = status_text(m)

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
        return io.StringIO(report_html(self.result, self.late))

    def view(self):
        return self.root

    def close(self):
        """The session has ended: stop every worker."""
        with self._lock:
            self.generation += 1  # a run or late-time check still going sees it and stops
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
