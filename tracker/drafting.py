"""A first codebook drafted from a wave file, for the analyst to review.

From an SPSS or Stata file the draft takes the metadata (variable labels, value labels,
user-missing codes, an SPSS file's multiple-response sets); from a CSV, Parquet or XLSX file
it inspects the values (numbers or text, their codes and ranges). It proposes the id, weight,
strata and cluster columns by name and content, option columns of a multi-response question
(the file's sets, else 0/1 columns sharing a stem), the
subgroup splits, and a metric for every rating scale (top-2 box) and yes/no item. Every
guess carries a ``# review:`` comment. The draft passes the codebook's own checks before it
is written, and never overwrites a file.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import TrackerError

__all__ = ["Draft", "draft_codebook"]

_ID = re.compile(r"(^|[_\s.])(id|respid|resp_id|respondent|serial|case|caseid|uuid)($|[_\s.])|^id$", re.IGNORECASE)
_WEIGHT = re.compile(r"(^|[_\s.])(weight|wt|wgt|wght|weights)($|[_\s.\d])|^w$", re.IGNORECASE)
_STRATA = re.compile(r"strat", re.IGNORECASE)
_CLUSTERS = re.compile(r"clust|psu|^cl$", re.IGNORECASE)
_YES = re.compile(r"^(yes|y|true|agree)$", re.IGNORECASE)


@dataclass
class Draft:
    """The drafted codebook as YAML text, and what was guessed."""

    text: str
    guesses: list[str] = field(default_factory=list)

    def lines(self) -> list[str]:
        return [f"drafted a codebook with {len(self.guesses)} guess(es) to review (marked '# review:')"]


def _numbers(col: pd.Series) -> np.ndarray:
    return pd.to_numeric(col.replace("", np.nan), errors="coerce").to_numpy(float)


def _is_numeric(col: pd.Series) -> bool:
    text = col[col != ""]
    return len(text) > 0 and bool(np.isfinite(_numbers(text)).all())


def _q(text: str) -> str:
    """A YAML scalar, quoted."""
    return '"' + str(text).replace("\\", "\\\\").replace('"', '\\"') + '"'


def _code(x: float) -> str:
    return str(int(x)) if float(x).is_integer() else repr(float(x))


def draft_codebook(path: str | Path, title: str | None = None) -> Draft:
    """Draft a codebook for the wave file at ``path`` (see the module's description)."""
    from .codebook import parse_codebook
    from .intake import read_wave_file

    path = Path(path)
    from .filecolumns import text_table

    wf = read_wave_file(path)
    table, labels = text_table(wf.table), wf.labels
    column_labels, sets = _file_metadata(path) if labels is not None else ({}, {})
    guesses: list[str] = []
    id_col, weight, strata, clusters = _design_columns(path, table)
    design = {id_col, weight, strata, clusters} - {None}
    from_file, set_notes = _file_sets(sets, table, design)
    taken = {c for opts in from_file.values() for c in opts[1]}
    multi = _multi_groups([c for c in map(str, table.columns) if c not in design | taken], table)
    in_multi = {c for opts in multi.values() for c in opts} | taken
    variables: list[str] = []
    groups: list[str] = []
    metrics: list[str] = []
    for c in map(str, table.columns):
        if c in design or c in in_multi:
            continue
        block, kind, codes = _variable(c, table[c], labels, column_labels.get(c), guesses)
        variables.append(block)
        if kind == "category" and 2 <= len(codes) <= 8:
            groups.append(f"  {c}: {{variable: {c}}}  # review: a split for subgroup results")
        metrics += _metrics_of(c, kind, codes, column_labels.get(c) or c)
    questions = {name: (title_ or name, options, f"the file's multiple-response set {name}")
                 for name, (title_, options) in from_file.items()}
    questions |= {stem: (stem, options, (f"review: 0/1 columns sharing the stem {stem}_, read as one "
                                         f"multi-response question")) for stem, options in multi.items()}
    for name, (title_, options, why) in questions.items():
        opts = "\n".join(f"      {o}: {_q(column_labels.get(o) or o)}" for o in options)
        variables.append(f"  {name}:  # {why}\n    label: {_q(title_)}\n    type: multi\n    options:\n{opts}")
        metrics.append(f"  {name}_any:\n    label: {_q(title_ + ': any option')}\n    variable: {name}\n"
                       f"    share: [{', '.join(options)}]")
    variables += set_notes
    if not metrics:
        raise TrackerError(f"{path}: no rating scale or yes/no item found to draft a metric from; write the "
                           f"metrics by hand (docs/codebook.md)")
    head = [f"title: {_q(title or path.stem)}", f"id: {id_col}  # review: unique in every row"]
    for key, col, why in (("weight", weight, "the weight column, found by its name"),
                          ("strata", strata, "found by its name"), ("clusters", clusters, "found by its name")):
        if col:
            head.append(f"{key}: {col}  # review: {why}")
    text = "\n".join([
        f"# Drafted by tracker from {path.name}: every line marked 'review' is a guess.", *head, "",
        "variables:", *variables, "", "groups:" if groups else "", *groups, "", "metrics:", *metrics, ""])
    parse_codebook(text, "the draft")  # a draft that the tool would refuse is never written
    return Draft(text, guesses)


def _design_columns(path: Path, table: pd.DataFrame):
    """(id, weight, strata, clusters) by name and content: the id unique in every row, the
    weight positive numbers."""
    columns = [str(c) for c in table.columns]
    id_col = next((c for c in columns if _ID.search(c) and table[c].nunique() == len(table)), None)
    if id_col is None:
        raise TrackerError(f"{path}: no column looks like a respondent id (a name such as id or respondent_id, "
                           f"a different value in every row); the codebook needs one")
    weight = next((c for c in columns if c != id_col and _WEIGHT.search(c) and _is_numeric(table[c])
                   and (_numbers(table[c]) > 0).all()), None)
    strata = next((c for c in columns if _STRATA.search(c)), None)
    clusters = next((c for c in columns if _CLUSTERS.search(c) and c != strata), None)
    return id_col, weight, strata, clusters


def _metrics_of(c: str, kind: str, codes: dict, title: str) -> list[str]:
    """A scale's top-2 box; a yes/no item's yes."""
    if kind == "scale":
        top = sorted(codes)[-2:]
        return [(f"  {c}_top2:\n    label: {_q(title + ' (top-2 box)')}\n    variable: {c}\n"
                f"    share: [{', '.join(_code(x) for x in top)}]  # review: the top two codes of the scale")]
    if kind == "category" and len(codes) == 2:
        yes = [k for k, v in codes.items() if _YES.match(v)]
        if yes:
            return [f"  {c}_yes:\n    label: {_q(title + ': yes')}\n    variable: {c}\n    share: [{_code(yes[0])}]"]
    return []


def _file_metadata(path: Path) -> tuple[dict[str, str], dict]:
    """A labelled file's variable labels (its questions' wording) and its multiple-response
    sets (SPSS files carry them: pyreadstat's ``mr_sets``)."""
    import pyreadstat

    from .statfiles import FORMATS

    reader = FORMATS[path.suffix.lower()][1]
    _, meta = getattr(pyreadstat, reader)(str(path), metadataonly=True)
    labels = {str(k): str(v) for k, v in (meta.column_names_to_labels or {}).items() if v}
    return labels, dict(getattr(meta, "mr_sets", None) or {})


def _file_sets(sets: dict, table: pd.DataFrame, design: set) -> tuple[dict[str, tuple[str, list[str]]], list[str]]:
    """The file's multiple-response sets the codebook can read as multi questions (dichotomy
    sets counting the value 1 over 0/1 columns), and a review comment for each other set."""
    out: dict[str, tuple[str, list[str]]] = {}
    notes: list[str] = []
    for name, spec in sets.items():
        cols = [str(c) for c in spec.get("variable_list", [])]
        usable = (spec.get("is_dichotomy") and float(spec.get("counted_value", 1)) == 1.0 and len(cols) >= 2
                  and all(c in table.columns and c not in design for c in cols)
                  and all(set(np.unique(x[np.isfinite(x)])) <= {0.0, 1.0} for x in (_numbers(table[c]) for c in cols)))
        if usable:
            out[str(name)] = (str(spec.get("label") or ""), cols)
        else:
            why = ("a category set (each column holds a code)" if not spec.get("is_dichotomy") else
                   f"it counts the value {spec.get('counted_value')!r}, and a multi question's options hold 0/1")
            notes.append(f"  # review: the file's multiple-response set {name} ({', '.join(cols)}) is drafted as "
                         f"separate columns: {why}")
    return out, notes


def _multi_groups(columns: list[str], table: pd.DataFrame) -> dict[str, list[str]]:
    """0/1 columns sharing a stem (stem_a, stem_b, ...): the options of one multi question."""
    stems: dict[str, list[str]] = {}
    for c in columns:
        if "_" not in c or not _is_numeric(table[c]):
            continue
        x = _numbers(table[c])
        if set(np.unique(x[np.isfinite(x)])) <= {0.0, 1.0}:
            stems.setdefault(c.rsplit("_", 1)[0], []).append(c)
    return {s: cs for s, cs in stems.items() if len(cs) >= 2}


def _variable(c: str, col: pd.Series, labels, label: str | None, guesses: list[str]):
    """(YAML block, type, codes) of one column."""
    value_labels = dict(labels.values.get(c, {})) if labels is not None else {}
    missing = set(labels.missing.get(c, ())) if labels is not None else set()
    title = label or c
    if not _is_numeric(col):
        return (f"  {c}:\n    label: {_q(title)}\n    type: text  # review: text answers, not analysed", "text", {})
    x = _numbers(col)
    seen = set(np.unique(x[np.isfinite(x)]).tolist())
    inspected = not value_labels
    if inspected:
        if not (all(float(v).is_integer() for v in seen) and len(seen) <= 12):
            lo, hi = (min(seen), max(seen)) if seen else (0.0, 0.0)
            guesses.append(f"{c}: a number")
            return ((f"  {c}:\n    label: {_q(title)}\n    type: number\n    range: [{_code(lo)}, {_code(hi)}]  "
                    f"# review: the range seen in this wave"), "number", {})
        value_labels, missing = _inspected_codes(seen)
        guesses.append(f"{c}: codes from the values seen")
    return _coded(c, title, value_labels, missing, seen, inspected, guesses)


def _inspected_codes(seen: set[float]) -> tuple[dict[float, str], set[float]]:
    """Codes read off the values: each code its own label; a code past a run of consecutive
    codes (9 after 1-5, 99, 98) read as "don't know"."""
    labels = {v: _code(v) for v in sorted(seen)}
    missing: set[float] = set()
    rest = sorted(v for v in seen if v not in (8.0, 9.0, 88.0, 97.0, 98.0, 99.0))
    if len(rest) >= 4 and rest == [float(v) for v in range(int(rest[0]), int(rest[0]) + len(rest))]:
        missing = {v for v in seen if v > rest[-1] + 1}
        labels.update({v: "don't know or no answer?" for v in missing})
    return labels, missing


def _coded(c: str, title: str, value_labels: dict, missing: set, seen: set, inspected: bool,
           guesses: list[str]):
    """The block of a coded variable: a scale when its valid codes run consecutively (4 or more),
    a category otherwise; answers without a label kept as codes to be named."""
    codes = {k: v for k, v in value_labels.items() if k not in missing}
    unlabelled = sorted(seen - set(codes) - missing)
    if unlabelled:
        codes.update({k: _code(k) for k in unlabelled})
        guesses.append(f"{c}: codes without a label in the file")
    miss = {k: v for k, v in value_labels.items() if k in missing}
    for k in missing - set(value_labels):
        miss[k] = f"missing {_code(k)}"
    ordered = sorted(codes)
    scale = len(codes) >= 4 and ordered == [float(v) for v in range(int(ordered[0]), int(ordered[0]) + len(ordered))]
    kind = "scale" if scale else "category"
    note = "  # review: consecutive codes read as a rating scale" if scale else ""
    seen_note = "  # review: the codes seen in this wave; name them" if inspected else ""
    block = [f"  {c}:", f"    label: {_q(title)}", f"    type: {kind}{note}",
             "    codes: {" + ", ".join(f"{_code(k)}: {_q(v)}" for k, v in sorted(codes.items())) + "}" + seen_note]
    if miss:
        block.append("    missing: {" + ", ".join(f"{_code(k)}: {_q(v)}" for k, v in sorted(miss.items())) + "}"
                     + ("  # review: read as don't know" if inspected else ""))
    return "\n".join(block), kind, codes
