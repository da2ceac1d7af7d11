"""The local engine: run the passes over a table in this process.

Each pass reads the table in chunks, encodes each chunk and folds it into a mergeable
statistic, so peak memory is one chunk plus O(p^2) whatever the number of rows. The Dask
engine (``gate.stats.dask``) offers the same three methods and runs them on a cluster.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from types import TracebackType
from typing import TYPE_CHECKING, Protocol, Self

import numpy as np
import pyarrow as pa

from gate.design.plan import (
    DesignPlan,
    EncodedBlock,
    InfiniteValuesError,
    RowCounts,
    count_infinite,
    distinct_values,
    encode_block,
    encode_rows,
)
from gate.numerics.kernels import FloatArray
from gate.read.digest import hashing
from gate.read.sources import TableSource
from gate.stats.accumulators import CentredGram, TriangularFactor
from gate.stats.routing import ExactPassPlan, exact_pass_block

if TYPE_CHECKING:
    from threadpoolctl import ThreadpoolController


class RowCounter(Protocol):
    """What the passes report progress to (``gate.stats.progress.RowProgress``)."""

    def advance(self, rows: int) -> None: ...

    def finish(self) -> None: ...


#: (label, expected rows or None) -> a counter for one pass.
ProgressFactory = Callable[[str, "int | None"], RowCounter]


class Engine(Protocol):
    """Runs the passes over a source: the local engine below, or the Dask engine."""

    def __enter__(self) -> Self: ...

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None: ...

    def distinct_values(self, source: TableSource, names: list[str]) -> dict[str, set[str]]: ...

    def main_pass(self, source: TableSource, plan: DesignPlan, *, chunk_rows: int | None = None,
                  progress: ProgressFactory | None = None) -> tuple[CentredGram, RowCounts]: ...

    def exact_pass(self, source: TableSource, plan: DesignPlan, selection: tuple[int, ...],
                   exact: ExactPassPlan, *, chunk_rows: int | None = None,
                   progress: ProgressFactory | None = None) -> TriangularFactor: ...


class LocalEngine:
    """The passes in this process (the default)."""

    def __enter__(self) -> Self:
        return self

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        return None

    def distinct_values(self, source: TableSource, names: list[str]) -> dict[str, set[str]]:
        return distinct_values(source, names)

    def main_pass(self, source: TableSource, plan: DesignPlan, *, chunk_rows: int | None = None,
                  progress: ProgressFactory | None = None) -> tuple[CentredGram, RowCounts]:
        return main_pass(source, plan, chunk_rows=chunk_rows, progress=progress)

    def exact_pass(self, source: TableSource, plan: DesignPlan, selection: tuple[int, ...],
                   exact: ExactPassPlan, *, chunk_rows: int | None = None,
                   progress: ProgressFactory | None = None) -> TriangularFactor:
        return exact_pass(source, plan, selection, exact, chunk_rows=chunk_rows,
                          progress=progress)


def main_pass(source: TableSource, plan: DesignPlan, *, chunk_rows: int | None = None,
              progress: ProgressFactory | None = None) -> tuple[CentredGram, RowCounts]:
    """Centred Gram over the accumulation layout, and the row counts."""
    running = RunningGram(len(plan.layout))
    merged: CentredGram | None = None  # the per-column scaled route, once a chunk needs it
    counts = RowCounts()
    for _, block in encoded_chunks(source, plan, plan.read_columns, chunk_rows=chunk_rows,
                                   progress=progress, reuse=True):
        if merged is None and within_plain_range(block.values, block.largest):
            with _blas_beside_hash():
                running.add(block.values, block.weights, sums=block.sums)
        else:
            # A column near the ends of the float range (squares would over- or underflow):
            # from here on, the scaled accumulator (exact power-of-two scaling per column).
            if merged is None:
                merged = running.result()
            merged = merged.merge(CentredGram.from_block(block.values, block.weights,
                                                         overwrite=True))
        counts = counts.add(block.counts)
    return (running.result() if merged is None else merged), counts


@contextmanager
def _blas_beside_hash() -> Iterator[None]:
    """One BLAS thread while the table's sha256 is computed beside the pass.

    On the 2-core benchmark machine the hash takes one core; OpenBLAS's two threads then share
    the other, and a two-thread dsyrk waits on its descheduled half: 1,000,000 x 100 took
    2.61-2.93 s with two BLAS threads and 2.08-2.62 s with one (5 alternating runs each). Once
    the hash is done, the chunks get every thread again (a 2,000-column chunk's dsyrk is twice
    as fast with two). threadpoolctl sets the limit for whichever BLAS numpy carries.
    """
    if not hashing():
        yield
        return
    with _blas_controller().limit(limits=1, user_api="blas"):
        yield


_CONTROLLER: list[ThreadpoolController] = []


def _blas_controller() -> ThreadpoolController:
    """threadpoolctl's view of the BLAS libraries loaded in this process (built once)."""
    if not _CONTROLLER:
        from threadpoolctl import ThreadpoolController

        _CONTROLLER.append(ThreadpoolController())
    return _CONTROLLER[0]


