"""Segments: one pass over the rows gives the statistics of every segment and of the whole table.

``CentredGram`` is mergeable (Chan, Golub & LeVeque 1979), so each chunk is split by the
segment key and each piece folds into its segment's Gram; the whole table's Gram is the merge
of the segments' Grams (exact in exact arithmetic, whatever the order). Nothing is read twice
in the main pass; an exact TSQR pass (``gate.stats.local.exact_pass``) reads a segment again only
when that segment's Gram cannot settle its rank, through :class:`SegmentSource`.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from gate.design.plan import DesignPlan, RowCounts
from gate.errors import TableError
from gate.policy.models import Policy, escape_glob
from gate.read.sources import DEFAULT_CHUNK_ROWS, Column, TableSource, pc
from gate.stats.accumulators import CentredGram
from gate.stats.local import ProgressFactory, encoded_chunks

#: More segments than this is almost always a mistake (an identifier as the segment column).
MAX_SEGMENTS = 1000
MISSING_LABEL = "(missing)"

SegmentKey = tuple[str | None, ...]


@dataclass(frozen=True)
class SegmentStatistics:
    key: SegmentKey
    gram: CentredGram
    counts: RowCounts


@dataclass(frozen=True)
class SegmentPass:
    """The one-pass result: every segment's statistics and their merge (the whole table)."""

    by: tuple[str, ...]
    gram: CentredGram
    counts: RowCounts
    segments: tuple[SegmentStatistics, ...]  # sorted by key, missing values last


def segment_label(by: Sequence[str], key: SegmentKey) -> str:
    """``region=north, month=5`` (a missing value reads ``(missing)``)."""
    return ", ".join(f"{c}={MISSING_LABEL if v is None else v}" for c, v in zip(by, key))


def segment_policy(policy: Policy) -> Policy:
    """The policy with the segment columns excluded from the features (they are not features)."""
    if policy.segments is None:
        return policy
    exclude = tuple(policy.columns.exclude) + tuple(
        escape_glob(c) for c in policy.segments.by if escape_glob(c) not in policy.columns.exclude)
    columns = policy.columns.model_copy(update={"exclude": exclude})
    return policy.model_copy(update={"columns": columns})


def check_segment_columns(source: TableSource, by: Sequence[str]) -> None:
    names = [c.name for c in source.columns]
    for column in by:
        if column not in names:
            shown = ", ".join(names[:8]) + (", ..." if len(names) > 8 else "")
            raise TableError(f"{source.name}: segments.by names '{column}', which is not a "
                             f"column of the table; columns are: {shown}")


def _as_text(array: pa.ChunkedArray | pa.Array) -> pa.Array:
    if isinstance(array, pa.ChunkedArray):
        array = array.combine_chunks()
    if pa.types.is_dictionary(array.type):
        array = array.dictionary_decode()
    if not (pa.types.is_string(array.type) or pa.types.is_large_string(array.type)):
        array = pc.cast(array, pa.string())
    return array


def chunk_keys(chunk: pa.Table, by: Sequence[str]) -> tuple[np.ndarray, list[SegmentKey]]:
    """Per row, the index of its key in the returned list of distinct keys."""
    n = chunk.num_rows
    code = np.zeros(n, dtype=np.int64)
    dictionaries: list[list[str | None]] = []
    radix = 1
    for column in by:
        encoded = pc.dictionary_encode(_as_text(chunk.column(column)), null_encoding="encode")
        indices = np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.int64)
        values = encoded.dictionary.to_pylist()
        code += indices * radix
        radix *= max(len(values), 1)
        dictionaries.append(values)
    unique, inverse = np.unique(code, return_inverse=True)
    keys: list[SegmentKey] = []
    for value in unique.tolist():
        parts: list[str | None] = []
        for values in dictionaries:
            size = max(len(values), 1)
            parts.append(values[value % size])
            value //= size
        keys.append(tuple(parts))
    return inverse.reshape(-1), keys


def _order(key: SegmentKey) -> tuple[tuple[int, str], ...]:
    return tuple((1, "") if v is None else (0, v) for v in key)


def segment_pass(source: TableSource, plan: DesignPlan, by: Sequence[str], *,
                 chunk_rows: int | None = None, progress: ProgressFactory | None = None
                 ) -> SegmentPass:
    """The main pass split by a key: a CentredGram and row counts per segment, and their merge.

    Each chunk is encoded once (``gate.stats.local.encoded_chunks``, the same pass as the whole
    table's), then its used rows are split by key; counts come from the per-row masks."""
    check_segment_columns(source, by)
    width = len(plan.layout)
    columns = tuple(dict.fromkeys(plan.read_columns + tuple(by)))
    grams: dict[SegmentKey, CentredGram] = {}
    counts: dict[SegmentKey, RowCounts] = {}
    for chunk, block in encoded_chunks(source, plan, columns, chunk_rows=chunk_rows,
                                       progress=progress):
        local, keys = chunk_keys(chunk, by)
        used_local = local if block.used is None else local[block.used]
        for k, key in enumerate(keys):
            rows = local == k
            piece = used_local == k
            weights = None if block.weights is None else block.weights[piece]
            part = CentredGram.from_block(block.values[piece], weights)
            missing = {name: int(np.count_nonzero(mask & rows))
                       for name, mask in block.missing.items()}
            read = int(np.count_nonzero(rows))
            part_counts = RowCounts(read, read - int(np.count_nonzero(piece)),
                                    {name: m for name, m in missing.items() if m})
            grams[key] = grams[key].merge(part) if key in grams else part
            counts[key] = counts[key].add(part_counts) if key in counts else part_counts
        if len(grams) > MAX_SEGMENTS:
            raise TableError(f"{source.name}: segments.by ({', '.join(by)}) gives more than "
                             f"{MAX_SEGMENTS} segments; segment by a coarser column")
    whole_gram = CentredGram.empty(width)
    whole_counts = RowCounts()
    segments: list[SegmentStatistics] = []
    for key in sorted(grams, key=_order):
        segments.append(SegmentStatistics(key, grams[key], counts[key]))
        whole_gram = whole_gram.merge(grams[key])
        whole_counts = whole_counts.add(counts[key])
    return SegmentPass(tuple(by), whole_gram, whole_counts, tuple(segments))


class SegmentSource:
    """The rows of one segment of a table, read again only for an exact pass."""

    def __init__(self, source: TableSource, by: Sequence[str], key: SegmentKey) -> None:
        self.base = source
        self.by = tuple(by)
        self.key = key
        self.name = f"{source.name} [{segment_label(by, key)}]"

    @property
    def columns(self) -> tuple[Column, ...]:
        return self.base.columns

    @property
    def row_count(self) -> int | None:
        return None

    def sha256(self) -> str | None:
        return self.base.sha256()

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]:
        wanted = tuple(dict.fromkeys(tuple(columns) + self.by))
        for chunk in self.base.chunks(wanted, chunk_rows):
            mask = np.ones(chunk.num_rows, dtype=bool)
            for column, value in zip(self.by, self.key):
                text = _as_text(chunk.column(column))
                if value is None:
                    mask &= np.asarray(text.is_null().to_numpy(zero_copy_only=False))
                else:
                    same = pc.fill_null(pc.equal(text, pa.scalar(value, pa.string())), False)
                    mask &= np.asarray(same.to_numpy(zero_copy_only=False))
            if mask.any():
                yield chunk.filter(pa.array(mask)).select(list(columns))
