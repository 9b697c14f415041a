"""The house rules the code keeps (DEVELOPERS.md): the package type-checks with mypy, passes
ruff's default rules, and the modules the refactor left thin stay thin. Each check runs the
tool itself (installed with the test extras); a missing tool is a failure under CI."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def _tool(name: str) -> list[str]:
    found = shutil.which(name, path=str(Path(sys.executable).parent)) or shutil.which(name)
    if found is None:
        if os.environ.get("CI"):
            pytest.fail(f"{name} is not installed; pip install -e '.[test]' brings it")
        pytest.skip(f"{name} is not installed")
    return [found]


def test_the_package_type_checks():
    done = subprocess.run([*_tool("mypy"), "tracker"], cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-1000:]


def test_the_package_passes_ruff():
    done = subprocess.run([*_tool("ruff"), "check", "tracker"], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stdout[-3000:]


def test_no_function_is_above_complexity_25():
    """McCabe's cyclomatic complexity per function (radon), at most 25 (the house rule)."""
    radon = pytest.importorskip("radon.complexity")
    over = []
    for path in (ROOT / "tracker").rglob("*.py"):
        for block in radon.cc_visit(path.read_text(encoding="utf-8")):
            if block.complexity > 25:
                over.append(f"{path.relative_to(ROOT)}: {block.name} {block.complexity}")
    assert not over, "\n".join(over)


def test_study_is_a_thin_facade():
    """study.py delegates (about 300 lines of code and its numpydoc docstrings; the work lives in
    the modules it names)."""
    assert len((ROOT / "tracker" / "study.py").read_text(encoding="utf-8").splitlines()) <= 360


def test_no_study_private_name_is_used_outside_the_study_module():
    """Lower layers and renderers use Study's public surface only (common practice, no source)."""
    import re

    private = re.compile(r"\b(study|s|self\.study)\._(?!_)[a-z]\w*")
    found = []
    for path in [*(ROOT / "tracker").glob("*.py"), *(ROOT / "scripts").glob("*.py"), *(ROOT / "tests").glob("*.py")]:
        if path.name in ("study.py", "test_habits.py"):
            continue
        for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if private.search(line):
                found.append(f"{path.relative_to(ROOT)}:{n}: {line.strip()}")
    assert not found, "\n".join(found)


@pytest.mark.parametrize("method", ["changes", "composition", "trends", "expected", "surprises", "analysis",
                                    "wave_steps"])
def test_every_adjustment_is_checked_once_with_one_error_type(demo_study, method):
    """An unknown adjustment is a TrackerError naming the choices, from every method that takes one."""
    from tracker import TrackerError

    with pytest.raises(TrackerError, match="xx: use one of bh, holm, by, none"):
        getattr(demo_study, method)(adjust="xx")
