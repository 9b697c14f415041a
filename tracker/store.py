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
import posixpath
import re
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
            errno.EDQUOT: "the disk quota is full; free some space and try again"}.get(exc.errno or 0, "")
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


#: A wave label as the ledger must hold it (the same rule as a new wave's label).
_LABEL = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,39}")
_SHA256 = re.compile(r"[0-9a-f]{64}")


def stored_file_name(text) -> str | None:
    """A ledger's file entry in its one spelling, ``waves/<name>.parquet`` (``./waves/x`` and
    ``waves//x`` are the same file); None for anything else: an absolute path, ``..``, a
    file outside ``waves/`` or not a Parquet file, a name that is not text."""
    if not isinstance(text, str) or "\x00" in text or "\\" in text or text.startswith("/"):
        return None
    norm = posixpath.normpath(text)
    folder, _, name = norm.partition("/")
    if folder != WAVES or not name or "/" in name or name.startswith(".") or not name.endswith(".parquet"):
        return None
    return norm


def _version_problems(v, where: str) -> list[str]:
    """What is wrong with one version (current or replaced) of a wave entry."""
    out = []
    if stored_file_name(v.get("file")) is None:
        out.append(f"{where}: file {str(v.get('file'))[:80]!r} is not a stored wave file (waves/<name>.parquet, "
                   f"no absolute path, no '..')")
    if "sha256" in v and not (isinstance(v["sha256"], str) and _SHA256.fullmatch(v["sha256"])):
        out.append(f"{where}: sha256 is not a SHA-256 hex digest")
    rows = v.get("rows")
    if "rows" in v and (isinstance(rows, bool) or not isinstance(rows, int) or rows < 0):
        out.append(f"{where}: rows {str(rows)[:40]!r} is not a whole number")
    return out


def ledger_problems(ledger) -> list[str]:
    """What is structurally wrong with a parsed ledger (empty when nothing): the waves list,
    every entry's keys and their types (:func:`_entry_problems`), the stored files' names,
    labels given twice (:func:`_shared_problems`)."""
    if not isinstance(ledger, dict) or not isinstance(ledger.get("waves"), list):
        return ["no waves list"]
    out = []
    for i, w in enumerate(ledger["waves"], 1):
        out += _entry_problems(i, w)
    return out + _shared_problems(ledger["waves"])


def _entry_problems(i: int, w) -> list[str]:
    """One wave entry: an object with every key, a wave label, an ISO date, a file name, and
    its earlier versions of the same shape."""
    if not isinstance(w, dict):
        return [f"wave entry {i} is not an object"]
    label = w.get("label")
    where = f"wave entry {i} ({label if isinstance(label, str) else 'no label'})"
    missing = [k for k in ENTRY_KEYS if k not in w]
    if missing:
        return [f"{where} lacks {', '.join(missing)}"]
    out = []
    if not isinstance(label, str) or not _LABEL.fullmatch(label):
        out.append(f"{where}: label {str(label)[:40]!r} is not a wave label")
    if not isinstance(w["date"], str) or not _is_iso_date(w["date"]):
        out.append(f"{where}: date {str(w['date'])[:40]!r} is not an ISO date (YYYY-MM-DD)")
    if not isinstance(w["source"], str):
        out.append(f"{where}: source is not a file name")
    out += _version_problems(w, where)
    history = w.get("history", [])
    if not isinstance(history, list) or not all(isinstance(h, dict) for h in history):
        return [*out, f"{where}: history is not a list of earlier versions"]
    return out + [p for j, h in enumerate(history, 1) for p in _version_problems(h, f"{where}, replaced version {j}")]


def _shared_problems(waves: list) -> list[str]:
    """Across entries: a label given twice, a stored file named by two entries or versions."""
    from collections import Counter

    labels = Counter(w["label"] for w in waves if isinstance(w, dict) and isinstance(w.get("label"), str))
    out = [f"wave {label} appears more than once" for label in sorted(x for x, k in labels.items() if k > 1)]
    files: Counter[str] = Counter()
    for w in waves:
        earlier: list = w["history"] if isinstance(w, dict) and isinstance(w.get("history"), list) else []
        for v in [w, *earlier] if isinstance(w, dict) else []:
            name = stored_file_name(v.get("file")) if isinstance(v, dict) else None
            if name:
                files[name] += 1
    return out + [f"file {f} is named by more than one entry" for f in sorted(f for f, k in files.items() if k > 1)]


