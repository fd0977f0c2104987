"""Cohorts at scale: the per-subject pipeline over a manifest, locally or on a Dask cluster.

For each subject of a cohort manifest (see :mod:`surfacekit.cohort.manifest`):
load the mesh or label volume -> ``prepare`` -> Laplace spectrum -> ``match`` to
the template -> ``measure_change`` (fields per template vertex); results are
written under ``output_dir/subjects/<id>/`` and marked done under a key derived
from the input bytes, template, options (including the ``MatchOptions``) and
package version, so a re-run skips finished subjects, an interrupted run resumes
and changed options recompute.  Then the cohort tables are
written in manifest order (``cohort_summary.csv``, ``group_test.csv``, and
``cohort_fields.npz`` for cohorts small enough), byte-identical whatever the engine
or completion order.  Each worker also writes its subject's per-template-vertex
fields into ``cohort_fields.zarr`` as it finishes (one chunk per subject and field,
rows in manifest order; see :mod:`surfacekit.cohort.store`); the group test reads
that store chunk by chunk, so its memory does not grow with the cohort.

Layout of ``output_dir``::

    template/template.npz (vertices, faces), template.ply, <key>.done
    subjects/<id>/fields.npz, prepared.ply, on_template.ply, row.json, timings.json, <key>.done
    cohort_fields.zarr/ (the field store)  cohort_summary.csv  group_test.csv  run_summary.json
    cohort_fields.npz (export of the store while subjects x vertices <= NPZ_EXPORT_MAX_VALUES)

The research-use note of :data:`surfacekit.io.tables.RESEARCH_NOTE` applies.
"""
from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits
from tqdm.auto import tqdm

from ..correspondence import MatchOptions
from ..io.files import save, save_fields
from ..io.tables import write_json
from ..version import __version__
from .engines import check_main_guard, engine_name, run_tasks
from .manifest import Manifest, ManifestEntry, cache_key, file_digest, read_manifest
from .series_tables import run_series_stage, series_lines
from .store import FieldStore, create_field_store
from .subject import (
    MARKER_SUFFIX,
    STAGES,
    STORE_FIELDS,
    SubjectTask,
    load_input_surface,
    prepare_surface,
    read_finished,
    store_layout,
    store_values,
)
from .tables import check_covariate_names, write_fields_matrix, write_group_test, write_summary

logger = logging.getLogger(__name__)
STORE_NAME = "cohort_fields.zarr"
# cohort_fields.npz is exported from the store up to this many values per per-vertex matrix
# (e.g. 2,500 subjects x 20,000 vertices: 400 MB per field); larger cohorts keep the store only
NPZ_EXPORT_MAX_VALUES = 50_000_000

__all__ = ["CohortFailedError", "CohortResult", "read_manifest", "run_cohort"]


@dataclass
class CohortResult:
    """What a cohort run did.  Rows are in manifest order.

    Attributes
    ----------
    output_dir : folder of the run
    rows : list of dicts (subject, status ``ok``/``failed``, error, cached, values, timings)
    n_computed, n_cached, n_failed : subjects computed in this run, reused from an
        earlier run, and failed (failed subjects are retried by the next run)
    wall_seconds : time of the whole run (s)
    stage_seconds : time per stage summed over the subjects computed in this run (s);
        ``"cpu"`` is their CPU time (s), the time on idle cores when the machine is shared
    peak_rss_mb : peak resident memory per worker process (MiB), keyed ``host:pid``
    tables : paths of the cohort tables written
    group_test : what the group test compared (``group_test.json``): groups, contrast,
        ``covariates_used`` and ``covariates_dropped`` (name and reason); empty without a test
    """

    output_dir: Path
    engine: str
    rows: list[dict]
    n_computed: int
    n_cached: int
    n_failed: int
    wall_seconds: float
    stage_seconds: dict = field(default_factory=dict)
    peak_rss_mb: dict = field(default_factory=dict)
    tables: dict = field(default_factory=dict)
    group_test: dict = field(default_factory=dict)
    series: list = field(default_factory=list)   # series manifests: per subject, status and error

    @property
    def n_subjects(self) -> int:
        return len(self.rows)

    @property
    def failed(self) -> list[tuple[str, str]]:
        """(subject, one-line error) for each failed subject, in manifest order."""
        return [(r["subject"], r["error"]) for r in self.rows if r["status"] != "ok"]

    @property
    def subjects_per_minute(self) -> float:
        return 60.0 * self.n_computed / self.wall_seconds if self.wall_seconds > 0 else 0.0

    def summary(self) -> str:
        """A few human-readable lines: counts, speed, time per stage, failures."""
        lines = [(f"cohort: {self.n_subjects} subjects ({self.n_computed} computed, "
                 f"{self.n_cached} reused, {self.n_failed} failed) on {self.engine} in "
                 f"{self.wall_seconds:.1f} s ({self.subjects_per_minute:.1f} subjects/min)")]
        if self.n_computed:
            per = ", ".join(f"{s} {self.stage_seconds.get(s, 0.0) / self.n_computed:.2f}"
                            for s in STAGES)
            cpu = self.stage_seconds.get("cpu", 0.0) / self.n_computed
            lines.append(f"mean time per computed subject (s): {per}; CPU {cpu:.2f}")
        if self.peak_rss_mb:
            lines.append(f"peak memory per worker: {max(self.peak_rss_mb.values()):.0f} MiB "
                         f"(max over {len(self.peak_rss_mb)} worker processes)")
        lines += covariate_lines(self.group_test) + series_lines(self.series)
        for subject, error in self.failed[:20]:
            lines.append(f"failed {subject}: {error}")
        if self.n_failed > 20:
            lines.append(f"... and {self.n_failed - 20} more failures (see cohort_summary.csv)")
        lines.append(f"tables: {', '.join(str(p) for p in self.tables.values())}")
        return "\n".join(lines)


