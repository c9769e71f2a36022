"""The saved-model file: plain arrays plus JSON, with a format version; never a pickle.

A workspace is a file people share, so opening a model saved in it must not be
able to run code (unpickling can), and a library upgrade must not make it
unreadable. A fitted :class:`~contentlab.model.EngagementModel` is written as
one ``.npz`` archive (NumPy's zip of ``.npy`` arrays) read back with
``allow_pickle=False``: every number, text list and table is a typed array,
and one JSON document (``__model__.json`` inside the archive, stored as a
byte array) describes how the arrays make up the model. Only the classes in
``_CLASSES`` can be rebuilt, attribute by attribute.

An archive with an unknown format version, a damaged one, or a pickled model
from an older contentlab gives a :class:`ContentlabError` that says to run
``contentlab learn`` again; never a traceback.
"""

from __future__ import annotations

import io
import json
import zipfile

import numpy as np
import pandas as pd
import scipy.sparse as sp

from .errors import ContentlabError

FORMAT = "contentlab-model"
FORMAT_VERSION = 1
_META = "__model__.json"
RELEARN = "Run `contentlab learn` again to replace it (your posts are unchanged)."


def _classes() -> dict:
    from .features import HeadlineFeaturizer
    from .model import EngagementModel, FittedLinear, WordingVocabulary

    return {c.__name__: c for c in (EngagementModel, HeadlineFeaturizer, WordingVocabulary, FittedLinear)}


class _Writer:
    def __init__(self) -> None:
        self.arrays: dict[str, np.ndarray] = {}

    def array(self, value: np.ndarray) -> str:
        key = f"a{len(self.arrays)}"
        self.arrays[key] = value
        return key

    def encode(self, value):
        """A JSON description of ``value``; arrays go to ``self.arrays``."""
        if value is None or isinstance(value, (bool, str)):
            return {"t": "v", "v": value}
        if isinstance(value, np.generic):
            value = value.item()
        if isinstance(value, (int, float)):
            return {"t": "v", "v": value}
        if isinstance(value, np.ndarray):
            if value.dtype == object:
                return self._objects(value)
            if value.dtype.kind not in "biufU":
                raise TypeError(f"cannot save an array of dtype {value.dtype}")
            return {"t": "array", "k": self.array(value)}
        if isinstance(value, (list, tuple, frozenset, set)):
            kind = {list: "list", tuple: "tuple", frozenset: "frozenset", set: "frozenset"}[type(value)]
            items = sorted(value) if kind == "frozenset" else list(value)
            if items and all(isinstance(x, str) for x in items):
                return {"t": kind, "strings": self.array(np.asarray(items, dtype=str))}
            return {"t": kind, "items": [self.encode(x) for x in items]}
        if isinstance(value, dict):
            if not all(isinstance(k, str) for k in value):
                raise TypeError("cannot save a dict with keys that are not text")
            return {"t": "dict", "keys": list(value), "items": [self.encode(v) for v in value.values()]}
        if isinstance(value, pd.DataFrame):
            if not isinstance(value.index, pd.RangeIndex) or value.index.start != 0 or value.index.step != 1:
                value = value.reset_index(drop=True)
            return {"t": "frame", "columns": [str(c) for c in value.columns],
                    "items": [self.encode(value[c].to_numpy()) for c in value.columns]}
        if sp.issparse(value):
            m = sp.csr_matrix(value)
            return {"t": "csr", "shape": list(m.shape), "data": self.array(m.data),
                    "indices": self.array(m.indices), "indptr": self.array(m.indptr)}
        name = type(value).__name__
        if name in _classes():
            state = value.__getstate__() if hasattr(value, "__getstate__") else vars(value)
            if state is None:
                state = vars(value)
            return {"t": "object", "class": name, "state": self.encode(dict(state))}
        raise TypeError(f"cannot save a value of type {type(value).__name__}")

    def _objects(self, value: np.ndarray):
        """An object array of texts with gaps (None/NaN): the texts plus a missing-value mask."""
        missing = pd.isna(value)
        if not all(isinstance(x, str) for x in value[~missing]):
            raise TypeError("cannot save an object array that holds more than text")
        texts = np.where(missing, "", value).astype(str)
        return {"t": "objects", "k": self.array(texts), "missing": self.array(missing)}


