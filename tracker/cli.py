"""The command line: a thin layer over :class:`tracker.Study` and friends."""

from __future__ import annotations

import io
import os
import re
import sys
from functools import wraps
from pathlib import Path

import click

# One BLAS thread unless the user says otherwise: the products here are small and memory
# bound, and two threads fighting over two cores ran estimates 2.5x slower (docs/performance.md).
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

from .errors import TrackerError
from .names import ADJUST_METHODS as ADJUST_NAMES
from .names import FORMATS
from .wording import p_text, plural


def Study(path):
    from .study import Study as _Study

    return _Study(path)


_quiet = {"on": False}


def echo(text: str = "", nl: bool = True, err: bool = False) -> None:
    """Every line the command line prints: what a terminal would obey rather than show (an
    escape sequence in a file name or a cell) is shown as its code, and long lines are cut."""
    from .plain import terminal_text

    click.echo(terminal_text(str(text)), nl=nl, err=err)


def say(text: str) -> None:
    """An informational line ("wrote ...", "added ..."): silenced by -q, unlike results."""
    if not _quiet["on"]:
        echo(text)


#: The library names a bad argument by its Python name ("against 'x': ..."); at the command line
#: the message names the option ("--against 'x': ...").
OPTION_NAMES = ("metric", "by", "against", "mix", "family", "pool", "interval", "decimal", "to", "level", "adjust",
                "engine", "workers", "scheduler", "since", "last", "base", "date", "note")
_OPTION = re.compile(r"^(" + "|".join(OPTION_NAMES) + r")(?=( [^:\n]*)?:)")


def as_flag(message: str) -> str:
    """A library error as the command line says it: a leading argument name becomes its option."""
    return _OPTION.sub(r"--\1", message, count=1)


def user_errors(fn):
    """Print a TrackerError as a plain message and exit 1 (no traceback); add -q/--quiet and
    show progress of long work on a terminal unless it is given."""
    @wraps(fn)
    def wrapper(*args, quiet=False, **kwargs):
        from .progress import reporting

        _quiet["on"] = quiet
        try:
            with reporting(quiet):
                out = fn(*args, **kwargs)
            sys.stdout.flush()  # a full disk or a closed pipe shows here, not at exit
            return out
        except TrackerError as exc:
            from .codebook import shorten

            # a value echoed from a file or codebook may be any length: each line is kept readable
            echo("\n".join(shorten(line, 1000) for line in f"error: {as_flag(str(exc))}".splitlines()), err=True)
            sys.exit(1)
        except OSError as exc:
            _stdout_failed(exc)
        except KeyboardInterrupt:
            # stores commit with one rename: a wave is either wholly added or not at all
            echo("interrupted: the study holds either all of the change or none of it", err=True)
            sys.exit(130)
    return click.option("-q", "--quiet", is_flag=True,
                        help="No progress bar and no 'wrote ...' lines; results and errors still print.")(wrapper)


def _stdout_failed(exc: OSError) -> None:
    """One line for a failed write to standard output (a full disk, a closed pipe), then exit 1.
    Every other file-system failure is a TrackerError by the time it reaches here."""
    import errno

    try:  # nothing more can reach the broken stream, and nothing must be tried at exit
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    except OSError:
        pass
    if exc.errno == errno.EPIPE:
        why = "the program reading it stopped"
    else:
        why = (exc.strerror or exc.__class__.__name__).lower()
    echo(f"error: cannot write to standard output ({why})", err=True)
    sys.exit(1)


class _InOrder(click.Group):
    """Commands listed in the order of the work (new, check, add, ... brief), not alphabetically."""

    def list_commands(self, ctx):
        return list(self.commands)


@click.group(cls=_InOrder, context_settings={"max_content_width": 100})
@click.version_option(package_name="wavetell")
def main():
    """Fold each new wave of a tracking study in, and tell what really moved.

    \b
    Start with:  tracker demo demo-study      (builds the demo study and its brief)
    Then:        tracker changes demo-study   (what moved in the latest wave)
    Every command has --help with an example.
    """


# -- the options every command shares ------------------------------------------------------

def wave_option(help="The wave (default: the latest).", multiple=False, name="wave"):
    return click.option("--wave", name, multiple=multiple, metavar="LABEL", help=help)


def against_option(pooled: bool = True):
    choices = "previous, year-ago, a wave label" + (", or pooled:K (the K waves before, pooled)" if pooled else "")
    return click.option("--against", default="previous", show_default=True, metavar="BASELINE",
                        help=f"What the wave is compared with: {choices}.")


def metric_option(fn):
    return click.option("--metric", "metrics", multiple=True, metavar="NAME",
                        help="A metric by its short name (repeatable; default: every metric).")(fn)


def by_option(fn):
    return click.option("--by", "by", multiple=True, metavar="GROUP",
                        help="A subgroup split (repeatable; default: every split; 'total' for totals only).")(fn)


def level_option(fn):
    """--level, the same in every command: a confidence level strictly between 0.5 and 1."""
    return click.option("--level", type=click.FloatRange(0.5, 1.0, min_open=True, max_open=True), default=0.95,
                        show_default=True,
                        help="Confidence level of the intervals; changes are significant at 1 - level.")(fn)


def adjust_option(fn):
    """--adjust, the same in every command (names that cannot be read as a subgroup split)."""
    return click.option("--adjust", type=click.Choice(list(ADJUST_NAMES)), default="bh", show_default=True,
                        help="Control of the many comparisons: "
                        + "; ".join(f"{k} = {v}" for k, v in ADJUST_NAMES.items())
                        + ".")(fn)


