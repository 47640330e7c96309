"""Scenario files on disk: read one, resolve the profile files it names, and
say on which line of the file a bad value sits.

    s = load_scenario("my_cell.toml")   # raises ScenarioFileError

The scenario's own validation names a field ('layer.right.cells',
'source.waveform', 'probes[2].x', 'probe[corner].x'); `field_line` finds
where that field is written by scanning the TOML text: table headers
([table], [[array]]), `key =` lines (dotted keys too), arrays and inline
tables.  A key that is missing points at its table's header instead; a
layer key given once in [layer] for every side points at that line.
Malformed TOML keeps the line tomllib reports.
"""

from __future__ import annotations

import re
import stat
import tomllib
from pathlib import Path

from .budget import WorkBudget, check_work
from .errors import ScenarioError
from .scenario import MAX_TEXT_BYTES, SIDES, Scenario, ScenarioTextError, parse_toml

__all__ = ["ScenarioFileError", "load_scenario", "field_line", "key_lines"]


class ScenarioFileError(ScenarioError):
    """A scenario file is unreadable or invalid.

    str() is one line: '<path>, line <n>: <what is wrong>' (no line when the
    problem has none, e.g. an unreadable file or a key missing at the top).
    """

    def __init__(self, path, field: str, value, allowed: str, line: int | None = None,
                 detail: str | None = None):
        super().__init__(field, value, allowed)
        self.path = str(path)
        self.line = line
        self.detail = detail or ScenarioError.__str__(self)
        where = f"{self.path}, line {line}" if line else self.path
        self.args = (f"{where}: {self.detail}",)

    def __str__(self) -> str:
        return self.args[0]


def load_scenario(path, budget: WorkBudget | None = None, late_steps: int = 0) -> Scenario:
    """The Scenario in a TOML file; relative `profile_file` names start from
    the file's folder.  Every problem raises ScenarioFileError.  The file is
    read only up to MAX_TEXT_BYTES and checked against the text limits before
    it is parsed, so a hostile file costs milliseconds.  With a `budget`, a
    scenario whose measurement (and late-time check of `late_steps`) would
    cost more is refused too, naming the field to change."""
    path = Path(path)
    try:
        raw = _read_limited(path, MAX_TEXT_BYTES)
    except (OSError, ValueError) as exc:  # ValueError: a NUL byte in the name
        reason = getattr(exc, "strerror", None) or str(exc)
        raise ScenarioFileError(path, "file", str(path), "a readable file",
                                detail=f"cannot read the file: {reason}") from None
    if len(raw) > MAX_TEXT_BYTES:
        raise ScenarioFileError(path, "file", str(path), "a smaller file",
                                detail=f"more than {MAX_TEXT_BYTES:,} bytes: too large for a scenario file")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise ScenarioFileError(path, "file", str(path), "UTF-8 text", line=line,
                                detail="not UTF-8 text (a TOML scenario is plain text)") from None
    try:
        data = parse_toml(text)
    except tomllib.TOMLDecodeError as exc:
        line, message = _decode_error_line(exc)
        shown = _line_text(text, line)
        detail = f"not valid TOML: {message}" + (f" in: {shown}" if shown else "")
        raise ScenarioFileError(path, "file", shown, "valid TOML", line=line, detail=detail) from None
    except ScenarioTextError as exc:
        raise ScenarioFileError(path, exc.field, exc.value, exc.allowed, line=exc.line,
                                detail=f"{exc.value} is not allowed: {exc.allowed}") from None
    try:
        s = Scenario.from_dict(data, base_dir=path.parent)
        if budget is not None:
            check_work(s, budget, late_steps)
        return s
    except ScenarioError as exc:
        line = field_line(exc.field, text, data, exc.value)
        raise ScenarioFileError(path, exc.field, exc.value, exc.allowed, line=line,
                                detail=_describe(exc)) from None


def _read_limited(path: Path, limit: int) -> bytes:
    """The file's bytes, at most limit + 1 of them; a pipe or a device (which
    could wait for ever or never end) is refused before it is opened."""
    info = path.stat()
    if not (stat.S_ISREG(info.st_mode) or stat.S_ISDIR(info.st_mode)):  # a folder fails with its own reason
        raise OSError(f"{path} is not a regular file (a pipe or a device)")
    with path.open("rb") as fh:
        return fh.read(limit + 1)


def _describe(exc: ScenarioError) -> str:
    if exc.value is None and exc.allowed.startswith("present"):
        rest = exc.allowed[len("present"):].strip()
        return f"{exc.field} is missing{' ' + rest if rest else ''}"
    return str(exc)


_DECODE_AT = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")
_DECODE_END = re.compile(r"\s*\(at end of document\)\s*$")


def _decode_error_line(exc: tomllib.TOMLDecodeError) -> tuple[int | None, str]:
    """(line, message without the position) of a TOML decoding error."""
    message = str(exc)
    match = _DECODE_AT.search(message)
    if match:
        return int(match.group(1)), f"{message[: match.start()]} at column {match.group(2)}"
    if _DECODE_END.search(message):
        return None, _DECODE_END.sub("", message) + " at the end of the file"
    return getattr(exc, "lineno", None), message


