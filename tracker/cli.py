"""The command line: a thin layer over :class:`tracker.Study` and friends."""

from __future__ import annotations

import sys
from functools import wraps
from pathlib import Path

import click

from .errors import TrackerError
from .names import ADJUST_METHODS as ADJUST_NAMES
from .names import FORMATS


def Study(path):  # noqa: N802 - reads as the class it opens; imported here so --help starts at once
    from .study import Study as _Study

    return _Study(path)


def user_errors(fn):
    """Print a TrackerError as a plain message and exit 1 (no traceback)."""
    @wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except TrackerError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(1)
        except KeyboardInterrupt:
            # stores commit with one rename: a wave is either wholly added or not at all
            click.echo("interrupted: the study holds either all of the change or none of it", err=True)
            sys.exit(130)
    return wrapper


@click.group()
@click.version_option(package_name="wavetell")
def main():
    """Fold each new wave of a tracking study in, and tell what really moved."""


@main.command("new")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--codebook", required=True, type=click.Path(dir_okay=False), help="The study's codebook (YAML).")
@user_errors
def new_cmd(study, codebook):
    """Make a study folder from a codebook."""
    from .study import Study as _Study

    s = _Study.create(study, codebook)
    click.echo(f"made study {s.root} ({s.codebook.title}): {len(s.codebook.variables)} variables, "
               f"{len(s.codebook.metrics)} metrics, {len(s.codebook.groups)} subgroup splits")


@main.command("verify")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--repair", is_flag=True,
              help="Remove files no ledger entry names and leftovers of interrupted writes (never a stored wave).")
@user_errors
def verify_cmd(study, repair):
    """Check a study on disk: the ledger, every stored file against its SHA-256, orphans, leftovers.

    Exit 0 when everything agrees, 1 naming each problem otherwise.
    """
    from . import store

    result = store.verify(Path(study), repair=repair)
    for line in result.lines():
        click.echo(line)
    sys.exit(0 if result.ok else 1)


@main.command("check")
@click.argument("study", type=click.Path(file_okay=False))
@click.argument("file", type=click.Path(dir_okay=False))
@click.option("--wave", help="The label the wave would get (checks it is free).")
@click.option("--date", help="The fieldwork date it would get (ISO).")
@click.option("--encoding", help="Text encoding of a CSV file (default UTF-8).")
@click.option("--sheet", help="XLSX: the sheet to read (needed when several sheets hold data).")
@click.option("--header-row", type=click.IntRange(min=1), help="XLSX: the row holding the column names (default: found).")
@user_errors
def check_cmd(study, file, wave, date, encoding, sheet, header_row):
    """List every problem of a wave file against the codebook; change nothing.

    Exit 0 when the file can be added (warnings allowed), 1 when it cannot.
    """
    report = Study(study).check(file, wave=wave, date=date, encoding=encoding, sheet=sheet, header_row=header_row)
    for line in report.lines():
        click.echo(line)
    n_err = len(report.errors)
    n_warn = len(report.problems) - n_err
    verdict = "can be added" if report.ok else "cannot be added"
    click.echo(f"{file}: {report.rows:,} rows; {n_err} error(s), {n_warn} warning(s); {verdict}")
    sys.exit(0 if report.ok else 1)


@main.command("add")
@click.argument("study", type=click.Path(file_okay=False))
@click.argument("file", type=click.Path(dir_okay=False))
@click.option("--wave", required=True, help="Wave label, e.g. 2025-Q3.")
@click.option("--date", required=True, help="Fieldwork date (ISO, e.g. 2025-09-30).")
@click.option("--encoding", help="Text encoding of a CSV file (default UTF-8).")
@click.option("--replace", is_flag=True, help="Replace a stored wave of the same label (the old version is kept).")
@click.option("--allow-duplicate", is_flag=True,
              help="Store the wave even though its data equal a stored wave's (refused by default: a re-delivery).")
