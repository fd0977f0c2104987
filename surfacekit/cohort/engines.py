"""Engines that run cohort tasks: in-process, local processes, or a Dask cluster.

Every engine calls the same :func:`surfacekit.cohort.subject.run_subject` and
yields its small result rows in completion order; the caller orders them by
manifest position, so the tables never depend on the engine or on timing.
"""
from __future__ import annotations

import ast
import inspect
import json
import multiprocessing
import os
import signal
import subprocess
import sys
import tempfile
import time
import uuid
from collections.abc import Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from contextlib import contextmanager
from pathlib import Path

from threadpoolctl import threadpool_limits

from .subject import SubjectTask, one_line, run_subject

_BLAS_LIMIT = None


def pin_blas_threads(n_threads: int = 1) -> None:
    """Process initializer: hold BLAS/OpenMP pools at `n_threads` for the worker's lifetime.

    N workers on N cores would otherwise each start one BLAS thread per core and
    oversubscribe the machine (common practice for process pools over NumPy code).
    """
    global _BLAS_LIMIT
    _BLAS_LIMIT = threadpool_limits(limits=n_threads)


def _failure(task: SubjectTask, exc: BaseException) -> dict:
    return {"index": task.index, "subject": task.subject, "key": task.key, "cached": False,
            "status": "failed", "error": one_line(exc), "values": {}, "timings": {},
            "worker": {}}


class UnguardedScriptError(RuntimeError):
    """Worker processes would re-run the calling script (no ``if __name__ == "__main__":``)."""


def guarded_lines(source: str) -> list[tuple[int, int]]:
    """Line ranges of the top-level ``if __name__ == "__main__":`` blocks of a script."""
    ranges = []
    for node in ast.parse(source).body:
        test = getattr(node, "test", None)
        if not (isinstance(node, ast.If) and isinstance(test, ast.Compare) and len(test.comparators) == 1
                and isinstance(test.ops[0], ast.Eq)):
            continue
        sides = [test.left, test.comparators[0]]
        names = {s.id for s in sides if isinstance(s, ast.Name)}
        texts = {s.value for s in sides if isinstance(s, ast.Constant)}
        if names == {"__name__"} and texts == {"__main__"}:
            ranges.append((node.body[0].lineno, node.end_lineno or node.lineno))
    return ranges


def check_main_guard(what: str) -> None:
    """Raise :class:`UnguardedScriptError` when called from the top level of an unguarded script.

    Local worker processes start with the "spawn" method, which imports the main
    script again in every worker (Python documentation, ``multiprocessing``,
    "Programming guidelines: safe importing of main module"); a call at the
    script's top level would then run again in each worker, which fails the pool.
    The check walks the call stack to the script's module-level frame and looks,
    in the script's syntax tree, whether that line lies inside an
    ``if __name__ == "__main__":`` block.  Interactive sessions and ``python -c``
    have no script file and pass.
    """
    main = sys.modules.get("__main__")
    script = getattr(main, "__file__", None)
    if not script or not str(script).endswith(".py"):
        return
    frame = inspect.currentframe()
    line = None
    while frame is not None:
        if frame.f_code.co_name == "<module>" and frame.f_globals is vars(main):
            line = frame.f_lineno
        frame = frame.f_back
    if line is None:
        return
    try:
        ranges = guarded_lines(Path(script).read_text(encoding="utf-8"))
    except (OSError, SyntaxError, UnicodeDecodeError, ValueError):
        return
    if not any(lo <= line <= hi for lo, hi in ranges):
        raise UnguardedScriptError(
            f"{what} is called at the top level of {Path(script).name} (line {line}), which every "
            "worker process imports again: put the call under 'if __name__ == \"__main__\":' "
            "(or use workers=1)")


def run_serial(tasks: Sequence[SubjectTask], worker=run_subject) -> Iterator[dict]:
    """In-process engine (``workers=1``): one task after the other."""
    for task in tasks:
        yield worker(task)


def run_processes(tasks: Sequence[SubjectTask], workers: int, *,
                  max_tasks_per_worker: int | None = None, worker=run_subject) -> Iterator[dict]:
    """Local process pool with the "spawn" start method.

    Spawned workers start clean (forking a process whose BLAS threads already run can
    deadlock).  At most ``2 * workers`` tasks are queued at a time, so a huge cohort
    never holds all its pending tasks in the pool's queues.  A worker that dies
    (e.g. killed for memory) fails only the tasks it held; the pool is rebuilt for the rest.
    """
    pending = list(tasks)[::-1]
    while pending:
        ctx = multiprocessing.get_context("spawn")
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx,
                                   initializer=pin_blas_threads,
                                   max_tasks_per_child=max_tasks_per_worker)
        running: dict = {}
        broken = False
        try:
            while (pending or running) and not broken:
                while pending and len(running) < 2 * workers:
                    task = pending.pop()
                    running[pool.submit(worker, task)] = task
                done, _ = wait(running, return_when=FIRST_COMPLETED)
                for fut in done:
                    task = running.pop(fut)
                    try:
                        yield fut.result()
                    except Exception as exc:  # noqa: BLE001 - BrokenProcessPool: the worker died
                        yield _failure(task, exc)
                        broken = True
            if broken:  # tasks still queued were lost with the pool: run them again
                pending.extend(running.values())
                pending.sort(key=lambda t: -t.index)
        finally:
            pool.shutdown(wait=True, cancel_futures=True)


