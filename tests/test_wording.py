"""One meaning per word, intervals that agree with their verdicts, a brief written for its
readers, and nothing that matters dropped to fit.

Sources: the false-coverage-rate level is Benjamini & Yekutieli (2005, JASA 100:71,
definition 1), checked by hand on Benjamini & Hochberg's (1995) fifteen p-values (BH rejects
4 at 0.05, Holm 3: published there); the rest is common practice, no source: a word used in
two senses, a sentence that contradicts its own figures, or a flag lost at a narrow terminal
misleads a reader.
"""

from __future__ import annotations

import html
import io
import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st
from openpyxl import load_workbook

from tracker import Study
from tracker.changes import VERDICTS
from tracker.cli import main
from tracker.methods.distributions import t_ppf
from tracker.methods.tests import adjust_pvalues, difference_test, family_level
from tracker.trends import PATTERNS

ROOT = Path(__file__).resolve().parent.parent
BH_1995 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
           0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]


def test_the_glossary_page_is_the_code():
    import runpy

    render = runpy.run_path(str(ROOT / "scripts" / "glossary.py"))["render"]
    assert (ROOT / "docs" / "glossary.md").read_text(encoding="utf-8") == render()
    assert not set(VERDICTS) & set(PATTERNS)  # no word names both a comparison and a series
    from tracker.within import GAP_VERDICTS

    assert not set(GAP_VERDICTS) & (set(VERDICTS) | set(PATTERNS))


def test_the_agreeing_level_by_hand_on_the_published_example():
    """Benjamini & Hochberg (1995): 4 rejections by BH, 3 by Holm, of m = 15 at q = 0.05."""
    bh = adjust_pvalues(BH_1995, "bh")
    assert int((bh <= 0.05).sum()) == 4
    assert family_level(bh, "bh", 0.05) == pytest.approx(1 - 4 * 0.05 / 15, abs=1e-15)
    holm = adjust_pvalues(BH_1995, "holm")
    assert int((holm <= 0.05).sum()) == 3
    assert family_level(holm, "holm", 0.05) == pytest.approx(1 - 0.05 / 13, abs=1e-15)
    by = adjust_pvalues(BH_1995, "by")
    r = int((by <= 0.05).sum())
    c = sum(1 / i for i in range(1, 16))
    assert family_level(by, "by", 0.05) == pytest.approx(1 - max(r, 1) * 0.05 / (15 * c), abs=1e-15)
    assert family_level(adjust_pvalues([0.5, 0.9], "bh"), "bh", 0.05) == pytest.approx(1 - 0.05 / 2)
    assert family_level(bh, "none", 0.05) == 0.95


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.floats(-5, 5), st.floats(0.05, 3), st.integers(2, 400)), min_size=1, max_size=60),
       st.sampled_from(["bh", "by", "holm", "none"]), st.sampled_from([0.05, 0.1, 0.01]))
def test_zero_lies_outside_the_adjusted_interval_exactly_when_significant(cells, method, alpha):
    d, se, df = (np.array(x, float) for x in zip(*cells))
    _, p = difference_test(d, se**2, df)
    p_adj = adjust_pvalues(p, method)
    level = family_level(p_adj, method, alpha)
    half = t_ppf(0.5 + level / 2, df) * se
    outside = (d - half > 0) | (d + half < 0)
    significant = p_adj <= alpha
    # exact ties of p with the threshold aside (a measure-zero event, rounding either way)
    tie = np.abs(np.abs(d) / se - t_ppf(0.5 + level / 2, df)) < 1e-9
    assert (outside == significant)[~tie].all()


# -- the words in every output ----------------------------------------------------------------

NO_MINUS_ZERO = re.compile(r"(?<![\w.])[-\u2212]0(?:\.0+)?(?![\d.])")
ANALYST_TEXT = re.compile(r"tracker (add|brief|changes|chart|check|composition|demo|estimates|expect|new|prepare|"
                          r"surprises|trends|verify|waves)\b|--[a-z]|p 0\.0000|\b1 (comparisons|changes|respondents|series were)\b|"
                          r"\b(steady|unclear)\b|[Nn]ot clear either way|Rao-Scott F|\bdf\b")


def _keys(study: Study) -> list[str]:
    """Names that are the codebook's, not a reader's: keys with an underscore and its settings."""
    book = study.codebook
    names = [*book.metrics, *book.groups, *book.variables, "smallest_change", "waves_share_clusters", "break_before",
             "single_cluster_strata", "weights_raked_to"]
    return [n for n in names if "_" in n]


