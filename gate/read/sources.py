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
import importlib
import os
import stat
from collections.abc import Collection, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal, Protocol

import pyarrow as pa

from gate.errors import TableError, shown
from gate.read.digest import file_sha256


class _OnFirstUse:
    """A module imported on first attribute access. pyarrow.compute costs about a tenth of a
    second to import and a table of float64 columns never needs it (issue 12); every stage imports it from here."""

    def __init__(self, name: str) -> None:
        self._name = name

    def __getattr__(self, attribute: str) -> Any:
        return getattr(importlib.import_module(self._name), attribute)


if TYPE_CHECKING:
    import pyarrow.compute as _compute

    pc = _compute
else:
    pc = _OnFirstUse("pyarrow.compute")


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
#: URL schemes of database sources (gate/read/sql.py): never opened as file paths.
DATABASE_SCHEMES = ("duckdb", "postgresql", "postgres")
SUFFIXES = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".feather": "arrow",
            ".arrow": "arrow", ".ipc": "arrow"}
#: Integers beyond +-2**53 may have no exact float64; the gate computes in float64.
EXACT_INTEGER_LIMIT = 1 << 53


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


def require_unique_names(names: Sequence[str], where: str) -> None:
    """Refuse a table whose columns do not have distinct names (a column would be ambiguous)."""
    seen: set[str] = set()
    for name in names:
        if name in seen:
            count = sum(1 for other in names if other == name)
            raise TableError(f"{where}: the column name '{shown(name)}' appears {count} times; "
                             "rename the duplicates so that every column name is unique")
        seen.add(name)


def exact_floats(table: pa.Table, where: str, first_row: int | None = None) -> pa.Table:
    """64-bit integer columns holding values beyond +-2**53, as float64 when every value
    converts exactly; otherwise TableError naming the first value that float64 would round.

    The gate computes in float64. Rounding an integer near 2**64 moves it by up to 2,048, which
    can swamp the spread of an id- or nanosecond-like column, so an inexact value is refused
    rather than rounded silently. Smaller integers convert exactly downstream. ``first_row``
    numbers the rows in the message (None: ``where`` already says where the chunk starts).
    """
    for index, field in enumerate(table.schema):
        if field.type not in (pa.int64(), pa.uint64()):
            continue
        column = table.column(index)
        bounds = pc.min_max(column)
        low, high = bounds["min"].as_py(), bounds["max"].as_py()
        if low is None or (-EXACT_INTEGER_LIMIT <= low and high <= EXACT_INTEGER_LIMIT):
            continue
        floats = pc.cast(column, pa.float64(), safe=False)
        top = 2.0 ** (64 if field.type == pa.uint64() else 63)
        in_range = pc.less(pc.abs(floats), pa.scalar(top))  # 2**64-1 rounds up to 2**64
        back = pc.cast(pc.if_else(in_range, floats, pa.scalar(0.0)), field.type, safe=False)
        exact = pc.fill_null(pc.and_(in_range, pc.equal(back, column)), True)
        bad = pc.index(exact, False).as_py()
        if bad >= 0:
            row = f"row {first_row + bad + 1:,}" if first_row is not None else \
                f"row {bad + 1:,} of the chunk"
            raise TableError(
                f"{where}: column '{shown(field.name)}' holds the integer {column[bad].as_py()} "
                f"({row}), which float64 cannot hold exactly (integers beyond 2^53 = "
                "9,007,199,254,740,992 are rounded) and the gate computes in float64; subtract "
                "a common offset (e.g. the column's minimum) or exclude the column")
        table = table.set_column(index, field.name, floats)
    return table


def regular_file_or_folder(path: Path, what: str) -> os.stat_result:
    """stat ``path`` without opening it; refuse FIFOs, devices and sockets (reading one would
    block or never end) and name the problem in one line."""
    try:
        info = path.stat()
    except FileNotFoundError:
        raise TableError(f"{path}: {what} not found; check the path") from None
    except PermissionError:
        raise TableError(f"{path}: permission denied; make the {what} readable by this user"
                         ) from None
    except OSError as exc:
        raise TableError(f"{path}: cannot read the {what} ({exc.strerror or exc})") from None
    if not (stat.S_ISREG(info.st_mode) or stat.S_ISDIR(info.st_mode)):
        raise TableError(f"{path}: not a regular file or folder (a FIFO, device or socket); "
                         f"write the {what} to a regular file and pass that")
    return info


