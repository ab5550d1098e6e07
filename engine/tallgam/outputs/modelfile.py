"""The model file: versioned JSON holding everything needed to score and to explain.

Layout (``schema_version`` 2)::

    {"format": "tallgam-model", "schema_version": 1 | 2,
     "model": {...Model.to_dict()...},
     "terms": [{"spec": {...}, "knots"/"levels"/"centre"...}, ...],   # intercept first
     "coefficients": [...],            # raw, one per basis column
     "covariance": {                   # raw, Bayesian, scale included
        "dense": ARRAY,                # all columns, or all but an eliminated term's
        "eliminated": null | {"columns": [start, stop], "diag": ARRAY, "cross": ARRAY}},
     "edf": {...}, "smoothing": {...}, "statistics": {...},
     "profile": {...}, "history": [...], "notes": [...], "provenance": {...}}

ARRAY is {"dtype": "float64", "shape": [...], "base64": ...}, the little-endian bytes
(see :class:`tallgam.solve.covariance.Covariance`): compact for covariances with many thousand
entries, and exact. A file is written at the oldest version that holds it: a plain
covariance of at most :data:`LIST_COLUMNS` columns as version 1 (the covariance a p × p list
of lists, as earlier releases wrote and read it), anything else as version 2. Other floats
are written with Python's shortest round-trip repr, so a loaded model predicts bit for bit
as the saved one. Loading validates the structure and the version and refuses anything
else; nothing in the file is ever executed.
"""

from __future__ import annotations

import json
import math
import os
import tempfile

import numpy as np

from tallgam.errors import ModelFileError, TallgamError
from tallgam.solve.covariance import Covariance

FORMAT = "tallgam-model"
SCHEMA_VERSION = 2
READABLE_VERSIONS = (1, 2)
LIST_COLUMNS = 1000  # larger covariances are written as encoded arrays (version 2)
_REQUIRED = ("model", "terms", "coefficients", "covariance", "edf", "smoothing",
             "statistics", "profile")


def to_dict(fit) -> dict:
    cov = fit.covariance
    as_list = not cov.structured and cov.p <= LIST_COLUMNS
    return {
        "format": FORMAT,
        "schema_version": 1 if as_list else SCHEMA_VERSION,
        "model": fit.model.to_dict(),
        "terms": [b.to_dict() for b in fit.bases],
        "coefficients": fit.coefficients_raw.tolist(),
        "covariance": cov.dense.tolist() if as_list else cov.to_dict(),
        "edf": fit.edf,
        "smoothing": fit.smoothing,
        "statistics": fit.statistics,
        "profile": fit.profile,
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


def save(fit, path) -> None:
    atomic_write_text(path, json.dumps(_clean(to_dict(fit)), indent=1, allow_nan=False))


def load(path):
    """Read a model file written by :meth:`FitResult.save`."""
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except FileNotFoundError:
        raise ModelFileError(f"model file {os.fspath(path)!r} does not exist") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ModelFileError(f"{os.fspath(path)!r} is not a JSON model file: {exc}") from None
    return from_dict(data, str(path))


def from_dict(data: dict, where: str = "the model file"):
    from tallgam.model import Model
    from tallgam.outputs.result import FitResult
    from tallgam.passes.design import Design
    from tallgam.terms import basis_from_dict

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
        model = Model.from_dict(data["model"])
        bases = [basis_from_dict(t) for t in data["terms"]]
        beta = np.asarray(data["coefficients"], dtype=np.float64)
        cov = _covariance(data["covariance"], version)
    except (TallgamError, KeyError, TypeError, ValueError) as exc:
        raise ModelFileError(f"{where} is inconsistent: {exc}") from None
    p = sum(b.n_raw for b in bases)
    if beta.shape != (p,) or cov.shape != (p, p):
        raise ModelFileError(f"{where} is inconsistent: its terms have {p} coefficients but it "
                             f"holds {beta.shape[0]} and a {cov.shape} covariance")
    if cov.structured and cov.eliminated not in Design(bases).slices:
        raise ModelFileError(f"{where} is inconsistent: the covariance's eliminated columns "
                             "are not those of a term")
    if [b.spec.label for b in bases[1:]] != [t.label for t in model.terms]:
        raise ModelFileError(f"{where} is inconsistent: the terms do not match the model")
    return FitResult(model, bases, beta, cov, data["edf"], data["smoothing"],
                     data["statistics"], data["profile"], data.get("history", []),
                     data.get("notes", []), data.get("provenance", {}),
                     data.get("expressions", {}))


def _covariance(section, version: int) -> Covariance:
    """The covariance section: a p × p list of lists (version 1) or encoded arrays."""
    if version == 1:
        return Covariance(np.asarray(section, dtype=np.float64))
    if not isinstance(section, dict) or "dense" not in section:
        raise ValueError("the covariance section lacks its dense block")
    return Covariance.from_dict(section)
