"""Readable table headers for the HTML report: snake_case keys in words with units.

``mean_abs_normal_displacement_mm`` is shown as "Mean |normal displacement| (mm)";
a unit suffix becomes a bracketed unit, ``n_`` becomes "Number of", ``abs_x``
becomes ``|x|``, and a few abbreviations are spelled as they are usually printed.
A sign suffix is shown in words: ``mean_normal_displacement_outward_mm`` reads
"Mean normal displacement, + outward (mm)", ``volume_change_followup_minus_baseline_ml``
reads "Volume change, follow-up − baseline (ml)".
Keys that are not snake_case (already written for people) are kept as they are.
"""
from __future__ import annotations

import re

__all__ = ["readable"]

# exact keys whose plain reading would be wrong or clumsy
KNOWN = {
    "vertices": "Vertices", "faces": "Faces",
    "p_fwer": "p (FWER)", "q_fdr": "q (FDR)", "t": "t", "label": "Label", "name": "Name",
    "value": "Value", "sha256": "SHA-256", "euler_characteristic": "Euler characteristic",
    "coverage_target": "Coverage of the target (fraction)",
    "coverage_source": "Coverage of the source (fraction)",
    "collapsed_area_fraction": "Collapsed area (fraction)",
}
# unit suffixes (last token, or last two tokens) -> unit shown in brackets
UNITS = {"mm": "mm", "mm2": "mm²", "mm3": "mm³", "ml": "ml", "cm": "cm", "m": "m",
         "deg": "°", "degrees": "°", "percent": "%", "pct": "%", "log2": "log2",
         "seconds": "s", "s": "s", "fraction": "fraction"}
WORDS = {"rms": "RMS", "fwer": "FWER", "fdr": "FDR", "std": "SD", "sd": "SD", "id": "ID",
         "max": "max", "min": "min", "p5": "5th percentile", "p95": "95th percentile",
         "p50": "median", "p99": "99th percentile", "p1": "1st percentile", "nd": "normal displacement",
         "gwn": "generalised winding number", "icp": "ICP", "ct": "CT", "csv": "CSV"}
# sign suffixes of signed columns (last tokens before the unit) -> their sign in words
SIGNS = {("outward",): "+ outward", ("followup", "minus", "baseline"): "follow-up − baseline",
         ("followup", "over", "baseline"): "follow-up / baseline",
         ("subject", "minus", "template"): "subject − template",
         ("subject", "over", "template"): "subject / template"}
_SNAKE = re.compile(r"[a-z][a-z0-9]*(_[a-z0-9]+)*")


def readable(key) -> str:
    """A column or row name in words with its unit; unknown keys get a readable fallback."""
    text = str(key)
    if text in KNOWN:
        return KNOWN[text]
    if not _SNAKE.fullmatch(text):
        return text
    tokens = text.split("_")
    unit = ""
    if len(tokens) > 1 and tokens[-1] in UNITS:
        unit = UNITS[tokens.pop()]
    sign = ""
    for suffix, words in SIGNS.items():
        if len(tokens) > len(suffix) and tuple(tokens[-len(suffix):]) == suffix:
            sign, tokens = words, tokens[:-len(suffix)]
            break
    prefix = ""
    if tokens[0] == "n" and len(tokens) > 1:
        prefix, tokens = "number of ", tokens[1:]
    words = [WORDS.get(t, t) for t in tokens]
    if "abs" in tokens:  # abs_x_y -> |x y|
        i = tokens.index("abs")
        inner = " ".join(words[i + 1:])
        words = words[:i] + ([f"|{inner}|"] if inner else ["absolute"])
    phrase = (prefix + " ".join(words)).replace("non ", "non-")
    phrase = phrase[:1].upper() + phrase[1:] + (f", {sign}" if sign else "")
    return f"{phrase} ({unit})" if unit else phrase