def _fmt_option(fn):
    """--format, --wide and -o/--output, the same on every command that prints a table."""
    fn = click.option("-o", "--output", type=click.Path(),
                      help="Write the table to FILE (.csv, .json, .md or .xlsx: every column, full precision).")(fn)
    fn = click.option("--wide", is_flag=True, help="At the terminal: every column, not only those that fit.")(fn)
    return click.option("--format", "fmt", type=click.Choice(FORMATS), default="table", show_default=True,
                        help="table: readable, fitted to the terminal; csv, json, md: every column at full "
                             "precision.")(fn)


def emit(frame, fmt: str, view: str | None, wide: bool = False, output: str | None = None,
         footer: tuple[str, ...] | list[str] = ()) -> None:
    """Print (or write) one result table: the readable view at the terminal, every column
    otherwise; the footer lines go with the table and md forms."""
    from .formatting import render

    if output:
        from .formatting import write_table

        path = write_table(frame, output)
        say(f"wrote {len(frame):,} rows to {path}")
        return
    if fmt == "table" and view:
        import textwrap

        from .view import human_table, terminal_width

        text, notes = human_table(frame, view, wide=wide)
        echo(text, nl=False)
        footer = [textwrap.fill(line, terminal_width()) for line in [*notes, *footer]]
    else:
        echo(render(frame, fmt), nl=False)
    if fmt in ("table", "md"):
        for line in footer:
            echo(line)


def terminal_width_plain() -> int:
    """The terminal's width (100 when it cannot be measured), without importing pandas."""
    import shutil

    return shutil.get_terminal_size((100, 24)).columns


def family_option(fn):
    """--family: the tests adjusted together (the brief's, by default)."""
    return click.option("--family", type=click.Choice(["brief", "asked"]), default="brief", show_default=True,
                        help="Adjust across every metric and subgroup (as the brief does), or only across what "
                             "is asked for (verdicts can then differ from the brief's).")(fn)


def _plain_fmt_option(fn):
    """--format and -o/--output for the quick commands (standard library only)."""
    fn = click.option("-o", "--output", type=click.Path(),
                      help="Write the table to FILE (.csv, .json or .md).")(fn)
    return click.option("--format", "fmt", type=click.Choice(FORMATS), default="table", show_default=True,
                        help="table, csv, json or md.")(fn)


def emit_rows(rows: list[dict], columns: list[str], fmt: str, output: str | None, right=(), inputs=()) -> None:
    """Print (or write) plain rows without pandas."""
    from .plain import render_rows

    if output:
        from .outputs import write_output

        suffix = Path(output).suffix.lower()
        if suffix not in (".csv", ".json", ".md"):
            raise TrackerError(f"{output}: give a file ending in .csv, .json or .md")
        write_output(output, render_rows(rows, columns, suffix[1:]).encode("utf-8"), inputs)
        say(f"wrote {len(rows):,} rows to {output}")
        return
    echo(render_rows(rows, columns, fmt, right), nl=False)


@main.command("draft", short_help="Draft a codebook from a wave file, for review.")
@click.argument("file", type=click.Path(dir_okay=False))
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False),
              help="Where to write the draft (a new file: an existing one is never overwritten).")
@click.option("--title", help="The study's title (default: the file's name).")
@user_errors
def draft_cmd(file, output, title):
    """Draft a codebook from a wave file: from an SPSS or Stata file's labels and missing codes, or
    from a CSV, Parquet or XLSX file's values. Every guess is marked '# review:'.

    \b
    Example:  tracker draft wave1.sav -o codebook.yaml
    """
    from .drafting import draft_codebook
    from .outputs import write_output

    if Path(output).exists():
        raise TrackerError(f"{output}: the file exists; the draft never overwrites one (give a new name)")
    draft = draft_codebook(file, title)
    write_output(Path(output), draft.text.encode("utf-8"), inputs=(Path(file),))
    for line in draft.lines():
        echo(line)
    echo(f"wrote {output}; review it, then: tracker new STUDY --codebook {output}")


@main.command("new", short_help="Make a study folder from a codebook.")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--codebook", required=True, type=click.Path(), help="The study's codebook (YAML).")
@user_errors
def new_cmd(study, codebook):
    """Make a study folder from a codebook.

    \b
    Example:  tracker new rider-survey --codebook codebook.yaml
    """
    from .study import Study as _Study

    s = _Study.create(study, codebook)
    echo(f"made study {s.root} ({s.codebook.title}): {len(s.codebook.variables)} variables, "
               f"{len(s.codebook.metrics)} metrics, {len(s.codebook.groups)} subgroup splits")


CHECK_COLUMNS = ["file", "severity", "column", "message", "rows", "count"]


@main.command("check", short_help="List a wave file's problems; change nothing.")
@click.argument("study", type=click.Path(file_okay=False))
@click.argument("file", type=click.Path())
@wave_option("The label the wave would get (checks it is free).")
@click.option("--date", help="The fieldwork date it would get (ISO).")
@click.option("--encoding", help="Text encoding of a CSV file (default UTF-8).")
@click.option("--decimal", type=click.Choice([".", ","]), default=None,
              help="The decimal mark of a CSV file's numbers (',' for 1,25; default '.').")
@click.option("--sheet", help="XLSX: the sheet to read (needed when several sheets hold data).")
@click.option("--header-row", type=click.IntRange(min=1),
              help="XLSX: the row holding the column names (default: found).")
