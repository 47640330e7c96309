"""The figures of a Measurement as plain Bokeh figures that are built once per
page and then only fed new data (presentation only: the numbers come from
the engine).

A change of setting replaces the `data` of each figure's fixed data sources
and a few texts (title, axis labels, legend labels, ranges): Bokeh sends that
as small patches, with no new models and no re-layout, so a result reaches
the screen in milliseconds.  The same figures, filled once, make the
standalone report.
"""

from __future__ import annotations

import math

import numpy as np
from bokeh.models import (ColorBar, ColumnDataSource, HoverTool, Legend, LegendItem, LinearColorMapper,
                          Range1d)
from bokeh.core.property.vectorization import value
from bokeh.palettes import Cividis256, Viridis256
from bokeh.plotting import figure

from quietlayer.engine.layer import layer_tables
from quietlayer.engine.measure import Measurement, to_db

from .units import frequency_unit, length_unit, time_unit

# Okabe & Ito's colour-blind-safe palette
PALETTE = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000"]
PINNED = "#888888"
FIELD_FLOOR_DB = -80.0
REFLECTED_FLOOR_DB = -140.0
GROUPS = (("normal", 0.0), ("oblique", 45.0), ("grazing", 80.0))
KEYS = ("total", "reflected", "spectrum", "angle", "error", "profile0", "profile1", "profile2")
SHOW_ORDER = ("total", "reflected", "angle", "error", "profile0", "spectrum")  # the spectrum's data leaves last
CURVE_HEIGHT = 270
PROFILE_HEIGHT = 230
IMAGE_HEIGHT = 340
EMPTY_LINE = {"x": np.zeros(0), "y": np.zeros(0)}


def finite_or_dash(value: float, fmt: str = "{:.1f}") -> str:
    return fmt.format(value) if value is not None and math.isfinite(value) else "–"


def probe_groups(m: Measurement) -> list[tuple[str, str | None]]:
    """(group, probe name or None) for the probes nearest 0, 45 and 80 degrees and the corner:
    always four entries, so the figures keep one set of curves."""
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


def group_label(m: Measurement, label: str, name: str | None) -> str:
    """Legend text of a probe group: its angle, and the probe's own name when the
    user chose one that does not say the angle."""
    if name is None:
        return label
    if name in m.probe_angles and label != "corner":
        text = f"{label} ({m.probe_angles[name]:.0f}°)"
    else:
        text = label
    generic = name == "corner" or name.startswith(("right ", "left ", "top ", "bottom "))
    return text if generic else f"{text}: {name}"


def best_frame(m: Measurement) -> int:
    """The frame where the echo is strongest (where a first look should open)."""
    if m.reflected_frames is None or not len(m.reflected_frames):
        return 0
    return int(np.argmax([np.abs(f).max() for f in m.reflected_frames]))


# --- styling ----------------------------------------------------------------------

def _font(fig, fontscale: float) -> None:
    """Text sizes of one figure for a font scale (presentation mode enlarges them)."""
    fig.title.text_font_size = f"{round(13 * fontscale)}px"
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


