"""How a tariff bands its factors: the band rules a user writes, and automatic bands.

A *band rule* says how a numeric rating factor is cut into bands:

* ``[21, 25, 30, ...]`` — cut points: bands [−∞, 21), [21, 25), ..., [last, ∞), each closed
  on the left;
* ``"auto"`` (the default) — the fewest bands such that, within every band, the fitted
  relativity stays within ``tolerance`` of the band's value (``|r(x) / r_band − 1| ≤ tol`` at
  every training value x of the band), preferring bands that hold at least ``min_exposure``;
* ``"each"`` — one band per distinct value of the training histogram;
* ``"none"`` — not banded: the factor keeps its smooth fitted relativity.

A rule may also be a table ``{cuts = [...], tolerance = 0.01, min_exposure = 500}`` (one
of ``cuts`` or ``rule``, with settings of its own). For a level column the entry is a map of
groups, ``{north = ["R01", "R02"], south = ["R03"]}``: levels of a group share one
relativity, levels in no group keep their own.

The same structure comes from Python (``bands={"driver_age": [21, 25], ...}``) or from a TOML
file: a ``[bands]`` table with one entry per column and an optional ``[tariff]`` table with
``tolerance``, ``min_exposure`` and ``reference`` (a table of reference values). The
``[bands]`` and ``[tariff]`` tables may sit in a model's spec file beside its terms.

:func:`fewest_bands` finds automatic bands by dynamic programming over the values of a
training histogram (exact for the rule above, not a greedy approximation).
"""

from __future__ import annotations

import math
import os
import sys
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from tallgam.errors import SpecError, nearest

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

RULES = ("auto", "each", "none")
DEFAULT_TOLERANCE = 0.02          # ±2% of the band's value
MIN_EXPOSURE_SHARE = 0.01         # default minimum per band: 1% of the training exposure
SETTINGS_KEYS = ("tolerance", "min_exposure", "reference")
RULE_KEYS = ("rule", "cuts", "tolerance", "min_exposure")
SLACK = 1e-12                     # rounding room in the tolerance comparisons


@dataclass(frozen=True)
class BandRule:
    """How one numeric column is banded: ``method`` is ``"cuts"``, ``"auto"``, ``"each"``
    or ``"none"``; ``tolerance`` and ``min_exposure`` (None: the tariff's) for ``"auto"``."""

    method: str = "auto"
    cuts: tuple[float, ...] = ()
    tolerance: float | None = None
    min_exposure: float | None = None

    def describe(self) -> dict:
        """The rule as the tariff's manifest records it."""
        out: dict = {"method": self.method}
        if self.method == "cuts":
            out["cuts"] = list(self.cuts)
        if self.tolerance is not None:
            out["tolerance"] = self.tolerance
        if self.min_exposure is not None:
            out["min_exposure"] = self.min_exposure
        return out


@dataclass
class BandSpec:
    """Everything a user says about banding: rules per numeric column, level groups per
    level column, and the defaults (``tolerance``, ``min_exposure``) and reference point
    (column → value) of the tariff. Entries are checked against the models when the tariff
    is built (:meth:`check_columns`)."""

    rules: dict[str, BandRule] = field(default_factory=dict)
    groups: dict[str, dict[str, list[str]]] = field(default_factory=dict)
    tolerance: float | None = None
    min_exposure: float | None = None
    reference: dict = field(default_factory=dict)
    default: BandRule = field(default_factory=BandRule)

    def rule(self, column: str) -> BandRule:
        return self.rules.get(column, self.default)

    def check_columns(self, kinds: dict[str, str]) -> None:
        """SpecError for entries naming no column of the models, or of the wrong kind."""
        for col in [*self.rules, *self.groups, *self.reference]:
            if col not in kinds:
                raise SpecError(f"bands: {col!r} is not a rating factor of the model(s)"
                                f"{nearest(col, kinds)}; factors are {', '.join(kinds)}")
        for col in self.rules:
            if kinds[col] != "numeric":
                raise SpecError(f"bands: {col!r} is a level column; give it groups "
                                f"({{group = [levels...]}}), not cut points or a rule")
        for col in self.groups:
            if kinds[col] != "levels":
                raise SpecError(f"bands: {col!r} is numeric; give it cut points or one of "
                                f"{', '.join(RULES)}, not groups")

    def group_of(self, column: str) -> dict[str, str]:
        """level → group name for a level column (levels in no group are absent)."""
        out: dict[str, str] = {}
        for name, levels in self.groups.get(column, {}).items():
            for lev in levels:
                if lev in out:
                    raise SpecError(f"bands: level {lev!r} of {column!r} is in two groups, "
                                    f"{out[lev]!r} and {name!r}")
                out[lev] = name
        return out


