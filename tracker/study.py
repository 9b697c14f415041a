"""The study: a folder holding a codebook, stored waves and a ledger (the Python API)."""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd

from . import adding, store
from .adding import AddReport, CheckReport, content_fingerprint  # noqa: F401 - the API's result types
from .cellstore import CellStore
from .codebook import Codebook, load_codebook
from .comparing import Comparisons, metric_breaks, smallest_changes
from .errors import TrackerError
from .notebook import NotebookMixin
from .options import check_adjust, check_level
from .selection import pick_groups, pick_metrics
from .series import Series
from .waves import StoredWaves


class Study(NotebookMixin):
    """A tracking study on disk. ``Study.create`` makes one; ``Study(path)`` opens one."""

    def __init__(self, path: str | Path):
        self.root = Path(path)
        if not (self.root / store.LEDGER).is_file():
            raise TrackerError(f"{self.root}: not a study folder (no {store.LEDGER}); make one with 'tracker new'")
        self.codebook: Codebook = load_codebook(self.root / store.CODEBOOK)
        ledger = store.read_ledger(self.root)
        recorded = store.codebook_sha256(ledger)
        if recorded is not None and recorded != self.codebook.sha256:  # an edit in place is never used silently
            raise TrackerError(f"{self.root / store.CODEBOOK}: edited after the study recorded it; record the change "
                               f"with 'tracker amend {self.root} --note \"what changed\"' (it says which waves' "
                               f"results change), or put the recorded version back")
        self.waves_on_disk = StoredWaves(self.root, ledger)
        self._cache: dict = {}
        self.cellstore = CellStore(self.root, self.codebook, self.waves_on_disk)
        self.comparisons = Comparisons(self.codebook, self.waves_on_disk, self.cellstore, self._cache)
        self.series = Series(self.codebook, self.waves_on_disk, self.estimates, self._cache)

    # -- making and reading ------------------------------------------------------------
    @classmethod
    def create(cls, path: str | Path, codebook: str | Path) -> Study:
        """Make a new study folder at ``path`` from the codebook file ``codebook`` (checked
        first); refuses a folder that holds anything. Returns the new Study."""
        root = Path(path)
        book = load_codebook(codebook)  # validate before touching the disk
        if (root / store.LEDGER).exists():
            raise TrackerError(f"{root}: a study already exists here")
        if root.exists() and any(root.iterdir()):
            raise TrackerError(f"{root}: the folder exists and is not empty")
        made = not root.exists()
        try:
            root.mkdir(parents=True, exist_ok=True)
            (root / store.WAVES).mkdir(exist_ok=True)
            (root / store.LOCK).touch()
            store.write_atomic(root / store.CODEBOOK, book.source.encode("utf-8"))
            store.write_ledger(root, {"format": 1, "title": book.title, "codebook_sha256": book.sha256, "waves": [],
                                      "codebook_history": [store.codebook_version(book, "the codebook the study "
                                                                                        "was made with")]})
        except (OSError, TrackerError) as exc:
            if made:  # leave no half-made study behind
                shutil.rmtree(root, ignore_errors=True)
            if isinstance(exc, OSError):
                raise store.fs_problem(exc, root, "make the study folder") from None
            raise
        return cls(root)

    @property
    def wave_entries(self) -> list[dict]:
        """The ledger's wave entries in fieldwork order."""
        return self.waves_on_disk.entries

    @property
    def labels(self) -> list[str]:
        """The stored waves' labels in fieldwork order."""
        return self.waves_on_disk.labels

    def dates(self) -> dict[str, str]:
        """Each stored wave's fieldwork date (ISO)."""
        return self.waves_on_disk.dates()

    def waves(self) -> pd.DataFrame:
        """The stored waves in fieldwork order."""
        return pd.DataFrame(store.wave_rows(self.waves_on_disk.ledger), columns=store.WAVE_COLUMNS)

    def load(self, label: str) -> pd.DataFrame:
        """The harmonized respondent table of one stored wave."""
        return self.waves_on_disk.load(label)

    def stored_path(self, label: str) -> Path:
        """The stored file of a wave once checked against the SHA-256 the ledger recorded."""
        return self.waves_on_disk.stored_path(label)

    def entry(self, label: str) -> dict:
        """The ledger entry of a stored wave (refuses a label that is not stored)."""
        return self.waves_on_disk.entry(label)

    # -- intake (tracker.adding) ----------------------------------------------------------
    def check(self, file: str | Path, wave: str | None = None, date: str | None = None,
              encoding: str | None = None, replace: bool = False, allow_duplicate: bool = False,
              sheet: str | None = None, header_row: int | None = None, decimal: str | None = None) -> CheckReport:
        """Check a wave file against the codebook without changing anything.

        Parameters
        ----------
        file : path
            The wave file (CSV, Parquet or XLSX).
        wave, date : str, optional
            Its label and fieldwork date (ISO); with the date its cells are also judged against
            the ranges the stored waves predict.
        encoding, sheet, header_row, decimal : optional
            How to read the file (a CSV file's text encoding and decimal mark, ',' for a decimal
            comma; a workbook's sheet and header row).
        replace, allow_duplicate : bool
            Check it as a replacement of the stored wave of that label; accept data identical
            to a stored wave's.

        Returns
        -------
        CheckReport
            The problems found (errors and warnings) and the surprises.
        """
        return adding.check(self, file, wave, date, encoding, replace, allow_duplicate, sheet, header_row, decimal)

    def add(self, file: str | Path, wave: str, date: str, encoding: str | None = None,
            replace: bool = False, rake: bool = False, cap: tuple[float, float] | None = None,
            allow_duplicate: bool = False, sheet: str | None = None, header_row: int | None = None,
            decimal: str | None = None) -> AddReport:
        """Validate, harmonize and store a wave; raise TrackerError (study unchanged) if it cannot be.

        The whole add runs under the study's write lock, against the ledger as it stands once
        the lock is held (tracker.adding). ``rake`` rakes the weights to the codebook's targets
        (within ``cap``, LOW:HIGH times the starting weight); the other parameters are as
        :meth:`check`'s. Returns an :class:`AddReport`."""
        return adding.add(self, file, wave, date, encoding, replace, rake, cap, allow_duplicate, sheet, header_row,
                          decimal)

    def reload_ledger(self) -> dict:
        """Read the ledger again (under the lock, before a change) and return it."""
        self.waves_on_disk.update(store.read_ledger(self.root))
        return self.waves_on_disk.ledger

    def committed(self, ledger: dict, fname: str, sha: str) -> None:
        """After the ledger rename committed a wave: hold the new ledger, remember the stored
        file as checked, and drop what was derived from the old state."""
        self.waves_on_disk.update(ledger)
        self.waves_on_disk.remember(fname, sha)
        self.forget()

    # -- estimates and changes ----------------------------------------------------------
    def pick_metrics(self, names=None) -> list:
        """The metrics named (one name or a list; all when none), refusing unknown ones."""
        return pick_metrics(self.codebook, names)

    def pick_groups(self, names=None) -> list[str]:
        """The splits named (all when None; [] or total for totals only), refusing unknown ones."""
        return pick_groups(self.codebook, names)

    def pick_waves(self, labels=None) -> list[str]:
        """The stored waves named (one label or a list), in fieldwork order; all when none."""
        return self.waves_on_disk.pick(labels)

    def matters(self) -> dict[str, float]:
        """The smallest change that matters per metric, in value units (tracker.comparing)."""
        return smallest_changes(self.codebook)

    def breaks(self, metric):
        """(variable, wave) for each wording break of the metric's variable and base variable."""
        return metric_breaks(self.codebook, metric)

    def estimates(self, metrics=None, by=None, waves=None, level: float = 0.95, detail: bool = False,
                  interval: str = "wilson") -> pd.DataFrame:
        """Every metric's estimate in every wave, in total and in each subgroup.

        Parameters
        ----------
        metrics, by, waves : str or list, optional
            The metrics, the subgroup splits ([] for totals only) and the waves; all by default.
        level : float
            The confidence level of the intervals.
        detail : bool
            Keep the sufficient statistics (variance, sum of squared weights, design df), from
            which :func:`tracker.estimates.at_level` gives intervals at another level.
        interval : {'wilson', 'korn-graubard'}
            The interval of shares (means and balances use t).

        Returns
        -------
        DataFrame
            One row per wave x subgroup x metric: value, bases, SE, interval, reliability and
            flags (docs/columns.md); metrics not asked in a wave are left out of it.
        """
        return self.cellstore.estimates(self.pick_metrics(metrics), self.pick_groups(by), self.pick_waves(waves),
                                        level, detail, interval)

    def changes(self, wave: str | None = None, against: str = "previous", by=None, metrics=None,
                adjust: str = "bh", level: float = 0.95, mix: str | None = None, family: str = "brief"):
        """Test what changed in ``wave`` against another wave or pooled waves.

        Parameters
        ----------
        wave : str, optional
            The wave tested (default: the latest).
        against : str
            'previous', 'year-ago', 'pooled:K' or a stored wave's label.
        by, metrics : str or list, optional
            The rows shown (all by default); they do not narrow the family unless ``family``
            is 'asked'.
        adjust : {'bh', 'holm', 'by', 'none'}
            The control of the many comparisons.
        level : float
            1 - the significance level; the unadjusted intervals' level.
        mix : str, optional
            A group: each total change also split into the part due to the sample's mix on it
            and the part within its levels, with the change at the earlier wave's mix
            (``result.mix``; docs/methods.md).
        family : {'brief', 'asked'}
            Adjust across every metric in total and in every subgroup (the brief's family), or
            only across the comparisons asked for (the notes then say it differs from the brief).

        Returns
        -------
        ChangeResult
            Every comparison (docs/columns.md: the verdict, the adjusted interval that agrees
            with it, p-values, SE, df and the covariance used), the family and the notes.
        """
        return self.comparisons.changes(wave, against, by, metrics, adjust, level, mix, family)

    def composition(self, wave: str | None = None, against: str = "previous", groups=None,
                    adjust: str = "bh", level: float = 0.95):
        """Compare the sample's weighted make-up on the profile groups (or ``groups``) with
        another wave (Rao-Scott; tracker.composition.CompositionResult)."""
        return self.comparisons.composition(wave, against, groups, adjust, level)

    # -- trends ---------------------------------------------------------------------------
    def window(self, last: int | None = None, since: str | None = None, until: str | None = None) -> list[str]:
        """The stored waves from ``since`` to ``until``, the last ``last`` of them."""
        return self.series.window(last, since, until)

    def segment_starts(self, metrics: list, labels: list[str]) -> dict[str, str]:
        """For metrics with a wording break inside ``labels``: the wave their current series starts at."""
        return self.series.segment_starts(metrics, labels)

    def trends(self, metrics=None, by=None, last: int | None = None, since: str | None = None,
               adjust: str = "bh", level: float = 0.95, until: str | None = None, family: str = "brief",
               bridge: bool = False):
        """The pattern of every metric x subgroup series (tracker.trends.PATTERNS) with its slope.

        Parameters
        ----------
        metrics, by : str or list, optional
            The series shown (all by default).
        last, since, until : optional
            The waves: the last ``last``, from ``since``, up to ``until``.
        adjust, level :
            As :meth:`changes`.
        family : {'brief', 'asked'}
            Adjust the pattern tests across every metric and subgroup over the same waves (the
            brief's family) or across only the series asked for.
        bridge : bool
            Join each series across a wording break by its estimated jump (tracker.bridging).

        Returns
        -------
        DataFrame
            One row per series (docs/columns.md); ``attrs`` name the family and its size.
        """
        return self.series.trends(metrics, by, last, since, adjust, level, until, family, bridge)

    def next_date(self) -> str:
        """The expected fieldwork date of the next wave: the latest plus the median gap."""
        return self.series.next_date()

    def expected(self, base: float | None = None, metrics=None, by=None, date: str | None = None,
                 adjust: str = "bh", level: float = 0.95, bridge: bool = False) -> pd.DataFrame:
        """The expected range of the next wave for every metric x subgroup series.

        Parameters
        ----------
        base : float, optional
            The next wave's expected respondents in total (default: the mean of the last three
            waves); each subgroup keeps its recent share of it.
        metrics, by : str or list, optional
            The series shown.
        date : str, optional
            The next wave's fieldwork date (default: the latest plus the usual gap).
        adjust, level, bridge :
            As :meth:`changes` (the patterns the ranges follow) and :meth:`trends`.

        Returns
        -------
        DataFrame
            Expected value, range, basis and model per series (tracker.expected.next_ranges).
        """
        return self.series.expected(base, metrics, by, date, adjust, level, bridge)

    def surprises(self, wave: str | None = None, adjust: str = "bh", level: float = 0.95,
                  table: pd.DataFrame | None = None, date: str | None = None) -> pd.DataFrame:
        """Every cell of a wave against the range the waves before it predict.

        Parameters
        ----------
        wave : str, optional
            The wave judged (default: the latest).
        adjust, level :
            The control of the many cells judged at once, and its level.
        table, date : optional
            A wave not yet stored (its harmonized table and fieldwork date), as ``check`` and
            ``add`` judge it.

        Returns
        -------
        DataFrame
            Each cell's value, expected range and adjusted p; surprises marked.
        """
        return self.series.surprises(wave, adjust, level, table, date)

    def smoothed(self, metrics=None, by=None, waves=None, level: float = 0.95,
                 until: str | None = None) -> pd.DataFrame:
        """The estimates with a smoothed value beside each direct one (tracker.smoothing), fitted
        over every stored wave, or those up to ``until``."""
        return self.series.smoothed(metrics, by, waves, level, until)

    def forget(self) -> None:
        """Drop every result held in memory (the stored waves and the cache are untouched)."""
        self._cache.clear()  # in place: the comparisons share this memory
        self.waves_on_disk.forget()
        self.cellstore.forget()

    def memo(self, key: tuple, make):
        """``make()`` computed once per Study object (values derived from the stored waves)."""
        key = ("memo", *key)
        if key not in self._cache:
            self._cache[key] = make()
        return self._cache[key]

    def analysis(self, wave: str | None = None, against: str = "previous", adjust: str = "bh",
                 level: float = 0.95):
        """The one analysis of ``wave`` (tracker.analysis.Analysis) that the brief, the charts and
        the JSON brief render: computed once per wave, baseline, adjustment and level."""
        from .analysis import analyse
        check_adjust(adjust)
        check_level(level)
        wave = wave or self.pick_waves()[-1]
        key = ("analysis", wave, against, adjust, level)
        if key not in self._cache:
            self._cache[key] = analyse(self, wave, against, adjust, level)
        return self._cache[key]

    def pooled(self, k: int, metrics=None, by=None, level: float = 0.95) -> pd.DataFrame:
        """Rolling estimates pooling each wave with the k - 1 waves before it (for thin subgroups)."""
        return self.comparisons.pooled(k, metrics, by, level)

    def wave_steps(self, metrics=None, by=None, waves=None, adjust: str = "bh", level: float = 0.95) -> pd.DataFrame:
        """Every wave against the one before it, each step keeping its own wave's family
        (tracker.comparing.Comparisons.steps)."""
        return self.comparisons.steps(metrics, by, waves, adjust, level)
