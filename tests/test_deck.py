"""The brief as an editable slide deck: read back with python-pptx, the slides, native charts,
series values and speaker notes equal the analysis, and every text fits its box."""

from __future__ import annotations

import pytest
from pptx import Presentation

from tracker.brief import build_brief, write_brief
from tracker.deck import BOX, check_fits, fit_size, lines_needed


@pytest.fixture(scope="module")
def q2(demo_study):
    return build_brief(demo_study, wave="2025-Q2")


def test_one_slide_per_headline_move_with_a_native_chart_of_its_series(q2, demo_study, tmp_path):
    deck = Presentation(str(write_brief(q2, tmp_path / "b.pptx")))
    slides = list(deck.slides)
    moves = [i for i in q2.headline if i.mark in ("rise", "fall")]
    assert len(moves) >= 1
    # title, one per move, what held or could not be told, method and cautions
    assert len(slides) == 1 + len(moves) + 1 + 1 + bool(q2.gap_moves) + bool(q2.drivers)
    waves = demo_study.labels[: demo_study.labels.index("2025-Q2") + 1]
    for item, slide in zip(moves, slides[1:]):
        charts = [s.chart for s in slide.shapes if s.has_chart]
        assert len(charts) == 1 and charts[0].chart_type == 65  # XL_CHART_TYPE.LINE_MARKERS
        plot = charts[0].plots[0]
        assert list(plot.categories) == waves
        est = demo_study.estimates(metrics=[item.metric], by=[], waves=waves)
        values = list(plot.series[0].values)
        assert values == pytest.approx(list(est["value"] * 100), abs=1e-6)  # shares in percent, as shown
        assert list(plot.series[1].values) == pytest.approx(list(est["ci_low"] * 100), abs=1e-6)
        texts = [s.text_frame.text for s in slide.shapes if s.has_text_frame]
        assert item.text in texts  # the brief's sentence
        notes = slide.notes_slide.notes_text_frame.text
        assert "adjusted interval" in notes and "verdict: fall" in notes
    last = [s.text_frame.text for s in slides[-1].shapes if s.has_text_frame]
    assert last[0] == "Method and cautions" and "Significance is not importance" in last[1]
    assert check_fits(tmp_path / "b.pptx") == []


def test_the_longest_text_is_sized_to_fit(demo_study):
    longest = max((m.label for m in demo_study.codebook.metrics.values()), key=len)
    for box in BOX:
        size = fit_size(longest * 3, box)
        _l, _t, width, height, _big, small = BOX[box]
        assert size == small or lines_needed(longest * 3, width - 0.2, size) * size * 1.2 <= (height - 0.1) * 72
    assert lines_needed("a " * 200, 1.0, 10) > lines_needed("a " * 20, 1.0, 10)


def test_a_first_wave_deck_lists_the_levels(demo_study, tmp_path):
    brief = build_brief(demo_study, wave=demo_study.labels[0])
    deck = Presentation(str(write_brief(brief, tmp_path / "first.pptx")))
    titles = [next(s.text_frame.text for s in slide.shapes if s.has_text_frame) for slide in deck.slides]
    assert titles[1] == "Where the measures stand" and titles[-1] == "Method and cautions"
    assert check_fits(tmp_path / "first.pptx") == []


def _soffice():
    import os
    import shutil

    found = shutil.which("soffice")
    if found is None:
        if os.environ.get("CI"):
            pytest.fail("soffice is not installed; .ci/run installs libreoffice-impress-nogui and -calc-nogui")
        pytest.skip("LibreOffice is not installed (apt-get install libreoffice-impress-nogui libreoffice-calc-nogui)")
    return found


@pytest.mark.parametrize("suffix", ["pptx", "xlsx"])
def test_the_deck_and_the_workbook_open_in_libreoffice(q2, tmp_path, suffix):
    # reference: LibreOffice (headless) opens the file and converts it to PDF, one page a slide
    import subprocess

    path = write_brief(q2, tmp_path / f"b.{suffix}")
    env = {"HOME": str(tmp_path), "PATH": "/usr/bin:/bin"}
    done = subprocess.run([_soffice(), "--headless", "--convert-to", "pdf", "--outdir", str(tmp_path), str(path)],
                          capture_output=True, text=True, timeout=300, env=env, check=False)
    pdf = tmp_path / "b.pdf"
    assert done.returncode == 0 and pdf.exists() and pdf.stat().st_size > 1000, done.stderr[-500:]
    if suffix == "pptx":
        import re

        pages = len(re.findall(rb"/Type\s*/Page(?![s\w])", pdf.read_bytes()))
        assert pages == len(Presentation(str(path)).slides)
