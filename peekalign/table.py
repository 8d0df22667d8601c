"""Tables with named columns, stored column by column.

A scan's tables hold one row per utterance and per word: tens of thousands of rows.
As tuples of Python objects each float cell costs a float object and a pointer
(~32 bytes); here a column whose cells are all Python floats is one float64 array
(8 bytes a cell), all Python ints one int64 array (ints and None: an int64 array and
a mask), anything else an object array of the cells themselves (text shares its str
objects). Rows come back as the same Python values: ``float`` for a float64 cell,
``int`` for an int64 one, ``None`` where the mask says so.
"""

from __future__ import annotations

import csv
import math
import os
import sys
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .exceptions import ParameterError, describe

__all__ = ["Table"]

#: Rows turned back into tuples at a time when a whole table is walked (CSV, records):
#: the walk never holds all rows as Python objects.
_BLOCK = 4096
_I64 = (-(1 << 63), (1 << 63) - 1)


def _cell(v: Any) -> str:
    """One CSV cell: NaN and None empty, floats with 7 significant digits."""
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        if math.isnan(v):
            return ""
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return format(v, ".7g")
    return str(v)


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return a == b


class _Column:
    """One column: ``values`` (float64, int64 or object) and, for ints with None, a
    ``none`` mask."""

    __slots__ = ("values", "none")

    def __init__(self, values: np.ndarray, none: np.ndarray | None = None) -> None:
        self.values, self.none = values, none

    @classmethod
    def of(cls, cells: list) -> _Column:
        """The most compact column that gives ``cells`` back exactly."""
        kinds = set(map(type, cells))
        if kinds == {float}:
            return cls(np.array(cells, dtype=np.float64))
        if kinds and kinds <= {int, type(None)} and int in kinds:
            ints = [c for c in cells if c is not None]
            if _I64[0] <= min(ints) and max(ints) <= _I64[1]:
                if type(None) not in kinds:
                    return cls(np.array(cells, dtype=np.int64))
                none = np.fromiter((c is None for c in cells), dtype=bool, count=len(cells))
                vals = np.array([0 if c is None else c for c in cells], dtype=np.int64)
                return cls(vals, none)
        # fromiter: a cell that is itself a sequence stays one cell
        return cls(np.fromiter(cells, dtype=object, count=len(cells)))

    @classmethod
    def concat(cls, parts: list[_Column]) -> _Column:
        """The parts one after the other (re-chosen from the cells when they differ)."""
        if len(parts) == 1:
            return parts[0]
        kinds = {(p.values.dtype, p.none is not None) for p in parts}
        if len(kinds) == 1 and parts[0].values.dtype != object:
            vals = np.concatenate([p.values for p in parts])
            none = None if parts[0].none is None else np.concatenate([p.none for p in parts])
            return cls(vals, none)
        return cls.of([c for p in parts for c in p.cells(0, len(p.values))])

    def cells(self, start: int, stop: int) -> list:
        """Cells ``start:stop`` as Python values."""
        out = self.values[start:stop].tolist()
        if self.none is not None:
            for k in np.flatnonzero(self.none[start:stop]).tolist():
                out[k] = None
        return out

    def take(self, index: np.ndarray) -> _Column:
        return _Column(self.values[index], None if self.none is None else self.none[index])

    def nbytes(self) -> int:
        """Bytes held: the arrays, and each distinct object of an object column."""
        n = self.values.nbytes + (0 if self.none is None else self.none.nbytes)
        if self.values.dtype == object:
            seen = {id(v): v for v in self.values.tolist()}
            n += sum(sys.getsizeof(v) for v in seen.values())
        return n


