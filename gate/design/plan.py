"""From table columns to the design matrix the policy describes.

``plan_design`` resolves the policy's globs against the table's columns, checks their types and
reads the categorical levels (a cheap pass over only those columns). ``encode_block`` turns one
chunk of rows into a float block: numeric and boolean columns as they are, categorical columns
one-hot over *all* levels, rows with missing values dropped (or refused). ``finish_design``
picks the reference level per categorical once the main pass has seen every row: the level named
in ``columns.reference``, else the most frequent level among the used rows (by weight when the
policy names a weight column; ties go to the first in sort order). A level that vanished with the
dropped rows never becomes a spurious constant column.

Text columns are checked for looking like identifiers: more distinct values than
``columns.max_levels`` (default 50, common practice, no source), or, among at least
:data:`IDENTIFIER_MIN_ROWS` used rows, a distinct value in at least
:data:`IDENTIFIER_DISTINCT_SHARE` of them. Either is refused rather than one-hot encoded into
hundreds of dummies; a column listed in ``columns.categorical`` is held to ``max_levels`` only.
"""

from __future__ import annotations

import fnmatch
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
from numpy.typing import NDArray

from gate.errors import DesignError, TableError, shown
from gate.numerics.kernels import FloatArray
from gate.policy.models import DEFAULT_MAX_LEVELS, MAX_LEVELS_CEILING, Policy
from gate.read.sources import DEFAULT_CHUNK_ROWS, TableSource, pc

#: Default level limit (``columns.max_levels``): one-hot encoding a text column with more levels
#: is almost always a mistake (an identifier); common practice, no source.
MAX_LEVELS = DEFAULT_MAX_LEVELS
#: A text column with a distinct value in at least this share of the used rows looks like an
#: identifier (common practice, no source) ...
IDENTIFIER_DISTINCT_SHARE = 0.9
#: ... judged only from this many used rows on (a handful of rows proves nothing).
IDENTIFIER_MIN_ROWS = 20
#: Blocks are sized to about this many bytes, so memory does not grow with the feature count.
BLOCK_BYTES = 64 * 1024 * 1024
GLOB_CHARS = set("*?[")


@dataclass(frozen=True)
class Categorical:
    column: str
    levels: tuple[str, ...]  # every level seen, sorted
    declared: bool = False  # listed in columns.categorical (else a text column taken as one)
    reference: str | None = None  # columns.reference for this column


