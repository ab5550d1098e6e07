"""What every term kind offers: the spec and basis protocols, and the registry of kinds.

A *spec* (``tg.spline(...)``, ``tg.categorical(...)``, ...) is an immutable request made by
the user. The profile pass turns it into a *basis* (:meth:`TermSpec.build`): knots, level
codes, centring, a neighbour graph. A basis answers every question the rest of the engine
asks about a term, so no module outside a kind's own tests which kind it is:

* the design: its column group (``"dense"``: a few non-zeros per row at varying places;
  ``"levels"``: exactly one column per row), :meth:`Basis.encode` / :meth:`Basis.codes`;
* the dense stage: :meth:`Basis.penalties`, :meth:`Basis.constraint`,
  :meth:`Basis.fixed_smoothing`, ``removable``, ``eliminable``, :meth:`Basis.shape_rows`;
* scoring: :meth:`Basis.clamp_ranges`, :meth:`Basis.level_sets`;
* outputs: :meth:`Basis.coefficient_names`, :meth:`Basis.sql`, :meth:`Basis.effect_grid`,
  :meth:`Basis.reference`, ``figure``, :meth:`Basis.to_dict` / ``from_dict``.

A new kind is a module with a spec and a basis class registered with :func:`register`;
the defaults below cover most of the protocol (see ``tests/test_term_extension.py`` for a
kind defined entirely outside the package).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import MISSING, asdict, dataclass, field, fields
from typing import ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallgam.data.profile import DataProfile, tidy
from tallgam.errors import DataError, ModelFileError, SpecError, nearest, shorten
from tallgam.terms import sqltext

GRID_POINTS = 101  # input values at which a numeric term is tabulated and drawn
RENAMED_OPTIONS = {"select": "removable"}  # older model files' option names
OPTION_TYPES: dict[str, tuple] = {  # spec-file value types of options kinds share
    "kind": (str,), "column": (str,), "columns": (list,), "size": (int, list),
    "knots": (str, list), "smoothing": (int, float, list), "removable": (bool,),
    "title": (str,),
}


# ---------------------------------------------------------------------------------------
# specs


@dataclass(frozen=True)
class TermSpec:
    """Base of the term requests. Subclasses are frozen dataclasses with a ``kind``.

    Every kind takes ``title``, keyword only: the name people read in summaries, charts
    and table headers (default: the term's columns, see :attr:`Basis.title`)."""

    title: str | None = field(default=None, kw_only=True)

    kind = "term"
    removable = False  # an extra penalty lets the criterion remove the term (see spline)
    file_options: ClassVar[tuple[str, ...]] = ()  # options naming a file (found from a
    #                                              spec file's folder)
    extra_option_types: ClassVar[dict[str, tuple]] = {}  # a kind's own spec-file keys

    @property
    def label(self) -> str:
        """The term's identifier in results and files, e.g. ``spline(driver_age)``."""
        return f"{self.kind}({', '.join(self.inputs)})"

    def input_kinds(self) -> dict[str, str]:
        """Input columns and how they are read: ``"numeric"`` or ``"levels"``."""
        return {self.column: "numeric"}

    @property
    def inputs(self) -> tuple[str, ...]:
        return tuple(self.input_kinds())

    def check_with(self, terms: Sequence[TermSpec], criterion: str) -> None:
        """SpecError when this term cannot be fitted beside ``terms`` with ``criterion``."""
        if self.removable and criterion == "fixed":
            raise SpecError(f"{self.label}: removable adds a penalty whose smoothing the "
                            "criterion chooses; set criterion to \"reml\" (a term's own "
                            "smoothing stays fixed)")

    def build(self, profile: DataProfile) -> Basis:
        raise NotImplementedError

    @classmethod
    def options(cls) -> tuple[str, ...]:
        """The keyword names the constructor takes (also the spec-file keys)."""
        return tuple(f.name for f in fields(cls))

    @classmethod
    def option_types(cls) -> dict[str, tuple]:
        """Accepted spec-file value types per option (checked before the constructor)."""
        return {**OPTION_TYPES, **cls.extra_option_types}

    @classmethod
    def required(cls) -> tuple[str, ...]:
        """The options without a default."""
        return tuple(f.name for f in fields(cls)
                     if f.default is MISSING and f.default_factory is MISSING)

    def to_dict(self) -> dict:
        out = {"kind": self.kind}
        for k, v in asdict(self).items():
            if k == "title" and v is None:  # files without a title stay as they were
                continue
            out[k] = list(v) if isinstance(v, tuple) else v
        return out

    @classmethod
    def from_dict(cls, d: dict) -> TermSpec:
        """The spec from :meth:`to_dict` (lists back to tuples where the spec takes them;
        options of older model files under their new names)."""
        args = {RENAMED_OPTIONS.get(k, k) if RENAMED_OPTIONS.get(k) in cls.options() else k:
                (tuple(v) if isinstance(v, list) else v) for k, v in d.items()}
        return cls(**args)


# ---------------------------------------------------------------------------------------
# bases


class Basis:
    """A term made concrete by the data.

    Class attributes: ``group`` (``"dense"`` or ``"levels"``), ``width`` (non-zeros per
    row in the dense group), ``eliminable`` (a ridge-penalized level term the dense stage
    may eliminate by its Schur complement), ``figure`` (how its effect is drawn:
    ``"curve"``, ``"surface"`` or ``"levels"``; None picks from the inputs)."""

    group = "dense"
    width = 0
    eliminable = False
    figure: str | None = None

    def __init__(self, spec: TermSpec):
        self.spec = spec

    # ------------------------------------------------------------------ identity
    @property
    def kind(self) -> str:
        return self.spec.kind

    @property
    def label(self) -> str:
        return self.spec.label

    @property
    def title(self) -> str:
        """A name for people: the spec's ``title``, else :meth:`default_title`."""
        return self.spec.title or self.default_title()

    def default_title(self) -> str:
        """The input columns, joined by ×."""
        return " × ".join(self.inputs) if self.inputs else self.label

    @property
    def inputs(self) -> tuple[str, ...]:
        return self.spec.inputs

    @property
    def removable(self) -> bool:
        return bool(self.spec.removable)

    @property
    def drawn_as(self) -> str:
        """``figure`` or, when not set, what the inputs suggest."""
        if self.figure is not None:
            return self.figure
        kinds = list(self.spec.input_kinds().values())
        if self.group == "levels" or kinds == ["levels"]:
            return "levels"
        return "surface" if kinds.count("numeric") >= 2 else "curve"

    # ------------------------------------------------------------------ design
    @property
    def n_raw(self) -> int:
        """Raw coefficients (basis columns) of the term."""
        raise NotImplementedError

    def encode(self, cols: dict, idx: np.ndarray, val: np.ndarray, col0: int) -> None:
        """Fill ``idx`` (n × width, int32) and ``val`` (n × width) with this term's
        non-zeros for a block of rows (dense group); columns start at ``col0``."""
        raise NotImplementedError

    def codes(self, cols: dict) -> np.ndarray:
        """Level index (n,) of every row, −1 where the level is unknown (level group)."""
        (column, labels), = self.level_sets().items()
        return self.input_codes(cols, column)

    def input_codes(self, cols: dict, column: str) -> np.ndarray:
        """Codes (n,) of a level input's values among :meth:`level_sets`, −1 if unknown."""
        cache = self.__dict__.setdefault("_value_sets", {})
        if column not in cache:
            cache[column] = pa.array(self.level_sets()[column], type=pa.string())
        return level_codes(cols[column], cache[column])

    def knots_along(self, column: str) -> np.ndarray | None:
        """Sorted distinct positions along a numeric input where the term's design row
        changes form (knots); None when it varies smoothly everywhere (a straight line, a
        multiplier). Binned passes round values to a grid finer than these intervals."""
        return None

    # ------------------------------------------------------------------ dense stage
    def penalties(self) -> list[np.ndarray]:
        """Penalty matrices (n_raw × n_raw), one smoothing parameter each."""
        return []

    @property
    def n_penalties(self) -> int:
        return len(self.penalties())

    def fixed_smoothing(self) -> list[float | None]:
        """Per penalty a given smoothing parameter (in the units of :meth:`penalties` as
        the user reads them, see :meth:`penalty_exponents`), or None for the criterion to
        choose."""
        return [getattr(self.spec, "smoothing", None)] * self.n_penalties

    def penalty_exponents(self) -> list[int]:
        """Per penalty e with: the penalty in the units users read (∫f''(x)²dx on the
        column's own scale) = 2**e × the matrix :meth:`penalties` returns. Kinds that work
        on columns measured in an internal unit (see :func:`tallgam.terms.bsplines.
        unit_exponent`) say so here; smoothing parameters are converted with it."""
        return [0] * self.n_penalties

    def constraint(self, colsum: np.ndarray) -> np.ndarray:
        """Z (n_raw × n_free) with β = Zγ, from Σ wᵢ xᵢ (the weighted column sums)."""
        return np.eye(self.n_raw)

    def shape_rows(self) -> np.ndarray | None:
        """C (m × n_raw) with Cβ ≥ 0 for a shape-constrained term, else None."""
        return None

    # ------------------------------------------------------------------ scoring
    def clamp_ranges(self) -> dict[str, tuple[float, float]]:
        """Numeric inputs whose values are held inside a training range when scoring."""
        return {}

    def level_sets(self) -> dict[str, list[str]]:
        """Level inputs and their known levels (codes, unseen-level checks)."""
        return {}

    # ------------------------------------------------------------------ outputs
    def coefficient_names(self) -> list[str]:
        """One name per raw coefficient, as the coefficient table shows them."""
        return [f"basis {i + 1}" for i in range(self.n_raw)]

    def coefficient_units(self) -> float:
        """The coefficient table shows raw coefficients divided by this (per unit)."""
        return 1.0

    def intercept_contrast(self) -> np.ndarray | None:
        """c (n_raw,) such that cᵀβ is what this term adds to the intercept as a GLM user
        reads it (the term's value where its numeric input is 0, for terms reported per
        unit); None for terms that add nothing."""
        return None

    def sql(self, coef: np.ndarray) -> str:
        """DuckDB SQL of the term's contribution to the linear predictor."""
        raise SpecError(f"the term {self.label} cannot be exported to SQL")

    def effect_grid(self, points: int, profile: DataProfile | None) -> dict:
        """Input values at which to draw or tabulate the effect: numeric columns as arrays,
        level columns as lists of labels. The default places ``points`` values of a single
        numeric input where the training data are (:func:`data_points`) and lists every
        level of level inputs."""
        kinds = self.spec.input_kinds()
        numeric = [c for c, k in kinds.items() if k == "numeric"]
        if self.group == "levels" or not numeric:
            return {c: list(self.level_sets().get(c, [])) for c in kinds}
        if len(numeric) > 1:
            raise SpecError(f"the term {self.label} has several numeric inputs; its kind "
                            "must say where to draw it (effect_grid)")
        x = data_points(profile, numeric[0], points, self.clamp_ranges().get(numeric[0]))
        grid: dict = {numeric[0]: x}
        for c, lv in self.level_sets().items():
            grid = {numeric[0]: np.tile(x, len(lv)), c: [v for v in lv for _ in range(len(x))]}
        return grid

    def reference(self, profile: DataProfile | None, base_levels: dict[str, str]) -> dict:
        """The inputs at which the term's relativity is 1: numeric inputs at the exposure-
        weighted median of the training data, level inputs at the base level of their
        column (None: the average level, i.e. a coefficient of 0)."""
        out: dict = {}
        for c, kind in self.spec.input_kinds().items():
            if kind == "levels":
                out[c] = base_levels.get(c)
            else:
                p = profile.numeric(c) if profile is not None and profile.has_column(c) \
                    else None
                med = p.weighted_median() if p is not None else None
                out[c] = float(med if med is not None else (p.mean if p is not None else 0.0))
        return out

    def base_levels(self) -> dict[str, str]:
        """Level columns this term measures from a base level, and that level."""
        return {}

    def to_dict(self) -> dict:
        """Everything needed to rebuild the basis (with the spec) from the model file."""
        return {"spec": self.spec.to_dict()}

    @classmethod
    def from_dict(cls, spec: TermSpec, d: dict) -> Basis:
        raise NotImplementedError


class InterceptSpec(TermSpec):
    """The model's intercept (always present; not a user term)."""

    kind = "intercept"

    @property
    def label(self) -> str:
        return "intercept"

    def input_kinds(self) -> dict[str, str]:
        return {}


class InterceptBasis(Basis):
    width = 1

    def __init__(self, spec: TermSpec | None = None):
        super().__init__(spec or InterceptSpec())

    def default_title(self) -> str:
        return "intercept"

    @property
    def n_raw(self) -> int:
        return 1

    def encode(self, cols, idx, val, col0):
        idx[:, 0] = col0
        val[:, 0] = 1.0

    def coefficient_names(self):
        return ["(intercept)"]

    def sql(self, coef):
        return sqltext.num(coef[0])

    @classmethod
    def from_dict(cls, spec, d):
        return cls(spec)


# ---------------------------------------------------------------------------------------
# the registry of kinds

_KINDS: dict[str, tuple[type[TermSpec], type[Basis]]] = {}


def register(spec_cls: type[TermSpec], basis_cls: type[Basis]) -> None:
    """Make a term kind known: spec files, model files and ``spec_from_dict`` find it by
    ``spec_cls.kind``. Registering a kind twice replaces it."""
    kind = getattr(spec_cls, "kind", None)
    if not isinstance(kind, str) or not kind or kind == "term":
        raise SpecError(f"a term spec class needs a 'kind' name, got {kind!r}")
    _KINDS[kind] = (spec_cls, basis_cls)


def unregister(kind: str) -> None:
    """Forget a registered kind (e.g. one a test defined)."""
    if kind == "intercept":
        raise SpecError("the intercept cannot be unregistered")
    _KINDS.pop(kind, None)


def kinds() -> dict[str, type[TermSpec]]:
    """The registered term kinds: name → spec class."""
    return {k: v[0] for k, v in _KINDS.items() if k != "intercept"}


def spec_class(kind: str, where: str = "") -> type[TermSpec]:
    """The spec class of a kind (SpecError with a suggestion when unknown)."""
    if kind not in kinds():
        raise SpecError(f"{where}unknown term kind {kind!r}{nearest(str(kind), kinds())}; "
                        f"choose one of {', '.join(kinds())}")
    return _KINDS[kind][0]


def spec_from_dict(d: dict) -> TermSpec:
    d = dict(d)
    cls = spec_class(d.pop("kind", None))
    try:
        return cls.from_dict(d)
    except TypeError as exc:
        raise SpecError(f"bad arguments for a {cls.kind} term: {exc}") from None


def basis_from_dict(d: dict) -> Basis:
    """A basis from the model file (ModelFileError for unknown kinds)."""
    spec_d = dict(d["spec"])
    kind = spec_d.get("kind")
    if kind not in _KINDS:
        raise ModelFileError(f"the model file holds a term of kind {kind!r}, which this "
                             "tallgam does not know; register the kind before loading")
    spec_cls, basis_cls = _KINDS[kind]
    spec_d.pop("kind")
    return basis_cls.from_dict(spec_cls.from_dict(spec_d), d)


register(InterceptSpec, InterceptBasis)


# ---------------------------------------------------------------------------------------
# helpers for kinds


MAX_SIZE = 2000  # basis functions of one smooth term (margin): beyond, cost without gain


def check_size(where: str, size) -> None:
    if (isinstance(size, bool) or not isinstance(size, (int, float, np.integer, np.floating))
            or not float(size).is_integer() or int(size) < 4):
        raise SpecError(f"{where}: size must be an integer ≥ 4 (cubic splines), got "
                        f"{shorten(size)}")
    if int(size) > MAX_SIZE:
        raise SpecError(f"{where}: size {int(size):,} is more than the {MAX_SIZE:,} basis "
                        "functions a smooth term takes (its normal equations grow with the "
                        "square of the size and its solve with the cube, with nothing gained in "
                        "fit: the penalty sets the smoothness). Use a size of 5 to 50.")


def check_smoothing(where: str, smoothing) -> None:
    if smoothing is not None and not (np.isfinite(smoothing) and smoothing >= 0):
        raise SpecError(f"{where}: smoothing must be a number ≥ 0, got {smoothing!r}")


def few(items: Sequence[str], n: int = 8) -> str:
    """The first ``n`` items, quoted, and how many there are in all."""
    shown = ", ".join(repr(i) for i in items[:n])
    return shown + (f", ... ({len(items)} in all)" if len(items) > n else "")


def natural_key(label: str):
    """Sort key: numbers numerically, then text."""
    try:
        return (0, float(label), label)
    except ValueError:
        return (1, 0.0, label)


def level_codes(values, value_set: pa.Array) -> np.ndarray:
    """Index (n,) int32 of every value in ``value_set``; −1 for unknown values or NULL."""
    if not isinstance(values, (pa.Array, pa.ChunkedArray)):
        values = pa.array(values, type=pa.string())
    idx = pc.index_in(values, value_set=value_set)
    return idx.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int32)


