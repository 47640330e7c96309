"""Scenario files on disk: the line of a bad key, profile files named in a scenario."""

import math
from pathlib import Path

import numpy as np
import pytest
import tomli_w
import tomllib

from quietlayer.engine import ETA0, Scenario, ScenarioError, Side, layer_table
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.export import profile_from_csv
from quietlayer.engine.measure import measure
from quietlayer.engine.scenario_file import ScenarioFileError, field_line, key_lines, load_scenario

DATA = Path(__file__).parent / "data"

# An invented scenario written the way people write TOML by hand: comments, a
# multi-line title holding text that looks like keys, dotted and quoted keys,
# an inline array of probes and an array of tables for the blocks.
HAND_WRITTEN = '''\
# a hand-written scenario [not a table]
title = """Bench
nx = 999
[layer]"""
dx = "1 mm"   # cell size
dy = "1 mm"
nx = 60
ny = 80
steps = 300
source.x = 40
source.y = 30
"source".f_max = "15 GHz"
probes = [
  { name = "front", x = 57, y = 30 },
  { name = "side", x = 40, y = 77 },   # [a bracket in a comment]
  { name = "corner", x = 57, y = 77 },
]

[[blocks]]
x0 = 0
x1 = 10
y0 = 0
y1 = 5

[[blocks]]
name = "slab"
x0 = 20
x1 = 30
y0 = -inf
y1 = 3
eps_r = 4.0

[layer]
cells = 8
order = 3

[layer.top]
kind = "wall"
'''


def _line_of(text: str, fragment: str, start: int = 1) -> int:
    """1-based number of the first line at or after `start` that begins with `fragment`."""
    for n, line in enumerate(text.splitlines(), start=1):
        found = line.strip() == fragment if fragment.startswith("[") else line.strip().startswith(fragment)
        if n >= start and found:
            return n
    raise AssertionError(fragment)


def _leaf_paths(data, prefix=()):
    if isinstance(data, dict):
        for key, value in data.items():
            yield from _leaf_paths(value, prefix + (key,))
    elif isinstance(data, list) and data and all(isinstance(v, dict) for v in data):
        for i, value in enumerate(data):
            yield from _leaf_paths(value, prefix + (i,))
    else:
        yield prefix


# --- where a key is written ------------------------------------------------------

def test_scan_finds_every_key_that_tomllib_parses():
    # the TOML v1.0.0 specification's syntax; the parse is checked against
    # Python's own tomllib (standard library): every key it reads has a line
    lines = key_lines(HAND_WRITTEN)
    parsed = tomllib.loads(HAND_WRITTEN)
    leaves = set(_leaf_paths(parsed))
    assert leaves <= set(lines), leaves - set(lines)
    assert Scenario.from_dict(parsed).nx == 60  # the text is a valid scenario too


@pytest.mark.parametrize("path, fragment", [
    (("title",), 'title = """'),
    (("dx",), "dx ="),
    (("nx",), "nx = 60"),  # not the look-alike inside the title
    (("source", "x"), "source.x"),
    (("source", "f_max"), '"source".f_max'),
    (("probes", 0, "x"), '{ name = "front"'),
    (("probes", 1, "y"), '{ name = "side"'),
    (("probes", 2, "name"), '{ name = "corner"'),
    (("blocks", 0), "[[blocks]]"),
    (("blocks", 1, "eps_r"), "eps_r = 4.0"),
    (("layer",), "[layer]"),
    (("layer", "cells"), "cells = 8"),
    (("layer", "top", "kind"), 'kind = "wall"'),
])
def test_key_lines_of_a_hand_written_file(path, fragment):
    # common practice, no source: the line a reader would point at
    start = _line_of(HAND_WRITTEN, "[[blocks]]", 1) + 1 if path[:2] == ("blocks", 1) else 1
    assert key_lines(HAND_WRITTEN)[path] == _line_of(HAND_WRITTEN, fragment, start)


