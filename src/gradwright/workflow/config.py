"""The project's targets, read from ``[tool.gradwright]`` in ``pyproject.toml``.

```toml
[[tool.gradwright.targets]]
source = "models/thermistor.py"        # required
functions = ["fit_loss"]               # required, one or more
output = "models/thermistor_grad.py"   # required
wrt = ["a", "b", "c"]                  # optional (default: every parameter)
target = "cpython"                     # optional: "cpython" or "micropython"
emit-test = "tests/test_thermistor_grad.py"   # optional
ranges = { a = [0.5, 2.0] }            # optional: where emitted tests sample
shapes = { X = "n,5", y = "n" }        # optional: declared array shapes (gen --shape)
```

The keys are the ``gen`` options by their long names. Paths are relative to the
folder holding ``pyproject.toml`` and must stay inside it. Every error names the file
and the key (and the line, when the key is written as ``key = ...`` in a table).

TOML is read with the standard library's ``tomllib`` (Python 3.11+). On Python 3.10
the ``tomli`` package (the same reader, published separately) is used when installed;
otherwise ``build`` says it needs Python 3.11 or tomli, and ``gen`` still works.
"""

from __future__ import annotations

import math
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

from gradwright.diagnostics import GradwrightError, Location, fail, file_location
from gradwright.workflow.points import Range, parse_dims

TYPE_CHECKING = False  # typing is not imported at run time: start-up cost
if TYPE_CHECKING:
    from typing import Any

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    try:
        import tomli as tomllib  # type: ignore[no-redef]
    except ModuleNotFoundError:
        tomllib = None  # type: ignore[assignment]

PLATFORMS = ("cpython", "micropython")
TARGET_KEYS = (
    "source",
    "functions",
    "output",
    "wrt",
    "target",
    "emit-test",
    "ranges",
    "shapes",
)
TABLE_KEYS = ("targets",)
_EXAMPLE = (
    '[[tool.gradwright.targets]] with source = "model.py", functions = ["loss"],'
    ' output = "model_grad.py"'
)


@dataclass(frozen=True)
class Target:
    """One generated module. Paths are project-relative POSIX strings."""

    key: str  # "tool.gradwright.targets[0]", for messages
    source: str
    functions: tuple[str, ...]
    output: str
    wrt: tuple[str, ...] | None
    target: str
    emit_test: str | None
    ranges: Mapping[str, Range]
    ranges_location: Location
    #: declared array shapes: name -> sizes (numbers, or names for one size)
    shapes: Mapping[str, tuple[int | str, ...]] = field(default_factory=dict)


@dataclass(frozen=True)
class Project:
    pyproject: Path  # as found or given (for messages)
    root: Path  # the folder holding it, resolved
    targets: tuple[Target, ...]


def find_pyproject(start: Path) -> Path:
    """The nearest ``pyproject.toml`` in ``start`` or a folder above it, as a path
    relative to ``start`` (messages then read ``pyproject.toml:3:1: error: ...``)."""
    here = start.resolve()
    for folder in (here, *here.parents):
        candidate = folder / "pyproject.toml"
        if candidate.is_file():
            return Path(os.path.relpath(candidate, here))
    raise GradwrightError.usage(
        f"no pyproject.toml in {start} or any folder above it",
        f"create one with {_EXAMPLE}, or name it with --config",
    )


def load_project(pyproject: Path) -> Project:
    label = str(pyproject)
    if tomllib is None:
        raise GradwrightError.usage(
            "gradwright build reads pyproject.toml with the standard library's tomllib,"
            " which needs Python 3.11 or newer",
            "use Python 3.11+, install tomli, or run `gradwright gen` for each target",
        )
    try:
        text = pyproject.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise GradwrightError.usage(f"{label}: no such file") from None
    except (OSError, UnicodeDecodeError) as error:
        raise GradwrightError.usage(f"{label}: cannot read: {error}") from None
    finder = _KeyFinder(label, text)
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        fail(
            f"invalid TOML: {error}",
            finder.syntax_error(str(error)),
            "fix the line shown; strings need quotes, lists brackets",
        )
    table = document.get("tool", {}).get("gradwright")
    if not isinstance(table, dict):
        fail(
            "no [tool.gradwright] table: nothing to build",
            file_location(label),
            f"add {_EXAMPLE}",
        )
    root = pyproject.resolve().parent
    reader = _Reader(finder, root)
    for key in table:
        if key not in TABLE_KEYS:
            reader.unknown(key, "tool.gradwright", None, TABLE_KEYS)
    targets = table.get("targets")
    if not isinstance(targets, list) or not targets:
        fail(
            "tool.gradwright.targets must be a non-empty array of tables",
            finder.locate(None, "targets"),
            f"add {_EXAMPLE}",
        )
    parsed = tuple(reader.target(i, entry) for i, entry in enumerate(targets))
    _check_distinct(finder, parsed)
    return Project(pyproject, root, parsed)