def _line_text(text: str, line: int | None, width: int = 60) -> str:
    if not line:
        return ""
    lines = text.splitlines()
    if not 1 <= line <= len(lines):
        return ""
    shown = lines[line - 1].strip()
    return shown if len(shown) <= width else shown[: width - 3] + "..."


# --- where a field is written -------------------------------------------------

_ITEM = re.compile(r"^(?P<table>[A-Za-z_]+)\[(?P<key>[^\]]*)\](?:\.(?P<rest>.+))?$")
_ITEM_TABLES = {"probe": "probes", "probes": "probes", "block": "blocks", "blocks": "blocks"}


def field_line(field: str, text: str, data: dict | None = None, value=None) -> int | None:
    """Line (1-based) of `text` where the scenario field `field` is written,
    else the header of the table it belongs in, else None.

    data: the parsed file, to find a probe or block by its name; value: the
    rejected value, to tell unnamed blocks or repeated probe names apart."""
    if data is None:
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError:
            return None
    lines = key_lines(text)
    paths = _candidate_paths(field, data, value)
    for path in paths:
        if path in lines:
            return lines[path]
    # an error named without its table prefix (e.g. 'profile.depth'): the first
    # place in the file whose path ends that way
    for path in paths:
        ends = [line for p, line in lines.items() if len(p) > len(path) and p[-len(path):] == path]
        if ends:
            return min(ends)
    for path in paths:
        for cut in range(len(path) - 1, 0, -1):
            if path[:cut] in lines:
                return lines[path[:cut]]
    return None


def _candidate_paths(field: str, data: dict, value) -> list[tuple]:
    """Key paths in the file that may hold `field`, most specific first."""
    base = _field_path(field, data, value)
    if base is None:
        return []
    paths = [base]
    if "profile" in base:  # a profile may come from a file named in the scenario
        cut = base.index("profile")
        paths.append(base[:cut] + ("profile_file",))
    if len(base) >= 3 and base[0] == "layer" and base[1] in SIDES:  # shared by every side in [layer]
        shared = ("layer",) + base[2:]
        paths.append(shared)
        if "profile" in shared:
            paths.append(shared[: shared.index("profile")] + ("profile_file",))
    return paths


def _field_path(field: str, data: dict, value) -> tuple | None:
    match = _ITEM.match(field)
    if match:
        table = _ITEM_TABLES.get(match.group("table"), match.group("table"))
        key = match.group("key")
        rest = tuple(match.group("rest").split(".")) if match.group("rest") else ()
        if key.isdigit() and match.group("table") in ("probes", "blocks"):  # by index; 'probe[3]' is by name
            return (table, int(key)) + rest
        index = _index_by(data, table, "name", key)
        return (table, index) + rest if index is not None else (table,)
    parts = tuple(field.split("."))
    if len(parts) == 2 and parts[0] in ("probe", "block"):
        # named without an index: 'probe.name' (empty or repeated), 'block.x1' (unnamed)
        table = _ITEM_TABLES[parts[0]]
        index = _index_by(data, table, parts[1], value, last=parts == ("probe", "name"))
        return (table, index, parts[1]) if index is not None else (table,)
    return parts


def _index_by(data: dict, table: str, key: str, value, last: bool = False) -> int | None:
    items = data.get(table)
    if not isinstance(items, list):
        return None
    hits = [i for i, item in enumerate(items) if isinstance(item, dict) and _same(item.get(key), value)]
    if not hits:
        return 0 if len(items) == 1 else None
    return hits[-1] if last else hits[0]


def _same(a, b) -> bool:
    if isinstance(a, bool) or isinstance(b, bool):
        return a is b
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return float(a) == float(b)
    return a == b


def key_lines(text: str) -> dict[tuple, int]:
    """{key path: line} for every table, key and array element of a TOML text.

    Paths mirror the parsed data: ('layer', 'right', 'cells'), ('probes', 2, 'x').
    The text should be valid TOML; on anything unexpected the scan stops and
    returns what it found."""
    scanner = _Scanner(text)
    try:
        scanner.scan()
    except (IndexError, ValueError):
        pass
    return scanner.lines


_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_ESCAPES = {"b": "\b", "t": "\t", "n": "\n", "f": "\f", "r": "\r", '"': '"', "\\": "\\"}


