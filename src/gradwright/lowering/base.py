"""What the pieces of the lowering share: its constants and marker types."""

from __future__ import annotations

from dataclasses import dataclass

#: env key under which the function's result values are kept (not an identifier)
_RESULT = "\0result"

#: primitives whose result may share memory with an operand (NumPy views)
_VIEWS = frozenset({"copy", "npindex", "T", "reshape", "np.transpose"})

#: primitives whose value is True or False
_TRUTH_OPS = frozenset({"lt", "le", "gt", "ge", "eq", "ne", "and", "or", "not"})

#: primitives that take or make lists; every other primitive takes numbers
LIST_OPS = frozenset({"getitem", "setitem", "newlist", "listlit", "len", "sum"})


@dataclass(frozen=True)
class _Unbound:
    """A name bound on some paths only: reading it is an error."""

    message: str
    hint: str
    #: bound by a statement already reported as an error: reading it adds no error
    silent: bool = False


class _Reported(Exception):
    """Unwinds a statement that reads a name of a statement already reported."""


class _ListParameter(Exception):
    def __init__(self, name: str) -> None:
        super().__init__(name)
        self.name = name
