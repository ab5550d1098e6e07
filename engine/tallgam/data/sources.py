"""Data sources: everything the user can hand us becomes one DuckDB relation.

Files, globs, hive-partitioned directories, SQL queries, Arrow objects and data frames
are all opened as a DuckDB relation; every read afterwards is a SQL query against it
(``SELECT <model columns> FROM source WHERE <filter>``), so DuckDB does the projection,
the filtering, the casts and the SQL expressions, and Python only sees Arrow batches.
"""

from __future__ import annotations

import glob
import os
import warnings
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import duckdb
import pyarrow as pa

from tallgam.atomic import new_scratch_file, output_error
from tallgam.errors import (
    ColumnNotFound,
    DataError,
    OutOfMemoryError,
    TallgamWarning,
    clip,
    nearest,
    shorten,
)

SOURCE_NAME = "tallgam_source"
_PARQUET = (".parquet", ".pq", ".parq")
_CSV = (".csv", ".tsv", ".csv.gz", ".tsv.gz", ".txt")
_CSV_IN_FOLDERS = _CSV[:-1]  # a .txt file in a data folder is taken as a note, not as data
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


#: DuckDB errors about the query itself, not about a file: no file is blamed for them
_QUERY_FAULTS = (duckdb.ParserException, duckdb.BinderException, duckdb.CatalogException)


class Source:
    """An opened data source: a DuckDB relation plus a label for messages.

    Use :func:`open_source` to make one. ``close()`` removes any scratch file. For files,
    ``files`` lists them, ``kind`` is "parquet" or "csv" and ``hive`` says whether they are
    hive-partitioned; ``opener(files)`` opens some of them as the source opens them all
    (used to find the file at fault when a read fails).
    """

    def __init__(self, relation, label: str, connection, scratch: str | None = None,
                 files: list[str] | None = None, kind: str | None = None,
                 hive: bool = False, opener=None):
        self.relation = relation
        self.label = label
        self.connection = connection
        self.files = files
        self.kind = kind
        self.hive = hive
        self._opener = opener
        self._scratch = scratch
        try:
            self.schema: dict[str, str] = {
                name: str(dtype) for name, dtype in zip(relation.columns, relation.dtypes)
            }
        except duckdb.Error as exc:  # unreadable files show up here, before any pass
            raise self._failure(exc, None, "reading") from exc

    def require_columns(self, names: Sequence[str]) -> None:
        """Raise one DataError naming every missing column (with a suggestion)."""
        missing = [c for c in names if c not in self.schema]
        if missing:
            hints = "; ".join(f"{shorten(c)}{nearest(c, self.schema)}" for c in missing)
            raise ColumnNotFound(
                f"{label_columns(missing)} not found in {self.label}: {hints}. "
                f"Available columns: {clip(', '.join(self.schema), 2000)}"
            )

    def query(self, text: str):
        """Run SQL in which the source is called ``tallgam_source``; returns a relation."""
        try:
            return self.relation.query(SOURCE_NAME, text)
        except duckdb.Error as exc:
            raise self._failure(exc, None, "a query on") from exc

    def fetchall(self, text: str) -> list[tuple]:
        try:
            return self.query(text).fetchall()
        except duckdb.Error as exc:
            raise self._failure(exc, text, "reading") from exc

    def batches(self, select: Sequence[str], where: str | None, batch_rows: int
                ) -> Iterator[pa.RecordBatch]:
        """Stream ``SELECT select... FROM source [WHERE where]`` in batches of exactly
        ``batch_rows`` rows (the last may be shorter). Column i of each batch is select[i]."""
        text = f"SELECT {', '.join(select)} FROM {SOURCE_NAME}"
        if where:
            text += f" WHERE {where}"
        yield from rebatch(self.stream(text, batch_rows), batch_rows)

    def stream(self, text: str, batch_rows: int, doing: str = "reading"
               ) -> Iterator[pa.RecordBatch]:
        """Arrow batches (at most ``batch_rows`` rows) of SQL in which the source is called
        ``tallgam_source``; a DuckDB error becomes the error of :meth:`_failure` (the file
        at fault named, memory, interrupts), saying what was being done."""
        try:
            yield from self.query(text).to_arrow_reader(batch_rows)
        except (duckdb.Error, pa.ArrowException, OSError) as exc:
            # a failure while Arrow pulls DuckDB's stream arrives as Arrow's error
            raise self._failure(exc, text, doing) from exc

    def _failure(self, exc: Exception, text: str | None, doing: str) -> BaseException:
        """The error to raise for a DuckDB error: Ctrl-C stays an interrupt, running out of
        memory an :class:`OutOfMemoryError`, anything else a :class:`DataError` naming the
        file at fault when one file of several is (found by reading them one by one)."""
        if isinstance(exc, duckdb.InterruptException) or "INTERRUPT Error" in str(exc):
            return KeyboardInterrupt()
        if isinstance(exc, duckdb.OutOfMemoryException) or "Out of Memory Error" in str(exc):
            return OutOfMemoryError(
                f"DuckDB ran out of memory {doing} {self.label}: {clip(exc, 300)}. Use a "
                "smaller batch_rows or fewer threads, or free memory")
        culprit = None if isinstance(exc, _QUERY_FAULTS) else self._culprit(text)
        if culprit is not None:
            return DataError(f"{doing} {clip(culprit, 300)} (file "
                             f"{self.files.index(culprit) + 1} of the {len(self.files)} of "
                             f"the source) failed: {clip(exc)}")
        return DataError(f"{doing} {self.label} failed: {clip(exc)}")

    def _culprit(self, text: str | None) -> str | None:
        """The first of several files on which ``text`` (or a plain read) fails alone."""
        if self._opener is None or not self.files or len(self.files) < 2:
            return None
        for f in self.files:
            try:
                rel = self._opener([f])
                rel = rel.query(SOURCE_NAME, text) if text else rel
                for _ in rel.to_arrow_reader(65_536):
                    pass
            except duckdb.Error:
                return f
        return None

    def close(self) -> None:
        if self._scratch and os.path.exists(self._scratch):
            os.remove(self._scratch)
            self._scratch = None

    def __enter__(self) -> Source:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def label_columns(names: Sequence[str]) -> str:
    return ("column " if len(names) == 1 else "columns ") + ", ".join(shorten(n) for n in names)


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


