"""A compact copy of a binned fit's rows, so later passes do not read the source again.

The first data pass of a binned fit writes what every pass needs from a row to flat binary
files in a private scratch folder: the code of every term in the narrowest unsigned type
that holds it (one file per term; a constant term is not stored), the response and the
prior weights in the narrowest type that holds their values exactly (a claim count fits
in one byte), and the exposure (or constraint weights). An offset that is just the log of
the exposure is not stored: it is recomputed. For the reference model of the benchmarks
that is 23 bytes a row. Every batch is written in the order of its largest term's codes,
so that consecutive rows of later passes hit the same rows of the cross-tables.

Later passes read the files back in batches instead of reading and decoding the source and
coding its columns again. The copy is made only when its size fits the policy's limit, is
used only when complete and for the same coding, and is removed when the fit ends, whatever
way it ends; a copy left by a fit killed with SIGKILL is removed by the next fit that makes
one in the same folder (:func:`tallgam.atomic.remove_stale`). :class:`MemoryRows` keeps the
same rows in memory (a fit's sample start).
"""

from __future__ import annotations

import os
import shutil
import tempfile
from dataclasses import dataclass, field

import numpy as np

from tallgam.atomic import new_folder
from tallgam.errors import DataError

#: share of the free disk space a scratch copy may take when no limit is given
FREE_SHARE = 0.5
_UNSIGNED = (np.uint8, np.uint16, np.uint32)


@dataclass
class ScratchPolicy:
    """Where and how large: ``folder`` None is the system's temporary folder; ``limit``
    in bytes, None for half the free space there; ``memory``: keep the rows in memory
    instead (a sample)."""

    folder: str | None = None
    limit: int | None = None
    memory: bool = False

    def allows(self, size: int) -> bool:
        folder = self.folder or tempfile.gettempdir()
        limit = self.limit
        if limit is None:
            limit = int(shutil.disk_usage(folder).free * FREE_SHARE)
        return size <= limit


def exact_type(profile) -> np.dtype:
    """The narrowest type that holds every value of a profiled quantity exactly
    (``profile``: a :class:`~tallgam.data.profile.NumericProfile`): an unsigned integer for
    whole numbers from 0 up, else float64."""
    if profile is not None and profile.integer and profile.min is not None \
            and profile.min >= 0:
        for t in _UNSIGNED:
            if profile.max <= np.iinfo(t).max:
                return np.dtype(t)
    return np.dtype(np.float64)


@dataclass(frozen=True)
class RowValues:
    """Which per-row values a pass needs besides the codes, and how they are stored:
    ``types`` maps the stored ones (``"y"``, ``"w"``, ``"wc"``, ``"o"``) to their type;
    ``o_from_wc``: the offset is log(wc) (exposure alone); ``wc_from_w``: the constraint
    weights are the prior weights."""

    types: dict = field(default_factory=dict)
    has_w: bool = False
    has_o: bool = False
    has_wc: bool = False
    o_from_wc: bool = False
    wc_from_w: bool = False

    @classmethod
    def of(cls, inputs, profile) -> RowValues:
        """From a model's :class:`~tallgam.data.inputs.Inputs` and its data profile."""
        wc_from_w = inputs.has_cweights and inputs.cweights_are_weights
        o_from_wc = inputs.has_offset and inputs.offset_is_log_cweights
        types = {"y": exact_type(profile.role("response"))}
        if inputs.has_weights:
            types["w"] = exact_type(profile.role("weights"))
        if inputs.has_cweights and not wc_from_w:
            types["wc"] = np.dtype(np.float64)
        if inputs.has_offset and not o_from_wc:
            types["o"] = np.dtype(np.float64)
        return cls(types, inputs.has_weights, inputs.has_offset, inputs.has_cweights,
                   o_from_wc, wc_from_w)

    @property
    def bytes_per_row(self) -> int:
        return sum(t.itemsize for t in self.types.values())

    def unpack(self, stored: dict) -> tuple:
        """(y, w, o, wc) as float64 (None where the model has no such value)."""
        get = {k: np.asarray(v, dtype=np.float64) for k, v in stored.items()}
        w = get.get("w")
        wc = w if self.wc_from_w else get.get("wc")
        o = np.log(wc) if self.o_from_wc else get.get("o")
        return get["y"], w, o, wc


