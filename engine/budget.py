"""How much work and memory a measurement of a scenario takes, and refusing
work beyond a budget before any of it starts.

    estimate = estimate_work(s, late_steps=20_000)
    check_work(s, COMMAND_BUDGET, late_steps=20_000)   # ScenarioError if too much

A measurement runs the test grid (interior and layers) and a reflection-free
reference whose walls sit more than steps/2 cells beyond the interior
(`reference.margin_cells`), so the reference grows with the run length: at
2,000,000 steps it would be a 2-million-cell square.  The estimate is plain
arithmetic on the sizes, so it is safe on any scenario that validates, and
the refusal names the field to change (steps, or nx / ny when even one step
is too much, or late_steps) with the range this budget allows.
"""

from __future__ import annotations

from dataclasses import dataclass

from .errors import ScenarioError
from .scenario import MAX_GRID_NODES, MAX_INTERIOR_CELLS, MAX_STEPS, Scenario

# Bytes held per grid node during a run: three fields, their update
# coefficients and the float64 material maps the grid is built from
# (order of magnitude of engine/grid.py's arrays; the psi slabs of the layers
# are small beside them).
FIELD_ARRAYS = 9
BUILD_BYTES_PER_NODE = 16
# A node inside a CPML also updates its psi (the recursive convolution): a grid
# that is mostly layer (four 200-cell layers round an 80 x 200 interior) ran at
# 76 Mcells/s against ~1000 for an interior, so a layer node counts ten times.
LAYER_NODE_COST = 10
PSI_ARRAYS = 4  # psi of both fields and directions, where the layers are
FRAME_BYTES_TARGET = 2e8  # reference.frame_every keeps a run's interior frames near this
NOMINAL_RATE = 5e8  # cell updates per second of one measurement on an ordinary 2-core machine (measured ~1e9)


@dataclass(frozen=True)
class WorkBudget:
    """The most one measurement may cost: cell updates (test, reference and
    late-time runs together; a layer node counts LAYER_NODE_COST) and bytes
    held at once."""

    cell_updates: float
    memory_bytes: float
    name: str = "budget"


# A command on the user's own machine: about an hour of runs, 8 GiB.
COMMAND_BUDGET = WorkBudget(cell_updates=2e12, memory_bytes=8 * 2**30, name="the command's budget")
# One change on a served page, where any visitor may ask: a few seconds of runs, 1 GiB.
VISITOR_BUDGET = WorkBudget(cell_updates=6e9, memory_bytes=2**30, name="the page's budget per change")


@dataclass(frozen=True)
class WorkEstimate:
    test_nodes: int
    reference_nodes: int
    steps: int
    late_steps: int
    cell_updates: float
    frame_bytes: float
    memory_bytes: float
    reference_runnable: bool = True  # within the engine's grid limits (MAX_INTERIOR_CELLS, MAX_GRID_NODES)

    @property
    def seconds(self) -> float:
        """Rough run time at NOMINAL_RATE (the real one depends on the machine and its load)."""
        return self.cell_updates / NOMINAL_RATE

    def describe(self) -> str:
        return (f"{self.cell_updates:.2g} cell updates (test grid {self.test_nodes:,} nodes, reference "
                f"{self.reference_nodes:,} nodes, {self.steps:,} steps"
                + (f", late-time check {self.late_steps:,} steps" if self.late_steps else "")
                + f"), {self.memory_bytes / 2**30:.2g} GiB")