def _is_iso_date(text: str) -> bool:
    import datetime as dt

    try:
        dt.date.fromisoformat(text)
    except ValueError:
        return False
    return len(text) == 10


def _parse_ledger(path: Path):
    """The ledger's JSON, or raise ValueError with where it is broken."""
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise ValueError(f"line {exc.lineno}: {exc.msg}") from None
    except UnicodeDecodeError:
        raise ValueError("not UTF-8 text") from None
    except RecursionError:
        raise ValueError("nested too deeply to be a ledger") from None


def _normalised(ledger: dict) -> dict:
    """The ledger with every file entry in its one spelling (see stored_file_name)."""
    for w in ledger["waves"]:
        for v in [w, *w.get("history", [])]:
            v["file"] = stored_file_name(v["file"])
    return ledger


def read_ledger(root: Path) -> dict:
    path = root / LEDGER
    if not path.is_file():
        raise TrackerError(f"{root}: not a study folder (no {LEDGER}); make one with 'tracker new'")
    try:
        ledger = _parse_ledger(path)
    except OSError as exc:
        raise fs_problem(exc, path, "read the ledger") from None
    except ValueError as exc:
        raise TrackerError(f"{path}: the ledger is damaged ({exc}); run 'tracker verify {root}'") from None
    problems = ledger_problems(ledger)
    if problems:
        raise TrackerError(f"{path}: the ledger is damaged ({problems[0]}); run 'tracker verify {root}'")
    return _normalised(ledger)


WAVE_COLUMNS = ["wave", "fieldwork_date", "respondents", "source_file", "added_at", "weighting", "order"]


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


def _sortable_form(label: str) -> str | None:
    """The form of a label that sorts as time (a year first: 2025-Q1, 2025-03, 2025-03-31),
    each digit 9 and each letter A; None for labels that need not sort (W7, spring)."""
    form = re.sub(r"[A-Za-z]", "A", re.sub(r"[0-9]", "9", label))
    return form if form.startswith("9999") else None


def order_clashes(pairs: list[tuple[str, str]]) -> list[tuple[str, str]]:
    """(label, other) for stored waves whose fieldwork dates put them in another order than
    their labels, where both labels are of one form that sorts as time (``pairs``: (label,
    ISO date)). A date typed a year off shows here."""
    out = []
    for a, da in pairs:
        for b, db in pairs:
            fa, fb = _sortable_form(a), _sortable_form(b)
            if a < b and fa is not None and fa == fb and da > db:
                out.append((a, b))
    return out


