"""The Dask engine: partition statistics on the workers, merged in a tree.

Every statistic the gate needs is mergeable (``gate.stats.accumulators``), so each partition is
reduced on a worker to a few p x p numbers and only those travel: the levels pass (distinct
values of the categorical columns), the main pass (``CentredGram`` and row counts per
partition, merged with Chan's pairwise update) and, when the Gram cannot settle the rank,
the exact pass (``TriangularFactor`` per partition, merged by TSQR). Merges run as a binary
tree of tasks over adjacent partitions, so the order is fixed and the result does not depend
on which worker finishes first.

Partitions: a dask DataFrame's own partitions; for a path, one per Parquet row group (a file
or a folder of files), one per group of Arrow IPC record batches, one for a CSV file (CSV
cannot be split without scanning it). Workers read the files themselves, so on a real cluster
the path must be visible to every worker, and every worker needs collinearity-gate installed.

Needs the optional extra ``collinearity-gate[dask]``. Imported only when the Dask engine is
asked for: the local path never imports dask.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Any, Self, TypeVar

import pyarrow as pa

from gate.design.plan import DesignPlan, RowCounts, distinct_values, encode_block
from gate.errors import TableError
from gate.read.sources import (
    DEFAULT_CHUNK_ROWS,
    PARQUET_BUFFER_BYTES,
    SUFFIXES,
    ArrowSource,
    Column,
    CsvSource,
    DaskFrameSource,
    ParquetSource,
    TableSource,
    from_dataframe,
    open_path,
    row_group_chunks,
)
from gate.stats.accumulators import CentredGram, TriangularFactor
from gate.stats.local import ProgressFactory
from gate.stats.routing import ExactPassPlan, exact_pass_block

#: Workers of the local cluster started when no scheduler is given.
LOCAL_WORKERS = 2
#: Arrow IPC record batches per partition (batches are usually 64k-1M rows).
ARROW_BATCHES_PER_PARTITION = 4

T = TypeVar("T")


# --- partitions: picklable descriptions a worker can read -------------------------------------

@dataclass(frozen=True)
class ParquetRowGroup:
    path: str
    row_group: int
    first_row: int
    rows: int

    def tables(self, columns: Sequence[str], chunk_rows: int) -> Iterator[pa.Table]:
        import pyarrow.parquet as pq

        file = pq.ParquetFile(self.path, pre_buffer=False, buffer_size=PARQUET_BUFFER_BYTES)
        yield from row_group_chunks(file, self.row_group, columns, chunk_rows, self.path)


@dataclass(frozen=True)
class ArrowBatches:
    path: str
    start: int
    stop: int
    first_row: int
    rows: int

    def tables(self, columns: Sequence[str], chunk_rows: int) -> Iterator[pa.Table]:
        with pa.memory_map(self.path) as handle:
            reader = pa.ipc.open_file(handle)
            for index in range(self.start, self.stop):
                table = pa.Table.from_batches([reader.get_batch(index)]).select(list(columns))
                for offset in range(0, table.num_rows, chunk_rows):
                    yield table.slice(offset, chunk_rows)


@dataclass(frozen=True)
class WholeSource:
    """A source read whole by one worker (CSV, Arrow IPC streams)."""

    path: str
    first_row: int = 0
    rows: int | None = None

    def tables(self, columns: Sequence[str], chunk_rows: int) -> Iterator[pa.Table]:
        yield from open_path(Path(self.path)).chunks(columns, chunk_rows)


@dataclass(frozen=True)
class FramePartition:
    """A dask DataFrame partition; ``frame`` is the computed pandas DataFrame on the worker."""

    frame: Any
    name: str
    first_row: int = 0
    rows: int | None = None

    def tables(self, columns: Sequence[str], chunk_rows: int) -> Iterator[pa.Table]:
        yield from from_dataframe(self.frame, self.name).chunks(columns, chunk_rows)


def path_partitions(path: Path) -> list[ParquetRowGroup | ArrowBatches | WholeSource]:
    """How a table file (or Parquet folder) splits into partitions for the workers."""
    source = open_path(path)  # validates the file the same way the local engine does
    kind = "parquet" if path.is_dir() else SUFFIXES.get(path.suffix.lower())
    if kind == "parquet":
        import pyarrow.parquet as pq

        files = sorted(path.rglob("*.parquet")) if path.is_dir() else [path]
        parts: list[ParquetRowGroup | ArrowBatches | WholeSource] = []
        first = 0
        for file in files:
            meta = pq.ParquetFile(file).metadata
            for group in range(meta.num_row_groups):
                rows = meta.row_group(group).num_rows
                parts.append(ParquetRowGroup(str(file), group, first, rows))
                first += rows
        return parts
    if kind == "arrow":
        try:
            with pa.memory_map(str(path)) as handle:
                reader = pa.ipc.open_file(handle)
                sizes = [reader.get_batch(i).num_rows for i in range(reader.num_record_batches)]
        except pa.ArrowInvalid:  # an IPC stream: no random access, one partition
            return [WholeSource(str(path))]
        parts = []
        first = 0
        for start in range(0, len(sizes), ARROW_BATCHES_PER_PARTITION):
            stop = min(start + ARROW_BATCHES_PER_PARTITION, len(sizes))
            rows = sum(sizes[start:stop])
            parts.append(ArrowBatches(str(path), start, stop, first, rows))
            first += rows
        return parts
    del source
    return [WholeSource(str(path))]


# --- what runs on the workers -------------------------------------------------------------------

Partition = ParquetRowGroup | ArrowBatches | WholeSource | FramePartition


def partition_distinct(part: Partition, names: list[str], table: str) -> dict[str, set[str]]:
    """Levels pass over one partition."""
    return distinct_values(_PartitionSource(part, table), names)


def partition_gram(part: Partition, plan: DesignPlan, chunk_rows: int
                   ) -> tuple[CentredGram, RowCounts]:
    """Main pass over one partition: the same chunks and merge order as the local engine."""
    gram = CentredGram.empty(len(plan.layout))
    counts = RowCounts()
    for chunk in part.tables(plan.read_columns, chunk_rows):
        values, weights, chunk_counts = encode_block(
            plan, chunk, first_row=part.first_row + counts.read)
        gram = gram.merge(CentredGram.from_block(values, weights, overwrite=True))
        counts = counts.add(chunk_counts)
    return gram, counts


def partition_factor(part: Partition, plan: DesignPlan, selection: tuple[int, ...],
                     exact: ExactPassPlan, chunk_rows: int) -> TriangularFactor:
    """Exact pass over one partition."""
    factor = exact.empty_factor()
    read = 0
    for chunk in part.tables(plan.read_columns, chunk_rows):
        values, weights, chunk_counts = encode_block(plan, chunk,
                                                     first_row=part.first_row + read)
        read += chunk_counts.read
        block = exact_pass_block(exact, values[:, list(selection)], weights)
        factor = factor.merge(TriangularFactor.from_block(block))
    return factor


def merge_grams(left: tuple[CentredGram, RowCounts], right: tuple[CentredGram, RowCounts]
                ) -> tuple[CentredGram, RowCounts]:
    return left[0].merge(right[0]), left[1].add(right[1])


def merge_factors(left: TriangularFactor, right: TriangularFactor) -> TriangularFactor:
    return left.merge(right)


def merge_distinct(left: dict[str, set[str]], right: dict[str, set[str]]
                   ) -> dict[str, set[str]]:
    return {name: left[name] | right[name] for name in left}


def _on_frame(function: Callable[..., T], frame: Any, name: str, *args: Any) -> T:
    return function(FramePartition(frame, name), *args)


class _PartitionSource:
    """One partition seen as a TableSource (for the levels pass)."""

    def __init__(self, part: Partition, name: str) -> None:
        self.part = part
        self.name = name

    @property
    def columns(self) -> tuple[Column, ...]:
        return ()  # not needed by the levels pass

    @property
    def row_count(self) -> int | None:
        return self.part.rows

    def sha256(self) -> None:
        return None

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]:
        return self.part.tables(columns, chunk_rows)


# --- the engine ---------------------------------------------------------------------------------

class DaskEngine:
    """Runs the gate's passes on a Dask cluster.

    Parameters
    ----------
    scheduler : a scheduler address ("tcp://host:8786"), a ``distributed.Client``, or None for
        the current client if there is one, else a local cluster of ``LOCAL_WORKERS`` worker
        processes (one thread each) started here and closed on exit.
    """

    def __init__(self, scheduler: Any = None) -> None:
        self._scheduler = scheduler
        self._client: Any = None
        self._owned: list[Any] = []

    def __enter__(self) -> Self:
        try:
            from distributed import Client, LocalCluster
        except ImportError:
            raise TableError("the Dask engine needs dask and distributed: "
                             "pip install 'collinearity-gate[dask]'") from None
        scheduler = self._scheduler
        if scheduler is not None and not isinstance(scheduler, str):
            self._client = scheduler  # a Client the caller owns
            return self
        if scheduler is None:
            try:
                from distributed import get_client

                self._client = get_client()
                return self
            except ValueError:
                cluster = LocalCluster(  # type: ignore[no-untyped-call]
                    n_workers=LOCAL_WORKERS, threads_per_worker=1, processes=True,
                    dashboard_address=None)
                self._owned.append(cluster)
                scheduler = cluster
        try:
            self._client = Client(scheduler, timeout="20s")  # type: ignore[no-untyped-call]
        except OSError as exc:
            raise TableError(f"cannot reach the Dask scheduler at {scheduler} ({exc}); "
                             "check --scheduler ADDRESS") from None
        self._owned.insert(0, self._client)
        return self

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        for owned in self._owned:
            owned.close()
        self._owned.clear()
        self._client = None

    @property
    def client(self) -> Any:
        if self._client is None:
            raise RuntimeError("use DaskEngine as a context manager")
        return self._client

    # The three passes ----------------------------------------------------------------------

    def distinct_values(self, source: TableSource, names: list[str]) -> dict[str, set[str]]:
        if not names:
            return {}
        futures = self._map(source, partition_distinct, names, source.name)
        return self._tree(futures, merge_distinct)

    def main_pass(self, source: TableSource, plan: DesignPlan, *, chunk_rows: int | None = None,
                  progress: ProgressFactory | None = None) -> tuple[CentredGram, RowCounts]:
        futures = self._map(source, partition_gram, plan, plan.chunk_rows(chunk_rows))
        if progress:
            self._report(futures, progress("reading rows", source.row_count),
                         lambda result: result[1].read)
        if not futures:
            return CentredGram.empty(len(plan.layout)), RowCounts()
        return self._tree(futures, merge_grams)

    def exact_pass(self, source: TableSource, plan: DesignPlan, selection: tuple[int, ...],
                   exact: ExactPassPlan, *, chunk_rows: int | None = None,
                   progress: ProgressFactory | None = None) -> TriangularFactor:
        futures = self._map(source, partition_factor, plan, selection, exact,
                            plan.chunk_rows(chunk_rows))
        if not futures:
            return exact.empty_factor()
        return self._tree(futures, merge_factors)

    # Plumbing ----------------------------------------------------------------------------------

    def _partitions(self, source: TableSource) -> list[Any]:
        if isinstance(source, DaskFrameSource):
            return source.partitions()
        if not isinstance(source, (ParquetSource, CsvSource, ArrowSource)):
            raise TableError(f"{source.name}: the Dask engine reads table files or dask "
                             "DataFrames; for an in-memory table use the local engine")
        return list(path_partitions(Path(source.name)))

    def _map(self, source: TableSource, function: Callable[..., T], *args: Any) -> list[Any]:
        client = self.client
        parts = self._partitions(source)
        if isinstance(source, DaskFrameSource):
            # Each delayed partition becomes a future; the worker holding it runs the statistics
            # on it, so only the p x p results travel.
            frames = client.compute(parts)
            return [client.submit(_on_frame, function, frame, source.name, *args, pure=False)
                    for frame in frames]
        return [client.submit(function, part, *args, pure=False) for part in parts]

    def _tree(self, futures: list[Any], merge: Callable[[T, T], T]) -> T:
        """Merge adjacent results pairwise, level by level, as tasks on the cluster."""
        if not futures:
            return None  # type: ignore[return-value]
        level = list(futures)
        while len(level) > 1:
            merged = [self.client.submit(merge, level[i], level[i + 1], pure=False)
                      for i in range(0, len(level) - 1, 2)]
            if len(level) % 2:
                merged.append(level[-1])
            level = merged
        return level[0].result()  # type: ignore[no-any-return]

    @staticmethod
    def _report(futures: list[Any], counter: Any, rows_of: Callable[[Any], int]) -> None:
        from distributed import as_completed

        try:
            for future in as_completed(futures):  # type: ignore[no-untyped-call]
                counter.advance(rows_of(future.result()))
        finally:
            counter.finish()