def _parquet_files(folder: Path) -> list[Path]:
    """The .parquet files under ``folder``, sorted; refuses unreadable sub-folders and special
    files instead of skipping them silently."""

    def refuse(exc: OSError) -> None:
        where = exc.filename or folder
        if isinstance(exc, PermissionError):
            raise TableError(f"{where}: permission denied while listing the Parquet folder; "
                             "make it readable (and searchable) by this user") from None
        raise TableError(f"{where}: cannot list the Parquet folder ({exc.strerror or exc})"
                         ) from None

    files: list[Path] = []
    for root, _dirs, names in os.walk(folder, onerror=refuse):
        for name in names:
            if name.endswith(".parquet"):
                file = Path(root) / name
                info = regular_file_or_folder(file, "Parquet file")
                if not stat.S_ISREG(info.st_mode):
                    raise TableError(f"{file}: not a regular file; remove it from the folder")
                files.append(file)
    return sorted(files)


def _hash_files(paths: Sequence[Path], root: Path | None = None) -> str:
    """sha256 of a file's bytes; for a folder, of each file's relative path and hash."""
    if root is None and len(paths) == 1:
        return file_sha256(paths[0])
    outer = hashlib.sha256()
    for path in paths:
        rel = path.relative_to(root) if root is not None else path
        outer.update(f"{rel.as_posix()}\0{file_sha256(path)}\n".encode())
    return outer.hexdigest()


class ParquetSource:
    """A Parquet file, or a folder of Parquet files read in sorted order, row group by group.

    ``name`` is how messages show the table (default: ``path`` as given); the files are opened
    by absolute path (``self.path``), which is also what the Dask engine ships to workers.
    """

    def __init__(self, path: Path, name: str | None = None) -> None:
        import pyarrow.parquet as pq

        self.name = str(path) if name is None else name
        # Opened here by the path as given (a relative path works even where a parent folder
        # of the working directory cannot be searched); ``path`` and ``files`` are absolute,
        # for the Dask workers.
        self.path = path.absolute()
        self._root = path if path.is_dir() else None
        files = _parquet_files(path) if self._root else [path]
        if not files:
            raise TableError(f"{self.name}: folder holds no .parquet files; point TABLE at a "
                             "file or a folder of Parquet files")
        self._files = []
        for file in files:  # one at a time, so that an error names the bad file
            try:
                self._files.append(pq.ParquetFile(file, pre_buffer=False,
                                                  buffer_size=PARQUET_BUFFER_BYTES))
            except PermissionError:
                raise TableError(f"{self.display_path(file)}: permission denied; make the "
                                 "Parquet file readable by this user") from None
            except (pa.ArrowException, OSError) as exc:
                raise TableError(f"{self.display_path(file)}: not a readable Parquet file "
                                 f"({_first_line(exc)})") from None
        self._paths = files
        #: Each file as messages show it (under the table's display name).
        self.display_paths = [self.display_path(f) for f in files]
        schemas = {f.schema_arrow for f in self._files}
        if len(schemas) > 1:
            raise TableError(f"{self.name}: the Parquet files do not share one schema; "
                             "rewrite them with the same columns and types")
        self._schema = self._files[0].schema_arrow
        require_unique_names(self._schema.names, str(path))

    @property
    def files(self) -> list[Path]:
        """The Parquet files, by absolute path, in reading order."""
        return [f.absolute() for f in self._paths]

    def display_path(self, file: Path) -> str:
        """A file of this table (absolute path) as messages show it."""
        if self._root is None:
            return self.name
        root = self._root.absolute() if file.is_absolute() else self._root
        return str(Path(self.name) / file.relative_to(root))

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
        for file, label in zip(self._files, self.display_paths):
            for group in range(file.metadata.num_row_groups):
                yield from row_group_chunks(file, group, columns, chunk_rows, label)


