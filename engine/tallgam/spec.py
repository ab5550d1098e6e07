"""Model specification files (TOML): the same keys as :class:`tallgam.Model`.

Example::

    data = "policies/*.parquet"          # relative paths are taken from the spec's folder
    response = "claim_count"
    family = "poisson"                   # or { name = "tweedie", power = 1.6 }
    exposure = "exposure"
    where = "policy_year >= 2022"
    batch_rows = 1_000_000
    binned = true                        # binned passes: covariates coded into tables

    [[term]]
    kind = "spline"
    column = "driver_age"
    size = 12

    [[term]]
    kind = "categorical"
    column = "fuel"

A ``[bands]`` and a ``[tariff]`` table may follow, for ``tallgam tariff --bands SPEC``
(:mod:`tallgam.outputs.bands`); fitting ignores them.

Unknown keys and wrong types raise :class:`~tallgam.errors.SpecError` naming the key and
suggesting the nearest valid one.
"""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass, field

from tallgam.errors import SpecError, nearest, shorten
from tallgam.model import Model
from tallgam.terms.base import kinds, spec_class

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

_NUMBER = (int, float)
MODEL_KEYS: dict[str, tuple] = {
    "response": (str,), "family": (str, dict), "link": (str,), "exposure": (str,),
    "offset": (str,), "weights": (str,), "where": (str,), "criterion": (str,),
    "missing": (str,), "max_iterations": (int,), "tolerance": _NUMBER,
}
TARIFF_KEYS: dict[str, tuple] = {"bands": (dict,), "tariff": (dict,)}  # read by `tallgam tariff`
RUN_KEYS: dict[str, tuple] = {
    "data": (str, list), "batch_rows": (int,), "threads": (int,), "output": (str,),
    "binned": (bool, int, str), "scratch": (str, bool), "start": (str,), "checkpoint": (str,),
}


@dataclass
class RunSpec:
    """A parsed spec file: the model and how to run it."""

    model: Model
    data: str | list[str] | None = None
    batch_rows: int = 1_000_000
    threads: int | None = None
    output: str | None = None
    path: str | None = None
    binned: bool | int | str = "auto"
    scratch: str | bool | None = None
    start: str | None = None
    checkpoint: str | None = None
    extra: dict = field(default_factory=dict)


def _check_type(where: str, key: str, value, types: tuple) -> None:
    ok = isinstance(value, types) and not (isinstance(value, bool) and bool not in types)
    if not ok:
        names = " or ".join("number" if t is float else {str: "string", int: "integer",
                                                          list: "list", dict: "table",
                                                          bool: "true/false"}[t]
                            for t in types if t is not int or float not in types)
        raise SpecError(f"{where}: key {key!r} must be a {names}, got {shorten(value)}")


def parse_term(table: dict, index: int, folder: str | None = None) -> object:
    """One [[term]] table as a term spec; file options (e.g. a neighbour file) are found
    like the data, from ``folder`` (the spec's)."""
    where = f"[[term]] number {index + 1}"
    if not isinstance(table, dict):
        raise SpecError(f"{where} must be a table")
    kind = table.get("kind")
    if kind is None:
        raise SpecError(f"{where} has no 'kind'; use one of {', '.join(kinds())}")
    spec_cls = spec_class(kind, f"{where}: ")
    allowed = set(spec_cls.options()) | {"kind"}
    for key, value in table.items():
        if key not in allowed:
            raise SpecError(f"{where} ({kind}): unknown key {key!r}{nearest(key, allowed)}; "
                            f"valid keys are {', '.join(sorted(allowed))}")
        types = spec_cls.option_types().get(key)
        if types:
            _check_type(where, key, value, types)
    for needed in spec_cls.required():
        if needed not in table:
            raise SpecError(f"{where} ({kind}) needs {needed!r}")
    args = {k: v for k, v in table.items() if k != "kind"}
    for key in spec_cls.file_options:
        if isinstance(args.get(key), str) and folder is not None:
            args[key] = _resolve(args[key], folder)
    try:
        return spec_cls.from_dict(args)
    except TypeError as exc:
        raise SpecError(f"{where} ({kind}): {exc}") from None


