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
        raise TrackerError("--note: say what changed (it is kept in the ledger with the version)")
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
    cells_a = {(g, lev, m): (a.stats["value"][i, j], a.stats["variance"][i, j], a.stats["base"][i, j])
               for i, (g, lev) in enumerate(zip(a.group, a.level)) for j, m in enumerate(a.metrics)}
    cells_b = {(g, lev, m): (b.stats["value"][i, j], b.stats["variance"][i, j], b.stats["base"][i, j])
               for i, (g, lev) in enumerate(zip(b.group, b.level)) for j, m in enumerate(b.metrics)}
    for key in set(cells_a) | set(cells_b):
        if key[2] in added or key[2] in removed:  # reported apart: they are new or gone, not changed
            continue
        x, y = cells_a.get(key), cells_b.get(key)
        if x is None or y is None:  # a split's level came or went: a change where it had answers
            only = x if x is not None else y
            if only is not None and only[2] > 0:
                return True
            continue
        if not np.allclose(np.array(x, float), np.array(y, float), rtol=1e-12, atol=1e-15, equal_nan=True):
            return True
    return False