def _number(where: str, value, *, low: float = 0.0, inclusive: bool = True) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise SpecError(f"{where} must be a number, got {value!r}")
    if value < low or (value == low and not inclusive):
        raise SpecError(f"{where} must be {'≥' if inclusive else '>'} {low:g}, got {value!r}")
    return float(value)


def _cuts(where: str, values) -> tuple[float, ...]:
    if not isinstance(values, (list, tuple)) or not values:
        raise SpecError(f"{where}: cut points are a non-empty list of numbers, got {values!r}")
    cuts = [_number(f"{where}: a cut point", v, low=-math.inf) for v in values]
    if any(b <= a for a, b in zip(cuts, cuts[1:])):
        raise SpecError(f"{where}: cut points must increase, got {list(values)!r}")
    return tuple(cuts)


def parse_rule(column: str, entry) -> BandRule | dict[str, list[str]]:
    """One ``[bands]`` entry: a :class:`BandRule` for a numeric column, or a map of
    groups (group → levels) for a level column."""
    where = f"bands.{column}"
    if isinstance(entry, str):
        if entry not in RULES:
            raise SpecError(f"{where}: unknown rule {entry!r}{nearest(entry, RULES)}; use cut "
                            f"points or one of {', '.join(RULES)}")
        return BandRule(entry)
    if isinstance(entry, (list, tuple)):
        return BandRule("cuts", _cuts(where, entry))
    if not isinstance(entry, Mapping):
        raise SpecError(f"{where}: give cut points, one of {', '.join(RULES)}, a table of "
                        f"settings or a table of level groups, got {entry!r}")
    if entry and all(isinstance(v, (list, tuple)) and all(isinstance(x, str) for x in v)
                     for v in entry.values()) and not set(entry) & set(RULE_KEYS):
        return {str(g): [str(x) for x in v] for g, v in entry.items()}
    unknown = [k for k in entry if k not in RULE_KEYS]
    if unknown:
        raise SpecError(f"{where}: unknown key {unknown[0]!r}{nearest(unknown[0], RULE_KEYS)}; "
                        f"a rule table takes {', '.join(RULE_KEYS)} (groups of a level "
                        "column are lists of level names)")
    if "cuts" in entry and "rule" in entry:
        raise SpecError(f"{where}: give either cuts or rule, not both")
    tol = entry.get("tolerance")
    low = entry.get("min_exposure")
    base = (BandRule("cuts", _cuts(where, entry["cuts"])) if "cuts" in entry
            else parse_rule(column, entry.get("rule", "auto")))
    return BandRule(base.method, base.cuts,
                    None if tol is None else _number(f"{where}.tolerance", tol),
                    None if low is None else _number(f"{where}.min_exposure", low))


