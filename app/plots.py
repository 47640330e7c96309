"""HoloViews figures of a Measurement (presentation only: the numbers come
from the engine)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import holoviews as hv
import numpy as np
from holoviews.operation import contours

from quietlayer.engine import ScenarioError
from quietlayer.engine.layer import layer_tables
from quietlayer.engine.measure import Measurement, to_db
from quietlayer.engine.sweep import SCORES, SweepTable

from .units import frequency_unit, length_unit, time_unit

# Okabe & Ito's colour-blind-safe palette
PALETTE = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000"]
PINNED = "#888888"
FIELD_FLOOR_DB = -80.0
REFLECTED_FLOOR_DB = -140.0
GROUPS = (("normal", 0.0), ("oblique", 45.0), ("grazing", 80.0))


GROUP_LABELS = ("normal", "oblique", "grazing", "corner")


def probe_groups(m: Measurement) -> list[tuple[str, str | None]]:
    """(group, probe name or None) for the probes nearest 0, 45 and 80 degrees and the corner:
    always four entries, so the figures keep one layer structure."""
    picks, used = [], set()
    angles = {k: v for k, v in m.probe_angles.items() if k != "corner"}
    for label, target in GROUPS:
        name = min(angles, key=lambda k: abs(angles[k] - target)) if angles else None
        if name in used:
            name = None
        used.add(name)
        picks.append((label, name))
    picks.append(("corner", "corner" if "corner" in m.peak_db else None))
    return picks


def units_of(m: Measurement) -> tuple:
    """The display units a figure of `m` uses; a change forces a rebuild."""
    s = m.scenario
    extent = max(s.total_cells_x * s.dx, s.total_cells_y * s.dy)
    angles = tuple(round(m.probe_angles.get(name, -1.0)) for _, name in probe_groups(m) if name)
    return frequency_unit(s.source.f_max)[1], time_unit(m.times[-1])[1], length_unit(extent)[1], angles


def _opts(element, **kw):
    base = dict(responsive=True, height=270, show_grid=True, tools=["hover"], toolbar="above")
    base.update(kw)
    return element.opts(**base)


def field_image(m: Measurement | None, frame: int, reflected: bool, fontscale: float = 1.0):
    """Total field over the whole grid, or the reflected field over the interior,
    as dB of |field| relative to the largest reference field of the run."""
    if m is None or m.total_frames is None or m.frame_steps.size == 0:
        return _image_opts(hv.Image(np.full((2, 2), np.nan), bounds=(0, 0, 1, 1)), reflected, fontscale, "mm", 1.0)
    s = m.scenario
    k = int(np.clip(frame, 0, m.frame_steps.size - 1))
    ox, oy = s.offset
    grid_x = m.total_frames.shape[1] - 1
    grid_y = m.total_frames.shape[2] - 1
    scale, unit = length_unit(max(grid_x * s.dx, grid_y * s.dy))
    peak = float(np.abs(m.total_frames[:, ox:ox + s.nx + 1, oy:oy + s.ny + 1]).max()) or 1.0
    if reflected:
        data = to_db(m.reflected_frames[k] / peak, REFLECTED_FLOOR_DB)
        x0, y0 = 0.0, 0.0
    else:
        data = to_db(m.total_frames[k] / peak, FIELD_FLOOR_DB)
        x0, y0 = -ox * s.dx, -oy * s.dy
    nx, ny = data.shape
    # nodes are cell-centred pixels: half a cell of margin on each side
    bounds = ((x0 - 0.5 * s.dx) / scale, (y0 - 0.5 * s.dy) / scale,
              (x0 + (nx - 0.5) * s.dx) / scale, (y0 + (ny - 0.5) * s.dy) / scale)
    image = hv.Image(np.flipud(data.T), bounds=bounds, kdims=[f"x ({unit})", f"y ({unit})"],
                     vdims=["dB"])
    aspect = (bounds[2] - bounds[0]) / (bounds[3] - bounds[1])
    interior = hv.Bounds((-0.5 * s.dx / scale, -0.5 * s.dy / scale,
                          (s.nx + 0.5) * s.dx / scale, (s.ny + 0.5) * s.dy / scale)).opts(
        color="white" if not reflected else "#cccccc", line_width=1.5, line_dash="dashed")
    probes = hv.Points([(p.x * s.dx / scale, p.y * s.dy / scale, p.name) for p in s.probes],
                       kdims=[f"x ({unit})", f"y ({unit})"], vdims=["probe"]).opts(
        color="#E69F00", size=6, marker="circle", line_color="black", tools=["hover"])
    src = hv.Points([(s.source.x * s.dx / scale, s.source.y * s.dy / scale)],
                    kdims=[f"x ({unit})", f"y ({unit})"]).opts(color="#D55E00", size=9, marker="star")
    title = (f"reflected only, step {m.frame_steps[k]}" if reflected
             else f"total field, step {m.frame_steps[k]}")
    return (_image_opts(image, reflected, fontscale, unit, aspect) * interior * probes * src).opts(title=title)


def _image_opts(image, reflected: bool, fontscale: float, unit: str, aspect: float):
    """Fixed frame sizes with the grid's true aspect: the plot then measures
    exactly what it draws (no clipping of the colour bar or the layer)."""
    floor = REFLECTED_FLOOR_DB if reflected else FIELD_FLOOR_DB
    height = int(340 * min(fontscale, 1.3))
    width = int(np.clip(height * aspect, 120, 460))
    height = int(np.clip(width / aspect, 120, 560)) if aspect > 0 else height
    return image.opts(cmap="viridis" if reflected else "cividis", clim=(floor, 0), colorbar=True,
                      frame_height=height, frame_width=width, framewise=True,
                      fontscale=fontscale, clabel="dB re. peak incident", tools=["hover"], toolbar="above")


def _curve(x, y, kdim, vdim, label, color, dash="solid", width=2.0):
    return hv.Curve((x, y), kdims=[kdim], vdims=[vdim], label=label).opts(
        color=color, line_dash=dash, line_width=width)


def _group_label(m: Measurement, label: str, name: str | None) -> str:
    if name is not None and name in m.probe_angles and label != "corner":
        return f"{label} ({m.probe_angles[name]:.0f}°)"
    return label


def spectrum_plot(m: Measurement, pinned: Measurement | None, fontscale: float = 1.0):
    """Reflection spectra of the probe groups (solid), theory (dashed), A (dotted)."""
    scale, unit = frequency_unit(m.scenario.source.f_max)
    kdim, vdim = f"frequency ({unit})", "reflection (dB)"
    layers = []
    for k, (label, name) in enumerate(probe_groups(m)):
        have = name is not None and name in m.spectra
        f = m.freqs / scale if have else []
        layers.append(_curve(f, to_db(m.spectra[name]) if have else [], kdim, vdim,
                             _group_label(m, label, name), PALETTE[k]))
        theory = m.theory_spectra.get(name) if have else None
        layers.append(_curve(f if theory is not None else [], to_db(theory) if theory is not None else [],
                             kdim, vdim, "", PALETTE[k], "dashed", 1.2))
        a_have = pinned is not None and pinned.freqs is not None and name in pinned.spectra
        layers.append(_curve(pinned.freqs / scale if a_have else [], to_db(pinned.spectra[name]) if a_have else [],
                             kdim, vdim, "", PALETTE[k], "dotted", 1.5).opts(alpha=0.6))
    return _opts(hv.Overlay(layers), title="reflection spectrum (dashed: theory, dotted: A)",
                 legend_position="right", fontscale=fontscale, framewise=True)


def error_plot(m: Measurement, pinned: Measurement | None, fontscale: float = 1.0):
    """Error versus time at the probe groups, dB of the probe's reference peak; A dotted."""
    scale, unit = time_unit(m.times[-1])
    kdim, vdim = f"time ({unit})", "error (dB)"
    layers = []
    for k, (label, name) in enumerate(probe_groups(m)):
        have = name is not None and name in m.error_db
        layers.append(_curve(m.times / scale if have else [], m.error_db[name] if have else [],
                             kdim, vdim, _group_label(m, label, name), PALETTE[k]))
        a_have = pinned is not None and name in pinned.error_db
        layers.append(_curve(pinned.times / scale if a_have else [], pinned.error_db[name] if a_have else [],
                             kdim, vdim, "", PALETTE[k], "dotted", 1.5).opts(alpha=0.6))
    return _opts(hv.Overlay(layers), title="error versus time (dotted: A)",
                 legend_position="right", fontscale=fontscale, ylim=(-160, 5), framewise=True)