@_plain_fmt_option
@user_errors
def check_cmd(study, file, wave, date, encoding, decimal, sheet, header_row, fmt, output):
    """List every problem of a wave file against the codebook; change nothing.

    Exit 0 when the file can be added (warnings allowed), 1 when it cannot.

    \b
    Example:  tracker check demo-study new-wave.csv --wave 2026-Q1
    """
    if output:
        from .outputs import check_output

        check_output(output, inputs=[file])
    report = Study(study).check(file, wave=wave, date=date, encoding=encoding, sheet=sheet, header_row=header_row,
                                decimal=decimal)
    n_err = len(report.errors)
    n_warn = len(report.problems) - n_err
    verdict = "can be added" if report.ok else "cannot be added"
    if fmt == "table" and not output:
        for line in report.lines():
            echo(line)
        echo(f"{file}: {report.rows:,} rows; {n_err} error(s), {n_warn} warning(s); {verdict}")
    else:
        rows = [{"file": report.file, "severity": p.severity, "column": p.column, "message": p.message,
                 "rows": " ".join(map(str, p.rows)), "count": p.count} for p in report.problems]
        emit_rows(rows, CHECK_COLUMNS, fmt, output, inputs=[file])
    sys.exit(0 if report.ok else 1)


@main.command("add", short_help="Check, harmonize and store a wave.")
@click.argument("study", type=click.Path(file_okay=False))
@click.argument("file", type=click.Path())
@click.option("--wave", required=True, metavar="LABEL", help="Wave label, e.g. 2025-Q3.")
@click.option("--date", required=True, help="Fieldwork date (ISO, e.g. 2025-09-30).")
@click.option("--encoding", help="Text encoding of a CSV file (default UTF-8).")
@click.option("--decimal", type=click.Choice([".", ","]), default=None,
              help="The decimal mark of a CSV file's numbers (',' for 1,25; default '.').")
@click.option("--replace", is_flag=True, help="Replace a stored wave of the same label (the old version is kept).")
@click.option("--allow-duplicate", is_flag=True,
              help="Store the wave even though its data equal a stored wave's (refused by default: a re-delivery).")
@click.option("--rake", is_flag=True, help="Compute raking weights to the codebook's targets.")
@click.option("--cap", help="With --rake: keep each weight within LOW:HIGH times its starting weight, e.g. 0.2:5.")
@click.option("--sheet", help="XLSX: the sheet to read (needed when several sheets hold data).")
@click.option("--header-row", type=click.IntRange(min=1),
              help="XLSX: the row holding the column names (default: found).")
@click.option("--format", "fmt", type=click.Choice(["table", "json"]), default="table", show_default=True,
              help="table: the summary in lines; json: the same as one document.")
@user_errors
def add_cmd(study, file, wave, date, encoding, decimal, replace, allow_duplicate, rake, cap, sheet, header_row,
            fmt):
    """Check, harmonize and store a wave.

    \b
    Example:  tracker add demo-study new-wave.csv --wave 2026-Q1 --date 2026-03-31
    """
    from .weighting import parse_cap

    report = Study(study).add(file, wave=wave, date=date, encoding=encoding, replace=replace,
                              rake=rake, cap=parse_cap(cap) if cap else None, allow_duplicate=allow_duplicate,
                              sheet=sheet, header_row=header_row, decimal=decimal)
    if fmt == "json":
        import dataclasses
        import json

        echo(json.dumps(dataclasses.asdict(report), indent=1, default=str))
        return
    for line in report.lines():
        echo(line)


@main.command("waves", short_help="List the stored waves in fieldwork order.")
@click.argument("study", type=click.Path(file_okay=False))
@_plain_fmt_option
@user_errors
def waves_cmd(study, fmt, output):
    """List the stored waves in fieldwork order.

    \b
    Example:  tracker waves demo-study
    """
    from . import store

    rows = store.wave_rows(store.read_ledger(Path(study)))  # the ledger alone: no pandas, an instant answer
    if not rows and fmt == "table" and not output:
        echo("no waves stored yet")
        return
    if fmt == "table" and not output:
        from .plain import fit_rows

        marked = [r["wave"] for r in rows if r["order"]]
        rows = [{"wave": r["wave"] + (" !" if r["order"] else ""), "fieldwork": r["fieldwork_date"],
                 "respondents": f"{r['respondents']:,}", "weighting": r["weighting"],
                 "added": str(r["added_at"])[:10], "from file": r["source_file"]} for r in rows]
        columns = ["wave", "fieldwork", "respondents", "weighting", "added", "from file"]
        echo(fit_rows(rows, columns, terminal_width_plain(), right=("respondents",),
                      shrink=("from file", "weighting")), nl=False)
        if marked:
            echo(f"! {', '.join(marked)}: the fieldwork dates put these waves in another order than their labels; "
                 f"a date typed a year off? (tracker add --replace with the right date mends it)")
        return
    emit_rows(rows, store.WAVE_COLUMNS, fmt, output, right=("respondents",))


@main.command("amend", short_help="Record a new version of the study's codebook, with a note.")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--note", required=True, help="What changed (kept in the ledger with the version).")
@click.option("--codebook", "codebook", type=click.Path(dir_okay=False),
              help="A codebook file to take instead of the study's (default: the study's codebook.yaml as edited).")
@user_errors
def amend_cmd(study, note, codebook):
    """Record the study's codebook as edited (or the file --codebook gives) as a new version, and
    say which stored waves' results change.

    \b
    Example:  tracker amend demo-study --note "recommend balance now 9-10 minus 0-6"
    """
    from .amending import amend

    for line in amend(Path(study), note, codebook).lines():
        echo(line)


