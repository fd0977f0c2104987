"""The ``surfacekit`` command: argument parsing, messages, exit codes.

Exit codes: 0 success, 2 bad input (one line on stderr, no traceback, nothing
written), 1 internal error (one line; ``--debug`` shows the traceback), 3 some
cohort subjects failed.  Outputs are staged and moved into place only when the
whole command succeeded (:class:`surfacekit.app.context.Outputs`).  The commands
live in :mod:`surfacekit.app.commands`; the work itself in the library.
"""
from __future__ import annotations

import argparse
import json
import sys
import traceback
import warnings
from collections.abc import Sequence
from pathlib import Path

from ..io.tables import json_default
from ..mesh.surface import SurfaceError
from ..version import __version__
from .commands import COMMANDS
from .context import (
    EXIT_BAD_INPUT,
    EXIT_INTERNAL,
    EXIT_OK,
    Context,
    InputError,
    emit,
    silence,
    why_unwritable,
)

__all__ = ["build_parser", "main"]


class _Parser(argparse.ArgumentParser):
    """An argparse parser whose errors are one-line InputErrors instead of usage dumps."""

    def error(self, message: str):
        raise InputError(f"{self.prog}: {message} (see '{self.prog} --help')")


def _add_common(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("common options")
    g.add_argument("--json", action="store_true", help="print a machine-readable JSON summary on stdout")
    g.add_argument("-q", "--quiet", action="store_true", help="no progress bars or messages")
    g.add_argument("--seed", type=int, default=0, help="random seed (default 0); same seed, same output")
    g.add_argument("--force", action="store_true", help="replace existing outputs")
    g.add_argument("--debug", action="store_true", help="show the traceback of internal errors")


def build_parser() -> argparse.ArgumentParser:
    """The full ``surfacekit`` parser (one subcommand per stage of the job)."""
    parser = _Parser(prog="surfacekit", formatter_class=argparse.RawDescriptionHelpFormatter,
                     description="Analyse deformable anatomical surfaces: inspect, prepare, "
                                 "describe, match, measure change, run cohorts.\n"
                                 "Research use only; not for diagnosis or treatment.",
                     epilog="example:\n  surfacekit demo -o surfacekit-demo\n"
                            "  (then see 'surfacekit COMMAND --help')")
    parser.add_argument("--version", action="version", version=f"surfacekit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for spec in COMMANDS:
        p = sub.add_parser(spec.name, help=spec.help, description=spec.description,
                           epilog="example:\n  " + spec.example,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        spec.arguments(p)
        _add_common(p)
        p.set_defaults(run=spec.run)
    return parser


def _print_summary(ctx: Context, summary: dict) -> None:
    if ctx.args.json:
        print(json.dumps(summary, indent=2, sort_keys=True, default=json_default))
    elif not ctx.quiet:
        for key, value in summary.items():
            if isinstance(value, dict):
                print(f"{key}:")
                for k, v in value.items():
                    print(f"  {k}: {_short(v)}")
            else:
                print(f"{key}: {_short(value)}")


def _short(v):
    return f"{v:.4g}" if isinstance(v, float) else v


def _one_line(exc: BaseException) -> str:
    if isinstance(exc, PermissionError) and exc.filename:
        return f"permission denied: {exc.filename}"
    if isinstance(exc, (FileExistsError, NotADirectoryError)) and exc.filename:
        path = Path(exc.filename)
        return f"cannot use {path}: {why_unwritable(exc, path.parent)}"
    text = str(exc).strip() or type(exc).__name__
    return " ".join(text.split())


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``surfacekit`` command; returns the exit code.

    A reader that closes the pipe early (``surfacekit inspect x.ply --json | head``)
    ends the command quietly with exit code 0: the summary is printed after every
    output file is complete, so the work is done and only the reader stopped
    reading (messages on stderr are dropped the same way).
    """
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    ctx = None
    committed = False
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if getattr(args, "run", None) is None:
            parser.print_help(sys.stderr)
            return EXIT_BAD_INPUT
        ctx = Context(args)
        with warnings.catch_warnings():
            if ctx.quiet:
                warnings.simplefilter("ignore")
            else:
                warnings.showwarning = _one_line_warning
            summary = args.run(ctx)
        ctx.outputs.commit()
        committed = True
        summary = dict(summary or {})
        code = int(summary.pop("exit_code", EXIT_OK))  # e.g. cohort runs with failed subjects
        _print_summary(ctx, summary)
        sys.stdout.flush()  # a closed pipe shows here, not in the flush at exit
        return code
    except BrokenPipeError:
        silence(sys.stdout)
        if committed:
            return EXIT_OK
        _cleanup(ctx)
        return _fail(EXIT_INTERNAL, "internal error: output pipe closed before the command finished",
                     debug)
    except (InputError, SurfaceError, ValueError, FileNotFoundError, IsADirectoryError,
            NotADirectoryError, FileExistsError, PermissionError) as exc:
        _cleanup(ctx)
        return _fail(EXIT_BAD_INPUT, f"error: {_one_line(exc)}", debug)
    except KeyboardInterrupt:
        _cleanup(ctx)
        emit("surfacekit: interrupted")
        return 130
    except Exception as exc:  # noqa: BLE001 - every other failure is ours
        _cleanup(ctx)
        return _fail(EXIT_INTERNAL, f"internal error: {type(exc).__name__}: {_one_line(exc)} "
                     "(rerun with --debug for details)", debug)


def _fail(code: int, message: str, debug: bool) -> int:
    if debug:
        traceback.print_exc()
    emit(f"surfacekit: {message}")
    return code


def _cleanup(ctx: Context | None) -> None:
    if ctx is not None:
        ctx.outputs.cleanup()


def _one_line_warning(message, category, filename, lineno, file=None, line=None):
    emit(f"surfacekit: warning: {_one_line(message)}")


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