class _Reader:
    def __init__(self, arrays) -> None:
        self.arrays = arrays

    def decode(self, d):
        t = d["t"]
        if t == "v":
            return d["v"]
        if t == "array":
            return self.arrays[d["k"]]
        if t == "objects":
            out = self.arrays[d["k"]].astype(object)
            out[self.arrays[d["missing"]]] = None
            return out
        if t in ("list", "tuple", "frozenset"):
            items = ([str(x) for x in self.arrays[d["strings"]]] if "strings" in d
                     else [self.decode(x) for x in d["items"]])
            return {"list": list, "tuple": tuple, "frozenset": frozenset}[t](items)
        if t == "dict":
            return {k: self.decode(v) for k, v in zip(d["keys"], d["items"])}
        if t == "frame":
            return pd.DataFrame({c: self.decode(v) for c, v in zip(d["columns"], d["items"])})
        if t == "csr":
            return sp.csr_matrix((self.arrays[d["data"]], self.arrays[d["indices"]], self.arrays[d["indptr"]]),
                                 shape=tuple(d["shape"]))
        if t == "object":
            cls = _classes().get(d["class"])
            if cls is None:
                raise ValueError(f"unknown class {d['class']!r}")
            obj = cls.__new__(cls)
            state = self.decode(d["state"])
            if hasattr(obj, "__setstate__"):
                obj.__setstate__(state)
            else:
                obj.__dict__.update(state)
            return obj
        raise ValueError(f"unknown entry kind {t!r}")


def dumps(model) -> bytes:
    """The fitted model as the bytes of an ``.npz`` archive (see the module docstring)."""
    writer = _Writer()
    meta = {"format": FORMAT, "version": FORMAT_VERSION, "model": writer.encode(model)}
    arrays = dict(writer.arrays)
    arrays[_META] = np.frombuffer(json.dumps(meta, allow_nan=True).encode("utf-8"), dtype=np.uint8)
    buf = io.BytesIO()
    np.savez_compressed(buf, **arrays)
    return buf.getvalue()


def loads(blob: bytes, where: str = "the workspace"):
    """The model saved by :func:`dumps`; a clear ContentlabError for anything else."""
    blob = bytes(blob)
    if blob[:1] == b"\x80":
        raise ContentlabError(
            f"The model saved in {where} was written by an older contentlab as a Python pickle, which is no "
            f"longer opened (loading a pickle can run code). {RELEARN}"
        )
    try:
        if not blob.startswith(b"PK"):
            raise ValueError("not a zip archive")
        with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
            arrays = {key: npz[key] for key in npz.files}
        meta = json.loads(arrays.pop(_META).tobytes().decode("utf-8"))
    except (ValueError, KeyError, OSError, EOFError, AttributeError, zipfile.BadZipFile, UnicodeDecodeError) as exc:
        raise ContentlabError(f"The model saved in {where} is damaged or not a contentlab model ({exc}). "
                              f"{RELEARN}") from None
    if not isinstance(meta, dict) or meta.get("format") != FORMAT:
        raise ContentlabError(f"The model saved in {where} is not a contentlab model file. {RELEARN}")
    if meta.get("version") != FORMAT_VERSION:
        raise ContentlabError(
            f"The model saved in {where} uses model-file format version {meta.get('version')!r}, which this "
            f"contentlab (format version {FORMAT_VERSION}) does not read. {RELEARN}"
        )
    try:
        return _Reader(arrays).decode(meta["model"])
    except (ValueError, KeyError, TypeError, IndexError) as exc:
        raise ContentlabError(f"The model saved in {where} is damaged ({exc}). {RELEARN}") from None
