"""The golden master: the demo's outputs as frozen by scripts/golden.py (common practice, no
source: a refactor that keeps behaviour keeps every output). Numbers to 1e-12 relative,
text exactly. A change to what the tool says regenerates the file in the same commit."""

from __future__ import annotations

import gzip
import json
import math
import runpy
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _diff(a, b, where: str, out: list[str]) -> None:
    if len(out) >= 20:
        return
    if isinstance(a, dict) and isinstance(b, dict):
        if set(a) != set(b):
            out.append(f"{where}: keys differ: {sorted(set(a) ^ set(b))[:10]}")
        for k in set(a) & set(b):
            _diff(a[k], b[k], f"{where}.{k}", out)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            out.append(f"{where}: {len(a)} items, frozen {len(b)}")
        for i, (x, y) in enumerate(zip(a, b)):
            _diff(x, y, f"{where}[{i}]", out)
    elif isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool) \
            and not isinstance(b, bool):
        if not (a == b or math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-12)):
            out.append(f"{where}: {a!r}, frozen {b!r}")
    elif a != b:
        out.append(f"{where}: {str(a)[:200]!r}, frozen {str(b)[:200]!r}")


def test_the_demo_says_what_the_golden_master_froze(demo_study, tmp_path):
    frozen = json.loads(gzip.decompress((ROOT / "tests" / "golden" / "demo.json.gz").read_bytes()))
    now = runpy.run_path(str(ROOT / "scripts" / "golden.py"))["outputs"](demo_study.root, tmp_path)
    now = json.loads(json.dumps(now, sort_keys=True))  # the same round trip as the frozen file
    problems: list[str] = []
    _diff(now, frozen, "demo", problems)
    assert not problems, "\n".join(problems)
