"""The sweep map: a two-parameter sweep table arranged into a grid and drawn
with HoloViews (presentation only: the numbers come from the engine)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import holoviews as hv
import numpy as np
from holoviews.operation import contours

from quietlayer.engine import ScenarioError
from quietlayer.engine.sweep import SCORES, SweepTable

from .units import frequency_unit, length_unit

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
