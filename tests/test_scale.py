"""The scale extra: DuckDB straight from the stored Parquet and a local Dask cluster give the
in-process statistics (tracker.estimates.cell_arrays, itself checked against samplics) to
1e-12. Two engines of our own agree here; the outside checks of the numbers are in
tests/test_design_variance.py and tests/test_estimates_changes.py."""

from __future__ import annotations

import numpy as np
import pytest

from tests.conftest import example_wave
from tracker.estimates import cell_arrays

duckdb = pytest.importorskip("duckdb")


def same(a, b, tol=1e-12):
    assert (a.metrics, a.group, a.level) == (b.metrics, b.group, b.level)
    for k in a.stats:
        x, y = a.stats[k], b.stats[k]
        assert np.array_equal(np.isnan(x), np.isnan(y)), k
        ok = ~np.isnan(x)
        assert np.all(np.abs(x[ok] - y[ok]) <= tol * np.maximum(1.0, np.abs(x[ok]))), k


@pytest.fixture(scope="module")
def clustered_study(tmp_path_factory):
    """The example codebook (strata, clusters, a multi variable, age bands, a base filter)
    with three waves sharing cluster labels."""
    from tests.conftest import EXAMPLE_CODEBOOK
    from tracker import Study

    root = tmp_path_factory.mktemp("scale")
    (root / "book.yaml").write_text(EXAMPLE_CODEBOOK.read_text() + "waves_share_clusters: true\n")
    study = Study.create(root / "study", root / "book.yaml")
    for k, label in enumerate(["2025-Q1", "2025-Q2", "2025-Q3"]):
        path = root / f"{label}.csv"
        example_wave(300, seed=10 + k).to_csv(path, index=False)
        study.add(path, label, f"2025-{3 * k + 2:02d}-15")
    return Study(root / "study")


def test_duckdb_gives_the_in_process_statistics(clustered_study, demo_study):
    from tracker.scale import duckdb_cells

    for study in (clustered_study, demo_study):  # clustered with strata; weighted without clusters
        book = study.codebook
        keep = bool(book.clusters)
        for label in study.labels:
            mine = cell_arrays(book, study.load(label), list(book.metrics.values()), list(book.groups), keep_psu=keep)
            other = duckdb_cells(book, study.root / study.entry(label)["file"], keep_psu=keep)
            same(mine, other)
            if keep:  # the same clusters, named alike, with the same totals of linearized values
                order_a, order_b = np.argsort(mine.psu_names), np.argsort(other.psu_names)
                assert list(np.asarray(mine.psu_names)[order_a]) == list(np.asarray(other.psu_names)[order_b])
                assert np.allclose(mine.psu.totals[order_a], other.psu.totals[order_b], rtol=0, atol=1e-12)


def test_the_grouping_sets_query_for_overlapping_levels_gives_the_same(clustered_study, monkeypatch):
    # a split whose levels overlap (a respondent in two levels) cannot use one column per
    # split; the query then groups each level on its own
    from tracker import scale

    monkeypatch.setattr(scale, "_exclusive", lambda book, groups: False)
    book = clustered_study.codebook
    label = clustered_study.labels[0]
    mine = cell_arrays(book, clustered_study.load(label), list(book.metrics.values()), list(book.groups))
    same(mine, scale.duckdb_cells(book, clustered_study.root / clustered_study.entry(label)["file"]))


def test_a_local_dask_cluster_of_two_workers_fills_the_cache_alike(clustered_study, tmp_path):
    import shutil

    pytest.importorskip("distributed")
    from tracker import Study
    from tracker.scale import prepare

    copy = tmp_path / "copy"
    shutil.copytree(clustered_study.root, copy)
    shutil.rmtree(copy / "cache", ignore_errors=True)
    report = prepare(Study(copy), engine="duckdb", workers=2)
    assert report.computed == tuple(clustered_study.labels) and "2 local worker" in report.where
    assert prepare(Study(copy)).computed == ()  # now up to date
    far, near = Study(copy), clustered_study
    a = far.estimates(detail=True)
    b = near.estimates(detail=True)
    for col in ("value", "se", "ci_low", "ci_high", "design_df", "base"):
        assert np.allclose(a[col], b[col], rtol=1e-12, atol=1e-14, equal_nan=True), col
    ca, cb = far.changes().table, near.changes().table
    for col in ("change", "se", "p_raw", "p_adjusted"):  # the cached cluster totals give the same covariance
        assert np.allclose(ca[col], cb[col], rtol=1e-9, atol=1e-14, equal_nan=True), col