class _Rows(Sequence):
    """A table's rows as tuples, made when asked for (a read-only sequence)."""

    __slots__ = ("_t",)

    def __init__(self, table: Table) -> None:
        self._t = table

    def __len__(self) -> int:
        return self._t._n

    def __getitem__(self, k):
        n = self._t._n
        if isinstance(k, slice):
            start, stop, step = k.indices(n)
            if step == 1:
                return list(self._t._blocks(start, stop, _BLOCK, flat=True))
            return [self[i] for i in range(start, stop, step)]
        k = k.__index__()
        if k < 0:
            k += n
        if not 0 <= k < n:
            raise IndexError("row index out of range")
        return tuple(c.cells(k, k + 1)[0] for c in self._t._cols)

    def __iter__(self) -> Iterator[tuple]:
        return self._t._blocks(0, self._t._n, _BLOCK, flat=True)

    def __eq__(self, other: object) -> bool:
        # NaN equals NaN: each row's floats are new objects, never the other's
        if isinstance(other, (_Rows, list, tuple)):
            return len(self) == len(other) and all(
                isinstance(b, tuple) and len(a) == len(b) and all(map(_same, a, b))
                for a, b in zip(self, other, strict=True)
            )
        return NotImplemented

    def __repr__(self) -> str:
        return repr(list(self))


class Table:
    """Rows with named columns (stored column by column, given back as tuples).

    Parameters
    ----------
    columns : sequence of str
    rows : iterable of tuple
        One value per column; floats use NaN for "no value".

    Examples
    --------
    >>> t = Table(("id", "wer"), [("a", 0.5), ("b", float("nan"))])
    >>> len(t), t["wer"].tolist()[0], t.records()[0]
    (2, 0.5, {'id': 'a', 'wer': 0.5})
    >>> t.rows[1][0], t.csv_text().splitlines()
    ('b', ['id,wer', 'a,0.5', 'b,'])
    """

    def __init__(self, columns: Sequence[str], rows: Iterable[tuple] = ()) -> None:
        self.columns: tuple[str, ...] = tuple(columns)
        self._index = {c: i for i, c in enumerate(self.columns)}
        if isinstance(rows, _Rows) and rows._t.columns == self.columns:
            self._cols, self._n = list(rows._t._cols), rows._t._n
            return
        builder = _Builder(self.columns)
        for r in rows:
            builder.add(r)
        self._cols, self._n = builder.columns()

    @classmethod
    def _of(cls, columns: tuple[str, ...], cols: list[_Column], n: int) -> Table:
        t = cls.__new__(cls)
        t.columns, t._cols, t._n = columns, cols, n
        t._index = {c: i for i, c in enumerate(columns)}
        return t

    @property
    def rows(self) -> Sequence[tuple]:
        """The rows as tuples (a read-only sequence; each row made when asked for)."""
        return _Rows(self)

    def _blocks(self, start: int, stop: int, size: int, *, flat: bool = False):
        """Rows ``start:stop`` as tuples, ``size`` at a time (one list per block, or
        row by row when ``flat``)."""
        for a in range(start, stop, size):
            b = min(a + size, stop)
            block = list(zip(*(c.cells(a, b) for c in self._cols), strict=True))
            if not self._cols:
                block = [()] * (b - a)
            if flat:
                yield from block
            else:
                yield block

    def __len__(self) -> int:
        return self._n

    def __iter__(self) -> Iterator[dict]:
        for r in self.rows:
            yield dict(zip(self.columns, r, strict=True))

    def __getitem__(self, key: str) -> np.ndarray:
        """A column as an array (object dtype for text)."""
        if key not in self._index:
            raise KeyError(f"found no column {key!r}, expected one of {list(self.columns)}")
        col = self._cols[self._index[key]]
        if self._n and col.values.dtype != object and col.none is None:
            return col.values.copy()
        values = col.cells(0, self._n)
        if values and all(isinstance(v, float) for v in values):
            return np.array(values, dtype=np.float64)
        if values and all(isinstance(v, int) and not isinstance(v, bool) for v in values):
            return np.array(values, dtype=np.int64)
        out = np.empty(len(values), dtype=object)
        out[:] = values
        return out

    def records(self) -> list[dict]:
        """Rows as dicts."""
        return list(self)

    def equals(self, other: Table) -> bool:
        """Same columns and rows (NaN equals NaN)."""
        return (
            isinstance(other, Table)
            and self.columns == other.columns
            and len(self) == len(other)
            and all(
                all(_same(a, b) for a, b in zip(r, s, strict=True))
                for r, s in zip(self.rows, other.rows, strict=True)
            )
        )

    def where(self, column: str, value: Any) -> Table:
        """Rows whose ``column`` equals ``value``."""
        cells = self._cols[self._index[column]].cells(0, self._n)
        keep = np.array([v == value for v in cells], dtype=bool)
        index = np.flatnonzero(keep)
        return Table._of(self.columns, [c.take(index) for c in self._cols], len(index))

    def nbytes(self) -> int:
        """Bytes the table holds: its column arrays and the distinct objects of its
        text (and other object) columns.

        Examples
        --------
        >>> Table(("x",), [(1.0,), (2.0,)]).nbytes()
        16
        """
        return sum(c.nbytes() for c in self._cols)

    def to_pandas(self):
        """A ``pandas.DataFrame`` (needs pandas)."""
        try:
            import pandas as pd
        except ImportError:
            raise ParameterError(
                "found no 'pandas' package, expected it for to_pandas(); pip install pandas, "
                "or use .records() / .rows / table[column]"
            ) from None
        return pd.DataFrame.from_records(list(self.rows), columns=list(self.columns))

    def _write(self, f) -> None:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(self.columns)
        for block in self._blocks(0, self._n, _BLOCK):
            w.writerows([_cell(v) for v in r] for r in block)

    def csv_text(self) -> str:
        """The table as CSV text (header line first, ``\\n`` line ends)."""
        import io

        buf = io.StringIO()
        self._write(buf)
        return buf.getvalue()

    def write_csv(self, path: str | os.PathLike, *, overwrite: bool = False) -> Path:
        """Write the table as UTF-8 CSV (atomically; refuses an existing file unless
        ``overwrite``)."""
        from .io.atomic import atomic_write

        with atomic_write(path, overwrite=overwrite) as f:
            self._write(f)
        return Path(path)

    def __repr__(self) -> str:
        return f"Table({len(self)} rows x {len(self.columns)} columns: {', '.join(self.columns)})"