def _hidden(path: str, root: str) -> bool:
    """A file under ``root`` that no reader takes as data: a name, or a folder on the way,
    starting with '.' or '_' (hidden files, Spark's _SUCCESS and _temporary, tallgam's own
    temporary files)."""
    return any(part.startswith((".", "_")) for part in Path(os.path.relpath(path, root)).parts)


def _scan_folder(folder: str) -> list[str]:
    """The data files of a folder (recursively): Parquet, or else CSV. Other files are
    skipped with a warning naming them; a folder holding both formats is refused."""
    parquet, csv, other = [], [], []
    for p in sorted(glob.glob(os.path.join(glob.escape(folder), "**", "*"), recursive=True)):
        if not os.path.isfile(p) or _hidden(p, folder):
            continue
        low = p.lower()
        (parquet if low.endswith(_PARQUET) else csv if low.endswith(_CSV_IN_FOLDERS)
         else other).append(p)
    if parquet and csv:
        raise DataError(
            f"the folder {shorten(folder)} holds Parquet files ({len(parquet)}, e.g. "
            f"{shorten(parquet[0])}) and CSV files ({len(csv)}, e.g. {shorten(csv[0])}); read "
            "one format at a time, e.g. with a glob such as 'folder/**/*.parquet'")
    found = parquet or csv
    if not found:
        extra = f" (only {_examples(other)})" if other else ""
        raise DataError(f"the folder {shorten(folder)} holds no Parquet or CSV files{extra}")
    if other:
        warnings.warn(TallgamWarning(
            f"the folder {shorten(folder)} holds {len(other)} file(s) that are not "
            f"{'Parquet' if parquet else 'CSV'} data, skipped: {_examples(other)}"),
            stacklevel=4)
    return found


def _examples(paths: list[str], n: int = 3) -> str:
    shown = ", ".join(shorten(os.path.basename(p)) for p in paths[:n])
    return shown + (f" and {len(paths) - n} more" if len(paths) > n else "")