@dataclass(frozen=True)
class _Sizes:
    """What the estimate depends on, so that one size can be varied alone."""

    nx: int
    ny: int
    layers_x: int
    layers_y: int
    periodic_x: bool
    periodic_y: bool
    itemsize: int
    probes: int

    @classmethod
    def of(cls, s: Scenario) -> "_Sizes":
        b = s.boundary
        return cls(s.nx, s.ny, b.left.layer_cells + b.right.layer_cells, b.bottom.layer_cells + b.top.layer_cells,
                   b.periodic_x, b.periodic_y, 4 if s.precision == "float32" else 8, len(s.probes))

    def estimate(self, steps: int, late_steps: int = 0) -> WorkEstimate:
        test = (self.nx + self.layers_x + 1) * (self.ny + self.layers_y + 1)
        margin = steps // 2 + 2  # reference.margin_cells
        ref_nx = self.nx + (0 if self.periodic_x else 2 * margin)
        ref_ny = self.ny + (0 if self.periodic_y else 2 * margin)
        ref = (ref_nx + 1) * (ref_ny + 1)
        interior = (self.nx + 1) * (self.ny + 1)
        layer = test - interior
        test_cost = test + (LAYER_NODE_COST - 1) * layer  # in interior-node updates
        # frames as reference.frame_every takes them: about 100 per run, ~FRAME_BYTES_TARGET in float64;
        # the reference's and the test run's are held together
        frames = min(steps, max(4, min(100, int(FRAME_BYTES_TARGET / (8 * interior))))) + 1
        frame_bytes = 2.0 * frames * interior * self.itemsize
        series = 2.0 * (steps + 1) * self.probes * 8
        per_node = FIELD_ARRAYS * self.itemsize + BUILD_BYTES_PER_NODE
        memory = per_node * max(ref, test) + PSI_ARRAYS * self.itemsize * layer + frame_bytes + series
        updates = float(test_cost) * steps + float(ref) * steps + float(test_cost) * late_steps
        # the reference must itself be a grid the engine takes
        runnable = max(ref_nx, ref_ny) <= MAX_INTERIOR_CELLS and ref <= MAX_GRID_NODES
        return WorkEstimate(test, ref, steps, late_steps, updates, frame_bytes, memory, runnable)


def estimate_work(s: Scenario, late_steps: int = 0) -> WorkEstimate:
    """Cell updates and memory of measuring `s` (plus a late-time check of
    `late_steps` steps when given)."""
    return _Sizes.of(s).estimate(s.steps, late_steps)


def _fits(e: WorkEstimate, budget: WorkBudget) -> bool:
    return e.reference_runnable and e.cell_updates <= budget.cell_updates and e.memory_bytes <= budget.memory_bytes


def _largest(fits, lo: int, hi: int) -> int:
    """The largest n in lo..hi with fits(n), given fits(lo) and fits falling with n."""
    while lo < hi:
        mid = (lo + hi + 1) // 2
        if fits(mid):
            lo = mid
        else:
            hi = mid - 1
    return lo


def check_work(s: Scenario, budget: WorkBudget = COMMAND_BUDGET, late_steps: int = 0,
               late_field: str = "late_steps") -> WorkEstimate:
    """The estimate of `s`, or ScenarioError naming the field to change and the
    range within `budget`: steps (for this grid), else the larger of nx and ny
    (even one step of this grid is too much), or `late_field` when only the
    late-time check is too long."""
    sizes = _Sizes.of(s)
    estimate = sizes.estimate(s.steps, late_steps)
    if _fits(estimate, budget):
        return estimate
    limit = "" if estimate.reference_runnable else (
        f"its reference grid would exceed {MAX_INTERIOR_CELLS:,} cells a side or {MAX_GRID_NODES:,} nodes; ")
    over = limit + (f"the run would take {estimate.cell_updates:.2g} cell updates and {estimate.memory_bytes / 2**30:.2g} GiB; "
            f"{budget.name} is {budget.cell_updates:.2g} and {budget.memory_bytes / 2**30:.3g} GiB")
    if late_steps and _fits(sizes.estimate(s.steps), budget):
        most = _largest(lambda n: _fits(sizes.estimate(s.steps, n), budget), 0, late_steps)
        raise ScenarioError(late_field, late_steps, f"a whole number of steps up to {most:,} for this grid ({over})")
    if _fits(sizes.estimate(1), budget):
        most = _largest(lambda n: _fits(sizes.estimate(n), budget), 1, min(s.steps, MAX_STEPS))
        raise ScenarioError("steps", s.steps, f"a whole number from 1 to {most:,} for this grid ({over})")
    name = "nx" if s.nx >= s.ny else "ny"
    value = getattr(s, name)

    def fits_size(n: int) -> bool:
        resized = _Sizes(**{**sizes.__dict__, name: n})
        return _fits(resized.estimate(s.steps), budget)
    if fits_size(2):
        most = _largest(fits_size, 2, value)
        raise ScenarioError(name, value, f"a whole number of cells from 2 to {most:,} at {s.steps:,} steps ({over})")
    raise ScenarioError("steps", s.steps, f"fewer steps on a smaller grid ({over})")


def work_note(estimate: WorkEstimate, usual_seconds: float = 30.0) -> str | None:
    """A sentence to show before a run far longer than usual, else None."""
    if estimate.seconds <= usual_seconds:
        return None
    minutes = estimate.seconds / 60
    when = f"{minutes:.0f} min" if minutes < 120 else f"{minutes / 60:.1f} h"
    return f"a long run: {estimate.describe()}; roughly {when} on an ordinary 2-core machine"