@click.option("--rake", is_flag=True, help="Compute raking weights to the codebook's targets.")
@click.option("--cap", help="With --rake: keep each weight within LOW:HIGH times its starting weight, e.g. 0.2:5.")
@click.option("--sheet", help="XLSX: the sheet to read (needed when several sheets hold data).")
@click.option("--header-row", type=click.IntRange(min=1), help="XLSX: the row holding the column names (default: found).")
@user_errors
def add_cmd(study, file, wave, date, encoding, replace, allow_duplicate, rake, cap, sheet, header_row):
    """Check, harmonize and store a wave."""
    from .weighting import parse_cap

    report = Study(study).add(file, wave=wave, date=date, encoding=encoding, replace=replace,
                              rake=rake, cap=parse_cap(cap) if cap else None, allow_duplicate=allow_duplicate,
                              sheet=sheet, header_row=header_row)
    for line in report.lines():
        click.echo(line)


@main.command("waves")
@click.argument("study", type=click.Path(file_okay=False))
@user_errors
def waves_cmd(study):
    """List the stored waves in fieldwork order.

    Example: tracker waves demo-study
    """
    from . import store

    root = Path(study)
    rows = store.wave_rows(store.read_ledger(root))  # the ledger alone: no pandas, an instant answer
    if not rows:
        click.echo("no waves stored yet")
        return
    cols = store.WAVE_COLUMNS
    cells = [[str(r[c]) if c != "respondents" else f"{r[c]:,}" for c in cols] for r in rows]
    widths = [max(len(c), *(len(row[i]) for row in cells)) for i, c in enumerate(cols)]
    click.echo("  ".join(c.ljust(w) for c, w in zip(cols, widths)).rstrip())
    for row in cells:
        click.echo("  ".join(v.rjust(w) if i == 2 else v.ljust(w) for i, (v, w) in enumerate(zip(row, widths))).rstrip())


@main.command("demo")
@click.argument("folder", default="demo-study", type=click.Path(file_okay=False))
@user_errors
def demo_cmd(folder):
    """Build the bundled demo study in FOLDER (default ./demo-study) and write its briefing."""
    from .demo import build_demo

    if Path(folder).exists() and any(Path(folder).iterdir()):
        raise TrackerError(f"{folder}: the folder exists and is not empty; give another folder")
    from .brief import build_brief, write_brief

    study, reports = build_demo(folder)
    for r in reports:
        click.echo(f"added {r.label}: {r.rows:,} respondents, effective base {r.effective_base:,.0f}")
    click.echo(f"demo study ready at {study.root}")
    path = write_brief(build_brief(study), study.root / "brief.html")
    click.echo(f"briefing for {study.labels[-1]} written to {path}")


def level_option(fn):
    """--level, the same in every command: a confidence level strictly between 0.5 and 1."""
    return click.option("--level", type=click.FloatRange(0.5, 1.0, min_open=True, max_open=True), default=0.95,
                        show_default=True,
                        help="Confidence level of the intervals; changes are significant at 1 - level.")(fn)


def adjust_option(fn):
    """--adjust, the same in every command (names that cannot be read as a subgroup split)."""
    return click.option("--adjust", type=click.Choice(list(ADJUST_NAMES)), default="bh", show_default=True,
                        help="Control of the many comparisons: " + "; ".join(f"{k} = {v}" for k, v in ADJUST_NAMES.items())
                        + ".")(fn)