def wave_rows(ledger: dict) -> list[dict]:
    """The stored waves in fieldwork order, one plain row each (no pandas: `tracker waves`
    answers at once)."""
    clash = {x for pair in order_clashes([(w["label"], w["date"]) for w in ledger["waves"]]) for x in pair}
    return [{"wave": w["label"], "fieldwork_date": w["date"], "respondents": w["rows"], "source_file": w["source"],
             "added_at": w.get("added", ""), "weighting": weighting_words(w),
             "order": "date out of label order" if w["label"] in clash else ""}
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
    return sorted(p for folder in (root, root / WAVES, root / CACHE) if folder.is_dir()
                  for p in folder.glob(".incoming-*.tmp") if not _writer_alive(p))


def sweep_incoming(root: Path) -> None:
    """Remove the temporary files of writers that died (never another process's live file)."""
    for stray in leftovers(root):
        stray.unlink(missing_ok=True)


def named_files(ledger: dict) -> set[str]:
    """Every stored file the ledger names, replaced versions (history) included, each in its
    one spelling (``waves/<name>.parquet``)."""
    out: set[str] = set()
    for w in [*ledger["waves"], *removed_entries(ledger)]:
        for v in [w, *w.get("history", [])]:
            name = stored_file_name(v.get("file")) if isinstance(v, dict) else None
            if name:
                out.add(name)
    return out


def removed_entries(ledger: dict) -> list[dict]:
    """The entries of waves taken out of the study (tracker.managing); their files are kept."""
    removed = ledger.get("removed", [])
    return [w for w in removed if isinstance(w, dict)] if isinstance(removed, list) else []


def orphans(root: Path, ledger: dict) -> list[Path]:
    """Wave files no version of any ledger entry names (a write that failed before its
    ledger commit). Only meaningful under the study lock: an add in flight has written its
    file and not yet committed its entry."""
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
            return done + [f"{self.root}: ledger, codebook and {self.checked} stored file(s) agree; no leftovers"]
        return done + [f"{self.root}: {len(self.problems)} problem(s)"] + [f"  {p}" for p in self.problems]


def verify(root: Path, repair: bool = False) -> Verification:
    """Check a study on disk: the ledger's syntax and entries, the codebook (readable, and
    the one the ledger recorded), every stored file's presence and SHA-256 against the
    ledger, files no entry names, and temporary leftovers. With ``repair``, remove the
    orphans and leftovers (never a file any version of the ledger names).

    Both run under the study's write lock (waiting for a writer at work, as a second
    writer would), against the ledger as it stands once the lock is held: a wave an add
    has written but not yet committed is never taken for an orphan. A study whose lock
    cannot be taken (a read-only folder) is checked without it, and never repaired."""
    root = Path(root)
    if not (root / LEDGER).is_file():
        raise TrackerError(f"{root}: not a study folder (no {LEDGER})")
    try:
        with study_lock(root):
            out = _verify_locked(root)
            if repair and out.strays:
                removed = []
                for p in out.strays:
                    try:
                        p.unlink(missing_ok=True)
                    except OSError as exc:
                        raise fs_problem(exc, p, "remove the leftover") from None
                    removed.append(str(p.relative_to(root)))
                out = _verify_locked(root)
                out.removed = removed
    except TrackerError:
        if repair or os.access(root, os.W_OK):
            raise
        out = _verify_locked(root)  # a read-only study: nothing can be in flight, nothing is repaired
    return out


@dataclass
class _Found(Verification):
    strays: list[Path] = field(default_factory=list)


def _verify_locked(root: Path) -> _Found:
    out = _Found(root)
    try:
        ledger = _parse_ledger(root / LEDGER)
    except ValueError as exc:
        out.problems.append(f"{LEDGER}: not valid JSON ({exc})")
        return out
    except OSError as exc:
        raise fs_problem(exc, root / LEDGER, "read the ledger") from None
    structural = ledger_problems(ledger)
    out.problems += [f"{LEDGER}: {p}" for p in structural]
    if structural:
        return out  # nothing is removed from a study whose ledger cannot be read
    out.problems += _codebook_problems(root, ledger)
    removed = [w for w in removed_entries(ledger) if stored_file_name(w.get("file"))]
    for w in [*ledger["waves"], *removed]:
        for v in [w, *w.get("history", [])]:
            name = stored_file_name(v["file"]) or ""  # checked by ledger_problems above
            f = root / name
            what = (f"wave {w['label']}" + (" (removed)" if w in removed else "")
                    + ("" if v is w else " (replaced version)"))
            if not f.is_file():
                out.problems.append(f"{name}: missing ({what})")
                continue
            out.checked += 1
            want = v.get("sha256")
            if want is None:
                continue  # stored before hashes were recorded: presence only
            if sha256_of(f) != want:
                out.problems.append(f"{name}: changed or damaged since it was stored ({what}; SHA-256 differs)")
    out.strays = orphans(root, ledger) + leftovers(root)
    for p in out.strays:
        rel = p.relative_to(root)
        what = ("a temporary leftover of an interrupted write" if p.name.startswith(".incoming-")
                else "not named by the ledger (an orphan of a failed write)")
        out.problems.append(f"{rel}: {what}")
    return out


def codebook_version(book, note: str) -> dict:
    """A ledger record of a codebook version: its SHA-256, when, a note, and its text (so that a
    later amendment can tell which waves' results change)."""
    import datetime as dt

    return {"sha256": book.sha256, "recorded": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
            "note": note, "text": book.source}


def codebook_sha256(ledger: dict) -> str | None:
    """The SHA-256 of the codebook the study was made with, as the ledger records it (older
    ledgers: the codebook of the latest wave added)."""
    if isinstance(ledger.get("codebook_sha256"), str):
        return ledger["codebook_sha256"]
    added = [w for w in ledger["waves"] if isinstance(w.get("codebook_sha256"), str)]
    return max(added, key=lambda w: str(w.get("added", "")))["codebook_sha256"] if added else None


def _codebook_problems(root: Path, ledger: dict) -> list[str]:
    """The codebook missing, unreadable, or not the one the ledger recorded."""
    from .codebook import load_codebook

    path = root / CODEBOOK
    if not path.is_file():
        return [f"{CODEBOOK}: missing"]
    try:
        book = load_codebook(path)
    except TrackerError as exc:
        return [f"{CODEBOOK}: cannot be read ({str(exc)[:300]})"]
    from .codebook import reference_problems

    found = reference_problems(book, [w["label"] for w in ledger["waves"]])
    if found:
        return [f"{CODEBOOK}: {p.removeprefix('codebook: ')}" for p in found]
    want = codebook_sha256(ledger)
    if want is not None and book.sha256 != want:
        return [(f"{CODEBOOK}: changed since the study recorded it (SHA-256 differs); the stored waves were "
                 f"checked against the recorded version: record the change with 'tracker amend {root} --note "
                 f"\"what changed\"', or put the recorded version back")]
    return []


#: In cache/: the size, modification time and inode at which each stored file was last
#: found to have its ledger SHA-256 (derived data: losing it costs one hash per file).
HASHED = "hashed.json"


def _stamp(path: Path, sha256: str) -> list:
    st = path.stat()
    return [st.st_size, st.st_mtime_ns, st.st_ino, sha256]


class StoredFiles:
    """Every stored wave file is checked against the SHA-256 its ledger entry records before
    anything reads it or what was derived from it: once per process, and without reading it
    again while its size, modification time and inode are those at which it last matched
    (kept in ``cache/hashed.json``); a file damaged, replaced or swapped since is refused."""

    def __init__(self, root: Path):
        self.root = root
        self._stamps: dict | None = None
        self._done: set[str] = set()

    def _load(self) -> dict:
        if self._stamps is None:
            try:
                got = json.loads((self.root / CACHE / HASHED).read_text(encoding="utf-8"))
                self._stamps = got if isinstance(got, dict) else {}
            except (OSError, ValueError, RecursionError):
                self._stamps = {}
        return self._stamps

    def check(self, entry: dict) -> Path:
        """The path of an entry's stored file, once it is known to be what the ledger says."""
        name, want = entry["file"], entry.get("sha256")
        path = self.root / name
        if name in self._done:
            return path
        what = f"the stored file of wave {entry['label']}"
        try:
            stamp = _stamp(path, want) if want else None
        except FileNotFoundError:
            raise TrackerError(f"{path}: {what} is missing; run 'tracker verify {self.root}'") from None
        except OSError as exc:
            raise fs_problem(exc, path, f"read wave {entry['label']}") from None
        if stamp is not None and self._load().get(name) != stamp:
            try:
                got = sha256_of(path)
            except OSError as exc:
                raise fs_problem(exc, path, f"read wave {entry['label']}") from None
            if got != want:
                raise TrackerError(f"{path}: {what} is damaged or has changed since it was stored (its "
                                   f"SHA-256 is not the ledger's); nothing was computed from it; run "
                                   f"'tracker verify {self.root}'")
            self.remember(name, stamp)
        self._done.add(name)
        return path

    def remember(self, name: str, stamp: list, locked: bool = False) -> None:
        """Record that ``name`` matched its SHA-256 at ``stamp`` (best effort: a busy or
        read-only study only loses the shortcut)."""
        stamps = self._load()
        stamps[name] = stamp
        try:
            (self.root / CACHE).mkdir(exist_ok=True)
            if locked:
                self._write(stamps)
            else:
                with study_lock(self.root, wait=0):
                    self._write(stamps)
        except (OSError, TrackerError):
            pass

    def _write(self, stamps: dict) -> None:
        try:  # another process may have recorded other files meanwhile: keep theirs
            on_disk = json.loads((self.root / CACHE / HASHED).read_text(encoding="utf-8"))
            merged = {**(on_disk if isinstance(on_disk, dict) else {}), **stamps}
        except (OSError, ValueError, RecursionError):
            merged = dict(stamps)
        with incoming(self.root / CACHE / HASHED, durable=False) as tmp:
            Path(tmp).write_text(json.dumps(merged), encoding="utf-8")


def free_wave_file(root: Path, label: str) -> str:
    """A file name under waves/ not used yet: <label>.parquet, then <label>.v2.parquet, ..."""
    name = f"{label}.parquet"
    k = 2
    while (root / WAVES / name).exists():
        name = f"{label}.v{k}.parquet"
        k += 1
    return f"{WAVES}/{name}"