class _KeyFinder:
    """Best-effort line numbers for keys (tomllib keeps none)."""

    _HEADER = re.compile(r"^\s*\[\[\s*tool\s*\.\s*gradwright\s*\.\s*targets\s*\]\]")
    _TABLE = re.compile(r"^\s*\[\s*tool\s*\.\s*gradwright\s*\]")
    _ANY_HEADER = re.compile(r"^\s*\[")

    def __init__(self, label: str, text: str) -> None:
        self.label = label
        self.lines = text.splitlines()

    def _section(self, index: int | None) -> range | None:
        """Line indexes of the [tool.gradwright] table or the index-th target table."""
        pattern = self._TABLE if index is None else self._HEADER
        seen = -1
        for number, line in enumerate(self.lines):
            if pattern.match(line):
                seen += 1
                if index is None or seen == index:
                    end = number + 1
                    while end < len(self.lines) and not self._ANY_HEADER.match(
                        self.lines[end]
                    ):
                        end += 1
                    return range(number, end)
        return None

    def locate(self, index: int | None, key: str | None) -> Location:
        section = self._section(index)
        if section is None:
            return file_location(self.label)
        if key is None:
            return self._at(section.start, 0, len(self.lines[section.start]))
        pattern = re.compile(rf'^\s*(["\']?{re.escape(key)}["\']?)\s*=')
        for number in section:
            match = pattern.match(self.lines[number])
            if match:
                return self._at(number, match.start(1), match.end(1))
        return self._at(section.start, 0, len(self.lines[section.start]))

    def syntax_error(self, message: str) -> Location:
        match = re.search(r"at line (\d+), column (\d+)", message)
        if match:
            number, column = int(match.group(1)) - 1, int(match.group(2)) - 1
        else:  # "at end of document"
            number = max(0, len(self.lines) - 1)
            column = len(self.lines[number]) if self.lines else 0
        if number >= len(self.lines):
            return file_location(self.label)
        return self._at(number, column, column + 1)

    def _at(self, number: int, column: int, end: int) -> Location:
        return Location(self.label, number + 1, column, end, self.lines[number])


