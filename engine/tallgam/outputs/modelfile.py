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
import os
import tempfile

import numpy as np

from tallgam.data.profile import DataProfile
from tallgam.errors import ModelFileError, TallgamError
from tallgam.passes.design import Design
from tallgam.solve.covariance import Covariance
from tallgam.terms.base import basis_from_dict, spec_from_dict

FORMAT = "tallgam-model"
SCHEMA_VERSION = 3
READABLE_VERSIONS = (1, 2, 3)
LIST_COLUMNS = 1000  # larger covariances are written as encoded arrays
_REQUIRED = ("model", "terms", "coefficients", "covariance", "edf", "smoothing",
             "statistics", "profile")


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


def atomic_write_text(path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file in the same directory."""
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".tallgam-", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise


def save(fit, path, list_columns: int = LIST_COLUMNS) -> None:
    """Write the model file of ``fit`` atomically (see :func:`to_dict`)."""
    atomic_write_text(path, json.dumps(_clean(to_dict(fit, list_columns)), indent=1,
                                       allow_nan=False))


def read(path) -> dict:
    """Read and check a model file written by :meth:`FitResult.save`: the parts of a fit
    (see :func:`decode`). ``tallgam.load`` turns them into a :class:`FitResult`."""
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except FileNotFoundError:
        raise ModelFileError(f"model file {os.fspath(path)!r} does not exist") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ModelFileError(f"{os.fspath(path)!r} is not a JSON model file: {exc}") from None
    return decode(data, str(path))


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
    try:
        bases = [basis_from_dict(t) for t in data["terms"]]
        labels = [spec_from_dict(t).label for t in data["model"].get("terms", [])]
        beta = np.asarray(data["coefficients"], dtype=np.float64)
        cov = _covariance(data["covariance"], version)
        profile = DataProfile.from_dict(data["profile"])
    except (TallgamError, KeyError, TypeError, ValueError, AttributeError) as exc:
        raise ModelFileError(f"{where} is inconsistent: {exc}") from None
    p = sum(b.n_raw for b in bases)
    if beta.shape != (p,) or cov.shape != (p, p):
        raise ModelFileError(f"{where} is inconsistent: its terms have {p} coefficients but it "
                             f"holds {beta.shape[0]} and a {cov.shape} covariance")
    if cov.structured and cov.eliminated not in Design(bases).slices:
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
        return Covariance(np.asarray(section, dtype=np.float64))
    if not isinstance(section, dict) or "dense" not in section:
        raise ValueError("the covariance section lacks its dense block")
    return Covariance.from_dict(section)
