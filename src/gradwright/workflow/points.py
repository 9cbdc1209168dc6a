"""Where gradients are checked: parameter lists, ranges and evaluation points.

Shared by ``verify`` (which runs the points) and ``--emit-test`` (which writes them
into a test file). Signatures are read from the generated module's text with ``ast``,
so choosing points never runs any code.

Rules, in order, for each parameter of the function:
- a value given with ``--at`` is used as is;
- a ``--wrt`` parameter, or one without a default, is drawn uniformly from its
  ``--range`` (default :data:`DEFAULT_RANGE`) with a seeded generator;
- any other parameter keeps its default (it is a model constant).
Drawn values are rounded to 6 significant digits, so a printed point can be pasted
back into ``--at`` and reproduces the same numbers. What is drawn follows each
parameter's kind as the model's code uses it (``kinds.py``): a number, a list of
numbers, an integer trip count or index, or a NumPy array.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from gradwright.diagnostics import GradwrightError, Location, fail
from gradwright.workflow.kinds import COUNT, INDEX, LIST, NUMBER

TYPE_CHECKING = False  # random and typing load only where used: start-up cost
if TYPE_CHECKING:
    import random

#: a parameter's value at a point: a number, or a list of numbers
Value = float | list[float]


@dataclass(frozen=True)
class Range:
    low: float
    high: float

    def __str__(self) -> str:
        return f"{self.low!r}:{self.high!r}"

    @property
    def scale(self) -> float:
        """The parameter's typical size, for the finite-difference step."""
        return max(abs(self.low), abs(self.high))


#: positive and away from zero, so that log, sqrt and division are defined there
DEFAULT_RANGE = Range(0.5, 1.5)
DEFAULT_SAMPLES = 3
DEFAULT_SEED = 0
#: list parameters' length, and where trip counts are drawn
DEFAULT_LENGTH = 3
DEFAULT_COUNT = Range(1, 4)
#: verify's tolerance, and the rounding noise of a central difference in ulps
DEFAULT_RTOL = 1e-5
NOISE_ULPS = 64


@dataclass(frozen=True)
class Param:
    name: str
    positional_only: bool
    has_default: bool


def signature_of(module_text: str, function: str) -> tuple[Param, ...]:
    """The parameters of top-level ``function`` in ``module_text`` (not executed)."""
    import ast

    for node in ast.parse(module_text).body:
        if isinstance(node, ast.FunctionDef) and node.name == function:
            args = node.args
            positional = [*args.posonlyargs, *args.args]
            first_default = len(positional) - len(args.defaults)
            params = [
                Param(a.arg, i < len(args.posonlyargs), i >= first_default)
                for i, a in enumerate(positional)
            ]
            params += [
                Param(a.arg, False, default is not None)
                for a, default in zip(args.kwonlyargs, args.kw_defaults, strict=True)
            ]
            return tuple(params)
    raise GradwrightError.usage(f"the generated module has no function '{function}'")


def split_assignments(texts: Sequence[str], option: str) -> dict[str, str]:
    """``["a=1,b=2", "c=3"]`` -> ``{"a": "1", "b": "2", "c": "3"}``."""
    values: dict[str, str] = {}
    for text in texts:
        for item in _top_level_items(text):
            if not item.strip():
                continue
            name, sep, value = item.partition("=")
            name = name.strip()
            if not sep or not name.isidentifier() or not value.strip():
                raise GradwrightError.usage(
                    f"{option}: expected NAME=VALUE, got {item.strip()!r}"
                )
            if name in values:
                raise GradwrightError.usage(f"{option}: '{name}' is given twice")
            values[name] = value.strip()
    return values


def _top_level_items(text: str) -> list[str]:
    """Split at commas outside brackets: ``a=1,xs=[1,2]`` -> ``a=1``, ``xs=[1,2]``."""
    items, depth, start = [], 0, 0
    for i, char in enumerate(text):
        depth += {"[": 1, "]": -1}.get(char, 0)
        if char == "," and depth == 0:
            items.append(text[start:i])
            start = i + 1
    items.append(text[start:])
    return items