def angle_plot(m: Measurement, pinned: Measurement | None, fontscale: float = 1.0):
    """Band-averaged reflection versus incidence angle: measured, plane-wave theory, A."""
    kdim, vdim = "incidence angle (deg)", "reflection (dB)"
    a = m.angles
    b = pinned.angles if pinned is not None else None
    layers = [_curve(a.angles_deg, a.measured_db, kdim, vdim, "measured", PALETTE[0]),
              hv.Scatter((a.angles_deg, a.measured_db), kdims=[kdim], vdims=[vdim]).opts(color=PALETTE[0], size=6),
              _curve(a.angles_deg, a.theory_db, kdim, vdim, "theory (plane wave)", PALETTE[1], "dashed"),
              _curve(b.angles_deg if b is not None else [], b.measured_db if b is not None else [],
                     kdim, vdim, "", PINNED, "dotted")]
    return _opts(hv.Overlay(layers), title="reflection versus incidence angle (dotted: A)", xlim=(0, 90),
                 legend_position="top_left", fontscale=fontscale, framewise=True)


def profile_plots(m: Measurement | None, fontscale: float = 1.0):
    """sigma and alpha, kappa, b and c against depth for one CPML side: the
    first with a profile of the user's own, else the first."""
    tables = layer_tables(m.scenario) if m is not None else {}
    own = [name for name in tables if getattr(m.scenario.boundary, name).profile is not None]
    side = (own or list(tables) or [None])[0]
    t = tables.get(side)
    unit_scale, unit = length_unit(t.node_depth[-1]) if t is not None else (1e-3, "mm")
    kd = f"depth ({unit})"

    def xs(kind):
        return getattr(t, f"{kind}_depth") / unit_scale if t is not None else []

    def ys(kind, name):
        return getattr(t, f"{kind}_{name}") if t is not None else []

    loss = hv.Overlay([
        _curve(xs("node"), ys("node", "sigma"), kd, "S/m", "sigma", PALETTE[0]),
        _curve(xs("node"), ys("node", "alpha"), kd, "S/m", "alpha", PALETTE[1], "dashed"),
    ])
    kappa = hv.Overlay([_curve(xs("node"), ys("node", "kappa"), kd, "kappa", "kappa", PALETTE[2])])
    conv = hv.Overlay([
        _curve(xs("node"), ys("node", "b"), kd, "b, c", "b", PALETTE[3]),
        _curve(xs("node"), ys("node", "c"), kd, "b, c", "c", PALETTE[4], "dashed"),
    ])
    style = dict(responsive=True, height=230, show_grid=True, tools=["hover"], fontscale=fontscale,
                 legend_position="top_left", toolbar=None, framewise=True)
    return (loss.opts(title=f"{side or ''} layer: sigma and alpha (S/m)", **style),
            kappa.opts(title=f"{side or ''} layer: kappa", **style),
            conv.opts(title=f"{side or ''} layer: psi coefficients b and c", **style))


