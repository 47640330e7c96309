"""The command line: help, demo, check, sweep, tune, export, and bad input.

Exit codes and messages are the command's contract (common practice, no
source: 0 success, 1 a failed check, 2 bad input as argparse does, 130 after
SIGINT as shells report 128 + 2).
"""

import csv
import json
import math
import signal
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import tomli_w
import tomllib

from quietlayer.app.cli import CAUTION, DEFAULT_BUDGET_DB, main
from quietlayer.engine import Boundary, layer_tables
from quietlayer.engine.export import read_coefficients_csv
from quietlayer.engine.measure import measure
from quietlayer.engine.scenario_file import load_scenario
from quietlayer.engine.sweep import grid_points, parse_vary

from processes import run_until

ROOT = Path(__file__).parents[1]
DEMO = ROOT / "assets" / "presets" / "demo.toml"
DATA = Path(__file__).parent / "data"
CLI = [sys.executable, "-m", "quietlayer.app.cli"]


def _strict_json(text: str):
    """json.loads that refuses NaN and Infinity tokens (RFC 8259 has none)."""
    def refuse(token):
        raise ValueError(f"non-standard JSON token {token}")
    return json.loads(text, parse_constant=refuse)


def _run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _signal_after(argv, prefix: str, count: int, signum):
    """Run the command, send `signum` once `count` stderr lines start with
    `prefix`; (exit code, stdout, stderr)."""
    return run_until(argv, prefix, count, lambda proc: proc.send_signal(signum))


# --- help and the demo ----------------------------------------------------------------

def test_version_and_help():
    out = subprocess.run(CLI + ["--version"], capture_output=True, text=True, check=True).stdout
    assert out.startswith("quietlayer ")
    help_text = subprocess.run(CLI + ["--help"], capture_output=True, text=True, check=True).stdout
    assert "demo" in help_text and "certifies" in help_text
    for command in ("check", "sweep", "tune", "export"):
        assert f"quietlayer {command} " in help_text
    assert "130" in help_text and "exit codes" in help_text


@pytest.mark.parametrize("command", ["check", "sweep", "tune", "export"])
def test_each_command_has_examples_and_exit_codes(command, capsys):
    with pytest.raises(SystemExit) as done:
        main([command, "--help"])
    assert done.value.code == 0
    text = capsys.readouterr().out
    assert "example" in text and "exit codes" in text and f"quietlayer {command}" in text


def test_demo_runs_and_prints_caution(capsys):
    assert main(["demo"]) == 0
    out = capsys.readouterr().out
    assert "worst peak error" in out and "corner" in out and "late-time check" in out
    assert CAUTION in out