def prepare(current: Scratch | None, policy: ScratchPolicy, plan, rows: int | None
            ) -> Scratch | None:
    """The scratch copy a pass of ``plan`` over ``rows`` rows reads or writes: ``current``
    if it holds the same coded rows, else a new empty one (None when it would not fit the
    limit, or the row count is unknown)."""
    dd, inputs = plan.binned, plan.inputs
    key = (dd.fingerprint, tuple(inputs.select), inputs.where)
    if current is not None:
        if current.key == key and current.complete:
            return current
        current.remove()
    if policy.memory:
        return MemoryRows(key)
    if rows is None:
        return None
    kept = [f for f, fac in enumerate(dd.factors) if fac.m > 1]
    types = dd.narrow_dtypes
    size = int(rows) * (sum(types[f].itemsize for f in kept) + plan.values.bytes_per_row)
    if not policy.allows(size):
        return None
    return Scratch(policy.folder, key, plan.values, [(f, types[f]) for f in kept],
                   len(dd.factors), dd.code_dtype)


class StoredRows:
    """Coded rows in a scratch copy or in memory: ``append`` a batch, ``commit``, then
    ``blocks`` yields them back as ``(y, w, o, wc, codes, rows_done)``."""

    complete = False

    def blocks(self, batch_rows: int):
        raise NotImplementedError


class Scratch(StoredRows):
    """Flat binary files of coded rows: ``c<f>`` per stored term, and the row values."""

    def __init__(self, folder: str | None, key, values: RowValues, codes: list,
                 n_codes: int, code_dtype):
        self.key = key
        self.values = values
        self.codes = codes                     # [(term index, stored type)]
        self.n_codes = n_codes
        self.code_dtype = np.dtype(code_dtype)
        # named with this process's id: a later run removes it if this one is killed
        self.path = new_folder(folder or tempfile.gettempdir(), "scratch", private=True,
                               hidden=False)
        self.rows = 0
        self.complete = False
        names = [f"c{f}" for f, _ in codes] + list(values.types)
        self._files = {name: open(os.path.join(self.path, name), "wb") for name in names}

    @property
    def size(self) -> int:
        """Bytes on disk."""
        return sum(os.path.getsize(os.path.join(self.path, f)) for f in os.listdir(self.path))

    def append(self, codes: np.ndarray, y, w, o, wc) -> None:
        """Add a batch: ``codes`` (F × n) and its row values (float64), in the order the
        layout keeps them (:meth:`~tallgam.passes.binned.BinnedDesign.order`)."""
        given = {"y": y, "w": w, "o": o, "wc": wc}
        for f, t in self.codes:
            codes[f].astype(t).tofile(self._files[f"c{f}"])
        for name, t in self.values.types.items():
            v = given[name]
            stored = v.astype(t)
            if t.kind != "f" and not np.array_equal(stored, v):
                raise DataError(f"the {name_of(name)} has values that its profile did not "
                                "find (not whole numbers, or out of range); the data changed "
                                "during the fit: fit again on a stable copy")
            stored.tofile(self._files[name])
        self.rows += len(y)

    def commit(self) -> None:
        self._close_files()
        self.complete = True

    def discard(self) -> None:
        """Forget a copy that was not completed (the pass stopped)."""
        self._close_files()
        self.complete = False
        self.rows = 0
        self.key = None

    def blocks(self, batch_rows: int):
        for start in range(0, self.rows, batch_rows):
            k = min(batch_rows, self.rows - start)
            codes = np.zeros((self.n_codes, k), dtype=self.code_dtype)
            for f, t in self.codes:
                codes[f] = self._read(f"c{f}", t, start, k)
            stored = {name: self._read(name, t, start, k)
                      for name, t in self.values.types.items()}
            yield (*self.values.unpack(stored), codes, start + k)

    def _read(self, name: str, t: np.dtype, start: int, k: int) -> np.ndarray:
        return np.fromfile(os.path.join(self.path, name), dtype=t, count=k,
                           offset=start * t.itemsize)

    def _close_files(self) -> None:
        for fh in self._files.values():
            fh.close()
        self._files = {}

    def remove(self) -> None:
        self._close_files()
        self.complete = False
        shutil.rmtree(self.path, ignore_errors=True)


class MemoryRows(StoredRows):
    """The same rows held in memory (a few percent of the data: the sample a fit starts
    from), as the blocks they were appended in."""

    def __init__(self, key=None):
        self.key = key
        self.parts: list[tuple] = []
        self.rows = 0

    def append(self, codes, y, w, o, wc) -> None:
        self.parts.append((y, w, o, wc, codes))
        self.rows += len(y)

    def commit(self) -> None:
        self.complete = True

    def discard(self) -> None:
        self.parts = []
        self.rows = 0
        self.complete = False

    def remove(self) -> None:
        self.discard()

    def blocks(self, batch_rows: int):
        done = 0
        for part in self.parts:
            done += len(part[0])
            yield (*part, done)


def name_of(value: str) -> str:
    return {"y": "response", "w": "weights", "wc": "exposure", "o": "offset"}[value]
