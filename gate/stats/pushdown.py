"""Push-down statistics: the database computes counts, sums and centred cross-products; the gate
receives O(p^2) numbers per segment, never the rows.

The result is the same mergeable :class:`gate.stats.accumulators.CentredGram` (and
:class:`gate.design.plan.RowCounts`) the streaming main pass produces, over the same accumulation
layout (numeric columns, then one 0/1 column per level of each categorical), so everything
after the main pass is shared. Queries, each a scan of the user's query:

1. counts and sums (grouped by the segment key when the policy has segments): rows read,
   missing and infinite values per column, rows dropped, weight checks, and over the used rows
   the weight sum, the positive-weight row count and ``SUM(w * x_j)``;
2. with the whole table's means ``s`` as exact literals: ``SUM(w * (x_i - s_i) * (x_j - s_j))``
   for i <= j and ``SUM(w * (x_j - s_j))``, split into SELECT lists that fit the database's
   limit (``gate.read.sql.SELECT_LIMIT``). The linear sums correct the shift afterwards:
   ``C = S_zz - S_z S_z' / W`` and ``mean = s + S_z / W`` (the corrected two-pass algorithm; for
   a segment, whose mean differs from ``s``, the same correction is the shifted-data formula).

Database sums are not compensated and their order is the engine's; DEVELOPERS.md ("Database
sources") gives the accuracy measured against the streaming route. The exact TSQR pass, when the
Gram cannot settle the rank, streams the rows (:class:`PushDownEngine.exact_pass`) and the
verdict says so.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from gate.design.plan import (
    MAX_LEVELS,
    Categorical,
    DesignPlan,
    RowCounts,
    check_level_count,
)
from gate.errors import DesignError, TableError
from gate.read.sources import TableSource
from gate.read.sql import (
    SELECT_LIMIT,
    SOURCE_ALIAS,
    SqlSource,
    float_literal,
    quote_ident,
    quote_literal,
)
from gate.stats.accumulators import CentredGram, TriangularFactor
from gate.stats.local import LocalEngine, ProgressFactory, exact_pass
from gate.stats.routing import ExactPassPlan
from gate.stats.segments import (
    MAX_SEGMENTS,
    SegmentKey,
    SegmentPass,
    SegmentStatistics,
    check_segment_columns,
)

NAN = "CAST('NaN' AS DOUBLE PRECISION)"
INFINITIES = "(CAST('Infinity' AS DOUBLE PRECISION), CAST('-Infinity' AS DOUBLE PRECISION))"
ROWS_ALIAS = '"gate_rows"'


@dataclass(frozen=True)
class _DesignSql:
    """The design as SQL expressions over the aliased source."""

    values: tuple[str, ...]  # one DOUBLE PRECISION expression per layout column
    numeric: tuple[tuple[str, str], ...]  # (column, its value expression)
    categorical: tuple[str, ...]  # column names
    missing: dict[str, str]  # column -> "this value is missing" predicate
    weight: str | None
    row_missing: str  # "this row is dropped" predicate


def _column(name: str) -> str:
    return f"{SOURCE_ALIAS}.{quote_ident(name)}"


def _as_double(source: SqlSource, name: str) -> str:
    kinds = {c.name: c.kind for c in source.columns}
    if kinds.get(name) == "boolean":
        return f"CAST(CAST({_column(name)} AS INTEGER) AS DOUBLE PRECISION)"
    return f"CAST({_column(name)} AS DOUBLE PRECISION)"


def _text(name: str) -> str:
    return f"CAST({_column(name)} AS TEXT)"


def _design_sql(source: SqlSource, plan: DesignPlan) -> _DesignSql:
    values: list[str] = []
    numeric: list[tuple[str, str]] = []
    categorical: list[str] = []
    missing: dict[str, str] = {}
    for part in plan.parts:
        if isinstance(part, Categorical):
            categorical.append(part.column)
            missing[part.column] = f"{_column(part.column)} IS NULL"
            text = _text(part.column)
            values.extend(f"CAST(CASE WHEN {text} = {quote_literal(level)} THEN 1 ELSE 0 END "
                          "AS DOUBLE PRECISION)" for level in part.levels)
        else:
            expr = _as_double(source, part)
            numeric.append((part, expr))
            missing[part] = f"({expr} IS NULL OR {expr} = {NAN})"
            values.append(expr)
    weight = _as_double(source, plan.weight) if plan.weight else None
    row_missing = " OR ".join(f"({m})" for m in missing.values()) or "FALSE"
    return _DesignSql(tuple(values), tuple(numeric), tuple(categorical), missing, weight,
                      f"({row_missing})")


def distinct_values(source: SqlSource, names: list[str]) -> dict[str, set[str]]:
    """Distinct non-missing values of each column as the database's text (``SELECT DISTINCT``,
    capped at MAX_LEVELS + 1 so an id column costs one bounded answer)."""
    seen: dict[str, set[str]] = {}
    for name in names:
        result = source.connection.fetch(
            f"SELECT DISTINCT {_text(name)} AS v FROM ({source.query}) AS {SOURCE_ALIAS} "
            f"WHERE {_column(name)} IS NOT NULL LIMIT {MAX_LEVELS + 1}")
        values = {str(v) for v in result.column(0).to_pylist() if v is not None}
        check_level_count(source.name, name, len(values))
        seen[name] = values
    return seen


def _grouped(source: SqlSource, keys: Sequence[str], exprs: Sequence[str], from_sql: str,
             where: str | None = None) -> dict[SegmentKey, list[Any]]:
    """``SELECT keys, exprs FROM ... GROUP BY keys``, split into SELECT lists that fit the
    backend's limit; one list of values per key."""
    limit = max(1, SELECT_LIMIT[source.backend] - len(keys))
    out: dict[SegmentKey, list[Any]] = {}
    for start in range(0, max(len(exprs), 1), limit):
        batch = exprs[start:start + limit]
        select = [f"{k} AS \"k{i}\"" for i, k in enumerate(keys)]
        select += [f"{e} AS \"a{i}\"" for i, e in enumerate(batch)]
        sql = f"SELECT {', '.join(select)} FROM {from_sql}"
        if where:
            sql += f" WHERE {where}"
        if keys:
            sql += " GROUP BY " + ", ".join(str(i + 1) for i in range(len(keys)))
        table = source.connection.fetch(sql)
        columns = [table.column(i).to_pylist() for i in range(table.num_columns)]
        for row in range(table.num_rows):
            key = tuple(columns[i][row] for i in range(len(keys)))
            key = tuple(None if v is None else str(v) for v in key)
            out.setdefault(key, []).extend(columns[len(keys) + i][row]
                                           for i in range(len(batch)))
    return out