@pytest.mark.parametrize("field, value, fragment", [
    ("layer.left.cells", 8, "cells = 8"),  # shared by every side in [layer]
    ("layer.top.kind", "wall", 'kind = "wall"'),
    ("probes[1].y", 77, '{ name = "side"'),
    ("probe[corner].x", 57, '{ name = "corner"'),
    ("probe.name", "side", '{ name = "side"'),
    ("block[slab].y1", 3, "y1 = 3"),
    ("source.f_max", None, '"source".f_max'),
    ("layer.right.kappa_max", 0.5, "[layer]"),  # not written: the table it belongs in
])
def test_field_line_maps_scenario_fields(field, value, fragment):
    # common practice, no source
    assert field_line(field, HAND_WRITTEN, value=value) == _line_of(HAND_WRITTEN, fragment)


def test_field_line_of_an_unnamed_block_uses_the_rejected_value():
    # 'block.x1' names no block: the one whose x1 holds the rejected value
    text = HAND_WRITTEN.replace("x1 = 10", "x1 = -5")
    assert field_line("block.x1", text, value=-5.0) == _line_of(text, "x1 = -5")


# --- bad files ---------------------------------------------------------------------

def _demo_text() -> str:
    return (Path(__file__).parents[1] / "assets" / "presets" / "demo.toml").read_text()


def _bad(tmp_path, text: str) -> ScenarioFileError:
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(ScenarioFileError) as err:
        load_scenario(path)
    message = str(err.value)
    assert "\n" not in message and message.startswith(str(path))
    return err.value


@pytest.mark.parametrize("old, new, field, fragment", [
    ('waveform = "diff_gaussian"', 'waveform = "sawtooth"', "source.waveform", 'waveform = "sawtooth"'),
    ("nx = 80", 'nx = "many"', "nx", 'nx = "many"'),
    ("courant = 0.99", "courant = 3", "courant", "courant = 3"),
    ('{ name = "corner", x = 77, y = 197 }', '{ name = "corner", x = 977, y = 197 }', "probe[corner].x",
     '{ name = "corner"'),
    ("[layer.top]\nkind = \"cpml\"\ncells = 10", "[layer.top]\nkind = \"cpml\"\ncells = -3", "layer.top.cells",
     "cells = -3"),
    ("polarization = \"TMz\"", "polarization = \"TMz\"\ncolour = \"red\"", "colour", "colour ="),
])
def test_bad_value_names_key_and_line(tmp_path, old, new, field, fragment):
    # common practice, no source: the message names the key and its line
    text = _demo_text()
    assert old in text
    text = text.replace(old, new)
    err = _bad(tmp_path, text)
    assert err.field == field
    assert err.line == _line_of(text, fragment)
    assert f"line {err.line}:" in str(err) and field in str(err)


def test_missing_key_points_at_its_table(tmp_path):
    text = "\n".join(line for line in _demo_text().splitlines() if not line.startswith("f_max"))
    err = _bad(tmp_path, text)
    assert err.field == "source.f_max" and err.line == _line_of(text, "[source]")
    assert "source.f_max is missing" in str(err)


def test_missing_top_level_key_has_no_line(tmp_path):
    text = "\n".join(line for line in _demo_text().splitlines() if not line.startswith("dx ="))
    err = _bad(tmp_path, text)
    assert err.field == "dx" and err.line is None and "dx is missing" in str(err)


def test_malformed_toml_keeps_the_parsers_line(tmp_path):
    text = _demo_text().replace("steps = 600", "steps = = 600")
    err = _bad(tmp_path, text)
    assert err.line == _line_of(text, "steps = = 600")
    assert "not valid TOML" in str(err) and "steps = = 600" in str(err)


@pytest.mark.parametrize("make, words", [
    (lambda p: p, "No such file"),
    (lambda p: (p.mkdir(), p)[1], "Is a directory"),
    (lambda p: (p.write_bytes(b"dx = 1\n\xff\xfe\n"), p)[1], "not UTF-8"),
])
def test_unreadable_files(tmp_path, make, words):
    path = make(tmp_path / "scenario.toml")
    with pytest.raises(ScenarioFileError) as err:
        load_scenario(path)
    assert words in str(err.value) and "\n" not in str(err.value)


def test_file_errors_are_scenario_errors(tmp_path):
    # callers that catch ScenarioError (the page, scripts) keep working
    err = _bad(tmp_path, "dx = 1\n")
    assert isinstance(err, ScenarioError)


