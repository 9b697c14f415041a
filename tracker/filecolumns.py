"""One column of a wave file as the codebook's checks read it, whatever the file's type.

A wave file's columns come typed (numbers from Parquet, SPSS, Stata or a spreadsheet),
as Arrow text (CSV read by pyarrow) or as Python text. :func:`read_column` gives the checks
the same three things for each: the numbers, the blank cells and the cells that are text
where a number belongs, computed a column at a time by numpy or Arrow. Typed numbers never
go through text; text becomes numbers by Arrow's cast. A column's text (for the id and the
design columns, and text variables) is made only when asked for.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["FileColumn", "arrow_text", "plain_text", "read_column", "text_table"]


class FileColumn:
    """A column's numbers (NaN where blank or text), its blank cells, and its text on demand."""

    def __init__(self, series: pd.Series):
        self._series = series
        self._num: np.ndarray | None = None
        self._text: pd.Series | None = None
        self._blank: np.ndarray | None = None
        self.typed = _is_number_type(series)

    @property
    def blank(self) -> np.ndarray:
        """Cells with no answer: missing, or nothing but spaces."""
        if self._blank is None:
            if self.typed:
                self._blank = np.isnan(self.numbers)
            elif _is_arrow_text(self._series):
                import pyarrow.compute as pc

                self._blank = pc.equal(self._trimmed_arrow(), "").to_numpy(zero_copy_only=False).astype(bool)
            else:
                self._blank = (self.text == "").to_numpy()
        return self._blank

    @property
    def numbers(self) -> np.ndarray:
        """The cells as floats; NaN where blank or not a number (``pd.to_numeric`` with
        errors="coerce", by Arrow's cast first: the same values, a column at a time)."""
        if self._num is None:
            if self.typed:
                self._num = self._series.to_numpy(dtype=float, na_value=np.nan)
            elif _is_arrow_text(self._series):
                self._num = _arrow_numbers(self._trimmed_arrow())
            else:
                self._num = _numbers(self.text)
        return self._num

    @property
    def text(self) -> pd.Series:
        """The cells as text, spaces trimmed ('' where blank; a whole number without '.0')."""
        if self._text is None:
            if self.typed:
                self._text = plain_text(self._series).astype(str).str.strip()
            elif _is_arrow_text(self._series):
                self._text = self._trimmed_arrow().to_pandas().astype(str)  # pandas' text type, on Arrow
            else:
                self._text = self._series.astype(str).str.strip()
        return self._text

    @property
    def not_numbers(self) -> np.ndarray:
        """Cells holding something that is not a number (never true of a typed column)."""
        if self.typed:
            return np.zeros(len(self._series), dtype=bool)
        return np.isnan(self.numbers) & ~self.blank

    def example(self, mask: np.ndarray) -> str:
        """The text of the first cell where ``mask`` holds."""
        i = int(np.flatnonzero(mask)[0])
        if self.typed:
            return plain_text(self._series.iloc[i:i + 1]).iloc[0]
        return str(self.text.iloc[i])

    def _trimmed_arrow(self):
        import pyarrow.compute as pc

        if not hasattr(self, "_trim"):
            self._trim = pc.utf8_trim_whitespace(arrow_text(self._series))
        return self._trim


def read_column(series: pd.Series) -> FileColumn:
    """The checks' view of one column of a wave file's table."""
    return FileColumn(series)


def _is_number_type(series: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(series.dtype) and not isinstance(series.dtype, pd.ArrowDtype)


def _is_arrow_text(series: pd.Series) -> bool:
    return isinstance(series.dtype, pd.ArrowDtype) or (isinstance(series.dtype, pd.StringDtype)
                                                       and series.dtype.storage == "pyarrow")


def arrow_text(series: pd.Series):
    """The Arrow array behind a column of Arrow text."""
    return series.array.__arrow_array__()


def _arrow_numbers(arr) -> np.ndarray:
    import pyarrow as pa
    import pyarrow.compute as pc

    try:
        arr = pc.if_else(pc.equal(arr, ""), pa.scalar(None, pa.string()), arr)
        return pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False).astype(float)
    except Exception:  # noqa: BLE001 - pyarrow raises several types; pandas then decides cell by cell
        values = pd.Series(arr.to_numpy(zero_copy_only=False), dtype=object)
        return pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)


def _numbers(values: pd.Series) -> np.ndarray:
    """``pd.to_numeric(values, errors="coerce")`` as floats. Arrow's parser first: it takes a
    subset of what pandas takes (no surrounding spaces, for one) with the same values, and
    on any other cell the whole column goes to pandas."""
    import pyarrow as pa

    try:
        arr = pa.array(values.to_numpy(dtype=object), type=pa.string())
    except Exception:  # noqa: BLE001 - not all text: pandas decides cell by cell
        return pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
    return _arrow_numbers(arr)


def _int_text(x: np.ndarray) -> np.ndarray:
    """Whole numbers (int64) as their decimal text, an object array of str (Arrow's cast: one
    C pass, four times numpy's)."""
    import pyarrow as pa

    return pa.array(x.astype(np.int64)).cast(pa.string()).to_numpy(zero_copy_only=False)


def plain_text(col: pd.Series) -> pd.Series:
    """:func:`plain` of every cell of a typed column, a column at once where its type allows
    (numbers, booleans, text); other cells one by one. Missing cells become ''."""
    values = col.to_numpy()
    missing = col.isna().to_numpy()
    if pd.api.types.is_bool_dtype(col) and not missing.any():
        return pd.Series(_int_text(values), index=col.index)
    if pd.api.types.is_integer_dtype(col) and not missing.any():
        return pd.Series(_int_text(values), index=col.index)
    if pd.api.types.is_float_dtype(col):
        x = col.to_numpy(dtype=float)
        whole = np.isfinite(x) & (x == np.round(x)) & (np.abs(x) < 2.0**53)
        out = _int_text(np.where(whole, x, 0))
        if not whole.all():
            out[~whole] = x[~whole].astype(str)
        out[np.isnan(x)] = ""
        big = np.isfinite(x) & (x == np.round(x)) & ~whole  # whole numbers past 2^53: exact digits
        out[big] = [str(int(v)) for v in x[big]]
        return pd.Series(out, index=col.index)
    obj = col.astype(object)
    if pd.api.types.is_string_dtype(col) and col.dtype != object:
        return obj.where(~missing, "")
    return obj.where(~missing, "").map(lambda v: v if isinstance(v, str) else plain(v))


def plain(v) -> str:
    """Text of a cell read from a typed file: 3.0 -> '3', so codes compare as written."""
    if isinstance(v, bytes):
        return v.decode("utf-8")  # binary Parquet columns were checked to be UTF-8 on reading
    if isinstance(v, (bool, np.bool_)):
        return str(int(v))
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return "" if np.isnan(v) else (str(int(v)) if float(v).is_integer() else repr(float(v)))
    return str(v)


def text_table(table: pd.DataFrame) -> pd.DataFrame:
    """A wave file's table with every cell as text (what a reader that looks at text wants)."""
    return pd.DataFrame({c: table[c] if table[c].dtype == object else plain_text(table[c])
                         for c in table.columns}, columns=table.columns)