def report_figures(m: Measurement) -> list:
    """Static figures for the standalone report."""
    frame = int(np.argmax([np.abs(f).max() for f in m.reflected_frames])) if m.reflected_frames is not None else 0
    curves = [_without_empty_layers(f) for f in (spectrum_plot(m, None), error_plot(m, None), angle_plot(m, None))]
    figures = [field_image(m, frame, False), field_image(m, frame, True)] + curves
    return figures + list(profile_plots(m))


def _without_empty_layers(overlay):
    """A report has no pinned setting and no live updates: drop the empty
    layers (and their legend entries) the page keeps for its fixed structure."""
    options = dict(overlay.opts.get("plot").kwargs)
    options["title"] = options.get("title", "").replace(", dotted: A)", ")").replace(" (dotted: A)", "")
    return hv.Overlay([layer for layer in overlay if len(layer)]).opts(**options)


def finite_or_dash(value: float, fmt: str = "{:.1f}") -> str:
    return fmt.format(value) if value is not None and math.isfinite(value) else "–"


# --- sweep map ------------------------------------------------------------------

SWEEP_SCORE_LABELS = {"worst_peak_db": "worst peak error (dB)", "global_db": "global error (dB)",
                      "worst_band_db": "worst in-band reflection (dB)"}
# cells without a score: a colour per reason, none of them on the viridis scale
UNSCORED_COLORS = {"invalid": "#BBBBBB", "diverged": "#CC79A7", "failed": "#D55E00", "no value": "#DDDDDD",
                   "pending": "#FFFFFF"}