def parse_at(texts: Sequence[str]) -> dict[str, Value]:
    """Numbers, or flat lists of numbers (``xs=[0.5,1.5]``) for list parameters."""
    values: dict[str, Value] = {}
    for name, text in split_assignments(texts, "--at").items():
        if text.startswith("["):
            if not text.endswith("]") or not text[1:-1].strip():
                raise GradwrightError.usage(
                    f"--at {name}: expected a list of numbers like [1.0,2.0]"
                )
            values[name] = [
                _number(item, f"--at {name}") for item in text[1:-1].split(",")
            ]
        else:
            values[name] = _number(text, f"--at {name}")
    return values


def parse_shapes(texts: Sequence[str]) -> dict[str, tuple[int, ...]]:
    """``W=4x6`` or ``W=4,6`` (as gen's --shape writes it) -> (4, 6): array
    parameters are drawn with these shapes. Several may share one option:
    ``W=4x6,b=6``; a comma followed by ``NAME=`` starts the next."""
    shapes: dict[str, tuple[int, ...]] = {}
    for text in texts:
        for item in re.split(r",(?=\s*[A-Za-z_]\w*\s*=)", text):
            name, sep, value = item.partition("=")
            name = name.strip()
            if not sep or not name.isidentifier():
                raise GradwrightError.usage(
                    f"--shape: expected NAME=SIZES like W=4x6, got {item.strip()!r}"
                )
            if name in shapes:
                raise GradwrightError.usage(f"--shape: '{name}' is given twice")
            dims = parse_dims(value.strip().replace(" ", ""), f"--shape {name}")
            if not all(isinstance(d, int) and d >= 1 for d in dims) or not dims:
                raise GradwrightError.usage(
                    f"--shape {name}: verify draws the array, so it needs positive"
                    f" sizes as numbers like 4x6 or 4,6, got {value.strip()!r}"
                )
            shapes[name] = dims  # type: ignore[assignment]
    return shapes


#: a declared shape's sizes: numbers, or names standing for one size wherever used
Declared = dict[str, tuple[int | str, ...]]


def parse_declared_shapes(texts: Sequence[str], option: str = "--shape") -> Declared:
    """``X=n,5`` (or ``X=4x6``, as verify writes it; ``b=()`` for a number) ->
    ``{"X": ("n", 5)}``. One NAME=DIMS per option; a comma continues the sizes."""
    shapes: Declared = {}
    for text in texts:
        name, sep, value = text.partition("=")
        name, value = name.strip(), value.strip().replace(" ", "")
        if not sep or not name.isidentifier():
            raise GradwrightError.usage(
                f"{option}: expected NAME=DIMS like X=n,5, got {text!r}"
            )
        if name in shapes:
            raise GradwrightError.usage(f"{option}: '{name}' is given twice")
        shapes[name] = parse_dims(value, f"{option} {name}")
    return shapes


def declared_sizes(module_text: str, names: set[str]) -> dict[str, tuple[int, ...]]:
    """The shapes a module's header command declares (``--shape X=n,5``), each name
    given a size of its own from 3 up, so no two of them broadcast."""
    import shlex

    from gradwright.header import read_header

    header = read_header(module_text)
    command = header.fields.get("command") if header is not None else None
    if not command:
        return {}
    words = shlex.split(command)
    texts = [words[k + 1] for k, w in enumerate(words[:-1]) if w == "--shape"]
    sizes: dict[str, int] = {}
    concrete: dict[str, tuple[int, ...]] = {}
    for name, dims in parse_declared_shapes(texts).items():
        if name in names:
            concrete[name] = tuple(
                d if isinstance(d, int) else sizes.setdefault(d, 3 + len(sizes))
                for d in dims
            )
    return concrete


