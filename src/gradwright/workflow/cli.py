"""The ``gradwright`` command line.

Exit status: 0 done, 1 check failed (stale output, or ``verify`` found a wrong
gradient), 2 bad input or usage. Status lines go to stderr; generated text, diffs
and ``verify`` tables go to stdout.
"""

from __future__ import annotations

import argparse
import functools
import os
import re
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from gradwright import __version__
from gradwright.diagnostics import GradwrightError
from gradwright.workflow.config import (
    PLATFORMS,
    find_pyproject,
    load_project,
)
from gradwright.workflow.output import (
    Artifact,
    check_overwrite,
    edited_by_hand,
    is_current,
    is_generated,
    read_existing,
    unified_diff,
    write_artifact,
)
from gradwright.workflow.points import (
    DEFAULT_RTOL,
    Param,
    Range,
    Value,
    check_names,
    choose_points,
    declared_sizes,
    describe_kinds,
    parse_at,
    parse_declared_shapes,
    parse_lengths,
    parse_ranges,
    parse_scales,
    parse_shapes,
    signature_of,
    typical_sizes,
)
from gradwright.workflow.regen import (
    Job,
    current_without_generating,
    expected_headers,
    generate_module,
    job_command,
    job_for_target,
    read_source,
    render,
)

# what only `verify` uses is imported there: the fast paths load no more than needed
TYPE_CHECKING = False
if TYPE_CHECKING:
    from typing import TextIO

    from gradwright.workflow.verify import Subject

EXIT_OK = 0
EXIT_STALE = 1
EXIT_BAD_INPUT = 2

VERIFY_WARNING = (
    "verify RUNS CODE: it executes the generated module, which holds a copy of your"
    " model's function. Use it only on models you trust. (gen and build never run"
    " the model: they only read it.)"
)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # usage errors exit 2, like bad input
        self.print_usage(sys.stderr)
        print(f"error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_BAD_INPUT)


def _add_write_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--check",
        action="store_true",
        help="write nothing; exit 1 if any output differs from what would be generated",
    )
    parser.add_argument(
        "--diff",
        action="store_true",
        help="write nothing; print a unified diff of what would change",
    )
    parser.add_argument(
        "--force",
        action="store_true",
        help="overwrite an output file even if gradwright did not generate it",
    )
    parser.add_argument(
        "-q", "--quiet", action="store_true", help="print nothing but errors"
    )


