"""Reading feature tables: Parquet (file or folder), CSV, Arrow IPC/Feather, or a DataFrame.

Every source yields pyarrow tables in chunks of rows, so nothing downstream depends on the
file format and memory stays bounded by the chunk size. Parquet is read one row group at a time,
and within a row group in batches of ``chunk_rows`` through a buffered stream without
pre-buffering: pyarrow's defaults (``pre_buffer=True``, unbuffered column chunks) hold a whole
row group's column chunks in memory -- about the file size for one-row-group files; measured on
1M x 100 (one 800 MB row group): 1.7 GB peak reading the row group whole, 1.3 GB with
``iter_batches`` and the defaults, 0.52 GB with ``pre_buffer=False, buffer_size=256 KiB``, at
the same speed. pandas is imported only when a DataFrame is passed in. No column logic lives
here.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal, Protocol

import pyarrow as pa

from gate.errors import TableError

ColumnKind = Literal["numeric", "boolean", "categorical", "datetime", "other"]
DEFAULT_CHUNK_ROWS = 65_536
#: Read-buffer per column chunk when streaming Parquet (see the module docstring).
PARQUET_BUFFER_BYTES = 1 << 18
#: A row group up to this size (uncompressed, selected columns) is read whole, with pyarrow's
#: threads; a larger one is streamed in batches. 256 MiB: reading whole decodes the columns in
#: parallel, and a 200,000 x 100 row group (160 MB) read whole took 4.8 s against 11.1 s
#: streamed in 65,536-row batches (machine heavily loaded; same process, alternating). Row
#: groups of 1Mi rows x 50 (420 MB; the 600 MB peak target) are still streamed.
WHOLE_ROW_GROUP_BYTES = 256 << 20
#: Streaming holds about one read buffer and one decoded page per column, so a wide row group
#: up to this much per column is cheaper read whole. Measured on 20,000 x 2,000 (one 395 MB row
#: group): streamed in 4,194-row batches 1.7 GB peak and 2.1 s; read whole 0.6 GB and 0.34 s.
STREAM_BYTES_PER_COLUMN = 1 << 20
SUFFIXES = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".feather": "arrow",
            ".arrow": "arrow", ".ipc": "arrow"}


@dataclass(frozen=True)
class Column:
    name: str
    kind: ColumnKind
    type: str


def column_kind(dtype: pa.DataType) -> ColumnKind:
    if pa.types.is_boolean(dtype):
        return "boolean"
    if pa.types.is_integer(dtype) or pa.types.is_floating(dtype) or pa.types.is_decimal(dtype) \
            or pa.types.is_null(dtype):
        return "numeric"
    if pa.types.is_string(dtype) or pa.types.is_large_string(dtype) \
            or pa.types.is_dictionary(dtype) or pa.types.is_string_view(dtype):
        return "categorical"
    if pa.types.is_temporal(dtype):
        return "datetime"
    return "other"


class TableSource(Protocol):
    """Something the gate can read in chunks; re-iterable (the exact pass reads it again)."""

    name: str

    @property
    def columns(self) -> tuple[Column, ...]: ...

    @property
    def row_count(self) -> int | None: ...

    def sha256(self) -> str | None: ...

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]: ...


def _schema_columns(schema: pa.Schema) -> tuple[Column, ...]:
    return tuple(Column(f.name, column_kind(f.type), str(f.type)) for f in schema)


def _hash_files(paths: Sequence[Path], root: Path | None = None) -> str:
    """sha256 of a file's bytes; for a folder, of each file's relative path and hash."""
    if root is None and len(paths) == 1:
        return _hash_file(paths[0])
    outer = hashlib.sha256()
    for path in paths:
        rel = path.relative_to(root) if root is not None else path
        outer.update(f"{rel.as_posix()}\0{_hash_file(path)}\n".encode())
    return outer.hexdigest()


def _hash_file(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        while block := handle.read(1 << 22):
            digest.update(block)
    return digest.hexdigest()


class ParquetSource:
    """A Parquet file, or a folder of Parquet files read in sorted order, row group by group."""

    def __init__(self, path: Path) -> None:
        import pyarrow.parquet as pq

        self.name = str(path)
        self._root = path if path.is_dir() else None
        files = sorted(path.rglob("*.parquet")) if path.is_dir() else [path]
        if not files:
            raise TableError(f"{path}: folder holds no .parquet files; point TABLE at a file "
                             "or a folder of Parquet files")
        try:
            self._files = [pq.ParquetFile(f, pre_buffer=False, buffer_size=PARQUET_BUFFER_BYTES)
                           for f in files]
        except (pa.ArrowException, OSError) as exc:
            raise TableError(f"{path}: not a readable Parquet file ({_first_line(exc)})") from None
        self._paths = files
        schemas = {f.schema_arrow for f in self._files}
        if len(schemas) > 1:
            raise TableError(f"{path}: the Parquet files do not share one schema; "
                             "rewrite them with the same columns and types")
        self._schema = self._files[0].schema_arrow

    @property
    def columns(self) -> tuple[Column, ...]:
        return _schema_columns(self._schema)

    @property
    def row_count(self) -> int:
        return sum(f.metadata.num_rows for f in self._files)

    def sha256(self) -> str:
        return _hash_files(self._paths, self._root)

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]:
        for file, path in zip(self._files, self._paths):
            for group in range(file.metadata.num_row_groups):
                yield from row_group_chunks(file, group, columns, chunk_rows, path)


def row_group_chunks(file: Any, group: int, columns: Sequence[str], chunk_rows: int,
                     path: Path | str) -> Iterator[pa.Table]:
    """One Parquet row group in chunks of at most ``chunk_rows`` rows: read whole when small
    (or wide: see STREAM_BYTES_PER_COLUMN), else streamed in batches so that a huge row group
    never sits in memory."""
    meta = file.metadata
    share = len(columns) / max(meta.num_columns, 1)
    size = meta.row_group(group).total_byte_size * share
    try:
        if size <= max(WHOLE_ROW_GROUP_BYTES, len(columns) * STREAM_BYTES_PER_COLUMN):
            table = file.read_row_group(group, columns=list(columns), use_threads=True)
            for start in range(0, table.num_rows, chunk_rows):
                yield table.slice(start, chunk_rows)
            return
        for batch in file.iter_batches(batch_size=chunk_rows, row_groups=[group],
                                       columns=list(columns), use_threads=True):
            yield pa.Table.from_batches([batch])
    except (pa.ArrowException, OSError) as exc:
        raise TableError(f"{path}: row group {group} unreadable ({_first_line(exc)})") from None


class _SingleFileSource:
    """Shared by CSV and Arrow IPC sources: one file, schema known, row count unknown."""

    _path: Path
    _schema: pa.Schema

    @property
    def columns(self) -> tuple[Column, ...]:
        return _schema_columns(self._schema)

    @property
    def row_count(self) -> None:
        return None

    def sha256(self) -> str:
        return _hash_file(self._path)


class CsvSource(_SingleFileSource):
    """A CSV file read in blocks by pyarrow's streaming reader."""

    def __init__(self, path: Path) -> None:
        import pyarrow.csv as pacsv

        self.name = str(path)
        self._path = path
        self._csv = pacsv
        try:
            with self._open(1 << 20, None) as reader:
                inferred = reader.schema
        except (pa.ArrowException, OSError) as exc:
            raise TableError(f"{path}: not a readable CSV file ({_first_line(exc)})") from None
        # Types come from the first block; widen integers (and all-empty columns) to float so a
        # later block with decimals or blanks does not break the stream.
        self._schema = pa.schema([
            pa.field(f.name, pa.float64()) if pa.types.is_integer(f.type)
            or pa.types.is_null(f.type) else f for f in inferred
        ])

    def _open(self, block_size: int, columns: Sequence[str] | None) -> Any:
        convert = self._csv.ConvertOptions(strings_can_be_null=True)
        if columns is not None:
            convert = self._csv.ConvertOptions(
                include_columns=list(columns), strings_can_be_null=True,
                column_types={c: self._schema.field(c).type for c in columns})
        return self._csv.open_csv(self._path, read_options=self._csv.ReadOptions(
            block_size=block_size), convert_options=convert)

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]:
        # Bytes per block from the row target: about 16 bytes a value is typical for CSV.
        block_size = max(1 << 16, min(1 << 28, chunk_rows * 16 * max(len(self._schema), 1)))
        try:
            with self._open(block_size, columns) as reader:
                for batch in reader:
                    yield pa.Table.from_batches([batch])
        except pa.ArrowInvalid as exc:
            raise TableError(f"{self._path}: a value does not match its column's type "
                             f"({_first_line(exc)}); clean the file or exclude the column"
                             ) from None


