"""The per-wave statistics of a study: every cell's sufficient statistics of each stored wave
(all metrics, every split), its respondents' id hashes and, when a comparison needs them, its
cluster totals; computed once from the wave's respondents and kept in memory and in the
study's cache folder (tracker.cache, derived and keyed by the stored file and the codebook).

This is the one owner of that concern: Study and the scale path (tracker.scale) go through
:class:`CellStore`, never through the cache files directly.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .codebook import Codebook
from .estimates import CellArrays
from .waves import StoredWaves

__all__ = ["CellStore"]


class CellStore:
    """Every stored wave's cell statistics, read from the cache or computed, once per process.

    Parameters
    ----------
    root : Path
        The study folder.
    codebook : Codebook
        The study's codebook (its metrics and groups define the cells).
    waves : StoredWaves
        The study's stored waves (their ledger entries, checked files and tables).
    """

    def __init__(self, root: Path, codebook: Codebook, waves: StoredWaves):
        self.root, self.codebook, self.waves = root, codebook, waves
        self._entry, self._stored_path, self._load = waves.entry, waves.stored_path, waves.load
        self._memory: dict[tuple, Any] = {}

    def key(self, label: str) -> str:
        """The cache key of a wave: its stored file, the codebook and the statistics' version."""
        from .cache import cache_key

        return cache_key(self.root, self._entry(label), self.codebook.sha256)

    def compute(self, table: pd.DataFrame) -> tuple[CellArrays, np.ndarray | None]:
        """Every cell's statistics of a wave table (all metrics, every split) and the hashes
        of its respondent ids."""
        from .cache import hash_ids
        from .estimates import cell_arrays

        book = self.codebook
        cells = cell_arrays(book, table, list(book.metrics.values()), list(book.groups),
                            keep_psu=bool(book.clusters and book.waves_share_clusters))
        ids = hash_ids(table[book.id]) if book.id and book.id in table.columns else None
        return cells, ids

    def _compute_stored(self, label: str, locked: bool = False):
        """A stored wave's statistics, computed from its respondents and saved in the cache."""
        from .cache import write_cells

        cells, ids = self.compute(self._load(label))
        # the cluster totals are written when a comparison first needs them (psu)
        write_cells(self.root, label, self.key(label), cells, ids, locked=locked, psu=False)
        return cells, ids

    def cells(self, label: str) -> CellArrays:
        """Every cell's statistics of a wave: from memory, the study's cache, or computed."""
        key = ("cells", label)
        if key not in self._memory:
            from .cache import read_entry

            self._stored_path(label)  # what the cache holds is derived from this file: it must be sound
            got = read_entry(self.root, label, self.key(label))
            cells = None if got is None else got[0]
            if got is not None and cells is not None:
                self._memory[("ids", label)] = got[1]
            if cells is None or cells.metrics != tuple(self.codebook.metrics):
                cells, ids = self._compute_stored(label)
                if cells.psu is not None:  # saved if a comparison asks for them (psu)
                    self._memory[("psu fresh", label)] = cells
                self._memory[("ids", label)] = ids
                cells = replace(cells, psu=None, psu_names=None)
            self._memory[key] = cells
        return self._memory[key]

    def psu(self, label: str):
        """(cluster totals of every cell's linearized values, cluster names) of a wave."""
        key = ("psu", label)
        if key not in self._memory:
            from .cache import read_psu, write_psu

            self._stored_path(label)
            got: Any = read_psu(self.root, label, self.key(label))
            if got is None:
                cells = self._memory.pop(("psu fresh", label), None) or self.compute(self._load(label))[0]
                write_psu(self.root, label, self.key(label), cells)
                got = (cells.psu, cells.psu_names)
            self._memory[key] = got
        return self._memory[key]

    def id_hashes(self, label: str) -> np.ndarray | None:
        """Sorted 64-bit hashes of a wave's respondent ids (None when the study has no ids)."""
        if not self.codebook.id:
            return None
        self.cells(label)  # the ids come with the cells, read or computed
        return self._memory.get(("ids", label))

    def store(self, label: str, cells: CellArrays, ids: np.ndarray | None, locked: bool = False) -> None:
        """Keep a wave's freshly computed statistics, in the cache and in memory (add)."""
        from .cache import write_cells

        write_cells(self.root, label, self.key(label), cells, ids, locked=locked)
        self._memory[("cells", label)] = replace(cells, psu=None, psu_names=None)
        self._memory[("ids", label)] = ids

    def estimates(self, metrics: list, groups: list[str], waves: list[str], level: float = 0.95,
                  detail: bool = False, interval: str = "wilson") -> pd.DataFrame:
        """The estimates of ``metrics`` in ``waves``, in total and by ``groups``, finished from
        the cell statistics (tracker.estimates.estimates_frame); cells nobody answered are left
        out. Kept in memory: trends, surprises and charts ask for the same table again."""
        from .estimates import COLUMNS, estimates_frame
        from .options import check_level

        check_level(level)
        dates, names = self.waves.dates(), [m.name for m in metrics]
        key = ("estimates", tuple(waves), tuple(names), tuple(groups), level, interval)
        if key not in self._memory:
            parts = [(w, dates[w], self.cells(w).select(names, groups)) for w in waves]
            out = estimates_frame(parts, metrics, level, interval)
            self._memory[key] = out[out["base"] > 0].reset_index(drop=True)
        out = self._memory[key]
        return out.copy() if detail else out[COLUMNS]

    def forget(self) -> None:
        """Drop what is held in memory (after a wave was added or the cache refilled)."""
        self._memory = {}
