"""The figures of a Measurement as plain Bokeh figures that are built once per
page and then only fed new data (presentation only: the numbers come from
the engine).

A change of setting replaces the `data` of each figure's fixed data sources
and a few texts (title, axis labels, legend labels, ranges): Bokeh sends that
as small patches, with no new models and no re-layout, so a result reaches
the screen in milliseconds.  The same figures, filled once, make the
standalone report.

What the figures promise: the field images keep the grid's true geometry (one
length per pixel on both axes, whatever dx and dy) and outline the
scenario's blocks where they lie; the curves carry the user's own probe
names; the layer profiles show every side that carries a layer; a legend row
exists only for a curve that is drawn; the pinned A is mentioned only when it
is drawn; every range that follows the data is set from the data.
"""

from __future__ import annotations

import math
import re

import numpy as np
from bokeh.models import (ColorBar, ColumnDataSource, HoverTool, Legend, LegendItem, LinearColorMapper,
                          Range1d, Title)
from bokeh.core.property.vectorization import value
from bokeh.palettes import Cividis256, Viridis256
from bokeh.plotting import figure

from quietlayer.engine.layer import LayerTable, layer_tables
from quietlayer.engine.measure import Measurement, to_db
from quietlayer.engine.scenario import SIDES, Scenario

from .units import frequency_unit, length_unit, time_unit

# Okabe & Ito's colour-blind-safe palette
PALETTE = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000"]
PINNED = "#888888"
BLOCK_COLOR = "#FF4FA3"  # block outlines: visible on the dark and the bright end of both colour maps
FIELD_FLOOR_DB = -80.0
REFLECTED_FLOOR_DB = -140.0
PROBE_SLOTS = 6  # probe curves per plot: every probe when they fit, else the few below
PICK_ANGLES = (0.0, 45.0, 80.0)  # with more probes: those nearest these incidence angles, and the corner
SIDE_SLOTS = len(SIDES)
KEYS = ("total", "reflected", "spectrum", "angle", "error", "profile0", "profile1", "profile2")
SHOW_ORDER = ("total", "reflected", "angle", "error", "profile0", "spectrum")  # the spectrum's data leaves last
PROFILE_PLOTS = (  # title, the table's columns (solid, dashed), whether the axis starts at zero
    ("layer: sigma (solid) and alpha (dashed), S/m", ("sigma", "alpha"), True),
    ("layer: kappa", ("kappa",), False),
    ("layer: psi coefficients b (solid) and c (dashed)", ("b", "c"), False),
)
CURVE_HEIGHT = 270
PROFILE_HEIGHT = 230
IMAGE_HEIGHT = 340
IMAGE_WIDTH_RANGE = (120, 460)
IMAGE_HEIGHT_RANGE = (120, 560)
EMPTY_LINE = {"x": np.zeros(0), "y": np.zeros(0)}
BLOCK_COLUMNS = ("left", "right", "bottom", "top", "name", "eps_r", "sigma", "cells", "extent")
_SAYS_ANGLE = re.compile(r"\d\s*(deg|°)", re.IGNORECASE)


def finite_or_dash(value: float, fmt: str = "{:.1f}") -> str:
    return fmt.format(value) if value is not None and math.isfinite(value) else "–"


def shown_probes(m: Measurement) -> list[str]:
    """The probes drawn in the spectrum and error plots, in the scenario's order:
    all of them when they fit, else those nearest 0, 45 and 80 degrees of
    incidence and the corner (chosen from the geometry alone, so a curve keeps
    its colour from one setting to the next)."""
    names = [p.name for p in m.scenario.probes if p.name in m.peak_db]
    if len(names) <= PROBE_SLOTS:
        return names
    angles = {n: m.probe_angles[n] for n in names if n in m.probe_angles and n != "corner"}
    if angles:
        picks = {min(angles, key=lambda n: abs(angles[n] - target)) for target in PICK_ANGLES}
    else:
        picks = set(names[::math.ceil(len(names) / len(PICK_ANGLES))])
    picks |= {"corner"} & set(names)
    return [n for n in names if n in picks][:PROBE_SLOTS]


def probe_label(m: Measurement, name: str) -> str:
    """Legend text of a probe: the user's own name, with its incidence angle
    unless the name already says it."""
    angle = m.probe_angles.get(name)
    if angle is None or not math.isfinite(angle) or _SAYS_ANGLE.search(name):
        return name
    return f"{name} ({angle:.0f}°)"


