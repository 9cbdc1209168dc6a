"""One regeneration job: a model file in, the files it generates out (as text).

``gen`` makes one job from its command line and ``build`` one per configured target;
both then write, check or diff the artifacts the same way (``output.py``). Rendering
is static: the model is read, never imported or run.

Before generating, :func:`current_without_generating` reads the outputs' headers: when
each records this version, the source's sha256, this job's command and a digest that
still matches the file, generating would write the same bytes, so nothing is
generated (and the generator's imports are never loaded).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

from gradwright import __version__
from gradwright.diagnostics import GradwrightError, Location
from gradwright.header import (
    read_header,
    regeneration_command,
    sha256_text,
    shape_words,
)
from gradwright.workflow.config import Project, Target
from gradwright.workflow.output import Artifact, read_existing
from gradwright.workflow.points import Range
from gradwright.workflow.testgen import TestRequest, render_test, test_command


@dataclass(frozen=True)
class Job:
    source: str  # label: the path as written (it goes into the header)
    functions: tuple[str, ...]
    wrt: tuple[str, ...] | None
    output: str | None  # label; None prints to stdout
    base: Path = Path(".")  # labels are relative to this folder
    target: str = "cpython"
    emit_test: str | None = None
    ranges: Mapping[str, Range] = field(default_factory=dict)
    ranges_location: Location | None = None
    #: declared array shapes (gen --shape, a target's shapes): name -> sizes
    shapes: Mapping[str, tuple[int | str, ...]] = field(default_factory=dict)

    def path(self, label: str) -> Path:
        return self.base / label


def job_for_target(project: Project, target: Target) -> Job:
    return Job(
        source=target.source,
        functions=target.functions,
        wrt=target.wrt,
        output=target.output,
        base=project.root,
        target=target.target,
        emit_test=target.emit_test,
        ranges=target.ranges,
        ranges_location=target.ranges_location,
        shapes=target.shapes,
    )


def read_source(path: Path, label: str) -> str:
    try:
        return path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise GradwrightError.usage(f"{label}: no such file") from None
    except (OSError, UnicodeDecodeError) as error:
        raise GradwrightError.usage(f"{label}: cannot read: {error}") from None


def module_command(job: Job) -> str:
    """The command in the module's header (the one that regenerates it)."""
    return regeneration_command(
        job.source,
        job.functions,
        job.wrt,
        job.output,
        job.target,
        shape_words(dict(sorted(job.shapes.items()))),
    )


def job_command(job: Job) -> str:
    """The command that regenerates everything the job writes."""
    base = module_command(job)
    if job.emit_test is None:
        return base
    return test_command(base, job.emit_test, job.ranges)


def generate_module(job: Job, source: str) -> str:
    from gradwright.api import generate  # the generator's imports, only when used

    return generate(
        source,
        list(job.functions),
        job.wrt,
        path=job.source,
        output=job.output,
        target=job.target,
        shapes=job.shapes or None,
    )


def expected_headers(job: Job) -> list[tuple[str, str]]:
    """(output label, the command its header records) for each file the job writes."""
    if job.output is None:
        return []
    files = [(job.output, module_command(job))]
    if job.emit_test is not None:
        files.append((job.emit_test, job_command(job)))
    return files


def current_without_generating(job: Job, source: str) -> bool:
    """True when every output's header shows it is exactly what generating would
    write: same version, same source, same command (so the same options), and a
    digest the file still matches. Anything else needs a full regeneration."""
    files = expected_headers(job)
    if not files:
        return False
    source_sha = sha256_text(source)
    for label, command in files:
        text = read_existing(job.path(label))
        header = None if text is None else read_header(text)
        if (
            header is None
            or header.untouched is not True
            or header.version != __version__
            or header.fields.get("source sha256") != source_sha
            or header.fields.get("command") != command
        ):
            return False
    return True


def render(job: Job) -> list[Artifact]:
    """Every file the job generates, in order: the module, then its test."""
    source = read_source(job.path(job.source), job.source)
    text = generate_module(job, source)
    if job.output is None:
        return [Artifact(Path("-"), "<stdout>", text)]
    artifacts = [Artifact(job.path(job.output), job.output, text)]
    if job.emit_test is not None:
        request = TestRequest(
            source_label=job.source,
            source_text=source,
            module_label=job.output,
            test_label=job.emit_test,
            functions=job.functions,
            wrt=job.wrt,
            ranges=job.ranges,
            ranges_location=job.ranges_location,
            command=job_command(job),
        )
        test_text = render_test(request, text)
        artifacts.append(Artifact(job.path(job.emit_test), job.emit_test, test_text))
    return artifacts
