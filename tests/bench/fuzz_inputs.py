"""Hostile and malformed scenario files, run by hand:

    python tests/bench/fuzz_inputs.py [--count 5000] [--seed 1] [--workers 2] [--subprocess-every 100]

Each input is made from one of the presets (and the profile-file scenario of
the tests): wrong types, NaN and infinities, negative and huge sizes, huge
nx x ny and run lengths, unknown keys, broken TOML, non-UTF-8 bytes, inline
tables or arrays nested deep, long dotted keys and number literals, a list
where a table or number belongs, and profile files that are missing, a
folder, a symlink loop, a pipe, huge, one huge cell, or outside the
scenario's folder.  Each goes through `quietlayer check --no-late` (in the
worker's process; every Nth also as a real process) and through
`Scenario.from_toml` (a page upload: its text, with the scenario's folder for
profile files; a scenario that validates must then be refused by the work
budget, as the page refuses it).

Clean means: exit code 2, nothing on stdout, exactly one line on stderr that
names the key (or says what is wrong with the file), no traceback, no run
started (the engine's `simulate` is replaced by one that raises), done within
30 s; and from_toml raises ScenarioError.  Lines before the last list the
inputs that were not clean.  Last line:
tried=<inputs> clean=<inputs clean both ways> tracebacks=<inputs with a traceback> hangs=<inputs over 30 s>
"""

from __future__ import annotations

import argparse
import contextlib
import io
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import tomllib
import traceback
from concurrent.futures import ProcessPoolExecutor, TimeoutError as FutureTimeout
from dataclasses import dataclass, field
from pathlib import Path

import tomli_w

ROOT = Path(__file__).resolve().parents[2]
PRESETS = sorted((ROOT / "assets" / "presets").glob("*.toml")) + [ROOT / "tests" / "data" / "profile_cell.toml"]
PROFILE = ROOT / "tests" / "data" / "own_profile.csv"
HANG_S = 30


class RunStarted(RuntimeError):
    """The engine was asked to run a grid: the input was not refused up front."""


@dataclass
class Case:
    """One hostile input: the scenario's bytes, other entries of its folder,
    and words of which its one-line message must carry one."""

    family: str
    text: bytes
    words: tuple
    extra: list = field(default_factory=list)  # ("file", name, bytes) | ("dir", name) | ("symlink", name, target) | ("fifo", name)
    budget_only: bool = False  # valid as a scenario; only the work budget refuses it


# --- values no key may take, and values wrong for particular keys --------------------

NOT_A_NUMBER = [float("nan"), float("inf"), -float("inf"), "abc", [1, 2], {"a": 1}, True, "", "1e400",
                "NaN mm", "12 parsecs"]
BAD_BY_KEY = {
    "dx": [0, -1e-3, 1e10, 1e-20, "-1 mm", "0 mm"], "dy": [0, -1, 5e3],
    "nx": [0, 1, -80, 2.5, 20_001, 10**9, 10**30], "ny": [0, -1, 7.5, 10**12, 20_001],
    "steps": [0, -5, 2.5, 2_000_001, 10**15],
    "courant": [0, -0.5, 1.01, 5e-324, 1e-300, 1e-12, 10.0], "eps_r": [0.5, 0, -3, 1e5, 1e300],
    "sigma": [-1, 1e9, 1e300], "polarization": ["TEM", "tmz", 1], "precision": ["float16", "double", 64],
    "title": [5, ["a"], {"b": 1}, "x" * 5000],
}
BAD_SOURCE = {"x": [-1, 10**6 + 1, 1.5, 10**20], "y": [-3, 2.5, 10**7], "f_max": [0, -1e9, "fast", "5 parsecs"],
              "f_min": [-1, 1e30, "-2 GHz"], "waveform": ["square", 3, ["ricker"]], "amplitude": [0, -1, 1e13],
              "line": ["z", 1, "xy"]}
BAD_SIDE = {"kind": ["pml", 0, "PERIODIC"], "cells": [0, 501, -3, 2.5, 10**10], "order": [0, -1, 21, 1e10],
            "sigma_ratio": [-1, 1001], "sigma_max": [-1, 1e13], "kappa_max": [0.5, 1001, -2],
            "alpha_max": [-1, 1e7], "alpha_order": [-1, 21]}
