"""Exports: CSV (and Parquet when pyarrow is installed) written once per file from the tables' columns, the
per-trial curves streamed into ``curves.csv`` and each athlete's ``athletes/CODE_curves.csv`` in one pass.

CSV text is the same as pandas' ``to_csv(index=False, lineterminator="\\n", float_format="%.6g")`` (tested), so
reruns are byte-identical; floats keep six significant digits.
"""
from __future__ import annotations

import contextlib
import csv
import io as _io
from pathlib import Path
from typing import Callable, Iterable, Mapping

import numpy as np
import pandas as pd

from ..atomic import atomic_open, atomic_write_bytes

__all__ = ["table_csv", "columns_csv", "write_table", "write_curves", "CurvesExport", "exported_frame",
           "CSV_FLOAT_FORMAT"]

CSV_FLOAT_FORMAT = "%.6g"
_PANDAS_CSV = {"index": False, "lineterminator": "\n", "float_format": CSV_FLOAT_FORMAT}
_CSV_ROWS = 2048


def table_csv(df: pd.DataFrame) -> str:
    """CSV text of a table: one header row, UTF-8, fixed float format so reruns are byte-identical.

    The same text as ``df.to_csv(index=False, lineterminator="\\n", float_format="%.6g")``, written about three
    times faster: each column is formatted as a whole (floats with ``%.6g``, missing values empty) and the rows go
    through the same ``csv`` writer pandas uses (minimal quoting). Tables with other kinds of columns take pandas.
    """
    text = _io.StringIO()
    _write_csv(df, text)
    return text.getvalue()


def columns_csv(columns: Mapping[str, np.ndarray]) -> str:
    """``table_csv`` of the table these columns make (in their order), without building it: the same text."""
    text = _io.StringIO()
    _write_columns(columns, text)
    return text.getvalue()


def _write_columns(columns: Mapping[str, np.ndarray], handle, header: bool = True) -> None:
    n_rows = len(next(iter(columns.values()))) if columns else 0
    _write_blocks(list(columns), n_rows, handle,
                  lambda lo, hi: [_csv_cells(np.asarray(values[lo:hi])) for values in columns.values()],
                  lambda lo, hi: pd.DataFrame({name: values[lo:hi] for name, values in columns.items()}),
                  header=header)


def _write_csv(df: pd.DataFrame, handle) -> None:
    """``table_csv`` into an open text file, block by block (the formatted cells of a block are many small
    objects; the whole table's text is never held in memory)."""
    if not df.columns.is_unique:
        handle.write(df.to_csv(**_PANDAS_CSV))
        return

    def cells_of(lo, hi):
        block = df.iloc[lo:hi]
        return [_csv_cells(block[name].to_numpy()) for name in df.columns]

    _write_blocks(list(df.columns), len(df), handle, cells_of, lambda lo, hi: df.iloc[lo:hi])


def _write_blocks(names: list, n_rows: int, handle, cells_of: Callable, table_of: Callable,
                  header: bool = True) -> None:
    """The CSV header, then the rows block by block: each block's cells from ``cells_of(lo, hi)`` (one list per
    column), or, when a column holds cells of a kind not handled here, pandas' text of ``table_of(lo, hi)``."""
    writer = csv.writer(handle, lineterminator="\n")
    if header:
        writer.writerow([str(name) for name in names])
    for lo in range(0, n_rows, _CSV_ROWS):
        hi = lo + _CSV_ROWS
        cells = cells_of(lo, hi)
        if any(c is None for c in cells):
            handle.write(table_of(lo, hi).to_csv(header=False, **_PANDAS_CSV))
        elif len(cells) == 1:  # a row of one field: the csv writer quotes an empty one
            handle.write("".join([(cell or '""') + "\n" for cell in cells[0]]))
        elif cells and cells[0]:
            # every cell is already final text (numbers never need quoting, text is quoted by _quoted as the csv
            # writer would): joining the rows is the csv writer's output, at about half its cost
            handle.write("\n".join(map(",".join, zip(*cells))) + "\n")


def _quoted(cells: list[str]) -> list[str]:
    """Text cells as the csv writer (minimal quoting, comma, ``\\n``) writes them inside a row of two or more
    fields; each distinct text is passed through the csv module once."""
    forms = {}
    for text in set(cells):
        line = _io.StringIO()
        csv.writer(line, lineterminator="\n").writerow([text, ""])
        forms[text] = line.getvalue()[:-2]  # without the second (empty) field's "," and the line end
    return [forms[text] for text in cells]


