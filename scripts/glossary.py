"""Write docs/glossary.md from the one definition of each word in the code
(tracker.changes.VERDICTS, tracker.trends.PATTERNS, tracker.within.GAP_VERDICTS). tests/test_wording.py checks the page."""

from __future__ import annotations

from pathlib import Path

from tracker.changes import VERDICT_NAMES, VERDICTS
from tracker.trends import PATTERNS
from tracker.within import GAP_VERDICTS

ROOT = Path(__file__).resolve().parent.parent


def render() -> str:
    lines = [
        "# Glossary: one word, one meaning", "",
        "Every verdict the tool gives has one definition, written once in the code (`tracker.changes.VERDICTS`,",
        "`tracker.trends.PATTERNS`, `tracker.within.GAP_VERDICTS`) and here (`scripts/glossary.py` writes this",
        "page from them; tests/test_wording.py checks it and that every output uses only these words). A",
        "comparison of two waves, a series over many waves and a comparison of subgroups within a wave have",
        "their own words: none is shared.", "",
        "## A comparison of two waves (`verdict`)", "",
        "| code | said as | meaning |", "|---|---|---|",
        *[f"| `{k}` | {VERDICT_NAMES[k]} | {v} |" for k, v in VERDICTS.items()], "",
        "The **adjusted interval** (`adjusted_low`, `adjusted_high`) is the interval of the change at the",
        "family's agreeing level (`adjusted_level`): for Benjamini-Hochberg families the false-coverage-rate",
        "level 1 - R q / m, R the comparisons found significant of the m tested and q the false discovery",
        "rate (Benjamini & Yekutieli 2005, JASA 100:71; 1 - q / m when none is significant); for",
        "Benjamini-Yekutieli families the same with q divided by the sum of 1/i; for Holm families",
        "1 - q / (m - R + 1), the last step Holm's procedure took; with no adjustment the chosen level. It",
        "is t on the change's standard error and degrees of freedom, like the test, so zero lies outside it",
        "exactly when the change is significant. The unadjusted interval (`change_low`, `change_high`) is",
        "kept beside it for analysts.", "",
        "A **smallest change that matters** is declared in the codebook: per metric (`smallest_change` under",
        "the metric) or for the study per kind (`smallest_change: {share: 5, balance: 8, mean: 0.2}` at the",
        "top), in the units shown. With none declared the tool never says a measure held, and never that a",
        "series is flat.", "",
        "## A series over the waves (`pattern`)", "",
        "| code | meaning |", "|---|---|",
        *[f"| `{k}` | {v} |" for k, v in PATTERNS.items()], "",
        "A series' patterns are judged in one family: every metric in total and in every subgroup over",
        "the same waves, whatever a command shows (`--family asked` narrows it and says so).", "",
        "## Subgroups compared within a wave (`verdict` of `tracker gaps`)", "",
        "| code | meaning |", "|---|---|",
        *[f"| `{k}` | {v} |" for k, v in GAP_VERDICTS.items()], "",
        "Every comparison of one call (each level against the rest of the sample, the levels of a split",
        "pairwise, and the test across all levels) is adjusted in one family, with the adjusted interval",
        "defined as for a comparison of two waves. A gap between subgroups is an association, not a cause.", "",
        "## Numbers", "",
        "Written once in `tracker/wording.py`: a value that rounds to zero is written without a sign; p-values",
        "below 0.001 are written 'below 0.001' (the terminal: '<0.001'); counts take the singular for one; a",
        "change in a sentence is the difference of the two values as printed beside it, while intervals come",
        "from the unrounded figures; each kind keeps its decimals everywhere (shares and balances one decimal",
        "in points, means two).", "",
    ]
    return "\n".join(lines)


if __name__ == "__main__":
    (ROOT / "docs" / "glossary.md").write_text(render(), encoding="utf-8")
    print("wrote docs/glossary.md")