@dataclass(frozen=True)
class SweepGrid:
    """A two-parameter sweep table arranged for a map: z[j, i] is the score at
    x_values[i], y_values[j] (values ascending, as swept); nan where no point
    was measured 'ok'; status 'pending' where a point has not come back yet."""

    x_name: str
    y_name: str
    score: str
    x_values: np.ndarray
    y_values: np.ndarray
    z: np.ndarray
    status: np.ndarray
    reason: np.ndarray
    index: np.ndarray  # point index, -1 where the table has no point
    best: tuple[int, int] | None  # (i, j) of the table's best point

    def cell_of(self, index: int) -> tuple[int, int] | None:
        found = np.argwhere(self.index == index)
        return (int(found[0][1]), int(found[0][0])) if found.size else None


def sweep_grid(table: SweepTable, x_name: str, y_name: str, score: str) -> SweepGrid:
    """Arrange a sweep table over two parameters into 2D arrays."""
    for label, name in (("x parameter", x_name), ("y parameter", y_name)):
        if not all(name in p for p in table.points):
            raise ScenarioError(label, name, "a parameter varied in the sweep: " + ", ".join(table.parameters))
    if x_name == y_name:
        raise ScenarioError("y parameter", y_name, f"a parameter other than the x parameter ({x_name})")
    if score not in SCORES:
        raise ScenarioError("score", score, "one of " + ", ".join(SCORES))
    xs = np.array(sorted({float(p[x_name]) for p in table.points}), float)
    ys = np.array(sorted({float(p[y_name]) for p in table.points}), float)
    col = {v: i for i, v in enumerate(xs)}
    row = {v: j for j, v in enumerate(ys)}
    shape = (ys.size, xs.size)
    z = np.full(shape, np.nan)
    status = np.full(shape, "pending", dtype=object)
    reason = np.full(shape, "", dtype=object)
    index = np.full(shape, -1, dtype=int)
    for k, p in enumerate(table.points):
        i, j = col[float(p[x_name])], row[float(p[y_name])]
        index[j, i] = k
        r = table.rows.get(k)
        if r is None:
            continue
        value = r.get(score, math.nan)
        if r["status"] == "ok" and value is not None and math.isfinite(value):
            z[j, i], status[j, i] = value, "ok"
        else:
            status[j, i] = r["status"] if r["status"] != "ok" else "no value"
            reason[j, i] = r["reason"] or ("the run gave no value for this score" if r["status"] == "ok" else "")
    best = table.best(score)
    return SweepGrid(x_name, y_name, score, xs, ys, z, status, reason, index,
                     None if best is None else
                     (col[float(best[1]["point"][x_name])], row[float(best[1]["point"][y_name])]))


