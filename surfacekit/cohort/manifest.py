"""Cohort manifest (CSV) and the content-derived cache keys of a cohort run.

Manifest columns (header required): ``subject,path,label,group,role,age,sex``.
``label``, ``age`` and ``sex`` may be empty; extra columns are kept as covariates
and copied to the cohort table.  Exactly one row has ``role`` ``template``
(unless a template is given separately); every other row is a ``subject``.
``path`` is relative to the manifest's own folder, or absolute: a mesh
(.ply .obj .stl .off .gii .vtk) or a label volume (.nii .nii.gz, or .nrrd .nhdr
.mha .mhd with the itk extra) whose
``label`` column gives the integer label.  An optional ``units`` column names
the length unit of a mesh file (mm, cm, m or the size of one file unit in mm, as
``load(path, units=...)`` takes; blank means the run's default, mm unless given);
it is not a covariate.

A **series manifest** has a ``date`` (ISO 8601, ``YYYY-MM-DD``) or a numeric
``time_years`` column (or both; a row's ``time_years`` wins over its ``date``).
Then a subject may have several rows, its scans; they form its series in time
order (see :mod:`surfacekit.cohort.timeline` for the checks of each row).  The
subject's baseline, its earliest scan with a valid time, is the row matched to
the template in the cohort tables.  Neither column is a covariate.
"""
from __future__ import annotations

import csv
import hashlib
import json
import re
from dataclasses import dataclass, field
from pathlib import Path

from ..io.images import VOLUME_SUFFIXES  # NIfTI, NRRD, MetaImage
from ..io.units import parse_units
from ..mesh.surface import SurfaceError
from .timeline import group_scans

REQUIRED_COLUMNS = ("subject", "path", "label", "group", "role", "age", "sex")
UNITS_COLUMN = "units"   # optional; never a covariate
TIME_COLUMNS = ("date", "time_years")   # optional; either makes a series manifest
# Bump when the per-subject computation changes meaning, so old caches are not reused.
PIPELINE_VERSION = "cohort-2"   # 2: area-weighted change metrics, one eigenbasis per surface
_SUBJECT_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")


@dataclass(frozen=True)
class ManifestEntry:
    """One manifest row: a subject (or the template) and where its surface comes from."""

    subject: str
    path: Path
    label: int | None = None
    group: str = ""
    role: str = "subject"
    covariates: dict = field(default_factory=dict)   # age, sex and any extra columns (strings)
    units: str = "mm"      # length unit of a mesh file (name from parse_units)
    line: int = 0          # line of the manifest
    date: str = ""         # series manifests: the date cell as written
    time_years: str = ""   # series manifests: the time_years cell as written

    @property
    def is_volume(self) -> bool:
        return self.path.name.lower().endswith(VOLUME_SUFFIXES)


@dataclass(frozen=True)
class Manifest:
    """A parsed cohort manifest: subjects in file order, the template, covariate names."""

    path: Path
    subjects: tuple[ManifestEntry, ...]
    template: ManifestEntry | None
    covariate_names: tuple[str, ...]
    #: series manifests: every scan row of each subject, in file order (None otherwise)
    scans: dict[str, tuple[ManifestEntry, ...]] | None = None

    @property
    def groups(self) -> list[str]:
        """Distinct non-empty group names in order of first appearance."""
        return list(dict.fromkeys(e.group for e in self.subjects if e.group))


def _parse_label(text: str, line: int) -> int | None:
    text = text.strip()
    if not text:
        return None
    try:
        value = float(text)
    except ValueError:
        raise ValueError(f"manifest line {line}: label {text!r} is not an integer") from None
    if not value.is_integer():
        raise ValueError(f"manifest line {line}: label {text!r} is not an integer")
    return int(value)


def _parse_units(text: str, line: int | None) -> str:
    try:
        return parse_units(text)[0]
    except SurfaceError as exc:
        where = f"manifest line {line}: " if line else ""
        raise ValueError(f"{where}units {text!r}: {exc}") from None