def test_bad_scenario_file_exits_2_with_named_field(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('dx = "1 mm"\ndy = "1 mm"\nnx = 10\nny = 10\ncourant = 3\n'
                   '[source]\nx = 5\ny = 5\nf_max = "10 GHz"\n')
    assert main(["demo", "--scenario", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "courant = 3" in err and "<= 1" in err and "line 5" in err and "Traceback" not in err
    assert main(["demo", "--scenario", str(tmp_path / "missing.toml")]) == 2


# --- check ----------------------------------------------------------------------------

def test_check_exit_code_follows_the_budget(capsys):
    # the demo's worst peak error is about -41 dB (its corner probe)
    code, out, _ = _run(["check", DEMO, "--budget", "-30", "--no-late"], capsys)
    assert code == 0 and "PASS" in out and CAUTION in out
    code, out, _ = _run(["check", DEMO, "--budget", "-80", "--no-late"], capsys)
    assert code == 1 and "FAIL" in out and "above the budget" in out


def test_check_fails_a_growing_or_diverging_run(monkeypatch, capsys):
    # common practice, no source: a layer whose energy grows late, or a run
    # that blows up, is not safe to launch whatever its early reflection
    from quietlayer.engine import measure as measure_module
    from quietlayer.engine.errors import DivergenceError
    from quietlayer.engine.measure import LateTime

    def growing(s, steps=20_000, progress=None):
        return LateTime(status="growing", steps=steps, growth_db_per_1000=4.0, final_db=3.0,
                        energy_steps=np.zeros(0, int), interior_energy=np.zeros(0), layer_energy=np.zeros(0),
                        message="energy grows 4 dB per 1000 steps late in the run")

    monkeypatch.setattr(measure_module, "late_time_check", growing)
    code, out, _ = _run(["check", DEMO, "--budget", "-30"], capsys)
    assert code == 1 and "FAIL" in out and "growing" in out
    code, out, _ = _run(["check", DEMO, "--budget", "-30", "--json"], capsys)
    assert code == 1 and _strict_json(out)["passed"] is False

    def diverging(*args, **kwargs):
        raise DivergenceError(250, "the fields are no longer finite")

    monkeypatch.setattr(measure_module, "simulate", diverging)
    code, out, err = _run(["check", DEMO, "--budget", "-30", "--no-late"], capsys)
    assert code == 1 and "step 250" in out + err and "Traceback" not in out + err


def test_check_json_is_strict_json_and_consistent(capsys):
    code, out, _ = _run(["check", DEMO, "--json", "--late-steps", "4000"], capsys)
    data = _strict_json(out)
    assert data["budget_db"] == DEFAULT_BUDGET_DB  # the documented default
    assert (code == 0) == data["passed"] == (data["worst_peak_db"] <= DEFAULT_BUDGET_DB)
    peaks = {name: p["peak_db"] for name, p in data["probes"].items()}
    assert data["worst_peak_db"] == max(peaks.values()) and peaks[data["worst_probe"]] == data["worst_peak_db"]
    bands = {name: p["band_worst_db"] for name, p in data["probes"].items() if p["band_worst_db"] is not None}
    assert data["worst_band_db"] == max(bands.values())
    assert data["late_time"]["status"] == "stable" and data["late_time"]["steps"] == 4000
    assert data["caution"] == CAUTION


def test_check_warns_of_a_run_too_short_for_f_min(tmp_path, capsys):
    """The same short-run rule as the page (engine.run_checks): the demo's farthest probe records
    under 3 periods of f_min; at the suggested length the warning is gone."""
    from quietlayer.engine.run_checks import record_length
    path = tmp_path / "short.toml"
    demo = load_scenario(DEMO)
    path.write_text(demo.to_toml(), "utf-8")
    _, out, _ = _run(["check", str(path), "--no-late", "--json"], capsys)
    data = _strict_json(out)
    record = record_length(demo)
    assert len(data["warnings"]) == 1 and f"{record.periods:.1f} periods" in data["warnings"][0]
    path.write_text(demo.with_changes(steps=record.steps_needed).to_toml(), "utf-8")
    _, out, _ = _run(["check", str(path), "--no-late"], capsys)
    assert "warning:" not in out


def test_check_json_writes_null_for_missing_values(tmp_path, capsys):
    # a probe the pulse cannot reach within the run has no peak error: null, not NaN
    data = tomllib.loads(DEMO.read_text())
    data["probes"].append({"name": "far", "x": 2, "y": 2})
    data["steps"] = 60  # a change travels at most one node per step: (2, 2) stays at zero
    path = tmp_path / "far.toml"
    path.write_text(tomli_w.dumps(data))
    code, out, _ = _run(["check", path, "--json", "--no-late"], capsys)
    assert "NaN" not in out
    parsed = _strict_json(out)
    assert parsed["probes"]["far"]["peak_db"] is None and parsed["late_time"] is None
    assert code in (0, 1)


def test_engine_warnings_are_one_line_each(tmp_path, capsys):
    # 7.5 cells per wavelength at 40 GHz: below the 10 of common practice (no source)
    path = tmp_path / "coarse.toml"
    path.write_text(_demo_with("f_max = 15000000000.0", "f_max = 40000000000.0"))
    code, out, err = _run(["check", path, "--json", "--no-late"], capsys)
    assert err.count("\n") == 1 and err.startswith("quietlayer: warning: only 7.5 cells per wavelength")
    assert _strict_json(out)["passed"] == (code == 0)


def test_check_without_probes_is_bad_input(tmp_path, capsys):
    data = tomllib.loads(DEMO.read_text())
    del data["probes"]
    path = tmp_path / "none.toml"
    path.write_text(tomli_w.dumps(data))
    code, _, err = _run(["check", path], capsys)
    assert code == 2 and "probes" in err and len(err.strip().splitlines()) == 1


def test_profile_file_checks_like_the_built_in_grading(tmp_path, monkeypatch, capsys):
    # tests/data/own_profile.csv tabulates the polynomial grading (Berenger
    # 1994; Taflove & Hagness) sigma_max (d/L)^3 with sigma_max = 8.5 S/m,
    # kappa to 4, alpha falling linearly, every half cell; the same side built
    # in must measure the same to within 0.2 dB (sigma_opt here is 8.494 S/m,
    # the table's 8.5 S/m rounds it; common practice, no source)
    monkeypatch.chdir(tmp_path)  # the profile is found next to the scenario, not here
    code, out, _ = _run(["check", DATA / "profile_cell.toml", "--json", "--no-late"], capsys)
    from_file = _strict_json(out)
    data = tomllib.loads((DATA / "profile_cell.toml").read_text())
    del data["layer"]["sigma_ratio"]  # one form per side: the other sides keep sigma_opt
    data["layer"].update({name: {"sigma_ratio": 1.0} for name in ("left", "bottom", "top")})
    data["layer"]["right"] = {"sigma_max": 8.5}
    built = tmp_path / "built.toml"
    built.write_text(tomli_w.dumps(data))
    _, out, _ = _run(["check", built, "--json", "--no-late"], capsys)
    built_in = _strict_json(out)
    for name, probe in built_in["probes"].items():
        assert from_file["probes"][name]["peak_db"] == pytest.approx(probe["peak_db"], abs=0.2), name


# --- bad input: one line, the key, its line, exit 2 --------------------------------------

def _demo_with(old: str, new: str) -> str:
    text = DEMO.read_text()
    assert old in text
    return text.replace(old, new)


def _line_number(text: str, fragment: str) -> int:
    return next(n for n, line in enumerate(text.splitlines(), 1) if line.strip().startswith(fragment))


BAD_FILES = {
    "missing key": (lambda: "\n".join(l for l in DEMO.read_text().splitlines() if not l.startswith("f_max")),
                    "source.f_max", "[source]"),
    "wrong type": (lambda: _demo_with("nx = 80", 'nx = "eighty"'), "nx", 'nx = "eighty"'),
    "negative thickness": (lambda: _demo_with("[layer.right]\nkind = \"cpml\"\ncells = 10",
                                              "[layer.right]\nkind = \"cpml\"\ncells = -4"),
                           "layer.right.cells", "cells = -4"),
    "malformed TOML": (lambda: _demo_with("steps = 600", "steps = 600 600"), "not valid TOML", "steps = 600 600"),
    "unknown waveform": (lambda: _demo_with('waveform = "diff_gaussian"', 'waveform = "square"'),
                         "source.waveform", 'waveform = "square"'),
}


@pytest.mark.parametrize("case", sorted(BAD_FILES))
@pytest.mark.parametrize("command", [["check"], ["sweep", "--vary", "order=2,3", "--out", "{tmp}/s.csv"],
                                     ["tune", "--thickness", "6"], ["export", "--out", "{tmp}/x"]])
def test_bad_files_give_one_line_with_key_and_line(case, command, tmp_path, capsys):
    make, key, fragment = BAD_FILES[case]
    text = make()
    path = tmp_path / "bad.toml"
    path.write_text(text)
    argv = [command[0], path] + [a.replace("{tmp}", str(tmp_path)) for a in command[1:]]
    code, out, err = _run(argv, capsys)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert key in lines[0] and f"line {_line_number(text, fragment)}:" in lines[0]
    assert "Traceback" not in err and str(path) in lines[0]
    assert not (tmp_path / "s.csv").exists() and not (tmp_path / "x").exists()


@pytest.mark.parametrize("argv, words", [
    (["check", "{tmp}/nowhere.toml"], "cannot read the file"),
    (["check", "{tmp}"], "cannot read the file"),
    (["sweep", DEMO, "--vary", "order=2:five:3", "--out", "{tmp}/s.csv"], "--vary order=2:five:3"),
    (["sweep", DEMO, "--vary", "colour=1,2", "--out", "{tmp}/s.csv"], "a parameter name"),
    (["sweep", DEMO, "--vary", "order=2,3", "--vary", "order=4,5", "--out", "{tmp}/s.csv"], "each parameter varied once"),
    (["sweep", DEMO, "--vary", "order=-1,-2", "--out", "{tmp}/s.csv"], "every point is invalid"),
    (["sweep", DEMO, "--vary", "order=2,3", "--out", "{tmp}/no/such/s.csv"], "does not exist"),
    (["sweep", DEMO, "--vary", "order=2,3", "--out", "{tmp}/s.csv", "--dask", "local:0"], "--dask"),
    (["sweep", DEMO, "--vary", "order=2,3", "--out", "{tmp}/s.csv", "--dask", "nowhere"], "--dask"),
    (["check", DEMO, "--budget", "loud"], "--budget"),
    (["check", DEMO, "--budget", "nan"], "--budget"),
    (["tune", DEMO, "--thickness", "6", "--target", "-50"], "not allowed with argument"),
    (["tune", DEMO, "--target", "3"], "--target"),
    (["tune", DEMO, "--thickness", "6", "--runs", "3"], "--runs"),
    (["tune", DEMO, "--thickness", "6", "--budget", "20"], "use --runs"),  # check's --budget is in dB
    (["tune", DEMO, "--budget", "20"], "use --runs"),
    (["tune", DEMO, "--thickness", "6", "--budget"], "use --runs"),
    (["tune", DEMO, "--thickness", "6", "--write", DEMO], "the scenario itself"),
    (["export", DEMO, "--out", DEMO], "is a file"),
])
def test_bad_options_give_one_line(argv, words, tmp_path, capsys):
    argv = [str(a).replace("{tmp}", str(tmp_path)) for a in argv]
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse's own checks
        code = exc.code
    err = capsys.readouterr().err
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and words in lines[0] and "Traceback" not in err, err


def test_a_real_process_prints_no_traceback(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text(_demo_with('waveform = "diff_gaussian"', 'waveform = "sawtooth"'))
    done = subprocess.run(CLI + ["check", str(path)], capture_output=True, text=True)
    assert done.returncode == 2 and done.stdout == ""
    assert done.stderr.count("\n") == 1 and "source.waveform" in done.stderr and "Traceback" not in done.stderr


# --- sweep ----------------------------------------------------------------------------

def _csv_rows(path: Path) -> list[dict]:
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def test_sweep_writes_each_point_once_and_prints_the_best(tmp_path, capsys):
    out_csv = tmp_path / "sweep.csv"
    code, out, err = _run(["sweep", DEMO, "--vary", "order=2:4:3", "--vary", "sigma_ratio=0.5,1",
                           "--out", out_csv, "--workers", "2"], capsys)
    assert code == 0
    rows = _csv_rows(out_csv)
    assert [int(r["index"]) for r in rows] == list(range(6))
    expected = grid_points([parse_vary("order=2:4:3"), parse_vary("sigma_ratio=0.5,1")])
    for row, point in zip(rows, expected):
        assert float(row["order"]) == point["order"] and float(row["sigma_ratio"]) == point["sigma_ratio"]
        assert row["status"] == "ok"
    best = min(rows, key=lambda r: float(r["worst_peak_db"]))
    assert f"{float(best['worst_peak_db']):.1f} dB at order={float(best['order']):.4g}" in out
    assert "6 of 6 points" in out
    assert len([line for line in err.splitlines() if line.startswith("sweep ")]) == 6  # one line per point in a log


def test_sweep_records_invalid_points_and_goes_on(tmp_path, capsys):
    out_csv = tmp_path / "sweep.csv"
    code, out, err = _run(["sweep", DEMO, "--vary", "sigma_ratio=1,5000", "--out", out_csv], capsys)
    assert code == 0 and "1 of 2 points are invalid" in err
    rows = _csv_rows(out_csv)
    assert [r["status"] for r in rows] == ["ok", "invalid"] and "sigma_ratio" in rows[1]["reason"]


@pytest.mark.parametrize("signum, code_expected, word", [(signal.SIGINT, 130, "interrupted"),
                                                         (signal.SIGTERM, 143, "terminated")])
def test_sweep_ctrl_c_keeps_the_finished_points(tmp_path, signum, code_expected, word):
    # SIGINT (Ctrl-C) or SIGTERM mid-sweep: exit 128 + the signal number as
    # shells report it, and the CSV holds the finished points, each once
    out_csv = tmp_path / "long.csv"
    varies = ["order=2:4:40", "sigma_ratio=0.5:1.5:10"]
    code, out, err = _signal_after(CLI + ["sweep", str(DEMO), "--vary", varies[0], "--vary", varies[1],
                                          "--out", str(out_csv), "--workers", "2"], "sweep ", 5, signum)
    assert code == code_expected
    rows = _csv_rows(out_csv)
    indices = [int(r["index"]) for r in rows]
    assert 5 <= len(rows) < 400 and len(set(indices)) == len(indices)
    expected = grid_points([parse_vary(v) for v in varies])
    for row in rows:
        point = expected[int(row["index"])]
        assert float(row["order"]) == point["order"] and float(row["sigma_ratio"]) == point["sigma_ratio"]
        assert row["status"] == "ok" and math.isfinite(float(row["worst_peak_db"]))
    assert f"{word}: kept {len(rows)} of 400 points" in err and "Traceback" not in err
    assert f"{len(rows)} of 400 points" in out


def test_sweep_on_a_local_dask_cluster(tmp_path):
    out_csv = tmp_path / "dask.csv"
    done = subprocess.run(CLI + ["sweep", str(DEMO), "--vary", "order=2,3", "--vary", "kappa_max=1,4",
                                 "--out", str(out_csv), "--dask", "local:2"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    rows = _csv_rows(out_csv)
    assert sorted(int(r["index"]) for r in rows) == [0, 1, 2, 3] and {r["status"] for r in rows} == {"ok"}
    assert "Dask local cluster, 2 workers" in done.stderr and "Traceback" not in done.stderr
    # the same points measured here agree with the workers' (same engine, same inputs)
    base = load_scenario(DEMO)
    from quietlayer.engine.sweep import apply_point
    local = measure(apply_point(base, {"order": 3.0, "kappa_max": 4.0}), parts={"probes"})
    row = next(r for r in rows if float(r["order"]) == 3 and float(r["kappa_max"]) == 4)
    assert float(row["worst_peak_db"]) == pytest.approx(local.worst_peak_db, abs=1e-6)


# --- tune -----------------------------------------------------------------------------

def test_tune_a_thickness_and_write_it_back(tmp_path, capsys):
    out_toml = tmp_path / "tuned.toml"
    code, out, _ = _run(["tune", DEMO, "--thickness", "6", "--runs", "10", "--write", out_toml,
                         "--workers", "2"], capsys)
    assert code == 0 and f"wrote {out_toml}" in out
    tuned = load_scenario(out_toml)  # loads again...
    sides = [getattr(tuned.boundary, n) for n in ("left", "right", "bottom", "top")]
    assert {s.cells for s in sides} == {6}  # ...and carries the tuned layer
    side = sides[0]
    assert f"grading order m     {side.order:.4g}" in out and f"kappa_max           {side.kappa_max:.4g}" in out
    printed = float(out.split("worst peak error")[1].split("dB")[0])
    again = measure(tuned, parts={"probes"})
    assert again.worst_peak_db == pytest.approx(printed, abs=0.051)
    # the scenario's own grading at 6 cells is measured too, so the result is no worse
    demo_layer = load_scenario(DEMO).boundary.left
    own = measure(load_scenario(DEMO).with_changes(boundary=Boundary.all_sides(replace(demo_layer, cells=6))),
                  parts={"probes"})
    assert again.worst_peak_db <= own.worst_peak_db + 1e-9
    assert tomllib.loads(out_toml.read_text())["title"].endswith("(tuned, 6 cells)")


def test_tune_ctrl_c_keeps_the_best_so_far(tmp_path):
    # the first Ctrl-C finishes the runs in progress and reports the best so far
    out_toml = tmp_path / "tuned.toml"
    code, out, err = _signal_after(CLI + ["tune", str(DEMO), "--thickness", "6", "--runs", "5000",
                                          "--write", str(out_toml), "--workers", "2"], "tune ", 12, signal.SIGINT)
    assert code == 130 and "best setting found before the interruption for 6 cells" in out
    assert "stopping after the runs in progress" in err and "Traceback" not in err
    runs = int(out.split("(")[1].split()[0])
    assert 12 <= runs < 5000
    tuned = load_scenario(out_toml)
    assert tuned.boundary.right.cells == 6 and "(interrupted)" in out_toml.read_text().splitlines()[1]


def test_tune_target_finds_the_thinnest_passing_thickness(capsys):
    code, out, err = _run(["tune", DEMO, "--target", "-45", "--runs", "8", "--min-cells", "4",
                           "--max-cells", "10"], capsys)
    assert code == 0
    table = {}
    for line in out.split("runs\n", 1)[1].splitlines():
        parts = line.split()
        if len(parts) == 5 and parts[0].isdigit():
            table[int(parts[0])] = (float(parts[1]), parts[4])
    assert table and all((value <= -45) == (verdict == "meets") for value, verdict in table.values())
    thinnest = int(out.split("thinnest layer meeting the target: ")[1].split()[0])
    assert table[thinnest][1] == "meets"
    assert all(verdict == "misses" for cells, (_, verdict) in table.items() if cells < thinnest)
    assert thinnest == 4 or table.get(thinnest - 1, (0, ""))[1] == "misses"  # bisection ends next to a miss
    assert all(f"{cells:>3} cells" in err for cells in table)  # each thickness reported as it finishes


def test_tune_target_out_of_reach_exits_1(tmp_path, capsys):
    code, out, _ = _run(["tune", DEMO, "--target", "-250", "--runs", "8", "--min-cells", "3",
                         "--max-cells", "4", "--write", tmp_path / "t.toml"], capsys)
    assert code == 1 and "no layer of 3..4 cells met -250 dB; nothing written" in out
    assert not (tmp_path / "t.toml").exists()


def test_tune_refuses_profile_sides(capsys):
    code, _, err = _run(["tune", DATA / "profile_cell.toml", "--thickness", "8"], capsys)
    assert code == 2 and "profile" in err and len(err.strip().splitlines()) == 1


# --- export ---------------------------------------------------------------------------

def test_export_writes_tables_scenario_and_report(tmp_path, capsys):
    folder = tmp_path / "hand" / "over"
    code, out, _ = _run(["export", DATA / "profile_cell.toml", "--out", folder, "--no-late"], capsys)
    assert code == 0
    names = sorted(p.name for p in folder.iterdir())
    assert names == sorted(f"profile_cell.{suffix}" for suffix in
                           ("coefficients.csv", "coefficients.json", "coefficients.npz", "scenario.toml", "report.html"))
    assert all(name in out for name in names)
    s = load_scenario(DATA / "profile_cell.toml")
    tables = layer_tables(s)
    back = read_coefficients_csv((folder / "profile_cell.coefficients.csv").read_text())
    np.testing.assert_array_equal(back["right"]["node"]["sigma_S_per_m"], tables["right"].node_sigma)
    with np.load(folder / "profile_cell.coefficients.npz", allow_pickle=False) as npz:
        np.testing.assert_array_equal(npz["left_half_c"], tables["left"].half_c)
    data = json.loads((folder / "profile_cell.coefficients.json").read_text())
    assert set(data["sides"]) == set(tables)
    assert load_scenario(folder / "profile_cell.scenario.toml") == s  # the profile travels inline
    report = (folder / "profile_cell.report.html").read_text()
    assert "Quietlayer report" in report and "certifies no" in report and "profile from file" in report