def band_spec(bands=None, *, tolerance: float | None = None,
              min_exposure: float | None = None, reference: dict | None = None) -> BandSpec:
    """A :class:`BandSpec` from ``bands`` — None (automatic bands everywhere), a rule name
    for every numeric column (``"auto"``, ``"each"``, ``"none"``), a dict of entries (see
    the module docstring) or the path of a TOML file — with the keyword settings taking
    precedence over the file's ``[tariff]`` table."""
    settings: dict = {}
    entries: Mapping = {}
    default = BandRule()
    if isinstance(bands, (str, os.PathLike)) and os.fspath(bands) not in RULES:
        entries, settings = read_band_file(bands)
    elif isinstance(bands, str):
        default = BandRule(bands)
    elif isinstance(bands, Mapping):
        entries = bands
    elif bands is not None:
        raise SpecError(f"bands must be a dict, a TOML file or one of {', '.join(RULES)}, "
                        f"got {type(bands).__name__}")
    spec = BandSpec(default=default)
    for col, entry in entries.items():
        parsed = parse_rule(str(col), entry)
        if isinstance(parsed, BandRule):
            spec.rules[str(col)] = parsed
        else:
            spec.groups[str(col)] = parsed
    tol = tolerance if tolerance is not None else settings.get("tolerance")
    low = min_exposure if min_exposure is not None else settings.get("min_exposure")
    spec.tolerance = DEFAULT_TOLERANCE if tol is None else _number("tolerance", tol)
    spec.min_exposure = None if low is None else _number("min_exposure", low)
    ref = dict(settings.get("reference") or {})
    ref.update(reference or {})
    spec.reference = ref
    return spec


