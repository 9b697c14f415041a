"""The study in a notebook: charts as Altair objects, the brief as an object, rich tables.

:class:`NotebookMixin` gives :class:`tracker.study.Study` its notebook methods: ``chart`` and
``overview`` return Altair charts built from the same plain Vega-Lite specifications the
command line saves (Altair is imported only here, so the command line starts fast);
``brief`` returns the :class:`tracker.brief.Brief`, which writes itself in every format;
``answers``, ``gaps``, ``gap_changes`` and ``drivers`` call the analyses beside the trend.
:func:`show` renders any result table as a readable HTML table (values by their kind, flags
marked) while the table itself stays a plain DataFrame.
"""

from __future__ import annotations

import pandas as pd

__all__ = ["NotebookMixin", "Shown", "altair_chart", "show"]


def altair_chart(spec: dict):
    """An Altair chart object of a Vega-Lite specification (whole document: schema and look)."""
    import altair as alt

    from .charts import chart_spec

    full = chart_spec(spec)
    for key, cls in (("vconcat", alt.VConcatChart), ("hconcat", alt.HConcatChart), ("facet", alt.FacetChart),
                     ("layer", alt.LayerChart)):
        if key in full:
            return cls.from_dict(full, validate=False)
    return alt.Chart.from_dict(full, validate=False)


class Shown:
    """A result table with a readable HTML display in a notebook; ``.frame`` is the plain
    DataFrame (every column at full precision)."""

    def __init__(self, frame: pd.DataFrame, view: str | None, notes: tuple[str, ...] = ()):
        self.frame, self.view, self.notes = frame, view, notes

    def _repr_html_(self) -> str:
        import html

        from .view import VIEWS, _view_cells

        if self.frame.empty:
            return "<p>Nothing to show: no row matches what was asked.</p>"
        if self.view not in VIEWS:
            return self.frame._repr_html_() or ""
        cols, cells = _view_cells(self.frame, self.view)
        head = "".join(f"<th>{html.escape(c.title)}</th>" for c in cols)
        body = "".join("<tr>" + "".join(f"<td>{html.escape(cells[c.title][i])}</td>" for c in cols) + "</tr>"
                       for i in range(len(self.frame)))
        notes = "".join(f"<p><small>{html.escape(n)}</small></p>" for n in self.notes)
        return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>{notes}"

    def __repr__(self) -> str:
        from .view import VIEWS, human_table

        if self.view in VIEWS:
            text, notes = human_table(self.frame, self.view)
            return text + "".join(f"{n}\n" for n in (*notes, *self.notes))
        return repr(self.frame)


def show(frame: pd.DataFrame, view: str = "estimates", notes=()) -> Shown:
    """Display a result table readably in a notebook (``view``: estimates, changes, trends,
    answers, numbers, gaps, gapshift, drivers ...); the table is ``.frame``."""
    return Shown(frame, view, tuple(notes))


class NotebookMixin:
    """Notebook methods of a Study (see the module's description)."""

    def chart(self, metric: str, by=None, adjust: str = "bh", level: float = 0.95, smooth: bool = False):
        """The trend chart of ``metric`` (in total, or by the split(s) ``by``) as an Altair chart."""
        from .chartdata import trend_charts

        groups = [] if by is None else self.pick_groups(by)  # type: ignore[attr-defined]
        return altair_chart(trend_charts(self, metric, by=groups, adjust=adjust, level=level, smooth=smooth))

    def overview(self, wave: str | None = None, against: str = "previous", adjust: str = "bh",
                 level: float = 0.95):
        """Every tested change of a wave against its baseline, as an Altair chart."""
        from .charts import change_overview

        return altair_chart(change_overview(self.changes(wave=wave, against=against,  # type: ignore[attr-defined]
                                                         adjust=adjust, level=level)))

    def brief(self, wave: str | None = None, against: str = "previous", adjust: str = "bh", level: float = 0.95,
              charts: bool = True):
        """The briefing of a wave (tracker.brief.Brief): ``to_html``, ``to_markdown``,
        ``to_xlsx``, ``to_pptx`` and ``to_json`` write it, or return it without a path."""
        from .brief import build_brief

        return build_brief(self, wave=wave, against=against, adjust=adjust, level=level, charts=charts)

    def answers(self, variable: str, waves=None, by=None, level: float = 0.95) -> pd.DataFrame:
        """Every answer of a question (tracker.answers): each code's share, or a number's summary."""
        from .answers import answer_shares, number_summary

        number = self.codebook.variables.get(variable)  # type: ignore[attr-defined]
        f = number_summary if number is not None and number.type == "number" else answer_shares
        return f(self, variable, waves=waves, by=by, level=level)

    def gaps(self, wave: str | None = None, metrics=None, by=None, adjust: str = "bh", level: float = 0.95):
        """Subgroups compared within a wave (tracker.within.WithinResult)."""
        from .within import compare_within

        return compare_within(self, wave=wave, metrics=metrics, by=by, adjust=adjust, level=level)

    def gap_changes(self, wave: str | None = None, against: str = "previous", metrics=None, by=None,
                    adjust: str = "bh", level: float = 0.95):
        """Whether gaps between subgroups changed, and whether the levels trend alike
        (tracker.gapshift.GapShiftResult)."""
        from .gapshift import gap_shifts

        return gap_shifts(self, wave=wave, against=against, metrics=metrics, by=by, adjust=adjust, level=level)

    def drivers(self, headline: str | None = None, attributes=None, waves=None, level: float = 0.95):
        """The driver analysis of a headline metric (tracker.drivers.DriverFit)."""
        from .drivers import fit_drivers

        if isinstance(attributes, str):
            attributes = [attributes]
        return fit_drivers(self, headline, attributes, waves, level)
