"""docs/api.md's examples run, in order, against a freshly built demo study; and the example
notebook docs/example.ipynb runs in a real kernel (nbclient with ipykernel), so neither can rot."""

from __future__ import annotations

import os
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def test_the_api_page_runs(tmp_path, monkeypatch):
    blocks = re.findall(r"```python\n(.*?)```", (ROOT / "docs" / "api.md").read_text(), flags=re.DOTALL)
    assert len(blocks) >= 4
    monkeypatch.chdir(tmp_path)
    scope: dict = {}
    for code in blocks:
        exec(compile(code, "docs/api.md", "exec"), scope)  # noqa: S102 - the page's own examples
    for name in ("staff_good.html", "brief.html", "brief.pptx", "brief.xlsx"):
        assert (tmp_path / name).stat().st_size > 1000, name
    assert type(scope["chart"]).__module__.startswith("altair")
    assert "<table>" in scope["result"]._repr_html_() and "<table>" in scope["fit"]._repr_html_()


def test_the_example_notebook_runs(tmp_path):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    nb = nbformat.read(str(ROOT / "docs" / "example.ipynb"), as_version=4)
    env_cwd = os.getcwd()
    try:
        os.chdir(tmp_path)
        nbclient.NotebookClient(nb, timeout=300, kernel_name="python3", resources={"metadata": {"path": str(tmp_path)}}
                                ).execute()
    finally:
        os.chdir(env_cwd)
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    html = [o["data"]["text/html"] for o in outputs if "data" in o and "text/html" in o["data"]]
    assert any("<table>" in h and "%" in h for h in html)  # a result shown readably, shares as percentages
    assert any("application/vnd.vegalite.v5+json" in o.get("data", {}) or "text/html" in o.get("data", {})
               for o in outputs)
    assert (tmp_path / "brief.pptx").exists()
