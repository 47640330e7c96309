"""A standalone HTML report of one measurement: parameters, scores, figures
and the caution.  Plain HTML around the page's Bokeh figures, with Bokeh's
scripts and styles inlined (only the bundles the figures need): the file
fetches nothing, so it opens anywhere offline."""

from __future__ import annotations

import html

from bokeh.core.templates import CSS_RESOURCES
from bokeh.embed import components
from bokeh.embed.bundle import bundle_for_objs_and_resources
from bokeh.resources import INLINE

from quietlayer.engine.layer import resolved_sigma_max, side_cell

from . import CAUTION
from .figures import LiveFigures, best_frame, finite_or_dash
from .units import format_frequency, format_length

STYLE = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: #1f2328;
       max-width: 1000px; margin: 24px auto; padding: 0 16px; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: 0.3em; }
h2 { font-size: 1.25em; border-bottom: 1px solid #d0d7de; padding-bottom: 0.2em; margin-top: 1.6em; }
table { border-collapse: collapse; margin: 0.5em 0; }
th, td { border: 1px solid #d0d7de; padding: 4px 10px; text-align: left; vertical-align: top; }
th { background: #f6f8fa; }
td.number { text-align: right; font-variant-numeric: tabular-nums; }
blockquote { margin: 0.8em 0; padding: 0.4em 1em; border-left: 4px solid #bf8700; background: #fff8c5; }
.figure-row { display: flex; flex-wrap: wrap; gap: 12px; margin: 8px 0; }
.curve { width: 900px; margin: 8px 0; }
.profile { width: 300px; }
"""


def _table(header: tuple[str, ...] | None, rows, numeric: tuple[int, ...] = ()) -> str:
    out = ["<table>"]
    if header:
        out.append("<tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in header) + "</tr>")
    for row in rows:
        cells = "".join(f'<td class="number">{html.escape(c)}</td>' if k in numeric else f"<td>{html.escape(c)}</td>"
                        for k, c in enumerate(row))
        out.append(f"<tr>{cells}</tr>")
    out.append("</table>")
    return "\n".join(out)


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
    return _table(None, rows)


def _scores(m, late) -> str:
    rows = []
    for name, value in m.peak_db.items():
        angle = m.probe_angles.get(name)
        rows.append((name, finite_or_dash(value), "" if angle is None else f"{angle:.0f}"))
    parts = [_table(("probe", "peak error (dB)", "incidence (deg)"), rows, numeric=(1, 2)),
             f'<p id="headline"><strong>Worst peak error {finite_or_dash(m.worst_peak_db)} dB</strong> '
             f"(probe {html.escape(m.worst_probe)}); global error {finite_or_dash(m.global_db)} dB.</p>"]
    if late is not None:
        parts.append(f"<p>Late-time check over {late.steps} steps: <strong>{html.escape(late.status)}</strong>, "
                     f"{html.escape(late.message)}.</p>")
    return "\n".join(parts)


def report_html(m, late=None) -> str:
    """The report as one HTML document (text) that loads nothing from elsewhere."""
    if m is None:
        raise ValueError("nothing measured yet")
    live = LiveFigures()
    live.show(m, None, best_frame(m))
    fig = live.figures
    shown = {"total": fig["total"], "reflected": fig["reflected"], "spectrum": fig["spectrum"],
             "angle": fig["angle"], "error": fig["error"], **{f"profile{k}": fig[f"profile{k}"] for k in range(3)}}
    script, divs = components(shown)
    bundle = bundle_for_objs_and_resources(list(shown.values()), INLINE)
    # only the inlined code: a script by address (Panel, once imported, adds one to every bundle) would be fetched
    resources = bundle.scripts(tag=True) + CSS_RESOURCES.render(css_raw=bundle.css_raw, css_files=[])
    title = html.escape(m.scenario.title or "custom scenario")
    curves = "\n".join(f'<div class="curve">{divs[key]}</div>' for key in ("spectrum", "angle", "error"))
    profiles = "".join(f'<div class="profile">{divs[f"profile{k}"]}</div>' for k in range(3))
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>Quietlayer report: {title}</title>
<style>{STYLE}</style>
{resources}
</head>
<body>
<h1>Quietlayer report: {title}</h1>
<blockquote><strong>Caution.</strong> {html.escape(CAUTION)}</blockquote>
<h2>Parameters</h2>
{_parameters(m)}
<h2>Scores</h2>
{_scores(m, late)}
<h2>Figures</h2>
<div class="figure-row">{divs["total"]}{divs["reflected"]}</div>
{curves}
<div class="figure-row">{profiles}</div>
<p><em>{html.escape(CAUTION)}</em></p>
{script}
</body>
</html>
"""
