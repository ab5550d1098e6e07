"""A scratch copy of a binned fit's rows, so later passes do not read the source again.

The first data pass of a binned fit writes what every pass needs from a row (the
codes of its terms, the response, the weights and the offset: a few dozen bytes) to flat
binary files in a private scratch folder; the later passes read them back in batches
instead of reading and decoding the source and coding its columns again. The copy is made
only when its size fits the policy's limit, is used only when complete and for the same
coding, and is removed when the fit ends, whatever way it ends; a copy left by a fit killed
with SIGKILL is removed by the next fit that makes one in the same folder
(:func:`tallgam.atomic.remove_stale`).
"""

from __future__ import annotations

import os
import shutil
import tempfile
from dataclasses import dataclass

import numpy as np

from tallgam.atomic import new_folder

#: share of the free disk space a scratch copy may take when no limit is given
FREE_SHARE = 0.5


@dataclass
class ScratchPolicy:
    """Where and how large: ``folder`` None is the system's temporary folder; ``limit``
    in bytes, None for half the free space there."""

    folder: str | None = None
    limit: int | None = None

    def allows(self, size: int) -> bool:
        folder = self.folder or tempfile.gettempdir()
        limit = self.limit
        if limit is None:
            limit = int(shutil.disk_usage(folder).free * FREE_SHARE)
        return size <= limit


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
    names = [name for name, present in (("w", inputs.has_weights), ("o", inputs.has_offset),
                                        ("wc", inputs.has_cweights)) if present]
    code_bytes = np.dtype(dd.code_dtype).itemsize * len(dd.factors)
    if rows is None:
        return None
    size = int(rows) * (code_bytes + 8 * (1 + len(names)))
    if not policy.allows(size):
        return None
    return Scratch(policy.folder, key, names, dd.code_dtype, len(dd.factors))


class Scratch:
    """Flat binary files of coded rows: ``codes`` (n × F), ``y`` and the named extras."""

    def __init__(self, folder: str | None, key, names: list[str], code_dtype, n_codes: int):
        self.key = key
        self.names = names
        self.code_dtype = np.dtype(code_dtype)
        self.n_codes = n_codes
        # named with this process's id: a later run removes it if this one is killed
        self.path = new_folder(folder or tempfile.gettempdir(), "scratch", private=True,
                               hidden=False)
        self.rows = 0
        self.complete = False
        self._files = {name: open(os.path.join(self.path, name), "wb")
                       for name in ["codes", "y", *names]}

    @property
    def size(self) -> int:
        """Bytes on disk."""
        return sum(os.path.getsize(os.path.join(self.path, f)) for f in os.listdir(self.path))

    def append(self, codes: np.ndarray, y, w, o, wc) -> None:
        values = {"codes": codes, "y": y, "w": w, "o": o, "wc": wc}
        for name, fh in self._files.items():
            np.ascontiguousarray(values[name]).tofile(fh)
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
        """Yield ``(y, w, o, wc, codes, rows_done)`` in batches of ``batch_rows`` rows."""
        F, isz = self.n_codes, self.code_dtype.itemsize
        for start in range(0, self.rows, batch_rows):
            k = min(batch_rows, self.rows - start)
            codes = np.fromfile(os.path.join(self.path, "codes"), dtype=self.code_dtype,
                                count=k * F, offset=start * F * isz).reshape(k, F)
            arrays = {name: np.fromfile(os.path.join(self.path, name), dtype=np.float64,
                                        count=k, offset=start * 8)
                      for name in ["y", *self.names]}
            yield (arrays["y"], arrays.get("w"), arrays.get("o"), arrays.get("wc"), codes,
                   start + k)

    def _close_files(self) -> None:
        for fh in self._files.values():
            fh.close()
        self._files = {}

    def remove(self) -> None:
        self._close_files()
        self.complete = False
        shutil.rmtree(self.path, ignore_errors=True)
