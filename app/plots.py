"""HoloViews figures of a Measurement (presentation only: the numbers come
from the engine)."""

from __future__ import annotations

import math

import holoviews as hv
import numpy as np

from quietlayer.engine.layer import layer_tables
from quietlayer.engine.measure import Measurement, to_db

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
    """sigma and alpha, kappa, b and c against depth for the first CPML side."""
    tables = layer_tables(m.scenario) if m is not None else {}
    side = next(iter(tables), None)
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
    figures = [field_image(m, frame, False), field_image(m, frame, True), spectrum_plot(m, None),
               error_plot(m, None), angle_plot(m, None)]
    return figures + list(profile_plots(m))


def finite_or_dash(value: float, fmt: str = "{:.1f}") -> str:
    return fmt.format(value) if value is not None and math.isfinite(value) else "–"
