"""The problem as data: validation, units, hashing, TOML round trip."""

import math
import warnings

import pytest

from quietlayer.engine import (Block, Boundary, Probe, Profile, ResolutionWarning, Scenario,
                               ScenarioError, Side, Source, parse_frequency, parse_length)


def basic(**kw):
    base = dict(dx="1 mm", dy="1 mm", nx=50, ny=40, steps=200,
                source=Source(x=25, y=20, f_max="10 GHz"),
                probes=(Probe("front", 25, 30),))
    base.update(kw)
    return Scenario(**base)


@pytest.mark.parametrize("text, metres", [("1 mm", 1e-3), ("0.5um", 0.5e-6), ("2.5 µm", 2.5e-6),
                                          ("3e-3", 3e-3), (0.002, 0.002), ("12 cm", 0.12)])
def test_lengths_with_units(text, metres):
    assert parse_length("dx", text) == pytest.approx(metres, rel=1e-15)


@pytest.mark.parametrize("text, hertz", [("2.4 GHz", 2.4e9), ("300 MHz", 3e8), ("1thz", 1e12), (5e9, 5e9)])
def test_frequencies_with_units(text, hertz):
    assert parse_frequency("f_max", text) == pytest.approx(hertz, rel=1e-15)


@pytest.mark.parametrize("field, value", [("dx", "1 furlong"), ("dx", "mm"), ("dx", True), ("dx", None)])
def test_bad_length_names_the_field(field, value):
    with pytest.raises(ScenarioError) as err:
        basic(**{field: value})
    assert err.value.field == field


@pytest.mark.parametrize("changes, field, allowed", [
    (dict(courant=1.5), "courant", "<= 1"),
    (dict(courant=0.0), "courant", "> 0"),
    (dict(eps_r=0.5), "eps_r", ">= 1"),
    (dict(sigma=-1.0), "sigma", ">= 0"),
    (dict(nx=1), "nx", "2 to 20000"),
    (dict(steps=0), "steps", "1 to"),
    (dict(polarization="TM"), "polarization", "'TMz', 'TEz'"),
    (dict(precision="float16"), "precision", "'float32', 'float64'"),
    (dict(dx=-1e-3), "dx", ">= 1e-12"),
    (dict(probes=(Probe("x", 60, 1),)), "probe[x].x", "0..50"),
    (dict(probes=(Probe("a", 1, 1), Probe("a", 2, 2))), "probe.name", "one probe only"),
])
def test_invalid_values_name_field_value_and_range(changes, field, allowed):
    with pytest.raises(ScenarioError) as err:
        basic(**changes)
    assert err.value.field == field
    assert allowed in str(err.value)
    assert repr(err.value.value) in str(err.value)


@pytest.mark.parametrize("kwargs, field", [
    (dict(order=0), "layer.order"), (dict(kappa_max=0.5), "layer.kappa_max"),
    (dict(alpha_max=-0.1), "layer.alpha_max"), (dict(cells=0), "layer.cells"),
    (dict(kind="sponge"), "layer.kind"), (dict(sigma_ratio=1.0, sigma_max=3.0), "layer.sigma_max"),
])
def test_invalid_layer_values(kwargs, field):
    with pytest.raises(ScenarioError) as err:
        Side(**kwargs)
    assert err.value.field == field


def test_side_errors_name_the_side():
    with pytest.raises(ScenarioError) as err:
        Scenario.from_dict({**basic().to_dict(), "layer": {"top": {"kappa_max": 0.2}}})
    assert err.value.field == "layer.top.kappa_max"


def test_periodic_sides_must_pair():
    with pytest.raises(ScenarioError) as err:
        Boundary(left=Side(kind="periodic"))
    assert err.value.field == "layer.right.kind"


def test_source_band_is_checked():
    with pytest.raises(ScenarioError) as err:
        Source(x=1, y=1, f_min="5 GHz", f_max="2 GHz")
    assert err.value.field == "source.f_min"
    with pytest.raises(ScenarioError) as err:
        Source(x=1, y=1, f_max="2 GHz", waveform="modulated_gaussian")
    assert err.value.field == "source.f_min"
    with pytest.raises(ScenarioError) as err:
        Source(x=1, y=1, f_max="2 GHz", waveform="square")
    assert err.value.field == "source.waveform"


def test_line_source_needs_a_periodic_axis():
    with pytest.raises(ScenarioError) as err:
        basic(source=Source(x=25, y=20, f_max="10 GHz", line="y"))
    assert err.value.field == "source.line"


