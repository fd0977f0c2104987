"""What every subcommand of ``surfacekit`` shares: exit codes, the input error, staged
outputs, the per-command context and the command record.

Exit codes: 0 success, 2 bad input (one line on stderr, no traceback, nothing
written), 1 internal error (one line; ``--debug`` shows the traceback), 3 a cohort
run in which some (not all) subjects failed.
Outputs are staged beside their destination and moved into place only when the
whole command succeeded; an existing output is replaced only with ``--force``.
"""
from __future__ import annotations

import argparse
import errno
import os
import shutil
import sys
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT = 0, 1, 2
#: `cohort` when some (not all) subjects failed; their rows in the summary hold the errors
EXIT_SOME_FAILED = 3


class InputError(ValueError):
    """Bad input given on the command line (exit code 2)."""


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
        parent = writable_folder(final.parent if str(final.parent) else Path("."), final)
        try:
            stage_dir = Path(tempfile.mkdtemp(prefix=f".{final.name}.", suffix=".part", dir=parent))
        except OSError as exc:
            raise InputError(f"cannot write output {final}: {why_unwritable(exc, parent)}") from None
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


def why_unwritable(exc: OSError, folder: Path) -> str:
    """Plain words for an OSError met while creating or writing in `folder`."""
    for p in (folder, *folder.parents):
        if p.exists() and not p.is_dir():
            return f"{p} is a file, not a folder"
    if exc.errno in (errno.EACCES, errno.EPERM):
        return f"no permission to write in {folder}"
    if exc.errno == errno.EROFS:
        return f"{folder} is on a read-only file system"
    if exc.errno == errno.ENOSPC:
        return f"no space left on the device of {folder}"
    return exc.strerror or type(exc).__name__


def writable_folder(folder: Path, output: Path | None = None) -> Path:
    """Create `folder` if needed; an InputError in plain words when it cannot hold outputs."""
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot write output {output or folder}: {why_unwritable(exc, folder)}") from None
    if not os.access(folder, os.W_OK | os.X_OK):
        raise InputError(f"cannot write output {output or folder}: no permission to write in {folder}")
    return folder


def emit(message: str, stream=None) -> None:
    """Print one message; a reader that closed the pipe (``| head``) is not an error."""
    stream = sys.stderr if stream is None else stream
    try:
        print(message, file=stream, flush=True)
    except BrokenPipeError:
        silence(stream)


def silence(stream) -> None:
    """Point a closed stream at /dev/null, so later writes and the flush at exit stay quiet."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, stream.fileno())
        os.close(devnull)
    except (OSError, ValueError):  # not a real file descriptor (e.g. captured in tests)
        pass


class Context:
    """What every command gets: options, output staging, messages and progress bars."""

    def __init__(self, args: argparse.Namespace):
        self.args = args
        self.quiet = bool(getattr(args, "quiet", False))
        self.outputs = Outputs(bool(getattr(args, "force", False)))

    def say(self, message: str) -> None:
        if not self.quiet:
            emit(message)

    def progress(self, total: int, desc: str):
        """A tqdm bar on stderr, silent with --quiet or when stderr is not a terminal."""
        from tqdm.auto import tqdm

        return tqdm(total=total, desc=desc, unit="step", leave=False,
                    disable=self.quiet or not sys.stderr.isatty())


@dataclass
class Command:
    """One subcommand: its help texts, its arguments and the function that runs it."""

    name: str
    help: str
    description: str
    example: str
    arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[Context], dict]
