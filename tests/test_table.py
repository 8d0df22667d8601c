"""Table: columns stored as arrays give back exactly the rows they were built from."""

from __future__ import annotations

import csv
import io
import math
import pickle

import numpy as np
import pytest

from peekalign.exceptions import ParameterError
from peekalign.table import _BLOCK, Table

NAN = float("nan")


def _rows(n: int) -> list[tuple]:
    """Rows of every kind of cell a scan writes: text, floats (NaN, -0.0, inf), ints,
    ints with None, bools, numpy scalars, a column that changes kind past a block."""
    out = []
    for i in range(n):
        out.append(
            (
                f"u{i % 7}",
                [0.5, NAN, -0.0, math.inf, 1e-300, 0.1 + 0.2][i % 6],
                i * 3 - 5,
                None if i % 5 == 0 else 2**40 + i,
                bool(i % 2),
                np.float64(i / 3),
                float(i) if i < _BLOCK + 3 else "late text",
                2**70 if i == 1 else i,
            )
        )
    return out


COLS = ("id", "x", "k", "maybe", "flag", "np", "mixed", "big")


def _same_cell(a, b) -> bool:
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return type(a) is type(b)
    return (
        type(a) is type(b)
        and a == b
        and (not isinstance(a, float) or math.copysign(1, a) == math.copysign(1, b))
    )


def _old_csv(columns, rows) -> str:
    """The CSV as the earlier list-of-tuples table wrote it (csv module, same cells)."""
    from peekalign.table import _cell

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(columns)
    for r in rows:
        w.writerow([_cell(v) for v in r])
    return buf.getvalue()


def _old_column(rows, i) -> np.ndarray:
    """A column as the earlier table's ``t[column]`` built it from its tuples."""
    values = [r[i] for r in rows]
    if values and all(isinstance(v, float) for v in values):
        return np.array(values, dtype=np.float64)
    if values and all(isinstance(v, int) and not isinstance(v, bool) for v in values):
        return np.array(values, dtype=np.int64)
    out = np.empty(len(values), dtype=object)
    out[:] = values
    return out


@pytest.mark.parametrize("n", [0, 1, 6, _BLOCK + 10])
def test_rows_come_back_exactly(n):
    # reference: brute force, each cell against the tuple it was built from (type,
    # value, sign of zero, NaN)
    rows = _rows(n)
    t = Table(COLS, rows)
    assert len(t) == len(t.rows) == n
    got = list(t.rows)
    assert len(got) == n
    for r, g in zip(rows, got, strict=True):
        assert type(g) is tuple and len(g) == len(r)
        assert all(_same_cell(a, b) for a, b in zip(r, g, strict=True)), (r, g)
    assert t.csv_text() == _old_csv(COLS, rows)
    for i, c in enumerate(COLS):
        try:
            b = _old_column(rows, i)
        except OverflowError:  # an int past int64 among ints: as before, no array
            with pytest.raises(OverflowError):
                t[c]
            continue
        a = t[c]
        assert a.dtype == b.dtype and a.shape == b.shape
        assert all(_same_cell(x, y) for x, y in zip(a.tolist(), b.tolist(), strict=True))
    assert t.equals(Table(COLS, rows)) and t.rows == rows
    recs = t.records()
    assert [list(d) for d in recs] == [list(COLS)] * n
    assert all(
        map(_same_cell, [v for d in recs for v in d.values()], [v for r in rows for v in r])
    )


def test_row_access_slices_and_where():
    rows = _rows(_BLOCK + 10)
    t = Table(COLS, rows)
    # reference: Python's own list indexing of the same rows
    for k in (0, 5, -1, -len(rows), _BLOCK, _BLOCK + 9):
        assert all(map(_same_cell, t.rows[k], rows[k]))
    for sl in (
        slice(3, 9),
        slice(_BLOCK - 2, _BLOCK + 2),
        slice(None, None, 1000),
        slice(-3, None),
    ):
        got = t.rows[sl]
        assert type(got) is list and len(got) == len(rows[sl])
        assert all(all(map(_same_cell, a, b)) for a, b in zip(got, rows[sl], strict=True))
    with pytest.raises(IndexError):
        t.rows[len(rows)]
    sub = t.where("id", "u3")
    assert sub.rows == [r for r in rows if r[0] == "u3"]
    assert Table(COLS, t.rows).equals(t)
    assert sorted(t.rows, key=lambda r: r[2])[0] == rows[0]


def test_pickle_pandas_and_bad_rows():
    t = Table(COLS, _rows(40))
    assert pickle.loads(pickle.dumps(t)).equals(t)
    pd = pytest.importorskip("pandas")
    # reference: pandas' own frame of the same tuples
    pd.testing.assert_frame_equal(
        t.to_pandas(), pd.DataFrame.from_records(_rows(40), columns=COLS)
    )
    with pytest.raises(ParameterError, match="row 1 with 1 values"):
        Table(("a", "b"), [(1, 2), (3,)])


def test_nbytes_counts_arrays_and_distinct_objects():
    t = Table(("x", "k", "s"), [(1.5, 2, "ab"), (2.5, 3, "ab")])
    # reference: hand-worked, two float64 and two int64 cells, two pointers and one str
    import sys

    assert t.nbytes() == 16 + 16 + 16 + sys.getsizeof("ab")