class _Scanner:
    """A small reader of TOML structure (not values) that notes line numbers."""

    def __init__(self, text: str):
        self.text = text
        self.pos = 0
        self.line = 1
        self.lines: dict[tuple, int] = {}
        self.array_tables: dict[tuple, int] = {}  # path of a [[table]] -> index of its last entry

    # low level
    def peek(self, n: int = 1) -> str:
        return self.text[self.pos: self.pos + n]

    def advance(self, n: int = 1) -> None:
        self.line += self.text.count("\n", self.pos, self.pos + n)
        self.pos += n

    def at_end(self) -> bool:
        return self.pos >= len(self.text)

    def skip_space(self, newlines: bool) -> None:
        while not self.at_end():
            c = self.peek()
            if c in " \t\r" or (c == "\n" and newlines):
                self.advance()
            elif c == "#":
                end = self.text.find("\n", self.pos)
                self.advance((len(self.text) if end < 0 else end) - self.pos)
            else:
                return

    def expect(self, token: str) -> None:
        if self.peek(len(token)) != token:
            raise ValueError(f"expected {token!r} on line {self.line}")
        self.advance(len(token))

    def note(self, path: tuple, line: int) -> None:
        for cut in range(1, len(path) + 1):
            self.lines.setdefault(path[:cut], line)

    # structure
    def scan(self) -> None:
        table: tuple = ()
        while True:
            self.skip_space(newlines=True)
            if self.at_end():
                return
            line = self.line
            if self.peek(2) == "[[":
                self.advance(2)
                keys = self.key()
                self.skip_space(newlines=False)
                self.expect("]]")
                parent = self.resolve(keys[:-1]) + (keys[-1],)
                index = self.array_tables.get(parent, -1) + 1
                self.array_tables[parent] = index
                table = parent + (index,)
                self.note(table, line)
            elif self.peek() == "[":
                self.advance()
                keys = self.key()
                self.skip_space(newlines=False)
                self.expect("]")
                table = self.resolve(keys)
                self.note(table, line)
            else:
                self.pair(table)

    def resolve(self, keys: list) -> tuple:
        """A header's path, with the current index of every array of tables on it."""
        path: tuple = ()
        for key in keys:
            path += (key,)
            if path in self.array_tables:
                path += (self.array_tables[path],)
        return path

    def pair(self, table: tuple) -> None:
        line = self.line
        keys = self.key()
        self.skip_space(newlines=False)
        self.expect("=")
        path = table + tuple(keys)
        self.note(path, line)
        self.value(path)

    def key(self) -> list:
        parts = []
        while True:
            self.skip_space(newlines=False)
            c = self.peek()
            if c == '"':
                parts.append(self.basic_string())
            elif c == "'":
                parts.append(self.literal_string())
            else:
                match = _BARE_KEY.match(self.text, self.pos)
                if not match:
                    raise ValueError(f"expected a key on line {self.line}")
                parts.append(match.group())
                self.advance(match.end() - self.pos)
            self.skip_space(newlines=False)
            if self.peek() != ".":
                return parts
            self.advance()

    def value(self, path: tuple) -> None:
        self.skip_space(newlines=False)
        c = self.peek()
        if c == '"':
            self.basic_string()
        elif c == "'":
            self.literal_string()
        elif c == "[":
            self.advance()
            index = 0
            while True:
                self.skip_space(newlines=True)
                if self.peek() == "]":
                    self.advance()
                    return
                self.note(path + (index,), self.line)
                self.value(path + (index,))
                index += 1
                self.skip_space(newlines=True)
                if self.peek() == ",":
                    self.advance()
                elif self.peek() != "]":
                    raise ValueError(f"expected ',' or ']' on line {self.line}")
        elif c == "{":
            self.advance()
            while True:
                self.skip_space(newlines=True)
                if self.peek() == "}":
                    self.advance()
                    return
                self.pair(path)
                self.skip_space(newlines=True)
                if self.peek() == ",":
                    self.advance()
                elif self.peek() != "}":
                    raise ValueError(f"expected ',' or '}}' on line {self.line}")
        else:  # number, boolean, date: runs to a separator
            start = self.pos
            while not self.at_end() and self.peek() not in ",]}#\n":
                self.advance()
            if self.pos == start:
                raise ValueError(f"expected a value on line {self.line}")

    def basic_string(self) -> str:
        multi = self.peek(3) == '"""'
        self.advance(3 if multi else 1)
        out = []
        while True:
            if self.at_end():
                raise ValueError("unterminated string")
            c = self.peek()
            if c == "\\":
                code = self.peek(2)[1:]
                size = {"u": 4, "U": 8}.get(code, 0)
                if size:
                    out.append(chr(int(self.text[self.pos + 2: self.pos + 2 + size], 16)))
                else:
                    out.append(_ESCAPES.get(code, ""))
                self.advance(2 + size)
            elif multi and self.peek(3) == '"""':
                self.advance(3)
                while self.peek() == '"':  # up to two quotes may end the content
                    self.advance()
                return "".join(out)
            elif not multi and c == '"':
                self.advance()
                return "".join(out)
            else:
                out.append(c)
                self.advance()

    def literal_string(self) -> str:
        multi = self.peek(3) == "'''"
        self.advance(3 if multi else 1)
        end = self.text.find("'''" if multi else "'", self.pos)
        if end < 0:
            raise ValueError("unterminated string")
        content = self.text[self.pos: end]
        self.advance(end - self.pos + (3 if multi else 1))
        while multi and self.peek() == "'":
            self.advance()
        return content
