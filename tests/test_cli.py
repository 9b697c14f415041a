"""The command line as a user meets it: start-up, shared options, help texts."""

from __future__ import annotations

import subprocess
import sys

import pytest
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
    from tracker.names import ADJUST_METHODS as A
    from tracker.names import FORMATS as F
    from tracker.names import SINGLE_CLUSTER_RULES as R

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
        with pytest.raises(TrackerError, match="^level 95: give a confidence level between 0.5 and 1"):
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
    code = ("import os, sys; os.environ['COLUMNS'] = '100'; from tracker.cli import main\n"
            f"try: main(['waves', {str(demo_study.root)!r}])\n"
            "except SystemExit: pass\n"
            "print('heavy:', [m for m in ('pandas', 'numpy', 'scipy') if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().endswith("heavy: []")
    lines = out.splitlines()
    assert lines[0].split() == ["wave", "fieldwork", "respondents", "weighting", "added", "from", "file"]
    first = demo_study.waves().iloc[0]
    assert lines[1].startswith(f"{first['wave']}  {first['fieldwork_date']}")
    assert f"{first['respondents']:,}" in lines[1] and "weights from the file (wt)" in lines[1]
    assert lines[1].endswith(first["source_file"])
    assert len(lines) == 1 + len(demo_study.labels) + 1


@pytest.mark.parametrize("columns", [60, 80, 100])
def test_waves_fits_the_terminal(demo_study, columns):
    """Every line of `waves` within the width (common practice, no source); the dates whole."""
    out = _run("waves", demo_study.root, columns=columns).output.splitlines()
    assert max(len(line) for line in out) <= max(columns, 72)  # the fixed columns need 72 at least
    assert all(line.split()[1].count("-") == 2 for line in out[1:])


# -- the readable view (common practice, no source: a table should fit the screen and read in
#    the units the brief uses); values are checked against the full-precision CSV of the same call

def _run(*args, columns=100):
    return CliRunner(env={"COLUMNS": str(columns)}).invoke(main, [str(a) for a in args])


def test_changes_read_in_points_fit_the_width_and_put_what_moved_first(demo_study):
    import io

    import pandas as pd

    root = demo_study.root
    text = _run("changes", root, "--wave", "2025-Q2", "--all").output
    table = [line for line in text.splitlines()]
    assert all(len(line) <= 100 for line in table)
    full = pd.read_csv(io.StringIO(_run("changes", root, "--wave", "2025-Q2", "--all", "--format", "csv").output))
    assert table[0].split()[:3] == ["metric", "subgroup", "from"]
    first = full.iloc[0]
    assert bool(first["significant"]) and first["group"] == "total"  # what moved, totals first
    sig = full["significant"].to_numpy()
    assert not (sig[1:] & ~sig[:-1]).any()  # no significant row after a non-significant one
    totals_first = full[full["significant"]]["group"].eq("total").to_numpy()
    assert not (totals_first[1:] & ~totals_first[:-1]).any()
    row = table[1].split()
    assert row[0] == first["metric"] and f"{first['value_to'] * 100:.1f}%" in row
    assert f"{first['change'] * 100:+.1f}" in row and "pts" in row
    assert "p adj." in table[0] and "p raw" not in table[0]
    wide = _run("changes", root, "--wave", "2025-Q2", "--all", "--wide").output
    assert "p raw" in wide.splitlines()[0] and max(map(len, wide.splitlines())) > 100
    assert "Metrics are shown by their short names to fit" in text


def test_estimates_show_the_latest_wave_readably_and_write_every_column(demo_study, tmp_path):
    import pandas as pd

    root = demo_study.root
    out = _run("estimates", root, "--metric", "satisfied", "--by", "area").output.splitlines()
    latest = demo_study.labels[-1]
    assert out[0].split()[:4] == ["wave", "metric", "subgroup", "value"]
    rows = [line for line in out[1:] if line.startswith(latest)]
    assert len(rows) == 4 and all(len(line) <= 100 for line in out)
    est = demo_study.estimates(metrics=["satisfied"], by=["area"], waves=[latest]).set_index("subgroup")
    assert f"{est.loc['Total', 'value'] * 100:.1f}%" in rows[0]
    assert f"{est.loc['Total', 'base']:,}" in rows[0]
    assert f"Wave {latest} only; --all-waves or --wave LABEL for others." in out
    result = _run("estimates", root, "--metric", "satisfied", "-o", tmp_path / "e.xlsx")
    assert result.exit_code == 0 and "wrote" in result.output
    sheet = pd.read_excel(tmp_path / "e.xlsx")
    assert set(sheet.columns) >= {"unit_variance", "design_effect", "df"} and len(sheet) == len(
        demo_study.estimates(metrics=["satisfied"]))


def test_nothing_moved_says_so_instead_of_an_empty_table(demo_study):
    out = _run("changes", demo_study.root, "--wave", "2025-Q2", "--metric", "info_good", "--format", "md").output
    assert out.startswith("No significant change in 2025-Q2 against 2025-Q1.")
    assert "| metric |" not in out


# -- shared options, formats of the quick commands, help, quiet, progress --------------------

COMMANDS = ["draft", "new", "check", "add", "waves", "amend", "remove", "rename", "verify", "prepare", "replicates", "estimates", "answers", "changes", "gaps",
            "drivers", "trends", "expect", "surprises",
            "composition", "chart", "brief", "demo"]


def test_top_level_help_lists_the_work_in_order_untruncated_and_every_command_has_an_example():
    text = _run("--help", columns=80).output
    listed = [line.split()[0] for line in text.split("Commands:")[1].splitlines() if line.strip()]
    assert listed == COMMANDS
    assert "..." not in text.split("Commands:")[1]
    for name in COMMANDS:
        sub = _run(name, "--help").output
        example = [line for line in sub.splitlines() if line.strip().startswith("Example:")]
        assert len(example) == 1 and f"tracker {name}" in example[0], name
        assert "-q, --quiet" in sub, name


def test_the_shared_options_read_the_same_in_every_command():
    import re

    def option_help(command, option):
        text = " ".join(_run(command, "--help", columns=200).output.split())
        m = re.search(rf"{option} [A-Z]+ (.*?)(?= -[-a-z]|$)", text)
        return m.group(1) if m else None

    assert len({option_help(c, "--metric") for c in ("estimates", "changes", "trends")}) == 1
    assert len({option_help(c, "--by") for c in ("estimates", "changes", "trends")}) == 1
    assert len({option_help(c, "--against") for c in ("changes", "chart", "brief")}) == 1
    assert "pooled:K" not in option_help("composition", "--against")
    # one name per kind of pooling: a baseline of K waves, or rolling estimates over K waves
    assert "--rolling" in _run("trends", "--help").output and "--pool " not in _run("trends", "--help").output


def test_waves_and_check_print_machine_formats_and_write_files(demo_study, tmp_path):
    import csv
    import io
    import json

    root = demo_study.root
    rows = json.loads(_run("waves", root, "--format", "json").output)
    assert [r["wave"] for r in rows] == demo_study.labels
    assert rows[0]["respondents"] == int(demo_study.waves().iloc[0]["respondents"])  # a number, not text
    table = list(csv.DictReader(io.StringIO(_run("waves", root, "--format", "csv").output)))
    assert [r["wave"] for r in table] == demo_study.labels
    md = _run("waves", root, "--format", "md").output.splitlines()
    assert md[0].startswith("| wave | fieldwork_date |") and len(md) == 2 + len(demo_study.labels)
    result = _run("waves", root, "-o", tmp_path / "w.json")
    assert result.exit_code == 0 and json.loads((tmp_path / "w.json").read_text()) == rows
    assert _run("waves", root, "-o", tmp_path / "w.json", "-q").output == ""
    bad = tmp_path / "bad.csv"
    bad.write_text("resp_id,area\n1,9\n")
    result = _run("check", root, bad, "--format", "json")
    problems = json.loads(result.output)
    assert result.exit_code == 1 and problems and {p["severity"] for p in problems} <= {"error", "warning"}
    assert all(p["file"].endswith("bad.csv") for p in problems) and any(p["severity"] == "error" for p in problems)


def test_add_reports_as_one_json_document(demo_study, tmp_path):
    import json
    import shutil

    from tracker.demo import bundled_waves
    from tracker.study import Study

    study = Study.create(tmp_path / "s", bundled_waves() / "codebook.yaml")
    result = _run("add", study.root, bundled_waves() / "riders-2023-Q1.csv", "--wave", "2023-Q1", "--date",
                  "2023-02-20", "--format", "json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.output)
    assert doc["label"] == "2023-Q1" and doc["rows"] == int(demo_study.waves().iloc[0]["respondents"])
    shutil.rmtree(tmp_path / "s")


def test_progress_is_drawn_on_a_terminal_only_and_never_with_quiet():
    import io

    from tracker import progress

    class Tty(io.StringIO):
        def isatty(self):
            return True

    tty, pipe = Tty(), io.StringIO()
    with progress.reporting(stream=tty):
        progress.step("adding waves", 1, 4, "2023-Q2")
    assert "adding waves [######" in tty.getvalue() and "1/4 2023-Q2" in tty.getvalue()
    for stream, quiet in ((pipe, False), (Tty(), True)):
        with progress.reporting(quiet=quiet, stream=stream):
            progress.step("adding waves", 1, 4)
        assert stream.getvalue() == ""
    progress.step("outside", 1, 2)  # no reporter: nothing, no error


def test_trend_charts_name_waves_by_label_and_the_legend_only_what_is_drawn(demo_study):
    import json

    from tracker.chartdata import trend_charts
    from tracker.charts import FIT_COLOUR, OKABE_ITO, change_overview, chart_spec

    spec = chart_spec(trend_charts(demo_study, "on_time_good", by=["area"]))
    text = json.dumps(spec)
    layer = spec["spec"]["layer"]
    xs = [part["encoding"]["x"] for part in layer if "x" in part.get("encoding", {})]
    assert all(x["field"] == "wave" and x["type"] == "ordinal" for x in xs)
    assert xs[0]["sort"] == demo_study.labels
    points = [p for p in layer if p["mark"]["type"] == "point"][0]
    domain = points["encoding"]["color"]["scale"]["domain"]
    data = spec["data"]["values"]
    assert set(domain) == {d["verdict"] for d in data}  # no unused legend entries
    assert spec["columns"] == 3  # three areas: one full row
    assert FIT_COLOUR != OKABE_ITO["orange"] and OKABE_ITO["orange"] not in text
    both = chart_spec(trend_charts(demo_study, "on_time_good", by=["area", "age_band"]))
    assert len(both["vconcat"]) == 2
    result = demo_study.changes(wave="2025-Q2")
    over = chart_spec(change_overview(result, totals_only=True))
    n_total = int((result.table["group"] == "total").sum())
    assert f"Drawn: {n_total} changes" in " ".join(over["title"]["subtitle"])


def test_small_multiples_fill_their_rows():
    from tracker.charts import _columns

    # common practice, no source: as few empty places as can be, at most four panels a row
    assert [_columns(n) for n in range(1, 10)] == [1, 2, 3, 4, 3, 3, 4, 4, 3]


def test_docs_columns_lists_exactly_the_columns_each_command_writes(demo_study):
    import re
    from pathlib import Path

    from tracker.changes import COLUMNS as CHANGE_COLUMNS
    from tracker.estimates import COLUMNS as ESTIMATE_COLUMNS
    from tracker.trends import COLUMNS as TREND_COLUMNS

    doc = (Path(__file__).resolve().parent.parent / "docs" / "columns.md").read_text()

    def named(section):
        text = doc.split(f"## {section}\n")[1].split("\n## ")[0]
        rows = [line.split("|")[1] for line in text.splitlines() if line.startswith("| `")]
        return [c for row in rows for c in re.findall(r"`([a-z0-9_*]+)`", row)]

    def expand(cols):  # `level_before*` stands for the level and its interval
        return [x for c in cols for x in ([x for x in TREND_COLUMNS if x.startswith(c[:-1])] if c.endswith("*")
                                          else [c])]

    assert named("estimates") == ESTIMATE_COLUMNS
    from tracker.answers import NUMBER_COLUMNS, SHARE_COLUMNS, TEST_COLUMNS
    from tracker.within import COLUMNS as GAP_COLUMNS

    answers = named("answers")
    assert set(answers) == set(SHARE_COLUMNS) | set(NUMBER_COLUMNS) | set(TEST_COLUMNS) | {"kind"}
    from tracker.gapshift import COLUMNS as SHIFT_COLUMNS

    assert set(named("gaps")) == set(GAP_COLUMNS) | set(SHIFT_COLUMNS)
    from tracker.drivers import COEFFICIENT_COLUMNS, IMPORTANCE_COLUMNS, SHIFT_COLUMNS as DRIFT_COLUMNS

    assert set(named("drivers")) == set(IMPORTANCE_COLUMNS) | set(COEFFICIENT_COLUMNS) | set(DRIFT_COLUMNS) | {"kind"}
    assert set(expand(named("changes"))) == set(CHANGE_COLUMNS)
    assert set(expand(named("trends"))) == set(TREND_COLUMNS)
    mix = demo_study.changes(wave="2025-Q4", by=[], mix="frequency").mix
    mix_text = doc.split("With `--mix GROUP`")[1].split("## trends")[0]
    assert set(re.findall(r"`([a-z0-9_]+)`", mix_text)) >= set(mix.columns)
    from tracker.expected import RANGE_COLUMNS, SURPRISE_COLUMNS

    assert named("expect") == RANGE_COLUMNS
    assert named("surprises") == SURPRISE_COLUMNS
    smooth_text = doc.split("With `estimates --smooth`")[1].split("## changes")[0]
    assert set(re.findall(r"`([a-z_]+)`", smooth_text)) >= {"smoothed", "smoothed_low", "smoothed_high", "signal_sd"}
    comp = demo_study.composition(wave="2025-Q4").table()
    comp_text = doc.split("## composition\n")[1].split("\n## ")[0]
    assert set(comp.columns) <= set(re.findall(r"`([a-z0-9_]+)`", comp_text))


def test_the_view_takes_units_from_the_kinds_registry(demo_study):
    # common practice, no source: a balance (share of plus minus share of minus) reads in
    # points, never as a percent; a share in percent; a mean in its own units
    root, latest = demo_study.root, demo_study.labels[-1]
    est = demo_study.estimates(metrics=["recommend_balance", "satisfied", "satisfaction_mean"], by=["total"],
                               waves=[latest]).set_index("metric")["value"]
    out = _run("estimates", root, "--metric", "recommend_balance", "--metric", "satisfied", "--metric",
               "satisfaction_mean", "--by", "total", "--wide").output.splitlines()
    row = {m: next(line for line in out if line.startswith(latest) and lab in line)
           for m, lab in (("recommend_balance", "Recommend balance"), ("satisfied", "Satisfied overall"),
                          ("satisfaction_mean", "Mean overall satisfaction"))}
    assert f" {est['recommend_balance'] * 100:.1f} " in row["recommend_balance"] + " "
    assert f"{est['recommend_balance'] * 100:.1f}%" not in row["recommend_balance"]
    assert f"{est['satisfied'] * 100:.1f}%" in row["satisfied"]
    assert f" {est['satisfaction_mean']:.2f} " in row["satisfaction_mean"] + " "


def test_python_errors_name_arguments_and_the_command_line_names_options(demo_study):
    # common practice, no source: a notebook user never reads about a flag they cannot pass
    import pytest

    from tracker import TrackerError
    from tracker.cli import as_flag

    calls = {"by": lambda: demo_study.estimates(by="colour"), "metric": lambda: demo_study.changes(metrics="nope"),
             "against": lambda: demo_study.changes(against="someday"), "level": lambda: demo_study.trends(level=3)}
    for name, call in calls.items():
        with pytest.raises(TrackerError) as err:
            call()
        assert str(err.value).startswith(f"{name} ") and "--" not in str(err.value), str(err.value)
        assert as_flag(str(err.value)).startswith(f"--{name} ")
    done = _run("estimates", demo_study.root, "--by", "colour")
    assert done.exit_code == 1 and "error: --by colour: not a group of this study" in done.output