def _brief_texts(path: Path) -> str:
    suffix = path.suffix
    if suffix == ".json":
        doc = json.loads(path.read_text())
        parts = [*doc.get("intro", []), *doc.get("method", []), *doc.get("cautions", [])]
        parts += [i["text"] for items in doc["sections"].values() for i in items]
        return "\n".join(parts)
    if suffix == ".xlsx":
        ws = load_workbook(path)["Brief"]
        return "\n".join(str(c.value) for row in ws.iter_rows() for c in row if c.value is not None)
    text = path.read_text()
    if suffix == ".html":
        text = re.sub(r"<script.*?</script>", "", text, flags=re.DOTALL)
        text = re.sub(r"<style.*?</style>", "", text, flags=re.DOTALL)
        text = html.unescape(re.sub(r"<[^>]+>", " ", text))
    return text


@pytest.fixture(scope="module")
def one_wave(tmp_path_factory):
    """A study with only the demo's first wave."""
    root = tmp_path_factory.mktemp("one")
    Study.create(root / "s", ROOT / "waves" / "codebook.yaml").add(ROOT / "waves" / "riders-2023-Q1.csv", "2023-Q1",
                                                                   "2023-02-20")
    return Study(root / "s")


@pytest.mark.parametrize("which", ["2025-Q2", "2026-Q1", "first wave"])
@pytest.mark.parametrize("fmt", ["html", "md", "xlsx", "json"])
def test_the_brief_speaks_to_its_readers(demo_study, one_wave, tmp_path, which, fmt):
    study = one_wave if which == "first wave" else demo_study
    args = ["brief", str(study.root), "-o", str(tmp_path / f"b.{fmt}")]
    if which != "first wave":
        args += ["--wave", which]
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 0, result.output
    text = _brief_texts(tmp_path / f"b.{fmt}")
    assert ANALYST_TEXT.search(text) is None, ANALYST_TEXT.search(text).group(0)
    assert NO_MINUS_ZERO.search(text) is None, NO_MINUS_ZERO.search(text).group(0)
    for key in _keys(study):
        assert re.search(rf"\b{re.escape(key)}\b", text) is None, key
    assert "Significance is not importance" in text and "sampling error only" in text
    if which == "first wave":
        assert "the study's first wave: there is no earlier wave to compare with" in text
        assert "Make-up by" in text and ("Where the measures stand" in text or fmt == "json")


def test_the_first_wave_brief_holds_its_levels(one_wave, tmp_path):
    assert CliRunner().invoke(main, ["brief", str(one_wave.root), "-o", str(tmp_path / "b.json")]).exit_code == 0
    doc = json.loads((tmp_path / "b.json").read_text())
    assert doc["first_wave"] is True and doc["comparisons"] == [] and doc["against"] is None
    est = one_wave.estimates().set_index(["metric", "group", "subgroup"])
    levels = pd.DataFrame(doc["levels"]).set_index(["metric", "group", "subgroup"])
    assert set(levels.index) == set(est.index)
    assert np.allclose(levels["value"], est.loc[levels.index, "value"], rtol=0, atol=1e-15)
    assert len(doc["sections"]["levels"]) == len(one_wave.codebook.metrics)


def test_one_word_one_meaning_across_outputs(demo_study):
    """Every verdict and pattern in the machine formats is a defined code; the brief's
    comparison sections never use a series' word, nor its series section a comparison's."""
    runner = CliRunner()
    root = str(demo_study.root)
    csv = pd.read_csv(io.StringIO(runner.invoke(main, ["changes", root, "--all", "--format", "csv"]).output))
    assert set(csv["verdict"]) <= set(VERDICTS)
    trends = pd.read_csv(io.StringIO(runner.invoke(main, ["trends", root, "--format", "csv"]).output))
    assert set(trends["pattern"]) <= set(PATTERNS)
    from tracker.brief import build_brief
    from tracker.charts import STATUS_ORDER

    assert set(VERDICTS) <= set(STATUS_ORDER)
    brief = build_brief(demo_study, wave="2025-Q2", charts=False)
    comparison_text = " ".join(i.text for i in brief.headline + brief.subgroup_moves + brief.held + brief.not_significant)
    series_text = " ".join(i.text for i in brief.trends)
    assert not re.search(r"\b(flat|no pattern found|rising|falling)\b", comparison_text)
    assert not re.search(r"\b(held within|not significant|significant rise|significant fall)\b", series_text)
    for item in brief.held:
        assert "held within the margin" in item.text


