"""Scan times of a series manifest: parsing, checks of each row, grouping into series.

A row's time is its ``time_years`` cell (a number of years on any origin) or, when
that is blank, its ``date`` cell (ISO 8601 calendar date ``YYYY-MM-DD``, ISO 8601:2019
§5.2.2; a time of day after ``T`` is allowed and kept).  Times of one subject are
compared on one origin, so a subject's rows use one kind of time.  Checks, each
leaving the rest of the cohort running:

* a missing or unparseable time: the row is left out of its series, with the error;
* two scans of one subject at the same time: the first listed is kept, the later
  rows are left out, with an error naming the line kept;
* rows not in time order: they are sorted by time, with a warning on the subject
  (manifests are often written in the order files were found);
* a subject whose rows mix dates and ``time_years``: the rows of the kind its first
  row does not use are left out, with the error;
* a subject left with one scan has no rate (its series row says why).

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime

DAYS_PER_YEAR = 365.25   # Julian year (IAU): dates become years since the baseline


def parse_time(entry) -> tuple[float | None, str, str]:
    """``(time in years, kind "time_years" | "date", error)`` of a manifest row.

    Dates become years since 0001-01-01 (proleptic Gregorian calendar); only
    differences within one subject are used.
    """
    where = f"manifest line {entry.line}"
    if entry.time_years:
        try:
            value = float(entry.time_years)
        except ValueError:
            return None, "time_years", f"{where}: time_years {entry.time_years!r} is not a number"
        if not math.isfinite(value):
            return None, "time_years", f"{where}: time_years {entry.time_years!r} is not finite"
        return value, "time_years", ""
    if not entry.date:
        return None, "", f"{where}: no date or time_years for this scan"
    try:
        when = datetime.fromisoformat(entry.date)
    except ValueError:
        return None, "date", (f"{where}: date {entry.date!r} is not an ISO 8601 date "
                              "(YYYY-MM-DD)")
    days = when.toordinal() + (when.hour * 3600 + when.minute * 60 + when.second) / 86400.0
    return days / DAYS_PER_YEAR, "date", ""


@dataclass
class SeriesPlan:
    """One subject's scans after the checks.

    Attributes
    ----------
    used : (entry, time in years) of the scans in the series, in time order
    rows : per manifest row (file order): subject, line, path, date, time_years,
        ``used`` (1/0) and ``note`` (the error or warning of that row)
    warnings : plain sentences about the whole series (e.g. rows sorted)
    """

    used: list = field(default_factory=list)
    rows: list = field(default_factory=list)
    warnings: list = field(default_factory=list)


def plan_series(entries) -> SeriesPlan:
    """Check the time of each of a subject's rows (file order) and order the valid ones."""
    plan = SeriesPlan()
    kind0 = None
    seen: dict[float, int] = {}
    notes: list[str] = []
    for e in entries:
        t, kind, error = parse_time(e)
        if not error and kind0 is not None and kind != kind0:
            error = (f"manifest line {e.line}: this subject's first scan gives a {kind0}, this "
                     f"one a {kind}; one subject's scans need one kind of time")
        if not error and t in seen:
            error = (f"manifest line {e.line}: same time as line {seen[t]} of this subject "
                     "(two scans on one date); the scan of line "
                     f"{seen[t]} is kept")
        if not error:
            kind0 = kind0 or kind
            seen[t] = e.line
            plan.used.append((e, t))
        notes.append(error)
    times = [t for _, t in plan.used]
    if times != sorted(times):
        plan.warnings.append("the manifest lists this subject's scans out of time order; they "
                             "were sorted by time")
        plan.used.sort(key=lambda pair: pair[1])
    for e, note in zip(entries, notes):
        plan.rows.append({"subject": e.subject, "line": e.line, "path": e.path.name,
                          "date": e.date, "time_years": e.time_years, "used": int(not note),
                          "note": note})
    return plan


def group_scans(entries) -> tuple[list, dict]:
    """Rows of a series manifest grouped by subject (order of first appearance).

    Returns ``(baselines, scans)``: for each subject the row of its baseline (earliest
    valid time; the first row when none is valid), and ``{subject: all its rows}``.
    """
    scans: dict[str, list] = {}
    for e in entries:
        scans.setdefault(e.subject, []).append(e)
    baselines = []
    for rows in scans.values():
        plan = plan_series(rows)
        baselines.append(plan.used[0][0] if plan.used else rows[0])
    return baselines, {k: tuple(v) for k, v in scans.items()}


def scan_times(plan: SeriesPlan) -> list[float]:
    """Years since the baseline of each used scan (the baseline at 0)."""
    return [t - plan.used[0][1] for _, t in plan.used] if plan.used else []


__all__ = ["DAYS_PER_YEAR", "SeriesPlan", "group_scans", "parse_time",
           "plan_series", "scan_times"]