def row_group_chunks(file: Any, group: int, columns: Sequence[str], chunk_rows: int,
                     path: Path | str) -> Iterator[pa.Table]:
    """One Parquet row group in chunks of at most ``chunk_rows`` rows: read whole when small
    (or wide: see STREAM_BYTES_PER_COLUMN), else streamed in batches so that a huge row group
    never sits in memory."""
    meta = file.metadata
    share = len(columns) / max(meta.num_columns, 1)
    size = meta.row_group(group).total_byte_size * share
    first = sum(meta.row_group(g).num_rows for g in range(group))
    try:
        if size <= max(WHOLE_ROW_GROUP_BYTES, len(columns) * STREAM_BYTES_PER_COLUMN):
            table = file.read_row_group(group, columns=list(columns), use_threads=True)
            for start in range(0, table.num_rows, chunk_rows):
                yield exact_floats(table.slice(start, chunk_rows), str(path), first + start)
            return
        for batch in file.iter_batches(batch_size=chunk_rows, row_groups=[group],
                                       columns=list(columns), use_threads=True):
            yield exact_floats(pa.Table.from_batches([batch]), str(path), first)
            first += batch.num_rows
    except (pa.ArrowException, OSError) as exc:
        raise TableError(f"{path}: row group {group} unreadable ({_first_line(exc)})") from None


class _SingleFileSource:
    """Shared by CSV and Arrow IPC sources: one file, schema known, row count unknown."""

    name: str
    _path: Path
    _schema: pa.Schema

    @property
    def path(self) -> Path:
        """The file by absolute path (messages show ``name``)."""
        return self._path.absolute()

    @property
    def columns(self) -> tuple[Column, ...]:
        return _schema_columns(self._schema)

    @property
    def row_count(self) -> None:
        return None

    def sha256(self) -> str:
        return file_sha256(self._path)


#: What pyarrow's CSV reader converts to float64 (spaces and tabs around the number allowed;
#: checked against the reader itself in tests/test_hostile_tables.py). Its default null
#: markers ("", NA, NaN, null, ...) are read as missing before this applies.
NUMBER_PATTERN = (r"^[ \t]*[+-]?(?:(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?"
                  r"|[iI][nN][fF](?:[iI][nN][iI][tT][yY])?|[nN][aA][nN])[ \t]*$")
#: A header that is one field holding one of these was most likely split on the wrong character.
SUSPECT_DELIMITERS = {";": "';'", "\t": "tab", "|": "'|'"}
#: Bytes read to infer the CSV column types (pyarrow's first block).
CSV_INFERENCE_BYTES = 1 << 20


def csv_delimiter_char(value: str) -> str:
    """The one-character field delimiter a user asked for ('tab' or '\\t' for a tab)."""
    char = "\t" if value in ("tab", "\\t", "TAB") else value
    if len(char) != 1 or not char.isascii() or char in '\n\r"':
        raise TableError(f"--csv-delimiter '{shown(value)}': give one ASCII character other than "
                         "a quote or line break, e.g. ';' or '|', or 'tab'")
    return char


class _NumbersAndText:
    """Where each CSV column read as text first holds a number and first holds text (1-based
    data rows, the header not counted), over the blocks fed so far."""

    def __init__(self) -> None:
        self.first_number: dict[str, tuple[int, str]] = {}
        self.first_text: dict[str, tuple[int, str]] = {}

    def feed(self, name: str, array: pa.Array | pa.ChunkedArray, first_row: int) -> None:
        if name in self.first_number and name in self.first_text:
            return
        if not (pa.types.is_string(array.type) or pa.types.is_large_string(array.type)):
            return
        number = pc.match_substring_regex(array, NUMBER_PATTERN)
        for wanted, found in ((True, self.first_number), (False, self.first_text)):
            if name not in found:
                at = pc.index(number, wanted).as_py()
                if at >= 0:
                    found[name] = (first_row + at + 1, str(array[at].as_py()))

    def mixed(self, name: str) -> bool:
        return name in self.first_number and name in self.first_text

    def error(self, path: Path, name: str) -> TableError:
        text_row, text = self.first_text[name]
        number_row, number = self.first_number[name]
        return TableError(
            f"{path}: column '{shown(name)}' mixes numbers and text: data row {text_row:,} "
            f"holds '{shown(text)}', data row {number_row:,} holds the number '{shown(number)}'; "
            f"correct the value, or list '{shown(name)}' under columns.categorical to read "
            "every value as a level")