def run_dask(tasks: Sequence[SubjectTask], scheduler: str, worker=run_subject) -> Iterator[dict]:
    """Dask distributed engine: one task per subject on the cluster at `scheduler`.

    Workers must see ``output_dir`` and the input files at the same paths (a
    shared file system).  BLAS threads are pinned inside each task.
    """
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise ImportError("the Dask engine needs the 'cluster' extra: "
                          "pip install 'surfacekit[cluster]'") from None
    token = uuid.uuid4().hex[:8]  # never pick up a result another run left on the scheduler
    with Client(scheduler, timeout="30s") as client:
        futures = client.map(worker, list(tasks), pure=False,
                             key=[f"surfacekit-{t.subject}-{t.key}-{token}" for t in tasks])
        by_key = {f.key: t for f, t in zip(futures, tasks)}
        try:
            for fut in as_completed(futures):
                task = by_key[fut.key]
                try:
                    yield fut.result()
                except Exception as exc:  # noqa: BLE001 - KilledWorker, lost worker, ...
                    yield _failure(task, exc)
                fut.release()
        finally:
            client.cancel([f for f in futures if not f.done()])


def run_tasks(tasks: Sequence[SubjectTask], *, workers: int = 1, scheduler: str | None = None,
              max_tasks_per_worker: int | None = None, worker=run_subject) -> Iterator[dict]:
    """Pick the engine: Dask when `scheduler` is given, else processes when ``workers > 1``.

    `worker` is the module-level function run on each task (default: one subject's
    template comparison; a series of scans has its own, which never raises either).
    """
    if not tasks:
        return iter(())
    if scheduler:
        return run_dask(tasks, scheduler, worker)
    if workers > 1:
        return run_processes(tasks, workers, max_tasks_per_worker=max_tasks_per_worker,
                             worker=worker)
    return run_serial(tasks, worker)


def engine_name(workers: int, scheduler: str | None) -> str:
    if scheduler:
        return f"dask:{scheduler}"
    return f"processes:{workers}" if workers > 1 else "in-process"


def _stop_processes(procs: list[subprocess.Popen]) -> None:
    """SIGTERM each started process group, then SIGKILL what is still alive after 20 s."""
    for p in procs:
        if p.poll() is None:
            os.killpg(p.pid, signal.SIGTERM)
    for p in procs:
        try:
            p.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(p.pid, signal.SIGKILL)
            p.wait(timeout=10)


@contextmanager
def loopback_cluster(n_workers: int = 2, *, timeout: float = 120.0, log_dir=None):
    """A Dask scheduler plus `n_workers` single-threaded workers on 127.0.0.1; yields the address.

    Each is a separate process (``python -m distributed.cli.dask_scheduler`` /
    ``dask_worker``), as on a real cluster; all are stopped on exit.  For trying
    the Dask engine on one machine and for the tests.
    """
    try:
        import distributed
    except ImportError:
        raise ImportError("a Dask cluster needs the 'cluster' extra: "
                          "pip install 'surfacekit[cluster]'") from None
    with tempfile.TemporaryDirectory(prefix="sk-dask-") as tmp:
        logs = Path(log_dir or tmp)
        scheduler_file = Path(tmp) / "scheduler.json"
        procs: list[subprocess.Popen] = []

        def start(args: list[str], name: str) -> None:
            with open(logs / f"{name}.log", "wb") as log:
                procs.append(subprocess.Popen([sys.executable, "-m", *args], stdout=log,
                                              stderr=subprocess.STDOUT, start_new_session=True))

        try:
            start(["distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", "0",
                   "--no-dashboard", "--scheduler-file", str(scheduler_file)], "scheduler")
            deadline = time.monotonic() + timeout
            while not (scheduler_file.is_file() and scheduler_file.read_text().strip()):
                if procs[0].poll() is not None or time.monotonic() > deadline:
                    raise RuntimeError("Dask scheduler did not start; log: "
                                       + (logs / "scheduler.log").read_text()[-500:])
                time.sleep(0.2)
            address = json.loads(scheduler_file.read_text())["address"]
            for i in range(n_workers):
                start(["distributed.cli.dask_worker", address, "--host", "127.0.0.1",
                       "--nthreads", "1", "--no-dashboard", "--name", f"worker-{i}"],
                      f"worker-{i}")
            with distributed.Client(address, timeout=f"{int(timeout)}s") as client:
                client.wait_for_workers(n_workers, timeout=timeout)
            yield address
        finally:
            _stop_processes(procs)
