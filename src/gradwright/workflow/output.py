"""Writing generated files safely, and comparing them with what is on disk.

- Writes go to a temporary file in the destination's folder, renamed into place
  (``os.replace`` is atomic on one file system): a reader sees the old file or the new
  one, never half of either, and a failed write leaves no partial file behind.
- A generation that fails never reaches this module, so the old output stays as it was.
- A file that does not start with gradwright's header is somebody's own work: it is
  replaced only when the caller says ``force``.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from gradwright.diagnostics import GradwrightError, fail, file_location
from gradwright.header import HEADER_PREFIX, read_header


@dataclass(frozen=True)
class Artifact:
    """One file a generation produces: where it goes and its complete text."""

    path: Path
    label: str  # the path as the user wrote it, for messages and diff headers
    text: str


def read_existing(path: Path) -> str | None:
    """The file's text, or None when there is no file (or it is a device or a pipe,
    which hold nothing to compare with and may block a reader)."""
    if path.exists() and not path.is_file():
        return None
    try:
        with open(path, encoding="utf-8", newline="") as handle:
            return handle.read()
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError) as error:
        raise GradwrightError.usage(f"{path}: cannot read: {error}") from None


def is_generated(text: str) -> bool:
    return text.startswith(HEADER_PREFIX)


def edited_by_hand(text: str | None) -> bool:
    """A generated file whose recorded digest it no longer matches."""
    header = None if text is None else read_header(text)
    return header is not None and header.untouched is False


def is_current(artifact: Artifact) -> bool:
    return read_existing(artifact.path) == artifact.text


def unified_diff(artifact: Artifact) -> str:
    """What regenerating would change, as a unified diff (empty when current)."""
    import difflib  # imported when used: a current check needs none of these

    old = read_existing(artifact.path)
    old_lines = [] if old is None else old.splitlines(keepends=True)
    new_lines = artifact.text.splitlines(keepends=True)
    before = "/dev/null" if old is None else f"a/{artifact.label}"
    lines = difflib.unified_diff(old_lines, new_lines, before, f"b/{artifact.label}")
    return "".join(line if line.endswith("\n") else line + "\n" for line in lines)


def check_overwrite(artifact: Artifact, force: bool) -> None:
    """Refuse to replace a file gradwright did not write, unless forced.

    An empty file holds nothing to lose, so it counts as replaceable. A generated
    file edited by hand holds somebody's work too.
    """
    old = read_existing(artifact.path)
    if force or old is None or old == "":
        return
    if edited_by_hand(old):
        fail(
            "refusing to overwrite a generated file that was edited by hand (it no"
            " longer matches the output sha256 in its header)",
            file_location(artifact.label),
            "move your changes into the model, or pass --force to regenerate it",
        )
    if is_generated(old):
        return
    fail(
        "refusing to overwrite a file that gradwright did not generate (its first"
        f" line is not '{HEADER_PREFIX} ...')",
        file_location(artifact.label),
        "move the file away, choose another output path, or pass --force to replace it",
    )


def write_generated(path: Path, text: str) -> None:
    """Atomically replace ``path`` with ``text`` (LF line endings, UTF-8)."""
    import tempfile

    if path.is_symlink():  # replace what the link points at, keep the link
        path = path.resolve()
    if path.exists() and not path.is_file():
        # a device or a pipe (`-o /dev/null`): written to, never renamed over
        with open(path, "w", encoding="utf-8", newline="\n") as handle:
            handle.write(text)
        return
    directory = path.parent if str(path.parent) else Path(".")
    fd, temporary = tempfile.mkstemp(
        prefix=f".{path.name}.", suffix=".tmp", dir=directory
    )
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as handle:
            handle.write(text)
        # mkstemp makes the file 0600; give it the old file's mode or the usual one
        os.chmod(temporary, _mode_for(path))
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def _mode_for(path: Path) -> int:
    try:
        return path.stat().st_mode & 0o7777
    except FileNotFoundError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


def write_artifact(artifact: Artifact, force: bool) -> bool:
    """Write unless current; True when the file changed. Write errors are located."""
    if is_current(artifact):
        return False
    check_overwrite(artifact, force)
    try:
        artifact.path.parent.mkdir(parents=True, exist_ok=True)
        write_generated(artifact.path, artifact.text)
    except OSError as error:
        reason = error.strerror or str(error)
        fail(
            f"cannot write: {reason} (the old file, if any, is unchanged)",
            file_location(artifact.label),
            "check that the folder exists and is writable, or choose another -o",
        )
    return True
