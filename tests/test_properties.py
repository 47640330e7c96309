"""Property-based checks (hypothesis): valid scenarios run to finite fields;
invalid ones always raise ScenarioError naming the field."""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from quietlayer.engine import (WAVEFORMS, Block, Boundary, Probe, Scenario, ScenarioError, Side,
                               Source, simulate)

cells = st.integers(4, 24)


@st.composite
def sides(draw):
    kind = draw(st.sampled_from(["cpml", "cpml", "wall"]))
    if kind == "wall":
        return Side(kind="wall")
    sigma = draw(st.one_of(st.builds(dict, sigma_ratio=st.floats(0.0, 5.0)),
                           st.builds(dict, sigma_max=st.floats(0.0, 50.0))))
    return Side(kind="cpml", cells=draw(st.integers(1, 8)), order=draw(st.floats(0.5, 6.0)),
                kappa_max=draw(st.floats(1.0, 20.0)), alpha_max=draw(st.floats(0.0, 0.5)),
                alpha_order=draw(st.floats(0.0, 3.0)), **sigma)


@st.composite
def boundaries(draw):
    left, right, bottom, top = (draw(sides()) for _ in range(4))
    if draw(st.booleans()):
        left = right = Side(kind="periodic")
    if draw(st.booleans()):
        bottom = top = Side(kind="periodic")
    return Boundary(left=left, right=right, bottom=bottom, top=top)


@st.composite
def scenarios(draw):
    nx, ny = draw(cells), draw(cells)
    d = draw(st.floats(1e-6, 1e-2))
    waveform = draw(st.sampled_from(WAVEFORMS))
    f_max = draw(st.floats(0.02, 0.1)) * 3e8 / d
    f_min = draw(st.floats(0.1, 0.8)) * f_max if waveform == "modulated_gaussian" else 0.0
    blocks = tuple(Block(x0=draw(st.floats(-30, 20)), x1=draw(st.floats(21, 60)),
                         y0=draw(st.floats(-30, 20)), y1=draw(st.one_of(st.just(math.inf), st.floats(21, 60))),
                         eps_r=draw(st.floats(1.0, 50.0)), sigma=draw(st.floats(0.0, 100.0)))
                   for _ in range(draw(st.integers(0, 2))))
    boundary = draw(boundaries())
    lines = [""] + (["y"] if boundary.periodic_y else []) + (["x"] if boundary.periodic_x else [])
    return Scenario(dx=d, dy=d * draw(st.floats(0.5, 2.0)), nx=nx, ny=ny,
                    steps=draw(st.integers(1, 150)), courant=draw(st.floats(0.05, 1.0)),
                    eps_r=draw(st.floats(1.0, 12.0)), sigma=draw(st.floats(0.0, 5.0)),
                    polarization=draw(st.sampled_from(["TMz", "TEz"])),
                    precision=draw(st.sampled_from(["float32", "float64"])),
                    source=Source(x=draw(st.integers(0, nx)), y=draw(st.integers(0, ny)), f_max=f_max,
                                  f_min=f_min, waveform=waveform,
                                  line=draw(st.sampled_from(lines))),
                    probes=(Probe("p", draw(st.integers(0, nx)), draw(st.integers(0, ny))),),
                    blocks=blocks, boundary=boundary)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scenarios())
def test_valid_scenarios_give_finite_fields(s):
    r = simulate(s, keep_fields=True)
    for a in r.state:
        assert np.all(np.isfinite(a))
    assert np.all(np.isfinite(r.probes["p"]))
    assert Scenario.from_toml(s.to_toml()) == s


# each entry: the field the error must name, and a strategy of bad values
BAD_VALUES = {
    "courant": st.one_of(st.floats(1.0, 100.0, exclude_min=True), st.floats(-5.0, 0.0), st.just(math.nan)),
    "eps_r": st.one_of(st.floats(-10.0, 1.0, exclude_max=True), st.just(math.inf)),
    "sigma": st.floats(-1e6, 0.0, exclude_max=True),
    "nx": st.one_of(st.integers(-100, 1), st.integers(20_001, 10**9), st.just(3.5)),
    "ny": st.one_of(st.integers(-100, 1), st.text(max_size=3)),
    "steps": st.integers(-10, 0),
    "dx": st.one_of(st.floats(-1.0, 0.0), st.just("1 parsec"), st.just("")),
    "polarization": st.text(max_size=4),
    "precision": st.sampled_from(["float16", "double", ""]),
}


@settings(max_examples=120, deadline=None)
@given(st.data())
def test_invalid_scenarios_raise_named_error(data):
    field = data.draw(st.sampled_from(sorted(BAD_VALUES)))
    value = data.draw(BAD_VALUES[field])
    base = dict(dx=1e-3, dy=1e-3, nx=20, ny=20, steps=10, source=Source(x=10, y=10, f_max=1e10))
    base[field] = value
    with pytest.raises(ScenarioError) as err:
        Scenario(**base)
    assert err.value.field == field


LAYER_BAD = {
    "order": st.one_of(st.floats(-5.0, 0.0), st.floats(20.0, 1e3, exclude_min=True)),
    "kappa_max": st.floats(-5.0, 1.0, exclude_max=True),
    "alpha_max": st.floats(-5.0, 0.0, exclude_max=True),
    "cells": st.one_of(st.integers(-5, 0), st.integers(501, 10**6)),
    "sigma_ratio": st.floats(-5.0, 0.0, exclude_max=True),
    "kind": st.text(max_size=6).filter(lambda t: t not in ("cpml", "wall", "periodic")),
}


@settings(max_examples=80, deadline=None)
@given(st.data())
def test_invalid_layers_raise_named_error(data):
    key = data.draw(st.sampled_from(sorted(LAYER_BAD)))
    value = data.draw(LAYER_BAD[key])
    side = data.draw(st.sampled_from(["left", "right", "bottom", "top"]))
    base = dict(dx=1e-3, dy=1e-3, nx=20, ny=20, steps=10, source={"x": 10, "y": 10, "f_max": 1e10},
                layer={side: {key: value}})
    with pytest.raises(ScenarioError) as err:
        Scenario.from_dict(base)
    assert err.value.field == f"layer.{side}.{key}"
