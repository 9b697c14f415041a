"""Freeze the demo's outputs as the golden master a refactor must keep (tests/test_golden.py).

Builds the bundled demo study in a temporary folder and records, as parsed JSON:
the brief's JSON of every wave against the previous one and against a year ago (where there
is one), the latest brief through the command line, and the ``--format json`` of estimates
(every wave), changes (every comparison, previous and year ago), trends, expect, surprises
and composition. Writes tests/golden/demo.json.gz. Run it only when a change to what the
tool says is intended, and say so in the commit.
"""

from __future__ import annotations

import gzip
import json
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
OUT = ROOT / "tests" / "golden" / "demo.json.gz"

COMMANDS = {
    "estimates": ["estimates", "{root}", "--all-waves", "--format", "json"],
    "changes": ["changes", "{root}", "--all", "--format", "json"],
    "changes_year_ago": ["changes", "{root}", "--against", "year-ago", "--all", "--format", "json"],
    "trends": ["trends", "{root}", "--format", "json"],
    "expect": ["expect", "{root}", "--format", "json"],
    "surprises": ["surprises", "{root}", "--format", "json"],
    "composition": ["composition", "{root}", "--format", "json"],
}


def outputs(root: Path, tmp: Path) -> dict:
    """Every frozen output of the demo study at ``root``, as parsed JSON."""
    from click.testing import CliRunner

    from tracker import Study
    from tracker.brief import build_brief, render_json
    from tracker.cli import main

    study = Study(root)
    out: dict = {}
    runner = CliRunner()
    for name, args in COMMANDS.items():
        result = runner.invoke(main, [a.format(root=root) for a in args])
        if result.exit_code != 0:
            raise RuntimeError(f"{name}: {result.output}")
        out[name] = json.loads(result.output)
    for wave in study.labels[1:]:
        out[f"brief {wave} previous"] = json.loads(render_json(build_brief(study, wave=wave, charts=False)))
        try:
            brief = build_brief(study, wave=wave, against="year-ago", charts=False)
        except Exception:  # no wave a year before this one
            continue
        out[f"brief {wave} year-ago"] = json.loads(render_json(brief))
    result = runner.invoke(main, ["brief", str(root), "-o", str(tmp / "brief.json")])
    if result.exit_code != 0:
        raise RuntimeError(result.output)
    out["brief latest (command line)"] = json.loads((tmp / "brief.json").read_text())
    return out


def demo_outputs() -> dict:
    from tracker.demo import build_demo

    with tempfile.TemporaryDirectory() as tmp:
        study, _ = build_demo(Path(tmp) / "study")
        return outputs(study.root, Path(tmp))


if __name__ == "__main__":
    data = demo_outputs()
    OUT.write_bytes(gzip.compress(json.dumps(data, sort_keys=True).encode("utf-8"), mtime=0))
    print(f"wrote {OUT} ({len(data)} outputs, {OUT.stat().st_size:,} bytes)", file=sys.stderr)
