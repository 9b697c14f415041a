"""Per-wave sufficient statistics kept in the study folder, so that estimates, changes,
trends and the brief read small per-cell tables instead of every wave's respondents.

Derived data, never the source of truth: a wave's entry is used only when its key (the
stored wave file's SHA-256 in the ledger and its size, the codebook's SHA-256 and
:data:`tracker.estimates.STATS_VERSION`) matches; otherwise the statistics are computed
again from the wave and the entry rewritten. Entries are written atomically (a temporary
file renamed into place) under the study's write lock; a reader that cannot have the lock
at once, or cannot write the folder, simply computes and goes on. ``tracker verify
--repair`` may delete the whole folder at any time.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

from . import store
from .errors import TrackerError
from .estimates import STATS, STATS_VERSION, CellArrays
from .methods.variance import PsuTotals

__all__ = ["CACHE", "cache_key", "hash_ids", "read_cells", "read_entry", "read_psu", "write_cells", "write_psu"]

CACHE = store.CACHE
FORMAT = 2  # 2: every entry carries the digest of its arrays


def cache_key(root: Path, entry: dict, codebook_sha256: str) -> str:
    """The key of a wave's entry: what the statistics were computed from. A stored wave file
    is never rewritten (a replaced wave gets a new file and SHA-256 in the ledger), so the
    ledger's SHA-256 and the file's size name its content; a copied study keeps its cache.
    A file changed behind the ledger's back is damage, which ``tracker verify`` finds."""
    path = root / entry["file"]
    try:
        size = path.stat().st_size
    except OSError:
        size = None
    text = json.dumps([FORMAT, STATS_VERSION, entry["file"], entry.get("sha256"), size, codebook_sha256])
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def hash_ids(ids) -> np.ndarray:
    """64-bit hashes of respondent ids as text (pandas' hash): the same id hashes alike in
    every wave and by every engine, so shared respondents are found without reading waves."""
    import pandas as pd

    return pd.util.hash_array(pd.Series(ids).astype(str).to_numpy(dtype=object))


def _path(root: Path, label: str, part: str = "") -> Path:
    return root / CACHE / f"{label}{part}.npz"