def _not_utf8(path: Path, where: str) -> TableError:
    return TableError(f"{path}: not UTF-8 text ({where}); convert it first, e.g. from Latin-1: "
                      f"iconv -f latin1 -t utf-8 '{shown(path)}' > converted.csv")


class CsvSource(_SingleFileSource):
    """A CSV file read in blocks by pyarrow's streaming reader.

    Column types hold for the whole file, wherever a value sits: a column is numeric when its
    values read as numbers over the whole file. Types come from the first block; integers and
    all-empty columns become float64, and a column empty in the first block is typed by reading
    it through. A column typed numeric that later holds text, or typed text that also holds
    numbers, is refused (naming the row and value) when it is read, unless it is listed in
    ``categorical``: those are always read as text.
    """

    def __init__(self, path: Path, name: str | None = None, *, delimiter: str | None = None,
                 categorical: Collection[str] = ()) -> None:
        import pyarrow.csv as pacsv

        self.name = str(path) if name is None else name
        self._path = path  # opened as given; ``path`` (absolute) is what Dask workers open
        self._csv = pacsv
        self._delimiter = delimiter
        self._check_encoding()
        try:
            with self._open(CSV_INFERENCE_BYTES, None) as reader:
                inferred = reader.schema
        except (pa.ArrowException, OSError) as exc:
            raise TableError(f"{path}: not a readable CSV file ({_first_line(exc)})") from None
        require_unique_names(inferred.names, str(path))
        self._refuse_one_field_header(inferred)
        binary = [f.name for f in inferred if pa.types.is_binary(f.type)]
        if binary:
            raise _not_utf8(path, f"column '{shown(binary[0])}'")
        text = set(categorical)
        self._text = frozenset(f.name for f in inferred if f.name in text)
        self._verified: set[str] = set()
        fields = []
        empty = []
        for f in inferred:
            if f.name in text:
                fields.append(pa.field(f.name, pa.string()))
            elif pa.types.is_integer(f.type):
                fields.append(pa.field(f.name, pa.float64()))
            elif pa.types.is_null(f.type):
                empty.append(f.name)
                fields.append(pa.field(f.name, pa.string()))
            else:
                fields.append(f)
        self._schema = pa.schema(fields)
        if empty:
            self._type_empty_columns(empty)

    def _check_encoding(self) -> None:
        with self._path.open("rb") as handle:
            head = handle.read(CSV_INFERENCE_BYTES)
        if head.startswith((b"\xff\xfe", b"\xfe\xff")):
            raise TableError(f"{self._path}: UTF-16 text, not UTF-8; convert it first: "
                             f"iconv -f utf-16 -t utf-8 '{shown(self._path)}' > converted.csv")
        header = head.split(b"\n", 1)[0]
        try:
            header.decode("utf-8")
        except UnicodeDecodeError as exc:
            if exc.start < len(header) - 3:  # not just a character cut at the block's end
                raise _not_utf8(self._path, f"byte 0x{header[exc.start]:02x} in the header"
                                ) from None

    def _refuse_one_field_header(self, schema: pa.Schema) -> None:
        if self._delimiter is not None or len(schema) != 1:
            return
        name = schema.names[0]
        for char, label in SUSPECT_DELIMITERS.items():
            if char in name:
                flag = "tab" if char == "\t" else char
                raise TableError(
                    f"{self._path}: the header is one field, '{shown(name)}', holding {label}; "
                    f"the file looks {label}-separated: pass --csv-delimiter '{flag}' "
                    f"(Python: csv_delimiter='{shown(char)}')")

    def _type_empty_columns(self, names: list[str]) -> None:
        """Columns empty in the first block: numeric unless they hold text further down."""
        seen = _NumbersAndText()
        row = 0
        for batch in self._batches(names, CSV_INFERENCE_BYTES * 4):
            for name in names:
                seen.feed(name, batch.column(name), row)
            row += batch.num_rows
            if all(n in seen.first_text for n in names):
                break
        self._schema = pa.schema([
            pa.field(f.name, pa.float64()) if f.name in names and f.name not in seen.first_text
            else f for f in self._schema])

    def _open(self, block_size: int, columns: Sequence[str] | None,
              types: dict[str, pa.DataType] | None = None) -> Any:
        convert = self._csv.ConvertOptions(strings_can_be_null=True)
        if columns is not None:
            convert = self._csv.ConvertOptions(
                include_columns=list(columns), strings_can_be_null=True,
                column_types=types or {c: self._schema.field(c).type for c in columns})
        parse = self._csv.ParseOptions(delimiter=self._delimiter or ",")
        return self._csv.open_csv(self._path, read_options=self._csv.ReadOptions(
            block_size=block_size), parse_options=parse, convert_options=convert)

    def _batches(self, names: Sequence[str], block_size: int) -> Iterator[pa.RecordBatch]:
        """The named columns as text, block by block (typing and error paths)."""
        try:
            with self._open(block_size, names, {n: pa.string() for n in names}) as reader:
                yield from reader
        except pa.ArrowInvalid as exc:
            raise self._conversion_error(exc) from None

    def _conversion_error(self, exc: pa.ArrowInvalid) -> TableError:
        detail = _first_line(exc)
        if "UTF8" in detail or "UTF-8" in detail:
            return _not_utf8(self._path, "a value past the first rows")
        return TableError(f"{self._path}: unreadable CSV ({shown(detail)}); check the quoting "
                          "and that every row has the header's number of fields")

    def chunks(self, columns: Sequence[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
               ) -> Iterator[pa.Table]:
        # Bytes per block from the row target: about 16 bytes a value is typical for CSV.
        block_size = max(1 << 16, min(1 << 28, chunk_rows * 16 * max(len(self._schema), 1)))
        watch = [c for c in columns if c not in self._text and c not in self._verified
                 and pa.types.is_string(self._schema.field(c).type)]
        seen = _NumbersAndText()
        row = 0
        try:
            with self._open(block_size, columns) as reader:
                for batch in reader:
                    for name in watch:
                        seen.feed(name, batch.column(name), row)
                        if seen.mixed(name):
                            raise seen.error(self._path, name)
                    row += batch.num_rows
                    yield pa.Table.from_batches([batch])
        except pa.ArrowInvalid as exc:
            raise self._locate_bad_value(columns, exc) from None
        self._verified.update(watch)  # read through: no need to look at them again

    def _locate_bad_value(self, columns: Sequence[str], exc: pa.ArrowInvalid) -> TableError:
        """A block failed to convert: find the first value (row, column) that is not a number
        in a column typed numeric, reading those columns again as text."""
        numeric = [c for c in columns if pa.types.is_floating(self._schema.field(c).type)]
        if numeric and "UTF8" not in _first_line(exc):
            seen = _NumbersAndText()
            row = 0
            for batch in self._batches(numeric, 1 << 22):
                for name in numeric:
                    seen.feed(name, batch.column(name), row)
                    if seen.mixed(name):
                        return seen.error(self._path, name)
                row += batch.num_rows
            for name in numeric:
                if name in seen.first_text:  # text in a column with no number at all
                    text_row, text = seen.first_text[name]
                    return TableError(
                        f"{self._path}: column '{shown(name)}' holds '{shown(text)}' in data "
                        f"row {text_row:,}, where numbers were expected; correct the value, or "
                        f"list '{shown(name)}' under columns.categorical")
        detail = _first_line(exc)
        if "UTF8" in detail:
            return _not_utf8(self._path, "a value past the first rows")
        return TableError(f"{self._path}: a value does not match its column's type "
                          f"({shown(detail)}); clean the file or exclude the column")


class ArrowSource(_SingleFileSource):
    """An Arrow IPC file (Feather v2) or stream, memory-mapped and read batch by batch."""

    def __init__(self, path: Path, name: str | None = None) -> None:
        self.name = str(path) if name is None else name
        self._path = path  # opened as given; ``path`` (absolute) is what Dask workers open
        try:
            with pa.memory_map(str(self._path)) as source:
                self._schema = self._reader(source).schema
        except (pa.ArrowException, OSError) as exc:
            raise TableError(f"{self.name}: not a readable Arrow IPC/Feather file "
                             f"({_first_line(exc)})") from None
        require_unique_names(self._schema.names, str(path))

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
            first = 0
            for batch in batches:
                table = pa.Table.from_batches([batch]).select(list(columns))
                for start in range(0, max(table.num_rows, 1), chunk_rows):
                    yield exact_floats(table.slice(start, chunk_rows), self.name, first + start)
                first += table.num_rows


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
            yield exact_floats(table.slice(start, chunk_rows), self.name, start)


class DaskFrameSource:
    """A dask DataFrame: read partition by partition (no dask import here; duck-typed).

    The Dask engine (``gate.stats.dask``) computes each partition's statistics on the
    workers; :meth:`chunks` (partitions computed one at a time in this process) is the
    fallback that keeps this a plain :class:`TableSource`.
    """

    def __init__(self, frame: Any, name: str = "<dask DataFrame>") -> None:
        self.name = name
        self.frame = frame
        require_unique_names([str(c) for c in frame.columns], name)
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
    require_unique_names([str(c) for c in frame.columns], name)
    try:
        table = pa.Table.from_pandas(frame, preserve_index=False)
    except (pa.ArrowException, TypeError, ValueError) as exc:
        raise TableError(f"{name}: cannot convert the DataFrame ({_first_line(exc)}); "
                         "give each column one type") from None
    return ArrowTableSource(table, name)


def open_table(table: Any, *, csv_delimiter: str | None = None,
               categorical: Collection[str] = ()) -> TableSource:
    """A path (str/Path), a pandas DataFrame, a pyarrow Table, or a TableSource.

    ``csv_delimiter`` (CSV files only): the field delimiter, one character or 'tab'.
    ``categorical``: columns the policy declares categorical; a CSV reads them as text.
    """
    if isinstance(table, str) and table.split(":", 1)[0].lower() in DATABASE_SCHEMES:
        raise TableError(f"{table.split(':', 1)[0]}:// is a database: say what to read with "
                         "gate.sql(url, query=...) or gate.sql(url, table=...) (CLI: --query "
                         "or --db-table)")
    if isinstance(table, (str, Path)):
        return open_path(Path(table), csv_delimiter=csv_delimiter, categorical=categorical)
    if csv_delimiter is not None:
        raise TableError("csv_delimiter applies to CSV files only; drop it for a "
                         f"{type(table).__name__}")
    if isinstance(table, pa.Table):
        require_unique_names(table.schema.names, "<pyarrow.Table>")
        return ArrowTableSource(table, "<pyarrow.Table>")
    if type(table).__module__.startswith("pandas") and hasattr(table, "columns"):
        return from_dataframe(table)
    if type(table).__module__.startswith("dask") and hasattr(table, "to_delayed"):
        return DaskFrameSource(table)
    if hasattr(table, "chunks") and hasattr(table, "columns"):
        return table  # type: ignore[no-any-return]  # e.g. gate.sql(...) (gate/read/sql.py)
    raise TableError(f"cannot read a {type(table).__name__} as a table; pass a file path, "
                     "a pandas DataFrame, a pyarrow Table or a dask DataFrame")


def open_path(path: Path, name: str | None = None, *, csv_delimiter: str | None = None,
              categorical: Collection[str] = ()) -> TableSource:
    """A table file or Parquet folder. Messages call it ``name`` (default: ``path`` as given);
    it is opened by absolute path, so a later change of working directory, or a Dask worker
    started elsewhere, reads the same file."""
    label = str(path) if name is None else name
    info = regular_file_or_folder(path, "table file")
    if stat.S_ISDIR(info.st_mode) and path.suffix == ".gate":
        raise TableError(f"{label}: is an output folder of `gate check-files` (<file>.gate), "
                         "not a table; pass the table file itself")
    kind = "parquet" if stat.S_ISDIR(info.st_mode) else SUFFIXES.get(path.suffix.lower())
    if csv_delimiter is not None and kind != "csv":
        raise TableError(f"{label}: --csv-delimiter applies to .csv tables only; drop it")
    if kind == "parquet":
        return ParquetSource(path, label)
    if kind == "csv":
        delimiter = None if csv_delimiter is None else csv_delimiter_char(csv_delimiter)
        return CsvSource(path, label, delimiter=delimiter, categorical=categorical)
    if kind == "arrow":
        return ArrowSource(path, label)
    raise TableError(f"{label}: unknown table format '{shown(path.suffix)}'; use .parquet, .csv, "
                     ".feather or .arrow")


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