def parse_dims(value: str, label: str) -> tuple[int | str, ...]:
    if value == "()":
        return ()
    if re.fullmatch(r"\d+([xX]\d+)+", value):
        parts = re.split("[xX]", value)
    else:
        parts = value.split(",")
    dims: list[int | str] = []
    for part in parts:
        if part.isdigit():
            dims.append(int(part))
        elif part.isidentifier():
            dims.append(part)
        else:
            raise GradwrightError.usage(
                f"{label}: expected sizes and names like n,5 (or () for a number),"
                f" got {value!r}"
            )
    return tuple(dims)


def parse_ranges(texts: Sequence[str]) -> dict[str, Range]:
    ranges: dict[str, Range] = {}
    for name, value in split_assignments(texts, "--range").items():
        low, sep, high = value.partition(":")
        if not sep:
            raise GradwrightError.usage(
                f"--range {name}: expected LOW:HIGH, got {value!r}",
                "for example --range a=0.1:2",
            )
        bounds = Range(
            _number(low, f"--range {name}"), _number(high, f"--range {name}")
        )
        if not bounds.low < bounds.high:
            raise GradwrightError.usage(f"--range {name}: LOW must be below HIGH")
        ranges[name] = bounds
    return ranges


def _number(text: str, what: str) -> float:
    try:
        # an integer stays one: it may be a trip count or an index
        value = int(text) if text.strip().lstrip("+-").isdigit() else float(text)
    except ValueError:
        raise GradwrightError.usage(f"{what}: {text!r} is not a number") from None
    if not math.isfinite(value):
        raise GradwrightError.usage(f"{what}: {text!r} is not a finite number")
    return value


def parse_scales(texts: Sequence[str]) -> dict[str, float]:
    scales = {}
    for name, value in split_assignments(texts, "--scale").items():
        scale = _number(value, f"--scale {name}")
        if not scale > 0:
            raise GradwrightError.usage(f"--scale {name}: must be positive")
        scales[name] = scale
    return scales


def typical_sizes(
    ranges: Mapping[str, Range], scales: Mapping[str, float]
) -> dict[str, float]:
    """Each parameter's typical size: its --scale, else its range's, else 1."""
    sizes = {name: bounds.scale for name, bounds in ranges.items()}
    sizes.update(scales)
    return sizes


def check_names(
    params: Sequence[Param],
    names: Sequence[str],
    what: str,
    function: str,
    location: Location | None = None,
) -> None:
    known = [p.name for p in params]
    for name in names:
        if name not in known:
            fail(
                f"{what} names '{name}', which is not a parameter of '{function}'",
                location,
                "parameters: " + ", ".join(known),
            )


def choose_points(
    params: Sequence[Param],
    wrt: Sequence[str],
    fixed: Mapping[str, Value],
    ranges: Mapping[str, Range],
    samples: int | None,
    seed: int,
    shapes: Mapping[str, tuple[int, ...]] | None = None,
    kinds: Mapping[str, str] | None = None,
    lengths: Mapping[str, int] | None = None,
) -> list[dict[str, Value]]:
    """Points (name -> value, in signature order), by the rules in the docstring.

    ``kinds`` (from ``kinds.py``) draws lists (``lengths``, default
    :data:`DEFAULT_LENGTH`) and integers (trip counts in :data:`DEFAULT_COUNT`,
    indices within the lists) instead of numbers; a shape of ``()`` is a number.
    """
    drawn = [
        p.name
        for p in params
        if p.name not in fixed
        and (p.name in wrt or not p.has_default or p.positional_only)
    ]
    if not drawn:
        return [{p.name: fixed[p.name] for p in params if p.name in fixed}]
    count = DEFAULT_SAMPLES if samples is None else samples
    import random

    lengths = lengths or {}
    # a parameter given a --length is a list, whatever its code suggested
    kinds = {**(kinds or {}), **{name: LIST for name in lengths}}
    list_lengths = [
        lengths.get(n, DEFAULT_LENGTH) for n, k in kinds.items() if k == LIST
    ]
    # an index must be valid in every list
    index_range = Range(0, min(list_lengths, default=DEFAULT_LENGTH) - 1)
    generator = random.Random(seed)
    points = []
    for _ in range(count):
        point: dict[str, Value] = {}
        for p in params:
            if p.name in fixed:
                point[p.name] = fixed[p.name]
                continue
            if p.name not in drawn:
                continue
            kind = kinds.get(p.name, NUMBER)
            shape = (shapes or {}).get(p.name)
            if kind in (COUNT, INDEX):
                default = DEFAULT_COUNT if kind == COUNT else index_range
                point[p.name] = _integer(generator, p.name, kind, ranges, default)
                continue
            bounds = ranges.get(p.name, DEFAULT_RANGE)
            if shape:
                point[p.name] = _array(generator, bounds, shape)
            elif kind == LIST:
                size = lengths.get(p.name, DEFAULT_LENGTH)
                point[p.name] = [_uniform(generator, bounds) for _ in range(size)]
            else:
                point[p.name] = _uniform(generator, bounds)
        points.append(point)
    return points