def expand_paths(items: Sequence[str | os.PathLike]) -> tuple[list[str], bool]:
    """Expand globs and folders into a sorted file list; True when hive-partitioned."""
    files: list[str] = []
    hive = False
    for item in items:
        text = os.fspath(item)
        if os.path.isdir(text):
            found = _scan_folder(text)
            hive = hive or any("=" in Path(p).parent.name for p in found)
            files.extend(found)
        elif _GLOB_CHARS & set(text):
            found = sorted(p for p in glob.glob(text, recursive=True) if os.path.isfile(p))
            if not found:
                raise DataError(f"no files match {clip(text, 300)!r}")
            files.extend(found)
        else:
            if not os.path.exists(text):
                raise DataError(f"file {clip(text, 300)!r} does not exist")
            files.append(text)
    return files, hive


def file_kind(files: list[str]) -> str:
    """"parquet" or "csv": the one format of ``files`` (DataError when mixed or unknown)."""
    kinds: dict[str, list[str]] = {}
    for f in files:
        low = f.lower()
        if low.endswith(_PARQUET):
            kinds.setdefault("parquet", []).append(f)
        elif low.endswith(_CSV):
            kinds.setdefault("csv", []).append(f)
        else:
            raise DataError(
                f"file {shorten(f)}: unknown format; use a .parquet or .csv file, or read it "
                "through a SQL query (\"SELECT * FROM read_...('...')\": --sql on the "
                "command line, tg.sql in Python)"
            )
    if len(kinds) > 1:
        raise DataError(f"the source mixes Parquet files ({_examples(kinds['parquet'])}) and "
                        f"CSV/text files ({_examples(kinds['csv'])}); give one format at a time")
    return kinds.popitem()[0]


def connect(database: str | None = None, *, read_only: bool = False,
            threads: int | None = None) -> duckdb.DuckDBPyConnection:
    """A DuckDB connection as tallgam uses it: DuckDB's own progress display off (library
    calls print nothing), ``threads`` when given."""
    try:
        con = duckdb.connect(database or ":memory:", read_only=read_only)
    except duckdb.Error as exc:
        raise DataError(f"cannot open the DuckDB database {shorten(database)}: "
                        f"{clip(exc, 300)}") from None
    con.execute("SET enable_progress_bar = false")
    if threads:
        con.execute(f"SET threads = {int(threads)}")
    return con


_INTEGERS = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "UTINYINT", "USMALLINT", "UINTEGER")
_WIDE_INTEGERS = ("UBIGINT", "HUGEINT")


def _common_type(types: set[str]) -> tuple[str | None, bool]:
    """The type every one of ``types`` can be read as without losing its meaning, and
    whether values change kind on the way (whole numbers or decimals read as DOUBLE);
    (None, _) when there is none (numbers and text, say)."""
    if types <= set(_INTEGERS):
        return "BIGINT", False
    if types <= set(_INTEGERS + _WIDE_INTEGERS):
        return "HUGEINT", False
    numeric = set(_INTEGERS + _WIDE_INTEGERS + ("UHUGEINT", "FLOAT", "DOUBLE"))
    if all(t in numeric or t.startswith("DECIMAL") for t in types):
        return "DOUBLE", not types <= {"FLOAT", "DOUBLE"}
    if all(t == "DATE" or (t.startswith("TIMESTAMP") and "TIME ZONE" not in t) for t in types):
        return "TIMESTAMP", False
    return None, False


def _reader(con, kind: str, hive: bool, union: bool = False):
    def read(files: list[str]):
        options = {"hive_partitioning": hive} if hive else {}
        if union:
            options["union_by_name"] = True
        if kind == "parquet":
            return con.read_parquet(files, **options)
        return con.read_csv(files, **options)
    return read


def _file_types(con, files: list[str], kind: str, hive: bool) -> dict[str, dict[str, str]]:
    """Column types of every file on its own (DuckDB reads only Parquet footers; CSV files
    are sniffed), or a DataError naming the file that cannot be read."""
    reader = "read_parquet" if kind == "parquet" else "read_csv"
    option = ", hive_partitioning = true" if hive else ""
    types = {}
    for f in files:
        literal = "'" + f.replace("'", "''") + "'"
        try:
            rows = con.execute(f"DESCRIBE SELECT * FROM {reader}({literal}{option})").fetchall()
        except duckdb.Error as exc:
            raise DataError(f"cannot read {shorten(f)} (one of the {len(files)} files of the "
                            f"source): {clip(exc)}") from None
        types[f] = {row[0]: row[1] for row in rows}
    return types


