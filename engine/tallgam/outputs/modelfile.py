"""The model file: versioned JSON holding everything needed to score and to explain.

Layout (``schema_version`` 3)::

    {"format": "tallgam-model", "schema_version": 3,
     "model": {...Model.to_dict()...},
     "terms": [{"spec": {...}, "knots"/"levels"/"centre"...}, ...],   # intercept first
     "coefficients": [...],            # raw, one per basis column
     "covariance": [[...], ...]        # raw, Bayesian, scale included: a p × p list, or
                 | {"dense": ARRAY,    # all columns, or all but an eliminated term's
                    "eliminated": null | {"columns": [start, stop], "diag": ARRAY,
                                          "cross": ARRAY}},
     "edf": {...}, "smoothing": {...}, "statistics": {...},
     "profile": {"rows", "weight_name", "roles": {...}, "columns": {...}},
     "history": [...], "notes": [...], "provenance": {...}, "expressions": {...}}

ARRAY is {"dtype": "float64", "shape": [...], "base64": ...}, the little-endian bytes
(see :class:`tallgam.solve.covariance.Covariance`): compact for covariances with many
thousand entries, and exact; a plain covariance of at most :data:`LIST_COLUMNS` columns is
written as a list of lists. Files of schema versions 1 and 2 (older releases) are read too.
Other floats are written with Python's shortest round-trip repr, so a loaded model predicts
bit for bit as the saved one. Loading validates the structure and the version and refuses
anything else; nothing in the file is ever executed.
"""

from __future__ import annotations

import json
import math
import numbers
import os

import numpy as np

from tallgam.atomic import write_text
from tallgam.data.profile import DataProfile
from tallgam.errors import ModelFileError, TallgamError, clip, shorten
from tallgam.passes.design import Design
from tallgam.solve.covariance import Covariance
from tallgam.terms.base import basis_from_dict, spec_from_dict

FORMAT = "tallgam-model"
SCHEMA_VERSION = 3
READABLE_VERSIONS = (1, 2, 3)
LIST_COLUMNS = 1000  # larger covariances are written as encoded arrays
_REQUIRED = ("model", "terms", "coefficients", "covariance", "edf", "smoothing",
             "statistics", "profile")
#: the type each section must have (checked on load)
_SECTION_TYPES = {"model": dict, "terms": list, "coefficients": list,
                  "covariance": (list, dict), "edf": dict, "smoothing": dict,
                  "statistics": dict, "profile": dict, "history": list, "notes": list,
                  "provenance": dict, "expressions": dict}


def to_dict(fit, list_columns: int = LIST_COLUMNS) -> dict:
    """The model file's JSON of ``fit``; a plain covariance of at most ``list_columns``
    columns is written as a list of lists, others as encoded arrays."""
    cov = fit.covariance
    as_list = not cov.structured and cov.p <= list_columns
    return {
        "format": FORMAT,
        "schema_version": SCHEMA_VERSION,
        "model": fit.model.to_dict(),
        "terms": [b.to_dict() for b in fit.bases],
        "coefficients": fit.coefficients_raw.tolist(),
        "covariance": cov.dense.tolist() if as_list else cov.to_dict(),
        "edf": fit.edf,
        "smoothing": fit.smoothing,
        "statistics": fit.statistics,
        "profile": fit.profile.to_dict(),
        "history": fit.history,
        "notes": fit.notes,
        "provenance": fit.provenance,
        "expressions": fit.expressions,
    }


