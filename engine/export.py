"""Layer coefficients out to files, and users' own profiles in from CSV.

The tables written here are the engine's own (`layer_tables`), in float64,
so another code can load exactly the numbers a run starts from (a float32
run rounds them when it builds the grid).  CSV and JSON floats are written
as repr does: the shortest text (at most 17 significant digits) that reads
back as the same float64.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import re
import tempfile
from pathlib import Path

import numpy as np

from .errors import ScenarioError
from .layer import LayerTable, layer_tables
from .scenario import SIDES, Profile, Scenario
from .units import parse_length

POSITIONS = ("node", "half")
FIELD_LABELS = {
    "TMz": {"node": "Ez", "half": "Hx/Hy"},
    "TEz": {"node": "Hz", "half": "Ex/Ey"},
}
# (row/JSON key, LayerTable attribute suffix, CSV header, unit)
COLUMNS = (
    ("depth_m", "depth", "depth (m)", "m"),
    ("sigma_S_per_m", "sigma", "sigma (S/m)", "S/m"),
    ("kappa", "kappa", "kappa (1)", "1"),
    ("alpha_S_per_m", "alpha", "alpha (S/m)", "S/m"),
    ("b", "b", "b (1)", "1"),
    ("c", "c", "c (1)", "1"),
)
LABEL_COLUMNS = ("side", "position", "field")
UNITS = {key: unit for key, _, _, unit in COLUMNS} | {
    "sigma_max_S_per_m": "S/m", "sigma_opt_S_per_m": "S/m", "dx_m": "m", "dy_m": "m", "dt_s": "s"}
COLUMN_MEANINGS = {
    "depth_m": "distance from the inner face of the layer towards the wall",
    "sigma_S_per_m": "graded conductivity",
    "kappa": "graded coordinate stretch, >= 1",
    "alpha_S_per_m": "graded frequency shift",
    "b": "decay factor of the recursive convolution psi <- b psi + c dF/du",
    "c": "weight of the derivative dF/du in that update",
}


def _float_text(value: float) -> str:
    return repr(float(value))


def _one_line(text: str) -> str:
    # a newline in a title would end the comment line and corrupt the table
    return " ".join(str(text).split())


# --- coefficients out -------------------------------------------------------

def _position_arrays(table: LayerTable, position: str) -> dict[str, np.ndarray]:
    return {key: getattr(table, f"{position}_{suffix}") for key, suffix, _, _ in COLUMNS}


def coefficient_rows(scenario: Scenario) -> list[dict]:
    """One row per CPML side, position kind (node, half) and depth, sides in
    the order left, right, bottom, top; keys side, position, field, depth_m,
    sigma_S_per_m, kappa, alpha_S_per_m, b, c."""
    labels = FIELD_LABELS[scenario.polarization]
    rows = []
    for side, table in layer_tables(scenario).items():
        for position in POSITIONS:
            arrays = _position_arrays(table, position)
            for k in range(arrays["depth_m"].size):
                row = {"side": side, "position": position, "field": labels[position]}
                row.update({key: float(values[k]) for key, values in arrays.items()})
                rows.append(row)
    return rows


def _scenario_summary(scenario: Scenario) -> dict:
    return {"title": scenario.title, "dx_m": scenario.dx, "dy_m": scenario.dy, "dt_s": scenario.dt,
            "polarization": scenario.polarization, "precision": scenario.precision}


def coefficients_csv(scenario: Scenario) -> str:
    """The coefficient rows as CSV text: `# ` comment lines (title, cell sizes,
    dt, polarization, units of every column), one header line whose names carry
    their units, then the rows."""
    labels = FIELD_LABELS[scenario.polarization]
    out = io.StringIO()
    out.write("# Quietlayer CPML coefficients\n")
    out.write(f"# title: {_one_line(scenario.title) or '(untitled)'}\n")
    out.write(f"# dx (m): {_float_text(scenario.dx)}\n")
    out.write(f"# dy (m): {_float_text(scenario.dy)}\n")
    out.write(f"# dt (s): {_float_text(scenario.dt)}\n")
    out.write(f"# polarization: {scenario.polarization} "
              f"(node: {labels['node']}, half: {labels['half']})\n")
    out.write(f"# precision of the run: {scenario.precision} (values below are float64)\n")
    out.write("# side: left, right, bottom or top; position: node (whole-cell depths 0..N) "
              "or half ((k + 1/2) cells)\n")
    for key, _, header, unit in COLUMNS:
        out.write(f"# {header}: unit {unit}; {COLUMN_MEANINGS[key]}\n")
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(list(LABEL_COLUMNS) + [header for _, _, header, _ in COLUMNS])
    for row in coefficient_rows(scenario):
        writer.writerow([row[k] for k in LABEL_COLUMNS] + [_float_text(row[key]) for key, _, _, _ in COLUMNS])
    return out.getvalue()


def coefficients_json(scenario: Scenario) -> str:
    """The coefficients as a JSON object with keys scenario, units and sides."""
    labels = FIELD_LABELS[scenario.polarization]
    sides = {}
    for side, table in layer_tables(scenario).items():
        entry = {"sigma_max_S_per_m": float(table.sigma_max), "sigma_opt_S_per_m": float(table.sigma_opt)}
        for position in POSITIONS:
            arrays = _position_arrays(table, position)
            entry[position] = {"field": labels[position]} | {k: v.tolist() for k, v in arrays.items()}
        sides[side] = entry
    # json writes floats with repr, which reloads every float64 exactly
    return json.dumps({"scenario": _scenario_summary(scenario), "units": UNITS, "sides": sides}, indent=1)


def coefficients_npz(scenario: Scenario, path) -> Path:
    """Write the coefficient arrays to `path` (exactly that name) as .npz:
    `<side>_<position>_<depth|sigma|kappa|alpha|b|c>`, `<side>_<position>_field`,
    `<side>_sigma_max`, `<side>_sigma_opt`, and title, dx, dy, dt,
    polarization, precision.  Everything loads with allow_pickle=False."""
    labels = FIELD_LABELS[scenario.polarization]
    arrays = {"title": np.array(scenario.title), "dx": np.array(scenario.dx), "dy": np.array(scenario.dy),
              "dt": np.array(scenario.dt), "polarization": np.array(scenario.polarization),
              "precision": np.array(scenario.precision)}
    for side, table in layer_tables(scenario).items():
        arrays[f"{side}_sigma_max"] = np.array(table.sigma_max)
        arrays[f"{side}_sigma_opt"] = np.array(table.sigma_opt)
        for position in POSITIONS:
            arrays[f"{side}_{position}_field"] = np.array(labels[position])
            for _, suffix, _, _ in COLUMNS:
                arrays[f"{side}_{position}_{suffix}"] = getattr(table, f"{position}_{suffix}")
    return savez_atomic(path, arrays)


_UMASK = os.umask(0)  # read once, at import: umask can only be read by setting it
os.umask(_UMASK)


def savez_atomic(path, arrays: dict) -> Path:
    """np.savez, written atomically (see _write_atomic)."""
    return _write_atomic(path, "wb", lambda fh: np.savez(fh, **arrays))


def write_text_atomic(path, text: str) -> Path:
    """A UTF-8 text file, written atomically (see _write_atomic)."""
    return _write_atomic(path, "w", lambda fh: fh.write(text))


def _write_atomic(path, mode: str, write) -> Path:
    """Write to a temporary file in the same folder, then os.replace: a crash
    or a full disk leaves the old file or the new one, never half of one."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, mode, **({} if "b" in mode else {"encoding": "utf-8", "newline": ""})) as fh:
            write(fh)
        os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes 0600; a handed-over file should read like any other
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    return path