def _text_content(con, f: str, column: str) -> str:
    """What a CSV file's text column holds: "empty" (DuckDB sniffs a column without values
    as text), "numbers" or "text"."""
    c = quote(column)
    filled, other = con.execute(
        f"SELECT count({c}), count(*) FILTER (WHERE {c} IS NOT NULL AND TRY_CAST({c} AS "
        "DOUBLE) IS NULL) FROM read_csv(?)", [f]).fetchall()[0]
    return "empty" if not filled else "numbers" if not other else "text"


def _unify(con, files: list[str], kind: str, hive: bool) -> dict[str, str]:
    """Check the columns and types of all files of a source before any pass: one set of
    columns (else DataError naming the files), and per column one type, or the widest
    common type (a TallgamWarning says so when values change kind), or a DataError naming
    the files and the column when no common type is sound. Returns the columns to cast."""
    per_file = _file_types(con, files, kind, hive)
    keys = {part.split("=", 1)[0] for f in files for part in Path(f).parent.parts
            if "=" in part} if hive else set()
    for f in files:  # hive keys come from the paths: DuckDB types them over all files at once
        per_file[f] = {c: t for c, t in per_file[f].items() if c not in keys}
    first = files[0]
    columns = per_file[first]
    for f in files[1:]:
        if set(per_file[f]) != set(columns):
            gone = [c for c in columns if c not in per_file[f]]
            new = [c for c in per_file[f] if c not in columns]
            what = "; ".join(x for x in (
                f"lacks {label_columns(gone)}" if gone else "",
                f"has {label_columns(new)} more" if new else "") if x)
            raise DataError(f"the files of the source do not have the same columns: "
                            f"{shorten(f)} {clip(what, 300)} compared with {shorten(first)}; "
                            "read them separately or select common columns with a SQL query "
                            "(--sql on the command line, tg.sql in Python)")
    casts: dict[str, str] = {}
    for c in columns:
        seen: dict[str, list[str]] = {}
        for f in files:
            seen.setdefault(per_file[f][c], []).append(f)
        if len(seen) == 1:
            continue
        if kind == "csv" and "VARCHAR" in seen:
            content = {f: _text_content(con, f, c) for f in seen["VARCHAR"]}
            if "text" not in content.values():  # empty: any type; numbers: DOUBLE
                del seen["VARCHAR"]
                numbers = [f for f, what in content.items() if what == "numbers"]
                if numbers:
                    seen.setdefault("DOUBLE", []).extend(numbers)
                if not seen:
                    continue
        target, changed = ((next(iter(seen)), False) if len(seen) == 1
                           else _common_type(set(seen)))
        where = "; ".join(f"{t} in {_examples(fs)}" for t, fs in sorted(seen.items()))
        if target is None:
            raise DataError(f"column {shorten(c)} has types that do not mix in the "
                            f"{len(files)} files of the source ({where}); make it one type "
                            "in every file, or read the files separately")
        casts[c] = target
        if changed:
            warnings.warn(TallgamWarning(
                f"column {shorten(c)} has different types in the {len(files)} files of the "
                f"source ({where}); read as {target} in every file"), stacklevel=4)
    return casts


def open_source(data, *, threads: int | None = None, where: str | None = None) -> Source:
    """Open any supported source as a :class:`Source`.

    ``data``: a path, glob or list of Parquet/CSV files, a directory (hive partitions
    are detected), ``tg.sql(...)``, a DuckDB relation, a pyarrow Table or
    RecordBatchReader, or a pandas/polars DataFrame. A RecordBatchReader can be read
    only once, so it is first written to a scratch Parquet file (bounded memory).
    ``where``: a SQL condition; only the rows that meet it are read (DataError naming the
    condition when DuckDB cannot apply it).
    """
    source = _opened(data, threads)
    if not where:
        return source
    try:
        relation = source.relation.filter(where)
    except duckdb.Error as exc:
        if source is not data:
            source.close()
        raise DataError(f"the filter {clip(where, 300)!r} cannot be applied to "
                        f"{source.label}: {clip(exc)}") from None
    scratch = None
    if source is not data:  # the filtered source takes over what the opened one owns
        scratch, source._scratch = source._scratch, None
    # no file list: a filtered source is not a set of whole files (cluster partitions)
    return Source(relation, f"{source.label} where {clip(where, 300)}", source.connection,
                  scratch=scratch)


