"""Data sources: everything the user can hand us becomes one DuckDB relation.

Files, globs, hive-partitioned directories, SQL queries, Arrow objects and data frames
are all opened as a DuckDB relation; every read afterwards is a SQL query against it
(``SELECT <model columns> FROM source WHERE <filter>``), so DuckDB does the projection,
the filtering, the casts and the SQL expressions, and Python only sees Arrow batches.
"""

from __future__ import annotations

import glob
import os
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import duckdb
import pyarrow as pa

from tallgam.errors import ColumnNotFound, DataError, nearest

SOURCE_NAME = "tallgam_source"
_PARQUET = (".parquet", ".pq", ".parq")
_CSV = (".csv", ".tsv", ".csv.gz", ".tsv.gz", ".txt")
_GLOB_CHARS = set("*?[")


def quote(name: str) -> str:
    """A column name as a quoted SQL identifier."""
    return '"' + str(name).replace('"', '""') + '"'


@dataclass(frozen=True)
class sql:  # noqa: N801 - public constructor, lower case like the other tg.* constructors
    """A SQL query as a data source: ``tg.sql("SELECT ...", database="warehouse.duckdb")``.

    ``database`` is a DuckDB database file opened read-only; ``None`` runs the query in a
    fresh in-memory DuckDB (which can still read files, e.g. ``FROM 'x/*.parquet'``).
    """

    query: str
    database: str | None = None


class Source:
    """An opened data source: a DuckDB relation plus a label for messages.

    Use :func:`open_source` to make one. ``close()`` removes any scratch file.
    """

    def __init__(self, relation, label: str, connection, scratch: str | None = None,
                 files: list[str] | None = None):
        self.relation = relation
        self.label = label
        self.connection = connection
        self.files = files
        self._scratch = scratch
        try:
            self.schema: dict[str, str] = {
                name: str(dtype) for name, dtype in zip(relation.columns, relation.dtypes)
            }
        except duckdb.Error as exc:  # unreadable files show up here, before any pass
            raise DataError(f"cannot read {label}: {exc}") from exc

    def require_columns(self, names: Sequence[str]) -> None:
        """Raise one DataError naming every missing column (with a suggestion)."""
        missing = [c for c in names if c not in self.schema]
        if missing:
            hints = "; ".join(f"{c!r}{nearest(c, self.schema)}" for c in missing)
            raise ColumnNotFound(
                f"{label_columns(missing)} not found in {self.label}: {hints}. "
                f"Available columns: {', '.join(self.schema)}"
            )

    def query(self, text: str):
        """Run SQL in which the source is called ``tallgam_source``; returns a relation."""
        try:
            return self.relation.query(SOURCE_NAME, text)
        except duckdb.Error as exc:
            raise DataError(f"query on {self.label} failed: {exc}") from exc

    def fetchall(self, text: str) -> list[tuple]:
        try:
            return self.query(text).fetchall()
        except duckdb.Error as exc:
            raise DataError(f"query on {self.label} failed: {exc}") from exc

    def batches(self, select: Sequence[str], where: str | None, batch_rows: int
                ) -> Iterator[pa.RecordBatch]:
        """Stream ``SELECT select... FROM source [WHERE where]`` in batches of exactly
        ``batch_rows`` rows (the last may be shorter). Column i of each batch is select[i]."""
        text = f"SELECT {', '.join(select)} FROM {SOURCE_NAME}"
        if where:
            text += f" WHERE {where}"
        try:
            reader = self.query(text).to_arrow_reader(batch_rows)
            yield from rebatch(reader, batch_rows)
        except duckdb.Error as exc:
            raise DataError(f"reading {self.label} failed: {exc}") from exc

    def close(self) -> None:
        if self._scratch and os.path.exists(self._scratch):
            os.remove(self._scratch)
            self._scratch = None

    def __enter__(self) -> Source:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def label_columns(names: Sequence[str]) -> str:
    return ("column " if len(names) == 1 else "columns ") + ", ".join(repr(n) for n in names)


def rebatch(reader: Iterator[pa.RecordBatch], rows: int) -> Iterator[pa.RecordBatch]:
    """Regroup a stream of Arrow batches into batches of exactly ``rows`` rows."""
    pending: list[pa.RecordBatch] = []
    have = 0
    for batch in reader:
        while batch.num_rows:
            take = min(rows - have, batch.num_rows)
            pending.append(batch.slice(0, take))
            have += take
            batch = batch.slice(take)
            if have == rows:
                yield _concat(pending)
                pending, have = [], 0
    if have:
        yield _concat(pending)


def _concat(parts: list[pa.RecordBatch]) -> pa.RecordBatch:
    if len(parts) == 1:
        return parts[0]
    return pa.Table.from_batches(parts).combine_chunks().to_batches()[0]