@main.command("remove", short_help="Take a stored wave out of the study (its file kept).")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--wave", required=True, metavar="LABEL", help="The wave to take out.")
@click.option("--note", required=True, help="Why (kept in the ledger with the removed entry).")
@user_errors
def remove_cmd(study, wave, note):
    """Take a stored wave out of the study; its file stays, named in the ledger's removed list.

    \b
    Example:  tracker remove demo-study --wave 2025-Q4 --note "fieldwork rerun"
    """
    from .managing import remove_wave

    for line in remove_wave(Path(study), wave, note):
        echo(line)


@main.command("rename", short_help="Give a stored wave another label.")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--wave", required=True, metavar="LABEL", help="The wave to rename.")
@click.option("--to", "new", required=True, metavar="LABEL", help="Its new label.")
@user_errors
def rename_cmd(study, wave, new):
    """Give a stored wave another label (its file and results unchanged; the old label kept in
    the ledger).

    \b
    Example:  tracker rename demo-study --wave 2026-Q1 --to 2026-Q1a
    """
    from .managing import rename_wave

    for line in rename_wave(Path(study), wave, new):
        echo(line)


@main.command("verify", short_help="Check a study on disk against its ledger.")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--repair", is_flag=True,
              help="Remove files no ledger entry names and leftovers of interrupted writes (never a stored wave).")
@user_errors
def verify_cmd(study, repair):
    """Check a study on disk: the ledger, every stored file against its SHA-256, orphans, leftovers.

    Exit 0 when everything agrees, 1 naming each problem otherwise.

    \b
    Example:  tracker verify demo-study
    """
    from . import store

    result = store.verify(Path(study), repair=repair)
    for line in result.lines():
        echo(line)
    sys.exit(0 if result.ok else 1)


@main.command("prepare", short_help="Compute every wave's statistics ahead, on many cores.")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--engine", type=click.Choice(["pandas", "duckdb"]), default="pandas", show_default=True,
              help="duckdb reads each stored wave straight from its Parquet file (waves larger than memory); "
                   "needs pip install 'wavetell[scale]'.")
@click.option("--workers", type=int, default=None, metavar="N",
              help="Spread the waves over N local worker processes (Dask; needs the scale extra).")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="Spread the waves over the Dask cluster at ADDRESS (e.g. tcp://10.0.0.5:8786); its workers "
                   "must see the study folder at the same path.")
@click.option("--rebuild", is_flag=True, help="Compute every wave again, even those already up to date.")
@user_errors
def prepare_cmd(study, engine, workers, scheduler, rebuild):
    """Compute and keep every wave's per-cell statistics in the study's cache folder.

    Every other command computes what it needs on first use; this does all waves at once,
    in this process, on local worker processes or on a Dask cluster. The cache is derived
    data, rebuilt whenever a wave or the codebook changes.

    \b
    Example:  tracker prepare demo-study --engine duckdb --workers 2
    """
    from .scale import prepare

    for line in prepare(Study(study), engine=engine, workers=workers, scheduler=scheduler, rebuild=rebuild).lines():
        say(line)


@main.command("replicates", short_help="Build replicate weights for a wave from its design.")
@click.argument("study", type=click.Path(file_okay=False))
@wave_option("The wave (default: the latest).")
@click.option("--method", type=click.Choice(["jk1", "jkn", "bootstrap"]), default="jkn", show_default=True,
              help="jk1 = delete-one-PSU jackknife (no strata); jkn = the jackknife within strata; bootstrap = "
                   "rescaled bootstrap of PSUs within strata.")
@click.option("--count", type=click.IntRange(min=2), default=200, show_default=True,
              help="Bootstrap replicates.")
@click.option("--seed", type=int, default=1, show_default=True, help="The bootstrap's random seed.")
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False),
              help="weights.csv or weights.parquet: each respondent's id and replicate weights rw1, rw2, ...")
@user_errors
def replicates_cmd(study, wave, method, count, seed, output):
    """Build replicate weights for a stored wave from the codebook's strata, clusters and weights,
    and print the codebook lines that declare them.

    \b
    Example:  tracker replicates demo-study --method jkn -o weights.csv
    """
    from .outputs import check_output, write_output
    from .replication import replicate_weights

    suffix = Path(output).suffix.lower()
    if suffix not in (".csv", ".parquet"):
        raise TrackerError(f"{output}: give a file ending in .csv or .parquet")
    key_path = Path(output).with_suffix(".replicates.yaml")
    check_output(output)
    check_output(key_path, inputs=(output,))  # both outputs vetted before either is written
    s = Study(study)
    built = replicate_weights(s, wave or s.labels[-1], method, count, seed)
    if suffix == ".csv":
        data = built.weights.to_csv(index=False, float_format="%.17g").encode("utf-8")
    else:
        buf = io.BytesIO()
        built.weights.to_parquet(buf, index=False)
        data = buf.getvalue()
    say(f"wrote {write_output(output, data)}: {built.weights.shape[1] - 1:,} replicate weights for "
        f"{len(built.weights):,} respondents")
    if built.from_unraked:
        echo("the wave was raked: these replicates are of its weights before raking; rake each to the same "
             "targets (tracker add --rake does so when the codebook declares them)")
    key = built.codebook_key()
    if len(key) <= 600:
        echo("declare them in the codebook (the columns joined to the wave file):")
        echo(key.rstrip())
    else:  # a long list of per-replicate scales: beside the weights, not on the screen
        path = write_output(key_path, key.encode("utf-8"))
        echo(f"declare them in the codebook (the columns joined to the wave file) with the key in {path}")


