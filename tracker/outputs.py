"""Where results may be written, and writing them: every output of every command goes
through :func:`write_output`, which refuses a path that would overwrite what the tool
reads (a study folder and everything in it, an input file) and writes atomically (a
temporary file renamed into place), so a failed write leaves no partial file.

Standard library only: the quick commands (``waves``, ``check``) write through it too.
"""

from __future__ import annotations

import os
import stat
from collections.abc import Iterable
from pathlib import Path

from .errors import TrackerError

__all__ = ["check_output", "study_folder_of", "write_output"]

# the two files whose presence makes a folder a study (store.LEDGER and store.CODEBOOK)
_MARKERS = ("ledger.json", "codebook.yaml")


def study_folder_of(path: Path) -> Path | None:
    """The study folder that holds ``path`` (itself or any folder above it), or None."""
    for folder in (path, *path.parents):
        if all((folder / m).is_file() for m in _MARKERS):
            return folder
    return None


def check_output(path: str | Path, inputs: Iterable[str | Path] = ()) -> Path:
    """Refuse, in one line, an output path that is a folder, lies in a missing folder or in
    a study folder (the ledger, the codebook, stored waves and the cache included), is one
    of the command's ``inputs``, or names something other than a regular file; return it."""
    path = Path(path)
    try:
        if path.is_dir():
            raise TrackerError(f"{path}: is a folder; give a file name to write to")
        if not path.parent.is_dir():
            raise TrackerError(f"{path}: the folder {path.parent} does not exist")
        real = path.resolve()  # symbolic links followed: a link into a study is refused too
        if real.exists() and not stat.S_ISREG(real.stat().st_mode):
            raise TrackerError(f"{path}: is not a regular file (a device, pipe or socket); give a file name")
        study = study_folder_of(real.parent)
        if study is not None:
            raise TrackerError(f"{path}: lies inside the study folder {study}, which only tracker writes "
                               f"(its ledger, codebook and stored waves); write outputs elsewhere")
        for given in inputs:
            given = Path(given)
            if given.exists() and real.exists() and os.path.samefile(given, real):
                raise TrackerError(f"{path}: is an input of this command ({given}); give another file name")
    except OSError as exc:
        raise TrackerError(f"{path}: cannot be used as an output ({(exc.strerror or str(exc)).lower()})") from None
    return path


def write_output(path: str | Path, data: bytes, inputs: Iterable[str | Path] = ()) -> Path:
    """Write ``data`` to ``path`` after :func:`check_output`, through a temporary file in
    the same folder renamed into place (a failure leaves no partial file)."""
    from .store import write_atomic

    path = check_output(path, inputs)
    write_atomic(path, data)
    return path