class ArrowSource(_SingleFileSource):
    """An Arrow IPC file (Feather v2) or stream, memory-mapped and read batch by batch."""

    def __init__(self, path: Path) -> None:
        self.name = str(path)
        self._path = path
        try:
            with pa.memory_map(str(path)) as source:
                self._schema = self._reader(source).schema
        except (pa.ArrowException, OSError) as exc:
            raise TableError(f"{path}: not a readable Arrow IPC/Feather file "
                             f"({_first_line(exc)})") from None

    @staticmethod
    def _reader(source: Any) -> Any:
        try:
            return pa.ipc.open_file(source)
        except pa.ArrowInvalid:
            source.seek(0)
            return pa.ipc.open_stream(source)

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]:
        with pa.memory_map(str(self._path)) as source:
            reader = self._reader(source)
            batches = (reader.get_batch(i) for i in range(reader.num_record_batches)) \
                if hasattr(reader, "num_record_batches") else iter(reader)
            for batch in batches:
                table = pa.Table.from_batches([batch]).select(list(columns))
                for start in range(0, max(table.num_rows, 1), chunk_rows):
                    yield table.slice(start, chunk_rows)


class ArrowTableSource:
    """An in-memory pyarrow Table (also what a pandas DataFrame becomes)."""

    def __init__(self, table: pa.Table, name: str = "<DataFrame>") -> None:
        self.name = name
        self._table = table

    @property
    def columns(self) -> tuple[Column, ...]:
        return _schema_columns(self._table.schema)

    @property
    def row_count(self) -> int:
        return int(self._table.num_rows)

    def sha256(self) -> None:
        return None

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]:
        table = self._table.select(list(columns))
        for start in range(0, max(table.num_rows, 1), chunk_rows):
            yield table.slice(start, chunk_rows)