@dataclass(frozen=True)
class _Counts:
    counts: RowCounts
    weight_sum: float
    rows: int  # used rows with positive weight
    sums: np.ndarray  # SUM(w * x_j) over the used rows


#: The per-row "dropped" flag, computed once per row in a fenced sub-query (``OFFSET 0`` keeps
#: PostgreSQL from inlining it into every aggregate's FILTER).
DROP_FLAG = '"gate_drop_row_7f3a"'


def _first_pass(source: SqlSource, plan: DesignPlan, design: _DesignSql,
                keys: Sequence[str]) -> dict[SegmentKey, _Counts]:
    used = f"NOT {SOURCE_ALIAS}.{DROP_FLAG}"
    exprs = ["COUNT(*)", f"COUNT(*) FILTER (WHERE {SOURCE_ALIAS}.{DROP_FLAG})"]
    for column, expr in design.numeric:
        exprs += [f"COUNT(*) FILTER (WHERE {design.missing[column]})",
                  f"COUNT(*) FILTER (WHERE {expr} IN {INFINITIES})"]
    exprs += [f"COUNT(*) FILTER (WHERE {design.missing[c]})" for c in design.categorical]
    w = design.weight
    if w is not None:
        exprs += [f"COUNT(*) FILTER (WHERE {w} IS NULL OR {w} = {NAN})",
                  f"COUNT(*) FILTER (WHERE {w} IN {INFINITIES})",
                  f"COUNT(*) FILTER (WHERE {w} < 0)",
                  f"SUM({w}) FILTER (WHERE {used})",
                  f"COUNT(*) FILTER (WHERE {used} AND {w} > 0)"]
        exprs += [f"SUM({w} * {v}) FILTER (WHERE {used})" for v in design.values]
    else:
        exprs += [f"COUNT(*) FILTER (WHERE {used})", f"COUNT(*) FILTER (WHERE {used})"]
        exprs += [f"SUM({v}) FILTER (WHERE {used})" for v in design.values]
    flagged = (f"(SELECT {SOURCE_ALIAS}.*, {design.row_missing} AS {DROP_FLAG} FROM "
               f"({source.query}) AS {SOURCE_ALIAS} OFFSET 0) AS {SOURCE_ALIAS}")
    rows = _grouped(source, keys, exprs, flagged)
    if len(rows) > MAX_SEGMENTS:
        raise TableError(f"{source.name}: segments.by gives more than {MAX_SEGMENTS} segments; "
                         "segment by a coarser column")
    totals: dict[str, list[int]] = {}
    out: dict[SegmentKey, _Counts] = {}
    for key, values in rows.items():
        it = iter(values)
        read, dropped = int(next(it)), int(next(it) or 0)
        missing_numeric: dict[str, int] = {}
        for column, _ in design.numeric:
            missing_numeric[column] = int(next(it) or 0)
            infinite = int(next(it) or 0)
            totals.setdefault(column, [0, 0])[1] += infinite
        missing: dict[str, int] = {}
        for column in design.categorical:  # the order encode_block reports them in
            count = int(next(it) or 0)
            if count:
                missing[column] = count
        missing.update({c: n for c, n in missing_numeric.items() if n})
        if w is not None:
            for label, count in zip(("missing", "infinite", "negative"),
                                    (int(next(it) or 0) for _ in range(3))):
                totals.setdefault(f"weight {label}", [0, 0])[1] += count
        weight_sum = float(next(it) or 0.0)
        positive = int(next(it) or 0)
        sums = np.array([float(v) if v is not None else 0.0 for v in it])
        if max(missing.values(), default=0) > dropped or not np.isfinite(sums).all() and \
                not any(totals.get(c, [0, 0])[1] for c, _ in design.numeric):
            # Seen with DuckDB over read_parquet: Parquet statistics carry no NaN, and its
            # optimiser then folds "x = NaN" to false inside a sub-query (not in a FILTER).
            raise TableError(f"{source.name}: the database counted {max(missing.values())} "
                             f"missing values but dropped {dropped} rows (NaN comparisons it "
                             "optimised away); store missing values as NULL, or use "
                             "--no-push-down")
        out[key] = _Counts(RowCounts(read, dropped, missing), weight_sum, positive, sums)
    _raise_bad_values(source, plan, totals, out)
    return out


