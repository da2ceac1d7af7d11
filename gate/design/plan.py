"""From table columns to the design matrix the policy describes.

``plan_design`` resolves the policy's globs against the table's columns, checks their types and
reads the categorical levels (a cheap pass over only those columns). ``encode_block`` turns one
chunk of rows into a float block: numeric and boolean columns as they are, categorical columns
one-hot over *all* levels, rows with missing values dropped (or refused). ``finish_design``
picks the reference level per categorical (the first sorted level still present among the used
rows) once the main pass has seen every row, so a level that vanished with the dropped rows
never becomes a spurious constant column.
"""

from __future__ import annotations

import fnmatch
import importlib
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa
from numpy.typing import NDArray

from gate.errors import DesignError, TableError
from gate.numerics.kernels import FloatArray
from gate.policy.models import Policy
from gate.read.sources import DEFAULT_CHUNK_ROWS, TableSource


class _OnFirstUse:
    """A module imported on first attribute access. pyarrow.compute costs about a tenth of a
    second to import and a table of float64 columns never needs it (issue 12)."""

    def __init__(self, name: str) -> None:
        self._name = name

    def __getattr__(self, attribute: str) -> Any:
        return getattr(importlib.import_module(self._name), attribute)


if TYPE_CHECKING:
    import pyarrow.compute as pc
else:
    pc = _OnFirstUse("pyarrow.compute")

#: One-hot encoding a column with more levels than this is almost always a mistake (an id).
MAX_LEVELS = 500
#: Blocks are sized to about this many bytes, so memory does not grow with the feature count.
BLOCK_BYTES = 64 * 1024 * 1024
GLOB_CHARS = set("*?[")


@dataclass(frozen=True)
class Categorical:
    column: str
    levels: tuple[str, ...]  # every level seen, sorted


@dataclass(frozen=True)
class DesignPlan:
    """What to read and how to encode it (known before the main pass)."""

    table: str
    parts: tuple[str | Categorical, ...]  # selected columns in table order
    weight: str | None
    missing: str

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
                raise TableError(f"{source.name}: {key} names '{pattern}', which is not a "
                                 f"column of the table; columns are: {_preview(names)}")
    for name in spec.categorical:
        if name not in columns:
            raise TableError(f"{source.name}: columns.categorical names '{name}', which is not "
                             f"a column of the table; columns are: {_preview(names)}")
    weight = spec.weight
    if weight is not None:
        if weight not in columns:
            raise TableError(f"{source.name}: columns.weight names '{weight}', which is not a "
                             f"column of the table; columns are: {_preview(names)}")
        if columns[weight].kind not in ("numeric", "boolean"):
            raise TableError(f"{source.name}: weight column '{weight}' has type "
                             f"{columns[weight].type}; weights must be numeric")

    selected = [
        n for n in names
        if any(fnmatch.fnmatchcase(n, p) for p in spec.include)
        and not any(fnmatch.fnmatchcase(n, p) for p in spec.exclude)
        and n != weight
    ]
    unusable = [n for n in selected
                if columns[n].kind in ("datetime", "other") and n not in spec.categorical]
    if unusable:
        shown = ", ".join(f"'{n}' ({columns[n].type})" for n in unusable[:5])
        raise TableError(f"{source.name}: column{'s' if len(unusable) > 1 else ''} {shown} "
                         "cannot be a feature (dates and nested values have no linear meaning); "
                         "add to columns.exclude, or list under columns.categorical")
    if not selected:
        raise DesignError(f"{source.name}: columns.include/exclude select no feature column; "
                          f"columns are: {_preview(names)}")
    to_encode = [n for n in selected
                 if n in spec.categorical or columns[n].kind == "categorical"]
    levels = _sorted_levels(source, (distinct or distinct_values)(source, to_encode))
    parts: list[str | Categorical] = [
        Categorical(n, levels[n]) if n in levels else n for n in selected
    ]
    return DesignPlan(source.name, tuple(parts), weight, policy.missing)


#: Rows per chunk of the levels pass (only the categorical columns are read).
LEVELS_CHUNK_ROWS = 1 << 20


