"""The study folder on disk: codebook, stored waves and the ledger, written atomically.

The ledger is the single commit point. A wave's Parquet file is written under a fresh name
first; only the atomic rename of the new ledger makes it part of the study. A process killed
at any moment therefore leaves either the old study or the new one, never a half wave;
files that no ledger entry names are ignored (and stray temporary files are swept).
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import tempfile
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

from .errors import TrackerError

LEDGER = "ledger.json"
CODEBOOK = "codebook.yaml"
WAVES = "waves"
LOCK = ".lock"
CACHE = "cache"  # derived per-wave statistics (tracker.cache)
#: How long a writer waits for another one to finish before refusing (seconds).
LOCK_WAIT = 60.0
#: The keys every wave entry of the ledger must have.
ENTRY_KEYS = ("label", "date", "file", "source", "rows")


def sha256_of(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def fs_problem(exc: OSError, path: Path | str, doing: str) -> TrackerError:
    """One clear line for a file-system failure: which path, what went wrong, what to do."""
    hint = {errno.EACCES: "check the folder's permissions", errno.EPERM: "check the folder's permissions",
            errno.EROFS: "the file system is read-only", errno.ENOSPC: "free some disk space and try again",
            errno.EDQUOT: "the disk quota is full; free some space and try again"}.get(exc.errno, "")
    reason = exc.strerror or exc.__class__.__name__
    return TrackerError(f"{path}: cannot {doing} ({reason.lower()})" + (f"; {hint}" if hint else "")
                        + "; nothing was changed")


@contextmanager
def study_lock(root: Path, wait: float | None = None):
    """Hold the study's write lock (an advisory ``flock`` on ``<study>/.lock``) for the block.

    Every command that changes a study takes it, so two writers never interleave; a second
    writer waits up to ``wait`` seconds (default LOCK_WAIT) and then refuses."""
    import fcntl

    wait = LOCK_WAIT if wait is None else wait
    try:
        fd = os.open(root / LOCK, os.O_RDWR | os.O_CREAT, 0o666)
    except OSError as exc:
        raise fs_problem(exc, root / LOCK, "take the study's write lock") from None
    try:
        deadline = time.monotonic() + wait
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    raise TrackerError(f"{root}: another tracker command is changing this study (waited "
                                       f"{wait:g} s); try again when it has finished") from None
                time.sleep(0.05)
        yield
    finally:
        os.close(fd)  # closing releases the lock


def _umask_mode() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


@contextmanager
def incoming(path: Path, durable: bool = True):
    """A temporary file in ``path``'s folder, renamed over ``path`` when the block ends
    without error and removed otherwise (an interrupt included). ``durable`` syncs the file
    and the folder to disk (derived data, such as the cache, can skip it)."""
    # the writer's pid in the name: a sweep removes only the leftovers of dead processes
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".incoming-{os.getpid()}-", suffix=".tmp")
    os.close(fd)
    os.chmod(tmp, _umask_mode())  # mkstemp makes 0600; a finished file gets the usual mode
    try:
        yield tmp
        if durable:
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    if durable:
        _fsync_dir(path.parent)


def write_atomic(path: Path, data: bytes) -> None:
    """Write bytes to ``path`` via a temporary file in the same folder, fsync, then rename.
    A file-system failure ends in one TrackerError naming the path (nothing left behind)."""
    try:
        with incoming(path) as tmp:
            Path(tmp).write_bytes(data)
    except OSError as exc:
        raise fs_problem(exc, path, "write the file") from None


def write_parquet_atomic(path: Path, table) -> None:
    with incoming(path) as tmp:
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


def ledger_problems(ledger) -> list[str]:
    """What is structurally wrong with a parsed ledger (empty when nothing)."""
    if not isinstance(ledger, dict) or not isinstance(ledger.get("waves"), list):
        return ["no waves list"]
    out = []
    for i, w in enumerate(ledger["waves"], 1):
        if not isinstance(w, dict):
            out.append(f"wave entry {i} is not an object")
            continue
        missing = [k for k in ENTRY_KEYS if k not in w]
        if missing:
            out.append(f"wave entry {i} ({w.get('label', 'no label')}) lacks {', '.join(missing)}")
    labels = [w.get("label") for w in ledger["waves"] if isinstance(w, dict)]
    out += [f"wave {label} appears more than once" for label in sorted({x for x in labels if labels.count(x) > 1})]
    return out


def read_ledger(root: Path) -> dict:
    path = root / LEDGER
    if not path.is_file():
        raise TrackerError(f"{root}: not a study folder (no {LEDGER}); make one with 'tracker new'")
    try:
        ledger = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise fs_problem(exc, path, "read the ledger") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        where = f"line {exc.lineno}: {exc.msg}" if isinstance(exc, json.JSONDecodeError) else "not UTF-8 text"
        raise TrackerError(f"{path}: the ledger is damaged ({where}); run 'tracker verify {root}'") from None
    problems = ledger_problems(ledger)
    if problems:
        raise TrackerError(f"{path}: the ledger is damaged ({problems[0]}); run 'tracker verify {root}'")
    return ledger


WAVE_COLUMNS = ["wave", "fieldwork_date", "respondents", "source_file", "added_at", "weighting"]


def weighting_words(entry: dict) -> str:
    """How a stored wave is weighted, in words."""
    w = entry.get("weighting") or {}
    kind = w.get("kind", "")
    if kind == "file":
        return f"weights from the file ({w.get('column', 'weight column')})"
    if kind == "raked":
        return "raked to the codebook's targets"
    if kind == "none":
        return "unweighted"
    return kind


def wave_rows(ledger: dict) -> list[dict]:
    """The stored waves in fieldwork order, one plain row each (no pandas: `tracker waves`
    answers at once)."""
    return [{"wave": w["label"], "fieldwork_date": w["date"], "respondents": w["rows"], "source_file": w["source"],
             "added_at": w.get("added", ""), "weighting": weighting_words(w)}
            for w in sorted(ledger["waves"], key=lambda w: w["date"])]


def write_ledger(root: Path, ledger: dict) -> None:
    write_atomic(root / LEDGER, (json.dumps(ledger, indent=2, sort_keys=False) + "\n").encode("utf-8"))


def _writer_alive(tmp: Path) -> bool:
    try:
        pid = int(tmp.name.split("-")[1])
    except (IndexError, ValueError):
        return False
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def leftovers(root: Path) -> list[Path]:
    """Temporary files a killed write left behind (never part of the study); a temporary
    file of a process still running is its own business and is not listed."""
    return sorted(p for folder in (root, root / WAVES, root / CACHE) if folder.is_dir() for p in folder.glob(".incoming-*.tmp")
                  if not _writer_alive(p))


def sweep_incoming(root: Path) -> None:
    """Remove the temporary files of writers that died (never another process's live file)."""
    for stray in leftovers(root):
        stray.unlink(missing_ok=True)


def named_files(ledger: dict) -> set[str]:
    """Every stored file the ledger names, replaced versions (history) included."""
    out = set()
    for w in ledger["waves"]:
        out.add(w["file"])
        out.update(h["file"] for h in w.get("history", []) if isinstance(h, dict) and "file" in h)
    return out


def orphans(root: Path, ledger: dict) -> list[Path]:
    """Wave files no ledger entry names (a write that failed before its ledger commit)."""
    named = named_files(ledger)
    folder = root / WAVES
    return sorted(p for p in folder.glob("*.parquet") if f"{WAVES}/{p.name}" not in named) if folder.is_dir() else []


@dataclass
class Verification:
    """What ``tracker verify`` found: one line per problem, and what --repair removed."""

    root: Path
    problems: list[str] = field(default_factory=list)
    checked: int = 0
    removed: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def lines(self) -> list[str]:
        done = [f"removed {r}" for r in self.removed]
        if self.ok:
            return done + [f"{self.root}: ledger and {self.checked} stored file(s) agree; no leftovers"]
        return done + [f"{self.root}: {len(self.problems)} problem(s)"] + [f"  {p}" for p in self.problems]


def verify(root: Path, repair: bool = False) -> Verification:
    """Check a study on disk: the ledger's syntax and entries, every stored file's presence
    and SHA-256 against the ledger, files no entry names, and temporary leftovers. With
    ``repair``, remove the orphans and leftovers (never a named file)."""
    root = Path(root)
    out = Verification(root)
    path = root / LEDGER
    if not path.is_file():
        raise TrackerError(f"{root}: not a study folder (no {LEDGER})")
    try:
        ledger = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        out.problems.append(f"{LEDGER}: not valid JSON ({exc})")
        return out
    structural = ledger_problems(ledger)
    out.problems += [f"{LEDGER}: {p}" for p in structural]
    if structural:
        return out
    if not (root / CODEBOOK).is_file():
        out.problems.append(f"{CODEBOOK}: missing")
    for w in ledger["waves"]:
        versions = [w] + [h for h in w.get("history", []) if isinstance(h, dict) and "file" in h]
        for v in versions:
            f = root / v["file"]
            what = f"wave {w['label']}" + ("" if v is w else " (replaced version)")
            if not f.is_file():
                out.problems.append(f"{v['file']}: missing ({what})")
                continue
            out.checked += 1
            want = v.get("sha256")
            if want is None:
                continue  # stored before hashes were recorded: presence only
            if sha256_of(f) != want:
                out.problems.append(f"{v['file']}: changed or damaged since it was stored ({what}; SHA-256 differs)")
    stray = orphans(root, ledger) + leftovers(root)
    for p in stray:
        rel = p.relative_to(root)
        out.problems.append(f"{rel}: " + ("a temporary leftover of an interrupted write" if p.name.startswith(".incoming-")
                                          else "not named by the ledger (an orphan of a failed write)"))
    if repair and stray:
        removed = []
        with study_lock(root):
            for p in stray:
                p.unlink(missing_ok=True)
                removed.append(str(p.relative_to(root)))
        out = verify(root)
        out.removed = removed
    return out


def free_wave_file(root: Path, label: str) -> str:
    """A file name under waves/ not used yet: <label>.parquet, then <label>.v2.parquet, ..."""
    name = f"{label}.parquet"
    k = 2
    while (root / WAVES / name).exists():
        name = f"{label}.v{k}.parquet"
        k += 1
    return f"{WAVES}/{name}"
