"""The local engine: run the main pass (and, when planned, the exact pass) over a table.

Each pass reads the table in chunks, encodes each chunk and folds it into a mergeable
statistic, so peak memory is one chunk plus O(p^2) whatever the number of rows.
"""

from __future__ import annotations

from gate.design import DesignPlan, InfiniteValuesError, RowCounts, count_infinite, encode_block
from gate.diagnostics import ExactPassPlan, exact_pass_block
from gate.statistics import CentredGram, TriangularFactor
from gate.table import TableSource


def main_pass(source: TableSource, plan: DesignPlan, *, chunk_rows: int | None = None
              ) -> tuple[CentredGram, RowCounts]:
    """Centred Gram over the accumulation layout, and the row counts."""
    gram = CentredGram.empty(len(plan.layout))
    counts = RowCounts()
    chunks = iter(source.chunks(plan.read_columns, plan.chunk_rows(chunk_rows)))
    for chunk in chunks:
        try:
            values, weights, chunk_counts = encode_block(plan, chunk, first_row=counts.read)
        except InfiniteValuesError as exc:
            # Read on (this column only) so the message gives the whole table's count.
            total = exc.count + sum(count_infinite(rest, exc.column) for rest in chunks)
            raise exc.with_total(total) from None
        gram = gram.merge(CentredGram.from_block(values, weights))
        counts = counts.add(chunk_counts)
    return gram, counts


def exact_pass(source: TableSource, plan: DesignPlan, selection: tuple[int, ...],
               exact: ExactPassPlan, *, chunk_rows: int | None = None) -> TriangularFactor:
    """TSQR factor of the centred, scaled rows over the columns the Gram could not settle."""
    factor = TriangularFactor.empty(exact.columns.size)
    read = 0
    for chunk in source.chunks(plan.read_columns, plan.chunk_rows(chunk_rows)):
        values, weights, chunk_counts = encode_block(plan, chunk, first_row=read)
        read += chunk_counts.read
        block = exact_pass_block(exact, values[:, list(selection)], weights)
        factor = factor.merge(TriangularFactor.from_block(block))
    return factor