def distinct_values(source: TableSource, names: list[str]) -> dict[str, set[str]]:
    """Distinct non-missing values (as text) of the named columns, in one cheap pass that reads
    only those columns."""
    seen: dict[str, set[str]] = {n: set() for n in names}
    if not names:
        return seen
    for chunk in source.chunks(names, chunk_rows=LEVELS_CHUNK_ROWS):
        for name in names:
            values = pc.unique(_as_text(chunk.column(name)))
            seen[name].update(v for v in values.to_pylist() if v is not None)
            check_level_count(source.name, name, len(seen[name]))
    return seen


def check_level_count(table: str, name: str, count: int) -> None:
    if count > MAX_LEVELS:
        raise TableError(f"{table}: categorical column '{name}' has more than "
                         f"{MAX_LEVELS} distinct values; one-hot encoding it would add "
                         "that many features: exclude it or group its levels")


def _sorted_levels(source: TableSource, seen: dict[str, set[str]]
                   ) -> dict[str, tuple[str, ...]]:
    for name, values in seen.items():
        check_level_count(source.name, name, len(values))
    return {n: tuple(sorted(values, key=_level_order(values))) for n, values in seen.items()}


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
        super().__init__(f"{table}: column '{column}' has {count:,} infinite value"
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
    position = 0
    for part in plan.parts:
        if isinstance(part, str):
            _fill_float(values[:, position], chunk.column(part))
            position += 1
        else:
            codes = _level_codes(chunk.column(part.column), part.levels, n)
            present = codes >= 0
            rows = np.flatnonzero(present)
            dummies = values[:, position:position + len(part.levels)]
            dummies[...] = 0.0
            dummies[rows, codes[rows]] = 1.0
            if rows.size < n:
                masks[part.column] = ~present
                missing_rows |= ~present
            position += len(part.levels)

    sums = values.sum(axis=0)  # cheap finiteness check first; explain precisely only on failure
    if not np.isfinite(sums).all():
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
            raise DesignError(f"{plan.table}: column '{name}' has {count} missing value"
                              f"{'s' if count > 1 else ''} in rows {first_row:,}-"
                              f"{first_row + n - 1:,} and the policy says missing: fail; "
                              "fill them, or set missing: drop_rows")
        used = ~missing_rows
        values = values[used]
        if weights is not None:
            weights = weights[used]
    counts = RowCounts(read=n, dropped=int(missing_rows.sum()), missing=missing)
    return EncodedBlock(values, weights, counts, used, masks)


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
        raise DesignError(f"{plan.table}: weight column '{plan.weight}' has {count} missing "
                          f"value{'s' if count > 1 else ''} in {where}; fill or drop them")
    if not np.isfinite(weights).all():
        raise DesignError(f"{plan.table}: weight column '{plan.weight}' has infinite values in "
                          f"{where}; weights must be finite and non-negative")
    if (weights < 0).any():
        count = int((weights < 0).sum())
        raise DesignError(f"{plan.table}: weight column '{plan.weight}' has {count} negative "
                          f"value{'s' if count > 1 else ''} in {where}; weights must be >= 0")


def finish_design(plan: DesignPlan, means: FloatArray, counts: RowCounts) -> Design:
    """Choose reference levels from what the used rows contain (``means``: the main pass's
    weighted column means, so a dummy's mean is its level's share); name the design columns."""
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
            notes.append(f"column '{part.column}': level{'s' if len(absent) > 1 else ''} "
                         f"{', '.join(repr(a) for a in absent[:5])} have no used rows and get "
                         "no dummy")
        if len(present) <= 1:
            notes.append(f"column '{part.column}' has a single level among the used rows; it "
                         "adds no feature")
        else:
            start = len(features)
            kept = present[1:]
            for k in kept:
                features.append(f"{part.column}={part.levels[k]}")
                selection.append(position + k)
            groups.append(Group(part.column, part.levels[present[0]],
                                tuple(part.levels[k] for k in kept),
                                tuple(range(start, start + len(kept)))))
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
        raise DesignError(f"{plan.table}: two design columns would both be named '{clash}' "
                          "(a column name equals a '<column>=<level>' dummy); rename the "
                          "column or exclude it")
    return Design(tuple(features), tuple(groups), tuple(selection), plan.weight, counts,
                  tuple(notes))


def _preview(names: Iterable[str], limit: int = 8) -> str:
    items = list(names)
    shown = ", ".join(items[:limit])
    return shown + (f", ... ({len(items)} in all)" if len(items) > limit else "")
