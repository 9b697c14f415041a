"""The planted truths of the demo study (listed in tracker/demo.py) are found, and only they.

The demo data is invented; these tests check detection against what was planted, not any
statistical value.
"""

from __future__ import annotations


def _significant(result):
    t = result.table
    return set(zip(t.loc[t["significant"], "metric"], t.loc[t["significant"], "subgroup"]))


def test_planted_sudden_drop_is_found(demo_study):
    result = demo_study.changes(wave="2025-Q2")
    row = result.table.set_index(["metric", "subgroup"]).loc[("on_time_good", "Total")]
    assert row["significant"] and row["verdict"] == "fall"
    assert row["change_high"] < 0


def test_pure_noise_measure_is_never_significant(demo_study):
    for wave in demo_study.labels[1:]:
        for against in ("previous", "year-ago"):
            if against == "year-ago" and wave < "2024-Q1":
                continue
            result = demo_study.changes(wave=wave, against=against)
            assert not any(m == "info_good" for m, _ in _significant(result)), (wave, against)


def test_wording_break_is_not_compared(demo_study):
    result = demo_study.changes(wave="2024-Q1")
    rows = result.table[result.table["metric"] == "safe"]
    assert (rows["verdict"] == "not tested").all()
    assert rows["flags"].str.contains("safety changed at 2024-Q1").all()


def test_year_ago_picks_the_same_quarter(demo_study):
    result = demo_study.changes(wave="2026-Q1", against="year-ago")
    assert result.against.startswith("2025-Q1")


def test_the_planted_wording_jump_is_bridged(demo_study):
    # the demo plants an 8-point jump at the rewording of the safety question (tracker/demo.py, truth 8)
    from tracker.bridging import break_jumps

    est = demo_study.estimates(metrics="safe", by=[])
    j = break_jumps(est, {"safe": "2024-Q1"}).iloc[0]
    assert j["bridged"] and j["jump_low"] < 0.08 < j["jump_high"] and j["jump_low"] > 0