def _csv_cells(values: np.ndarray) -> list[str] | None:
    """One column's cells as pandas' to_csv writes them (text quoted as the csv writer does), or None when the
    column is of a kind not handled here."""
    kind = values.dtype.kind
    if kind == "f":
        cells = list(map(CSV_FLOAT_FORMAT.__mod__, values.tolist()))
        for i in np.flatnonzero(np.isnan(values)).tolist():  # missing values empty
            cells[i] = ""
        return cells
    if kind in "iu":
        return list(map(str, values.tolist()))
    if kind == "b":
        return ["True" if v else "False" for v in values.tolist()]
    if kind in "UT":  # numpy text: every cell a str; quoted once per distinct text
        distinct, where = np.unique(values, return_inverse=True)
        return np.array(_quoted(distinct.tolist()), dtype=object)[where.ravel()].tolist()
    if kind == "O":  # object columns: text, with missing values empty
        cells = []
        for v in values.tolist():
            if isinstance(v, str):
                cells.append(v)
            elif v is None or (isinstance(v, float) and v != v):
                cells.append("")
            else:
                return None  # numbers or other objects inside a text column: let pandas decide
        return _quoted(cells)
    return None


def write_table(out: Path, name: str, df: pd.DataFrame) -> list[Path]:
    """``out/NAME.csv`` (and ``out/NAME.parquet`` when pyarrow is installed), each written atomically."""
    with atomic_open(out / f"{name}.csv", "w", encoding="utf-8", newline="") as fh:
        _write_csv(df, fh)
    paths = [out / f"{name}.csv"]
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        return paths
    buffer = _io.BytesIO()
    df.to_parquet(buffer, index=False)
    paths.append(atomic_write_bytes(out / f"{name}.parquet", buffer.getvalue()))
    return paths


def write_curves(targets: Mapping[Path, Iterable[int]], names: list[str],
                 tables: Iterable[tuple[int, Mapping[str, np.ndarray]]]) -> None:
    """Write several curves files in one pass over the trials: ``targets`` maps each file to the indices of the
    trials it holds; ``tables`` yields (index, columns) in order. Each trial's text is formatted once and written
    to every file that holds it; every file is atomic (all appear together when the pass ends)."""
    members: dict[int, list] = {}
    with contextlib.ExitStack() as stack:
        for path, indices in targets.items():
            fh = stack.enter_context(atomic_open(path, "w", encoding="utf-8", newline=""))
            csv.writer(fh, lineterminator="\n").writerow(names)
            for i in indices:
                members.setdefault(i, []).append(fh)
        for i, columns in tables:
            handles = members.get(i, [])
            if not handles:
                continue
            text = _io.StringIO()
            _write_columns({name: columns[name] for name in names}, text, header=False)
            text = text.getvalue()
            for fh in handles:
                fh.write(text)


class CurvesExport:
    """``curves.csv`` and each athlete's ``athletes/STEM_curves.csv`` written while the trials finish: each trial's
    curves are formatted once (:meth:`add`, in run order) and appended to both files. The files are atomic
    temporaries opened in ``stack`` (a ``contextlib.ExitStack``): they appear when the stack closes normally and
    are removed if it closes with an error."""

    def __init__(self, stack: contextlib.ExitStack, out: Path, names: list[str], stems: Mapping[str, str]) -> None:
        self._stack, self._out, self._names, self._stems = stack, Path(out), list(names), stems
        self._all = self._open(self._out / "curves.csv")
        self._athletes: dict[str, object] = {}

    def _open(self, path: Path):
        fh = self._stack.enter_context(atomic_open(path, "w", encoding="utf-8", newline=""))
        csv.writer(fh, lineterminator="\n").writerow(self._names)
        return fh

    def add(self, athlete: str, columns: Mapping[str, np.ndarray]) -> None:
        if athlete not in self._athletes:
            self._athletes[athlete] = self._open(self._out / "athletes" / f"{self._stems[athlete]}_curves.csv")
        text = _io.StringIO()
        _write_columns({name: columns[name] for name in self._names}, text, header=False)
        text = text.getvalue()
        self._all.write(text)
        self._athletes[athlete].write(text)


def exported_frame(tables: list[Mapping[str, np.ndarray]], names: list[str]) -> pd.DataFrame:
    """The rows of several tables' columns as one DataFrame with the values their CSV export holds: floats to six
    significant digits (``%.6g``), empty text as missing, float columns of whole numbers as integers; the same
    table ``pd.read_csv`` gives back from the exported file (tested), so the squad summary and flags are computed
    from the values a user sees in ``strides.csv``."""
    if not tables:
        return pd.DataFrame(columns=names)
    data = {}
    for name in names:
        values = np.concatenate([np.asarray(t[name]) for t in tables])
        kind = values.dtype.kind
        if kind == "f":
            values = np.char.mod(CSV_FLOAT_FORMAT, values).astype(float)
            finite = np.isfinite(values)
            if finite.all() and values.size and np.array_equal(values, np.round(values)) \
                    and np.abs(values).max() < 2 ** 63:
                values = values.astype(np.int64)
            data[name] = values
        elif kind in "OUT":
            text = np.array(["" if v is None else str(v) for v in values.tolist()], dtype=object)
            column = pd.Series(text, dtype="str")
            data[name] = column.mask(text == "")
        else:
            data[name] = values
    return pd.DataFrame(data)