def _clean(obj):
    """JSON cannot hold NaN/inf: write them as null."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.generic):
        return _clean(obj.item())
    return obj


def save(fit, path, list_columns: int = LIST_COLUMNS) -> None:
    """Write the model file of ``fit`` atomically (see :func:`to_dict`)."""
    write_text(path, json.dumps(_clean(to_dict(fit, list_columns)), indent=1, allow_nan=False))


def read(path) -> dict:
    """Read and check a model file written by :meth:`FitResult.save`: the parts of a fit
    (see :func:`decode`). ``tallgam.load`` turns them into a :class:`FitResult`."""
    where = shorten(os.fspath(path))
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh, parse_constant=_NonFinite)
    except FileNotFoundError:
        raise ModelFileError(f"model file {where} does not exist") from None
    except IsADirectoryError:
        raise ModelFileError(f"{where} is a folder, not a model file") from None
    except PermissionError:
        raise ModelFileError(f"no permission to read the model file {where}") from None
    except (json.JSONDecodeError, UnicodeDecodeError, RecursionError) as exc:
        raise ModelFileError(f"{where} is not a JSON model file: {clip(exc, 300)}") from None
    return decode(data, where)


class _NonFinite(str):
    """A NaN or Infinity literal met while parsing (JSON has none; tallgam never writes one)."""


def decode(data: dict, where: str = "the model file") -> dict:
    """The checked parts of a model file's JSON: ``model`` (the model's dict), ``bases``,
    ``beta``, ``covariance``, ``edf``, ``smoothing``, ``statistics``, ``profile``,
    ``history``, ``notes``, ``provenance``, ``expressions``."""
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise ModelFileError(f"{where} is not a tallgam model file (no format {FORMAT!r})")
    version = data.get("schema_version")
    if version not in READABLE_VERSIONS:
        raise ModelFileError(
            f"{where} has schema version {version!r}; this tallgam reads versions "
            f"{', '.join(map(str, READABLE_VERSIONS))}. Refit the model or use the tallgam "
            "release that wrote it.")
    missing = [k for k in _REQUIRED if k not in data]
    if missing:
        raise ModelFileError(f"{where} lacks the section(s) {', '.join(missing)}")
    _check_sections(data, where)
    try:
        bases = [basis_from_dict(t) for t in data["terms"]]
        labels = [spec_from_dict(t).label for t in data["model"].get("terms", [])]
        profile = DataProfile.from_dict(data["profile"])
    except (TallgamError, KeyError, TypeError, ValueError, AttributeError) as exc:
        raise ModelFileError(f"{where} is inconsistent: {clip(exc, 300)}") from None
    p = sum(b.n_raw for b in bases)
    beta = _coefficients(data["coefficients"], bases, p, where)
    try:
        cov = _covariance(data["covariance"], version)
    except (TallgamError, KeyError, TypeError, ValueError, AttributeError) as exc:
        raise ModelFileError(f"{where} is inconsistent: {clip(exc, 300)}") from None
    if cov.shape != (p, p):
        raise ModelFileError(f"{where} is inconsistent: its terms have {p} coefficients but it "
                             f"holds a {cov.shape} covariance")
    _check_finite_covariance(cov, where)
    if cov.structured and cov.eliminated_columns not in Design(bases).slices:
        raise ModelFileError(f"{where} is inconsistent: the covariance's eliminated columns "
                             "are not those of a term")
    if [b.spec.label for b in bases[1:]] != labels:
        raise ModelFileError(f"{where} is inconsistent: the terms do not match the model")
    return {"model": data["model"], "bases": bases, "beta": beta, "covariance": cov,
            "edf": data["edf"], "smoothing": data["smoothing"],
            "statistics": data["statistics"], "profile": profile,
            "history": data.get("history", []), "notes": data.get("notes", []),
            "provenance": data.get("provenance", {}),
            "expressions": data.get("expressions", {})}


def _covariance(section, version: int) -> Covariance:
    """The covariance section: a p × p list of lists (version 1) or encoded arrays."""
    if version == 1 or isinstance(section, list):
        if not isinstance(section, list) or not all(isinstance(r, list) for r in section):
            raise ValueError("the covariance must be a list of rows")
        for i, row in enumerate(section):
            for j, v in enumerate(row):
                if not _is_number(v):
                    raise ValueError(f"covariance entry [{i}][{j}] is {_what(v)}, not a number")
        return Covariance(np.asarray(section, dtype=np.float64))
    if not isinstance(section, dict) or "dense" not in section:
        raise ValueError("the covariance section lacks its dense block")
    return Covariance.from_dict(section)


def _is_number(v) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, (bool, _NonFinite))


def _what(v) -> str:
    if v is None:
        return "null"
    if isinstance(v, _NonFinite):
        return str(v)
    if isinstance(v, float) and not math.isfinite(v):
        return repr(v)
    return f"{type(v).__name__} {shorten(v, 40)}"


def _check_sections(data: dict, where: str) -> None:
    """Each section of the type it must have, and no NaN/Infinity anywhere (JSON cannot hold
    them and tallgam writes null instead, so one means the file was made or edited
    elsewhere); no null among the numbers of a term's arrays (knots, ranges...)."""
    for key, typ in _SECTION_TYPES.items():
        if key in data and not isinstance(data[key], typ):
            raise ModelFileError(f"{where} is inconsistent: the section {key!r} is a "
                                 f"{type(data[key]).__name__}")
    if not all(isinstance(t, dict) for t in data["terms"]):
        raise ModelFileError(f"{where} is inconsistent: every entry of 'terms' must be an object")
    scale = data["statistics"].get("scale")
    if scale is not None and not (_is_number(scale) and math.isfinite(scale) and scale > 0):
        raise ModelFileError(f"{where} is damaged: statistics.scale is {_what(scale)}, not a "
                             "positive number; save the model again from its fit or refit it")
    for key, value in data.items():
        if key in ("coefficients", "covariance"):  # checked with their positions below
            continue
        bad = _first_bad_number(value, key, key == "terms")
        if bad:
            raise ModelFileError(f"{where} is damaged: {bad}; save the model again from its fit "
                                 "or refit it")