def test_changes_in_sentences_equal_the_printed_values(demo_study):
    """'61.0% (was 62.3%), a change of -1.3 points': the words' number is the difference of the
    printed figures, for every not-significant total of the demo's latest brief."""
    from tracker.brief import build_brief

    brief = build_brief(demo_study, charts=False)
    pat = re.compile(r": ([+-]?[\d.]+)%? \(was ([+-]?[\d.]+)%?\), a change of ([+-]?[\d.]+)")
    checked = 0
    for item in brief.not_significant:
        m = pat.search(item.text)
        assert m, item.text
        now, was, change = (float(x) for x in m.groups())
        decimals = len(m.group(1).split(".")[1])
        assert change == pytest.approx(round(now - was, decimals), abs=1e-9)
        checked += 1
    assert checked >= 3


@pytest.mark.parametrize("columns", [60, 80, 100])
def test_a_flagged_cell_is_marked_at_every_width(demo_study, columns):
    out = CliRunner(env={"COLUMNS": str(columns)}).invoke(
        main, ["estimates", str(demo_study.root), "--wave", "2025-Q1", "--metric", "tram_on_time", "--by", "area"])
    lines = out.output.splitlines()
    row = next(line for line in lines if "Southbank" in line)
    assert "!" in row.split() and all("!" not in line.split() for line in lines[1:5] if "Southbank" not in line)
    assert any(line.startswith("! marks 1 flagged row") for line in lines)
    assert max(len(line) for line in lines[:6]) <= columns


def test_trends_keep_their_verdicts_whatever_is_shown(demo_study):
    full = demo_study.trends().set_index(["metric", "group", "subgroup"])
    for metric, by in (("info_good", ["area"]), ("clean_good", []), ("satisfied", ["frequency"])):
        part = demo_study.trends(metrics=[metric], by=by).set_index(["metric", "group", "subgroup"])
        assert (part["pattern"] == full.loc[part.index, "pattern"]).all()
        assert np.allclose(part["pattern_p_adjusted"], full.loc[part.index, "pattern_p_adjusted"], equal_nan=True)
        assert part.attrs["family_size"] == int(full["pattern_p_adjusted"].notna().sum())
    asked = demo_study.trends(metrics=["clean_good"], by=[], family="asked")
    assert asked.attrs["family"] == "asked" and asked.attrs["family_size"] == 1
    text = CliRunner().invoke(main, ["trends", str(demo_study.root), "--metric", "clean_good", "--by", "total",
                                     "--family", "asked"]).output
    assert "a narrower family than the brief's" in " ".join(text.split())
    with pytest.raises(Exception, match="^adjust xx"):
        demo_study.trends(adjust="xx")


def test_empty_results_say_so_in_a_sentence(tmp_path):
    from tests.conftest import EXAMPLE_CODEBOOK, example_wave

    (tmp_path / "book.yaml").write_text(EXAMPLE_CODEBOOK.read_text())
    study = Study.create(tmp_path / "s", tmp_path / "book.yaml")
    for k, label in enumerate(["2025-Q1", "2025-Q2", "2025-Q3", "2025-Q4"]):
        example_wave(200, seed=50 + k).to_csv(tmp_path / f"{k}.csv", index=False)
        study.add(tmp_path / f"{k}.csv", label, f"2025-{3 * k + 2:02d}-15")
    out = CliRunner().invoke(main, ["trends", str(study.root), "--moving-only", "--by", "total"]).output
    assert "(no rows)" not in out
    assert out.startswith("No series moved") or "pattern" in out.splitlines()[0]


def test_the_mix_split_is_the_readable_view(demo_study):
    out = CliRunner(env={"COLUMNS": "100"}).invoke(main, ["changes", str(demo_study.root), "--mix", "frequency"])
    lines = out.output.splitlines()
    assert lines[0].split()[:2] == ["metric", "change"] and "from the mix" in lines[0]
    assert all(len(line) <= 100 for line in lines) and "mix_part" not in out.output
    assert re.search(r"[+-]\d+\.\d pts", lines[1])
