"""The ``gradwright`` command line.

Exit status: 0 done, 1 check failed (stale output), 2 bad input or usage.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from . import __version__
from .api import generate
from .diagnostics import GradwrightError
from .output import write_generated

EXIT_OK = 0
EXIT_STALE = 1
EXIT_BAD_INPUT = 2


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # usage errors exit 2, like bad input
        self.print_usage(sys.stderr)
        print(f"error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_BAD_INPUT)


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="gradwright",
        description="Generate standalone reverse-mode gradient code for Python models."
        " `gen` reads the model's source; it never imports or runs it.",
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
        description="Generate a gradient module for FUNC (one or more) in FILE.",
    )
    gen.add_argument("file", metavar="FILE", help="the model's source file")
    gen.add_argument(
        "functions", metavar="FUNC", nargs="+", help="function(s) to differentiate"
    )
    gen.add_argument(
        "--wrt",
        metavar="NAMES",
        help="comma-separated parameters to differentiate with respect to"
        " (default: every parameter)",
    )
    gen.add_argument(
        "-o", "--output", metavar="OUT", help="write the module here (default: stdout)"
    )
    return parser


def _split_names(text: str | None) -> tuple[str, ...] | None:
    if text is None:
        return None
    names = tuple(n.strip() for n in text.split(",") if n.strip())
    if not names:
        raise GradwrightError.usage("--wrt needs at least one parameter name")
    return names


def _read_source(path: str) -> str:
    try:
        return Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise GradwrightError.usage(f"{path}: no such file") from None
    except (OSError, UnicodeDecodeError) as error:
        raise GradwrightError.usage(f"{path}: cannot read: {error}") from None


def _gen(args: argparse.Namespace) -> int:
    source = _read_source(args.file)
    text = generate(
        source,
        args.functions,
        _split_names(args.wrt),
        path=args.file,
        output=args.output,
    )
    if args.output is None:
        sys.stdout.write(text)
    else:
        write_generated(Path(args.output), text)
    return EXIT_OK


def main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "gen":
            return _gen(args)
    except GradwrightError as error:
        print(error.diagnostic.render(), file=sys.stderr)
        return EXIT_BAD_INPUT
    raise AssertionError(f"unhandled command {args.command}")


if __name__ == "__main__":
    raise SystemExit(main())
