"""Charts (Altair): the trend chart and the change overview, in our own visual language.

Colours are the Okabe-Ito palette (Okabe & Ito 2008, *Color Universal Design*), safe for
the common colour-vision deficiencies. A significant rise and a significant fall differ by
shape (triangle up, triangle down) and by word, as well as by colour (blue, vermillion:
never a red/green pair). A change that is not significant is drawn muted grey, never hidden.
"""

from __future__ import annotations

import json
from pathlib import Path

import altair as alt
import numpy as np
import pandas as pd

from .errors import TrackerError

OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky blue": "#56B4E9", "bluish green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "reddish purple": "#CC79A7",
}
MUTED = "#999999"
STATUS_ORDER = ["rise", "fall", "steady", "unclear", "not tested", "first wave"]
STATUS_COLOUR = [OKABE_ITO["blue"], OKABE_ITO["vermillion"], MUTED, "#666666", "#cccccc", "#cccccc"]
STATUS_SHAPE = ["triangle-up", "triangle-down", "circle", "diamond", "cross", "square"]
FONT = "Helvetica, Arial, sans-serif"


def _config(chart: alt.TopLevelMixin) -> alt.TopLevelMixin:
    return chart.configure(font=FONT).configure_axis(labelFontSize=11, titleFontSize=12, grid=True,
                                                      gridColor="#eeeeee").configure_view(stroke=None)


def _scale_factor(kind: str) -> float:
    return 100.0 if kind in ("share", "balance") else 1.0


def _unit(kind: str) -> str:
    return {"share": "%", "balance": "points", "mean": "mean"}.get(kind, "")


def trend_frame(study, metric: str, by: str | None = None, adjust: str = "bh", level: float = 0.95,
                until: str | None = None) -> pd.DataFrame:
    """Everything the trend chart draws, one row per wave x subgroup (a plain DataFrame).
    ``until`` ends the series at that wave (a brief of an earlier wave sees no later one)."""
    from .trends import fitted_values

    groups = [by] if by else []
    labels = study.labels
    if until is not None:
        labels = labels[:labels.index(until) + 1]
    full = study.estimates(by=groups, waves=labels, level=level)  # all metrics: cached across charts
    full = full[full["metric"] == metric].reset_index(drop=True)
    est = full[full["group"] == by].reset_index(drop=True) if by else full
    steps = study.wave_steps(metrics=[metric], by=groups, waves=labels, adjust=adjust, level=level)
    m = study.codebook.metrics[metric]
    starts = study.segment_starts([m], labels)
    # the patterns of the analysis of the last wave drawn: one family for every series
    every = study.trends(adjust=adjust, level=level, until=labels[-1])
    trends = every[(every["metric"] == metric) & every["group"].isin(["total", *groups])]
    t0 = study.dates()[labels[0]]
    out = est.copy()
    out["fitted"] = fitted_values(trends, est, t0).to_numpy() if len(est) else np.nan
    if len(steps):
        steps = steps.rename(columns={"wave_to": "wave"})[
            ["metric", "group", "subgroup", "wave", "verdict", "change", "p_adjusted", "flags"]]
        out = out.merge(steps.rename(columns={"flags": "change_flags"}), on=["metric", "group", "subgroup", "wave"],
                        how="left")
    else:
        out["verdict"], out["change"], out["p_adjusted"], out["change_flags"] = np.nan, np.nan, np.nan, ""
    out["verdict"] = out["verdict"].fillna("first wave")
    out["segment"] = "series"
    if metric in starts:
        start_rank = labels.index(starts[metric])
        out["segment"] = np.where(out["wave"].map(labels.index) >= start_rank, "after wording change",
                                  "before wording change")
    f = _scale_factor(m.kind)
    for col in ("value", "ci_low", "ci_high", "fitted"):
        out[col + "_shown"] = out[col] * f
    out["change_shown"] = out["change"] * f
    out["panel"] = np.where(out["group"] == "total", "Total", out["subgroup"])
    out["date"] = pd.to_datetime(out["fieldwork_date"])
    trend_by = trends.set_index("subgroup")["pattern"].to_dict() if by else \
        trends[trends["group"] == "total"].set_index("subgroup")["pattern"].to_dict()
    out["pattern"] = out["subgroup"].map(trend_by)
    out.attrs.update(metric=metric, label=m.label, kind=m.kind, break_wave=starts.get(metric),
                     n_steps=int(steps["p_adjusted"].notna().sum()) if len(steps) else 0, adjust=adjust, level=level)
    return out


