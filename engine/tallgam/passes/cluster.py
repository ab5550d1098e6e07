"""Data passes and scoring on a Dask cluster (``model.fit(data, cluster=...)``).

The data are cut into *partitions* on the client: one per file, or, for a single Parquet
file, runs of whole row groups. A pass submits one task per partition; the task opens its
partition with DuckDB on the worker, runs :func:`~tallgam.passes.run.working_pass` (a black box)
and returns the partial :class:`~tallgam.passes.state.PassState`. The client merges the states in
partition order, so the sum, and therefore the fit, does not depend on which worker ran
which partition, nor on the order in which they finished. The profile's two scans and the
sample a large fit starts from are partition tasks as well, their sums merged on the
client; the dense stage stays on the client.

A binned fit keeps on each worker a scratch copy of the coded rows of the partitions that
worker ran in the first pass (:func:`working_task`); later passes are sent to that worker
and read the copy, so the fit reads its data once. The copies are removed when the fit
ends, whatever way it ends (:func:`drop_worker_scratch` on every worker).

Tasks are functions of (partition, plan) whose result does not depend on where they run:
when a worker dies, Dask runs its tasks again elsewhere (reading the data again where no
copy is held) and the pass ends with the same state. The plan is handed to the cluster
once per pass as the result of a small task, so Dask can recompute it too when the worker
holding it dies.

``distributed`` is imported only when a cluster is used (``pip install 'tallgam[dask]'``);
the local path never loads it. See docs/distributed.md.
"""

from __future__ import annotations

import contextlib
import os
import threading
import uuid
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from tallgam.atomic import output_error, owned_name
from tallgam.data.sources import Source, connect, file_kind, quote
from tallgam.errors import DataError, SpecError, TallgamError, TallgamWarning
from tallgam.options import RunOptions, Tuning
from tallgam.progress import Event

#: how long to try to reach a scheduler given by its address
CONNECT_SECONDS = 30
#: how long to wait for a scheduler without workers
WORKER_WAIT_SECONDS = 60
#: how long a failed scoring run waits for its other tasks to stop before cleaning up
ABORT_WAIT_SECONDS = 300


def _distributed():
    try:
        import distributed
    except ImportError as exc:
        raise SpecError("cluster= needs dask.distributed, which is not installed: "
                        "pip install 'tallgam[dask]'") from exc
    return distributed


# --------------------------------------------------------------------------- partitions


@dataclass(frozen=True)
class Partition:
    """A part of a file source, opened on a worker exactly as the client opened the whole.

    ``files``: absolute paths; ``rows``: a [start, stop) range of row numbers of a single
    Parquet file (whole row groups), or None for whole files; ``hive_types``: the hive
    partition columns and their types (None: no hive partitioning); ``schema``: the
    client's column names and types, which the worker's relation is cast to if it differs.
    """

    index: int
    count: int
    kind: str
    files: tuple[str, ...]
    rows: tuple[int, int] | None
    hive_types: tuple[tuple[str, str], ...] | None
    schema: tuple[tuple[str, str], ...]

    @property
    def label(self) -> str:
        where = os.path.basename(self.files[0])
        if len(self.files) > 1:
            where += f" and {len(self.files) - 1} more"
        if self.rows is not None:
            where += f", rows {self.rows[0]:,} to {self.rows[1] - 1:,}"
        return f"partition {self.index + 1} of {self.count} ({where})"


def partitions_of(data, source: Source, *, min_rows: int | None = None) -> list[Partition]:
    """The partitions of a file source (``source`` is ``open_source(data)``).

    Raises :class:`DataError` when the source is not files (a data frame, an Arrow table,
    a SQL query or a DuckDB relation live only in this process)."""
    if source.files is None:
        raise DataError(
            f"cluster= needs data as files that every worker can read (a path, glob, list of "
            f"Parquet/CSV files or a hive-partitioned directory on storage the workers share); "
            f"{source.label} exists only in this process. Write it to Parquet on shared "
            "storage first, or fit without cluster=")
    given, hive = source.files, source.hive
    kind = source.kind or file_kind(given)
    files = [os.path.abspath(f) for f in given]   # workers have another working directory
    schema = tuple(source.schema.items())
    hive_types = None
    if hive:
        keys = {part.split("=", 1)[0] for f in given for part in Path(f).parent.parts
                if "=" in part}
        hive_types = tuple((k, t) for k, t in schema if k in keys)
    limit = Tuning().partition_min_rows if min_rows is None else int(min_rows)
    if len(files) == 1 and kind == "parquet" and "file_row_number" not in source.schema:
        ranges = _row_group_ranges(files[0], limit)
        return [Partition(i, len(ranges), kind, (files[0],), r, hive_types, schema)
                for i, r in enumerate(ranges)]
    return [Partition(i, len(files), kind, (f,), None, hive_types, schema)
            for i, f in enumerate(files)]