def layer_groups(s: Scenario) -> tuple[list[tuple[str, LayerTable]], str]:
    """The sides that carry a layer as (legend text, table), sides with equal
    tables drawn once ("left, right", "all sides"); and a note naming the sides
    without a layer and what they are ("" when every side has one)."""
    groups: list[tuple[list[str], LayerTable]] = []
    for name, table in layer_tables(s).items():
        same = next((g for g in groups if _same_table(g[1], table)), None)
        if same is None:
            groups.append(([name], table))
        else:
            same[0].append(name)
    out = []
    for names, table in groups:
        text = "all sides" if len(names) == len(SIDES) else ", ".join(names)
        if any(getattr(s.boundary, n).profile is not None for n in names):
            text += " (own profile)"
        out.append((text, table))
    kinds: dict[str, list[str]] = {}
    for name in SIDES:
        side = getattr(s.boundary, name)
        if side.kind != "cpml":
            kinds.setdefault(side.kind, []).append(name)
    note = "; ".join(f"{', '.join(names)} ({kind})" for kind, names in kinds.items())
    return out, (f"without a layer: {note}" if note else "")


def _same_table(a: LayerTable, b: LayerTable) -> bool:
    return all(np.array_equal(getattr(a, f"node_{k}"), getattr(b, f"node_{k}"))
               for k in ("depth", "sigma", "kappa", "alpha", "b", "c"))


def _cells_text(lo: float, hi: float, scale: float = 1.0) -> str:
    def one(v):
        return "−∞" if v == -math.inf else "∞" if v == math.inf else f"{v * scale:.4g}"
    return f"{one(lo)} .. {one(hi)}"


def block_outlines(s: Scenario, bounds, scale: float, unit: str) -> dict:
    """Data of the block outlines on an image with `bounds` (x0, y0, x1, y1 in
    display units): each block cut to the image (an infinite edge ends at the
    image's edge), with its material and its extent in cells and in length
    for the hover; blocks off the image are left out."""
    x_lo, y_lo, x_hi, y_hi = bounds
    data = {k: [] for k in BLOCK_COLUMNS}
    for k, b in enumerate(s.blocks):
        left, right = max(b.x0 * s.dx / scale, x_lo), min(b.x1 * s.dx / scale, x_hi)
        bottom, top = max(b.y0 * s.dy / scale, y_lo), min(b.y1 * s.dy / scale, y_hi)
        if not (left < right and bottom < top):
            continue
        data["left"].append(left)
        data["right"].append(right)
        data["bottom"].append(bottom)
        data["top"].append(top)
        data["name"].append(b.name or f"block {k + 1}")
        data["eps_r"].append(f"{b.eps_r:g}")
        data["sigma"].append(f"{b.sigma:g} S/m")
        data["cells"].append(f"x {_cells_text(b.x0, b.x1)}, y {_cells_text(b.y0, b.y1)}")
        data["extent"].append(f"x {_cells_text(b.x0, b.x1, s.dx / scale)}, "
                              f"y {_cells_text(b.y0, b.y1, s.dy / scale)} {unit}")
    return data


def image_frame(bounds, fontscale: float) -> tuple[int, int, tuple, tuple]:
    """Frame size (px) and x and y ranges of a field image covering `bounds`:
    the same length per pixel on both axes (true geometry, whatever dx and dy);
    where the frame's limits keep it from the grid's shape, the range of the
    axis with room to spare is widened, never the picture stretched."""
    x0, y0, x1, y1 = bounds
    width_m, height_m = x1 - x0, y1 - y0
    aspect = width_m / height_m
    height = IMAGE_HEIGHT * min(fontscale, 1.3)
    width = float(np.clip(height * aspect, *IMAGE_WIDTH_RANGE))
    height = float(np.clip(width / aspect, *IMAGE_HEIGHT_RANGE))
    width, height = int(round(width)), int(round(height))
    per_pixel = max(width_m / width, height_m / height)
    pad_x, pad_y = (per_pixel * width - width_m) / 2, (per_pixel * height - height_m) / 2
    return width, height, (x0 - pad_x, x1 + pad_x), (y0 - pad_y, y1 + pad_y)


def best_frame(m: Measurement) -> int:
    """The frame where the echo is strongest (where a first look should open)."""
    if m.reflected_frames is None or not len(m.reflected_frames):
        return 0
    return int(np.argmax([np.abs(f).max() for f in m.reflected_frames]))


