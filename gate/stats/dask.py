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
cannot be split without scanning it). Workers read the files themselves, by absolute path (a
worker's working directory is its own), so on a real cluster the path must be visible to
every worker; the scheduler (which unpickles the task graph) and every worker need the same
collinearity-gate installed. A worker that cannot open the path is reported as unusable input
naming the path, not as a crash.

Errors: a task never raises a GateError on the worker (the worker would log it with its
traceback on its stderr, which for a local cluster is the user's terminal). It returns a
:class:`Failure` instead; merges pass the leftmost failure on, so the error reported is the
one of the first failing partition in row order -- the same error, with the same text, that
the local engine raises, which stops at the first failing chunk. For infinite values the
client then counts the rest of the table, as the local engine reads on, so the message gives
the whole table's count.

Needs the optional extra ``collinearity-gate[dask]``. Imported only when the Dask engine is
asked for: the local path never imports dask.
"""

from __future__ import annotations

import logging
import operator
import os
import re
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Any, Self, TypeVar

import pyarrow as pa

from gate.design.plan import (
    DesignPlan,
    InfiniteValuesError,
    RowCounts,
    count_infinite,
    distinct_values,
    encode_block,
)
from gate.errors import DesignError, GateError, PolicyError, TableError
from gate.policy.models import MAX_LEVELS_CEILING
from gate.read.sources import (
    DEFAULT_CHUNK_ROWS,
    PARQUET_BUFFER_BYTES,
    ArrowSource,
    Column,
    CsvSource,
    DaskFrameSource,
    ParquetSource,
    TableSource,
    _first_line,
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
#: Seconds to wait for a scheduler given by address to answer, and then for its first worker.
#: Past either, the check stops with exit 2 instead of waiting forever.
SCHEDULER_TIMEOUT_S = 10
#: Schemes of scheduler addresses that name a host and a port (no scheme means tcp).
ADDRESS_SCHEMES = ("tcp", "tls", "ws", "wss", "ucx")
_HOST_PORT = re.compile(r"^(?:\[(?P<ipv6>[0-9A-Fa-f:.]+)\]|(?P<host>[A-Za-z0-9._-]+)):"
                        r"(?P<port>[0-9]{1,5})$")

T = TypeVar("T")


# --- partitions: picklable descriptions a worker can read -------------------------------------

# ``path`` is absolute (what the worker opens); ``name`` is how messages show the file, the
# same text the local engine shows.

@dataclass(frozen=True)
class FilePart:
    """Rows ``first_row`` .. ``first_row + rows - 1`` of the table, from the file ``path``."""

    path: str
    first_row: int
    rows: int
    name: str


@dataclass(frozen=True)
class ParquetRowGroup(FilePart):
    row_group: int

    def tables(self, columns: Sequence[str], chunk_rows: int) -> Iterator[pa.Table]:
        import pyarrow.parquet as pq

        file = pq.ParquetFile(self.path, pre_buffer=False, buffer_size=PARQUET_BUFFER_BYTES)
        yield from row_group_chunks(file, self.row_group, columns, chunk_rows,
                                    self.name or self.path)


@dataclass(frozen=True)
class ArrowBatches(FilePart):
    start: int
    stop: int

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
    name: str = ""

    def tables(self, columns: Sequence[str], chunk_rows: int) -> Iterator[pa.Table]:
        yield from open_path(Path(self.path), self.name or None).chunks(columns, chunk_rows)


@dataclass(frozen=True)
class FramePartition:
    """A dask DataFrame partition; ``frame`` is the computed pandas DataFrame on the worker."""

    frame: Any
    name: str
    first_row: int = 0
    rows: int | None = None

    def tables(self, columns: Sequence[str], chunk_rows: int) -> Iterator[pa.Table]:
        yield from from_dataframe(self.frame, self.name).chunks(columns, chunk_rows)


def path_partitions(path: Path, name: str | None = None
                    ) -> list[ParquetRowGroup | ArrowBatches | WholeSource]:
    """How a table file (or Parquet folder) splits into partitions for the workers. Every
    partition names its file by absolute path: a worker's working directory is its own."""
    source = open_path(path, name)  # validates the file the same way the local engine does
    shown = source.name
    if isinstance(source, ParquetSource):
        import pyarrow.parquet as pq

        parts: list[ParquetRowGroup | ArrowBatches | WholeSource] = []
        first = 0
        for file in source.files:
            meta = pq.ParquetFile(file).metadata
            for group in range(meta.num_row_groups):
                rows = meta.row_group(group).num_rows
                parts.append(ParquetRowGroup(str(file), first, rows, source.display_path(file),
                                             group))
                first += rows
        return parts
    absolute = str(path.absolute())
    if isinstance(source, ArrowSource):
        try:
            with pa.memory_map(absolute) as handle:
                reader = pa.ipc.open_file(handle)
                sizes = [reader.get_batch(i).num_rows for i in range(reader.num_record_batches)]
        except pa.ArrowInvalid:  # an IPC stream: no random access, one partition
            return [WholeSource(absolute, name=shown)]
        parts = []
        first = 0
        for start in range(0, len(sizes), ARROW_BATCHES_PER_PARTITION):
            stop = min(start + ARROW_BATCHES_PER_PARTITION, len(sizes))
            rows = sum(sizes[start:stop])
            parts.append(ArrowBatches(absolute, first, rows, shown, start, stop))
            first += rows
        return parts
    return [WholeSource(absolute, name=shown)]


# --- what runs on the workers -------------------------------------------------------------------

Partition = ParquetRowGroup | ArrowBatches | WholeSource | FramePartition

#: The GateError classes a Failure can stand for (subclasses before their base).
_ERRORS: dict[str, type[GateError]] = {"TableError": TableError, "DesignError": DesignError,
                                       "PolicyError": PolicyError, "GateError": GateError}


@dataclass(frozen=True)
class Failure:
    """A GateError raised in a task, carried back as data (see the module docstring).

    ``index`` is the failing partition's position in row order (-1: raised by a merge);
    ``infinite`` holds an InfiniteValuesError's fields (table, column, count, first, last row).
    """

    index: int
    kind: str
    message: str
    infinite: tuple[str, str, int, int, int] | None = None

    @classmethod
    def of(cls, index: int, exc: GateError) -> Failure:
        if isinstance(exc, InfiniteValuesError):
            return cls(index, "InfiniteValuesError", str(exc),
                       (exc.table, exc.column, exc.count, exc.first_row, exc.last_row))
        kind = next(name for name, error in _ERRORS.items() if isinstance(exc, error))
        return cls(index, kind, str(exc))

    def error(self) -> GateError:
        if self.infinite is not None:
            return InfiniteValuesError(*self.infinite)
        return _ERRORS[self.kind](self.message)


def run_guarded(function: Callable[..., T], index: int, part: Partition, *args: Any
                ) -> T | Failure:
    """Run one partition's task; a GateError, or a path this worker cannot open, comes back as a
    :class:`Failure` instead of being raised (and logged with a traceback) on the worker."""
    if not isinstance(part, FramePartition) and not os.path.exists(part.path):
        return Failure(index, "TableError", _unseen(part, "no such file or directory"))
    try:
        return function(part, *args)
    except GateError as exc:
        return Failure.of(index, exc)
    except OSError as exc:
        if isinstance(part, FramePartition):
            raise
        return Failure(index, "TableError", _unseen(part, exc.strerror or _first_line(exc)))


def _unseen(part: ParquetRowGroup | ArrowBatches | WholeSource, reason: str) -> str:
    try:
        from distributed import get_worker

        where = f" ({get_worker().address})"
    except (ImportError, ValueError):
        where = ""
    return (f"{part.name or part.path}: a Dask worker{where} cannot open {part.path} "
            f"({reason.lower()}); every worker must see the table at this absolute path (a "
            "shared filesystem, or the same copy on each machine), or use the local engine")


def merge_guarded(merge: Callable[..., T], left: T | Failure, right: T | Failure, *extra: Any
                  ) -> T | Failure:
    """Merge two adjacent results; the leftmost Failure wins (it comes first in row order)."""
    if isinstance(left, Failure):
        return left
    if isinstance(right, Failure):
        return right
    try:
        return merge(left, right, *extra)
    except GateError as exc:
        return Failure.of(-1, exc)


def partition_distinct(part: Partition, names: list[str], table: str) -> dict[str, set[str]]:
    """Levels pass over one partition."""
    return distinct_values(_PartitionSource(part, table), names)


def partition_gram(part: Partition, plan: DesignPlan, chunk_rows: int
                   ) -> tuple[CentredGram, RowCounts]:
    """Main pass over one partition: the same chunks and merge order as the local engine."""
    gram = CentredGram.empty(len(plan.layout))
    counts = RowCounts()
    chunks = iter(part.tables(plan.read_columns, chunk_rows))
    for chunk in chunks:
        try:
            values, weights, chunk_counts = encode_block(
                plan, chunk, first_row=part.first_row + counts.read)
        except InfiniteValuesError as exc:
            # Read on to the partition's end, as the local engine does to the table's end; the
            # client adds the later partitions' counts.
            total = exc.count + sum(count_infinite(rest, exc.column) for rest in chunks)
            raise exc.with_total(total) from None
        gram = gram.merge(CentredGram.from_block(values, weights, overwrite=True))
        counts = counts.add(chunk_counts)
    return gram, counts


def partition_infinite(part: Partition, column: str, columns: Sequence[str], chunk_rows: int
                       ) -> int:
    """Number of infinite values of ``column`` in one partition (error path only)."""
    return sum(count_infinite(chunk, column) for chunk in part.tables(columns, chunk_rows))


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


def merge_distinct(left: dict[str, set[str]], right: dict[str, set[str]], table: str = ""
                   ) -> dict[str, set[str]]:
    # The level limit is applied once, after the pass, by gate.design.plan.plan_design (as for
    # the local engine); a column past the absolute ceiling stops growing, as the local pass.
    return {name: left[name] | right[name] if len(left[name]) <= MAX_LEVELS_CEILING
            else left[name] for name in left}


def _on_frame(function: Callable[..., T], index: int, frame: Any, name: str, *args: Any
              ) -> T | Failure:
    return run_guarded(function, index, FramePartition(frame, name), *args)


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


# --- the scheduler address ------------------------------------------------------------------------

def scheduler_address(text: str) -> str:
    """``text`` if it reads as a scheduler address ([SCHEME://]HOST:PORT), else a TableError."""
    scheme, separator, rest = text.partition("://")
    if not separator:
        scheme, rest = "tcp", text
    match = _HOST_PORT.match(rest)
    if scheme not in ADDRESS_SCHEMES or match is None or not 0 < int(match["port"]) < 65536:
        raise TableError(f"scheduler address '{_shown(text)}' is not SCHEME://HOST:PORT; give "
                         "the address the scheduler prints, e.g. --scheduler tcp://10.0.0.5:8786")
    return text


def _shown(text: str, limit: int = 200) -> str:
    """``text`` for a one-line message: control characters escaped, at most ``limit`` long."""
    cut = text if len(text) <= limit else text[:limit] + "…"
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in cut)


# --- the engine ---------------------------------------------------------------------------------

class DaskEngine:
    """Runs the gate's passes on a Dask cluster.

    Parameters
    ----------
    scheduler : a scheduler address ("tcp://host:8786"), a ``distributed.Client``, or None for
        the current client if there is one, else a local cluster of ``LOCAL_WORKERS`` worker
        processes (one thread each) started here and closed on exit.
    timeout : seconds to wait for a scheduler given by address, then for its first worker
        (default ``SCHEDULER_TIMEOUT_S``); past either, a TableError.
    """

    def __init__(self, scheduler: Any = None, *, timeout: float = SCHEDULER_TIMEOUT_S) -> None:
        if isinstance(scheduler, str):
            scheduler_address(scheduler)
        self._scheduler = scheduler
        self._timeout = timeout
        self._client: Any = None
        self._owned: list[Any] = []
        self._futures: list[Any] = []

    def __enter__(self) -> Self:
        try:
            from distributed import Client, LocalCluster
        except ImportError:
            raise TableError("the Dask engine needs dask and distributed: "
                             "pip install 'collinearity-gate[dask]'") from None
        scheduler = self._scheduler
        if scheduler is not None and not isinstance(scheduler, str):
            self._client = scheduler  # a Client the caller owns
            self._require_gate_on_workers("the Client's cluster")
            return self
        if scheduler is None:
            try:
                from distributed import get_client

                self._client = get_client()
                self._require_gate_on_workers("the current Dask client's cluster")
                return self
            except ValueError:
                # No dashboard, its HTTP server on a free port (not 8787, which may be taken),
                # and no log lines from the workers on the user's terminal: failures reach the
                # user as the one-line errors of the Failure route, or as exceptions.
                cluster = LocalCluster(  # type: ignore[no-untyped-call]
                    n_workers=LOCAL_WORKERS, threads_per_worker=1, processes=True,
                    dashboard_address=":0", scheduler_kwargs={"dashboard": False},
                    silence_logs=logging.CRITICAL)
                self._owned.append(cluster)
                try:
                    self._client = Client(cluster)  # type: ignore[no-untyped-call]
                except BaseException:
                    self.__exit__(None, None, None)
                    raise
                self._owned.insert(0, self._client)
                return self
        shown, seconds = _shown(scheduler), f"{self._timeout:g}"
        try:
            self._client = Client(scheduler,  # type: ignore[no-untyped-call]
                                  timeout=f"{self._timeout}s")
        except OSError:
            raise TableError(f"cannot reach the Dask scheduler at {shown} within {seconds} s; "
                             "start it (dask scheduler) or fix --scheduler") from None
        self._owned.insert(0, self._client)
        try:
            self._client.wait_for_workers(1, timeout=self._timeout)
        except TimeoutError:
            self.__exit__(None, None, None)
            raise TableError(f"the Dask scheduler at {shown} has no worker after {seconds} s; "
                             f"start one (dask worker {shown})") from None
        self._require_gate_on_workers(f"the Dask scheduler at {shown}")
        return self

    def _require_gate_on_workers(self, where: str) -> None:
        """TableError unless every worker imports gate. A worker that cannot unpickle a task
        (its functions live in gate) drops its connection, and the check would then wait for
        ever for a worker that never answers (seen with an external `dask worker` whose
        environment lacked gate). ``pydoc.locate`` is a standard-library function the worker
        can run: None when the module is missing, an error when importing it fails."""
        import pydoc

        try:
            found = self.client.run(pydoc.locate, "gate.stats.dask.run_guarded")
        except Exception as exc:  # noqa: BLE001 - a broken install on a worker, said in one line
            self.__exit__(None, None, None)
            raise TableError(f"{where}: a worker cannot import gate ({_shown(_first_line(exc))}); "
                             "install collinearity-gate in every worker's environment"
                             ) from None
        missing = sorted(str(worker) for worker, value in found.items() if value is None)
        if missing:
            self.__exit__(None, None, None)
            raise TableError(f"{where}: {len(missing)} worker{'s' if len(missing) > 1 else ''} "
                             f"cannot import gate (first: {_shown(missing[0])}); install "
                             "collinearity-gate in every worker's environment")

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        if self._futures and self._client is not None:
            # After a failure the other partitions' tasks may still run; cancel them so that
            # closing the cluster does not wait for (or kill) busy workers.
            self._client.cancel(self._futures)
        self._futures.clear()
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
        parts = self._partitions(source)
        futures = self._map(source, parts, partition_distinct, names, source.name)
        return self._settled(self._tree(futures, merge_distinct, source.name))

    def main_pass(self, source: TableSource, plan: DesignPlan, *, chunk_rows: int | None = None,
                  progress: ProgressFactory | None = None) -> tuple[CentredGram, RowCounts]:
        parts = self._partitions(source)
        rows = plan.chunk_rows(chunk_rows)
        futures = self._map(source, parts, partition_gram, plan, rows)
        if progress:
            self._report(futures, progress("reading rows", source.row_count),
                         lambda result: result[1].read)
        if not futures:
            return CentredGram.empty(len(plan.layout)), RowCounts()
        result = self._tree(futures, merge_grams)
        if isinstance(result, Failure) and result.infinite is not None and result.index >= 0:
            result = self._whole_table_count(source, parts, result, plan.read_columns, rows)
        return self._settled(result)

    def exact_pass(self, source: TableSource, plan: DesignPlan, selection: tuple[int, ...],
                   exact: ExactPassPlan, *, chunk_rows: int | None = None,
                   progress: ProgressFactory | None = None) -> TriangularFactor:
        parts = self._partitions(source)
        futures = self._map(source, parts, partition_factor, plan, selection, exact,
                            plan.chunk_rows(chunk_rows))
        if not futures:
            return exact.empty_factor()
        return self._settled(self._tree(futures, merge_factors))

    # Plumbing ----------------------------------------------------------------------------------

    def _partitions(self, source: TableSource) -> list[Any]:
        if isinstance(source, DaskFrameSource):
            return source.partitions()
        if not isinstance(source, (ParquetSource, CsvSource, ArrowSource)):
            raise TableError(f"{source.name}: the Dask engine reads table files or dask "
                             "DataFrames; for an in-memory table use the local engine")
        return list(path_partitions(source.path, source.name))

    def _map(self, source: TableSource, parts: list[Any], function: Callable[..., T],
             *args: Any, start: int = 0) -> list[Any]:
        """One guarded task per partition from ``start`` on (futures of ``T | Failure``)."""
        client = self.client
        if isinstance(source, DaskFrameSource):
            # Each delayed partition becomes a future; the worker holding it runs the statistics
            # on it, so only the p x p results travel.
            frames = client.compute(parts[start:])
            futures = [client.submit(_on_frame, function, start + i, frame, source.name, *args,
                                     pure=False) for i, frame in enumerate(frames)]
            self._futures += [*frames, *futures]
            return futures
        futures = [client.submit(run_guarded, function, start + i, part, *args, pure=False)
                   for i, part in enumerate(parts[start:])]
        self._futures += futures
        return futures

    def _tree(self, futures: list[Any], merge: Callable[..., T], *extra: Any) -> T | Failure:
        """Merge adjacent results pairwise, level by level, as tasks on the cluster."""
        if not futures:
            return None  # type: ignore[return-value]
        level = list(futures)
        while len(level) > 1:
            merged = [self.client.submit(merge_guarded, merge, level[i], level[i + 1], *extra,
                                         pure=False)
                      for i in range(0, len(level) - 1, 2)]
            self._futures += merged
            if len(level) % 2:
                merged.append(level[-1])
            level = merged
        return level[0].result()  # type: ignore[no-any-return]

    def _whole_table_count(self, source: TableSource, parts: list[Any], failure: Failure,
                           columns: Sequence[str], chunk_rows: int) -> Failure:
        """Infinite values: restate the first failing partition's count for the whole table
        (the later partitions are counted on the workers), as the local engine reads on."""
        assert failure.infinite is not None
        table, column, count, first, last = failure.infinite
        futures = self._map(source, parts, partition_infinite, column, columns, chunk_rows,
                            start=failure.index + 1)
        rest = self._tree(futures, operator.add) if futures else 0
        if isinstance(rest, Failure):
            return rest
        return Failure(failure.index, failure.kind, failure.message,
                       (table, column, count + rest, first, last))

    @staticmethod
    def _settled(result: T | Failure) -> T:
        if isinstance(result, Failure):
            raise result.error()
        return result

    @staticmethod
    def _report(futures: list[Any], counter: Any, rows_of: Callable[[Any], int]) -> None:
        from distributed import as_completed

        try:
            for future in as_completed(futures):  # type: ignore[no-untyped-call]
                result = future.result()
                counter.advance(0 if isinstance(result, Failure) else rows_of(result))
        finally:
            counter.finish()
