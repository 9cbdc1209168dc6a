"""What the pieces of the lowering share: its constants and marker types."""

from __future__ import annotations

from dataclasses import dataclass

from gradwright.ir import Const, Stmt

#: env key under which the function's result values are kept (not an identifier)
_RESULT = "\0result"

#: env key of the flag "a return inside the loops ran" (carried through them)
_RETURNED = "\0returned"
#: env key of the flag "this iteration leaves its loop" (a break, a return)
_STOP = "\0stop"

#: primitives whose result may share memory with an operand (NumPy views)
_VIEWS = frozenset({"copy", "npindex", "T", "reshape", "np.transpose"})

#: where the open blocks ended (each with its length), how many statements had
#: been put in the middle of one and which dicts had a table of positions: what a
#: rejected statement's lowering rewinds to
BlockMark = tuple[list[tuple[list[Stmt], int]], int, frozenset]

#: primitives whose value is True or False
_TRUTH_OPS = frozenset({"lt", "le", "gt", "ge", "eq", "ne", "and", "or", "not"})

#: primitives that take or make lists; every other primitive takes numbers
LIST_OPS = frozenset(
    {"getitem", "setitem", "append", "newlist", "listlit", "len", "sum"}
)
#: primitives that change a list in place: their result is a new version of it
IN_PLACE = frozenset({"setitem", "append"})


#: the loop flags' constants: one object each, so that an unchanged flag is
#: recognised by identity (``a is b``) where paths merge
#: the base name of what a tuple unpacking computes (``x, y = ...`` has no one
#: name to go by)
UNPACKED = "values"
#: the base name of what a return gives (the generated function's ``value``)
RESULT = "value"
TRUE = Const("True", True)
FALSE = Const("False", False)


@dataclass(frozen=True)
class _Unbound:
    """A name bound on some paths only: reading it is an error."""

    message: str
    hint: str
    #: bound by a statement already reported as an error: reading it adds no error
    silent: bool = False


@dataclass(frozen=True)
class _Tuple:
    """A name bound to a tuple of numbers: its elements are bound under
    ``element_key(name, k)``, so branches and loops treat each as a name."""

    size: int


def element_key(name: str, k: int) -> str:
    return f"{name}\0{k}"


def display(key: str) -> str:
    """A printable base name for an env key (``state\01`` -> ``state_1``)."""
    return key.replace("\0", "_")


def flow_base(key: str) -> str:
    """The base name of a value merged for an env key: the result slots are
    ``value``, the loop flags ``returned`` and ``stop``."""
    if key.startswith(_RESULT):
        return RESULT
    if key in (_RETURNED, _STOP):
        return key[1:]
    return display(key)


class _Reported(Exception):
    """Unwinds a statement that reads a name of a statement already reported."""


class _ListParameter(Exception):
    def __init__(self, name: str) -> None:
        super().__init__(name)
        self.name = name