def _set_range(rng: Range1d, lo: float, hi: float) -> None:
    """A range from the data (and its reset to the same), changed only when it moved."""
    if (rng.start, rng.end) != (lo, hi):
        rng.start, rng.end = lo, hi
        rng.reset_start, rng.reset_end = lo, hi


def _data_range(values, from_zero: bool = False) -> tuple[float, float]:
    """lo, hi of finite `values` with 5 % room (a flat curve gets room around its value)."""
    finite = [v[np.isfinite(v)] for v in (np.asarray(v, float) for v in values)]
    finite = np.concatenate(finite) if finite else np.zeros(0)
    if finite.size == 0:
        return (0.0, 1.0)
    lo, hi = float(finite.min()), float(finite.max())
    if from_zero:
        lo = min(lo, 0.0)
    if lo == hi:
        if from_zero and hi == 0.0:
            return (0.0, 1.0)
        pad = 0.05 * abs(hi) or 0.05
        return (lo - pad, hi + pad)
    pad = 0.05 * (hi - lo)
    return (lo if from_zero and lo == 0.0 else lo - pad, hi + pad)


def _pin_text(pinned, drawn: bool, prefix: str) -> str:
    """How a title mentions the pinned A: only when A is pinned."""
    if pinned is None:
        return ""
    return f"{prefix}dotted: A" if drawn else f"{prefix}A has none of these probes"


# --- styling ----------------------------------------------------------------------

def _font(fig, fontscale: float) -> None:
    """Text sizes of one figure for a font scale (presentation mode enlarges them)."""
    for title in fig.select(type=Title):
        title.text_font_size = f"{round((13 if title is fig.title else 11) * fontscale)}px"
    for axis in fig.axis:
        axis.axis_label_text_font_size = f"{round(13 * fontscale)}px"
        axis.major_label_text_font_size = f"{round(11 * fontscale)}px"
    for legend in fig.legend:
        legend.label_text_font_size = f"{round(11 * fontscale)}px"
    for bar in fig.select(type=ColorBar):
        bar.title_text_font_size = f"{round(11 * fontscale)}px"
        bar.major_label_text_font_size = f"{round(11 * fontscale)}px"


def _curve_figure(title: str, height: int, **kw):
    fig = figure(title=title, height=height, sizing_mode="stretch_width", tools="pan,wheel_zoom,box_zoom,reset,save",
                 toolbar_location="above", **kw)
    fig.toolbar.logo = None
    return fig


def _set_text(model, text: str) -> None:
    if model.text != text:
        model.text = text


class _Lines:
    """A fixed set of line renderers, one data source each, and legend rows
    (each naming one or more of the lines); a row is shown only while it has a
    text and one of its lines has data, so no blank or dataless row appears."""

    def __init__(self, fig, styles: list[dict], legend: str | None = "right", hover: tuple | None = None,
                 rows: list[list[int]] | None = None):
        self.fig = fig
        self.sources = [ColumnDataSource(dict(EMPTY_LINE)) for _ in styles]
        self.renderers = [fig.line("x", "y", source=source, **style) for source, style in zip(self.sources, styles)]
        self.rows = rows or []
        self.items = [LegendItem(label=value(""), renderers=[self.renderers[i] for i in row], visible=False)
                      for row in self.rows]
        self.legend = None
        if legend is not None and self.items:
            inside = legend not in ("right", "left", "above", "below")
            self.legend = Legend(items=self.items, click_policy="hide", spacing=2, padding=4, visible=False)
            fig.add_layout(self.legend, "center" if inside else legend)
            if inside:
                self.legend.location = legend
        if hover is not None:
            fig.add_tools(HoverTool(renderers=self.renderers, tooltips=[("", "$name"), *hover]))

    def set(self, index: int, x, y, name: str = "") -> None:
        self.sources[index].data = {"x": np.asarray(x, float), "y": np.asarray(y, float)}
        if self.renderers[index].name != name:
            self.renderers[index].name = name  # the hover's first line

    def clear(self, index: int) -> None:
        if self.drawn(index):  # an empty line stays empty without a message
            self.sources[index].data = dict(EMPTY_LINE)

    def drawn(self, index: int) -> bool:
        return len(self.sources[index].data["x"]) > 0

    def row(self, k: int, text: str | None) -> None:
        """Legend row k says `text`; shown only with a text and a line drawn (call after the data)."""
        item = self.items[k]
        if text and getattr(item.label, "value", None) != text:
            item.label = value(text)  # a plain string would name a data column
        shown = bool(text) and any(self.drawn(i) for i in self.rows[k])
        if item.visible != shown:
            item.visible = shown
        if self.legend is not None:
            anything = any(i.visible for i in self.items)
            if self.legend.visible != anything:
                self.legend.visible = anything


