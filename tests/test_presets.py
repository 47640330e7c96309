"""Shipped presets load, and the demo is the engine's default bench."""

from quietlayer.assets import preset_names, preset_path
from quietlayer.engine import Scenario
from quietlayer.engine.defaults import default_scenario


def test_every_preset_loads():
    names = preset_names()
    assert "demo" in names
    for name in names:
        s = Scenario.from_toml(preset_path(name).read_text("utf-8"))
        assert "invented" in s.title.lower()


def test_demo_preset_is_the_default_bench():
    assert Scenario.from_toml(preset_path("demo").read_text("utf-8")) == default_scenario()