def read_band_file(path) -> tuple[dict, dict]:
    """The ``[bands]`` and ``[tariff]`` tables of a TOML file (a bands file, or a model's
    spec file holding them)."""
    path = os.fspath(path)
    try:
        with open(path, "rb") as fh:
            raw = tomllib.load(fh)
    except OSError as exc:
        raise SpecError(f"cannot read the bands file {path!r}: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"{path} is not valid TOML: {exc}") from None
    is_model_spec = "response" in raw or "term" in raw
    if not is_model_spec:
        unknown = [k for k in raw if k not in ("bands", "tariff")]
        if unknown:
            raise SpecError(f"{path}: unknown key {unknown[0]!r}"
                            f"{nearest(unknown[0], ('bands', 'tariff'))}; a bands file holds "
                            "a [bands] table and an optional [tariff] table")
    bands, settings = raw.get("bands", {}), raw.get("tariff", {})
    if not isinstance(bands, dict) or not isinstance(settings, dict):
        raise SpecError(f"{path}: [bands] and [tariff] must be tables")
    unknown = [k for k in settings if k not in SETTINGS_KEYS]
    if unknown:
        raise SpecError(f"{path}: unknown key {unknown[0]!r} in [tariff]"
                        f"{nearest(unknown[0], SETTINGS_KEYS)}; it takes "
                        f"{', '.join(SETTINGS_KEYS)}")
    if not isinstance(settings.get("reference", {}), dict):
        raise SpecError(f"{path}: [tariff] reference is a table of column = value")
    return bands, settings


# ---------------------------------------------------------------------------------------
# automatic bands


def fewest_bands(weight: np.ndarray, relativity: np.ndarray, tolerance: float,
                 min_weight: float = 0.0) -> np.ndarray:
    """Start indices of the fewest contiguous bands of histogram points such that every
    band keeps its points' relativity within ``tolerance`` of the band's value; among
    those, as few bands as possible hold less than ``min_weight``.

    ``weight`` (m,): exposure of the points, in order of the input's values.
    ``relativity`` (m,): the fitted relativity at each point; the band's value is the
    weight-weighted mean and the rule is |r / r_band − 1| ≤ tolerance for every point.
    ``relativity`` (m, u): u curves (e.g. a surface along one margin, one curve per value
    of the other margin); the rule is then max r / min r ≤ 1 + tolerance within the band
    along every curve, which keeps each curve within ``tolerance`` of any value between
    its extremes.

    Dynamic programming over the end point of the last band, O(m²·u) work and O(m) memory:
    the minimum is exact, not the result of a greedy pass. A one-point band always meets
    the rule, so a banding always exists; bands below ``min_weight`` are counted as a
    heavy extra cost, so they remain only where the tolerance leaves no other way.
    """
    w = np.maximum(np.asarray(weight, dtype=np.float64), 0.0)
    r = np.asarray(relativity, dtype=np.float64)
    m = len(w)
    if m == 0:
        return np.zeros(0, dtype=np.int64)
    curves = r.ndim == 2
    cw = np.concatenate([[0.0], np.cumsum(w)])
    cwr = None if curves else np.concatenate([[0.0], np.cumsum(w * r)])
    big = float(m + 1)
    best = np.full(m + 1, np.inf)
    best[0] = 0.0
    start = np.zeros(m + 1, dtype=np.int64)
    for j in range(1, m + 1):            # the last band holds points i .. j−1
        seg = r[j - 1::-1]               # points j−1, j−2, ..., 0
        top = np.maximum.accumulate(seg, axis=0)
        low = np.minimum.accumulate(seg, axis=0)
        i = np.arange(j - 1, -1, -1)
        held = cw[j] - cw[i]
        if curves:
            ok = np.all(top <= (1.0 + tolerance + SLACK) * low, axis=1)
        else:
            mean = np.where(held > 0, (cwr[j] - cwr[i]) / np.where(held > 0, held, 1.0),
                            0.5 * (top + low))
            ok = (top <= (1.0 + tolerance + SLACK) * mean) & \
                 (low >= (1.0 - tolerance - SLACK) * mean)
        cost = best[i] + 1.0 + big * (held < min_weight)
        cost[~ok] = np.inf
        k = int(np.argmin(cost[::-1]))   # ties: the longest last band
        k = len(cost) - 1 - k
        best[j] = cost[k]
        start[j] = i[k]
    starts = []
    j = m
    while j > 0:
        starts.append(int(start[j]))
        j = int(start[j])
    return np.array(starts[::-1], dtype=np.int64)


def within_tolerance(weight: np.ndarray, relativity: np.ndarray, cell: np.ndarray,
                     n_cells: int, tolerance: float) -> bool:
    """Whether every cell keeps its points' relativity within ``tolerance`` of the cell's
    weighted mean (``cell``: the cell of every point, all arrays flat)."""
    held = np.bincount(cell, weights=weight, minlength=n_cells)
    count = np.bincount(cell, minlength=n_cells)
    total = np.bincount(cell, weights=weight * relativity, minlength=n_cells)
    plain = np.bincount(cell, weights=relativity, minlength=n_cells)
    mean = np.where(held > 0, total / np.where(held > 0, held, 1.0),
                    plain / np.maximum(count, 1))
    top = np.full(n_cells, -np.inf)
    low = np.full(n_cells, np.inf)
    np.maximum.at(top, cell, relativity)
    np.minimum.at(low, cell, relativity)
    used = count > 0
    return bool(np.all(top[used] <= (1.0 + tolerance + SLACK) * mean[used])
                and np.all(low[used] >= (1.0 - tolerance - SLACK) * mean[used]))


def coarsened(values: list[np.ndarray], cuts: list[np.ndarray], weight: np.ndarray,
              relativity: np.ndarray, tolerance: float) -> list[np.ndarray]:
    """Cut points of several margins with cuts removed, one at a time, as long as every
    cell of the product still keeps the relativity within ``tolerance`` of its value.

    ``values`` per margin the grid's values; ``weight`` and ``relativity`` have the grid's
    shape. Per-margin bands from :func:`fewest_bands` bound the spread of each margin
    separately, which is safe but fine-grained; the cells' own rule is what matters."""
    cuts = [np.asarray(c, dtype=np.float64) for c in cuts]
    w, r = weight.ravel(), relativity.ravel()

    def ok(trial: list[np.ndarray]) -> bool:
        idx = [np.searchsorted(c, v, side="right") for c, v in zip(trial, values)]
        shape = tuple(len(c) + 1 for c in trial)
        cell = np.ravel_multi_index(np.meshgrid(*idx, indexing="ij"), shape).ravel()
        return within_tolerance(w, r, cell, int(np.prod(shape)), tolerance)

    changed = True
    while changed:
        changed = False
        for d in range(len(cuts)):
            i = 0
            while i < len(cuts[d]):
                trial = list(cuts)
                trial[d] = np.delete(cuts[d], i)
                if ok(trial):
                    cuts, changed = trial, True
                else:
                    i += 1
    return cuts


def cuts_from_starts(values: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Cut points of bands starting at the given histogram points. Any cut in
    (previous value, first value of the band] splits the training values alike; the one
    with the fewest significant digits is taken (25 for whole numbers, 60 rather than
    60.99256 between grid values 53.5 and 61)."""
    v = np.asarray(values, dtype=np.float64)
    return np.array([roundest(v[i - 1], v[i]) for i in np.asarray(starts[1:], dtype=np.int64)],
                    dtype=np.float64)


def roundest(low: float, high: float) -> float:
    """The number with the fewest significant digits in (low, high]."""
    if low < 0.0 <= high:
        return 0.0
    if high < 0.0:
        return -_roundest_at_least(-high, -low)
    for digits in range(1, 18):
        step = 10.0 ** (math.floor(math.log10(high)) - digits + 1)
        candidate = float(f"{math.floor(high / step) * step:.{digits}g}")
        if low < candidate <= high:
            return candidate
    return float(high)


def _roundest_at_least(low: float, high: float) -> float:
    """The number with the fewest significant digits in [low, high), 0 < low < high."""
    for digits in range(1, 18):
        step = 10.0 ** (math.floor(math.log10(high)) - digits + 1)
        candidate = float(f"{math.ceil(low / step) * step:.{digits}g}")
        if low <= candidate < high:
            return candidate
    return float(low)


class CellSums:
    """Sums per cell of a factor over training points or rows: weight, weighted
    relativity (overall and per model), points, and the relativity's range."""

    def __init__(self, n: int, roles: list[str]):
        self.n = n
        self.weight = np.zeros(n)
        self.weighted = np.zeros(n)
        self.count = np.zeros(n)
        self.plain = np.zeros(n)
        self.low = np.full(n, np.inf)
        self.high = np.full(n, -np.inf)
        self.model_weighted = {r: np.zeros(n) for r in roles}
        self.model_plain = {r: np.zeros(n) for r in roles}

    def add(self, cells: np.ndarray, weight: np.ndarray, relativity: np.ndarray,
            parts: dict[str, np.ndarray]) -> None:
        """Add points: their cell (−1: none), weight, relativity and each model's part."""
        ok = cells >= 0
        c, w, r = cells[ok], np.asarray(weight, np.float64)[ok], relativity[ok]
        n = self.n
        self.weight += np.bincount(c, weights=w, minlength=n)
        self.weighted += np.bincount(c, weights=w * r, minlength=n)
        self.count += np.bincount(c, minlength=n)
        self.plain += np.bincount(c, weights=r, minlength=n)
        np.minimum.at(self.low, c, r)
        np.maximum.at(self.high, c, r)
        for role, v in parts.items():
            v = v[ok]
            self.model_weighted[role] += np.bincount(c, weights=w * v, minlength=n)
            self.model_plain[role] += np.bincount(c, weights=v, minlength=n)

    def _mean(self, weighted: np.ndarray, plain: np.ndarray) -> np.ndarray:
        out = np.full(self.n, np.nan)
        pos = self.weight > 0
        out[pos] = weighted[pos] / self.weight[pos]
        flat = ~pos & (self.count > 0)          # points without weight: a plain mean
        out[flat] = plain[flat] / self.count[flat]
        return out

    def means(self) -> tuple[np.ndarray, np.ndarray]:
        """Weighted mean relativity per cell (NaN where empty) and which cells hold points."""
        return self._mean(self.weighted, self.plain), self.count > 0

    def model_means(self) -> dict[str, np.ndarray]:
        return {r: self._mean(self.model_weighted[r], self.model_plain[r])
                for r in self.model_weighted}