# --- profile files named in a scenario ---------------------------------------------

def test_profile_file_is_relative_to_the_scenario(monkeypatch, tmp_path):
    monkeypatch.chdir(tmp_path)  # not where the scenario is
    s = load_scenario(DATA / "profile_cell.toml")
    expected = profile_from_csv((DATA / "own_profile.csv").read_text())
    assert s.boundary.right.profile == expected
    assert all(getattr(s.boundary, n).profile is None for n in ("left", "bottom", "top"))
    # written back, the profile is inline and the file loads to the same scenario
    again = Scenario.from_toml(s.to_toml())
    assert again == s and "profile_file" not in s.to_toml()


def test_profile_file_shared_by_every_side(tmp_path):
    (tmp_path / "p.csv").write_text((DATA / "own_profile.csv").read_text())
    text = (DATA / "profile_cell.toml").read_text().replace('[layer.right]\nprofile_file = "own_profile.csv"\n', "")
    text = text.replace("[layer]\n", '[layer]\nprofile_file = "p.csv"\n')
    (tmp_path / "s.toml").write_text(text)
    s = load_scenario(tmp_path / "s.toml")
    assert all(getattr(s.boundary, n).profile is not None for n in ("left", "right", "bottom", "top"))


def test_text_without_a_folder_may_not_name_files(monkeypatch):
    # a scenario given as text (e.g. uploaded to the page) cannot open files on the server
    monkeypatch.chdir(DATA)
    text = (DATA / "profile_cell.toml").read_text()
    with pytest.raises(ScenarioError) as err:
        Scenario.from_toml(text)
    assert err.value.field == "layer.right.profile_file" and "only in a scenario read from a file" in str(err.value)
    assert Scenario.from_toml(text, base_dir=DATA).boundary.right.profile is not None


@pytest.mark.parametrize("line, words", [
    ('profile_file = "nowhere.csv"', "No such file"),
    ('profile_file = "bad_cell.csv"', "in bad_cell.csv: profile.sigma (line 3)"),
    ('profile_file = "short.csv"', "profile.depth"),
    ("profile_file = 3", "the name of a CSV file"),
    ('profile_file = "own_profile.csv"\nprofile = { depth = [0, 1], sigma = [0, 1], kappa = [1, 1], alpha = [0, 0] }',
     "give one of the two"),
])
def test_bad_profile_files_name_the_key_and_line(tmp_path, line, words):
    for name in ("own_profile.csv",):
        (tmp_path / name).write_text((DATA / name).read_text())
    (tmp_path / "bad_cell.csv").write_text("depth, sigma, kappa, alpha\n0, 0, 1, 0\n0.008, lots, 1, 0\n")
    (tmp_path / "short.csv").write_text("depth, sigma, kappa, alpha\n0, 0, 1, 0\n0.002, 1, 1, 0\n")
    text = (DATA / "profile_cell.toml").read_text().replace('profile_file = "own_profile.csv"', line)
    path = tmp_path / "s.toml"
    path.write_text(text)
    with pytest.raises(ScenarioFileError) as err:
        load_scenario(path)
    message = str(err.value)
    assert "layer.right.profile" in message and words in message and "\n" not in message
    assert err.value.line == _line_of(text, "profile_file")


# --- a profile measures like the grading it tabulates -------------------------------

def _polynomial_csv(cells: int, cell: float, order: float, sigma_max: float, kappa_max: float,
                    alpha_max: float, alpha_order: float, rows: int) -> str:
    """The polynomial grading written out independently of the engine:
    sigma = sigma_max (d/L)^m, kappa = 1 + (kappa_max - 1)(d/L)^m,
    alpha = alpha_max (1 - d/L)^m_a (Berenger 1994; Taflove & Hagness)."""
    thickness = cells * cell
    lines = ["depth (m),sigma (S/m),kappa,alpha (S/m)"]
    for k in range(rows):
        d = thickness * k / (rows - 1)
        x = d / thickness
        lines.append(f"{d!r},{sigma_max * x**order!r},{1 + (kappa_max - 1) * x**order!r},"
                     f"{alpha_max * (1 - x)**alpha_order!r}")
    return "\n".join(lines) + "\n"