#: Magnitudes a chunk may hold for the in-place route: squares and cross-products of values
#: within 2^-400 .. 2^400 (or exact zeros) neither overflow nor underflow in float64.
PLAIN_RANGE = (2.0**-400, 2.0**400)


def within_plain_range(values: FloatArray, largest: FloatArray | None = None) -> bool:
    """Whether every nonzero value of the block lies within PLAIN_RANGE in magnitude.
    ``largest``: each column's largest magnitude if known (``EncodedBlock.largest``), else two
    column reductions of the block."""
    if values.size == 0:
        return True
    if largest is None:
        largest = np.maximum(values.max(axis=0), -values.min(axis=0))
    if not bool(np.all(largest < PLAIN_RANGE[1])):
        return False
    small = (largest > 0.0) & (largest < PLAIN_RANGE[0])
    return not bool(small.any())


class RunningGram:
    """:class:`CentredGram` accumulated IN PLACE over the chunks of one pass.

    The same statistics and the same update as ``CentredGram.from_block`` followed by
    ``CentredGram.merge`` (Chan, Golub & LeVeque 1979, weighted): each chunk is centred on its
    own mean, its cross-product Z'Z is formed into one reused p x p scratch buffer (numpy hands
    ``z.T @ z`` to BLAS dsyrk and mirrors the triangle, so it is symmetric by construction) and
    added to the running total, and so is the rank-one between-chunk term. Two p x p buffers in
    all, whatever the number of chunks: at p = 10,000 the merge route held about five 800 MB
    matrices at once. (scipy's dsyrk with beta = 1 would save the scratch buffer, but importing
    scipy.linalg costs ~0.23 s, more than a small table's whole check.)
    """

    def __init__(self, p: int) -> None:
        self._p = p
        self._rows = 0
        self._weight_sum = 0.0
        self._mean: FloatArray = np.zeros(p)
        self._total: FloatArray = np.zeros((p, p))
        self._scratch: FloatArray | None = None

    def add(self, values: FloatArray, weights: FloatArray | None, *,
            sums: FloatArray | None = None) -> None:
        """Fold in one block (n x p, finite); ``values`` is overwritten (centred). ``sums``:
        the block's column sums if already known (unweighted: the mean is then ``sums / n``,
        the same bits numpy's ``mean`` gives, without another pass over the block)."""
        n = values.shape[0]
        if weights is None:
            if n == 0:
                return
            total, rows = float(n), n
            mean = sums / n if sums is not None else values.mean(axis=0)
            centred = np.subtract(values, mean, out=values)
        else:
            total = float(weights.sum())
            if total <= 0.0:
                return
            rows = int(np.count_nonzero(weights > 0))
            mean = (weights @ values) / total
            centred = np.subtract(values, mean, out=values)
            centred *= np.sqrt(weights)[:, None]
        if self._scratch is None:
            self._scratch = np.empty((self._p, self._p))
        # C := C + Z'Z (dsyrk inside numpy: one operand is the transposed view of the other).
        self._total += np.matmul(centred.T, centred, out=self._scratch)
        if self._weight_sum > 0.0:
            combined = self._weight_sum + total
            delta = mean - self._mean
            # sqrt(w) delta on both sides: (a b) and (b a) round alike, so C stays symmetric.
            root = delta * np.sqrt(self._weight_sum * total / combined)
            self._total += np.multiply.outer(root, root, out=self._scratch)
            self._mean = self._mean + delta * (total / combined)
        else:
            self._mean = mean
        self._weight_sum += total
        self._rows += rows

    def result(self) -> CentredGram:
        """The statistics so far."""
        if self._weight_sum == 0.0:
            return CentredGram.empty(self._p)
        self._scratch = None
        return CentredGram.from_moments(self._rows, self._weight_sum, self._mean, self._total)


