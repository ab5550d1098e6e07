"""Checkpoints of a fit: what every data scan returned, so a killed fit resumes.

``model.fit(data, checkpoint=PATH)`` (``tallgam fit --checkpoint PATH``) records, in the
order the fit asks for them, the results of its scans of the data: the profile's two
scans, the sample start (its coefficients and smoothing parameters) and the sums of every
data pass (the blocks of XᵀWX, XᵀWr and the pass's scalars). They are all the fit takes from
the data; the rest of the fit (the dense stage, step halving, the smoothing search) is
computed from them, deterministically.

Started again with the same PATH, model, options and data, the fit runs as before but takes
each scan's result from the checkpoint instead of reading the data, as long as it asks for
the same scan at the same iterate (a digest of the coefficients is kept with every pass), and
reads the data from the first scan not recorded on. The result is the uninterrupted fit's:
the same sums feed the same computations. A checkpoint of another model, other options or
changed data (files of another size or time) is refused, never silently used.

The file is a header line and one line per result, appended and flushed to disk (fsync) as
each scan ends: a kill leaves every finished scan in it, and a line cut short by the kill
is recognised by its digest and dropped. A file that is not a checkpoint is never
overwritten. It holds numbers and text only (JSON, no pickle):
nothing in it is executed. It is removed when the fit ends; a fit that fails keeps it, so
that running again after the fault is mended resumes.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import fields, is_dataclass

import numpy as np

from tallgam.atomic import output_error
from tallgam.errors import SpecError
from tallgam.solve.covariance import decode_array, encode_array

FORMAT = "tallgam-checkpoint"
VERSION = 2


def _classes() -> dict:
    """The record types a checkpoint may hold (decoding builds only these)."""
    from tallgam.data.profile import ColumnSums, HistogramSums, ProfileSums
    from tallgam.passes.state import PassState

    return {c.__name__: c for c in (ColumnSums, HistogramSums, ProfileSums, PassState)}


def encode(obj):
    """A JSON value of ``obj``: numpy arrays and floats exactly, the record types of
    :func:`_classes` and families by their fields, containers recursively."""
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind in "iub":
            return {"__ints__": obj.astype(np.int64).tolist(), "shape": list(obj.shape)}
        return {"__array__": encode_array(obj.astype(np.float64))}
    if isinstance(obj, np.generic):
        return encode(obj.item())
    if isinstance(obj, float) and not np.isfinite(obj):
        return {"__float__": repr(obj)}
    if obj is None or isinstance(obj, (bool, int, float, str)):
        return obj
    if isinstance(obj, dict):
        return {"__dict__": [[encode(k), encode(v)] for k, v in obj.items()]}
    if isinstance(obj, tuple):
        return {"__tuple__": [encode(v) for v in obj]}
    if isinstance(obj, list):
        return [encode(v) for v in obj]
    if is_dataclass(obj) and type(obj).__name__ in _classes():
        return {"__record__": type(obj).__name__,
                "fields": {f.name: encode(getattr(obj, f.name)) for f in fields(obj)}}
    if hasattr(obj, "fitted_params") and hasattr(obj, "started_at"):  # a family
        return {"__family__": encode([obj.to_dict(), obj.fitted_params()])}
    return {"__text__": str(obj)}  # e.g. a date among a rule's example values: shown only


def decode(obj):
    """Inverse of :func:`encode`."""
    if isinstance(obj, list):
        return [decode(v) for v in obj]
    if not isinstance(obj, dict):
        return obj
    if "__array__" in obj:
        return decode_array(obj["__array__"])
    if "__ints__" in obj:
        return np.asarray(obj["__ints__"], dtype=np.int64).reshape(obj["shape"])
    if "__float__" in obj:
        return float(obj["__float__"])
    if "__tuple__" in obj:
        return tuple(decode(v) for v in obj["__tuple__"])
    if "__dict__" in obj:
        return {_hashable(decode(k)): decode(v) for k, v in obj["__dict__"]}
    if "__record__" in obj:
        cls = _classes()[obj["__record__"]]
        return cls(**{k: decode(v) for k, v in obj["fields"].items()})
    if "__family__" in obj:
        from tallgam.families import family_from_dict

        spec, fitted = decode(obj["__family__"])
        return family_from_dict(spec).started_at(fitted)
    if "__text__" in obj:
        return obj["__text__"]
    raise ValueError(f"unknown checkpoint entry {sorted(obj)[:3]}")


def _hashable(key):
    return tuple(key) if isinstance(key, list) else key


def digest(value) -> str:
    """SHA-256 of the JSON of ``value`` (as :func:`encode` writes it)."""
    text = json.dumps(encode(value), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def data_identity(data, source) -> dict:
    """What identifies the data of a fit: for files, their paths, sizes and modification
    times; for ``tg.sql``, the query and its database file's; for a DuckDB relation, an
    Arrow table or a data frame, a digest of its rows (one extra read of them)."""
    files = getattr(source, "files", None)
    if files:
        out = []
        for f in files:
            st = os.stat(f)
            out.append([os.path.abspath(f), st.st_size, st.st_mtime_ns])
        return {"files": out}
    query = getattr(data, "query", None)
    if isinstance(query, str):
        database = getattr(data, "database", None)
        out = {"query": query}
        if database:
            st = os.stat(database)
            out["database"] = [os.path.abspath(database), st.st_size, st.st_mtime_ns]
        return out
    h, rows = hashlib.sha256(), 0
    try:   # a table in memory, or a relation DuckDB runs: its rows in order
        reader = source.relation.to_arrow_reader(1 << 16)
        h.update(str(reader.schema).encode("utf-8"))
        for batch in reader:
            rows += batch.num_rows
            for column in batch.columns:
                for buf in column.buffers():
                    if buf is not None:
                        h.update(memoryview(buf))
    except Exception:  # an unreadable relation fails in the fit with its own message
        return {"label": source.label}
    return {"table": h.hexdigest(), "rows": rows}


class Checkpoint:
    """The checkpoint file of one fit; ``key`` identifies the job (a :func:`digest` of the
    model, the options and the data's identity)."""

    def __init__(self, path, key: str):
        self.path = os.fspath(path)
        self.key = key
        self.records: list[dict] = []   # read back, in order: {"call", "tag", "result"}
        self._fh = None

    def open(self) -> Checkpoint:
        """Read the records of an earlier run of this job (none when the file does not
        exist) and make the file ready for the records of this run."""
        good = 0
        if os.path.exists(self.path) and os.path.getsize(self.path):
            good = self._read()
        try:
            if good:
                self._fh = open(self.path, "r+b")
                self._fh.truncate(good)        # drop a line cut short by a kill
                self._fh.seek(good)
            else:
                self._fh = open(self.path, "wb")
                header = {"format": FORMAT, "version": VERSION, "key": self.key}
                self._append(header)
        except OSError as exc:
            raise output_error(exc, self.path) from None
        return self

    def _read(self) -> int:
        """Parse the file; the byte length of its whole lines (0: start afresh)."""
        try:
            with open(self.path, "rb") as fh:
                lines = fh.read().split(b"\n")
        except OSError as exc:
            raise output_error(exc, self.path) from None
        docs, good = [], 0
        for line in lines[:-1]:   # the part after the last newline is never whole
            doc = _parse(line)
            if doc is None:
                break
            docs.append(doc)
            good += len(line) + 1
        head = docs[0] if docs else {}
        if head.get("format") != FORMAT or head.get("version") != VERSION:
            raise SpecError(f"{self.path!r} is not a tallgam checkpoint of this release; "
                            "remove it to start the fit afresh, or give another path")
        if head.get("key") != self.key:
            raise SpecError(
                f"the checkpoint {self.path!r} belongs to another fit (another model, other "
                "options or changed data); remove it to start afresh, or give another path")
        self.records = docs[1:]
        return good

    def _append(self, doc: dict) -> None:
        text = json.dumps(doc, separators=(",", ":"), allow_nan=False)
        sha = hashlib.sha256(text.encode("utf-8")).hexdigest()
        self._fh.write(f"{sha} {text}\n".encode())
        self._fh.flush()
        os.fsync(self._fh.fileno())

    def add(self, call: str, tag: str, result) -> None:
        """Append one scan's result (``tag``: a digest of what the scan was asked)."""
        try:
            self._append({"call": call, "tag": tag, "result": encode(result)})
        except OSError as exc:
            raise output_error(exc, self.path) from None

    def forget_from(self, index: int) -> None:
        """Drop the records from ``index`` on (the fit asked for something else there)."""
        self.close()
        keep = self.records[:index]
        self.records = []
        try:
            self._fh = open(self.path, "wb")
            self._append({"format": FORMAT, "version": VERSION, "key": self.key})
            for r in keep:
                self._append(r)
        except OSError as exc:
            raise output_error(exc, self.path) from None

    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None

    def remove(self) -> None:
        self.close()
        if os.path.exists(self.path):
            os.remove(self.path)


def _parse(line: bytes) -> dict | None:
    try:
        sha, text = line.decode("utf-8").split(" ", 1)
        if hashlib.sha256(text.encode("utf-8")).hexdigest() != sha:
            return None
        return json.loads(text)
    except (UnicodeDecodeError, ValueError):
        return None


class Recorded:
    """A runner (:class:`~tallgam.passes.run.LocalPasses` or a cluster runner) whose
    scans go through a :class:`Checkpoint`: results recorded by an earlier run of the job
    are returned in order, then the scans run and are recorded."""

    def __init__(self, runner, checkpoint: Checkpoint):
        self.runner = runner
        self.checkpoint = checkpoint
        self.position = 0         # records consumed so far
        self.replayed = 0         # data passes taken from the checkpoint
        self.replayed_scans = 0   # all scans taken from it (profile, sample start, passes)
        self.diverged = False

    def _through(self, call: str, tag_parts, compute):
        tag = digest(tag_parts)
        records = self.checkpoint.records
        if self.position < len(records) and not self.diverged:
            r = records[self.position]
            if r.get("call") == call and r.get("tag") == tag:
                self.position += 1
                self.replayed_scans += 1
                if call in ("working", "loglik"):
                    self.replayed += 1
                return decode(r["result"])
            self.diverged = True   # asked for something else: read the data from here on
            self.checkpoint.forget_from(self.position)
        result = compute()
        self.checkpoint.add(call, tag, result)
        self.position += 1
        return result

    def profile_sums(self, fields, rules, where):
        return self._through("profile", [[f.key for f in fields], [r.key for r in rules],
                                         where],
                             lambda: self.runner.profile_sums(fields, rules, where))

    def histogram_sums(self, profile, fields, weight_expr, where):
        return self._through("histograms", [[f.key for f in fields], weight_expr, where],
                             lambda: self.runner.histogram_sums(profile, fields, weight_expr,
                                                                where))

    def sample(self, inputs, share: float):
        return self.runner.sample(inputs, share)

    def remember(self, call: str, compute):
        """A result of the driver's own that rests on data read outside the passes (the
        sample start), as plain values (:func:`encode`)."""
        return self._through(call, [call], compute)

    def working(self, plan, task: str, total):
        return self._through("working", _plan_tag(plan, task),
                             lambda: self.runner.working(plan, task, total))

    def loglik(self, plan, scale: float, task: str, total):
        return self._through("loglik", _plan_tag(plan, task) + [float(scale)],
                             lambda: self.runner.loglik(plan, scale, task, total))

    def close(self) -> None:
        self.checkpoint.close()
        self.runner.close()


def _plan_tag(plan, task: str) -> list:
    """What identifies a pass: its task name, iterate and previous iterate, family."""
    return [task, plan.beta, plan.beta_prev, plan.family, plan.scale_est, plan.start_shift,
            plan.null_beta0]
