"""The study folder on disk: codebook, stored waves and the ledger, written atomically.

The ledger is the single commit point. A wave's Parquet file is written under a fresh name
first; only the atomic rename of the new ledger makes it part of the study. A process killed
at any moment therefore leaves either the old study or the new one, never a half wave;
files that no ledger entry names are ignored (and stray temporary files are swept).
"""

from __future__ import annotations

import json
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

import pandas as pd

from .errors import TrackerError

LEDGER = "ledger.json"
CODEBOOK = "codebook.yaml"
WAVES = "waves"


def _umask_mode() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


@contextmanager
def _incoming(path: Path):
    """A temporary file in ``path``'s folder, renamed over ``path`` when the block ends
    without error and removed otherwise (an interrupt included)."""
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".incoming-", suffix=".tmp")
    os.close(fd)
    os.chmod(tmp, _umask_mode())  # mkstemp makes 0600; a finished file gets the usual mode
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    _fsync_dir(path.parent)


def write_atomic(path: Path, data: bytes) -> None:
    """Write bytes to ``path`` via a temporary file in the same folder, fsync, then rename."""
    with _incoming(path) as tmp:
        Path(tmp).write_bytes(data)


def write_parquet_atomic(path: Path, table: pd.DataFrame) -> None:
    with _incoming(path) as tmp:
        table.to_parquet(tmp, index=False)


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def read_ledger(root: Path) -> dict:
    path = root / LEDGER
    if not path.is_file():
        raise TrackerError(f"{root}: not a study folder (no {LEDGER}); make one with 'tracker new'")
    try:
        ledger = json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise TrackerError(f"{path}: the ledger is damaged (line {exc.lineno}: {exc.msg})") from None
    if not isinstance(ledger, dict) or "waves" not in ledger:
        raise TrackerError(f"{path}: the ledger is damaged (no waves list)")
    return ledger


def write_ledger(root: Path, ledger: dict) -> None:
    write_atomic(root / LEDGER, (json.dumps(ledger, indent=2, sort_keys=False) + "\n").encode("utf-8"))


def sweep_incoming(root: Path) -> None:
    """Remove temporary files a killed write may have left (they are never part of the study)."""
    for folder in (root, root / WAVES):
        if folder.is_dir():
            for stray in folder.glob(".incoming-*.tmp"):
                stray.unlink(missing_ok=True)


def free_wave_file(root: Path, label: str) -> str:
    """A file name under waves/ not used yet: <label>.parquet, then <label>.v2.parquet, ..."""
    name = f"{label}.parquet"
    k = 2
    while (root / WAVES / name).exists():
        name = f"{label}.v{k}.parquet"
        k += 1
    return f"{WAVES}/{name}"
