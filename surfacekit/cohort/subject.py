"""The per-subject work of a cohort run, done inside a worker: load, compute, write, release.

Each task reads its input file, computes the per-template-vertex fields and the
scalar row, writes them under ``subjects/<id>/`` atomically and returns only the
small row; large arrays never travel back to the coordinating process.  BLAS and
OpenMP pools are held at one thread while a task runs, so N workers use N cores
and every engine does the same floating-point operations in the same order.
"""
from __future__ import annotations

import gc
import json
import os
import resource
import socket
import sys
import time
import traceback
import warnings
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from ..analysis.workflow import compare
from ..correspondence import AmbiguousMatchWarning, MatchOptions
from ..io.files import atomic_path, load, save, save_fields
from ..io.tables import write_json
from ..mesh.descriptors import laplace_spectrum, spectrum_distance
from ..mesh.eigen import Eigenbasis, eigenbasis
from ..mesh.surface import Surface
from ..preparation import from_segmentation, prepare
from .manifest import VOLUME_SUFFIXES
from .store import open_field_store

STAGES = ("load", "prepare", "descriptors", "match", "change", "write")
# change metrics of the cohort table (column -> change-summary name), taken from the change
# report's own (area-weighted) definitions, so a subject's row equals its change summary; the
# comparison runs template -> subject, so the signed ones name the subject and the template
CHANGE_COLUMNS = {"mean_abs_normal_displacement_mm": "mean_abs_normal_displacement_mm",
                  "max_abs_normal_displacement_mm": "max_abs_normal_displacement_mm",
                  "mean_log_area_ratio_subject_over_template": "mean_log_area_ratio_followup_over_baseline"}
MARKER_SUFFIX = ".done"
# the fields of each subject in the cohort's field store (name -> unit); rows follow the cohort
# table, one chunk per subject and field (see surfacekit.cohort.store)
STORE_FIELDS = {"normal_displacement": "mm, + outward (template -> subject)",
                "log_area_ratio": "ln(subject area / template area) per template vertex",
                "displacement": "mm, subject position minus template position (x, y, z)",
                "match_confidence": "0..1, NaN where the map gives none",
                "laplace_spectrum": "dimensionless (area-normalised eigenvalues)"}


@dataclass(frozen=True)
class SubjectTask:
    """Everything a worker needs for one subject (small and picklable)."""

    index: int              # position in the manifest
    subject: str
    path: str
    label: int | None
    key: str                # cache key (content of input + template + options + version)
    subject_dir: str
    template_file: str      # prepared template, NPZ (exact float64)
    template_key: str
    options: dict           # target_vertices, n_eigenvalues, seed, match (as in the cache key)
    match_options: MatchOptions
    units: str = "mm"       # length unit of a mesh input (enters the cache key)
    field_store: str = ""   # the cohort's field store; row `index` is this subject's


def load_input_surface(path, label: int | None, units: str = "mm") -> Surface:
    """A mesh file through :func:`load` (scaled from `units` to mm) or a label volume through
    :func:`from_segmentation` (placed in mm by its own voxel size; `units` must be mm)."""
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"input file not found: {path}")
    if path.name.lower().endswith(VOLUME_SUFFIXES):
        if label is None:
            raise ValueError(f"label missing for label volume {path.name}")
        if units != "mm":
            raise ValueError(f"units {units!r} given for label volume {path.name}; a volume is "
                             "placed in mm by its own voxel size")
        return from_segmentation(path, label)
    return load(path, units=units)


def prepare_surface(surface: Surface, options: dict) -> Surface:
    """The surface repaired and resampled to ``options["target_vertices"]`` by :func:`prepare`."""
    prepared, _report = prepare(surface, target_vertices=options["target_vertices"])
    return prepared


def shared_eigenbasis(surface: Surface, options: dict, match_options: MatchOptions) -> Eigenbasis:
    """The one eigenbasis of a surface that serves both its spectrum and the matching.

    Asks first for the larger of the two bases (the spectrum needs
    ``n_eigenvalues`` non-zero eigenvalues, one zero eigenvalue per component
    before them; the matching ``match_options.n_eigen`` pairs), so the cache on the
    surface answers the smaller request by truncation and the eigenproblem is
    solved once.  Every process asks in the same order, so every engine gets the
    same bits.
    """
    n_zero = max(1, surface.n_components)
    return eigenbasis(surface, max(int(options["n_eigenvalues"]) + n_zero,
                                   int(match_options.n_eigen)))


def surface_spectrum(surface: Surface, options: dict, match_options: MatchOptions) -> np.ndarray:
    """Laplace spectrum (``n_eigenvalues`` values, dimensionless) from :func:`shared_eigenbasis`."""
    basis = shared_eigenbasis(surface, options, match_options)
    return np.asarray(laplace_spectrum(surface, k=options["n_eigenvalues"], basis=basis),
                      dtype=np.float64)


_TEMPLATE_CACHE: dict = {}


