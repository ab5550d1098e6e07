"""How a job runs: :class:`RunOptions` (rows per batch, threads, progress, cluster, binned
passes, scratch folder), checked once where a job starts, and :class:`Tuning`, the
engine's constants, passed down as a value instead of living in module globals.

Every entry point that reads data (``Model.fit``, ``FitResult.predict``, ``score``,
``validate``) builds its options here, so a bad value gets the same message everywhere.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field, replace

import numpy as np

from tallgam.errors import SpecError

DEFAULT_BATCH_ROWS = 1_000_000
DEFAULT_BIN_POINTS = 200   # grid values of a binned continuous column (binned=True)
MIN_BIN_POINTS = 10


@dataclass(frozen=True)
class Tuning:
    """Engine constants. The defaults suit every job; tests and benchmarks change them.

    Parameters
    ----------
    eliminate_levels : int, default 200
        A random effect with at least this many levels is eliminated in the dense stage by
        its Schur complement (0: never).
    fused_loops : bool, default True
        Families that offer a fused numba working-model loop use it.
    cell_limit : int, default 65536
        Largest cross-table of one pair of terms in a binned pass, in cells.
    exact_span : int, default 1024
        Whole-number columns spanning at most this many values are coded exactly when
        binned.
    table_rows : int, default 4096
        Rows of the table of distinct design rows of a binned term of several inputs.
    partition_min_rows : int, default 250000
        A single Parquet file is split for a cluster into runs of row groups of at least
        this many rows.
    tables_memory : str, default "1GB"
        DuckDB's working memory for hold-out tables (it spills to disk beyond).
    memory_limit : int, optional
        Bytes a fit may plan for its normal equations and dense stage; a model needing
        more is refused before any data pass (None: 80% of the machine's memory).
    """

    eliminate_levels: int = 200
    fused_loops: bool = True
    cell_limit: int = 1 << 16
    exact_span: int = 1024
    table_rows: int = 4096
    partition_min_rows: int = 250_000
    tables_memory: str = "1GB"
    memory_limit: int | None = None

    def __post_init__(self):
        for name in ("eliminate_levels", "cell_limit", "exact_span", "table_rows",
                     "partition_min_rows"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0:
                raise SpecError(f"tuning {name} must be a whole number ≥ 0, got {v!r}")
        if self.memory_limit is not None:
            positive_int("tuning memory_limit", self.memory_limit)

    def memory_bytes(self) -> int:
        """The memory a fit may plan for (``memory_limit``, else 80% of physical memory)."""
        if self.memory_limit is not None:
            return int(self.memory_limit)
        try:
            total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
        except (ValueError, OSError, AttributeError):  # not POSIX: assume a modest machine
            total = 8 << 30
        return int(0.8 * total)


def positive_int(name: str, value, *, allow_none: bool = False) -> int | None:
    """``value`` as a positive int (SpecError naming ``name`` otherwise)."""
    if value is None and allow_none:
        return None
    ok = (not isinstance(value, bool) and isinstance(value, (int, np.integer, float))
          and float(value).is_integer() and value >= 1)
    if not ok:
        raise SpecError(f"{name} must be a positive whole number, got {value!r}")
    return int(value)


def bin_points(binned) -> int | None:
    """``binned=`` as grid values per binned column (None: exact passes)."""
    if binned is None or binned is False:
        return None
    if binned is True:
        return DEFAULT_BIN_POINTS
    if (isinstance(binned, (int, np.integer)) and not isinstance(binned, bool)
            and int(binned) >= MIN_BIN_POINTS):
        return int(binned)
    raise SpecError(f"binned takes False, True or a number of grid values of at least "
                    f"{MIN_BIN_POINTS} for continuous columns, got {binned!r}")


@dataclass(frozen=True)
class RunOptions:
    """How a job reads and computes, validated when made. The options are those of
    :meth:`tallgam.Model.fit` (see there), plus ``tuning`` (:class:`Tuning`)."""

    batch_rows: int = DEFAULT_BATCH_ROWS
    threads: int | None = None
    progress: object = False
    cluster: object = None
    binned: bool | int = False
    scratch: str | bool | None = None
    tuning: Tuning = field(default_factory=Tuning)

    def __post_init__(self):
        object.__setattr__(self, "batch_rows", positive_int("batch_rows", self.batch_rows))
        object.__setattr__(self, "threads", positive_int("threads", self.threads,
                                                         allow_none=True))
        bin_points(self.binned)
        if not (self.progress in (True, False, None) or callable(self.progress)):
            raise SpecError(f"progress must be True, False or a function taking progress "
                            f"events, got {self.progress!r}")
        scratch = self.scratch
        if scratch not in (None, True, False):
            if not isinstance(scratch, (str, os.PathLike)):
                raise SpecError(f"scratch must be a folder, True, False or None, got "
                                f"{scratch!r}")
            folder = os.fspath(scratch)
            if not os.path.isdir(folder):
                raise SpecError(f"the scratch folder {folder!r} does not exist; create it, or "
                                "pass scratch=None for the system's temporary folder")
            object.__setattr__(self, "scratch", folder)
        if self.tuning is None:
            object.__setattr__(self, "tuning", Tuning())
        elif not isinstance(self.tuning, Tuning):
            raise SpecError(f"tuning must be a tallgam.options.Tuning, got {self.tuning!r}")

    @property
    def bin_points(self) -> int | None:
        """Grid values per binned continuous column (None: exact passes)."""
        return bin_points(self.binned)

    def but(self, **changes) -> RunOptions:
        """A copy with some options changed (validated again)."""
        return replace(self, **changes)
