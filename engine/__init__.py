"""Quietlayer engine: a 2D FDTD core with a CFS-CPML, usable on its own.

    from quietlayer.engine import Scenario, Source, Probe, Side, Boundary, simulate
"""

from .errors import DivergenceError, ResolutionWarning, RunCancelled, ScenarioError
from .grid import YeeGrid, build_grid
from .layer import LayerTable, layer_table, layer_tables, recursive_convolution, sigma_opt
from .scenario import Block, Boundary, Probe, Profile, Scenario, Side, Source
from .simulate import RunResult, field_energy, simulate
from .units import C0, EPS0, ETA0, MU0, parse_frequency, parse_length
from .waveforms import WAVEFORMS, Pulse, design_pulse

__all__ = [
    "Block", "Boundary", "C0", "DivergenceError", "EPS0", "ETA0", "LayerTable", "MU0", "Probe",
    "Profile", "Pulse", "ResolutionWarning", "RunCancelled", "RunResult", "Scenario",
    "ScenarioError", "Side", "Source", "WAVEFORMS", "YeeGrid", "build_grid", "design_pulse",
    "field_energy", "layer_table", "layer_tables", "recursive_convolution", "sigma_opt",
    "simulate", "parse_frequency", "parse_length",
]