@main.command("estimates", short_help="Every metric by wave and subgroup, with intervals.")
@click.argument("study", type=click.Path(file_okay=False))
@metric_option
@by_option
@wave_option("A wave to show (repeatable; default: every wave, or at the terminal the latest).", True, "waves")
@click.option("--all-waves", is_flag=True, help="At the terminal: every wave, not only the latest.")
@level_option
@click.option("--interval", type=click.Choice(["wilson", "korn-graubard"]), default="wilson", show_default=True,
              help="Interval for shares (means and balances use t).")
@click.option("--smooth", is_flag=True,
              help="Add a smoothed value and interval beside each estimate (signal extraction; for thin subgroups).")
@_fmt_option
@user_errors
def estimates_cmd(study, metrics, by, waves, all_waves, level, interval, smooth, fmt, wide, output):
    """Every metric by wave and subgroup: value, bases, standard error, interval, flags.

    \b
    Example:  tracker estimates demo-study --metric satisfied --by area
    """
    s = Study(study)
    latest_only = fmt == "table" and not output and not waves and not all_waves
    pick = {"metrics": list(metrics) or None, "by": list(by) if by else None,
            "waves": [s.labels[-1]] if latest_only and s.labels else (list(waves) or None), "level": level}
    if smooth:
        from .estimates import COLUMNS

        if interval != "wilson":
            raise TrackerError("--smooth works with the default interval; leave out --interval")
        table = s.smoothed(**pick)[[*COLUMNS, "smoothed", "smoothed_low", "smoothed_high", "signal_sd"]]
    else:
        table = s.estimates(**pick, interval=interval)
    note = [f"Wave {s.labels[-1]} only; --all-waves or --wave LABEL for others."] if latest_only and s.labels else []
    if smooth:
        note.append("Smoothed: a local-level model with each wave's known sampling error, fitted per series over "
                    "every wave; it damps sampling noise in thin subgroups. The direct estimate stays the figure "
                    "reported.")
    emit(table, fmt, "estimates", wide, output, note)


@main.command("answers", short_help="Each answer's share of a question, or a number's spread.")
@click.argument("study", type=click.Path(file_okay=False))
@click.argument("variable")
@by_option
@wave_option("A wave to show (repeatable; default: every wave, or at the terminal the latest).", True, "waves")
@click.option("--base", "in_base", type=click.Choice(["valid", "with-missing", "both"]), default="both",
              show_default=True, help="Coded questions: shares of the valid answers, or with the missing codes "
                                      "(don't know, refused) counted in the base, or both.")
@click.option("--tests", is_flag=True, help="Coded questions: instead, test whether the answers are distributed "
                                            "alike in every level of each split (Rao-Scott).")
@adjust_option
@level_option
@_fmt_option
@user_errors
def answers_cmd(study, variable, by, waves, in_base, tests, adjust, level, fmt, wide, output):
    """Every answer of a question by wave and subgroup: each code's share (with and without the
    missing codes in the base) for a coded question, or the mean, spread and quartiles of a number.

    \b
    Example:  tracker answers demo-study sat_overall --by area
    """
    from .answers import answer_shares, number_summary

    s = Study(study)
    latest_only = fmt == "table" and not output and not waves
    pick = {"waves": [s.labels[-1]] if latest_only and s.labels else (list(waves) or None),
            "by": list(by) if by else None, "level": level}
    note = [f"Wave {s.labels[-1]} only; --wave LABEL for others."] if latest_only and s.labels else []
    if s.codebook.variables.get(variable) is not None and s.codebook.variables[variable].type == "number":
        table = number_summary(s, variable, **pick)
        note.append("Quartiles with Woodruff's intervals; the standard deviation carries no interval.")
        emit(table, fmt, "numbers", wide, output, note)
        return
    from .answers import distribution_tests

    if tests:
        emit(distribution_tests(s, variable, adjust=adjust, **pick), fmt, None, wide, output, note)
        return
    table = answer_shares(s, variable, **pick)
    wanted = {"valid": ["valid answers"], "with-missing": ["with missing codes"]}.get(in_base)
    if wanted:
        table = table[table["in_base"].isin(wanted)].reset_index(drop=True)
    if fmt in ("table", "md") and pick["by"] != ["total"] and s.codebook.variables[variable].type != "multi":
        for r in distribution_tests(s, variable, adjust=adjust, **pick).itertuples():
            note.append(f"{r.wave}, {r.group}: Rao-Scott F {r.f:.2f} on {r.f_df_num:.1f} and {r.f_df_den:.0f} df, "
                        f"adjusted p {p_text(r.p_adjusted)}: {r.verdict} (the valid answers' distribution across the "
                        f"levels; sampling error only).")
    emit(table, fmt, "answers", wide, output, note)


@main.command("changes", short_help="What changed in a wave, with the many tests controlled.")
@click.argument("study", type=click.Path(file_okay=False))
@wave_option("The wave to test (default: the latest).")
@against_option()
@metric_option
@by_option
@adjust_option
@level_option
@click.option("--all", "show_all", is_flag=True, help="List every comparison, not only significant changes.")
@family_option
@click.option("--mix", metavar="GROUP",
              help="Split each total change into the part due to the sample's mix on this group and the "
                   "part within its levels, with the change standardised to the earlier mix.")
