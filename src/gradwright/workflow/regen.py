"""One regeneration job: a model file in, the files it generates out (as text).

``gen`` makes one job from its command line and ``build`` one per configured target;
both then write, check or diff the artifacts the same way (``output.py``). Rendering
is static: the model is read, never imported or run.
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

from gradwright.api import generate, regeneration_command
from gradwright.diagnostics import GradwrightError, Location
from gradwright.workflow.config import Project, Target
from gradwright.workflow.output import Artifact
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
    )


def read_source(path: Path, label: str) -> str:
    try:
        return path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise GradwrightError.usage(f"{label}: no such file") from None
    except (OSError, UnicodeDecodeError) as error:
        raise GradwrightError.usage(f"{label}: cannot read: {error}") from None


def _accepts_target(function: object) -> bool:
    return "target" in inspect.signature(function).parameters  # type: ignore[arg-type]


def module_command(job: Job) -> str:
    """The command in the module's header (the one that regenerates it)."""
    if _accepts_target(regeneration_command):
        return regeneration_command(
            job.source, job.functions, job.wrt, job.output, job.target  # type: ignore[call-arg]
        )
    base = regeneration_command(job.source, job.functions, job.wrt, job.output)
    return base if job.target == "cpython" else f"{base} --target {job.target}"


def job_command(job: Job) -> str:
    """The command that regenerates everything the job writes."""
    base = module_command(job)
    if job.emit_test is None:
        return base
    return test_command(base, job.emit_test, job.ranges)


def generate_module(job: Job, source: str) -> str:
    options: dict[str, object] = {"path": job.source, "output": job.output}
    # generate() gained its `target` keyword in a separate change: with an older
    # generate() only the default platform can be asked for
    if _accepts_target(generate):
        options["target"] = job.target
    elif job.target != "cpython":
        raise GradwrightError.usage(
            f"--target {job.target} is not supported by this version of gradwright"
        )
    return generate(source, list(job.functions), job.wrt, **options)  # type: ignore[arg-type]


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
