"""The command line as a user meets it: start-up, shared options, help texts."""

from __future__ import annotations

import subprocess
import sys

from click.testing import CliRunner

from tracker.cli import main


def test_importing_the_command_line_loads_no_heavy_library():
    # common practice, no source: a command line should answer --help at once
    code = ("import sys, tracker.cli; heavy = [m for m in ('pandas', 'numpy', 'scipy', 'altair', 'pyarrow') "
            "if m in sys.modules]; print(','.join(heavy))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == ""


def test_the_names_the_command_line_offers_are_the_ones_the_methods_use():
    from tracker.formatting import FORMATS
    from tracker.methods.tests import ADJUST_METHODS
    from tracker.methods.variance import SINGLE_CLUSTER_RULES
    from tracker.names import ADJUST_METHODS as A, FORMATS as F, SINGLE_CLUSTER_RULES as R

    assert ADJUST_METHODS is A and FORMATS is F and SINGLE_CLUSTER_RULES is R


def test_help_answers_without_opening_a_study():
    result = CliRunner().invoke(main, ["--help"])
    assert result.exit_code == 0 and "verify" in result.output


def test_level_is_checked_the_same_way_everywhere(demo_study):
    # every command that takes --level refuses 95 (a percent typed for a fraction) the same way
    root = str(demo_study.root)
    for cmd in (["estimates", root], ["changes", root], ["trends", root], ["composition", root],
                ["brief", root, "-o", "x.md"], ["chart", root, "--overview", "-o", "x.html"]):
        result = CliRunner().invoke(main, [*cmd, "--level", "95"])
        assert result.exit_code == 2, (cmd, result.output)
        assert "Invalid value for '--level': 95.0 is not in the range 0.5<x<1.0" in result.output, cmd
    import pytest

    from tracker import TrackerError

    for call in (lambda: demo_study.estimates(level=95), lambda: demo_study.trends(level=95),
                 lambda: demo_study.composition(level=95), lambda: demo_study.pooled(4, level=95)):
        with pytest.raises(TrackerError, match="--level 95: give a confidence level between 0.5 and 1"):
            call()


def test_adjust_offers_the_same_named_choices_in_every_command():
    for cmd in ("changes", "trends", "chart", "brief", "composition"):
        result = CliRunner().invoke(main, [cmd, "--help"])
        assert "--adjust [bh|holm|by|none]" in result.output, cmd
        assert "bh =" in result.output and "Hochberg" in result.output, cmd


def test_the_distribution_has_a_name_of_its_own():
    # the package index already holds an unrelated "tracker"; ours is "wavetell" (checked free:
    # `pip download wavetell` found no distribution on 2026-12-02), with the command "tracker"
    from importlib.metadata import distribution

    dist = distribution("wavetell")
    assert any(ep.name == "tracker" and ep.value == "tracker.cli:main" for ep in dist.entry_points)


def test_waves_answers_from_the_ledger_alone(demo_study):
    code = ("import sys; from tracker.cli import main\n"
            f"try: main(['waves', {str(demo_study.root)!r}])\n"
            "except SystemExit: pass\n"
            "print('heavy:', [m for m in ('pandas', 'numpy', 'scipy') if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().endswith("heavy: []")
    lines = out.splitlines()
    assert lines[0].split() == ["wave", "fieldwork_date", "respondents", "source_file", "added_at", "weighting"]
    first = demo_study.waves().iloc[0]
    assert lines[1].startswith(f"{first['wave']}  {first['fieldwork_date']}")
    assert f"{first['respondents']:,}" in lines[1] and lines[1].endswith("weights from the file (wt)")
    assert len(lines) == 1 + len(demo_study.labels) + 1