def read_manifest(path, *, template=None, units="mm") -> Manifest:
    """Parse and check a cohort manifest CSV.

    Parameters
    ----------
    path : path of the CSV file
    template : optional path of a template surface; overrides (and makes
        optional) the manifest's ``role=template`` row.
    units : unit of the mesh files whose ``units`` cell is blank or absent (mm, cm, m or
        mm per file unit)

    Raises
    ------
    ValueError
        Missing file or columns, no or several template rows, duplicate or
        unsafe subject ids, bad labels, an unknown role, or no subjects.  Missing or
        corrupt subject files are *not* manifest errors: they become failure rows.
    """
    path = Path(path)
    if not path.is_file():
        raise ValueError(f"manifest not found: {path}")
    base = path.resolve().parent
    with open(path, newline="", encoding="utf-8-sig") as fh:
        reader = csv.DictReader(fh)
        header = [h.strip() for h in (reader.fieldnames or [])]
        missing = [c for c in REQUIRED_COLUMNS if c not in header]
        if missing:
            raise ValueError(f"manifest {path.name} lacks column(s) {', '.join(missing)} "
                             f"(header must be {','.join(REQUIRED_COLUMNS)})")
        reader.fieldnames = header
        default_units = _parse_units(str(units), None)
        extra = [h for h in header if h not in (*REQUIRED_COLUMNS, UNITS_COLUMN, *TIME_COLUMNS)]
        is_series = any(c in header for c in TIME_COLUMNS)
        covariate_names = ("age", "sex", *extra)
        subjects: list[ManifestEntry] = []
        templates: list[ManifestEntry] = []
        for line, row in enumerate(reader, start=2):
            row = {k: (v or "").strip() for k, v in row.items() if k is not None}
            if not any(row.values()):
                continue
            sid, role = row["subject"], (row["role"].lower() or "subject")
            if role not in ("subject", "template"):
                raise ValueError(f"manifest line {line}: role {row['role']!r} is neither "
                                 "'subject' nor 'template'")
            if not _SUBJECT_ID.match(sid):
                raise ValueError(f"manifest line {line}: subject id {sid!r} must be letters, "
                                 "digits, '.', '_' or '-'")
            if not row["path"]:
                raise ValueError(f"manifest line {line}: empty path for subject {sid!r}")
            p = Path(row["path"])
            entry = ManifestEntry(
                subject=sid, path=p if p.is_absolute() else base / p,
                label=_parse_label(row["label"], line), group=row["group"], role=role,
                covariates={c: row.get(c, "") for c in covariate_names},
                units=_parse_units(row.get(UNITS_COLUMN) or default_units, line), line=line,
                date=row.get("date", ""), time_years=row.get("time_years", ""))
            (templates if role == "template" else subjects).append(entry)
    scans = None
    if is_series:  # one row per subject (its baseline) for the template comparison
        subjects, scans = group_scans(subjects)
    seen: set[str] = set()
    for e in subjects:
        if e.subject in seen:
            raise ValueError(f"manifest {path.name}: subject id {e.subject!r} appears twice "
                             "(several scans of one subject need a date or time_years column)")
        seen.add(e.subject)
    if template is not None:
        tpath = Path(template)
        if not tpath.is_file():
            raise ValueError(f"template not found: {tpath}")
        same = templates and templates[0].path == tpath.resolve()
        chosen = ManifestEntry(subject="template", path=tpath.resolve(),
                               label=templates[0].label if same else None, role="template",
                               units=templates[0].units if same else default_units)
    elif len(templates) == 1:
        chosen = templates[0]
    elif not templates:
        raise ValueError(f"manifest {path.name} has no row with role 'template' "
                         "(add one or pass a template path)")
    else:
        raise ValueError(f"manifest {path.name} has {len(templates)} template rows; exactly one "
                         "is allowed")
    if not subjects:
        raise ValueError(f"manifest {path.name} lists no subjects")
    return Manifest(path=path, subjects=tuple(subjects), template=chosen,
                    covariate_names=tuple(covariate_names), scans=scans)


def file_digest(path) -> str:
    """sha256 of a file's bytes (hex), read in 1 MiB blocks; memory stays small."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def cache_key(*, input_digest: str, label: int | None, template_key: str, options: dict,
              version: str) -> str:
    """Key of one subject's result: input bytes, label, template, options and versions.

    Any change of these gives a new key, so the subject is recomputed.  24 hex
    characters (96 bits) of sha256 keep file names short with no practical
    risk of collision.
    """
    payload = json.dumps({"input": input_digest, "label": label, "template": template_key,
                          "options": options, "version": version, "pipeline": PIPELINE_VERSION},
                         sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()[:24]