def parse_spec(text: str, path: str | None = None) -> RunSpec:
    """Parse TOML text of a spec; ``path`` locates relative data paths and messages."""
    label = path or "the spec"
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"{label} is not valid TOML: {exc}") from None
    allowed = set(MODEL_KEYS) | set(RUN_KEYS) | set(TARIFF_KEYS) | {"term"}
    for key, value in raw.items():
        if key not in allowed:
            raise SpecError(f"{label}: unknown key {key!r}{nearest(key, allowed)}; valid keys "
                            f"are {', '.join(sorted(allowed))}")
        types = MODEL_KEYS.get(key) or RUN_KEYS.get(key) or TARIFF_KEYS.get(key)
        if types:
            _check_type(label, key, value, types)
    if "response" not in raw:
        raise SpecError(f"{label} needs a 'response'")
    terms_raw = raw.get("term", [])
    if not isinstance(terms_raw, list):
        raise SpecError(f"{label}: terms are written as [[term]] tables")
    base = os.path.dirname(os.path.abspath(path)) if path else os.getcwd()
    terms = [parse_term(t, i, base) for i, t in enumerate(terms_raw)]
    model_args = {k: v for k, v in raw.items() if k in MODEL_KEYS}
    fam = model_args.get("family")
    if isinstance(fam, dict):
        from tallgam.families import get_family

        fam = dict(fam)
        if "name" not in fam:
            raise SpecError(f"{label}: the family table needs a 'name'")
        try:
            model_args["family"] = get_family(fam.pop("name"), **fam)
        except TypeError as exc:
            raise SpecError(f"{label}: bad family parameters: {exc}") from None
    model = Model(terms=terms, **model_args)
    data = raw.get("data")
    if isinstance(data, str):
        data = _resolve(data, base)
    elif isinstance(data, list):
        data = [_resolve(str(d), base) for d in data]
    scratch = raw.get("scratch")
    if isinstance(scratch, str):
        scratch = _resolve(scratch, base)
    start, checkpoint = (_resolve(v, base) if isinstance(v, str) else None
                         for v in (raw.get("start"), raw.get("checkpoint")))
    return RunSpec(model=model, data=data, batch_rows=int(raw.get("batch_rows", 1_000_000)),
                   threads=raw.get("threads"), output=raw.get("output"), path=path,
                   binned=raw.get("binned", "auto"), scratch=scratch, start=start,
                   checkpoint=checkpoint)


def _toml_value(value) -> str:
    import json

    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + " }"
    return json.dumps(str(value), ensure_ascii=False)  # a TOML basic string


def spec_text(model: Model, *, data=None, comment: str | None = None, **run) -> str:
    """A spec file (TOML) for ``model``: the keys that differ from the defaults, one
    ``[[term]]`` table per term; ``data`` and run keys (``batch_rows``, ``binned``, ...)
    first. :func:`parse_spec` reads it back to an equal model."""
    from dataclasses import MISSING, fields

    lines = [f"# {line}" for line in (comment or "").splitlines()]
    if data is not None:
        lines.append(f"data = {_toml_value(data)}")
    lines += [f"{k} = {_toml_value(v)}" for k, v in run.items() if v is not None]
    d = model.to_dict()
    family = {k: v for k, v in d["family"].items() if v is not None}
    lines.append(f"response = {_toml_value(d['response'])}")
    lines.append("family = " + (_toml_value(family["name"]) if len(family) == 1
                                else _toml_value(family)))
    if model.link.name != model.family.default_link:
        lines.append(f"link = {_toml_value(d['link'])}")
    defaults = {f.name: f.default for f in fields(Model)}
    for key in ("exposure", "offset", "weights", "where", "criterion", "missing",
                "max_iterations", "tolerance"):
        if d[key] is not None and d[key] != defaults.get(key):
            lines.append(f"{key} = {_toml_value(d[key])}")
    for term, spec in zip(d["terms"], model.terms):
        lines += ["", "[[term]]", f"kind = {_toml_value(term['kind'])}"]
        given = {f.name: f.default for f in fields(spec) if f.default is not MISSING}
        for key, value in term.items():
            if key == "kind" or value is None:
                continue
            default = given.get(key, MISSING)
            if default is not MISSING and (value == default or (
                    isinstance(default, tuple) and value == list(default))):
                continue
            lines.append(f"{key} = {_toml_value(value)}")
    return "\n".join(lines) + "\n"


def _resolve(p: str, base: str) -> str:
    return p if os.path.isabs(p) else os.path.join(base, p)


def load_spec(path) -> RunSpec:
    path = os.fspath(path)
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except OSError as exc:
        raise SpecError(f"cannot read the spec file {path!r}: {exc.strerror}") from None
    return parse_spec(text, path)