def _row_group_ranges(path: str, min_rows: int) -> list[tuple[int, int] | None]:
    """Row ranges of runs of whole row groups with at least ``min_rows`` rows each (the last
    run takes the remainder); [None] when the file cannot be split."""
    import pyarrow.parquet as pq

    try:
        meta = pq.ParquetFile(path).metadata
    except Exception:  # DuckDB read it; let the worker report any problem
        return [None]
    sizes = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
    ranges: list[tuple[int, int]] = []
    start = stop = 0
    for n in sizes:
        stop += n
        if stop - start >= max(min_rows, 1):
            ranges.append((start, stop))
            start = stop
    if stop > start:
        if ranges:
            ranges[-1] = (ranges[-1][0], stop)
        else:
            ranges.append((start, stop))
    return ranges if len(ranges) > 1 else [None]


def _sql_list(items: Sequence[str]) -> str:
    return "[" + ", ".join("'" + s.replace("'", "''") + "'" for s in items) + "]"


def _sql_struct(pairs) -> str:
    return "{" + ", ".join("'" + k.replace("'", "''") + "': '" + t.replace("'", "''") + "'"
                           for k, t in pairs) + "}"


def open_partition(part: Partition, threads: int | None = None) -> Source:
    """Open one partition as a :class:`Source` (on a worker, or here in tests)."""
    import duckdb

    con = connect(threads=threads)
    options = []
    if part.hive_types is not None:
        options.append("hive_partitioning = true")
        if part.hive_types:
            options.append(f"hive_types = {_sql_struct(part.hive_types)}")
    hive_names = {k for k, _ in part.hive_types or ()}
    if part.kind == "parquet":
        if part.rows is not None:
            options.append("file_row_number = true")
        reader = f"read_parquet({_sql_list(part.files)}{''.join(', ' + o for o in options)})"
    else:
        types = [(k, t) for k, t in part.schema if k not in hive_names]
        options.append(f"types = {_sql_struct(types)}")
        reader = f"read_csv({_sql_list(part.files)}{''.join(', ' + o for o in options)})"
    text = f"SELECT * FROM {reader}"
    if part.rows is not None:
        text = (f"SELECT * EXCLUDE (file_row_number) FROM {reader} WHERE file_row_number >= "
                f"{int(part.rows[0])} AND file_row_number < {int(part.rows[1])}")
    try:
        rel = con.sql(text)
        got = dict(zip(rel.columns, (str(t) for t in rel.dtypes)))
    except duckdb.Error as exc:
        con.close()
        raise DataError(f"{part.label}: cannot read {part.files[0]}: {exc}") from exc
    want = dict(part.schema)
    if list(got.items()) != list(part.schema):
        missing = [c for c in want if c not in got]
        if missing:
            con.close()
            raise DataError(f"{part.label}: column(s) {', '.join(map(repr, missing))} of the "
                            "data are missing in this part; every file must have the same "
                            "columns")
        rel = rel.project(", ".join(
            quote(c) if got[c] == t else f"CAST({quote(c)} AS {t}) AS {quote(c)}"
            for c, t in part.schema))
    return Source(rel, part.label, con, files=list(part.files))


# --------------------------------------------------------------------------- worker side

_NUMBA_LOCK = threading.Lock()


