"""Where the site's records come from: a CSV file, a Parquet file, or a SQL database, read in chunks.

Every source yields :class:`pyarrow.RecordBatch` chunks of at most ``chunk_rows`` records holding exactly
the columns asked for, so the memory the agent needs does not grow with the number of records:

- CSV: pyarrow's streaming reader (blocks of a few MiB), every cell read as text so that the mapping
  decides what a code means; the first line is the header; UTF-8, comma-separated.
- Parquet: pyarrow's batch iterator over the file's row groups, reading only the mapped columns.
- SQL: a SQLAlchemy URL (``sqlite:///path.db`` or ``postgresql+psycopg://user@host/db``) with either a table
  name or one read-only ``SELECT``. The connection itself is opened read-only (SQLite ``mode=ro`` and
  ``query_only``; PostgreSQL ``default_transaction_read_only``) and rows are fetched through a server-side
  cursor in partitions of ``chunk_rows``. The agent never writes to the source.

Errors are :class:`DataValidationError` with one line naming the source and the rule broken. Messages from
pyarrow or a database driver are never passed on, because they can quote a record's value.
"""

from __future__ import annotations

import csv
import re
import sqlite3
from collections.abc import Collection, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import quote

import pyarrow as pa
import pyarrow.csv as pv
import pyarrow.parquet as pq

from federation.protocol import DataValidationError

DEFAULT_CHUNK_ROWS = 200_000
CSV_BLOCK_BYTES = 8 * 1024 * 1024
CSV_SUFFIXES = (".csv", ".txt")
PARQUET_SUFFIXES = (".parquet", ".pq")
SQL_BACKENDS = ("sqlite", "postgresql")
_TABLE_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,62}(\.[A-Za-z_][A-Za-z0-9_]{0,62})?$")


@dataclass(frozen=True)
class SourceSpec:
    """One place records are read from: ``path`` (CSV or Parquet), or ``url`` with ``table`` or ``query``."""

    path: Path | None = None
    url: str | None = None
    table: str | None = None
    query: str | None = None

    def __post_init__(self) -> None:
        if (self.path is None) == (self.url is None):
            raise DataValidationError("data: give either a file path or a database URL, not both or neither")
        if self.url is not None and (self.table is None) == (self.query is None):
            raise DataValidationError("data: a database URL needs exactly one of table or query")
        if self.path is not None and (self.table is not None or self.query is not None):
            raise DataValidationError("data: table and query apply only to a database URL")

    @property
    def kind(self) -> str:
        if self.url is not None:
            return "sql"
        suffix = Path(self.path).suffix.lower()  # type: ignore[arg-type]
        return "parquet" if suffix in PARQUET_SUFFIXES else "csv"

    def describe(self) -> str:
        """How messages name this source (a database password is never shown)."""
        if self.path is not None:
            return str(self.path)
        url = _safe_url(self.url or "")
        return f"{url} table {self.table}" if self.table else f"{url} query"


def read_chunks(
    spec: SourceSpec,
    columns: Sequence[str] | None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    numeric: Collection[str] = (),
    missing: Collection[str] = (),
) -> Iterator[pa.RecordBatch]:
    """Yield record batches of at most ``chunk_rows`` rows holding ``columns`` (``None`` = every column).

    ``numeric`` names CSV columns that hold plain numbers (no codes): they are parsed as numbers while
    reading, with the text spellings in ``missing`` read as missing; every other CSV cell is read as text.
    """
    if chunk_rows < 1:
        raise DataValidationError("chunk size must be at least one record")
    if spec.kind == "sql":
        yield from _sql_chunks(spec, columns, chunk_rows)
    elif spec.kind == "parquet":
        yield from _parquet_chunks(Path(spec.path), columns, chunk_rows)  # type: ignore[arg-type]
    else:
        yield from _csv_chunks(Path(spec.path), columns, chunk_rows, numeric, missing)  # type: ignore[arg-type]


# --- CSV ------------------------------------------------------------------------------------------------


