"""The command line: a thin layer over :class:`tracker.Study` and friends."""

from __future__ import annotations

import sys
from functools import wraps
from pathlib import Path

import click

from .errors import TrackerError
from .study import Study


def user_errors(fn):
    """Print a TrackerError as a plain message and exit 1 (no traceback)."""
    @wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except TrackerError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(1)
    return wrapper


@click.group()
@click.version_option(package_name="tracker")
def main():
    """Fold each new wave of a tracking study in, and tell what really moved."""


@main.command("new")
@click.argument("study", type=click.Path(file_okay=False))
@click.option("--codebook", required=True, type=click.Path(dir_okay=False), help="The study's codebook (YAML).")
@user_errors
def new_cmd(study, codebook):
    """Make a study folder from a codebook."""
    s = Study.create(study, codebook)
    click.echo(f"made study {s.root} ({s.codebook.title}): {len(s.codebook.variables)} variables, "
               f"{len(s.codebook.metrics)} metrics, {len(s.codebook.groups)} subgroup splits")


@main.command("check")
@click.argument("study", type=click.Path(file_okay=False))
@click.argument("file", type=click.Path(dir_okay=False))
@click.option("--wave", help="The label the wave would get (checks it is free).")
@click.option("--date", help="The fieldwork date it would get (ISO).")
@click.option("--encoding", help="Text encoding of a CSV file (default UTF-8).")
@user_errors
def check_cmd(study, file, wave, date, encoding):
    """List every problem of a wave file against the codebook; change nothing.

    Exit 0 when the file can be added (warnings allowed), 1 when it cannot.
    """
    report = Study(study).check(file, wave=wave, date=date, encoding=encoding)
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
@click.option("--rake", is_flag=True, help="Compute raking weights to the codebook's targets.")
@click.option("--cap", help="With --rake: keep each weight within LOW:HIGH times its starting weight, e.g. 0.2:5.")
@user_errors
def add_cmd(study, file, wave, date, encoding, replace, rake, cap):
    """Check, harmonize and store a wave."""
    from .weighting import parse_cap

    report = Study(study).add(file, wave=wave, date=date, encoding=encoding, replace=replace,
                              rake=rake, cap=parse_cap(cap) if cap else None)
    for line in report.lines():
        click.echo(line)


@main.command("waves")
@click.argument("study", type=click.Path(file_okay=False))
@user_errors
def waves_cmd(study):
    """List the stored waves in fieldwork order."""
    table = Study(study).waves()
    if table.empty:
        click.echo("no waves stored yet")
        return
    click.echo(table.to_string(index=False))


@main.command("demo")
@click.argument("folder", default="demo-study", type=click.Path(file_okay=False))
@user_errors
def demo_cmd(folder):
    """Build the bundled demo study in FOLDER (default ./demo-study)."""
    from .demo import build_demo

    if Path(folder).exists() and any(Path(folder).iterdir()):
        raise TrackerError(f"{folder}: the folder exists and is not empty; give another folder")
    study, reports = build_demo(folder)
    for r in reports:
        click.echo(f"added {r.label}: {r.rows:,} respondents, effective base {r.effective_base:,.0f}")
    click.echo(f"demo study ready at {study.root}")