class CohortFailedError(RuntimeError):
    """Every subject of a cohort run failed; ``.result`` holds the :class:`CohortResult`.

    The tables are written before it is raised, so ``cohort_summary.csv`` lists
    each subject's error.
    """

    def __init__(self, result: CohortResult):
        subject, error = result.failed[0]
        super().__init__(f"every one of the {result.n_subjects} cohort subjects failed; first: "
                         f"{subject}: {error} (each error is in "
                         f"{result.output_dir / 'cohort_summary.csv'})")
        self.result = result


def _digest_or_marker(path: Path) -> str:
    try:
        return file_digest(path)
    except OSError:  # missing/unreadable: the worker reports the error for this subject
        return "unreadable"


def pipeline_options(target_vertices: int | None, n_eigenvalues: int, seed: int,
                     match_options: MatchOptions) -> dict:
    """The options that enter the per-subject computation (and so the cache keys)."""
    return {"target_vertices": None if target_vertices is None else int(target_vertices),
            "n_eigenvalues": int(n_eigenvalues), "seed": int(seed),
            "match": match_options.to_dict()}


def prepare_template(entry: ManifestEntry, out: Path, options: dict) -> tuple[Path, str, int]:
    """Prepare the template once (in this process) and store it exactly (NPZ, float64).

    Its eigenbasis and spectrum are computed by the workers, once per process, on
    first use.  Bad template input raises (SurfaceError / ValueError): without a
    template no subject can be processed.
    """
    if not entry.path.is_file():
        raise ValueError(f"template not found: {entry.path}")
    # only the resampling shapes the stored template; every other option enters the subject keys
    key = cache_key(input_digest=file_digest(entry.path), label=entry.label, template_key="",
                    options={"target_vertices": options["target_vertices"],
                             "units": entry.units},
                    version=__version__)
    tdir = out / "template"
    tfile = tdir / "template.npz"
    if not ((tdir / f"{key}{MARKER_SUFFIX}").is_file() and tfile.is_file()):
        tdir.mkdir(parents=True, exist_ok=True)
        for stale in tdir.glob(f"*{MARKER_SUFFIX}"):
            stale.unlink()
        with threadpool_limits(limits=1):  # same arithmetic as in the pinned workers
            template = prepare_surface(load_input_surface(entry.path, entry.label, entry.units),
                                       options)
        save_fields(tfile, vertices=template.vertices, faces=template.faces)
        save(template, tdir / "template.ply")
        (tdir / f"{key}{MARKER_SUFFIX}").write_text(key + "\n")
    with np.load(tfile, allow_pickle=False) as data:
        n_template = int(data["vertices"].shape[0])
    return tfile, key, n_template


def _fill_store(store: FieldStore, i: int, sdir: Path, complete: bool) -> bool:
    """Copy a finished subject's fields into its store row unless that row is `complete`
    (a store made after the subject was, or for a changed manifest); False if unreadable."""
    if complete:
        return True
    try:
        with np.load(sdir / "fields.npz", allow_pickle=False) as data:
            fields = {k: data[k] for k in data.files}
        store.write_subject(i, store_values(fields, store.fields))
    except (OSError, ValueError, KeyError):
        return False
    return True


