"""Numeric features that look like identifiers: a row number, or dense all-distinct integers.

An identifier carries no information a model can generalise from, and its VIF is usually low,
so no limit catches it. This stage reports it as information (never a judgement):

* **Row number** (from the main pass's moments, no extra read): n values that are the
  consecutive integers k, ..., k + n - 1 in any order have mean k + (n - 1)/2 and population
  variance exactly (n^2 - 1)/12. A feature whose moments match both (relative 1e-9, and the
  offset k an integer) is reported. Unweighted designs only (weighted moments are not these).
* **Dense all-distinct integers** (integer-typed columns only): n distinct integers have
  population variance at least (n^2 - 1)/12 (equality for consecutive ones), and if they use at
  least half of the integers between their minimum and maximum (max - min + 1 <= 2 n, the
  "dense" rule, common practice for surrogate keys with gaps, no source) at most n^2. Only a
  column whose moments fall in that band is read (that one column, in chunks), and it is
  reported when all its non-missing values are distinct and dense. Integer measurements with a
  wide spread (odometer readings, epoch seconds) fail the dense rule and are not reported.
  Skipped for tables over ``MAX_READ_ROWS`` rows, for weighted designs and for Dask sources.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np

from gate.design.plan import Design
from gate.diagnose.diagnostics import Diagnostics
from gate.read.sources import TableSource

#: Fewer rows than this say nothing about identifiers (any few integers could be consecutive).
MIN_ROWS = 20
#: Rows above which the all-distinct check (which holds one column's values) is skipped.
MAX_READ_ROWS = 20_000_000
#: Relative tolerance of the row-number moment test.
MOMENT_TOLERANCE = 1e-9


@dataclass(frozen=True)
class IdentifierLike:
    feature: int
    kind: Literal["row_number", "distinct_integers"]

    def describe(self, names: tuple[str, ...], rows: int) -> str:
        name = names[self.feature]
        what = ("a row number: its values are the consecutive integers of one range"
                if self.kind == "row_number"
                else f"all {rows:,} values are distinct integers, densely covering their range")
        return (f"{name} looks like an identifier ({what}); an identifier carries nothing a "
                f"model can generalise from: add it to columns.exclude")


def is_row_number(rows: int, mean: float, centred_norm: float) -> bool:
    """Whether n values with this mean and centred norm can be the consecutive integers
    k..k+n-1: population variance (n^2 - 1)/12 and mean k + (n - 1)/2 with k an integer."""
    if rows < MIN_ROWS or not math.isfinite(centred_norm):
        return False
    # Compared as standard deviations: a square of a norm near 1e300 would overflow.
    sd = centred_norm / math.sqrt(rows)
    expected = math.sqrt((rows * rows - 1) / 12.0)
    if not math.isclose(sd, expected, rel_tol=MOMENT_TOLERANCE / 2):
        return False
    offset = mean - (rows - 1) / 2.0
    return abs(offset - round(offset)) <= 1e-6 * max(1.0, abs(mean))


def may_be_dense_distinct(rows: int, centred_norm: float) -> bool:
    """Necessary moment condition for n dense distinct integers: (n^2 - 1)/12 <= var <= n^2."""
    if rows < MIN_ROWS or not math.isfinite(centred_norm):
        return False
    sd = centred_norm / math.sqrt(rows)  # standard deviations: no square of a huge norm
    return math.sqrt((rows * rows - 1) / 12.0 * (1 - MOMENT_TOLERANCE)) <= sd <= float(rows)


def identifier_like(source: TableSource, design: Design, d: Diagnostics
                    ) -> tuple[IdentifierLike, ...]:
    """Features that look like identifiers, in design order."""
    if design.weight is not None:
        return ()
    grouped = {k for g in design.groups for k in g.indices}
    integer_columns = {c.name for c in source.columns
                       if c.type.startswith(("int", "uint"))}
    found: list[IdentifierLike] = []
    readable = source.row_count is None or source.row_count <= MAX_READ_ROWS
    for k, name in enumerate(design.features):
        if k in grouped or d.scales[k] <= 0:
            continue
        if is_row_number(d.rows, float(d.means[k]), float(d.scales[k])):
            found.append(IdentifierLike(k, "row_number"))
        elif readable and name in integer_columns \
                and may_be_dense_distinct(d.rows, float(d.scales[k])) \
                and _dense_distinct(source, name):
            found.append(IdentifierLike(k, "distinct_integers"))
    return tuple(found)


def _dense_distinct(source: TableSource, name: str) -> bool:
    """All non-missing values of ``name`` distinct, and max - min + 1 <= 2 * count."""
    parts: list[np.ndarray] = []
    for chunk in source.chunks([name]):
        column = chunk.column(name).drop_null()
        parts.append(np.asarray(column.to_numpy(zero_copy_only=False), dtype=np.int64))
        if sum(p.size for p in parts) > MAX_READ_ROWS:
            return False
    values = np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)
    if values.size < MIN_ROWS:
        return False
    span = int(values.max()) - int(values.min()) + 1
    return span <= 2 * values.size and np.unique(values).size == values.size