@_fmt_option
@user_errors
def changes_cmd(study, wave, against, metrics, by, adjust, level, show_all, family, mix, fmt, wide, output):
    """What changed in a wave, tested with control of the many comparisons.

    \b
    Example:  tracker changes demo-study --wave 2025-Q2 --against year-ago
    """
    from .changes import COLUMNS

    result = Study(study).changes(wave=wave, against=against, by=list(by) if by else None,
                                  metrics=list(metrics) or None, adjust=adjust, level=level, mix=mix, family=family)
    if mix:
        emit(result.mix, fmt, "mix", wide, output,
             [(f"Kitagawa split of each total change by the mix on {mix}; the standardised change re-weights "
              f"{result.wave} to the mix of {result.against}, tested with {ADJUST_NAMES[adjust]} adjustment.")])
        return
    shown = result.shown(show_all)[COLUMNS]
    rest = len(result.table) - len(shown)
    footer = ([f"({rest} other comparisons without a significant change; --all lists them)"] if rest else []) \
        + list(result.footer())
    if fmt in ("table", "md") and not output and shown.empty:  # no header-only table
        echo(f"No significant change in {result.wave} against {result.against}.")
        for line in footer:
            echo(line)
        return
    emit(shown, fmt, "changes", wide, output, footer)


@main.command("gaps", short_help="Subgroups compared within a wave, tests controlled.")
@click.argument("study", type=click.Path(file_okay=False))
@wave_option("The wave whose subgroups are compared (default: the latest).")
@metric_option
@by_option
@adjust_option
@level_option
@click.option("--against", metavar="BASELINE", default=None,
              help="Instead: has each gap changed since this wave (previous, year-ago or a wave label), and do the "
                   "levels of each split trend alike over every wave.")
@click.option("--all", "show_all", is_flag=True, help="List every comparison, not only significant differences.")
@_fmt_option
@user_errors
def gaps_cmd(study, wave, metrics, by, adjust, level, against, show_all, fmt, wide, output):
    """Subgroups compared within a wave: each level against the rest of the sample, the levels
    of a split pairwise, and a test across all levels, all in one family of tests. With
    --against: whether each gap changed since that wave, and whether the levels' trends differ.

    \b
    Example:  tracker gaps demo-study --metric satisfied --by area
    """
    pick = {"wave": wave, "metrics": list(metrics) or None, "by": list(by) if by and list(by) != ["total"] else None,
            "adjust": adjust, "level": level}
    if against:
        from .gapshift import gap_shifts

        moved = gap_shifts(Study(study), against=against, **pick)
        _emit_tested(moved.table, ["rise", "fall", "differ"], show_all, fmt, "gapshift", wide, output,
                     f"No gap between subgroups changed from {moved.against} to {moved.wave}.",
                     [(f"{moved.n_tests} tests of {moved.wave} against {moved.against}, adjusted together "
                       f"({ADJUST_NAMES[adjust]}); sampling error only.")])
        return
    from .within import compare_within

    result = compare_within(Study(study), **pick)
    _emit_tested(result.table, ["higher", "lower", "differ"], show_all, fmt, "gaps", wide, output,
                 f"No significant difference between subgroups in {result.wave}.",
                 [(f"{result.n_tests} comparisons in wave {result.wave}, adjusted together ({ADJUST_NAMES[adjust]}); "
                   f"a difference between subgroups is an association, not a cause, and sampling error only.")])


def _emit_tested(t, found: list[str], show_all: bool, fmt: str, view: str, wide: bool, output, nothing: str,
                 footer: list[str]) -> None:
    """Print the tests whose verdict is one of ``found`` (every test with --all), or say that none is."""
    shown = t if show_all else t[t["verdict"].isin(found)]
    if len(shown) < len(t):
        footer = [f"({len(t) - len(shown)} other tests without a significant result; --all lists them)", *footer]
    if fmt in ("table", "md") and not output and shown.empty:
        echo(nothing)
        for line in footer:
            echo(line)
        return
    emit(shown.reset_index(drop=True), fmt, view, wide, output, footer)