def sum_to_zero(colsum: np.ndarray) -> np.ndarray:
    """Orthonormal basis Z of {β : colsumᵀβ = 0}, shape (k, k−1), by a Householder QR."""
    c = np.asarray(colsum, dtype=np.float64)
    norm = np.linalg.norm(c)
    if not norm > 0:
        raise DataError("a term's basis columns sum to zero over the data (no weight)")
    q, _ = np.linalg.qr(c[:, None] / norm, mode="complete")
    return q[:, 1:]


def block_diag(blocks: list[np.ndarray]) -> np.ndarray:
    from scipy.linalg import block_diag as scipy_block_diag

    return scipy_block_diag(*blocks)


def data_points(profile: DataProfile | None, column: str, points: int,
                span: tuple[float, float] | None = None) -> np.ndarray:
    """Up to ``points`` values of a numeric column placed where the training data are:
    every value of a column with that few distinct values, else its exposure-weighted
    quantiles with the minimum and maximum (``span``, when given, sets the extremes).
    Without a histogram, an even grid over the span."""
    p = profile.numeric(column) if profile is not None and profile.has_column(column) \
        else None
    lo, hi = span if span is not None else ((p.min, p.max) if p is not None else (0.0, 1.0))
    if p is None or not p.distinct:
        return np.linspace(lo, hi, points)
    if p.distinct <= points:
        x = np.asarray(p.values, dtype=np.float64)
    else:
        x = p.weighted_quantiles(np.linspace(0.0, 1.0, points))
    # the exact ends, and the values between them that stay distinct at 12 significant
    # digits (what tables write), so a table never holds two rows that print the same
    inner = np.unique(tidy(x[(x > lo) & (x < hi)]))
    inner = inner[(inner > tidy([lo])[0]) & (inner < tidy([hi])[0])]
    return np.unique(np.concatenate([[lo], inner, [hi]]))


def term_matrix(b: Basis, grid: dict) -> np.ndarray:
    """The dense rows (n × n_raw) of one term at the given input values."""
    cols = {k: (pa.array(v, type=pa.string()) if isinstance(v, list) else
                np.ascontiguousarray(v, dtype=np.float64)) for k, v in grid.items()}
    n = len(next(iter(grid.values()))) if grid else 1
    out = np.zeros((n, b.n_raw))
    if b.group == "levels":
        code = b.codes(cols)
        ok = code >= 0
        out[np.flatnonzero(ok), code[ok]] = 1.0
        return out
    idx = np.empty((n, b.width), dtype=np.int32)
    val = np.empty((n, b.width))
    b.encode(cols, idx, val, 0)
    np.add.at(out, (np.repeat(np.arange(n), b.width), idx.ravel()), val.ravel())
    return out
