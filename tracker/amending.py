"""Amending a study's codebook: a new version recorded with a note, under the lock, with the
stored waves whose results change named (each wave's statistics under the recorded version
and under the new one, compared cell by cell)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import store
from .codebook import Codebook, load_codebook, parse_codebook, reference_problems
from .errors import TrackerError

__all__ = ["AmendReport", "amend"]


@dataclass(frozen=True)
class AmendReport:
    """What an amendment recorded and what it changes."""

    sha256: str
    note: str
    changed: tuple[str, ...]        # waves with a result that differs
    unchanged: tuple[str, ...]
    metrics_added: tuple[str, ...]
    metrics_removed: tuple[str, ...]
    compared: bool                  # False when the recorded version's text was not kept

    def lines(self) -> list[str]:
        out = [f"recorded codebook version {self.sha256[:12]}: {self.note}"]
        if not self.compared:
            out.append("the recorded version's text was not kept (a study made before codebook versions were "
                       "kept): every wave's results are computed again under the new version")
            return out
        if self.metrics_added:
            out.append(f"metrics added: {', '.join(self.metrics_added)}")
        if self.metrics_removed:
            out.append(f"metrics removed: {', '.join(self.metrics_removed)}")
        out.append(f"results change in {len(self.changed)} wave(s)"
                   + (f": {', '.join(self.changed)}" if self.changed else "")
                   + f"; unchanged in {len(self.unchanged)}")
        return out


def amend(root: str | Path, note: str, codebook: str | Path | None = None) -> AmendReport:
    """Record the codebook in the study folder (edited in place), or ``codebook`` (a file, which
    replaces it), as the study's new version with ``note``; refuse one that does not parse or
    that names waves of another form. Runs under the study's lock; the ledger rename commits."""
    root = Path(root)
    if not note or not note.strip():
        raise TrackerError("note: say what changed (it is kept in the ledger with the version)")
    new = load_codebook(codebook if codebook is not None else root / store.CODEBOOK)
    with store.study_lock(root):
        ledger = store.read_ledger(root)
        labels = [w["label"] for w in ledger["waves"]]
        found = reference_problems(new, labels)
        if found:
            raise TrackerError("\n".join(found))
        recorded = store.codebook_sha256(ledger)
        history = [h for h in ledger.get("codebook_history", []) if isinstance(h, dict)]
        old_text = next((h.get("text") for h in history if h.get("sha256") == recorded), None)
        report = _compare(root, ledger, parse_codebook(old_text) if isinstance(old_text, str) else None, new, note)
        if codebook is not None:
            store.write_atomic(root / store.CODEBOOK, new.source.encode("utf-8"))
        updated = {**ledger, "codebook_sha256": new.sha256,
                   "codebook_history": [*history, store.codebook_version(new, note.strip())]}
        store.write_ledger(root, updated)
    return report


def _compare(root: Path, ledger: dict, old: Codebook | None, new: Codebook, note: str) -> AmendReport:
    """Each stored wave's cell statistics under both versions: a wave changes when a value or a
    variance of a metric both define differs, or a metric of either is answered in it only there."""
    if old is None:
        return AmendReport(new.sha256, note.strip(), (), (), (), (), False)
    import pandas as pd

    from .estimates import cell_arrays

    added = tuple(m for m in new.metrics if m not in old.metrics)
    removed = tuple(m for m in old.metrics if m not in new.metrics)
    files = store.StoredFiles(root)
    changed: list[str] = []
    unchanged: list[str] = []
    for w in sorted(ledger["waves"], key=lambda e: e["date"]):
        table = pd.read_parquet(files.check(w))
        a = cell_arrays(old, table, list(old.metrics.values()), list(old.groups))
        b = cell_arrays(new, table, list(new.metrics.values()), list(new.groups))
        (changed if _differ(a, b, added, removed) else unchanged).append(w["label"])
    return AmendReport(new.sha256, note.strip(), tuple(changed), tuple(unchanged), added, removed, True)


def _differ(a, b, added: tuple[str, ...], removed: tuple[str, ...]) -> bool:
    """Whether a wave's results differ between two versions' cell statistics (``a``, ``b``):
    for the metrics both define, a value, variance or base of a level both hold, or a level
    held by one version only that has answers. Whole arrays at once, no loop per cell."""
    del added, removed  # they are defined by one version only: reported apart
    both = [m for m in a.metrics if m in b.metrics]
    if not both:
        return False
    ja = np.array([a.metrics.index(m) for m in both])
    jb = np.array([b.metrics.index(m) for m in both])
    rows_a = {key: i for i, key in enumerate(zip(a.group, a.level))}
    rows_b = {key: i for i, key in enumerate(zip(b.group, b.level))}
    common = [k for k in rows_a if k in rows_b]
    ia = np.array([rows_a[k] for k in common], dtype=np.int64)
    ib = np.array([rows_b[k] for k in common], dtype=np.int64)
    for stat in ("value", "variance", "base"):
        x = np.asarray(a.stats[stat], float)[np.ix_(ia, ja)]
        y = np.asarray(b.stats[stat], float)[np.ix_(ib, jb)]
        if not np.allclose(x, y, rtol=1e-12, atol=1e-15, equal_nan=True):
            return True
    only_a = np.array([i for k, i in rows_a.items() if k not in rows_b], dtype=np.int64)
    only_b = np.array([i for k, i in rows_b.items() if k not in rows_a], dtype=np.int64)
    answered_a = only_a.size and (np.asarray(a.stats["base"])[np.ix_(only_a, ja)] > 0).any()
    answered_b = only_b.size and (np.asarray(b.stats["base"])[np.ix_(only_b, jb)] > 0).any()
    return bool(answered_a or answered_b)