@contextlib.contextmanager
def _task_threads(threads: int | None):
    """Run a task body with ``threads`` numba threads (default 1). Tasks of one worker
    process may run concurrently on its threads; numba's 'workqueue' threading layer does
    not allow that, so under it (or before the layer is known) they take turns."""
    import numba

    n = max(1, min(int(threads or 1), numba.config.NUMBA_NUM_THREADS))
    try:
        layer = numba.threading_layer()
    except ValueError:
        layer = None
    guard = _NUMBA_LOCK if layer in (None, "workqueue") else contextlib.nullcontext()
    with guard:
        old = numba.get_num_threads()
        numba.set_num_threads(n)
        try:
            yield n
        finally:
            numba.set_num_threads(old)


def _in_partition(part: Partition, exc: TallgamError) -> TallgamError:
    """The same error, its message prefixed with the partition."""
    try:
        new = type(exc)(f"{part.label}: {exc}")
    except Exception:  # pragma: no cover - an error class with another signature
        return exc
    return new


def _value(x):
    """The plan (or fitted model) of a pass as a task result that Dask can recompute."""
    return x


# scratch copies of partitions' coded rows, per worker process: (fit, partition) -> Scratch
_SCRATCH: dict = {}
_SCRATCH_LOCK = threading.Lock()


def _worker_scratch(scratch_id: str | None, part: Partition, plan, rows_hint: int | None):
    """The scratch copy of ``part``'s coded rows on this worker that a binned pass reads
    (complete) or writes (new), as the local runner keeps one for the whole source; None
    when the pass is not binned or a copy would not pay (a single pass)."""
    if scratch_id is None or plan.binned is None:
        return None
    from tallgam.data.scratch import ScratchPolicy, prepare

    key = (scratch_id, part.index)
    with _SCRATCH_LOCK:
        current = _SCRATCH.pop(key, None)
    if not plan.more_passes and (current is None or not current.complete):
        if current is not None:
            current.remove()
        return None
    folder = None
    with contextlib.suppress(Exception):  # a worker's own folder, if it has one
        folder = _distributed().get_worker().local_directory
    scratch = prepare(current, ScratchPolicy(folder=folder), plan, rows_hint)
    if scratch is not None:
        with _SCRATCH_LOCK:
            _SCRATCH[key] = scratch
    return scratch


def drop_worker_scratch(scratch_id: str) -> int:
    """Remove this worker's scratch copies of a fit (run on every worker when the fit ends,
    whatever way it ends); returns how many there were."""
    with _SCRATCH_LOCK:
        keys = [k for k in _SCRATCH if k[0] == scratch_id]
        copies = [_SCRATCH.pop(k) for k in keys]
    for c in copies:
        c.remove()
    return len(copies)


def _worker_address() -> str | None:
    with contextlib.suppress(Exception):
        return _distributed().get_worker().address
    return None


def working_task(part: Partition, plan, threads: int | None, scratch_id: str | None = None,
                 rows_hint: int | None = None):
    """One partition's :class:`~tallgam.passes.state.PassState` and the worker that ran it
    (runs on a worker). A binned pass of a fit with ``scratch_id`` reads the partition's
    coded rows from this worker's scratch copy when it holds them, else reads the data and
    writes the copy."""
    from tallgam.passes.run import working_pass

    with _task_threads(threads) as n:
        scratch = _worker_scratch(scratch_id, part, plan, rows_hint)
        source = None if scratch is not None and scratch.complete else open_partition(part, n)
        try:
            state = working_pass(source, plan, scratch=scratch)
        except TallgamError as exc:
            raise _in_partition(part, exc) from exc
        finally:
            if source is not None:
                source.connection.close()
            if scratch is not None and not scratch.complete:
                with _SCRATCH_LOCK:
                    _SCRATCH.pop((scratch_id, part.index), None)
                scratch.remove()
        return state, _worker_address()


def _partition_call(part: Partition, threads: int | None, call):
    with _task_threads(threads) as n:
        source = open_partition(part, n)
        try:
            return call(source)
        except TallgamError as exc:
            raise _in_partition(part, exc) from exc
        finally:
            source.connection.close()


def profile_task(part: Partition, shared, threads: int | None):
    """One partition's first profile scan (:class:`~tallgam.data.profile.ProfileSums`)."""
    from tallgam.data.profile import profile_scan

    fields, rules, where = shared
    return _partition_call(part, threads,
                           lambda source: profile_scan(source, fields, rules, where))


