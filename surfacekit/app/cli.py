"""The ``surfacekit`` command: argument parsing, messages, exit codes, safe outputs.

Exit codes: 0 success, 2 bad input (one line on stderr, no traceback, nothing
written), 1 internal error (one line; ``--debug`` shows the traceback).
Outputs are staged beside their destination and moved into place only when the
whole command succeeded; an existing output is replaced only with ``--force``.
The work itself lives in the library (see :mod:`surfacekit.cli_commands`).
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import traceback
import warnings
from collections.abc import Sequence
from pathlib import Path

from ..mesh.surface import SurfaceError

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT = 0, 1, 2
#: `cohort` when some (not all) subjects failed; their rows in the summary hold the errors
EXIT_SOME_FAILED = 3


class InputError(ValueError):
    """Bad input given on the command line (exit code 2)."""


class _Parser(argparse.ArgumentParser):
    """An argparse parser whose errors are one-line InputErrors instead of usage dumps."""

    def error(self, message: str):
        raise InputError(f"{self.prog}: {message} (see '{self.prog} --help')")


class Outputs:
    """Outputs of one command: checked before the work, staged, moved into place at the end."""

    def __init__(self, force: bool):
        self.force = force
        self._staged: list[tuple[Path, Path, bool]] = []  # (staging path, final path, is_dir)
        self._dirs: list[Path] = []

    def claim(self, path, *, directory: bool = False, suffixes: Sequence[str] | None = None) -> Path:
        """Reserve an output; returns the staging path to write to instead."""
        final = Path(path)
        if suffixes and not any(final.name.lower().endswith(s) for s in suffixes):
            raise InputError(f"output {final} must end with one of {', '.join(suffixes)}")
        if final.exists() and not self.force:
            raise InputError(f"output {final} already exists (use --force to replace it)")
        if final.exists() and final.is_dir() != directory:
            kind = "a folder" if final.is_dir() else "a file"
            raise InputError(f"output {final} exists and is {kind}")
        parent = final.parent if str(final.parent) else Path(".")
        parent.mkdir(parents=True, exist_ok=True)
        stage_dir = Path(tempfile.mkdtemp(prefix=f".{final.name}.", suffix=".part", dir=parent))
        self._dirs.append(stage_dir)
        staged = stage_dir if directory else stage_dir / final.name
        self._staged.append((staged, final, directory))
        return staged

    def commit(self) -> None:
        for staged, final, directory in self._staged:
            if not directory:
                if not staged.exists():
                    raise RuntimeError(f"the command did not write {final}")
                os.replace(staged, final)
                continue
            umask = os.umask(0)
            os.umask(umask)
            staged.chmod(0o777 & ~umask)  # mkdtemp makes 0700 folders
            old = None
            if final.exists():
                old = final.with_name(f".{final.name}.old-{os.getpid()}")
                os.replace(final, old)
            os.replace(staged, final)
            staged.mkdir()  # keep the bookkeeping folder for cleanup()
            if old is not None:
                shutil.rmtree(old, ignore_errors=True)
        self.cleanup()

    def cleanup(self) -> None:
        for d in self._dirs:
            shutil.rmtree(d, ignore_errors=True)
        self._dirs.clear()


class Context:
    """What every command gets: options, output staging, messages and progress bars."""

    def __init__(self, args: argparse.Namespace):
        self.args = args
        self.quiet = bool(getattr(args, "quiet", False))
        self.outputs = Outputs(bool(getattr(args, "force", False)))

    def say(self, message: str) -> None:
        if not self.quiet:
            print(message, file=sys.stderr)

    def progress(self, total: int, desc: str):
        """A tqdm bar on stderr, silent with --quiet or when stderr is not a terminal."""
        from tqdm.auto import tqdm

        return tqdm(total=total, desc=desc, unit="step", leave=False,
                    disable=self.quiet or not sys.stderr.isatty())


def _add_common(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("common options")
    g.add_argument("--json", action="store_true", help="print a machine-readable JSON summary on stdout")
    g.add_argument("-q", "--quiet", action="store_true", help="no progress bars or messages")
    g.add_argument("--seed", type=int, default=0, help="random seed (default 0); same seed, same output")
    g.add_argument("--force", action="store_true", help="replace existing outputs")
    g.add_argument("--debug", action="store_true", help="show the traceback of internal errors")


def build_parser() -> argparse.ArgumentParser:
    """The full ``surfacekit`` parser (one subcommand per stage of the job)."""
    from ..version import __version__
    from . import commands as cli_commands

    parser = _Parser(prog="surfacekit", formatter_class=argparse.RawDescriptionHelpFormatter,
                     description="Analyse deformable anatomical surfaces: inspect, prepare, "
                                 "describe, match, measure change, run cohorts.\n"
                                 "Research use only; not for diagnosis or treatment.",
                     epilog="example:\n  surfacekit demo -o surfacekit-demo\n"
                            "  (then see 'surfacekit COMMAND --help')")
    parser.add_argument("--version", action="version", version=f"surfacekit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for spec in cli_commands.COMMANDS:
        p = sub.add_parser(spec.name, help=spec.help, description=spec.description,
                           epilog="example:\n  " + spec.example,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        spec.arguments(p)
        _add_common(p)
        p.set_defaults(run=spec.run)
    return parser


def _print_summary(ctx: Context, summary: dict) -> None:
    if ctx.args.json:
        print(json.dumps(summary, indent=2, sort_keys=True, default=_json_default))
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


def _json_default(obj):
    import numpy as np

    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    return str(obj)


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return " ".join(text.split())


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``surfacekit`` command; returns the exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    ctx = None
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
        summary = dict(summary or {})
        code = int(summary.pop("exit_code", EXIT_OK))  # e.g. cohort runs with failed subjects
        _print_summary(ctx, summary)
        return code
    except (InputError, SurfaceError, ValueError, FileNotFoundError, IsADirectoryError,
            NotADirectoryError) as exc:
        _cleanup(ctx)
        if debug:
            traceback.print_exc()
        print(f"surfacekit: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        _cleanup(ctx)
        print("surfacekit: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - every other failure is ours
        _cleanup(ctx)
        if debug:
            traceback.print_exc()
        print(f"surfacekit: internal error: {type(exc).__name__}: {_one_line(exc)} "
              "(rerun with --debug for details)", file=sys.stderr)
        return EXIT_INTERNAL


def _cleanup(ctx: Context | None) -> None:
    if ctx is not None:
        ctx.outputs.cleanup()


def _one_line_warning(message, category, filename, lineno, file=None, line=None):
    print(f"surfacekit: warning: {_one_line(message)}", file=sys.stderr)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