def _raise_bad_values(source: SqlSource, plan: DesignPlan, totals: dict[str, list[int]],
                      counts: dict[SegmentKey, _Counts]) -> None:
    """The streaming route's checks, in its order, with whole-table counts (the database does
    not number rows, so the messages give no row range)."""
    for column, (_, infinite) in totals.items():
        if not column.startswith("weight ") and infinite:
            raise DesignError(f"{source.name}: column '{column}' has {infinite:,} infinite "
                              f"value{'s' if infinite != 1 else ''}; replace them or exclude "
                              "the column")
    if plan.weight is not None:
        name = plan.weight
        bad = totals.get("weight missing", [0, 0])[1]
        if bad:
            raise DesignError(f"{source.name}: weight column '{name}' has {bad} missing "
                              f"value{'s' if bad > 1 else ''}; fill or drop them")
        if totals.get("weight infinite", [0, 0])[1]:
            raise DesignError(f"{source.name}: weight column '{name}' has infinite values; "
                              "weights must be finite and non-negative")
        bad = totals.get("weight negative", [0, 0])[1]
        if bad:
            raise DesignError(f"{source.name}: weight column '{name}' has {bad} negative "
                              f"value{'s' if bad > 1 else ''}; weights must be >= 0")
    if plan.missing == "fail":
        whole: dict[str, int] = {}
        for item in counts.values():
            for column, count in item.counts.missing.items():
                whole[column] = whole.get(column, 0) + count
        if whole:
            column, count = next(iter(whole.items()))
            raise DesignError(f"{source.name}: column '{column}' has {count} missing value"
                              f"{'s' if count > 1 else ''} and the policy says missing: fail; "
                              "fill them, or set missing: drop_rows")


def _pair_batches(p: int, limit: int) -> list[list[tuple[int, int]]]:
    """Terms (j, -1) for SUM(w z_j), then (i, j) for i <= j, in SELECT lists of at most
    ``limit`` terms that together name at most ``limit`` centred columns."""
    terms = [(j, -1) for j in range(p)] + [(i, j) for i in range(p) for j in range(i, p)]
    batches: list[list[tuple[int, int]]] = []
    batch: list[tuple[int, int]] = []
    names: set[int] = set()
    for term in terms:
        new = {t for t in term if t >= 0} - names
        if batch and (len(batch) >= limit or len(names) + len(new) > limit):
            batches.append(batch)
            batch, names, new = [], set(), {t for t in term if t >= 0}
        batch.append(term)
        names |= new
    if batch:
        batches.append(batch)
    return batches