def _first_bad_number(value, path: str, strict_lists: bool) -> str | None:
    """Where ``value`` holds a non-finite number, or (``strict_lists``) a null in a list of
    numbers; None when nowhere. Walks without recursion (files may be deeply nested)."""
    stack = [(value, path)]
    while stack:
        v, at = stack.pop()
        if isinstance(v, _NonFinite) or (isinstance(v, float) and not math.isfinite(v)):
            return f"{at} is {_what(v)}"
        if isinstance(v, dict):
            stack.extend((x, f"{at}.{k}") for k, x in v.items())
        elif isinstance(v, list):
            if strict_lists and None in v and any(_is_number(x) for x in v):
                return f"{at}[{v.index(None)}] is null among numbers"
            stack.extend((x, f"{at}[{i}]") for i, x in enumerate(v))
    return None


def _coefficients(values: list, bases, p: int, where: str) -> np.ndarray:
    """The coefficients as float64, refused unless exactly ``p`` finite numbers; a bad entry
    is named with its term."""
    if len(values) != p:
        raise ModelFileError(f"{where} is inconsistent: its terms have {p} coefficients but it "
                             f"holds {len(values)}")
    for i, v in enumerate(values):
        if not _is_number(v) or not math.isfinite(v):
            start = 0
            for b in bases:
                if i < start + b.n_raw:
                    break
                start += b.n_raw
            raise ModelFileError(
                f"{where} is damaged: coefficient {i} (number {i - start} of term {b.label!r}) "
                f"is {_what(v)}; a model cannot predict with it. Save the model again from its "
                "fit or refit it")
    return np.asarray(values, dtype=np.float64)


def _check_finite_covariance(cov: Covariance, where: str) -> None:
    parts = [("covariance", cov.dense)]
    if cov.structured:
        parts += [("covariance diagonal of the eliminated term", cov.diag),
                  ("covariance cross block", cov.cross)]
    for name, a in parts:
        bad = np.argwhere(~np.isfinite(a))
        if len(bad):
            at = "".join(f"[{int(k)}]" for k in bad[0])
            raise ModelFileError(f"{where} is damaged: {name} entry {at} is "
                                 f"{float(a[tuple(bad[0])])!r}; save the model again or "
                                 "refit it")
