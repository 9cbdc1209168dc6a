"""gradwright: reverse-mode gradient modules generated from Python model source."""

from __future__ import annotations

__version__ = "0.1.0"

TYPE_CHECKING = False  # typing itself is not imported: it costs a start-up

if TYPE_CHECKING:
    from gradwright.api import generate
    from gradwright.diagnostics import Diagnostic, GradwrightError

__all__ = ["Diagnostic", "GradwrightError", "__version__", "generate"]


def __getattr__(name: str) -> object:
    # lazy, so that `gradwright --version` and a current `--check` never load libcst,
    # jinja2 or black (the generator's imports cost far more than the check itself)
    if name == "generate":
        from gradwright.api import generate

        return generate
    if name in ("Diagnostic", "GradwrightError"):
        from gradwright import diagnostics

        return getattr(diagnostics, name)
    raise AttributeError(f"module 'gradwright' has no attribute {name!r}")
