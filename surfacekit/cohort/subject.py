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
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .manifest import VOLUME_SUFFIXES
from ..io.files import atomic_path, save_fields

STAGES = ("load", "prepare", "descriptors", "match", "change", "write")
MARKER_SUFFIX = ".done"


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
    options: dict


def save_npz_deterministic(path, arrays: dict) -> Path:
    """Arrays to an NPZ atomically, with byte-reproducible zip members."""
    return save_fields(path, **arrays)


def write_json(path, payload: dict) -> None:
    with atomic_path(Path(path), suffix=".json") as tmp:
        tmp.write_text(json.dumps(payload, indent=1, sort_keys=True) + "\n")


def load_input_surface(path, label: int | None):
    """A mesh file through ``sk.load`` or a label volume through ``sk.from_segmentation``."""
    import surfacekit as sk

    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"input file not found: {path}")
    if path.name.lower().endswith(VOLUME_SUFFIXES):
        if label is None:
            raise ValueError(f"label missing for label volume {path.name}")
        return sk.from_segmentation(path, label)
    return sk.load(path)


def prepare_surface(surface, options: dict):
    import surfacekit as sk

    prepared, _report = sk.prepare(surface, target_vertices=options["target_vertices"])
    return prepared


def subject_spectrum(surface, options: dict) -> np.ndarray:
    import surfacekit as sk

    return np.asarray(sk.laplace_spectrum(surface, k=options["n_eigenvalues"]), dtype=np.float64)


_TEMPLATE_CACHE: dict = {}


def load_template(template_file: str, template_key: str):
    """The prepared template and its spectrum, kept per process.

    Reusing one template object lets its cached eigenbasis serve every subject a
    worker handles; the eigenbasis cache returns the same arrays for the same
    sequence of requests, so results do not depend on which worker ran what.
    """
    from ..mesh.surface import Surface

    if template_key not in _TEMPLATE_CACHE:
        _TEMPLATE_CACHE.clear()
        with np.load(template_file, allow_pickle=False) as data:
            template = Surface(data["vertices"], data["faces"])
            spectrum = np.array(data["laplace_spectrum"])
        _TEMPLATE_CACHE[template_key] = (template, spectrum)
    return _TEMPLATE_CACHE[template_key]


def one_line(exc: BaseException) -> str:
    """``Type: message`` on one line (first line of the message, at most 300 characters)."""
    text = str(exc).strip().splitlines()
    msg = f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__
    return msg[:300]


def _compute(task: SubjectTask, timings: dict):
    import surfacekit as sk

    opts = task.options
    tic = time.perf_counter()
    raw = load_input_surface(task.path, task.label)
    n_input = raw.n_vertices
    timings["load"] = time.perf_counter() - tic

    tic = time.perf_counter()
    subject = prepare_surface(raw, opts)
    del raw
    timings["prepare"] = time.perf_counter() - tic

    template, template_spectrum = load_template(task.template_file, task.template_key)
    tic = time.perf_counter()
    spectrum = subject_spectrum(subject, opts)
    spectral_distance = float(sk.spectrum_distance(template_spectrum, spectrum, k=opts["n_eigenvalues"]))
    timings["descriptors"] = time.perf_counter() - tic

    tic = time.perf_counter()
    with warnings.catch_warnings():  # recorded in the table instead of printed per subject
        warnings.simplefilter("ignore", sk.AmbiguousMatchWarning)
        corr = sk.match(template, subject, seed=opts["seed"])
    probe = corr.info.get("rotation_ambiguity") or {}
    timings["match"] = time.perf_counter() - tic

    tic = time.perf_counter()
    rep = sk.measure_change(template, subject, corr=corr, seed=opts["seed"])
    timings["change"] = time.perf_counter() - tic

    nd = np.asarray(rep.normal_displacement, dtype=np.float64)
    lar = np.asarray(rep.log_area_ratio, dtype=np.float64)
    fields = {
        "normal_displacement": nd,                                   # (n_template,) mm, + outward
        "log_area_ratio": lar,                                       # (n_template,)
        "displacement": np.asarray(rep.displacement, np.float64),    # (n_template, 3) mm
        "target_vertex": np.asarray(corr.source_to_target, np.int64),  # subject vertex per template vertex
        "laplace_spectrum": spectrum,                                            # (k,) dimensionless
    }
    if corr.confidence is not None:
        fields["match_confidence"] = np.asarray(corr.source_confidence
                                                if corr.source_confidence is not None
                                                else np.full(template.n_vertices, np.nan))
    abs_nd = np.abs(nd)
    scalars = {
        "n_vertices_input": int(n_input),
        "n_vertices": int(subject.n_vertices),
        "volume_ml": float(subject.volume) / 1000.0,
        "area_mm2": float(subject.area),
        "volume_change_ml": float(rep.volume_change_ml),
        "mean_abs_normal_displacement_mm": float(abs_nd.mean()),
        "max_abs_normal_displacement_mm": float(abs_nd.max()),
        "mean_log_area_ratio": float(lar.mean()),
        "spectral_distance": spectral_distance,
        "mean_match_confidence": (float(np.mean(fields["match_confidence"]))
                                  if "match_confidence" in fields else None),
        # 1: the shapes barely fix a turn of the map (sk.AmbiguousMatchWarning); check this subject
        "match_turn_ambiguous": int(bool(probe.get("ambiguous"))) if probe else None,
    }
    return subject, fields, scalars


def write_subject(task: SubjectTask, subject, fields: dict, scalars: dict, timings: dict) -> None:
    """Write fields (NPZ, exact), the prepared mesh and the fields on the template (PLY),
    the row and, last, the completion marker."""
    import surfacekit as sk

    out = Path(task.subject_dir)
    save_npz_deterministic(out / "fields.npz", fields)
    sk.save(subject, out / "prepared.ply")
    template = load_template(task.template_file, task.template_key)[0]
    # the change fields as vertex properties of the template mesh, for viewers
    sk.save(template, out / "on_template.ply",
            fields={k: fields[k] for k in ("normal_displacement", "log_area_ratio")})
    write_json(out / "row.json", {"subject": task.subject, "key": task.key, "values": scalars})
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


def run_subject(task: SubjectTask) -> dict:
    """Compute and store one subject; never raises: failures come back as rows."""
    from threadpoolctl import threadpool_limits

    out = Path(task.subject_dir)
    timings = {s: 0.0 for s in STAGES}
    row = {"index": task.index, "subject": task.subject, "key": task.key, "cached": False}
    start, cpu_start = time.perf_counter(), time.process_time()
    try:
        out.mkdir(parents=True, exist_ok=True)
        for stale in out.glob(f"*{MARKER_SUFFIX}"):
            stale.unlink()
        with threadpool_limits(limits=1):
            subject, fields, scalars = _compute(task, timings)
            tic = time.perf_counter()
            write_subject(task, subject, fields, scalars, timings)
            timings["write"] = time.perf_counter() - tic
        row.update(status="ok", error="", values=scalars)
        (out / "error.txt").unlink(missing_ok=True)
        del subject, fields
    except Exception as exc:  # noqa: BLE001 - a failing subject must not stop the cohort
        row.update(status="failed", error=one_line(exc), values={})
        try:
            (out / "error.txt").write_text(traceback.format_exc())
        except OSError:
            pass
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