def _add_wrt(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--wrt",
        metavar="NAMES",
        help="comma-separated parameters to differentiate with respect to"
        " (default: every parameter)",
    )


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="gradwright",
        description="Generate standalone reverse-mode gradient code for Python models."
        " `gen` and `build` read the model's source; they never import or run it.",
    )
    parser.add_argument(
        "--version", action="version", version=f"gradwright {__version__}"
    )
    commands = parser.add_subparsers(
        dest="command", required=True, parser_class=_Parser
    )

    gen = commands.add_parser(
        "gen",
        help="generate a gradient module",
        description="Generate a gradient module for FUNC (one or more) in FILE."
        " The model is read, never run.",
    )
    gen.add_argument("file", metavar="FILE", help="the model's source file")
    gen.add_argument(
        "functions", metavar="FUNC", nargs="+", help="function(s) to differentiate"
    )
    _add_wrt(gen)
    gen.add_argument(
        "-o", "--output", metavar="OUT", help="write the module here (default: stdout)"
    )
    gen.add_argument(
        "--target",
        choices=PLATFORMS,
        default="cpython",
        help="the Python the module will run on (default: cpython)",
    )
    gen.add_argument(
        "--emit-test",
        metavar="PATH",
        help="also write a pytest file checking the module against finite differences",
    )
    gen.add_argument(
        "--range",
        metavar="NAME=LOW:HIGH",
        action="append",
        default=[],
        help="with --emit-test: where test points are drawn for a parameter"
        " (default 0.5:1.5); repeat or separate with commas",
    )
    gen.add_argument(
        "--shape",
        metavar="NAME=DIMS",
        action="append",
        default=[],
        help="an array parameter's shape, e.g. X=n,5 (a name stands for one size"
        " wherever it appears; () for a number): the gradient is written for these"
        " shapes (no run-time broadcasting helpers) and refuses others when called;"
        " one parameter per --shape",
    )
    _add_write_options(gen)

    build = commands.add_parser(
        "build",
        help="regenerate every target in pyproject.toml",
        description="Regenerate every [[tool.gradwright.targets]] of the nearest"
        " pyproject.toml. Exit 1 with --check when any output is stale, 2 when a"
        " target fails (the other targets are still processed).",
    )
    build.add_argument(
        "--fail-if-changed",
        action="store_true",
        help="exit 1 when any file was written (for hooks: new files are not"
        " staged yet)",
    )
    build.add_argument(
        "-j",
        "--jobs",
        metavar="N",
        type=int,
        help="generate up to N targets at once (default: the number of CPUs)",
    )
    build.add_argument(
        "--config",
        metavar="PYPROJECT",
        help="the pyproject.toml to read (default: the nearest one upwards)",
    )
    _add_write_options(build)

    verify = commands.add_parser(
        "verify",
        help="check gradients against finite differences (RUNS the model's code)",
        description="Compare FUNC_grad with central finite differences of FUNC at"
        " given or random points and print a table. FILE is the model (generated in"
        " memory) or a generated module. " + VERIFY_WARNING,
    )
    verify.add_argument(
        "file", metavar="FILE", help="the model's source, or a generated module"
    )
    verify.add_argument(
        "functions", metavar="FUNC", nargs="+", help="function(s) to check"
    )
    _add_wrt(verify)
    verify.add_argument(
        "--at",
        metavar="NAME=VALUE",
        action="append",
        default=[],
        help="parameter values (repeat or separate with commas); parameters not"
        " given are drawn at random",
    )
    verify.add_argument(
        "--samples",
        metavar="N",
        type=int,
        help="how many random points (default 3)",
    )
    verify.add_argument(
        "--seed", metavar="S", type=int, default=0, help="random seed (default 0)"
    )
    verify.add_argument(
        "--range",
        metavar="NAME=LOW:HIGH",
        action="append",
        default=[],
        help="where random values are drawn for a parameter (default 0.5:1.5);"
        " also sets its typical size",
    )
    verify.add_argument(
        "--scale",
        metavar="NAME=SIZE",
        action="append",
        default=[],
        help="a parameter's typical size for the finite-difference step"
        " h = eps**(1/3) * max(|x|, SIZE), after Dennis & Schnabel"
        " (default: from --range, else 1)",
    )
    verify.add_argument(
        "--shape",
        metavar="NAME=DIMS",
        action="append",
        default=[],
        help="draw a NumPy array of this shape for an array parameter, e.g."
        " W=4x6 or b=6",
    )
    verify.add_argument(
        "--length",
        metavar="NAME=K",
        action="append",
        default=[],
        help="draw a list parameter with K elements (default 3)",
    )
    verify.add_argument(
        "--rtol",
        metavar="R",
        type=float,
        default=DEFAULT_RTOL,
        help=f"relative tolerance (default {DEFAULT_RTOL:g})",
    )
    return parser


def _split_names(text: str | None) -> tuple[str, ...] | None:
    if text is None:
        return None
    names = tuple(n.strip() for n in text.split(",") if n.strip())
    if not names:
        raise GradwrightError.usage("--wrt needs at least one parameter name")
    return names


class _Report:
    """Status lines on stderr: `<status> <path>`, silenced by --quiet."""

    def __init__(self, quiet: bool, stream: TextIO | None = None) -> None:
        self.quiet = quiet
        self.stream = stream if stream is not None else sys.stderr

    def line(self, text: str, *, error: bool = False) -> None:
        if error or not self.quiet:
            print(text, file=self.stream)

    def status(self, word: str, labels: Sequence[str]) -> None:
        error = word in ("stale", "missing", "edited", "failed")
        self.line(f"{word:<9} {', '.join(labels)}", error=error)


# ---------------------------------------------------------------------------------
# gen


