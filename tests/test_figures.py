"""The live figures (app/figures.py) fed with real measurements of small
scenarios: where blocks are drawn, the geometry of the field images, the
legends, the profile plots' sides and ranges, and the pinned A's marker.
Each scenario is a tiny grid (a few thousand cells, 150-250 steps), so a
measurement takes milliseconds once the kernels are compiled."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.constants import epsilon_0, mu_0

from quietlayer.app.figures import KEYS, LiveFigures
from quietlayer.engine import Block, Boundary, Probe, Scenario, Side, Source, layer_table
from quietlayer.engine.defaults import angle_probes
from quietlayer.engine.measure import measure

PARTS = frozenset({"probes", "spectra", "angles", "global", "snapshots"})  # what the page asks for
INF = math.inf
LAYER = Side(cells=6, order=3, sigma_ratio=1.0)


def small(dx="1 mm", dy="1 mm", nx=30, ny=40, probes=None, blocks=(), boundary=None, steps=180) -> Scenario:
    """A small air-filled cell, the source 8 cells in front of the right face."""
    sx, sy = nx - 8, min(15, ny // 2)
    if probes is None:
        probes = (Probe("front", nx - 3, sy), Probe("right edge", nx - 3, ny - 10), Probe("corner", nx - 3, ny - 3))
    return Scenario(dx=dx, dy=dy, nx=nx, ny=ny, steps=steps, courant=0.99,
                    source=Source(x=sx, y=sy, f_min="1 GHz", f_max="10 GHz"), probes=probes, blocks=blocks,
                    boundary=boundary or Boundary.all_sides(LAYER))


def shown(s: Scenario, pinned=None, figures: LiveFigures | None = None) -> LiveFigures:
    live = figures or LiveFigures()
    live.show(measure(s, parts=PARTS), pinned)
    return live


def visible_rows(fig) -> list:
    return [item for legend in fig.legend if legend.visible for item in legend.items if item.visible]


def row_has_data(item) -> bool:
    return any(len(r.data_source.data["x"]) > 0 for r in item.renderers)


# --- blocks -------------------------------------------------------------------------

BLOCKS = (Block(x0=5, x1=12, y0=-INF, y1=8, eps_r=4.3, sigma=0.01, name="substrate"),
          Block(x0=-INF, x1=-2, y0=20, y1=25, eps_r=2.0, name="in the layer only"))


@pytest.mark.parametrize("dx, dy", [("1 mm", "1 mm"), ("2 mm", "1 mm")])
def test_blocks_are_outlined_on_the_cells_they_fill(dx, dy):
    s = small(dx=dx, dy=dy, blocks=BLOCKS)
    live = shown(s)
    ox, oy = s.offset
    for key in ("total", "reflected"):
        parts = live.images[key]
        outline = parts["blocks"].data
        image = parts["image"].data
        ncols, nrows = image["image"][0].shape[1], image["image"][0].shape[0]
        x0, y0, dw, dh = image["x"][0], image["y"][0], image["dw"][0], image["dh"][0]
        scale = s.dx / (dw / ncols)  # metres per display unit: one pixel is one cell
        assert math.isclose(s.dy / (dh / nrows), scale, rel_tol=1e-12)
        names = list(outline["name"])
        # the substrate: x from interior node 5 to 12, y from the image's lower edge to node 8
        k = names.index("substrate")
        assert outline["left"][k] * scale / s.dx == pytest.approx(5)
        assert outline["right"][k] * scale / s.dx == pytest.approx(12)
        assert outline["top"][k] * scale / s.dy == pytest.approx(8)
        assert outline["bottom"][k] == pytest.approx(y0)  # an infinite edge ends at the image's edge
        # ... and the pixel centred on the outline's left edge is the grid node of interior x = 5
        column = (outline["left"][k] - x0) / (dw / ncols) - 0.5
        assert column == pytest.approx(5 + (0 if key == "reflected" else ox))
        row = (outline["top"][k] - y0) / (dh / nrows) - 0.5
        assert row == pytest.approx(8 + (0 if key == "reflected" else oy))
        # the hover says what the block is
        assert outline["eps_r"][k] == "4.3" and outline["sigma"][k] == "0.01 S/m"
        assert outline["cells"][k] == "x 5 .. 12, y −∞ .. 8"
        # a block inside the layer shows on the whole grid only
        assert ("in the layer only" in names) == (key == "total")
        assert parts["blocks"] in [r.data_source for r in live.figures[key].renderers]


def test_blocks_follow_a_new_scenario_and_vanish_without_blocks():
    live = shown(small(blocks=BLOCKS))
    assert len(live.images["total"]["blocks"].data["name"]) == 2
    shown(small(), figures=live)
    assert all(len(live.images[key]["blocks"].data["name"]) == 0 for key in ("total", "reflected"))


# --- geometry -----------------------------------------------------------------------

@pytest.mark.parametrize("nx, ny", [(30, 40), (60, 6)])  # a plain cell, and a strip the frame cannot follow
def test_non_square_cells_keep_true_geometry(nx, ny):
    s = small(dx="2 mm", dy="1 mm", nx=nx, ny=ny, probes=(Probe("front", nx - 3, 3),))
    live = shown(s)
    grid_x, grid_y = s.total_cells_x, s.total_cells_y
    for key, (cols, rows) in (("total", (grid_x + 1, grid_y + 1)), ("reflected", (s.nx + 1, s.ny + 1))):
        fig, image = live.figures[key], live.images[key]["image"].data
        assert image["image"][0].shape == (rows, cols)
        # each pixel is one cell, dx wide and dy high (common practice, no source: the Yee cell's size)
        assert image["dw"][0] / image["dh"][0] == pytest.approx(cols * s.dx / (rows * s.dy), rel=1e-12)
        # one length per screen pixel along both axes: the picture is not stretched
        per_px_x = (fig.x_range.end - fig.x_range.start) / fig.frame_width
        per_px_y = (fig.y_range.end - fig.y_range.start) / fig.frame_height
        assert per_px_x == pytest.approx(per_px_y, rel=1e-9)
        # the whole image is in view
        assert fig.x_range.start <= image["x"][0] and fig.x_range.end >= image["x"][0] + image["dw"][0] - 1e-12
        assert fig.y_range.start <= image["y"][0] and fig.y_range.end >= image["y"][0] + image["dh"][0] - 1e-12
        assert fig.xaxis[0].axis_label == "x (cm)" and fig.yaxis[0].axis_label == "y (cm)"


# --- legends ------------------------------------------------------------------------

def test_legends_carry_the_users_probe_names_and_no_empty_rows():
    s = small()
    live = shown(s)
    for key in KEYS:
        for item in visible_rows(live.figures[key]):
            assert item.label.value.strip(), f"{key}: a blank legend row"
            assert row_has_data(item), f"{key}: legend row {item.label.value!r} has no curve"
    for key in ("spectrum", "error"):
        labels = [item.label.value for item in visible_rows(live.figures[key])]
        assert len(labels) == len(s.probes)
        for probe, label in zip(s.probes, labels):
            assert label.startswith(probe.name), (key, labels)
    angle = [item.label.value for item in visible_rows(live.figures["angle"])]
    assert angle == ["measured", "theory (plane wave)"]


def test_many_probes_show_a_few_by_their_own_names():
    nx, ny, sx, sy = 30, 60, 22, 15
    s = small(nx=nx, ny=ny, probes=angle_probes(nx, ny, sx, sy, angles_deg=range(0, 81, 10)))
    assert len(s.probes) > 6
    live = shown(s)
    names = {p.name for p in s.probes}
    labels = [item.label.value for item in visible_rows(live.figures["spectrum"])]
    assert 3 <= len(labels) <= 6 and len(set(labels)) == len(labels)
    assert all(any(label.startswith(name) for name in names) for label in labels)
    assert "right 0 deg" in labels  # a name that says its angle is kept as it is
    assert any(label.startswith("corner (") and label.endswith("°)") for label in labels)  # with its angle


# --- the pinned A -------------------------------------------------------------------

def _mentions_a(live: LiveFigures) -> dict:
    return {key: ("A" in live.figures[key].title.text.replace("A)", "A ").split()
                  or any("A" in item.label.value.split() for item in visible_rows(live.figures[key])))
            for key in ("spectrum", "error", "angle")}


def test_the_pinned_marker_shows_only_with_a_pin():
    s = small()
    a = measure(s, layer=Side(cells=6, order=2, sigma_ratio=0.5), parts=PARTS)
    live = shown(s)
    assert _mentions_a(live) == {"spectrum": False, "error": False, "angle": False}
    assert not any(len(live.spectrum.sources[3 * k + 2].data["x"]) for k in range(6))
    shown(s, pinned=a, figures=live)
    assert _mentions_a(live) == {"spectrum": True, "error": True, "angle": True}
    assert "dotted: A" in live.figures["spectrum"].title.text and "dotted: A" in live.figures["error"].title.text
    shown(s, figures=live)  # unpinned again
    assert _mentions_a(live) == {"spectrum": False, "error": False, "angle": False}


# --- the layer profiles -------------------------------------------------------------

def test_sigma_axis_follows_sigma_max_up_and_down():
    s = small()
    live = LiveFigures()
    fig = live.figures["profile0"]
    tops = []
    for ratio in (1.0, 4.0, 0.5):
        live.show(measure(s, layer=Side(cells=6, order=3, sigma_ratio=ratio), parts=PARTS))
        # sigma_max = ratio x sigma_opt, sigma_opt = 0.8 (m + 1) / (eta0 dx sqrt(eps_r)) (Taflove & Hagness),
        # eta0 from scipy.constants
        sigma_max = ratio * 0.8 * 4 / (math.sqrt(mu_0 / epsilon_0) * s.dx)
        drawn = max(max(r.data_source.data["y"], default=0) for r in fig.renderers)
        assert drawn == pytest.approx(sigma_max, rel=1e-9)
        assert fig.y_range.start == 0.0
        assert sigma_max <= fig.y_range.end <= 1.1 * sigma_max
        assert fig.x_range.end == pytest.approx(6 * s.dx / 1e-3)  # the layer's depth in mm
        tops.append(fig.y_range.end)
    assert tops[1] > tops[0] > tops[2]


def _profile_rows(live: LiveFigures, key: str) -> dict:
    return {item.label.value: item for item in visible_rows(live.figures[key])}


def test_each_side_with_a_layer_has_its_profile_and_the_others_are_named():
    thin = Side(cells=4, order=2, sigma_ratio=0.8, kappa_max=3.0, alpha_max=0.02)
    s = small(boundary=Boundary(left=LAYER, right=LAYER, bottom=thin, top=Side(kind="wall")))
    live = shown(s)
    for k, column in enumerate(("sigma", "kappa", "b")):
        rows = _profile_rows(live, f"profile{k}")
        assert set(rows) == {"left, right", "bottom"}
        for label, side in (("left, right", "right"), ("bottom", "bottom")):
            table = layer_table(s, side)
            solid = rows[label].renderers[0].data_source.data
            assert np.array_equal(solid["y"], getattr(table, f"node_{column}"))
            assert solid["x"] == pytest.approx(table.node_depth / 1e-3)
        note = live.profile_notes[k]
        assert note.visible and "top (wall)" in note.text
    # every side alike: one line for all of them, and no note
    shown(small(), figures=live)
    assert set(_profile_rows(live, "profile0")) == {"all sides"}
    assert not live.profile_notes[0].visible


def test_periodic_sides_are_named_and_leave_no_profile():
    periodic = Side(kind="periodic")
    s = small(boundary=Boundary(left=periodic, right=periodic, bottom=LAYER, top=Side(kind="wall")))
    live = shown(s)
    assert set(_profile_rows(live, "profile1")) == {"bottom"}
    text = live.profile_notes[1].text
    assert "left, right (periodic)" in text and "top (wall)" in text


def test_an_own_profile_is_named_in_its_legend_row():
    from quietlayer.engine import Profile
    depth = np.linspace(0, 6e-3, 13)
    own = Side(cells=6, profile=Profile(depth=tuple(depth), sigma=tuple(2e3 * (depth / 6e-3) ** 2),
                                        kappa=tuple(np.ones(13)), alpha=tuple(np.zeros(13))))
    s = small(boundary=Boundary(left=LAYER, right=own, bottom=LAYER, top=LAYER))
    rows = _profile_rows(shown(s), "profile0")
    assert set(rows) == {"left, bottom, top", "right (own profile)"}
    assert max(rows["right (own profile)"].renderers[0].data_source.data["y"]) == pytest.approx(2e3)
