"""Hostile scenario files and absurd work: every one is refused up front with
one line naming the key, no traceback, no hang, no run started.

The long fuzz is tests/bench/fuzz_inputs.py; a sample of its inputs runs
here.  Exit code 2 for bad input is the command's contract (argparse's
convention; common practice, no source).
"""

import importlib.util
import os
import subprocess
import sys
from pathlib import Path

import pytest

from quietlayer.app.cli import main
from quietlayer.engine import Scenario, ScenarioError
from quietlayer.engine.budget import (COMMAND_BUDGET, LAYER_NODE_COST, VISITOR_BUDGET, WorkBudget, check_work,
                                     estimate_work)
from quietlayer.engine.reference import frame_every, reference_scenario
from quietlayer.engine.scenario import MAX_STEPS, check_toml_limits
from quietlayer.engine.scenario_file import ScenarioFileError, load_scenario

ROOT = Path(__file__).parents[1]
DEMO = ROOT / "assets" / "presets" / "demo.toml"
DATA = Path(__file__).parent / "data"
FUZZ_SAMPLE = 300


def _fuzz_module():
    if "fuzz_inputs" not in sys.modules:  # a script, not a package module: loaded by path, once
        spec = importlib.util.spec_from_file_location("fuzz_inputs", ROOT / "tests" / "bench" / "fuzz_inputs.py")
        module = importlib.util.module_from_spec(spec)
        sys.modules["fuzz_inputs"] = module
        spec.loader.exec_module(module)
    return sys.modules["fuzz_inputs"]


def _check(path, capsys, *extra):
    fuzz = _fuzz_module()
    with fuzz.no_runs():
        code = main(["check", "--no-late", str(path), *extra])
    out, err = capsys.readouterr()
    return code, out, err


def _refused(path, capsys, *words):
    code, out, err = _check(path, capsys)
    lines = err.strip().splitlines()
    assert code == 2 and not out and len(lines) == 1, err
    assert "Traceback" not in err and len(lines[0]) < 600, err
    assert any(w in lines[0] for w in words), lines[0]
    return lines[0]


def _demo_with(tmp_path, old, new, name="s.toml"):
    text = DEMO.read_text()
    assert old in text
    path = tmp_path / name
    path.write_text(text.replace(old, new, 1))
    return path


# --- what a new user found, each now refused in milliseconds --------------------

def test_deeply_nested_inline_tables(tmp_path, capsys):
    path = _demo_with(tmp_path, "\n[source]", "\ndeep = " + "{a = " * 3000 + "1" + "}" * 3000 + "\n[source]")
    line = _refused(path, capsys, "nested at most")
    assert ", line 30:" in line  # the line where the nesting runs too deep


def test_long_dotted_key(tmp_path, capsys):
    path = _demo_with(tmp_path, "title = ", "k" + ".k" * 300_000 + " = 1\ntitle = ")
    _refused(path, capsys, "keys of at most 8 parts")


def test_profile_file_with_one_huge_field(tmp_path, capsys):
    (tmp_path / "p.csv").write_text("depth, sigma, kappa, alpha\n" + "0" * 300_000 + ", 0, 1, 0\n0.02, 1, 1, 0\n")
    path = _demo_with(tmp_path, "[layer.right]\n", '[layer.right]\nprofile_file = "p.csv"\n')
    _refused(path, capsys, "layer.right.profile_file")


def test_profile_file_name_with_a_nul_byte(tmp_path, capsys):
    path = _demo_with(tmp_path, "[layer.right]\n", '[layer.right]\nprofile_file = "p\\u0000.csv"\n')
    _refused(path, capsys, "layer.right.profile_file")


def test_integer_of_ten_thousand_digits(tmp_path, capsys):
    path = _demo_with(tmp_path, "nx = 80", "nx = " + "9" * 10_000)
    _refused(path, capsys, "digits")