def csv_header(path: Path) -> list[str]:
    """The header's column names; raises for files that are not usable comma-separated UTF-8 text."""
    source = str(path)
    try:
        with open(path, "rb") as handle:
            head = handle.read(65536)
    except FileNotFoundError:
        raise DataValidationError(f"{source}: data file not found") from None
    except IsADirectoryError:
        raise DataValidationError(f"{source}: is a folder, not a data file") from None
    except PermissionError:
        raise DataValidationError(f"{source}: no permission to read the data file") from None
    if not head.strip():
        raise DataValidationError(f"{source}: the file is empty")
    try:
        header_line = head.decode("utf-8-sig").splitlines()[0]
    except UnicodeDecodeError:
        # The first 64 KiB may end inside a multi-byte character: decode only the first line.
        first = head.split(b"\n", 1)[0]
        try:
            header_line = first.decode("utf-8-sig")
        except UnicodeDecodeError:
            raise DataValidationError(f"{source}: not UTF-8 text (re-export the file as UTF-8)") from None
    header = [name.strip() for name in next(csv.reader([header_line]))]
    if len(header) == 1 and any(sep in header_line for sep in (";", "\t", "|")):
        raise DataValidationError(f"{source}: the header has one column; the file must be comma-separated")
    repeated = repeated_columns(header)
    if repeated:
        raise DataValidationError(f"{source}: the header names {repeated}; column names must be unique")
    return header


def repeated_columns(names: Sequence[str], among: Collection[str] | None = None) -> str:
    """Each column name that occurs more than once in ``names`` (only those in ``among``, when given), with
    its positions counted from 1: ``"column 'age' twice (columns 2 and 5)"``; empty when none repeats.

    A column's name is the export's header, not a record's value: naming it tells site IT what to fix, and
    the line stays at the site (a data refusal travels as its category alone).
    """
    positions: dict[str, list[int]] = {}
    for number, name in enumerate(names, start=1):
        if among is None or name in among:
            positions.setdefault(name, []).append(number)
    repeated = [(name, found) for name, found in positions.items() if len(found) > 1]
    parts = [
        f"column {name!r}{' (no name)' if not name else ''} {_times(len(found))} (columns {_and(found)})"
        for name, found in repeated[:5]
    ]
    if len(repeated) > 5:
        parts.append(f"{len(repeated) - 5} more names more than once")
    return "; ".join(parts)


def absent_columns(wanted: Sequence[str], names: Collection[str], place: str) -> str:
    """``"column 'age' named in the mapping is not in PLACE"`` for every wanted column missing from ``names``;
    empty when none is missing."""
    absent = [c for c in wanted if c not in names]
    if not absent:
        return ""
    if len(absent) == 1:
        return f"column {absent[0]!r} named in the mapping is not in {place}"
    return f"columns {_and([repr(c) for c in absent])} named in the mapping are not in {place}"


def _times(count: int) -> str:
    return "twice" if count == 2 else f"{count} times"


def _and(items: Sequence[object]) -> str:
    words = [str(item) for item in items]
    return words[0] if len(words) == 1 else f"{', '.join(words[:-1])} and {words[-1]}"


def _csv_chunks(
    path: Path, columns: Sequence[str] | None, chunk_rows: int, numeric: Collection[str], missing: Collection[str]
) -> Iterator[pa.RecordBatch]:
    source = str(path)
    header = csv_header(path)
    wanted = list(header if columns is None else columns)
    absent = absent_columns(wanted, header, "the file's header")
    if absent:
        raise DataValidationError(f"{source}: {absent}")
    try:
        reader = pv.open_csv(
            path,
            read_options=pv.ReadOptions(block_size=CSV_BLOCK_BYTES, column_names=header, skip_rows=1),
            parse_options=pv.ParseOptions(delimiter=","),
            convert_options=pv.ConvertOptions(
                include_columns=wanted,
                column_types={c: pa.float64() if c in numeric else pa.string() for c in wanted},
                null_values=sorted(set(missing) | {""}),
                strings_can_be_null=False,
                quoted_strings_can_be_null=False,
            ),
        )
        rows = 0
        while True:
            try:
                batch = reader.read_next_batch()
            except StopIteration:
                break
            rows += batch.num_rows
            yield from _slices(batch, chunk_rows)
    except (pa.ArrowInvalid, pa.ArrowTypeError, UnicodeDecodeError) as exc:
        raise DataValidationError(f"{source}: {_csv_problem(exc, header)}") from None
    if rows == 0:
        raise DataValidationError(f"{source}: the file has a header but no records")


def _csv_problem(exc: Exception, header: list[str]) -> str:
    """Name what is wrong with a CSV file from pyarrow's error, without repeating the error (it quotes rows)."""
    text = str(exc)
    if isinstance(exc, UnicodeDecodeError) or "UTF8" in text or "UTF-8" in text:
        return "not UTF-8 text (re-export the file as UTF-8)"
    number = re.match(r"In CSV column #(\d+): CSV conversion error to double", text)
    if number and int(number.group(1)) < len(header):
        return (
            f"column {header[int(number.group(1))]!r} holds text that is not a number; map the codes in the "
            "mapping file or fix the data"
        )
    if "Expected" in text and "columns" in text:
        return "malformed CSV: a row has a different number of fields than the header (row not shown)"
    return "malformed CSV (unbalanced quotes or an unreadable row; row not shown)"