def load_template(task: SubjectTask) -> tuple[Surface, np.ndarray]:
    """The prepared template and its Laplace spectrum, computed once per process.

    Reusing one template object lets its cached eigenbasis serve every subject a
    worker handles; it is solved on first use, by the same request in every
    process (:func:`shared_eigenbasis`), so results do not depend on which worker
    ran what.
    """
    # the options decide the size of the template's eigenbasis, so they are part of the key
    key = (task.template_key, json.dumps(task.options, sort_keys=True))
    if key not in _TEMPLATE_CACHE:
        _TEMPLATE_CACHE.clear()
        with np.load(task.template_file, allow_pickle=False) as data:
            template = Surface(data["vertices"], data["faces"])
        spectrum = surface_spectrum(template, task.options, task.match_options)
        _TEMPLATE_CACHE[key] = (template, spectrum)
    return _TEMPLATE_CACHE[key]


def one_line(exc: BaseException) -> str:
    """``Type: message`` on one line (first line of the message, at most 300 characters)."""
    text = str(exc).strip().splitlines()
    msg = f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__
    return msg[:300]


@contextmanager
def _timed(timings: dict, stage: str):
    """Add the seconds spent inside the block to ``timings[stage]``."""
    tic = time.perf_counter()
    try:
        yield
    finally:
        timings[stage] = timings.get(stage, 0.0) + time.perf_counter() - tic


def _compare(template: Surface, subject: Surface, task: SubjectTask, timings: dict):
    """Template -> subject correspondence and change through the one comparison pipeline."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AmbiguousMatchWarning)  # a table column instead
        comparison = compare(template, subject, options=task.match_options,
                             seed=task.options["seed"], timings=timings)
    return comparison.correspondence, comparison.change


def _compute(task: SubjectTask, timings: dict) -> tuple[Surface, dict, dict]:
    with _timed(timings, "load"):
        raw = load_input_surface(task.path, task.label, task.units)
    n_input = raw.n_vertices
    with _timed(timings, "prepare"):
        subject = prepare_surface(raw, task.options)
    del raw
    with _timed(timings, "descriptors"):
        template, template_spectrum = load_template(task)
        spectrum = surface_spectrum(subject, task.options, task.match_options)
        distance = float(spectrum_distance(template_spectrum, spectrum,
                                           k=task.options["n_eigenvalues"]))
    corr, change = _compare(template, subject, task, timings)
    fields = subject_fields(template, corr, change, spectrum)
    scalars = subject_scalars(subject, corr, change, fields)
    scalars.update(n_vertices_input=int(n_input), spectral_distance=distance)
    return subject, fields, scalars


def subject_fields(template: Surface, corr, change, spectrum: np.ndarray) -> dict:
    """Per-template-vertex arrays of one subject (stored exactly in ``fields.npz``)."""
    fields = {
        "normal_displacement": np.asarray(change.normal_displacement, np.float64),  # (n,) mm, + out
        "log_area_ratio": np.asarray(change.log_area_ratio, np.float64),           # (n,)
        "displacement": np.asarray(change.displacement, np.float64),               # (n, 3) mm
        "target_vertex": np.asarray(corr.source_to_target, np.int64),  # (n,) matched subject vertex
        "laplace_spectrum": spectrum,                                  # (k,) dimensionless
    }
    if corr.confidence is not None:
        fields["match_confidence"] = np.asarray(corr.source_confidence
                                                if corr.source_confidence is not None
                                                else np.full(template.n_vertices, np.nan))
    return fields


def subject_scalars(subject: Surface, corr, change, fields: dict) -> dict:
    """The subject's row of ``cohort_summary.csv`` (without input size and spectral distance)."""
    probe = corr.info.get("rotation_ambiguity") or {}
    metrics = change.metrics()
    return {
        "n_vertices": int(subject.n_vertices),
        "volume_ml": float(subject.volume) / 1000.0,
        "area_mm2": float(subject.area),
        "volume_change_subject_minus_template_ml": float(change.volume_change_ml),
        **{column: metrics[name] for column, name in CHANGE_COLUMNS.items()},
        "mean_match_confidence": (float(np.mean(fields["match_confidence"]))
                                  if "match_confidence" in fields else None),
        # 1: the shapes barely fix a turn of the map (AmbiguousMatchWarning); check this subject
        "match_turn_ambiguous": int(bool(probe.get("ambiguous"))) if probe else None,
        # area share of the template that the subject covers: 1 unless the subject is cropped
        "covered_fraction_of_template": float(change.info.get(
            "overlap_area_fraction", change.info.get("covered_area_fraction", 1.0))),
    }


def store_layout(n_template: int, n_eigenvalues: int) -> dict:
    """Row shape of each :data:`STORE_FIELDS` field for a template of `n_template` vertices."""
    shapes = {"displacement": (n_template, 3), "laplace_spectrum": (n_eigenvalues,)}
    return {name: shapes.get(name, (n_template,)) for name in STORE_FIELDS}