def expand_paths(items: Sequence[str | os.PathLike]) -> tuple[list[str], bool]:
    """Expand globs and directories into a sorted file list; True when hive-partitioned."""
    files: list[str] = []
    hive = False
    for item in items:
        text = os.fspath(item)
        if os.path.isdir(text):
            found = sorted(
                p for p in glob.glob(os.path.join(text, "**", "*"), recursive=True)
                if os.path.isfile(p) and p.lower().endswith(_PARQUET + _CSV)
            )
            if not found:
                raise DataError(f"directory {text!r} holds no Parquet or CSV files")
            hive = hive or any("=" in Path(p).parent.name for p in found)
            files.extend(found)
        elif _GLOB_CHARS & set(text):
            found = sorted(p for p in glob.glob(text, recursive=True) if os.path.isfile(p))
            if not found:
                raise DataError(f"no files match {text!r}")
            files.extend(found)
        else:
            if not os.path.exists(text):
                raise DataError(f"file {text!r} does not exist")
            files.append(text)
    return files, hive


def file_kind(files: list[str]) -> str:
    kinds = set()
    for f in files:
        low = f.lower()
        if low.endswith(_PARQUET):
            kinds.add("parquet")
        elif low.endswith(_CSV):
            kinds.add("csv")
        else:
            raise DataError(
                f"file {f!r}: unknown format; use a .parquet or .csv file, or open it with "
                "tg.sql(\"SELECT * FROM read_...('...')\")"
            )
    if len(kinds) > 1:
        raise DataError("the source mixes Parquet and CSV files; give one format at a time")
    return kinds.pop()


def _connect(threads: int | None) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    if threads:
        con.execute(f"SET threads = {int(threads)}")
    return con


def open_source(data, *, threads: int | None = None) -> Source:
    """Open any supported source as a :class:`Source`.

    ``data``: a path, glob or list of Parquet/CSV files, a directory (hive partitions
    are detected), ``tg.sql(...)``, a DuckDB relation, a pyarrow Table or
    RecordBatchReader, or a pandas/polars DataFrame. A RecordBatchReader can be read
    only once, so it is first written to a scratch Parquet file (bounded memory).
    """
    if isinstance(data, Source):
        return data
    if isinstance(data, sql):
        con = (duckdb.connect(data.database, read_only=True) if data.database
               else _connect(threads))
        try:
            rel = con.sql(data.query)
        except duckdb.Error as exc:
            raise DataError(f"the SQL source failed: {exc}") from exc
        if rel is None:
            raise DataError("the SQL source is not a query that returns rows")
        return Source(rel, "the SQL query", con)
    if isinstance(data, duckdb.DuckDBPyRelation):
        return Source(data, "the DuckDB relation", None)
    if isinstance(data, (str, os.PathLike)) or (
        isinstance(data, (list, tuple)) and data and all(
            isinstance(d, (str, os.PathLike)) for d in data)):
        items = [data] if isinstance(data, (str, os.PathLike)) else list(data)
        files, hive = expand_paths(items)
        kind = file_kind(files)
        con = _connect(threads)
        label = files[0] if len(files) == 1 else f"{len(files)} files ({files[0]}, ...)"
        try:
            if kind == "parquet":
                rel = con.read_parquet(files, hive_partitioning=hive)
            else:
                rel = con.read_csv(files, hive_partitioning=hive) if hive else con.read_csv(files)
        except duckdb.Error as exc:
            raise DataError(f"cannot read {label}: {exc}") from exc
        return Source(rel, label, con, files=files)
    if isinstance(data, pa.RecordBatchReader):
        return _spool_reader(data, threads)
    if isinstance(data, (list, tuple)):
        raise DataError("an empty list, or a list that is not all file paths, is not a source")
    table = _as_arrow(data)
    if table is None:
        raise DataError(
            f"cannot use an object of type {type(data).__name__} as data; give a path, glob, "
            "list of files, tg.sql(...), a DuckDB relation, an Arrow table or reader, "
            "or a pandas/polars DataFrame"
        )
    con = _connect(threads)
    return Source(con.from_arrow(table), f"the {type(data).__name__}", con)


def _as_arrow(data) -> pa.Table | None:
    if isinstance(data, pa.Table):
        return data
    if isinstance(data, pa.RecordBatch):
        return pa.Table.from_batches([data])
    module = type(data).__module__.split(".")[0]
    if module == "pandas":
        return pa.Table.from_pandas(data, preserve_index=False)
    if module == "polars":
        return data.to_arrow()
    if isinstance(data, dict):
        try:
            return pa.table(data)
        except (pa.ArrowInvalid, TypeError, ValueError) as exc:
            raise DataError(f"cannot read the dict of columns as a table: {exc}") from exc
    return None


def _spool_reader(reader: pa.RecordBatchReader, threads: int | None) -> Source:
    import pyarrow.parquet as pq

    fd, path = tempfile.mkstemp(prefix="tallgam-spool-", suffix=".parquet")
    os.close(fd)
    try:
        with pq.ParquetWriter(path, reader.schema) as writer:
            for batch in reader:
                writer.write_batch(batch)
    except BaseException:
        os.remove(path)
        raise
    con = _connect(threads)
    return Source(con.read_parquet(path), "the RecordBatchReader", con, scratch=path)
