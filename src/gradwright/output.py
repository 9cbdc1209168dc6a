"""Writing generated modules safely: a temporary file renamed into place.

A failed generation never reaches this point, so the old output stays untouched;
a failed write leaves no partial file behind.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_generated(path: Path, text: str) -> None:
    directory = path.parent if str(path.parent) else Path(".")
    fd, temporary = tempfile.mkstemp(
        prefix=f".{path.name}.", suffix=".tmp", dir=directory
    )
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as handle:
            handle.write(text)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
