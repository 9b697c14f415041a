"""Shared fixtures: the example codebook of the contract and generated wave files for it.

The generated respondents are invented: they exercise behaviour (what is accepted,
refused, stored) and feed reference libraries in the statistical tests; no check value
is taken from them.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

FIXTURES = Path(__file__).parent / "fixtures"
EXAMPLE_CODEBOOK = FIXTURES / "example_codebook.yaml"


def example_wave(n: int = 200, seed: int = 1, label: str = "2025-Q3") -> pd.DataFrame:
    """A valid wave for the example codebook (Northgate Leisure Centres, fictional)."""
    rng = np.random.default_rng(seed)
    sat = rng.choice([1, 2, 3, 4, 5, 9], n, p=[0.05, 0.1, 0.15, 0.35, 0.3, 0.05])
    frame = pd.DataFrame({
        "member_id": [f"M{seed}-{i}" for i in range(n)],
        "wt": np.round(rng.uniform(0.5, 2.0, n), 4),
        "site_stratum": rng.integers(1, 4, n),
        "visit_day": rng.integers(1, 8, n),
        "site": rng.integers(1, 4, n),
        "age": rng.integers(16, 90, n),
        "sex": rng.choice([1, 2, 3], n, p=[0.5, 0.45, 0.05]),
        "satisfaction": sat,
        "cleanliness": rng.integers(1, 6, n),
        "use_gym": rng.integers(0, 2, n),
        "use_pool": rng.integers(0, 2, n),
        "use_class": rng.integers(0, 2, n),
        "recommend": rng.integers(0, 11, n),
        "membership": rng.integers(1, 4, n),
    })
    return frame


def snapshot(folder: Path) -> dict[str, str]:
    """Every file under ``folder`` with its SHA-256: equal snapshots = unchanged study."""
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*")) if p.is_file()
    }


@pytest.fixture
def study_dir(tmp_path):
    from tracker import Study

    Study.create(tmp_path / "study", EXAMPLE_CODEBOOK)
    return tmp_path / "study"


@pytest.fixture
def wave_csv(tmp_path):
    def write(frame: pd.DataFrame | None = None, name: str = "wave.csv", **kw) -> Path:
        frame = example_wave(**kw) if frame is None else frame
        path = tmp_path / name
        frame.to_csv(path, index=False)
        return path
    return write


@pytest.fixture(scope="session")
def demo_study(tmp_path_factory):
    """The bundled demo study, built once per test session."""
    from tracker.demo import build_demo

    study, _ = build_demo(tmp_path_factory.mktemp("demo") / "study")
    return study
