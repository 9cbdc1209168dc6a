"""Located, compiler-style error messages for bad input.

Every rejection the generator makes is a :class:`GradwrightError` carrying one
:class:`Diagnostic`. The CLI prints it and exits with status 2; nothing reaches the
user as a traceback.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Location:
    """A span on one line of a source file; ``line`` is 1-based, columns 0-based.

    ``line == 0`` locates the file as a whole (an unknown function name, say).
    """

    path: str
    line: int
    column: int
    end_column: int
    source_line: str


@dataclass(frozen=True)
class Diagnostic:
    message: str
    location: Location | None = None
    hint: str | None = None

    def render(self) -> str:
        """``file:line:col: error: ...``, the source line, a caret and a hint."""
        lines: list[str] = []
        loc = self.location
        if loc is None:
            lines.append(f"error: {self.message}")
        elif loc.line == 0:
            lines.append(f"{loc.path}: error: {self.message}")
        else:
            lines.append(
                f"{loc.path}:{loc.line}:{loc.column + 1}: error: {self.message}"
            )
            text = loc.source_line.rstrip("\n").expandtabs(1)
            stripped = text.lstrip()
            indent = len(text) - len(stripped)
            lines.append("    " + stripped)
            width = max(1, min(loc.end_column, len(text)) - loc.column)
            lines.append("    " + " " * (loc.column - indent) + "^" * width)
        if self.hint:
            lines.append(f"hint: {self.hint}")
        return "\n".join(lines)


#: errors reported at most in one run
MAX_REPORTED = 20


class GradwrightError(Exception):
    """Bad input: the function cannot be differentiated as written."""

    def __init__(self, diagnostic: Diagnostic) -> None:
        super().__init__(diagnostic.render())
        self.diagnostic = diagnostic
        self.diagnostics = [diagnostic]

    @classmethod
    def several(cls, errors: list[GradwrightError]) -> GradwrightError:
        """Every error of one run, in source order (a compiler's report): the first
        is the error's ``diagnostic``, all are in ``diagnostics``."""
        unique: list[Diagnostic] = []
        for error in errors:
            for diagnostic in error.diagnostics:
                if diagnostic not in unique:
                    unique.append(diagnostic)
        if len(unique) == 1:
            return cls(unique[0])
        combined = cls(unique[0])
        combined.diagnostics = unique
        shown = unique[:MAX_REPORTED]
        text = "\n".join(d.render() for d in shown)
        more = len(unique) - len(shown)
        text += f"\n{len(unique)} errors" + (f" ({more} not shown)" if more else "")
        combined.args = (text,)
        return combined

    @classmethod
    def usage(cls, message: str, hint: str | None = None) -> GradwrightError:
        """An error about the command line or a file as a whole, not a source line."""
        return cls(Diagnostic(message, None, hint))


def file_location(path: str) -> Location:
    return Location(path, 0, 0, 0, "")


def fail(message: str, location: Location | None = None, hint: str | None = None):
    """Raise a located error; typed as returning so call sites read as expressions."""
    raise GradwrightError(Diagnostic(message, location, hint))
