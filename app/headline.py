"""The headline above the figures: the verdict, the scores, what the run is, and its warnings.

Only formatting: every number comes from the engine (measure, verdict, run_checks).
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass

from quietlayer.engine.measure import LateTime, Measurement
from quietlayer.engine.run_checks import MIN_PERIODS, Lengthened, RecordLength
from quietlayer.engine.verdict import Verdict

from .figures import finite_or_dash
from .units import format_frequency, format_length

STYLE = """
:host { --ql-accent: #0072B2; }
.ql-card { border: 1px solid #d0d7de; border-radius: 6px; padding: 6px 10px; flex: 1 1 118px; min-width: 118px;
           max-width: 240px; background: #fafbfc; box-sizing: border-box; height: 88px; overflow: hidden; }
/* a fixed height: a headline that grew or shrank would move every figure below it, and the browser
   would lay them all out and draw them again; a long note is cut at two lines (hover shows it all) */
.ql-card .ql-sub { display: -webkit-box; -webkit-line-clamp: 2; -webkit-box-orient: vertical; overflow: hidden; }
.ql-card .ql-label { font-size: 0.8em; color: #444; }
.ql-card .ql-value { font-size: 1.45em; font-weight: 600; color: #111; }
.ql-card .ql-sub { font-size: 0.75em; color: #555; }
.ql-card.ql-pass { border-color: #1a7f37; background: #eefbf1; }
.ql-card.ql-pass .ql-value { color: #1a7f37; }
.ql-card.ql-fail { border-color: #d1242f; background: #fff0f0; }
.ql-card.ql-fail .ql-value { color: #b3141d; }
.ql-present .ql-card .ql-value { font-size: 2.0em; }
.ql-present .ql-card { min-width: 172px; max-width: 320px; height: 132px; }
.ql-present .ql-card .ql-label, .ql-present .ql-card .ql-sub { font-size: 1.1em; }
.ql-warnings.ql-present, .ql-present .ql-run-note { font-size: 1.3em; }
.ql-warnings { margin: 6px 0 0 0; padding: 4px 10px; border-left: 4px solid #E69F00; background: #fff8e6;
               font-size: 0.9em; color: #4a3200; }
.ql-warnings li { margin: 2px 0; }
.ql-caution { font-size: 0.85em; color: #5a3b00; background: #fff6e0; border-left: 4px solid #E69F00; padding: 4px 8px; }
.ql-present .ql-caution { font-size: 1.3em; }
"""


def card(label: str, value: str, sub: str, key: str, tone: str = "") -> str:
    extra = f" ql-{tone}" if tone else ""
    return (f'<div class="ql-card{extra}" data-key="{key}"><div class="ql-label">{label}</div>'
            f'<div class="ql-value" data-value="{key}">{value}</div><div class="ql-sub" title="{sub}">{sub}</div></div>')


def waiting_html(sub: str) -> str:
    return card("worst peak error", "…" if sub == "computing" else "–", sub, "worst")


@dataclass
class HeadlineState:
    """What the headline shows, gathered by the page."""

    m: Measurement
    verdict: Verdict
    complete: bool  # every figure of this setting measured (not a mid-drag result)
    late: LateTime | None
    late_note: tuple[str, str]  # (value, sub) while the late-time check is not in
    pinned: Measurement | None
    record: RecordLength | None
    longer: Lengthened | None
    longer_note: str  # what the lengthened run is doing while it is not in
    present: bool


def verdict_card(v: Verdict) -> str:
    if v.passed is False:
        if math.isfinite(v.margin_db) and v.margin_db < 0:
            sub = f"{-v.margin_db:.1f} dB above the {v.budget_db:g} dB budget"  # two lines at most (see STYLE)
        else:
            sub = v.reasons[0] if v.reasons else "see the late-time check"
        return card("verdict", "FAIL", html.escape(sub), "verdict", "fail")
    if v.passed is None:
        return card("verdict", "pass so far", f"{v.margin_db:.1f} dB below {v.budget_db:g} dB; late-time check next",
                    "verdict")
    return card("verdict", "PASS", f"{v.margin_db:.1f} dB below the {v.budget_db:g} dB budget", "verdict", "pass")


def difference_card(m: Measurement, pinned: Measurement) -> str:
    delta = m.worst_peak_db - pinned.worst_peak_db
    if abs(delta) < 0.05:
        word = "the same"
    else:
        word = f"{abs(delta):.1f} dB {'better' if delta < 0 else 'worse'}"
    return card("difference to A", word, f"A: {pinned.worst_peak_db:.1f} dB, now {m.worst_peak_db:.1f} dB", "delta")


def band_worst(m: Measurement) -> tuple[float, str]:
    finite = {k: v for k, v in m.band_worst_db.items() if math.isfinite(v)}
    if not finite:
        return math.nan, ""
    name = max(finite, key=finite.get)
    return finite[name], name


def headline_html(h: HeadlineState) -> str:
    m, s = h.m, h.m.scenario
    if h.late is None:
        late_value, late_sub = h.late_note
    else:
        late_value = h.late.status
        late_sub = (f"{h.late.growth_db_per_1000:+.1f} dB / 1000 steps" if h.late.status != "diverged"
                    else html.escape(h.late.message))
    band_db, band_probe = band_worst(m)
    cards = [
        verdict_card(h.verdict),
        card("worst peak error", f"{finite_or_dash(m.worst_peak_db)} dB", f"at probe “{html.escape(m.worst_probe)}”",
             "worst"),
        card("band worst", f"{finite_or_dash(band_db)} dB",
             f"largest in-band reflection, “{html.escape(band_probe)}”" if band_probe else "no probe's band measurable",
             "band"),
        card("global error", f"{finite_or_dash(m.global_db)} dB", "interior, whole run", "global")
        if h.complete else card("global error", "…", "when the slider is released", "global"),
        card("late-time check", late_value, late_sub, "late"),
        card("run time", f"{(m.test_s + m.reference_s) * 1e3:.0f} ms",
             ("NumPy loops: first start" if m.engine != "compiled" else
              "reference cached" if m.reference_cached else "reference computed"), "runtime"),
        card("cells per wavelength", f"{s.cells_per_wavelength:.1f}",
             f"at {format_frequency(s.source.f_max)} in the densest material (eps_r {s.max_eps_r:g})",
             "cpw"),
    ]
    if h.pinned is not None and math.isfinite(h.pinned.worst_peak_db) and math.isfinite(m.worst_peak_db):
        cards.append(difference_card(m, h.pinned))
    present = " ql-present" if h.present else ""  # the cards live in their own shadow root
    return (f'<div class="ql-cards{present}" style="display:flex;gap:8px;flex-wrap:wrap">' + "".join(cards)
            + "</div>" + warnings_html(h, present))


def warnings_html(h: HeadlineState, present: str) -> str:
    items = []
    r, s = h.record, h.m.scenario
    if r is not None and r.short:
        items.append(f"<b>Short run for f_min:</b> probe “{html.escape(r.probe)}” records {r.periods:.1f} periods of "
                     f"f_min = {format_frequency(s.source.f_min)} after the pulse reaches it ({MIN_PERIODS:g} wanted, "
                     f"common practice): the low end of its spectrum is not resolved. About {r.steps_needed} steps "
                     "would record enough.")
    if h.longer is not None and h.longer.changed:
        items.append(f"<b>Changes when lengthened:</b> run {h.longer.steps} steps long, the worst peak error is "
                     f"{finite_or_dash(h.longer.worst_peak_db)} dB ({h.longer.change_db:+.1f} dB): the run ends "
                     "before the layer's echo is over; lengthen it.")
    if h.longer is not None and not h.longer.changed:
        note = f"lengthened to {h.longer.steps} steps the worst peak error moves {h.longer.change_db:+.1f} dB"
    else:
        note = h.longer_note if h.longer is None else ""
    # the note line is always there: a headline whose height changed would move every figure below it,
    # and the browser would lay them all out and draw them again
    tail = f'<div class="ql-run-note" style="font-size:0.85em;color:#555">{note or "&nbsp;"}</div>'
    if not items:
        return f'<div class="{present.strip()}">{tail}</div>'
    body = "".join(f"<li>{item}</li>" for item in items)
    return (f'<div class="ql-warnings{present}" data-key="warnings"><ul style="margin:0;padding-left:18px">{body}'
            f'</ul>{tail}</div>')


def status_text(m: Measurement) -> str:
    """One line of what the run is: grid, cells, time step, length, polarization, precision."""
    s = m.scenario
    cells = (f"dx = dy = {format_length(s.dx)}" if s.dx == s.dy else
             f"dx = {format_length(s.dx)}, dy = {format_length(s.dy)} (non-square cells)")
    return (f"{s.title or 'custom scenario'} · {s.nx} × {s.ny} interior cells · {cells} · "
            f"dt = {s.dt * 1e12:.4g} ps (Courant {s.courant:g} of the 2D limit) · {s.steps} steps = "
            f"{s.steps * s.dt * 1e9:.3g} ns · {s.polarization} · {s.precision}")