def histogram_task(part: Partition, shared, threads: int | None):
    """One partition's histogram scan (:class:`~tallgam.data.profile.HistogramSums`)."""
    from tallgam.data.profile import histogram_scan

    profile, fields, weight_expr, where = shared
    return _partition_call(part, threads, lambda source: histogram_scan(
        source, profile, fields, weight_expr, where))


def sample_task(part: Partition, shared, threads: int | None):
    """The rows of one partition that fall in a fit's sample (an Arrow table)."""
    from tallgam.data.inputs import sample_rows

    inputs, share = shared
    return _partition_call(part, threads, lambda source: sample_rows(source, inputs, share))


def loglik_task(part: Partition, plan, scale: float, threads: int | None):
    """One partition's log-likelihood sum and row count (runs on a worker)."""
    from tallgam.passes.run import loglik_pass

    with _task_threads(threads) as n:
        source = open_partition(part, n)
        rows = [0]

        def count(event):
            if event.kind == "end":
                rows[0] = event.rows
        try:
            return loglik_pass(source, plan, scale, count), rows[0]
        except TallgamError as exc:
            raise _in_partition(part, exc) from exc
        finally:
            source.connection.close()


class Abandoned(TallgamError):
    """A scoring task saw that another part failed and gave up."""


def score_task(part: Partition, fit, folder: str, options: dict, threads: int | None):
    """Score one partition into ``folder/part-NNNNN.parquet`` (runs on a worker).

    The part is written under a temporary name and renamed when complete, so a task run
    twice (its worker died) or killed half-way never leaves a partial part under the final
    name. Returns the part's :class:`~tallgam.outputs.scoring.ScoreReport`."""
    from tallgam.outputs.scoring import Scorer, write_scores

    marker = os.path.join(folder, ABORT_MARKER)

    def stop():
        if os.path.exists(marker):
            raise Abandoned("another part failed; scoring was abandoned")
    stop()
    final = os.path.join(folder, PART_NAME.format(part.index))
    tmp = os.path.join(folder, owned_name("part", f"-{PART_NAME.format(part.index)}.tmp"))
    with _task_threads(threads) as n:
        source = open_partition(part, n)
        try:
            scorer = Scorer(fit, source, with_offset=options["with_offset"],
                            unseen=options["unseen"], keep=tuple(options["keep"]))
            rows = write_scores(scorer, tmp, se=options["se"], terms=options["terms"],
                                batch_rows=options["batch_rows"], write_empty=False,
                                stop=stop)
            if rows:
                stop()
                os.replace(tmp, final)
            return scorer.report
        except TallgamError as exc:
            raise _in_partition(part, exc) from exc
        except OSError as exc:  # the worker's disk is full, say
            raise _in_partition(part, output_error(exc, final)) from exc
        finally:
            if os.path.exists(tmp):
                os.remove(tmp)
            source.connection.close()


def check_worker(paths: Sequence[str], folders: Sequence[str] = ()) -> dict:
    """What a worker sees: missing paths and folders, and its library versions."""
    import socket

    import duckdb

    from tallgam.version import __version__

    return {
        "host": socket.gethostname(),
        "missing": [p for p in paths if not os.path.exists(p)],
        "missing_folders": [d for d in folders if not os.path.isdir(d)],
        "tallgam": __version__,
        "duckdb": duckdb.__version__,
    }


# --------------------------------------------------------------------------- client side


