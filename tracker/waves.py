"""The stored waves of a study as one typed record: the ledger's entries in fieldwork order,
each wave's stored file (checked against its SHA-256 before it is read) and its respondent
table. Lower layers (the per-wave statistics, the comparisons) receive this record, never
the Study."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from . import store
from .errors import TrackerError

__all__ = ["StoredWaves", "WaveEntry"]


@dataclass(frozen=True)
class WaveEntry:
    """One stored wave as the ledger records it (the ledger's own keys in ``raw``)."""

    label: str
    date: str
    rows: int
    file: str
    raw: dict

    @classmethod
    def of(cls, entry: dict) -> WaveEntry:
        return cls(entry["label"], entry["date"], int(entry["rows"]), entry["file"], entry)


class StoredWaves:
    """The waves of the study at ``root`` as its ledger lists them.

    Parameters
    ----------
    root : Path
        The study folder.
    ledger : dict
        The ledger as read (tracker.store.read_ledger); replaced by :meth:`update`.
    """

    def __init__(self, root: Path, ledger: dict):
        self.root = root
        self.ledger = ledger
        self._files = store.StoredFiles(root)  # each stored file checked against its SHA-256
        self._tables: dict[str, pd.DataFrame] = {}

    def update(self, ledger: dict) -> None:
        """Hold a newer ledger (read again under the lock, or just committed)."""
        self.ledger = ledger
        self._tables = {}

    def forget(self) -> None:
        """Drop the tables held in memory."""
        self._tables = {}

    @property
    def entries(self) -> list[dict]:
        """The ledger's wave entries in fieldwork order."""
        return sorted(self.ledger["waves"], key=lambda w: w["date"])

    @property
    def labels(self) -> list[str]:
        return [w["label"] for w in self.entries]

    def dates(self) -> dict[str, str]:
        """Each wave's fieldwork date (ISO)."""
        return {w["label"]: w["date"] for w in self.entries}

    def entry(self, label: str) -> dict:
        """The ledger entry of a stored wave (refuses a label that is not stored)."""
        for w in self.ledger["waves"]:
            if w["label"] == label:
                return w
        raise TrackerError(f"{self.root}: no wave labelled {label!r} (stored: {', '.join(self.labels) or 'none'})")

    def typed(self, label: str) -> WaveEntry:
        """The ledger entry of a stored wave as a :class:`WaveEntry`."""
        return WaveEntry.of(self.entry(label))

    def stored_path(self, label: str) -> Path:
        """The stored file of a wave, once it is known to be the file the ledger recorded (its
        SHA-256); a changed, swapped or damaged file is refused with a pointer to verify."""
        return self._files.check(self.entry(label))

    def remember(self, fname: str, sha: str) -> None:
        """A file just written and committed under the lock: known sound without hashing it again."""
        self._files.remember(fname, store._stamp(self.root / fname, sha), locked=True)

    def load(self, label: str) -> pd.DataFrame:
        """The harmonized respondent table of one stored wave."""
        if label not in self._tables:
            path = self.stored_path(label)
            try:
                self._tables[label] = pd.read_parquet(path)
            except OSError as exc:
                if isinstance(exc, PermissionError) or exc.errno is not None:
                    raise store.fs_problem(exc, path, f"read wave {label}") from None
                raise TrackerError(f"{path}: the stored file of wave {label} is damaged ({exc}); "
                                   f"run 'tracker verify {self.root}'") from None
            except Exception as exc:  # noqa: BLE001 - pyarrow's own errors for truncated or foreign files
                raise TrackerError(f"{path}: the stored file of wave {label} is damaged "
                                   f"({exc.__class__.__name__}); run 'tracker verify {self.root}'") from None
        return self._tables[label]

    def pick(self, labels=None) -> list[str]:
        """The stored waves named (one label or a list), in fieldwork order; all when none."""
        labels = [labels] if isinstance(labels, str) else labels
        if not self.labels:
            raise TrackerError(f"{self.root}: no waves stored yet; add one with 'tracker add'")
        if not labels:
            return self.labels
        for lab in labels:
            self.entry(lab)
        return [lab for lab in self.labels if lab in labels]