def _gen(args: argparse.Namespace) -> int:
    needs_output = [
        flag
        for flag, given in (
            ("--check", args.check),
            ("--diff", args.diff),
            ("--emit-test", args.emit_test is not None),
        )
        if given
    ]
    if args.output is None and needs_output:
        raise GradwrightError.usage(
            f"{needs_output[0]} needs -o OUT (the file to compare with or test)"
        )
    if args.range and args.emit_test is None:
        raise GradwrightError.usage("--range is used by --emit-test; give both")
    job = Job(
        source=args.file,
        functions=tuple(args.functions),
        wrt=_split_names(args.wrt),
        output=args.output,
        target=args.target,
        emit_test=args.emit_test,
        ranges=parse_ranges(args.range),
        shapes=parse_declared_shapes(args.shape),
    )
    report = _Report(args.quiet)
    if _current(job, args.diff or args.force):
        if args.check:
            for label, _ in expected_headers(job):
                report.status("unchanged", [label])
        return EXIT_OK
    artifacts = render(job)
    if job.output is None:
        sys.stdout.write(artifacts[0].text)
        return EXIT_OK
    if args.check or args.diff:
        stale = [a for a in artifacts if not is_current(a)]
        if args.diff:
            sys.stdout.write("".join(unified_diff(a) for a in stale))
        if args.check:
            words = [_stale_word(a) if a in stale else "unchanged" for a in artifacts]
            for artifact, word in zip(artifacts, words, strict=True):
                report.status(word, [artifact.label])
            if "edited" in words:
                report.line(
                    "edited by hand since it was generated: move the change into the"
                    f" model, then regenerate with: {job_command(job)} --force",
                    error=True,
                )
            elif stale:
                verb = (
                    "write" if set(words) <= {"missing", "unchanged"} else "regenerate"
                )
                report.line(f"{verb} with: {job_command(job)}", error=True)
            if stale:
                return EXIT_STALE
        return EXIT_OK
    for artifact in artifacts:  # refuse before writing anything
        check_overwrite(artifact, args.force)
    for artifact in artifacts:
        write_artifact(artifact, args.force)
    return EXIT_OK


def _current(job: Job, diff: bool) -> bool:
    """Whether the outputs' headers show them current, so nothing is generated.
    A diff is always made from a full regeneration; a source that cannot be read
    is left to the full path, which reports it."""
    if diff or job.output is None:
        return False
    try:
        source = read_source(job.path(job.source), job.source)
    except GradwrightError:
        return False
    return current_without_generating(job, source)


def _stale_word(artifact: Artifact) -> str:
    """`missing` for an output not written yet, `edited` for a generated file
    changed by hand since, else `stale`."""
    if not artifact.path.exists():
        return "missing"
    return "edited" if edited_by_hand(read_existing(artifact.path)) else "stale"


# ---------------------------------------------------------------------------------
# build


@dataclass(frozen=True)
class _Outcome:
    word: str  # generated, unchanged, stale, edited, would change, failed
    labels: list[str]
    diagnostic: str | None = None  # a failed target's error message
    diff: str = ""


@dataclass(frozen=True)
class _BuildOptions:
    check: bool
    diff: bool
    force: bool


def _jobs(requested: int | None) -> int:
    if requested is None:
        return os.cpu_count() or 1
    if requested < 1:
        raise GradwrightError.usage("-j must be at least 1")
    return requested


def _build(args: argparse.Namespace) -> int:
    workers = _jobs(args.jobs)
    pyproject = (
        Path(args.config) if args.config is not None else find_pyproject(Path.cwd())
    )
    project = load_project(pyproject)
    options = _BuildOptions(args.check, args.diff, args.force)
    report = _Report(args.quiet)
    jobs = [job_for_target(project, target) for target in project.targets]
    outcomes: list[_Outcome | None] = [
        (
            _Outcome("unchanged", [job.output or ""])
            if _current(job, args.diff or args.force)
            else None
        )
        for job in jobs
    ]
    pending = [k for k, outcome in enumerate(outcomes) if outcome is None]
    pool = None
    if workers > 1 and len(pending) > 1:
        # only then: a pool's start-up costs more than one small generation
        from concurrent.futures import ProcessPoolExecutor

        pool = ProcessPoolExecutor(max_workers=min(workers, len(pending)))
        futures = {k: pool.submit(_build_target, jobs[k], options) for k in pending}
    counts: dict[str, int] = {}
    try:
        for k, job in enumerate(jobs):  # reported in target order
            outcome = outcomes[k]
            if outcome is None and pool is None:
                outcome = _build_target(job, options)
            elif outcome is None:
                try:
                    outcome = futures[k].result()
                except Exception as error:  # the worker process itself died
                    message = f"error: the process generating it stopped: {error!r}"
                    outcome = _Outcome("failed", [job.output or ""], message)
            counts[outcome.word] = counts.get(outcome.word, 0) + 1
            sys.stdout.write(outcome.diff)
            report.status(outcome.word, outcome.labels)
            if outcome.diagnostic is not None:
                report.line(outcome.diagnostic, error=True)
    finally:
        if pool is not None:
            pool.shutdown()
    order = (
        "generated",
        "would change",
        "stale",
        "missing",
        "edited",
        "unchanged",
        "failed",
    )
    parts = [f"{counts[w]} {w}" for w in order if counts.get(w)]
    total = len(project.targets)
    mode = "build --check" if args.check else "build --diff" if args.diff else "build"
    report.line(
        f"{mode}: {total} target{'s' if total != 1 else ''}: {', '.join(parts)}"
    )
    if counts.get("failed"):
        return EXIT_BAD_INPUT
    if counts.get("stale") or counts.get("missing") or counts.get("edited"):
        if counts.get("edited"):
            report.line(
                "edited files were changed by hand since they were generated: move"
                " the change into the model, then `gradwright build --force`",
                error=True,
            )
        todo = [
            text
            for word, text in (
                ("stale", "regenerate the stale files"),
                ("missing", "write the missing files"),
            )
            if counts.get(word)
        ]
        if todo:
            report.line(f"run `gradwright build` to {' and '.join(todo)}", error=True)
        return EXIT_STALE
    if counts.get("generated") and args.fail_if_changed:
        report.line("files were regenerated: review and stage them", error=True)
        return EXIT_STALE
    return EXIT_OK