def test_coarse_grid_warns():
    # Fewer than 10 cells per wavelength at f_max (common practice, no source).
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ResolutionWarning)
        s = basic(source=Source(x=25, y=20, f_max="40 GHz"))
    assert s.cells_per_wavelength == pytest.approx(7.49, abs=0.01)
    assert any(issubclass(w.category, ResolutionWarning) for w in caught)


def test_dense_block_counts_for_resolution():
    s = basic(blocks=(Block(0, 10, 0, 10, eps_r=4.0),))
    assert s.cells_per_wavelength == pytest.approx(299792458 / 10e9 / 2 / 1e-3)


def test_time_step_is_the_courant_fraction_of_the_2d_limit():
    # c dt <= 1 / sqrt(1/dx^2 + 1/dy^2) (Taflove & Hagness).
    s = basic(dx=1e-3, dy=2e-3, courant=0.5)
    assert s.dt == pytest.approx(0.5 / (299792458 * math.sqrt(1e6 + 0.25e6)), rel=1e-14)


def test_scenario_is_immutable():
    s = basic()
    with pytest.raises(AttributeError):
        s.nx = 10


def rich():
    side = Side(cells=12, order=3.5, sigma_ratio=0.8, kappa_max=5, alpha_max=0.02, alpha_order=1)
    return basic(title="A board edge (invented)", blocks=(Block(-math.inf, math.inf, 0, 5, 4.4, 0.01, "substrate"),),
                 boundary=Boundary(left=side, right=side, bottom=Side(kind="wall"),
                                   top=Side(cells=8, sigma_max=2.5)),
                 polarization="TEz", precision="float64")


def test_toml_round_trip_and_stable_hash():
    s = rich()
    text = s.to_toml()
    again = Scenario.from_toml(text)
    assert again == s
    assert again.key() == s.key()
    assert again.to_toml() == text
    # the hash is a pure function of the content: fixed across processes
    assert s.key() == Scenario.from_dict(s.to_dict()).key()
    assert len(s.key()) == 64


def test_hash_tracks_layer_but_reference_key_does_not():
    s = rich()
    t = s.with_changes(boundary=Boundary.all_sides(Side(cells=5)))
    assert s.key() != t.key()
    assert s.reference_key() == t.reference_key()
    assert s.reference_key() != s.with_changes(steps=201).reference_key()
    periodic = s.with_changes(boundary=Boundary(left=Side(kind="periodic"), right=Side(kind="periodic")))
    assert periodic.reference_key() != s.reference_key()
    assert s.with_changes(title="other").key() == s.key()


def test_shared_layer_keys_with_side_overrides():
    data = basic().to_dict()
    data["layer"] = {"cells": 6, "order": 4, "top": {"kind": "wall"}}
    s = Scenario.from_dict(data)
    assert s.boundary.left.cells == 6 and s.boundary.left.order == 4
    assert s.boundary.top.kind == "wall"


@pytest.mark.parametrize("mutate, field", [
    (lambda d: d.pop("dx"), "dx"),
    (lambda d: d.__setitem__("colour", "red"), "colour"),
    (lambda d: d["source"].pop("f_max"), "source.f_max"),
    (lambda d: d["source"].__setitem__("waveform", "sawtooth"), "source.waveform"),
    (lambda d: d.__setitem__("nx", "many"), "nx"),
    (lambda d: d.__setitem__("layer", {"left": {"cells": -3}}), "layer.left.cells"),
])
def test_bad_files_raise_named_errors(mutate, field):
    data = basic().to_dict()
    mutate(data)
    with pytest.raises(ScenarioError) as err:
        Scenario.from_dict(data)
    assert err.value.field == field


def test_malformed_toml_is_a_scenario_error():
    with pytest.raises(ScenarioError) as err:
        Scenario.from_toml("dx = = 3")
    assert err.value.field == "file"


def test_profile_validation():
    with pytest.raises(ScenarioError) as err:
        Profile(depth=(0, 1e-3, 0.5e-3), sigma=(0, 1, 2), kappa=(1, 1, 1), alpha=(0, 0, 0))
    assert err.value.field == "profile.depth"
    with pytest.raises(ScenarioError) as err:
        Profile(depth=(0, 1e-3), sigma=(0, 1), kappa=(1, 0.5), alpha=(0, 0))
    assert err.value.field == "profile.kappa"
    short = Profile(depth=(0, 5e-3), sigma=(0, 1), kappa=(1, 1), alpha=(0, 0))
    with pytest.raises(ScenarioError) as err:
        basic(boundary=Boundary.all_sides(Side(cells=10, profile=short)))
    assert err.value.field == "layer.left.profile.depth"