def _slices(batch: pa.RecordBatch, chunk_rows: int) -> Iterator[pa.RecordBatch]:
    for offset in range(0, batch.num_rows, chunk_rows):
        yield batch.slice(offset, chunk_rows)


# --- Parquet --------------------------------------------------------------------------------------------


def _parquet_chunks(path: Path, columns: Sequence[str] | None, chunk_rows: int) -> Iterator[pa.RecordBatch]:
    source = str(path)
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        raise DataValidationError(f"{source}: data file not found") from None
    if path.is_dir():
        raise DataValidationError(f"{source}: is a folder, not a data file")
    if size == 0:
        raise DataValidationError(f"{source}: the file is empty")
    try:
        parquet = pq.ParquetFile(path)
    except (pa.ArrowInvalid, OSError):
        raise DataValidationError(f"{source}: not a readable Parquet file") from None
    names = parquet.schema_arrow.names
    wanted = list(names if columns is None else columns)
    # a Parquet file may name two columns alike; reading one of them would hand over both
    repeated = repeated_columns(names, among=wanted)
    if repeated:
        raise DataValidationError(f"{source}: the file names {repeated}; the columns the mapping reads must be unique")
    absent = absent_columns(wanted, names, "the file")
    if absent:
        raise DataValidationError(f"{source}: {absent}")
    if parquet.metadata.num_rows == 0:
        raise DataValidationError(f"{source}: the file has columns but no records")
    try:
        yield from parquet.iter_batches(batch_size=chunk_rows, columns=wanted)
    except (pa.ArrowInvalid, OSError):
        raise DataValidationError(f"{source}: a part of the Parquet file cannot be read (damaged file?)") from None


# --- SQL ------------------------------------------------------------------------------------------------

# Statement words that change data, schema, sessions or transactions. A query holding any of them outside
# a string literal, a quoted identifier or a comment is refused before it reaches the database; the
# read-only connection is the second line of defence.
_WRITE_WORDS = frozenset(
    """insert update delete merge upsert create drop alter truncate grant revoke copy call execute exec do lock
    vacuum reindex refresh cluster attach detach pragma into begin commit rollback savepoint release prepare
    deallocate listen notify load import set reset""".split()
)
_SQL_TOKEN = re.compile(
    r"""(?P<space>\s+)
    |(?P<line_comment>--[^\n]*)
    |(?P<block_comment>/\*.*?\*/)
    |(?P<string>'(?:[^']|'')*')
    |(?P<quoted>"(?:[^"]|"")*")
    |(?P<dollar>\$[A-Za-z_0-9]*\$)
    |(?P<word>[A-Za-z_][A-Za-z0-9_$]*)
    |(?P<semicolon>;)
    |(?P<other>.)""",
    re.S | re.X,
)


def check_select(query: str, where: str = "query") -> str:
    """Return ``query`` (without a trailing ``;``) if it is one read-only SELECT; raise otherwise.

    The check is lexical: the first word must be SELECT or WITH, there must be a single statement, and no
    word that writes or changes the session (INSERT, UPDATE, DELETE, INTO, CREATE, SET, ...) may appear
    outside literals, quoted identifiers and comments. Dollar-quoted text is refused because it can hide a
    statement. The connection is also opened read-only, which catches what a lexical check cannot (a
    function that writes).
    """
    if not isinstance(query, str) or not query.strip():
        raise DataValidationError(f"{where}: the query is empty")
    if len(query) > 100_000:
        raise DataValidationError(f"{where}: the query is longer than 100,000 characters")
    words: list[str] = []
    statements = 1
    trailing = False
    position = 0
    for match in _SQL_TOKEN.finditer(query):
        if match.start() != position:
            break
        position = match.end()
        kind = match.lastgroup
        if kind in ("space", "line_comment", "block_comment"):
            continue
        if kind == "dollar":
            raise DataValidationError(f"{where}: dollar-quoted text is not allowed in the query")
        if trailing:
            statements += 1
            trailing = False
        if kind == "semicolon":
            trailing = True
            continue
        if kind == "word":
            words.append(match.group().lower())
    if position != len(query) or query.count("/*") != query.count("*/"):
        raise DataValidationError(f"{where}: unterminated quote or comment in the query")
    if statements > 1:
        raise DataValidationError(f"{where}: must be a single statement (no ';' between statements)")
    if not words or words[0] not in ("select", "with"):
        raise DataValidationError(f"{where}: must be a read-only SELECT (or WITH ... SELECT) statement")
    forbidden = sorted(set(words) & _WRITE_WORDS)
    if forbidden:
        raise DataValidationError(
            f"{where}: must be a read-only SELECT; it contains {forbidden[0].upper()}, which can change data"
        )
    return query.strip().rstrip(";").rstrip()