def axis_unit(name: str, values) -> tuple[float, str]:
    """Display scale and unit of a swept parameter (lengths and frequencies get a prefix)."""
    key = name.split(".")[-1]
    largest = float(np.max(np.abs(values))) if len(values) else 0.0
    if key in ("cell", "dx", "dy"):
        return length_unit(largest)
    if key in ("f_min", "f_max"):
        return frequency_unit(largest)
    return 1.0, ""


def nearest_cell(grid: SweepGrid, x: float, y: float) -> tuple[int, int]:
    """(i, j) of the grid point nearest a click at display coordinates (x, y)."""
    sx, _ = axis_unit(grid.x_name, grid.x_values)
    sy, _ = axis_unit(grid.y_name, grid.y_values)
    return int(np.argmin(np.abs(grid.x_values / sx - x))), int(np.argmin(np.abs(grid.y_values / sy - y)))


def _edges(centres: np.ndarray) -> np.ndarray:
    """Cell edges halfway between neighbouring values, half a spacing beyond the ends."""
    if centres.size == 1:
        half = 0.5 * (abs(centres[0]) * 0.2 or 1.0)
        return np.array([centres[0] - half, centres[0] + half])
    mid = 0.5 * (centres[1:] + centres[:-1])
    return np.concatenate([[2 * centres[0] - mid[0]], mid, [2 * centres[-1] - mid[-1]]])


def contour_step(z: np.ndarray) -> float:
    """Contour spacing in dB: 10 dB, finer when the map spans less than two steps."""
    finite = z[np.isfinite(z)]
    span = float(finite.max() - finite.min()) if finite.size else 0.0
    return next((step for step in (10.0, 5.0, 2.0, 1.0) if span >= 2 * step), 1.0)


def _text(value: float, unit: str) -> str:
    return f"{value:.4g} {unit}".strip()


