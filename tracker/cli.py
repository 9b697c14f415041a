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

    return click.option("--format", "fmt", type=click.Choice(FORMATS), default="table", show_default=True,
                        help="Output form.")(fn)


@main.command("estimates")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--metric", "metrics", multiple=True, help="Metric to show (repeatable; default all).")
@click.option("--by", "by", multiple=True, help="Subgroup split (repeatable; default every group; 'total' for totals only).")
@click.option("--wave", "waves", multiple=True, help="Wave to show (repeatable; default all).")
@level_option
@click.option("--interval", type=click.Choice(["wilson", "korn-graubard"]), default="wilson", show_default=True,
              help="Interval for shares (means and balances use t).")
@_fmt_option
@user_errors
def estimates_cmd(study, metrics, by, waves, level, interval, fmt):
    """Every metric by wave and subgroup: value, bases, standard error, interval, flags."""
    from .formatting import render

    table = Study(study).estimates(metrics=list(metrics) or None, by=list(by) if by else None,
                                   waves=list(waves) or None, level=level, interval=interval)
    click.echo(render(table, fmt), nl=False)


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
def changes_cmd(study, wave, against, metrics, by, adjust, level, show_all, family, mix, fmt):
    """What changed in a wave, tested with control of the many comparisons."""
    from .changes import COLUMNS
    from .formatting import render

    result = Study(study).changes(wave=wave, against=against, by=list(by) if by else None,
                                  metrics=list(metrics) or None, adjust=adjust, level=level, mix=mix, family=family)
    if mix:
        click.echo(render(result.mix, fmt), nl=False)
        if fmt in ("table", "md"):
            click.echo(f"Kitagawa split of each total change by the mix on {mix}; the standardised change re-weights "
                       f"{result.wave} to the mix of {result.against}, tested with {ADJUST_NAMES[adjust]} adjustment.")
        return
    shown = result.shown(show_all)[COLUMNS]
    click.echo(render(shown, fmt), nl=False)
    if fmt in ("table", "md"):
        rest = len(result.table) - len(shown)
        if rest:
            click.echo(f"({rest} other comparisons without a significant change; --all lists them)")
        for line in result.footer():
            click.echo(line)


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
def trends_cmd(study, metrics, by, last, since, adjust, level, pool, moving_only, fmt):
    """Slope per year, extra variation and the pattern of every series (steady, rising, falling, shifted, blip)."""
    from .formatting import render
    from .trends import COLUMNS

    s = Study(study)
    if pool:
        click.echo(render(s.pooled(pool, metrics=list(metrics) or None, by=list(by) if by else None, level=level), fmt),
                   nl=False)
        return
    table = s.trends(metrics=list(metrics) or None, by=list(by) if by else None, last=last, since=since,
                     adjust=adjust, level=level)
    shown = table[table["pattern"] != "steady"] if moving_only else table
    click.echo(render(shown[COLUMNS], fmt), nl=False)
    if fmt in ("table", "md"):
        counts = table["pattern"].value_counts()
        click.echo(f"{len(table)} series: " + ", ".join(f"{v} {k}" for k, v in counts.items()))
        click.echo(f"Patterns decided after {table.attrs['adjust']} adjustment across the slope, shift and blip "
                   f"tests of all series, at the {1 - level:g} level. Slopes are per year of fieldwork time.")
        click.echo("Sampling error and the between-wave variation are both in the intervals; "
                   "significance is not importance.")


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
def composition_cmd(study, wave, against, adjust, level, fmt):
    """Compare the sample's make-up on the profile groups with another wave."""
    from .formatting import render

    result = Study(study).composition(wave=wave, against=against, adjust=adjust, level=level)
    click.echo(render(result.shares, fmt), nl=False)
    if fmt in ("table", "md"):
        for line in result.lines():
            click.echo(line)
    else:
        click.echo(render(result.tests, fmt), nl=False)