def _build_target(job: Job, options: _BuildOptions) -> _Outcome:
    """One target, generated in full (in a worker process when there are several).
    Any error becomes a `failed` outcome, so the other targets still run."""
    try:
        artifacts = render(job)
        if options.check or options.diff:
            stale = [a for a in artifacts if not is_current(a)]
            diff = "".join(unified_diff(a) for a in stale) if options.diff else ""
            if not stale:
                return _Outcome("unchanged", [artifacts[0].label], diff=diff)
            if not options.check:  # --diff alone shows what building would change
                return _Outcome("would change", [a.label for a in stale], diff=diff)
            words = [_stale_word(a) for a in stale]
            edited = [
                a.label for a, w in zip(stale, words, strict=True) if w == "edited"
            ]
            if edited:
                return _Outcome("edited", edited, diff=diff)
            word = "missing" if set(words) == {"missing"} else "stale"
            return _Outcome(word, [a.label for a in stale], diff=diff)
        for artifact in artifacts:
            check_overwrite(artifact, options.force)
        changed = [a.label for a in artifacts if write_artifact(a, options.force)]
    except GradwrightError as error:
        return _Outcome("failed", [job.output or ""], str(error))
    except Exception:  # a bug in one target must not hide the others' results
        import traceback

        return _Outcome("failed", [job.output or ""], traceback.format_exc())
    if changed:
        return _Outcome("generated", changed)
    return _Outcome("unchanged", [artifacts[0].label])


# ---------------------------------------------------------------------------------
# verify

_WRT_DOC = re.compile(r"with respect to \(([^)]*)\)")


def _module_wrt(module_text: str, function: str, label: str) -> tuple[str, ...]:
    """The wrt names of a generated ``_grad`` function, from its docstring."""
    import ast

    for node in ast.parse(module_text).body:
        if isinstance(node, ast.FunctionDef) and node.name == f"{function}_grad":
            match = _WRT_DOC.search(ast.get_docstring(node) or "")
            if match is None:
                raise GradwrightError.usage(
                    f"{label}: cannot read what {function}_grad differentiates"
                    " with respect to (its docstring was changed)",
                    "regenerate the module",
                )
            return tuple(n.strip() for n in match.group(1).split(",") if n.strip())
    names = [
        n.name[: -len("_grad")]
        for n in ast.parse(module_text).body
        if isinstance(n, ast.FunctionDef) and n.name.endswith("_grad")
    ]
    raise GradwrightError.usage(
        f"{label} has no generated function {function}_grad",
        "it has gradients of: " + (", ".join(names) or "nothing"),
    )


