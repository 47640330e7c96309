"""Physical constants (SI) and parsing of quantities written with units."""

from __future__ import annotations

import math
import re

from .errors import ScenarioError

C0 = 299_792_458.0  # speed of light in vacuum, m/s (exact)
MU0 = 1.25663706212e-6  # vacuum permeability, H/m (CODATA 2018)
EPS0 = 1.0 / (MU0 * C0 * C0)  # vacuum permittivity, F/m
ETA0 = MU0 * C0  # impedance of free space, ohm

_LENGTH = {"m": 1.0, "cm": 1e-2, "mm": 1e-3, "um": 1e-6, "µm": 1e-6, "μm": 1e-6, "nm": 1e-9}
_FREQUENCY = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9, "thz": 1e12}
_NUMBER_UNIT = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([^\s\d.].*?)?\s*$")


def _parse(field: str, value, table: dict[str, float], unit_hint: str, fold_case: bool) -> float:
    if isinstance(value, bool):
        raise ScenarioError(field, value, f"a number in {unit_hint} or a string such as '1.5 {unit_hint}'")
    if isinstance(value, (int, float)):
        number = float(value)
    elif isinstance(value, str):
        match = _NUMBER_UNIT.match(value)
        if not match:
            raise ScenarioError(field, value, f"a number with a unit, e.g. '1.5 {unit_hint}'")
        unit = (match.group(2) or "").strip()
        key = unit.lower() if fold_case else unit
        if unit == "":
            scale = 1.0
        elif key in table:
            scale = table[key]
        else:
            raise ScenarioError(field, value, f"a unit among {', '.join(sorted(set(table)))}")
        number = float(match.group(1)) * scale
    else:
        raise ScenarioError(field, value, f"a number in {unit_hint} or a string such as '1.5 {unit_hint}'")
    if not math.isfinite(number):
        raise ScenarioError(field, value, "a finite number")
    return number


def parse_length(field: str, value) -> float:
    """Return a length in metres from a number (metres) or a string like '0.5 mm'."""
    return _parse(field, value, _LENGTH, "mm", fold_case=False)


def parse_frequency(field: str, value) -> float:
    """Return a frequency in hertz from a number (Hz) or a string like '2.4 GHz'."""
    return _parse(field, value, _FREQUENCY, "GHz", fold_case=True)