def _safe_url(url: str) -> str:
    try:
        from sqlalchemy.engine import make_url

        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # an unparseable URL: show its scheme only
        return url.split("://", 1)[0] + "://..."


def _engine(spec: SourceSpec) -> Any:
    """A SQLAlchemy engine whose connections are read-only; raises for URLs we do not support."""
    import sqlalchemy
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError

    where = _safe_url(spec.url or "")
    try:
        url = make_url(spec.url or "")
    except (ArgumentError, ValueError):
        raise DataValidationError(f"data url: not a valid SQLAlchemy URL ({where})") from None
    backend = url.get_backend_name()
    if backend not in SQL_BACKENDS:
        raise DataValidationError(f"{where}: database type {backend!r} is not supported (use sqlite or postgresql)")
    if backend == "sqlite":
        database = url.database
        if not database or database == ":memory:" or database.startswith("file:"):
            raise DataValidationError(f"{where}: give the SQLite database file, e.g. sqlite:///records.db")
        path = Path(database)
        if not path.is_file():
            raise DataValidationError(f"{where}: cannot connect (SQLite database file not found)")
        target = f"file:{quote(str(path.resolve()))}?mode=ro"

        def connect() -> sqlite3.Connection:
            connection = sqlite3.connect(target, uri=True, check_same_thread=False)
            connection.execute("PRAGMA query_only = ON")
            return connection

        return sqlalchemy.create_engine("sqlite://", creator=connect, poolclass=sqlalchemy.pool.NullPool)
    if url.get_driver_name() not in ("psycopg", "psycopg2", ""):
        raise DataValidationError(f"{where}: use the psycopg driver (postgresql+psycopg://...)")
    url = url.set(drivername="postgresql+psycopg")
    return sqlalchemy.create_engine(
        url,
        poolclass=sqlalchemy.pool.NullPool,
        connect_args={"options": "-c default_transaction_read_only=on", "connect_timeout": 10},
    )


def _connection_problem(exc: Exception) -> str:
    """A short, value-free reason a connection failed (the driver's text is not passed on)."""
    text = str(getattr(exc, "orig", exc)).lower()
    for needle, reason in (
        ("password authentication failed", "authentication failed"),
        ("no password supplied", "authentication failed (no password given)"),
        ("role", "the database user does not exist or may not log in"),
        ("does not exist", "the database does not exist"),
        ("refused", "connection refused (is the server running and listening there?)"),
        ("timeout", "connection timed out"),
        ("timed out", "connection timed out"),
        ("translate host name", "unknown host name"),
        ("name or service not known", "unknown host name"),
        ("unable to open database file", "the SQLite database file cannot be opened"),
    ):
        if needle in text:
            return reason
    return f"{type(getattr(exc, 'orig', exc)).__name__}"


def _query_problem(exc: Exception) -> str:
    """A short, value-free reason a query failed: SQLSTATE class for PostgreSQL, the kind of error for SQLite."""
    orig = getattr(exc, "orig", exc)
    state = getattr(orig, "sqlstate", None) or ""
    by_state = {
        "42P01": "the table does not exist",
        "42703": "a column the query names does not exist",
        "42601": "the query has a syntax error",
        "42501": "the database user may not read this table",
        "25006": "the query tried to write, and the connection is read-only",
        "57014": "the query was cancelled (statement timeout)",
    }
    if state in by_state:
        return by_state[state]
    text = str(orig).lower()
    for needle, reason in (
        ("no such table", "the table does not exist"),
        ("no such column", "a column the query names does not exist"),
        ("syntax error", "the query has a syntax error"),
        ("readonly", "the query tried to write, and the connection is read-only"),
        ("read-only", "the query tried to write, and the connection is read-only"),
    ):
        if needle in text:
            return reason
    return f"the database refused the query ({type(orig).__name__}{', SQLSTATE ' + state if state else ''})"