def _columns(n: int) -> int:
    """Panels per row for n small multiples: rows filled (fewest empty places), at most 4."""
    if n <= 4:
        return n
    return min((4, 3, 2), key=lambda c: (-(-n // c) * c - n, -c))


def _wave_axis(labels: list[str], width: int) -> alt.X:
    # waves are placed and named by their labels, in fieldwork order (a date axis would put
    # a quarter's point under the next period's tick)
    crowded = len(labels) * 7 * max(map(len, labels)) > width
    return alt.X("wave:O", sort=labels, title=None,
                 axis=alt.Axis(labelAngle=-45 if crowded else 0, labelAlign="right" if crowded else "center"))


def _legend_domain(verdicts) -> tuple[list[str], list[str], list[str]]:
    """The verdicts present, in STATUS_ORDER, with their colours and shapes: a legend names
    only the marks drawn."""
    present = set(verdicts)
    keep = [k for k, v in enumerate(STATUS_ORDER) if v in present]
    return ([STATUS_ORDER[k] for k in keep], [STATUS_COLOUR[k] for k in keep], [STATUS_SHAPE[k] for k in keep])


#: The fitted trend or shift levels: dashed bluish green, far in hue from the rise blue and
#: the fall vermillion.
FIT_COLOUR = OKABE_ITO["bluish green"]


def trend_chart(study, metric: str, by: str | None = None, adjust: str = "bh", level: float = 0.95,
                width: int | None = None, height: int = 200, until: str | None = None,
                compact: bool = False) -> alt.FacetChart | alt.LayerChart:
    """The metric wave by wave: interval band, line, marked significant steps, fitted trend
    or shift levels, a wording break as a gap with a note, bases under the axis.

    ``compact``: a small chart for a grid (no subtitle, no bases), for series that held."""
    from .methods.tests import ADJUST_METHODS

    if metric not in study.codebook.metrics:
        raise TrackerError(f"--metric {metric}: not a metric of this study ({', '.join(study.codebook.metrics)})")
    data = trend_frame(study, metric, by, adjust, level, until)
    a = data.attrs
    panels = list(dict.fromkeys(data["panel"]))
    columns = _columns(len(panels)) if by else 1
    if compact:
        width, height = width or 250, 110
    width = width or (min(260, 820 // columns - 20) if by else 820)
    unit = _unit(a["kind"])
    labels = list(dict.fromkeys(data.sort_values("date")["wave"]))
    x = _wave_axis(labels, width)
    tooltip = [
        alt.Tooltip("wave:N", title="wave"), alt.Tooltip("panel:N", title="who"),
        alt.Tooltip("value_shown:Q", title="value", format=".1f" if unit != "mean" else ".2f"),
        alt.Tooltip("ci_low_shown:Q", title="interval from", format=".1f" if unit != "mean" else ".2f"),
        alt.Tooltip("ci_high_shown:Q", title="interval to", format=".1f" if unit != "mean" else ".2f"),
        alt.Tooltip("verdict:N", title="change from wave before"),
        alt.Tooltip("change_shown:Q", title="change", format="+.1f" if unit != "mean" else "+.2f"),
        alt.Tooltip("base:Q", title="base", format=","),
        alt.Tooltip("effective_base:Q", title="effective base", format=",.0f"),
        alt.Tooltip("flags:N", title="flags"),
    ]
    # the metric's label is the chart's title; the axis names only the unit, so it is never cut
    y = alt.Y("value_shown:Q", title=unit or None, scale=alt.Scale(zero=False))
    band = alt.Chart().mark_area(opacity=0.18, color=OKABE_ITO["sky blue"]).encode(
        x=x, y=alt.Y("ci_low_shown:Q", title=unit or None), y2="ci_high_shown:Q", detail="segment:N")
    line = alt.Chart().mark_line(color=OKABE_ITO["black"], strokeWidth=1.5).encode(x=x, y=y, detail="segment:N")
    fitted = alt.Chart().mark_line(color=FIT_COLOUR, strokeDash=[6, 3], strokeWidth=2).encode(
        x=x, y="fitted_shown:Q", detail="segment:N").transform_filter(
        "isValid(datum.fitted_shown) && (datum.pattern == 'rising' || datum.pattern == 'falling')")
    levels = alt.Chart().mark_line(color=FIT_COLOUR, strokeDash=[6, 3], strokeWidth=2,
                                   interpolate="step-after").encode(
        x=x, y="fitted_shown:Q", detail="segment:N").transform_filter(
        "isValid(datum.fitted_shown) && indexof(datum.pattern, 'shifted') == 0")
    domain, colours, shapes = _legend_domain(data["verdict"])
    legend = None if compact else alt.Legend(title="change from the wave before", orient="bottom")
    points = alt.Chart().mark_point(filled=True, size=40 if compact else 70).encode(
        x=x, y=y,
        color=alt.Color("verdict:N", scale=alt.Scale(domain=domain, range=colours), legend=legend),
        shape=alt.Shape("verdict:N", scale=alt.Scale(domain=domain, range=shapes), legend=legend),
        opacity=alt.condition("datum.verdict == 'rise' || datum.verdict == 'fall'", alt.value(1.0),
                              alt.value(0.55)),
        tooltip=tooltip)
    bases = alt.Chart().mark_text(fontSize=8, color="#555555", angle=0, baseline="bottom").encode(
        x=x, y=alt.value(height - 2), text=alt.Text("base:Q", format=","))
    layers = [band, line]
    has_fit = data["fitted"].notna()
    if (has_fit & data["pattern"].isin(["rising", "falling"])).any():
        layers.append(fitted)
    if (has_fit & data["pattern"].astype(str).str.startswith("shifted")).any():
        layers.append(levels)  # only layers with data: an empty layer makes the renderer warn
    layers += [points] if compact else [points, bases]
    if a["break_wave"]:
        rule = alt.Chart().mark_rule(color=OKABE_ITO["reddish purple"], strokeDash=[2, 2]).encode(x=x).transform_filter(
            alt.datum.wave == a["break_wave"])
        note = alt.Chart().mark_text(align="left", dx=3, dy=-4, fontSize=9, color=OKABE_ITO["reddish purple"]).encode(
            x=x, y=alt.value(10), text=alt.value("wording changed")).transform_filter(
            alt.datum.wave == a["break_wave"])
        layers += [rule, note]
    chart = alt.layer(*layers, data=data).properties(width=width, height=height)
    if compact:
        title = alt.TitleParams(a["label"], anchor="start", fontSize=11, limit=width)
    else:
        subtitle = [
            f"Band: {level:.0%} interval (sampling error only). Numbers along the foot: base.",
            f"Triangles: change from the wave before significant at {1 - level:g}, after {ADJUST_METHODS[adjust]}",
            "adjustment across every metric and subgroup of that wave (as in its brief). Dashed green: the fitted "
            "trend or shift.",
        ]
        title = alt.TitleParams(a["label"], subtitle=subtitle, anchor="start", fontSize=14, subtitleFontSize=10)
    if by:
        chart = chart.facet(facet=alt.Facet("panel:N", title=None, sort=panels), columns=columns, title=title)
    else:
        chart = chart.properties(title=title)
    return chart


def trend_charts(study, metric: str, by: list[str] | tuple[str, ...] = (), adjust: str = "bh",
                 level: float = 0.95, until: str | None = None):
    """The trend chart of ``metric``: in total, by one split, or one block of panels per split."""
    if len(by) <= 1:
        return trend_chart(study, metric, by=by[0] if by else None, adjust=adjust, level=level, until=until)
    return alt.vconcat(*(trend_chart(study, metric, by=g, adjust=adjust, level=level, until=until) for g in by))


def change_overview(result, totals_only: bool = False, width: int = 520) -> alt.VConcatChart | alt.Chart:
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
    for col in ("change", "change_low", "change_high", "min_detectable_change"):
        t[col + "_shown"] = t[col] * f
    t["mde_low"] = -t["min_detectable_change_shown"]
    t["unit"] = np.where(t["kind"] == "mean", "means (scale points)", "shares and balances (percentage points)")
    charts = []
    for unit, part in t.groupby("unit", sort=False):
        part = part.sort_values("change_shown")
        order = list(part["row"])
        y = alt.Y("row:N", sort=order, title=None, axis=alt.Axis(labelLimit=260))
        base = alt.Chart(part)
        mde = base.mark_bar(color="#e8e8e8", height=10).encode(
            x=alt.X("mde_low:Q", title=f"change, {unit}"), x2="min_detectable_change_shown:Q", y=y)
        zero = alt.Chart(pd.DataFrame({"zero": [0]})).mark_rule(color=OKABE_ITO["black"]).encode(x="zero:Q")
        legend = alt.Legend(title="change", orient="bottom")
        domain, colours, shapes = _legend_domain(t["verdict"])
        colour = alt.Color("verdict:N", scale=alt.Scale(domain=domain, range=colours), legend=legend)
        bars = base.mark_rule(strokeWidth=1.5).encode(
            x="change_low_shown:Q", x2="change_high_shown:Q", y=y, color=colour)
        dots = base.mark_point(filled=True, size=70).encode(
            x="change_shown:Q", y=y, color=colour,
            shape=alt.Shape("verdict:N", scale=alt.Scale(domain=domain, range=shapes), legend=legend),
            opacity=alt.condition("datum.significant", alt.value(1.0), alt.value(0.5)),
            tooltip=[alt.Tooltip("row:N", title="measure"), alt.Tooltip("verdict:N", title="verdict"),
                     alt.Tooltip("change_shown:Q", title="change", format="+.1f"),
                     alt.Tooltip("change_low_shown:Q", title="interval from", format="+.1f"),
                     alt.Tooltip("change_high_shown:Q", title="interval to", format="+.1f"),
                     alt.Tooltip("min_detectable_change_shown:Q", title="min detectable change", format=".1f"),
                     alt.Tooltip("p_adjusted:Q", title="adjusted p", format=".4f"),
                     alt.Tooltip("base_from:Q", title="base before", format=","),
                     alt.Tooltip("base_to:Q", title="base now", format=",")])
        charts.append(alt.layer(mde, zero, bars, dots).properties(width=width, height=max(60, 16 * len(part))))
    chart = alt.vconcat(*charts).resolve_scale(x="independent", y="independent")
    family = result.family_size if getattr(result, "family_size", None) is not None else result.n_tests
    return chart.properties(title=alt.TitleParams(
        f"{result.wave} against {result.against}: every tested change", anchor="start", fontSize=14,
        subtitle=[f"Line: {result.level:.0%} interval. Grey band: the minimum detectable change (80 % power).",
                  f"Drawn: {len(t)} changes, {int(t['significant'].sum())} significant at {1 - result.level:g} after "
                  f"{ADJUST_METHODS[result.adjust]} adjustment",
                  f"across the {family} tests of the comparison" + (
                      "." if len(t) == family else f" ({result.n_significant} significant in all).")],
        subtitleFontSize=10))


def chart_spec(chart) -> dict:
    return _config(chart).to_dict()


def save_chart(chart, path: str | Path) -> Path:
    """Write a chart as .html (offline: libraries inlined), .png, .svg or .json."""
    import vl_convert as vlc

    path = Path(path)
    if not path.parent.is_dir():
        raise TrackerError(f"{path}: the folder {path.parent} does not exist")
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
    from .store import write_atomic

    write_atomic(path, data)
    return path
