"""A standalone HTML report of one measurement: parameters, scores, figures
and the caution, with Bokeh's scripts inlined so it opens anywhere offline."""

from __future__ import annotations

import html
import io

import panel as pn
from bokeh.resources import INLINE

from quietlayer.engine.layer import resolved_sigma_max, side_cell

from . import CAUTION
from .figures import LiveFigures, best_frame, finite_or_dash
from .units import format_frequency, format_length


def _parameters(m) -> str:
    s = m.scenario
    rows = [("scenario", s.title or "custom"), ("cell size", f"{format_length(s.dx)} x {format_length(s.dy)}"),
            ("interior", f"{s.nx} x {s.ny} cells"), ("run", f"{s.steps} steps, dt = {s.dt:.4g} s"),
            ("Courant number", f"{s.courant:g} x the 2D limit"), ("host", f"eps_r {s.eps_r:g}, sigma {s.sigma:g} S/m"),
            ("polarization, precision", f"{s.polarization}, {s.precision}"),
            ("band", f"{format_frequency(s.source.f_min)} .. {format_frequency(s.source.f_max)} ({s.source.waveform})"),
            ("cells per wavelength at f_max", f"{s.cells_per_wavelength:.1f}")]
    for name in ("left", "right", "bottom", "top"):
        side = getattr(s.boundary, name)
        if side.kind != "cpml":
            rows.append((f"{name} side", side.kind))
            continue
        smax = resolved_sigma_max(side, side_cell(s, name), s.eps_r)
        grading = ("profile from file" if side.profile is not None else
                   f"m = {side.order:g}, sigma_max = {smax:.4g} S/m, kappa_max = {side.kappa_max:g}, "
                   f"alpha_max = {side.alpha_max:g} S/m (order {side.alpha_order:g})")
        rows.append((f"{name} side", f"CPML, {side.cells} cells, {grading}"))
    return "| | |\n|---|---|\n" + "\n".join(f"| {html.escape(a)} | {html.escape(b)} |" for a, b in rows)


def _scores(m, late) -> str:
    lines = ["| probe | peak error (dB) | incidence (deg) |", "|---|---|---|"]
    for name, value in m.peak_db.items():
        angle = m.probe_angles.get(name)
        lines.append(f"| {html.escape(name)} | {finite_or_dash(value)} | "
                     f"{'' if angle is None else f'{angle:.0f}'} |")
    lines.append(f"\n**Worst peak error {finite_or_dash(m.worst_peak_db)} dB** (probe {html.escape(m.worst_probe)}); "
                 f"global error {finite_or_dash(m.global_db)} dB.")
    if late is not None:
        lines.append(f"\nLate-time check over {late.steps} steps: **{late.status}**, {html.escape(late.message)}.")
    return "\n".join(lines)


def report_html(m, late=None) -> str:
    """The report as one HTML document (text)."""
    if m is None:
        raise ValueError("nothing measured yet")
    live = LiveFigures()
    live.show(m, None, best_frame(m))
    fig = live.figures
    for key in ("spectrum", "angle", "error"):
        fig[key].title.text = fig[key].title.text.replace(", dotted: A)", ")").replace(" (dotted: A)", "")
    fixed = dict(sizing_mode="fixed")
    body = pn.Column(
        pn.pane.Markdown(f"# Quietlayer report — {html.escape(m.scenario.title or 'custom scenario')}"),
        pn.pane.Markdown(f"> **Caution.** {CAUTION}"),
        pn.pane.Markdown("## Parameters\n" + _parameters(m)),
        pn.pane.Markdown("## Scores\n" + _scores(m, late)),
        pn.pane.Markdown("## Figures"),
        pn.Row(pn.pane.Bokeh(fig["total"], **fixed), pn.pane.Bokeh(fig["reflected"], **fixed)),
        *(pn.pane.Bokeh(fig[key], width=900) for key in ("spectrum", "angle", "error")),
        pn.Row(*(pn.pane.Bokeh(fig[f"profile{k}"], width=300) for k in range(3)), width=940),
        pn.pane.Markdown(f"*{CAUTION}*"),
        width=1000,
    )
    buffer = io.StringIO()
    body.save(buffer, resources=INLINE, title="Quietlayer report")
    return buffer.getvalue()