def _sql_chunks(spec: SourceSpec, columns: Sequence[str] | None, chunk_rows: int) -> Iterator[pa.RecordBatch]:
    import sqlalchemy
    from sqlalchemy.exc import DBAPIError, NoSuchTableError, SQLAlchemyError

    where = spec.describe()
    query = check_select(spec.query, f"{where}: query") if spec.query is not None else None
    if query is None and not _TABLE_NAME.match(spec.table or ""):
        raise DataValidationError(f"{where}: table must be a name of letters, digits and _ (optionally schema.table)")
    engine = _engine(spec)
    try:
        connection = engine.connect()
    except (DBAPIError, SQLAlchemyError, OSError) as exc:
        engine.dispose()
        raise DataValidationError(f"{where}: cannot connect ({_connection_problem(exc)})") from None
    rows = 0
    try:
        streaming = connection.execution_options(stream_results=True, max_row_buffer=min(chunk_rows, 10_000))
        if query is not None:
            # Sent without bind parameters; psycopg still reads '%' as a placeholder, so it is doubled.
            sent = query.replace("%", "%%") if engine.dialect.name == "postgresql" else query
            result = streaming.exec_driver_sql(sent, ())
        else:
            schema, _, name = (spec.table or "").rpartition(".")
            try:
                present = [c["name"] for c in sqlalchemy.inspect(connection).get_columns(name, schema=schema or None)]
            except NoSuchTableError:
                raise DataValidationError(f"{where}: the table does not exist") from None
            if not present:
                raise DataValidationError(f"{where}: the table does not exist or has no columns")
            wanted = list(present if columns is None else columns)
            absent = absent_columns(wanted, present, "the table")
            if absent:
                raise DataValidationError(f"{where}: {absent}")
            statement = sqlalchemy.select(*[sqlalchemy.column(c) for c in wanted]).select_from(
                sqlalchemy.table(name, schema=schema or None)
            )
            result = streaming.execute(statement)
        keys = list(result.keys())
        wanted = list(keys if columns is None else columns)
        repeated = repeated_columns(keys)
        if repeated:
            raise DataValidationError(f"{where}: the query returns {repeated}; name columns uniquely")
        absent = absent_columns(wanted, keys, "the query result")
        if absent:
            raise DataValidationError(f"{where}: {absent}")
        positions = [keys.index(c) for c in wanted]
        for partition in result.partitions(chunk_rows):
            rows += len(partition)
            columns_of_rows = list(zip(*partition, strict=True))
            arrays = [_arrow_column(columns_of_rows[i]) for i in positions]
            yield pa.RecordBatch.from_arrays(arrays, names=wanted)
    except (DBAPIError, SQLAlchemyError) as exc:
        raise DataValidationError(f"{where}: {_query_problem(exc)}") from None
    finally:
        connection.close()
        engine.dispose()
    if rows == 0:
        raise DataValidationError(f"{where}: returned no records")


def _arrow_column(values: Sequence[Any]) -> pa.Array:
    """One result column as an Arrow array; a column of mixed types (possible in SQLite) becomes text."""
    try:
        return pa.array(values)
    except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError):
        return pa.array([None if v is None else _as_text(v) for v in values], type=pa.string())


def _as_text(value: Any) -> str:
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="replace")
    return str(value)


def arrow_text(column: pa.Array | pa.ChunkedArray) -> pa.Array:
    """A column as trimmed text with nulls kept: how mapping codes and outcome values are compared.

    Integers and integral floats read as whole numbers (``1``, not ``1.0``), booleans as ``1``/``0``, and a
    floating NaN as a missing value, so a code means the same in a CSV, a Parquet file and a database.
    """
    import pyarrow.compute as pc

    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    kind = column.type
    if pa.types.is_dictionary(kind):
        column = column.dictionary_decode()
        kind = column.type
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return pc.utf8_trim_whitespace(column).cast(pa.string())
    if pa.types.is_null(kind):
        return pa.nulls(len(column), pa.string())
    if pa.types.is_boolean(kind):
        column = pc.cast(column, pa.int8())
    elif pa.types.is_decimal(kind):
        column = pc.cast(column, pa.float64())
    if pa.types.is_floating(column.type):
        column = pc.if_else(pc.is_nan(column), pa.scalar(None, column.type), column)
    try:
        return pc.utf8_trim_whitespace(pc.cast(column, pa.string()))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        raise DataValidationError(f"a column of type {kind} cannot be read as text or numbers") from None
