"""The default measurement scenario and probe sets.

The default is an invented bench: 1 mm cells in air, an 80 x 200 cell
interior, a differentiated-Gaussian pulse for 1..15 GHz (20 cells per
wavelength at 15 GHz), the source 12 cells in front of the right face, and a
row of probes 3 cells in front of that face placed so that the specular
echoes reach them at 0, 10, ..., 80 degrees of incidence, plus one probe in
the top-right corner.  The run (600 steps) lets the grazing echoes and the
corner's arrive and die out.  So the headline figure, the worst peak error
over these probes, covers normal to grazing incidence and a corner: the
cases that decide whether a layer is good enough.
"""

from __future__ import annotations

import math

from .scenario import Boundary, Probe, Scenario, Side, Source

FACE_GAP = 3  # cells between the probe row and the layer face
ANGLES_DEG = tuple(range(0, 81, 10))


def angle_probes(nx: int, ny: int, sx: int, sy: int, gap: int = FACE_GAP,
                 angles_deg=ANGLES_DEG) -> tuple[Probe, ...]:
    """Probes `gap` cells in front of the right face (x = nx) whose specular
    echo from that face arrives at the given incidence angles (image source
    at x = 2 nx - sx), those that fit inside the interior, plus the corner."""
    px = nx - gap
    run = nx - sx + gap  # x-distance from the image source to the probe row
    probes, used = [], set()
    for angle in angles_deg:
        y = sy + round(run * math.tan(math.radians(angle)))
        if y > ny - gap or y in used:
            continue
        used.add(y)
        probes.append(Probe(f"right {angle:g} deg", px, y))
    probes.append(Probe("corner", px, ny - gap))
    return tuple(probes)


def default_scenario(layer: Side | None = None, **changes) -> Scenario:
    """The default bench with a 10-cell CPML at sigma_opt (m = 3) on every side."""
    nx, ny, sx, sy = 80, 200, 68, 60
    side = layer if layer is not None else Side(kind="cpml", cells=10, order=3.0, sigma_ratio=1.0)
    base = dict(title="Measurement bench (invented demo)", dx=1e-3, dy=1e-3, nx=nx, ny=ny, steps=600,
                courant=0.99, precision="float32",
                source=Source(x=sx, y=sy, f_min=1e9, f_max=15e9, waveform="diff_gaussian"),
                probes=angle_probes(nx, ny, sx, sy), boundary=Boundary.all_sides(side))
    base.update(changes)
    return Scenario(**base)