class _Builder:
    """Rows added one at a time, kept as columns ``_BLOCK`` rows at a time: building
    a large table never holds all its rows as tuples."""

    def __init__(self, columns: tuple[str, ...]) -> None:
        self.width = len(columns)
        self.pending: list[tuple] = []
        self.parts: list[list[_Column]] = []
        self.n = 0

    def add(self, row: Iterable) -> None:
        r = tuple(row)
        if len(r) != self.width:
            raise ParameterError(
                describe(
                    f"row {self.n} with {len(r)} values",
                    f"{self.width} (one per column)",
                    "build rows in the column order",
                )
            )
        self.pending.append(r)
        self.n += 1
        if len(self.pending) >= _BLOCK:
            self._flush()

    def _flush(self) -> None:
        if self.pending:
            cells = list(zip(*self.pending, strict=True))
            self.parts.append([_Column.of(list(c)) for c in cells])
            self.pending = []

    def columns(self) -> tuple[list[_Column], int]:
        """The columns of every row added, and how many rows."""
        self._flush()
        if not self.parts:
            empty = np.empty(0, dtype=object)
            return [_Column(empty) for _ in range(self.width)], 0
        cols = []
        for i in range(self.width):
            cols.append(_Column.concat([p[i] for p in self.parts]))
            for p in self.parts:  # each column's parts go as it is joined: the table
                p[i] = None  # is never held twice
        self.parts = []
        return cols, self.n

    def table(self, columns: tuple[str, ...]) -> Table:
        """A :class:`Table` of the rows added."""
        cols, n = self.columns()
        return Table._of(columns, cols, n)
