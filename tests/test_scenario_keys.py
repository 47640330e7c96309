"""The scenario-file reference (assets/scenario-file.md) against the reader:
the committed page is the generated one, every documented key is taken by
the reader and every key the reader takes is documented, and a value out of
range is refused with a one-line message naming the key and the range the
page gives."""

from __future__ import annotations

import copy
import re

import pytest
import tomli_w

from quietlayer.engine.errors import ScenarioError
from quietlayer.engine.scenario import Scenario
from quietlayer.engine.scenario_file import ScenarioFileError, load_scenario
from quietlayer.engine.scenario_keys import KEYS, REQUIRED
from quietlayer.engine.scenario_reference import PAGE, default_of, main, reference_page

BASE = {
    "title": "keys", "dx": 0.001, "dy": 0.001, "nx": 40, "ny": 40, "steps": 200,
    "source": {"x": 20, "y": 20, "f_max": 15e9, "f_min": 1e9},
    "probes": [{"name": "p", "x": 30, "y": 20}],
    "blocks": [{"name": "b", "x0": 5, "x1": 10, "y0": 5, "y1": 10}],
    "layer": {"cells": 10, "right": {}},
}
PROFILE = {"depth": [0.0, 0.005, 0.012], "sigma": [0.0, 1.0, 4.0], "kappa": [1.0, 1.0, 1.0],
           "alpha": [0.0, 0.0, 0.0]}
# the field a refusal names for a key of each table (see Scenario's validation)
FIELD = {"": "{name}", "source": "source.{name}", "probes": "probe[p].{name}", "blocks": "block[b].{name}",
         "layer": "layer.right.{name}"}
SECTIONS_AT_TOP = {"source", "probes", "blocks", "layer"}


def _with(key, value, shared: bool = False) -> dict:
    """BASE with `key` set to `value` where a file would write it."""
    data = copy.deepcopy(BASE)
    if key.table == "":
        data[key.name] = value
    elif key.table == "source":
        data["source"][key.name] = value
    elif key.table in ("probes", "blocks"):
        data[key.table][0][key.name] = value
    elif key.table == "layer":
        (data["layer"] if shared else data["layer"]["right"])[key.name] = value
    else:  # a column of an inline profile
        data["layer"]["right"]["profile"] = {**PROFILE, key.name: value}
    return data


def _profile_csv(folder) -> None:
    (folder / "my_profile.csv").write_text("depth,sigma,kappa,alpha\n0,0,1,0\n0.006,2,1.5,0\n0.012,8,3,0\n")


def test_committed_page_is_the_generated_one(capsys):
    assert PAGE.read_text("utf-8") == reference_page(), \
        "assets/scenario-file.md is stale: run python -m quietlayer.engine.scenario_reference --write"
    assert main([]) == 0 and capsys.readouterr().out == reference_page()
    assert main(["--nonsense"]) == 2


def test_page_lists_every_key_with_its_range():
    page = reference_page()
    for key in KEYS:
        row = next((line for line in page.splitlines() if line.startswith(f"| `{key.name}` |")
                    and key.about.replace("|", "\\|") in line), None)
        assert row is not None, key.path
        if key.range is not None and not key.range.allow_inf:
            assert key.range.text() in row, key.path


@pytest.mark.parametrize("key", KEYS, ids=lambda k: k.path)
def test_every_documented_key_is_taken_by_the_reader(key, tmp_path):
    _profile_csv(tmp_path)
    base = Scenario.from_dict(copy.deepcopy(BASE))
    placements = [False, True] if key.table == "layer" else [False]  # [layer.right] and [layer] for every side
    for shared in placements:
        s = Scenario.from_dict(_with(key, key.example, shared), base_dir=tmp_path)
        if key.table == "profile":
            assert list(getattr(s.boundary.right.profile, key.name)) == key.example
        elif key.example != default_of(key) and key.name != "name":  # (names are not compared)
            assert s.to_dict() != base.to_dict(), f"{key.path} = {key.example!r} changed nothing"


@pytest.mark.parametrize("where, documented_table", [
    ((), ""), (("source",), "source"), (("probes", 0), "probes"), (("blocks", 0), "blocks"),
    (("layer",), "layer"), (("layer", "right"), "layer"), (("layer", "right", "profile"), "profile")])
def test_every_key_the_reader_takes_is_documented(where, documented_table):
    # the reader's own list of known keys, from its refusal of an unknown one
    data = copy.deepcopy(BASE)
    data["layer"]["right"]["profile"] = dict(PROFILE)
    table = data
    for step in where:
        table = table[step]
    table["no_such_key"] = 1
    with pytest.raises(ScenarioError) as refused:
        Scenario.from_dict(data)
    assert refused.value.field.endswith(".no_such_key") or refused.value.field == "no_such_key"
    known = set(re.fullmatch(r"a known key \((.*)\)", refused.value.allowed).group(1).split(", "))
    documented = {k.name for k in KEYS if k.table == documented_table}
    if documented_table == "":
        documented |= SECTIONS_AT_TOP
    assert known == documented