class ClusterSession:
    """A connection to a Dask scheduler: a given ``distributed.Client``, or one made here
    from a scheduler address or a cluster object (closed again by :meth:`close`)."""

    def __init__(self, cluster):
        distributed = _distributed()
        self.owned = not isinstance(cluster, distributed.Client)
        if not self.owned:
            self.client = cluster
        else:
            target = cluster
            if not isinstance(cluster, str) and not hasattr(cluster, "scheduler_address"):
                raise SpecError(f"cluster= takes a distributed.Client, a scheduler address "
                                f"such as 'tcp://host:8786' or a Dask cluster object, got "
                                f"{type(cluster).__name__}")
            try:
                self.client = distributed.Client(target, set_as_default=False,
                                                 timeout=f"{CONNECT_SECONDS}s")
            except (OSError, TimeoutError) as exc:
                raise TallgamError(f"cannot reach the Dask scheduler at {cluster}: {exc}"
                                   ) from exc
        try:
            self.client.wait_for_workers(1, timeout=WORKER_WAIT_SECONDS)
        except (TimeoutError, OSError) as exc:
            self.close()
            raise TallgamError(f"the Dask scheduler at {self.client.scheduler.address} has no "
                               f"workers (waited {WORKER_WAIT_SECONDS} s); start some with "
                               "`dask worker ADDRESS`") from exc

    def check(self, paths: Sequence[str], folders: Sequence[str] = ()) -> None:
        """Every worker must see ``paths`` and ``folders`` and run this tallgam version.
        Raises :class:`DataError` naming the worker and the first missing paths."""
        import warnings

        import duckdb

        from tallgam.version import __version__

        try:
            seen = self.client.run(check_worker, list(paths), list(folders))
        except Exception as exc:
            raise TallgamError(
                f"the cluster's workers cannot run tallgam ({type(exc).__name__}: {exc}); "
                f"install tallgam {__version__} (pip install 'tallgam[dask]') in every "
                "worker's environment") from exc
        problems = []
        for worker, info in sorted(seen.items()):
            if info["tallgam"] != __version__:
                raise TallgamError(
                    f"worker {worker} ({info['host']}) runs tallgam {info['tallgam']}, this "
                    f"process {__version__}; install the same version on every worker")
            if info["duckdb"] != duckdb.__version__:
                warnings.warn(TallgamWarning(
                    f"worker {worker} runs duckdb {info['duckdb']}, this process "
                    f"{duckdb.__version__}; install the same versions everywhere"),
                    stacklevel=3)
            gone = info["missing"] + info["missing_folders"]
            if gone:
                shown = ", ".join(gone[:3]) + (f" and {len(gone) - 3} more" if len(gone) > 3
                                               else "")
                problems.append(f"worker {worker} (host {info['host']}) cannot see "
                                f"{len(gone)} path(s): {shown}")
        if problems:
            raise DataError(
                "the data must be files readable by every worker at the same path (a shared "
                "filesystem or mounted object storage); " + "; ".join(problems))

    def run(self, fn, parts: Sequence[Partition], shared, args: tuple, kind: str,
            on_result=None, abort=None, placement: dict | None = None) -> list:
        """Submit ``fn(part, shared, *args)`` for every partition; return the results in
        partition order. ``shared`` (the pass's plan) goes to the cluster once, as the
        result of a task. ``placement`` maps a partition index to the worker that should
        run it (another runs it when that one is gone). ``on_result(index, result)`` is
        called as results arrive. When a task fails, ``abort()`` (if given) is called and
        the other tasks are waited for (so none is still writing when the caller cleans
        up), then the error is raised."""
        distributed = _distributed()
        client = self.client
        tag = f"{kind}-{uuid.uuid4().hex[:10]}"
        shared_f = client.submit(_value, shared, key=f"tallgam-plan-{tag}")
        placement = placement or {}
        futures = [client.submit(fn, part, shared_f, *args,
                                 key=f"tallgam-{tag}-{part.index:05d}",
                                 workers=[placement[part.index]] if part.index in placement
                                 else None,
                                 allow_other_workers=part.index in placement)
                   for part in parts]
        index = {f.key: i for i, f in enumerate(futures)}
        results: list = [None] * len(futures)
        try:
            for fut in distributed.as_completed(futures, loop=client.loop):
                i = index[fut.key]
                results[i] = fut.result()
                if on_result is not None:
                    on_result(i, results[i])
        except Exception as exc:
            if abort is not None:
                abort()
                with contextlib.suppress(Exception):  # wait for every task to end
                    for _ in distributed.as_completed(futures, loop=client.loop,
                                                      raise_errors=False,
                                                      timeout=ABORT_WAIT_SECONDS):
                        pass
            if isinstance(exc, distributed.KilledWorker):
                raise TallgamError(
                    f"workers died again and again running a task ({exc}); Dask gave up. "
                    "A worker running out of memory is the usual cause: give workers more "
                    "memory or lower batch_rows") from exc
            raise
        finally:
            client.cancel(futures + [shared_f])
        return results

    def close(self) -> None:
        if self.owned:
            self.client.close()