# --- reading tables ---------------------------------------------------------

_HEADER_CELL = re.compile(r"^\s*(?P<name>[^\(\[]*?)\s*(?:[\(\[]\s*(?P<unit>[^\)\]]*?)\s*[\)\]])?\s*$")
_NUMBER = re.compile(r"^[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?$")
_DELIMITERS = ("\t", ";", ",")
_DELIMITER_NAMES = {"\t": "tab", ";": "semicolon", ",": "comma"}


def _split_header_cell(cell: str) -> tuple[str, str | None]:
    """'Sigma [S/m]' -> ('sigma', 'S/m'); 'kappa' -> ('kappa', None)."""
    match = _HEADER_CELL.match(cell)
    if not match:
        return cell.strip().lower(), None
    return match.group("name").lower(), match.group("unit")


def _table_lines(text: str, source_name: str, columns: tuple[str, ...]):
    """The header cells, the header's line number and the data rows as (line number,
    cells); blank lines and lines starting with # are skipped."""
    if not isinstance(text, str):
        raise ScenarioError(source_name, type(text).__name__, "CSV text")
    lines = [(n, line) for n, line in enumerate(text.lstrip("\ufeff").splitlines(), start=1)
             if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise ScenarioError(source_name, text[:80],
                            f"a header line naming the columns {', '.join(columns)}, then rows of numbers")
    header_no, header_line = lines[0]
    delimiter = next((d for d in _DELIMITERS if d in header_line), ",")
    def parse(line):
        try:
            return [cell.strip() for cell in next(csv.reader([line], delimiter=delimiter))]
        except csv.Error as exc:  # a cell beyond the csv module's field limit, a NUL byte
            raise ScenarioError(source_name, line, f"CSV lines of ordinary cells ({exc})") from None
    header = parse(header_line)
    rows = []
    for n, line in lines[1:]:
        cells = parse(line)
        if not any(cells):
            continue  # spreadsheets end tables with rows of bare separators
        if len(cells) != len(header):
            raise ScenarioError(f"{source_name} (line {n})", line,
                                f"{len(header)} cells separated by {_DELIMITER_NAMES[delimiter]}s, "
                                f"as in the header on line {header_no}")
        rows.append((n, cells))
    return header, header_no, rows


def _number_cell(field: str, cell: str) -> float:
    # stricter than float(), which also takes '1_000', 'nan' and 'inf'
    if not _NUMBER.match(cell):
        hint = " (with a dot as the decimal mark)" if "," in cell else ""
        raise ScenarioError(field, cell, f"a finite number such as 0.0125 or 1.5e-3{hint}")
    value = float(cell)
    if not math.isfinite(value):
        raise ScenarioError(field, cell, "a finite number (this one overflows float64)")
    return value


def read_coefficients_csv(text: str) -> dict:
    """Parse what `coefficients_csv` wrote: {side: {position: {"field": label,
    "depth_m": array, "sigma_S_per_m": ..., "kappa", "alpha_S_per_m", "b", "c"}}}."""
    source = "coefficients"
    wanted = list(LABEL_COLUMNS) + [suffix for _, suffix, _, _ in COLUMNS]
    header, _, rows = _table_lines(text, source, tuple(wanted))
    index = {_split_header_cell(cell)[0]: i for i, cell in enumerate(header)}
    missing = [name for name in wanted if name not in index]
    if missing:
        raise ScenarioError(source, ", ".join(header),
                            f"the columns {', '.join(wanted)} ({', '.join(missing)} missing)")
    collected: dict = {}
    for n, cells in rows:
        side, position, label = (cells[index[k]] for k in LABEL_COLUMNS)
        if side not in SIDES:
            raise ScenarioError(f"{source}.side (line {n})", side, f"one of {', '.join(SIDES)}")
        if position not in POSITIONS:
            raise ScenarioError(f"{source}.position (line {n})", position, f"one of {', '.join(POSITIONS)}")
        entry = collected.setdefault(side, {}).setdefault(
            position, {"field": label} | {key: [] for key, _, _, _ in COLUMNS})
        for key, suffix, _, _ in COLUMNS:
            entry[key].append(_number_cell(f"{source}.{suffix} (line {n})", cells[index[suffix]]))
    return {side: {position: {key: (np.array(values, dtype=np.float64) if key != "field" else values)
                              for key, values in entry.items()}
                   for position, entry in positions.items()}
            for side, positions in collected.items()}


# --- a user's profile in ----------------------------------------------------

PROFILE_COLUMNS = ("depth", "sigma", "kappa", "alpha")
_CONDUCTIVITY_UNITS = ("", "s/m")
_PLAIN_UNITS = ("", "1", "-")
_ALLOWED_UNITS = {"depth": "m, cm, mm, um, µm or nm", "sigma": "S/m", "kappa": "none, 1 or -",
                  "alpha": "S/m"}


def _depth_to_metres(field: str, unit: str):
    """A function turning a number in `unit` into metres."""
    try:
        scale = parse_length(field, f"1 {unit}")
    except ScenarioError:
        try:
            scale = parse_length(field, f"1 {unit.lower()}")
        except ScenarioError:
            raise ScenarioError(field, unit, f"a length unit: {_ALLOWED_UNITS['depth']}") from None
    if scale < 1.0:
        # divide by the exact power of ten, so '1.5' mm gives float('0.0015') m
        divisor = float(round(1.0 / scale))
        return lambda value: value / divisor
    return lambda value: value * scale


def _column_converter(field: str, name: str, unit: str | None):
    unit = (unit or "").strip()
    if name == "depth":
        return _depth_to_metres(field, unit) if unit else (lambda value: value)
    allowed = _CONDUCTIVITY_UNITS if name in ("sigma", "alpha") else _PLAIN_UNITS
    if unit.lower() not in allowed:
        raise ScenarioError(field, unit, f"the unit {_ALLOWED_UNITS[name]} (or none)")
    return lambda value: value


def profile_from_csv(text: str, source_name: str = "profile") -> Profile:
    """A layer Profile from CSV text exported by the user's own code.

    The header names the columns depth, sigma, kappa, alpha in any case and
    order, each optionally with its unit in ( ) or [ ] (depth in m, cm, mm,
    um or nm, converted to metres; sigma and alpha in S/m); other columns are
    ignored.  Cells are separated by commas, semicolons or tabs; blank lines
    and lines starting with # are skipped.  Every problem raises ScenarioError
    whose field starts with `source_name` (e.g. 'profile.sigma (line 7)').
    """
    header, header_no, rows = _table_lines(text, source_name, PROFILE_COLUMNS)
    index, converters = {}, {}
    for i, cell in enumerate(header):
        name, unit = _split_header_cell(cell)
        if name not in PROFILE_COLUMNS:
            continue
        if name in index:
            raise ScenarioError(f"{source_name}.{name}", ", ".join(header), "each column named once")
        index[name] = i
        converters[name] = _column_converter(f"{source_name}.{name} (line {header_no})", name, unit)
    missing = [name for name in PROFILE_COLUMNS if name not in index]
    if missing:
        raise ScenarioError(source_name, ", ".join(header) or "(no columns)",
                            f"a header naming the columns {', '.join(PROFILE_COLUMNS)}, units optional "
                            f"in ( ) or [ ]; missing: {', '.join(missing)}")
    columns = {name: [] for name in PROFILE_COLUMNS}
    for n, cells in rows:
        for name in PROFILE_COLUMNS:
            value = _number_cell(f"{source_name}.{name} (line {n})", cells[index[name]])
            columns[name].append(converters[name](value))
    try:
        return Profile(**{name: tuple(values) for name, values in columns.items()})
    except ScenarioError as exc:
        # Profile names its fields 'profile.*'; keep the caller's prefix
        if source_name != "profile" and exc.field.startswith("profile"):
            raise ScenarioError(source_name + exc.field[len("profile"):], exc.value, exc.allowed) from None
        raise