def test_prepare_at_the_command_line(clustered_study, tmp_path):
    import shutil

    from click.testing import CliRunner

    from tracker.cli import main

    copy = tmp_path / "copy"
    shutil.copytree(clustered_study.root, copy)
    shutil.rmtree(copy / "cache", ignore_errors=True)
    out = CliRunner().invoke(main, ["prepare", str(copy)])
    assert out.exit_code == 0, out.output
    assert out.output.strip() == ("computed the statistics of 3 wave(s) (pandas, in this process); "
                                  "0 already up to date")
    names = sorted(p.name for p in (copy / "cache").glob("*.npz"))
    assert names == sorted([f"{w}.npz" for w in clustered_study.labels] + [f"{w}.psu.npz" for w in clustered_study.labels])
    again = CliRunner().invoke(main, ["prepare", str(copy), "--workers", "0"])
    assert again.exit_code == 1 and "--workers 0: give 1 or more" in again.output


def test_a_scheduler_address_is_used_as_given(clustered_study, tmp_path):
    import shutil

    distributed = pytest.importorskip("distributed")
    from tracker import Study, TrackerError
    from tracker.scale import prepare

    copy = tmp_path / "copy"
    shutil.copytree(clustered_study.root, copy)
    shutil.rmtree(copy / "cache", ignore_errors=True)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as c:
        report = prepare(Study(copy), scheduler=c.scheduler_address)
    assert report.computed == tuple(clustered_study.labels) and c.scheduler_address in report.where
    with pytest.raises(TrackerError, match="cannot reach the Dask scheduler .* give its address as tcp://HOST:PORT"):
        prepare(Study(copy), scheduler="not an address", rebuild=True)
    with pytest.raises(TrackerError, match="^scheduler: give a scheduler or a number of workers, not both"):
        prepare(Study(copy), workers=2, scheduler="tcp://127.0.0.1:1", rebuild=True)


def test_cluster_totals_are_kept_only_when_a_comparison_needs_them(clustered_study, tmp_path):
    import shutil

    from tracker import Study

    copy = tmp_path / "copy"
    shutil.copytree(clustered_study.root, copy)
    shutil.rmtree(copy / "cache", ignore_errors=True)
    Study(copy).estimates()
    assert not list((copy / "cache").glob("*.psu.npz"))  # estimates need no cluster totals
    first = Study(copy).changes().table
    assert sorted(p.name for p in (copy / "cache").glob("*.psu.npz")) == \
        [f"{w}.psu.npz" for w in clustered_study.labels[-2:]]  # the two waves compared
    again = Study(copy).changes().table  # now from the kept totals
    assert np.allclose(first["se"], again["se"], rtol=0, atol=0, equal_nan=True)


def test_without_the_extra_the_message_says_how_to_get_it(clustered_study, monkeypatch):
    import sys

    from click.testing import CliRunner

    from tracker.cli import main

    monkeypatch.setitem(sys.modules, "duckdb", None)  # as if not installed
    out = CliRunner().invoke(main, ["prepare", str(clustered_study.root), "--engine", "duckdb", "--rebuild"])
    assert out.exit_code == 1 and "Traceback" not in out.output
    assert "pip install 'wavetell[scale]'" in out.output


@pytest.mark.parametrize("name, design", [
    ("apistrat", "strata: stype\npopulation: {1: 4421, 2: 755, 3: 1018}\n"),
    ("apiclus1", "clusters: dnum\npopulation: 757\n"),
    ("apiclus1", "clusters: dnum\npopulation: 0.02\n"),
])
def test_duckdb_applies_the_finite_population_correction_alike(tmp_path, name, design):
    """With the codebook's population (counts per stratum, one count, a sampling fraction)
    DuckDB gives the in-process statistics, themselves equal to R's svydesign(fpc =) in
    tests/test_against_r.py and to the published values in tests/test_published.py."""
    from tests.test_published import _study
    from tracker.scale import duckdb_cells

    study = _study(tmp_path, name, design, years=("2000",))
    book = study.codebook
    keep = bool(book.clusters)
    mine = cell_arrays(book, study.load("2000"), list(book.metrics.values()), list(book.groups), keep_psu=keep)
    other = duckdb_cells(book, study.stored_path("2000"), keep_psu=keep)
    same(mine, other)
    plain = cell_arrays(book.__class__(**{**book.__dict__, "population": None}), study.load("2000"),
                        list(book.metrics.values()), list(book.groups))
    assert (other.stats["variance"][0] < plain.stats["variance"][0]).all()  # the correction applied