def encoded_chunks(source: TableSource, plan: DesignPlan, columns: Sequence[str], *,
                   chunk_rows: int | None, progress: ProgressFactory | None,
                   reuse: bool = False) -> Iterator[tuple[pa.Table, EncodedBlock]]:
    """The one main pass over the rows: each chunk (``columns``) with its encoding.

    Every main pass (whole table, or split by a segment key) reads through here, so row numbers
    in messages, the whole-table count of infinite values and the progress line are the same.
    ``reuse=True`` encodes every chunk into one buffer, so a block is valid only until the
    next one is drawn (the caller folds it in at once): no allocation and no first touch of
    fresh pages per chunk.
    """
    read = 0
    buffer = _ReusedBuffer(len(plan.layout)) if reuse else None
    with _counting(progress, "reading rows", source.row_count) as advance:
        chunks = iter(source.chunks(columns, plan.chunk_rows(chunk_rows)))
        for chunk in chunks:
            try:
                block = encode_rows(plan, chunk, first_row=read,
                                    out=None if buffer is None else buffer.rows(chunk.num_rows))
            except InfiniteValuesError as exc:
                # Read on (this column only) so the message gives the whole table's count.
                total = exc.count + sum(count_infinite(rest, exc.column) for rest in chunks)
                raise exc.with_total(total) from None
            yield chunk, block
            read += block.counts.read
            advance(block.counts.read)


def exact_pass(source: TableSource, plan: DesignPlan, selection: tuple[int, ...],
               exact: ExactPassPlan, *, chunk_rows: int | None = None,
               progress: ProgressFactory | None = None) -> TriangularFactor:
    """TSQR factor of the centred, scaled rows over the columns the Gram could not settle."""
    factor = exact.empty_factor()
    read = 0
    with _counting(progress, "exact pass", source.row_count) as advance:
        for chunk in source.chunks(plan.read_columns, plan.chunk_rows(chunk_rows)):
            values, weights, chunk_counts = encode_block(plan, chunk, first_row=read)
            read += chunk_counts.read
            block = exact_pass_block(exact, values[:, list(selection)], weights)
            factor = factor.merge(TriangularFactor.from_block(block))
            advance(chunk_counts.read)
    return factor


class _ReusedBuffer:
    """One column-major (rows x width) float buffer, grown only when a chunk is larger."""

    def __init__(self, width: int) -> None:
        self._width = width
        self._array: FloatArray = np.empty((width, 0)).T

    def rows(self, n: int) -> FloatArray:
        if n > self._array.shape[0]:
            self._array = np.empty((self._width, n)).T
        return self._array


@contextmanager
def _counting(progress: ProgressFactory | None, label: str, rows: int | None
              ) -> Iterator[Callable[[int], None]]:
    """A row counter for one pass (a no-op without progress), finished however the pass ends."""
    if progress is None:
        yield lambda _rows: None
        return
    counter = progress(label, rows)
    try:
        yield counter.advance
    finally:
        counter.finish()
