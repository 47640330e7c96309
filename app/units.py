"""Display units: pick a readable prefix for a range of values (no physics here)."""

from __future__ import annotations

_FREQ = [(1e12, "THz"), (1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz"), (1.0, "Hz")]
_TIME = [(1.0, "s"), (1e-3, "ms"), (1e-6, "µs"), (1e-9, "ns"), (1e-12, "ps"), (1e-15, "fs")]
_LENGTH = [(1.0, "m"), (1e-2, "cm"), (1e-3, "mm"), (1e-6, "µm"), (1e-9, "nm")]


def _pick(table, largest: float) -> tuple[float, str]:
    for scale, name in table:
        if largest >= scale:
            return scale, name
    return table[-1]


def frequency_unit(f_max: float) -> tuple[float, str]:
    return _pick(_FREQ, f_max)


def time_unit(t_max: float) -> tuple[float, str]:
    return _pick(_TIME, t_max)


def length_unit(extent: float) -> tuple[float, str]:
    """Unit for a plot whose largest coordinate is `extent` metres."""
    return _pick(_LENGTH, extent)


def format_length(metres: float) -> str:
    scale, name = _pick(_LENGTH, abs(metres) * 1.0000001)
    return f"{metres / scale:g} {name}"


def format_frequency(hertz: float) -> str:
    scale, name = _pick(_FREQ, abs(hertz) * 1.0000001)
    return f"{hertz / scale:g} {name}"


def snap(value: float, step: float) -> float:
    """`value` on a control's grid of `step`, as a clean decimal (0.35, not 0.35000000000000003)."""
    return float(f"{round(value / step) * step:.12g}")
