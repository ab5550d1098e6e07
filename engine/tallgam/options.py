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
    blas_width : int, default 4
        Exact passes form XᵀWX of the dense group with BLAS on rows made dense when the
        group has at most this many times as many columns as a row has non-zeros (0:
        never; the sparse kernel then does it).
    eta_tolerance : float, optional
        PIRLS has converged when its next step would move the fitted values (the linear
        predictor) by at most this, as a root mean square weighted by the working weights
        (and gain at most the model's ``tolerance`` of the penalized deviance). Default:
        1e-9 for a model with no smoothing parameter to select on data of fewer than
        ``loose_from_rows`` rows, where a pass is cheap and statistics then agree with
        exact references to about 1e-9; else 1e-6 (the fitted values carry errors of
        about 1e-6, far below their standard errors; smoothing parameters selected anew
        every pass move them by about that much, so a tighter rule could not be met).
    loose_from_rows : int, default 500000
        See ``eta_tolerance``.
    accelerate : bool, default True
        Extrapolate PIRLS steps that shrink by a steady ratio (linear convergence).
    binned_from_rows : int, default 500000
        ``binned="auto"`` chooses binned passes from this many rows.
    bin_move_share : float, default 0.25
        ``binned="auto"`` bins continuous inputs only when no value moves by more than
        this share of the knot interval it lies in (else exact passes).
    max_bin_points : int, default 1600
        ``binned="auto"`` doubles a column's grid from 200 values up to this many to meet
        ``bin_move_share``.
    blas_threads : int, default 1
        Threads of the BLAS library during a fit (0: its own default). One is faster for
        the dense stage's small matrices, and several spin against numba's threads and
        other processes on a busy machine (measured: a 1M-row fit's smoothing selection
        took 8.3 s with two BLAS threads under load, 0.5 s with one).
    sample_share : float, default 0.03
        Fits of large data start with PIRLS on this share of the rows, held in memory
        (0: never).
    sample_min_rows : int, default 100000
        ... at least this many rows; a sample of more than half the data is not drawn.
    sample_max_rows : int, default 3000000
        ... and at most this many (memory: about 50 bytes a row while the sample is fitted,
        plus the sampled columns).
    """

    eliminate_levels: int = 200
    fused_loops: bool = True
    cell_limit: int = 1 << 16
    exact_span: int = 1024
    table_rows: int = 4096
    partition_min_rows: int = 250_000
    tables_memory: str = "1GB"
    memory_limit: int | None = None
    blas_width: int = 4
    eta_tolerance: float | None = None
    accelerate: bool = True
    binned_from_rows: int = 500_000
    loose_from_rows: int = 500_000
    bin_move_share: float = 0.25
    max_bin_points: int = 1600
    blas_threads: int = 1
    sample_share: float = 0.03
    sample_min_rows: int = 100_000
    sample_max_rows: int = 3_000_000

    def __post_init__(self):
        for name in ("eliminate_levels", "cell_limit", "exact_span", "table_rows",
                     "partition_min_rows", "blas_width", "binned_from_rows",
                     "max_bin_points", "sample_min_rows", "sample_max_rows",
                     "blas_threads", "loose_from_rows"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0:
                raise SpecError(f"tuning {name} must be a whole number ≥ 0, got {v!r}")
        for name in ("eta_tolerance", "bin_move_share", "sample_share"):
            v = getattr(self, name)
            if v is None and name == "eta_tolerance":
                continue
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 <= v < 1:
                raise SpecError(f"tuning {name} must be a number in [0, 1), got {v!r}")
        if self.memory_limit is not None:
            positive_int("tuning memory_limit", self.memory_limit)

    def eta_tolerance_for(self, rows: int, selecting: bool) -> float:
        """The stopping tolerance on the fitted values for data of ``rows`` rows, when
        smoothing parameters are ``selecting`` or not."""
        if self.eta_tolerance is not None:
            return float(self.eta_tolerance)
        return 1e-6 if selecting or rows >= self.loose_from_rows else 1e-9

    def memory_bytes(self) -> int:
        """The memory a fit may plan for (``memory_limit``, else 80% of physical memory)."""
        if self.memory_limit is not None:
            return int(self.memory_limit)
        try:
            total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
        except (ValueError, OSError, AttributeError):  # not POSIX: assume a modest machine
            total = 8 << 30
        return int(0.8 * total)


def _checkpoint_path(path) -> str:
    """``checkpoint=`` as a path whose folder exists (SpecError otherwise)."""
    if not isinstance(path, (str, os.PathLike)) or not os.fspath(path):
        raise SpecError(f"checkpoint must be the path of a file, got {path!r}")
    path = os.fspath(path)
    if os.path.isdir(path):
        raise SpecError(f"the checkpoint {path!r} is a folder; give a file name in it")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise SpecError(f"the folder of the checkpoint {path!r} does not exist; create it")
    return path


def positive_int(name: str, value, *, allow_none: bool = False) -> int | None:
    """``value`` as a positive int (SpecError naming ``name`` otherwise)."""
    if value is None and allow_none:
        return None
    ok = (not isinstance(value, bool) and isinstance(value, (int, np.integer, float))
          and float(value).is_integer() and value >= 1)
    if not ok:
        raise SpecError(f"{name} must be a positive whole number, got {value!r}")
    return int(value)


AUTO = "auto"


def bin_points(binned) -> int | None:
    """``binned=`` as grid values per binned column (None: exact passes, or ``"auto"``:
    chosen by the fit)."""
    if binned is None or binned == AUTO or binned is False:
        return None
    if binned is True:
        return DEFAULT_BIN_POINTS
    if (isinstance(binned, (int, np.integer)) and not isinstance(binned, bool)
            and int(binned) >= MIN_BIN_POINTS):
        return int(binned)
    raise SpecError(f"binned takes 'auto' (None), False, True or a number of grid values of "
                    f"at least {MIN_BIN_POINTS} for continuous columns, got {binned!r}")


@dataclass(frozen=True)
class RunOptions:
    """How a job reads and computes, validated when made. The options are those of
    :meth:`tallgam.Model.fit` (see there), plus ``tuning`` (:class:`Tuning`)."""

    batch_rows: int = DEFAULT_BATCH_ROWS
    threads: int | None = None
    progress: object = False
    cluster: object = None
    binned: bool | int | str | None = AUTO
    scratch: str | bool | None = None
    tuning: Tuning = field(default_factory=Tuning)
    checkpoint: str | None = None

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
        if self.checkpoint is not None:
            object.__setattr__(self, "checkpoint", _checkpoint_path(self.checkpoint))
        if self.tuning is None:
            object.__setattr__(self, "tuning", Tuning())
        elif not isinstance(self.tuning, Tuning):
            raise SpecError(f"tuning must be a tallgam.options.Tuning, got {self.tuning!r}")

    @property
    def bin_points(self) -> int | None:
        """Grid values per binned continuous column (None: exact passes, or chosen by the
        fit when :attr:`auto_binned`)."""
        return bin_points(self.binned)

    @property
    def auto_binned(self) -> bool:
        """The fit chooses between exact and binned passes (``binned`` None or "auto")."""
        return self.binned is None or (isinstance(self.binned, str) and self.binned == AUTO)

    def but(self, **changes) -> RunOptions:
        """A copy with some options changed (validated again)."""
        return replace(self, **changes)