@main.command("drivers", short_help="What goes with the headline score: relative importance.")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--headline", metavar="NAME", help="The headline metric (default: the codebook's drivers).")
@click.option("--attribute", "attributes", multiple=True, metavar="NAME",
              help="An attribute metric (repeatable; default: the codebook's drivers).")
@click.option("--last", type=click.IntRange(min=1), default=1, show_default=True, metavar="N",
              help="Pool the last N waves (independent samples).")
@click.option("--compare", type=click.IntRange(min=1), default=None, metavar="K",
              help="Instead: has each attribute's importance changed between the last K waves and the K before?")
@click.option("--coefficients", is_flag=True, help="Show the regression's coefficients instead of the importance.")
@adjust_option
@level_option
@_fmt_option
@user_errors
def drivers_cmd(study, headline, attributes, last, compare, coefficients, adjust, level, fmt, wide, output):
    """What goes with the headline score: a design-based regression on the attribute metrics and
    each attribute's relative importance (Johnson's relative weights), with intervals.

    \b
    Example:  tracker drivers demo-study --last 4
    """
    from .drivers import fit_drivers, importance_shift

    s = Study(study)
    names = {"headline": headline, "attributes": list(attributes) or None}
    if compare:
        shift = importance_shift(s, **names, recent=compare, level=level, adjust=adjust)
        emit(shift.assign(kind="share"), fmt, "driftdrivers", wide, output,
             [(f"Raw weights of {shift['period_to'].iloc[0]} against {shift['period_from'].iloc[0]}, adjusted "
               f"together ({ADJUST_NAMES[adjust]}). Association is not cause; sampling error only.")])
        return
    fit = fit_drivers(s, **names, waves=s.labels[-last:], level=level)
    if coefficients:
        emit(fit.coefficients, fmt, None, wide, output, fit.lines())
        return
    emit(fit.importance.assign(kind="share"), fmt, "drivers", wide, output, fit.lines())


@main.command("trends", short_help="The pattern and slope of every series.")
@click.argument("study", type=click.Path(file_okay=False))
@metric_option
@by_option
@click.option("--last", type=click.IntRange(min=2), metavar="N", help="Use only the last N waves.")
@click.option("--since", metavar="LABEL", help="Use the waves from this one on.")
@adjust_option
@level_option
@click.option("--rolling", type=click.IntRange(min=2), metavar="K",
              help="Instead: rolling estimates, each wave pooled with the K-1 waves before it.")
@click.option("--moving-only", is_flag=True,
              help="List only series that moved (a trend, a shift, a blip or a move whose shape is unclear).")
@family_option
@click.option("--bridge", is_flag=True,
              help="Join each series across a wording break by the level jump estimated there (labelled bridged).")
@_fmt_option
@user_errors
def trends_cmd(study, metrics, by, last, since, adjust, level, rolling, moving_only, family, bridge, fmt, wide,
               output):
    """The pattern of every series (rising, falling, shifted, a one-wave blip, moved, flat or no pattern
    found) and its slope.

    \b
    Example:  tracker trends demo-study --by total --moving-only
    """
    from .trends import COLUMNS

    s = Study(study)
    if rolling:
        pooled = s.pooled(rolling, metrics=list(metrics) or None, by=list(by) if by else None, level=level)
        emit(pooled, fmt, "estimates", wide, output, [f"Each wave pooled with the {rolling - 1} before it."])
        return
    table = s.trends(metrics=list(metrics) or None, by=list(by) if by else None, last=last, since=since,
                     adjust=adjust, level=level, family=family, bridge=bridge)
    still = ("no pattern found", "flat", "too few waves")
    shown = table[~table["pattern"].isin(still)] if moving_only else table
    counts = table["pattern"].value_counts()
    size = table.attrs["family_size"]
    which = ("every metric in total and in every subgroup, as the brief" if family == "brief"
             else "only the series asked for: a narrower family than the brief's, so patterns can differ from it")
    footer = [
        f"{len(table)} {plural(len(table), 'series', 'series')}: " + ", ".join(f"{v} {k}" for k, v in counts.items()),
        (f"Each series tested once for a trend, a step or a one-wave blip, after {ADJUST_NAMES[adjust]} adjustment "
        f"across {size:,} {plural(size, 'series', 'series')} ({which}) at the {1 - level:g} level. Slopes are per "
        f"year of fieldwork time."),
        "Sampling error and the between-wave variation are both in the intervals; significance is not importance."]
    if fmt in ("table", "md") and not output and shown.empty:
        echo("No series moved: every one shows no pattern, is flat, or has too few waves." if moving_only
             else "No series to show.")
        for line in footer:
            echo(line)
        return
    emit(shown[COLUMNS], fmt, "trends", wide, output, footer)


@main.command("expect", short_help="The expected range of every metric in the next wave.")
@click.argument("study", type=click.Path(file_okay=False))
@metric_option
@by_option
@click.option("--base", type=float, default=None, metavar="N",
              help="The next wave's expected respondents in total (default: the mean of the last three waves).")
@click.option("--date", default=None, metavar="YYYY-MM-DD",
              help="The next wave's fieldwork date (default: the latest plus the usual gap).")
@adjust_option
@level_option
@click.option("--bridge", is_flag=True,
              help="Use each series across a wording break, joined by the level jump estimated there.")
@_fmt_option
@user_errors
def expect_cmd(study, metrics, by, base, date, adjust, level, bridge, fmt, wide, output):
    """Where every metric x subgroup should land in the next wave, from its pattern so far.

    Anything outside these ranges deserves a second look: it is out of line with the
    series (its trend or level, its wave-to-wave variation and sampling at the expected base).

    \b
    Example:  tracker expect demo-study --by total --base 1200
    """
    s = Study(study)
    table = s.expected(base=base, metrics=list(metrics) or None, by=list(by) if by else None, date=date,
                       adjust=adjust, level=level, bridge=bridge)
    emit(table, fmt, "expect", wide, output, [
        (f"Expected ranges ({level:.0%} prediction intervals) for a wave fielded on {table.attrs['date']}, after "
        f"{table.attrs['after']}."),
        ("Each range holds the series' pattern, its wave-to-wave variation and the sampling error at the expected "
        "base; a value outside it is worth a second look, not a finding by itself.")])


@main.command("surprises", short_help="The cells of a wave out of line with their series.")
@click.argument("study", type=click.Path(file_okay=False))
@wave_option("The wave to judge against the waves before it (default: the latest).")
@click.option("--all", "show_all", is_flag=True, help="List every tested cell, not only the surprises.")
@adjust_option
@level_option
@_fmt_option
@user_errors
def surprises_cmd(study, wave, show_all, adjust, level, fmt, wide, output):
    """Every cell of a wave against the range the waves before it predicted, with false
    discovery control across all cells of the wave.

    \b
    Example:  tracker surprises demo-study --wave 2024-Q3
    """
    from .expected import surprise_lines

    s = Study(study)
    table = s.surprises(wave=wave, adjust=adjust, level=level)
    shown = table if show_all else table[table["surprise"]]
    lines = surprise_lines(table, level)
    emit(shown.reset_index(drop=True), fmt, "surprises", wide, output, [
        *(lines[:1] or ["too few earlier waves to predict this one (at least 4 are needed)"]),
        ("A surprise is out of line with its series' pattern and variation: it asks for a second look (fieldwork, "
        "the sample's make-up, an event), not for a headline by itself.")])


@main.command("composition", short_help="Compare the sample's make-up with another wave.")
@click.argument("study", type=click.Path(file_okay=False))
@wave_option("The wave whose make-up is checked (default: the latest).")
@against_option(pooled=False)
@adjust_option
@level_option
@_fmt_option
@user_errors
def composition_cmd(study, wave, against, adjust, level, fmt, wide, output):
    """Compare the sample's make-up on the profile groups with another wave.

    \b
    Example:  tracker composition demo-study --wave 2025-Q4
    """
    result = Study(study).composition(wave=wave, against=against, adjust=adjust, level=level)
    if fmt == "json" and not output:
        import json

        doc = {"wave": result.wave, "against": result.against, "adjust": result.adjust, "level": result.level,
               "tests": json.loads(result.tests.to_json(orient="records", double_precision=10)),
               "shares": json.loads(result.shares.to_json(orient="records", double_precision=10))}
        echo(json.dumps(doc, indent=1))
        return
    if fmt == "table" and not output:
        emit(result.shares, fmt, "composition", wide, None, result.lines())
        return
    emit(result.table(), fmt, None, wide, output, result.lines())


@main.command("chart", short_help="Draw a metric's trend, or every tested change.")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--metric", metavar="NAME", help="Draw this metric's trend chart.")
@click.option("--by", "by", multiple=True, metavar="GROUP",
              help="A subgroup split drawn as small multiples (repeatable: one row of panels each).")
@click.option("--overview", is_flag=True, help="Instead: every tested change of a comparison (see --wave, --against).")
@wave_option("With --overview: the wave tested (default: the latest).")
@against_option()
@adjust_option
@level_option
@click.option("--smooth", is_flag=True, help="Also draw the smoothed series (dotted, labelled; for thin subgroups).")
@click.option("-o", "--output", required=True, type=click.Path(), help="FILE.html, .png, .svg or .json")
@user_errors
def chart_cmd(study, metric, by, overview, wave, against, adjust, level, smooth, output):
    """Draw a metric's trend chart, or the overview of every tested change.

    \b
    Example:  tracker chart demo-study --metric satisfied --by area -o satisfied.html
    """
    from .chartdata import trend_charts
    from .charts import change_overview, save_chart
    from .outputs import check_output

    check_output(output)
    s = Study(study)
    if overview:
        chart = change_overview(s.changes(wave=wave, against=against, adjust=adjust, level=level))
    else:
        if not metric:
            raise TrackerError("give --metric for a trend chart, or --overview")
        for g in by:
            if g not in s.codebook.groups:
                raise TrackerError(f"--by {g}: not a group of this study ({', '.join(s.codebook.groups)})")
        chart = trend_charts(s, metric, by=list(by), adjust=adjust, level=level, smooth=smooth)
    say(f"wrote {save_chart(chart, output)}")


@main.command("brief", short_help="Write the briefing for a wave.")
@click.argument("study", type=click.Path(file_okay=False))
@wave_option("The wave to brief (default: the latest).")
@against_option()
@adjust_option
@level_option
@click.option("-o", "--output", required=True, type=click.Path(),
              help="brief.html, brief.md, brief.xlsx (a client workbook), brief.pptx (an editable slide deck) or "
                   "brief.json (every comparison and pattern, for other tools)")
@user_errors
def brief_cmd(study, wave, against, adjust, level, output):
    """Write the briefing: what moved, what held, trends, sample notes, method and cautions.

    \b
    Example:  tracker brief demo-study --against year-ago -o brief.html
    """
    from .brief import build_brief, write_brief
    from .outputs import check_output

    if Path(output).suffix.lower() not in (".html", ".htm", ".md", ".xlsx", ".pptx", ".json"):
        raise TrackerError(f"{output}: give a file ending in .html, .md, .xlsx, .pptx or .json")
    check_output(output)
    brief = build_brief(Study(study), wave=wave, against=against, adjust=adjust, level=level,
                        charts=Path(output).suffix.lower() in (".html", ".htm"))
    say(f"wrote {write_brief(brief, output)}")


@main.command("demo", short_help="Build the bundled demo study and its briefing.")
@click.argument("folder", default="demo-study", type=click.Path(file_okay=False))
@user_errors
def demo_cmd(folder):
    """Build the bundled demo study in FOLDER (default ./demo-study) and write its briefing.

    \b
    Example:  tracker demo demo-study
    """
    from .demo import build_demo

    if Path(folder).exists() and any(Path(folder).iterdir()):
        raise TrackerError(f"{folder}: the folder exists and is not empty; give another folder")
    from .brief import build_brief, write_brief

    study, reports = build_demo(folder)
    for r in reports:
        say(f"added {r.label}: {r.rows:,} respondents, effective base {r.effective_base:,.0f}")
    say(f"demo study ready at {study.root}")
    # beside the study, never in it: a study folder is the tool's alone
    path = write_brief(build_brief(study), study.root.with_name(study.root.name + "-brief.html"))
    echo(f"briefing for {study.labels[-1]} written to {path}")
