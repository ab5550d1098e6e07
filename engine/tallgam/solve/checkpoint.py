"""Checkpoints of a fit: its state after every data pass, so a killed fit resumes.

``model.fit(data, checkpoint=PATH)`` (``tallgam fit --checkpoint PATH``) writes, after the
profile and after every data pass, one JSON file at PATH (atomically: a kill leaves the
previous checkpoint or the new one, never half a file). It holds what the driver needs to
go on: the profile, the iterate and its history, the smoothing parameters, the family's
fitted parameters and the last pass's sums (the p × p blocks, as exact little-endian
arrays). Started again with the same PATH, the same model and the same data, the fit reads
it and skips the passes already done; the result equals an uninterrupted fit up to the
rounding of the sums (the same passes run in the same order). A checkpoint of another
model, other options or changed data is refused with a message, never silently used. The
file is removed when the fit ends.

The file holds numbers only (JSON, no pickle): nothing in it is executed.
"""

from __future__ import annotations

import hashlib
import json
import os

import numpy as np

from tallgam.atomic import write_text
from tallgam.errors import SpecError
from tallgam.solve.covariance import decode_array, encode_array

FORMAT = "tallgam-checkpoint"
VERSION = 1


def encode(obj):
    """A JSON value of ``obj``: numpy arrays (and numbers) exactly, containers recursively."""
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind in "iub":
            return {"__ints__": obj.astype(np.int64).tolist(), "shape": list(obj.shape)}
        return {"__array__": encode_array(obj.astype(np.float64))}
    if isinstance(obj, np.generic):
        return encode(obj.item())
    if isinstance(obj, float) and not np.isfinite(obj):
        return {"__float__": repr(obj)}
    if isinstance(obj, dict):
        return {"__dict__": [[encode(k), encode(v)] for k, v in obj.items()]}
    if isinstance(obj, tuple):
        return {"__tuple__": [encode(v) for v in obj]}
    if isinstance(obj, list):
        return [encode(v) for v in obj]
    if obj is None or isinstance(obj, (bool, int, float, str)):
        return obj
    raise TypeError(f"a checkpoint cannot hold {type(obj).__name__}")


def decode(obj):
    """Inverse of :func:`encode`."""
    if isinstance(obj, list):
        return [decode(v) for v in obj]
    if isinstance(obj, dict):
        if "__array__" in obj:
            return decode_array(obj["__array__"])
        if "__ints__" in obj:
            return np.asarray(obj["__ints__"], dtype=np.int64).reshape(obj["shape"])
        if "__float__" in obj:
            return float(obj["__float__"])
        if "__tuple__" in obj:
            return tuple(decode(v) for v in obj["__tuple__"])
        if "__dict__" in obj:
            return {decode(k): decode(v) for k, v in obj["__dict__"]}
        raise ValueError(f"unknown checkpoint entry {sorted(obj)[:3]}")
    return obj


def job_key(parts: dict) -> str:
    """A digest of what makes a job the same job (model, options, data's identity)."""
    text = json.dumps(encode(parts), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


class Checkpoint:
    """The checkpoint file of one fit: ``key`` identifies the job (:func:`job_key`)."""

    def __init__(self, path, key: str):
        self.path = os.fspath(path)
        self.key = key
        folder = os.path.dirname(os.path.abspath(self.path))
        if os.path.isdir(self.path):
            raise SpecError(f"the checkpoint {self.path!r} is a folder; give a file name")
        if not os.path.isdir(folder):
            raise SpecError(f"the folder of the checkpoint {self.path!r} does not exist")

    def load(self) -> dict | None:
        """The saved state of this job, or None when there is no checkpoint yet; SpecError
        when the file belongs to another job or is damaged."""
        if not os.path.exists(self.path):
            return None
        try:
            with open(self.path, encoding="utf-8") as fh:
                doc = json.load(fh)
            if doc.get("format") != FORMAT or doc.get("version") != VERSION:
                raise ValueError("not a tallgam checkpoint of this release")
        except (OSError, ValueError) as exc:
            raise SpecError(f"the checkpoint {self.path!r} cannot be read ({exc}); remove it "
                            "to start the fit afresh") from None
        if doc.get("key") != self.key:
            raise SpecError(
                f"the checkpoint {self.path!r} belongs to another fit (another model, other "
                "options or changed data); remove it, or give another checkpoint path")
        try:
            return decode(doc["state"])
        except (KeyError, TypeError, ValueError) as exc:
            raise SpecError(f"the checkpoint {self.path!r} is damaged ({exc}); remove it to "
                            "start the fit afresh") from None

    def save(self, state: dict) -> None:
        """Write ``state`` atomically (the previous checkpoint stays until this one is
        whole)."""
        doc = {"format": FORMAT, "version": VERSION, "key": self.key, "state": encode(state)}
        write_text(self.path, json.dumps(doc, separators=(",", ":"), allow_nan=False))

    def remove(self) -> None:
        if os.path.exists(self.path):
            os.remove(self.path)
