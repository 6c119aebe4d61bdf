"""A time series (one row per window or hop) kept as columns, and its CSV file."""

from __future__ import annotations

import csv
import math
from array import array

from streamq.engine.audiofile import replacing


class Series:
    """A time series (one row per window or hop), kept as columns of floats:
    hours of audio make tens of thousands of rows, which as dicts of Python
    numbers would cost a kilobyte each. None is kept as NaN.

    Parameters
    ----------
    columns : sequence of str
        Column names, in CSV order.
    whole : set of str
        Columns that hold whole numbers (given back as int).
    """

    def __init__(self, columns, whole):
        self.columns = tuple(columns)
        self.whole = frozenset(whole)
        self.cols = {c: array("d") for c in self.columns}
        self.n = 0

    def append(self, row: dict) -> None:
        for c in self.columns:
            v = row.get(c)
            self.cols[c].append(math.nan if v is None else v)
        self.n += 1      # last: a reader on another thread sees whole rows only

    def row(self, i: int) -> dict:
        out = {}
        for c in self.columns:
            v = self.cols[c][i]
            out[c] = None if v != v else (int(v) if c in self.whole else v)
        return out

    def __len__(self) -> int:
        return self.n

    def __iter__(self):
        return (self.row(i) for i in range(self.n))


def write_series_csv(path, series: Series) -> None:
    """Write a :class:`Series` as CSV: a header of its columns, then one line
    per row; floats with 6 significant digits, whole numbers as integers,
    None as an empty field.

    Parameters
    ----------
    path : str or Path
        The file to write. It is written whole under a temporary name, then
        renamed (:func:`streamq.engine.audiofile.replacing`): an older file
        under that name stays until the new one is complete.
    series : Series
        The rows.

    Raises
    ------
    OSError
        Left to the caller, which turns it into a one-line error naming the
        node and the file.
    """
    with replacing(path, newline="") as f:
        w = csv.DictWriter(f, fieldnames=series.columns)
        w.writeheader()
        for row in series:
            w.writerow({k: ("" if v is None else (f"{v:.6g}" if isinstance(v, float) else v))
                        for k, v in row.items()})