def store_values(fields: dict, layout: dict) -> dict:
    """A subject's :data:`STORE_FIELDS` rows (shapes of :func:`store_layout`) from its
    ``fields.npz`` arrays, so every field of a finished subject is written: NaN confidence
    when the map gave none, a shorter spectrum padded with NaN."""
    values = {name: fields[name] for name in STORE_FIELDS if name in fields}
    values.setdefault("match_confidence", np.full(layout["match_confidence"], np.nan))
    spectrum = np.full(layout["laplace_spectrum"], np.nan)
    given = np.asarray(values["laplace_spectrum"], dtype=np.float64).ravel()[:spectrum.size]
    spectrum[:given.size] = given
    values["laplace_spectrum"] = spectrum
    return values


def write_subject(task: SubjectTask, subject: Surface, fields: dict, scalars: dict) -> None:
    """Write fields (NPZ, exact; and the subject's row of the cohort field store), the
    prepared mesh and the fields on the template (PLY), the row and, last, the completion
    marker."""
    out = Path(task.subject_dir)
    save_fields(out / "fields.npz", **fields)
    if task.field_store:
        store = open_field_store(task.field_store, writable=True)
        store.write_subject(task.index, store_values(fields, store.fields))
    save(subject, out / "prepared.ply")
    template = load_template(task)[0]
    # the change fields as vertex properties of the template mesh, for viewers
    save(template, out / "on_template.ply",
         fields={k: fields[k] for k in ("normal_displacement", "log_area_ratio")})
    write_json(out / "row.json", {"subject": task.subject, "key": task.key, "units": task.units,
                                  "values": scalars})
    with atomic_path(out / f"{task.key}{MARKER_SUFFIX}", suffix=MARKER_SUFFIX) as tmp:
        tmp.write_text(task.key + "\n")


def read_finished(subject_dir, key: str) -> dict | None:
    """The stored row of a subject finished under `key`, or None when it must be computed."""
    out = Path(subject_dir)
    marker = out / f"{key}{MARKER_SUFFIX}"
    row_file = out / "row.json"
    if not (marker.is_file() and row_file.is_file() and (out / "fields.npz").is_file()):
        return None
    try:
        stored = json.loads(row_file.read_text())
    except (OSError, ValueError):
        return None
    return stored["values"] if stored.get("key") == key else None


def peak_rss_mb() -> float:
    """Peak resident memory of this process (MiB).

    Linux: ``VmHWM`` of /proc/self/status (proc(5)), the high-water mark of the
    current address space.  ``getrusage``'s ``ru_maxrss`` is not used there
    because it survives fork+exec and so reports the parent's size in spawned
    workers (getrusage(2): "preserved across an execve").  Elsewhere ru_maxrss
    (KiB on Linux/BSD, bytes on macOS).
    """
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak / (1024.0 * 1024.0 if sys.platform == "darwin" else 1024.0)


def worker_info() -> dict:
    return {"pid": os.getpid(), "host": socket.gethostname(), "peak_rss_mb": peak_rss_mb()}


def record_failure(row: dict, folder: Path, exc: BaseException) -> None:
    """Mark a task's row failed with the one-line error, and keep the traceback in
    ``folder/error.txt`` (call inside the ``except`` block that caught `exc`)."""
    row.update(status="failed", error=one_line(exc), values={})
    try:
        (folder / "error.txt").write_text(traceback.format_exc())
    except OSError:
        pass


def run_subject(task: SubjectTask) -> dict:
    """Compute and store one subject; never raises: failures come back as rows."""
    out = Path(task.subject_dir)
    timings = {s: 0.0 for s in STAGES}
    row = {"index": task.index, "subject": task.subject, "key": task.key, "cached": False}
    start, cpu_start = time.perf_counter(), time.process_time()
    try:
        out.mkdir(parents=True, exist_ok=True)
        for stale in out.glob(f"*{MARKER_SUFFIX}"):
            stale.unlink()
        if task.field_store:  # its row is invalid until this run writes it again
            open_field_store(task.field_store, writable=True).clear_subject(task.index)
        with threadpool_limits(limits=1):
            subject, fields, scalars = _compute(task, timings)
            with _timed(timings, "write"):
                write_subject(task, subject, fields, scalars)
        row.update(status="ok", error="", values=scalars)
        (out / "error.txt").unlink(missing_ok=True)
        del subject, fields
    except Exception as exc:  # noqa: BLE001 - a failing subject must not stop the cohort
        record_failure(row, out, exc)
    gc.collect()
    timings["total"] = time.perf_counter() - start
    # CPU time of this process: with one BLAS thread, the time on an idle core
    timings["cpu"] = time.process_time() - cpu_start
    row["timings"] = timings
    row["worker"] = worker_info()
    try:  # informative only (never compared): time per stage and the worker's peak memory
        write_json(out / "timings.json", {**timings, **row["worker"]})
    except OSError:
        pass
    return row