def _subjects(args: argparse.Namespace) -> list[Subject]:
    from gradwright.workflow.verify import Subject

    text = read_source(Path(args.file), args.file)
    wrt = _split_names(args.wrt)
    if not is_generated(text):
        job = Job(args.file, tuple(args.functions), wrt, None)
        module = generate_module(job, text)
        return [
            Subject(module, f, _module_wrt(module, f, args.file), args.file, text)
            for f in args.functions
        ]
    match = re.search(r"^# source: (.*)$", text, re.MULTILINE)
    source_label = match.group(1) if match else None
    source_text = None
    if source_label:  # only to give statements line numbers: optional
        try:
            source_text = read_existing(Path(source_label))
        except GradwrightError:
            pass
    subjects = []
    for function in args.functions:
        names = _module_wrt(text, function, args.file)
        if wrt is not None and wrt != names:
            raise GradwrightError.usage(
                f"{args.file}: {function}_grad is with respect to {', '.join(names)},"
                f" not {', '.join(wrt)}",
                "leave out --wrt, or regenerate the module",
            )
        subjects.append(Subject(text, function, names, source_label, source_text))
    return subjects


def _draw(
    params: Sequence[Param],
    wrt: Sequence[str],
    given: dict[str, Value],
    ranges: dict[str, Range],
    seed: int,
    kinds: dict[str, str],
    lengths: dict[str, int],
    shapes: dict[str, tuple[int, ...]],
    samples: int | None,
) -> list[dict[str, Value]]:
    return choose_points(
        params, wrt, given, ranges, samples, seed, shapes, kinds, lengths
    )


def _verify(args: argparse.Namespace) -> int:
    from gradwright.workflow.kinds import COUNT, INDEX, parameter_kinds
    from gradwright.workflow.verify import check_point, guess_shapes, load
    from gradwright.workflow.verify import render as render_table
    from gradwright.workflow.verify import summary as verify_summary

    if args.samples is not None and args.samples < 1:
        raise GradwrightError.usage("--samples must be at least 1")
    if not args.rtol > 0:
        raise GradwrightError.usage("--rtol must be positive")
    fixed = parse_at(args.at)
    ranges = parse_ranges(args.range)
    scales = parse_scales(args.scale)
    shapes = parse_shapes(args.shape)
    lengths = parse_lengths(args.length)
    sizes = typical_sizes(ranges, scales)
    subjects = _subjects(args)
    signatures = {
        s.function: signature_of(s.module_text, f"{s.function}_grad") for s in subjects
    }
    every = [p for params in signatures.values() for p in params]
    check_names(every, list(fixed), "--at", " or ".join(signatures))
    check_names(every, list(ranges), "--range", " or ".join(signatures))
    check_names(every, list(scales), "--scale", " or ".join(signatures))
    check_names(every, list(shapes), "--shape", " or ".join(signatures))
    check_names(every, list(lengths), "--length", " or ".join(signatures))
    try:
        namespace = load(subjects[0].module_text, args.file)
    except Exception as error:
        raise GradwrightError.usage(
            f"{args.file}: running the generated module failed:"
            f" {type(error).__name__}: {error}"
        ) from None
    status = EXIT_OK
    for subject in subjects:
        params = signatures[subject.function]
        names = {p.name for p in params}
        given = {n: v for n, v in fixed.items() if n in names}
        kinds = parameter_kinds(subject.module_text, subject.function)

        draw = functools.partial(
            _draw, params, subject.wrt, given, ranges, args.seed, kinds, lengths
        )
        primal = namespace[subject.function]
        # a module generated for declared shapes is drawn at those (names as sizes)
        known = {**declared_sizes(subject.module_text, names), **shapes}
        shaped = {**guess_shapes(primal, kinds, known, given, draw), **known}
        points = draw(shaped, args.samples)
        integers = frozenset(n for n, k in kinds.items() if k in (COUNT, INDEX))
        results = [
            check_point(subject, namespace, p, args.rtol, sizes, integers)
            for p in points
        ]
        sys.stdout.write(render_table(subject, results, args.rtol))
        if any(r.failed or r.skipped is not None for r in results):
            guessed = describe_kinds(kinds, points[0], set(given) | set(shapes))
            if guessed is not None:
                print(f"  {guessed}")
        print(verify_summary(subject, results, args.rtol))
        if any(r.failed for r in results):
            status = EXIT_STALE
        elif all(r.skipped is not None for r in results) and status == EXIT_OK:
            status = EXIT_BAD_INPUT
    return status


def main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    handlers = {"gen": _gen, "build": _build, "verify": _verify}
    try:
        return handlers[args.command](args)
    except GradwrightError as error:
        print(str(error), file=sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == "__main__":
    raise SystemExit(main())