def sweep_heatmap(table: SweepTable | None, x_name: str, y_name: str, score: str = "worst_peak_db",
                  labels: dict | None = None, chosen: int | None = None, fontscale: float = 1.0):
    """Map of `score` over two swept parameters: measured cells coloured in dB,
    cells without a score in a colour per reason (hover says why), the best
    point starred, the loaded point outlined, contour lines every few dB.
    The layer structure never changes, so a growing table streams in."""
    labels = labels or {}
    grid = sweep_grid(table, x_name, y_name, score) if table is not None else None
    xs = grid.x_values if grid is not None else np.array([0.0])
    ys = grid.y_values if grid is not None else np.array([0.0])
    sx, ux = axis_unit(x_name, xs)
    sy, uy = axis_unit(y_name, ys)
    x_label = labels.get(x_name, x_name) + (f" ({ux})" if ux else "")
    y_label = labels.get(y_name, y_name) + (f" ({uy})" if uy else "")
    score_label = SWEEP_SCORE_LABELS[score]
    xdim, ydim = hv.Dimension("x0", label=x_label), hv.Dimension("y0", label=y_label)
    kdims = [xdim, ydim, "x1", "y1"]
    vdims = ["score", "x_text", "y_text", "score_text", "status", "reason"]
    ex, ey = _edges(xs / sx), _edges(ys / sy)
    columns = {d if isinstance(d, str) else d.name: [] for d in kdims + vdims}
    scored, unscored = dict(columns), dict(columns)
    if grid is not None:  # one column per field, cells in row order: fast for a 40 x 40 map
        jj, ii = np.nonzero(grid.index >= 0)
        x_text = [_text(v / sx, ux) for v in xs]
        y_text = [_text(v / sy, uy) for v in ys]
        for part, keep in ((scored, grid.status[jj, ii] == "ok"), (unscored, grid.status[jj, ii] != "ok")):
            i, j = ii[keep], jj[keep]
            z = grid.z[j, i]
            part.update(x0=ex[i], y0=ey[j], x1=ex[i + 1], y1=ey[j + 1], score=z,
                        x_text=[x_text[k] for k in i], y_text=[y_text[k] for k in j],
                        score_text=[f"{v:.1f} dB" if math.isfinite(v) else "–" for v in z],
                        status=list(grid.status[j, i]), reason=list(grid.reason[j, i]))
    finite = grid.z[np.isfinite(grid.z)] if grid is not None else np.array([])
    if finite.size:
        lo, hi = math.floor(finite.min() / 10) * 10, math.ceil(finite.max() / 10) * 10
        clim = (lo, hi) if hi > lo else (lo - 10, hi + 10)
    else:
        clim = (-100.0, 0.0)
    hover_point = [(x_label, "@{x_text}"), (y_label, "@{y_text}")]
    cells = hv.Rectangles(scored, kdims=kdims, vdims=vdims).opts(
        color="score", cmap="viridis", clim=clim, colorbar=True, clabel=score_label, line_color="white",
        line_width=0.5, hover_tooltips=hover_point + [(score_label, "@{score_text}")])
    others = hv.Rectangles(unscored, kdims=kdims, vdims=vdims).opts(
        color="status", cmap=UNSCORED_COLORS, line_color="#999999", line_width=0.5,
        hover_tooltips=hover_point + [("status", "@{status}"), ("why", "@{reason}")])
    step = contour_step(grid.z) if grid is not None else 10.0
    lines = hv.Contours([], kdims=[xdim, ydim], vdims=["level"])
    title = f"sweep map: {score_label}"
    if grid is not None and min(grid.z.shape) >= 2 and finite.size >= 4:
        levels = np.arange(math.ceil(finite.min() / step) * step, finite.max(), step)
        if levels.size:
            mesh = hv.QuadMesh((xs / sx, ys / sy, grid.z), kdims=[xdim, ydim], vdims=["level"])
            lines = contours(mesh, levels=list(levels), filled=False)
            title += f", contours every {step:g} dB"
    # white lines over a faint dark casing: legible on the dark and the bright end of the scale
    casing = lines.clone().opts(color="black", line_width=3.0, alpha=0.3, tools=[])
    lines = lines.opts(color="white", line_width=1.2, alpha=0.9, hover_tooltips=[("contour", "@{level} dB")])
    best = [] if grid is None or grid.best is None else \
        [(xs[grid.best[0]] / sx, ys[grid.best[1]] / sy, f"{grid.z[grid.best[1], grid.best[0]]:.1f} dB")]
    star = hv.Points(best, kdims=[xdim, ydim], vdims=["best"]).opts(
        marker="star", size=20 * fontscale, color="white", line_color="black", line_width=1.5,
        hover_tooltips=[("best", "@{best}")])
    cell = grid.cell_of(chosen) if grid is not None and chosen is not None else None
    outline = hv.Rectangles([] if cell is None else [(ex[cell[0]], ey[cell[1]], ex[cell[0] + 1], ey[cell[1] + 1])],
                            kdims=kdims).opts(fill_alpha=0, line_color="#E69F00", line_width=3)
    return (cells * others * casing * lines * outline * star).opts(
        title=title, responsive=True, height=int(460 * min(fontscale, 1.3)), xlim=(ex[0], ex[-1]),
        ylim=(ey[0], ey[-1]), fontscale=fontscale, toolbar="right", framewise=True, show_legend=False,
        xticks=_ticks(xs / sx), yticks=_ticks(ys / sy))


def _ticks(values: np.ndarray):
    """A tick on each swept value while they fit; Bokeh's own ticks beyond that."""
    return [(float(v), f"{v:.4g}") for v in values] if values.size <= 12 else None