def _uniform(generator: random.Random, bounds: Range) -> float:
    return float(f"{generator.uniform(bounds.low, bounds.high):.6g}")


def _integer(
    generator: random.Random,
    name: str,
    kind: str,
    ranges: Mapping[str, Range],
    default: Range,
) -> int:
    bounds = ranges.get(name, default)
    low, high = math.ceil(bounds.low), math.floor(bounds.high)
    if low > high:
        raise GradwrightError.usage(
            f"--range {name}: '{name}' is used as {'an' if kind == INDEX else 'a'}"
            f" {kind}, and no integer lies in {bounds}"
        )
    return generator.randint(low, high)


def parse_lengths(texts: Sequence[str]) -> dict[str, int]:
    """``xs=5``: list parameters are drawn with this many elements."""
    lengths: dict[str, int] = {}
    for name, value in split_assignments(texts, "--length").items():
        if not value.isdigit() or int(value) < 1:
            raise GradwrightError.usage(
                f"--length {name}: expected a positive whole number, got {value!r}"
            )
        lengths[name] = int(value)
    return lengths


def describe_kinds(
    kinds: Mapping[str, str],
    drawn: Mapping[str, Value],
    given: set[str],
) -> str | None:
    """Which parameters' kinds were guessed from the code, and how to set them
    (for a point that failed), or None when every drawn parameter is a number."""
    parts = []
    for name, value in drawn.items():
        kind = kinds.get(name, NUMBER)
        if name in given or kind == NUMBER:
            continue
        if isinstance(value, list):
            parts.append(f"{name} a list of {len(value)} (--length {name}=K)")
        elif isinstance(value, int):
            parts.append(f"{name} {'an' if kind == INDEX else 'a'} {kind} (--range)")
        elif hasattr(value, "shape"):
            dims = "x".join(map(str, value.shape))  # type: ignore[union-attr]
            parts.append(f"{name} an array of shape {dims} (--shape {name}=DIMS)")
        else:
            parts.append(f"{name} a number (--shape {name}=DIMS for an array)")
    if not parts:
        return None
    return (
        "parameter kinds guessed from the model's code: "
        + "; ".join(parts)
        + "; or give values with --at"
    )


def _array(generator: random.Random, bounds: Range, shape: tuple[int, ...]) -> Value:
    import numpy as np  # only models with array parameters need it

    values = [_uniform(generator, bounds) for _ in range(math.prod(shape))]
    return np.array(values).reshape(shape)  # type: ignore[return-value]


def describe(point: Mapping[str, Value]) -> str:
    def show(value: Value) -> str:
        shape = getattr(value, "shape", None)
        if shape is not None and not isinstance(value, (int, float)):
            return f"<{'x'.join(map(str, shape))} array>"
        return repr(value)

    return ", ".join(f"{name}={show(value)}" for name, value in point.items())