def _cross_products(source: SqlSource, design: _DesignSql, keys: Sequence[str],
                    shift: np.ndarray) -> dict[SegmentKey, tuple[np.ndarray, np.ndarray]]:
    """Per key: (S_z, S_zz) with z = x - shift over the used rows, weighted."""
    p = len(design.values)
    limit = max(1, SELECT_LIMIT[source.backend] - len(keys) - 1)
    weighted = design.weight is not None
    out: dict[SegmentKey, tuple[np.ndarray, np.ndarray]] = {}
    inner_keys = [f"\"k{i}\"" for i in range(len(keys))]
    for batch in _pair_batches(p, limit):
        needed = sorted({t for term in batch for t in term if t >= 0})
        inner = [f"{k} AS \"k{i}\"" for i, k in enumerate(keys)]
        if weighted:
            inner.append(f"{design.weight} AS \"w\"")
        inner += [f"({design.values[j]} - {float_literal(shift[j])}) AS \"z{j}\""
                  for j in needed]
        from_sql = (f"(SELECT {', '.join(inner)} FROM ({source.query}) AS {SOURCE_ALIAS} "
                    f"WHERE NOT {design.row_missing} OFFSET 0) AS {ROWS_ALIAS}")
        w = '"w" * ' if weighted else ""
        exprs = [f"SUM({w}\"z{i}\")" if j < 0 else f"SUM({w}\"z{i}\" * \"z{j}\")"
                 for i, j in batch]
        rows = _grouped(source, inner_keys, exprs, from_sql)
        for key, values in rows.items():
            linear, square = out.setdefault(key, (np.zeros(p), np.zeros((p, p))))
            for (i, j), value in zip(batch, values):
                number = float(value) if value is not None else 0.0
                if j < 0:
                    linear[i] = number
                else:
                    square[i, j] = square[j, i] = number
    return out


def pushdown_pass(source: SqlSource, plan: DesignPlan, by: Sequence[str] = ()
                  ) -> SegmentPass:
    """Counts and centred Gram per segment key (one key, ``()``, without segments) and their
    merge, computed by the database."""
    from gate.stats.segments import _order

    if by:
        check_segment_columns(source, by)
    keys = [_text(column) for column in by]
    design = _design_sql(source, plan)
    p = len(design.values)
    first = _first_pass(source, plan, design, keys)
    total_weight = sum(c.weight_sum for c in first.values())
    source.report_rows(sum(c.counts.read for c in first.values()))
    shift = (sum((c.sums for c in first.values()), np.zeros(p)) / total_weight
             if total_weight > 0 else np.zeros(p))
    shift = np.where(np.isfinite(shift), shift, 0.0)
    products = _cross_products(source, design, keys, shift) if total_weight > 0 else {}
    for linear, square in products.values():
        if not (np.isfinite(linear).all() and np.isfinite(square).all()):
            raise TableError(f"{source.name}: the database returned non-finite sums (missing "
                             "values it did not filter: NaN comparisons it optimised away); "
                             "store missing values as NULL, or use --no-push-down")
    segments: list[SegmentStatistics] = []
    for key in sorted(first, key=_order):
        counts = first[key]
        if counts.weight_sum <= 0.0 or key not in products:
            gram = CentredGram.from_moments(0, 0.0, np.zeros(p), np.zeros((p, p))) \
                if counts.weight_sum <= 0.0 else CentredGram.empty(p)
        else:
            linear, square = products[key]
            scaled = linear / counts.weight_sum
            comoment = square - np.outer(linear, scaled)
            comoment = (comoment + comoment.T) / 2.0
            gram = CentredGram.from_moments(counts.rows, counts.weight_sum, shift + scaled,
                                            comoment)
        segments.append(SegmentStatistics(key, gram, counts.counts))
    whole_gram = CentredGram.empty(p)
    whole_counts = RowCounts()
    for segment in segments:
        whole_gram = whole_gram.merge(segment.gram)
        whole_counts = whole_counts.add(segment.counts)
    return SegmentPass(tuple(by), whole_gram, whole_counts, tuple(segments))


def segment_pass(source: TableSource, plan: DesignPlan, by: Sequence[str], *,
                 chunk_rows: int | None = None) -> SegmentPass:
    """:func:`gate.stats.segments.segment_pass`'s signature, computed by the database."""
    assert isinstance(source, SqlSource)
    return pushdown_pass(source, plan, by)


class PushDownEngine(LocalEngine):
    """The local engine with the levels pass and the main pass inside the database."""

    def __init__(self, source: SqlSource) -> None:
        self.source = source

    def distinct_values(self, source: TableSource, names: list[str]) -> dict[str, set[str]]:
        return distinct_values(self.source, names)

    def main_pass(self, source: TableSource, plan: DesignPlan, *, chunk_rows: int | None = None,
                  progress: ProgressFactory | None = None) -> tuple[CentredGram, RowCounts]:
        result = pushdown_pass(self.source, plan)
        return result.gram, result.counts

    def exact_pass(self, source: TableSource, plan: DesignPlan, selection: tuple[int, ...],
                   exact: ExactPassPlan, *, chunk_rows: int | None = None,
                   progress: ProgressFactory | None = None) -> TriangularFactor:
        """The database's sums cannot settle the rank: stream the rows for TSQR (recorded in
        the provenance and a design note)."""
        self.source.exact_pass_streamed = True
        return exact_pass(source, plan, selection, exact, chunk_rows=chunk_rows,
                          progress=progress)
