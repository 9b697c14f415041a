"""Chart specifications: valid Vega-Lite, checked once here rather than on every render.

Reference: the Vega-Lite v6 JSON schema as shipped by the altair package (a test
dependency only; the tool builds its specifications as plain dicts), validated with
jsonschema's Draft 7 validator (the schema's own draft)."""

from __future__ import annotations

import json
from functools import lru_cache
from importlib.resources import files

import pytest

from tracker.chartdata import trend_chart, trend_charts
from tracker.charts import SCHEMA, change_overview, chart_spec


@lru_cache(maxsize=1)
def validator():
    import jsonschema

    schema = json.loads(files("altair.vegalite.v6.schema").joinpath("vega-lite-schema.json").read_text())
    return jsonschema.Draft7Validator(schema)


def errors(spec: dict) -> list[str]:
    return [f"{list(e.absolute_path)}: {e.message[:200]}" for e in validator().iter_errors(spec)]


def test_the_schema_named_is_the_schema_checked():
    schema = json.loads(files("altair.vegalite.v6.schema").joinpath("vega-lite-schema.json").read_text())
    assert SCHEMA.startswith("https://vega.github.io/schema/vega-lite/v6.")
    assert "$schema" in schema


@pytest.mark.parametrize("kind", ["total", "by area", "compact", "wording break", "two splits", "overview",
                                  "overview totals"])
def test_every_chart_kind_is_valid_vega_lite(demo_study, kind):
    s = demo_study
    spec = {
        "total": lambda: trend_chart(s, "on_time_good"),
        "by area": lambda: trend_chart(s, "staff_good", by="area"),
        "compact": lambda: trend_chart(s, "info_good", compact=True, until=s.labels[-2]),
        "wording break": lambda: trend_chart(s, "safe"),
        "two splits": lambda: trend_charts(s, "on_time_good", by=["area", "age_band"]),
        "overview": lambda: change_overview(s.changes()),
        "overview totals": lambda: change_overview(s.changes(), totals_only=True),
    }[kind]()
    doc = chart_spec(spec)
    assert doc["$schema"] == SCHEMA
    assert errors(doc) == []
    json.dumps(doc, allow_nan=False)  # plain JSON: no NaN or numpy values


def test_a_broken_specification_is_caught_by_the_check():
    # the check can fail: a misspelt mark type and a wrong encoding type are errors
    bad = chart_spec({"data": {"values": []}, "mark": {"type": "lien"},
                      "encoding": {"x": {"field": "wave", "type": "ordinalish"}}})
    assert errors(bad)


def test_the_wording_break_is_drawn_at_its_wave(demo_study):
    spec = trend_chart(demo_study, "safe")
    filters = [t["filter"] for layer in spec["layer"] for t in layer.get("transform", []) if "equal" in
               t.get("filter", {})]
    assert filters and all(f == {"field": "wave", "equal": "2024-Q1"} for f in filters)  # the demo's planted break