BAD_PROBE = {"x": [-1, 10**6, 1.5, 100_000], "y": [-2, 10**5], "name": ["", 5, "p" * 500, [1]]}
HUGE_SIZES = [(nx, ny, steps) for nx in (5_000, 12_000, 20_000) for ny in (5_000, 12_000, 20_000)
              for steps in (20_000, 200_000, 2_000_000)] + [(80, 200, steps) for steps in
                                                          (10_000, 50_000, 400_000, 2_000_000)]


def _dump(data: dict) -> bytes:
    return tomli_w.dumps(data).encode("utf-8")


def _base(rng: random.Random) -> tuple[Path, dict, str]:
    path = rng.choice(PRESETS)
    text = path.read_text("utf-8")
    return path, tomllib.loads(text), text


def _with_profile(path: Path) -> list:
    return [("file", PROFILE.name, PROFILE.read_bytes())] if "profile_file" in path.read_text("utf-8") else []


def _cpml_sides(data: dict) -> list[str]:
    layer = data.get("layer", {})
    return [n for n in ("left", "right", "bottom", "top")
            if isinstance(layer.get(n), dict) and layer[n].get("kind", "cpml") == "cpml"] or ["right"]


def _key_name(key: str) -> str:
    return key.split(".")[-1]


# --- families --------------------------------------------------------------------

def wrong_value(rng: random.Random) -> Case:
    path, data, _ = _base(rng)
    where = rng.choice(["top", "top", "source", "side", "shared", "probe"])
    if where == "top":
        key = rng.choice(list(BAD_BY_KEY))
        text_keys = ("title", "polarization", "precision")  # texts: a number is wrong, a text may be right
        data[key] = rng.choice(BAD_BY_KEY[key] + ([] if key in text_keys else NOT_A_NUMBER[:7]))
        words = (key,)
    elif where == "source":
        key = rng.choice(list(BAD_SOURCE))
        data["source"][key] = rng.choice(BAD_SOURCE[key] + NOT_A_NUMBER[:6])
        words = (f"source.{key}",)
    elif where in ("side", "shared"):
        key = rng.choice(list(BAD_SIDE))
        value = rng.choice(BAD_SIDE[key] + NOT_A_NUMBER[:6])
        layer = data.setdefault("layer", {})
        side = rng.choice(_cpml_sides(data))
        if where == "shared":
            for n in ("left", "right", "bottom", "top"):
                if isinstance(layer.get(n), dict):
                    layer[n].pop(key, None)
                    if key in ("sigma_ratio", "sigma_max"):
                        layer[n].pop("sigma_ratio", None)
                        layer[n].pop("sigma_max", None)
            for k in ("sigma_ratio", "sigma_max"):
                if key in ("sigma_ratio", "sigma_max"):
                    layer.pop(k, None)
            layer[key] = value
        else:
            layer.setdefault(side, {})[key] = value
            if key in ("sigma_ratio", "sigma_max"):
                layer[side].pop("sigma_max" if key == "sigma_ratio" else "sigma_ratio", None)
        words = (key,)
    else:
        probes = data.get("probes") or [{"name": "p", "x": 1, "y": 1}]
        key = rng.choice(list(BAD_PROBE))
        rng.choice(probes)[key] = rng.choice(BAD_PROBE[key])
        data["probes"] = probes
        words = (key, "probe")
    return Case("wrong value", _dump(data), words, _with_profile(path))


def huge_work(rng: random.Random) -> Case:
    path, data, _ = _base(rng)
    nx, ny, steps = rng.choice(HUGE_SIZES)
    data.update(nx=nx, ny=ny, steps=steps)
    return Case("huge work", _dump(data), ("steps", "nx", "ny"), _with_profile(path), budget_only=True)


def unknown_key(rng: random.Random) -> Case:
    path, data, _ = _base(rng)
    name = rng.choice(["colour", "stepz", "nX", "layer_cells", "x" * rng.randint(1, 300), "über", "<script>"])
    where = rng.choice(["top", "source", "side", "probe"])
    if where == "top":
        data[name] = rng.choice([1, "a", [1], {"b": 2}])
    elif where == "source":
        data["source"][name] = 1
    elif where == "side":
        data.setdefault("layer", {}).setdefault(rng.choice(_cpml_sides(data)), {})[name] = 1
    else:
        data["probes"] = (data.get("probes") or [{"name": "p", "x": 1, "y": 1}])
        data["probes"][0][name] = 1
    return Case("unknown key", _dump(data), (name[:20], "known key"), _with_profile(path))


