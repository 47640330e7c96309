"""Extreme but valid settings: the check's JSON never carries NaN or an
infinity (RFC 8259 has neither; a missing value is null), and a run that
diverges says at which step."""

import json
import math
import re
from pathlib import Path

import pytest
import tomli_w
import tomllib

from quietlayer.app.cli import main

DEMO = Path(__file__).parents[1] / "assets" / "presets" / "demo.toml"
SIDES = ("left", "right", "bottom", "top")

EXTREMES = {  # top-level keys, or layer keys put on every side
    "courant 1.0": {"courant": 1.0},
    "host eps_r 100": {"eps_r": 100.0},
    "host sigma 1e3": {"sigma": 1e3},
    "1-cell layer": {"layer": {"cells": 1}},
    "200-cell layer": {"layer": {"cells": 200}},
    "order 0.1": {"layer": {"order": 0.1}},
    "order 20": {"layer": {"order": 20.0}},
    "kappa 1000": {"layer": {"kappa_max": 1000.0}},
    "alpha 1e6": {"layer": {"alpha_max": 1e6}},
    "all at once": {"courant": 1.0, "eps_r": 100.0, "sigma": 1e3,
                    "layer": {"cells": 1, "order": 20.0, "kappa_max": 1000.0, "alpha_max": 1e6}},
}


def _strict_json(text: str):
    def refuse(token):
        raise ValueError(f"non-standard JSON token {token}")
    return json.loads(text, parse_constant=refuse)


def _numbers_are_finite_or_null(value, where="") -> list[str]:
    """Paths of values that are neither finite numbers, null, text nor booleans."""
    if isinstance(value, dict):
        return [p for k, v in value.items() for p in _numbers_are_finite_or_null(v, f"{where}.{k}")]
    if isinstance(value, list):
        return [p for i, v in enumerate(value) for p in _numbers_are_finite_or_null(v, f"{where}[{i}]")]
    if isinstance(value, float) and not math.isfinite(value):
        return [where]
    return []


@pytest.mark.parametrize("name", list(EXTREMES))
def test_extreme_settings_give_strict_json_and_name_the_divergence_step(name, tmp_path, capsys):
    data = tomllib.loads(DEMO.read_text())
    changes = dict(EXTREMES[name])
    layer = changes.pop("layer", {})
    for side in SIDES:
        data["layer"][side].update(layer)
    data.update(changes)
    path = tmp_path / "extreme.toml"
    path.write_text(tomli_w.dumps(data))
    # a late-time check of 1,000 steps (200 on the grid that is mostly layer, which runs ~10x slower)
    late = "200" if name == "200-cell layer" else "1000"
    code = main(["check", str(path), "--json", "--late-steps", late])
    out, err = capsys.readouterr()
    assert code in (0, 1) and "Traceback" not in err, err
    report = _strict_json(out)
    assert not _numbers_are_finite_or_null(report)
    if report.get("diverged"):
        assert isinstance(report["diverged_step"], int) and f"at step {report['diverged_step']}" in report["diverged"]
    late = report.get("late_time") or {}
    if late.get("status") == "diverged":
        assert re.search(r"at step \d+", late["message"]), late
    for probe in report.get("probes", {}).values():  # a number is promised per probe: a value or null
        assert probe["peak_db"] is None or math.isfinite(probe["peak_db"])
