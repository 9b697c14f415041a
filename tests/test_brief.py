"""The briefing and charts: content, escaping, spreadsheet safety, and a real browser.

The browser test opens the demo brief in Debian's headless Chromium (installed by .ci/run).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from openpyxl import load_workbook

from tracker import Study
from tracker.brief import build_brief, render_markdown, write_brief
from tracker.chartdata import trend_chart
from tracker.charts import OKABE_ITO, change_overview, chart_spec, save_chart
from tracker.cli import main

CHROME_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                "--disable-background-networking", "--disable-component-update", "--disable-sync",
                "--virtual-time-budget=30000"]


@pytest.fixture(scope="module")
def q2_brief(demo_study):
    return build_brief(demo_study, wave="2025-Q2")


def test_headline_lists_the_planted_drop_with_its_numbers(q2_brief, demo_study):
    text = q2_brief.headline[0].text
    row = demo_study.changes(wave="2025-Q2").table.set_index(["metric", "subgroup"])
    big = row.loc[("tram_on_time", "Total")] if abs(row.loc[("tram_on_time", "Total"), "change"]) > abs(
        row.loc[("on_time_good", "Total"), "change"]) else row.loc[("on_time_good", "Total")]
    # shares with one decimal; the change in words is the difference of the printed values
    # (common practice, no source: a sentence must not contradict its own figures)
    v0, v1 = round(big["value_from"] * 100, 1), round(big["value_to"] * 100, 1)
    assert text.startswith(f"{big['metric_label']} fell from {v0:.1f}% to {v1:.1f}%")
    assert f"down {v0 - v1:.1f} points" in text
    assert f"(adjusted interval {-big['adjusted_high'] * 100:.1f} to {-big['adjusted_low'] * 100:.1f} points;" in text
    assert f"bases {int(big['base_from']):,} and {int(big['base_to']):,}" in text
    assert any(i.metric == "on_time_good" and i.mark == "fall" for i in q2_brief.headline)
    assert not any(i.metric == "info_good" for i in q2_brief.headline)
    # one verdict per move: the brief's sections hold exactly the table's held and not-significant totals
    totals = row.xs("Total", level="subgroup")
    assert {i.metric for i in q2_brief.held} == set(totals.index[totals["verdict"] == "held"])
    assert {i.metric for i in q2_brief.not_significant} == set(totals.index[totals["verdict"] == "not significant"])
    assert "info_good" in {i.metric for i in q2_brief.held + q2_brief.not_significant}
    assert any("lies within" in i.text and "either way" in i.text for i in q2_brief.held)
    assert all("could have detected" in i.text for i in q2_brief.not_significant)


def test_latest_brief_trends_and_cautions(demo_study):
    brief = build_brief(demo_study, charts=False)
    trends = " ".join(i.text for i in brief.trends)
    assert "Punctuality good or very good shifted down at 2025-Q2" in trends
    assert "2024-Q3 was a one-wave blip" in trends and "do not brief it as a change of direction" in trends
    assert "Satisfied overall (top-2 box) is rising" in trends
    md = render_markdown(brief)
    for heading in ("## What moved", "## Not significant", "## Patterns over the series", "## Sample notes",
                    "## Method", "## Cautions"):
        assert heading in md
    assert "Significance is not importance" in md and "sampling error only" in md
    assert "its series starts again at 2024-Q1 after a change of wording" in md


def test_brief_html_in_headless_chromium(q2_brief, tmp_path):
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    if chromium is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is not installed; .ci/run should have installed it")
        pytest.skip("chromium not installed on this machine")
    page = write_brief(q2_brief, tmp_path / "brief.html")
    url = page.resolve().as_uri()
    dom = subprocess.run([chromium, *CHROME_FLAGS, f"--user-data-dir={tmp_path / 'p1'}", "--enable-logging=stderr",
                          "--v=0", "--dump-dom", url], capture_output=True, text=True, timeout=180)
    expected = int(re.search(r'data-charts-expected="(\d+)"', dom.stdout).group(1))
    drawn = int(re.search(r'data-charts-drawn="(\d+)"', dom.stdout).group(1))
    # what moved (this wave or over the series) full width; the rest small in a grid
    assert expected == len(q2_brief.charts) + len(q2_brief.compact_charts) >= 10
    assert len(q2_brief.charts) >= 3 and len(q2_brief.compact_charts) >= 8
    assert drawn == expected
    assert re.search(r"<body[^>]*data-chart-errors", dom.stdout) is None
    console = [line for line in dom.stderr.splitlines() if "CONSOLE" in line]
    assert console == []  # the page logs nothing: any console message is a fault
    assert dom.stdout.count("<svg") >= expected
    assert "Punctuality good or very good fell from" in dom.stdout
    shot = tmp_path / "brief.png"
    subprocess.run([chromium, *CHROME_FLAGS, f"--user-data-dir={tmp_path / 'p2'}", "--window-size=1000,3000",
                    "--hide-scrollbars", f"--screenshot={shot}", url], capture_output=True, timeout=180)
    assert shot.is_file() and shot.stat().st_size > 50_000
    # the page's height as laid out by the browser (the page of full-size charts ran to about 7,400 px)
    assert int(re.search(r'data-page-height="(\d+)"', dom.stdout).group(1)) < 6500


def test_html_is_self_contained(q2_brief, tmp_path):
    text = write_brief(q2_brief, tmp_path / "b.html").read_text()
    assert "http://" not in re.sub(r'"(\$schema|xmlns[^"]*)":\s*"[^"]*"', "", text).split("<script>")[0]
    assert re.search(r"<script[^>]+src=", text) is None and "<link" not in text
    assert "vegaEmbed" in text and 'name="viewport"' in text and "@media print" in text


def test_the_workbook_is_for_clients_numbers_formatted_by_kind_with_charts(q2_brief, tmp_path, demo_study):
    # common practice, no source: a client workbook keeps numbers as numbers, shares shown as
    # percentages and their changes in points, readable headers, frozen headers and native charts
    path = write_brief(q2_brief, tmp_path / "b.xlsx")
    wb = load_workbook(path)
    assert wb.sheetnames == ["Brief", "Every wave", "Charts", "Headline", "Subgroup moves", "All changes", "Trends",
                             "Estimates", "Notes"]
    head = wb["Headline"]
    cols = [c.value for c in head[1]]
    assert cols[:3] == ["Measure", "Split", "Subgroup"] and "p (adjusted)" in cols and "metric_label" not in cols
    first = {c: head.cell(2, j + 1) for j, c in enumerate(cols)}
    expected = q2_brief.tables["Headline"].iloc[0]
    assert expected["kind"] == "share"
    assert first["Measure"].value == expected["metric_label"]
    assert first["Now"].value == pytest.approx(expected["value_to"], abs=1e-15) and first["Now"].number_format == "0.0%"
    assert first["Change"].value == pytest.approx(100 * expected["change"], abs=1e-12)
    assert first["Change"].number_format == '+0.0" points";-0.0" points";0.0" points"'
    assert first["Base now"].value == expected["base_to"] and first["Base now"].number_format == "#,##0"
    assert first["p (adjusted)"].number_format == "0.0000"
    assert head.freeze_panes == "B2"
    assert wb["Brief"]["B1"].value == demo_study.codebook.title
    marks = [r[0] for r in wb["Brief"].iter_rows(values_only=True) if r[0]]
    assert marks and set(marks) <= {"▲ Up", "▼ Down", "= Held"}  # moves marked by shape and word
    # every metric in every wave up to the brief's, in total and by subgroup, equal to the estimates
    wide = wb["Every wave"]
    waves = [c.value for c in wide[1]][3:-1]
    assert waves == demo_study.labels[: demo_study.labels.index("2025-Q2") + 1]
    est = demo_study.estimates(waves=waves).set_index(["metric_label", "subgroup", "wave"])
    row = next(r for r in wide.iter_rows(min_row=2) if r[0].value == expected["metric_label"] and r[2].value == "Total")
    for j, w in enumerate(waves):
        assert row[3 + j].value == pytest.approx(est.loc[(expected["metric_label"], "Total", w), "value"], abs=1e-15)
    assert row[-1].value in ("▲ Up", "▼ Down")  # the headline move, marked in the wave's column
    flagged = [c for r in wide.iter_rows(min_row=2) for c in r[3:-1] if c.comment is not None]
    assert flagged and all(c.comment.text.startswith("Read with care: ") for c in flagged)
    assert wide.freeze_panes == "D2"
    charts = wb["Charts"]._charts
    assert len(charts) == len({i.metric for i in q2_brief.headline if i.metric})
    assert all(type(c).__name__ == "LineChart" for c in charts)
    assert "Cautions" in [r[0] for r in wb["Notes"].iter_rows(values_only=True)]


def test_a_results_workbook_keeps_the_machine_columns_and_values(demo_study, tmp_path):
    from tracker.formatting import write_table

    t = demo_study.changes(wave="2025-Q2").table
    wb = load_workbook(write_table(t, tmp_path / "c.xlsx"))
    ws = wb.active
    cols = [c.value for c in ws[1]]
    assert cols == list(t.columns)  # the names of docs/columns.md
    row = {c: ws.cell(2, j + 1) for j, c in enumerate(cols)}
    assert row["change"].value == pytest.approx(t.iloc[0]["change"], abs=1e-15)  # a difference of fractions
    assert row["value_to"].number_format == ("0.0%" if t.iloc[0]["kind"] == "share" else row["value_to"].number_format)
    assert ws.freeze_panes == "A2"


def test_labels_are_escaped_and_cells_cannot_run_as_formulas(tmp_path):
    from .test_estimates_changes import BOOK, random_wave

    text = BOOK.format(weight="", strata="", clusters="").replace("label: Top two", "label: <script>alert(1)</script>")
    text = text.replace("codes: {1: one, 2: two, 3: three}", "codes: {1: '=HYPERLINK(\"x\")', 2: '@two', 3: '+three'}")
    (tmp_path / "book.yaml").write_text(text)
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    rng = np.random.default_rng(0)
    for i in range(2):
        frame = random_wave(rng, 200, weighted=False, design=False, prefix=f"{i}-")
        if i:
            frame.loc[:120, "q"] = 5
        frame.to_csv(tmp_path / f"w{i}.csv", index=False)
        study.add(tmp_path / f"w{i}.csv", f"W{i + 1}", f"2025-0{i + 1}-01")
    brief = build_brief(study)
    page = write_brief(brief, tmp_path / "b.html").read_text()
    assert "<script>alert(1)</script>" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    specs = page.split('id="chart-specs">')[1].split("</script>")[0]
    assert "</" not in specs and "<script" not in specs
    assert json.loads(specs)  # still valid JSON
    wb = load_workbook(write_brief(brief, tmp_path / "b.xlsx"))
    texts = [c for ws in wb.worksheets for row in ws.iter_rows() for c in row if isinstance(c.value, str)]
    risky = [c for c in texts if c.value.lstrip("'")[:1] in ("=", "+", "@")]
    assert risky and all(c.value.startswith("'") and c.data_type == "s" for c in risky)
    markdown = write_brief(brief, tmp_path / "b.md").read_text()  # Markdown renderers pass HTML through
    assert "<script>" not in markdown and "&lt;script&gt;alert(1)&lt;/script&gt;" in markdown
    # table outputs: CSV cells neutralised (OWASP "CSV Injection"), md escaped
    from click.testing import CliRunner

    from tracker.cli import main

    out = CliRunner().invoke(main, ["estimates", str(study.root), "--by", "g", "--format", "csv"]).output
    frame = pd.read_csv(__import__("io").StringIO(out))
    subgroups = set(frame["subgroup"])
    assert {"'=HYPERLINK(\"x\")", "'@two", "'+three"} <= subgroups
    assert not any(str(v)[:1] in "=+@" for v in frame.select_dtypes(exclude="number").to_numpy().ravel())
    out = CliRunner().invoke(main, ["estimates", str(study.root), "--format", "md"]).output
    assert "<script>" not in out and "&lt;script&gt;" in out


def test_charts_use_the_palette_and_tell_rise_from_fall_by_shape(demo_study, tmp_path):
    spec = json.dumps(chart_spec(trend_chart(demo_study, "on_time_good")))
    # this series only falls, and the legend names only what is drawn; the mapping itself
    # gives a rise blue triangles up and a fall vermillion triangles down
    from tracker.charts import STATUS_COLOUR, STATUS_ORDER, STATUS_SHAPE

    assert OKABE_ITO["vermillion"] in spec and "triangle-down" in spec and "triangle-up" not in spec
    rise, fall = STATUS_ORDER.index("rise"), STATUS_ORDER.index("fall")
    assert (STATUS_COLOUR[rise], STATUS_SHAPE[rise]) == (OKABE_ITO["blue"], "triangle-up")
    assert (STATUS_COLOUR[fall], STATUS_SHAPE[fall]) == (OKABE_ITO["vermillion"], "triangle-down")
    for red_green in ("#ff0000", "#00ff00", "red", "green"):
        assert f'"{red_green}"' not in spec.lower()
    frame = __import__("tracker.chartdata", fromlist=["trend_frame"]).trend_frame(demo_study, "on_time_good")
    row = frame.set_index("wave").loc["2025-Q2"]
    assert row["verdict"] == "fall" and row["base"] > 0
    assert frame.set_index("wave").loc["2023-Q1", "verdict"] == "first wave"
    assert not np.isnan(row["fitted"])  # the shift levels are drawn
    safe = __import__("tracker.chartdata", fromlist=["trend_frame"]).trend_frame(demo_study, "safe")
    assert set(safe["segment"]) == {"before wording change", "after wording change"}
    for suffix in ("svg", "png", "json", "html"):
        out = save_chart(change_overview(demo_study.changes(wave="2025-Q2")), tmp_path / f"o.{suffix}")
        assert out.stat().st_size > 1000


def test_chart_and_brief_commands(demo_study, tmp_path):
    root = str(demo_study.root)
    result = CliRunner().invoke(main, ["chart", root, "--metric", "staff_good", "--by", "area",
                                       "-o", str(tmp_path / "c.svg")])
    assert result.exit_code == 0, result.output
    svg = (tmp_path / "c.svg").read_text()
    assert "Southbank" in svg and "Northfield" in svg
    result = CliRunner().invoke(main, ["brief", root, "--wave", "2025-Q2", "-o", str(tmp_path / "b.md")])
    assert result.exit_code == 0, result.output
    assert "Punctuality good or very good fell from" in (tmp_path / "b.md").read_text()
    result = CliRunner().invoke(main, ["brief", root, "-o", str(tmp_path / "b.pdf")])
    assert result.exit_code == 1 and "give a file ending in .html, .md, .xlsx, .pptx or .json" in result.output


def test_demo_command_ends_with_the_brief(tmp_path):
    result = CliRunner().invoke(main, ["demo", str(tmp_path / "d")])
    assert result.exit_code == 0, result.output
    assert f"briefing for 2026-Q1 written to {tmp_path / 'd-brief.html'}" in result.output
    assert (tmp_path / "d-brief.html").stat().st_size > 500_000  # beside the study, not in it