RANGED = [(k, v) for k in KEYS if k.range is not None for v in k.range.outside()]
CHOSEN = [(k, "nonsense") for k in KEYS if k.choices]


@pytest.mark.parametrize("key, value", RANGED + CHOSEN, ids=lambda x: getattr(x, "path", repr(x)))
def test_a_value_out_of_range_is_refused_naming_key_and_range(key, value, tmp_path):
    path = tmp_path / "s.toml"
    path.write_text(tomli_w.dumps(_with(key, value)))
    with pytest.raises(ScenarioFileError) as refused:
        load_scenario(path)
    field = FIELD[key.table].format(name=key.name)
    line = str(refused.value)
    assert "\n" not in line and line.startswith(f"{path}, line ")
    assert f": {field} = " in line and line.endswith(f"is not allowed: {key.allowed()}"), line
    # the line number points at the key
    number = int(line.split(", line ")[1].split(":")[0])
    assert re.search(rf"(?<![\w.]){re.escape(key.name)}\s*=", path.read_text().splitlines()[number - 1])


@pytest.mark.parametrize("key", [k for k in KEYS if default_of(k) == REQUIRED], ids=lambda k: k.path)
def test_a_required_key_left_out_is_refused(key):
    data = _with(key, None)
    table = {"": data, "source": data["source"], "probes": data["probes"][0], "blocks": data["blocks"][0],
             "profile": data["layer"]["right"].get("profile")}[key.table]
    del table[key.name]
    with pytest.raises(ScenarioError) as refused:
        Scenario.from_dict(data)
    assert refused.value.field.endswith(key.name)


MINIMAL = {"dx": 0.001, "dy": 0.001, "nx": 40, "ny": 40, "source": {"x": 20, "y": 20, "f_max": 15e9},
           "blocks": [{"x0": 5, "x1": 10, "y0": 5, "y1": 10}]}


# sigma_ratio and sigma_max depend on each other; a profile has no default but none
LINKED = ("layer.sigma_ratio", "layer.sigma_max", "layer.profile", "layer.profile_file")


@pytest.mark.parametrize("key", [k for k in KEYS if k.table in ("", "source", "blocks", "layer")
                                 and default_of(k) != REQUIRED and k.path not in LINKED], ids=lambda k: k.path)
def test_documented_default_is_what_the_reader_fills_in(key):
    s = Scenario.from_dict(copy.deepcopy(MINIMAL))
    owner = {"": s, "source": s.source, "blocks": s.blocks[0], "layer": s.boundary.left}[key.table]
    assert getattr(owner, key.name) == default_of(key)


def test_sigma_ratio_is_one_unless_sigma_max_is_given():
    # the two documented defaults that depend on each other
    s = Scenario.from_dict(copy.deepcopy(MINIMAL))
    assert (s.boundary.left.sigma_ratio, s.boundary.left.sigma_max) == (1.0, None)
    data = copy.deepcopy(MINIMAL)
    data["layer"] = {"sigma_max": 5.0}
    s = Scenario.from_dict(data)
    assert (s.boundary.left.sigma_ratio, s.boundary.left.sigma_max) == (None, 5.0)


@pytest.mark.parametrize("path, value, field, words", [
    ("source.f_max", 0.0, "source.f_max", "> 0 Hz"),
    ("source.f_min", "20 GHz", "source.f_min", "f_min < f_max"),
    ("source.x", 41, "source.x", "0..40"),
    ("probes.y", 41, "probe[p].y", "0..40"),
    ("blocks.x1", 4, "block[b].x1", "> x0"),
    ("blocks.name", "b" * 201, "block.name", "at most 200 characters"),
    ("title", "t" * 201, "title", "at most 200 characters"),
    ("probes.name", " ", "probe.name", "non-empty"),
    ("source.line", "y", "source.line", "periodic"),
    ("courant", 1e-9, "courant", "2,000,000 steps"),
    ("dx", "1 furlong", "dx", "a unit among"),
    ("layer.sigma_max", 5.0, "layer.right.sigma_max", "give one of the two"),
], ids=lambda x: x if isinstance(x, str) and len(x) < 30 else "…")
def test_documented_rules_are_enforced(path, value, field, words):
    # the relations the page's "allowed" column states beside the plain ranges
    key = next(k for k in KEYS if k.path == path)
    data = _with(key, value)
    if path == "layer.sigma_max":
        data["layer"]["right"]["sigma_ratio"] = 1.0
    with pytest.raises(ScenarioError) as refused:
        Scenario.from_dict(data)
    assert refused.value.field.startswith(field) and words in refused.value.allowed, str(refused.value)