class DaskFrameSource:
    """A dask DataFrame: read partition by partition (no dask import here; duck-typed).

    The Dask engine (``gate.stats.dask``) computes each partition's statistics on the
    workers; :meth:`chunks` (partitions computed one at a time in this process) is the
    fallback that keeps this a plain :class:`TableSource`.
    """

    def __init__(self, frame: Any, name: str = "<dask DataFrame>") -> None:
        self.name = name
        self.frame = frame
        try:
            self._schema = pa.Schema.from_pandas(frame._meta, preserve_index=False)
        except (pa.ArrowException, TypeError, ValueError) as exc:
            raise TableError(f"{name}: cannot read the dask DataFrame's column types "
                             f"({_first_line(exc)}); give each column one type") from None

    @property
    def columns(self) -> tuple[Column, ...]:
        return _schema_columns(self._schema)

    @property
    def row_count(self) -> None:
        return None  # counting would compute the whole frame

    def sha256(self) -> None:
        return None

    def partitions(self) -> list[Any]:
        """One delayed pandas DataFrame per partition."""
        return list(self.frame.to_delayed())

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]:
        for part in self.partitions():
            yield from from_dataframe(part.compute(), self.name).chunks(columns, chunk_rows)


def from_dataframe(frame: Any, name: str = "<DataFrame>") -> ArrowTableSource:
    """A pandas DataFrame as a source. Object columns of strings become categorical."""
    try:
        table = pa.Table.from_pandas(frame, preserve_index=False)
    except (pa.ArrowException, TypeError, ValueError) as exc:
        raise TableError(f"{name}: cannot convert the DataFrame ({_first_line(exc)}); "
                         "give each column one type") from None
    return ArrowTableSource(table, name)


def open_table(table: Any) -> TableSource:
    """A path (str/Path), a pandas DataFrame, a pyarrow Table, or a TableSource."""
    if isinstance(table, (str, Path)):
        return open_path(Path(table))
    if isinstance(table, pa.Table):
        return ArrowTableSource(table, "<pyarrow.Table>")
    if type(table).__module__.startswith("pandas") and hasattr(table, "columns"):
        return from_dataframe(table)
    if type(table).__module__.startswith("dask") and hasattr(table, "to_delayed"):
        return DaskFrameSource(table)
    if hasattr(table, "chunks") and hasattr(table, "columns"):
        return table  # type: ignore[no-any-return]
    raise TableError(f"cannot read a {type(table).__name__} as a table; pass a file path, "
                     "a pandas DataFrame, a pyarrow Table or a dask DataFrame")


def open_path(path: Path) -> TableSource:
    if not path.exists():
        raise TableError(f"{path}: table file not found; check the path")
    if path.is_dir():
        return ParquetSource(path)
    kind = SUFFIXES.get(path.suffix.lower())
    if kind == "parquet":
        return ParquetSource(path)
    if kind == "csv":
        return CsvSource(path)
    if kind == "arrow":
        return ArrowSource(path)
    raise TableError(f"{path}: unknown table format '{path.suffix}'; use .parquet, .csv, "
                     ".feather or .arrow")


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