def wrong_shape(rng: random.Random) -> Case:
    """A list where a table or number belongs, a number where a list belongs."""
    path, data, _ = _base(rng)
    key, value = rng.choice([("probes", 5), ("probes", "p"), ("probes", {"a": 1}), ("blocks", 3), ("blocks", [1, 2]),
                             ("source", [1, 2]), ("source", 7), ("layer", 3), ("layer", [1]), ("nx", [80]),
                             ("steps", [600, 700]), ("probes", [[1, 2]]), ("probes", [1, 2])])
    data[key] = value
    return Case("wrong shape", _dump(data), (key,), _with_profile(path))


def side_shape(rng: random.Random) -> Case:
    path, data, _ = _base(rng)
    side = rng.choice(["left", "right", "bottom", "top"])
    layer = data.setdefault("layer", {})
    value = rng.choice([[1, 2], 5, "cpml", {"depth": 5, "sigma": [1], "kappa": [1], "alpha": [0]},
                        {"depth": [0, 1], "sigma": "x", "kappa": [1, 1], "alpha": [0, 0]},
                        {"depth": [0, float("nan")], "sigma": [0, 1], "kappa": [1, 1], "alpha": [0, 0]}])
    if isinstance(value, dict):
        layer.setdefault(side, {}).pop("profile_file", None)
        layer[side]["profile"] = value
        layer.pop("profile_file", None)
        words = ("profile",)
    else:
        layer[side] = value
        words = (side,)
    return Case("wrong shape", _dump(data), words, _with_profile(path))


def broken_toml(rng: random.Random) -> Case:
    path, _, text = _base(rng)
    for _ in range(20):  # a change inside a comment or a string still parses: try another
        raw = _break(rng, text.encode())
        try:
            tomllib.loads(raw.decode("utf-8", "replace"))
        except tomllib.TOMLDecodeError:
            break
    else:
        raw = text.encode() + b"\nbroken = [\n"
    return Case("broken TOML", raw, ("TOML",), _with_profile(path))


def _break(rng: random.Random, raw: bytes) -> bytes:
    how = rng.choice(["cut", "drop", "insert", "dup"])
    if how == "cut":
        raw = raw[: rng.randint(1, len(raw) - 1)]
    elif how == "drop":
        positions = [i for i, c in enumerate(raw) if c in b"[]{}=\""]
        i = rng.choice(positions)
        raw = raw[:i] + raw[i + 1:]
    elif how == "insert":
        i = rng.randint(0, len(raw))
        raw = raw[:i] + rng.choice([b"[[", b"]", b"{", b"= =", b'"', b"'''", b"\\u00", b"\n[source]\n"]) + raw[i:]
    else:
        raw = raw.replace(b"\nnx = ", b"\nnx = 81\nnx = ", 1)
    return raw


def not_utf8(rng: random.Random) -> Case:
    path, _, text = _base(rng)
    raw = text.encode()
    how = rng.choice(["byte", "latin1", "utf16", "nul", "binary"])
    if how == "byte":
        i = rng.randint(0, len(raw))
        raw = raw[:i] + rng.choice([b"\xff", b"\xc3\x28", b"\x80", b"\xed\xa0\x80"]) + raw[i:]
    elif how == "latin1":
        raw = text.replace("title = ", "title = \"\xe9t\xe9\"\nxtitle = ").encode("latin-1", "replace")
    elif how == "utf16":
        raw = text.encode("utf-16")
    elif how == "nul":
        i = rng.randint(0, len(raw))
        raw = raw[:i] + b"\x00" + raw[i:]
    else:
        raw = bytes(rng.randrange(256) for _ in range(rng.randint(1, 4000)))
    return Case("non-UTF-8", raw, ("UTF-8", "TOML", "line"), _with_profile(path))


def deep_nesting(rng: random.Random) -> Case:
    path, _, text = _base(rng)
    depth = rng.choice([17, 50, 1000, 3000, 20000])
    kind = rng.choice(["table", "array", "mixed"])
    if kind == "table":
        value = "{a = " * depth + "1" + "}" * depth
    elif kind == "array":
        value = "[" * depth + "1" + "]" * depth
    else:
        value = "[{a = " * depth + "1" + "}]" * depth
    key = rng.choice(["deep", "nx", "title"])
    text = text.replace(f"\n{key} = ", f"\nold_{key} = ") + f"\n{key} = {value}\n" if key != "deep" else \
        text.replace("\n[", f"\ndeep = {value}\n[", 1)
    return Case("deep nesting", text.encode(), ("nest",), _with_profile(path))