def _plan(man: Manifest, out: Path, template: tuple[Path, str], options: dict,
          match_options: MatchOptions, force: bool,
          store: FieldStore) -> tuple[list, list[SubjectTask]]:
    """Rows of subjects finished under their current key (their store rows complete), and
    tasks for the others."""
    tfile, tkey = template
    rows: list[dict | None] = [None] * len(man.subjects)
    tasks: list[SubjectTask] = []
    complete = store.written()
    for i, entry in enumerate(man.subjects):
        sdir = out / "subjects" / entry.subject
        key = cache_key(input_digest=_digest_or_marker(entry.path), label=entry.label,
                        template_key=tkey, options={**options, "units": entry.units},
                        version=__version__)
        stored = None if force else read_finished(sdir, key)
        if stored is not None and _fill_store(store, i, sdir, bool(complete[i])):
            rows[i] = {"index": i, "subject": entry.subject, "key": key, "cached": True,
                       "status": "ok", "error": "", "values": stored}
        else:
            tasks.append(SubjectTask(index=i, subject=entry.subject, path=str(entry.path),
                                     label=entry.label, key=key, subject_dir=str(sdir),
                                     template_file=str(tfile), template_key=tkey,
                                     options=options, match_options=match_options,
                                     units=entry.units, field_store=str(store.path)))
    return rows, tasks


def _collect(results, rows: list, total: int, n_done: int, progress: bool) -> tuple[dict, dict]:
    """Place each finished row at its manifest position; sum stage times, track peak memory."""
    stage_seconds = {s: 0.0 for s in (*STAGES, "cpu")}
    peak: dict[str, float] = {}
    bar = (tqdm(total=total, initial=n_done, unit="subject", desc="cohort", dynamic_ncols=True)
           if progress else None)
    n_failed_live = 0
    try:
        for row in results:
            rows[row["index"]] = row
            for s in (*STAGES, "cpu"):
                stage_seconds[s] += float(row.get("timings", {}).get(s, 0.0))
            w = row.get("worker") or {}
            if w:
                tag = f"{w['host']}:{w['pid']}"
                peak[tag] = max(peak.get(tag, 0.0), float(w["peak_rss_mb"]))
            n_failed_live += row["status"] != "ok"
            if bar is not None:
                bar.update(1)
                if n_failed_live:
                    bar.set_postfix(failed=n_failed_live)
    finally:
        if bar is not None:
            bar.close()
    return stage_seconds, peak


def covariate_lines(info: dict) -> list[str]:
    """The group test's contrast and covariates in one line (empty without a test)."""
    if not info:
        return []
    used = ", ".join(info["covariates_used"]) or "none"
    dropped = ", ".join(d["name"] for d in info["covariates_dropped"])
    return [f"group test: {info['t_column']} ({info['contrast']}); covariates used: {used}"
            + (f"; not used: {dropped} (reasons in group_test.json)" if dropped else "")]


def _write_tables(out: Path, man: Manifest, rows: list[dict], store: FieldStore, options: dict,
                  *, n_permutations: int) -> tuple[dict, dict]:
    """The cohort tables, in manifest order, and the group test's info; a stale group test
    of an earlier run is removed, and so is a stale NPZ export."""
    tables = {"summary": write_summary(out / "cohort_summary.csv", man, rows),
              "field_store": store.path}
    npz = out / "cohort_fields.npz"
    if store.n_subjects * store.fields["normal_displacement"][0] <= NPZ_EXPORT_MAX_VALUES:
        tables["fields"] = write_fields_matrix(npz, man, rows, store)
    else:
        npz.unlink(missing_ok=True)
    group_file = out / "group_test.csv"
    try:
        written = write_group_test(group_file, man, rows, store,
                                   n_permutations=n_permutations, seed=options["seed"])
    except ValueError as exc:  # e.g. fields identical across subjects: keep the other tables
        logger.warning("cohort: no group test: %s", exc)
        written = None
    if written is not None:
        tables["group_test"], info = written
        return tables, info
    for stale in (group_file, group_file.with_suffix(".json")):  # an earlier run's test would mislead
        stale.unlink(missing_ok=True)
    return tables, {}


