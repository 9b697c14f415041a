"""The add transaction: check a wave file against the codebook and the stored waves, then
store it under the study's lock (the Parquet file, then the ledger rename that commits it),
with the new wave's statistics, its make-up and its surprises reported.

Study.check and Study.add delegate here; nothing is written until everything is checked.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from dataclasses import replace as _replace
from pathlib import Path

import numpy as np
import pandas as pd

from . import store
from .codebook import LABEL_RE, Codebook
from .errors import TrackerError
from .intake import Problem, check_wave, read_wave_file
from .options import parse_date

__all__ = ["AddReport", "CheckReport", "add", "check", "check_file", "content_fingerprint", "design_problems"]


@dataclass(frozen=True)
class CheckReport:
    """What ``check`` found: the problems, and whether the wave can be added."""

    file: str
    rows: int
    problems: tuple[Problem, ...]
    surprises: tuple[str, ...] = ()

    @property
    def errors(self) -> list[Problem]:
        return [p for p in self.problems if p.severity == "error"]

    @property
    def ok(self) -> bool:
        return not self.errors

    def lines(self) -> list[str]:
        return [p.describe(self.file) for p in self.problems] + list(self.surprises)


@dataclass(frozen=True)
class AddReport:
    """Summary of a stored wave."""

    label: str
    date: str
    rows: int
    weighted_base: float
    effective_base: float
    efficiency: float
    metrics_present: tuple[str, ...]
    metrics_absent: tuple[str, ...]
    variables_missing: tuple[str, ...]
    warnings: tuple[str, ...]
    exclusions: dict[str, dict[str, int]] = field(default_factory=dict)
    replaced: bool = False
    weighting: dict = field(default_factory=dict)
    make_up: tuple[str, ...] = ()
    surprises: tuple[str, ...] = ()

    def lines(self) -> list[str]:
        out = [
            (f"stored wave {self.label} (fieldwork {self.date})"
            f"{' replacing the earlier version' if self.replaced else ''}"),
            f"  respondents (base): {self.rows:,}",
            f"  weighted base: {self.weighted_base:,.1f}",
            f"  effective base: {self.effective_base:,.1f}  (weighting efficiency {self.efficiency:.1%})",
            f"  metrics present: {', '.join(self.metrics_present) or 'none'}",
        ]
        if self.metrics_absent:
            out.append(f"  metrics not in this wave: {', '.join(self.metrics_absent)}")
        if self.variables_missing:
            out.append(f"  variables not in this wave: {', '.join(self.variables_missing)}")
        for metric, reasons in self.exclusions.items():
            if reasons:
                parts = ", ".join(f"{v:,} {k}" for k, v in reasons.items())
                out.append(f"  left out of {metric}: {parts}")
        out.extend(f"  {w}" for w in self.warnings)
        out.extend(f"  {line}" for line in self.make_up)
        out.extend(f"  {line}" for line in self.surprises)
        return out


#: Fieldwork dates before this (or over a year ahead) are warned about at check and add.
EARLIEST_DATE = dt.date(1950, 1, 1)


def content_fingerprint(table: pd.DataFrame) -> str:
    """SHA-256 of a harmonized table that ignores row order (and so line ends, quoting and
    any other detail of the delivered file): the sorted per-row hashes of its columns in
    name order."""
    import hashlib

    cols = sorted(table.columns)
    hashes = (pd.util.hash_pandas_object(table[c], index=False).to_numpy() for c in cols)
    rows = combined_hashes(hashes, len(cols), len(table))
    h = hashlib.sha256(",".join(cols).encode("utf-8"))
    h.update(np.sort(rows).tobytes())
    return h.hexdigest()


def _release_arrow_memory() -> None:
    """Hand the memory Arrow's pool keeps after a file's cells are dropped back to the system
    (the pool would keep it for reuse, adding the file's size to the peak of an add)."""
    import pyarrow as pa

    pa.default_memory_pool().release_unused()


def combined_hashes(columns, k: int, length: int = 0) -> np.ndarray:
    """The row hashes ``pd.util.hash_pandas_object(frame, index=False)`` gives a frame of ``k``
    columns, from the columns' hashes one at a time (so the frame is never copied whole):
    pandas' own way of combining them (pandas.core.util.hashing.combine_hash_arrays, after
    CPython's tuple hash)."""
    out: np.ndarray | None = None
    mult = np.uint64(1000003)
    for i, a in enumerate(columns):
        if out is None:
            out = np.zeros_like(a) + np.uint64(0x345678)
        out ^= a
        out *= mult
        mult += np.uint64(82520 + 2 * (k - i))
    if out is None:  # no columns: each row hashes as an empty tuple (as pandas does)
        return np.full(length, 0x345678 + 97531, dtype=np.uint64)
    return out + np.uint64(97531)




def check(study, file, wave=None, date=None, encoding=None, replace=False, allow_duplicate=False, sheet=None,
          header_row=None, decimal=None) -> CheckReport:
    """Check a wave file against the codebook and the stored waves (Study.check); with its
    date, its cells are also judged against the ranges the stored waves predict."""
    report, table, _ = check_file(study, file, wave, date, encoding, replace, allow_duplicate=allow_duplicate,
                                  sheet=sheet, header_row=header_row, decimal=decimal)
    if report.ok and date and len(table):
        report = _replace(report, surprises=tuple(_surprise_lines(study, table, wave, parse_date(date))))
    return report


def _surprise_lines(study, table, wave, date) -> list[str]:
    from .expected import surprise_lines

    try:
        return surprise_lines(study.surprises(wave=wave, table=table, date=date))
    except (TrackerError, ValueError):  # judging is a courtesy: it never stops a wave
        return []


def _label_problems(study, label: str | None, replace: bool) -> list[Problem]:
    """The wave label: valid, new (or stored, to replace), and of the form of the codebook's."""
    out: list[Problem] = []
    if label is None:
        return out
    if not LABEL_RE.fullmatch(label):
        out.append(Problem("error", "", f"wave label {label!r} is not valid (a letter or digit, then "
                                        f"letters, digits, '.', '_', '-'; at most 40 characters, no spaces)"))
        return out
    if label in study.labels and not replace:
        out.append(Problem("error", "", f"a wave labelled {label} is already stored; use --replace to replace it"))
    elif replace and label not in study.labels:
        out.append(Problem("error", "", f"--replace: no wave labelled {label} is stored (stored: "
                                        f"{', '.join(study.labels) or 'none'}); leave out --replace to add it"))
    return out


def _reference_problems(study, label: str | None) -> list[Problem]:
    """The waves the codebook names must be of the form of this label (tracker.codebook)."""
    if label is None or not LABEL_RE.fullmatch(label):
        return []
    from .codebook import reference_problems

    return [Problem("error", "", p) for p in reference_problems(study.codebook, study.labels, label)]


def _date_problems(study, label: str | None, date: str | None) -> list[Problem]:
    """The fieldwork date: an ISO date, not another wave's, not far outside a plausible range."""
    if date is None:
        return []
    try:
        iso = parse_date(date)
    except TrackerError as exc:
        return [Problem("error", "", str(exc))]
    out = []
    clash = [w["label"] for w in study.wave_entries if w["date"] == iso and w["label"] != label]
    if clash:
        out.append(Problem("error", "", f"wave {clash[0]} already has fieldwork date {iso}"))
    latest = dt.date.today() + dt.timedelta(days=366)
    if not EARLIEST_DATE <= dt.date.fromisoformat(iso) <= latest:
        out.append(Problem("warning", "", f"fieldwork date {iso} lies outside {EARLIEST_DATE} to "
                                          f"{latest} (a year from today); is it a typing slip?"))
    if label is not None:
        pairs = [(w["label"], w["date"]) for w in study.wave_entries if w["label"] != label] + [(label, iso)]
        for a, b in store.order_clashes(pairs):
            if label in (a, b):
                other = b if a == label else a
                when = study.dates()[other]
                side = "before" if iso < when else "after"
                out.append(Problem("warning", "", f"fieldwork date {iso} puts wave {label} {side} wave {other} "
                                                  f"({when}), though their labels sort the other way; is the date "
                                                  f"or the label a slip?"))
    return out


def check_file(study, file, wave, date, encoding, replace, rake=False, allow_duplicate=False, sheet=None,
               header_row=None, decimal=None):
    """(CheckReport, harmonized table, the file read) of a wave file against the study."""
    wf = read_wave_file(file, encoding, sheet=sheet, header_row=header_row, decimal=decimal)
    label = wave
    problems: list[Problem] = [*wf.problems, *_label_problems(study, label, replace),
                               *_date_problems(study, label, date), *_reference_problems(study, label)]
    for w in study.wave_entries:
        if w["source_sha256"] == wf.sha256 and not (replace and w["label"] == label):
            problems.append(Problem("error", "", f"this file is already stored as wave {w['label']}"
                                    + ("" if replace else "; use --replace with that label to store it again")))
    order = study.dates()
    if label and date:
        try:
            order[label] = parse_date(date)
        except TrackerError:
            pass
    table, found = check_wave(study.codebook, wf, label or "", order, rake=rake)
    rows = len(wf.table)
    wf.table = None  # the file's cells are no longer needed (the largest object of a big wave)
    _release_arrow_memory()
    problems.extend(found)
    wf.content_sha256 = mark = content_fingerprint(table) if len(table) else ""
    if mark and not allow_duplicate:
        for w in study.wave_entries:
            if w.get("content_sha256") == mark and not (replace and w["label"] == label):
                problems.append(Problem("error", "", f"the data are the same as stored wave {w['label']} "
                                        f"(same respondents and answers, in any row order); a re-delivery? "
                                        f"Use --allow-duplicate if the two waves really are identical"))
    if not any(p.severity == "error" for p in found) and len(table):
        problems.extend(design_problems(study.codebook, table))
    problems.extend(_label_problems_of_file(study, wf, label, date))
    return CheckReport(str(file), rows, tuple(problems)), table, wf


def _label_problems_of_file(study, wf, label: str | None, date: str | None) -> list[Problem]:
    """A labelled file's value labels and missing codes against the codebook, and its labels
    against those of the latest wave fielded before it (tracker.statfiles.label_problems)."""
    if wf.labels is None:
        return []
    from .statfiles import label_problems

    iso = None
    if date:
        try:
            iso = parse_date(date)
        except TrackerError:
            iso = None
    before = [w for w in study.wave_entries if w.get("value_labels") and w["label"] != label
              and (iso is None or w["date"] < iso)]
    earlier = (before[-1]["label"], before[-1]["value_labels"]) if before else None
    return [Problem("warning", col, msg) for col, msg in label_problems(study.codebook, wf.labels, earlier)]


def design_problems(book: Codebook, table: pd.DataFrame) -> list[Problem]:
    """Strata holding a single cluster, in total and in each subgroup: a warning, or an
    error under the rule single_cluster_strata: refuse; a declared population smaller than
    the wave's sample: an error."""
    from .estimates import population_problems, single_cluster_lines

    column = book.strata or ""
    out = [Problem("error", column, line) for line in population_problems(book, table)]
    for finding in single_cluster_lines(book, table):
        refused = finding.scope == "total" and book.single_cluster_rule == "refuse"
        out.append(Problem("error" if refused else "warning", column, finding.text))
    return out


def add(study, file, wave: str, date: str, encoding=None, replace=False, rake=False, cap=None,
        allow_duplicate=False, sheet=None, header_row=None, decimal=None) -> AddReport:
    """Validate, harmonize and store a wave (Study.add); raise TrackerError, the study
    unchanged, if it cannot be. The whole add runs under the study's write lock, against the
    ledger as it stands once the lock is held, so two adds at once are serialised."""
    if not wave:
        raise TrackerError("a wave label is required")
    iso = parse_date(date)
    with store.study_lock(study.root):
        study.reload_ledger()
        return _add_locked(study, file, wave, iso, encoding, replace, rake, cap, allow_duplicate, sheet, header_row,
                           decimal)


def _summary(study, table: pd.DataFrame, cells) -> dict:
    """What the report says of a new wave's bases and metrics."""
    from .cells import exclusions
    from .estimates import weights_of

    book = study.codebook
    weights = weights_of(book, table)
    sw, sw2 = float(weights.sum()), float((weights**2).sum())
    neff = sw * sw / sw2
    metrics = list(book.metrics.values())
    answered = cells.stats["base"][0] > 0  # the total's base of each metric
    present = tuple(m.name for j, m in enumerate(metrics) if answered[j])
    return {"rows": len(table), "weighted_base": sw, "effective_base": neff, "efficiency": neff / len(table),
            "metrics_present": present,
            "metrics_absent": tuple(m.name for j, m in enumerate(metrics) if not answered[j]),
            "variables_missing": tuple(v for v in book.variables if not set(book.column_for(v)) <= set(table.columns)),
            "exclusions": {m.name: exclusions(book, table, m) for m in metrics if m.name in present}}


def _make_up(study, table: pd.DataFrame, wave: str, iso: str) -> tuple[str, ...]:
    """The new wave's make-up against the wave fielded before it, in lines."""
    book = study.codebook
    earlier = [w for w in study.wave_entries if w["date"] < iso and w["label"] != wave]
    if not (earlier and book.profile):
        return ()
    from .composition import compare_composition

    prev = earlier[-1]["label"]
    comp = compare_composition(book, study.load(prev), table, prev, wave)
    return (f"sample make-up against {prev}:", *(f"  {line}" for line in comp.lines()))


def _store(study, file, wave: str, iso: str, table: pd.DataFrame, wf, weighting: dict) -> bool:
    """Write the wave (new Parquet under a fresh name, then the ledger rename that commits it);
    True when it replaced a stored wave of that label."""
    root, book = study.root, study.codebook
    # Under the lock no other writer is at work, so what earlier killed writers left can go.
    store.sweep_incoming(root)
    current = study.waves_on_disk.ledger  # read once, under the lock, when the add began
    for orphan in store.orphans(root, current):
        orphan.unlink(missing_ok=True)
    fname = store.free_wave_file(root, wave)
    try:
        store.write_parquet_atomic(root / fname, table)
    except OSError as exc:
        raise store.fs_problem(exc, root / fname, "store the wave") from None
    sha = store.sha256_of(root / fname)
    entry = {
        "label": wave, "date": iso, "file": fname, "sha256": sha,
        "source": Path(file).name,
        "source_sha256": wf.sha256, "content_sha256": wf.content_sha256, "rows": len(table),
        "codebook_sha256": book.sha256,
        "added": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "weighting": weighting,
    }
    if wf.labels is not None:  # the file's value labels, for the next labelled wave to be compared with
        from .statfiles import labels_for_ledger

        entry["value_labels"] = labels_for_ledger(book, wf.labels)
    ledger = {**current, "waves": [dict(w) for w in current["waves"]]}
    old = [w for w in ledger["waves"] if w["label"] == wave]
    if old:
        prev = old[0]
        history = prev.pop("history", [])
        entry["history"] = history + [prev]  # the old file stays on disk, named here
        ledger["waves"] = [w for w in ledger["waves"] if w["label"] != wave]
    ledger["waves"].append(entry)
    try:
        store.write_ledger(root, ledger)
    except BaseException as exc:  # not committed: the new file must not stay behind as an orphan
        (root / fname).unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise store.fs_problem(exc, root / store.LEDGER, "record the wave in the ledger") from None
        raise
    study.committed(ledger, fname, sha)
    return bool(old)


def _add_locked(study, file, wave, iso, encoding, replace, rake, cap, allow_duplicate, sheet,
                header_row, decimal=None) -> AddReport:
    from .progress import step

    step(f"adding {wave}", 0, 4, "reading and checking")
    book = study.codebook
    rake = rake or bool(book.rake.get("always"))
    report, table, wf = check_file(study, file, wave, iso, encoding, replace, rake, allow_duplicate, sheet, header_row,
                                   decimal)
    if not report.ok:
        raise TrackerError("\n".join(["cannot add " + str(file) + ":"] + report.lines()))
    weighting: dict = {"kind": "file", "column": book.weight} if book.weight else {"kind": "none"}
    extra_lines: list[str] = []
    if rake:
        from .weighting import rake_table

        table, result = rake_table(book, table, cap=cap)
        weighting = result.ledger_entry()
        extra_lines = result.lines()
    step(f"adding {wave}", 1, 4, "summarising")
    cells, ids = study.cellstore.compute(table)  # computed once: the presence of each metric and the cache
    summary = _summary(study, table, cells)
    step(f"adding {wave}", 2, 4, "checking the make-up")
    make_up = _make_up(study, table, wave, iso)
    step(f"adding {wave}", 3, 4, "storing")
    replaced = _store(study, file, wave, iso, table, wf, weighting)
    # the new wave's statistics, ready for the next command (derived) and for the judging below,
    # without reading back what was just written
    study.cellstore.store(wave, cells, ids, locked=True)
    warnings = tuple(p.describe(Path(file).name) for p in report.problems) + tuple(extra_lines)
    step(f"adding {wave}", 3, 4, "judging against the earlier waves")
    try:
        from .expected import surprise_lines

        judged = tuple(surprise_lines(study.surprises(wave=wave)))
    except (TrackerError, ValueError):
        judged = ()
    return AddReport(label=wave, date=iso, warnings=warnings, replaced=replaced, weighting=weighting,
                     make_up=make_up, surprises=judged, **summary)
