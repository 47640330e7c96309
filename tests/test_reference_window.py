"""The reflection-free reference stepped on its light-cone window equals the
full reference run bit for bit on the interior.

Why it can: on the Yee grid (Yee 1966; Taflove & Hagness, ch. 3) the update
of a node reads only its nearest neighbours, so a disturbance moves at most
one node per step along one axis (the L1 domain of dependence).  Cells the
source has not reached are still exactly zero, and cells that cannot reach
the interior before the last step never influence what is recorded.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from quietlayer.engine import Block, Boundary, Probe, Scenario, Side, Source
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.reference import compute_reference, reference_scenario
from quietlayer.engine.simulate import ConeStepper, simulate


def same_reference(s: Scenario):
    cone = compute_reference(s, light_cone=True)
    full = compute_reference(s, light_cone=False)
    assert cone.probes.keys() == full.probes.keys()
    for name in full.probes:
        assert np.array_equal(cone.probes[name], full.probes[name]), name
    assert cone.frames.shape == full.frames.shape and cone.frames.size > 0
    assert np.array_equal(cone.frames, full.frames)
    assert np.array_equal(cone.frame_steps, full.frame_steps)
    return cone, full


@pytest.mark.parametrize("precision", ["float32", "float64"])
def test_demo_reference_is_bitwise_the_full_one(precision):
    s = default_scenario(precision=precision, steps=300)
    cone, full = same_reference(s)
    # the run is long enough for the field to have reached every probe
    assert all(np.abs(v).max() > 0 for v in full.probes.values())


def test_lossy_host_and_a_block_reaching_the_wall():
    # a substrate that leaves the grid goes on to infinity in the reference, so it
    # crosses the window's edge; a lossy host gives per-node update coefficients
    s = default_scenario(steps=260, nx=60, ny=90, sigma=0.02, eps_r=2.2,
                         source=Source(x=40, y=30, f_min=1e9, f_max=12e9, waveform="diff_gaussian"),
                         probes=(Probe("a", 50, 30), Probe("b", 10, 80)),
                         blocks=(Block(30, math.inf, -math.inf, 20, eps_r=4.4, sigma=0.01, name="substrate"),
                                 Block(5, 15, 40, 50, eps_r=3.0, name="inside")))
    same_reference(s)


def test_plane_wave_across_a_periodic_axis_and_tez():
    layer = Side(kind="cpml", cells=8, order=3.0, sigma_ratio=1.0)
    s = Scenario(dx=1e-3, dy=1e-3, nx=140, ny=4, steps=240, courant=0.99, precision="float64",
                 polarization="TEz",
                 source=Source(x=100, y=1, f_min=1e9, f_max=15e9, waveform="diff_gaussian", line="y"),
                 probes=(Probe("front", 130, 2), Probe("back", 20, 1)),
                 boundary=Boundary(left=layer, right=layer, bottom=Side(kind="periodic"), top=Side(kind="periodic")))
    same_reference(s)


def test_two_threads_give_the_same_bits_as_one():
    s = default_scenario(steps=200)
    ref, (mx, my) = reference_scenario(s)
    target = (mx, mx + s.nx, my, my + s.ny)
    one = simulate(ref, light_cone=target, threads=1)
    two = simulate(ref, light_cone=target, threads=2)
    for name in one.probes:
        assert np.array_equal(one.probes[name], two.probes[name]), name


def test_the_window_refuses_a_grid_with_a_layer():
    s = default_scenario(steps=50)
    with pytest.raises(ValueError, match="without a layer"):
        simulate(s, light_cone=(10, 20, 10, 20))