def _slug(task: str) -> str:
    return "".join(c if c.isalnum() else "-" for c in task)


class ClusterPasses:
    """Runs the data passes of a fit on a Dask cluster (the interface of
    :class:`~tallgam.passes.run.LocalPasses`): one task per partition, states merged in
    partition order on the client. The profile scans and a sample start's sample are
    partition tasks too. With ``scratch``, every worker keeps a scratch copy of the coded
    rows of the partitions it ran in a binned fit's first pass, and later passes go to
    that worker (another reads the data again if it is gone), so a fit reads its data
    once; the copies are removed when the fit ends."""

    def __init__(self, session: ClusterSession, parts: list[Partition], callback=None,
                 threads: int | None = None, scratch: bool = True):
        self.session = session
        self.parts = parts
        self.callback = callback or (lambda event: None)
        self.threads = threads
        self.scratch_id = f"tallgam-{uuid.uuid4().hex[:12]}" if scratch else None
        self.placement: dict[int, str] = {}   # partition -> worker holding its copy
        self.rows: int | None = None          # rows of the data (from the profile)

    @classmethod
    def open(cls, cluster, data, source: Source, callback=None, threads: int | None = None,
             min_rows: int | None = None, scratch: bool = True) -> ClusterPasses:
        """Partition ``data`` (a single Parquet file into runs of row groups of at least
        ``min_rows`` rows), connect, and check that every worker sees every file."""
        parts = partitions_of(data, source, min_rows=min_rows)
        session = ClusterSession(cluster)
        try:
            session.check(sorted({f for p in parts for f in p.files}))
        except BaseException:
            session.close()
            raise
        return cls(session, parts, callback, threads, scratch)

    def _run(self, fn, plan, args, task, total, kind, placement=None):
        self.callback(Event("start", task, total=total))
        done = [0]

        def advance(i, result):
            done[0] += _rows_of(result)
            self.callback(Event("advance", task, rows=done[0], total=total))
        results = self.session.run(fn, self.parts, plan, args, f"{kind}-{_slug(task)}",
                                   advance, placement=placement)
        self.callback(Event("end", task, rows=done[0], total=total))
        return results

    def _merged(self, fn, shared, kind: str):
        parts = self.session.run(fn, self.parts, shared, (self.threads,), kind)
        out = parts[0]
        for p in parts[1:]:
            out = out.merge(p)
        return out

    def profile_sums(self, fields, rules, where):
        sums = self._merged(profile_task, (fields, rules, where), "profile")
        self.rows = sums.rows
        return sums

    def histogram_sums(self, profile, fields, weight_expr, where):
        return self._merged(histogram_task, (profile, fields, weight_expr, where),
                            "histograms")

    def sample(self, inputs, share: float):
        import pyarrow as pa

        tables = self.session.run(sample_task, self.parts, (inputs, share), (self.threads,),
                                  "sample")
        return pa.concat_tables(tables)

    def working(self, plan, task: str, total: int | None):
        hint = None if self.rows is None else -(-self.rows // len(self.parts))
        results = self._run(working_task, plan, (self.threads, self.scratch_id, hint), task,
                            total, "working", placement=self.placement)
        merged = None
        for part, (state, worker) in zip(self.parts, results):
            if plan.binned is not None and self.scratch_id is not None and worker:
                self.placement[part.index] = worker
            merged = state if merged is None else merged.merge(state)
        return merged

    def loglik(self, plan, scale: float, task: str, total: int | None) -> float:
        values = self._run(loglik_task, plan, (scale, self.threads), task, total, "loglik")
        out = 0.0
        for v, _ in values:
            out += v
        return out

    def close(self) -> None:
        try:
            if self.scratch_id is not None:
                with contextlib.suppress(Exception):  # a worker that is gone took its copies
                    self.session.client.run(drop_worker_scratch, self.scratch_id)
        finally:
            self.session.close()


def _rows_of(result) -> int:
    if isinstance(result, tuple):
        if isinstance(result[1], (int, float)):
            return int(result[1])
        result = result[0]
    scalars = getattr(result, "scalars", None)
    if scalars is not None:
        return int(scalars["rows"])
    return int(getattr(result, "rows", 0))


# --------------------------------------------------------------------------- scoring

PART_NAME = "part-{:05d}.parquet"
_PART_PATTERN = r"part-\d{5}\.parquet"


def score_to_directory(fit, data, output_dir, *, cluster, keep: tuple[str, ...] | list[str] = (),
                       terms: bool = False, se: bool = False, with_offset: bool = True,
                       unseen: str = "error", batch_rows: int = 1_000_000,
                       threads: int | None = None, progress=False):
    """Score ``data`` on a Dask cluster into a directory of Parquet part files; returns
    the :class:`~tallgam.outputs.scoring.ScoreReport`.

    One task per partition of ``data`` (see above); each writes
    ``part-NNNNN.parquet`` (NNNNN: the partition number; a partition without rows writes
    none) into a hidden temporary directory beside ``output_dir``, under a temporary name
    renamed when complete. The directory is renamed to ``output_dir`` only when every part
    succeeded; on any failure the temporary directory is removed, so a failed run leaves no
    output. Columns as in :func:`score_to_file`; rows in input order within each part.
    An existing ``output_dir`` is replaced only if it holds nothing but part files.
    """
    import re
    import shutil

    import pyarrow as pa
    import pyarrow.parquet as pq

    from tallgam.atomic import check_folder, install_folder, new_folder
    from tallgam.data.sources import open_source
    from tallgam.errors import OutputError
    from tallgam.outputs.scoring import Scorer
    from tallgam.progress import make_callback

    options = RunOptions(batch_rows=batch_rows, threads=threads)
    batch_rows, threads = options.batch_rows, options.threads
    callback = make_callback(progress)
    out = os.path.abspath(os.fspath(output_dir))
    folder = check_folder(os.path.dirname(out))
    if os.path.lexists(out) and not os.path.isdir(out):
        raise OutputError(f"{out!r} is a file; scoring on a cluster writes a folder of part "
                          "files: give a folder name")
    if os.path.isdir(out):
        other = [e for e in sorted(os.listdir(out)) if not re.fullmatch(_PART_PATTERN, e)]
        if other:
            raise OutputError(f"the output folder {out!r} exists and holds other files than "
                              f"scoring parts (e.g. {other[0]!r}); remove it or choose another")
    source = open_source(data)
    owned = source is not data
    session = tmp = None
    try:
        # checks the model's columns against the data here, before any task runs
        scorer = Scorer(fit, source, with_offset=with_offset, unseen=unseen, keep=tuple(keep))
        parts = partitions_of(data, source)
        session = ClusterSession(cluster)
        tmp = new_folder(folder, "score")  # mode 0777 less the umask: workers may be others
        session.check(sorted({f for p in parts for f in p.files}), [tmp])
        options = {"keep": tuple(keep), "terms": terms, "se": se, "with_offset": with_offset,
                   "unseen": unseen, "batch_rows": int(batch_rows)}
        callback(Event("start", "scoring"))
        done = [0]

        def advance(i, report):
            done[0] += report.rows
            callback(Event("advance", "scoring", rows=done[0]))

        def abort():  # tasks still to start, or between batches, give up on seeing this
            with open(os.path.join(tmp, ABORT_MARKER), "w"):
                pass
        reports = session.run(score_task, parts, fit, (tmp, options, threads), "score",
                              advance, abort=abort)
        for r in reports:
            scorer.report.rows += r.rows
            scorer.report.clamped.update(r.clamped)
            scorer.report.unseen.update(r.unseen)
        for entry in os.listdir(tmp):  # what workers that died while writing left behind
            if not re.fullmatch(_PART_PATTERN, entry):
                os.remove(os.path.join(tmp, entry))
        if not os.listdir(tmp):  # no rows at all: one valid, empty part with the columns
            names = list(keep) + ["prediction", "link"]
            pq.write_table(pa.table({n: pa.array([], pa.float64()) for n in names}),
                           os.path.join(tmp, PART_NAME.format(0)))
        install_folder(tmp, out)
        tmp = None
        callback(Event("end", "scoring", rows=done[0]))
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
        if session is not None:
            session.close()
        if owned:
            source.close()
    scorer.report.warn()
    return scorer.report


ABORT_MARKER = ".abort"
