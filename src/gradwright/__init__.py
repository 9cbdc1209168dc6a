"""gradwright: reverse-mode gradient modules generated from Python model source."""

__version__ = "0.1.0"

from gradwright.api import generate  # noqa: E402
from gradwright.diagnostics import Diagnostic, GradwrightError  # noqa: E402

__all__ = ["Diagnostic", "GradwrightError", "__version__", "generate"]