def _with_right_profile(base: Scenario, tmp_path: Path, csv_text: str) -> Scenario:
    (tmp_path / "graded.csv").write_text(csv_text)
    data = base.to_dict()
    data["layer"]["right"] = {"kind": "cpml", "cells": base.boundary.right.cells, "profile_file": "graded.csv"}
    (tmp_path / "scenario.toml").write_text(tomli_w.dumps(data))
    return load_scenario(tmp_path / "scenario.toml")


def test_profile_reproducing_the_polynomial_grading_measures_the_same(tmp_path):
    # Berenger 1994 / Taflove & Hagness polynomial grading; sigma_opt =
    # 0.8 (m + 1) / (eta0 dx) (Taflove & Hagness).  Sampled finely (4001 rows
    # over 10 cells) the linear interpolation error is below 1e-6 of sigma_max,
    # so the measured reflection must agree closely with the built-in grading.
    order, cells, cell = 3.0, 10, 1e-3
    sigma_max = 0.8 * (order + 1) / (ETA0 * cell)
    side = Side(cells=cells, order=order, sigma_max=sigma_max, kappa_max=5.0, alpha_max=0.05, alpha_order=1.0)
    built_in = default_scenario(layer=side)
    from_file = _with_right_profile(built_in, tmp_path,
                                    _polynomial_csv(cells, cell, order, sigma_max, 5.0, 0.05, 1.0, 4001))
    assert from_file.boundary.right.profile is not None
    a, b = layer_table(built_in, "right"), layer_table(from_file, "right")
    for key in ("node_sigma", "half_sigma", "node_kappa", "half_kappa", "node_alpha", "half_alpha", "node_c", "half_c"):
        np.testing.assert_allclose(getattr(b, key), getattr(a, key), rtol=1e-5, atol=1e-6 * sigma_max)
    m_built, m_file = measure(built_in, parts={"probes"}), measure(from_file, parts={"probes"})
    assert math.isfinite(m_built.worst_peak_db)
    for name, value in m_built.peak_db.items():
        assert m_file.peak_db[name] == pytest.approx(value, abs=0.1), name  # common practice, no source


def test_a_different_profile_measures_differently(tmp_path):
    # the comparison above can fail: the same table with grading order 2
    # instead of 3 (Berenger 1994 grading) moves the worst peak error by
    # more than 1 dB on the default bench (common practice, no source)
    order, cells, cell = 3.0, 10, 1e-3
    sigma_max = 0.8 * (order + 1) / (ETA0 * cell)
    built_in = default_scenario(layer=Side(cells=cells, order=order, sigma_max=sigma_max))
    other = _with_right_profile(built_in, tmp_path, _polynomial_csv(cells, cell, 2.0, sigma_max, 1.0, 0.0, 1.0, 401))
    m_built, m_other = measure(built_in, parts={"probes"}), measure(other, parts={"probes"})
    assert abs(m_other.peak_db["right 0 deg"] - m_built.peak_db["right 0 deg"]) > 1.0


def test_written_scenarios_carry_the_profile_inline(tmp_path):
    s = load_scenario(DATA / "profile_cell.toml")
    back = tomllib.loads(s.to_toml())
    assert "profile" in back["layer"]["right"] and "profile_file" not in back["layer"]["right"]
    (tmp_path / "again.toml").write_text(s.to_toml())
    assert load_scenario(tmp_path / "again.toml") == s


def test_layer_override_of_profile_kind(tmp_path):
    # a side's own inline profile wins over a profile_file shared in [layer]
    (tmp_path / "p.csv").write_text((DATA / "own_profile.csv").read_text())
    data = tomllib.loads((DATA / "profile_cell.toml").read_text())
    data["layer"]["profile_file"] = "p.csv"
    data["layer"]["right"] = {"profile": {"depth": [0, 0.008], "sigma": [0, 8.0], "kappa": [1, 1], "alpha": [0, 0]}}
    (tmp_path / "s.toml").write_text(tomli_w.dumps(data))
    s = load_scenario(tmp_path / "s.toml")
    assert s.boundary.right.profile.sigma == (0.0, 8.0)
    assert s.boundary.left.profile == profile_from_csv((DATA / "own_profile.csv").read_text())