@pytest.mark.parametrize("old, new, key", [
    ("probes = [", "old_probes = [", None),  # replaced below by a number
    ("[source]", "source = [1, 2]\n[old_source]", "source"),
    ("[layer.left]", "layer = 3\n[old_layer.left]", "layer"),
])
def test_a_list_or_number_where_a_table_belongs(tmp_path, capsys, old, new, key):
    if key is None:  # probes = 5: a number where an array of tables belongs
        text = DEMO.read_text()
        start = text.index("probes = [")
        end = text.index("]\n", start) + 2
        path = tmp_path / "s.toml"
        path.write_text(text[:start] + "probes = 5\n" + text[end:])
        key = "probes"
    else:
        path = _demo_with(tmp_path, old, new)
    _refused(path, capsys, key)


def test_courant_of_the_smallest_float(tmp_path, capsys):
    path = _demo_with(tmp_path, "courant = 0.99", "courant = 5e-324")
    line = _refused(path, capsys, "courant = 5e-324 is not allowed: a number >=")
    assert f"{MAX_STEPS:,} steps" in line


@pytest.mark.parametrize("entry", ["folder", "loop", "fifo", "outside", "absolute", "device"])
def test_profile_files_that_are_not_ordinary_files_in_the_folder(tmp_path, capsys, entry):
    cell = tmp_path / "cell"
    cell.mkdir()
    name = "p.csv"
    if entry == "folder":
        (cell / name).mkdir()
    elif entry == "loop":
        (cell / "a.csv").symlink_to("b.csv")
        (cell / "b.csv").symlink_to("a.csv")
        name = "a.csv"
    elif entry == "fifo":
        os.mkfifo(cell / name)  # opening it would wait for a writer for ever
    elif entry == "outside":
        (tmp_path / "own.csv").write_text((DATA / "own_profile.csv").read_text())
        name = "../own.csv"
    elif entry == "absolute":
        name = str(DATA / "own_profile.csv")
    else:
        (cell / name).symlink_to("/dev/zero")
    path = _demo_with(cell, "[layer.right]\n", f'[layer.right]\nprofile_file = "{name}"\n')
    _refused(path, capsys, "layer.right.profile_file")


def test_scenario_file_that_is_a_pipe_or_too_large(tmp_path, capsys):
    os.mkfifo(tmp_path / "pipe.toml")
    _refused(tmp_path / "pipe.toml", capsys, "not a regular file")
    big = tmp_path / "big.toml"
    big.write_text(DEMO.read_text() + "# " + "x" * (2 << 20) + "\n")
    _refused(big, capsys, "bytes")


def test_long_values_are_cut_in_the_message(tmp_path, capsys):
    path = _demo_with(tmp_path, 'title = "', 'title = "' + "t" * 100_000)
    line = _refused(path, capsys, "title")
    assert len(line) < 400


def test_text_limits_apply_to_uploaded_text_too():
    text = DEMO.read_text()
    check_toml_limits(text)  # the presets pass
    for hostile, words in [("deep = " + "[" * 40 + "]" * 40, "nested"), ("a.b.c.d.e.f.g.h.i = 1", "dotted"),
                           ("n = " + "1" * 50, "digits"), ("# " + "x" * (1 << 20), "bytes")]:
        with pytest.raises(ScenarioError) as err:
            Scenario.from_toml(hostile + "\n" + text)
        assert words in str(err.value)
    # brackets, dots and digits inside strings and comments are text, not structure
    check_toml_limits('title = "[[[[[[[[[[[[[[[[[[[[ a.b.c.d.e.f.g.h.i.j 1111111111111111111111111111111111111111111"\n'
                      "# {{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{{\n" + text)


# --- the work budget --------------------------------------------------------------

def test_estimate_counts_the_grids_the_engine_builds():
    s = load_scenario(DEMO)
    for steps in (600, 1500):
        t = s.with_changes(steps=steps)
        e = estimate_work(t, late_steps=1000)
        ref, _ = reference_scenario(t)
        assert e.test_nodes == (t.total_cells_x + 1) * (t.total_cells_y + 1)
        assert e.reference_nodes == (ref.total_cells_x + 1) * (ref.total_cells_y + 1)
        layer = e.test_nodes - (t.nx + 1) * (t.ny + 1)
        test_cost = e.test_nodes + (LAYER_NODE_COST - 1) * layer  # psi updates make a layer node dearer
        assert e.cell_updates == (test_cost + e.reference_nodes) * steps + test_cost * 1000
        frames = steps // frame_every(t) + 1
        assert e.frame_bytes == pytest.approx(2 * frames * (t.nx + 1) * (t.ny + 1) * 4, rel=0.05)