def run_cohort(manifest, output_dir, template=None, *, workers: int = 1,
               scheduler: str | None = None, target_vertices: int | None = 5000,
               n_eigenvalues: int = 50, n_permutations: int = 5000, seed: int = 0,
               match_options: MatchOptions | None = None, progress: bool = True,
               force: bool = False, max_tasks_per_worker: int | None = None,
               units: str = "mm") -> CohortResult:
    """Run the per-subject pipeline over a cohort manifest and write the cohort tables.

    Parameters
    ----------
    manifest : path of the cohort CSV (``subject,path,label,group,role,age,sex``)
    output_dir : folder for results (created); re-running on it reuses finished subjects
    template : optional template surface path, overriding the manifest's template row
    workers : 1 runs in this process; N > 1 uses N local processes ("spawn")
    scheduler : address of a Dask scheduler (e.g. ``tcp://10.0.0.5:8786``); the
        workers must see `output_dir` and the inputs at the same paths
    target_vertices : vertex count every surface is resampled to by ``prepare``
    n_eigenvalues : length of the Laplace spectrum (non-zero eigenvalues)
    n_permutations : permutations of the vertex-wise group test
    seed : seed of matching, change measures and the group test
    match_options : settings of ``match`` from the template to each subject (default
        ``MatchOptions()``); part of the cache key and of ``run_summary.json``.
        Landmark vertex indices refer to the prepared template and the prepared
        subject, so they suit cohorts whose surfaces are not resampled.
    progress : show a progress bar over subjects (stderr)
    force : recompute every subject even when a finished result exists
    max_tasks_per_worker : restart a local worker process after this many subjects
    units : length unit of mesh files whose manifest ``units`` cell is blank or absent
        (mm, cm, m, or mm per file unit; see :func:`surfacekit.io.units.parse_units`)

    Returns
    -------
    CohortResult
        ``.n_failed`` subjects failed (recorded with their one-line error in
        ``cohort_summary.csv``); the others completed.

    Raises
    ------
    ValueError
        Bad manifest, missing or unreadable template, bad arguments.
    UnguardedScriptError
        ``workers > 1`` called from the top level of a script without
        ``if __name__ == "__main__":`` (each worker would run the script again).
    CohortFailedError
        Every subject failed (the tables are written first; ``.result`` holds them).
    """
    if int(workers) < 1:
        raise ValueError(f"workers must be >= 1, got {workers}")
    if target_vertices is not None and int(target_vertices) < 100:
        raise ValueError(f"target_vertices must be >= 100, got {target_vertices}")
    match_options = MatchOptions() if match_options is None else match_options
    if not isinstance(match_options, MatchOptions):
        raise ValueError("match_options must be a MatchOptions, got "  # noqa: TRY004  house rule: bad options are ValueError
                         f"{type(match_options).__name__}")
    match_options.validate()
    if int(workers) > 1 and not scheduler:
        check_main_guard(f"run_cohort(workers={int(workers)})")
    start = time.perf_counter()
    man: Manifest = read_manifest(manifest, template=template, units=units)
    check_covariate_names(man)
    out = Path(output_dir)
    (out / "subjects").mkdir(parents=True, exist_ok=True)
    options = pipeline_options(target_vertices, n_eigenvalues, seed, match_options)
    tfile, tkey, n_template = prepare_template(man.template, out, options)
    store = create_field_store(out / STORE_NAME, [e.subject for e in man.subjects],
                               store_layout(n_template, options["n_eigenvalues"]),
                               units=STORE_FIELDS)
    rows, tasks = _plan(man, out, (tfile, tkey), options, match_options, force, store)
    results = run_tasks(tasks, workers=int(workers), scheduler=scheduler,
                        max_tasks_per_worker=max_tasks_per_worker)
    stage_seconds, peak = _collect(results, rows, len(man.subjects),
                                   len(man.subjects) - len(tasks), progress)
    tables, group_info = _write_tables(out, man, rows, store, options,
                           n_permutations=int(n_permutations))
    series = run_series_stage(man, out, rows, tables, options, match_options, force=force,
                              workers=int(workers), scheduler=scheduler, n_template=n_template,
                              max_tasks_per_worker=max_tasks_per_worker,
                              n_permutations=int(n_permutations))
    result = CohortResult(
        output_dir=out, engine=engine_name(int(workers), scheduler), rows=rows,
        n_computed=len(tasks), n_cached=len(man.subjects) - len(tasks),
        n_failed=sum(r["status"] != "ok" for r in rows),
        wall_seconds=time.perf_counter() - start, stage_seconds=stage_seconds,
        peak_rss_mb=peak, tables=tables, group_test=group_info, series=series)
    write_json(out / "run_summary.json", {
        "engine": result.engine, "n_subjects": result.n_subjects,
        "n_computed": result.n_computed, "n_cached": result.n_cached,
        "n_failed": result.n_failed, "wall_seconds": result.wall_seconds,
        "subjects_per_minute": result.subjects_per_minute, "stage_seconds": stage_seconds,
        "peak_rss_mb": peak, "version": __version__, "options": options,
        "units": {"template": man.template.units,
                  "subjects": {e.subject: e.units for e in man.subjects}},
        "failed": result.failed, "group_test": group_info, **({"series": series} if series else {})})
    if result.n_subjects and result.n_failed == result.n_subjects:
        raise CohortFailedError(result)
    return result