def _fmt_option(fn):
    """--format, --wide and -o/--output, the same on every command that prints a table."""
    fn = click.option("-o", "--output", type=click.Path(dir_okay=False),
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
        click.echo(f"wrote {len(frame):,} rows to {path}")
        return
    if fmt == "table" and view:
        from .view import human_table

        import textwrap

        from .view import terminal_width

        text, notes = human_table(frame, view, wide=wide)
        click.echo(text, nl=False)
        width = terminal_width()
        footer = [textwrap.fill(line, width) for line in [*notes, *footer]]
    else:
        click.echo(render(frame, fmt), nl=False)
    if fmt in ("table", "md"):
        for line in footer:
            click.echo(line)


@main.command("estimates")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--metric", "metrics", multiple=True, help="Metric to show (repeatable; default all).")
@click.option("--by", "by", multiple=True, help="Subgroup split (repeatable; default every group; 'total' for totals only).")
@click.option("--wave", "waves", multiple=True,
              help="Wave to show (repeatable; default: every wave, or at the terminal the latest).")
@click.option("--all-waves", is_flag=True, help="At the terminal: every wave, not only the latest.")
@level_option
@click.option("--interval", type=click.Choice(["wilson", "korn-graubard"]), default="wilson", show_default=True,
              help="Interval for shares (means and balances use t).")
@_fmt_option
@user_errors
def estimates_cmd(study, metrics, by, waves, all_waves, level, interval, fmt, wide, output):
    """Every metric by wave and subgroup: value, bases, standard error, interval, flags.

    Example: tracker estimates demo-study --metric satisfied --by area
    """
    s = Study(study)
    latest_only = fmt == "table" and not output and not waves and not all_waves
    table = s.estimates(metrics=list(metrics) or None, by=list(by) if by else None,
                        waves=[s.labels[-1]] if latest_only and s.labels else (list(waves) or None),
                        level=level, interval=interval)
    note = [f"Wave {s.labels[-1]} only; --all-waves or --wave LABEL for others."] if latest_only and s.labels else []
    emit(table, fmt, "estimates", wide, output, note)


@main.command("changes")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--wave", help="The wave to test (default: the latest).")
@click.option("--against", default="previous", show_default=True,
              help="previous, year-ago, a wave label, or pooled:K (the K waves before, pooled).")
@click.option("--metric", "metrics", multiple=True, help="Metric to test (repeatable; default all).")
@click.option("--by", "by", multiple=True, help="Subgroup split (repeatable; default every group; 'total' for totals only).")
@adjust_option
@level_option
@click.option("--all", "show_all", is_flag=True, help="List every comparison, not only significant changes.")
@click.option("--family", type=click.Choice(["brief", "asked"]), default="brief", show_default=True,
              help="Adjust across every metric and subgroup (as the brief does), or only the comparisons asked for.")
@click.option("--mix", help="Split each total change into the part due to the sample's mix on this group and the "
                            "part within its levels, with the change standardised to the earlier mix.")
@_fmt_option
@user_errors
def changes_cmd(study, wave, against, metrics, by, adjust, level, show_all, family, mix, fmt, wide, output):
    """What changed in a wave, tested with control of the many comparisons.

    Example: tracker changes demo-study --wave 2025-Q2 --against year-ago
    """
    from .changes import COLUMNS

    result = Study(study).changes(wave=wave, against=against, by=list(by) if by else None,
                                  metrics=list(metrics) or None, adjust=adjust, level=level, mix=mix, family=family)
    if mix:
        emit(result.mix, fmt, None, wide, output,
             [f"Kitagawa split of each total change by the mix on {mix}; the standardised change re-weights "
              f"{result.wave} to the mix of {result.against}, tested with {ADJUST_NAMES[adjust]} adjustment."])
        return
    shown = result.shown(show_all)[COLUMNS]
    rest = len(result.table) - len(shown)
    footer = ([f"({rest} other comparisons without a significant change; --all lists them)"] if rest else []) \
        + list(result.footer())
    if fmt in ("table", "md") and not output and shown.empty:  # no header-only table
        click.echo(f"No significant change in {result.wave} against {result.against}.")
        for line in footer:
            click.echo(line)
        return
    emit(shown, fmt, "changes", wide, output, footer)


@main.command("trends")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--metric", "metrics", multiple=True, help="Metric (repeatable; default all).")
@click.option("--by", "by", multiple=True, help="Subgroup split (repeatable; default every group; 'total' for totals only).")
@click.option("--last", type=int, help="Use only the last N waves.")
@click.option("--since", help="Use the waves from this one on.")
@adjust_option
@level_option
@click.option("--pool", type=int, help="Instead: rolling estimates pooling each wave with the POOL-1 before it.")
@click.option("--moving-only", is_flag=True, help="List only series whose pattern is not steady.")
@_fmt_option
@user_errors
def trends_cmd(study, metrics, by, last, since, adjust, level, pool, moving_only, fmt, wide, output):
    """The pattern of every series (steady, rising, falling, shifted, a one-wave blip, moved) and its slope.

    Example: tracker trends demo-study --by total --moving-only
    """
    from .trends import COLUMNS

    s = Study(study)
    if pool:
        pooled = s.pooled(pool, metrics=list(metrics) or None, by=list(by) if by else None, level=level)
        emit(pooled, fmt, "estimates", wide, output, [f"Each wave pooled with the {pool - 1} before it."])
        return
    table = s.trends(metrics=list(metrics) or None, by=list(by) if by else None, last=last, since=since,
                     adjust=adjust, level=level)
    shown = table[table["pattern"] != "steady"] if moving_only else table
    counts = table["pattern"].value_counts()
    emit(shown[COLUMNS], fmt, "trends", wide, output, [
        f"{len(table)} series: " + ", ".join(f"{v} {k}" for k, v in counts.items()),
        f"Each series tested once for not being steady (a line, a step or a one-wave blip), after "
        f"{table.attrs['adjust']} adjustment across all series at the {1 - level:g} level. Slopes are per year "
        f"of fieldwork time.",
        "Sampling error and the between-wave variation are both in the intervals; significance is not importance."])


@main.command("chart")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--metric", help="Draw this metric's trend chart.")
@click.option("--by", help="Subgroup split drawn as small multiples.")
@click.option("--overview", is_flag=True, help="Instead: every tested change of a comparison (see --wave, --against).")
@click.option("--wave", help="With --overview: the wave tested (default: the latest).")
@click.option("--against", default="previous", show_default=True, help="With --overview: what it is tested against.")
@adjust_option
@level_option
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False), help="FILE.html, .png, .svg or .json")
@user_errors
def chart_cmd(study, metric, by, overview, wave, against, adjust, level, output):
    """Draw a metric's trend chart, or the overview of every tested change."""
    from .charts import change_overview, save_chart, trend_chart

    s = Study(study)
    if overview:
        chart = change_overview(s.changes(wave=wave, against=against, adjust=adjust, level=level))
    else:
        if not metric:
            raise TrackerError("give --metric for a trend chart, or --overview")
        if by and by not in s.codebook.groups:
            raise TrackerError(f"--by {by}: not a group of this study ({', '.join(s.codebook.groups)})")
        chart = trend_chart(s, metric, by=by, adjust=adjust, level=level)
    click.echo(f"wrote {save_chart(chart, output)}")


