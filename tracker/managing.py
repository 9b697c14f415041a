"""Removing and renaming stored waves, under the study's lock, recorded in the ledger.

A removed wave leaves the study's waves but not the disk: its entry moves to the ledger's
``removed`` list with the time and a note, and its file stays, named there (so ``verify``
still checks it and never takes it for an orphan). A rename keeps the file and records the
old label in the entry's ``renamed_from``.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from . import store
from .codebook import LABEL_RE, load_codebook, reference_problems, wave_references
from .errors import TrackerError

__all__ = ["remove_wave", "rename_wave"]


def _now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")


def _entry(ledger: dict, root: Path, label: str) -> dict:
    for w in ledger["waves"]:
        if w["label"] == label:
            return w
    stored = ", ".join(w["label"] for w in ledger["waves"]) or "none"
    raise TrackerError(f"{root}: no wave labelled {label!r} (stored: {stored})")


def _named_by_codebook(root: Path, label: str) -> list[str]:
    book = load_codebook(root / store.CODEBOOK)
    return [where for where, lab in wave_references(book) if lab == label]


def remove_wave(root: str | Path, label: str, note: str) -> list[str]:
    """Take wave ``label`` out of the study (its file kept, named in the ledger's removed list);
    refused while the codebook names it. Returns the lines to print."""
    root = Path(root)
    if not note or not note.strip():
        raise TrackerError("note: say why the wave is removed (it is kept in the ledger)")
    with store.study_lock(root):
        ledger = store.read_ledger(root)
        entry = _entry(ledger, root, label)
        named = _named_by_codebook(root, label)
        if named:
            raise TrackerError(f"the codebook names wave {label} ({', '.join(named)}); amend the codebook first")
        removed = {**entry, "removed": _now(), "note": note.strip()}
        store.write_ledger(root, {**ledger, "waves": [w for w in ledger["waves"] if w["label"] != label],
                                  "removed": [*ledger.get("removed", []), removed]})
    return [(f"removed wave {label} from the study (its file {entry['file']} is kept, named in the ledger's "
            f"removed list): {note.strip()}")]


def rename_wave(root: str | Path, label: str, new: str) -> list[str]:
    """Give wave ``label`` the label ``new`` (valid, not stored, of the form of the codebook's
    wave labels); refused while the codebook names the old label. Returns the lines to print."""
    root = Path(root)
    if not LABEL_RE.fullmatch(new):
        raise TrackerError(f"to {new!r}: not a valid wave label (a letter or digit, then letters, digits, "
                           f"'.', '_', '-'; at most 40 characters, no spaces)")
    with store.study_lock(root):
        ledger = store.read_ledger(root)
        entry = _entry(ledger, root, label)
        if any(w["label"] == new for w in ledger["waves"]):
            raise TrackerError(f"to {new}: a wave labelled {new} is already stored")
        named = _named_by_codebook(root, label)
        if named:
            raise TrackerError(f"the codebook names wave {label} ({', '.join(named)}); amend the codebook first")
        book = load_codebook(root / store.CODEBOOK)
        found = reference_problems(book, [w["label"] for w in ledger["waves"] if w["label"] != label], new)
        if found:
            raise TrackerError("\n".join(found))
        renamed = {**entry, "label": new,
                   "renamed_from": [*entry.get("renamed_from", []), {"label": label, "renamed": _now()}]}
        store.write_ledger(root, {**ledger, "waves": [renamed if w["label"] == label else w for w in ledger["waves"]]})
    return [f"renamed wave {label} to {new}"]
