"""Faults: lost workers and Ctrl-C mid-sweep lose no point and duplicate
none, the CSV stays complete; a damaged reference cache file is recomputed
and scores the same.  (Worker loss inside run_sweep itself, local processes
and Dask, is in test_sweep.py; Ctrl-C on the local pool in test_cli.py.)"""

import csv
import math
import os
import signal
import sys
import zipfile
from pathlib import Path

import numpy as np
import pytest

from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.measure import measure
from quietlayer.engine.reference import ReferenceCache, cache_dir
from quietlayer.engine.sweep import apply_point, grid_points, parse_vary

from processes import run_until

ROOT = Path(__file__).parents[1]
DEMO = ROOT / "assets" / "presets" / "demo.toml"
CLI = [sys.executable, "-m", "quietlayer.app.cli"]


def _csv_rows(path: Path) -> tuple[list[str], list[dict]]:
    with open(path, newline="") as fh:
        reader = csv.DictReader(fh)
        rows = list(reader)
        return reader.fieldnames, rows


def _children(pid: int) -> list[int]:
    """The processes `pid` started (from /proc)."""
    kids = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        try:
            kids += [int(k) for k in (task / "children").read_text().split()]
        except OSError:
            continue
    return kids


def _check_rows(path: Path, varies: list[str], total: int) -> list[dict]:
    """The CSV is whole (every column in every row), holds each point once,
    on its own values, measured."""
    fields, rows = _csv_rows(path)
    assert fields[:1] == ["index"] and "reason" in fields
    assert all(None not in row and len(row) == len(fields) for row in rows)
    indices = [int(r["index"]) for r in rows]
    assert len(set(indices)) == len(indices) and all(0 <= i < total for i in indices)
    expected = grid_points([parse_vary(v) for v in varies])
    names = [v.split("=")[0] for v in varies]
    for row in rows:
        point = expected[int(row["index"])]
        assert all(float(row[n]) == point[n] for n in names)
        assert row["status"] == "ok" and math.isfinite(float(row["worst_peak_db"]))
    return rows


def test_ctrl_c_mid_sweep_on_dask_keeps_every_finished_point_once(tmp_path):
    out_csv = tmp_path / "dask.csv"
    varies = ["order=2:4:20", "sigma_ratio=0.5:1.5:5"]
    code, out, err = run_until(CLI + ["sweep", str(DEMO), "--vary", varies[0], "--vary", varies[1],
                                       "--out", str(out_csv), "--dask", "local:2"],
                                "sweep ", 6, lambda p: p.send_signal(signal.SIGINT))
    assert code == 130, err
    rows = _check_rows(out_csv, varies, 100)
    assert 6 <= len(rows) < 100
    assert f"interrupted: kept {len(rows)} of 100 points" in err and "Traceback" not in err


def test_a_killed_worker_process_mid_sweep_loses_no_point(tmp_path):
    # 64 points or more run in worker processes; one killed outright mid-sweep:
    # its points are measured again in threads, every point once
    out_csv = tmp_path / "killed.csv"
    varies = ["order=2:4:16", "sigma_ratio=0.5:1.5:4"]
    killed = []

    def kill_a_worker(proc):
        # the command starts a forkserver, which starts the workers
        workers = [pid for child in _children(proc.pid) for pid in _children(child)]
        assert workers, "no worker processes found"
        os.kill(workers[-1], signal.SIGKILL)
        killed.append(workers[-1])

    code, out, err = run_until(CLI + ["sweep", str(DEMO), "--vary", varies[0], "--vary", varies[1],
                                       "--out", str(out_csv), "--workers", "2"], "sweep ", 4, kill_a_worker)
    assert killed and code == 0, err
    rows = _check_rows(out_csv, varies, 64)
    assert len(rows) == 64 and "64 of 64 points" in out and "Traceback" not in err
    # the points measured again elsewhere score as a lone measurement does
    base_rows = {int(r["index"]): r for r in rows}
    for index in (0, 37, 63):
        point = grid_points([parse_vary(v) for v in varies])[index]
        m = measure(apply_point(default_scenario(), point), parts={"probes"})
        assert float(base_rows[index]["worst_peak_db"]) == pytest.approx(m.worst_peak_db, abs=1e-9)


# --- damaged reference cache files ----------------------------------------------------

def _truncate(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def _garbage(path: Path) -> None:
    path.write_bytes(np.random.default_rng(3).bytes(path.stat().st_size))


def _zip_of_garbage(path: Path) -> None:  # a readable zip whose arrays are not
    with zipfile.ZipFile(path, "w") as z:
        z.writestr("key.npy", b"\x93NUMPY garbage")


def _other_format(path: Path) -> None:
    """A file of another format version under the same name: the right key,
    arrays of other shapes and kinds."""
    with np.load(path) as z:
        key = z["key"]
        arrays = {k: z[k] for k in z.files}
    arrays.update(probes=arrays["probes"].T.astype(np.int16), frames=arrays["frames"][..., 0], key=key)
    np.savez(path.with_suffix(""), **arrays)


def _poisoned(path: Path) -> None:
    with np.load(path) as z:
        arrays = {k: z[k] for k in z.files}
    arrays["frames"] = arrays["frames"].copy()
    arrays["frames"].flat[7] = np.nan
    np.savez(path.with_suffix(""), **arrays)


@pytest.mark.parametrize("damage", [_truncate, _garbage, _zip_of_garbage, _other_format, _poisoned])
def test_a_damaged_reference_file_is_recomputed_with_identical_scores(tmp_path, monkeypatch, damage):
    monkeypatch.setenv("QUIETLAYER_CACHE_DIR", str(tmp_path))
    s = default_scenario(steps=300)
    clean = measure(s, parts={"probes", "global"}, cache=ReferenceCache(use_disk=False))
    first = ReferenceCache()
    first.get(s)
    [path] = list(cache_dir().iterdir())
    damage(path)
    again = ReferenceCache()
    m = measure(s, parts={"probes", "global"}, cache=again)
    assert again.hits["computed"] == 1 and again.hits["disk"] == 0
    assert m.peak_db == clean.peak_db and m.global_db == clean.global_db  # bit for bit
    assert ReferenceCache().get_with_source(s)[1] == "disk"  # and stored whole again
