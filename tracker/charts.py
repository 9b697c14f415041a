"""Charts: the trend chart and the change overview, in our own visual language.

Each chart is a Vega-Lite specification built as a plain dict (JSON), drawn by the
Vega-Lite library inlined in the HTML page or converted by vl-convert; the specifications
are checked against the Vega-Lite JSON schema in the tests (tests/test_charts.py), not on
every render.

Colours are the Okabe-Ito palette (Okabe & Ito 2008, *Color Universal Design*), safe for
the common colour-vision deficiencies. A significant rise and a significant fall differ by
shape (triangle up, triangle down) and by word, as well as by colour (blue, vermillion:
never a red/green pair). A change that is not significant is drawn muted grey, never hidden.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import TrackerError
from .kinds import KINDS

OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky blue": "#56B4E9", "bluish green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "reddish purple": "#CC79A7",
}
MUTED = "#999999"
STATUS_ORDER = ["rise", "fall", "held", "not significant", "not tested", "first wave"]
STATUS_COLOUR = [OKABE_ITO["blue"], OKABE_ITO["vermillion"], MUTED, "#666666", "#cccccc", "#cccccc"]
STATUS_SHAPE = ["triangle-up", "triangle-down", "circle", "diamond", "cross", "square"]
FONT = "Helvetica, Arial, sans-serif"


#: The Vega-Lite version the specifications are written for (the page inlines its library).
SCHEMA = "https://vega.github.io/schema/vega-lite/v6.4.1.json"
CONFIG = {"axis": {"grid": True, "gridColor": "#eeeeee", "labelFontSize": 11, "titleFontSize": 12},
          "font": FONT, "view": {"continuousHeight": 300, "continuousWidth": 300, "stroke": None}}


def _scale_factor(kind: str) -> float:
    return KINDS[kind].scale if kind in KINDS else 1.0


def _unit(kind: str) -> str:
    return KINDS[kind].chart_unit if kind in KINDS else ""


def _columns(n: int) -> int:
    """Panels per row for n small multiples: rows filled (fewest empty places), at most 4."""
    if n <= 4:
        return n
    return min((4, 3, 2), key=lambda c: (-(-n // c) * c - n, -c))


def _values(frame: pd.DataFrame, columns: list[str]) -> list[dict]:
    """The rows a chart draws as JSON records (missing values as null), only the columns used."""
    names = [c for c in columns if c in frame.columns]
    cols = []
    for c in names:  # a column at a time: exact Python values, missing ones None
        s = frame[c]
        values = s.to_numpy(dtype=object) if not pd.api.types.is_numeric_dtype(s) else s.to_numpy()
        missing = s.isna().to_numpy()
        listed = values.tolist()
        cols.append([None if gone else v for v, gone in zip(listed, missing)] if missing.any() else listed)
    return [dict(zip(names, row)) for row in zip(*cols)]


def _field(name: str, kind: str, **more) -> dict:
    return {"field": name, "type": kind, **more}


def _tip(name: str, kind: str, title: str, fmt: str | None = None) -> dict:
    return {"field": name, "type": kind, "title": title, **({"format": fmt} if fmt else {})}


def _wave_axis(labels: list[str], width: int) -> dict:
    # waves are placed and named by their labels, in fieldwork order (a date axis would put
    # a quarter's point under the next period's tick)
    crowded = len(labels) * 7 * max(map(len, labels)) > width
    return {"field": "wave", "type": "ordinal", "sort": labels, "title": None,
            "axis": {"labelAngle": -45 if crowded else 0, "labelAlign": "right" if crowded else "center"}}


def _legend_domain(verdicts) -> tuple[list[str], list[str], list[str]]:
    """The verdicts present, in STATUS_ORDER, with their colours and shapes: a legend names
    only the marks drawn."""
    present = set(verdicts)
    keep = [k for k, v in enumerate(STATUS_ORDER) if v in present]
    return ([STATUS_ORDER[k] for k in keep], [STATUS_COLOUR[k] for k in keep], [STATUS_SHAPE[k] for k in keep])


#: The fitted trend or shift levels: dashed bluish green, far in hue from the rise blue and
#: the fall vermillion.
FIT_COLOUR = OKABE_ITO["bluish green"]

#: The columns of trend_frame a trend chart draws or shows in its tooltip.
TREND_FIELDS = ["wave", "panel", "segment", "value_shown", "ci_low_shown", "ci_high_shown", "fitted_shown",
                "pattern", "verdict", "change_shown", "base", "effective_base", "flags", "smoothed_shown"]
#: The smoothed series: dotted reddish purple, labelled, apart from the black estimates line.
SMOOTH_COLOUR = OKABE_ITO["reddish purple"]


def trend_spec(data: pd.DataFrame, by: str | None, adjust: str = "bh", level: float = 0.95,
               width: int | None = None, height: int = 200, compact: bool = False) -> dict:
    """The trend chart's Vega-Lite specification from its :func:`trend_frame`."""
    from .methods.tests import ADJUST_METHODS

    a = data.attrs
    panels = list(dict.fromkeys(data["panel"]))
    columns = _columns(len(panels)) if by else 1
    if compact:
        width, height = width or 250, 110
    width = width or (min(260, 820 // columns - 20) if by else 820)
    unit = _unit(a["kind"])
    labels = list(dict.fromkeys(data.sort_values("date")["wave"]))
    x = _wave_axis(labels, width)
    decimals = KINDS[a["kind"]].decimals if a["kind"] in KINDS else 2
    f1 = f".{decimals}f"
    tooltip = [
        _tip("wave", "nominal", "wave"), _tip("panel", "nominal", "who"),
        _tip("value_shown", "quantitative", "value", f1),
        _tip("ci_low_shown", "quantitative", "interval from", f1),
        _tip("ci_high_shown", "quantitative", "interval to", f1),
        _tip("verdict", "nominal", "change from wave before"),
        _tip("change_shown", "quantitative", "change", f"+.{decimals}f"),
        _tip("base", "quantitative", "base", ","), _tip("effective_base", "quantitative", "effective base", ",.0f"),
        _tip("flags", "nominal", "flags"),
    ]
    # the metric's label is the chart's title; the axis names only the unit, so it is never cut
    y = _field("value_shown", "quantitative", scale={"zero": False}, title=unit or None)
    detail = _field("segment", "nominal")
    band = {"mark": {"type": "area", "color": OKABE_ITO["sky blue"], "opacity": 0.18},
            "encoding": {"x": x, "y": _field("ci_low_shown", "quantitative", title=unit or None),
                         "y2": {"field": "ci_high_shown"}, "detail": detail}}
    line = {"mark": {"type": "line", "color": OKABE_ITO["black"], "strokeWidth": 1.5},
            "encoding": {"x": x, "y": y, "detail": detail}}
    fit_mark = {"type": "line", "color": FIT_COLOUR, "strokeDash": [6, 3], "strokeWidth": 2}
    fit_enc = {"x": x, "y": _field("fitted_shown", "quantitative"), "detail": detail}
    fitted = {"mark": fit_mark, "encoding": fit_enc, "transform": [
        {"filter": "isValid(datum.fitted_shown) && (datum.pattern == 'rising' || datum.pattern == 'falling')"}]}
    levels = {"mark": {**fit_mark, "interpolate": "step-after"}, "encoding": fit_enc, "transform": [
        {"filter": "isValid(datum.fitted_shown) && indexof(datum.pattern, 'shifted') == 0"}]}
    domain, colours, shapes = _legend_domain(data["verdict"])
    legend = None if compact else {"title": "change from the wave before", "orient": "bottom"}
    points = {"mark": {"type": "point", "filled": True, "size": 40 if compact else 70}, "encoding": {
        "x": x, "y": y,
        "color": _field("verdict", "nominal", scale={"domain": domain, "range": colours}, legend=legend),
        "shape": _field("verdict", "nominal", scale={"domain": domain, "range": shapes}, legend=legend),
        "opacity": {"condition": {"test": "datum.verdict == 'rise' || datum.verdict == 'fall'", "value": 1.0},
                    "value": 0.55},
        "tooltip": tooltip}}
    bases = {"mark": {"type": "text", "fontSize": 8, "color": "#555555", "angle": 0, "baseline": "bottom"},
             "encoding": {"x": x, "y": {"value": height - 2}, "text": _field("base", "quantitative", format=",")}}
    layers = [band, line]
    has_fit = data["fitted"].notna()
    if (has_fit & data["pattern"].isin(["rising", "falling"])).any():
        layers.append(fitted)
    if (has_fit & data["pattern"].astype(str).str.startswith("shifted")).any():
        layers.append(levels)  # only layers with data: an empty layer makes the renderer warn
    if "smoothed_shown" in data.columns and data["smoothed_shown"].notna().any():
        smooth_mark = {"type": "line", "color": SMOOTH_COLOUR, "strokeDash": [2, 2], "strokeWidth": 2}
        layers.append({"mark": smooth_mark, "encoding": {"x": x, "y": _field("smoothed_shown", "quantitative"),
                                                         "detail": detail},
                       "transform": [{"filter": "isValid(datum.smoothed_shown)"}]})
        layers.append({"mark": {"type": "text", "align": "left", "dx": 4, "fontSize": 9, "color": SMOOTH_COLOUR},
                       "encoding": {"x": x, "y": _field("smoothed_shown", "quantitative"),
                                    "text": {"value": "smoothed"}},
                       "transform": [{"filter": {"field": "wave", "equal": labels[-1]}},
                                     {"filter": "isValid(datum.smoothed_shown)"}]})
    layers += [points] if compact else [points, bases]
    if a["break_wave"]:
        at = {"filter": {"field": "wave", "equal": a["break_wave"]}}
        layers.append({"mark": {"type": "rule", "color": OKABE_ITO["reddish purple"], "strokeDash": [2, 2]},
                       "encoding": {"x": x}, "transform": [at]})
        layers.append({"mark": {"type": "text", "align": "left", "dx": 3, "dy": -4, "fontSize": 9,
                                "color": OKABE_ITO["reddish purple"]},
                       "encoding": {"x": x, "y": {"value": 10}, "text": {"value": "wording changed"}},
                       "transform": [at]})
    if compact:
        title = {"text": a["label"], "anchor": "start", "fontSize": 11, "limit": width}
    else:
        title = {"text": a["label"], "anchor": "start", "fontSize": 14, "subtitleFontSize": 10, "subtitle": [
            f"Band: {level:.0%} interval (sampling error only). Numbers along the foot: base.",
            f"Triangles: change from the wave before significant at {1 - level:g}, after {ADJUST_METHODS[adjust]}",
            ("adjustment across every metric and subgroup of that wave (as in its brief). Dashed green: the fitted "
            "trend or shift."),
            *(["Dotted purple: smoothed (a local-level model damps the sampling noise; the dots stay the estimates)."]
              if "smoothed_shown" in data.columns else []),
        ]}
    values = {"values": _values(data, TREND_FIELDS)}
    inner = {"layer": layers, "width": width, "height": height}
    if by:
        return {"data": values, "facet": {"field": "panel", "type": "nominal", "title": None, "sort": panels},
                "columns": columns, "spec": inner, "title": title}
    return {"data": values, **inner, "title": title}


OVERVIEW_FIELDS = ["row", "verdict", "significant", "change_shown", "change_low_shown", "change_high_shown",
                   "min_detectable_change_shown", "mde_low", "p_adjusted", "base_from", "base_to"]


def change_overview(result, totals_only: bool = False, width: int = 520) -> dict:
    """Every tested change of one comparison as a dot with its interval, sorted by size;
    significant ones emphasised; a zero line; the minimum detectable change as a shaded band."""
    from .methods.tests import ADJUST_METHODS

    t = result.table[result.table["p_adjusted"].notna()].copy()
    if totals_only:
        t = t[t["group"] == "total"]
    if t.empty:
        raise TrackerError("no tested changes to draw")
    f = t["kind"].map(_scale_factor)
    t["row"] = np.where(t["group"] == "total", t["metric_label"], t["metric_label"] + " | " + t["subgroup"])
    # the interval drawn is the adjusted one: zero outside it exactly when the verdict is a move
    t["change_low"], t["change_high"] = t["adjusted_low"], t["adjusted_high"]
    for col in ("change", "change_low", "change_high", "min_detectable_change"):
        t[col + "_shown"] = t[col] * f
    t["mde_low"] = -t["min_detectable_change_shown"]
    t["unit"] = t["kind"].map({k: kind.axis_title for k, kind in KINDS.items()})
    domain, colours, shapes = _legend_domain(t["verdict"])
    legend = {"title": "change", "orient": "bottom"}
    colour = _field("verdict", "nominal", scale={"domain": domain, "range": colours}, legend=legend)
    charts = []
    for unit, part in t.groupby("unit", sort=False):
        part = part.sort_values("change_shown")
        y = _field("row", "nominal", sort=list(part["row"]), title=None, axis={"labelLimit": 260})
        mde = {"mark": {"type": "bar", "color": "#e8e8e8", "height": 10}, "encoding": {
            "x": _field("mde_low", "quantitative", title=f"change, {unit}"),
            "x2": {"field": "min_detectable_change_shown"}, "y": y}}
        zero = {"data": {"values": [{"zero": 0}]}, "mark": {"type": "rule", "color": OKABE_ITO["black"]},
                "encoding": {"x": _field("zero", "quantitative")}}
        bars = {"mark": {"type": "rule", "strokeWidth": 1.5}, "encoding": {
            "x": _field("change_low_shown", "quantitative"), "x2": {"field": "change_high_shown"}, "y": y,
            "color": colour}}
        dots = {"mark": {"type": "point", "filled": True, "size": 70}, "encoding": {
            "x": _field("change_shown", "quantitative"), "y": y, "color": colour,
            "shape": _field("verdict", "nominal", scale={"domain": domain, "range": shapes}, legend=legend),
            "opacity": {"condition": {"test": "datum.significant", "value": 1.0}, "value": 0.5},
            "tooltip": [_tip("row", "nominal", "measure"), _tip("verdict", "nominal", "verdict"),
                        _tip("change_shown", "quantitative", "change", "+.1f"),
                        _tip("change_low_shown", "quantitative", "adjusted interval from", "+.1f"),
                        _tip("change_high_shown", "quantitative", "adjusted interval to", "+.1f"),
                        _tip("min_detectable_change_shown", "quantitative", "min detectable change", ".1f"),
                        _tip("p_adjusted", "quantitative", "adjusted p", ".3f"),
                        _tip("base_from", "quantitative", "base before", ","),
                        _tip("base_to", "quantitative", "base now", ",")]}}
        charts.append({"data": {"values": _values(part, OVERVIEW_FIELDS)}, "layer": [mde, zero, bars, dots],
                       "width": width, "height": max(60, 16 * len(part))})
    family = result.family_size if getattr(result, "family_size", None) is not None else result.n_tests
    return {"vconcat": charts, "resolve": {"scale": {"x": "independent", "y": "independent"}}, "title": {
        "text": f"{result.wave} against {result.against}: every tested change", "anchor": "start", "fontSize": 14,
        "subtitle": [(f"Line: the interval adjusted for the {family:,} comparisons made together (zero lies "
                     f"outside it exactly when a change is significant). Grey band: the minimum detectable change "
                     f"(80 % power)."),
                     (f"Drawn: {len(t)} changes, {int(t['significant'].sum())} significant at {1 - result.level:g} "
                     f"after {ADJUST_METHODS[result.adjust]} adjustment"),
                     f"across the {family} tests of the comparison" + (
                         "." if len(t) == family else f" ({result.n_significant} significant in all).")],
        "subtitleFontSize": 10}}


def chart_spec(chart: dict) -> dict:
    """A whole Vega-Lite document: the chart with the schema and the shared look."""
    return {"$schema": SCHEMA, "config": CONFIG, **{k: v for k, v in chart.items() if k not in ("$schema", "config")}}


def save_chart(chart, path: str | Path) -> Path:
    """Write a chart as .html (offline: libraries inlined), .png, .svg or .json."""
    import vl_convert as vlc

    from .outputs import check_output, write_output

    path = check_output(path)
    spec = chart_spec(chart)
    suffix = path.suffix.lower()
    if suffix == ".json":
        data = json.dumps(spec, indent=1).encode()
    elif suffix == ".svg":
        data = vlc.vegalite_to_svg(spec).encode()
    elif suffix == ".png":
        data = vlc.vegalite_to_png(spec, scale=2)
    elif suffix in (".html", ".htm"):
        from .page import chart_page

        data = chart_page([spec], title=spec.get("title", {}).get("text", "chart") if isinstance(
            spec.get("title"), dict) else "chart").encode()
    else:
        raise TrackerError(f"{path}: give a file ending in .html, .png, .svg or .json")
    return write_output(path, data)