def long_dotted_key(rng: random.Random) -> Case:
    path, _, text = _base(rng)
    parts = rng.choice([9, 30, 1000, 100_000, 300_000])
    key = ".".join(["k"] * parts)
    where = rng.choice(["key", "header"])
    addition = f"{key} = 1\n" if where == "key" else f"[{key}]\n"
    text = (addition + text) if where == "key" else (text + "\n" + addition)
    return Case("long dotted key", text.encode(), ("dotted key",), _with_profile(path))


def long_number(rng: random.Random) -> Case:
    path, _, text = _base(rng)
    digits = rng.choice([41, 400, 4301, 10_000, 100_000])
    key = rng.choice(["nx", "steps", "courant", "eps_r"])
    number = "9" * digits if key in ("nx", "steps") else "1." + "0" * digits
    lines = [ln for ln in text.splitlines() if not ln.startswith(f"{key} = ")]
    lines.insert(rng.randint(0, 3), f"{key} = {number}")
    return Case("long number", "\n".join(lines).encode(), ("digits",), _with_profile(path))


def huge_file(rng: random.Random) -> Case:
    path, _, text = _base(rng)
    how = rng.choice(["comment", "title", "probes", "blocks", "profile rows"])
    if how == "comment":
        text += "# " + "x" * rng.choice([1 << 20, 3 << 20]) + "\n"
        words = ("bytes",)
    elif how == "title":
        text = text.replace("\ntitle = ", "\nold_title = ", 1) if "\ntitle = " in text else text
        text = f'title = "{"t" * rng.choice([300, 100_000, 900_000])}"\n' + text.replace("title = ", "old_title = ")
        words = ("title", "bytes")
    elif how == "probes":
        data = tomllib.loads(text)
        data["probes"] = [{"name": f"p{i}", "x": 1, "y": 1} for i in range(rng.choice([1001, 5000]))]
        text = tomli_w.dumps(data)
        words = ("probes",)
    elif how == "blocks":
        data = tomllib.loads(text)
        data["blocks"] = [{"x0": 1, "x1": 2, "y0": 1, "y1": 2, "eps_r": 2.0} for _ in range(rng.choice([201, 2000]))]
        text = tomli_w.dumps(data)
        words = ("blocks",)
    else:
        data = tomllib.loads(text)
        rows = rng.choice([100_001, 200_000])
        side = rng.choice(_cpml_sides(data))
        data.setdefault("layer", {}).setdefault(side, {}).pop("profile_file", None)
        data["layer"].pop("profile_file", None)
        data["layer"][side]["profile"] = {"depth": [i * 1e-4 for i in range(rows)], "sigma": [0] * rows,
                                          "kappa": [1] * rows, "alpha": [0] * rows}
        text = tomli_w.dumps(data)
        words = ("profile", "bytes")
    return Case("huge file", text.encode(), words, _with_profile(path))


def tiny_time_step(rng: random.Random) -> Case:
    path, data, _ = _base(rng)
    data["courant"] = rng.choice([5e-324, 1e-320, 1e-300, 1e-200, 1e-30, 1e-9])
    return Case("tiny time step", _dump(data), ("courant",), _with_profile(path))