# --- the live figures -------------------------------------------------------------

class LiveFigures:
    """Every figure of the page, built once; `show` feeds a new measurement in."""

    def __init__(self, fontscale: float = 1.0):
        self.fontscale = fontscale
        self.measurement: Measurement | None = None
        self.frame = 0
        self._image_peak = 1.0
        self._peak_of = None
        self.figures = {}
        self._make_images()
        self._make_curves()
        self._make_profiles()
        for fig in self.figures.values():
            _font(fig, fontscale)

    # construction
    def _make_images(self):
        self.images = {}
        for key, reflected in (("total", False), ("reflected", True)):
            floor = REFLECTED_FLOOR_DB if reflected else FIELD_FLOOR_DB
            mapper = LinearColorMapper(palette=Viridis256 if reflected else Cividis256, low=floor, high=0.0)
            fig = figure(title="reflected only" if reflected else "total field", x_range=Range1d(0, 1),
                         y_range=Range1d(0, 1), frame_width=200, frame_height=IMAGE_HEIGHT,
                         tools="pan,wheel_zoom,box_zoom,reset,save", toolbar_location="above",
                         match_aspect=False)
            fig.toolbar.logo = None
            fig.grid.visible = False
            image = ColumnDataSource({"image": [np.full((2, 2), np.nan, np.float32)], "x": [0.0], "y": [0.0],
                                      "dw": [1.0], "dh": [1.0]})
            pixels = fig.image("image", x="x", y="y", dw="dw", dh="dh", source=image, color_mapper=mapper)
            pixel_hover = HoverTool(renderers=[pixels], tooltips=[("x", "$x"), ("y", "$y"), ("dB", "@image")])
            fig.add_tools(pixel_hover)
            fig.add_layout(ColorBar(color_mapper=mapper, title="dB re. peak incident", width=12), "right")
            box = ColumnDataSource({"left": [0.0], "right": [0.0], "bottom": [0.0], "top": [0.0]})
            fig.quad(left="left", right="right", bottom="bottom", top="top", source=box, fill_alpha=0,
                     line_color="#cccccc" if reflected else "white", line_width=1.5, line_dash="dashed")
            blocks = ColumnDataSource({k: [] for k in BLOCK_COLUMNS})
            outlines = fig.quad(left="left", right="right", bottom="bottom", top="top", source=blocks,
                                fill_alpha=0, line_color=BLOCK_COLOR, line_width=2)
            fig.add_tools(HoverTool(renderers=[outlines], tooltips=[
                ("block", "@name"), ("eps_r", "@eps_r"), ("sigma", "@sigma"), ("cells", "@cells"),
                ("extent", "@extent")]))
            labels = ColumnDataSource({"x": [], "y": [], "text": []})
            fig.text("x", "y", text="text", source=labels, text_color=BLOCK_COLOR, text_font_size="10px",
                     text_baseline="top", x_offset=3, y_offset=3)
            probes = ColumnDataSource({"x": [], "y": [], "probe": []})
            dots = fig.scatter("x", "y", source=probes, size=6, marker="circle", fill_color="#E69F00",
                               line_color="black")
            fig.add_tools(HoverTool(renderers=[dots], tooltips=[("probe", "@probe")]))
            source = ColumnDataSource({"x": [], "y": []})
            fig.scatter("x", "y", source=source, size=11, marker="star", fill_color="#D55E00", line_color="black")
            self.figures[key] = fig
            self.images[key] = {"image": image, "box": box, "blocks": blocks, "labels": labels, "probes": probes,
                                "source": source, "hover": pixel_hover}

    def _make_curves(self):
        spectrum = _curve_figure("reflection spectrum (dashed: theory)", CURVE_HEIGHT)
        styles = []
        for k in range(PROBE_SLOTS):
            styles += [dict(color=PALETTE[k], line_width=2.0),
                       dict(color=PALETTE[k], line_dash="dashed", line_width=1.2),
                       dict(color=PALETTE[k], line_dash="dotted", line_width=1.5, alpha=0.6)]
        self.spectrum = _Lines(spectrum, styles, hover=(("f", "$x"), ("dB", "$y")),
                               rows=[[3 * k] for k in range(PROBE_SLOTS)])
        error = _curve_figure("error versus time", CURVE_HEIGHT, y_range=Range1d(-160, 5))
        styles = []
        for k in range(PROBE_SLOTS):
            styles += [dict(color=PALETTE[k], line_width=2.0),
                       dict(color=PALETTE[k], line_dash="dotted", line_width=1.5, alpha=0.6)]
        self.error = _Lines(error, styles, hover=(("t", "$x"), ("dB", "$y")),
                            rows=[[2 * k] for k in range(PROBE_SLOTS)])
        angle = _curve_figure("reflection versus incidence angle", CURVE_HEIGHT, x_range=Range1d(0, 90))
        angle.xaxis.axis_label = "incidence angle (deg)"
        angle.yaxis.axis_label = "reflection (dB)"
        self.angle = _Lines(angle, [dict(color=PALETTE[0], line_width=2.0),
                                    dict(color=PALETTE[1], line_dash="dashed", line_width=2.0),
                                    dict(color=PINNED, line_dash="dotted", line_width=2.0)],
                            legend="bottom_right", hover=(("angle", "$x"), ("dB", "$y")), rows=[[0], [1], [2]])
        angle.scatter("x", "y", source=self.angle.sources[0], size=6, color=PALETTE[0])
        self.figures.update(spectrum=spectrum, error=error, angle=angle)

    def _make_profiles(self):
        """Three plots of the layer against depth, one line (or solid and dashed
        pair) per side carrying a layer."""
        self.profiles = []
        self.profile_notes = []
        for k, (title, columns, _) in enumerate(PROFILE_PLOTS):
            fig = _curve_figure(title, PROFILE_HEIGHT, x_range=Range1d(0, 1), y_range=Range1d(0, 1))
            fig.toolbar_location = None
            n = len(columns)
            styles = [dict(color=PALETTE[slot], line_width=2.0, line_dash="dashed" if i else "solid")
                      for slot in range(SIDE_SLOTS) for i in range(n)]
            rows = [[slot * n + i for i in range(n)] for slot in range(SIDE_SLOTS)]
            self.profiles.append(_Lines(fig, styles, legend="top_left", hover=(("depth", "$x"), ("", "$y")),
                                        rows=rows))
            note = Title(text="", text_font_style="italic", text_color="#555555", visible=False)
            fig.add_layout(note, "below")
            self.profile_notes.append(note)
            self.figures[f"profile{k}"] = fig

    # feeding data
    def show(self, m: Measurement, pinned: Measurement | None = None, frame: int | None = None,
             keys=KEYS) -> None:
        """Put measurement `m` (and the pinned A) into the figures named in `keys`."""
        self.measurement = m
        if frame is not None:
            self.frame = frame
        for key in (k for k in SHOW_ORDER if k in keys):
            if key in ("total", "reflected"):
                self._show_image(key)
            elif key == "spectrum":
                self._show_spectrum(m, pinned)
            elif key == "error":
                self._show_error(m, pinned)
            elif key == "angle":
                self._show_angle(m, pinned)
            elif key == "profile0":  # the three profile figures come from one set of tables
                self._show_profiles(m)

    def show_frame(self, frame: int) -> None:
        """Another time step of the field images."""
        self.frame = frame
        for key in ("total", "reflected"):
            self._show_image(key)

    def set_fontscale(self, fontscale: float) -> None:
        self.fontscale = fontscale
        for fig in self.figures.values():
            _font(fig, fontscale)
        if self.measurement is not None:
            for key in ("total", "reflected"):
                self._place_image(key)

    def _image_geometry(self, m: Measurement, reflected: bool):
        """(x0, y0, x1, y1) of the image in display units, the unit's size in m and its name."""
        s = m.scenario
        grid_x, grid_y = m.total_frames.shape[1] - 1, m.total_frames.shape[2] - 1
        scale, unit = length_unit(max(grid_x * s.dx, grid_y * s.dy))
        ox, oy = s.offset
        nx, ny = (s.nx + 1, s.ny + 1) if reflected else (grid_x + 1, grid_y + 1)
        x0, y0 = (0.0, 0.0) if reflected else (-ox * s.dx, -oy * s.dy)
        # nodes are cell-centred pixels: half a cell of margin on each side
        bounds = ((x0 - 0.5 * s.dx) / scale, (y0 - 0.5 * s.dy) / scale,
                  (x0 + (nx - 0.5) * s.dx) / scale, (y0 + (ny - 0.5) * s.dy) / scale)
        return bounds, scale, unit

    def _show_image(self, key: str) -> None:
        m = self.measurement
        reflected = key == "reflected"
        fig, parts = self.figures[key], self.images[key]
        if m is None or m.total_frames is None or m.frame_steps is None or m.frame_steps.size == 0:
            return
        s = m.scenario
        k = int(np.clip(self.frame, 0, m.frame_steps.size - 1))
        ox, oy = s.offset
        if self._peak_of is not m:  # the largest field in the interior over the whole run: the 0 dB
            self._peak_of = m
            self._image_peak = float(np.abs(m.total_frames[:, ox:ox + s.nx + 1, oy:oy + s.ny + 1]).max()) or 1.0
        peak = self._image_peak
        frames = m.reflected_frames if reflected else m.total_frames
        data = to_db(frames[k] / peak, REFLECTED_FLOOR_DB if reflected else FIELD_FLOOR_DB)
        (x0, y0, x1, y1), scale, unit = self._image_geometry(m, reflected)
        # Bokeh draws image[row][col] with rows along y
        parts["image"].data = {"image": [np.ascontiguousarray(data.T, dtype=np.float32)], "x": [x0], "y": [y0],
                               "dw": [x1 - x0], "dh": [y1 - y0]}
        _set_text(fig.title, f"{'reflected only' if reflected else 'total field'}, step {m.frame_steps[k]}")
        geometry = (x0, y0, x1, y1, unit, s.nx, s.ny, s.dx, s.dy, s.source.x, s.source.y,
                    tuple((p.name, p.x, p.y) for p in s.probes), s.blocks)
        if getattr(fig, "_quietlayer_geometry", None) != geometry:  # else only the pixels and the title change
            fig._quietlayer_geometry = geometry
            self._place_image(key)

    def _place_image(self, key: str) -> None:
        """Everything of an image that follows the grid: frame size and ranges
        (true geometry), axis labels, interior box, blocks, probes, source."""
        m = self.measurement
        if m is None or m.total_frames is None:
            return
        s = m.scenario
        fig, parts = self.figures[key], self.images[key]
        bounds, scale, unit = self._image_geometry(m, key == "reflected")
        width, height, x_range, y_range = image_frame(bounds, self.fontscale)
        if (fig.frame_width, fig.frame_height) != (width, height):
            fig.frame_width, fig.frame_height = width, height
        _set_range(fig.x_range, *x_range)
        _set_range(fig.y_range, *y_range)
        fig.xaxis.axis_label, fig.yaxis.axis_label = f"x ({unit})", f"y ({unit})"
        parts["hover"].tooltips = [("x", f"$x{{0.[000]}} {unit}"), ("y", f"$y{{0.[000]}} {unit}"),
                                   ("dB", "@image{0.0}")]
        parts["box"].data = {"left": [-0.5 * s.dx / scale], "right": [(s.nx + 0.5) * s.dx / scale],
                             "bottom": [-0.5 * s.dy / scale], "top": [(s.ny + 0.5) * s.dy / scale]}
        blocks = block_outlines(s, bounds, scale, unit)
        parts["blocks"].data = blocks
        # a name inside each outline big enough to hold it (the hover says the rest)
        per_pixel = (x_range[1] - x_range[0]) / width
        big = [i for i in range(len(blocks["name"]))
               if blocks["top"][i] - blocks["bottom"][i] >= 14 * per_pixel * self.fontscale
               and blocks["right"][i] - blocks["left"][i] >= 7 * len(blocks["name"][i]) * per_pixel * self.fontscale]
        parts["labels"].data = {"x": [blocks["left"][i] for i in big], "y": [blocks["top"][i] for i in big],
                                "text": [blocks["name"][i] for i in big]}
        parts["probes"].data = {"x": [p.x * s.dx / scale for p in s.probes],
                                "y": [p.y * s.dy / scale for p in s.probes], "probe": [p.name for p in s.probes]}
        parts["source"].data = {"x": [s.source.x * s.dx / scale], "y": [s.source.y * s.dy / scale]}

    def _show_spectrum(self, m: Measurement, pinned: Measurement | None) -> None:
        scale, unit = frequency_unit(m.scenario.source.f_max)
        fig = self.figures["spectrum"]
        fig.xaxis.axis_label = f"frequency ({unit})"
        fig.yaxis.axis_label = "reflection (dB)"
        lines = self.spectrum
        names = shown_probes(m)
        for k in range(PROBE_SLOTS):
            name = names[k] if k < len(names) else None
            have = name is not None and name in m.spectra and m.freqs is not None
            label = probe_label(m, name) if name is not None else None
            if have:
                lines.set(3 * k, m.freqs / scale, to_db(m.spectra[name]), label)
            else:
                lines.clear(3 * k)
            theory = m.theory_spectra.get(name) if have else None
            if theory is not None:
                lines.set(3 * k + 1, m.freqs / scale, to_db(theory), f"{label}: theory")
            else:
                lines.clear(3 * k + 1)
            if have and pinned is not None and pinned.freqs is not None and name in pinned.spectra:
                lines.set(3 * k + 2, pinned.freqs / scale, to_db(pinned.spectra[name]), f"{label}: A")
            else:
                lines.clear(3 * k + 2)
            lines.row(k, label)
        drawn = any(lines.drawn(3 * k + 2) for k in range(PROBE_SLOTS))
        _set_text(fig.title, f"reflection spectrum (dashed: theory{_pin_text(pinned, drawn, ', ')})")

    def _show_error(self, m: Measurement, pinned: Measurement | None) -> None:
        scale, unit = time_unit(m.times[-1])
        fig = self.figures["error"]
        fig.xaxis.axis_label = f"time ({unit})"
        fig.yaxis.axis_label = "error (dB)"
        lines = self.error
        names = shown_probes(m)
        for k in range(PROBE_SLOTS):
            name = names[k] if k < len(names) else None
            have = name is not None and name in m.error_db
            label = probe_label(m, name) if name is not None else None
            if have:
                lines.set(2 * k, m.times / scale, m.error_db[name], label)
            else:
                lines.clear(2 * k)
            if have and pinned is not None and name in pinned.error_db:
                lines.set(2 * k + 1, pinned.times / scale, pinned.error_db[name], f"{label}: A")
            else:
                lines.clear(2 * k + 1)
            lines.row(k, label)
        drawn = any(lines.drawn(2 * k + 1) for k in range(PROBE_SLOTS))
        note = _pin_text(pinned, drawn, "")
        _set_text(fig.title, f"error versus time ({note})" if note else "error versus time")

    def _show_angle(self, m: Measurement, pinned: Measurement | None) -> None:
        a = m.angles
        lines = self.angle
        b = pinned.angles if pinned is not None else None
        if a is None:
            for k in range(3):
                lines.clear(k)
        else:
            lines.set(0, a.angles_deg, a.measured_db, "measured")
            lines.set(1, a.angles_deg, a.theory_db, "theory (plane wave)")
            if b is not None:
                lines.set(2, b.angles_deg, b.measured_db, "A (pinned)")
            else:
                lines.clear(2)
        for k, text in enumerate(("measured", "theory (plane wave)", "A (pinned)")):
            lines.row(k, text)

    def _show_profiles(self, m: Measurement) -> None:
        """sigma and alpha, kappa, b and c against depth, one line per side
        carrying a layer (sides with equal tables share one); the sides without
        a layer are named below the plot."""
        groups, note = layer_groups(m.scenario)
        deepest = max((t.node_depth[-1] for _, t in groups), default=0.0)
        scale, unit = length_unit(deepest) if deepest > 0 else (1e-3, "mm")
        for lines, text, (_, columns, from_zero) in zip(self.profiles, self.profile_notes, PROFILE_PLOTS):
            fig = lines.fig
            fig.xaxis.axis_label = f"depth from the inner face ({unit})"
            n = len(columns)
            shown = []
            for slot in range(SIDE_SLOTS):
                label, table = groups[slot] if slot < len(groups) else (None, None)
                for i, column in enumerate(columns):
                    if table is None:
                        lines.clear(slot * n + i)
                    else:
                        y = getattr(table, f"node_{column}")
                        lines.set(slot * n + i, table.node_depth / scale, y, f"{label}: {column}")
                        shown.append(y)
                lines.row(slot, label)
            _set_range(fig.x_range, 0.0, deepest / scale if deepest > 0 else 1.0)
            _set_range(fig.y_range, *_data_range(shown, from_zero))
            _set_text(text, note)
            if text.visible != bool(note):
                text.visible = bool(note)