def _digest(arrays: dict) -> str:
    """SHA-256 of an entry's arrays (names, types, shapes and bytes), stored beside them: an
    entry cut short, garbled or edited by hand no longer matches and is computed again."""
    h = hashlib.sha256()
    for name in sorted(k for k in arrays if k != "digest"):
        a = np.ascontiguousarray(arrays[name])
        h.update(f"{name}|{a.dtype.str}|{a.shape}|".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _open(root: Path, label: str, key: str, part: str = "") -> dict | None:
    """Every array of an entry whose key and digest match, or None (missing, unreadable,
    stale, short or forged: whatever the damage, the statistics are computed again)."""
    try:
        with np.load(_path(root, label, part), allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except Exception:  # noqa: BLE001 - numpy and zipfile raise many types for a damaged file
        return None
    try:
        if str(arrays["key"]) != key or str(arrays["digest"]) != _digest(arrays):
            return None
    except (KeyError, ValueError, TypeError):
        return None
    return arrays


def read_entry(root: Path, label: str, key: str) -> tuple[CellArrays, np.ndarray | None] | None:
    """The cached statistics of a wave (without the cluster totals) and the sorted hashes of
    its respondent ids (None when it has no id column), from one read of its entry; or None."""
    data = _open(root, label, key)
    if data is None:
        return None
    try:
        shape = (len(data["group"]), len(data["metrics"]))  # levels x metrics
        if len(data["level"]) != shape[0] or any(np.shape(data[k]) != shape for k in STATS):
            return None  # an entry one cell short (or long) is not this wave's
        cells = CellArrays(tuple(data["metrics"].tolist()), tuple(data["group"].tolist()),
                           tuple(data["level"].tolist()), {k: data[k] for k in STATS})
        return cells, data.get("id_hashes")
    except (KeyError, ValueError, TypeError, IndexError):
        return None


def read_cells(root: Path, label: str, key: str) -> CellArrays | None:
    """The cached statistics of a wave (without the cluster totals), or None."""
    got = read_entry(root, label, key)
    return None if got is None else got[0]


def read_psu(root: Path, label: str, key: str) -> tuple[PsuTotals, np.ndarray] | None:
    """The cached cluster totals of every cell's linearized values and the clusters' names
    (kept apart, in <label>.psu.npz: only comparisons of waves sharing clusters read them)."""
    data = _open(root, label, key, ".psu")
    if data is None or "psu_totals" not in data:
        return None
    try:
        totals, stratum, names = data["psu_totals"], data["psu_stratum"], data["psu_names"]
        if totals.ndim != 2 or len(stratum) != totals.shape[0] or len(names) != totals.shape[0]:
            return None
        factor = data.get("psu_factor")
        return PsuTotals(totals, stratum, int(data["psu_n_strata"]), factor), names
    except (KeyError, ValueError, TypeError, IndexError):
        return None


def write_cells(root: Path, label: str, key: str, cells: CellArrays | None, id_hashes: np.ndarray | None = None,
                locked: bool = False, psu: bool = True) -> bool:
    """Store a wave's statistics and ids (``cells`` None: only its cluster totals), and with
    ``psu`` its cluster totals when it has them; True when written.

    ``locked`` says the caller already holds the study's write lock (an ``add``)."""
    parts = {}
    if cells is not None:
        main = {"key": np.array(key), "metrics": np.array(cells.metrics, dtype=str),
                "group": np.array(cells.group, dtype=str), "level": np.array(cells.level, dtype=str),
                **{k: np.asarray(cells.stats[k], float) for k in STATS}}
        if id_hashes is not None:
            main["id_hashes"] = np.sort(np.asarray(id_hashes, np.uint64))
        parts[""] = main
    if psu and cells is not None and cells.psu is not None and cells.psu_names is not None:
        parts[".psu"] = {"key": np.array(key), "psu_totals": cells.psu.totals, "psu_stratum": cells.psu.stratum,
                         "psu_n_strata": np.array(cells.psu.n_strata),
                         **({"psu_factor": cells.psu.factor} if cells.psu.factor is not None else {}),
                         "psu_names": np.asarray(cells.psu_names, dtype=str)}
    if not parts:
        return False
    folder = root / CACHE
    try:
        folder.mkdir(exist_ok=True)
        if locked:
            _write(folder, label, parts)
        else:
            with store.study_lock(root, wait=0):
                _write(folder, label, parts)
    except (OSError, TrackerError):
        return False  # busy or read-only: the statistics were computed; only the saving is skipped
    return True


def write_psu(root: Path, label: str, key: str, cells: CellArrays) -> bool:
    """Store only a wave's cluster totals (computed when a comparison first needs them)."""
    if cells.psu is None or cells.psu_names is None:
        return False
    folder = root / CACHE
    try:
        folder.mkdir(exist_ok=True)
        with store.study_lock(root, wait=0):
            _write(folder, label, {".psu": {"key": np.array(key), "psu_totals": cells.psu.totals,
                                            "psu_stratum": cells.psu.stratum,
                                            "psu_n_strata": np.array(cells.psu.n_strata),
                                            **({"psu_factor": cells.psu.factor} if cells.psu.factor is not None
                                               else {}),
                                            "psu_names": np.asarray(cells.psu_names, dtype=str)}})
    except (OSError, TrackerError):
        return False
    return True


def _write(folder: Path, label: str, parts: dict[str, dict]) -> None:
    # no fsync: after a crash an entry may be cut short, and then it fails to load or its key
    # to match, and is computed again; the cost of syncing the cache is not worth it
    for part, arrays in parts.items():
        arrays = {**arrays, "digest": np.array(_digest(arrays))}
        with store.incoming(folder / f"{label}{part}.npz", durable=False) as tmp, open(tmp, "wb") as fh:
            np.savez(fh, **arrays)