def _opened(data, threads: int | None) -> Source:
    if isinstance(data, Source):
        return data
    if isinstance(data, sql):
        con = connect(data.database, read_only=True) if data.database else connect(
            threads=threads)
        try:
            rel = con.sql(data.query)
        except duckdb.Error as exc:
            raise DataError(f"the SQL source failed: {clip(exc)}") from exc
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
        con = connect(threads=threads)
        label = (clip(files[0], 300) if len(files) == 1
                 else f"{len(files)} files ({clip(files[0], 300)}, ...)")
        casts = _unify(con, files, kind, hive) if len(files) > 1 else {}
        read = _reader(con, kind, hive, union=bool(casts))

        def opener(some: list[str]):
            rel = read(some)
            if casts:
                rel = rel.project(", ".join(
                    f"CAST({quote(c)} AS {casts[c]}) AS {quote(c)}" if c in casts else quote(c)
                    for c in rel.columns))
            return rel
        try:
            rel = opener(files)
        except duckdb.Error as exc:
            raise DataError(f"cannot read {label}: {clip(exc)}") from exc
        return Source(rel, label, con, files=files, kind=kind, hive=hive, opener=opener)
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
    con = connect(threads=threads)
    return Source(con.from_arrow(table), f"the {type(data).__name__}", con)


def _as_arrow(data) -> pa.Table | None:
    if isinstance(data, pa.Table):
        return data
    if isinstance(data, pa.RecordBatch):
        return pa.Table.from_batches([data])
    module = type(data).__module__.split(".")[0]
    if module == "pandas":
        return _frame_to_arrow(data, lambda: pa.Table.from_pandas(data, preserve_index=False),
                               lambda c: pa.Array.from_pandas(data[c]))
    if module == "polars":
        return _frame_to_arrow(data, data.to_arrow, lambda c: data[c].to_arrow())
    if isinstance(data, dict):
        try:
            return pa.table(data)
        except (pa.ArrowException, TypeError, ValueError) as exc:
            raise DataError(f"cannot read the dict of columns as a table: {clip(exc)}") from exc
    return None


def _frame_to_arrow(frame, convert, convert_column) -> pa.Table:
    """A data frame as an Arrow table; a DataError naming the columns Arrow cannot take
    (e.g. Python objects of mixed types) instead of Arrow's own error."""
    kind = type(frame).__name__
    names = [str(c) for c in frame.columns]
    twice = sorted({c for c in names if names.count(c) > 1})
    if twice:
        raise DataError(f"the {kind} has duplicate column names: "
                        f"{', '.join(shorten(c) for c in twice[:5])}; rename them")
    try:
        return convert()
    except Exception as exc:  # pandas, polars and Arrow raise many kinds
        first = exc
    bad = []
    for c in frame.columns:
        try:
            convert_column(c)
        except Exception as exc:
            bad.append(f"{shorten(c)} ({clip(exc, 200)})")
    if bad:
        raise DataError(f"{'column' if len(bad) == 1 else 'columns'} of the {kind} that Arrow "
                        f"cannot read as one type: {'; '.join(bad[:5])}. Give each column one "
                        "type (e.g. .astype(str), or a numeric dtype)") from None
    raise DataError(f"the {kind} cannot be converted to Arrow: {clip(first)}") from None


def _spool_reader(reader: pa.RecordBatchReader, threads: int | None) -> Source:
    """A RecordBatchReader written to a private scratch Parquet file (it can be read once);
    the file carries this process's id, so a later run removes it if this one is killed."""
    import pyarrow.parquet as pq

    path = new_scratch_file("spool", ".parquet")
    try:
        with pq.ParquetWriter(path, reader.schema) as writer:
            for batch in reader:
                writer.write_batch(batch)
    except BaseException as exc:
        os.remove(path)
        if isinstance(exc, OSError):
            raise output_error(exc, path) from None
        raise
    con = connect(threads=threads)
    return Source(con.read_parquet(path), "the RecordBatchReader", con, scratch=path)