class _Lines:
    """A fixed set of line renderers, one data source each, with an optional legend."""

    def __init__(self, fig, styles: list[dict], legend: str | None = "right", hover: tuple | None = None):
        self.fig = fig
        self.sources = [ColumnDataSource(dict(EMPTY_LINE)) for _ in styles]
        self.renderers = []
        for source, style in zip(self.sources, styles):
            style = dict(style)
            style.pop("label", None)
            self.renderers.append(fig.line("x", "y", source=source, **style))
        self.items = []
        if legend is not None:
            labelled = [(r, s["label"]) for r, s in zip(self.renderers, styles) if s.get("label") is not None]
            self.items = [LegendItem(label=value(text), renderers=[r]) for r, text in labelled]
            box = Legend(items=self.items, click_policy="hide", spacing=2, padding=4)
            fig.add_layout(box, legend if legend in ("right", "left", "above", "below") else "center")
            if legend not in ("right", "left", "above", "below"):
                box.location = legend
        if hover is not None:
            fig.add_tools(HoverTool(renderers=[r for r, s in zip(self.renderers, styles) if s.get("label")],
                                    tooltips=[("", "$name"), hover[0], hover[1]]))

    def set(self, index: int, x, y) -> None:
        self.sources[index].data = {"x": np.asarray(x, float), "y": np.asarray(y, float)}

    def clear(self, index: int) -> None:
        self.sources[index].data = dict(EMPTY_LINE)

    def label(self, index: int, text: str) -> None:
        item = next((i for i in self.items if self.renderers[index] in i.renderers), None)
        if item is not None and getattr(item.label, "value", None) != text:
            item.label = value(text)  # a plain string would name a data column
        if self.renderers[index].name != text:
            self.renderers[index].name = text


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
            fig.add_tools(HoverTool(renderers=[pixels], tooltips=[("x", "$x"), ("y", "$y"), ("dB", "@image")]))
            fig.add_layout(ColorBar(color_mapper=mapper, title="dB re. peak incident", width=12), "right")
            box = ColumnDataSource({"left": [0.0], "right": [0.0], "bottom": [0.0], "top": [0.0]})
            fig.quad(left="left", right="right", bottom="bottom", top="top", source=box, fill_alpha=0,
                     line_color="#cccccc" if reflected else "white", line_width=1.5, line_dash="dashed")
            probes = ColumnDataSource({"x": [], "y": [], "probe": []})
            dots = fig.scatter("x", "y", source=probes, size=6, marker="circle", fill_color="#E69F00",
                               line_color="black")
            fig.add_tools(HoverTool(renderers=[dots], tooltips=[("probe", "@probe")]))
            source = ColumnDataSource({"x": [], "y": []})
            fig.scatter("x", "y", source=source, size=11, marker="star", fill_color="#D55E00", line_color="black")
            self.figures[key] = fig
            self.images[key] = {"image": image, "box": box, "probes": probes, "source": source}

    def _make_curves(self):
        spectrum = _curve_figure("reflection spectrum (dashed: theory, dotted: A)", CURVE_HEIGHT)
        styles = []
        for k, (label, _) in enumerate(GROUPS + (("corner", None),)):
            styles += [dict(label=label, color=PALETTE[k], line_width=2.0),
                       dict(color=PALETTE[k], line_dash="dashed", line_width=1.2),
                       dict(color=PALETTE[k], line_dash="dotted", line_width=1.5, alpha=0.6)]
        self.spectrum = _Lines(spectrum, styles, hover=(("f", "$x"), ("dB", "$y")))
        error = _curve_figure("error versus time (dotted: A)", CURVE_HEIGHT, y_range=Range1d(-160, 5))
        styles = []
        for k, (label, _) in enumerate(GROUPS + (("corner", None),)):
            styles += [dict(label=label, color=PALETTE[k], line_width=2.0),
                       dict(color=PALETTE[k], line_dash="dotted", line_width=1.5, alpha=0.6)]
        self.error = _Lines(error, styles, hover=(("t", "$x"), ("dB", "$y")))
        angle = _curve_figure("reflection versus incidence angle (dotted: A)", CURVE_HEIGHT, x_range=Range1d(0, 90))
        angle.xaxis.axis_label = "incidence angle (deg)"
        angle.yaxis.axis_label = "reflection (dB)"
        self.angle = _Lines(angle, [dict(label="measured", color=PALETTE[0], line_width=2.0),
                                    dict(label="theory (plane wave)", color=PALETTE[1], line_dash="dashed",
                                         line_width=2.0),
                                    dict(color=PINNED, line_dash="dotted", line_width=2.0)],
                            legend="top_left", hover=(("angle", "$x"), ("dB", "$y")))
        angle.scatter("x", "y", source=self.angle.sources[0], size=6, color=PALETTE[0])
        self.figures.update(spectrum=spectrum, error=error, angle=angle)

    def _make_profiles(self):
        self.profiles = []
        for k, (title, styles) in enumerate((
                ("sigma and alpha (S/m)", [dict(label="sigma", color=PALETTE[0], line_width=2.0),
                                           dict(label="alpha", color=PALETTE[1], line_dash="dashed", line_width=2.0)]),
                ("kappa", [dict(label="kappa", color=PALETTE[2], line_width=2.0)]),
                ("psi coefficients b and c", [dict(label="b", color=PALETTE[3], line_width=2.0),
                                              dict(label="c", color=PALETTE[4], line_dash="dashed", line_width=2.0)]))):
            fig = _curve_figure(f"layer: {title}", PROFILE_HEIGHT)
            fig.toolbar_location = None
            self.profiles.append((title, _Lines(fig, styles, legend="top_left", hover=(("depth", "$x"), ("", "$y")))))
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
            elif key == "profile0":  # the three profile figures come from one table
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
                self._size_image(key)

    def _image_geometry(self, m: Measurement, reflected: bool):
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

    def _size_image(self, key: str) -> None:
        """Frame sizes with the grid's true aspect: the plot measures exactly what it draws."""
        m = self.measurement
        if m is None or m.total_frames is None:
            return
        bounds, _, _ = self._image_geometry(m, key == "reflected")
        aspect = (bounds[2] - bounds[0]) / (bounds[3] - bounds[1])
        height = int(IMAGE_HEIGHT * min(self.fontscale, 1.3))
        width = int(np.clip(height * aspect, 120, 460))
        height = int(np.clip(width / aspect, 120, 560))
        fig = self.figures[key]
        if (fig.frame_width, fig.frame_height) != (width, height):
            fig.frame_width, fig.frame_height = width, height

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
        fig.title.text = f"{'reflected only' if reflected else 'total field'}, step {m.frame_steps[k]}"
        geometry = (x0, y0, x1, y1, unit, s.nx, s.ny, s.dx, s.dy, s.source.x, s.source.y,
                    tuple((p.name, p.x, p.y) for p in s.probes))
        if getattr(fig, "_quietlayer_geometry", None) == geometry:
            return  # the same grid: only the pixels and the title change
        fig._quietlayer_geometry = geometry
        fig.x_range.start, fig.x_range.end = x0, x1
        fig.y_range.start, fig.y_range.end = y0, y1
        fig.xaxis.axis_label, fig.yaxis.axis_label = f"x ({unit})", f"y ({unit})"
        parts["box"].data = {"left": [-0.5 * s.dx / scale], "right": [(s.nx + 0.5) * s.dx / scale],
                             "bottom": [-0.5 * s.dy / scale], "top": [(s.ny + 0.5) * s.dy / scale]}
        parts["probes"].data = {"x": [p.x * s.dx / scale for p in s.probes],
                                "y": [p.y * s.dy / scale for p in s.probes], "probe": [p.name for p in s.probes]}
        parts["source"].data = {"x": [s.source.x * s.dx / scale], "y": [s.source.y * s.dy / scale]}
        self._size_image(key)

    def _show_spectrum(self, m: Measurement, pinned: Measurement | None) -> None:
        scale, unit = frequency_unit(m.scenario.source.f_max)
        self.figures["spectrum"].xaxis.axis_label = f"frequency ({unit})"
        self.figures["spectrum"].yaxis.axis_label = "reflection (dB)"
        lines = self.spectrum
        for k, (label, name) in enumerate(probe_groups(m)):
            have = name is not None and name in m.spectra and m.freqs is not None
            lines.label(3 * k, group_label(m, label, name))
            lines.set(3 * k, m.freqs / scale if have else [], to_db(m.spectra[name]) if have else [])
            theory = m.theory_spectra.get(name) if have else None
            if theory is not None:
                lines.set(3 * k + 1, m.freqs / scale, to_db(theory))
            else:
                lines.clear(3 * k + 1)
            if have and pinned is not None and pinned.freqs is not None and name in pinned.spectra:
                lines.set(3 * k + 2, pinned.freqs / scale, to_db(pinned.spectra[name]))
            else:
                lines.clear(3 * k + 2)

    def _show_error(self, m: Measurement, pinned: Measurement | None) -> None:
        scale, unit = time_unit(m.times[-1])
        self.figures["error"].xaxis.axis_label = f"time ({unit})"
        self.figures["error"].yaxis.axis_label = "error (dB)"
        lines = self.error
        for k, (label, name) in enumerate(probe_groups(m)):
            have = name is not None and name in m.error_db
            lines.label(2 * k, group_label(m, label, name))
            lines.set(2 * k, m.times / scale if have else [], m.error_db[name] if have else [])
            if have and pinned is not None and name in pinned.error_db:
                lines.set(2 * k + 1, pinned.times / scale, pinned.error_db[name])
            else:
                lines.clear(2 * k + 1)

    def _show_angle(self, m: Measurement, pinned: Measurement | None) -> None:
        a = m.angles
        lines = self.angle
        if a is None:
            for k in range(3):
                lines.clear(k)
            return
        lines.set(0, a.angles_deg, a.measured_db)
        lines.set(1, a.angles_deg, a.theory_db)
        b = pinned.angles if pinned is not None else None
        if b is not None:
            lines.set(2, b.angles_deg, b.measured_db)
        else:
            lines.clear(2)

    def _show_profiles(self, m: Measurement) -> None:
        """sigma and alpha, kappa, b and c against depth for one CPML side: the
        first with a profile of the user's own, else the first."""
        tables = layer_tables(m.scenario)
        own = [name for name in tables if getattr(m.scenario.boundary, name).profile is not None]
        side = (own or list(tables) or [None])[0]
        t = tables.get(side)
        scale, unit = length_unit(t.node_depth[-1]) if t is not None else (1e-3, "mm")
        columns = (("sigma", "alpha"), ("kappa",), ("b", "c"))
        for (title, lines), names in zip(self.profiles, columns):
            lines.fig.title.text = f"{side + ' ' if side else ''}layer: {title}"
            lines.fig.xaxis.axis_label = f"depth ({unit})"
            for k, name in enumerate(names):
                if t is None:
                    lines.clear(k)
                else:
                    lines.set(k, t.node_depth / scale, getattr(t, f"node_{name}"))
