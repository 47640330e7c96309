"""The NumPy twin of the kernels (used for a page's first results while the
kernels compile) gives bitwise the fields of the compiled kernels.

Both evaluate the same update equations (the Yee scheme with the CFS-CPML
recursive convolution of Roden & Gedney 2000, as in kernels.py) with the
same operations in the same order and precision; IEEE 754 arithmetic then
rounds every operation identically.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from quietlayer.engine import Block, Boundary, Probe, Scenario, Side, Source
from quietlayer.engine import backend, kernels_numpy
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.measure import measure
from quietlayer.engine.reference import ReferenceCache, compute_reference
from quietlayer.engine.simulate import simulate


@pytest.fixture
def numpy_loops(monkeypatch):
    def use():
        monkeypatch.setattr(backend, "loops", lambda: kernels_numpy)
    return use


def both(s: Scenario, numpy_loops, **kw):
    compiled = simulate(s, keep_fields=True, **kw)
    numpy_loops()
    twin = simulate(s, keep_fields=True, **kw)
    return compiled, twin


def assert_same(a, b):
    for name in a.probes:
        assert np.array_equal(a.probes[name], b.probes[name]), name
    for name in a.fields:
        assert np.array_equal(a.fields[name], b.fields[name]), name
    assert np.array_equal(a.snapshots, b.snapshots)


@pytest.mark.parametrize("precision", ["float32", "float64"])
def test_demo_run_with_a_graded_cfs_layer(numpy_loops, precision):
    layer = Side(kind="cpml", cells=10, order=3.0, sigma_ratio=1.2, kappa_max=5.0, alpha_max=0.05)
    s = default_scenario(layer=layer, precision=precision, steps=220)
    assert_same(*both(s, numpy_loops, snapshot_every=20))


def test_tez_lossy_blocks_and_mixed_sides(numpy_loops):
    layer = Side(kind="cpml", cells=7, order=2.5, sigma_ratio=0.8, kappa_max=3.0, alpha_max=0.02)
    s = default_scenario(polarization="TEz", precision="float64", steps=180, nx=50, ny=70, sigma=0.01,
                         source=Source(x=30, y=30, f_min=1e9, f_max=12e9, waveform="diff_gaussian"),
                         probes=(Probe("a", 40, 30), Probe("b", 5, 60)),
                         blocks=(Block(20, math.inf, -math.inf, 15, eps_r=4.4, sigma=0.02),),
                         boundary=Boundary(left=Side(kind="wall"), right=layer, bottom=layer, top=layer))
    assert_same(*both(s, numpy_loops, snapshot_every=30))


def test_periodic_strip(numpy_loops):
    layer = Side(kind="cpml", cells=8, order=3.0, sigma_ratio=1.0, kappa_max=2.0, alpha_max=0.03)
    s = Scenario(dx=1e-3, dy=1e-3, nx=90, ny=6, steps=200, courant=0.99, precision="float32",
                 source=Source(x=60, y=1, f_min=1e9, f_max=15e9, waveform="diff_gaussian", line="y"),
                 probes=(Probe("front", 80, 2),),
                 boundary=Boundary(left=layer, right=layer, bottom=Side(kind="periodic"), top=Side(kind="periodic")))
    assert_same(*both(s, numpy_loops))


def test_light_cone_reference_and_scores(numpy_loops):
    s = default_scenario(steps=240)
    compiled_ref = compute_reference(s)
    compiled = measure(s, cache=ReferenceCache(use_disk=False))
    numpy_loops()
    twin_ref = compute_reference(s)
    twin = measure(s, cache=ReferenceCache(use_disk=False))
    for name in compiled_ref.probes:
        assert np.array_equal(compiled_ref.probes[name], twin_ref.probes[name]), name
    assert np.array_equal(compiled_ref.frames, twin_ref.frames)
    assert twin.peak_db == compiled.peak_db
    # the global score sums in another order: equal to far below the 0.1 dB shown
    assert twin.global_db == pytest.approx(compiled.global_db, abs=1e-9)
