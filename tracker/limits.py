"""The bounds on what the tool reads, checked before reading: a hostile or broken input
(a sparse file of gigabytes, a device, a pipe, a header of a million columns, a workbook at
the row limit) gets one clear refusal instead of exhausting the memory or hanging.
docs/reliability.md lists each bound with its message."""

from __future__ import annotations

import os
import stat
from pathlib import Path

from .errors import TrackerError

__all__ = ["MAX_COLUMNS", "MAX_FILE_BYTES", "MAX_XLSX_CELLS", "MAX_XLSX_UNPACKED", "regular_file"]

#: A wave file larger than this is refused (about 20 million respondents of 14 answers as
#: CSV); read as text, it would need ten times as much memory.
MAX_FILE_BYTES = 1 << 30
#: Columns of a wave file: far beyond any questionnaire (150 questions of 100 options).
MAX_COLUMNS = 100_000
#: Cells of a workbook's sheet (rows x columns, as the sheet declares or as counted): a
#: workbook is read whole into memory, so a larger wave is better delivered as CSV or Parquet.
MAX_XLSX_CELLS = 5_000_000
#: What a workbook's parts unpack to: a few MB zipped can unpack to gigabytes.
MAX_XLSX_UNPACKED = 1 << 30


def _size(n: int) -> str:
    return f"{n / (1 << 30):.0f} GiB" if n >= 1 << 30 else f"{n / (1 << 20):.0f} MiB"


def regular_file(path: Path, what: str, max_bytes: int) -> os.stat_result:
    """The ``stat`` of ``path`` once it is known to be a regular file of at most
    ``max_bytes``: a folder, a pipe or a device (which would hang or never end) and a file too
    large are refused by what they are, before a byte is read."""
    try:
        st = path.stat()
    except FileNotFoundError:
        raise TrackerError(f"{path}: file not found") from None
    except OSError as exc:
        raise TrackerError(f"{path}: cannot be read ({(exc.strerror or str(exc)).lower()})") from None
    if stat.S_ISDIR(st.st_mode):
        raise TrackerError(f"{path}: is a folder, not {what}")
    if not stat.S_ISREG(st.st_mode):
        kind = "a named pipe" if stat.S_ISFIFO(st.st_mode) else "a device" if (
            stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode)) else "a socket"
        raise TrackerError(f"{path}: is {kind}, not a regular file; give {what} itself")
    if st.st_size > max_bytes:
        raise TrackerError(f"{path}: is {_size(st.st_size)}, more than the {_size(max_bytes)} {what} may be; "
                           f"is this the right file?")
    return st