@dataclass(frozen=True)
class DesignPlan:
    """What to read and how to encode it (known before the main pass)."""

    table: str
    parts: tuple[str | Categorical, ...]  # selected columns in table order
    weight: str | None
    missing: str
    target: tuple[str, ...] = ()

    @property
    def numeric(self) -> tuple[str, ...]:
        return tuple(p for p in self.parts if isinstance(p, str))

    @property
    def read_columns(self) -> tuple[str, ...]:
        names = [p if isinstance(p, str) else p.column for p in self.parts]
        return tuple(names + ([self.weight] if self.weight else []))

    @property
    def layout(self) -> tuple[str, ...]:
        """Accumulated columns: numeric columns, and one column per level of each categorical."""
        out: list[str] = []
        for part in self.parts:
            if isinstance(part, str):
                out.append(part)
            else:
                out.extend(f"{part.column}={level}" for level in part.levels)
        return tuple(out)

    def chunk_rows(self, requested: int | None) -> int:
        if requested is not None:
            return max(1, requested)
        per_row = 8 * max(len(self.layout), 1)
        # At most DEFAULT_CHUNK_ROWS: the Parquet reader's own buffers grow with the batch
        # (measured on 10M x 50, reading alone: 325 MB peak at 65,536 rows, 532 MB at 167,772)
        # while the Gram update costs the same per row whatever the chunk.
        return int(min(max(BLOCK_BYTES // per_row, 1024), DEFAULT_CHUNK_ROWS))


@dataclass
class RowCounts:
    """Rows seen, used and dropped, and missing values per column (mergeable by addition)."""

    read: int = 0
    dropped: int = 0
    missing: dict[str, int] = field(default_factory=dict)

    @property
    def used(self) -> int:
        return self.read - self.dropped

    def add(self, other: RowCounts) -> RowCounts:
        missing = dict(self.missing)
        for key, value in other.missing.items():
            missing[key] = missing.get(key, 0) + value
        return RowCounts(self.read + other.read, self.dropped + other.dropped, missing)


@dataclass(frozen=True)
class Group:
    """A categorical column's dummies: one GVIF group."""

    column: str
    reference: str
    levels: tuple[str, ...]  # levels with a dummy
    indices: tuple[int, ...]  # their positions among the design columns
    reference_reason: str = ""  # why this level is the reference, in words


@dataclass(frozen=True)
class Design:
    """The design after the main pass: names of the columns, groups, and which accumulated
    columns they are."""

    features: tuple[str, ...]
    groups: tuple[Group, ...]
    selection: tuple[int, ...]
    weight: str | None
    counts: RowCounts
    notes: tuple[str, ...] = ()


#: (source, column names) -> distinct non-missing values of each, as text (the levels pass).
DistinctValues = Callable[[TableSource, list[str]], dict[str, set[str]]]


def plan_design(source: TableSource, policy: Policy, *,
                distinct: DistinctValues | None = None) -> DesignPlan:
    """Resolve column selection and types; read categorical levels.

    ``distinct`` runs the levels pass (default: :func:`distinct_values`, in this process; the
    Dask engine passes its own, which runs on the workers).
    """
    spec = policy.columns
    columns = {c.name: c for c in source.columns}
    names = list(columns)
    for key, patterns in (("columns.include", spec.include),):
        for pattern in patterns:
            if not GLOB_CHARS & set(pattern) and pattern not in columns:
                raise TableError(f"{source.name}: {key} names '{shown(pattern)}', which is not a "
                                 f"column of the table; columns are: {_preview(names)}")
    for key, listed in (("columns.categorical", spec.categorical),
                        ("columns.target", spec.target)):
        for name in listed:
            if name not in columns:
                raise TableError(f"{source.name}: {key} names '{shown(name)}', which is not a "
                                 f"column of the table; columns are: {_preview(names)}")
    for name in spec.target:
        if name in spec.categorical or name == spec.weight:
            other = "columns.categorical" if name in spec.categorical else "columns.weight"
            raise TableError(f"{source.name}: '{shown(name)}' is both a target (columns.target) "
                             f"and in {other}; a target is never a feature: remove it from one")
    weight = spec.weight
    if weight is not None:
        if weight not in columns:
            raise TableError(f"{source.name}: columns.weight names '{shown(weight)}', which is not a "
                             f"column of the table; columns are: {_preview(names)}")
        if columns[weight].kind not in ("numeric", "boolean"):
            raise TableError(f"{source.name}: weight column '{shown(weight)}' has type "
                             f"{columns[weight].type}; weights must be numeric")

    selected = [
        n for n in names
        if any(fnmatch.fnmatchcase(n, p) for p in spec.include)
        and not any(fnmatch.fnmatchcase(n, p) for p in spec.exclude)
        and n != weight and n not in spec.target
    ]
    # Binary, list and struct values are neither numbers nor levels: exclusion is the only fix.
    nested = [n for n in selected if columns[n].kind == "other"]
    if nested:
        names_ = ", ".join(f"'{shown(n)}' ({columns[n].type})" for n in nested[:5])
        raise TableError(f"{source.name}: column{'s' if len(nested) > 1 else ''} {names_} "
                         "cannot be a feature or a categorical (binary and nested values are "
                         "neither numbers nor levels); add to columns.exclude")
    unusable = [n for n in selected
                if columns[n].kind == "datetime" and n not in spec.categorical]
    if unusable:
        bad = ", ".join(f"'{shown(n)}' ({columns[n].type})" for n in unusable[:5])
        raise TableError(f"{source.name}: column{'s' if len(unusable) > 1 else ''} {bad} "
                         "cannot be a feature (dates and nested values have no linear meaning); "
                         "add to columns.exclude, or list under columns.categorical")
    if not selected:
        raise DesignError(f"{source.name}: columns.include/exclude select no feature column; "
                          f"columns are: {_preview(names)}")
    to_encode = [n for n in selected
                 if n in spec.categorical or columns[n].kind == "categorical"]
    for name in spec.reference:
        if name not in to_encode:
            raise TableError(f"{source.name}: columns.reference names '{shown(name)}', which is "
                             "not a categorical feature column; categorical columns are: "
                             f"{_preview(to_encode) or '(none)'}")
    seen = (distinct or distinct_values)(source, to_encode)
    for name, values in seen.items():
        check_level_count(source.name, name, len(values), spec.max_levels,
                          declared=name in spec.categorical)
    levels = {n: tuple(sorted(values, key=_level_order(values))) for n, values in seen.items()}
    for name, level in spec.reference.items():
        if level not in levels[name]:
            raise TableError(f"{source.name}: columns.reference sets level '{shown(level)}' for "
                             f"column '{shown(name)}', which has no such value; levels seen: "
                             f"{_preview(levels[name])}")
    parts: list[str | Categorical] = [
        Categorical(n, levels[n], n in spec.categorical, spec.reference.get(n))
        if n in levels else n for n in selected
    ]
    return DesignPlan(source.name, tuple(parts), weight, policy.missing, spec.target)


#: Rows per chunk of the levels pass (only the categorical columns are read).
LEVELS_CHUNK_ROWS = 1 << 20


def distinct_values(source: TableSource, names: list[str]) -> dict[str, set[str]]:
    """Distinct non-missing values (as text) of the named columns, in one cheap pass that reads
    only those columns. A column stops collecting past ``MAX_LEVELS_CEILING`` values (it is
    refused by :func:`check_level_count` whatever the policy's limit); the pass stops when every
    column has."""
    seen: dict[str, set[str]] = {n: set() for n in names}
    if not names:
        return seen
    for chunk in source.chunks(names, chunk_rows=LEVELS_CHUNK_ROWS):
        open_names = [n for n in names if len(seen[n]) <= MAX_LEVELS_CEILING]
        if not open_names:
            break
        for name in open_names:
            values = pc.unique(_as_text(chunk.column(name)))
            seen[name].update(v for v in values.to_pylist() if v is not None)
    return seen


def check_level_count(table: str, name: str, count: int, limit: int = MAX_LEVELS, *,
                      declared: bool = False) -> None:
    """Refuse a categorical column with more than ``limit`` levels (``columns.max_levels``)."""
    if count <= limit:
        return
    many = f"more than {MAX_LEVELS_CEILING:,}" if count > MAX_LEVELS_CEILING else f"{count:,}"
    if declared:
        raise TableError(f"{table}: categorical column '{shown(name)}' has {many} levels, more "
                         f"than columns.max_levels = {limit}; one-hot encoding it would add "
                         "that many features: exclude it, group its levels, or raise "
                         "columns.max_levels")
    raise TableError(f"{table}: column '{shown(name)}' looks like an identifier ({many} "
                     f"distinct values, more than columns.max_levels = {limit}); exclude it, "
                     "or declare it categorical with a higher level limit (columns.categorical "
                     "and columns.max_levels)")


def _level_order(values: set[str]) -> Callable[[str], tuple[float, str]]:
    """Levels that all read as numbers (codes such as 2, 3, 10) sort by value, not as text
    (where '10' < '2' would make 10 the reference); other levels sort as text."""
    try:
        numeric = all(math.isfinite(float(value)) for value in values)
    except ValueError:
        numeric = False
    if not numeric:
        return lambda value: (0.0, value)
    return lambda value: (float(value), value)


def _as_text(column: pa.ChunkedArray | pa.Array) -> pa.ChunkedArray | pa.Array:
    if pa.types.is_dictionary(column.type):
        column = pc.cast(column, column.type.value_type)
    if not (pa.types.is_string(column.type) or pa.types.is_large_string(column.type)):
        column = pc.cast(column, pa.string())
    return column


class InfiniteValuesError(DesignError):
    """A feature column holds +-inf. Engines that read on restate the count for the whole
    table with :meth:`with_total` (see :func:`count_infinite`)."""

    def __init__(self, table: str, column: str, count: int, first_row: int, last_row: int
                 ) -> None:
        self.table, self.column, self.count = table, column, count
        self.first_row, self.last_row = first_row, last_row
        super().__init__(f"{table}: column '{shown(column)}' has {count:,} infinite value"
                         f"{'s' if count != 1 else ''} (the first in rows {first_row:,}-"
                         f"{last_row:,}); replace them or exclude the column")

    def with_total(self, count: int) -> InfiniteValuesError:
        return InfiniteValuesError(self.table, self.column, count, self.first_row,
                                   self.last_row)


def count_infinite(chunk: pa.Table, column: str) -> int:
    """Number of +-inf values of one numeric column in a chunk (error path only)."""
    values = pc.cast(chunk.column(column), pa.float64())
    return int(pc.sum(pc.is_inf(values)).as_py() or 0)


@dataclass(frozen=True)
class EncodedBlock:
    """One encoded chunk: ``values`` over ``plan.layout`` (used rows only), their weights, the
    row counts, and per row of the chunk whether it was used and which columns were missing
    (so a pass can split the chunk by a key and still count exactly)."""

    values: FloatArray
    weights: FloatArray | None
    counts: RowCounts
    used: NDArray[np.bool_] | None  # None: every row used
    missing: dict[str, NDArray[np.bool_]]
    #: Column sums of ``values`` when every row is used (the finiteness check computes them
    #: anyway; the main pass takes its chunk mean from them instead of a second pass).
    sums: FloatArray | None = None
    #: Largest magnitude per column of ``values`` when every row is used (the main pass's range
    #: check, ``gate.stats.local.within_plain_range``, reads it instead of the block).
    largest: FloatArray | None = None


def encode_block(plan: DesignPlan, chunk: pa.Table, *, first_row: int = 0
                 ) -> tuple[FloatArray, FloatArray | None, RowCounts]:
    """One chunk -> (values over ``plan.layout``, weights or None, row counts)."""
    block = encode_rows(plan, chunk, first_row=first_row)
    return block.values, block.weights, block.counts


def encode_rows(plan: DesignPlan, chunk: pa.Table, *, first_row: int = 0,
                out: FloatArray | None = None) -> EncodedBlock:
    """One chunk -> :class:`EncodedBlock` (``first_row``: its first row's number in the table,
    for messages). ``out``: a column-major buffer of at least (rows, width) to write into,
    reused across chunks by the caller (the block's values are then a view of it)."""
    n = chunk.num_rows
    width = len(plan.layout)
    # Column-major: each feature is written contiguously and X'X on it is one BLAS call.
    values = np.empty((width, n)).T if out is None else out[:n, :width]
    missing_rows = np.zeros(n, dtype=bool)
    masks: dict[str, NDArray[np.bool_]] = {}
    # Each column's sum (the finiteness check, and the main pass's chunk mean) and largest
    # magnitude (its range check) are taken right after the column is written, while it is in
    # cache: 1,000,000 x 100 spent 0.04 s per 131,072-row chunk on three later passes over the
    # block, 0.02-0.03 s this way (the same bits).
    sums = np.zeros(width)
    largest = np.zeros(width)
    position = 0
    for part in plan.parts:
        if isinstance(part, str):
            column = values[:, position]
            _fill_float(column, chunk.column(part))
            if n:
                sums[position] = column.sum()
                largest[position] = max(column.max(), -column.min())
            position += 1
        else:
            codes = _level_codes(chunk.column(part.column), part.levels, n)
            present = codes >= 0
            rows = np.flatnonzero(present)
            dummies = values[:, position:position + len(part.levels)]
            dummies[...] = 0.0
            dummies[rows, codes[rows]] = 1.0
            if n:
                sums[position:position + len(part.levels)] = dummies.sum(axis=0)
                largest[position:position + len(part.levels)] = dummies.max(axis=0)
            if rows.size < n:
                masks[part.column] = ~present
                missing_rows |= ~present
            position += len(part.levels)

    if not np.isfinite(sums).all():  # cheap check first; explain precisely only on failure
        layout = plan.layout
        for j in np.flatnonzero(~np.isfinite(sums)):
            col = values[:, j]
            infinite = int(np.isinf(col).sum())
            if infinite:
                raise InfiniteValuesError(plan.table, layout[j], infinite, first_row,
                                          first_row + n - 1)
            nan_rows = np.isnan(col)
            if nan_rows.any():
                masks[layout[j]] = nan_rows
                missing_rows |= nan_rows

    weights = None
    if plan.weight is not None:
        weights = np.empty(n)
        _fill_float(weights, chunk.column(plan.weight))
        _check_weights(plan, weights, first_row)

    missing = {name: int(mask.sum()) for name, mask in masks.items()}
    used = None
    if missing:
        if plan.missing == "fail":
            name, count = next(iter(missing.items()))
            raise DesignError(f"{plan.table}: column '{shown(name)}' has {count} missing value"
                              f"{'s' if count > 1 else ''} in rows {first_row:,}-"
                              f"{first_row + n - 1:,} and the policy says missing: fail; "
                              "fill them, or set missing: drop_rows")
        used = ~missing_rows
        values = values[used]
        if weights is not None:
            weights = weights[used]
    counts = RowCounts(read=n, dropped=int(missing_rows.sum()), missing=missing)
    every = used is None
    return EncodedBlock(values, weights, counts, used, masks, sums if every else None,
                        largest if every else None)


def _fill_float(out: FloatArray, column: pa.ChunkedArray) -> None:
    """Write a numeric/boolean column into ``out`` as float64, NaN where missing.

    Reads the Arrow buffers directly: no copy for float64 without nulls, and no call into
    pyarrow's pandas shim (``to_numpy`` and Python-scalar arguments import pandas, ~0.9 s).
    """
    start = 0
    for array in column.chunks:
        if array.type != pa.float64():
            array = pc.cast(array, pa.float64())
        size = len(array)
        target = out[start:start + size]
        start += size
        validity, data = array.buffers()[:2]
        if data is None:  # an all-null column
            target[...] = np.nan
            continue
        offset = array.offset
        target[...] = np.frombuffer(data, dtype=np.float64, count=offset + size)[offset:]
        if array.null_count:
            target[~_valid_mask(validity, offset, size)] = np.nan


def _valid_mask(validity: pa.Buffer, offset: int, size: int) -> NDArray[np.bool_]:
    """Arrow's validity bitmap (least significant bit first) as a boolean array."""
    bits = np.unpackbits(np.frombuffer(validity, dtype=np.uint8), count=offset + size,
                         bitorder="little")
    return bits[offset:].astype(bool)


def _level_codes(column: pa.ChunkedArray, levels: tuple[str, ...], n: int
                 ) -> NDArray[np.intp]:
    """Position of each value among ``levels`` (sorted text); -1 where missing or unknown."""
    lookup = {level: k for k, level in enumerate(levels)}
    codes = np.empty(n, dtype=np.intp)
    start = 0
    for array in column.chunks:
        size = len(array)
        encoded = array if pa.types.is_dictionary(array.type) else pc.dictionary_encode(
            _as_text(array))
        dictionary = _as_text(encoded.dictionary).to_pylist()
        table = np.array([lookup.get(v, -1) if v is not None else -1 for v in dictionary] + [-1],
                         dtype=np.intp)
        indices = encoded.indices
        validity, data = indices.buffers()[:2]
        offset = indices.offset
        index_type = np.dtype(f"{'i' if pa.types.is_signed_integer(indices.type) else 'u'}"
                              f"{indices.type.bit_width // 8}")
        positions = np.frombuffer(data, dtype=index_type, count=offset + size)[offset:] \
            .astype(np.intp)
        if indices.null_count:
            positions[~_valid_mask(validity, offset, size)] = len(dictionary)  # -> -1
        codes[start:start + size] = table[positions]
        start += size
    return codes


def _check_weights(plan: DesignPlan, weights: FloatArray, first_row: int) -> None:
    where = f"rows {first_row:,}-{first_row + weights.size - 1:,}"
    if np.isnan(weights).any():
        count = int(np.isnan(weights).sum())
        raise DesignError(f"{plan.table}: weight column '{shown(plan.weight)}' has {count} missing "
                          f"value{'s' if count > 1 else ''} in {where}; fill or drop them")
    if not np.isfinite(weights).all():
        raise DesignError(f"{plan.table}: weight column '{shown(plan.weight)}' has infinite values in "
                          f"{where}; weights must be finite and non-negative")
    if (weights < 0).any():
        count = int((weights < 0).sum())
        raise DesignError(f"{plan.table}: weight column '{shown(plan.weight)}' has {count} negative "
                          f"value{'s' if count > 1 else ''} in {where}; weights must be >= 0")


def finish_design(plan: DesignPlan, means: FloatArray, rows: int, counts: RowCounts) -> Design:
    """Choose reference levels from what the used rows contain (``means``: the main pass's
    weighted column means, so a dummy's mean is its level's share; ``rows``: the rows with a
    positive weight); name the design columns."""
    features: list[str] = []
    selection: list[int] = []
    groups: list[Group] = []
    notes: list[str] = []
    position = 0
    for part in plan.parts:
        if isinstance(part, str):
            features.append(part)
            selection.append(position)
            position += 1
            continue
        present = [k for k in range(len(part.levels)) if means[position + k] > 0.0]
        absent = [part.levels[k] for k in range(len(part.levels)) if k not in present]
        if absent:
            notes.append(f"column '{shown(part.column)}': level{'s' if len(absent) > 1 else ''} "
                         f"{', '.join(shown(a, 80, quote=True) for a in absent[:5])} have no used rows and get "
                         "no dummy")
        if not part.declared:
            _refuse_identifier_like(plan.table, part.column, len(present), rows)
        if len(present) <= 1:
            notes.append(f"column '{shown(part.column)}' has a single level among the used rows; it "
                         "adds no feature")
        else:
            start = len(features)
            reference, reason = _reference_level(plan, part, present, means, rows, position)
            kept = [k for k in present if k != reference]
            for k in kept:
                features.append(f"{part.column}={part.levels[k]}")
                selection.append(position + k)
            groups.append(Group(part.column, part.levels[reference],
                                tuple(part.levels[k] for k in kept),
                                tuple(range(start, start + len(kept))), reason))
        position += len(part.levels)
    if not features:
        raise DesignError(f"{plan.table}: no feature column is left after encoding; "
                          "check columns.include/exclude")
    seen: set[str] = set()
    clash = None
    for name in features:
        if name in seen:
            clash = name
            break
        seen.add(name)
    if clash is not None:  # e.g. a column named 'kind=rain' beside categorical 'kind'
        raise DesignError(f"{plan.table}: two design columns would both be named '{shown(clash)}' "
                          "(a column name equals a '<column>=<level>' dummy); rename the "
                          "column or exclude it")
    return Design(tuple(features), tuple(groups), tuple(selection), plan.weight, counts,
                  tuple(notes))


def _refuse_identifier_like(table: str, column: str, levels: int, rows: int) -> None:
    """A text column with a distinct value in (almost) every used row is an identifier."""
    if rows >= IDENTIFIER_MIN_ROWS and levels >= IDENTIFIER_DISTINCT_SHARE * rows:
        raise DesignError(f"{table}: column '{shown(column)}' looks like an identifier "
                          f"({levels:,} distinct values in {rows:,} used rows); exclude "
                          "it, or declare it categorical with a higher level limit "
                          "(columns.categorical and columns.max_levels)")


def _reference_level(plan: DesignPlan, part: Categorical, present: list[int],
                     means: FloatArray, rows: int, position: int) -> tuple[int, str]:
    """(index into ``part.levels``, reason in words) of the reference level.

    The override (``columns.reference``) wins; otherwise the most frequent level among the used
    rows, counted exactly (unweighted) or by weight share, ties to the first in sort order.
    """
    if part.reference is not None:
        k = part.levels.index(part.reference)
        if k not in present:
            raise DesignError(
                f"{plan.table}: columns.reference sets level '{shown(part.reference)}' for "
                f"column '{shown(part.column)}', but no used row has it (its rows were dropped); "
                f"choose one of: {_preview(part.levels[j] for j in present)}")
        return k, "set by columns.reference"
    share = {k: float(means[position + k]) for k in present}
    if plan.weight is None:  # the mean of a dummy times the row count is its exact count
        count = {k: round(v * rows) for k, v in share.items()}
        top = max(count.values())
        tied = [k for k in present if count[k] == top]
        amount = f"{top:,} of {rows:,} used rows"
    else:  # weight shares are sums of floats: equal within rounding counts as a tie
        top_share = max(share.values())
        tied = [k for k in present if share[k] >= top_share * (1 - 1e-12)]
        amount = f"{100 * top_share:.1f}% of the weight of the used rows"
    reason = f"most frequent level ({amount})"
    if len(tied) > 1:
        others = ", ".join(f"'{part.levels[k]}'" for k in tied[1:4])
        reason += f"; tied with {others}{', ...' if len(tied) > 4 else ''}: first in sort order"
    return tied[0], reason


def _preview(names: Iterable[str], limit: int = 8) -> str:
    items = [shown(name, 80) for name in names]
    listed = ", ".join(items[:limit])
    return listed + (f", ... ({len(items)} in all)" if len(items) > limit else "")