@main.command("brief")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--wave", help="The wave to brief (default: the latest).")
@click.option("--against", default="previous", show_default=True,
              help="previous, year-ago, a wave label, or pooled:K.")
@adjust_option
@level_option
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False),
              help="brief.html, brief.md, brief.xlsx or brief.json (every comparison and pattern, for other tools)")
@user_errors
def brief_cmd(study, wave, against, adjust, level, output):
    """Write the briefing: what moved, what held steady, trends, sample notes, method and cautions."""
    from .brief import build_brief, write_brief

    if Path(output).suffix.lower() not in (".html", ".htm", ".md", ".xlsx", ".json"):
        raise TrackerError(f"{output}: give a file ending in .html, .md, .xlsx or .json")
    brief = build_brief(Study(study), wave=wave, against=against, adjust=adjust, level=level,
                        charts=Path(output).suffix.lower() in (".html", ".htm"))
    click.echo(f"wrote {write_brief(brief, output)}")


@main.command("composition")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--wave", help="The wave whose make-up is checked (default: the latest).")
@click.option("--against", default="previous", show_default=True, help="previous, year-ago or a wave label.")
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
        click.echo(json.dumps(doc, indent=1))
        return
    if fmt == "table" and not output:
        emit(result.shares, fmt, "composition", wide, None, result.lines())
        return
    emit(result.table(), fmt, None, wide, output, result.lines())