class _Reader:
    def __init__(self, finder: _KeyFinder, root: Path) -> None:
        self.finder = finder
        self.root = root

    def error(self, index: int, key: str | None, message: str, hint: str | None = None):
        where = f"tool.gradwright.targets[{index}]" + (f".{key}" if key else "")
        fail(f"{where}: {message}", self.finder.locate(index, key), hint)

    def unknown(
        self, key: str, where: str, index: int | None, known: tuple[str, ...]
    ) -> None:
        fail(
            f"{where}: unknown key '{key}'",
            self.finder.locate(index, key),
            "known keys: " + ", ".join(known),
        )

    def target(self, index: int, entry: Any) -> Target:
        where = f"tool.gradwright.targets[{index}]"
        if not isinstance(entry, dict):
            self.error(index, None, "must be a table", f"write it as {_EXAMPLE}")
        for key in entry:
            if key not in TARGET_KEYS:
                self.unknown(key, where, index, TARGET_KEYS)
        for key in ("source", "functions", "output"):
            if key not in entry:
                self.error(index, None, f"missing required key '{key}'")
        source = self.path(index, "source", entry["source"])
        output = self.path(index, "output", entry["output"])
        emit_test = entry.get("emit-test")
        if emit_test is not None:
            emit_test = self.path(index, "emit-test", emit_test)
        if source == output:
            self.error(index, "output", "is the source file itself")
        if emit_test is not None and emit_test in (source, output):
            self.error(index, "emit-test", "is the source or the output file")
        functions = self.names(index, "functions", entry["functions"])
        wrt = self.names(index, "wrt", entry["wrt"]) if "wrt" in entry else None
        platform = entry.get("target", "cpython")
        if platform not in PLATFORMS:
            self.error(
                index,
                "target",
                f"must be one of {', '.join(map(repr, PLATFORMS))}, not {platform!r}",
            )
        ranges = self.ranges(index, entry.get("ranges", {}))
        shapes = self.shapes(index, entry.get("shapes", {}))
        return Target(
            key=where,
            source=source,
            functions=functions,
            output=output,
            wrt=wrt,
            target=platform,
            emit_test=emit_test,
            ranges=ranges,
            ranges_location=self.finder.locate(index, "ranges"),
            shapes=shapes,
        )

    def path(self, index: int, key: str, value: Any) -> str:
        if not isinstance(value, str) or not value.strip():
            self.error(index, key, "must be a non-empty string (a path)")
        posix = PurePosixPath(value.replace("\\", "/"))
        if posix.is_absolute() or Path(value).is_absolute():
            self.error(
                index,
                key,
                f"{value!r} is absolute; paths are relative to {self.root}",
            )
        normal = PurePosixPath(os.path.normpath(posix.as_posix())).as_posix()
        resolved = (self.root / normal).resolve()
        if (
            normal.startswith("../")
            or normal == ".."
            or not _inside(resolved, self.root)
        ):
            self.error(
                index,
                key,
                f"{value!r} points outside the project folder {self.root}",
                "targets may only read and write files inside the project",
            )
        return normal

    def names(self, index: int, key: str, value: Any) -> tuple[str, ...]:
        if (
            not isinstance(value, list)
            or not value
            or not all(isinstance(v, str) and v.isidentifier() for v in value)
        ):
            self.error(
                index,
                key,
                "must be a non-empty array of names",
                f'for example {key} = ["{"loss" if key == "functions" else "a"}"]',
            )
        if len(set(value)) != len(value):
            self.error(index, key, "lists a name twice")
        return tuple(value)

    def shapes(self, index: int, value: Any) -> dict[str, tuple[int | str, ...]]:
        """``shapes = { X = "n,5", w = [5], b = [] }``: as ``gen --shape``."""
        if not isinstance(value, dict):
            self.error(index, "shapes", 'must be a table of NAME = "n,5" or [n, 5]')
        shapes: dict[str, tuple[int | str, ...]] = {}
        for name, dims in value.items():
            if not name.isidentifier():
                self.error(index, "shapes", f"{name!r} is not a parameter name")
            if isinstance(dims, list):
                dims = ",".join(str(d) for d in dims) if dims else "()"
            if not isinstance(dims, str):
                self.error(index, "shapes", f'{name}: must be "n,5" or [n, 5]')
            try:
                shapes[name] = parse_dims(dims.replace(" ", ""), f"shapes.{name}")
            except GradwrightError as error:
                self.error(index, "shapes", error.diagnostic.message)
        return shapes

    def ranges(self, index: int, value: Any) -> dict[str, Range]:
        if not isinstance(value, dict):
            self.error(index, "ranges", "must be a table of NAME = [LOW, HIGH]")
        ranges: dict[str, Range] = {}
        for name, bounds in value.items():
            numbers = isinstance(bounds, list) and all(
                isinstance(b, (int, float)) and not isinstance(b, bool) for b in bounds
            )
            if not numbers or len(bounds) != 2:
                self.error(index, "ranges", f"{name}: must be [LOW, HIGH], two numbers")
            low, high = float(bounds[0]), float(bounds[1])
            if not (math.isfinite(low) and math.isfinite(high) and low < high):
                self.error(
                    index, "ranges", f"{name}: needs finite LOW < HIGH, got {bounds}"
                )
            ranges[name] = Range(low, high)
        return ranges


def _inside(path: Path, root: Path) -> bool:
    try:
        path.relative_to(root)
    except ValueError:
        return False
    return True


def _check_distinct(finder: _KeyFinder, targets: tuple[Target, ...]) -> None:
    """Two targets writing one file would overwrite each other on every build."""
    writers: dict[str, str] = {}
    for index, target in enumerate(targets):
        for key, path in (("output", target.output), ("emit-test", target.emit_test)):
            if path is None:
                continue
            if path in writers:
                fail(
                    f"{target.key}.{key}: {path!r} is also written by {writers[path]}",
                    finder.locate(index, key),
                    "give each target an output file of its own",
                )
            writers[path] = f"{target.key}.{key}"