def bad_profile_file(rng: random.Random) -> Case:
    path, data, _ = _base(rng)
    side = rng.choice(_cpml_sides(data))
    layer = data.setdefault("layer", {})
    layer.pop("profile_file", None)
    layer.setdefault(side, {}).pop("profile", None)
    good = PROFILE.read_bytes()
    how = rng.choice(["missing", "folder", "loop", "huge", "huge cell", "outside", "absolute", "nul", "fifo",
                      "device", "empty", "binary", "long name", "dangling"])
    extra = []
    name = "p.csv"
    if how == "missing":
        name = "nowhere.csv"
    elif how == "folder":
        extra.append(("dir", name))
    elif how == "loop":
        extra += [("symlink", "a.csv", "b.csv"), ("symlink", "b.csv", "a.csv")]
        name = "a.csv"
    elif how == "huge":
        extra.append(("file", name, good + b"0, 0, 1, 0\n" * ((5 << 20) // 11)))
    elif how == "huge cell":
        extra.append(("file", name, good + b"0" * rng.choice([200_000, 3 << 20]) + b", 1, 1, 0\n"))
    elif how == "outside":
        name = rng.choice(["../own_profile.csv", "../../../../etc/hostname", "sub/../../x.csv"])
        extra.append(("outside", PROFILE.name, good))
    elif how == "absolute":
        name = rng.choice(["/etc/passwd", "/proc/self/environ", "/dev/zero", str(PROFILE)])
    elif how == "nul":
        name = "p\x00.csv"
    elif how == "fifo":
        extra.append(("fifo", name))
    elif how == "device":
        extra.append(("symlink", name, "/dev/zero"))
    elif how == "empty":
        extra.append(("file", name, b""))
    elif how == "binary":
        extra.append(("file", name, bytes(rng.randrange(256) for _ in range(2000))))
    elif how == "long name":
        name = "p" * rng.choice([300, 5000]) + ".csv"
    else:
        extra.append(("symlink", name, "gone.csv"))
    layer[side]["profile_file"] = name
    return Case("bad profile file", _dump(data), ("profile_file",), extra)


FAMILIES = [(wrong_value, 30), (huge_work, 8), (unknown_key, 8), (wrong_shape, 6), (side_shape, 5),
            (broken_toml, 10), (not_utf8, 6), (deep_nesting, 5), (long_dotted_key, 3), (long_number, 4),
            (huge_file, 3), (tiny_time_step, 3), (bad_profile_file, 9)]


def make_case(seed: int, index: int) -> Case:
    rng = random.Random(seed * 1_000_003 + index)
    family = rng.choices([f for f, _ in FAMILIES], weights=[w for _, w in FAMILIES])[0]
    return family(rng)


# --- running one -----------------------------------------------------------------

def write_case(case: Case, folder: Path) -> Path:
    """The case's files in `folder` (its scenario in folder/cell/); the scenario's path."""
    cell = folder / "cell"
    cell.mkdir(parents=True)
    for entry in case.extra:
        kind, name = entry[0], entry[1]
        target = cell / name
        if kind == "file":
            target.write_bytes(entry[2])
        elif kind == "outside":  # next to the scenario's folder, not in it
            (folder / name).write_bytes(entry[2])
        elif kind == "dir":
            target.mkdir()
        elif kind == "symlink":
            target.symlink_to(entry[2])
        elif kind == "fifo":
            os.mkfifo(target)
    path = cell / "scenario.toml"
    path.write_bytes(case.text)
    return path


def _refuse_runs(*args, **kwargs):
    raise RunStarted("a run was started")


@contextlib.contextmanager
def no_runs():
    """The engine's simulate replaced where measurements call it."""
    from quietlayer.engine import measure, reference
    saved = measure.simulate, reference.simulate
    measure.simulate = reference.simulate = _refuse_runs
    try:
        yield
    finally:
        measure.simulate, reference.simulate = saved


class _Alarm(Exception):
    pass


def _on_alarm(signum, frame):
    raise _Alarm()


def _judge_cli(code, out: str, err: str, words) -> str:
    if "Traceback" in err:
        return "traceback"
    lines = [ln for ln in err.splitlines() if ln.strip()]
    if code != 2:
        return f"exit {code}"
    if out.strip():
        return "stdout"
    if len(lines) != 1:
        return f"{len(lines)} lines"
    if not any(w.lower() in lines[0].lower() for w in words):
        return "key not named"
    return "clean"


def run_cli_in_process(path: Path) -> tuple[int | None, str, str]:
    from quietlayer.app.cli import main
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main(["check", "--no-late", str(path)])
        except SystemExit as exc:
            code = exc.code
        except _Alarm:
            raise
        except RunStarted:
            code = None
            print("run started", file=sys.stderr)
        except BaseException:  # noqa: BLE001 - the point is to see every one
            code = None
            traceback.print_exc()
    return code, out.getvalue(), err.getvalue()


def run_cli_process(path: Path) -> tuple[int | None, str, str]:
    env = dict(os.environ)
    try:
        r = subprocess.run([sys.executable, "-m", "quietlayer.app.cli", "check", "--no-late", str(path)],
                           capture_output=True, text=True, timeout=HANG_S, env=env, errors="replace")
    except subprocess.TimeoutExpired:
        raise _Alarm() from None
    return r.returncode, r.stdout, r.stderr


def judge_from_toml(case: Case, folder: Path) -> str:
    from quietlayer.engine.budget import COMMAND_BUDGET, check_work
    from quietlayer.engine.errors import ScenarioError
    from quietlayer.engine.scenario import Scenario
    try:
        text = case.text.decode("utf-8")
    except UnicodeDecodeError:
        return "clean"  # the page decodes an upload first and says so; nothing reaches the engine
    try:
        s = Scenario.from_toml(text, base_dir=folder)
    except ScenarioError:
        return "clean"
    except _Alarm:
        raise
    except BaseException as exc:  # noqa: BLE001
        return f"traceback ({type(exc).__name__})"
    if case.budget_only:
        try:
            check_work(s, COMMAND_BUDGET)
        except ScenarioError:
            return "clean"
    return "accepted"


def run_case(seed: int, index: int, as_process: bool) -> tuple[int, str, str, str]:
    """(index, family, verdict, detail) of one input."""
    case = make_case(seed, index)
    root = Path(tempfile.mkdtemp(prefix="ql-fuzz-"))
    previous = signal.signal(signal.SIGALRM, _on_alarm)
    try:
        path = write_case(case, root)
        signal.alarm(HANG_S)
        t0 = time.perf_counter()
        try:
            with no_runs():
                code, out, err = (run_cli_process if as_process else run_cli_in_process)(path)
                cli = _judge_cli(code, out, err, case.words)
                page = judge_from_toml(case, path.parent)
        except _Alarm:
            return index, case.family, "hang", f"over {HANG_S} s"
        finally:
            signal.alarm(0)
        elapsed = time.perf_counter() - t0
        if "traceback" in (cli, page) or page.startswith("traceback"):
            last = [ln for ln in err.splitlines() if ln.strip()][-1:] or [page]
            return index, case.family, "traceback", last[0][:200]
        if cli == "clean" and page == "clean":
            return index, case.family, "clean", f"{elapsed:.2f} s"
        first = (err.strip().splitlines() or [""])[0][:200]
        return index, case.family, "unclean", f"check: {cli}; from_toml: {page}; {first}"
    finally:
        signal.signal(signal.SIGALRM, previous)
        shutil.rmtree(root, ignore_errors=True)


def _worker_init():
    os.environ.setdefault("QUIETLAYER_CACHE_DIR", tempfile.mkdtemp(prefix="ql-fuzz-cache-"))
    import quietlayer.app.cli  # noqa: F401 - loaded once per worker, not per input


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--count", type=int, default=5000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--subprocess-every", type=int, default=100,
                        help="every Nth input also runs as a real `quietlayer` process")
    args = parser.parse_args()
    started = time.perf_counter()
    counts = {"clean": 0, "traceback": 0, "hang": 0, "unclean": 0}
    by_family: dict[str, list[int]] = {}
    slowest = (0.0, -1)
    tasks = [(args.seed, i, args.subprocess_every > 0 and i % args.subprocess_every == 0) for i in range(args.count)]
    pending, finished = list(tasks), 0
    while pending:  # a worker stuck where no alarm reaches it (C code) is killed and the pool started anew
        pool = ProcessPoolExecutor(max_workers=args.workers, initializer=_worker_init)
        futures = [(t, pool.submit(run_case, *t)) for t in pending]
        done = set()
        for task, fut in futures:
            try:
                index, family, verdict, detail = fut.result(timeout=4 * HANG_S)
            except FutureTimeout:
                index, family, verdict, detail = task[1], make_case(*task[:2]).family, "hang", "no answer from the worker"
            done.add(task)
            finished += 1
            counts[verdict] += 1
            tally = by_family.setdefault(family, [0, 0])
            tally[0] += 1
            tally[1] += verdict == "clean"
            if verdict == "clean" and float(detail.split()[0]) > slowest[0]:
                slowest = (float(detail.split()[0]), index)
            if verdict != "clean":
                print(f"input {index} ({family}): {verdict}: {detail}", flush=True)
            if finished % 500 == 0:
                print(f"... {finished} of {args.count} in {time.perf_counter() - started:.0f} s", file=sys.stderr,
                      flush=True)
            if detail == "no answer from the worker":
                for process in list(getattr(pool, "_processes", {}).values()):
                    process.kill()
                break
        pool.shutdown(wait=False, cancel_futures=True)
        pending = [t for t in pending if t not in done]
    for family, (tried, clean) in sorted(by_family.items()):
        print(f"  {family:<18} tried {tried:>5}  clean {clean:>5}")
    print(f"slowest clean input: {slowest[0]:.2f} s (input {slowest[1]}); "
          f"not clean for another reason: {counts['unclean']}; all in {time.perf_counter() - started:.0f} s")
    print(f"tried={args.count} clean={counts['clean']} tracebacks={counts['traceback']} hangs={counts['hang']}")


if __name__ == "__main__":
    main()