def test_refusal_names_the_field_and_a_range_that_fits():
    s = load_scenario(DEMO)
    with pytest.raises(ScenarioError) as err:
        check_work(s.with_changes(steps=200_000), COMMAND_BUDGET)
    assert err.value.field == "steps" and "a whole number from 1 to" in err.value.allowed
    most = int(err.value.allowed.split(" to ")[1].split()[0].replace(",", ""))
    check_work(s.with_changes(steps=most), COMMAND_BUDGET)  # the largest allowed fits ...
    with pytest.raises(ScenarioError):
        check_work(s.with_changes(steps=most + 1), COMMAND_BUDGET)  # ... and one more does not
    tight = WorkBudget(cell_updates=4e8, memory_bytes=2**30)  # the demo's runs, 3.4e8, and no late-time check
    with pytest.raises(ScenarioError) as err:
        check_work(s, tight, late_steps=20_000)
    assert err.value.field == "late_steps"
    with pytest.raises(ScenarioError) as err:  # even one step of this grid is too much: the larger size is named
        check_work(s.with_changes(nx=6000, ny=6000), WorkBudget(1e15, 2**30))
    assert err.value.field == "nx" and "from 2 to" in err.value.allowed


def test_presets_fit_the_page_budget():
    for path in sorted((ROOT / "assets" / "presets").glob("*.toml")):
        check_work(load_scenario(path), VISITOR_BUDGET)


def test_long_valid_runs_are_refused_or_announced(tmp_path, capsys):
    # far beyond the budget: refused before any run, naming steps and its range
    path = _demo_with(tmp_path, "steps = 600", "steps = 400000")
    line = _refused(path, capsys, "steps = 400000 is not allowed: a whole number from 1 to")
    assert ", line 11:" in line
    # long but within it: a note before the run says so (the run itself is stopped here)
    path = _demo_with(tmp_path, "steps = 600", "steps = 5000", "long.toml")
    with pytest.raises(_fuzz_module().RunStarted):
        _check(path, capsys)
    err = capsys.readouterr().err
    assert "note: a long run:" in err and "cell updates" in err


def test_sweep_points_beyond_the_budget_are_invalid_rows():
    from quietlayer.engine.sweep import evaluate_point
    s = load_scenario(DEMO)
    row = evaluate_point(s, {"steps": 1_000_000}, budget=COMMAND_BUDGET)
    assert row["status"] == "invalid" and "steps" in row["reason"]


# --- a sample of the long fuzz ---------------------------------------------------------

def test_fuzz_sample_is_refused_cleanly():
    fuzz = _fuzz_module()
    bad = []
    for index in range(FUZZ_SAMPLE):
        result = fuzz.run_case(7, index, as_process=False)
        if result[2] != "clean":
            bad.append(result)
    assert not bad, bad[:5]


def test_a_real_process_refuses_hostile_files_without_traceback(tmp_path):
    fuzz = _fuzz_module()
    for index in (3, 11, 19):  # a few of the sample as real processes
        case = fuzz.make_case(7, index)
        path = fuzz.write_case(case, tmp_path / str(index))
        r = subprocess.run([sys.executable, "-m", "quietlayer.app.cli", "check", "--no-late", str(path)],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 2 and "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1, r.stderr


def test_link_query_is_screened_before_it_is_parsed():
    from panel.util import parse_query

    from quietlayer.app.visitors import MAX_QUERY_KEYS, MAX_QUERY_VALUE, screened_query
    hostile = "?nx=" + "9" * 20_000 + "&cell=1%20mm&" + "&".join(f"k{i}=1" for i in range(500))
    with pytest.raises(ValueError):  # what a session met before: Python's int refuses 20,000 digits
        parse_query(hostile)
    parsed = parse_query(screened_query(hostile))
    assert parsed["cell"] == "1 mm" and len(parsed) == MAX_QUERY_KEYS
    assert parsed["nx"] == "9" * MAX_QUERY_VALUE + "..."  # no number: the control refuses it by name
    assert screened_query("") == "" and parse_query(screened_query("?m=3.5")) == {"m": 3.5}
